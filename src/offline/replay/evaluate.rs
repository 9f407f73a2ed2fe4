//! The grid of cells over a stream of slates: every (algorithm, lambda[, window]) re-ranks each
//! slate of a chunk once, and per-cell accumulators keep sums, bootstrap replicate sums and item
//! exposure. Nothing per slate outlives its chunk.
//!
//! Each chunk runs in two parallel steps, so the result does not depend on the number of
//! threads: slates in parallel (kernels and per-slate metrics), then cells in parallel, each
//! adding the chunk's rows in line order.

use rayon::prelude::*;

use super::frontier::Point;
use super::read::Slate;
use crate::serve::pool::run_here;
use medley_core::bootstrap::{self, poisson_weights, Replicates, REPLICATES};
use medley_core::diversify::{self, Diversifier};
use medley_core::evaluate::{alpha_ndcg, ips_clicks, ndcg, reachable, recall};
use medley_core::measures;
use medley_core::model::{Limits, Params};

/// One cell of the grid.
#[derive(Debug, Clone, Copy)]
pub struct Cell {
    /// Diversifier.
    pub algorithm: &'static dyn Diversifier,
    /// Sliding window (dpp, ssd).
    pub window: Option<usize>,
    /// Lambda.
    pub lambda: f64,
}

/// Per-slate metric columns (a row holds one value each; NaN where a slate has none).
pub mod col {
    /// recall@k over all logged clicks.
    pub const RECALL: usize = 0;
    /// nDCG@k over all logged clicks.
    pub const NDCG: usize = 1;
    /// recall@k over the clicked candidates.
    pub const RECALL_REACHABLE: usize = 2;
    /// nDCG@k over the clicked candidates.
    pub const NDCG_REACHABLE: usize = 3;
    /// Relevance retained.
    pub const RETAINED: usize = 4;
    /// Category entropy, bits.
    pub const ENTROPY: usize = 5;
    /// Intra-list distance.
    pub const ILD: usize = 6;
    /// Distinct categories.
    pub const DISTINCT: usize = 7;
    /// Miscalibration (NaN without a profile).
    pub const MISCALIBRATION: usize = 8;
    /// Protected share (NaN without a fairness floor).
    pub const PROTECTED_SHARE: usize = 9;
    /// IPS clicks@k (NaN without the served slate).
    pub const IPS_CLICKS: usize = 10;
    /// α-nDCG@k.
    pub const ALPHA_NDCG: usize = 11;
    /// Number of columns.
    pub const COUNT: usize = 12;
}

/// Statistics bootstrapped per cell: nDCG, entropy, and the pick's metric.
const BOOT_NDCG: usize = 0;
const BOOT_ENTROPY: usize = 1;
const BOOT_PICK: usize = 2;

/// What the grid computes beyond the cells.
#[derive(Debug, Clone, Copy)]
pub struct GridOptions {
    /// Slate length.
    pub k: usize,
    /// Examination propensity exponent of the IPS estimate.
    pub eta: f64,
    /// IPS weight clip.
    pub clip: f64,
    /// α of α-nDCG.
    pub alpha: f64,
    /// The column `--pick` constrains (bootstrapped per replicate).
    pub pick_column: usize,
}

impl GridOptions {
    /// Slate length `k`, the IPS defaults (η = 1, clip 10), α = 0.5, the pick on nDCG.
    #[must_use]
    pub fn new(k: usize) -> Self {
        Self { k, eta: 1.0, clip: 10.0, alpha: 0.5, pick_column: col::NDCG }
    }
}

#[derive(Debug, Clone)]
struct Acc {
    sums: [f64; col::COUNT],
    /// Slates counted in each column (NaN rows are not).
    counts: [u64; col::COUNT],
    boot: Replicates,
    exposure: Vec<u64>,
}

/// Accumulators of every cell; cell 0 is the relevance baseline.
#[derive(Debug)]
pub struct Grid {
    cells: Vec<Cell>,
    params: Vec<Params>,
    acc: Vec<Acc>,
    opts: GridOptions,
    items: usize,
}

/// One slate's results for every cell.
struct SlateOut {
    weights: Vec<u8>,
    rows: Vec<[f64; col::COUNT]>,
    items: Vec<Vec<u32>>,
}

