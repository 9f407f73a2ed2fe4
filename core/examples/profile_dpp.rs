//! Runs DPP in a loop and prints the mean time per call; for
//! `perf record ./target/release/examples/profile_dpp` when tuning the kernel.
//!
//! Run: `cargo run --release -p medley-core --example profile_dpp -- [N D K [clustered]]` (default 2000 128 100,
//! unclustered random rows; `clustered` uses the bench's 8-cluster slates). Environment:
//! `CALLS=n` sets the number of calls (e.g. for a longer `perf record`); `DPP_STRATEGY=lazy` or
//! `screened` picks a strategy instead of the default `auto`; `WINDOW=w` runs windowed DPP.

use medley_core::diversify::{Dpp, DppStrategy};
use medley_core::{CandidateInput, Limits, Params, RerankInput, ScoreTransform, Workspace};

fn main() {
    let args: Vec<String> = std::env::args().skip(1).collect();
    let arg = |i: usize, default: usize| args.get(i).and_then(|a| a.parse().ok()).unwrap_or(default);
    let (n, d, k) = (arg(0, 2_000), arg(1, 128), arg(2, 100) as u64);
    let clustered = args.get(3).is_some_and(|a| a == "clustered");
    let calls = std::env::var("CALLS")
        .ok()
        .and_then(|c| c.parse().ok())
        .unwrap_or_else(|| (400_000_000 / (n * (d + k as usize) * k as usize)).clamp(20, 20_000) as u32);
    let strategy = match std::env::var("DPP_STRATEGY").as_deref() {
        Ok("lazy") => DppStrategy::Lazy,
        Ok("screened") => DppStrategy::Screened,
        Ok("auto") | Err(_) => DppStrategy::Auto,
        Ok(other) => panic!("DPP_STRATEGY={other}: expected auto, lazy or screened"),
    };
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
            embedding: Some(
                (0..d)
                    .map(|t| (next() - 0.5 + if clustered && t % 8 == i % 8 { 1.0 } else { 0.0 }) as f32)
                    .collect(),
            ),
        })
        .collect();
    let input =
        RerankInput::new(cands, ScoreTransform::MinMax, true, &Limits::default()).expect("valid slate");
    let window = std::env::var("WINDOW").ok().map(|w| w.parse::<u64>().expect("WINDOW=w"));
    let params =
        Params::new(k, 0.5, &Limits::default()).and_then(|p| p.with_window(window)).expect("valid params");
    let mut ws = Workspace::new();
    let start = std::time::Instant::now();
    for _ in 0..calls {
        std::hint::black_box(
            Dpp.select_with(strategy, &input, &params, &mut ws).expect("embeddings present"),
        );
    }
    println!("{:?} per call", start.elapsed() / calls);
}
