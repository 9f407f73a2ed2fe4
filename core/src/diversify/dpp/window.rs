//! Greedy selection against a sliding window of the latest picks: the residual `d_i²` of each
//! candidate's unit embedding against the span of the last `w − 1` picks, maintained as the
//! window slides. Windowed DPP ([`super::Dpp`] with `window`) and SSD ([`crate::diversify::Ssd`])
//! are this loop with two gains.
//!
//! Legend: `u_i` candidate i's unit embedding (f64); `W` the window, the last `min(w − 1, t)`
//! picks before step t; `Q` an orthonormal basis of `span{u_j : j ∈ W}` (one row per member, in
//! window order); `C_i = Q·u_i` candidate i's coordinates in it; `d_i² = 1 − ‖C_i‖²`.
//!
//! # Method
//! - **A pick enters**: its component orthogonal to `Q` (classical Gram–Schmidt applied twice,
//!   as in the unbounded kernel) becomes a new basis row `q`; every candidate gains the
//!   coordinate `⟨u_i, q⟩` and loses its square from `d_i²`. O(N·d), as one pass over the rows
//!   stored transposed in SIMD-width panels (lanes across candidates, so no horizontal sums).
//! - **The oldest member leaves**: the members' coordinates form an upper-triangular `R` (the R
//!   of the QR factorisation of the window's rows). Dropping its first column leaves an upper
//!   Hessenberg matrix, which Givens rotations of neighbouring rows make triangular again, with a
//!   zero last row (G. H. Golub and C. F. Van Loan, *Matrix Computations*, 4th ed., §6.5.2,
//!   deleting a column from a QR factorisation; section number from memory). The same rotations
//!   turn `Q`, and every candidate's `C_i`, into the basis and coordinates of the new window plus
//!   one last row orthogonal to it, which is dropped: `d_i²` gains that coordinate's square.
//!   O(N·w + w·d).
//! - **A pick in the span already** (`d_j² < EPSILON`: a fallback pick of windowed DPP, or an SSD
//!   pick with no new direction) adds no basis row; while such a member is in the window, the
//!   next departure rebuilds `Q` and every `C_i` from the members (O(w²·d + N·w·d)), which is
//!   exact whatever the span did.
//!
//! With no window (or a window that never slides before the last pick) nothing leaves, and only
//! `d_i²` is kept, as in the unbounded kernel.
//!
//! A window that slides and is short against the dimension (`w² ≤ 8·d`, the usual feed windows
//! of 3 to 20) runs the lazy loop of module `lazy` instead: the same picks, computed only for
//! the candidates a step's scan reaches and, among those, exactly only where an f32 screen of
//! the residuals cannot rule them out.
//!
//! # Complexity
//! O(N log N) once to order candidates by score, then O(N·d + N·w) time per step, O(k·(N·d + N·w)) in all, plus O(w²·d) per rebuild; extra memory
//! O(N·d) for the f64 rows and O(N·min(w, d)) for the coordinates when the window slides,
//! stored column-major so each rotation streams two contiguous runs.
//!
//! # Invariants
//! `Q` stays orthonormal (rotations are orthogonal); `C_i = Q·u_i` for every candidate; with no
//! member in the span already, `R` is upper triangular with a positive-magnitude diagonal; the
//! output has no duplicates and at most `min(k, N)` items.
//!
//! # Numerical notes
//! All f64. `d_i²` is recomputed as `1 − ‖C_i‖²` after each departure (not accumulated), so it
//! carries no drift from earlier steps; with no window it is updated by subtraction exactly as
//! the unbounded kernel does, so the two agree bit for bit on the same picks.

use std::collections::VecDeque;

use pulp::{Arch, Simd, WithSimd};

mod lazy;

use super::basis::{dot, push_basis_vector};
use super::EPSILON;
use crate::diversify::{by_score, eligible, passes, take, Workspace};
use crate::model::{Params, RerankInput, Selection};

