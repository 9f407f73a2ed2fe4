//! Invariant checks driven by arbitrary bytes: the body of the `diversify` cargo-fuzz target in
//! `fuzz/`, kept in the library so that `tests/fuzz_corpus.rs` replays the committed corpus
//! through the very same code on stable Rust in every `cargo test`, and the shared checks of a
//! slate that the service's `decode` target uses too.
//!
//! Each function returns normally for every input; it panics only when an invariant breaks, and
//! a panic is a finding.

use crate::diversify::{self, Diversifier as _};
use crate::model::{CandidateInput, Limits, Params, RerankInput, ScoreTransform};
use crate::Workspace;

/// Reads little-endian fields off the front of the fuzzer's bytes; zero once they run out.
struct Bytes<'a>(&'a [u8]);

impl Bytes<'_> {
    fn u8(&mut self) -> u8 {
        let (first, rest) = self.0.split_first().map_or((0, &[][..]), |(f, r)| (*f, r));
        self.0 = rest;
        first
    }
    fn u16(&mut self) -> u16 {
        u16::from_le_bytes([self.u8(), self.u8()])
    }
}

/// Target `diversify`: a slate built from the bytes (up to 48 candidates, d up to 12, ties,
/// duplicate and near-zero embeddings, missing categories, special lambdas), validated, then
/// every registered diversifier on it.
///
/// # Panics
/// When any diversifier's output is not a duplicate-free list of `min(k, N)` valid indices
/// (fewer only under a category cap, which it must respect), is not deterministic, or differs
/// from `relevance` at `lambda = 0`.
pub fn diversifiers(bytes: &[u8]) {
    let mut b = Bytes(bytes);
    let n = usize::from(b.u8() % 49);
    let d = 1 + usize::from(b.u8() % 12);
    let k = u64::from(b.u16() % 64);
    let lambda = match b.u8() % 8 {
        0 => 0.0,
        1 => 1.0,
        2 => -0.0,
        _ => f64::from(b.u16()) / f64::from(u16::MAX),
    };
    let flags = b.u8();
    let transform = if flags & 1 == 0 { ScoreTransform::MinMax } else { ScoreTransform::None };
    let cap = (flags & 2 != 0).then(|| usize::from(flags >> 4));
    let with_embeddings = flags & 4 == 0;
    let candidates: Vec<CandidateInput> = (0..n)
        .map(|i| {
            // Scores from a small set make ties common; raw bits reach every finite value.
            let score = match b.u8() {
                s @ 0..=199 => f64::from(s % 8) / 8.0,
                _ => f64::from_bits(u64::from(b.u16()) << 48 | u64::from(b.u16()) << 16),
            };
            let category = match b.u8() % 5 {
                4 => None,
                c => Some(format!("c{c}")),
            };
            let embedding = with_embeddings.then(|| (0..d).map(|_| f32::from(b.u8() as i8) / 16.0).collect());
            CandidateInput { id: format!("i{i}"), score, category, embedding }
        })
        .collect();
    let limits = Limits::default();
    let Ok(params) = Params::new(k, lambda, &limits) else { return };
    // A window for windowed DPP and SSD on half the inputs (2..=9, often below k and d).
    let window = (flags & 8 != 0).then(|| 2 + u64::from(flags >> 5));
    let Ok(params) = params.with_window(window) else { return };
    let params = params.with_max_per_category(cap);
    // A taste profile over some of the categories (one never present) on half the inputs.
    let profile: Option<Vec<(String, f64)>> = (b.u8() % 2 == 0)
        .then(|| ["c0", "c1", "c3", "c9"].iter().map(|c| ((*c).to_owned(), f64::from(b.u8() % 4))).collect());
    let cap = params.max_per_category(); // a cap of 0 means none
    let Ok(input) = RerankInput::new(candidates, transform, false, &limits) else { return };
    let input = match profile {
        None => input,
        // Weights that sum to 0 are refused; that input is then served without a profile.
        Some(weights) => input.clone().with_profile(weights).unwrap_or(input),
    };
    // A fairness floor over every third candidate on half the inputs; every algorithm must then
    // keep each prefix at m(t) protected items while any remain.
    let floor =
        (b.u8() % 2 == 0).then(|| (f64::from(1 + b.u8() % 9) / 10.0, f64::from(1 + b.u8() % 4) / 10.0));
    let input = match floor {
        None => input,
        Some((share, alpha)) => {
            let protected = (0..input.len()).map(|i| i % 3 == 0).collect();
            input.with_fairness(protected, share, alpha).expect("share and alpha inside (0, 1)")
        }
    };
    let relevance_at_zero = {
        let zero = Params::new(k, 0.0, &limits).expect("k was accepted").with_max_per_category(cap);
        diversify::Relevance
            .select(&input, &zero, &mut Workspace::new())
            .expect("relevance needs nothing")
            .indices
    };
    let mut ws = Workspace::new();
    for name in diversify::names() {
        let algo = diversify::by_name(name).expect("a registered name");
        let Ok(first) = algo.select(&input, &params, &mut ws) else {
            let no_embeddings = algo.needs_embeddings() && input.embeddings().is_none();
            let no_profile = algo.needs_profile() && input.profile().is_none();
            assert!(no_embeddings || no_profile, "{name} failed on a valid slate");
            continue;
        };
        check_selection(&input, &first.indices, params.k(), cap, name);
        assert_eq!(
            first.indices.len(),
            expected_len(&input, params.k(), params.max_per_category()),
            "{name}: length"
        );
        if let Some(floor) = input.fairness() {
            // Caps can keep protected candidates out, so the floor is checked without one.
            if cap.is_none() {
                let minimums = floor.minimums(first.indices.len());
                let total = floor.protected().iter().filter(|&&p| p).count();
                let mut held = 0;
                for (t, &i) in first.indices.iter().enumerate() {
                    held += usize::from(floor.protected()[i]);
                    assert!(
                        held >= minimums[t] || held == total,
                        "{name}: prefix {} breaks the fairness floor",
                        t + 1
                    );
                }
            }
        }
        let again = algo.select(&input, &params, &mut Workspace::new()).expect("it ran once");
        assert_eq!(first.indices, again.indices, "{name}: not deterministic");
        if params.lambda() == 0.0 {
            assert_eq!(first.indices, relevance_at_zero, "{name}: lambda = 0 is not relevance");
        }
    }
    // The registry's `dpp` runs the screened strategy where it applies; hold the lazy one to
    // the same contract. (Their picks may differ where exact ties meet different rounding, which
    // these quantised rows and scores make common, so only validity is compared.)
    if input.embeddings().is_some() {
        let lazy = diversify::Dpp
            .select_with(diversify::DppStrategy::Lazy, &input, &params, &mut ws)
            .expect("embeddings present");
        check_selection(&input, &lazy.indices, params.k(), cap, "dpp (lazy)");
        assert_eq!(lazy.indices.len(), expected_len(&input, params.k(), cap), "dpp (lazy): length");
    }
}

