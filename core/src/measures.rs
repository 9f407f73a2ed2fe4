//! Diversity and exposure measures of slates: used in responses, gauges, shadow comparisons and
//! offline replay. Pure functions over indices into a validated [`RerankInput`].

use crate::model::RerankInput;

/// Shannon entropy, in bits, of the category distribution of `slate`.
///
/// `H = −Σ_g p_g log2 p_g` with `p_g` the share of slate items in group `g` (a missing category
/// is one group). 0 for an empty slate or one group; `log2(G)` when `G` groups are equally
/// represented.
///
/// # Reference
/// C. E. Shannon, "A Mathematical Theory of Communication", Bell System Technical Journal, 1948.
///
/// # Complexity
/// O(|slate| + G) time, O(G) memory.
#[must_use]
pub fn category_entropy_bits(input: &RerankInput, slate: &[usize]) -> f64 {
    let mut counts = vec![0u32; input.group_count()];
    for &i in slate {
        counts[input.groups()[i] as usize] += 1;
    }
    entropy_bits(&counts)
}

/// Shannon entropy in bits of a histogram (zero bins are skipped).
#[must_use]
pub fn entropy_bits(counts: &[u32]) -> f64 {
    let total: f64 = counts.iter().map(|&c| f64::from(c)).sum();
    if total <= 0.0 {
        return 0.0;
    }
    let h: f64 = counts
        .iter()
        .filter(|&&c| c > 0)
        .map(|&c| {
            let p = f64::from(c) / total;
            -p * p.log2()
        })
        .sum();
    // A single bin gives -1·log2(1) = -0.0; report +0.
    h + 0.0
}

/// Number of distinct groups in `slate` (a missing category counts as one group).
#[must_use]
pub fn distinct_categories(input: &RerankInput, slate: &[usize]) -> usize {
    let mut seen = vec![false; input.group_count()];
    slate.iter().filter(|&&i| !std::mem::replace(&mut seen[input.groups()[i] as usize], true)).count()
}

/// Intra-list distance: mean over unordered pairs of `1 − cos(i, j)`.
///
/// 0 for fewer than two items; `None` when the slate has no embeddings.
///
/// # Reference
/// B. Smyth and P. McClave, "Similarity vs. Diversity", ICCBR 2001 (average pairwise
/// dissimilarity); C.-N. Ziegler et al., "Improving Recommendation Lists Through Topic
/// Diversification", WWW 2005 (intra-list similarity).
///
/// # Complexity
/// O(|slate|·d) time and one d-length buffer, not the O(|slate|²·d) of the pairwise sum: for
/// unit vectors u_i, Σ_{i<j} cos(i, j) = (‖Σ u_i‖² − Σ ‖u_i‖²) / 2. At the largest allowed
/// request (k = 1000, d = 4096) that is 4 M multiply-adds instead of 2 G.
///
/// # Numerical notes
/// Rows are rescaled by their exact f64 inverse norms and summed in f64. The identity subtracts
/// two sums of size about |slate|², so the result carries an absolute error of about
/// |slate|²·1e-16 on the pair sum, i.e. ~1e-16 relative on the mean; the unit tests hold it to
/// the pairwise brute force within 1e-12.
#[must_use]
pub fn intra_list_distance(input: &RerankInput, slate: &[usize]) -> Option<f64> {
    let emb = input.embeddings()?;
    if slate.len() < 2 {
        return Some(0.0);
    }
    let mut sum = vec![0.0_f64; emb.dim()];
    let mut self_dots = 0.0;
    for &i in slate {
        let inv = emb.inv_norms()[i];
        let mut sq = 0.0;
        for (s, &x) in sum.iter_mut().zip(emb.row(i)) {
            let u = f64::from(x) * inv;
            *s += u;
            sq += u * u;
        }
        self_dots += sq;
    }
    let norm2: f64 = sum.iter().map(|s| s * s).sum();
    let pair_sims = (norm2 - self_dots) / 2.0;
    let pairs = (slate.len() * (slate.len() - 1) / 2) as f64;
    Some(1.0 - pair_sims / pairs)
}

/// Item coverage: distinct items exposed ÷ distinct items offered (0 when nothing was offered).
#[must_use]
pub fn coverage(exposed_distinct: usize, offered_distinct: usize) -> f64 {
    if offered_distinct == 0 {
        0.0
    } else {
        exposed_distinct as f64 / offered_distinct as f64
    }
}

