//! `dpp`: greedy MAP inference for a quality-weighted DPP, with an incremental Cholesky factor.

use pulp::{Arch, Simd, WithSimd};

use super::{allowed, fill_by_score, relevance_selection, take, Bound, Diversifier, KernelError, Workspace};
use crate::model::{Params, RerankInput, Selection};

/// Residual `d_i²` below which a candidate adds no new direction: the kernel's numerical rank is
/// reached for it. Candidates under it are never picked by the DPP objective; once every remaining
/// one is under it, the slate is filled by score.
pub const EPSILON: f64 = 1e-9;

/// Greedy DPP MAP: each step picks `argmax_i (1 − λ)·s_i + λ·ln d_i²`.
///
/// Legend: `s_i` normalised score; `λ` the request's `lambda`; `S_ij = cos(i, j)` the similarity
/// kernel on unit embeddings; `c_i` item i's row of the Cholesky factor of `S` restricted to the
/// slate so far; `d_i²` its residual (Schur complement), `d_i² = S_ii − ‖c_i‖²`.
///
/// # Reference
/// L. Chen, G. Zhang and H. Zhou, "Fast Greedy MAP Inference for Determinantal Point Process to
/// Improve Recommendation Diversity", NeurIPS 2018, Algorithm 1. Update after picking `j`:
/// `e_i = (S_ij − ⟨c_j, c_i⟩) / d_j`, `c_i ← [c_i, e_i]`, `d_i² ← d_i² − e_i²`.
/// The objective is the log of the paper's gain for the kernel `L = Diag(exp(α·s)) S Diag(exp(α·s))`
/// with `α = (1 − λ)/(2λ)`, scaled by `λ`: `ln det L_{S∪{i}} − ln det L_S = 2α·s_i + ln d_i²`.
/// Working in log space never overflows. Deviations: (1) candidates with `d_i² < EPSILON` are
/// skipped rather than ending the run, and the run ends (filling by score) only when no remaining
/// candidate is above it; (2) `S` is the cosine of the stored f32 rows taken in f64 (inverse norms
/// kept exactly), so `S_ii = 1` and `S` stays a PSD Gram matrix despite f32 rounding.
///
/// Evaluated lazily (M. Minoux, "Accelerated greedy algorithms for maximizing submodular set
/// functions", Optimization Techniques, LNCS 7, 1978): the objective is a modular term plus
/// `λ·ln det`, which is submodular, so each candidate's value only falls as the slate grows. A
/// max-heap holds stale values as upper bounds; only the candidate on top is brought up to date
/// (its missing factor entries computed), and it is taken once its fresh value still beats every
/// other bound. The picks are exactly those of the eager algorithm (same objective, same tie rule).
///
/// # Complexity
/// Worst case O(N·k·(d + k)) time, as the eager form: every candidate refreshed at every step.
/// Typically far less, since candidates whose bound sinks below the winners are never refreshed.
/// O(N·(k + d)) extra memory (factor rows and f64 copies of the unit rows); the N×N kernel is
/// never built. Heap operations add O(log N) per pop.
///
/// # Invariants
/// `S` is symmetric PSD by construction (a Gram matrix); the factor is lower-triangular with a
/// positive diagonal (`d_j > sqrt(EPSILON)` at every pivot); no residual grows from one step to the
/// next (each update subtracts a square); output has no duplicates and at most `min(k, N)` items.
/// `Σ ln(gains)` over the DPP-chosen prefix equals `ln det S_Y` for that prefix.
///
/// # Numerical notes
/// Similarity, factor and residuals are f64, which keeps an exhausted residual near 1e-15 instead
/// of the ~1e-7 noise f32 sums would leave, so `EPSILON` means what it says. The unit rows are
/// widened to f64 once per call (refreshes read rows in heap order, where widening on every read
/// would repeat the conversion). The factor is stored row per candidate, `c_i` contiguous.
/// Heap order is value, then lower index, so ties go to the lower index as everywhere.
#[derive(Debug, Clone, Copy, Default)]
pub struct Dpp;

