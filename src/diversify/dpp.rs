//! `dpp`: greedy MAP inference for a quality-weighted DPP, with an incremental Cholesky factor.

use std::collections::binary_heap::PeekMut;

use pulp::{Arch, Simd, WithSimd};

use super::{allowed, fill_by_score, relevance_selection, take, Bound, Diversifier, KernelError, Workspace};
use crate::model::{Params, RerankInput, Selection};

/// Residual `d_i²` below which a candidate adds no new direction: the kernel's numerical rank is
/// reached for it. Candidates under it are never picked by the DPP objective; once every remaining
/// one is under it, the slate is filled by score.
pub const EPSILON: f64 = 1e-9;

/// Greedy DPP MAP: each step picks `argmax_i (1 − λ)·s_i + λ·ln d_i²`.
///
/// Legend: `s_i` normalised score; `λ` the request's `lambda`; `x_i` candidate i's unit embedding;
/// `S_ij = cos(i, j) = ⟨x_i, x_j⟩` the similarity kernel; `c_i` item i's row of the Cholesky
/// factor of `S` restricted to the slate so far; `d_i²` its residual (Schur complement),
/// `d_i² = S_ii − ‖c_i‖²`; `q_1..q_t` an orthonormal basis of the picked embeddings.
///
/// # Reference
/// L. Chen, G. Zhang and H. Zhou, "Fast Greedy MAP Inference for Determinantal Point Process to
/// Improve Recommendation Diversity", NeurIPS 2018, Algorithm 1. Update after picking `j` as the
/// t-th item: `e_i = (S_ij − ⟨c_j, c_i⟩) / d_j`, `c_i ← [c_i, e_i]`, `d_i² ← d_i² − e_i²`.
/// The objective is the log of the paper's gain for the kernel `L = Diag(exp(α·s)) S Diag(exp(α·s))`
/// with `α = (1 − λ)/(2λ)`, scaled by `λ`: `ln det L_{S∪{i}} − ln det L_S = 2α·s_i + ln d_i²`.
/// Working in log space never overflows.
///
/// Deviations: (1) candidates with `d_i² < EPSILON` are skipped rather than ending the run, and
/// the run ends (filling by score) only when no remaining candidate is above it; (2) `S` is the
/// cosine of the stored f32 rows taken in f64 (inverse norms kept exactly), so `S_ii = 1` and `S`
/// stays a PSD Gram matrix despite f32 rounding; (3) `e_i` is computed in an equivalent form that
/// needs no factor rows. Because `S = X Xᵀ` is a Gram matrix, the Cholesky row `c_i` holds the
/// coordinates of `x_i` in the Gram–Schmidt basis of the picked rows (Cholesky of `X_Y X_Yᵀ` is
/// the R of the QR of `X_Yᵀ`), so with `q_t = (x_j − Σ_{s<t} e_{j,s} q_s) / d_j`,
/// `e_i = (⟨x_i, x_j⟩ − ⟨c_j, c_i⟩) / d_j = ⟨x_i, q_t⟩`: one length-d dot product per candidate
/// and pick instead of a length-d plus a length-t one, against a basis that sits in L1 cache.
/// `q_t` is built by classical Gram–Schmidt applied twice (CGS2), which keeps the basis
/// orthonormal to working precision while the picked rows stay numerically independent, as they
/// do here (`d_j² ≥ EPSILON` at every pick): L. Giraud, J. Langou, M. Rozložník, "The loss of
/// orthogonality in the Gram–Schmidt orthogonalization process", Computers & Mathematics with
/// Applications 50, 2005 ("twice is enough"; citation from memory). Classical rather than
/// modified, so each sweep's dot products are independent and share loads. The slow
/// `reference::dpp` re-factorises `S_Y` with a textbook Cholesky at every step, and the tests
/// hold this kernel to it and to nalgebra determinants.
///
/// Evaluated lazily (M. Minoux, "Accelerated greedy algorithms for maximizing submodular set
/// functions", Optimization Techniques, LNCS 7, 1978): the objective is a modular term plus
/// `λ·ln det`, which is submodular, so each candidate's value only falls as the slate grows. A
/// max-heap holds stale values as upper bounds; only the candidate on top is brought up to date
/// (projected on the basis vectors it has not seen) and put back in place, and it is taken once
/// it is on top with a fresh value. The picks are exactly those of the eager algorithm (same
/// objective, same tie rule).
///
/// # Complexity
/// Worst case O(N·k·d + k²·d) time: every candidate refreshed at every step, plus building each
/// basis vector (O(t·d) for the t-th). Typically far less, since candidates whose bound sinks
/// below the winners are never refreshed. O(N·d + k·d) extra memory (f64 copies of the unit rows
/// and the basis); the N×N kernel is never built and no factor rows are stored. Heap operations
/// add O(log N) per pop.
///
/// # Invariants
/// `S` is symmetric PSD by construction (a Gram matrix); the implied factor is lower-triangular
/// with a positive diagonal (`d_j > sqrt(EPSILON)` at every pivot); the basis is orthonormal; no
/// residual grows from one step to the next (each update subtracts a square); output has no
/// duplicates and at most `min(k, N)` items. `Σ ln(gains)` over the DPP-chosen prefix equals
/// `ln det S_Y` for that prefix.
///
/// # Numerical notes
/// Rows, basis, projections and residuals are f64, which keeps an exhausted residual near 1e-15
/// instead of the ~1e-7 noise f32 sums would leave, so `EPSILON` means what it says. The unit rows
/// are widened to f64 once per call (refreshes read rows in heap order, where widening on every
/// read would repeat the conversion). The whole loop runs inside one SIMD dispatch. Heap order is
/// value, then lower index, so ties go to the lower index as everywhere.
#[derive(Debug, Clone, Copy, Default)]
pub struct Dpp;

