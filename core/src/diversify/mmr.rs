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
        if input.fairness().is_some() {
            let sel = eager(input, params, ws);
            ws.check_cancelled()?;
            return Ok(sel);
        }
        let n = input.len();
        let m = params.k().min(n);
        let s = input.normalized();
        ws.reset(n, input.group_count());
        let mut sel = Selection { indices: Vec::with_capacity(m), gains: Vec::with_capacity(m), exhausted_at: None };

        // First pick: the max over an empty slate is 0, so the objective is the score term.
        let mut first: Option<(usize, f64)> = None;
        for i in 0..n {
            let obj = (1.0 - lambda) * s[i];
            if allowed(input, params, &ws.group_taken, i) && first.is_none_or(|(_, b)| obj > b) {
                first = Some((i, obj));
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
        ws.heap.clear();
        let running = &ws.running;
        let taken = &ws.taken;
        ws.heap.extend(
            (0..n).filter(|&i| !taken[i]).map(|i| Bound { value: (1.0 - lambda) * s[i] - lambda * running[i], index: i }),
        );

        while sel.indices.len() < m {
            if ws.cancelled() {
                break;
            }
            let step = sel.indices.len();
            let Some(top) = ws.heap.pop() else { break };
            let i = top.index;
            // Caps only tighten, so a candidate dropped here is out for good.
            if !allowed(input, params, &ws.group_taken, i) {
                continue;
            }
            if ws.filled[i] < step {
                let refresh = Refresh {
                    rows: emb.as_slice(),
                    inv_norm: emb.inv_norms(),
                    i,
                    picks: &sel.indices[ws.filled[i]..step],
                    max_sim: &mut ws.running[i],
                };
                Arch::new().dispatch(refresh);
                ws.filled[i] = step;
            }
            let fresh = Bound { value: (1.0 - lambda) * s[i] - lambda * ws.running[i], index: i };
            debug_assert!(fresh.value <= top.value + 1e-9, "lazy bound grew: max-similarity must not fall");
            if ws.heap.peek().is_some_and(|next| *next > fresh) {
                ws.heap.push(fresh);
                continue;
            }
            take(input, ws, &mut sel, i, fresh.value);
        }
        ws.check_cancelled()?;
        Ok(sel)
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

/// MMR without lazy bounds, for slates with a fairness floor: a step the floor restricts may
/// pass over a candidate the lazy heap would have dropped for good. Every candidate's running
/// max-similarity is brought up to date at every step (f64 cosines, O(N·d) per pick) and the
/// objective taken over the eligible ones, ties to the lower index.
fn eager(input: &RerankInput, params: &Params, ws: &mut Workspace) -> Selection {
    let emb = input.embeddings().expect("select checked for embeddings");
    let (n, lambda) = (input.len(), params.lambda());
    let m = params.k().min(n);
    let s = input.normalized();
    ws.reset_for(input, m);
    ws.running.clear();
    ws.running.resize(n, 0.0);
    let mut sel = Selection { indices: Vec::with_capacity(m), gains: Vec::with_capacity(m), exhausted_at: None };
    while sel.indices.len() < m {
        if ws.cancelled() {
            break;
        }
        let restrict = ws.must_protect(sel.indices.len());
        let mut best: Option<(f64, usize)> = None;
        for r in passes(restrict) {
            for i in 0..n {
                if !eligible(input, params, ws, i, r) {
                    continue;
                }
                let obj = (1.0 - lambda) * s[i] - lambda * ws.running[i];
                if best.is_none_or(|(b, _)| obj > b) {
                    best = Some((obj, i));
                }
            }
            if best.is_some() {
                break;
            }
        }
        let Some((obj, j)) = best else { break };
        take(input, ws, &mut sel, j, obj);
        // The max over an empty slate is 0; from the first pick on it is the true maximum.
        let first = sel.indices.len() == 1;
        for i in 0..n {
            let c = emb.cosine(i, j);
            ws.running[i] = if first { c } else { ws.running[i].max(c) };
        }
    }
    sel
}
