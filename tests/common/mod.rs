//! Helpers shared by the integration tests: seeded slate generators.
#![allow(dead_code, unreachable_pub)]

pub mod process;
pub mod server;

use medley::{CandidateInput, Limits, RerankInput, ScoreTransform};

/// A small deterministic generator (SplitMix64), so fixtures need no extra dependency.
pub struct Rng(pub u64);

impl Rng {
    pub fn next_u64(&mut self) -> u64 {
        self.0 = self.0.wrapping_add(0x9E37_79B9_7F4A_7C15);
        let mut z = self.0;
        z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
        z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
        z ^ (z >> 31)
    }
    /// Uniform in [0, 1).
    pub fn unit(&mut self) -> f64 {
        (self.next_u64() >> 11) as f64 / (1u64 << 53) as f64
    }
    /// Roughly normal (sum of uniforms), good enough for embeddings.
    pub fn normal(&mut self) -> f64 {
        (0..4).map(|_| self.unit()).sum::<f64>() - 2.0
    }
    pub fn below(&mut self, n: usize) -> usize {
        (self.next_u64() % n as u64) as usize
    }
}

/// Candidates with distinct scores, `groups` categories and d-dimensional embeddings.
pub fn candidates(rng: &mut Rng, n: usize, d: usize, groups: usize) -> Vec<CandidateInput> {
    (0..n)
        .map(|i| CandidateInput {
            id: format!("item-{i}"),
            score: rng.unit() + i as f64 * 1e-9,
            category: Some(format!("cat-{}", rng.below(groups.max(1)))),
            embedding: (d > 0).then(|| (0..d).map(|_| rng.normal() as f32).collect()),
        })
        .collect()
}

/// A validated slate with a taste profile over the generator's categories (one the slate never
/// has, `cat-9`, included), so calibration runs on it too.
pub fn slate(cands: Vec<CandidateInput>) -> RerankInput {
    RerankInput::new(
        cands,
        ScoreTransform::MinMax,
        false,
        &Limits { max_candidates: 100_000, ..Limits::default() },
    )
    .expect("generated slate is valid")
    .with_profile(PROFILE.iter().map(|&(c, w)| (c.to_owned(), w)).collect())
    .expect("the test profile is valid")
}

/// The taste profile [`slate`] attaches.
pub const PROFILE: [(&str, f64); 4] = [("cat-0", 0.4), ("cat-1", 0.3), ("cat-2", 0.2), ("cat-9", 0.1)];
