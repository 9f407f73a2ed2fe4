//! The sliding window evaluated lazily: a candidate's residual is computed only when a step's
//! scan reaches it, and skipped when a bound left by an earlier step rules it out.
//!
//! Legend as in the parent module, plus: `g_i` candidate i's similarities `⟨u_i, u_j⟩` to the
//! members; `R` the upper-triangular factor of the members' rows in build order
//! (`u_{p_b} = Σ_{s ≤ b} R_sb·q_s`, `p_b` the member behind basis row `b`); `T = R⁻¹`.
//!
//! # Method
//! A step's scan visits candidates in descending score order and stops at the first whose
//! score bound falls below the best gain so far (parent module, `best_gain`); on the bench's
//! clustered slates it reaches about half of them, on unclustered ones a few percent. So:
//! - **Covered prefix**: the ranks a scan has reached so far (grown in blocks of 16) keep
//!   their f32 rows in transposed panels and their similarity to every member, one column per
//!   ring slot; a new member costs one pass over the covered panels, O(covered·d), with f32
//!   loads widened to f64 (an f32 product is exact in f64, so these are the f64 dot products
//!   of the stored rows at half the memory traffic).
//! - **Per step**: the basis of the window and `T` are rebuilt from the members, O(w²·d), by
//!   CGS2 with the brute force's skip rule (a member whose leftover is under `EPSILON` adds no
//!   row), newest member first; see [`Lazy::rebuild`] for when the order flips.
//! - **Per candidate reached**: `C = Tᵀ·g_i`, O(w²), and `d_i² = 1 − ‖C‖²`. Because the basis
//!   runs newest first, the partial sums of `C_b²` are the residuals against the newest 1, 2, …
//!   members. Those members stay in the window for the next `w − 1 − age` steps, and a
//!   residual against fewer members is no smaller, so each partial sum bounds `d_i²` from above
//!   at a later step. The scan skips a candidate whose bounded gain is below the best so far
//!   (M. Minoux's lazy evaluation, "Accelerated greedy algorithms for maximizing submodular set
//!   functions", 1978, applied to bounds that expire as the window slides).
//!
//! # Complexity
//! O(k·(w²·d + C·d + E·w²)) for `C` covered ranks and `E` candidates evaluated per step (both
//! at most N); the eager loop's is O(k·N·(d + w)). The parent module chooses this path when
//! `w² ≤ 8·d`, where an evaluation costs about as much as an eager update. Extra memory:
//! O(N·d) f32 for the panels and O(N·w) for the similarities and bounds.
//!
//! # Invariants
//! Every covered rank holds its similarity to every member; a stored bound was left by a step
//! whose window was well conditioned ([`Lazy::rebuild`]) and is read only while the members it
//! counts are still in the window.
//!
//! # Numerical notes
//! All values that decide a pick are f64. `C = Tᵀ·g` magnifies rounding by about `‖T‖`, so it
//! is used only when `‖T‖_F² ≤ 1e6` (residuals then agree with the brute force's to about
//! 1e-12); a degenerate or ill-conditioned window takes the coordinates straight from the
//! orthonormal basis instead, as the brute force does. A bound must be exceeded by `SLACK`
//! before it rules a candidate out. Duplicated candidates compute identical values and tie.

use std::collections::VecDeque;

use pulp::Simd;

use super::super::basis::{dot, push_basis_vector};
use super::super::EPSILON;
use super::{choose, surely_below, Gain, Residual};
use crate::diversify::{take, Workspace};
use crate::model::{Params, RerankInput, Selection};

/// Absolute slack added to a stale bound on `d_i²` before it may rule a candidate out: far above
/// the bound's rounding error (about 1e-11 at worst, module notes), far below any gap that
/// decides a pick.
const SLACK: f64 = 1e-10;

/// `‖T‖_F²` up to which the window counts as well conditioned (every member's leftover against
/// any others at least 1e-6, far above `EPSILON`), so bounds may be kept.
const WELL_CONDITIONED: f64 = 1e6;

/// Whether the lazy loop should run a window of `capacity` members over d-dimensional rows:
/// its per-candidate substitution (about `w²/2` multiply-adds) stays within a few eager updates
/// (`d + 3w`) when `w² ≤ 8·d`.
pub(super) fn pays(capacity: usize, d: usize) -> bool {
    capacity.saturating_mul(capacity) <= 8 * d
}

