//! [`RequestError`]: every reason one re-rank request cannot be served, with the stable
//! snake_case code and the JSON path at fault that every front end reports. Front ends add only
//! their own status (HTTP in `http/error.rs`).

use medley_core::model::{Field, ValidationError};
use medley_core::KernelError;

/// Why one request cannot be served. Codes are part of the wire contract.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum RequestError {
    /// The body is not JSON.
    #[error("the body is not valid JSON: {message}")]
    MalformedJson {
        /// serde_json's description, with line and column.
        message: String,
    },
    /// JSON of the wrong shape: a wrong type, a missing or repeated field.
    #[error("{message}")]
    InvalidField {
        /// serde_json's description.
        message: String,
        /// Path of the field at fault.
        path: Option<String>,
    },
    /// `request_id`, `unit_id` or `slice` longer than [`MAX_LABEL_BYTES`](medley_core::model::MAX_LABEL_BYTES) (the same code as an
    /// over-long candidate id).
    #[error("{field} is {got} bytes; the limit is {max}")]
    LabelTooLong {
        /// The request field.
        field: &'static str,
        /// Its length in bytes.
        got: usize,
        /// The limit.
        max: usize,
    },
    /// A candidate's `group` longer than 1024 bytes.
    #[error("candidate {index} has a group of {got} bytes; the limit is 1024")]
    GroupTooLong {
        /// Candidate index.
        index: usize,
        /// Its length in bytes.
        got: usize,
    },
    /// No slice of that name is configured.
    #[error("unknown slice {name:?}; configured slices: {known}")]
    UnknownSlice {
        /// Requested slice.
        name: String,
        /// Configured names, comma-separated.
        known: String,
    },
    /// The slice refuses per-request overrides of this field.
    #[error(
        "slice {slice:?} is locked: it serves its configured {field} and refuses overrides; drop the field"
    )]
    SliceLocked {
        /// The slice.
        slice: String,
        /// `algorithm`, `lambda` or `k`.
        field: &'static str,
    },
    /// No diversifier of that name.
    #[error("unknown algorithm {name:?}; known: {known}")]
    UnknownAlgorithm {
        /// Requested name.
        name: String,
        /// Registry names, comma-separated.
        known: String,
    },
    /// The algorithm calibrates to a taste profile and neither the request nor its slice has one.
    #[error("{algorithm} calibrates the slate to a taste profile: send \"profile\": {{\"category\": weight, ...}}")]
    MissingProfile {
        /// The algorithm's name.
        algorithm: &'static str,
    },
    /// `embedding_b64` that does not decode to f32 values.
    #[error("candidate {index}: embedding_b64 {reason}")]
    InvalidBase64 {
        /// Candidate index.
        index: usize,
        /// What is wrong.
        reason: String,
    },
    /// Both `embedding` and `embedding_b64` on one candidate.
    #[error("candidate {index} has both embedding and embedding_b64; send one")]
    ConflictingEmbedding {
        /// Candidate index.
        index: usize,
    },
    /// A candidate without an embedding whose id the item catalog does not hold, for an
    /// algorithm that needs embeddings (and a slice whose `unknown_items` is `refuse`).
    #[error(
        "candidate {index}: id {id:?} is not in the item catalog, and {algorithm} needs its embedding; send \"embedding\", or set unknown_items = \"drop\" on the slice"
    )]
    UnknownItem {
        /// Candidate index, as sent.
        index: usize,
        /// The id.
        id: String,
        /// The algorithm that needs the embedding.
        algorithm: &'static str,
    },
    /// A value check on the slate or its parameters.
    #[error("{error}")]
    Invalid {
        /// The check that failed.
        error: ValidationError,
        /// Where the failing candidate's embedding came from (for the path).
        sent: Sent,
    },
    /// A kernel refused validated input: a bug between validation and kernel.
    #[error("internal error: {0}")]
    Kernel(#[from] KernelError),
}

