//! Diversifiers: the numeric core that turns a validated slate into an ordered selection.
//!
//! Every algorithm implements [`Diversifier`] and is listed once in the `diversifiers!` registry
//! below, which declares its module and makes it findable by name ([`by_name`], [`names`]).
//! Adding one is a new file plus one registry line.
//!
//! Contract shared by all of them (tests in `tests/kernels.rs` hold every one to it):
//! - output: at most `min(k, N)` distinct candidate indices in slate order (exactly that many
//!   unless a per-category cap leaves too few eligible candidates);
//! - `lambda = 0` returns the relevance order: top-k by raw score, ties to the lower index;
//! - ties anywhere go to the lower input index, so the output is deterministic;
//! - a per-category cap ([`Params::max_per_category`]) is a hard constraint for every algorithm.
//!
//! This module knows nothing of HTTP, async runtimes or metrics: kernels are synchronous and
//! pure, and reuse a caller-owned [`Workspace`] so the per-step loops never allocate.

pub mod reference;
mod similarity;

pub use dpp::{DppStrategy, EPSILON};

use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::Arc;

use crate::model::{Params, RerankInput, Selection};

/// Why a kernel could not run on an otherwise valid slate.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
pub enum KernelError {
    /// The algorithm compares embeddings and the slate has none.
    #[error("{algorithm} needs an embedding on every candidate")]
    EmbeddingsRequired {
        /// The algorithm's registry name.
        algorithm: &'static str,
    },
    /// The algorithm calibrates to a taste profile and the slate has none.
    #[error("{algorithm} needs a profile")]
    ProfileRequired {
        /// The algorithm's registry name.
        algorithm: &'static str,
    },
    /// The caller stopped waiting (its deadline passed, or it disconnected), so the kernel
    /// stopped at its next step instead of burning the rest of its work.
    #[error("cancelled: the caller stopped waiting")]
    Cancelled,
}

/// A re-ranking algorithm.
///
/// Implementations are stateless values; all scratch space lives in the [`Workspace`].
pub trait Diversifier: Send + Sync + std::fmt::Debug {
    /// Registry name, as used on the wire and in config (`"dpp"`).
    fn name(&self) -> &'static str;

    /// True when the algorithm compares embeddings (validation then requires them).
    fn needs_embeddings(&self) -> bool;

    /// True when the algorithm calibrates to a taste profile (validation then requires one).
    fn needs_profile(&self) -> bool {
        false
    }

    /// True when the algorithm honours [`Params::window`] (replay then runs it per window).
    fn takes_window(&self) -> bool {
        false
    }

    /// Estimated work, in multiply-adds or comparisons, for `n` candidates of dimension `d`
    /// choosing `k`; the service uses it to decide whether a slate is worth a hop to its pool.
    /// The default suits sort-like algorithms: `n·log2(n)`.
    fn work(&self, n: usize, d: usize, k: usize) -> u64 {
        let _ = (d, k);
        let n = n as u64;
        n.saturating_mul(u64::from(64 - n.leading_zeros()))
    }

    /// Chooses the slate. Assumes `input` and `params` were validated by their constructors.
    ///
    /// # Errors
    /// [`KernelError::EmbeddingsRequired`] when the algorithm needs embeddings and `input` has none.
    fn select(
        &self,
        input: &RerankInput,
        params: &Params,
        ws: &mut Workspace,
    ) -> Result<Selection, KernelError>;
}

/// Declares each diversifier's module and lists it in the registry, in wire-name order of intent.
macro_rules! diversifiers {
    ($($module:ident :: $ty:ident),+ $(,)?) => {
        $(mod $module; pub use $module::$ty;)+
        static REGISTRY: &[&dyn Diversifier] = &[$(&$module::$ty),+];
    };
}

diversifiers! {
    relevance::Relevance,
    mmr::Mmr,
    dpp::Dpp,
    quota::Quota,
    ssd::Ssd,
    calibrated::Calibrated,
}

/// Looks a diversifier up by its registry name.
#[must_use]
pub fn by_name(name: &str) -> Option<&'static dyn Diversifier> {
    REGISTRY.iter().copied().find(|d| d.name() == name)
}

/// All registry names, in registry order.
pub fn names() -> impl Iterator<Item = &'static str> {
    REGISTRY.iter().map(|d| d.name())
}

