//! The screened DPP kernel: f32 bounds over transposed panels, f64 only where a pick is decided.
//!
//! Same greedy as [`super::lazy`] and the same picks; what differs is how little f64 work is
//! needed to prove each one. See [`super::Dpp`] for the objective and the reference.
//!
//! # Method
//! - **Screening.** Every candidate's residual `d_i²` is tracked in f32 as `r̃_i = 1 − Σ_t ẽ_it²`,
//!   with `ẽ_it` the f32 dot product of its stored row and the basis vector `q_t` rounded to f32.
//!   [`screen_error`] bounds `|r̃_i − d_i²|` by `E_t`, so `d_i² ≤ r̃_i + E_t` always holds and the
//!   objective of `i` is at most `(1 − λ)·s_i + λ·ln(r̃_i + E_t)`.
//! - **No logarithms while screening.** With `α = (1 − λ)/λ` and fixed `w_i = exp(α·(s_i − s_max))`,
//!   `v ↦ exp((v − (1 − λ)·s_max)/λ)` is increasing, and maps that bound to `w_i·(r̃_i + E_t)`.
//!   So bounds are compared as products. The weights need `α·(s_max − s_min) ≤ 40` to stay
//!   normal f32 ([`screenable`]); other slates go to the lazy kernel.
//! - **Panels.** Candidates are stored transposed in panels of `8 × lanes` (64 on AVX2): row k of
//!   a panel holds coordinate k of its candidates. A screening update is then d broadcast FMAs
//!   into eight independent accumulators, with no horizontal sums, and a panel of d = 64 sits in
//!   L1 cache while it catches up on several basis vectors.
//! - **Lazy panels.** A panel keeps the largest bound it had when last updated. Bounds only fall,
//!   so that stale maximum still bounds all its candidates (M. Minoux, "Accelerated greedy
//!   algorithms for maximizing submodular set functions", LNCS 7, 1978, at panel granularity).
//!   A panel is updated only when its stale maximum could still win.
//! - **Certification.** Each step updates panels in order of stale maximum until the top one is
//!   current. It evaluates that panel's best candidate exactly, in f64 against the f64 basis,
//!   exactly as the lazy kernel does, giving `v₁`. It then brings up to date every panel whose
//!   maximum reaches `v₁`'s image, and evaluates exactly every candidate there whose bound does.
//!   The best exact value wins, ties to the lower index. Every other candidate's objective is
//!   provably below it, so the pick is the eager greedy's.
//!
//! # Complexity
//! O(N·d) to build the panels, then worst case O(N·k·d) f32 multiply-adds (every panel updated at
//! every step) plus, per step, O(t·d) f64 per exact evaluation and O(t·d) to extend the basis.
//! Measured on the bench slates, a step touches a quarter to a half of the panels and evaluates
//! one to two candidates exactly. Extra memory: the panels (N·d f32), k·d f32 for the rounded
//! basis, O(N) per-candidate state.
//!
//! # Invariants
//! For every live candidate and every panel: `d_i² ≤ r̃_i + E_{filled}` and `bound_i ≥` the image
//! of its objective; `panel_max` is at least every bound in the panel. A zero weight means out for
//! good (taken, capped, or `d_i² < EPSILON`). Exact residuals use the same f64 arithmetic as the
//! lazy kernel, so `gains` carry the same values up to rounding.

use pulp::Simd;

use super::{project_out, push_basis_vector, EPSILON};
use crate::diversify::{fill_by_score, take, Workspace};
use crate::model::{Params, RerankInput, Selection};

/// SIMD vectors of candidates per panel: eight independent FMA chains cover the FMA latency.
const PANEL_VECTORS: usize = 8;

/// Largest `α·(s_max − s_min)`, `α = (1 − λ)/λ`, the screened kernel takes. Weights then stay at
/// or above `e^-40 ≈ 4e-18`, and products with residuals of at least `EPSILON` stay normal f32.
pub(super) const MAX_WEIGHT_EXPONENT: f64 = 40.0;

/// Relative slack on the f32 side of every comparison with an exact value. It covers the f32
/// rounding of weights, residual sums and products, which is a few units of 6e-8.
const SLACK: f64 = 1e-5;

/// Unit roundoff of f32.
const U32: f64 = f32::EPSILON as f64 / 2.0;

