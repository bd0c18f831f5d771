//! The service's worker threads, kept for its whole life.
//!
//! Each local step and each taking of a batch result runs on a worker
//! thread. A thread started per step and ended after it costs the service
//! memory that is not given back: the C allocator keeps the pages of its
//! per-thread arenas, and the NetCDF/HDF5 libraries keep per-thread state
//! of their own. The pool starts a thread only when none is idle, and a
//! thread that finished its task waits for the next one, so the number of
//! threads follows the most tasks ever running at once (bounded by the
//! configured workers and the batch jobs taken at once), not the number of
//! steps.

use std::sync::atomic::{AtomicUsize, Ordering};
use std::sync::mpsc::{channel, Receiver, Sender};
use std::sync::{Arc, Mutex};

type Task = Box<dyn FnOnce() + Send + 'static>;

struct Shared {
    queue: Mutex<Receiver<Task>>,
    /// The threads, to be joined when the pool closes.
    threads: Mutex<Vec<std::thread::JoinHandle<()>>>,
    /// Threads waiting for a task and not yet promised one.
    idle: AtomicUsize,
    /// Threads started so far.
    started: AtomicUsize,
}

/// A pool of worker threads that grows on demand and never shrinks.
pub struct Pool {
    tx: Sender<Task>,
    shared: Arc<Shared>,
    name: &'static str,
}

impl Pool {
    /// An empty pool; its threads are named `name`.
    pub fn new(name: &'static str) -> Pool {
        let (tx, rx) = channel();
        Pool {
            tx,
            shared: Arc::new(Shared {
                queue: Mutex::new(rx),
                threads: Mutex::new(Vec::new()),
                idle: AtomicUsize::new(0),
                started: AtomicUsize::new(0),
            }),
            name,
        }
    }

    /// Run `task` on an idle thread of the pool, or on a new one if none is
    /// idle. Never waits for a thread to come free.
    pub fn run(&self, task: impl FnOnce() + Send + 'static) {
        let claimed = self
            .shared
            .idle
            .fetch_update(Ordering::AcqRel, Ordering::Acquire, |n| n.checked_sub(1))
            .is_ok();
        if !claimed && !self.start_thread() {
            // No thread can be started: run it on a thread of its own as
            // before, rather than not at all.
            std::thread::spawn(task);
            return;
        }
        if let Err(e) = self.tx.send(Box::new(task)) {
            // The queue is held by the pool itself and never closed while
            // the pool lives; should it be, the task still runs.
            std::thread::spawn(e.0);
        }
    }

    /// Close the pool and join its threads: each ends once its task is done.
    /// Returns the threads still running at `deadline` (left behind, not joined).
    pub fn close(self, deadline: std::time::Instant) -> usize {
        let Pool { tx, shared, .. } = self;
        drop(tx);
        let handles = std::mem::take(
            &mut *shared
                .threads
                .lock()
                .unwrap_or_else(std::sync::PoisonError::into_inner),
        );
        let mut left = 0;
        for h in handles {
            while !h.is_finished() && std::time::Instant::now() < deadline {
                std::thread::sleep(std::time::Duration::from_millis(5));
            }
            if h.is_finished() {
                let _ = h.join();
            } else {
                left += 1;
            }
        }
        left
    }

    /// Threads started so far.
    pub fn threads(&self) -> usize {
        self.shared.started.load(Ordering::Acquire)
    }

    /// Threads idle now.
    pub fn idle(&self) -> usize {
        self.shared.idle.load(Ordering::Acquire)
    }

    fn start_thread(&self) -> bool {
        let shared = self.shared.clone();
        let started = std::thread::Builder::new()
            .name(self.name.to_string())
            .spawn(move || worker(&shared));
        match started {
            Ok(handle) => {
                self.shared.started.fetch_add(1, Ordering::AcqRel);
                self.shared
                    .threads
                    .lock()
                    .unwrap_or_else(std::sync::PoisonError::into_inner)
                    .push(handle);
                true
            }
            Err(e) => {
                tracing::warn!(error = %e, "cannot start a worker thread");
                false
            }
        }
    }
}

/// A worker: take a task, run it, say it is idle, wait for the next one.
/// Ends when the pool is dropped.
fn worker(shared: &Shared) {
    loop {
        let task = {
            let q = shared
                .queue
                .lock()
                .unwrap_or_else(std::sync::PoisonError::into_inner);
            q.recv()
        };
        let Ok(task) = task else {
            return;
        };
        // The tasks catch their own panics; one that escapes must not take
        // the thread's place in the pool with it.
        let _ = std::panic::catch_unwind(std::panic::AssertUnwindSafe(task));
        shared.idle.fetch_add(1, Ordering::AcqRel);
    }
}

/// Run `work`, which may touch libnetcdf and HDF5, the one way leeward does:
/// HDF5's own error printing off, a panic caught and returned as the words
/// of a defect ([`defect`]), HDF5's free lists given back afterwards, panic
/// or not. The service's step and take tasks and a batch job's step go
/// through it.
pub fn guarded<T>(work: impl FnOnce() -> T) -> Result<T, String> {
    crate::output::quiet_hdf5_errors();
    let r = std::panic::catch_unwind(std::panic::AssertUnwindSafe(work))
        .map_err(|p| defect(&panic_text(&*p)));
    crate::output::release_hdf5_free_lists();
    r
}

