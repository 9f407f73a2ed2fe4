//! Invariant checks driven by arbitrary bytes: the body of the `decode` cargo-fuzz target in
//! `fuzz/` (the `diversify` target's is `medley_core::fuzz`), kept here so that `tests/fuzz_corpus.rs` replays the committed corpus through the very same
//! code on stable Rust in every `cargo test`.
//!
//! Each function returns normally for every input the service must handle, which is every
//! input; it panics only when an invariant breaks, and a panic is a finding.

use std::sync::OnceLock;

use crate::serve::config::{Config, DEFAULT_TOML};
use crate::serve::engine::Engine;
use medley_core::fuzz::{check_selection, expected_len};
use medley_core::Workspace;

/// Target `diversify` lives in `medley-core`, beside the kernels it exercises.
pub use medley_core::fuzz::diversifiers;

fn engine() -> &'static Engine {
    static ENGINE: OnceLock<Engine> = OnceLock::new();
    ENGINE.get_or_init(|| {
        Engine::new(Config::from_toml(DEFAULT_TOML).expect("the embedded config is valid"), 1)
    })
}

/// Target `decode`: arbitrary bytes through the request decoder, the validator and, when they
/// accept, the kernel and the response encoder, exactly as `POST /v1/rerank` runs them.
///
/// # Panics
/// When a rejected body has an empty error code or message, or an accepted one yields a slate
/// that is not a duplicate-free list of `min(k, N)` (fewer only under a category cap) valid
/// indices, or a response that does not encode.
pub fn decode_and_serve(bytes: &[u8]) {
    let prepared = match crate::api::wire::decode_request(bytes).and_then(|r| engine().prepare(r)) {
        Ok(p) => p,
        Err(e) => {
            assert!(!e.code().is_empty() && !e.to_string().is_empty(), "an error without a code or message");
            return;
        }
    };
    let (n, k, cap) = (prepared.input.len(), prepared.params.k(), prepared.params.max_per_category());
    let reranked = prepared.run(&mut Workspace::new()).expect("a validated request always runs");
    check_selection(&reranked.prepared.input, &reranked.selection.indices, k, cap, "decode");
    assert_eq!(
        reranked.selection.indices.len(),
        expected_len(&reranked.prepared.input, k, cap),
        "slate length"
    );
    let body = serde_json::to_vec(&reranked.to_response()).expect("a response always encodes");
    assert!(n == 0 || !body.is_empty());
}