/// The screening buffers, kept in the caller's [`Workspace`] and reused across calls.
#[derive(Debug, Default, Clone)]
pub(crate) struct ScreenBuffers {
    /// Panels: panel p is `d` rows of `width` f32 lanes, candidates `p·width ..` in lane order.
    panel: Vec<f32>,
    /// `w_i`, zero once out; padding lanes are zero.
    weight: Vec<f32>,
    /// `r̃_i`.
    resid: Vec<f32>,
    /// `w_i·(r̃_i + E)` as of the panel's last update.
    bound: Vec<f32>,
    /// Largest bound per panel as of its last update (an upper bound afterwards).
    panel_max: Vec<f32>,
    /// Basis vectors each panel has seen.
    panel_filled: Vec<usize>,
    /// The basis rounded to f32, one d-length row per pick.
    q32: Vec<f32>,
    /// One candidate's unit row in f64.
    row: Vec<f64>,
}

impl ScreenBuffers {
    /// Bytes held between calls.
    pub(crate) fn retained_bytes(&self) -> usize {
        use std::mem::size_of;
        (self.panel.capacity()
            + self.weight.capacity()
            + self.resid.capacity()
            + self.bound.capacity()
            + self.panel_max.capacity()
            + self.q32.capacity())
            * size_of::<f32>()
            + self.panel_filled.capacity() * size_of::<usize>()
            + self.row.capacity() * size_of::<f64>()
    }
}

/// True when the slate's weights `exp(α·(s_i − s_max))` fit the screened kernel's f32 range.
pub(super) fn screenable(input: &RerankInput, lambda: f64) -> bool {
    let s = input.normalized();
    let (lo, hi) = s.iter().fold((f64::INFINITY, f64::NEG_INFINITY), |(lo, hi), &v| (lo.min(v), hi.max(v)));
    (1.0 - lambda) / lambda * (hi - lo) <= MAX_WEIGHT_EXPONENT
}

/// A bound on `|r̃ − d²|` after `t` basis vectors in dimension `d`, where `eta` bounds
/// `|‖row‖ − 1|` over the stored f32 rows.
///
/// Derivation (standard floating-point error analysis, N. J. Higham, "Accuracy and Stability of
/// Numerical Algorithms", 2nd ed., SIAM 2002, §3.1, from memory). Write `x` for a unit row in f64
/// and `q` for a basis vector in f64, so that the exact kernel's coefficient is `e = ⟨x, q⟩`.
/// Screening uses the stored row `x̂ = x·‖x̂‖`, where `|‖x̂‖ − 1| ≤ η`, and
/// `q̂ = fl32(q)`, where `|q̂ − q| ≤ u|q|`. It sums the products in f32 along a tree no deeper
/// than `d + 4`: lanes, their reduction, and a tail. So
/// `|ẽ − e| ≤ δ = (γ_{d+4}(1 + u) + u)(1 + η) + η`, with `γ_n = nu/(1 − nu)`, because
/// `Σ|x̂_k q_k| ≤ ‖x̂‖‖q‖` and `‖q‖ = 1` to f64 precision. Then
/// `|Σ_t ẽ_t² − Σ_t e_t²| ≤ δ·Σ(2|e_t| + δ) ≤ δ(2√t + tδ)` by Cauchy–Schwarz and Bessel
/// (`Σ e_t² ≤ 1`). Each f32 residual update rounds once more (`t·u`). The exact kernel's own f64
/// rounding (about 1e-15) is covered by `1e-12·(1 + t)`, and small margins (0.1 % on δ, `2.002`
/// for 2) absorb the rounding in evaluating this formula.
#[must_use]
pub(super) fn screen_error(d: usize, t: usize, eta: f64) -> f64 {
    let (df, tf) = (d as f64, t as f64);
    let gamma = (df + 4.0) * U32 / (1.0 - (df + 4.0) * U32);
    let delta = ((gamma * (1.0 + U32) + U32) * (1.0 + eta) + eta) * 1.001;
    delta * (2.002 * tf.sqrt() + tf * delta) + 1.01 * tf * U32 + 1e-12 * (1.0 + tf)
}

