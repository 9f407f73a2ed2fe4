//! Kernel contract, against outside references: properties for every algorithm (proptest),
//! greedy DPP against a brute force over nalgebra determinants, the slow in-crate references,
//! and the named edge cases.

mod common;

use common::{candidates, slate, Rng};
use medley::diversify::{
    self, reference, Calibrated, Diversifier, Dpp, DppStrategy, Mmr, Quota, Relevance, Ssd, EPSILON,
};
use medley::{measures, CandidateInput, Limits, Params, RerankInput, Workspace};
use nalgebra::DMatrix;
use proptest::prelude::*;

const ALL: [&dyn Diversifier; 6] = [&Relevance, &Mmr, &Dpp, &Quota, &Ssd, &Calibrated];

/// Both exact DPP strategies: every DPP reference check runs on each.
const STRATEGIES: [DppStrategy; 2] = [DppStrategy::Lazy, DppStrategy::Screened];

fn dpp(strategy: DppStrategy, input: &RerankInput, p: &Params) -> medley::Selection {
    Dpp.select_with(strategy, input, p, &mut Workspace::new()).unwrap()
}

fn params(k: usize, lambda: f64) -> Params {
    Params::new(k as u64, lambda, &Limits::default()).unwrap()
}

fn run(algo: &dyn Diversifier, input: &RerankInput, p: &Params) -> Vec<usize> {
    algo.select(input, p, &mut Workspace::new()).unwrap().indices
}

fn assert_valid(out: &[usize], n: usize, k: usize, what: &str) {
    assert_eq!(out.len(), k.min(n), "{what}: length");
    let mut seen = vec![false; n];
    for &i in out {
        assert!(i < n, "{what}: index {i} out of range");
        assert!(!std::mem::replace(&mut seen[i], true), "{what}: duplicate {i}");
    }
}

/// MMR's objective of candidate `i` after `prefix`, from its definition with f64 cosines (the
/// max over an empty prefix is 0).
fn mmr_objective(input: &RerankInput, lambda: f64, prefix: &[usize], i: usize) -> f64 {
    let e = input.embeddings().unwrap();
    let pen = prefix.iter().map(|&j| e.cosine(i, j)).fold(f64::NEG_INFINITY, f64::max);
    (1.0 - lambda) * input.normalized()[i] - lambda * if prefix.is_empty() { 0.0 } else { pen }
}