/// Reusable scratch space for the kernels.
///
/// Keep one per worker thread and pass it to every call: buffers grow to the largest slate seen
/// and are then reused, so steady-state calls allocate only their output.
#[derive(Debug, Default, Clone)]
pub struct Workspace {
    /// Whether each candidate is already in the slate.
    taken: Vec<bool>,
    /// Candidate indices in some order (relevance order, per-group queues).
    order: Vec<usize>,
    /// DPP (lazy): unit rows widened to f64, row-major N × d; windowed DPP and SSD: the same
    /// rows transposed into SIMD-width panels.
    wide: Vec<f64>,
    /// MMR and DPP: how many picks each candidate's exact state has seen. Windowed DPP and SSD
    /// (lazy): per block of ranks, the picks its similarities have seen and the step its screen
    /// is for.
    filled: Vec<usize>,
    /// Windowed DPP and SSD (lazy): one more than the step at which each candidate's residual
    /// was last computed in full (0: never).
    evaluated: Vec<usize>,
    /// MMR and DPP (lazy): stale upper bounds (of the unprotected candidates, under a fairness
    /// floor).
    heap: std::collections::BinaryHeap<Bound>,
    /// MMR and DPP (lazy) under a fairness floor: stale upper bounds of the protected candidates.
    heap_protected: std::collections::BinaryHeap<Bound>,
    /// Windowed DPP and SSD (lazy): the rows by score rank, transposed into f32 panels.
    narrow: Vec<f32>,
    /// Windowed DPP and SSD (lazy): each covered rank's f32 similarity to each ring slot's
    /// member (slot-major), then each covered rank's screened residual.
    sims: Vec<f32>,
    /// Per-candidate running quantity: DPP residual `d_i²`, MMR running max-similarity.
    running: Vec<f64>,
    /// DPP: orthonormal basis of the picked rows, one d-length row per pick.
    basis: Vec<f64>,
    /// DPP: the vector being orthogonalised.
    scratch: Vec<f64>,
    /// Windowed DPP and SSD (eager): every candidate's coordinates in the window's basis,
    /// column-major (stride × N).
    coords: Vec<f64>,
    /// Windowed DPP and SSD: one projection per candidate (and a member's row before that).
    proj: Vec<f64>,
    /// Fairness floor: `m(t)` for each position of this call's slate (empty without a floor).
    fair_min: Vec<usize>,
    /// Fairness floor: protected items picked so far.
    fair_held: usize,
    /// DPP (screened): panels, f32 bounds and the f32 basis.
    screen: dpp::ScreenBuffers,
    /// Items taken per group, for caps and quotas.
    group_taken: Vec<usize>,
    /// Set by whoever waits for the result when it stops waiting; the long kernels (MMR, DPP)
    /// look at it once per step of their loop and stop early.
    cancel: Option<Arc<AtomicBool>>,
}

impl Workspace {
    /// An empty workspace; buffers grow on first use.
    #[must_use]
    pub fn new() -> Self {
        Self::default()
    }

    /// Attaches (or with `None` detaches) the flag that asks the kernels to stop.
    pub fn set_cancel(&mut self, flag: Option<Arc<AtomicBool>>) {
        self.cancel = flag;
    }

    /// True once the attached flag is set. One relaxed load: cheap enough for every step.
    #[inline]
    pub(crate) fn cancelled(&self) -> bool {
        self.cancel.as_ref().is_some_and(|f| f.load(Ordering::Relaxed))
    }

    /// `Err(Cancelled)` once the attached flag is set: what a kernel that stopped early returns,
    /// so a partial slate is never mistaken for a finished one.
    pub(crate) fn check_cancelled(&self) -> Result<(), KernelError> {
        if self.cancelled() {
            Err(KernelError::Cancelled)
        } else {
            Ok(())
        }
    }

    /// Bytes the buffers hold on to between calls (their capacity, not their length).
    #[must_use]
    pub fn retained_bytes(&self) -> usize {
        use std::mem::size_of;
        self.taken.capacity() * size_of::<bool>()
            + (self.order.capacity()
                + self.filled.capacity()
                + self.evaluated.capacity()
                + self.group_taken.capacity())
                * size_of::<usize>()
            + (self.wide.capacity()
                + self.running.capacity()
                + self.basis.capacity()
                + self.scratch.capacity()
                + self.coords.capacity()
                + self.proj.capacity())
                * size_of::<f64>()
            + (self.narrow.capacity() + self.sims.capacity()) * size_of::<f32>()
            + (self.heap.capacity() + self.heap_protected.capacity()) * size_of::<Bound>()
            + self.screen.retained_bytes()
    }

    /// Frees every buffer when together they hold more than `max_bytes`, so one huge slate does
    /// not pin its scratch space in a long-lived thread; slates under the limit keep reusing it.
    pub fn trim(&mut self, max_bytes: usize) {
        if self.retained_bytes() > max_bytes {
            let cancel = self.cancel.take();
            *self = Self { cancel, ..Self::default() };
        }
    }

