//! `dpp`: greedy MAP inference for a quality-weighted DPP, with an incremental Cholesky factor.
//!
//! [`Dpp`] documents the objective and its reference; `basis` holds the f64 Gram–Schmidt basis
//! both strategies share, `lazy` and `screened` the two exact strategies.

mod basis;
mod lazy;
mod screened;
pub(super) mod window;

use pulp::{Arch, Simd, WithSimd};

use super::{relevance_selection, Diversifier, KernelError, Workspace};
use crate::model::{Params, RerankInput, Selection};
use basis::{project_out, push_basis_vector};
pub(crate) use screened::ScreenBuffers;

/// Residual `d_i²` below which a candidate adds no new direction: the kernel's numerical rank is
/// reached for it. Candidates under it are never picked by the DPP objective; once every remaining
/// one is under it, the slate is filled by score.
pub const EPSILON: f64 = 1e-9;

/// Greedy DPP MAP: each step picks `argmax_i (1 − λ)·s_i + λ·ln d_i²`; with a window `w`
/// ([`Params::window`]), `d_i²` is taken against the last `w − 1` picks only (module `window`).
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
/// Two exact strategies compute these picks ([`DppStrategy`]); both rest on the objective being a
/// modular term plus `λ·ln det`, which is submodular, so a candidate's value only falls as the
/// slate grows and a stale value is an upper bound (M. Minoux, "Accelerated greedy algorithms for
/// maximizing submodular set functions", Optimization Techniques, LNCS 7, 1978):
/// - **screened** (the default where it applies): f32 upper bounds for every candidate, kept in
///   SIMD panels and updated lazily per panel; f64 only for the candidates that could win a step.
///   Module `screened` has the method and its error bound.
/// - **lazy**: a max-heap of stale f64 values; only the candidate on top is brought up to date.
///   It handles every slate, including those whose score range is too wide for f32 weights and
///   those under a fairness floor (a heap for the protected candidates beside the other).
///
/// # Complexity
/// Worst case O(N·k·d + k²·d) time: every candidate updated at every step, plus building each
/// basis vector (O(t·d) for the t-th). Typically far less, since candidates whose bound sinks
/// below the winners are not updated. Extra memory O(N·d + k·d): screened keeps the rows
/// transposed in f32, lazy an f64 copy; both keep the basis. The N×N kernel is never built and
/// no factor rows are stored.
///
/// # Invariants
/// `S` is symmetric PSD by construction (a Gram matrix); the implied factor is lower-triangular
/// with a positive diagonal (`d_j > sqrt(EPSILON)` at every pivot); the basis is orthonormal; no
/// residual grows from one step to the next (each update subtracts a square); output has no
/// duplicates and at most `min(k, N)` items. `Σ ln(gains)` over the DPP-chosen prefix equals
/// `ln det S_Y` for that prefix.
///
/// # Numerical notes
/// Every value that decides a pick (basis, projections, residuals, objectives) is f64, which
/// keeps an exhausted residual near 1e-15 instead of the ~1e-7 noise f32 sums would leave, so
/// `EPSILON` means what it says. Screened f32 values only rule candidates out, with a proven
/// margin. The whole loop runs inside one SIMD dispatch. Ties go to the lower index, as everywhere.
#[derive(Debug, Clone, Copy, Default)]
pub struct Dpp;

/// Which exact strategy computes a DPP selection. Every strategy returns the same picks (the
/// eager greedy's, up to f64 rounding in near-ties); they differ only in speed.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub enum DppStrategy {
    /// Screened where the slate's score range allows it, lazy otherwise: what [`Dpp`] runs.
    #[default]
    Auto,
    /// The lazy max-heap kernel on every slate.
    Lazy,
    /// The screened kernel where it applies (`α·(s_max − s_min) ≤ 40`, `α = (1 − λ)/λ`, no
    /// fairness floor); other slates still run lazy.
    Screened,
}

impl Dpp {
    /// [`Diversifier::select`] with a chosen strategy; tests and benches hold each one to the
    /// references.
    ///
    /// # Errors
    /// [`KernelError::EmbeddingsRequired`] when the slate has no embeddings;
    /// [`KernelError::Cancelled`] when the workspace's cancel flag was raised.
    pub fn select_with(
        &self,
        strategy: DppStrategy,
        input: &RerankInput,
        params: &Params,
        ws: &mut Workspace,
    ) -> Result<Selection, KernelError> {
        let lambda = params.lambda();
        if lambda == 0.0 || input.is_empty() {
            return Ok(relevance_selection(input, params, ws));
        }
        if input.embeddings().is_none() {
            return Err(KernelError::EmbeddingsRequired { algorithm: self.name() });
        }
        // A window that slides before the last pick is its own kernel; one that never does
        // changes nothing, so the unbounded kernels keep their exact picks.
        if let Some(w) = params.window() {
            if w.saturating_sub(1) < params.k().min(input.len()).saturating_sub(1) {
                let sel = window::select(input, params, ws, Some(w), window::Gain::LogDet);
                ws.check_cancelled()?;
                return Ok(sel);
            }
        }
        // A fairness floor restricts some steps to protected candidates: the lazy strategy
        // follows it with a heap per side; the screened one (panels of the whole slate) does not.
        let screen = strategy != DppStrategy::Lazy && input.fairness().is_none() && screened::screenable(input, lambda);
        let sel = Arch::new().dispatch(Run { input, params, ws, screen });
        ws.check_cancelled()?;
        Ok(sel)
    }
}