fn arb_slate() -> impl Strategy<Value = (Vec<CandidateInput>, usize, f64)> {
    (
        1usize..40,
        1usize..12,
        1usize..6,
        0u64..u64::MAX,
        1usize..45,
        prop_oneof![Just(0.0), Just(1.0), 0.0..=1.0f64],
    )
        .prop_map(|(n, d, g, seed, k, lambda)| (candidates(&mut Rng(seed), n, d, g), k, lambda))
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(300))]

    #[test]
    fn every_algorithm_returns_a_valid_deterministic_slate((cands, k, lambda) in arb_slate()) {
        let input = slate(cands);
        let p = params(k, lambda);
        let mut ws = Workspace::new();
        for algo in ALL {
            let out = algo.select(&input, &p, &mut ws).unwrap().indices;
            assert_valid(&out, input.len(), k, algo.name());
            // Same input, reused workspace: same output.
            prop_assert_eq!(&out, &algo.select(&input, &p, &mut ws).unwrap().indices);
            prop_assert_eq!(&out, &run(algo, &input, &p));
        }
    }

    #[test]
    fn lambda_zero_is_relevance((cands, k, _l) in arb_slate()) {
        let input = slate(cands);
        let p = params(k, 0.0);
        let base = run(&Relevance, &input, &p);
        prop_assert_eq!(&base, &reference::relevance(&input, &p));
        for algo in ALL {
            prop_assert_eq!(&run(algo, &input, &p), &base, "{}", algo.name());
        }
    }

    #[test]
    fn permuting_input_permutes_nothing_but_tie_breaks((cands, k, _l) in arb_slate(), lambda in 0.0..0.95f64, seed in any::<u64>()) {
        // Distinct scores and continuous embeddings leave no ties, so the chosen ids must agree.
        // (At lambda = 1 the first MMR/DPP pick is a true tie, which goes to the lower index.)
        let mut perm: Vec<usize> = (0..cands.len()).collect();
        let mut rng = Rng(seed);
        for i in (1..perm.len()).rev() { perm.swap(i, rng.below(i + 1)); }
        let a = slate(cands.clone());
        let b = slate(perm.iter().map(|&i| cands[i].clone()).collect());
        let p = params(k, lambda);
        for algo in ALL {
            let ids = |input: &RerankInput| -> Vec<String> {
                run(algo, input, &p).into_iter().map(|i| input.ids()[i].clone()).collect()
            };
            prop_assert_eq!(ids(&a), ids(&b), "{}", algo.name());
        }
    }

    #[test]
    fn fast_kernels_equal_slow_references((cands, k, lambda) in arb_slate()) {
        let input = slate(cands);
        let p = params(k, lambda);
        // MMR sums in f32 (error ~1e-7) and the reference in f64, so a pick may differ only where
        // two objectives are within 1e-5 of each other: check each fast pick is the reference's
        // argmax, given the fast prefix, up to that gap.
        let fast_mmr = run(&Mmr, &input, &p);
        if lambda == 0.0 {
            prop_assert_eq!(&fast_mmr, &reference::mmr(&input, &p));
        }
        for (step, &pick) in fast_mmr.iter().enumerate() {
            let prefix = &fast_mmr[..step];
            let obj = |i: usize| mmr_objective(&input, lambda, prefix, i);
            let best = (0..input.len()).filter(|i| !prefix.contains(i)).map(obj).fold(f64::NEG_INFINITY, f64::max);
            prop_assert!(obj(pick) >= best - 1e-5, "step {step}: pick {pick} at {} vs best {best}", obj(pick));
        }
        let (slow, slow_gains) = reference::dpp(&input, &p);
        for strategy in STRATEGIES {
            let fast = dpp(strategy, &input, &p);
            prop_assert_eq!(&fast.indices, &slow, "{:?}", strategy);
            if lambda > 0.0 {
                let picked = fast.exhausted_at.unwrap_or(fast.indices.len());
                for (g, r) in fast.gains[..picked].iter().zip(&slow_gains) {
                    prop_assert!((g - r).abs() < 1e-9, "{:?}: residual {} vs {}", strategy, g, r);
                }
            }
        }
    }

    /// Issue 17: windowed DPP and SSD (with and without a window) pick exactly what the brute
    /// force that rebuilds the window's basis at every step picks; calibration what evaluating
    /// every candidate slate's divergence picks. Slates include duplicate rows, d below the
    /// window, and k above N.
    #[test]
    fn windowed_dpp_ssd_and_calibrated_equal_their_brute_force((cands, k, lambda) in arb_slate(), window in 2usize..8, dup in any::<bool>()) {
        let mut cands = cands;
        if dup && cands.len() > 3 {
            // Two exact duplicates and a near one.
            cands[1].embedding = cands[0].embedding.clone();
            let mut near = cands[2].embedding.clone().unwrap();
            near[0] += 1e-4;
            cands[3].embedding = Some(near);
        }
        let input = slate(cands);
        let p = params(k, lambda);
        let w = p.with_window(Some(window as u64)).unwrap();
        prop_assert_eq!(run(&Dpp, &input, &w), reference::dpp_window(&input, &w, window), "dpp window {}", window);
        prop_assert_eq!(run(&Ssd, &input, &w), reference::ssd(&input, &w), "ssd window {}", window);
        prop_assert_eq!(run(&Ssd, &input, &p), reference::ssd(&input, &p), "ssd unbounded");
        prop_assert_eq!(run(&Calibrated, &input, &p), reference::calibrated(&input, &p), "calibrated");
        // A window no shorter than the slate never slides: today's DPP exactly.
        let wide = p.with_window(Some(k.max(2) as u64)).unwrap();
        prop_assert_eq!(run(&Dpp, &input, &wide), run(&Dpp, &input, &p));
    }

    /// Issue 17, fairness floor (Zehlike et al. 2017): with `relevance` it is FA*IR exactly; with
    /// every other algorithm the choice at a restricted step is the algorithm's own among the
    /// protected (each equals its brute force that restricts the same steps); every prefix holds
    /// m(t) protected items whenever enough exist, and the shortfall flag says when not.
    #[test]
    fn fairness_floor_holds_for_every_algorithm((cands, k, lambda) in arb_slate(), every in 2usize..6, share in 0.2..0.9f64, alpha in 0.02..0.5f64, window in 2usize..6) {
        let n = cands.len();
        let protected: Vec<bool> = (0..n).map(|i| i % every == 0).collect();
        let input = slate(cands).with_fairness(protected.clone(), share, alpha).unwrap();
        let p = params(k, lambda);
        let m = k.min(n);
        let minimums = medley::fairness::minimum_protected(m, share, alpha);
        let total = protected.iter().filter(|&&x| x).count();
        for algo in ALL {
            let out = run(algo, &input, &p);
            assert_valid(&out, n, k, algo.name());
            let mut held = 0;
            for (t, &i) in out.iter().enumerate() {
                held += usize::from(protected[i]);
                // Short only when every protected candidate is already in the prefix.
                prop_assert!(held >= minimums[t] || held == total, "{} t={} held {} < m {}", algo.name(), t + 1, held, minimums[t]);
            }
            let short = medley::fairness::shortfall(&input, &out).unwrap();
            prop_assert_eq!(short, minimums.iter().max().copied().unwrap_or(0) > total || out.iter().enumerate().any(|(t, _)| {
                out[..=t].iter().filter(|&&i| protected[i]).count() < minimums[t]
            }));
        }
        prop_assert_eq!(run(&Relevance, &input, &p), reference::fair_relevance(&input, &p));
        prop_assert_eq!(run(&Calibrated, &input, &p), reference::calibrated(&input, &p));
        prop_assert_eq!(run(&Dpp, &input, &p), reference::dpp_eager(&input, &p));
        prop_assert_eq!(run(&Ssd, &input, &p), reference::ssd(&input, &p));
        let w = p.with_window(Some(window as u64)).unwrap();
        prop_assert_eq!(run(&Dpp, &input, &w), reference::dpp_window(&input, &w, window));
        // MMR sums in f32 and its brute force in f64: each fast pick must be the brute force's
        // argmax over the step's choosable set (the protected ones where the floor needs one
        // and one remains), given the fast prefix, up to 1e-5 (as in the unrestricted check).
        let fast_mmr = run(&Mmr, &input, &p);
        if lambda == 0.0 {
            prop_assert_eq!(&fast_mmr, &reference::mmr(&input, &p));
        }
        for (step, &pick) in fast_mmr.iter().enumerate() {
            let prefix = &fast_mmr[..step];
            let obj = |i: usize| mmr_objective(&input, lambda, prefix, i);
            let held = prefix.iter().filter(|&&i| protected[i]).count();
            let rest: Vec<usize> = (0..n).filter(|i| !prefix.contains(i)).collect();
            let restrict = held < minimums[step] && rest.iter().any(|&i| protected[i]);
            prop_assert!(!restrict || protected[pick], "step {step}: the floor needs a protected pick");
            let best = rest.iter().filter(|&&i| !restrict || protected[i]).map(|&i| obj(i)).fold(f64::NEG_INFINITY, f64::max);
            prop_assert!(obj(pick) >= best - 1e-5, "step {step}: pick {pick} at {} vs best {best}", obj(pick));
        }
    }

    #[test]
    fn quota_at_lambda_one_balances_and_keeps_score_order_within_a_category((cands, k, _l) in arb_slate()) {
        let input = slate(cands);
        let out = run(&Quota, &input, &params(k, 1.0));
        let groups = input.group_count();
        let size: Vec<usize> = (0..groups).map(|g| input.groups().iter().filter(|&&x| x as usize == g).count()).collect();
        let mut count = vec![0usize; groups];
        let mut last_score = vec![f64::INFINITY; groups];
        for &i in &out {
            let g = input.groups()[i] as usize;
            prop_assert!(input.scores()[i] <= last_score[g], "score order broken in group {g}");
            last_score[g] = input.scores()[i];
            count[g] += 1;
            // At every prefix: no group is more than one ahead of any group that still has items.
            let max = *count.iter().max().unwrap();
            for h in 0..groups {
                if count[h] < size[h] {
                    prop_assert!(max <= count[h] + 1, "counts {count:?} sizes {size:?}");
                }
            }
        }
    }

    #[test]
    fn caps_hold_for_every_algorithm((cands, k, lambda) in arb_slate(), cap in 1usize..4) {
        let input = slate(cands);
        let p = params(k, lambda).with_max_per_category(Some(cap));
        let eligible: usize = (0..input.group_count())
            .map(|g| input.groups().iter().filter(|&&x| x as usize == g).count().min(cap))
            .sum();
        for algo in ALL {
            let out = run(algo, &input, &p);
            prop_assert_eq!(out.len(), k.min(eligible), "{}", algo.name());
            let mut count = vec![0usize; input.group_count()];
            for &i in &out { count[input.groups()[i] as usize] += 1; }
            prop_assert!(count.iter().all(|&c| c <= cap), "{}: {:?}", algo.name(), count);
        }
    }
}