impl Diversifier for Dpp {
    fn name(&self) -> &'static str {
        "dpp"
    }

    fn needs_embeddings(&self) -> bool {
        true
    }

    /// `N·k·d + 2·k²·d`: every candidate projected on every basis vector, plus the basis.
    fn work(&self, n: usize, d: usize, k: usize) -> u64 {
        let (n, d, k) = (n as u64, d as u64, k.min(n) as u64);
        (n * k).saturating_mul(d) + 2 * k * k * d
    }

    fn select(&self, input: &RerankInput, params: &Params, ws: &mut Workspace) -> Result<Selection, KernelError> {
        let lambda = params.lambda();
        if lambda == 0.0 || input.is_empty() {
            return Ok(relevance_selection(input, params, ws));
        }
        let emb = input.embeddings().ok_or(KernelError::EmbeddingsRequired { algorithm: self.name() })?;
        let sel = Arch::new().dispatch(Greedy { input, params, ws, d: emb.dim() });
        ws.check_cancelled()?;
        Ok(sel)
    }
}

/// The greedy loop, run inside one SIMD dispatch so the inner dot products inline.
struct Greedy<'a> {
    input: &'a RerankInput,
    params: &'a Params,
    ws: &'a mut Workspace,
    d: usize,
}

impl WithSimd for Greedy<'_> {
    type Output = Selection;

    #[inline(always)]
    fn with_simd<S: Simd>(self, simd: S) -> Selection {
        let Self { input, params, ws, d } = self;
        let emb = input.embeddings().expect("select checked for embeddings");
        let lambda = params.lambda();
        let n = input.len();
        let m = params.k().min(n);
        let s = input.normalized();
        ws.reset(n, input.group_count());
        // Unit rows in f64, once per call: refreshes touch rows in heap order, not streaming order.
        ws.wide.clear();
        ws.wide.reserve(n * d);
        for (row, &inv) in emb.as_slice().chunks_exact(d).zip(emb.inv_norms()) {
            ws.wide.extend(row.iter().map(|&x| f64::from(x) * inv));
        }
        // Basis vector t is basis[t·d ..][..d]; at most m − 1 are ever needed.
        ws.basis.clear();
        ws.basis.reserve(m.saturating_sub(1) * d);
        ws.filled.clear();
        ws.filled.resize(n, 0);
        ws.running.clear();
        ws.running.resize(n, 1.0);
        ws.heap.clear();
        ws.heap.extend((0..n).map(|i| Bound { value: (1.0 - lambda) * s[i], index: i }));
        let mut sel = Selection { indices: Vec::with_capacity(m), gains: Vec::with_capacity(m), exhausted_at: None };

        while sel.indices.len() < m {
            if ws.cancelled() {
                break;
            }
            let step = sel.indices.len();
            let Some(mut top) = ws.heap.peek_mut() else {
                sel.exhausted_at = Some(step);
                fill_by_score(input, params, ws, m, &mut sel);
                break;
            };
            let i = top.index;
            // Caps only tighten and residuals only shrink, so a candidate dropped here is out for good.
            if !allowed(input, params, &ws.group_taken, i) {
                PeekMut::pop(top);
                continue;
            }
            if ws.filled[i] < step {
                // A stale bound on top: bring it up to date and put it back in place (one sift
                // down, where a pop and a push would cost two). If it is still on top next time
                // round, it is exact and no other bound beats it: the greedy pick.
                let removed = project_out(simd, &ws.wide[i * d..(i + 1) * d], &ws.basis, ws.filled[i], step, d);
                let d2 = ws.running[i] - removed;
                ws.running[i] = d2;
                ws.filled[i] = step;
                if d2 < EPSILON {
                    PeekMut::pop(top);
                    continue;
                }
                let fresh = (1.0 - lambda) * s[i] + lambda * d2.ln();
                debug_assert!(fresh <= top.value + 1e-9, "lazy bound grew: residuals must not increase");
                top.value = fresh;
                continue;
            }
            // On top and exact for this step (refreshed, or an initial bound at step 0).
            PeekMut::pop(top);
            let d2 = ws.running[i];
            take(input, ws, &mut sel, i, d2);
            if sel.indices.len() < m {
                let Workspace { wide, basis, scratch, .. } = &mut *ws;
                push_basis_vector(simd, &wide[i * d..(i + 1) * d], basis, scratch, d);
            }
        }
        sel
    }
}

