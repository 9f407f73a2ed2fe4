//! Replay accumulators: a grid of cells (algorithm, lambda, window) evaluated on logged slates
//! with their clicks, per-cell sums, Poisson-bootstrap replicate sums and item exposure, and the
//! means and intervals read off them ([`Point`]).
//!
//! Pure and sequential: a caller evaluates slates with [`evaluate_slate`] (in parallel if it
//! likes, one [`Workspace`] per thread) and adds the rows in line order with [`Grid::add`] (or,
//! per cell in parallel, through [`Grid::accumulators_mut`]); the result does not depend on how
//! the work was split. Metrics are in [`crate::evaluate`], the bootstrap in [`crate::bootstrap`].
//!
//! Memory: per cell, [`col::COUNT`] sums, 3 × [`REPLICATES`] replicate sums and one exposure
//! count per distinct item; nothing per slate.

use crate::bootstrap::{self, poisson_weights, Replicates, REPLICATES};
use crate::diversify::{self, Diversifier, KernelError, Workspace};
use crate::evaluate::{alpha_ndcg, ips_clicks, ndcg, reachable, recall};
use crate::measures;
use crate::model::{Limits, Params, RerankInput};

/// A validated logged slate with its clicks.
#[derive(Debug)]
pub struct LoggedSlate {
    /// The validated candidates (embeddings required by the geometric algorithms).
    pub input: RerankInput,
    /// Whether each candidate was clicked.
    pub clicked: Vec<bool>,
    /// Distinct ids the line logs as clicked, among the candidates or not: the relevant set of
    /// the standard nDCG and recall.
    pub relevant: usize,
    /// Each candidate's 1-based rank in the served slate (0: not shown), when the line logged
    /// the served slate.
    pub served_rank: Option<Vec<u32>>,
    /// The bootstrap key ([`bootstrap::key_of_id`] of the request id, else
    /// [`bootstrap::key_of_line`]).
    pub key: u64,
    /// Global item number of each candidate (for coverage and exposure).
    pub item: Vec<u32>,
    /// Line number, counted over all input files (for messages).
    pub line: u64,
}

impl LoggedSlate {
    /// A logged slate from its validated candidates, the ids the line logs as clicked (among
    /// the candidates or not; repeats count once), and the served slate's ids in order when the
    /// line logged it. Items are left unnumbered ([`LoggedSlate::item`] is for the reader to
    /// fill).
    #[must_use]
    pub fn new(
        input: RerankInput,
        clicked: &[String],
        served: Option<&[String]>,
        key: u64,
        line: u64,
    ) -> Self {
        let mut distinct: Vec<&str> = clicked.iter().map(String::as_str).collect();
        distinct.sort_unstable();
        distinct.dedup();
        let clicked = input.ids().iter().map(|id| distinct.binary_search(&id.as_str()).is_ok()).collect();
        let served_rank = served.map(|items| {
            let rank: std::collections::HashMap<&str, u32> =
                items.iter().enumerate().map(|(r, id)| (id.as_str(), (r + 1) as u32)).collect();
            input.ids().iter().map(|id| rank.get(id.as_str()).copied().unwrap_or(0)).collect()
        });
        Self { input, clicked, relevant: distinct.len(), served_rank, key, item: Vec::new(), line }
    }
}