/// Greedy DPP evaluated the slow way with nalgebra (a general-purpose linear-algebra library):
/// at each step, ln det of the Gram matrix of the chosen set plus each candidate, by LU.
fn nalgebra_greedy_dpp(input: &RerankInput, k: usize, lambda: f64) -> Vec<usize> {
    let e = input.embeddings().unwrap();
    let n = input.len();
    // Cosine of the stored f32 rows, in f64 (the kernel the service defines).
    let gram = DMatrix::<f64>::from_fn(n, n, |i, j| {
        let dot: f64 = e.row(i).iter().zip(e.row(j)).map(|(&a, &b)| f64::from(a) * f64::from(b)).sum();
        let norm = |r: &[f32]| r.iter().map(|&x| f64::from(x) * f64::from(x)).sum::<f64>().sqrt();
        dot / (norm(e.row(i)) * norm(e.row(j)))
    });
    let s = input.normalized();
    let mut chosen: Vec<usize> = Vec::new();
    let mut logdet = 0.0;
    while chosen.len() < k.min(n) {
        let mut best: Option<(usize, f64, f64)> = None;
        for i in (0..n).filter(|i| !chosen.contains(i)) {
            let idx: Vec<usize> = chosen.iter().copied().chain([i]).collect();
            let det = gram.select_rows(&idx).select_columns(&idx).determinant();
            if det.is_nan() || det <= 0.0 || (det.ln() - logdet) < EPSILON.ln() {
                continue;
            }
            let obj = (1.0 - lambda) * s[i] + lambda * (det.ln() - logdet);
            // Objectives within 1e-12 are ties (LU adds ulp noise to exact ties such as the first
            // pick at lambda = 1); the contract gives ties to the lower index.
            if best.is_none_or(|(_, b, _)| obj > b + 1e-12) {
                best = Some((i, obj, det.ln()));
            }
        }
        match best {
            Some((i, _, ld)) => {
                chosen.push(i);
                logdet = ld;
            }
            None => {
                let mut rest: Vec<usize> = (0..n).filter(|i| !chosen.contains(i)).collect();
                rest.sort_by(|&a, &b| input.scores()[b].total_cmp(&input.scores()[a]).then(a.cmp(&b)));
                chosen.extend(rest.into_iter().take(k.min(n) - chosen.len()));
            }
        }
    }
    chosen
}

