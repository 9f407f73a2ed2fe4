//! medley's numeric core: a scored candidate list in, a diverse slate out, and the measures that
//! say how diverse and how accurate it is. Pure, synchronous computation: nothing here knows of
//! async runtimes, the network, serialisation or metrics, so the service, the offline tools and
//! bindings to other languages all run exactly these kernels.
//!
//! # Layout
//! - [`model`]: the validated slate ([`RerankInput`]), call parameters ([`Params`]) and the
//!   output ([`Selection`]); everything the kernels trust is checked here, once.
//! - [`diversify`]: the [`Diversifier`] trait, the registry of algorithms (relevance, MMR, DPP,
//!   quota), their SIMD inner loops and slow reference versions.
//! - [`measures`]: category entropy, intra-list distance, coverage, Gini, and how two slates of
//!   one request differ (overlap, rank-biased overlap).
//! - [`evaluate`]: the replay metrics: nDCG@k and recall@k, standard and candidate-restricted,
//!   α-nDCG@k, and position-debiased clicks (IPS).
//! - [`bootstrap`]: the streaming Poisson bootstrap behind the replay's confidence intervals.
//! - [`replay`]: the replay grid's accumulators (per-cell sums, replicate sums, exposure) and
//!   the means and intervals read off them.
//! - [`fairness`]: the ranked group fairness floor (FA*IR's `m(t)` table) every diversifier
//!   respects when a slate carries one.
//! - [`fuzz`]: the invariant checks the `diversify` fuzz target drives.
//!
//! # One call
//! A caller builds [`RerankInput`] from its candidates (unique ids, finite scores, embeddings of
//! one dimension, normalised to unit length; scores min-max normalised unless told otherwise) and
//! [`Params`] (k, lambda), looks the algorithm up with [`diversify::by_name`], and calls
//! [`Diversifier::select`] with a reusable [`Workspace`]. The result lists candidate indices in
//! slate order; [`measures`] describes how diverse it is.
//!
//! ```
//! use medley_core::{diversify, measures, CandidateInput, Limits, Params, RerankInput, ScoreTransform, Workspace};
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

pub mod bootstrap;
pub mod diversify;
pub mod evaluate;
pub mod fairness;
pub mod fuzz;
pub mod measures;
pub mod model;
pub mod replay;

pub use diversify::{Diversifier, KernelError, Workspace};
pub use model::{CandidateInput, Limits, Params, RerankInput, ScoreTransform, Selection, ValidationError};