impl Grid {
    /// A grid over `cells` (the baseline is added first).
    ///
    /// # Errors
    /// A message when a cell's parameters are out of range (a window outside 2..=1000).
    pub fn new(cells: &[Cell], opts: GridOptions) -> Result<Self, String> {
        let relevance = diversify::by_name("relevance").ok_or("relevance is registered")?;
        let mut all = vec![Cell { algorithm: relevance, window: None, lambda: 0.0 }];
        all.extend_from_slice(cells);
        let limits = Limits { max_k: opts.k.max(1), ..Limits::default() };
        let params = all
            .iter()
            .map(|c| {
                Params::new(opts.k as u64, c.lambda, &limits)
                    .and_then(|p| p.with_window(c.window.map(|w| w as u64)))
                    .map_err(|e| e.to_string())
            })
            .collect::<Result<Vec<_>, _>>()?;
        let acc = Acc {
            sums: [0.0; col::COUNT],
            counts: [0; col::COUNT],
            boot: Replicates::new(3),
            exposure: Vec::new(),
        };
        Ok(Self { acc: vec![acc; all.len()], cells: all, params, opts, items: 0 })
    }

    /// Evaluates every cell on a chunk of slates and adds them to the accumulators. `items` is
    /// the number of distinct items offered so far.
    ///
    /// # Errors
    /// A message if an algorithm rejects a slate (cannot happen for validated slates with
    /// embeddings, and with profiles for `calibrated`; reported rather than panicking).
    pub fn add_chunk(&mut self, slates: &[Slate], items: usize) -> Result<(), String> {
        let (cells, params, opts) = (&self.cells, &self.params, self.opts);
        let outs: Vec<SlateOut> =
            slates.par_iter().map(|s| evaluate_slate(s, cells, params, opts)).collect::<Result<_, _>>()?;
        self.items = items;
        self.acc.par_iter_mut().enumerate().for_each(|(c, acc)| {
            if acc.exposure.len() < items {
                acc.exposure.resize(items, 0);
            }
            let mut boot = [0.0; 3];
            for out in &outs {
                let row = &out.rows[c];
                for (j, &x) in row.iter().enumerate() {
                    if !x.is_nan() {
                        acc.sums[j] += x;
                        acc.counts[j] += 1;
                    }
                }
                boot[BOOT_NDCG] = row[col::NDCG];
                boot[BOOT_ENTROPY] = row[col::ENTROPY];
                boot[BOOT_PICK] = row[opts.pick_column];
                acc.boot.add(&out.weights, &boot);
                for &i in &out.items[c] {
                    acc.exposure[i as usize] += 1;
                }
            }
        });
        Ok(())
    }

    /// The cells' points; index 0 is the baseline.
    #[must_use]
    pub fn points(&self) -> Vec<Point> {
        let base = &self.acc[0].boot;
        self.cells
            .iter()
            .zip(&self.acc)
            .map(|(cell, acc)| {
                let mean =
                    |j: usize| if acc.counts[j] > 0 { acc.sums[j] / acc.counts[j] as f64 } else { 0.0 };
                let opt = |j: usize| (acc.counts[j] > 0).then(|| acc.sums[j] / acc.counts[j] as f64);
                let exposed = acc.exposure.iter().filter(|&&e| e > 0).count();
                let (ndcg_lo, ndcg_hi) = bootstrap::interval95(acc.boot.means_of(&[(BOOT_NDCG, 1.0)]));
                let (entropy_lo, entropy_hi) =
                    bootstrap::interval95(acc.boot.means_of(&[(BOOT_ENTROPY, 1.0)]));
                let (ndcg_diff_lo, ndcg_diff_hi) = bootstrap::interval95(bootstrap::paired_means(
                    &acc.boot, BOOT_NDCG, base, BOOT_NDCG, 1.0,
                ));
                let mut exposure = acc.exposure.clone();
                exposure.resize(self.items, 0);
                Point {
                    algorithm: cell.algorithm.name(),
                    window: cell.window,
                    lambda: cell.lambda,
                    recall: mean(col::RECALL),
                    ndcg: mean(col::NDCG),
                    recall_reachable: mean(col::RECALL_REACHABLE),
                    ndcg_reachable: mean(col::NDCG_REACHABLE),
                    relevance_retained: mean(col::RETAINED),
                    entropy: mean(col::ENTROPY),
                    ild: mean(col::ILD),
                    distinct: mean(col::DISTINCT),
                    coverage: measures::coverage(exposed, self.items),
                    gini: measures::gini(&exposure),
                    miscalibration: opt(col::MISCALIBRATION),
                    protected_share: opt(col::PROTECTED_SHARE),
                    ips_clicks: opt(col::IPS_CLICKS),
                    alpha_ndcg: mean(col::ALPHA_NDCG),
                    ndcg_lo,
                    ndcg_hi,
                    entropy_lo,
                    entropy_hi,
                    ndcg_diff_lo,
                    ndcg_diff_hi,
                }
            })
            .collect()
    }

