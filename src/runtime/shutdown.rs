//! One stop signal for the whole process. SIGTERM, SIGINT or a caller begin it once; every
//! loop reads it: the service loop, the broker probe, retry back-offs (which give up once
//! it began), the topic checks on the async side, and the watchdog that bounds how long
//! stopping may take. Threads wait on a condition variable, async tasks on a `Notify`.
//!
//! Hand-written on purpose: one flag must be read by blocking threads (condition variable,
//! sleeps that end early) and by async tasks alike, with a watchdog that exits with a
//! named code; tokio's cancellation token serves async tasks only.

use std::sync::{Arc, Condvar, Mutex};
use std::time::{Duration, Instant};

use tokio::sync::Notify;

/// A cloneable handle on the process's stop signal.
#[derive(Clone, Default)]
pub struct Shutdown {
    inner: Arc<Inner>,
}

#[derive(Default)]
struct Inner {
    begun: Mutex<bool>,
    threads: Condvar,
    tasks: Notify,
}

impl Shutdown {
    /// A signal that has not begun.
    pub fn new() -> Shutdown {
        Shutdown::default()
    }

    /// Begins shutdown; later calls do nothing.
    pub fn begin(&self) {
        let mut begun = self.inner.begun.lock().expect("shutdown lock");
        if !*begun {
            *begun = true;
            self.inner.threads.notify_all();
            self.inner.tasks.notify_waiters();
        }
    }

    /// Whether shutdown has begun.
    pub fn is_begun(&self) -> bool {
        *self.inner.begun.lock().expect("shutdown lock")
    }

    /// Sleeps for `duration` on this thread; false when shutdown began first (it returns
    /// at once then).
    pub fn sleep(&self, duration: Duration) -> bool {
        let until = Instant::now() + duration;
        let mut begun = self.inner.begun.lock().expect("shutdown lock");
        while !*begun {
            let left = until.saturating_duration_since(Instant::now());
            if left.is_zero() {
                return true;
            }
            begun = self
                .inner
                .threads
                .wait_timeout(begun, left)
                .expect("shutdown lock")
                .0;
        }
        false
    }

    /// Blocks this thread until shutdown begins.
    pub fn wait(&self) {
        let mut begun = self.inner.begun.lock().expect("shutdown lock");
        while !*begun {
            begun = self.inner.threads.wait(begun).expect("shutdown lock");
        }
    }

    /// Resolves once shutdown has begun.
    pub async fn begun(&self) {
        loop {
            // Registered before the check, so a `begin` between the two is not missed.
            let notified = self.inner.tasks.notified();
            if self.is_begun() {
                return;
            }
            notified.await;
        }
    }

    /// Sleeps for `duration` on an async task; false when shutdown began first.
    pub async fn sleep_async(&self, duration: Duration) -> bool {
        tokio::select! {
            _ = self.begun() => false,
            _ = tokio::time::sleep(duration) => !self.is_begun(),
        }
    }

    /// Starts a thread that ends the process with `exit_code` if stopping takes longer
    /// than `limit` after shutdown began. Dropping the returned guard (stopping finished)
    /// disarms it.
    pub fn arm_watchdog(&self, limit: Duration, exit_code: i32) -> WatchdogGuard {
        let (disarm, disarmed) = std::sync::mpsc::channel::<()>();
        let shutdown = self.clone();
        std::thread::Builder::new()
            .name("simtide-shutdown-watchdog".into())
            .spawn(move || {
                shutdown.wait();
                if let Err(std::sync::mpsc::RecvTimeoutError::Timeout) = disarmed.recv_timeout(limit) {
                    tracing::error!(
                        seconds = limit.as_secs_f64(),
                        "shutdown did not finish within live.shutdown_timeout; exiting now (committed state is safe)"
                    );
                    std::process::exit(exit_code);
                }
            })
            .expect("a thread can be started");
        WatchdogGuard { _disarm: disarm }
    }
}

/// Keeps the shutdown watchdog armed while it lives.
pub struct WatchdogGuard {
    _disarm: std::sync::mpsc::Sender<()>,
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn sleep_ends_early_once_shutdown_begins() {
        let shutdown = Shutdown::new();
        assert!(
            shutdown.sleep(Duration::from_millis(5)),
            "a full sleep before shutdown"
        );
        let other = shutdown.clone();
        let stopper = std::thread::spawn(move || {
            std::thread::sleep(Duration::from_millis(50));
            other.begin();
        });
        let started = Instant::now();
        assert!(!shutdown.sleep(Duration::from_secs(30)));
        assert!(started.elapsed() < Duration::from_secs(5));
        stopper.join().unwrap();
        assert!(shutdown.is_begun() && !shutdown.sleep(Duration::from_secs(30)));
    }

    #[test]
    fn async_waiters_see_a_begin_from_a_thread() {
        let runtime = tokio::runtime::Builder::new_current_thread()
            .enable_time()
            .build()
            .unwrap();
        let shutdown = Shutdown::new();
        let other = shutdown.clone();
        std::thread::spawn(move || {
            std::thread::sleep(Duration::from_millis(50));
            other.begin();
        });
        let slept_fully = runtime.block_on(shutdown.sleep_async(Duration::from_secs(30)));
        assert!(!slept_fully);
        runtime.block_on(shutdown.begun());
    }
}
