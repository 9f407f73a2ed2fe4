//! Streaming Poisson bootstrap: confidence intervals for means over a stream too large to hold,
//! computed in one pass, mergeable across partitions and independent of their order.
//!
//! # Reference
//! N. Chamandy, O. Muralidharan, A. Najmi and S. Naidu, "Estimating uncertainty for massive data
//! streams", Google technical report, 2012. Each observation gets, for replicate b, a weight
//! `w_b ~ Poisson(1)` (the large-n limit of the multinomial resampling counts of Efron's
//! bootstrap); replicate b's mean is `Σ w_b·x / Σ w_b`. Drawing `w_b` from a hash of the
//! observation's key and b (rather than from a random stream) makes the weights a function of
//! the data: the same key gets the same weights in any order, on any machine, in any partition,
//! so partial sums merge exactly and every replay of the same log gives the same interval.
//!
//! A *paired* interval for the difference of two means over the same observations uses the
//! same weights for both, so the shared per-observation noise cancels.
//!
//! Intervals are percentile intervals: the 2.5th and 97.5th percentiles of the B replicate
//! statistics (linear interpolation between order statistics, numpy's default `linear` method).
//!
//! Cost: B hashes per observation for the weights, B multiply-adds per observation and
//! statistic; memory B × statistics per accumulator.

/// Replicates per interval.
pub const REPLICATES: usize = 1000;

/// The key of an observation with an id (a logged request id): FNV-1a 64 of its bytes.
#[must_use]
pub fn key_of_id(id: &str) -> u64 {
    let mut h: u64 = 0xcbf2_9ce4_8422_2325;
    for &b in id.as_bytes() {
        h ^= u64::from(b);
        h = h.wrapping_mul(0x0100_0000_01b3);
    }
    h
}

/// The key of an observation without an id: its line number, kept apart from id keys.
#[must_use]
pub fn key_of_line(line: u64) -> u64 {
    key_of_id(&format!("line:{line}"))
}

/// SplitMix64's finaliser (Steele, Lea & Flood, OOPSLA 2014): a bijective 64-bit mix.
#[inline]
fn mix64(mut z: u64) -> u64 {
    z = (z ^ (z >> 30)).wrapping_mul(0xbf58_476d_1ce4_e5b9);
    z = (z ^ (z >> 27)).wrapping_mul(0x94d0_49bb_1331_11eb);
    z ^ (z >> 31)
}

/// Cumulative Poisson(1) probabilities P(X ≤ x) for x = 0..=11 as fractions of 2^53, from the
/// series e^-1 Σ_{j≤x} 1/j!; beyond 11 the tail is below 2^-33 and folds into 12.
fn poisson1_cdf() -> [u64; 12] {
    let (mut term, mut cdf) = ((-1.0_f64).exp(), 0.0);
    let mut table = [0_u64; 12];
    for (x, t) in table.iter_mut().enumerate() {
        cdf += term;
        term /= (x + 1) as f64;
        *t = (cdf * (1u64 << 53) as f64) as u64;
    }
    table
}

/// Fills `out[b]` with replicate b's Poisson(1) weight of the observation keyed `key`.
pub fn poisson_weights(key: u64, out: &mut [u8]) {
    let cdf = poisson1_cdf();
    let seed = mix64(key ^ 0x6a09_e667_f3bc_c908);
    for (b, w) in out.iter_mut().enumerate() {
        let u = mix64(seed.wrapping_add((b as u64 + 1).wrapping_mul(0x9e37_79b9_7f4a_7c15))) >> 11;
        *w = cdf.iter().take_while(|&&c| u >= c).count() as u8;
    }
}

/// Per-replicate weighted sums of some statistics over a stream: `weights[b] = Σ w_b` and
/// `sums[s][b] = Σ w_b · x_s`.
#[derive(Debug, Clone, PartialEq)]
pub struct Replicates {
    /// Σ w_b per replicate.
    pub weights: Vec<f64>,
    /// Σ w_b·x per statistic and replicate.
    pub sums: Vec<Vec<f64>>,
}

impl Replicates {
    /// Empty sums for `statistics` statistics.
    #[must_use]
    pub fn new(statistics: usize) -> Self {
        Self { weights: vec![0.0; REPLICATES], sums: vec![vec![0.0; REPLICATES]; statistics] }
    }

    /// Adds one observation with its weights and its value of each statistic.
    pub fn add(&mut self, weights: &[u8], values: &[f64]) {
        for (acc, &w) in self.weights.iter_mut().zip(weights) {
            *acc += f64::from(w);
        }
        for (sums, &x) in self.sums.iter_mut().zip(values) {
            for (acc, &w) in sums.iter_mut().zip(weights) {
                *acc += f64::from(w) * x;
            }
        }
    }

    /// Adds another partition's sums (same statistics).
    pub fn merge(&mut self, other: &Self) {
        for (a, b) in self.weights.iter_mut().zip(&other.weights) {
            *a += b;
        }
        for (sa, sb) in self.sums.iter_mut().zip(&other.sums) {
            for (a, b) in sa.iter_mut().zip(sb) {
                *a += b;
            }
        }
    }

    /// The replicate means of `Σ_s c_s · x_s` for a linear combination of statistics (one
    /// statistic: `[(s, 1.0)]`); replicates with no weight are left out.
    #[must_use]
    pub fn means_of(&self, combination: &[(usize, f64)]) -> Vec<f64> {
        (0..self.weights.len())
            .filter(|&b| self.weights[b] > 0.0)
            .map(|b| combination.iter().map(|&(s, c)| c * self.sums[s][b]).sum::<f64>() / self.weights[b])
            .collect()
    }
}

