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

use crate::config::Shadow;
use crate::diversify::Workspace;
use crate::engine::Reranked;
use crate::measures;
use crate::metrics::Metrics;
use crate::model::{Params, Selection};

/// Rank-biased overlap persistence used for every comparison.
pub const RBO_P: f64 = 0.9;

/// How a shadow slate differs from the primary one.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Comparison {
    /// `|A ∩ B| / max(|A|, |B|)`: the share of the slate both agree on (k when both are full).
    pub overlap: f64,
    /// Extrapolated rank-biased overlap at `p = 0.9` ([`rbo_ext`]).
    pub rbo: f64,
    /// Category entropy of the shadow slate minus the primary's, in bits.
    pub entropy_delta: f64,
    /// Intra-list distance of the shadow minus the primary; `None` without embeddings.
    pub ild_delta: Option<f64>,
    /// Σ normalised score of the shadow slate ÷ Σ of the primary; `None` when the latter is 0.
    pub relevance_retained: Option<f64>,
}

/// Extrapolated rank-biased overlap of two rankings of equal length.
///
/// # Reference
/// W. Webber, A. Moffat and J. Zobel, "A similarity measure for indefinite rankings", ACM
/// Transactions on Information Systems 28(4), 2010, eq. 32 (RBO_ext with equal evaluation
/// depths): `RBO_ext = X_k/k · p^k + (1 − p)/p · Σ_{d=1..k} X_d/d · p^d`, where `X_d` is the size of
/// the overlap of the two depth-d prefixes. Identical lists give 1, disjoint lists 0.
/// Lists of different lengths are compared on their common depth `k = min(|a|, |b|)`; two empty
/// lists give 1.
///
/// # Complexity
/// O(k²) time with no allocation; k ≤ 1000 here, so at most a million comparisons.
#[must_use]
pub fn rbo_ext(a: &[usize], b: &[usize], p: f64) -> f64 {
    let k = a.len().min(b.len());
    if k == 0 {
        return 1.0;
    }
    let (mut x, mut weight, mut sum) = (0_usize, 1.0_f64, 0.0_f64);
    for d in 1..=k {
        // X_d = X_{d−1} + [a_d ∈ b_{1..d}] + [b_d ∈ a_{1..d}] − [a_d = b_d].
        let (ad, bd) = (a[d - 1], b[d - 1]);
        if ad == bd {
            x += 1;
        } else {
            x += usize::from(b[..d].contains(&ad)) + usize::from(a[..d].contains(&bd));
        }
        weight *= p;
        sum += x as f64 / d as f64 * weight;
    }
    x as f64 / k as f64 * weight + (1.0 - p) / p * sum
}

/// Compares the shadow selection with the primary one on the same validated input.
#[must_use]
pub fn compare(primary: &Reranked, shadow: &Selection) -> Comparison {
    let input = &primary.prepared.input;
    let (a, b) = (&primary.selection.indices, &shadow.indices);
    let longest = a.len().max(b.len());
    let common = a.iter().filter(|i| b.contains(i)).count();
    let overlap = if longest == 0 { 1.0 } else { common as f64 / longest as f64 };
    let score = |s: &[usize]| s.iter().map(|&i| input.normalized()[i]).sum::<f64>();
    let primary_score = score(a);
    Comparison {
        overlap,
        rbo: rbo_ext(a, b, RBO_P),
        entropy_delta: measures::category_entropy_bits(input, b) - measures::category_entropy_bits(input, a),
        ild_delta: measures::intra_list_distance(input, b)
            .zip(measures::intra_list_distance(input, a))
            .map(|(s, p)| s - p),
        relevance_retained: (primary_score > 0.0).then(|| score(b) / primary_score),
    }
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
const ANY_K: crate::model::Limits =
    crate::model::Limits { max_candidates: usize::MAX, max_dim: usize::MAX, max_k: usize::MAX };

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
        ws.trim(crate::pool::RETAIN_WORKSPACE_BYTES);
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

#[cfg(test)]
mod tests {
    use super::*;

    fn close(a: f64, b: f64) -> bool {
        (a - b).abs() < 1e-12
    }

    /// Values derived by hand from Webber et al. 2010, eq. 32, with p = 0.9.
    #[test]
    fn rbo_hand_computed_cases() {
        assert!(close(rbo_ext(&[1, 2, 3, 4], &[1, 2, 3, 4], 0.9), 1.0), "identical lists");
        assert!(close(rbo_ext(&[1, 2, 3], &[4, 5, 6], 0.9), 0.0), "disjoint lists");
        // [a, b, c] vs [b, a, c]: X = (0, 2, 3); 3/3·0.9³ + (0.1/0.9)·(0 + 2/2·0.81 + 3/3·0.729)
        // = 0.729 + 0.171 = 0.9.
        assert!(close(rbo_ext(&[1, 2, 3], &[2, 1, 3], 0.9), 0.9));
        // [a, b] vs [a, c]: X = (1, 1); 1/2·0.81 + (0.1/0.9)·(1·0.9 + 1/2·0.81) = 0.405 + 0.145 = 0.55.
        assert!(close(rbo_ext(&[1, 2], &[1, 3], 0.9), 0.55));
        assert!(close(rbo_ext(&[], &[], 0.9), 1.0));
        // Symmetric, and bounded by [0, 1].
        let (a, b) = ([5, 1, 9, 2, 7], [1, 5, 2, 8, 9]);
        assert!(close(rbo_ext(&a, &b, 0.9), rbo_ext(&b, &a, 0.9)));
        assert!((0.0..=1.0).contains(&rbo_ext(&a, &b, 0.9)));
    }
}
