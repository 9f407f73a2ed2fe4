//! The bounded CPU pool the service runs kernels on, so diversification never stalls the async
//! runtime's I/O threads.
//!
//! A slate whose estimated work is small runs inline on the async worker: handing it to the pool
//! and waking the task again costs more than the kernel (see [`INLINE_WORK_BELOW`]). Each thread,
//! pool or async worker, keeps one [`Workspace`] in a thread-local, so steady-state calls reuse
//! their buffers. A panic in a job is caught here and returned as [`PoolError::Panicked`]; rayon
//! would otherwise abort the process.

use std::cell::RefCell;
use std::panic::{catch_unwind, AssertUnwindSafe};
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::Arc;

use medley_core::diversify::Workspace;

/// Default inline cut-off in work units.
///
/// A work unit is roughly one multiply-add of the kernel ([`medley_core::Diversifier::work`]); DPP at
/// (N, d, k) = (500, 64, 50) is 1.9 M units and ran in 400–550 µs on the 2-vCPU dev VM, so
/// 100 000 units is about 25 µs of kernel, about four times the 6 µs hop to the pool and back:
/// below it the hop is a large share of the work, and a stall that short does not hurt the
/// async worker (DEVELOPERS.md, "Inline cut-off", has the measurement).
pub const INLINE_WORK_BELOW: u64 = 100_000;

/// Scratch space a thread keeps between jobs. A DPP slate of (N, d) = (5 000, 256) needs about
/// 6 MiB (10 MiB on the lazy strategy) and stays cached; the largest slates the default limits
/// allow need up to about 25 MiB, which is freed after the job instead of staying pinned in every
/// pool thread that ever ran one.
pub const RETAIN_WORKSPACE_BYTES: usize = 16 << 20;

thread_local! {
    static WORKSPACE: RefCell<Workspace> = RefCell::new(Workspace::new());
}

/// Why a pool job produced no result.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
pub enum PoolError {
    /// The job panicked; the message is the panic payload when it was a string.
    #[error("the kernel panicked: {0}")]
    Panicked(String),
}

/// The kernel pool.
#[derive(Debug)]
pub struct Pool {
    threads: rayon::ThreadPool,
    inline_below: u64,
}

impl Pool {
    /// Starts `threads` worker threads named `medley-kernel-N`.
    ///
    /// # Errors
    /// When the OS refuses to start a thread.
    pub fn new(threads: usize, inline_below: u64) -> Result<Self, rayon::ThreadPoolBuildError> {
        let threads = rayon::ThreadPoolBuilder::new()
            .num_threads(threads.max(1))
            .thread_name(|i| format!("medley-kernel-{i}"))
            .build()?;
        Ok(Self { threads, inline_below })
    }

    /// Number of worker threads.
    #[must_use]
    pub fn threads(&self) -> usize {
        self.threads.current_num_threads()
    }

    /// Runs `job` with this thread's workspace: inline when `work` is below the cut-off,
    /// otherwise on the pool, awaiting the result without blocking the runtime.
    ///
    /// Dropping the returned future (the deadline passed, the client went away) raises the job's
    /// cancel flag: a job still queued is skipped, and MMR and DPP stop at their next step.
    ///
    /// # Errors
    /// [`PoolError::Panicked`] if the job panicked.
    pub async fn run<R, F>(&self, work: u64, job: F) -> Result<R, PoolError>
    where
        R: Send + 'static,
        F: FnOnce(&mut Workspace) -> R + Send + 'static,
    {
        if work < self.inline_below {
            return run_here(job);
        }
        let (tx, rx) = tokio::sync::oneshot::channel();
        // When this future is dropped unfinished (the deadline passed, the client went away),
        // the guard raises the flag and the kernel stops at its next step.
        let cancel = CancelOnDrop(Arc::new(AtomicBool::new(false)));
        let flag = cancel.0.clone();
        self.threads.spawn(move || {
            if flag.load(Ordering::Relaxed) {
                return; // abandoned while queued
            }
            let result = run_here(|ws| {
                ws.set_cancel(Some(flag));
                job(ws)
            });
            // The receiver may be gone; nothing to do then.
            let _ = tx.send(result);
        });
        let result = rx.await.unwrap_or_else(|_| Err(PoolError::Panicked("the pool dropped the job".into())));
        // Raising the flag now, with the job done, changes nothing.
        drop(cancel);
        result
    }

    /// Runs `f` on the pool and blocks the calling (non-async) thread until it returns; for the
    /// batch subcommand, which parallelises with rayon inside `f`.
    pub fn install<R: Send>(&self, f: impl FnOnce() -> R + Send) -> R {
        self.threads.install(f)
    }
}

/// Raises its flag when dropped: held by the future that waits for a pool job.
struct CancelOnDrop(Arc<AtomicBool>);

