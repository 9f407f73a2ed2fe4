//! Replay metrics: how well a re-ranked slate serves the clicks a logged request received.
//!
//! Binary relevance: an item is relevant when the log says it was clicked. Each metric comes in
//! two forms, chosen by the caller through `relevant`, the size of the relevant set: the textbook
//! one, where every distinct clicked id of the logged line is relevant whether or not retrieval
//! offered it as a candidate, and the candidate-restricted one ([`reachable`]), relative to the
//! best any re-ranking of this candidate set could do. Aggregation over slates (means, intervals)
//! belongs to the caller.

/// recall@k: clicked items in the slate ÷ `relevant`, the number of relevant items (0 when
/// there are none).
///
/// Pass the distinct clicked ids of the line for the standard recall, or the clicked
/// candidates ([`reachable`]) for the candidate-restricted variant.
#[must_use]
pub fn recall(slate: &[usize], clicked: &[bool], relevant: usize) -> f64 {
    if relevant == 0 {
        return 0.0;
    }
    slate.iter().filter(|&&i| clicked[i]).count() as f64 / relevant as f64
}

/// The clicked items among the candidates: the relevant set of the `_reachable` variants.
#[must_use]
pub fn reachable(clicked: &[bool]) -> usize {
    clicked.iter().filter(|&&c| c).count()
}

/// nDCG@k with binary gains and a log2 discount, over `relevant` relevant items.
///
/// # Reference
/// K. Järvelin and J. Kekäläinen, "Cumulated gain-based evaluation of IR techniques", ACM TOIS
/// 20(4), 2002: `DCG@k = Σ_{r=1..k} rel_r / log2(r + 1)`, normalised by the DCG of the ideal
/// ranking, which puts *every* relevant item first: `min(relevant, k)` hits. With `relevant` =
/// the line's distinct clicked ids this is the textbook nDCG, which counts a clicked item that
/// retrieval never offered as a miss of every re-ranker alike; with `relevant` =
/// [`reachable`]`(clicked)` it is the candidate-restricted variant (`ndcg_reachable`).
#[must_use]
pub fn ndcg(slate: &[usize], clicked: &[bool], relevant: usize, k: usize) -> f64 {
    let discount = |rank: usize| 1.0 / ((rank + 1) as f64).log2();
    let dcg: f64 =
        slate.iter().take(k).enumerate().filter(|(_, &i)| clicked[i]).map(|(r, _)| discount(r + 1)).sum();
    let ideal_hits = relevant.min(k);
    let idcg: f64 = (1..=ideal_hits).map(discount).sum();
    // An empty f64 sum is -0.0; report +0 for a slate with no hits.
    if idcg == 0.0 {
        0.0
    } else {
        dcg / idcg + 0.0
    }
}

/// Position-debiased clicks in the top k (inverse propensity scoring under the position-based
/// model): Σ over clicked items that the slate puts at rank `r_new ≤ k` *and* the logged slate
/// showed at rank `r_log` of `min((r_log / r_new)^eta, clip)`.
///
/// # Reference
/// T. Joachims, A. Swaminathan and T. Schnabel, "Unbiased learning-to-rank with biased feedback",
/// WSDM 2017: a click at rank r is observed with examination propensity `(1/r)^η`; reweighting a
/// logged click by the ratio of the new to the old propensity estimates the clicks the new
/// ranking would get. Clipping the weight (Ionides 2008, common practice) trades a little bias
/// for bounded variance. For the logged ranking itself every weight is 1, so the value is the
/// number of clicks in its top k.
///
/// Unbiased only under the position-based model with the right `eta`, and only for items the
/// logging policy showed: a clicked item without a logged rank contributes nothing.
///
/// `served_rank[i]` is candidate `i`'s 1-based rank in the logged slate, 0 when not shown.
#[must_use]
pub fn ips_clicks(
    slate: &[usize],
    clicked: &[bool],
    served_rank: &[u32],
    k: usize,
    eta: f64,
    clip: f64,
) -> f64 {
    slate
        .iter()
        .take(k)
        .enumerate()
        .filter(|&(_, &i)| clicked[i] && served_rank[i] > 0)
        .map(|(r, &i)| (f64::from(served_rank[i]) / (r + 1) as f64).powf(eta).min(clip))
        .sum()
}

