use super::dpp::window::{self, Gain};
use super::{relevance_selection, Diversifier, KernelError, Workspace};
use crate::model::{Params, RerankInput, Selection};

/// SSD: each step picks `argmax_i (1 − λ)·s_i + λ·d_i`, `d_i` the distance from candidate i's
/// unit embedding to the span of the last `w − 1` picks (all picks without a window).
///
/// Legend: `s_i` normalised score; `λ` the request's `lambda`; `d_i²` the squared residual of
/// `u_i` against the window's span, as in windowed DPP.
///
/// # Reference
/// Y. Huang, W. Wang, L. Zhang and R. Xu, "Sliding Spectrum Decomposition for Diversified
/// Recommendation", KDD 2021: the greedy step maximises relevance plus `γ` times the volume the
/// candidate adds to the parallelotope spanned by the window, which is its residual norm after
/// Gram–Schmidt against the window (their Eq. for the greedy SSD step; equation number not
/// recalled). Deviations: the trade-off is written `(1 − λ)·s_i + λ·d_i` so that `λ` means what
/// it means for every algorithm here (`λ = 0` is relevance order); no eligibility threshold:
/// a candidate in the span already gains 0 volume but may still win on score; and a residual
/// `d_i² < EPSILON` (1e-9, the DPP kernels' numerical rank) counts as 0, since what f64
/// rounding leaves of a zero residual (±1e-16) would otherwise rank candidates by its square
/// root, 1e-8.
///
/// # Complexity
/// O(N·d + N·w) per step, O(k·(N·d + N·w)) in all; extra memory O(N·d + N·min(w, d)). See the
/// shared sliding-window loop (`dpp/window.rs`) for how the window's basis slides.
///
/// # Invariants
/// Output has no duplicates and at most `min(k, N)` items; `d_i² ∈ [0, 1]` up to rounding and,
/// without a window, never grows from one step to the next; ties go to the lower index.
///
/// # Numerical notes
/// f64 throughout; residuals under `EPSILON` are 0 before the square root (see above).
#[derive(Debug, Clone, Copy, Default)]
pub struct Ssd;

impl Diversifier for Ssd {
    fn name(&self) -> &'static str {
        "ssd"
    }

    fn needs_embeddings(&self) -> bool {
        true
    }

    fn takes_window(&self) -> bool {
        true
    }

    /// `N·k·d`: every candidate projected on every new basis row.
    fn work(&self, n: usize, d: usize, k: usize) -> u64 {
        let (n, d, k) = (n as u64, d as u64, k.min(n) as u64);
        (n * k).saturating_mul(d)
    }

    fn select(&self, input: &RerankInput, params: &Params, ws: &mut Workspace) -> Result<Selection, KernelError> {
        if params.lambda() == 0.0 || input.is_empty() {
            return Ok(relevance_selection(input, params, ws));
        }
        if input.embeddings().is_none() {
            return Err(KernelError::EmbeddingsRequired { algorithm: self.name() });
        }
        let sel = window::select(input, params, ws, params.window(), Gain::Volume);
        ws.check_cancelled()?;
        Ok(sel)
    }
}
