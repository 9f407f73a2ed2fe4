//! The sliding window evaluated lazily and screened in f32: a candidate's residual is computed
//! exactly, in f64, only when a step's scan reaches it and an f32 bound cannot rule it out.
//!
//! Legend as in the parent module, plus: `g_i` candidate i's similarities `⟨u_i, u_j⟩` to the
//! members; `G` the members' Gram matrix; `R` the upper-triangular factor of the members' rows
//! in the brute force's order (`u_{p_b} = Σ_{s ≤ b} R_sb·q_s`, `p_b` the member behind basis row
//! `b`, and `RᵀR = G`); `T = R⁻¹`, so that `q_b = Σ_s T_sb·u_{p_s}` and `C_i = Tᵀ·g_i`; a tilde
//! marks a value computed in f32.
//!
//! # Method
//! A step's scan visits candidates in descending score order and stops at the first whose
//! score bound falls below the best gain so far (parent module, `best_gain`). On the bench's
//! clustered slates, where every candidate pays about `ln 0.6` for its group's member in the
//! window, it reaches most of the slate; on unclustered ones a few percent. So:
//! - **Covered prefix**: the ranks a scan has reached so far, grown in blocks of four panels
//!   (32 ranks on AVX2), keep their unit rows rounded to f32 in transposed panels of one SIMD
//!   vector. Each block keeps its f32 similarities `g̃` to the members, one column per ring
//!   slot, brought up to date when a scan reaches it ([`Lazy::sync`]): one f32 pass over the
//!   block per member that entered since, O(32·d), eight candidates per FMA.
//! - **Per step**: one new row of `G` (w dot products, O(w·d)), then `R` by Cholesky in the
//!   brute force's order with its skip rule (a member whose leftover, the pivot, is under
//!   `EPSILON` adds no row) and `T`, O(w³). A block reached this step is screened once:
//!   `1 − ‖T̃ᵀ·g̃_i‖²` in f32, O(w²/2) per candidate, eight at a time. [`Lazy::rebuild`] bounds
//!   the screen's error by `E`, so that `d_i² ≤ screened_i + E`.
//! - **Per candidate reached**: when the gain at `screened_i + E` is below the best so far, the
//!   candidate is out for this step. Otherwise its exact residual in f64, `1 − ‖Tᵀ·g_i‖²` with
//!   `g_i` from f64 dot products, O(w·d).
//!
//! The screen costs a few f32 operations per candidate where an exact residual costs `w·d` f64
//! ones, and a step evaluates exactly only the candidates whose bounds reach the best so far
//! (on the bench's slates about 4 a step, of about 300 reached): the certification of the
//! unbounded screened kernel (module `screened`) applied to a window that slides. Nothing is
//! carried from one step to the next but the similarities, which do not depend on the window,
//! so a member's departure needs no bookkeeping.
//!
//! # Complexity
//! O(k·(w·d + w³ + B·(d + w²))) for `B` ranks in blocks a step's scan reaches (at most N,
//! rounded up to a block), the `B` terms in f32 eight at a time, plus O(w·d) f64 per exact
//! evaluation. A block left unreached while a member's whole stay in the window passes is never
//! projected on that member. The eager loop's is O(k·N·(d + w)) in f64. The parent module
//! chooses this path when `w² ≤ 8·d`. Extra memory: O(N·d) f32 for the panels, O(N·w) f32 for
//! the similarities, O(w·d + w²) f64 for the members and `G`.
//!
//! # Invariants
//! A block screened this step holds every member's similarity and its screened residual
//! against the current window; a candidate is ruled out only by a bound at or above its exact
//! residual (asserted in debug builds wherever it is checked).
//!
//! # Numerical notes
//! All values that decide a pick are f64. Cholesky of a Gram matrix squares the window's
//! condition number, so `1 − ‖Tᵀ·g‖²` is used only while `r·‖T‖_F² ≤ 300` ([`WELL_CONDITIONED`]);
//! a worse window takes its residuals from an orthonormal basis built by CGS2 over the members'
//! rows, exactly as the brute force takes them, with that basis's `T` for the screen. The
//! screen's error grows with `‖T‖`; [`Lazy::rebuild`] derives `E` from `T`'s column sums, and a
//! window so ill-conditioned that `E` would pass 1.5 screens nothing (every candidate reached
//! is evaluated exactly). Duplicated candidates compute identical values and tie.

use std::collections::VecDeque;

use pulp::Simd;

