//! The threads that run re-estimations: a few plain OS threads at the lowest CPU priority the kernel offers
//! (`SCHED_IDLE` on Linux), fed through a queue.
//!
//! A fit is milliseconds of pure CPU. On tokio's blocking pool it competes at normal priority with the event loop,
//! the workers and, on a gateway, the MQTT broker itself, and measurably stretches message latency (daemon_e2e
//! case d). At idle priority a fit only gets CPU nobody else wants, so the message path never waits for one; a
//! fit may then take longer, which only delays when new parameters apply.

use std::sync::mpsc;
use std::sync::{Arc, Mutex};
use tracing::{debug, warn};

type Job = Box<dyn FnOnce() + Send + 'static>;

/// A fixed set of idle-priority threads; jobs queue without bound (the daemon has at most one per channel).
pub struct FitPool {
    tx: Mutex<mpsc::Sender<Job>>,
}

impl FitPool {
    pub fn new(threads: usize) -> Self {
        let (tx, rx) = mpsc::channel::<Job>();
        let rx = Arc::new(Mutex::new(rx));
        for i in 0..threads.max(1) {
            let rx = rx.clone();
            let spawned = std::thread::Builder::new()
                .name(format!("gaugewise-fit-{i}"))
                .spawn(move || {
                    lower_priority();
                    loop {
                        // The lock is held only to take one job, never while it runs.
                        let job = match rx.lock() {
                            Ok(r) => r.recv(),
                            Err(p) => p.into_inner().recv(),
                        };
                        match job {
                            Ok(job) => job(),
                            Err(_) => break, // the pool was dropped
                        }
                    }
                });
            if let Err(e) = spawned {
                warn!("cannot start re-estimation thread {i}: {e}");
            }
        }
        FitPool { tx: Mutex::new(tx) }
    }

    /// Queues `job`; false if no thread is left to run it.
    pub fn submit(&self, job: impl FnOnce() + Send + 'static) -> bool {
        let tx = match self.tx.lock() {
            Ok(t) => t,
            Err(p) => p.into_inner(),
        };
        tx.send(Box::new(job)).is_ok()
    }
}

/// Puts the calling thread at idle priority; where that is not possible, at the lowest nice value.
fn lower_priority() {
    #[cfg(target_os = "linux")]
    {
        let param = libc::sched_param { sched_priority: 0 };
        // SAFETY: sched_setscheduler with pid 0 changes only the calling thread's policy; `param` is valid.
        let rc = unsafe { libc::sched_setscheduler(0, libc::SCHED_IDLE, &param) };
        if rc == 0 {
            return;
        }
        debug!("SCHED_IDLE refused; lowering the nice value instead");
    }
    #[cfg(unix)]
    {
        // SAFETY: nice() only changes the calling thread's (on Linux) or process's priority.
        let _ = unsafe { libc::nice(19) };
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn jobs_run_and_report_back() {
        let pool = FitPool::new(2);
        let (tx, rx) = mpsc::channel();
        for k in 0..10 {
            let tx = tx.clone();
            assert!(pool.submit(move || tx.send(k * k).unwrap()));
        }
        let mut got: Vec<i32> = (0..10)
            .map(|_| rx.recv_timeout(std::time::Duration::from_secs(10)).unwrap())
            .collect();
        got.sort();
        assert_eq!(got, (0..10).map(|k| k * k).collect::<Vec<_>>());
    }

    #[cfg(target_os = "linux")]
    #[test]
    fn threads_run_at_idle_priority() {
        let pool = FitPool::new(1);
        let (tx, rx) = mpsc::channel();
        pool.submit(move || {
            // SAFETY: reads the calling thread's policy.
            tx.send(unsafe { libc::sched_getscheduler(0) }).unwrap();
        });
        let policy = rx.recv_timeout(std::time::Duration::from_secs(10)).unwrap();
        assert_eq!(policy, libc::SCHED_IDLE);
    }
}
