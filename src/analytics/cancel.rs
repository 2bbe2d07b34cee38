//! Cancellation of abandoned computations. A blocking computation cannot be interrupted from outside, so
//! it checks a shared flag and gives up early once nobody waits for the answer: the request timed out, the
//! client went away, or a batch line ran over its time. The questions check it between their units of work
//! (methods, levels, layers, the base and stressed laws); the pipeline also hands it to the engine
//! (`engine::interrupt`), whose long loops check it inside one evaluation.

use super::error::Error;
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

    /// The shared flag, for the engine's loops (None for [`Cancel::never`]).
    pub fn flag(&self) -> Option<Arc<AtomicBool>> {
        self.0.clone()
    }

    pub fn is_cancelled(&self) -> bool {
        self.0.as_ref().is_some_and(|f| f.load(Ordering::Relaxed))
    }

    /// `Err` once cancelled: the answer would be thrown away, so the computation stops.
    pub fn check(&self) -> Result<(), Error> {
        if self.is_cancelled() {
            return Err(Error::Cancelled);
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

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_flag_is_set_by_dropping_the_guard_and_never_for_never() {
        let (c, guard) = Cancel::pair();
        assert!(c.check().is_ok());
        drop(guard);
        assert!(c.is_cancelled());
        assert_eq!(c.check(), Err(Error::Cancelled));
        assert!(Cancel::never().check().is_ok());
    }
}
