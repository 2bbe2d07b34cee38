//! Cancellation of abandoned computations. A blocking computation cannot be interrupted from outside, so
//! the computing routes check a shared flag between their units of work (methods, levels, layers, the base
//! and stressed laws) and give up early once nobody waits for the answer: the request timed out, the client
//! went away, or a batch line ran over its time.

use crate::api::problem::Problem;
use axum::http::StatusCode;
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::Arc;

/// The computation's side of the flag: cheap to check.
#[derive(Debug, Clone, Default)]
pub struct Cancel(Option<Arc<AtomicBool>>);

/// The waiter's side: sets the flag when dropped (the request future or the batch line was dropped) or when
/// `cancel` is called.
#[derive(Debug)]
pub struct CancelOnDrop(Arc<AtomicBool>);

impl Cancel {
    /// A flag that is never set (the plain `compute` functions, tests, benchmarks).
    pub fn never() -> Cancel {
        Cancel(None)
    }

    /// A new flag and the guard that sets it.
    pub fn pair() -> (Cancel, CancelOnDrop) {
        let flag = Arc::new(AtomicBool::new(false));
        (Cancel(Some(flag.clone())), CancelOnDrop(flag))
    }

    pub fn is_cancelled(&self) -> bool {
        self.0.as_ref().is_some_and(|f| f.load(Ordering::Relaxed))
    }

    /// `Err` once cancelled: the answer would be thrown away, so the computation stops with a problem that
    /// nobody is expected to read (408, the usual reason).
    pub fn check(&self) -> Result<(), Problem> {
        if self.is_cancelled() {
            return Err(Problem::new(
                StatusCode::REQUEST_TIMEOUT,
                "timeout",
                "Request timeout",
                "the computation was abandoned: its time ran out or the client went away",
            ));
        }
        Ok(())
    }
}

impl CancelOnDrop {
    pub fn cancel(&self) {
        self.0.store(true, Ordering::Relaxed);
    }
}

impl Drop for CancelOnDrop {
    fn drop(&mut self) {
        self.cancel();
    }
}

/// Run a computing route's work on the blocking pool, off the async threads, with a cancellation flag whose
/// guard lives in the calling future: when the timeout (or a client going away) drops that future, the
/// computation sees the flag and stops.
pub async fn off_executor<T: Send + 'static>(
    work: impl FnOnce(&Cancel) -> Result<T, Problem> + Send + 'static,
) -> Result<T, Problem> {
    let (cancel, _guard) = Cancel::pair();
    tokio::task::spawn_blocking(move || work(&cancel))
        .await
        .map_err(|e| Problem::internal(format!("computation failed: {e}")))?
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_flag_is_set_by_dropping_the_guard_and_never_for_never() {
        let (c, guard) = Cancel::pair();
        assert!(c.check().is_ok());
        drop(guard);
        assert!(c.is_cancelled());
        assert_eq!(c.check().unwrap_err().status, 408);
        assert!(Cancel::never().check().is_ok());
    }
}
