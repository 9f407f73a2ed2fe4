//! medley re-ranks a scored candidate list into a diverse slate.
//!
//! # Layout
//! - [`model`]: the validated slate ([`RerankInput`]), call parameters ([`Params`]) and the
//!   output ([`Selection`]); everything the kernels trust is checked here, once.
//! - [`diversify`]: the [`Diversifier`] trait, the registry of algorithms (relevance, MMR, DPP,
//!   quota), their SIMD inner loops and slow reference versions.
//! - [`measures`]: category entropy, intra-list distance, coverage and Gini.
//! - [`config`]: the TOML config, validated into slices and server settings.
//! - [`wire`]: the JSON request, response and error DTOs.
//! - [`engine`]: a config snapshot that turns a wire request into validated input and serves it.
//! - [`pool`]: the bounded CPU pool kernels run on.
//! - [`http`]: routers, middleware and [`http::serve`]; [`metrics`] and [`shutdown`] beside it.
//! - [`batch`]: JSONL in, JSONL out, on every core; [`cli`]: the command-line types.
//! - [`sample`]: the demo corpus (an invented outdoor-gear shop); [`replay`] and
//!   [`replay_plot`]: the offline accuracy–diversity frontier.
//! - [`fuzz`]: the invariant checks the fuzz targets in `fuzz/` drive, replayed over their
//!   committed corpus by `tests/fuzz_corpus.rs`.
//!
//! # One request
//! `POST /v1/rerank` reaches [`http`], whose middleware counts it and takes a concurrency permit
//! (or answers 503). The handler reads the body under the size limit, loads the live
//! [`engine::Engine`] snapshot once, and [`engine::Engine::prepare`] decodes the JSON
//! ([`wire`]), resolves the slice and its defaults and validates everything into a
//! [`RerankInput`] and [`Params`]. The kernel runs on the [`pool`] (inline when the slate is
//! small), the [`measures`] describe the slate, and the handler records
//! `medley_rerank_duration_seconds` and the diversity metrics before answering. `medley rerank`
//! ([`batch`]) runs the same `prepare` and `run` on JSONL lines without a runtime.
//!
//! # One call of the core
//! A caller builds [`RerankInput`] from its candidates (unique ids, finite scores, embeddings of
//! one dimension, normalised to unit length; scores min-max normalised unless told otherwise) and
//! [`Params`] (k, lambda), looks the algorithm up with [`diversify::by_name`], and calls
//! [`Diversifier::select`] with a reusable [`Workspace`]. The result lists candidate indices in
//! slate order; [`measures`] describes how diverse it is.
//!
//! ```
//! use medley::{diversify, measures, CandidateInput, Limits, Params, RerankInput, ScoreTransform, Workspace};
//!
//! // Three tents that look alike and one stove: relevance would show the tents first.
//! let item = |id: &str, score: f64, cat: &str, e: [f32; 2]| CandidateInput {
//!     id: id.into(), score, category: Some(cat.into()), embedding: Some(e.to_vec()),
//! };
//! let candidates = vec![
//!     item("tent-204", 0.93, "tents", [1.0, 0.05]),
//!     item("tent-311", 0.91, "tents", [1.0, 0.0]),
//!     item("tent-118", 0.90, "tents", [0.98, 0.1]),
//!     item("stove-07", 0.60, "stoves", [0.0, 1.0]),
//! ];
//! let limits = Limits::default();
//! let input = RerankInput::new(candidates, ScoreTransform::MinMax, true, &limits)?;
//! let params = Params::new(2, 0.5, &limits)?;
//! let dpp = diversify::by_name("dpp").expect("registered");
//! let slate = dpp.select(&input, &params, &mut Workspace::new())?;
//! let ids: Vec<&str> = slate.indices.iter().map(|&i| input.ids()[i].as_str()).collect();
//! assert_eq!(ids, ["tent-204", "stove-07"]);
//! assert_eq!(measures::category_entropy_bits(&input, &slate.indices), 1.0);
//! # Ok::<(), Box<dyn std::error::Error>>(())
//! ```

#![forbid(unsafe_code)]

pub mod batch;
pub mod cli;
pub mod config;
pub mod diversify;
pub mod engine;
pub mod fuzz;
pub mod http;
pub mod measures;
pub mod metrics;
pub mod model;
pub mod pool;
pub mod reload;
pub mod replay;
pub mod replay_plot;
pub mod sample;
pub mod shadow;
pub mod shutdown;
pub mod wire;

pub use diversify::{Diversifier, KernelError, Workspace};
pub use model::{CandidateInput, Limits, Params, RerankInput, ScoreTransform, Selection, ValidationError};