/// The grid's cells in report order: per algorithm, unbounded first and then one line per
/// window for the algorithms that take one (`dpp`, `ssd`), each over every lambda.
#[must_use]
pub fn grid_cells(algorithms: &[&'static dyn Diversifier], windows: &[usize], lambdas: &[f64]) -> Vec<Cell> {
    let mut cells = Vec::new();
    for &algorithm in algorithms {
        let mut lines = vec![None];
        if algorithm.takes_window() {
            lines.extend(windows.iter().map(|&w| Some(w)));
        }
        for window in lines {
            cells.extend(lambdas.iter().map(|&lambda| Cell { algorithm, window, lambda }));
        }
    }
    cells
}

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

/// One cell's sums: metric sums and counts, bootstrap replicate sums, item exposure.
#[derive(Debug, Clone)]
pub struct CellAccumulator {
    sums: [f64; col::COUNT],
    /// Slates counted in each column (NaN rows are not).
    counts: [u64; col::COUNT],
    boot: Replicates,
    exposure: Vec<u64>,
    pick_column: usize,
}

impl CellAccumulator {
    /// Adds cell `c`'s row of each slate, in order.
    pub fn add(&mut self, c: usize, slates: &[SlateRows], items: usize) {
        if self.exposure.len() < items {
            self.exposure.resize(items, 0);
        }
        let mut boot = [0.0; 3];
        for out in slates {
            let row = &out.rows[c];
            for (j, &x) in row.iter().enumerate() {
                if !x.is_nan() {
                    self.sums[j] += x;
                    self.counts[j] += 1;
                }
            }
            boot[BOOT_NDCG] = row[col::NDCG];
            boot[BOOT_ENTROPY] = row[col::ENTROPY];
            boot[BOOT_PICK] = row[self.pick_column];
            self.boot.add(&out.weights, &boot);
            for &i in &out.items[c] {
                if let Some(e) = self.exposure.get_mut(i as usize) {
                    *e += 1;
                }
            }
        }
    }
}

impl CellAccumulator {
    /// Adds another partition's sums of the same cell; `item_map[j]` is this accumulator's
    /// number for the other's item `j` (partitions number items as they meet them).
    ///
    /// Exact for the counts and exposure; the sums are added in a different order than one
    /// accumulator over all slates would, so means agree to rounding (about 1e-15 relative).
    pub fn merge(&mut self, other: &Self, item_map: &[u32]) {
        for j in 0..col::COUNT {
            self.sums[j] += other.sums[j];
            self.counts[j] += other.counts[j];
        }
        self.boot.merge(&other.boot);
        for (j, &e) in other.exposure.iter().enumerate() {
            if e == 0 {
                continue;
            }
            let Some(&to) = item_map.get(j) else { continue };
            let to = to as usize;
            if self.exposure.len() <= to {
                self.exposure.resize(to + 1, 0);
            }
            self.exposure[to] += e;
        }
    }

    /// Appends the accumulator's state to `out` (little-endian; read back by
    /// [`CellAccumulator::read_state`]).
    fn write_state(&self, out: &mut Vec<u8>) {
        let f64s = |xs: &[f64], out: &mut Vec<u8>| xs.iter().for_each(|x| out.extend(x.to_le_bytes()));
        f64s(&self.sums, out);
        self.counts.iter().for_each(|c| out.extend(c.to_le_bytes()));
        out.extend((self.boot.sums.len() as u64).to_le_bytes());
        f64s(&self.boot.weights, out);
        for s in &self.boot.sums {
            f64s(s, out);
        }
        out.extend((self.exposure.len() as u64).to_le_bytes());
        self.exposure.iter().for_each(|e| out.extend(e.to_le_bytes()));
    }

    /// Replaces the state with one written by [`CellAccumulator::write_state`].
    fn read_state(&mut self, r: &mut StateReader<'_>) -> Result<(), String> {
        for x in &mut self.sums {
            *x = r.f64()?;
        }
        for c in &mut self.counts {
            *c = r.u64()?;
        }
        let statistics = r.u64()? as usize;
        if statistics != self.boot.sums.len() {
            return Err(format!(
                "state holds {statistics} bootstrap statistics, want {}",
                self.boot.sums.len()
            ));
        }
        for w in &mut self.boot.weights {
            *w = r.f64()?;
        }
        for s in &mut self.boot.sums {
            for x in s.iter_mut() {
                *x = r.f64()?;
            }
        }
        let n = r.u64()? as usize;
        if n > r.remaining() / 8 {
            return Err(format!("state claims {n} exposure counts but holds fewer"));
        }
        self.exposure = (0..n).map(|_| r.u64()).collect::<Result<_, _>>()?;
        Ok(())
    }
}

/// Reads little-endian values off a byte slice, with a message when it runs short.
#[derive(Debug)]
pub struct StateReader<'a> {
    bytes: &'a [u8],
}

impl<'a> StateReader<'a> {
    /// A reader over `bytes`.
    #[must_use]
    pub fn new(bytes: &'a [u8]) -> Self {
        Self { bytes }
    }

    /// Bytes left.
    #[must_use]
    pub fn remaining(&self) -> usize {
        self.bytes.len()
    }

