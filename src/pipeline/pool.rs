//! A fixed pool of CPU worker threads for the numerical stages.
//!
//! Why not `tokio::task::spawn_blocking`: its thread cap is very large and it gives no place to
//! keep per-thread state. Each worker here owns a `State` built once on its own thread (planned
//! bases, solver buffers), so steady-state jobs neither plan nor allocate. Jobs go in through an
//! unbounded queue whose depth the caller bounds by how many jobs it keeps in flight (the
//! dispatcher never has more than [`WorkerPool::capacity`] outstanding), so submitting never
//! blocks an async task; results come back on a tokio channel the dispatcher awaits.

use std::sync::atomic::{AtomicU64, AtomicUsize, Ordering};
use std::sync::{mpsc, Arc, Mutex};
use std::thread::JoinHandle;
use std::time::Instant;

/// Busy-time and job counters of a pool, readable at any time (metrics never block the pool).
#[derive(Debug, Default)]
pub struct PoolStats {
    /// Jobs finished.
    pub jobs_done: AtomicU64,
    /// Total nanoseconds the workers spent in jobs.
    pub busy_ns: AtomicU64,
    /// Jobs submitted and not yet finished.
    pub in_flight: AtomicUsize,
}

/// A fixed set of worker threads, each with its own `State`, running `Job`s into `Out`s.
pub struct WorkerPool<Job: Send + 'static> {
    tx: Option<mpsc::Sender<Job>>,
    handles: Vec<JoinHandle<()>>,
    workers: usize,
    stats: Arc<PoolStats>,
}

impl<Job: Send + 'static> std::fmt::Debug for WorkerPool<Job> {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("WorkerPool")
            .field("workers", &self.workers)
            .finish()
    }
}

impl<Job: Send + 'static> WorkerPool<Job> {
    /// Starts `workers` threads (at least one). Each builds its state with `init` and handles
    /// every job with `run`, sending the result to `out`. The pool stops when it is dropped or
    /// [`WorkerPool::join`]ed, after finishing the jobs already queued.
    pub fn start<State, Out, I, R>(
        workers: usize,
        name: &str,
        init: I,
        run: R,
        out: tokio::sync::mpsc::UnboundedSender<Out>,
    ) -> std::io::Result<Self>
    where
        Out: Send + 'static,
        I: Fn() -> State + Send + Sync + 'static,
        R: Fn(&mut State, Job) -> Out + Send + Sync + 'static,
    {
        let workers = workers.max(1);
        let (tx, rx) = mpsc::channel::<Job>();
        let rx = Arc::new(Mutex::new(rx));
        let init = Arc::new(init);
        let run = Arc::new(run);
        let stats = Arc::new(PoolStats::default());
        let mut handles = Vec::with_capacity(workers);
        for i in 0..workers {
            let rx = Arc::clone(&rx);
            let init = Arc::clone(&init);
            let run = Arc::clone(&run);
            let out = out.clone();
            let stats = Arc::clone(&stats);
            let handle = std::thread::Builder::new()
                .name(format!("{name}-{i}"))
                .spawn(move || {
                    let mut state = init();
                    loop {
                        // The lock is held only while waiting for the next job.
                        let job = match rx.lock() {
                            Ok(guard) => guard.recv(),
                            Err(_) => return,
                        };
                        let Ok(job) = job else { return };
                        let started = Instant::now();
                        let result = run(&mut state, job);
                        stats
                            .busy_ns
                            .fetch_add(started.elapsed().as_nanos() as u64, Ordering::Relaxed);
                        stats.jobs_done.fetch_add(1, Ordering::Relaxed);
                        stats.in_flight.fetch_sub(1, Ordering::Relaxed);
                        if out.send(result).is_err() {
                            return;
                        }
                    }
                })?;
            handles.push(handle);
        }
        Ok(Self {
            tx: Some(tx),
            handles,
            workers,
            stats,
        })
    }

    /// Number of worker threads.
    pub fn workers(&self) -> usize {
        self.workers
    }

    /// How many jobs the dispatcher should keep in flight at most: enough to keep every worker
    /// busy while results travel back, few enough that queued work stays small.
    pub fn capacity(&self) -> usize {
        self.workers * 2
    }

    /// The pool's counters.
    pub fn stats(&self) -> Arc<PoolStats> {
        Arc::clone(&self.stats)
    }

    /// Queues a job. Returns the job back if the pool has stopped.
    pub fn submit(&self, job: Job) -> Result<(), Job> {
        match &self.tx {
            Some(tx) => {
                self.stats.in_flight.fetch_add(1, Ordering::Relaxed);
                tx.send(job).map_err(|e| {
                    self.stats.in_flight.fetch_sub(1, Ordering::Relaxed);
                    e.0
                })
            }
            None => Err(job),
        }
    }

    /// Stops taking jobs, lets the workers finish what is queued, and waits for them.
    pub fn join(mut self) {
        self.shutdown();
    }

    fn shutdown(&mut self) {
        self.tx.take();
        for h in self.handles.drain(..) {
            let _ = h.join();
        }
    }
}

impl<Job: Send + 'static> Drop for WorkerPool<Job> {
    fn drop(&mut self) {
        self.shutdown();
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn runs_every_job_once_with_per_thread_state() {
        let (tx, mut rx) = tokio::sync::mpsc::unbounded_channel();
        let pool = WorkerPool::start(
            2,
            "test",
            || 0u64,
            |count: &mut u64, job: u64| {
                *count += 1;
                job * 2
            },
            tx,
        )
        .unwrap();
        for j in 0..100u64 {
            pool.submit(j).unwrap();
        }
        pool.join();
        let mut got = Vec::new();
        while let Ok(v) = rx.try_recv() {
            got.push(v);
        }
        got.sort();
        assert_eq!(got, (0..100u64).map(|j| j * 2).collect::<Vec<_>>());
    }
}