/// `Σ_t ⟨x, q_t⟩²` over basis vectors `q_from .. q_to`: how much of `d_i²` those picks remove.
/// Four (at the end two) basis vectors share each load of `x`.
#[inline(always)]
fn project_out<S: Simd>(simd: S, x: &[f64], basis: &[f64], from: usize, to: usize, d: usize) -> f64 {
    // Counted in basis vectors: `chunks_exact(4 * d)` would divide by a run-time chunk size.
    let mut t = from;
    let mut removed = 0.0;
    while t + 4 <= to {
        let [e0, e1, e2, e3] = dot4(simd, x, &basis[t * d..(t + 4) * d], d);
        removed += e0.mul_add(e0, e1 * e1) + e2.mul_add(e2, e3 * e3);
        t += 4;
    }
    if t + 2 <= to {
        let (e0, e1) = dot2(simd, x, &basis[t * d..(t + 1) * d], &basis[(t + 1) * d..(t + 2) * d]);
        removed += e0.mul_add(e0, e1 * e1);
        t += 2;
    }
    if t < to {
        let e = dot(simd, x, &basis[t * d..(t + 1) * d]);
        removed = e.mul_add(e, removed);
    }
    removed
}

/// `(x·q0, x·q1)`, loading `x` once, with two FMA chains per product.
#[inline(always)]
fn dot2<S: Simd>(simd: S, x: &[f64], q0: &[f64], q1: &[f64]) -> (f64, f64) {
    let (xv, xt) = S::as_simd_f64s(x);
    let (av, at) = S::as_simd_f64s(q0);
    let (bv, bt) = S::as_simd_f64s(q1);
    let zero = simd.splat_f64s(0.0);
    let (mut a0, mut a1, mut b0, mut b1) = (zero, zero, zero, zero);
    let mut xs = xv.chunks_exact(2);
    let mut as_ = av.chunks_exact(2);
    let mut bs = bv.chunks_exact(2);
    for ((px, pa), pb) in (&mut xs).zip(&mut as_).zip(&mut bs) {
        a0 = simd.mul_add_e_f64s(px[0], pa[0], a0);
        b0 = simd.mul_add_e_f64s(px[0], pb[0], b0);
        a1 = simd.mul_add_e_f64s(px[1], pa[1], a1);
        b1 = simd.mul_add_e_f64s(px[1], pb[1], b1);
    }
    for ((&px, &pa), &pb) in xs.remainder().iter().zip(as_.remainder()).zip(bs.remainder()) {
        a0 = simd.mul_add_e_f64s(px, pa, a0);
        b0 = simd.mul_add_e_f64s(px, pb, b0);
    }
    let ta: f64 = xt.iter().zip(at).map(|(x, y)| x * y).sum();
    let tb: f64 = xt.iter().zip(bt).map(|(x, y)| x * y).sum();
    (simd.reduce_sum_f64s(simd.add_f64s(a0, a1)) + ta, simd.reduce_sum_f64s(simd.add_f64s(b0, b1)) + tb)
}

