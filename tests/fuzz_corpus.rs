//! The fuzz targets' bodies (`medley::fuzz`) on stable Rust: every committed corpus file under
//! fuzz/corpus/ (seeds, plus inputs libFuzzer found that reached new coverage, minimised with
//! `cargo fuzz cmin`), and a seeded sweep of random bytes. A panic here is a fuzz finding
//! reproduced; the file name says which input.

mod common;

use std::path::Path;

use common::Rng;

fn corpus(target: &str) -> Vec<(String, Vec<u8>)> {
    let dir = Path::new(env!("CARGO_MANIFEST_DIR")).join("fuzz/corpus").join(target);
    let mut files: Vec<_> = std::fs::read_dir(&dir)
        .unwrap_or_else(|e| panic!("{}: {e}", dir.display()))
        .map(|e| e.unwrap().path())
        .filter(|p| p.is_file())
        .collect();
    files.sort();
    files.into_iter().map(|p| (p.display().to_string(), std::fs::read(&p).unwrap())).collect()
}

/// A fuzz target's body.
type Check = fn(&[u8]);

fn replay(target: &str, check: Check) {
    let files = corpus(target);
    assert!(files.len() >= 5, "{target}: the seed corpus is committed");
    for (name, bytes) in &files {
        if std::panic::catch_unwind(|| check(bytes)).is_err() {
            panic!("fuzz target {target} fails on {name}");
        }
    }
}

#[test]
fn decode_corpus_replays_cleanly() {
    replay("decode", medley::fuzz::decode_and_serve);
}

#[test]
fn grpc_corpus_replays_cleanly() {
    replay("grpc", medley::fuzz::grpc_decode_and_serve);
}

#[test]
fn diversify_corpus_replays_cleanly() {
    replay("diversify", medley::fuzz::diversifiers);
}

/// Random bytes and random single-byte edits of the corpus, seeded, so every `cargo test` also
/// explores a little beyond the committed files.
#[test]
fn seeded_random_inputs_keep_every_invariant() {
    let mut rng = Rng(0x6d65_646c_6579);
    for _ in 0..3_000 {
        let len = rng.below(400);
        let bytes: Vec<u8> = (0..len).map(|_| rng.next_u64() as u8).collect();
        medley::fuzz::diversifiers(&bytes);
        medley::fuzz::decode_and_serve(&bytes);
        medley::fuzz::grpc_decode_and_serve(&bytes);
    }
    for (target, check) in
        [("grpc", medley::fuzz::grpc_decode_and_serve as Check), ("decode", medley::fuzz::decode_and_serve)]
    {
        for (_, seed) in corpus(target) {
            for _ in 0..50 {
                let mut bytes = seed.clone();
                if !bytes.is_empty() {
                    let at = rng.below(bytes.len());
                    bytes[at] = rng.next_u64() as u8;
                }
                check(&bytes);
            }
        }
    }
}
