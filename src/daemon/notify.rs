//! The systemd notify protocol (`Type=notify`), through the `sd-notify`
//! crate: `READY=1` once every source task is spawned and the HTTP
//! listener is bound, a `STATUS=` summary then and every
//! [`STATUS_EVERY`], `WATCHDOG=1` at half of `WATCHDOG_USEC` while the
//! runtime and every DSP worker make progress, `STOPPING=1` at shutdown.
//! Without `NOTIFY_SOCKET` every call is a no-op.
//!
//! The watchdog pings from a tokio task, so a stuck runtime sends nothing;
//! and it pings only when each DSP worker's [`Heartbeat`] moved since the
//! last ping ([`should_ping`]), so a stuck worker sends nothing either, and
//! systemd restarts the service after `WatchdogSec=`.

use std::time::Duration;

use sd_notify::NotifyState;

use crate::alarm::state::AlarmState;
use crate::pipeline::state::{AppState, LiveState};
use crate::pipeline::Heartbeat;

/// How often the `STATUS=` summary is refreshed.
pub const STATUS_EVERY: Duration = Duration::from_secs(10);

/// Sends notify messages when the service manager asked for them.
#[derive(Debug, Clone, Copy)]
pub struct Notifier {
    enabled: bool,
}

impl Notifier {
    /// On when `NOTIFY_SOCKET` is set.
    pub fn from_env() -> Notifier {
        Notifier {
            enabled: std::env::var_os("NOTIFY_SOCKET").is_some_and(|s| !s.is_empty()),
        }
    }

    pub fn enabled(self) -> bool {
        self.enabled
    }

    fn send(self, states: &[NotifyState<'_>]) {
        if !self.enabled {
            return;
        }
        if let Err(e) = sd_notify::notify(states) {
            tracing::warn!(error = %e, "cannot send to NOTIFY_SOCKET");
        }
    }

    /// `READY=1` with the first status line.
    pub fn ready(self, status: &str) {
        self.send(&[NotifyState::Ready, NotifyState::Status(status)]);
    }

    pub fn status(self, status: &str) {
        self.send(&[NotifyState::Status(status)]);
    }

    pub fn watchdog(self) {
        self.send(&[NotifyState::Watchdog]);
    }

    pub fn stopping(self) {
        self.send(&[NotifyState::Stopping, NotifyState::Status("stopping")]);
    }
}

/// The ping period asked for: half of `WATCHDOG_USEC` (when set for this
/// process), `None` when the watchdog is off.
pub fn watchdog_period() -> Option<Duration> {
    sd_notify::watchdog_enabled()
        .filter(|t| !t.is_zero())
        .map(|t| t / 2)
}

/// Whether to ping: every worker's count moved since the counts taken at
/// the last ping (`last`; same workers, same order). A worker whose count
/// stands still is stalled: no ping.
pub fn should_ping(last: &[u64], now: &[u64]) -> bool {
    last.len() == now.len() && last.iter().zip(now).all(|(a, b)| a != b)
}

/// The short `STATUS=` line: channels, sources connected, alarms active.
pub fn summary(state: &AppState) -> String {
    let up = state
        .sources
        .iter()
        .filter(|s| s.connected.load(std::sync::atomic::Ordering::Relaxed))
        .count();
    let (mut alert, mut danger) = (0usize, 0usize);
    for ch in &state.channels {
        if let Some(board) = ch.alarm_board.load_full() {
            for a in &board.alarms {
                match a.state {
                    AlarmState::Alert => alert += 1,
                    AlarmState::Danger => danger += 1,
                    AlarmState::Normal | AlarmState::Inhibited => {}
                }
            }
        }
    }
    format!(
        "{} channel(s), {up}/{} source(s) up, {alert} alert, {danger} danger",
        state.channels.len(),
        state.sources.len()
    )
}

/// Sends `READY=1` and starts the task that refreshes the status and pings
/// the watchdog; `None` (nothing sent) without `NOTIFY_SOCKET`. The task
/// runs until aborted.
pub fn start(
    notifier: Notifier,
    state: LiveState,
    beats: Vec<Heartbeat>,
) -> Option<tokio::task::JoinHandle<()>> {
    if !notifier.enabled() {
        return None;
    }
    notifier.ready(&summary(&state.load()));
    let period = watchdog_period();
    tracing::info!(
        watchdog_ms = period.map(|p| p.as_millis() as u64),
        "systemd notified: ready"
    );
    Some(tokio::spawn(run(notifier, state, beats, period)))
}

async fn run(
    notifier: Notifier,
    state: LiveState,
    beats: Vec<Heartbeat>,
    period: Option<Duration>,
) {
    let counts = |b: &[Heartbeat]| b.iter().map(Heartbeat::get).collect::<Vec<u64>>();
    let mut last = counts(&beats);
    let mut status = tokio::time::interval(STATUS_EVERY);
    status.set_missed_tick_behavior(tokio::time::MissedTickBehavior::Delay);
    status.tick().await; // the first tick is now: READY carried the status
    let mut ping = tokio::time::interval(period.unwrap_or(Duration::from_secs(3600)));
    ping.set_missed_tick_behavior(tokio::time::MissedTickBehavior::Delay);
    ping.tick().await;
    let mut stalled_logged = false;
    loop {
        tokio::select! {
            // The state as it is now: a reload may have changed it.
            _ = status.tick() => notifier.status(&summary(&state.load())),
            _ = ping.tick(), if period.is_some() => {
                let now = counts(&beats);
                if should_ping(&last, &now) {
                    notifier.watchdog();
                    last = now;
                    stalled_logged = false;
                } else if !stalled_logged {
                    tracing::error!(workers = beats.len(), "a DSP worker made no progress: watchdog not pinged");
                    stalled_logged = true;
                }
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn pings_only_when_every_worker_moved() {
        assert!(should_ping(&[1, 5], &[2, 9]));
        assert!(!should_ping(&[1, 5], &[2, 5]), "worker 1 stalled");
        assert!(!should_ping(&[1, 5], &[1, 5]), "both stalled");
        assert!(!should_ping(&[1], &[2, 3]), "different workers");
        assert!(should_ping(&[], &[]), "no worker: the runtime alone");
    }

    #[test]
    fn no_socket_no_op() {
        // NOTIFY_SOCKET is not set in the test environment (if it were,
        // this would be sending into it).
        if std::env::var_os("NOTIFY_SOCKET").is_none() {
            let n = Notifier::from_env();
            assert!(!n.enabled());
            n.ready("x");
            n.stopping();
        }
    }
}