/// Gini coefficient of exposure counts, one entry per offered item (zeros included).
///
/// With `x` sorted ascending and 1-based ranks `i`:
/// `G = Σ_i (2i − n − 1)·x_i / (n · Σ_i x_i)`.
/// 0 when exposure is uniform, `(n − 1)/n` when one of `n` items gets all of it; 0 for an empty
/// or all-zero input.
///
/// # Reference
/// The sorted-rank form of the Gini mean-difference ratio, as in A. Sen, "On Economic Inequality",
/// 1973; used for recommendation exposure by D. Fleder and K. Hosanagar, "Blockbuster Culture's
/// Next Rise or Fall", Management Science 55(5), 2009.
///
/// # Complexity
/// O(n log n) time (a sort of a copy), O(n) memory.
#[must_use]
pub fn gini(exposure: &[u64]) -> f64 {
    let n = exposure.len();
    let total: f64 = exposure.iter().map(|&x| x as f64).sum();
    if n == 0 || total <= 0.0 {
        return 0.0;
    }
    let mut sorted = exposure.to_vec();
    sorted.sort_unstable();
    let weighted: f64 =
        sorted.iter().enumerate().map(|(r, &x)| (2.0 * (r as f64 + 1.0) - n as f64 - 1.0) * x as f64).sum();
    weighted / (n as f64 * total)
}

/// Rank-biased overlap persistence used for every comparison.
pub const RBO_P: f64 = 0.9;

/// How one slate (a shadow's) differs from another of the same request (the primary).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Comparison {
    /// `|A ∩ B| / max(|A|, |B|)`: the share of the slate both agree on (k when both are full).
    pub overlap: f64,
    /// Extrapolated rank-biased overlap at `p = 0.9` ([`rbo_ext`]).
    pub rbo: f64,
    /// Category entropy of the shadow slate minus the primary's, in bits.
    pub entropy_delta: f64,
    /// Intra-list distance of the shadow minus the primary; `None` without embeddings.
    pub ild_delta: Option<f64>,
    /// Σ normalised score of the shadow slate ÷ Σ of the primary; `None` when the latter is 0.
    pub relevance_retained: Option<f64>,
}

/// Extrapolated rank-biased overlap of two rankings of equal length.
///
/// # Reference
/// W. Webber, A. Moffat and J. Zobel, "A similarity measure for indefinite rankings", ACM
/// Transactions on Information Systems 28(4), 2010, eq. 32 (RBO_ext with equal evaluation
/// depths): `RBO_ext = X_k/k · p^k + (1 − p)/p · Σ_{d=1..k} X_d/d · p^d`, where `X_d` is the size of
/// the overlap of the two depth-d prefixes. Identical lists give 1, disjoint lists 0.
/// Lists of different lengths are compared on their common depth `k = min(|a|, |b|)`; two empty
/// lists give 1.
///
/// # Complexity
/// O(k²) time with no allocation; k ≤ 1000 here, so at most a million comparisons.
#[must_use]
pub fn rbo_ext(a: &[usize], b: &[usize], p: f64) -> f64 {
    let k = a.len().min(b.len());
    if k == 0 {
        return 1.0;
    }
    let (mut x, mut weight, mut sum) = (0_usize, 1.0_f64, 0.0_f64);
    for d in 1..=k {
        // X_d = X_{d−1} + [a_d ∈ b_{1..d}] + [b_d ∈ a_{1..d}] − [a_d = b_d].
        let (ad, bd) = (a[d - 1], b[d - 1]);
        if ad == bd {
            x += 1;
        } else {
            x += usize::from(b[..d].contains(&ad)) + usize::from(a[..d].contains(&bd));
        }
        weight *= p;
        sum += x as f64 / d as f64 * weight;
    }
    x as f64 / k as f64 * weight + (1.0 - p) / p * sum
}

/// Compares two slates of one request (`primary` and `shadow`, candidate indices in slate order)
/// on the same validated input: overlap, rank-biased overlap at [`RBO_P`], and the differences
/// in category entropy, intra-list distance and normalised score.
///
/// # Complexity
/// O(k²) for the overlap and RBO, O(k²·d) for the intra-list distances.
#[must_use]
pub fn compare(input: &RerankInput, primary: &[usize], shadow: &[usize]) -> Comparison {
    let (a, b) = (primary, shadow);
    let longest = a.len().max(b.len());
    let common = a.iter().filter(|i| b.contains(i)).count();
    let overlap = if longest == 0 { 1.0 } else { common as f64 / longest as f64 };
    let score = |s: &[usize]| s.iter().map(|&i| input.normalized()[i]).sum::<f64>();
    let primary_score = score(a);
    Comparison {
        overlap,
        rbo: rbo_ext(a, b, RBO_P),
        entropy_delta: category_entropy_bits(input, b) - category_entropy_bits(input, a),
        ild_delta: intra_list_distance(input, b).zip(intra_list_distance(input, a)).map(|(s, p)| s - p),
        relevance_retained: (primary_score > 0.0).then(|| score(b) / primary_score),
    }
}