/// Runs the windowed greedy with a window that slides (`capacity` = `w − 1` members). The
/// caller has checked `lambda > 0`, `N > 0` and embeddings, and reset the workspace.
#[inline(always)]
pub(super) fn run<S: Simd>(
    simd: S,
    input: &RerankInput,
    params: &Params,
    ws: &mut Workspace,
    capacity: usize,
    gain: Gain,
) -> Selection {
    let emb = input.embeddings().expect("select checked for embeddings");
    let (n, d) = (input.len(), emb.dim());
    let m = params.k().min(n);
    let padded = n.div_ceil(LANES) * LANES;
    let s = input.normalized();
    ws.order.clear();
    ws.order.extend(0..n);
    ws.order.sort_unstable_by(|&a, &b| s[b].total_cmp(&s[a]).then(a.cmp(&b)));
    // Panels (by score rank), similarities and bounds need no zeroing: `covered` and
    // `evaluated` guard them.
    if ws.narrow.len() < padded * d {
        ws.narrow.resize(padded * d, 0.0);
    }
    if ws.coords.len() < 2 * padded * capacity {
        ws.coords.resize(2 * padded * capacity, 0.0);
    }
    ws.evaluated.clear();
    ws.evaluated.resize(padded, 0);
    ws.running.clear();
    ws.running.resize(padded, 1.0);
    let mut st = Lazy {
        picks: 0,
        members: VecDeque::new(),
        member_rows: vec![0.0; capacity * d],
        rows: Vec::new(),
        bounds: false,
        t: Vec::new(),
        g: Vec::new(),
        covered: 0,
        lambda: params.lambda(),
        gain,
        capacity,
        d,
        padded,
    };
    ws.basis.clear();
    ws.proj.clear();
    let mut sel = Selection { indices: Vec::with_capacity(m), gains: Vec::with_capacity(m), exhausted_at: None };

    while sel.indices.len() < m {
        if ws.cancelled() {
            break;
        }
        let Some(rank) = choose(input, params, ws, gain, &mut sel, &mut st) else { break };
        let d2 = st.residual(input, ws, rank, None).unwrap_or(0.0);
        take(input, ws, &mut sel, ws.order[rank], d2);
        if sel.indices.len() < m {
            st.enter(simd, input, ws, rank);
        }
    }
    sel
}

impl Residual for Lazy {
    #[inline(always)]
    fn get(&mut self, input: &RerankInput, ws: &mut Workspace, rank: usize, floor: Option<f64>) -> Option<f64> {
        self.residual(input, ws, rank, floor)
    }
}

/// The window, its factor, and how much of the score order is kept up to date.
struct Lazy {
    /// Picks so far.
    picks: usize,
    /// The window: the last `capacity` picks' ring slots, oldest first.
    members: VecDeque<usize>,
    /// The members' unit rows, one ring slot (d values) each.
    member_rows: Vec<f64>,
    /// Basis rows, in build order: (ring slot, age) of the member behind each, age 0 being the
    /// newest member.
    rows: Vec<(usize, usize)>,
    /// Whether the basis runs newest first and this step's residuals leave bounds for later
    /// steps ([`Lazy::rebuild`]).
    bounds: bool,
    /// `T = R⁻¹` (upper triangular), stored transposed (row b holds `T_0b ..= T_bb`, then
    /// zeros) in `r × r`: `q_b = Σ_s T_sb·u_{p_s}`, so a candidate's coordinates are `C = Tᵀ·g_i`.
    t: Vec<f64>,
    /// The similarities of the candidate being evaluated to the basis rows' members, in row order.
    g: Vec<f64>,
    /// Ranks below this (a whole number of panels) have their rows in the panels and their
    /// similarities to every member.
    covered: usize,
    lambda: f64,
    gain: Gain,
    capacity: usize,
    d: usize,
    /// `n` rounded up to whole panels.
    padded: usize,
}

impl Lazy {
    /// The gain a residual gives a candidate of normalised score `s` (the parent module's
    /// `Gain`), `None` where windowed DPP's `EPSILON` rule excludes it.
    #[inline(always)]
    fn value(&self, s: f64, d2: f64) -> Option<f64> {
        let base = (1.0 - self.lambda) * s;
        match self.gain {
            Gain::LogDet if d2 < EPSILON => None,
            Gain::LogDet => Some(base + self.lambda * d2.ln()),
            Gain::Volume if d2 < EPSILON => Some(base),
            Gain::Volume => Some(base + self.lambda * d2.sqrt()),
        }
    }