use super::super::basis::{dot, push_basis_vector};
use super::super::EPSILON;
use super::{choose, surely_below, Gain, Residual};
use crate::diversify::{take, Workspace};
use crate::model::{Params, RerankInput, Selection};

/// Absolute slack added to every screened bound, for the rounding of the exact path's own f64
/// arithmetic with the same `T` (about 1e-13 within [`WELL_CONDITIONED`]).
const SLACK: f64 = 1e-10;

/// `r·‖T‖_F²` (r basis rows) up to which exact residuals are taken as `1 − ‖Tᵀ·g‖²` with `T`
/// from the Cholesky factor of the members' Gram matrix; beyond it, from an orthonormal basis
/// built by CGS2, as the brute force takes them. Cholesky of a Gram matrix squares the condition
/// number: its backward error `‖ΔG‖ ≲ r·u₆₄` moves `gᵀG⁻¹g` by up to `‖T‖₂⁴·‖ΔG‖·‖g‖²` with
/// `‖g‖² ≤ r`, so `r·‖T‖_F² ≤ 300` keeps that under `300²·u₆₄ ≈ 1e-11` (a worst case; typical
/// errors are far smaller). `‖T‖_F² ≥ r` always (the squared singular values of `R` sum to r),
/// so windows of up to 17 rows can take this path; on the bench's clustered slates a window of
/// 9 gives `‖T‖_F²` of about 10, and two members with cosine 0.9 add about 10 more.
const WELL_CONDITIONED: f64 = 300.0;

/// Unit roundoff of f32.
const U32: f64 = f32::EPSILON as f64 / 2.0;

/// Panels per block: ranks are covered, and projected, four panels at a time.
const BLOCK_PANELS: usize = 4;

/// Whether the lazy loop should run a window of `capacity` members over d-dimensional rows:
/// its per-candidate screen (about `w²/2` f32 multiply-adds a step) stays within a few eager
/// updates (`d + 3w`) when `w² ≤ 8·d`.
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
    // A panel is one SIMD vector of f32 candidates (eight on AVX2).
    let lanes = std::mem::size_of::<S::f32s>() / std::mem::size_of::<f32>();
    let block = BLOCK_PANELS * lanes;
    let padded = n.div_ceil(block) * block;
    let s = input.normalized();
    ws.order.clear();
    ws.order.extend(0..n);
    ws.order.sort_unstable_by(|&a, &b| s[b].total_cmp(&s[a]).then(a.cmp(&b)));
    // Panels (by score rank), similarities and screened residuals need no zeroing: `covered`
    // guards them.
    if ws.narrow.len() < padded * d {
        ws.narrow.resize(padded * d, 0.0);
    }
    if ws.sims.len() < (capacity + 1) * padded {
        ws.sims.resize((capacity + 1) * padded, 0.0);
    }
    ws.evaluated.clear();
    ws.evaluated.resize(padded, 0);
    // Per block: picks its similarities have seen, and one more than the step its screen is for.
    ws.filled.clear();
    ws.filled.resize(2 * padded / block, 0);
    ws.running.clear();
    ws.running.resize(padded, 1.0);
    let mut st = Lazy {
        simd,
        block,
        picks: 0,
        members: VecDeque::with_capacity(capacity),
        member_rows: vec![0.0; capacity * d],
        member32: vec![0.0; capacity * d],
        gram: vec![0.0; capacity * capacity],
        from_basis: false,
        rows: Vec::with_capacity(capacity),
        t: Vec::new(),
        t32: Vec::new(),
        slack: SLACK,
        g: Vec::with_capacity(d),
        sim: Vec::with_capacity(capacity),
        panel: Vec::with_capacity(capacity),
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
            st.enter(input, ws, rank);
        }
    }
    sel
}

impl<S: Simd> Residual for Lazy<S> {
    #[inline(always)]
    fn get(&mut self, input: &RerankInput, ws: &mut Workspace, rank: usize, floor: Option<f64>) -> Option<f64> {
        self.residual(input, ws, rank, floor)
    }
}