/// Share of the profile mixed into a slate's category distribution before the divergence is
/// taken, so it stays finite: `q̃ = (1 − α)·q + α·p` with Steck's `α = 0.01`.
pub const CALIBRATION_ALPHA: f64 = 0.01;

/// Miscalibration of a slate: `KL(p ‖ q̃)` in nats, `p` the input's profile, `q(g)` the share of
/// group `g` in the slate (candidates without a category form one group), `q̃ = 0.99·q + 0.01·p`,
/// terms with `p_g = 0` counting 0. `None` without a profile; an empty slate has `q = 0`.
///
/// # Reference
/// H. Steck, "Calibrated Recommendations", RecSys 2018, Eq. (2) with α = 0.01.
///
/// # Complexity
/// O(k + G + P).
#[must_use]
pub fn miscalibration(input: &RerankInput, slate: &[usize]) -> Option<f64> {
    let profile = input.profile()?;
    let mut counts = vec![0_usize; input.group_count()];
    for &i in slate {
        counts[input.groups()[i] as usize] += 1;
    }
    let total = slate.len().max(1) as f64;
    let term = |p: f64, q: f64| {
        if p > 0.0 {
            p * (p / ((1.0 - CALIBRATION_ALPHA) * q + CALIBRATION_ALPHA * p)).ln()
        } else {
            0.0
        }
    };
    let present: f64 = profile.by_group().iter().zip(&counts).map(|(&p, &c)| term(p, c as f64 / total)).sum();
    let absent: f64 = profile.absent().iter().map(|&p| term(p, 0.0)).sum();
    Some(present + absent)
}

#[cfg(test)]
mod tests {
    use super::*;

    // Known values are from the definitions (common practice); the scipy-generated fixtures in
    // tests/fixtures cover the rest.
    fn slate_of(rows: &[Vec<f32>]) -> RerankInput {
        let cands = rows
            .iter()
            .enumerate()
            .map(|(i, e)| crate::CandidateInput {
                id: i.to_string(),
                score: 1.0,
                category: None,
                embedding: Some(e.clone()),
            })
            .collect();
        RerankInput::new(cands, crate::ScoreTransform::MinMax, true, &crate::Limits::default()).unwrap()
    }

    /// The pairwise definition, O(k²·d): the brute force the fast identity must match.
    fn ild_pairwise(input: &RerankInput, slate: &[usize]) -> f64 {
        let emb = input.embeddings().unwrap();
        let mut total = 0.0;
        for (a, &i) in slate.iter().enumerate() {
            for &j in &slate[a + 1..] {
                total += 1.0 - emb.cosine(i, j);
            }
        }
        total / (slate.len() * (slate.len() - 1) / 2) as f64
    }

    #[test]
    fn ild_worked_cases_and_pairwise_brute_force() {
        // Orthogonal pair: distance 1; identical pair: 0; opposite pair: 2 (by the definition).
        let input = slate_of(&[vec![1.0, 0.0], vec![0.0, 3.0], vec![2.0, 0.0], vec![-1.0, 0.0]]);
        assert!((intra_list_distance(&input, &[0, 1]).unwrap() - 1.0).abs() < 1e-12);
        assert!(intra_list_distance(&input, &[0, 2]).unwrap().abs() < 1e-12);
        assert!((intra_list_distance(&input, &[0, 3]).unwrap() - 2.0).abs() < 1e-12);
        assert_eq!(intra_list_distance(&input, &[1]), Some(0.0));

        let mut state = 0x9e37_79b9_7f4a_7c15_u64;
        let mut next = || {
            state ^= state << 13;
            state ^= state >> 7;
            state ^= state << 17;
            (state >> 40) as f32 / (1u64 << 24) as f32 - 0.5
        };
        for (n, d) in [(2, 1), (7, 3), (50, 16), (200, 64)] {
            let rows: Vec<Vec<f32>> = (0..n).map(|_| (0..d).map(|_| next()).collect()).collect();
            let input = slate_of(&rows);
            let slate: Vec<usize> = (0..n).collect();
            let (fast, slow) = (intra_list_distance(&input, &slate).unwrap(), ild_pairwise(&input, &slate));
            assert!((fast - slow).abs() < 1e-12, "n={n} d={d}: {fast} vs {slow}");
        }
    }

    #[test]
    fn entropy_known_values() {
        assert!((entropy_bits(&[1, 1, 1, 1]) - 2.0).abs() < 1e-12);
        assert_eq!(entropy_bits(&[5]).to_bits(), 0.0_f64.to_bits());
        assert_eq!(entropy_bits(&[]).to_bits(), 0.0_f64.to_bits());
        assert!((entropy_bits(&[1, 0, 1]) - 1.0).abs() < 1e-12);
    }

