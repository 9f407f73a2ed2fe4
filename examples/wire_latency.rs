//! Latency of one (500 candidates, d = 64, k = 50) DPP request through a running server, over
//! each wire: JSON arrays, `embedding_b64`, and gRPC. Bodies are serialised once before timing
//! (gRPC sends the encoded message as bytes through a pass-through codec), requests go one at a
//! time on one kept-alive connection, and the p50/p99 of each wire are printed.
//!
//! ```text
//! cargo build --release --bin medley && target/release/medley serve &
//! cargo run --release --example wire_latency -- --http 127.0.0.1:8080 --grpc 127.0.0.1:8082 --requests 2000
//! ```
//! `--grpc` may be left out (an older server without gRPC); `--wires json` measures one wire;
//! `--candidates 1` measures the floor of a call (client, transport, wake-ups) with a slate of
//! one.
//!
//! The `ids` wire sends ids and scores only, for a server whose item catalog holds the slate's
//! items: `--write-catalog FILE` writes them as Parquet and exits; serve with `[catalog] path =
//! "FILE"` in the config and measure `--wires json,b64,ids,grpc` against that one server.

use std::time::{Duration, Instant};

use medley::api::wire::encode_b64_embedding;
use medley::grpc::proto;
use serde_json::json;

/// One candidate: id, score, category, embedding.
type Row = (String, f64, String, Vec<f32>);

/// The request: `n` candidates (500 unless told) in 6 categories, 64-dimension embeddings, DPP,
/// k = 50.
fn slate(n: usize) -> (Vec<Row>, serde_json::Value) {
    let mut state = 0x5EED_u64;
    let mut next = move || {
        state ^= state << 13;
        state ^= state >> 7;
        state ^= state << 17;
        (state >> 11) as f64 / (1u64 << 53) as f64
    };
    let rows: Vec<Row> = (0..n)
        .map(|i| {
            let e: Vec<f32> = (0..64).map(|_| (next() - 0.5) as f32).collect();
            (format!("tent-{i:04}"), next(), format!("cat-{}", i % 6), e)
        })
        .collect();
    let head = json!({"algorithm": "dpp", "lambda": 0.3, "k": 50});
    (rows, head)
}

/// The slate's items as an item catalog.
fn write_catalog(rows: &[Row], path: &str) {
    let values = rows.iter().flat_map(|r| r.3.iter().copied()).collect();
    let (ids, categories) = (rows.iter().map(|r| &r.0), rows.iter().map(|r| &r.2));
    medley::serve::catalog::write_parquet(std::path::Path::new(path), ids, values, 64, categories).unwrap();
}

/// `wire`: `json` (arrays), `b64` or `ids` (ids and scores only).
fn json_body(rows: &[Row], head: &serde_json::Value, wire: &str) -> Vec<u8> {
    let candidates: Vec<serde_json::Value> = rows
        .iter()
        .map(|(id, score, cat, e)| {
            if wire == "ids" {
                return json!({"id": id, "score": score});
            }
            let mut c = json!({"id": id, "score": score, "category": cat});
            if wire == "b64" {
                c["embedding_b64"] = json!(encode_b64_embedding(e));
            } else {
                c["embedding"] = json!(e);
            }
            c
        })
        .collect();
    let mut body = head.clone();
    body["candidates"] = json!(candidates);
    serde_json::to_vec(&body).unwrap()
}

fn proto_body(rows: &[Row]) -> Vec<u8> {
    let request = proto::RerankRequest {
        algorithm: Some("dpp".into()),
        lambda: Some(0.3),
        k: Some(50),
        candidates: rows
            .iter()
            .map(|(id, score, cat, e)| proto::Candidate {
                id: id.clone(),
                score: *score,
                category: Some(cat.clone()),
                embedding: e.clone(),
                group: None,
            })
            .collect(),
        ..Default::default()
    };
    prost::Message::encode_to_vec(&request)
}

/// A codec that sends and receives already-encoded messages as bytes.
#[derive(Debug, Clone, Default)]
struct Raw;

impl tonic::codec::Codec for Raw {
    type Encode = bytes::Bytes;
    type Decode = bytes::Bytes;
    type Encoder = Raw;
    type Decoder = Raw;
    fn encoder(&mut self) -> Raw {
        Raw
    }
    fn decoder(&mut self) -> Raw {
        Raw
    }
}