impl Diversifier for Dpp {
    fn name(&self) -> &'static str {
        "dpp"
    }

    fn needs_embeddings(&self) -> bool {
        true
    }

    fn takes_window(&self) -> bool {
        true
    }

    /// `N·k·d + 2·k²·d`: every candidate projected on every basis vector, plus the basis.
    fn work(&self, n: usize, d: usize, k: usize) -> u64 {
        let (n, d, k) = (n as u64, d as u64, k.min(n) as u64);
        (n * k).saturating_mul(d) + 2 * k * k * d
    }

    fn select(&self, input: &RerankInput, params: &Params, ws: &mut Workspace) -> Result<Selection, KernelError> {
        self.select_with(DppStrategy::Auto, input, params, ws)
    }
}

/// One selection inside one SIMD dispatch, so the inner loops inline.
struct Run<'a> {
    input: &'a RerankInput,
    params: &'a Params,
    ws: &'a mut Workspace,
    screen: bool,
}

impl WithSimd for Run<'_> {
    type Output = Selection;

    #[inline(always)]
    fn with_simd<S: Simd>(self, simd: S) -> Selection {
        let Self { input, params, ws, screen } = self;
        if screen {
            screened::select(simd, input, params, ws)
        } else {
            lazy::select(simd, input, params, ws)
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::model::{CandidateInput, Limits, ScoreTransform};
    use pulp::Scalar;

    fn slate(n: usize, d: usize, seed: u64) -> RerankInput {
        slate_with(n, d, seed, |_, _| 0.0)
    }

    /// `n` candidates in three categories, scores and row values from an xorshift stream
    /// (values uniform in ±0.5), `bump(i, t)` added to coordinate t of candidate i's row.
    pub(super) fn slate_with(n: usize, d: usize, seed: u64, bump: impl Fn(usize, usize) -> f64) -> RerankInput {
        let mut state = seed;
        let mut next = move || {
            state ^= state << 13;
            state ^= state >> 7;
            state ^= state << 17;
            (state >> 11) as f64 / (1u64 << 53) as f64
        };
        let cands = (0..n)
            .map(|i| CandidateInput {
                id: format!("c{i}"),
                score: next(),
                category: Some(format!("g{}", i % 3)),
                embedding: Some((0..d).map(|t| (next() - 0.5 + bump(i, t)) as f32).collect()),
            })
            .collect();
        RerankInput::new(cands, ScoreTransform::MinMax, true, &Limits::default()).unwrap()
    }

    #[test]
    fn screening_applies_where_the_weights_fit_in_f32() {
        let input = slate(20, 4, 1);
        // Min-max scores span [0, 1], so α·range = (1 − λ)/λ.
        assert!(screened::screenable(&input, 1.0));
        assert!(screened::screenable(&input, 0.5));
        assert!(screened::screenable(&input, 1.0 / 41.0));
        assert!(!screened::screenable(&input, 0.02));
    }

    /// Runtime dispatch picks AVX2 + FMA on x86-64-v3 machines; the scalar back end is what other
    /// machines run. Both strategies must give the same picks on both.
    #[test]
    fn both_strategies_agree_on_the_scalar_and_dispatched_back_ends() {
        for (case, &(n, d, k)) in [(1, 3, 1), (9, 2, 9), (70, 5, 12), (150, 33, 40), (64, 64, 64)].iter().enumerate() {
            let input = slate(n, d, 17 + case as u64);
            for lambda in [0.05, 0.5, 1.0] {
                let params = Params::new(k as u64, lambda, &Limits::default()).unwrap();
                let want = Dpp.select_with(DppStrategy::Lazy, &input, &params, &mut Workspace::new()).unwrap();
                let dispatched = Dpp.select_with(DppStrategy::Screened, &input, &params, &mut Workspace::new()).unwrap();
                let scalar_screened = screened::select(Scalar::new(), &input, &params, &mut Workspace::new());
                let scalar_lazy = lazy::select(Scalar::new(), &input, &params, &mut Workspace::new());
                for (what, got) in [("dispatched screened", &dispatched), ("scalar screened", &scalar_screened), ("scalar lazy", &scalar_lazy)] {
                    assert_eq!(got.indices, want.indices, "{what}: n={n} d={d} k={k} lambda={lambda}");
                    assert_eq!(got.exhausted_at, want.exhausted_at, "{what}");
                }
            }
        }
    }

    #[test]
    fn a_reused_workspace_gives_the_same_picks_across_shapes() {
        let mut ws = Workspace::new();
        for (case, &(n, d)) in [(300, 16), (5, 40), (129, 3), (300, 16)].iter().enumerate() {
            let input = slate(n, d, 99 + case as u64 % 3);
            let params = Params::new(25, 0.6, &Limits::default()).unwrap();
            let fresh = Dpp.select(&input, &params, &mut Workspace::new()).unwrap();
            assert_eq!(Dpp.select(&input, &params, &mut ws).unwrap().indices, fresh.indices, "n={n} d={d}");
        }
    }
}
