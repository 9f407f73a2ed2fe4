//! Shadow runs: a second diversifier on a sample of a slice's requests, off the request path,
//! compared with the production slate and recorded as metrics.
//!
//! After the primary response is built, the handler hands the validated input and the primary
//! selection (moved, not copied) to [`ShadowRunner::submit`]. That never blocks: the queue is a
//! bounded channel, and a full queue drops the job and counts it in
//! `medley_shadow_dropped_total{slice}`. One dedicated thread (`medley-shadow`) runs the jobs with
//! its own workspace, so shadow work never takes a kernel-pool thread from production requests,
//! and neither its errors nor its latency can reach a client.

use std::sync::mpsc::{sync_channel, Receiver, SyncSender, TrySendError};
use std::sync::{Arc, Mutex};
use std::thread::JoinHandle;
use std::time::Instant;

use crate::serve::config::Shadow;
use crate::serve::engine::Reranked;
use crate::serve::metrics::Metrics;
use medley_core::diversify::Workspace;
use medley_core::measures::{self, Comparison};
use medley_core::model::{Params, Selection};

/// Compares the shadow selection with the primary one on the same validated input.
#[must_use]
pub fn compare(primary: &Reranked, shadow: &Selection) -> Comparison {
    measures::compare(&primary.prepared.input, &primary.selection.indices, &shadow.indices)
}

enum Message {
    Run(Box<Reranked>, Shadow),
    Stop,
}

/// The bounded queue and the shadow worker thread.
#[derive(Debug)]
pub struct ShadowRunner {
    tx: SyncSender<Message>,
    metrics: Arc<Metrics>,
    worker: Mutex<Option<JoinHandle<()>>>,
}

impl std::fmt::Debug for Message {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str(match self {
            Self::Run(..) => "Run",
            Self::Stop => "Stop",
        })
    }
}

impl ShadowRunner {
    /// Starts the worker with a queue of `capacity` jobs.
    ///
    /// # Errors
    /// When the OS refuses to start the thread.
    pub fn start(capacity: usize, metrics: Arc<Metrics>) -> std::io::Result<Self> {
        let (tx, rx) = sync_channel(capacity);
        let worker_metrics = metrics.clone();
        let worker = std::thread::Builder::new()
            .name("medley-shadow".into())
            .spawn(move || work(&rx, &worker_metrics))?;
        Ok(Self { tx, metrics, worker: Mutex::new(Some(worker)) })
    }

    /// Queues a shadow run of `shadow` against `primary`; drops it (and counts the drop) when the
    /// queue is full. Never blocks.
    pub fn submit(&self, primary: Reranked, shadow: Shadow) {
        let slice = primary.prepared.slice.clone();
        match self.tx.try_send(Message::Run(Box::new(primary), shadow)) {
            Ok(()) => {}
            Err(TrySendError::Full(_) | TrySendError::Disconnected(_)) => {
                self.metrics.shadow_dropped.with_label_values(&[&slice]).inc();
            }
        }
    }

    /// Lets queued jobs finish, then stops and joins the worker. Blocks; call it off the runtime.
    pub fn stop(&self) {
        let _ = self.tx.send(Message::Stop);
        let handle = self.worker.lock().map(|mut w| w.take()).unwrap_or(None);
        if let Some(handle) = handle {
            let _ = handle.join();
        }
    }
}

/// The primary's k already passed the configured limit; the shadow reuses it unchecked.
const ANY_K: medley_core::model::Limits =
    medley_core::model::Limits { max_candidates: usize::MAX, max_dim: usize::MAX, max_k: usize::MAX };

fn work(rx: &Receiver<Message>, metrics: &Metrics) {
    let mut ws = Workspace::new();
    while let Ok(Message::Run(primary, shadow)) = rx.recv() {
        let started = Instant::now();
        let p = &primary.prepared;
        // The primary's k and lambda were validated; the shadow's lambda was validated with its
        // config. Params::new cannot fail on them, but a shadow must never panic the worker.
        let Ok(params) = Params::new(p.params.k() as u64, shadow.lambda, &ANY_K)
            .map(|q| q.with_max_per_category(p.params.max_per_category()))
        else {
            continue;
        };
        let outcome = std::panic::catch_unwind(std::panic::AssertUnwindSafe(|| {
            if p.input.is_empty() {
                Ok(Selection::default())
            } else {
                shadow.algorithm.select(&p.input, &params, &mut ws)
            }
        }));
        ws.trim(crate::serve::pool::RETAIN_WORKSPACE_BYTES);
        let Ok(Ok(selection)) = outcome else {
            if outcome.is_err() {
                metrics.panics.inc();
                ws = Workspace::new();
            }
            continue;
        };
        let elapsed = started.elapsed().as_secs_f64();
        metrics.observe_shadow(&p.slice, shadow.algorithm.name(), elapsed, &compare(&primary, &selection));
    }
}