impl Diversifier for Dpp {
    fn name(&self) -> &'static str {
        "dpp"
    }

    fn needs_embeddings(&self) -> bool {
        true
    }

    fn select(&self, input: &RerankInput, params: &Params, ws: &mut Workspace) -> Result<Selection, KernelError> {
        let lambda = params.lambda();
        if lambda == 0.0 || input.is_empty() {
            return Ok(relevance_selection(input, params, ws));
        }
        let emb = input.embeddings().ok_or(KernelError::EmbeddingsRequired { algorithm: self.name() })?;
        let (n, d) = (input.len(), emb.dim());
        let m = params.k().min(n);
        let s = input.normalized();
        ws.reset(n, input.group_count());
        // Unit rows in f64, once per call: refreshes touch rows in heap order, not streaming order.
        ws.wide.clear();
        ws.wide.reserve(n * d);
        for (row, &inv) in emb.as_slice().chunks_exact(d).zip(emb.inv_norms()) {
            ws.wide.extend(row.iter().map(|&x| f64::from(x) * inv));
        }
        // Factor rows: candidate i's c_i is factor[i·stride ..][..filled[i]].
        let stride = m.saturating_sub(1).max(1);
        ws.factor.clear();
        ws.factor.resize(n * stride, 0.0);
        ws.filled.clear();
        ws.filled.resize(n, 0);
        ws.running.clear();
        ws.running.resize(n, 1.0);
        ws.inv_pivot.clear();
        ws.heap.clear();
        ws.heap.extend((0..n).map(|i| Bound { value: (1.0 - lambda) * s[i], index: i }));
        let mut sel = Selection { indices: Vec::with_capacity(m), gains: Vec::with_capacity(m), exhausted_at: None };

        while sel.indices.len() < m {
            let step = sel.indices.len();
            let Some(top) = ws.heap.pop() else {
                sel.exhausted_at = Some(step);
                fill_by_score(input, params, ws, m, &mut sel);
                break;
            };
            let i = top.index;
            // Caps only tighten and residuals only shrink, so a candidate dropped here is out for good.
            if !allowed(input, params, &ws.group_taken, i) {
                continue;
            }
            if ws.filled[i] < step {
                let refresh = Refresh {
                    wide: &ws.wide,
                    d,
                    factor: &mut ws.factor,
                    stride,
                    i,
                    from: ws.filled[i],
                    picks: &sel.indices,
                    inv_dj: &ws.inv_pivot,
                    d2: &mut ws.running[i],
                };
                Arch::new().dispatch(refresh);
                ws.filled[i] = step;
            }
            let d2 = ws.running[i];
            if d2 < EPSILON {
                continue;
            }
            let fresh = Bound { value: (1.0 - lambda) * s[i] + lambda * d2.ln(), index: i };
            debug_assert!(fresh.value <= top.value + 1e-9, "lazy bound grew: residuals must not increase");
            if ws.heap.peek().is_some_and(|next| *next > fresh) {
                ws.heap.push(fresh);
                continue;
            }
            take(input, ws, &mut sel, i, d2);
            ws.inv_pivot.push(1.0 / d2.sqrt());
        }
        Ok(sel)
    }
}

/// Brings candidate `i`'s factor row and residual up to date with picks `from..picks.len()`:
/// Algorithm 1's update `e = (S_ij − ⟨c_j, c_i⟩)/d_j; c_i ← [c_i, e]; d_i² ← d_i² − e²` for each
/// pick `j` it has not seen yet, in pick order. O(Δ·(d + k)) for Δ missed picks.
struct Refresh<'a> {
    wide: &'a [f64],
    d: usize,
    factor: &'a mut [f64],
    stride: usize,
    i: usize,
    from: usize,
    picks: &'a [usize],
    inv_dj: &'a [f64],
    d2: &'a mut f64,
}

impl WithSimd for Refresh<'_> {
    type Output = ();

    #[inline(always)]
    fn with_simd<S: Simd>(self, simd: S) {
        let Self { wide, d, factor, stride, i, from, picks, inv_dj, d2 } = self;
        let xi = &wide[i * d..(i + 1) * d];
        for (q, &j) in picks.iter().enumerate().skip(from) {
            let cos = dot(simd, xi, &wide[j * d..(j + 1) * d]);
            let inner = dot(simd, &factor[j * stride..j * stride + q], &factor[i * stride..i * stride + q]);
            let e = (cos - inner) * inv_dj[q];
            factor[i * stride + q] = e;
            *d2 -= e * e;
        }
    }
}

/// f64 dot product with two FMA chains.
#[inline(always)]
fn dot<S: Simd>(simd: S, a: &[f64], b: &[f64]) -> f64 {
    let (av, at) = S::as_simd_f64s(a);
    let (bv, bt) = S::as_simd_f64s(b);
    let (mut acc0, mut acc1) = (simd.splat_f64s(0.0), simd.splat_f64s(0.0));
    let mut pairs_a = av.chunks_exact(2);
    let mut pairs_b = bv.chunks_exact(2);
    for (pa, pb) in (&mut pairs_a).zip(&mut pairs_b) {
        acc0 = simd.mul_add_e_f64s(pa[0], pb[0], acc0);
        acc1 = simd.mul_add_e_f64s(pa[1], pb[1], acc1);
    }
    for (&x, &y) in pairs_a.remainder().iter().zip(pairs_b.remainder()) {
        acc0 = simd.mul_add_e_f64s(x, y, acc0);
    }
    let tail: f64 = at.iter().zip(bt).map(|(x, y)| x * y).sum();
    simd.reduce_sum_f64s(simd.add_f64s(acc0, acc1)) + tail
}