#[test]
fn dpp_matches_nalgebra_brute_force_on_hundreds_of_slates() {
    let mut rng = Rng(2018);
    let mut cases = 0;
    for _ in 0..120 {
        let n = 5 + rng.below(36);
        let d = 3 + rng.below(14);
        let k = 1 + rng.below(n);
        let input = slate(candidates(&mut rng, n, d, 4));
        for lambda in [0.0, 0.5, 1.0, 0.2 + 0.6 * rng.unit()] {
            let want = nalgebra_greedy_dpp(&input, k, lambda);
            let sel = dpp(DppStrategy::Lazy, &input, &params(k, lambda));
            assert_eq!(sel.indices, want, "lazy: n={n} d={d} k={k} lambda={lambda}");
            let screened = dpp(DppStrategy::Screened, &input, &params(k, lambda));
            assert_eq!(screened.indices, want, "screened: n={n} d={d} k={k} lambda={lambda}");
            assert_eq!(screened.exhausted_at, sel.exhausted_at);
            if lambda > 0.0 {
                // ln det of the chosen set's Gram matrix = Σ ln d² recorded along the way.
                let picked = &sel.indices[..sel.exhausted_at.unwrap_or(sel.indices.len())];
                let e = input.embeddings().unwrap();
                let g = DMatrix::<f64>::from_fn(picked.len(), picked.len(), |a, b| {
                    e.cosine(picked[a], picked[b])
                });
                let sum: f64 = sel.gains[..picked.len()].iter().map(|d2| d2.ln()).sum();
                let ld = g.determinant().ln();
                assert!((sum - ld).abs() < 1e-6 * (1.0 + ld.abs()), "Σ ln d² = {sum}, ln det = {ld}");
                if d < k {
                    assert!(
                        sel.exhausted_at.is_some_and(|at| at <= d),
                        "d={d} < k={k} must exhaust by slot d"
                    );
                }
            }
            cases += 1;
        }
    }
    assert_eq!(cases, 480);
}