    /// Clears per-call state for a slate of `n` candidates in `groups` groups.
    fn reset(&mut self, n: usize, groups: usize) {
        self.taken.clear();
        self.taken.resize(n, false);
        self.group_taken.clear();
        self.group_taken.resize(groups, 0);
        self.fair_min.clear();
        self.fair_held = 0;
    }

    /// [`Workspace::reset`], plus the fairness floor of `input` for a slate of `m` items.
    fn reset_for(&mut self, input: &RerankInput, m: usize) {
        self.reset(input.len(), input.group_count());
        if let Some(floor) = input.fairness() {
            self.fair_min = floor.minimums(m);
        }
    }

    /// Which lazy heap holds the larger top among those a step searches (the protected heap only
    /// when `restrict`, else both): `Some(true)` the protected one, `None` when both are empty.
    #[inline]
    fn protected_top_first(&self, restrict: bool) -> Option<bool> {
        match (self.heap_protected.peek(), self.heap.peek().filter(|_| !restrict)) {
            (None, None) => None,
            (Some(_), None) => Some(true),
            (None, Some(_)) => Some(false),
            (Some(a), Some(b)) => Some(a > b),
        }
    }

    /// Whether the pick after `picks` items must be protected: the prefix holds fewer than
    /// `m(picks + 1)`. Kernels then restrict their choice to protected candidates, and choose
    /// freely when none remains (the floor is met as far as possible).
    #[inline]
    fn must_protect(&self, picks: usize) -> bool {
        self.fair_min.get(picks).is_some_and(|&need| self.fair_held < need)
    }
}

/// A stale upper bound on a candidate's objective. Ordered by value, then lower index first, so
/// the heap's top is the greedy choice among bounds.
#[derive(Debug, Clone, Copy)]
pub(crate) struct Bound {
    value: f64,
    index: usize,
}

impl PartialEq for Bound {
    fn eq(&self, other: &Self) -> bool {
        self.cmp(other).is_eq()
    }
}

impl Eq for Bound {}

impl PartialOrd for Bound {
    fn partial_cmp(&self, other: &Self) -> Option<std::cmp::Ordering> {
        Some(self.cmp(other))
    }
}

impl Ord for Bound {
    fn cmp(&self, other: &Self) -> std::cmp::Ordering {
        // Values are never NaN (finite scores, logs of residuals above EPSILON), so the plain
        // comparison is total here; it compiles to one compare where `total_cmp` needs bit tricks.
        debug_assert!(!self.value.is_nan() && !other.value.is_nan(), "NaN bound");
        if self.value > other.value {
            std::cmp::Ordering::Greater
        } else if self.value < other.value {
            std::cmp::Ordering::Less
        } else {
            other.index.cmp(&self.index)
        }
    }
}

/// Per-category cap bookkeeping shared by every kernel.
#[inline]
fn allowed(input: &RerankInput, params: &Params, group_taken: &[usize], i: usize) -> bool {
    match params.max_per_category() {
        None => true,
        Some(cap) => group_taken[input.groups()[i] as usize] < cap,
    }
}

/// The strict total order "higher raw score first, then lower index" used for every tie-break.
#[inline]
fn by_score(scores: &[f64], a: usize, b: usize) -> std::cmp::Ordering {
    scores[b].total_cmp(&scores[a]).then(a.cmp(&b))
}

/// Writes the first `m` candidates in relevance order into `out`.
///
/// # Complexity
/// O(N + m log m) with a selection step, O(N log N) when `m` is close to N.
fn relevance_prefix(scores: &[f64], m: usize, out: &mut Vec<usize>) {
    out.clear();
    out.extend(0..scores.len());
    top_by_score(scores, out, m);
}

/// Appends untaken, allowed candidates to `sel` in relevance order until it has `m` items.
///
/// Used for `lambda = 0`, for `relevance` itself and to fill slots after a kernel is exhausted.
fn fill_by_score(input: &RerankInput, params: &Params, ws: &mut Workspace, m: usize, sel: &mut Selection) {
    let missing = m.saturating_sub(sel.indices.len());
    if missing == 0 {
        return;
    }
    // Without caps the top (picked + missing) by score always hold `missing` untaken items.
    let depth = match params.max_per_category() {
        None => sel.indices.len() + missing,
        Some(_) => input.len(),
    };
    let mut order = std::mem::take(&mut ws.order);
    relevance_prefix(input.scores(), depth, &mut order);
    for &i in &order {
        if sel.indices.len() == m {
            break;
        }
        if ws.taken[i] || !allowed(input, params, &ws.group_taken, i) {
            continue;
        }
        take(input, ws, sel, i, input.normalized()[i]);
    }
    ws.order = order;
}

