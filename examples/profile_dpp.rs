//! Runs DPP at (N, d, k) = (2 000, 128, 100) in a loop and prints the mean time per call; for
//! `perf record ./target/release/examples/profile_dpp` when tuning the kernel.
//!
//! Run: `cargo run --release --example profile_dpp`

use medley::diversify::{Diversifier, Dpp};
use medley::{CandidateInput, Limits, Params, RerankInput, ScoreTransform, Workspace};

fn main() {
    let (n, d, k, calls) = (2_000, 128, 100, 200);
    let mut state = 1u64;
    let mut next = || {
        state ^= state << 13;
        state ^= state >> 7;
        state ^= state << 17;
        (state >> 11) as f64 / (1u64 << 53) as f64
    };
    let cands = (0..n)
        .map(|i| CandidateInput {
            id: format!("i{i}"),
            score: next(),
            category: None,
            embedding: Some((0..d).map(|_| (next() - 0.5) as f32).collect()),
        })
        .collect();
    let input =
        RerankInput::new(cands, ScoreTransform::MinMax, true, &Limits::default()).expect("valid slate");
    let params = Params::new(k, 0.5, &Limits::default()).expect("valid params");
    let mut ws = Workspace::new();
    let start = std::time::Instant::now();
    for _ in 0..calls {
        std::hint::black_box(Dpp.select(&input, &params, &mut ws).expect("embeddings present"));
    }
    println!("{:?} per call", start.elapsed() / calls);
}
