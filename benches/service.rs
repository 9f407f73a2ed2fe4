//! Service-path benchmarks: decoding one (500, 64) request with JSON-array embeddings vs
//! `embedding_b64`, and as a protobuf message (our `Candidate` beside prost's derived one),
//! validating it into a slate, and the cost of handing a job to the kernel pool versus running it
//! inline (which sets `pool::INLINE_WORK_BELOW`), and validation alone (`Engine::prepare`) of
//! a decoded request with its embeddings inline or looked up in an item catalog.
//!
//! Run: `cargo bench --bench service`

// criterion_group! generates undocumented items.
#![allow(missing_docs)]

use std::hint::black_box;
use std::time::Duration;

use criterion::{criterion_group, criterion_main, BatchSize, Criterion, Throughput};
use medley::api::wire::{decode_request, encode_b64_embedding, RerankRequest};
use medley::grpc::candidate::reference::RerankRequest as DerivedRequest;
use medley::grpc::proto;
use medley::serve::config::Config;
use medley::serve::engine::Engine;
use medley::serve::pool::Pool;
use prost::Message;
use serde_json::json;

/// One request body of `n` candidates in dimension `d`, embeddings as JSON arrays or base64.
fn body(n: usize, d: usize, b64: bool) -> Vec<u8> {
    let mut state = 0x5EED_u64;
    let mut next = move || {
        state ^= state << 13;
        state ^= state >> 7;
        state ^= state << 17;
        (state >> 11) as f64 / (1u64 << 53) as f64
    };
    let candidates: Vec<_> = (0..n)
        .map(|i| {
            let e: Vec<f32> = (0..d).map(|_| (next() - 0.5) as f32).collect();
            let mut c =
                json!({"id": format!("tent-{i:04}"), "score": next(), "category": format!("cat-{}", i % 6)});
            if b64 {
                c["embedding_b64"] = json!(encode_b64_embedding(&e));
            } else {
                c["embedding"] = json!(e);
            }
            c
        })
        .collect();
    serde_json::to_vec(&json!({"algorithm": "dpp", "lambda": 0.3, "k": 50, "candidates": candidates}))
        .unwrap()
}

fn decode(c: &mut Criterion) {
    let engine = Engine::new(Config::embedded_default(), 1);
    let mut group = c.benchmark_group("decode_N500_d64");
    group.warm_up_time(Duration::from_secs(1)).measurement_time(Duration::from_secs(3)).sample_size(40);
    for (name, b64) in [("json", false), ("b64", true)] {
        let bytes = body(500, 64, b64);
        group.throughput(Throughput::Bytes(bytes.len() as u64));
        group.bench_function(format!("{name}_decode"), |b| {
            b.iter(|| black_box(decode_request(black_box(&bytes)).unwrap()))
        });
        // The previous fast path, serde_json alone, side by side in the same run.
        group.bench_function(format!("{name}_decode_serde_json"), |b| {
            b.iter(|| black_box(serde_json::from_slice::<RerankRequest>(black_box(&bytes)).unwrap()))
        });
        group.bench_function(format!("{name}_decode_and_validate"), |b| {
            b.iter(|| black_box(engine.prepare(decode_request(black_box(&bytes)).unwrap()).unwrap()))
        });
    }
    group.finish();
}

fn grpc_decode(c: &mut Criterion) {
    let json = decode_request(&body(500, 64, false)).unwrap();
    let message = proto::RerankRequest {
        algorithm: json.algorithm.clone(),
        k: json.k.map(|k| k as u32),
        lambda: json.lambda,
        candidates: json
            .candidates
            .iter()
            .map(|c| proto::Candidate {
                id: c.id.clone(),
                score: c.score,
                category: c.category.clone(),
                embedding: c.embedding.clone().unwrap_or_default(),
                group: None,
            })
            .collect(),
        ..Default::default()
    };
    let bytes = message.encode_to_vec();
    let mut group = c.benchmark_group("grpc_decode_N500_d64");
    group.warm_up_time(Duration::from_secs(1)).measurement_time(Duration::from_secs(3)).sample_size(40);
    group.throughput(Throughput::Bytes(bytes.len() as u64));
    group.bench_function("medley_candidate", |b| {
        b.iter(|| black_box(proto::RerankRequest::decode(black_box(bytes.as_slice())).unwrap()))
    });
    group.bench_function("prost_derived", |b| {
        b.iter(|| black_box(DerivedRequest::decode(black_box(bytes.as_slice())).unwrap()))
    });
    group.finish();
}

fn handoff(c: &mut Criterion) {
    let runtime = tokio::runtime::Builder::new_multi_thread().worker_threads(1).enable_all().build().unwrap();
    let pool = Pool::new(1, 1).unwrap();
    let mut group = c.benchmark_group("pool");
    group.warm_up_time(Duration::from_secs(1)).measurement_time(Duration::from_secs(3));
    group.bench_function("inline_empty_job", |b| {
        b.iter(|| runtime.block_on(async { black_box(pool.run(0, |_| 1_u8).await.unwrap()) }))
    });
    group.bench_function("pool_empty_job", |b| {
        b.iter(|| runtime.block_on(async { black_box(pool.run(u64::MAX, |_| 1_u8).await.unwrap()) }))
    });
    group.finish();
}

/// `Engine::prepare` alone: a decoded request (as the gRPC front end hands it over) with its
/// embeddings inline, and the same slate as ids and scores looked up in a catalog of its items.
fn validate(c: &mut Criterion) {
    let inline = decode_request(&body(500, 64, false)).unwrap();
    let dir = std::env::temp_dir().join(format!("medley-bench-{}", std::process::id()));
    std::fs::create_dir_all(&dir).unwrap();
    let path = dir.join("catalog.parquet");
    write_catalog(&inline, &path);
    let catalog = medley::serve::catalog::Catalog::load(&path, 4096).unwrap();
    let _ = std::fs::remove_dir_all(&dir);
    let mut ids_only = inline.clone();
    for c in &mut ids_only.candidates {
        c.embedding = None;
        c.category = None;
    }
    let engine = Engine::new(Config::embedded_default(), 1);
    let with_catalog =
        Engine::new(Config::embedded_default(), 1).with_catalog(Some(std::sync::Arc::new(catalog)));
    let mut group = c.benchmark_group("validate_N500_d64");
    group.warm_up_time(Duration::from_secs(1)).measurement_time(Duration::from_secs(3)).sample_size(60);
    group.bench_function("inline", |b| {
        b.iter_batched(|| inline.clone(), |r| black_box(engine.prepare(r).unwrap()), BatchSize::SmallInput)
    });
    group.bench_function("catalog_ids", |b| {
        b.iter_batched(
            || ids_only.clone(),
            |r| black_box(with_catalog.prepare(r).unwrap()),
            BatchSize::SmallInput,
        )
    });
    group.finish();
}

/// The request's items as a Parquet item catalog (id, embedding, category).
fn write_catalog(request: &RerankRequest, path: &std::path::Path) {
    let c = &request.candidates;
    let d = c[0].embedding.as_ref().unwrap().len();
    let rows = c.iter().flat_map(|c| c.embedding.clone().unwrap()).collect();
    let ids = c.iter().map(|c| &c.id);
    let categories = c.iter().map(|c| c.category.clone().unwrap());
    medley::serve::catalog::write_parquet(path, ids, rows, d, categories).unwrap();
}

criterion_group!(benches, decode, grpc_decode, handoff, validate);
criterion_main!(benches);
