//! `dpp`: greedy MAP inference for a quality-weighted DPP, with an incremental Cholesky factor.

use super::similarity::{row_dots_f64, sims_into};
use super::{allowed, fill_by_score, relevance_selection, take, Diversifier, KernelError, Workspace};
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
/// # Complexity
/// O(N·k·(d + k)) time: per pick one similarity row `S_{·,j}` (O(N·d)) and one factor column
/// (O(N·|S|)); the N×N kernel is never built. O(N·k) extra memory for the factor.
///
/// # Invariants
/// `S` is symmetric PSD by construction (a Gram matrix); the factor is lower-triangular with a
/// positive diagonal (`d_j > sqrt(EPSILON)` at every pivot); no residual grows from one step to the
/// next (each update subtracts a square); output has no duplicates and at most `min(k, N)` items.
/// `Σ ln(gains)` over the DPP-chosen prefix equals `ln det S_Y` for that prefix.
///
/// # Numerical notes
/// Similarity, factor and residuals are f64, which keeps an exhausted residual near 1e-15 instead
/// of the ~1e-7 noise f32 sums would leave, so `EPSILON` means what it says. Embedding rows stay
/// f32 and are widened on load (streaming half the bytes of f64 rows measured ~1.7× faster). The
/// factor is stored row per candidate (`c_i` contiguous) so `⟨c_j, c_i⟩` over all i is one
/// streaming pass (measured ~2× faster than one row per pick).
/// Ties go to the lower index.
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
        let n = input.len();
        let m = params.k().min(n);
        let s = input.normalized();
        ws.reset(n, input.group_count());
        ws.sims.resize(n, 0.0);
        ws.dots.resize(n, 0.0);
        // Factor rows: candidate i's c_i is factor[i·stride .. i·stride + step].
        let stride = m.saturating_sub(1).max(1);
        ws.factor.clear();
        ws.factor.resize(n * stride, 0.0);
        // d_i² starts at S_ii = 1 (unit rows, see `Embeddings::cosine`).
        ws.running.clear();
        ws.running.resize(n, 1.0);
        let mut sel = Selection { indices: Vec::with_capacity(m), gains: Vec::with_capacity(m), exhausted_at: None };

        for step in 0..m {
            let mut best: Option<(usize, f64)> = None;
            for i in 0..n {
                let d2 = ws.running[i];
                if ws.taken[i] || d2 < EPSILON || !allowed(input, params, &ws.group_taken, i) {
                    continue;
                }
                let obj = (1.0 - lambda) * s[i] + lambda * d2.ln();
                if best.is_none_or(|(_, b)| obj > b) {
                    best = Some((i, obj));
                }
            }
            let Some((j, _)) = best else {
                sel.exhausted_at = Some(step);
                fill_by_score(input, params, ws, m, &mut sel);
                break;
            };
            let dj2 = ws.running[j];
            take(input, ws, &mut sel, j, dj2);
            if step + 1 == m {
                break;
            }
            // Algorithm 1, lines 6–7: S_{·,j}, then ⟨c_j, c_i⟩ for every i, then e_i and d_i².
            ws.query.clear();
            ws.query.extend(emb.row(j).iter().map(|&x| f64::from(x)));
            sims_into(emb.as_slice(), &ws.query, emb.inv_norms(), emb.inv_norms()[j], &mut ws.sims);
            ws.query.clear();
            ws.query.extend_from_slice(&ws.factor[j * stride..j * stride + step]);
            row_dots_f64(&ws.factor, stride, &ws.query, &[], 1.0, &mut ws.dots);
            let inv_dj = 1.0 / dj2.sqrt();
            for i in 0..n {
                let e = (ws.sims[i] - ws.dots[i]) * inv_dj;
                ws.factor[i * stride + step] = e;
                ws.running[i] -= e * e;
            }
            debug_assert!(ws.running[j].abs() < 1e-6, "picked item's residual must vanish");
        }
        Ok(sel)
    }
}