fn one_candidate_slate(score: f64) -> RerankInput {
    slate(vec![CandidateInput { id: "solo".into(), score, category: None, embedding: Some(vec![1.0, 2.0]) }])
}

#[test]
fn edge_empty_and_single_slates() {
    let empty = RerankInput::new(vec![], medley::ScoreTransform::MinMax, true, &Limits::default()).unwrap();
    let one = one_candidate_slate(0.3);
    for algo in ALL {
        for lambda in [0.0, 0.5, 1.0] {
            assert!(run(algo, &empty, &params(5, lambda)).is_empty());
            assert_eq!(run(algo, &one, &params(5, lambda)), vec![0], "{}", algo.name());
        }
    }
}

#[test]
fn edge_k_above_n_returns_everything() {
    let input = slate(candidates(&mut Rng(3), 7, 4, 3));
    for algo in ALL {
        let out = run(algo, &input, &params(50, 0.6));
        assert_valid(&out, 7, 50, algo.name());
    }
}

#[test]
fn edge_one_dimension_exhausts_after_one_pick() {
    // d = 1: every unit row is ±1, so after one pick every residual is 0 and the rest is by score.
    let input = slate(candidates(&mut Rng(5), 6, 1, 2));
    for strategy in STRATEGIES {
        let sel = dpp(strategy, &input, &params(4, 0.9));
        assert_eq!(sel.exhausted_at, Some(1), "{strategy:?}");
        let rest: Vec<usize> = reference::relevance(&input, &params(6, 0.0))
            .into_iter()
            .filter(|&i| i != sel.indices[0])
            .take(3)
            .collect();
        assert_eq!(&sel.indices[1..], &rest[..], "{strategy:?}");
    }
}

#[test]
fn edge_dimension_below_k_fills_by_score() {
    // 300 candidates: several screening panels, all exhausted at once after three picks.
    let input = slate(candidates(&mut Rng(8), 300, 3, 3));
    let mut slates = Vec::new();
    for strategy in STRATEGIES {
        let sel = dpp(strategy, &input, &params(10, 0.7));
        assert_eq!(sel.exhausted_at, Some(3), "{strategy:?}: rank of 3-dimensional rows is 3");
        assert_valid(&sel.indices, 300, 10, "dpp");
        slates.push(sel.indices);
    }
    assert_eq!(slates[0], slates[1]);
}

#[test]
fn edge_all_scores_equal_and_one_category() {
    let mut rng = Rng(9);
    let cands: Vec<CandidateInput> =
        candidates(&mut rng, 12, 5, 1).into_iter().map(|c| CandidateInput { score: 0.5, ..c }).collect();
    let input = slate(cands);
    assert!(input.normalized().iter().all(|&s| (s - 1.0).abs() < 1e-15), "equal scores normalise to 1");
    // Relevance ties go to the lower index; quota with one category is relevance.
    assert_eq!(run(&Relevance, &input, &params(4, 0.0)), vec![0, 1, 2, 3]);
    assert_eq!(run(&Quota, &input, &params(4, 1.0)), vec![0, 1, 2, 3]);
    for algo in ALL {
        assert_valid(&run(algo, &input, &params(6, 0.8)), 12, 6, algo.name());
    }
}