    /// The next `n` bytes.
    ///
    /// # Errors
    /// When fewer are left.
    pub fn take(&mut self, n: usize) -> Result<&'a [u8], String> {
        if self.bytes.len() < n {
            return Err("the state ends early (truncated or not a replay state)".into());
        }
        let (head, rest) = self.bytes.split_at(n);
        self.bytes = rest;
        Ok(head)
    }

    /// The next little-endian u64.
    ///
    /// # Errors
    /// When fewer than 8 bytes are left.
    pub fn u64(&mut self) -> Result<u64, String> {
        let mut b = [0_u8; 8];
        b.copy_from_slice(self.take(8)?);
        Ok(u64::from_le_bytes(b))
    }

    /// The next little-endian f64.
    ///
    /// # Errors
    /// When fewer than 8 bytes are left.
    pub fn f64(&mut self) -> Result<f64, String> {
        self.u64().map(f64::from_bits)
    }
}

/// Accumulators of every cell; cell 0 is the relevance baseline.
#[derive(Debug)]
pub struct Grid {
    cells: Vec<Cell>,
    params: Vec<Params>,
    acc: Vec<CellAccumulator>,
    opts: GridOptions,
    items: usize,
}

/// One slate's results for every cell: its bootstrap weights, a metric row per cell and the
/// item numbers each cell picked.
#[derive(Debug, Clone)]
pub struct SlateRows {
    /// Poisson(1) weight per replicate.
    pub weights: Vec<u8>,
    /// Per cell, the metric columns ([`col`]).
    pub rows: Vec<[f64; col::COUNT]>,
    /// Per cell, the picked items' numbers.
    pub items: Vec<Vec<u32>>,
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
        let acc = CellAccumulator {
            sums: [0.0; col::COUNT],
            counts: [0; col::COUNT],
            boot: Replicates::new(3),
            exposure: Vec::new(),
            pick_column: opts.pick_column,
        };
        Ok(Self { acc: vec![acc; all.len()], cells: all, params, opts, items: 0 })
    }

    /// The cells, the baseline first, and their parameters.
    #[must_use]
    pub fn cells(&self) -> (&[Cell], &[Params], GridOptions) {
        (&self.cells, &self.params, self.opts)
    }

    /// Evaluates every cell on one slate with `ws`.
    ///
    /// # Errors
    /// The [`KernelError`] of an algorithm that rejects the slate (cannot happen for validated
    /// slates with embeddings, and with profiles for `calibrated`).
    pub fn evaluate(&self, slate: &LoggedSlate, ws: &mut Workspace) -> Result<SlateRows, KernelError> {
        evaluate_slate(slate, &self.cells, &self.params, self.opts, ws)
    }

    /// Adds evaluated slates, in order; `items` is the number of distinct items numbered so far.
    pub fn add(&mut self, slates: &[SlateRows], items: usize) {
        self.items = self.items.max(items);
        for (c, acc) in self.acc.iter_mut().enumerate() {
            acc.add(c, slates, items);
        }
    }

    /// The per-cell accumulators, for a caller that adds cells in parallel
    /// ([`CellAccumulator::add`] with each cell's index), after [`Grid::set_items`].
    pub fn accumulators_mut(&mut self) -> &mut [CellAccumulator] {
        &mut self.acc
    }

    /// Records the number of distinct items numbered so far (the denominator of coverage).
    pub fn set_items(&mut self, items: usize) {
        self.items = self.items.max(items);
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

    /// Adds another grid's sums (same cells and options, else an error); `item_map[j]` is this
    /// grid's number for the other's item `j`, and `items` the distinct items of both.
    ///
    /// # Errors
    /// When the grids' cells or options differ.
    pub fn merge(&mut self, other: &Self, item_map: &[u32], items: usize) -> Result<(), String> {
        let same_cells = self.cells.len() == other.cells.len()
            && self.cells.iter().zip(&other.cells).all(|(a, b)| {
                a.algorithm.name() == b.algorithm.name()
                    && a.window == b.window
                    && a.lambda.to_bits() == b.lambda.to_bits()
            });
        let (a, b) = (self.opts, other.opts);
        let same_opts = a.k == b.k
            && a.eta.to_bits() == b.eta.to_bits()
            && a.clip.to_bits() == b.clip.to_bits()
            && a.alpha.to_bits() == b.alpha.to_bits()
            && a.pick_column == b.pick_column;
        if !(same_cells && same_opts) {
            return Err(
                "the two replays have different grids (algorithms, lambdas, windows, k or options)".into()
            );
        }
        for (x, y) in self.acc.iter_mut().zip(&other.acc) {
            x.merge(y, item_map);
        }
        self.set_items(items);
        Ok(())
    }

    /// Appends every cell's sums and the item count to `out`; [`Grid::read_state`] on a grid
    /// built with the same cells and options reads them back.
    pub fn write_state(&self, out: &mut Vec<u8>) {
        out.extend((self.acc.len() as u64).to_le_bytes());
        out.extend((self.items as u64).to_le_bytes());
        for acc in &self.acc {
            acc.write_state(out);
        }
    }

    /// Replaces the sums with a state written by [`Grid::write_state`].
    ///
    /// # Errors
    /// A state of another grid, or one cut short.
    pub fn read_state(&mut self, r: &mut StateReader<'_>) -> Result<(), String> {
        let cells = r.u64()? as usize;
        if cells != self.acc.len() {
            return Err(format!("the state holds {cells} cells, this grid {}", self.acc.len()));
        }
        self.items = r.u64()? as usize;
        for acc in &mut self.acc {
            acc.read_state(r)?;
        }
        Ok(())
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

/// Every cell on one slate: its bootstrap weights, each cell's metric row and picked items.
/// Cell 0 must be the baseline (relevance retained is relative to its picks).
///
/// Cost: one `select` per cell, plus O(k²·d) per cell for the intra-list distance.
///
/// # Errors
/// The first [`KernelError`] of a cell.
pub fn evaluate_slate(
    s: &LoggedSlate,
    cells: &[Cell],
    params: &[Params],
    opts: GridOptions,
    ws: &mut Workspace,
) -> Result<SlateRows, KernelError> {
    let mut weights = vec![0_u8; REPLICATES];
    poisson_weights(s.key, &mut weights);
    let k = opts.k;
    let picks = cells
        .iter()
        .zip(params)
        .map(|(cell, p)| cell.algorithm.select(&s.input, p, ws).map(|sel| sel.indices))
        .collect::<Result<Vec<Vec<usize>>, KernelError>>()?;
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
            row[col::PROTECTED_SHARE] = nan_unless(crate::fairness::protected_share(&s.input, picked));
            row[col::IPS_CLICKS] = nan_unless(
                s.served_rank.as_ref().map(|r| ips_clicks(picked, &s.clicked, r, k, opts.eta, opts.clip)),
            );
            row[col::ALPHA_NDCG] = alpha_ndcg(picked, &s.clicked, s.input.groups(), k, opts.alpha);
            row
        })
        .collect();
    let items = picks.iter().map(|p| p.iter().map(|&i| s.item[i]).collect()).collect();
    Ok(SlateRows { weights, rows, items })
}