    /// Extends the covered ranks to include `rank`, in blocks of four panels: copies their rows
    /// into the panels and projects them on every member. Each rank is covered once, so this
    /// costs O(N·w·d) in all at most.
    #[inline(always)]
    fn cover(&mut self, input: &RerankInput, ws: &mut Workspace, rank: usize) {
        let d = self.d;
        let to = ((rank + 1).div_ceil(4 * LANES) * 4 * LANES).min(self.padded);
        let emb = input.embeddings().expect("select checked for embeddings");
        let Workspace { narrow, coords, order, .. } = &mut *ws;
        for r in self.covered..to {
            let (p, l) = (r / LANES, r % LANES);
            let row = order.get(r).map(|&i| &emb.as_slice()[i * d..(i + 1) * d]);
            for j in 0..d {
                narrow[(p * d + j) * LANES + l] = row.map_or(0.0, |x| x[j]);
            }
        }
        let panels = &narrow[self.covered * d..to * d];
        for &slot in &self.members {
            let out = &mut coords[slot * self.padded + self.covered..slot * self.padded + to];
            project(panels, &self.member_rows[slot * d..(slot + 1) * d], d, out);
            scale(out, &order[self.covered..], emb.inv_norms());
        }
        self.covered = to;
    }

    /// Adds the candidate at `rank` to the window (dropping the oldest member when full),
    /// projects the covered ranks on it, and rebuilds the basis.
    #[inline(always)]
    fn enter<S: Simd>(&mut self, simd: S, input: &RerankInput, ws: &mut Workspace, rank: usize) {
        let d = self.d;
        let emb = input.embeddings().expect("select checked for embeddings");
        let slot = self.picks % self.capacity;
        self.picks += 1;
        if self.members.len() == self.capacity {
            self.members.pop_front();
        }
        self.members.push_back(slot);
        let i = ws.order[rank];
        let inv = emb.inv_norms()[i];
        for (x, &v) in self.member_rows[slot * d..(slot + 1) * d].iter_mut().zip(&emb.as_slice()[i * d..(i + 1) * d]) {
            *x = f64::from(v) * inv;
        }
        let out = &mut ws.coords[slot * self.padded..slot * self.padded + self.covered];
        project(&ws.narrow[..self.covered * d], &self.member_rows[slot * d..(slot + 1) * d], d, out);
        scale(out, &ws.order, emb.inv_norms());
        self.rebuild(simd, ws);
    }

    /// `d_i²` against the current window for the candidate at `rank`, computed at most once a
    /// step; `None` when the bound left by an earlier step shows that it cannot reach `floor`
    /// (the best gain so far).
    ///
    /// After computing `d_i²` in full at step `t_i`, the candidate keeps `1 − P[a]`, its
    /// residual against the newest `a + 1` members of that window (the basis runs newest
    /// first, so these are partial sums of its coordinates). At a later step `t` the newest
    /// `min(len, capacity − (t − t_i))` of those members are still in the window, and a
    /// residual against fewer members is no smaller, so `1 − P` there bounds `d_i²` from above.
    #[inline(always)]
    fn residual(&mut self, input: &RerankInput, ws: &mut Workspace, rank: usize, floor: Option<f64>) -> Option<f64> {
        let (t, cap, padded) = (self.picks, self.capacity, self.padded);
        let stamp = ws.evaluated[rank];
        if stamp == t + 1 {
            return Some(ws.running[rank]);
        }
        let bounds = cap * padded;
        if let (Some(floor), true) = (floor, stamp > 0) {
            let then = stamp - 1;
            let kept = (cap + then).saturating_sub(t).min(then.min(cap));
            if kept > 0 {
                let bound = 1.0 - ws.coords[bounds + rank * cap + kept - 1] + SLACK;
                let s = input.normalized()[ws.order[rank]];
                if surely_below(self.gain, self.lambda, s, bound, floor)
                    || self.value(s, bound).is_none_or(|v| v < floor)
                {
                    return None;
                }
            }
        }
        if rank >= self.covered {
            self.cover(input, ws, rank);
        }
        let r = self.rows.len();
        let Workspace { coords, running, evaluated, order, basis, .. } = &mut *ws;
        let (sims, suffix) = coords.split_at_mut(bounds);
        let suffix = &mut suffix[rank * cap..(rank + 1) * cap];
        let mut kept = 0.0;
        if self.bounds {
            // C_b = Σ_{s ≤ b} T_sb·g_s (T stored transposed): short dot products, none waiting
            // on the one before; partial sums of C_b² by member age.
            self.g.clear();
            self.g.extend(self.rows.iter().map(|&(slot, _)| sims[slot * padded + rank]));
            let mut age = 0;
            for (b, (tb, &(_, row_age))) in self.t.chunks_exact(r.max(1)).zip(&self.rows).enumerate() {
                let cb = short_dot(&tb[..=b], &self.g);
                while age < row_age {
                    suffix[age] = kept;
                    age += 1;
                }
                kept = cb.mul_add(cb, kept);
            }
            suffix[age..self.members.len()].fill(kept);
        } else {
            // A degenerate or ill-conditioned window, where T's size would magnify rounding:
            // the coordinates straight from the orthonormal basis, O(r·d), as the brute force
            // takes them; and no bound for later steps (`1 − 0`, the trivial `d_i² ≤ 1`).
            let d = self.d;
            let emb = input.embeddings().expect("select checked for embeddings");
            let i = order[rank];
            let inv = emb.inv_norms()[i];
            self.g.clear();
            self.g.extend(emb.as_slice()[i * d..(i + 1) * d].iter().map(|&x| f64::from(x) * inv));
            for q in basis.chunks_exact(d).take(r) {
                let c = short_dot(q, &self.g);
                kept = c.mul_add(c, kept);
            }
            suffix[..self.members.len()].fill(0.0);
        }
        evaluated[rank] = t + 1;
        running[rank] = 1.0 - kept;
        Some(running[rank])
    }

