//! Shutdown: one signal the pipeline triggers, one [`Shutdown`] listener
//! per task that must stop.
//!
//! A task keeps its [`Shutdown`] and races its work against
//! [`Shutdown::recv`] in a `tokio::select!`; `recv` returns once the signal
//! is triggered, or once the [`ShutdownSignal`] is dropped (a dropped
//! sender can never trigger, so waiting on would be waiting forever), and
//! from then on returns at once.

use tokio::sync::watch;

/// The sending side, held by whoever starts the tasks (the pipeline).
#[derive(Debug)]
pub struct ShutdownSignal {
    tx: watch::Sender<bool>,
}

impl ShutdownSignal {
    pub fn new() -> ShutdownSignal {
        let (tx, _) = watch::channel(false);
        ShutdownSignal { tx }
    }

    /// Tells every listener to stop. Triggering twice is harmless.
    pub fn trigger(&self) {
        self.tx.send_replace(true);
    }

    /// A listener for one task. A listener made after [`trigger`](Self::trigger)
    /// is shut down from the start.
    pub fn subscribe(&self) -> Shutdown {
        Shutdown::new(self.tx.subscribe())
    }
}

impl Default for ShutdownSignal {
    fn default() -> Self {
        ShutdownSignal::new()
    }
}

/// One task's view of the shutdown signal.
#[derive(Debug, Clone)]
pub struct Shutdown {
    /// `recv` has returned: the signal came or the sender is gone.
    done: bool,
    rx: watch::Receiver<bool>,
}

impl Shutdown {
    /// Listens on a watch channel whose value turns `true` to shut down.
    pub fn new(rx: watch::Receiver<bool>) -> Shutdown {
        Shutdown { done: false, rx }
    }

    /// True once the signal has been triggered (whether or not `recv` has
    /// seen it yet), or once `recv` has returned.
    pub fn is_shutdown(&self) -> bool {
        self.done || *self.rx.borrow()
    }

    /// Waits for the signal. Returns at once if it has already come; a
    /// dropped sender counts as the signal. Cancel-safe: dropping the
    /// future (another `select!` branch won) loses nothing.
    pub async fn recv(&mut self) {
        if self.done {
            return;
        }
        loop {
            if *self.rx.borrow_and_update() {
                break;
            }
            if self.rx.changed().await.is_err() {
                break;
            }
        }
        self.done = true;
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::time::Duration;
    use tokio::time::timeout;

    /// Long enough for a woken task to run on a loaded machine; the tests
    /// that expect a return never wait this long unless they fail.
    const BOUND: Duration = Duration::from_secs(5);

    #[tokio::test]
    async fn recv_returns_after_trigger() {
        let signal = ShutdownSignal::new();
        let mut s = signal.subscribe();
        let waiter = tokio::spawn(async move {
            s.recv().await;
            s.is_shutdown()
        });
        tokio::task::yield_now().await;
        signal.trigger();
        let done = timeout(BOUND, waiter).await;
        assert!(matches!(done, Ok(Ok(true))), "{done:?}");
    }

    #[tokio::test]
    async fn recv_waits_while_not_triggered() {
        let signal = ShutdownSignal::new();
        let mut s = signal.subscribe();
        let waited = timeout(Duration::from_millis(50), s.recv()).await;
        assert!(waited.is_err(), "recv returned with no trigger");
        assert!(!s.is_shutdown());
        drop(signal);
    }

    #[tokio::test]
    async fn recv_returns_at_once_after_a_dropped_sender() {
        let signal = ShutdownSignal::new();
        let mut s = signal.subscribe();
        drop(signal);
        assert!(timeout(BOUND, s.recv()).await.is_ok());
        assert!(s.is_shutdown());
        // And every later call too.
        assert!(timeout(BOUND, s.recv()).await.is_ok());
    }

    #[tokio::test]
    async fn is_shutdown_before_and_after() {
        let signal = ShutdownSignal::new();
        let mut s = signal.subscribe();
        let copy = s.clone();
        assert!(!s.is_shutdown());
        signal.trigger();
        assert!(s.is_shutdown(), "visible before recv");
        assert!(copy.is_shutdown(), "a clone sees it too");
        assert!(timeout(BOUND, s.recv()).await.is_ok());
        assert!(s.is_shutdown());
    }

    #[tokio::test]
    async fn a_listener_made_after_the_trigger_is_already_shut_down() {
        let signal = ShutdownSignal::new();
        signal.trigger();
        signal.trigger();
        let mut late = signal.subscribe();
        assert!(late.is_shutdown());
        assert!(timeout(BOUND, late.recv()).await.is_ok());
    }
}