/// The window, its factor, and how much of the score order is kept up to date.
struct Lazy<S: Simd> {
    simd: S,
    /// Ranks per block: [`BLOCK_PANELS`] panels of one SIMD vector each.
    block: usize,
    /// Picks so far.
    picks: usize,
    /// The window: the last `capacity` picks' ring slots, oldest first.
    members: VecDeque<usize>,
    /// The members' unit rows, one ring slot (d values) each.
    member_rows: Vec<f64>,
    /// The same rows rounded to f32.
    member32: Vec<f32>,
    /// The members' Gram matrix `⟨u_a, u_b⟩`, indexed by ring slot (`capacity × capacity`).
    gram: Vec<f64>,
    /// True when the window is too ill-conditioned for `C = Tᵀ·g` ([`WELL_CONDITIONED`]): then
    /// `ws.basis` holds its orthonormal basis and exact residuals are taken from it.
    from_basis: bool,
    /// The ring slot of the member behind each basis row, in build order (oldest first).
    rows: Vec<usize>,
    /// `T = R⁻¹` (upper triangular), stored transposed in `r × r`: row b holds
    /// `T_0b ..= T_bb`, then zeros.
    t: Vec<f64>,
    /// `T` rounded to f32 and broadcast to a SIMD vector, packed by column: column b
    /// (`T_0b ..= T_bb`) from `b(b + 1)/2`.
    t32: Vec<S::f32s>,
    /// `E`: how far a screened residual may fall below the exact one, plus [`SLACK`].
    slack: f64,
    /// One candidate's unit row in f64, for an exact evaluation.
    g: Vec<f64>,
    /// Its similarities to the basis rows' members, in row order.
    sim: Vec<f64>,
    /// One panel's similarities to the basis rows' members, in row order (screen scratch).
    panel: Vec<S::f32s>,
    /// Ranks below this (a whole number of blocks) have their rows in the panels; their
    /// similarities and screen are brought up to date block by block ([`Lazy::sync`]).
    covered: usize,
    lambda: f64,
    gain: Gain,
    capacity: usize,
    d: usize,
    /// `n` rounded up to whole blocks.
    padded: usize,
}

impl<S: Simd> Lazy<S> {
    /// Extends the covered ranks to include `rank`, a block at a time: copies their unit rows,
    /// rounded to f32, into the panels, and marks the new blocks as never synced. Each rank is
    /// covered once, so this costs O(N·d) in all at most.
    #[inline(always)]
    fn cover(&mut self, input: &RerankInput, ws: &mut Workspace, rank: usize) {
        let (d, padded, from) = (self.d, self.padded, self.covered);
        let (block, lanes) = (self.block, self.block / BLOCK_PANELS);
        let to = ((rank + 1).div_ceil(block) * block).min(padded);
        let emb = input.embeddings().expect("select checked for embeddings");
        let Workspace { narrow, order, filled, .. } = &mut *ws;
        filled[2 * from / block..2 * to / block].fill(0);
        for r in from..to {
            let (p, l) = (r / lanes, r % lanes);
            let row = order.get(r).map(|&i| (emb.row(i), emb.inv_norms()[i]));
            for j in 0..d {
                narrow[(p * d + j) * lanes + l] = row.map_or(0.0, |(x, inv)| (f64::from(x[j]) * inv) as f32);
            }
        }
        self.covered = to;
    }

    /// Brings block `blk` (covered) up to date for this step: projects its panels on every
    /// member that entered since it was last synced and is still in the window, then screens
    /// it against the current window, each at most once a step. A block the scans never reach
    /// costs nothing, and a member that leaves before a block is reached is never projected.
    #[inline(always)]
    fn sync(&mut self, ws: &mut Workspace, blk: usize) {
        let (d, padded, block, t) = (self.d, self.padded, self.block, self.picks);
        let Workspace { narrow, sims, filled, .. } = &mut *ws;
        let since = filled[2 * blk].max(t - self.members.len());
        if since < t {
            let panels = &narrow[blk * block * d..(blk + 1) * block * d];
            for pick in since..t {
                let slot = pick % self.capacity;
                let out = &mut sims[slot * padded + blk * block..slot * padded + (blk + 1) * block];
                project(self.simd, panels, &self.member32[slot * d..(slot + 1) * d], d, out);
            }
            filled[2 * blk] = t;
        }
        if filled[2 * blk + 1] != t + 1 {
            self.screen(sims, blk * block, (blk + 1) * block);
            filled[2 * blk + 1] = t + 1;
        }
    }