    #[test]
    fn gini_known_values() {
        assert!(gini(&[3, 3, 3, 3]).abs() < 1e-12);
        for n in 1..10u64 {
            let mut x = vec![0u64; n as usize];
            x[0] = 7;
            assert!((gini(&x) - (n as f64 - 1.0) / n as f64).abs() < 1e-12, "n={n}");
        }
        assert!(gini(&[]).abs() < 1e-12 && gini(&[0, 0]).abs() < 1e-12);
        // 1,2,3: Σ(2i−n−1)x = (−2)(1) + 0(2) + 2(3) = 4; n·Σx = 18 → 2/9 (by hand).
        assert!((gini(&[3, 1, 2]) - 2.0 / 9.0).abs() < 1e-12);
    }

    #[test]
    fn coverage_bounds() {
        assert!((coverage(3, 4) - 0.75).abs() < 1e-12);
        assert!(coverage(0, 0).abs() < 1e-12);
    }

    fn close(a: f64, b: f64) -> bool {
        (a - b).abs() < 1e-12
    }

    /// Values derived by hand from Webber et al. 2010, eq. 32, with p = 0.9.
    #[test]
    fn rbo_hand_computed_cases() {
        assert!(close(rbo_ext(&[1, 2, 3, 4], &[1, 2, 3, 4], 0.9), 1.0), "identical lists");
        assert!(close(rbo_ext(&[1, 2, 3], &[4, 5, 6], 0.9), 0.0), "disjoint lists");
        // [a, b, c] vs [b, a, c]: X = (0, 2, 3); 3/3·0.9³ + (0.1/0.9)·(0 + 2/2·0.81 + 3/3·0.729)
        // = 0.729 + 0.171 = 0.9.
        assert!(close(rbo_ext(&[1, 2, 3], &[2, 1, 3], 0.9), 0.9));
        // [a, b] vs [a, c]: X = (1, 1); 1/2·0.81 + (0.1/0.9)·(1·0.9 + 1/2·0.81) = 0.405 + 0.145 = 0.55.
        assert!(close(rbo_ext(&[1, 2], &[1, 3], 0.9), 0.55));
        assert!(close(rbo_ext(&[], &[], 0.9), 1.0));
        // Symmetric, and bounded by [0, 1].
        let (a, b) = ([5, 1, 9, 2, 7], [1, 5, 2, 8, 9]);
        assert!(close(rbo_ext(&a, &b, 0.9), rbo_ext(&b, &a, 0.9)));
        assert!((0.0..=1.0).contains(&rbo_ext(&a, &b, 0.9)));
    }

    /// Steck 2018's definition with α = 0.01, profile drama 0.7 / comedy 0.3; the worked
    /// values (1.134, 0.0, 0.0275), recomputed in CPython: all drama gives q̃ = (0.997, 0.003), so
    /// 0.7·ln(0.7/0.997) + 0.3·ln(0.3/0.003) = 1.133981751353524; 8 drama and 2 comedy give q̃ = (0.799,
    /// 0.201), so 0.7·ln(0.7/0.799) + 0.3·ln(0.3/0.201) = 0.027546842473128455.
    #[test]
    fn miscalibration_worked_values() {
        // Candidates 0..10 are drama, 10..13 comedy.
        let cands = (0..13)
            .map(|i| crate::CandidateInput {
                id: format!("m{i}"),
                score: 1.0,
                category: Some(if i < 10 { "drama" } else { "comedy" }.into()),
                embedding: None,
            })
            .collect();
        let input = RerankInput::new(cands, crate::ScoreTransform::MinMax, false, &crate::Limits::default())
            .unwrap()
            .with_profile(vec![("drama".into(), 7.0), ("comedy".into(), 3.0)])
            .unwrap();
        let kl = |slate: &[usize]| miscalibration(&input, slate).unwrap();
        assert!(
            (kl(&[0, 1, 2, 3, 4]) - 1.133_981_751_353_524).abs() < 1e-12,
            "all drama: {}",
            kl(&[0, 1, 2, 3, 4])
        );
        assert!(kl(&[0, 1, 2, 3, 4, 5, 6, 10, 11, 12]).abs() < 1e-12, "7/3 is the profile");
        assert!((kl(&[0, 1, 2, 3, 4, 5, 6, 7, 10, 11]) - 0.027_546_842_473_128_455).abs() < 1e-12, "8/2");
        assert!((kl(&[]) - 100f64.ln()).abs() < 1e-12, "an empty slate: q = 0, KL = ln 100");
        // A profile category no candidate has adds p·ln(1/α) whatever the slate.
        let with_absent =
            input.clone().with_profile(vec![("drama".into(), 0.7), ("western".into(), 0.3)]).unwrap();
        let want = 0.7 * (0.7_f64 / 0.997).ln() + 0.3 * 100f64.ln();
        assert!((miscalibration(&with_absent, &[0, 1]).unwrap() - want).abs() < 1e-12);
    }
}