/// Appends `x` orthogonalised against the basis and normalised: classical Gram–Schmidt applied
/// twice (CGS2). Each sweep takes all `t` coefficients `Qᵀr` first, as independent dot products
/// four basis vectors per load of `r`, then subtracts `Q·(Qᵀr)`; O(t·d) per sweep. (Modified
/// Gram–Schmidt would chain every dot product on the one before.)
#[inline(always)]
fn push_basis_vector<S: Simd>(simd: S, x: &[f64], basis: &mut Vec<f64>, r: &mut Vec<f64>, d: usize) {
    let t = basis.len() / d;
    // `r` then its t coefficients, in one buffer.
    r.clear();
    r.extend_from_slice(x);
    r.resize(d + t, 0.0);
    let (r, coef) = r.split_at_mut(d);
    // Two sweeps: the second removes what rounding left of the first's projections.
    for _sweep in 0..2 {
        let mut quads = basis.chunks_exact(4 * d);
        let mut c = coef.chunks_exact_mut(4);
        for (q, c) in (&mut quads).zip(&mut c) {
            c.copy_from_slice(&dot4(simd, r, q, d));
        }
        for (q, c) in quads.remainder().chunks_exact(d).zip(c.into_remainder()) {
            *c = dot(simd, r, q);
        }
        for (q, &c) in basis.chunks_exact(d).zip(coef.iter()) {
            for (rv, &qv) in r.iter_mut().zip(q) {
                *rv = (-c).mul_add(qv, *rv);
            }
        }
    }
    let norm = dot(simd, r, r).sqrt();
    debug_assert!(norm > 0.0, "a picked candidate has residual above EPSILON");
    let inv = 1.0 / norm;
    basis.extend(r.iter().map(|&v| v * inv));
}