/// One cell of the grid.
#[derive(Debug, Clone, PartialEq)]
pub struct Point {
    /// Algorithm.
    pub algorithm: &'static str,
    /// The sliding window of `dpp` and `ssd`, when the cell has one.
    pub window: Option<usize>,
    /// Lambda.
    pub lambda: f64,
    /// Mean recall@k over all logged clicks.
    pub recall: f64,
    /// Mean nDCG@k over all logged clicks (Järvelin & Kekäläinen 2002).
    pub ndcg: f64,
    /// Mean recall@k over the clicked candidates only.
    pub recall_reachable: f64,
    /// Mean nDCG@k over the clicked candidates only.
    pub ndcg_reachable: f64,
    /// Mean relevance retained.
    pub relevance_retained: f64,
    /// Mean category entropy, bits.
    pub entropy: f64,
    /// Mean intra-list distance.
    pub ild: f64,
    /// Mean distinct categories.
    pub distinct: f64,
    /// Distinct items exposed ÷ distinct items offered.
    pub coverage: f64,
    /// Gini coefficient of item exposure over offered items.
    pub gini: f64,
    /// Mean miscalibration over the slates whose line carried a profile; `None` without any.
    pub miscalibration: Option<f64>,
    /// Mean protected share over the slates whose line carried a fairness floor; `None` without
    /// any.
    pub protected_share: Option<f64>,
    /// Mean position-debiased clicks@k over the slates whose line logged the served slate;
    /// `None` without any.
    pub ips_clicks: Option<f64>,
    /// Mean α-nDCG@k (α = 0.5, categories as subtopics).
    pub alpha_ndcg: f64,
    /// 95 % bootstrap interval of the mean nDCG@k.
    pub ndcg_lo: f64,
    /// Upper end.
    pub ndcg_hi: f64,
    /// 95 % bootstrap interval of the mean entropy.
    pub entropy_lo: f64,
    /// Upper end.
    pub entropy_hi: f64,
    /// Paired 95 % bootstrap interval of the difference of mean nDCG@k from the baseline's.
    pub ndcg_diff_lo: f64,
    /// Upper end.
    pub ndcg_diff_hi: f64,
}

