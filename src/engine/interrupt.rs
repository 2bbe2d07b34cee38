//! Stopping a computation that nobody waits for any more. The engine's long loops (tilt clusters, leaf
//! blocks, merges, the contribution tree) ask [`requested`] between their units of work and, once it is
//! true, stop early with placeholder results; the caller that set the flag (the analytics pipeline, on a
//! timeout or a client gone) throws those results away. The flag belongs to the thread running the
//! computation ([`with`]); work spread over more threads carries it along ([`current`]).
//!
//! A flag rather than a `Result` in every signature: the methods' answers stay plain values, and a stopped
//! computation has no answer to give anyway.

use std::cell::RefCell;
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::Arc;

thread_local! {
    static FLAG: RefCell<Option<Arc<AtomicBool>>> = const { RefCell::new(None) };
}

/// Run `f` with `flag` as this thread's stop flag (restored afterwards, also on a panic).
pub fn with<R>(flag: Option<Arc<AtomicBool>>, f: impl FnOnce() -> R) -> R {
    struct Restore(Option<Arc<AtomicBool>>);
    impl Drop for Restore {
        fn drop(&mut self) {
            let prev = self.0.take();
            FLAG.with(|c| *c.borrow_mut() = prev);
        }
    }
    let _restore = Restore(FLAG.with(|c| c.replace(flag)));
    f()
}

/// Whether the computation on this thread should stop.
pub fn requested() -> bool {
    FLAG.with(|c| c.borrow().as_ref().is_some_and(|f| f.load(Ordering::Relaxed)))
}

/// This thread's flag, to hand to threads that share its work.
pub fn current() -> Option<Arc<AtomicBool>> {
    FLAG.with(|c| c.borrow().clone())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_flag_is_scoped_to_its_thread_and_restored() {
        assert!(!requested());
        let flag = Arc::new(AtomicBool::new(false));
        with(Some(flag.clone()), || {
            assert!(!requested());
            flag.store(true, Ordering::Relaxed);
            assert!(requested());
            let carried = current();
            std::thread::spawn(move || {
                assert!(!requested(), "a new thread starts without a flag");
                with(carried, || assert!(requested()));
            })
            .join()
            .unwrap();
            with(None, || assert!(!requested()));
            assert!(requested());
        });
        assert!(!requested());
    }
}
