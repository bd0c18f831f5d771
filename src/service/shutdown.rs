//! One stop for the service's threads.
//!
//! In: the main loop's decision to stop (a signal) and its grace time. Out: a
//! [`Shutdown`] handle, cloned into every long-lived thread (the metrics endpoint, the
//! worker pool), that says whether the service is stopping, until when the steps in hand
//! may finish, and when the threads must end. Nothing here waits or exits: the loop
//! decides, the threads look.

use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

#[derive(Default)]
struct Inner {
    /// No new work: finishing what is in hand.
    stopping: AtomicBool,
    /// The threads end now.
    ended: AtomicBool,
    /// When the steps in hand are abandoned.
    deadline: Mutex<Option<Instant>>,
}

/// The service's stop, shared by the threads that must see it.
#[derive(Clone, Default)]
pub struct Shutdown(Arc<Inner>);

impl Shutdown {
    /// A service not stopping.
    pub fn new() -> Self {
        Self::default()
    }

    /// Begin the stop: no new work, the steps in hand have `grace` to finish.
    /// A second call keeps the first deadline.
    pub fn begin(&self, grace: Duration) {
        let mut d = self
            .0
            .deadline
            .lock()
            .unwrap_or_else(std::sync::PoisonError::into_inner);
        if d.is_none() {
            *d = Some(Instant::now() + grace);
        }
        self.0.stopping.store(true, Ordering::Release);
    }

    /// The stop has begun.
    pub fn is_stopping(&self) -> bool {
        self.0.stopping.load(Ordering::Acquire)
    }

    /// When the steps in hand are abandoned, once the stop has begun.
    pub fn deadline(&self) -> Option<Instant> {
        *self
            .0
            .deadline
            .lock()
            .unwrap_or_else(std::sync::PoisonError::into_inner)
    }

    /// The grace time is over.
    pub fn grace_over(&self) -> bool {
        self.deadline().is_some_and(|d| Instant::now() >= d)
    }

    /// The threads end now (the loop has finished with them).
    pub fn end(&self) {
        self.0.stopping.store(true, Ordering::Release);
        self.0.ended.store(true, Ordering::Release);
    }

    /// The threads must end.
    pub fn is_ended(&self) -> bool {
        self.0.ended.load(Ordering::Acquire)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn every_clone_sees_the_stop_and_its_first_deadline() {
        let s = Shutdown::new();
        let seen_by_a_thread = s.clone();
        assert!(!seen_by_a_thread.is_stopping() && seen_by_a_thread.deadline().is_none());
        s.begin(Duration::from_secs(3600));
        let first = seen_by_a_thread.deadline();
        assert!(seen_by_a_thread.is_stopping() && !seen_by_a_thread.is_ended());
        assert!(!seen_by_a_thread.grace_over());
        s.begin(Duration::ZERO);
        assert_eq!(
            seen_by_a_thread.deadline(),
            first,
            "a second signal keeps the deadline"
        );
        s.end();
        assert!(seen_by_a_thread.is_ended());
        let quick = Shutdown::new();
        quick.begin(Duration::ZERO);
        assert!(quick.grace_over());
    }
}
