//! `mmr`: Maximal Marginal Relevance with a running max-similarity per candidate.

use super::similarity::row_dots_f32;
use super::{allowed, relevance_selection, take, Diversifier, KernelError, Workspace};
use crate::model::{Params, RerankInput, Selection};

/// Greedy MMR: each step picks `argmax_i (1 − λ)·s_i − λ·max_{j∈S} cos(i, j)`.
///
/// Legend: `s_i` normalised score, `λ` the request's `lambda` (the paper's λ is `1 − lambda`),
/// `S` the slate so far; the max over an empty `S` is taken as 0.
///
/// # Reference
/// J. Carbonell and J. Goldstein, "The use of MMR, diversity-based reranking for reordering
/// documents and producing summaries", SIGIR 1998, the MMR formula in section 2. Similarity to the
/// query is replaced by the caller's score, as is usual for recommendation.
///
/// # Complexity
/// O(N·k·d) time: one similarity row `S_{·,j}` per pick, folded into a running maximum, so a step
/// costs O(N·d) rather than O(N·|S|·d). O(N + d) extra memory, reused through the [`Workspace`].
///
/// # Invariants
/// The running max-similarity of a candidate never decreases; output has no duplicates and at most
/// `min(k, N)` items.
///
/// # Numerical notes
/// Similarities are f32 dot products of the stored rows (error ~1e-7, far below any gap that
/// matters to the ranking), scaled by the exact f64 inverse norms. Ties go to the lower index
/// (strict `>` while scanning upwards).
#[derive(Debug, Clone, Copy, Default)]
pub struct Mmr;

impl Diversifier for Mmr {
    fn name(&self) -> &'static str {
        "mmr"
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
        ws.running.clear();
        ws.running.resize(n, 0.0);
        ws.sims.resize(n, 0.0);
        let mut sel = Selection { indices: Vec::with_capacity(m), gains: Vec::with_capacity(m), exhausted_at: None };

        for step in 0..m {
            let mut best: Option<(usize, f64)> = None;
            for i in 0..n {
                if ws.taken[i] || !allowed(input, params, &ws.group_taken, i) {
                    continue;
                }
                let obj = (1.0 - lambda) * s[i] - lambda * ws.running[i];
                if best.is_none_or(|(_, b)| obj > b) {
                    best = Some((i, obj));
                }
            }
            let Some((j, obj)) = best else { break };
            take(input, ws, &mut sel, j, obj);
            if step + 1 == m {
                break;
            }
            row_dots_f32(emb.as_slice(), emb.row(j), emb.inv_norms(), emb.inv_norms()[j], &mut ws.sims);
            if step == 0 {
                ws.running.copy_from_slice(&ws.sims);
            } else {
                for (r, &x) in ws.running.iter_mut().zip(&ws.sims) {
                    *r = r.max(x);
                }
            }
        }
        Ok(sel)
    }
}