/// What a step maximises over the eligible candidates, with `s_i` the normalised score.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(crate) enum Gain {
    /// Windowed DPP: `(1 − λ)·s_i + λ·ln d_i²` over candidates with `d_i² ≥ EPSILON`; a step
    /// with none takes the best remaining candidate by score.
    LogDet,
    /// SSD: `(1 − λ)·s_i + λ·d_i` over every remaining candidate, `d_i = 0` when
    /// `d_i² < EPSILON`.
    Volume,
}

impl Gain {
    /// The gain of a candidate with normalised score `s` and residual `d2`; `None` where
    /// windowed DPP's `EPSILON` rule excludes it.
    #[inline(always)]
    pub(super) fn value(self, lambda: f64, s: f64, d2: f64) -> Option<f64> {
        let base = (1.0 - lambda) * s;
        match self {
            Self::LogDet if d2 < EPSILON => None,
            Self::LogDet => Some(base + lambda * d2.ln()),
            // In the span to working precision: no volume (the rounding left of a zero
            // residual, ±1e-16, must not rank candidates by its square root).
            Self::Volume if d2 < EPSILON => Some(base),
            Self::Volume => Some(base + lambda * d2.sqrt()),
        }
    }
}

/// Runs the windowed greedy. The caller has checked `lambda > 0`, `N > 0` and embeddings;
/// `window` is `w` (members are the last `w − 1` picks), `None` for all picks.
pub(crate) fn select(
    input: &RerankInput,
    params: &Params,
    ws: &mut Workspace,
    window: Option<usize>,
    gain: Gain,
) -> Selection {
    Arch::new().dispatch(Run { input, params, ws, window, gain })
}

struct Run<'a> {
    input: &'a RerankInput,
    params: &'a Params,
    ws: &'a mut Workspace,
    window: Option<usize>,
    gain: Gain,
}

impl WithSimd for Run<'_> {
    type Output = Selection;

    #[inline(always)]
    fn with_simd<S: Simd>(self, simd: S) -> Selection {
        let Self { input, params, ws, window, gain } = self;
        run(simd, input, params, ws, window, gain)
    }
}

#[inline(always)]
fn run<S: Simd>(
    simd: S,
    input: &RerankInput,
    params: &Params,
    ws: &mut Workspace,
    window: Option<usize>,
    gain: Gain,
) -> Selection {
    let emb = input.embeddings().expect("select checked for embeddings");
    let (n, d) = (input.len(), emb.dim());
    let m = params.k().min(n);
    let s = input.normalized();
    ws.reset_for(input, m);
    // Members: the last `capacity` picks. A window that cannot fill before the last pick never
    // slides, so it needs no coordinates.
    let capacity = window.map_or(usize::MAX, |w| w.saturating_sub(1).max(1));
    let slides = capacity < m.saturating_sub(1);
    if slides && lazy::pays(capacity, d) {
        return lazy::run(simd, input, params, ws, capacity, gain);
    }
    // Unit rows in f64, transposed into panels of one SIMD vector of candidates: element (i, j)
    // at `((i / L)·d + j)·L + i % L` for L lanes, zero-padded to whole panels. A projection on a
    // basis row is then one broadcast FMA per panel and dimension, lanes across candidates.
    let lanes = std::mem::size_of::<S::f64s>() / std::mem::size_of::<f64>();
    let panels = n.div_ceil(lanes);
    ws.wide.clear();
    ws.wide.resize(panels * d * lanes, 0.0);
    for (i, (row, &inv)) in emb.as_slice().chunks_exact(d).zip(emb.inv_norms()).enumerate() {
        let (p, l) = (i / lanes, i % lanes);
        for (j, &x) in row.iter().enumerate() {
            ws.wide[(p * d + j) * lanes + l] = f64::from(x) * inv;
        }
    }
    // At most min(capacity, d) independent members, so that many coordinates per candidate.
    let stride = if slides { capacity.min(d) } else { 0 };
    let mut st = State {
        members: VecDeque::with_capacity(capacity.min(m)),
        clean: true,
        rank: 0,
        stride,
        d,
        n,
        lanes,
    };
    ws.basis.clear();
    // Column-major: coordinate t of every candidate is one contiguous run of n values, so a
    // rotation of two basis rows is two streams the compiler vectorises.
    ws.coords.clear();
    ws.coords.resize(n * stride, 0.0);
    ws.running.clear();
    ws.running.resize(n, 1.0);
    ws.order.clear();
    ws.order.extend(0..n);
    ws.order.sort_unstable_by(|&a, &b| s[b].total_cmp(&s[a]).then(a.cmp(&b)));
    let mut sel = Selection { indices: Vec::with_capacity(m), gains: Vec::with_capacity(m), exhausted_at: None };

    while sel.indices.len() < m {
        if ws.cancelled() {
            break;
        }
        let Some(at) = choose(input, params, ws, gain, &mut sel, &mut Kept) else { break };
        let pick = ws.order[at];
        let d2 = ws.running[pick];
        take(input, ws, &mut sel, pick, d2);
        if sel.indices.len() < m {
            if st.members.len() == capacity {
                st.leave(simd, ws);
            }
            st.enter(simd, ws, pick);
        }
    }
    sel
}