    /// Adds the candidate at `rank` to the window (dropping the oldest member when full), adds
    /// its row of the Gram matrix, and refactors the window; blocks are projected on it when a
    /// scan reaches them ([`Lazy::sync`]).
    #[inline(always)]
    fn enter(&mut self, input: &RerankInput, ws: &mut Workspace, rank: usize) {
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
        let row = emb.row(i);
        for ((x, x32), &v) in self.member_rows[slot * d..(slot + 1) * d]
            .iter_mut()
            .zip(&mut self.member32[slot * d..(slot + 1) * d])
            .zip(row)
        {
            *x = f64::from(v) * inv;
            *x32 = *x as f32;
        }
        let (cap, row) = (self.capacity, &self.member_rows[slot * d..(slot + 1) * d]);
        for &other in &self.members {
            let g = dot(self.simd, row, &self.member_rows[other * d..(other + 1) * d]);
            self.gram[slot * cap + other] = g;
            self.gram[other * cap + slot] = g;
        }
        self.rebuild(ws);
    }

    /// `d_i²` against the current window for the candidate at `rank`, computed at most once a
    /// step; `None` when its screened bound shows that it cannot reach `floor` (the best gain
    /// so far).
    #[inline(always)]
    fn residual(&mut self, input: &RerankInput, ws: &mut Workspace, rank: usize, floor: Option<f64>) -> Option<f64> {
        let t = self.picks;
        if ws.evaluated[rank] == t + 1 {
            return Some(ws.running[rank]);
        }
        if rank >= self.covered {
            self.cover(input, ws, rank);
        }
        let i = ws.order[rank];
        if let Some(floor) = floor {
            self.sync(ws, rank / self.block);
            // `min` also maps a NaN (a screen overflowed by a window too ill-conditioned to
            // screen, whose slack is then infinite) to the trivial bound 1.
            let bound = (f64::from(ws.sims[self.capacity * self.padded + rank]) + self.slack).min(1.0);
            let s = input.normalized()[i];
            if surely_below(self.gain, self.lambda, s, bound, floor)
                || self.gain.value(self.lambda, s, bound).is_none_or(|v| v < floor)
            {
                return None;
            }
        }
        // Exact, in f64: `C = Tᵀ·g` with `g` from f64 dot products, or in an ill-conditioned
        // window the coordinates straight from the CGS2 basis, as the brute force takes them.
        let d = self.d;
        let emb = input.embeddings().expect("select checked for embeddings");
        let inv = emb.inv_norms()[i];
        self.g.clear();
        self.g.extend(emb.row(i).iter().map(|&x| f64::from(x) * inv));
        let mut kept = 0.0;
        if self.from_basis {
            for q in ws.basis.chunks_exact(d).take(self.rows.len()) {
                let c = dot(self.simd, q, &self.g);
                kept = c.mul_add(c, kept);
            }
        } else {
            // g_s = ⟨u_i, u_{p_s}⟩ for each basis row's member, then C_b = Σ_{s ≤ b} T_sb·g_s.
            let r = self.rows.len();
            self.sim.clear();
            for &slot in &self.rows {
                self.sim.push(dot(self.simd, &self.g, &self.member_rows[slot * d..(slot + 1) * d]));
            }
            for b in 0..r {
                let c = short_dot(&self.t[b * r..=b * r + b], &self.sim);
                kept = c.mul_add(c, kept);
            }
        }
        ws.evaluated[rank] = t + 1;
        ws.running[rank] = 1.0 - kept;
        // The screen's invariant, checked wherever this step screened the candidate's block
        // (every debug-build test that runs this loop checks the error bound of `rebuild`).
        debug_assert!(
            ws.filled[2 * (rank / self.block) + 1] != t + 1
                || ws.running[rank] <= f64::from(ws.sims[self.capacity * self.padded + rank]) + self.slack
                || self.slack.is_infinite(),
            "screened {} + E {} below the exact residual {}",
            ws.sims[self.capacity * self.padded + rank],
            self.slack,
            ws.running[rank]
        );
        Some(ws.running[rank])
    }