/// The report's metric columns, in `frontier.csv` order (after `algorithm`, `lambda`,
/// `window`); [`Point::values`] gives a cell's values in this order.
pub const REPORT_COLUMNS: [&str; 20] = [
    "recall",
    "ndcg",
    "recall_reachable",
    "ndcg_reachable",
    "relevance_retained",
    "entropy_bits",
    "ild",
    "distinct",
    "coverage",
    "gini",
    "miscalibration",
    "protected_share",
    "ndcg_lo",
    "ndcg_hi",
    "entropy_lo",
    "entropy_hi",
    "ndcg_diff_lo",
    "ndcg_diff_hi",
    "ips_clicks",
    "alpha_ndcg",
];

impl Point {
    /// The cell's values of [`REPORT_COLUMNS`], in order; `None` where no slate had the input
    /// (a profile, a fairness floor, a served slate).
    #[must_use]
    pub fn values(&self) -> [Option<f64>; 20] {
        [
            Some(self.recall),
            Some(self.ndcg),
            Some(self.recall_reachable),
            Some(self.ndcg_reachable),
            Some(self.relevance_retained),
            Some(self.entropy),
            Some(self.ild),
            Some(self.distinct),
            Some(self.coverage),
            Some(self.gini),
            self.miscalibration,
            self.protected_share,
            Some(self.ndcg_lo),
            Some(self.ndcg_hi),
            Some(self.entropy_lo),
            Some(self.entropy_hi),
            Some(self.ndcg_diff_lo),
            Some(self.ndcg_diff_hi),
            self.ips_clicks,
            Some(self.alpha_ndcg),
        ]
    }

    /// The cell's algorithm as the report names it: `dpp`, or `dpp w=10` with a window.
    #[must_use]
    pub fn label(&self) -> String {
        match self.window {
            None => self.algorithm.to_owned(),
            Some(w) => format!("{} w={w}", self.algorithm),
        }
    }