/// Where a step's scan gets `d_i²` from: `get(input, ws, at, floor)` gives it against the
/// current window for `i = ws.order[at]`, or `None` when it can show without computing it that
/// `i`'s gain is below `floor`, the best so far.
///
/// A trait with `#[inline(always)]` implementations rather than a closure: a closure is its own
/// function without the SIMD dispatch's target features, and when LLVM declined to inline it
/// (after the step choice became shared by both loops) the lazy loop's projections ran at the
/// baseline instruction set, twice as slow.
pub(super) trait Residual {
    fn get(&mut self, input: &RerankInput, ws: &mut Workspace, at: usize, floor: Option<f64>) -> Option<f64>;
}

/// The eager loop keeps every residual in `ws.running`.
struct Kept;

impl Residual for Kept {
    #[inline(always)]
    fn get(&mut self, _: &RerankInput, ws: &mut Workspace, at: usize, _: Option<f64>) -> Option<f64> {
        Some(ws.running[ws.order[at]])
    }
}

/// One step's choice, as a position in `ws.order`: where the fairness floor needs a protected
/// pick, the best among protected candidates first, and freely only when none remains; in each
/// pass, when no candidate qualifies (windowed DPP with no candidate adding a direction), the
/// best remaining by score, recorded in `sel.exhausted_at`. `None` when nothing is left.
#[inline(always)]
pub(super) fn choose(
    input: &RerankInput,
    params: &Params,
    ws: &mut Workspace,
    gain: Gain,
    sel: &mut Selection,
    residual: &mut impl Residual,
) -> Option<usize> {
    for r in passes(ws.must_protect(sel.indices.len())) {
        if let Some((_, at)) = best_gain(input, params, ws, gain, r, residual) {
            return Some(at);
        }
        let fallback = (0..input.len())
            .filter(|&i| eligible(input, params, ws, i, r))
            .min_by(|&a, &b| by_score(input.scores(), a, b));
        if let Some(i) = fallback {
            sel.exhausted_at.get_or_insert(sel.indices.len());
            return ws.order.iter().position(|&o| o == i);
        }
    }
    None
}