/// The words of an internal error: a defect in leeward, not in the input.
pub fn defect(what: &str) -> String {
    format!("internal error (a defect in leeward): {what}")
}

/// What a caught panic said.
pub fn panic_text(p: &(dyn std::any::Any + Send)) -> String {
    p.downcast_ref::<&str>()
        .map(|s| s.to_string())
        .or_else(|| p.downcast_ref::<String>().cloned())
        .unwrap_or_else(|| "unknown".into())
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::sync::mpsc::channel;
    use std::time::{Duration, Instant};

    /// Wait (up to a minute, for a loaded machine) until `cond` holds.
    fn wait_for(cond: impl Fn() -> bool) {
        let end = Instant::now() + Duration::from_secs(60);
        while !cond() {
            assert!(Instant::now() < end, "condition not reached in 60 s");
            std::thread::sleep(Duration::from_millis(2));
        }
    }

    #[test]
    fn one_task_after_another_runs_on_one_thread() {
        let pool = Pool::new("test-worker");
        let (tx, rx) = channel();
        for k in 0..200 {
            let tx = tx.clone();
            pool.run(move || {
                tx.send((k, std::thread::current().id())).unwrap();
            });
            let (got, _) = rx.recv().unwrap();
            assert_eq!(got, k);
            // The thread is back in the pool before the next task comes.
            wait_for(|| pool.idle() == 1);
        }
        // A thread per task would have started 200.
        assert_eq!(pool.threads(), 1);
    }

    #[test]
    fn tasks_at_once_get_a_thread_each_and_no_more() {
        let pool = Pool::new("test-worker");
        let (tx, rx) = channel();
        let gate = Arc::new(std::sync::Barrier::new(5));
        for round in 0..20 {
            // Four tasks that can only end together: each needs a thread.
            for _ in 0..4 {
                let (tx, gate) = (tx.clone(), gate.clone());
                pool.run(move || {
                    gate.wait();
                    tx.send(std::thread::current().id()).unwrap();
                });
            }
            gate.wait();
            let ids: std::collections::BTreeSet<_> = (0..4)
                .map(|_| format!("{:?}", rx.recv().unwrap()))
                .collect();
            assert_eq!(ids.len(), 4, "round {round}: four tasks on four threads");
            wait_for(|| pool.idle() == 4);
        }
        assert_eq!(pool.threads(), 4);
    }

    #[test]
    fn a_task_that_panics_leaves_its_thread_in_the_pool() {
        let pool = Pool::new("test-worker");
        pool.run(|| panic!("planted"));
        wait_for(|| pool.idle() == 1);
        let (tx, rx) = channel();
        pool.run(move || tx.send(1).unwrap());
        assert_eq!(rx.recv().unwrap(), 1);
        assert_eq!(pool.threads(), 1);
    }

    #[test]
    fn a_guarded_panic_comes_back_as_the_words_of_a_defect() {
        assert_eq!(guarded(|| 3), Ok(3));
        let e = guarded(|| -> u8 { panic!("planted {}", 7) }).unwrap_err();
        assert_eq!(e, "internal error (a defect in leeward): planted 7");
        let e = guarded(|| -> u8 { std::panic::panic_any(5u8) }).unwrap_err();
        assert!(e.ends_with("unknown"), "{e}");
        // libnetcdf still writes a file after a caught panic on this thread.
        let p = std::env::temp_dir().join(format!("leeward-guard-{}.nc", std::process::id()));
        let made = guarded(|| netcdf::create(&p).map(|_| ()).is_ok());
        assert_eq!(made, Ok(true));
        let _ = std::fs::remove_file(&p);
    }

    /// A pool of three tasks that each wait for a go; what each finished sends.
    fn three_waiting(name: &'static str) -> (Pool, Sender<()>, Receiver<usize>) {
        let pool = Pool::new(name);
        let (go_tx, go_rx) = channel::<()>();
        let go_rx = Arc::new(Mutex::new(go_rx));
        let (done_tx, done_rx) = channel::<usize>();
        for k in 0..3 {
            let (go, done) = (go_rx.clone(), done_tx.clone());
            pool.run(move || {
                let _ = go.lock().map(|g| g.recv());
                let _ = done.send(k);
            });
        }
        assert_eq!(pool.threads(), 3);
        (pool, go_tx, done_rx)
    }

    #[test]
    fn closing_joins_every_thread_once_its_task_is_done() {
        // Tasks still running at the deadline are left behind, not joined.
        let (held, go, _) = three_waiting("leeward-test-held");
        assert_eq!(held.close(Instant::now()), 3);
        for _ in 0..3 {
            let _ = go.send(());
        }
        // Tasks that end before the deadline are waited for and their threads joined.
        let (pool, go, done) = three_waiting("leeward-test-close");
        std::thread::spawn(move || {
            std::thread::sleep(Duration::from_millis(50));
            for _ in 0..3 {
                let _ = go.send(());
            }
        });
        assert_eq!(pool.close(Instant::now() + Duration::from_secs(60)), 0);
        let mut ran: Vec<usize> = done.try_iter().collect();
        ran.sort_unstable();
        assert_eq!(
            ran,
            vec![0, 1, 2],
            "every task ran to its end before the join"
        );
    }
}