    /// The value of a named accuracy metric.
    #[must_use]
    pub fn metric(&self, name: &str) -> f64 {
        match name {
            "recall" => self.recall,
            "ndcg_reachable" => self.ndcg_reachable,
            "recall_reachable" => self.recall_reachable,
            "relevance_retained" => self.relevance_retained,
            "alpha_ndcg" => self.alpha_ndcg,
            _ => self.ndcg,
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::model::{CandidateInput, ScoreTransform};

    fn slate(seed: u64) -> LoggedSlate {
        let mut z = seed;
        let mut next = || {
            z = z.wrapping_mul(6_364_136_223_846_793_005).wrapping_add(1_442_695_040_888_963_407);
            ((z >> 11) as f64) / ((1u64 << 53) as f64)
        };
        let candidates: Vec<CandidateInput> = (0..30)
            .map(|i| CandidateInput {
                id: format!("i{i}"),
                score: next(),
                category: Some(format!("c{}", i % 4)),
                embedding: Some((0..6).map(|_| next() as f32 - 0.5).collect()),
            })
            .collect();
        let input = RerankInput::new(candidates, ScoreTransform::MinMax, true, &Limits::default()).unwrap();
        let clicked: Vec<bool> = (0..30).map(|_| next() < 0.2).collect();
        let relevant = clicked.iter().filter(|&&c| c).count();
        LoggedSlate {
            input,
            clicked,
            relevant,
            served_rank: Some((0..30).map(|i| if i < 10 { i + 1 } else { 0 }).collect()),
            key: bootstrap::key_of_line(seed),
            item: (0..30).collect(),
            line: seed,
        }
    }

    /// Adding slates in one batch or several, and cell by cell, gives the same points; lambda 0
    /// reproduces the baseline; a cell's paired bound against itself at factor 1 is 0.
    #[test]
    fn grid_sums_do_not_depend_on_batching() {
        let dpp = diversify::by_name("dpp").unwrap();
        let cells = [
            Cell { algorithm: dpp, window: None, lambda: 0.0 },
            Cell { algorithm: dpp, window: None, lambda: 0.7 },
        ];
        let slates: Vec<LoggedSlate> = (0..40).map(slate).collect();
        let mut ws = Workspace::new();
        let mut one = Grid::new(&cells, GridOptions::new(10)).unwrap();
        let rows: Vec<SlateRows> = slates.iter().map(|s| one.evaluate(s, &mut ws).unwrap()).collect();
        one.add(&rows, 30);
        let mut split = Grid::new(&cells, GridOptions::new(10)).unwrap();
        split.add(&rows[..13], 30);
        split.set_items(30);
        for (c, acc) in split.accumulators_mut().iter_mut().enumerate() {
            acc.add(c, &rows[13..], 30);
        }
        let (a, b) = (one.points(), split.points());
        for (p, q) in a.iter().zip(&b) {
            assert!((p.ndcg - q.ndcg).abs() < 1e-12 && (p.ndcg_lo - q.ndcg_lo).abs() < 1e-12);
            assert!((p.entropy_hi - q.entropy_hi).abs() < 1e-12 && p.gini.to_bits() == q.gini.to_bits());
        }
        assert_eq!(a[1].ndcg.to_bits(), a[0].ndcg.to_bits(), "dpp at lambda 0 is the baseline");
        assert!(a[0].ndcg_diff_lo.abs() < 1e-15 && a[0].ndcg_diff_hi.abs() < 1e-15);
        assert!(a[2].ild > a[0].ild, "lambda 0.7 spreads the embeddings");
        assert!(a[0].ndcg_lo <= a[0].ndcg && a[0].ndcg <= a[0].ndcg_hi);
        assert_eq!(one.pick_bound(1, 1.0).to_bits(), 0.0_f64.to_bits());
        // The served order here is candidate order; IPS of the baseline is its clicks in the
        // top 10 reweighted, finite and present on every slate.
        assert!(a[0].ips_clicks.is_some_and(f64::is_finite));
    }

    /// Two partitions that numbered the same items differently merge, through their written
    /// states, into the points of one pass (exposure mapped by item, sums to rounding); a state
    /// cut short or of another grid is refused.
    #[test]
    fn partitions_merge_by_item_through_their_states() {
        let dpp = diversify::by_name("dpp").unwrap();
        let cells = [Cell { algorithm: dpp, window: Some(3), lambda: 0.6 }];
        let mut slates: Vec<LoggedSlate> = (0..30).map(slate).collect();
        let mut ws = Workspace::new();
        let mut one = Grid::new(&cells, GridOptions::new(10)).unwrap();
        let rows: Vec<SlateRows> = slates.iter().map(|s| one.evaluate(s, &mut ws).unwrap()).collect();
        one.add(&rows, 30);
        // The second partition numbers item i as 29 - i; the map takes its numbers to the first's.
        for s in &mut slates[12..] {
            s.item = (0..30).rev().collect();
        }
        let mut a = Grid::new(&cells, GridOptions::new(10)).unwrap();
        let mut b = Grid::new(&cells, GridOptions::new(10)).unwrap();
        let ra: Vec<SlateRows> = slates[..12].iter().map(|s| a.evaluate(s, &mut ws).unwrap()).collect();
        let rb: Vec<SlateRows> = slates[12..].iter().map(|s| b.evaluate(s, &mut ws).unwrap()).collect();
        a.add(&ra, 30);
        b.add(&rb, 30);
        let mut bytes = Vec::new();
        b.write_state(&mut bytes);
        let mut restored = Grid::new(&cells, GridOptions::new(10)).unwrap();
        restored.read_state(&mut StateReader::new(&bytes)).unwrap();
        let map: Vec<u32> = (0..30).rev().collect();
        a.merge(&restored, &map, 30).unwrap();
        for (p, q) in one.points().iter().zip(&a.points()) {
            assert!((p.ndcg - q.ndcg).abs() < 1e-12 && (p.ndcg_lo - q.ndcg_lo).abs() < 1e-12);
            assert!((p.entropy_hi - q.entropy_hi).abs() < 1e-12);
            assert_eq!((p.gini.to_bits(), p.coverage.to_bits()), (q.gini.to_bits(), q.coverage.to_bits()));
        }
        let mut fresh = Grid::new(&cells, GridOptions::new(10)).unwrap();
        assert!(fresh.read_state(&mut StateReader::new(&bytes[..bytes.len() - 1])).is_err());
        let other = Grid::new(&[cells[0], cells[0]], GridOptions::new(10)).unwrap();
        assert!(fresh.merge(&other, &[], 0).is_err());
    }
}