/// The candidate with the largest gain among those eligible (protected only when `restrict`),
/// ties to the lower index.
///
/// Candidates are visited in descending score order: a gain is at most `(1 − λ)·s_i`
/// (`ln d² ≤ 0`) or `(1 − λ)·s_i + λ` (`d ≤ 1`), so the scan stops at the first whose bound falls
/// below the best so far, and the logarithms of the rest are never taken.
/// Returns the best gain and its candidate's position in `ws.order` (the score order).
/// `residual` gives `d_i²` ([`Residual`]): the eager loop keeps it in `ws.running`; the lazy one
/// computes it here, when the scan reaches `i`.
#[inline(always)]
fn best_gain(
    input: &RerankInput,
    params: &Params,
    ws: &mut Workspace,
    gain: Gain,
    restrict: bool,
    residual: &mut impl Residual,
) -> Option<(f64, usize)> {
    let lambda = params.lambda();
    let s = input.normalized();
    let headroom = if gain == Gain::Volume { lambda } else { 0.0 };
    // (gain, candidate, position in the scan)
    let mut best: Option<(f64, usize, usize)> = None;
    for at in 0..ws.order.len() {
        let i = ws.order[at];
        if best.is_some_and(|(b, _, _)| (1.0 - lambda) * s[i] + headroom < b) {
            break;
        }
        if !eligible(input, params, ws, i, restrict) {
            continue;
        }
        let Some(d2) = residual.get(input, ws, at, best.map(|(b, _, _)| b)) else { continue };
        if best.is_some_and(|(b, _, _)| surely_below(gain, lambda, s[i], d2, b)) {
            continue;
        }
        let Some(value) = gain.value(lambda, s[i], d2) else { continue };
        // Ties go to the lower index, whatever the scan order.
        let better = |(b, bi, _): (f64, usize, usize)| match value.partial_cmp(&b) {
            Some(std::cmp::Ordering::Greater) => true,
            Some(std::cmp::Ordering::Equal) => i < bi,
            _ => false,
        };
        if best.is_none_or(better) {
            best = Some((value, i, at));
        }
    }
    best.map(|(value, _, at)| (value, at))
}

/// Whether the gain of a candidate with score `s` and residual `d2` is surely below `floor`,
/// without a logarithm or square root: both are concave, so `ln x ≤ x − 1` and
/// `√x ≤ (1 + x) / 2` (their tangents at 1) bound the gain from above. The margin of 1e-12 keeps
/// the rounding of either side from ruling out a candidate that ties.
#[inline(always)]
pub(super) fn surely_below(gain: Gain, lambda: f64, s: f64, d2: f64, floor: f64) -> bool {
    let tangent = match gain {
        Gain::LogDet => d2 - 1.0,
        Gain::Volume => 0.5 * (1.0 + d2.max(0.0)),
    };
    (1.0 - lambda) * s + lambda * tangent < floor - 1e-12
}

/// The window's members and how the basis relates to them.
struct State {
    /// Picks in the window, oldest first.
    members: VecDeque<usize>,
    /// True when every member has its own basis row, in member order (then `R` is triangular
    /// and a departure is a sequence of rotations); false once a member in the span already was
    /// added without one.
    clean: bool,
    /// Basis rows.
    rank: usize,
    /// Coordinates kept per candidate (0 when the window never slides).
    stride: usize,
    d: usize,
    n: usize,
    /// Candidates per panel (the SIMD width in f64).
    lanes: usize,
}

impl State {
    /// Adds pick `j` to the window: a new basis row and every candidate's coordinate on it.
    #[inline(always)]
    fn enter<S: Simd>(&mut self, simd: S, ws: &mut Workspace, j: usize) {
        self.members.push_back(j);
        if ws.running[j] < EPSILON || self.rank == self.d {
            // In the span already (to working precision): no new direction.
            self.clean = false;
            return;
        }
        self.push_row(simd, ws, j);
    }

    /// Unit row `i` in f64, gathered from the panels into `out`.
    #[inline(always)]
    fn row(&self, panel: &[f64], i: usize, out: &mut Vec<f64>) {
        let (p, l, d, lanes) = (i / self.lanes, i % self.lanes, self.d, self.lanes);
        out.clear();
        out.extend((0..d).map(|j| panel[(p * d + j) * lanes + l]));
    }

    /// Orthonormalises member `j` against the basis, appends it, and projects every candidate.
    #[inline(always)]
    fn push_row<S: Simd>(&mut self, simd: S, ws: &mut Workspace, j: usize) {
        let (d, n, t) = (self.d, self.n, self.rank);
        let Workspace { wide, basis, scratch, coords, running, proj, .. } = &mut *ws;
        // `proj` holds the member's row first, then (once the row is in the basis) every
        // candidate's projection.
        self.row(wide, j, proj);
        push_basis_vector(simd, proj, basis, scratch, d);
        let q = &basis[t * d..(t + 1) * d];
        proj.clear();
        proj.resize(wide.len() / d, 0.0);
        project_all(simd, wide, q, d, proj);
        for i in 0..n {
            let e = proj[i];
            running[i] -= e * e;
        }
        if self.stride > 0 {
            coords[t * n..(t + 1) * n].copy_from_slice(&proj[..n]);
        }
        self.rank += 1;
    }