/// The slate length every diversifier must reach: `min(k, N)`, or under a category cap the
/// most that the cap allows.
#[must_use]
pub fn expected_len(input: &RerankInput, k: usize, cap: Option<usize>) -> usize {
    let available = match cap {
        None => input.len(),
        Some(cap) => {
            let mut per_group = vec![0usize; input.group_count()];
            for &g in input.groups() {
                per_group[g as usize] += 1;
            }
            per_group.iter().map(|&c| c.min(cap)).sum()
        }
    };
    k.min(available)
}

/// Checks that `out` is a valid slate of `input`: at most `min(k, N)` in-range, distinct indices
/// that respect the category cap.
///
/// # Panics
/// When it is not; `what` names the algorithm in the message.
pub fn check_selection(input: &RerankInput, out: &[usize], k: usize, cap: Option<usize>, what: &str) {
    assert!(out.len() <= k.min(input.len()), "{what}: {} items for k = {k}, N = {}", out.len(), input.len());
    let mut seen = vec![false; input.len()];
    let mut per_group = vec![0usize; input.group_count()];
    for &i in out {
        assert!(i < input.len(), "{what}: index {i} out of range");
        assert!(!std::mem::replace(&mut seen[i], true), "{what}: duplicate index {i}");
        per_group[input.groups()[i] as usize] += 1;
    }
    if let Some(cap) = cap {
        assert!(per_group.iter().all(|&c| c <= cap), "{what}: category cap {cap} broken: {per_group:?}");
    }
}