    /// Rebuilds the window's basis (`ws.basis`) and its inverse factor.
    ///
    /// The basis runs newest member first, so that partial sums of a candidate's coordinates
    /// are its residuals against the newest members, the bounds [`Lazy::residual`] keeps. That
    /// order gives the brute force's span only when no member is near the span of the others:
    /// the `EPSILON` rule (a member whose leftover is under it adds no row) decides by order.
    /// So when a member is skipped, or `‖T‖_F² > 1e6` (then some member's leftover may be under
    /// `1/‖T‖_F²`, the least squared singular value's lower bound), the basis is rebuilt in the
    /// brute force's order, oldest first, and this step keeps no bounds. Otherwise every
    /// subset of these members keeps every member in either order, so a later window's span
    /// (built oldest first, the survivors first) contains the span of the survivors, and the
    /// bounds hold.
    #[inline(always)]
    fn rebuild<S: Simd>(&mut self, simd: S, ws: &mut Workspace) {
        self.bounds = self.factor(simd, ws, true)
            && self.t.iter().map(|t| t * t).sum::<f64>() <= WELL_CONDITIONED;
        if !self.bounds {
            self.factor(simd, ws, false);
        }
    }

    /// Builds the basis and `T` from the members, newest first or oldest first, skipping a
    /// member whose leftover against the rows before it is under `EPSILON`; false when one was
    /// skipped.
    #[inline(always)]
    fn factor<S: Simd>(&mut self, simd: S, ws: &mut Workspace, newest_first: bool) -> bool {
        let d = self.d;
        self.rows.clear();
        ws.basis.clear();
        ws.proj.clear();
        let len = self.members.len();
        let mut all = true;
        for at in 0..len {
            let age = if newest_first { at } else { len - 1 - at };
            let slot = self.members[len - 1 - age];
            let Workspace { basis, scratch, proj, .. } = &mut *ws;
            let row = &self.member_rows[slot * d..(slot + 1) * d];
            let rank = self.rows.len();
            let start = proj.len();
            let mut removed = 0.0;
            for s in 0..rank {
                let e = dot(simd, row, &basis[s * d..(s + 1) * d]);
                proj.push(e);
                removed += e * e;
            }
            if 1.0 - removed < EPSILON || rank == d {
                proj.truncate(start);
                all = false;
                continue;
            }
            push_basis_vector(simd, row, basis, scratch, d);
            proj.push(dot(simd, row, &basis[rank * d..(rank + 1) * d]));
            self.rows.push((slot, age));
        }
        // T = R⁻¹ column by column: R·x = e_b by back substitution, O(r³/6) in all. Column b
        // of R (R_0b ..= R_bb) is packed at `proj[b(b+1)/2 ..]`.
        let r = self.rows.len();
        let col = |b: usize| b * (b + 1) / 2;
        let proj = &ws.proj;
        self.t.clear();
        self.t.resize(r * r, 0.0);
        for b in 0..r {
            let tb = &mut self.t[b * r..(b + 1) * r];
            tb[b] = 1.0 / proj[col(b) + b];
            for s in (0..b).rev() {
                let sum: f64 = (s + 1..=b).map(|k| proj[col(k) + s] * tb[k]).sum();
                tb[s] = -sum / proj[col(s) + s];
            }
        }
        all
    }
}