    /// Removes the oldest member: rotations when the basis is clean, else a rebuild.
    #[inline(always)]
    fn leave<S: Simd>(&mut self, simd: S, ws: &mut Workspace) {
        self.members.pop_front();
        if !self.clean {
            self.rebuild(simd, ws);
            return;
        }
        let (d, n, r) = (self.d, self.n, self.rank);
        let Workspace { basis, coords, running, .. } = &mut *ws;
        // Column t of the remaining R is member t's coordinates (members shifted down by one).
        for t in 0..r.saturating_sub(1) {
            let member = self.members[t];
            let (a, b) = (coords[t * n + member], coords[(t + 1) * n + member]);
            let h = a.hypot(b);
            debug_assert!(h > 0.0, "a clean window's members are independent");
            let (c, sn) = (a / h, b / h);
            let (xs, ys) = coords[t * n..(t + 2) * n].split_at_mut(n);
            for (x, y) in xs.iter_mut().zip(ys.iter_mut()) {
                let (u, v) = (*x, *y);
                *x = c * u + sn * v;
                *y = c * v - sn * u;
            }
            let (qa, qb) = basis[t * d..(t + 2) * d].split_at_mut(d);
            for (x, y) in qa.iter_mut().zip(qb.iter_mut()) {
                let (u, v) = (*x, *y);
                *x = c * u + sn * v;
                *y = c * v - sn * u;
            }
        }
        // The last row is orthogonal to the remaining members: drop it.
        basis.truncate((r - 1) * d);
        self.rank = r - 1;
        coords[(r - 1) * n..r * n].fill(0.0);
        residuals(coords, running, n, r - 1);
    }

    /// Rebuilds the basis from the members in order (skipping those in the span of the ones
    /// before) and every candidate's coordinates and residual.
    #[inline(always)]
    fn rebuild<S: Simd>(&mut self, simd: S, ws: &mut Workspace) {
        let (d, n) = (self.d, self.n);
        ws.basis.clear();
        ws.coords.fill(0.0);
        ws.running.fill(1.0);
        self.rank = 0;
        self.clean = true;
        let members: Vec<usize> = self.members.iter().copied().collect();
        let mut x = Vec::with_capacity(d);
        for j in members {
            // The member's residual against the rows so far decides whether it adds one.
            self.row(&ws.wide, j, &mut x);
            let removed: f64 = (0..self.rank)
                .map(|t| {
                    let e = dot(simd, &x, &ws.basis[t * d..(t + 1) * d]);
                    e * e
                })
                .sum();
            if 1.0 - removed < EPSILON || self.rank == d {
                self.clean = false;
                continue;
            }
            self.push_row(simd, ws, j);
        }
        residuals(&ws.coords, &mut ws.running, n, self.rank);
    }
}

/// `d_i² = 1 − Σ_{t < rank} C_i[t]²` for every candidate, from the column-major coordinates.
#[inline(always)]
fn residuals(coords: &[f64], running: &mut [f64], n: usize, rank: usize) {
    running.fill(1.0);
    for t in 0..rank {
        for (r, &c) in running.iter_mut().zip(&coords[t * n..(t + 1) * n]) {
            *r -= c * c;
        }
    }
}