#[test]
fn edge_duplicate_embeddings_are_never_both_picked_by_dpp() {
    let mut rng = Rng(10);
    let mut cands = candidates(&mut rng, 10, 6, 2);
    let twin = cands[0].embedding.clone();
    cands[1].embedding = twin;
    cands[0].score = 10.0;
    cands[1].score = 9.0;
    let input = slate(cands);
    for strategy in STRATEGIES {
        let sel = dpp(strategy, &input, &params(5, 0.5));
        assert_eq!(sel.indices[0], 0);
        assert!(
            !sel.indices[..sel.exhausted_at.unwrap_or(5)].contains(&1),
            "{strategy:?}: twin has zero residual"
        );
    }
    // MMR sees the twin at similarity 1 and pushes it down.
    assert_ne!(run(&Mmr, &input, &params(2, 0.5))[1], 1);
}

#[test]
fn edge_large_slates_run() {
    let mut rng = Rng(11);
    let big_n = slate(candidates(&mut rng, 5_000, 16, 6));
    let wide_d = slate(candidates(&mut rng, 200, 1_024, 6));
    for input in [&big_n, &wide_d] {
        for algo in ALL {
            let out = run(algo, input, &params(20, 0.5));
            assert_valid(&out, input.len(), 20, algo.name());
        }
        let [lazy, screened] = STRATEGIES.map(|st| dpp(st, input, &params(20, 0.5)).indices);
        assert_eq!(lazy, screened, "N={} d={}", input.len(), input.embeddings().unwrap().dim());
    }
}

/// The screened strategy certifies each pick with f32 bounds; stress those bounds where they are
/// tight: near-duplicate rows (residuals near 0 and near-equal objectives), duplicated rows with
/// distinct scores, several panels with a ragged last one, caps, lambda near the screening range's
/// edge (α·range = 40 at lambda ≈ 0.0244) and d up to 300. The lazy strategy, itself held to
/// nalgebra and the slow reference above, is the oracle: the picks must be identical.
#[test]
fn dpp_strategies_agree_on_near_duplicate_slates() {
    let mut rng = Rng(2024);
    for case in 0..60 {
        let n = 1 + rng.below(300);
        let d = [2, 5, 16, 64, 300][case % 5];
        let groups = 1 + rng.below(5);
        let mut cands = candidates(&mut rng, n, d, groups);
        // Every third candidate copies or nearly copies an earlier one.
        for i in (3..n).step_by(3) {
            let src = rng.below(i);
            let noise = [0.0, 1e-6, 1e-3][rng.below(3)];
            let copy: Vec<f32> = cands[src]
                .embedding
                .as_ref()
                .unwrap()
                .iter()
                .map(|&x| x + (noise * rng.normal()) as f32)
                .collect();
            cands[i].embedding = Some(copy);
        }
        let input = slate(cands);
        let k = 1 + rng.below(n.min(80));
        for lambda in [0.025, 0.1, 0.5, 0.9, 1.0] {
            let cap = [None, Some(1 + rng.below(4))][rng.below(2)];
            let p = Params::new(k as u64, lambda, &Limits::default()).unwrap().with_max_per_category(cap);
            let lazy = dpp(DppStrategy::Lazy, &input, &p);
            let screened = dpp(DppStrategy::Screened, &input, &p);
            let what = format!("case {case}: n={n} d={d} k={k} lambda={lambda} cap={cap:?}");
            assert_eq!(screened.indices, lazy.indices, "{what}");
            assert_eq!(screened.exhausted_at, lazy.exhausted_at, "{what}");
            for (a, b) in screened.gains.iter().zip(&lazy.gains) {
                assert!((a - b).abs() < 1e-12, "{what}: gain {a} vs {b}");
            }
        }
    }
}

#[test]
fn registry_finds_every_algorithm_by_name() {
    let names: Vec<&str> = diversify::names().collect();
    assert_eq!(names, ["relevance", "mmr", "dpp", "quota", "ssd", "calibrated"]);
    for name in names {
        assert_eq!(diversify::by_name(name).unwrap().name(), name);
    }
    assert!(diversify::by_name("nope").is_none());
}

#[test]
fn raising_lambda_raises_category_entropy_on_clustered_data() {
    // Common practice (the accuracy–diversity trade-off): scores favour one category.
    let mut rng = Rng(12);
    let cands: Vec<CandidateInput> = (0..200)
        .map(|i| {
            let g = i % 5;
            let mut e: Vec<f32> = (0..8).map(|_| (rng.normal() * 0.2) as f32).collect();
            e[g] += 1.0;
            CandidateInput {
                id: format!("i{i}"),
                score: if g == 0 { 1.0 + rng.unit() } else { rng.unit() },
                category: Some(format!("g{g}")),
                embedding: Some(e),
            }
        })
        .collect();
    let input = slate(cands);
    for algo in [&Mmr as &dyn Diversifier, &Dpp, &Quota] {
        let h = |l: f64| measures::category_entropy_bits(&input, &run(algo, &input, &params(10, l)));
        assert!(h(0.0) < h(0.5) + 1e-12 && h(0.5) <= h(1.0) + 1e-12 && h(0.0) < h(1.0), "{}", algo.name());
    }
}

