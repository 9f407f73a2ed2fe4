//! Criterion benches: every diversifier over the (N, d, k) grid of production sizes, beside a
//! GEMV of the same shape from the `gemm` crate (a tuned, runtime-dispatched SIMD library) as the
//! practical roofline for this memory-bound work.
//!
//! `dpp` is the default (screened) strategy and `dpp_lazy` the lazy one, both exact.
//! Throughput is reported as elements = floating-point operations (2 per multiply-add), with the
//! nominal counts N·k·d + 2·k²·d multiply-adds for DPP (every candidate projected on every basis
//! vector, plus two Gram–Schmidt sweeps per basis vector), N·k·d for MMR and the GEMV. Run
//! `cargo bench --bench kernels`, then `python3 benches/report.py` for the README table.
#![allow(unsafe_code, missing_docs)]

use criterion::{criterion_group, criterion_main, BenchmarkId, Criterion, Throughput};
use medley_core::diversify::{
    reference, Calibrated, Diversifier, Dpp, DppStrategy, Mmr, Quota, Relevance, Ssd,
};
use medley_core::{CandidateInput, Limits, Params, RerankInput, ScoreTransform, Workspace};
use std::hint::black_box;
use std::time::Duration;

const GRID: [(usize, usize, usize); 3] = [(500, 64, 50), (2_000, 128, 100), (5_000, 256, 100)];

/// Deterministic slate: 8 categories, embeddings clustered by category, scores uniform.
fn slate(n: usize, d: usize) -> RerankInput {
    let mut state = 0x5EED_u64 ^ (n as u64) << 20 ^ d as u64;
    let mut next = move || {
        state ^= state << 13;
        state ^= state >> 7;
        state ^= state << 17;
        (state >> 11) as f64 / (1u64 << 53) as f64
    };
    let cands = (0..n)
        .map(|i| {
            let g = i % 8;
            let embedding =
                (0..d).map(|t| (next() - 0.5 + if t % 8 == g { 1.0 } else { 0.0 }) as f32).collect();
            CandidateInput {
                id: format!("i{i}"),
                score: next(),
                category: Some(format!("g{g}")),
                embedding: Some(embedding),
            }
        })
        .collect();
    let limits = Limits { max_candidates: 100_000, ..Limits::default() };
    RerankInput::new(cands, ScoreTransform::MinMax, true, &limits).unwrap()
}

fn kernels(c: &mut Criterion) {
    for &(n, d, k) in &GRID {
        let input = slate(n, d);
        let params = Params::new(k as u64, 0.5, &Limits::default()).unwrap();
        let mut group = c.benchmark_group(format!("N{n}_d{d}_k{k}"));
        group.warm_up_time(Duration::from_secs(1)).measurement_time(Duration::from_secs(3)).sample_size(40);
        let macs = |extra: usize| (2 * (n * k * d + extra)) as u64;
        for (algo, flops) in
            [(&Dpp as &dyn Diversifier, macs(2 * k * k * d)), (&Mmr, macs(0)), (&Quota, 0), (&Relevance, 0)]
        {
            if flops > 0 {
                group.throughput(Throughput::Elements(flops));
            }
            let mut ws = Workspace::new();
            group.bench_function(BenchmarkId::from_parameter(algo.name()), |b| {
                b.iter(|| black_box(algo.select(black_box(&input), &params, &mut ws).unwrap()))
            });
        }
        // Issue 17's algorithms: windowed DPP and SSD at w = 10, SSD unbounded, calibration to
        // an uneven profile over the eight categories (one absent).
        let windowed = params.with_window(Some(10)).unwrap();
        let profiled =
            input.clone().with_profile((0..9).map(|g| (format!("g{g}"), 1.0 + g as f64)).collect()).unwrap();
        for (label, algo, p, slate) in [
            ("dpp_window10", &Dpp as &dyn Diversifier, &windowed, &input),
            ("ssd_window10", &Ssd, &windowed, &input),
            ("ssd", &Ssd, &params, &input),
            ("calibrated", &Calibrated, &params, &profiled),
        ] {
            let mut ws = Workspace::new();
            group.throughput(Throughput::Elements(if label == "calibrated" { 0 } else { macs(0) }));
            group.bench_function(BenchmarkId::from_parameter(label), |b| {
                b.iter(|| black_box(algo.select(black_box(slate), p, &mut ws).unwrap()))
            });
        }
        // A fairness floor (Zehlike et al., CIKM 2017) over one provider group in six, at a 30 %
        // target share and alpha 0.1: `dpp` and `mmr` run their lazy loops with a heap per side, and
        // `relevance` under a floor is FA*IR's algorithm.
        let fair = input.clone().with_fairness((0..n).map(|i| i % 6 == 0).collect(), 0.3, 0.1).unwrap();
        for (label, algo) in
            [("dpp_fair", &Dpp as &dyn Diversifier), ("mmr_fair", &Mmr), ("relevance_fair", &Relevance)]
        {
            let mut ws = Workspace::new();
            group.throughput(Throughput::Elements(if label == "relevance_fair" { 0 } else { macs(0) }));
            group.bench_function(BenchmarkId::from_parameter(label), |b| {
                b.iter(|| black_box(algo.select(black_box(&fair), &params, &mut ws).unwrap()))
            });
        }
        // The lazy strategy, which `dpp` (screened on these slates) replaced as the default.
        group.throughput(Throughput::Elements(macs(2 * k * k * d)));
        let mut ws = Workspace::new();
        group.bench_function(BenchmarkId::from_parameter("dpp_lazy"), |b| {
            b.iter(|| {
                black_box(Dpp.select_with(DppStrategy::Lazy, black_box(&input), &params, &mut ws).unwrap())
            })
        });
        // Roofline: k GEMVs of the same N × d f32 matrix (row-major) with a d-vector.
        let rows = input.embeddings().unwrap().as_slice().to_vec();
        let x: Vec<f32> = input.embeddings().unwrap().row(0).to_vec();
        let mut y = vec![0.0_f32; n];
        group.throughput(Throughput::Elements(macs(0)));
        group.bench_function(BenchmarkId::from_parameter("gemv_roofline"), |b| {
            b.iter(|| {
                for _ in 0..k {
                    // SAFETY: dst is n×1, lhs n×d row-major (rs = d, cs = 1), rhs d×1; all
                    // buffers have exactly those lengths and outlive the call.
                    unsafe {
                        gemm::gemm(
                            n,
                            1,
                            d,
                            y.as_mut_ptr(),
                            1,
                            1,
                            false,
                            rows.as_ptr(),
                            1,
                            d as isize,
                            x.as_ptr(),
                            1,
                            1,
                            0.0,
                            1.0,
                            false,
                            false,
                            false,
                            gemm::Parallelism::None,
                        );
                    }
                    black_box(&mut y);
                }
            })
        });
        group.finish();
    }
    // Sanity line: the slow reference at a small size (it is O(N·k³)).
    let input = slate(100, 16);
    let params = Params::new(10, 0.5, &Limits::default()).unwrap();
    c.bench_function("reference_dpp_N100_d16_k10", |b| b.iter(|| black_box(reference::dpp(&input, &params))));
}

criterion_group!(benches, kernels);
criterion_main!(benches);