/// Candidates per f32 panel: one f64 vector of AVX2 once widened.
const LANES: usize = 4;

/// `out[r] = Σ_j x_r[j]·q_j` in f64 for the candidates in `panel` (f32 rows transposed in
/// panels of [`LANES`]: element (r, j) at `((r / 4)·d + j)·4 + r % 4`). An f32 product is exact
/// in f64, so this is the f64 dot product of the stored rows, read at half the bytes. Four
/// panels and two dimensions at a time keep eight FMA chains in flight; written for the
/// compiler to vectorise each panel's four lanes (one widening load, one FMA).
#[inline(always)]
fn project(panel: &[f32], q: &[f64], d: usize, out: &mut [f64]) {
    let mut blocks = panel.chunks_exact(4 * LANES * d).zip(out.chunks_exact_mut(4 * LANES));
    for (block, o) in &mut blocks {
        let mut acc = [[0.0f64; LANES]; 8];
        let mut j = 0;
        while j + 2 <= d {
            for b in 0..4 {
                let x = &block[(b * d + j) * LANES..(b * d + j + 2) * LANES];
                for l in 0..LANES {
                    acc[2 * b][l] = f64::from(x[l]).mul_add(q[j], acc[2 * b][l]);
                    acc[2 * b + 1][l] = f64::from(x[LANES + l]).mul_add(q[j + 1], acc[2 * b + 1][l]);
                }
            }
            j += 2;
        }
        if j < d {
            for b in 0..4 {
                let x = &block[(b * d + j) * LANES..(b * d + j + 1) * LANES];
                for l in 0..LANES {
                    acc[2 * b][l] = f64::from(x[l]).mul_add(q[j], acc[2 * b][l]);
                }
            }
        }
        for b in 0..4 {
            for l in 0..LANES {
                o[b * LANES + l] = acc[2 * b][l] + acc[2 * b + 1][l];
            }
        }
    }
    // A last block of fewer than four panels (the covered ranks end at a block, or at N).
    let panels = out.len() / LANES;
    for p in (panels / 4) * 4..panels {
        let mut acc = [0.0f64; LANES];
        for j in 0..d {
            let x = &panel[(p * d + j) * LANES..(p * d + j + 1) * LANES];
            for l in 0..LANES {
                acc[l] = f64::from(x[l]).mul_add(q[j], acc[l]);
            }
        }
        out[p * LANES..(p + 1) * LANES].copy_from_slice(&acc);
    }
}

/// Scales each projection by its candidate's inverse norm (`ranks[r]` is the candidate at the
/// r-th position of `out`; padding past N is left as is).
#[inline(always)]
fn scale(out: &mut [f64], ranks: &[usize], inv_norms: &[f64]) {
    for (o, &i) in out.iter_mut().zip(ranks) {
        *o *= inv_norms[i];
    }
}

/// `Σ a_s·b_s` over the shorter of two short runs, with four independent partial sums.
#[inline(always)]
fn short_dot(a: &[f64], b: &[f64]) -> f64 {
    let n = a.len().min(b.len());
    let (a, b) = (&a[..n], &b[..n]);
    let mut acc = [0.0f64; 4];
    let mut qa = a.chunks_exact(4);
    let mut qb = b.chunks_exact(4);
    for (x, y) in (&mut qa).zip(&mut qb) {
        for l in 0..4 {
            acc[l] = x[l].mul_add(y[l], acc[l]);
        }
    }
    for (l, (x, y)) in qa.remainder().iter().zip(qb.remainder()).enumerate() {
        acc[l] = x.mul_add(*y, acc[l]);
    }
    (acc[0] + acc[1]) + (acc[2] + acc[3])
}
