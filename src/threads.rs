//! The plumbing every background part shares: a poison-tolerant lock and a set of named
//! threads that are joined exactly once, on stop or on drop.
//!
//! The score recorder, the outcome writer, score retention and the training pool each own a
//! few OS threads beside the async runtime. Each keeps its own stop signal (it lives with the
//! state its threads wait on), and hands the spawning and the joining to [`Threads`].

use std::sync::{Mutex, MutexGuard};
use std::thread::JoinHandle;

/// Locks `m`, taking the data even if a thread panicked while holding it: every state kept
/// behind these locks is valid between statements, and a panicking run must not take the
/// service's bookkeeping down with it.
pub(crate) fn lock<T>(m: &Mutex<T>) -> MutexGuard<'_, T> {
    m.lock().unwrap_or_else(|p| p.into_inner())
}

/// Named background threads, joined once.
#[derive(Default)]
pub(crate) struct Threads {
    handles: Mutex<Vec<JoinHandle<()>>>,
}

impl Threads {
    /// Starts a thread named `name` running `body`.
    ///
    /// # Panics
    /// When the OS refuses a thread: the service cannot run without its background parts.
    pub(crate) fn spawn(&self, name: impl Into<String>, body: impl FnOnce() + Send + 'static) {
        let name = name.into();
        let handle = std::thread::Builder::new()
            .name(name.clone())
            .spawn(body)
            .unwrap_or_else(|e| panic!("cannot start the {name} thread: {e}"));
        lock(&self.handles).push(handle);
    }

    /// One set with a single thread.
    pub(crate) fn one(name: impl Into<String>, body: impl FnOnce() + Send + 'static) -> Threads {
        let threads = Threads::default();
        threads.spawn(name, body);
        threads
    }

    /// Takes the threads not yet joined; the caller joins them (or gives up on them).
    pub(crate) fn take(&self) -> Vec<JoinHandle<()>> {
        lock(&self.handles).drain(..).collect()
    }

    /// Joins every thread not yet joined, in start order. The caller has told them to stop.
    pub(crate) fn join(&self) {
        for handle in self.take() {
            let _ = handle.join();
        }
    }
}

#[cfg(test)]
mod tests {
    use std::sync::atomic::{AtomicUsize, Ordering};
    use std::sync::Arc;

    use super::Threads;

    #[test]
    fn join_waits_for_every_thread_once() {
        let done = Arc::new(AtomicUsize::new(0));
        let threads = Threads::default();
        for i in 0..3 {
            let done = Arc::clone(&done);
            threads.spawn(format!("t{i}"), move || {
                std::thread::sleep(std::time::Duration::from_millis(5));
                done.fetch_add(1, Ordering::SeqCst);
            });
        }
        threads.join();
        assert_eq!(done.load(Ordering::SeqCst), 3);
        // A second join has nothing left to wait for.
        threads.join();
        assert!(threads.take().is_empty());
    }
}