/// Issue 17 at production-like sizes: windows that slide dozens of times over slates of a few
/// hundred candidates (the rotations, not just the first fill), clustered rows so windows span
/// near-dependent picks, and d below the window so the rebuild path runs; each pick equals the
/// brute force's.
#[test]
fn windowed_kernels_equal_brute_force_on_larger_slates() {
    for seed in 0..12_u64 {
        let mut rng = Rng(1000 + seed);
        let (n, d) = (150 + 25 * seed as usize, [3, 8, 24, 48][seed as usize % 4]);
        let centres: Vec<Vec<f64>> = (0..6).map(|_| (0..d).map(|_| rng.normal()).collect()).collect();
        let cands: Vec<CandidateInput> = (0..n)
            .map(|i| {
                let c = &centres[rng.below(centres.len())];
                CandidateInput {
                    id: format!("gear-{i}"),
                    score: rng.unit(),
                    category: Some(format!("cat-{}", rng.below(4))),
                    embedding: Some(c.iter().map(|&x| (x + 0.3 * rng.normal()) as f32).collect()),
                }
            })
            .collect();
        let input = slate(cands);
        for (k, window, lambda) in [(40, 5, 0.5), (30, 10, 0.8), (25, 2, 0.3)] {
            let p = params(k, lambda).with_window(Some(window)).unwrap();
            assert_eq!(
                run(&Dpp, &input, &p),
                reference::dpp_window(&input, &p, window as usize),
                "seed {seed} dpp w={window}"
            );
            assert_eq!(run(&Ssd, &input, &p), reference::ssd(&input, &p), "seed {seed} ssd w={window}");
        }
        let p = params(30, 0.6);
        assert_eq!(run(&Calibrated, &input, &p), reference::calibrated(&input, &p), "seed {seed} calibrated");
    }
}

/// The lazy window loop at a bench-like shape: 8 clustered groups of rows, a window of 10
/// sliding 50 times, so most candidates are skipped on bounds left by earlier steps; every
/// pick equals the brute force's, and at λ = 0.5 and 0.9 (where the bounds are looser).
#[test]
fn the_lazy_window_loop_equals_brute_force_on_clustered_slates() {
    let (n, d) = (400, 64);
    let mut rng = Rng(4242);
    let cands: Vec<CandidateInput> = (0..n)
        .map(|i| CandidateInput {
            id: format!("lamp-{i}"),
            score: rng.unit(),
            category: Some(format!("cat-{}", i % 8)),
            embedding: Some(
                (0..d).map(|t| (rng.unit() - 0.5 + if t % 8 == i % 8 { 1.0 } else { 0.0 }) as f32).collect(),
            ),
        })
        .collect();
    let input = slate(cands);
    for lambda in [0.5, 0.9] {
        let p = params(60, lambda).with_window(Some(10)).unwrap();
        assert_eq!(run(&Dpp, &input, &p), reference::dpp_window(&input, &p, 10), "dpp λ={lambda}");
        assert_eq!(run(&Ssd, &input, &p), reference::ssd(&input, &p), "ssd λ={lambda}");
    }
}