    /// Refactors the window (`R` and `T` from `G`, and the CGS2 basis too when `T` is too
    /// large), and the screen's error bound `E`.
    ///
    /// The bound, with `u = 2⁻²⁴` and `r` basis rows (N. J. Higham's rounding model, *Accuracy and
    /// Stability of Numerical Algorithms*, 2nd ed., §3.1, `γ_n = n·u/(1 − n·u)`):
    /// - `g̃_s`, an f32 dot product of two unit rows each rounded to f32, is within
    ///   `δ = (d + 4)·u` of `g_s` (`γ_d` for the sum, `2u` for the two roundings, Cauchy–Schwarz
    ///   for `Σ|u_j·m_j| ≤ 1`).
    /// - `C̃_b = Σ_s T̃_sb·g̃_s` in f32 is within `e_b = ‖T_:b‖₁·(δ + (r + 2)·u·(1 + δ) + 1e-12)`
    ///   of `C_b`: the similarities' error, `T`'s rounding to f32, the f32 sum, and (when exact
    ///   residuals come from the basis) the f64 rounding of `q_b = Σ_s T_sb·u_{p_s}` itself.
    /// - With `ε = ‖e‖₂`, `‖C‖ ≥ ‖C̃‖ − ε` and `‖C̃‖ ≤ 1 + ε` give
    ///   `d² = 1 − ‖C‖² ≤ 1 − ‖C̃‖² + 2ε(1 + ε)`, and the f32 evaluation of `1 − ‖C̃‖²` adds at
    ///   most `(r + 2)·u·(2 + 3ε)`.
    ///
    /// `E` is that sum (with 1 % to spare) plus [`SLACK`]. A window with `ε > 1/2` screens
    /// nothing: `E = ∞`.
    #[inline(always)]
    fn rebuild(&mut self, ws: &mut Workspace) {
        self.cholesky(ws);
        let r = self.rows.len() as f64;
        self.from_basis = r * self.t.iter().map(|t| t * t).sum::<f64>() > WELL_CONDITIONED;
        if self.from_basis {
            self.factor(ws);
        }
        let (r, d) = (self.rows.len(), self.d as f64);
        let delta = (d + 4.0) * U32;
        let per = delta + (r as f64 + 2.0) * U32 * (1.0 + delta) + 1e-12;
        let eps = (0..r)
            .map(|b| {
                let e = self.t[b * r..=b * r + b].iter().map(|x| x.abs()).sum::<f64>() * per;
                e * e
            })
            .sum::<f64>()
            .sqrt();
        self.slack = if eps > 0.5 {
            f64::INFINITY
        } else {
            (2.0 * eps * (1.0 + eps) + (r as f64 + 2.0) * U32 * (2.0 + 3.0 * eps)) * 1.01 + SLACK
        };
        self.t32.clear();
        for b in 0..r {
            let simd = self.simd;
            self.t32.extend(self.t[b * r..=b * r + b].iter().map(|&x| simd.splat_f32s(x as f32)));
        }
    }

    /// Screened residuals `1 − ‖T̃ᵀ·g̃_i‖²` of the ranks in `from..to` (whole panels), against
    /// the current basis rows: per panel, `C̃_b` for a SIMD vector of candidates at a time.
    #[inline(always)]
    fn screen(&mut self, sims: &mut [f32], from: usize, to: usize) {
        let (simd, r, padded) = (self.simd, self.rows.len(), self.padded);
        let lanes = self.block / BLOCK_PANELS;
        let (sim, out) = sims.split_at_mut(self.capacity * padded);
        let (out, _) = S::as_mut_simd_f32s(&mut out[from..to]);
        let zero = simd.splat_f32s(0.0);
        for (p, o) in out.iter_mut().enumerate() {
            let at = from + p * lanes;
            self.panel.clear();
            for &slot in &self.rows {
                let (g, _) = S::as_simd_f32s(&sim[slot * padded + at..slot * padded + at + lanes]);
                self.panel.push(g[0]);
            }
            let mut acc = zero;
            for b in 0..r {
                let mut c = zero;
                for (&tsb, &g) in self.t32[b * (b + 1) / 2..][..=b].iter().zip(&self.panel) {
                    c = simd.mul_add_e_f32s(tsb, g, c);
                }
                acc = simd.mul_add_e_f32s(c, c, acc);
            }
            *o = simd.sub_f32s(simd.splat_f32s(1.0), acc);
        }
    }

    /// `R` from the members' Gram matrix by Cholesky, oldest member first, skipping a member
    /// whose leftover against the rows before it (its pivot, `G_bb − Σ_s R_sb²`) is under
    /// `EPSILON` (the brute force's rule); then `T`. O(w³), no pass over the rows: `R_sb` is
    /// `⟨u_{p_b}, q_s⟩`, what CGS would have computed.
    #[inline(always)]
    fn cholesky(&mut self, ws: &mut Workspace) {
        let (cap, d) = (self.capacity, self.d);
        self.rows.clear();
        ws.proj.clear();
        let col = |b: usize| b * (b + 1) / 2;
        for &slot in &self.members {
            let rank = self.rows.len();
            let start = ws.proj.len();
            let mut removed = 0.0;
            for s in 0..rank {
                let partial: f64 = (0..s).map(|k| ws.proj[col(s) + k] * ws.proj[start + k]).sum();
                let e = (self.gram[self.rows[s] * cap + slot] - partial) / ws.proj[col(s) + s];
                ws.proj.push(e);
                removed += e * e;
            }
            let pivot = self.gram[slot * cap + slot] - removed;
            if pivot < EPSILON || rank == d {
                ws.proj.truncate(start);
                continue;
            }
            ws.proj.push(pivot.sqrt());
            self.rows.push(slot);
        }
        self.invert_r(ws);
    }