/// The passes of a step's search: restricted to protected candidates first when the fairness
/// floor needs one (`restrict`), then unrestricted if that found nobody.
#[inline]
fn passes(restrict: bool) -> impl Iterator<Item = bool> {
    [restrict, false].into_iter().take(1 + usize::from(restrict))
}

/// Whether candidate `i` may be picked at a step restricted to protected candidates (`restrict`)
/// or not: not taken, within its category cap, and protected when restricted.
#[inline]
fn eligible(input: &RerankInput, params: &Params, ws: &Workspace, i: usize, restrict: bool) -> bool {
    !ws.taken[i]
        && allowed(input, params, &ws.group_taken, i)
        && (!restrict || input.fairness().is_some_and(|f| f.protected()[i]))
}

/// Records pick `i` with its deciding `gain`.
#[inline]
fn take(input: &RerankInput, ws: &mut Workspace, sel: &mut Selection, i: usize, gain: f64) {
    debug_assert!(!ws.taken[i], "candidate {i} picked twice");
    if input.fairness().is_some_and(|f| f.protected()[i]) {
        ws.fair_held += 1;
    }
    ws.taken[i] = true;
    ws.group_taken[input.groups()[i] as usize] += 1;
    sel.indices.push(i);
    sel.gains.push(gain);
}

/// The relevance order under `params`: what every kernel returns at `lambda = 0`. With a fairness
/// floor this is FA*IR (Zehlike et al. 2017, Algorithm 2): the best remaining by score, or the
/// best remaining protected one where the prefix needs it.
fn relevance_selection(input: &RerankInput, params: &Params, ws: &mut Workspace) -> Selection {
    let m = params.k().min(input.len());
    ws.reset_for(input, m);
    let mut sel =
        Selection { indices: Vec::with_capacity(m), gains: Vec::with_capacity(m), exhausted_at: None };
    if input.fairness().is_none() {
        fill_by_score(input, params, ws, m, &mut sel);
        return sel;
    }
    // Two queues in relevance order, the protected and the rest (Algorithm 2's P and U): each
    // position takes the better head, or the protected head where the prefix needs it and one
    // remains; a head over its cap is skipped for good (caps only tighten). Without caps no
    // queue gives more than m items, so each is only the top m of its side: O(N + m log m),
    // else a full sort, O(N log N).
    let protected = input.fairness().map(|f| f.protected()).expect("checked above");
    let (mut heads, mut queues) = ([0usize; 2], [Vec::new(), Vec::new()]);
    for i in 0..input.len() {
        queues[usize::from(protected[i])].push(i);
    }
    let depth = if params.max_per_category().is_some() { input.len() } else { m };
    for queue in &mut queues {
        top_by_score(input.scores(), queue, depth);
    }
    while sel.indices.len() < m {
        for (head, queue) in heads.iter_mut().zip(&queues) {
            while queue.get(*head).is_some_and(|&i| !allowed(input, params, &ws.group_taken, i)) {
                *head += 1;
            }
        }
        let [rest, prot] = [0, 1].map(|q| queues[q].get(heads[q]).copied());
        let pick = match (prot, rest) {
            (Some(p), _) if ws.must_protect(sel.indices.len()) => (p, 1),
            (Some(p), Some(r)) => {
                if by_score(input.scores(), p, r).is_lt() {
                    (p, 1)
                } else {
                    (r, 0)
                }
            }
            (Some(p), None) => (p, 1),
            (None, Some(r)) => (r, 0),
            (None, None) => break,
        };
        heads[pick.1] += 1;
        take(input, ws, &mut sel, pick.0, input.normalized()[pick.0]);
    }
    sel
}

/// Keeps the first `depth` of `items` in relevance order (higher score, then lower index).
/// O(len + depth·log depth) with a selection step.
fn top_by_score(scores: &[f64], items: &mut Vec<usize>, depth: usize) {
    if depth == 0 {
        items.clear();
        return;
    }
    if depth < items.len() {
        items.select_nth_unstable_by(depth - 1, |&a, &b| by_score(scores, a, b));
        items.truncate(depth);
    }
    items.sort_unstable_by(|&a, &b| by_score(scores, a, b));
}

/// Runs `algorithm` with a fresh workspace: convenient for one-off calls and tests.
///
/// # Errors
/// As [`Diversifier::select`].
pub fn select_once(
    algorithm: &dyn Diversifier,
    input: &RerankInput,
    params: &Params,
) -> Result<Selection, KernelError> {
    algorithm.select(input, params, &mut Workspace::new())
}