/// α-nDCG@k with categories as subtopics: rewards a slate that covers the clicked items'
/// categories early, discounting each further clicked item of a category already covered by
/// `(1 − α)` per earlier one.
///
/// # Reference
/// C. L. A. Clarke et al., "Novelty and diversity in information retrieval evaluation", SIGIR
/// 2008. Each candidate covers one subtopic, its category: `groups[i]`, as
/// [`crate::RerankInput::groups`] numbers them (candidates without a category share one);
/// only clicked candidates are relevant. Gain at rank r: `(1 − α)^c`, with c the clicked items
/// of the same category ranked above it; α-DCG@k = Σ gain / log2(r + 1). The ideal is built
/// greedily over the clicked candidates (the paper's approximation; exact ideal is NP-hard in
/// general, and with one subtopic per item the greedy order is optimal). 0 when no candidate
/// was clicked.
///
/// Cost: O(k · c) for the ideal over c clicked candidates, plus O(k) for the slate.
#[must_use]
pub fn alpha_ndcg(slate: &[usize], clicked: &[bool], groups: &[u32], k: usize, alpha: f64) -> f64 {
    let discount = |rank: usize| 1.0 / ((rank + 1) as f64).log2();
    // Category counts seen so far.
    let key = |i: usize| groups[i];
    let mut seen: Vec<(u32, i32)> = Vec::new();
    let gain_of = |seen: &mut Vec<(u32, i32)>, c: u32| -> f64 {
        match seen.iter_mut().find(|(k, _)| *k == c) {
            Some((_, n)) => {
                *n += 1;
                (1.0 - alpha).powi(*n - 1)
            }
            None => {
                seen.push((c, 1));
                1.0
            }
        }
    };
    let dcg: f64 = slate
        .iter()
        .take(k)
        .enumerate()
        .filter(|&(_, &i)| clicked[i])
        .map(|(r, &i)| gain_of(&mut seen, key(i)) * discount(r + 1))
        .sum();
    // Ideal: clicked candidates grouped by category; greedily, each rank takes the category
    // with the fewest taken so far (the largest gain), ties to the first seen.
    let mut groups: Vec<(u32, usize)> = Vec::new();
    for (i, _) in clicked.iter().enumerate().filter(|(_, &c)| c) {
        let c = key(i);
        match groups.iter_mut().find(|(g, _)| *g == c) {
            Some((_, n)) => *n += 1,
            None => groups.push((c, 1)),
        }
    }
    let total: usize = groups.iter().map(|g| g.1).sum();
    let mut taken = vec![0_i32; groups.len()];
    let mut idcg = 0.0;
    for r in 1..=k.min(total) {
        let best = (0..groups.len())
            .filter(|&g| (taken[g] as usize) < groups[g].1)
            .min_by_key(|&g| taken[g])
            .unwrap_or(0);
        idcg += (1.0 - alpha).powi(taken[best]) * discount(r);
        taken[best] += 1;
    }
    if idcg == 0.0 {
        0.0
    } else {
        dcg / idcg + 0.0
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Worked by hand from Clarke et al. (2008), α = 0.5, categories as subtopics.
    #[test]
    fn alpha_ndcg_worked_example() {
        // Candidates: 0 drama (clicked), 1 drama (clicked), 2 comedy (clicked), 3 comedy.
        let clicked = [true, true, true, false];
        let cat = [0_u32, 0, 1, 1];
        // Slate [0, 1, 3]: gains 1, (1 − α) = 0.5, 0 → α-DCG = 1/log2 2 + 0.5/log2 3.
        // Ideal (greedy): drama, comedy, drama → 1 + 1/log2 3 + 0.5/log2 4 = 1 + 0.6309 + 0.25.
        let dcg = 1.0 + 0.5 / 3f64.log2();
        let idcg = 1.0 + 1.0 / 3f64.log2() + 0.5 / 2.0;
        let got = alpha_ndcg(&[0, 1, 3], &clicked, &cat, 3, 0.5);
        assert!((got - dcg / idcg).abs() < 1e-12, "{got}");
        assert!((got - 0.699_369_5).abs() < 1e-6, "{got}, hand arithmetic: 1.315465 / 1.880930");
        // The ideal order scores 1; an order that repeats drama first scores less than one that
        // covers both categories first, though both hold the same clicked items.
        assert!((alpha_ndcg(&[0, 2, 1], &clicked, &cat, 3, 0.5) - 1.0).abs() < 1e-12);
        assert!(alpha_ndcg(&[0, 1, 2], &clicked, &cat, 3, 0.5) < 1.0);
        // α = 0 and one category: plain nDCG with binary gains over the clicked candidates.
        let one = [0_u32; 4];
        let plain = ndcg(&[1, 0, 3], &clicked, 3, 3);
        assert!((alpha_ndcg(&[1, 0, 3], &clicked, &one, 3, 0.0) - plain).abs() < 1e-12);
        assert_eq!(alpha_ndcg(&[3], &[false; 4], &cat, 1, 0.5).to_bits(), 0.0_f64.to_bits());
    }

    /// The position-based model's weights (Joachims et al. 2017), by hand.
    #[test]
    fn ips_clicks_by_hand() {
        // Candidates 0..4; logged slate showed 2, 0, 1 (ranks 1, 2, 3); clicks on 0 and 1.
        let clicked = [true, true, false, false];
        let served = [2_u32, 3, 1, 0];
        // The logged order itself: every weight 1, so 2 clicks in the top 3.
        assert!((ips_clicks(&[2, 0, 1], &clicked, &served, 3, 1.0, 10.0) - 2.0).abs() < 1e-12);
        // Moving 1 from rank 3 to rank 1: weight 3/1; 0 from 2 to 2: 1. Sum 4.
        assert!((ips_clicks(&[1, 0, 2], &clicked, &served, 3, 1.0, 10.0) - 4.0).abs() < 1e-12);
        // η = 2 and clip 5: (3/1)^2 = 9 clipped to 5, plus 1.
        assert!((ips_clicks(&[1, 0, 2], &clicked, &served, 3, 2.0, 5.0) - 6.0).abs() < 1e-12);
        // A clicked item past k counts nothing; an unshown candidate counts nothing.
        assert!((ips_clicks(&[3, 2, 1], &clicked, &served, 2, 1.0, 10.0) - 0.0).abs() < 1e-12);
        // Demoting 0 from rank 2 to rank 4: weight 2/4.
        assert!(
            (ips_clicks(&[3, 2, 1, 0], &[true, false, false, false], &served, 4, 1.0, 10.0) - 0.5).abs()
                < 1e-12
        );
    }

    /// Hand-computed from the definitions (Järvelin & Kekäläinen 2002, binary gains).
    #[test]
    fn ndcg_and_recall_small_cases() {
        // Candidates 0..5, clicked {1, 3}. Slate [1, 0, 3]: DCG = 1/log2 2 + 1/log2 4 = 1.5;
        // ideal [1, 3, ..]: 1 + 1/log2 3 = 1.6309297535714575; nDCG = 0.9197207891481876.
        let clicked = [false, true, false, true, false];
        let n = ndcg(&[1, 0, 3], &clicked, 2, 3);
        assert!((n - 1.5 / (1.0 + 1.0 / 3f64.log2())).abs() < 1e-12, "{n}");
        assert!((n - 0.919_720_789_148_187_6).abs() < 1e-12, "value from CPython");
        assert!((ndcg(&[1, 3, 0], &clicked, 2, 3) - 1.0).abs() < 1e-12, "ideal order");
        assert_eq!(ndcg(&[0, 2, 4], &clicked, 2, 3).to_bits(), 0.0_f64.to_bits());
        // k = 1: only rank 1 counts; the ideal has one hit.
        assert!((ndcg(&[3], &clicked, 2, 1) - 1.0).abs() < 1e-12);
        assert!((recall(&[1, 0, 3], &clicked, 2) - 1.0).abs() < 1e-12);
        assert!((recall(&[1, 0], &clicked, 2) - 0.5).abs() < 1e-12);
        assert_eq!(recall(&[0], &[false, false], 0).to_bits(), 0.0_f64.to_bits());
        // A third clicked item that was never a candidate: the ideal ranks all three, so the
        // ideal order of the candidates no longer reaches 1. IDCG@3 = 1 + 1/log2 3 + 1/2.
        let n = ndcg(&[1, 3, 0], &clicked, 3, 3);
        assert!((n - (1.0 + 1.0 / 3f64.log2()) / (1.5 + 1.0 / 3f64.log2())).abs() < 1e-12, "{n}");
        assert!((recall(&[1, 3, 0], &clicked, 3) - 2.0 / 3.0).abs() < 1e-12);
        assert_eq!(reachable(&clicked), 2);
    }
}
