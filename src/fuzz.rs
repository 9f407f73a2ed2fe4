//! Invariant checks driven by arbitrary bytes: the bodies of the `decode` and `grpc` cargo-fuzz
//! targets in `fuzz/` (the `diversify` target's is `medley_core::fuzz`), kept here so that `tests/fuzz_corpus.rs` replays the committed corpus through the very same
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

/// Target `grpc`: arbitrary bytes as a `medley.v1.RerankRequest` message, through our decoder
/// (the hand-written `Candidate`, `crate::grpc::candidate`), then the validator and the kernel
/// as a gRPC call runs them.
///
/// # Panics
/// When prost's derived decoder of the same candidates refuses bytes ours accepts, or the two
/// read different candidates; when our message does not read back from its own encoding; or on
/// any check of [`decode_and_serve`] for the decoded request.
pub fn grpc_decode_and_serve(bytes: &[u8]) {
    use crate::grpc::candidate::reference::{key, Key, RerankRequest as DerivedRequest};
    use prost::Message;
    let Ok(message) = crate::grpc::proto::RerankRequest::decode(bytes) else { return };
    // prost's derive skips fields it does not declare, so it may accept what ours refuses, but
    // never the other way round.
    let derived = DerivedRequest::decode(bytes).expect("prost's derive refuses a message ours reads");
    let ours = |m: &crate::grpc::proto::RerankRequest| -> Vec<Key> {
        m.candidates.iter().map(|c| key(&c.id, c.score, &c.category, &c.group, &c.embedding)).collect()
    };
    let theirs = |m: &DerivedRequest| -> Vec<Key> {
        m.candidates.iter().map(|c| key(&c.id, c.score, &c.category, &c.group, &c.embedding)).collect()
    };
    assert_eq!(ours(&message), theirs(&derived), "the candidates prost's derive reads");
    // Our encoding reads back to the same candidates and the same length (the profile is a hash
    // map, so its entries may be written in another order). A score of -0.0 comes back as 0.0:
    // proto3 leaves a field equal to its default unwritten, and prost's derive compares with
    // `!= 0.0` too.
    let encoded = message.encode_to_vec();
    assert_eq!(encoded.len(), message.encoded_len(), "encoded_len");
    let again =
        crate::grpc::proto::RerankRequest::decode(encoded.as_slice()).expect("our encoding reads back");
    let derived_again =
        DerivedRequest::decode(encoded.as_slice()).expect("prost's derive reads our encoding");
    let signless = |keys: Vec<Key>| -> Vec<Key> {
        keys.into_iter()
            .map(|(id, score, c, g, e)| (id, if score == (-0.0f64).to_bits() { 0 } else { score }, c, g, e))
            .collect()
    };
    assert_eq!(ours(&again), signless(ours(&message)), "encode, decode");
    assert_eq!(theirs(&derived_again), signless(ours(&message)), "encode, decode with prost's derive");
    assert_eq!(again.encoded_len(), encoded.len(), "encode, decode, encode");
    let (request, _) = crate::grpc::from_proto(message);
    serve_checked(engine().prepare(request), "grpc");
}

/// Target `decode`: arbitrary bytes through the request decoder, the validator and, when they
/// accept, the kernel and the response encoder, exactly as `POST /v1/rerank` runs them.
///
/// # Panics
/// When a rejected body has an empty error code or message, or an accepted one yields a slate
/// that is not a duplicate-free list of `min(k, N)` (fewer only under a category cap) valid
/// indices, or a response that does not encode.
pub fn decode_and_serve(bytes: &[u8]) {
    serve_checked(crate::api::wire::decode_request(bytes).and_then(|r| engine().prepare(r)), "decode");
}

/// The checks both request targets share: a refusal carries a code and a message; an accepted
/// request yields a duplicate-free list of `min(k, N)` valid indices (fewer only under a
/// category cap) and a response that encodes.
fn serve_checked(prepared: Result<crate::serve::engine::Prepared, crate::api::RequestError>, target: &str) {
    let prepared = match prepared {
        Ok(p) => p,
        Err(e) => {
            assert!(!e.code().is_empty() && !e.to_string().is_empty(), "an error without a code or message");
            return;
        }
    };
    let (n, k, cap) = (prepared.input.len(), prepared.params.k(), prepared.params.max_per_category());
    let reranked = prepared.run(&mut Workspace::new()).expect("a validated request always runs");
    check_selection(&reranked.prepared.input, &reranked.selection.indices, k, cap, target);
    assert_eq!(
        reranked.selection.indices.len(),
        expected_len(&reranked.prepared.input, k, cap),
        "slate length"
    );
    let body = serde_json::to_vec(&reranked.to_response()).expect("a response always encodes");
    assert!(n == 0 || !body.is_empty());
}