/// Where a candidate's embedding came from: the path of an error about it names that field.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub enum Sent {
    /// `embedding` (or nothing: the path still names `embedding`).
    #[default]
    Json,
    /// `embedding_b64`.
    Base64,
    /// The item catalog's row for the candidate's `id`.
    Catalog,
}

impl RequestError {
    /// The stable snake_case code.
    #[must_use]
    pub fn code(&self) -> &'static str {
        match self {
            Self::MalformedJson { .. } => "malformed_json",
            Self::InvalidField { .. } => "invalid_field",
            Self::LabelTooLong { .. } | Self::GroupTooLong { .. } => "too_long",
            Self::UnknownSlice { .. } => "unknown_slice",
            Self::SliceLocked { .. } => "slice_locked",
            Self::UnknownAlgorithm { .. } => "unknown_algorithm",
            Self::InvalidBase64 { .. } => "invalid_base64",
            Self::ConflictingEmbedding { .. } => "conflicting_embedding",
            Self::UnknownItem { .. } => "unknown_item",
            Self::Invalid { error, .. } => error.code(),
            Self::MissingProfile { .. } => "missing_profile",
            Self::Kernel(_) => "internal",
        }
    }

    /// The JSON path of the field at fault, when one field is.
    #[must_use]
    pub fn path(&self) -> Option<String> {
        let embedding = |index: usize, source: Sent| {
            let field = match source {
                Sent::Json => "embedding",
                Sent::Base64 => "embedding_b64",
                Sent::Catalog => "id",
            };
            Some(format!("candidates[{index}].{field}"))
        };
        match self {
            Self::MalformedJson { .. } | Self::Kernel(_) => None,
            Self::InvalidField { path, .. } => path.clone(),
            Self::LabelTooLong { field, .. } => Some((*field).into()),
            Self::GroupTooLong { index, .. } => Some(format!("candidates[{index}].group")),
            Self::UnknownSlice { .. } => Some("slice".into()),
            Self::SliceLocked { field, .. } => Some((*field).into()),
            Self::UnknownAlgorithm { .. } => Some("algorithm".into()),
            Self::InvalidBase64 { index, .. } => embedding(*index, Sent::Base64),
            Self::ConflictingEmbedding { index } => Some(format!("candidates[{index}]")),
            Self::UnknownItem { index, .. } => Some(format!("candidates[{index}].id")),
            Self::Invalid { error, sent } => match *error {
                ValidationError::TooManyCandidates { .. } => Some("candidates".into()),
                ValidationError::DuplicateId { index, .. } => Some(format!("candidates[{index}].id")),
                ValidationError::TooLong { index, field, .. } => {
                    Some(format!("candidates[{index}].{}", field.name()))
                }
                ValidationError::NonFinite { index, field: Field::Embedding } => embedding(index, *sent),
                ValidationError::NonFinite { index, field } => {
                    Some(format!("candidates[{index}].{}", field.name()))
                }
                ValidationError::MissingEmbedding { index, .. }
                | ValidationError::DimensionMismatch { index, .. }
                | ValidationError::DimensionOutOfRange { index, .. }
                | ValidationError::ZeroNorm { index } => embedding(index, *sent),
                ValidationError::KOutOfRange { .. } => Some("k".into()),
                ValidationError::LambdaOutOfRange { .. } => Some("lambda".into()),
                ValidationError::WindowOutOfRange { .. } => Some("window".into()),
                ValidationError::InvalidProfile { category: Some(ref c), .. } => Some(format!("profile.{c}")),
                ValidationError::InvalidProfile { category: None, .. } => Some("profile".into()),
                ValidationError::InvalidFairness { field, .. } => Some(format!("fairness.{}", field.name())),
            },
            Self::MissingProfile { .. } => Some("profile".into()),
        }
    }

    /// True for errors that are the service's fault, not the caller's.
    #[must_use]
    pub fn is_internal(&self) -> bool {
        matches!(self, Self::Kernel(_))
    }
}
