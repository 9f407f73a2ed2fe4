//! medley re-ranks a scored candidate list into a diverse slate.
//!
//! # Layout
//! The numeric core is its own crate, `medley-core` (validated slates, kernels, measures, replay
//! metrics, the fairness floor), re-exported here as [`model`], [`diversify`], [`measures`],
//! [`evaluate`] and [`fairness`]. This
//! crate is the service and its tools, one folder per layer, each importing only the layers
//! below it (`medley-core` < [`api`] < [`serve`] < [`http`] < [`grpc`]; [`offline`] beside
//! [`http`]):
//! - [`api`]: the wire contract every front end shares: JSON request and response types, their
//!   decoding, and [`api::RequestError`] with the stable codes and paths.
//! - [`serve`]: the running service: config and hot swap, the engine, the kernel pool, shadows,
//!   metrics, shutdown.
//! - [`http`]: the HTTP front end: routers, middleware, bodies, and [`http::serve`].
//! - [`grpc`]: the gRPC front end (`medley.v1.Reranker`), serving through the HTTP front end's
//!   state, so both share permits, deadline, pool and metrics; [`grpc::serve`].
//! - [`offline`]: `medley rerank`, `medley sample` and `medley replay`.
//! - [`cli`]: the command-line types; [`fuzz`]: the bodies of the fuzz targets in `fuzz/`,
//!   replayed over their committed corpus by `tests/fuzz_corpus.rs`.
//!
//! # One request
//! `POST /v1/rerank` reaches [`http`], whose middleware counts it and takes a concurrency permit
//! (or answers 503). The handler takes the body under the size limit and the in-flight memory
//! budget, loads the live [`serve::engine::Engine`] snapshot once, and
//! [`serve::engine::Engine::prepare`] decodes the JSON ([`api::wire`]), resolves the slice and its
//! defaults and validates everything into a [`RerankInput`] and [`Params`]. The kernel runs on
//! the [`serve::pool`] (inline when the slate is small), the [`measures`] describe the slate, and
//! the handler records `medley_rerank_duration_seconds` and the diversity metrics before
//! answering; when the slice has a shadow and the request is in its sample, the validated input
//! and the primary picks go to [`serve::shadow`], off the request path. `medley rerank`
//! ([`offline::batch`]) runs the same `prepare` and `run` on JSONL lines without a runtime.
//!
//! See `medley-core`'s crate documentation for one call of the kernels without the service.

#![forbid(unsafe_code)]

pub mod api;
pub mod cli;
pub mod fuzz;
pub mod grpc;
pub mod http;
pub mod offline;
pub mod serve;

pub use medley_core::{diversify, evaluate, fairness, measures, model};
pub use medley_core::{
    CandidateInput, Diversifier, KernelError, Limits, Params, RerankInput, ScoreTransform, Selection,
    ValidationError, Workspace,
};

/// Helpers shared by the unit tests.
#[cfg(test)]
pub(crate) mod testing {
    /// xorshift64 (Marsaglia, "Xorshift RNGs", 2003), for reproducible random numbers.
    pub(crate) struct Rng(pub(crate) u64);

    impl Rng {
        pub(crate) fn next(&mut self) -> u64 {
            self.0 ^= self.0 << 13;
            self.0 ^= self.0 >> 7;
            self.0 ^= self.0 << 17;
            self.0
        }
    }
}