    /// The lower end of the paired 95 % bootstrap interval of `metric_cell − factor ·
    /// metric_baseline` for the pick's column: the cell is non-inferior when it is ≥ 0.
    #[must_use]
    pub fn pick_bound(&self, cell: usize, factor: f64) -> f64 {
        let diffs =
            bootstrap::paired_means(&self.acc[cell].boot, BOOT_PICK, &self.acc[0].boot, BOOT_PICK, factor);
        bootstrap::interval95(diffs).0
    }

    /// Number of cells, baseline included.
    #[must_use]
    pub fn len(&self) -> usize {
        self.cells.len()
    }

    /// Never: the baseline is always there.
    #[must_use]
    pub fn is_empty(&self) -> bool {
        self.cells.is_empty()
    }
}

/// Every cell on one slate.
fn evaluate_slate(
    s: &Slate,
    cells: &[Cell],
    params: &[Params],
    opts: GridOptions,
) -> Result<SlateOut, String> {
    let mut weights = vec![0_u8; REPLICATES];
    poisson_weights(s.key, &mut weights);
    let k = opts.k;
    let picks = run_here(|ws| {
        cells
            .iter()
            .zip(params)
            .map(|(cell, p)| {
                cell.algorithm.select(&s.input, p, ws).map(|sel| sel.indices).map_err(|e| e.to_string())
            })
            .collect::<Result<Vec<Vec<usize>>, String>>()
    })
    .map_err(|e| e.to_string())??;
    let score = |sl: &[usize]| sl.iter().map(|&i| s.input.normalized()[i]).sum::<f64>();
    let base_score = score(&picks[0]);
    let nan_unless = |x: Option<f64>| x.unwrap_or(f64::NAN);
    let rows = picks
        .iter()
        .map(|picked| {
            let mut row = [0.0; col::COUNT];
            row[col::RECALL] = recall(picked, &s.clicked, s.relevant);
            row[col::NDCG] = ndcg(picked, &s.clicked, s.relevant, k);
            row[col::RECALL_REACHABLE] = recall(picked, &s.clicked, reachable(&s.clicked));
            row[col::NDCG_REACHABLE] = ndcg(picked, &s.clicked, reachable(&s.clicked), k);
            row[col::RETAINED] = if base_score > 0.0 { score(picked) / base_score } else { 1.0 };
            row[col::ENTROPY] = measures::category_entropy_bits(&s.input, picked);
            row[col::ILD] = measures::intra_list_distance(&s.input, picked).unwrap_or(0.0);
            row[col::DISTINCT] = measures::distinct_categories(&s.input, picked) as f64;
            row[col::MISCALIBRATION] = nan_unless(measures::miscalibration(&s.input, picked));
            row[col::PROTECTED_SHARE] = nan_unless(medley_core::fairness::protected_share(&s.input, picked));
            row[col::IPS_CLICKS] = nan_unless(
                s.served_rank.as_ref().map(|r| ips_clicks(picked, &s.clicked, r, k, opts.eta, opts.clip)),
            );
            row[col::ALPHA_NDCG] = alpha_ndcg(picked, &s.clicked, s.input.groups(), k, opts.alpha);
            row
        })
        .collect();
    let items = picks.iter().map(|p| p.iter().map(|&i| s.item[i]).collect()).collect();
    Ok(SlateOut { weights, rows, items })
}
