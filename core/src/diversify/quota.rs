//! `quota`: category interleaving toward a target share per category.

use super::{
    allowed, by_score, eligible, relevance_prefix, relevance_selection, take, Diversifier, KernelError, Workspace,
};
use crate::model::{Params, RerankInput, Selection};

/// Slack when comparing a category's count with its fractional quota.
const QUOTA_SLACK: f64 = 1e-12;

/// Deficit-based category interleave.
///
/// Each category `g` (candidates without one form one group) gets a target share
/// `t_g = (1 − λ)·r_g + λ·u`, where `r_g` is its share of the relevance top-k and `u = 1/G` the
/// uniform share over the `G` groups. At each slot `p` (1-based, counting only picks from groups
/// that can still contribute), a group is *due* when its count `c_g < t'_g · p`, with `t'` the
/// targets renormalised over those groups. The slot goes to the best-scoring next item among due
/// groups. Within a group, items always keep score order.
///
/// So `λ = 1` is round-robin by count with the strongest item first (counts of groups that still
/// have candidates differ by at most 1 at every prefix), `λ = 0` returns the relevance order, and
/// in between a category only gives up a slot when it is ahead of a quota that slides linearly from
/// its relevance share to the uniform share.
///
/// # Reference
/// A quota (proportional-representation) interleave in the spirit of the category-coverage
/// re-rankers surveyed by M. Kunaver and T. Požrl, "Diversity in recommender systems – A survey",
/// Knowledge-Based Systems 123, 2017. The target-share blend is our own design.
///
/// # Complexity
/// O(N + G·k log k) to bucket candidates and order each group's best k, then O(G) per slot:
/// O(N + G·k log k + k·G) time, O(N + G) extra memory.
///
/// # Invariants
/// Within a group, output order is score order; some group is always due (the targets sum to 1,
/// the counts to `p − 1`); output has no duplicates and at most `min(k, N)` items.
#[derive(Debug, Clone, Copy, Default)]
pub struct Quota;

impl Diversifier for Quota {
    fn name(&self) -> &'static str {
        "quota"
    }

    fn needs_embeddings(&self) -> bool {
        false
    }

    fn select(&self, input: &RerankInput, params: &Params, ws: &mut Workspace) -> Result<Selection, KernelError> {
        let lambda = params.lambda();
        if lambda == 0.0 {
            return Ok(relevance_selection(input, params, ws));
        }
        let (n, groups) = (input.len(), input.group_count());
        let m = params.k().min(n);
        let scores = input.scores();
        ws.reset_for(input, m);
        let mut sel = Selection { indices: Vec::with_capacity(m), gains: Vec::with_capacity(m), exhausted_at: None };
        if m == 0 {
            return Ok(sel);
        }

        // Relevance shares r_g of the top-m.
        let mut order = std::mem::take(&mut ws.order);
        relevance_prefix(scores, m, &mut order);
        let mut target = vec![0.0_f64; groups];
        for &i in &order {
            target[input.groups()[i] as usize] += 1.0 / m as f64;
        }
        let uniform = 1.0 / groups as f64;
        for t in &mut target {
            *t = (1.0 - lambda) * *t + lambda * uniform;
        }

        // Bucket candidates by group (counting sort), then keep each group's best m in score order.
        let mut start = vec![0usize; groups + 1];
        for &g in input.groups() {
            start[g as usize + 1] += 1;
        }
        for g in 0..groups {
            start[g + 1] += start[g];
        }
        order.clear();
        order.resize(n, 0);
        let mut fill = start.clone();
        for (i, &g) in input.groups().iter().enumerate() {
            order[fill[g as usize]] = i;
            fill[g as usize] += 1;
        }
        let mut end = vec![0usize; groups];
        for g in 0..groups {
            let bucket = &mut order[start[g]..start[g + 1]];
            let keep = bucket.len().min(m);
            if keep < bucket.len() {
                bucket.select_nth_unstable_by(keep - 1, |&a, &b| by_score(scores, a, b));
            }
            bucket[..keep].sort_unstable_by(|&a, &b| by_score(scores, a, b));
            end[g] = start[g] + keep;
        }
        // `head[g]` is the next unused position of group g's queue.
        let mut head = start[..groups].to_vec();

        while sel.indices.len() < m {
            // A step the fairness floor restricts takes the best protected candidate by score
            // (quota's own order within a group); the queues then skip what it took.
            if ws.must_protect(sel.indices.len()) {
                let protected = (0..n).filter(|&i| eligible(input, params, ws, i, true)).min_by(|&a, &b| by_score(scores, a, b));
                if let Some(i) = protected {
                    take(input, ws, &mut sel, i, input.normalized()[i]);
                    continue;
                }
            }
            for g in 0..groups {
                while head[g] < end[g] && ws.taken[order[head[g]]] {
                    head[g] += 1;
                }
            }
            // Groups that can still contribute: items left and under the cap.
            let live = |g: usize, head: &[usize]| {
                head[g] < end[g] && allowed(input, params, &ws.group_taken, order[head[g]])
            };
            let (mut total_target, mut placed) = (0.0, 0usize);
            for g in 0..groups {
                if live(g, &head) {
                    total_target += target[g];
                    placed += ws.group_taken[g];
                }
            }
            if total_target <= 0.0 {
                break;
            }
            let p = (placed + 1) as f64;
            let mut best_due: Option<usize> = None;
            let mut best_deficit: Option<(usize, f64)> = None;
            for g in 0..groups {
                if !live(g, &head) {
                    continue;
                }
                let deficit = target[g] / total_target * p - ws.group_taken[g] as f64;
                if deficit > QUOTA_SLACK
                    && best_due.is_none_or(|b| by_score(scores, order[head[g]], order[head[b]]).is_lt())
                {
                    best_due = Some(g);
                }
                if best_deficit.is_none_or(|(_, b)| deficit > b) {
                    best_deficit = Some((g, deficit));
                }
            }
            // Rounding can only make "no group due" look true when deficits are ~1e-12; then the
            // largest deficit decides.
            let Some(g) = best_due.or(best_deficit.map(|(g, _)| g)) else { break };
            let i = order[head[g]];
            head[g] += 1;
            take(input, ws, &mut sel, i, input.normalized()[i]);
        }
        ws.order = order;
        Ok(sel)
    }
}