/// The f32 screen of the lazy window loop on the slates that stress its error bound: rows that
/// are near-copies of a few directions (windows whose members are nearly dependent, so `‖R⁻¹‖`
/// is large), exact duplicates, odd dimensions, scores in a narrow band (gains within the
/// screen's slack of each other), and windows up to the largest the lazy loop takes
/// (`w² ≤ 8·d`). Every pick equals the brute force's; in debug builds the loop also asserts,
/// wherever it screened, that the screened bound is at or above the exact residual.
#[test]
fn the_screened_window_loop_equals_brute_force_on_ill_conditioned_slates() {
    for seed in 0..60_u64 {
        let mut rng = Rng(7000 + seed);
        let d = [5, 9, 16, 33, 64][seed as usize % 5];
        let n = 120 + 40 * (seed as usize % 3);
        let spread = [1e-3, 1e-2, 0.3][seed as usize % 3];
        let centres: Vec<Vec<f64>> =
            (0..3 + seed as usize % 4).map(|_| (0..d).map(|_| rng.normal()).collect()).collect();
        let mut cands: Vec<CandidateInput> = (0..n)
            .map(|i| {
                let c = &centres[rng.below(centres.len())];
                CandidateInput {
                    id: format!("kite-{i}"),
                    score: 0.5 + 0.01 * rng.unit(),
                    category: Some(format!("cat-{}", rng.below(3))),
                    embedding: Some(c.iter().map(|&x| (x + spread * rng.normal()) as f32).collect()),
                }
            })
            .collect();
        // Exact duplicates of a few rows, under new ids.
        for j in 0..6 {
            let mut twin = cands[j * 7].clone();
            twin.id = format!("kite-twin-{j}");
            cands.push(twin);
        }
        let input = slate(cands);
        let widest = (1..).take_while(|w: &usize| w * w <= 8 * d).last().unwrap() + 1;
        for (k, window, lambda) in [(40, 3, 0.5), (35, widest, 0.7), (30, widest.min(6), 0.95)] {
            let p = params(k, lambda).with_window(Some(window as u64)).unwrap();
            assert_eq!(
                run(&Dpp, &input, &p),
                reference::dpp_window(&input, &p, window),
                "seed {seed} d={d} dpp w={window} λ={lambda}"
            );
            assert_eq!(run(&Ssd, &input, &p), reference::ssd(&input, &p), "seed {seed} d={d} ssd w={window}");
        }
    }
}

/// Windowed DPP differs from unbounded DPP only once the window slides, and at every step its
/// pick has the largest objective against the last `w − 1` picks (checked against the
/// brute-force residuals, not the kernel's own).
#[test]
fn a_window_of_two_only_avoids_the_previous_pick() {
    let input = slate(candidates(&mut Rng(77), 60, 6, 3));
    let p = params(12, 0.9).with_window(Some(2)).unwrap();
    let picks = run(&Dpp, &input, &p);
    assert_valid(&picks, 60, 12, "dpp window 2");
    for t in 1..picks.len() {
        let d2 = reference::window_residuals(&input, &picks[t - 1..t]);
        let obj = |i: usize| 0.1 * input.normalized()[i] + 0.9 * d2[i].ln();
        let best = (0..60).filter(|i| !picks[..t].contains(i)).map(obj).fold(f64::NEG_INFINITY, f64::max);
        assert!((obj(picks[t]) - best).abs() < 1e-12, "step {t}");
    }
    assert_ne!(picks, run(&Dpp, &input, &params(12, 0.9)), "the window changes the slate");
}

/// The lazy DPP under a fairness floor when every protected candidate adds no direction: the
/// restricted steps fall back to the best protected one by score (and record where), the others
/// keep the log-det objective; the picks equal the eager brute force's (`reference::dpp_eager`).
#[test]
fn edge_a_floor_of_exhausted_protected_candidates_falls_back_by_score_in_dpp() {
    let mut rng = Rng(33);
    let mut cands = candidates(&mut rng, 30, 5, 3);
    // Candidates 0, 10, 20 are protected; 10 and 20 duplicate 0, which has the top score.
    cands[0].score = 100.0;
    for i in [10, 20] {
        cands[i].embedding = cands[0].embedding.clone();
    }
    let protected: Vec<bool> = (0..30).map(|i| i % 10 == 0).collect();
    let input = slate(cands).with_fairness(protected.clone(), 0.5, 0.1).unwrap();
    for lambda in [0.3, 0.7, 1.0] {
        let p = params(12, lambda);
        let want = reference::dpp_eager(&input, &p);
        for strategy in STRATEGIES {
            let sel = dpp(strategy, &input, &p);
            assert_eq!(sel.indices, want, "{strategy:?} at lambda {lambda}");
            assert!(sel.exhausted_at.is_some(), "{strategy:?}: a protected twin was a fallback pick");
            let held = sel.indices.iter().filter(|&&i| protected[i]).count();
            assert_eq!(held, 3, "all three protected are in a slate of 12 at share 0.5");
        }
    }
}