/// Runs the screened greedy. The caller has checked `lambda > 0`, `N > 0`, embeddings present
/// and [`screenable`].
#[inline(always)]
pub(super) fn select<S: Simd>(simd: S, input: &RerankInput, params: &Params, ws: &mut Workspace) -> Selection {
    let emb = input.embeddings().expect("select checked for embeddings");
    let (rows, inv, d) = (emb.as_slice(), emb.inv_norms(), emb.dim());
    let lambda = params.lambda();
    let n = input.len();
    let m = params.k().min(n);
    let s = input.normalized();
    let s_hi = s.iter().copied().fold(f64::NEG_INFINITY, f64::max);
    let lanes = std::mem::size_of::<S::f32s>() / std::mem::size_of::<f32>();
    let width = PANEL_VECTORS * lanes;
    let panels = n.div_ceil(width);
    ws.reset(n, input.group_count());
    let eta = fill_panels(ws, rows, inv, d, width, panels);
    init_state(ws, s, s_hi, lambda, n, m, d, width, panels);
    // `v ↦ exp((v − (1 − λ)·s_max)/λ)`, lowered by SLACK: an f32 bound below this image of an
    // exact value `v` belongs to a candidate whose objective is below `v`.
    let image = |v: f64| (((v - (1.0 - lambda) * s_hi) / lambda).exp() * (1.0 - SLACK)) as f32;
    let kill = (EPSILON * (1.0 - SLACK)) as f32;
    let mut sel = Selection { indices: Vec::with_capacity(m), gains: Vec::with_capacity(m), exhausted_at: None };
    while sel.indices.len() < m {
        if ws.cancelled() {
            break;
        }
        let t = sel.indices.len();
        let err = (screen_error(d, t, eta) * (1.0 + SLACK)) as f32;
        let mut step = Step { simd, rows, inv, s, lambda, d, t, width, err, kill, ws: &mut *ws };
        let Some(j) = step.winner(image) else {
            sel.exhausted_at = Some(t);
            fill_by_score(input, params, ws, m, &mut sel);
            break;
        };
        let d2 = ws.running[j];
        take(input, ws, &mut sel, j, d2);
        ws.screen.weight[j] = 0.0;
        if let Some(cap) = params.max_per_category() {
            let g = input.groups()[j];
            if ws.group_taken[g as usize] >= cap {
                for (w, &gi) in ws.screen.weight.iter_mut().zip(input.groups()) {
                    if gi == g {
                        *w = 0.0;
                    }
                }
            }
        }
        if sel.indices.len() < m {
            let Workspace { basis, scratch, screen, .. } = &mut *ws;
            widen(&rows[j * d..(j + 1) * d], inv[j], &mut screen.row);
            push_basis_vector(simd, &screen.row, basis, scratch, d);
            screen.q32.extend(basis[t * d..].iter().map(|&b| b as f32));
        }
    }
    sel
}

/// Transposes the stored rows into panels; returns `η = max |‖row‖ − 1|`.
///
/// Panel lanes past N stay zero, as do their weights, so they never bound anything.
fn fill_panels(ws: &mut Workspace, rows: &[f32], inv: &[f64], d: usize, width: usize, panels: usize) -> f64 {
    let n = inv.len();
    let buf = &mut ws.screen.panel;
    buf.clear();
    buf.resize(panels * width * d, 0.0);
    for (p, panel) in buf.chunks_exact_mut(width * d).enumerate() {
        let block = &rows[p * width * d..((p + 1) * width).min(n) * d];
        // Eight rows at a time (2 KiB at d = 64, in L1): each coordinate becomes eight
        // consecutive lanes.
        let mut groups = block.chunks_exact(8 * d);
        let mut lane = 0;
        for group in &mut groups {
            let r: [&[f32]; 8] = std::array::from_fn(|g| &group[g * d..(g + 1) * d]);
            for (k, dst) in panel.chunks_exact_mut(width).enumerate() {
                dst[lane..lane + 8].copy_from_slice(&std::array::from_fn::<f32, 8, _>(|g| r[g][k]));
            }
            lane += 8;
        }
        for (g, src) in groups.remainder().chunks_exact(d).enumerate() {
            for (k, &x) in src.iter().enumerate() {
                panel[k * width + lane + g] = x;
            }
        }
    }
    inv.iter().fold(0.0, |eta: f64, &v| eta.max((1.0 / v - 1.0).abs()))
}

/// Per-call state: weights, residuals 1, bounds `w_i` (exact at step 0), empty basis.
#[allow(clippy::too_many_arguments)]
fn init_state(
    ws: &mut Workspace,
    s: &[f64],
    s_hi: f64,
    lambda: f64,
    n: usize,
    m: usize,
    d: usize,
    width: usize,
    panels: usize,
) {
    let alpha = (1.0 - lambda) / lambda;
    let padded = panels * width;
    let sc = &mut ws.screen;
    sc.weight.clear();
    sc.weight.extend(s.iter().map(|&si| (alpha * (si - s_hi)).exp() as f32));
    sc.weight.resize(padded, 0.0);
    sc.resid.clear();
    sc.resid.resize(padded, 1.0);
    sc.bound.clear();
    sc.bound.extend_from_slice(&sc.weight);
    sc.panel_max.clear();
    sc.panel_max.extend(sc.bound.chunks_exact(width).map(|b| b.iter().copied().fold(0.0, f32::max)));
    sc.panel_filled.clear();
    sc.panel_filled.resize(panels, 0);
    sc.q32.clear();
    sc.q32.reserve(m.saturating_sub(1) * d);
    sc.row.clear();
    sc.row.resize(d, 0.0);
    ws.running.clear();
    ws.running.resize(n, 1.0);
    ws.filled.clear();
    ws.filled.resize(n, 0);
    ws.basis.clear();
    ws.basis.reserve(m.saturating_sub(1) * d);
}