    /// Builds the basis and `T` from the members, oldest first, skipping a member whose
    /// leftover against the rows before it is under `EPSILON` (the brute force's rule).
    #[inline(always)]
    fn factor(&mut self, ws: &mut Workspace) {
        let (simd, d) = (self.simd, self.d);
        self.rows.clear();
        ws.basis.clear();
        ws.proj.clear();
        for &slot in &self.members {
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
                continue;
            }
            push_basis_vector(simd, row, basis, scratch, d);
            proj.push(dot(simd, row, &basis[rank * d..(rank + 1) * d]));
            self.rows.push(slot);
        }
        self.invert_r(ws);
    }

    /// `T = R⁻¹` from `R` packed in `ws.proj` (column b, `R_0b ..= R_bb`, at `b(b+1)/2`).
    #[inline(always)]
    fn invert_r(&mut self, ws: &Workspace) {
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
    }
}

/// `out[r] = Σ_j x_r[j]·q_j` in f32 for the candidates in `panel` (f32 rows transposed in
/// panels of one SIMD vector: element (r, j) at `((r / L)·d + j)·L + r % L` for L lanes), whole
/// blocks of [`BLOCK_PANELS`] panels. One broadcast of `q_j` per dimension; four panels and two
/// dimensions at a time keep eight FMA chains in flight.
#[inline(always)]
fn project<S: Simd>(simd: S, panel: &[f32], q: &[f32], d: usize, out: &mut [f32]) {
    let (pv, _) = S::as_simd_f32s(panel);
    let (ov, _) = S::as_mut_simd_f32s(out);
    let (q2, q_last) = (q.chunks_exact(2), q.chunks_exact(2).remainder());
    let zero = simd.splat_f32s(0.0);
    for (block, o) in pv.chunks_exact(BLOCK_PANELS * d).zip(ov.chunks_exact_mut(BLOCK_PANELS)) {
        let (x0, rest) = block.split_at(d);
        let (x1, rest) = rest.split_at(d);
        let (x2, x3) = rest.split_at(d);
        let (p0, p1, p2, p3) = (x0.chunks_exact(2), x1.chunks_exact(2), x2.chunks_exact(2), x3.chunks_exact(2));
        let (l0, l1, l2, l3) = (p0.remainder(), p1.remainder(), p2.remainder(), p3.remainder());
        let mut acc = [zero; 8];
        for ((((qj, a), b), c), e) in q2.clone().zip(p0).zip(p1).zip(p2).zip(p3) {
            let (q0, q1) = (simd.splat_f32s(qj[0]), simd.splat_f32s(qj[1]));
            acc[0] = simd.mul_add_e_f32s(a[0], q0, acc[0]);
            acc[1] = simd.mul_add_e_f32s(a[1], q1, acc[1]);
            acc[2] = simd.mul_add_e_f32s(b[0], q0, acc[2]);
            acc[3] = simd.mul_add_e_f32s(b[1], q1, acc[3]);
            acc[4] = simd.mul_add_e_f32s(c[0], q0, acc[4]);
            acc[5] = simd.mul_add_e_f32s(c[1], q1, acc[5]);
            acc[6] = simd.mul_add_e_f32s(e[0], q0, acc[6]);
            acc[7] = simd.mul_add_e_f32s(e[1], q1, acc[7]);
        }
        // An odd d leaves one dimension.
        if let (Some(&qj), Some(&a), Some(&b), Some(&c), Some(&e)) =
            (q_last.first(), l0.first(), l1.first(), l2.first(), l3.first())
        {
            let q0 = simd.splat_f32s(qj);
            acc[0] = simd.mul_add_e_f32s(a, q0, acc[0]);
            acc[2] = simd.mul_add_e_f32s(b, q0, acc[2]);
            acc[4] = simd.mul_add_e_f32s(c, q0, acc[4]);
            acc[6] = simd.mul_add_e_f32s(e, q0, acc[6]);
        }
        for (k, v) in o.iter_mut().enumerate() {
            *v = simd.add_f32s(acc[2 * k], acc[2 * k + 1]);
        }
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