impl tonic::codec::Encoder for Raw {
    type Item = bytes::Bytes;
    type Error = tonic::Status;
    fn encode(
        &mut self,
        item: bytes::Bytes,
        dst: &mut tonic::codec::EncodeBuf<'_>,
    ) -> Result<(), tonic::Status> {
        bytes::BufMut::put_slice(dst, &item);
        Ok(())
    }
}

impl tonic::codec::Decoder for Raw {
    type Item = bytes::Bytes;
    type Error = tonic::Status;
    fn decode(
        &mut self,
        src: &mut tonic::codec::DecodeBuf<'_>,
    ) -> Result<Option<bytes::Bytes>, tonic::Status> {
        let n = bytes::Buf::remaining(src);
        Ok(Some(bytes::Buf::copy_to_bytes(src, n)))
    }
}

fn percentiles(mut t: Vec<Duration>) -> (f64, f64) {
    t.sort();
    let at = |q: f64| t[((t.len() as f64 * q) as usize).min(t.len() - 1)].as_secs_f64() * 1e3;
    (at(0.5), at(0.99))
}

#[tokio::main(flavor = "current_thread")]
async fn main() {
    let args: Vec<String> = std::env::args().skip(1).collect();
    let arg = |name: &str| args.iter().position(|a| a == name).and_then(|i| args.get(i + 1)).cloned();
    let http = arg("--http").unwrap_or_else(|| "127.0.0.1:8080".into());
    let grpc = arg("--grpc");
    let n: usize = arg("--requests").and_then(|r| r.parse().ok()).unwrap_or(2000);
    let wires = arg("--wires").unwrap_or_else(|| "json,b64,grpc".into());
    let candidates: usize = arg("--candidates").and_then(|c| c.parse().ok()).unwrap_or(500);
    let (rows, head) = slate(candidates);
    if let Some(path) = arg("--write-catalog") {
        write_catalog(&rows, &path);
        println!("wrote the slate's {candidates} items to {path}");
        return;
    }
    let client = reqwest::Client::new();
    println!("({candidates}, 64, 50) DPP, {n} sequential requests per wire, after 50 to warm up");
    println!("{:<10} {:>10} {:>10} {:>10}", "wire", "bytes", "p50 ms", "p99 ms");
    for wire in wires.split(',') {
        let mut times = Vec::with_capacity(n);
        let bytes = match wire {
            "json" | "b64" | "ids" => {
                let body = bytes::Bytes::from(json_body(&rows, &head, wire));
                let url = format!("http://{http}/v1/rerank");
                for i in 0..n + 50 {
                    let started = Instant::now();
                    let r = client
                        .post(&url)
                        .header("content-type", "application/json")
                        .body(body.clone())
                        .send()
                        .await
                        .unwrap();
                    assert_eq!(r.status(), 200, "{wire}: {}", r.text().await.unwrap_or_default());
                    r.bytes().await.unwrap();
                    if i >= 50 {
                        times.push(started.elapsed());
                    }
                }
                body.len()
            }
            "grpc" => {
                let Some(addr) = &grpc else { continue };
                let body = bytes::Bytes::from(proto_body(&rows));
                let channel = tonic::transport::Channel::from_shared(format!("http://{addr}"))
                    .unwrap()
                    .connect()
                    .await
                    .unwrap();
                let mut grpc = tonic::client::Grpc::new(channel);
                let path = tonic::codegen::http::uri::PathAndQuery::from_static("/medley.v1.Reranker/Rerank");
                for i in 0..n + 50 {
                    let started = Instant::now();
                    grpc.ready().await.unwrap();
                    let r = grpc.unary(tonic::Request::new(body.clone()), path.clone(), Raw).await.unwrap();
                    std::hint::black_box(r.into_inner());
                    if i >= 50 {
                        times.push(started.elapsed());
                    }
                }
                body.len()
            }
            other => panic!("unknown wire {other}: json, b64, ids or grpc"),
        };
        let (p50, p99) = percentiles(times);
        println!("{wire:<10} {bytes:>10} {p50:>10.3} {p99:>10.3}");
    }
}
