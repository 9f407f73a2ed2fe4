//! `mmr`: Maximal Marginal Relevance with a running max-similarity per candidate.

use super::similarity::row_dots_f32;
use super::{allowed, eligible, passes, relevance_selection, take, Bound, Diversifier, KernelError, Workspace};
use pulp::{Arch, Simd, WithSimd};
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
/// Evaluated lazily (M. Minoux, "Accelerated greedy algorithms for maximizing submodular set
/// functions", Optimization Techniques, LNCS 7, 1978): from the second pick on, a candidate's value
/// only falls (its running max-similarity only rises), so a max-heap of stale values serves as
/// upper bounds and only the candidate on top is brought up to date. The first pick's similarity
/// row is computed for everyone, which seeds exact values. Picks equal the eager algorithm's.
/// Under a fairness floor ([`crate::fairness`]) the protected candidates keep a heap of their
/// own: a step the floor restricts searches that heap only, any other step both tops. Bounds stay
/// valid whichever steps were restricted (a value depends only on the slate so far), so the picks
/// are still the eager algorithm's with the same restriction.
///
/// # Complexity
/// Worst case O(N·k·d) time, as the eager form with a running maximum (one similarity row per
/// pick, not O(N·|S|·d) per step); typically far less. O(N) extra memory plus the heap, reused
/// through the [`Workspace`].
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

    /// `N·k·d`: the eager count; lazy evaluation usually does less.
    fn work(&self, n: usize, d: usize, k: usize) -> u64 {
        let (n, d, k) = (n as u64, d as u64, k.min(n) as u64);
        (n * k).saturating_mul(d)
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
        ws.reset_for(input, m);
        let mut sel = Selection { indices: Vec::with_capacity(m), gains: Vec::with_capacity(m), exhausted_at: None };

        // First pick: the max over an empty slate is 0, so the objective is the score term.
        let mut first: Option<(usize, f64)> = None;
        for r in passes(ws.must_protect(0)) {
            for i in 0..n {
                let obj = (1.0 - lambda) * s[i];
                if eligible(input, params, ws, i, r) && first.is_none_or(|(_, b)| obj > b) {
                    first = Some((i, obj));
                }
            }
            if first.is_some() {
                break;
            }
        }
        let Some((j, obj)) = first else { return Ok(sel) };
        take(input, ws, &mut sel, j, obj);
        if m == 1 {
            return Ok(sel);
        }
        // Its similarity row seeds every running max exactly (values may rise here, when the
        // first real max-similarity is negative, so bounds start only now).
        ws.running.clear();
        ws.running.resize(n, 0.0);
        row_dots_f32(emb.as_slice(), emb.row(j), emb.inv_norms(), emb.inv_norms()[j], &mut ws.running);
        ws.filled.clear();
        ws.filled.resize(n, 1);
        // Protected candidates get a heap of their own when a fairness floor applies, so a step
        // restricted to them looks at theirs only and a step that is not looks at both tops.
        let protected = input.fairness().map(|f| f.protected());
        let Workspace { heap, heap_protected, running, taken, .. } = &mut *ws;
        heap.clear();
        heap_protected.clear();
        for i in (0..n).filter(|&i| !taken[i]) {
            let bound = Bound { value: (1.0 - lambda) * s[i] - lambda * running[i], index: i };
            if protected.is_some_and(|p| p[i]) {
                heap_protected.push(bound);
            } else {
                heap.push(bound);
            }
        }

        while sel.indices.len() < m {
            if ws.cancelled() {
                break;
            }
            let step = sel.indices.len();
            let restrict = ws.must_protect(step);
            let mut pick = None;
            for r in passes(restrict) {
                pick = best(emb, input, params, ws, &sel.indices, r);
                if pick.is_some() {
                    break;
                }
            }
            let Some(fresh) = pick else { break };
            take(input, ws, &mut sel, fresh.index, fresh.value);
        }
        ws.check_cancelled()?;
        Ok(sel)
    }
}

/// The lazy search of one step: the best candidate among the protected heap's (`restrict`) or
/// both heaps', brought up to date, or `None` when the searched heaps hold no allowed candidate.
///
/// Pops the larger top; a candidate over its cap is dropped for good (caps only tighten); a stale
/// one is refreshed with the picks it has not seen; a fresh value that no searched top beats is
/// the step's greedy choice (ties to the lower index, by [`Bound`]'s order), else it goes back.
fn best(
    emb: &crate::model::Embeddings,
    input: &RerankInput,
    params: &Params,
    ws: &mut Workspace,
    picks: &[usize],
    restrict: bool,
) -> Option<Bound> {
    let lambda = params.lambda();
    let s = input.normalized();
    let step = picks.len();
    loop {
        let from_protected = ws.protected_top_first(restrict)?;
        let heap = if from_protected { &mut ws.heap_protected } else { &mut ws.heap };
        let top = heap.pop().expect("peeked");
        let i = top.index;
        if !allowed(input, params, &ws.group_taken, i) {
            continue;
        }
        if ws.filled[i] < step {
            let refresh = Refresh {
                rows: emb.as_slice(),
                inv_norm: emb.inv_norms(),
                i,
                picks: &picks[ws.filled[i]..step],
                max_sim: &mut ws.running[i],
            };
            Arch::new().dispatch(refresh);
            ws.filled[i] = step;
        }
        let fresh = Bound { value: (1.0 - lambda) * s[i] - lambda * ws.running[i], index: i };
        debug_assert!(fresh.value <= top.value + 1e-9, "lazy bound grew: max-similarity must not fall");
        let beaten = ws.heap_protected.peek().is_some_and(|next| *next > fresh)
            || (!restrict && ws.heap.peek().is_some_and(|next| *next > fresh));
        if beaten {
            let heap = if from_protected { &mut ws.heap_protected } else { &mut ws.heap };
            heap.push(fresh);
            continue;
        }
        return Some(fresh);
    }
}

/// Folds the cosines of candidate `i` with `picks` into its running max-similarity, with the same
/// f32 arithmetic as one row of `row_dots_f32`. O(|picks|·d).
struct Refresh<'a> {
    rows: &'a [f32],
    inv_norm: &'a [f64],
    i: usize,
    picks: &'a [usize],
    max_sim: &'a mut f64,
}

impl WithSimd for Refresh<'_> {
    type Output = ();

    #[inline(always)]
    fn with_simd<S: Simd>(self, simd: S) {
        let Self { rows, inv_norm, i, picks, max_sim } = self;
        let d = rows.len() / inv_norm.len();
        let (xv, xt) = S::as_simd_f32s(&rows[i * d..(i + 1) * d]);
        for &j in picks {
            let (rv, rt) = S::as_simd_f32s(&rows[j * d..(j + 1) * d]);
            let mut acc = simd.splat_f32s(0.0);
            for (&a, &b) in rv.iter().zip(xv) {
                acc = simd.mul_add_e_f32s(a, b, acc);
            }
            let tail: f32 = rt.iter().zip(xt).map(|(a, b)| a * b).sum();
            let cos = f64::from(simd.reduce_sum_f32s(acc) + tail) * inv_norm[j] * inv_norm[i];
            *max_sim = max_sim.max(cos);
        }
    }
}