/// `[⟨x, q_0⟩, …, ⟨x, q_3⟩]` for the four consecutive d-length rows of `q`, loading `x` once per
/// four products; two FMA chains per product, eight in flight, cover the FMA latency.
#[inline(always)]
fn dot4<S: Simd>(simd: S, x: &[f64], q: &[f64], d: usize) -> [f64; 4] {
    let (q0, rest) = q.split_at(d);
    let (q1, rest) = rest.split_at(d);
    let (q2, q3) = rest.split_at(d);
    let (xv, xt) = S::as_simd_f64s(x);
    let (v0, t0) = S::as_simd_f64s(q0);
    let (v1, t1) = S::as_simd_f64s(q1);
    let (v2, t2) = S::as_simd_f64s(q2);
    let (v3, t3) = S::as_simd_f64s(&q3[..d]);
    let zero = simd.splat_f64s(0.0);
    let mut acc = [zero; 8];
    for p in 0..xv.len() / 2 {
        let (a, b) = (2 * p, 2 * p + 1);
        acc[0] = simd.mul_add_e_f64s(xv[a], v0[a], acc[0]);
        acc[1] = simd.mul_add_e_f64s(xv[a], v1[a], acc[1]);
        acc[2] = simd.mul_add_e_f64s(xv[a], v2[a], acc[2]);
        acc[3] = simd.mul_add_e_f64s(xv[a], v3[a], acc[3]);
        acc[4] = simd.mul_add_e_f64s(xv[b], v0[b], acc[4]);
        acc[5] = simd.mul_add_e_f64s(xv[b], v1[b], acc[5]);
        acc[6] = simd.mul_add_e_f64s(xv[b], v2[b], acc[6]);
        acc[7] = simd.mul_add_e_f64s(xv[b], v3[b], acc[7]);
    }
    if xv.len() % 2 == 1 {
        let a = xv.len() - 1;
        acc[0] = simd.mul_add_e_f64s(xv[a], v0[a], acc[0]);
        acc[1] = simd.mul_add_e_f64s(xv[a], v1[a], acc[1]);
        acc[2] = simd.mul_add_e_f64s(xv[a], v2[a], acc[2]);
        acc[3] = simd.mul_add_e_f64s(xv[a], v3[a], acc[3]);
    }
    let tail = |t: &[f64]| -> f64 { xt.iter().zip(t).map(|(x, y)| x * y).sum() };
    [
        simd.reduce_sum_f64s(simd.add_f64s(acc[0], acc[4])) + tail(t0),
        simd.reduce_sum_f64s(simd.add_f64s(acc[1], acc[5])) + tail(t1),
        simd.reduce_sum_f64s(simd.add_f64s(acc[2], acc[6])) + tail(t2),
        simd.reduce_sum_f64s(simd.add_f64s(acc[3], acc[7])) + tail(t3),
    ]
}

/// f64 dot product with four FMA chains: at d = 64 (16 AVX2 vectors) two chains left the loop
/// bound by FMA latency (4 cycles) rather than by the two FMA ports.
#[inline(always)]
fn dot<S: Simd>(simd: S, a: &[f64], b: &[f64]) -> f64 {
    let (av, at) = S::as_simd_f64s(a);
    let (bv, bt) = S::as_simd_f64s(b);
    let zero = simd.splat_f64s(0.0);
    let (mut acc0, mut acc1, mut acc2, mut acc3) = (zero, zero, zero, zero);
    let mut quads_a = av.chunks_exact(4);
    let mut quads_b = bv.chunks_exact(4);
    for (qa, qb) in (&mut quads_a).zip(&mut quads_b) {
        acc0 = simd.mul_add_e_f64s(qa[0], qb[0], acc0);
        acc1 = simd.mul_add_e_f64s(qa[1], qb[1], acc1);
        acc2 = simd.mul_add_e_f64s(qa[2], qb[2], acc2);
        acc3 = simd.mul_add_e_f64s(qa[3], qb[3], acc3);
    }
    for (&x, &y) in quads_a.remainder().iter().zip(quads_b.remainder()) {
        acc0 = simd.mul_add_e_f64s(x, y, acc0);
    }
    let tail: f64 = at.iter().zip(bt).map(|(x, y)| x * y).sum();
    simd.reduce_sum_f64s(simd.add_f64s(simd.add_f64s(acc0, acc1), simd.add_f64s(acc2, acc3))) + tail
}