/// `dst = src · inv` in f64: a stored row made unit, exactly as the lazy kernel widens it.
#[inline(always)]
fn widen(src: &[f32], inv: f64, dst: &mut [f64]) {
    for (o, &x) in dst.iter_mut().zip(src) {
        *o = f64::from(x) * inv;
    }
}

/// One greedy step's view of the state.
struct Step<'a, S> {
    simd: S,
    rows: &'a [f32],
    inv: &'a [f64],
    s: &'a [f64],
    lambda: f64,
    d: usize,
    /// Picks so far (basis vectors available).
    t: usize,
    width: usize,
    /// `E_t`, rounded up into f32.
    err: f32,
    /// Screened residual below which a candidate is certainly under `EPSILON`.
    kill: f32,
    ws: &'a mut Workspace,
}

impl<S: Simd> Step<'_, S> {
    /// The greedy pick at this step, or `None` when every candidate is out (kernel exhausted).
    #[inline(always)]
    fn winner(&mut self, image: impl Fn(f64) -> f32) -> Option<usize> {
        // Phase 1: the best candidate of the first current panel on top, evaluated exactly.
        let (v1, i1) = loop {
            let (p, pm) = self.top_panel()?;
            if self.ws.screen.panel_filled[p] < self.t {
                self.update_panel(p);
                continue;
            }
            let base = p * self.width;
            let lane = self.ws.screen.bound[base..base + self.width]
                .iter()
                .position(|&b| b.to_bits() == pm.to_bits())
                .expect("a current panel's maximum is one of its bounds");
            let i = base + lane;
            if let Some(v) = self.exact(i) {
                break (v, i);
            }
            let sc = &mut self.ws.screen;
            sc.bound[i] = 0.0;
            sc.panel_max[p] = sc.bound[base..base + self.width].iter().copied().fold(0.0, f32::max);
        };
        // Phase 2: every candidate whose bound reaches v1's image is evaluated exactly.
        let mut best = (v1, i1);
        let mut bar = image(v1);
        for p in 0..self.ws.screen.panel_max.len() {
            if self.ws.screen.panel_max[p] < bar {
                continue;
            }
            if self.ws.screen.panel_filled[p] < self.t {
                self.update_panel(p);
            }
            for i in p * self.width..(p + 1) * self.width {
                if self.ws.screen.bound[i] < bar || i == i1 {
                    continue;
                }
                match self.exact(i) {
                    // Higher value, then lower index.
                    Some(v) if v.total_cmp(&best.0).then(best.1.cmp(&i)).is_gt() => {
                        best = (v, i);
                        bar = image(v);
                    }
                    Some(_) => {}
                    None => self.ws.screen.bound[i] = 0.0,
                }
            }
        }
        Some(best.1)
    }

    /// The panel with the largest (possibly stale) maximum, lower index on ties; `None` when no
    /// panel has a live candidate.
    #[inline(always)]
    fn top_panel(&self) -> Option<(usize, f32)> {
        let mut top = None;
        let mut best = 0.0_f32;
        for (p, &pm) in self.ws.screen.panel_max.iter().enumerate() {
            if pm > best {
                best = pm;
                top = Some(p);
            }
        }
        top.map(|p| (p, best))
    }

    /// Candidate `i`'s exact objective, bringing its f64 residual up to date; `None` (and its
    /// weight zeroed) once `d_i² < EPSILON`.
    #[inline(always)]
    fn exact(&mut self, i: usize) -> Option<f64> {
        let (d, t) = (self.d, self.t);
        let ws = &mut *self.ws;
        if ws.filled[i] < t {
            let row = &mut ws.screen.row;
            widen(&self.rows[i * d..(i + 1) * d], self.inv[i], row);
            ws.running[i] -= project_out(self.simd, row, &ws.basis, ws.filled[i], t, d);
            ws.filled[i] = t;
        }
        let d2 = ws.running[i];
        if d2 < EPSILON {
            ws.screen.weight[i] = 0.0;
            return None;
        }
        Some((1.0 - self.lambda) * self.s[i] + self.lambda * d2.ln())
    }

    /// Brings panel `p` up to date: one f32 pass over the panel per basis vector it has not seen,
    /// then fresh bounds and maximum.
    #[inline(always)]
    fn update_panel(&mut self, p: usize) {
        let (simd, d, width, t) = (self.simd, self.d, self.width, self.t);
        let sc = &mut self.ws.screen;
        let from = sc.panel_filled[p];
        let (pv, _) = S::as_simd_f32s(&sc.panel[p * d * width..(p + 1) * d * width]);
        let span = p * width..(p + 1) * width;
        let (rv, _) = S::as_mut_simd_f32s(&mut sc.resid[span.clone()]);
        let zero = simd.splat_f32s(0.0);
        for q in sc.q32[from * d..t * d].chunks_exact(d) {
            let mut acc = [zero; PANEL_VECTORS];
            for (&qk, row) in q.iter().zip(pv.chunks_exact(PANEL_VECTORS)) {
                let qk = simd.splat_f32s(qk);
                for (a, &x) in acc.iter_mut().zip(row) {
                    *a = simd.mul_add_e_f32s(x, qk, *a);
                }
            }
            for (r, &e) in rv.iter_mut().zip(&acc) {
                *r = simd.negate_mul_add_e_f32s(e, e, *r);
            }
        }
        let (wv, _) = S::as_mut_simd_f32s(&mut sc.weight[span.clone()]);
        let (bv, _) = S::as_mut_simd_f32s(&mut sc.bound[span]);
        let (errv, kill) = (simd.splat_f32s(self.err), simd.splat_f32s(self.kill));
        let mut vmax = zero;
        for ((&r, w), b) in rv.iter().zip(wv.iter_mut()).zip(bv.iter_mut()) {
            let hi = simd.add_f32s(r, errv);
            *w = simd.select_f32s(simd.less_than_f32s(hi, kill), zero, *w);
            *b = simd.mul_f32s(*w, hi);
            vmax = simd.max_f32s(vmax, *b);
        }
        sc.panel_max[p] = simd.reduce_max_f32s(vmax);
        sc.panel_filled[p] = t;
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Brute force on random unit rows and an orthonormal basis from Gram–Schmidt: the f32
    /// screened residual stays within `screen_error` of the f64 one, and the bound is not vacuous.
    #[test]
    fn the_screening_error_bound_holds_on_random_rows() {
        let mut state = 7u64;
        let mut next = move || {
            state ^= state << 13;
            state ^= state >> 7;
            state ^= state << 17;
            (state >> 11) as f64 / (1u64 << 53) as f64 - 0.5
        };
        for &(d, t) in &[(1, 1), (3, 3), (8, 5), (64, 50), (130, 100), (1024, 40)] {
            // Orthonormal basis (f64 modified Gram–Schmidt, twice).
            let mut basis: Vec<Vec<f64>> = Vec::new();
            while basis.len() < t.min(d) {
                let mut v: Vec<f64> = (0..d).map(|_| next()).collect();
                for _ in 0..2 {
                    for q in &basis {
                        let c: f64 = v.iter().zip(q).map(|(a, b)| a * b).sum();
                        v.iter_mut().zip(q).for_each(|(a, b)| *a -= c * b);
                    }
                }
                let norm = v.iter().map(|a| a * a).sum::<f64>().sqrt();
                basis.push(v.into_iter().map(|a| a / norm).collect());
            }
            for _ in 0..50 {
                let raw: Vec<f64> = (0..d).map(|_| next()).collect();
                let norm = raw.iter().map(|a| a * a).sum::<f64>().sqrt();
                let stored: Vec<f32> = raw.iter().map(|&a| (a / norm) as f32).collect();
                let inv = 1.0 / stored.iter().map(|&a| f64::from(a) * f64::from(a)).sum::<f64>().sqrt();
                let eta = (1.0 / inv - 1.0).abs();
                let (mut exact, mut screened) = (1.0_f64, 1.0_f32);
                for q in &basis {
                    let e: f64 = stored.iter().zip(q).map(|(&x, &b)| f64::from(x) * inv * b).sum();
                    exact -= e * e;
                    let e32: f32 = stored.iter().zip(q).map(|(&x, &b)| x * b as f32).sum();
                    screened = (-e32).mul_add(e32, screened);
                }
                let bound = screen_error(d, basis.len(), eta);
                let gap = (f64::from(screened) - exact).abs();
                assert!(gap <= bound, "d={d} t={t}: |r̃ − d²| = {gap:e} above the bound {bound:e}");
            }
            // The worst case is pessimistic (here 10 to 3 000 times the largest gap seen) but stays
            // small enough to screen with.
            assert!(screen_error(d, basis.len(), 0.0) < 1e-2, "d={d}: bound too loose to screen");
        }
    }
}
