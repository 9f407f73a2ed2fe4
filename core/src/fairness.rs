//! Ranked group fairness: the minimum number of protected candidates every prefix of a slate
//! must hold, and the floor a slate is held to.
//!
//! # Reference
//! M. Zehlike, F. Bonchi, C. Castillo, S. Hajian, M. Megahed and R. Baeza-Yates, "FA*IR: A Fair
//! Top-k Ranking Algorithm", CIKM 2017: a prefix of length `t` passes the ranked group fairness
//! test when it holds at least `m(t)` protected items, `m(t)` the smallest `m` with
//! `BinomCDF(m; t, p) > α`, `p` the target share and `α` the significance. Deviation: no multiple
//! test adjustment of `α` (the paper's `α_c`); each prefix is tested at `α` itself, so the slate
//! as a whole fails the test more often than `α` for an unfair ranker. Callers who want the
//! adjusted test pass a smaller `α`.
//!
//! Every diversifier enforces the floor the same way: at position `t`, if the prefix so far holds
//! fewer than `m(t)` protected items and protected candidates remain, its own choice is restricted
//! to them; otherwise it chooses as usual. With `relevance` that is FA*IR's Algorithm 2. When the
//! protected candidates run out the floor is met as far as possible ([`shortfall`] says so).

use crate::model::RerankInput;

/// A validated fairness floor: which candidates are protected, the target share `p` and the
/// significance `α`.
#[derive(Debug, Clone, PartialEq)]
pub struct FairnessFloor {
    pub(crate) protected: Vec<bool>,
    pub(crate) share: f64,
    pub(crate) alpha: f64,
}

impl FairnessFloor {
    /// Whether each candidate belongs to the protected group.
    #[must_use]
    pub fn protected(&self) -> &[bool] {
        &self.protected
    }

    /// Target share `p` of protected items.
    #[must_use]
    pub fn share(&self) -> f64 {
        self.share
    }

    /// Significance `α` of each prefix's test.
    #[must_use]
    pub fn alpha(&self) -> f64 {
        self.alpha
    }

    /// `m(t)` for `t = 1..=k`, at index `t − 1` ([`minimum_protected`]).
    #[must_use]
    pub fn minimums(&self, k: usize) -> Vec<usize> {
        minimum_protected(k, self.share, self.alpha)
    }
}

/// `m(t)` for `t = 1..=k` (index `t − 1`): the smallest `m` with `BinomCDF(m; t, p) > α`.
///
/// # Complexity
/// O(k²) time (each `t` sums the binomial pmf up to `m(t) ≤ t`), O(k) memory; k ≤ 1000 here.
///
/// # Numerical notes
/// The pmf is summed in f64 from log terms, `ln C(t, i) + i·ln p + (t − i)·ln(1 − p)`, so
/// `(1 − p)^t` underflowing at large `t` costs no precision in the terms that matter.
#[must_use]
pub fn minimum_protected(k: usize, p: f64, alpha: f64) -> Vec<usize> {
    let (lp, lq) = (p.ln(), (1.0 - p).ln());
    (1..=k)
        .map(|t| {
            let mut ln_choose = 0.0_f64;
            let mut cdf = 0.0_f64;
            for m in 0..=t {
                if m > 0 {
                    ln_choose += ((t - m + 1) as f64).ln() - (m as f64).ln();
                }
                cdf += (ln_choose + m as f64 * lp + (t - m) as f64 * lq).exp();
                if cdf > alpha {
                    return m;
                }
            }
            t
        })
        .collect()
}

/// Whether `slate` misses the floor of `input`'s fairness at some prefix: `None` without a floor.
///
/// # Complexity
/// O(k²) for the table, O(k) for the scan.
#[must_use]
pub fn shortfall(input: &RerankInput, slate: &[usize]) -> Option<bool> {
    let floor = input.fairness()?;
    let minimums = floor.minimums(slate.len());
    let mut held = 0;
    let mut short = false;
    for (t, &i) in slate.iter().enumerate() {
        held += usize::from(floor.protected[i]);
        short |= held < minimums[t];
    }
    Some(short)
}

/// Share of protected items in `slate` (0 for an empty one): `None` without a floor.
#[must_use]
pub fn protected_share(input: &RerankInput, slate: &[usize]) -> Option<f64> {
    let floor = input.fairness()?;
    let held = slate.iter().filter(|&&i| floor.protected[i]).count();
    Some(if slate.is_empty() { 0.0 } else { held as f64 / slate.len() as f64 })
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The table for p = 0.5, α = 0.1 (scipy.stats.binom gives the same; the fixtures
    /// script checks more), and by hand: t = 4 needs 1, since P(X ≤ 0) = 1/16 ≤ 0.1 < 5/16.
    #[test]
    fn minimums_for_half_share_at_ten_percent() {
        assert_eq!(minimum_protected(12, 0.5, 0.1), [0, 0, 0, 1, 1, 1, 2, 2, 3, 3, 3, 4]);
        // Monotone, one step at a time, and never above t.
        let m = minimum_protected(1000, 0.9, 0.05);
        assert!(m.windows(2).all(|w| w[1] == w[0] || w[1] == w[0] + 1));
        assert!(m.iter().enumerate().all(|(t, &x)| x <= t + 1));
    }
}
