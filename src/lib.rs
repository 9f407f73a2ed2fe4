//! medley re-ranks a scored candidate list into a diverse slate.
//!
//! # Layout
//! - [`model`]: the validated slate ([`RerankInput`]), call parameters ([`Params`]) and the
//!   output ([`Selection`]); everything the kernels trust is checked here, once.
//! - [`diversify`]: the [`Diversifier`] trait, the registry of algorithms (relevance, MMR, DPP,
//!   quota), their SIMD inner loops and slow reference versions.
//! - [`measures`]: category entropy, intra-list distance, coverage and Gini.
//!
//! # One call
//! A caller builds [`RerankInput`] from its candidates (unique ids, finite scores, embeddings of
//! one dimension, normalised to unit length; scores min-max normalised unless told otherwise) and
//! [`Params`] (k, lambda), looks the algorithm up with [`diversify::by_name`], and calls
//! [`Diversifier::select`] with a reusable [`Workspace`]. The result lists candidate indices in
//! slate order; [`measures`] describes how diverse it is.

#![forbid(unsafe_code)]

pub mod diversify;
pub mod measures;
pub mod model;

pub use diversify::{Diversifier, KernelError, Workspace};
pub use model::{CandidateInput, Limits, Params, RerankInput, ScoreTransform, Selection, ValidationError};
