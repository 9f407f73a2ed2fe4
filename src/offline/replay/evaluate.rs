//! One cell of the grid: an (algorithm, lambda) re-ranks every slate of the corpus on all cores,
//! and the per-slate metrics are averaged into a [`Point`].

use rayon::prelude::*;

use super::frontier::Point;
use super::read::Corpus;
use crate::serve::pool::run_here;
use medley_core::diversify::{self, Diversifier};
use medley_core::evaluate::{ndcg, reachable, recall};
use medley_core::measures;
use medley_core::model::Params;

/// Per-slate results, summed in parallel.
#[derive(Debug, Clone, Default)]
struct Sums {
    recall: f64,
    ndcg: f64,
    recall_reachable: f64,
    ndcg_reachable: f64,
    retained: f64,
    entropy: f64,
    ild: f64,
    distinct: f64,
    /// Σ miscalibration over slates with a profile, and their count.
    miscalibration: f64,
    profiled: usize,
    /// Σ protected share over slates with a fairness floor, and their count.
    protected_share: f64,
    floored: usize,
}

impl Sums {
    fn add(mut self, o: &Self) -> Self {
        self.recall += o.recall;
        self.ndcg += o.ndcg;
        self.recall_reachable += o.recall_reachable;
        self.ndcg_reachable += o.ndcg_reachable;
        self.retained += o.retained;
        self.entropy += o.entropy;
        self.ild += o.ild;
        self.distinct += o.distinct;
        self.miscalibration += o.miscalibration;
        self.profiled += o.profiled;
        self.protected_share += o.protected_share;
        self.floored += o.floored;
        self
    }
}

/// Evaluates one (algorithm, lambda) on every slate, in parallel.
///
/// # Errors
/// As [`evaluate_window`].
pub fn evaluate(
    corpus: &Corpus,
    algorithm: &'static dyn Diversifier,
    lambda: f64,
    k: usize,
) -> Result<Point, String> {
    evaluate_window(corpus, algorithm, lambda, k, None)
}

/// Evaluates one (algorithm, lambda, window) on every slate, in parallel.
///
/// # Errors
/// A message if the algorithm rejects a slate (cannot happen for validated slates with
/// embeddings, and with profiles for `calibrated`; reported rather than panicking), or the
/// window is outside 2..=1000.
pub fn evaluate_window(
    corpus: &Corpus,
    algorithm: &'static dyn Diversifier,
    lambda: f64,
    k: usize,
    window: Option<usize>,
) -> Result<Point, String> {
    let limits = medley_core::model::Limits { max_k: k.max(1), ..medley_core::model::Limits::default() };
    let params = Params::new(k as u64, lambda, &limits)
        .and_then(|p| p.with_window(window.map(|w| w as u64)))
        .map_err(|e| e.to_string())?;
    let relevance = diversify::by_name("relevance").ok_or("relevance is registered")?;
    let per_slate: Result<Vec<(Sums, Vec<usize>)>, String> = corpus
        .slates
        .par_iter()
        .map(|s| {
            let (picked, base) = run_here(|ws| {
                let picked = algorithm.select(&s.input, &params, ws).map_err(|e| e.to_string())?;
                let base = relevance.select(&s.input, &params, ws).map_err(|e| e.to_string())?;
                Ok::<_, String>((picked.indices, base.indices))
            })
            .map_err(|e| e.to_string())??;
            let score = |sl: &[usize]| sl.iter().map(|&i| s.input.normalized()[i]).sum::<f64>();
            let base_score = score(&base);
            let sums = Sums {
                recall: recall(&picked, &s.clicked, s.relevant),
                ndcg: ndcg(&picked, &s.clicked, s.relevant, k),
                recall_reachable: recall(&picked, &s.clicked, reachable(&s.clicked)),
                ndcg_reachable: ndcg(&picked, &s.clicked, reachable(&s.clicked), k),
                retained: if base_score > 0.0 { score(&picked) / base_score } else { 1.0 },
                entropy: measures::category_entropy_bits(&s.input, &picked),
                ild: measures::intra_list_distance(&s.input, &picked).unwrap_or(0.0),
                distinct: measures::distinct_categories(&s.input, &picked) as f64,
                miscalibration: measures::miscalibration(&s.input, &picked).unwrap_or(0.0),
                profiled: usize::from(s.input.profile().is_some()),
                protected_share: medley_core::fairness::protected_share(&s.input, &picked).unwrap_or(0.0),
                floored: usize::from(s.input.fairness().is_some()),
            };
            Ok((sums, picked.iter().map(|&i| s.item[i] as usize).collect()))
        })
        .collect();
    let per_slate = per_slate?;
    let n = corpus.slates.len().max(1) as f64;
    let total = per_slate.iter().fold(Sums::default(), |acc, (s, _)| acc.add(s));
    let mut exposure = vec![0_u64; corpus.items];
    for (_, items) in &per_slate {
        for &i in items {
            exposure[i] += 1;
        }
    }
    let exposed = exposure.iter().filter(|&&e| e > 0).count();
    Ok(Point {
        algorithm: algorithm.name(),
        window,
        lambda,
        recall: total.recall / n,
        ndcg: total.ndcg / n,
        recall_reachable: total.recall_reachable / n,
        ndcg_reachable: total.ndcg_reachable / n,
        relevance_retained: total.retained / n,
        entropy: total.entropy / n,
        ild: total.ild / n,
        distinct: total.distinct / n,
        coverage: measures::coverage(exposed, corpus.items),
        gini: measures::gini(&exposure),
        miscalibration: (total.profiled > 0).then(|| total.miscalibration / total.profiled as f64),
        protected_share: (total.floored > 0).then(|| total.protected_share / total.floored as f64),
    })
}