impl Drop for CancelOnDrop {
    fn drop(&mut self) {
        self.0.store(true, Ordering::Relaxed);
    }
}

/// Runs `job` on the current thread with its thread-local workspace, catching a panic.
///
/// # Errors
/// [`PoolError::Panicked`] if the job panicked.
pub fn run_here<R>(job: impl FnOnce(&mut Workspace) -> R) -> Result<R, PoolError> {
    catch_unwind(AssertUnwindSafe(|| {
        WORKSPACE.with(|ws| match ws.try_borrow_mut() {
            Ok(mut ws) => {
                // No flag from an earlier job (one that panicked, say) carries over.
                ws.set_cancel(None);
                let result = job(&mut ws);
                ws.trim(RETAIN_WORKSPACE_BYTES);
                result
            }
            // Re-entrant use (a job calling run_here) gets a fresh workspace.
            Err(_) => job(&mut Workspace::new()),
        })
    }))
    .map_err(|payload| PoolError::Panicked(panic_message(payload.as_ref())))
}

/// The text of a panic payload, when it has one.
#[must_use]
pub fn panic_message(payload: &(dyn std::any::Any + Send)) -> String {
    if let Some(s) = payload.downcast_ref::<&str>() {
        (*s).to_owned()
    } else if let Some(s) = payload.downcast_ref::<String>() {
        s.clone()
    } else {
        "non-string panic payload".to_owned()
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn estimates_order_algorithms_by_cost() {
        use medley_core::diversify::by_name;
        let (dpp, relevance) = (by_name("dpp").unwrap(), by_name("relevance").unwrap());
        assert_eq!(dpp.work(500, 64, 50), 500 * 50 * 64 + 2 * 50 * 50 * 64);
        assert_eq!(relevance.work(1024, 64, 50), 1024 * 11);
        assert_eq!(dpp.work(0, 64, 50), 0);
        assert!(dpp.work(10, 4, 5) < INLINE_WORK_BELOW);
        assert!(dpp.work(500, 64, 50) > INLINE_WORK_BELOW);
    }

    #[tokio::test]
    async fn runs_inline_and_on_the_pool_and_catches_panics() {
        let pool = Pool::new(1, 10).unwrap();
        let here = std::thread::current().id();
        assert_eq!(pool.run(0, move |_| std::thread::current().id()).await.unwrap(), here);
        assert_ne!(pool.run(10, move |_| std::thread::current().id()).await.unwrap(), here);
        let err = pool.run(10, |_| -> u8 { panic!("boom") }).await.unwrap_err();
        assert_eq!(err, PoolError::Panicked("boom".into()));
        let err = pool.run(0, |_| -> u8 { panic!("inline {}", 1) }).await.unwrap_err();
        assert_eq!(err, PoolError::Panicked("inline 1".into()));
        // The pool survives a panic.
        assert_eq!(pool.run(10, |_| 7).await.unwrap(), 7);
    }

    /// A DPP run on `n` random rows of dimension `d`, then the bytes its workspace kept.
    async fn retained_after_dpp(pool: &Pool, n: usize, d: usize) -> usize {
        use medley_core::{CandidateInput, Diversifier, Limits, Params, RerankInput, ScoreTransform};
        let mut state = 7u64;
        let mut next = move || {
            state = state.wrapping_mul(6_364_136_223_846_793_005).wrapping_add(1_442_695_040_888_963_407);
            (state >> 40) as f32 / (1u64 << 24) as f32 - 0.5
        };
        let cands = (0..n)
            .map(|i| CandidateInput {
                id: format!("c{i}"),
                score: f64::from(next()),
                category: None,
                embedding: Some((0..d).map(|_| next()).collect()),
            })
            .collect();
        let limits = Limits { max_candidates: n, ..Limits::default() };
        let input = RerankInput::new(cands, ScoreTransform::MinMax, true, &limits).unwrap();
        let params = Params::new(3, 0.5, &limits).unwrap();
        pool.run(u64::MAX, move |ws| medley_core::diversify::Dpp.select(&input, &params, ws).unwrap())
            .await
            .unwrap();
        pool.run(u64::MAX, |ws| ws.retained_bytes()).await.unwrap()
    }

    #[tokio::test]
    async fn a_huge_slate_does_not_pin_its_scratch_space() {
        let pool = Pool::new(1, 10).unwrap();
        // 500 × 64 rows in f32 screening panels are 128 KiB: kept for the next call.
        assert!(retained_after_dpp(&pool, 500, 64).await >= 500 * 64 * 4);
        // 9 000 × 512 are 18 MiB, over RETAIN_WORKSPACE_BYTES: freed once the job is done.
        const { assert!(9_000 * 512 * 4 > RETAIN_WORKSPACE_BYTES) };
        assert_eq!(retained_after_dpp(&pool, 9_000, 512).await, 0);
    }
}
