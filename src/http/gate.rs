//! The bound on request-time DSP. A handler that filters or envelopes a
//! block (FFTs of up to 2^20 samples) runs that work on a blocking thread
//! through [`DspGate::run`], never on the async workers, and at most
//! `permits` such computations run at once. A request that finds every
//! permit taken waits up to the gate's `wait` for one and is then answered
//! 503 ([`ApiError::Busy`]); the README's HTTP API section says so.

use std::sync::Arc;
use std::time::Duration;

use tokio::sync::Semaphore;

use crate::http::error::ApiError;

/// How long a request waits for a free permit before its 503.
pub const DSP_WAIT: Duration = Duration::from_secs(2);

/// A semaphore of `permits` and the wait for one of them.
#[derive(Debug)]
pub struct DspGate {
    permits: Arc<Semaphore>,
    size: usize,
    wait: Duration,
}

impl DspGate {
    /// A gate of `permits` (at least 1) concurrent computations; a request
    /// waits up to `wait` for one.
    pub fn new(permits: usize, wait: Duration) -> DspGate {
        let size = permits.max(1);
        DspGate {
            permits: Arc::new(Semaphore::new(size)),
            size,
            wait,
        }
    }

    /// One permit per core the process may use, and [`DSP_WAIT`].
    pub fn per_core() -> DspGate {
        let cores = std::thread::available_parallelism().map_or(1, std::num::NonZero::get);
        DspGate::new(cores, DSP_WAIT)
    }

    /// The number of computations that may run at once.
    pub fn size(&self) -> usize {
        self.size
    }

    /// Runs `work` on a blocking thread once a permit is free. The permit
    /// moves into that thread, so a client that hangs up does not free it
    /// before the computation ends.
    ///
    /// # Errors
    /// [`ApiError::Busy`] when no permit came free within the wait;
    /// [`ApiError::Internal`] if the computation panicked.
    pub async fn run<T, F>(&self, work: F) -> Result<T, ApiError>
    where
        T: Send + 'static,
        F: FnOnce() -> T + Send + 'static,
    {
        let permit =
            match tokio::time::timeout(self.wait, self.permits.clone().acquire_owned()).await {
                Ok(Ok(p)) => p,
                // The semaphore is never closed; treat it as our fault if it is.
                Ok(Err(_)) => return Err(ApiError::Internal),
                Err(_) => return Err(ApiError::Busy(self.size)),
            };
        tokio::task::spawn_blocking(move || {
            let out = work();
            drop(permit);
            out
        })
        .await
        .map_err(|e| {
            tracing::error!(error = %e, "a request-time DSP task failed");
            ApiError::Internal
        })
    }

    /// Takes every permit (tests: a gate at its bound).
    #[cfg(test)]
    pub(crate) fn hold_all(&self) -> tokio::sync::OwnedSemaphorePermit {
        self.permits
            .clone()
            .try_acquire_many_owned(u32::try_from(self.size).expect("permits fit u32"))
            .expect("no permit is taken")
    }
}
