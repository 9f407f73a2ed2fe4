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

#[cfg(test)]
mod tests {
    use super::*;

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
