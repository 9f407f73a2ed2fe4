//! `medley.RerankError`: a `ValueError` with the service's stable `code` and the `path` of the
//! argument at fault. Codes are the HTTP API's ([`ValidationError::code`]); paths name the
//! Python arguments (`embeddings[3]`, `scores[0]`, `lam`, `profile.drama`), since a caller of
//! `medley.rerank` never wrote `candidates[3].embedding`.

use medley_core::model::{FairnessField, Field, ValidationError};
use medley_core::KernelError;
use pyo3::prelude::*;

pyo3::create_exception!(
    medley,
    RerankError,
    pyo3::exceptions::PyValueError,
    "A slate or its parameters were refused: `.code` is the service's snake_case code \
     (e.g. `lambda_out_of_range`), `.path` the argument at fault (e.g. `embeddings[3]`) or None."
);

/// A `RerankError` with `code`, `path` and `message`.
pub(crate) fn raise(code: &str, path: Option<String>, message: String) -> PyErr {
    let err = RerankError::new_err(message.clone());
    Python::attach(|py| {
        let value = err.value(py);
        // Attribute assignment on a fresh exception instance cannot fail; if it ever did the
        // caller would still get the RerankError with its message.
        let _ = value.setattr("code", code);
        let _ = value.setattr("path", path);
        let _ = value.setattr("message", message);
    });
    err
}

/// The argument at fault for a validation error, in the Python API's names.
pub(crate) fn path_of(e: &ValidationError, have_embeddings: bool) -> Option<String> {
    let field = |f: Field| match f {
        Field::Id => "ids",
        Field::Score => "scores",
        Field::Embedding => "embeddings",
        Field::Category => "categories",
    };
    match *e {
        ValidationError::TooManyCandidates { .. } => Some("scores".into()),
        ValidationError::TooLong { index, field: f, .. } | ValidationError::NonFinite { index, field: f } => {
            Some(format!("{}[{index}]", field(f)))
        }
        ValidationError::DuplicateId { index, .. } => Some(format!("ids[{index}]")),
        ValidationError::MissingEmbedding { .. } if !have_embeddings => Some("embeddings".into()),
        ValidationError::MissingEmbedding { index, .. }
        | ValidationError::DimensionMismatch { index, .. }
        | ValidationError::DimensionOutOfRange { index, .. }
        | ValidationError::ZeroNorm { index } => Some(format!("embeddings[{index}]")),
        ValidationError::KOutOfRange { .. } => Some("k".into()),
        ValidationError::LambdaOutOfRange { .. } => Some("lam".into()),
        ValidationError::WindowOutOfRange { .. } => Some("window".into()),
        ValidationError::InvalidProfile { category: Some(ref c), .. } => Some(format!("profile.{c}")),
        ValidationError::InvalidProfile { category: None, .. } => Some("profile".into()),
        ValidationError::InvalidFairness { field: FairnessField::Share, .. } => Some("fairness.share".into()),
        ValidationError::InvalidFairness { field: FairnessField::Alpha, .. } => Some("fairness.alpha".into()),
    }
}

/// A validation error as a `RerankError`.
pub(crate) fn invalid(e: &ValidationError, have_embeddings: bool) -> PyErr {
    raise(e.code(), path_of(e, have_embeddings), e.to_string())
}

/// A kernel refusing validated input: a bug between validation and kernel (code `internal`).
pub(crate) fn kernel(e: &KernelError) -> PyErr {
    raise("internal", None, format!("internal error: {e}"))
}

/// A badly shaped argument (code `invalid_field`, as the HTTP API names a field of the wrong
/// type or shape).
pub(crate) fn field(path: &str, message: String) -> PyErr {
    raise("invalid_field", Some(path.to_owned()), message)
}