/// `proj[i] = ⟨u_i, q⟩` for every candidate (and the zero padding), from the transposed panels:
/// one broadcast of `q_j` per dimension, four panels and two dimensions at a time, so eight FMA
/// chains are in flight.
#[inline(always)]
pub(super) fn project_all<S: Simd>(simd: S, panel: &[f64], q: &[f64], d: usize, proj: &mut [f64]) {
    let (pv, _) = S::as_simd_f64s(panel);
    let (out, _) = S::as_mut_simd_f64s(proj);
    let panels = out.len();
    let zero = simd.splat_f64s(0.0);
    let mut p = 0;
    while p + 4 <= panels {
        let mut acc = [zero; 8];
        let base = [p * d, (p + 1) * d, (p + 2) * d, (p + 3) * d];
        let mut j = 0;
        while j + 2 <= d {
            let (q0, q1) = (simd.splat_f64s(q[j]), simd.splat_f64s(q[j + 1]));
            for b in 0..4 {
                acc[2 * b] = simd.mul_add_e_f64s(pv[base[b] + j], q0, acc[2 * b]);
                acc[2 * b + 1] = simd.mul_add_e_f64s(pv[base[b] + j + 1], q1, acc[2 * b + 1]);
            }
            j += 2;
        }
        if j < d {
            let q0 = simd.splat_f64s(q[j]);
            for b in 0..4 {
                acc[2 * b] = simd.mul_add_e_f64s(pv[base[b] + j], q0, acc[2 * b]);
            }
        }
        for b in 0..4 {
            out[p + b] = simd.add_f64s(acc[2 * b], acc[2 * b + 1]);
        }
        p += 4;
    }
    while p < panels {
        let (mut a0, mut a1) = (zero, zero);
        let base = p * d;
        let mut j = 0;
        while j + 2 <= d {
            a0 = simd.mul_add_e_f64s(pv[base + j], simd.splat_f64s(q[j]), a0);
            a1 = simd.mul_add_e_f64s(pv[base + j + 1], simd.splat_f64s(q[j + 1]), a1);
            j += 2;
        }
        if j < d {
            a0 = simd.mul_add_e_f64s(pv[base + j], simd.splat_f64s(q[j]), a0);
        }
        out[p] = simd.add_f64s(a0, a1);
        p += 1;
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::diversify::reference;
    use crate::model::Limits;
    use pulp::Scalar;

    /// Rows clustered around four directions, so windows hold near-dependent members.
    fn slate(n: usize, d: usize, seed: u64) -> RerankInput {
        super::super::tests::slate_with(n, d, seed, |i, t| if t % 4 == i % 4 { 1.5 } else { 0.0 })
    }

    /// Runtime dispatch picks AVX2 + FMA on x86-64-v3 machines (panels of eight candidates in
    /// the lazy loop); the scalar back end, panels of one, is what other machines run. Both give
    /// the brute force's picks, for both gains, and so does one workspace reused across shapes
    /// and back ends (its buffers then hold a larger, stale layout).
    #[test]
    fn the_window_loops_agree_on_the_scalar_and_dispatched_back_ends() {
        let mut reused = Workspace::new();
        for (case, &(n, d, k, w)) in
            [(1, 3, 1, 2), (9, 2, 9, 3), (70, 5, 12, 5), (150, 33, 40, 10), (64, 64, 64, 17), (200, 8, 30, 12)]
                .iter()
                .enumerate()
        {
            let input = slate(n, d, 31 + case as u64);
            for lambda in [0.05, 0.5, 1.0] {
                let params = Params::new(k as u64, lambda, &Limits::default())
                    .and_then(|p| p.with_window(Some(w as u64)))
                    .unwrap();
                for (gain, want) in [
                    (Gain::LogDet, reference::dpp_window(&input, &params, w)),
                    (Gain::Volume, reference::ssd(&input, &params)),
                ] {
                    let what = format!("n={n} d={d} k={k} w={w} lambda={lambda} {gain:?}");
                    let dispatched = select(&input, &params, &mut Workspace::new(), Some(w), gain);
                    let scalar = run(Scalar::new(), &input, &params, &mut Workspace::new(), Some(w), gain);
                    assert_eq!(dispatched.indices, want, "dispatched: {what}");
                    assert_eq!(scalar.indices, want, "scalar: {what}");
                    assert_eq!(scalar.exhausted_at, dispatched.exhausted_at, "{what}");
                    let first = select(&input, &params, &mut reused, Some(w), gain);
                    let second = run(Scalar::new(), &input, &params, &mut reused, Some(w), gain);
                    assert_eq!(first.indices, want, "reused, dispatched: {what}");
                    assert_eq!(second.indices, want, "reused, scalar: {what}");
                }
            }
        }
    }
}