/// The paired replicate means of `a − factor · b` for statistic `sa` of `x` and `sb` of `y`,
/// two accumulators over the same observations with the same weights.
#[must_use]
pub fn paired_means(x: &Replicates, sa: usize, y: &Replicates, sb: usize, factor: f64) -> Vec<f64> {
    (0..x.weights.len())
        .filter(|&b| x.weights[b] > 0.0)
        .map(|b| (x.sums[sa][b] - factor * y.sums[sb][b]) / x.weights[b])
        .collect()
}

/// The central 95 % percentile interval of replicate statistics (NaN, NaN when empty).
#[must_use]
pub fn interval95(mut values: Vec<f64>) -> (f64, f64) {
    if values.is_empty() {
        return (f64::NAN, f64::NAN);
    }
    values.sort_by(f64::total_cmp);
    (quantile_sorted(&values, 0.025), quantile_sorted(&values, 0.975))
}

/// numpy's default (`linear`, Hyndman & Fan type 7) quantile of sorted values.
#[must_use]
pub fn quantile_sorted(sorted: &[f64], q: f64) -> f64 {
    let h = (sorted.len() - 1) as f64 * q;
    let (lo, frac) = (h.floor() as usize, h - h.floor());
    let hi = (lo + 1).min(sorted.len() - 1);
    sorted[lo] + frac * (sorted[hi] - sorted[lo])
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_cdf_table_matches_scipy() {
        // scipy.stats.poisson(1).cdf([0, 1, 2, 3]) = 0.36787944, 0.73575888, 0.91969860,
        // 0.98101184 (the series e^-1 Σ 1/j!, evaluated with CPython's math module).
        let t = poisson1_cdf();
        let p = |x: usize| t[x] as f64 / (1u64 << 53) as f64;
        for (x, want) in [(0, 0.367_879_44), (1, 0.735_758_88), (2, 0.919_698_60), (3, 0.981_011_84)] {
            assert!((p(x) - want).abs() < 1e-8, "{x}: {}", p(x));
        }
        assert!(t.windows(2).all(|w| w[0] < w[1]));
    }

    #[test]
    fn weights_have_poisson1_moments_and_depend_only_on_the_key() {
        let mut w = vec![0_u8; REPLICATES];
        let (mut n, mut sum, mut sq, mut zeros) = (0.0, 0.0, 0.0, 0.0);
        for key in 0..200_u64 {
            poisson_weights(key_of_line(key), &mut w);
            for &x in &w {
                n += 1.0;
                sum += f64::from(x);
                sq += f64::from(x) * f64::from(x);
                zeros += f64::from(u8::from(x == 0));
            }
        }
        let mean = sum / n;
        let var = sq / n - mean * mean;
        // Poisson(1): mean 1, variance 1, P(0) = e^-1 = 0.3679; n = 200 000, 5 sd margins.
        assert!((mean - 1.0).abs() < 0.012, "{mean}");
        assert!((var - 1.0).abs() < 0.02, "{var}");
        assert!((zeros / n - (-1.0_f64).exp()).abs() < 0.006, "{}", zeros / n);
        let mut again = vec![0_u8; REPLICATES];
        poisson_weights(key_of_id("r-42"), &mut w);
        poisson_weights(key_of_id("r-42"), &mut again);
        assert_eq!(w, again);
        poisson_weights(key_of_id("r-43"), &mut again);
        assert_ne!(w, again);
    }

    /// The bootstrap interval of a mean matches the normal-theory interval mean ± 1.96·sd/√n
    /// (textbook; for a mean of 2 000 draws the two agree closely), and sums merge exactly.
    #[test]
    fn interval_of_a_mean_matches_normal_theory_and_merges() {
        let n = 2000;
        let xs: Vec<f64> = (0..n).map(|i| ((i * 7919) % 1000) as f64 / 1000.0).collect();
        let mean = xs.iter().sum::<f64>() / n as f64;
        let sd = (xs.iter().map(|x| (x - mean).powi(2)).sum::<f64>() / (n - 1) as f64).sqrt();
        let half = 1.96 * sd / (n as f64).sqrt();
        let mut all = Replicates::new(1);
        let (mut a, mut b) = (Replicates::new(1), Replicates::new(1));
        let mut w = vec![0_u8; REPLICATES];
        for (i, &x) in xs.iter().enumerate() {
            poisson_weights(key_of_line(i as u64), &mut w);
            all.add(&w, &[x]);
            if i % 3 == 0 {
                a.add(&w, &[x])
            } else {
                b.add(&w, &[x])
            }
        }
        b.merge(&a);
        // Merging in another order gives the same sums up to rounding.
        for (p, q) in all.sums[0].iter().zip(&b.sums[0]) {
            assert!((p - q).abs() < 1e-9);
        }
        let (lo, hi) = interval95(all.means_of(&[(0, 1.0)]));
        assert!(lo < mean && mean < hi);
        assert!(((hi - lo) / 2.0 - half).abs() < 0.15 * half, "bootstrap {lo}..{hi}, normal ±{half}");
        // A paired difference of a statistic with itself is exactly 0 in every replicate.
        assert!(paired_means(&all, 0, &all, 0, 1.0).iter().all(|&d| d == 0.0));
    }

    #[test]
    fn quantiles_follow_numpy_linear() {
        // numpy.quantile([1, 2, 3, 4], [0.025, 0.975]) = [1.075, 3.925] (type 7; by hand:
        // h = 3q, 0.075 and 2.925).
        let v = [1.0, 2.0, 3.0, 4.0];
        assert!((quantile_sorted(&v, 0.025) - 1.075).abs() < 1e-12);
        assert!((quantile_sorted(&v, 0.975) - 3.925).abs() < 1e-12);
        assert!(interval95(Vec::new()).0.is_nan());
    }
}
