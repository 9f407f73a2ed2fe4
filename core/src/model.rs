//! Validated input and output of one re-ranking call.
//!
//! Everything the kernels trust is built here, once: [`RerankInput`] (the slate: ids, scores,
//! categories, unit embeddings) and [`Params`] (k, lambda, optional per-category cap). Their fields
//! are private and their constructors check every precondition the kernels rely on, so the
//! `diversify` module never re-checks. Wire formats (JSON, base64) live in `http::wire`; this module
//! only sees plain Rust values and reports failures as [`ValidationError`], which names the
//! candidate and the field so the HTTP layer can build a JSON path.

use std::collections::HashMap;

/// The hasher of the per-request maps keyed by caller-sent strings: foldhash, seeded at random
/// per process and per map, so a caller cannot aim for collisions it cannot see (foldhash claims
/// minimal DoS resistance, not a cryptographic guarantee; a slate holds at most
/// `max_candidates` keys).
type KeyedHash = foldhash::fast::RandomState;

/// Longest id, category (and, at the HTTP edge, `request_id`, `unit_id` and `slice`) in bytes.
/// Labels are echoed into responses, logs and metrics, so an unbounded one would let one caller
/// inflate all three; 1 KiB is far above any real item key.
pub const MAX_LABEL_BYTES: usize = 1024;

/// Hard limits on one slate, enforced by [`RerankInput::new`].
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Limits {
    /// Most candidates accepted in one slate.
    pub max_candidates: usize,
    /// Largest embedding dimension accepted.
    pub max_dim: usize,
    /// Largest `k` accepted.
    pub max_k: usize,
}

impl Default for Limits {
    fn default() -> Self {
        Self { max_candidates: 10_000, max_dim: 4_096, max_k: 1_000 }
    }
}

/// How raw scores are mapped to the normalised scores `s_i` that the kernels weigh.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub enum ScoreTransform {
    /// `s_i = (x_i − min) / (max − min)` within the slate; all equal → every `s_i = 1`.
    #[default]
    MinMax,
    /// `s_i = x_i` as given.
    None,
}

impl ScoreTransform {
    /// The wire name of the transform.
    #[must_use]
    pub fn name(self) -> &'static str {
        match self {
            Self::MinMax => "minmax",
            Self::None => "none",
        }
    }

    /// Parses a wire name (`"minmax"` or `"none"`).
    #[must_use]
    pub fn from_name(name: &str) -> Option<Self> {
        match name {
            "minmax" => Some(Self::MinMax),
            "none" => Some(Self::None),
            _ => None,
        }
    }
}

/// One candidate as the caller sent it, before validation.
#[derive(Debug, Clone, PartialEq)]
pub struct CandidateInput {
    /// Caller's item id; unique within the slate.
    pub id: String,
    /// Caller's relevance score; must be finite.
    pub score: f64,
    /// Optional category label.
    pub category: Option<String>,
    /// Optional embedding; when any candidate has one, all must, with one dimension.
    pub embedding: Option<Vec<f32>>,
}

/// The field of a candidate that failed validation.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Field {
    /// `id`
    Id,
    /// `score`
    Score,
    /// `embedding` (or its base64 form)
    Embedding,
    /// `category`
    Category,
}

impl Field {
    /// The wire name of the field.
    #[must_use]
    pub fn name(self) -> &'static str {
        match self {
            Self::Id => "id",
            Self::Score => "score",
            Self::Embedding => "embedding",
            Self::Category => "category",
        }
    }
}

/// Why a slate or its parameters were refused.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum ValidationError {
    /// An id or category longer than [`MAX_LABEL_BYTES`].
    #[error("candidate {index} has a {} of {got} bytes; the limit is {max}", field.name())]
    TooLong {
        /// Candidate index.
        index: usize,
        /// `id` or `category`.
        field: Field,
        /// Its length in bytes.
        got: usize,
        /// The limit.
        max: usize,
    },
    /// More candidates than [`Limits::max_candidates`].
    #[error("{got} candidates exceed the limit of {max}")]
    TooManyCandidates {
        /// Candidates sent.
        got: usize,
        /// The limit.
        max: usize,
    },
    /// Two candidates share an id.
    #[error("id {id:?} is used by candidates {first} and {index}")]
    DuplicateId {
        /// The repeated id.
        id: String,
        /// Index of the first candidate with this id.
        first: usize,
        /// Index of the repeat.
        index: usize,
    },
    /// A score or embedding value is NaN or infinite.
    #[error("candidate {index} has a non-finite {}", field.name())]
    NonFinite {
        /// Candidate index.
        index: usize,
        /// Which field.
        field: Field,
    },
    /// Some candidates have embeddings and this one has none, or the algorithm needs them.
    #[error("candidate {index} has no embedding, but {reason}")]
    MissingEmbedding {
        /// Candidate index.
        index: usize,
        /// Why one is needed.
        reason: &'static str,
    },
    /// The embedding's length differs from the first candidate's.
    #[error("candidate {index} has an embedding of dimension {got}, but candidate 0 set the dimension to {expected}")]
    DimensionMismatch {
        /// Candidate index.
        index: usize,
        /// Dimension of this embedding.
        got: usize,
        /// Dimension set by the first embedding.
        expected: usize,
    },
    /// An embedding longer than [`Limits::max_dim`], or empty.
    #[error("candidate {index} has an embedding of dimension {got}; allowed is 1..={max}")]
    DimensionOutOfRange {
        /// Candidate index.
        index: usize,
        /// Dimension sent.
        got: usize,
        /// The limit.
        max: usize,
    },
    /// The embedding has zero (or subnormal-underflowing) norm, so cosine is undefined.
    #[error("candidate {index} has an all-zero embedding; cosine similarity needs a non-zero vector")]
    ZeroNorm {
        /// Candidate index.
        index: usize,
    },
    /// `k` outside `1..=max_k`.
    #[error("k = {got} is outside 1..={max}")]
    KOutOfRange {
        /// k sent.
        got: u64,
        /// The limit.
        max: usize,
    },
    /// `lambda` outside `[0, 1]` or not finite.
    #[error("lambda = {got} is outside [0, 1]")]
    LambdaOutOfRange {
        /// lambda sent.
        got: f64,
    },
    /// `window` outside `2..=1000`.
    #[error("window = {got} is outside 2..={max}")]
    WindowOutOfRange {
        /// window sent.
        got: u64,
        /// The limit.
        max: usize,
    },
    /// A fairness `share` or `alpha` outside the open interval (0, 1).
    #[error("fairness {}: {got} is outside the open interval (0, 1)", field.name())]
    InvalidFairness {
        /// Which one.
        field: FairnessField,
        /// The value sent.
        got: f64,
    },
    /// A profile weight that is negative or not finite, or weights that sum to 0.
    #[error("profile {}: {reason}", category.as_deref().map_or_else(|| "weights".to_owned(), |c| format!("weight of {c:?}")))]
    InvalidProfile {
        /// The category whose weight is bad; `None` when the weights as a whole are.
        category: Option<String>,
        /// What is wrong.
        reason: &'static str,
    },
}

impl ValidationError {
    /// The stable snake_case code every front end reports (the HTTP API, gRPC, the Python
    /// package's `RerankError.code`).
    #[must_use]
    pub fn code(&self) -> &'static str {
        match self {
            Self::TooManyCandidates { .. } => "too_many_candidates",
            Self::TooLong { .. } => "too_long",
            Self::DuplicateId { .. } => "duplicate_id",
            Self::NonFinite { .. } => "non_finite",
            Self::MissingEmbedding { .. } => "missing_embedding",
            Self::DimensionMismatch { .. } => "dimension_mismatch",
            Self::DimensionOutOfRange { .. } => "dimension_out_of_range",
            Self::ZeroNorm { .. } => "zero_norm_embedding",
            Self::KOutOfRange { .. } => "k_out_of_range",
            Self::LambdaOutOfRange { .. } => "lambda_out_of_range",
            Self::WindowOutOfRange { .. } => "window_out_of_range",
            Self::InvalidProfile { .. } => "invalid_profile",
            Self::InvalidFairness { .. } => "invalid_fairness",
        }
    }

    /// The candidate index the error is about, when it is about one.
    #[must_use]
    pub fn index(&self) -> Option<usize> {
        match *self {
            Self::DuplicateId { index, .. }
            | Self::TooLong { index, .. }
            | Self::NonFinite { index, .. }
            | Self::MissingEmbedding { index, .. }
            | Self::DimensionMismatch { index, .. }
            | Self::DimensionOutOfRange { index, .. }
            | Self::ZeroNorm { index } => Some(index),
            _ => None,
        }
    }

    /// The same error with its candidate indices passed through `f`: a caller that validated a
    /// subset of the candidates it was sent (the service drops unknown catalog items) reports the
    /// index the sender used.
    #[must_use]
    pub fn map_index(self, f: impl Fn(usize) -> usize) -> Self {
        match self {
            Self::TooLong { index, field, got, max } => Self::TooLong { index: f(index), field, got, max },
            Self::DuplicateId { id, first, index } => {
                Self::DuplicateId { id, first: f(first), index: f(index) }
            }
            Self::NonFinite { index, field } => Self::NonFinite { index: f(index), field },
            Self::MissingEmbedding { index, reason } => Self::MissingEmbedding { index: f(index), reason },
            Self::DimensionMismatch { index, got, expected } => {
                Self::DimensionMismatch { index: f(index), got, expected }
            }
            Self::DimensionOutOfRange { index, got, max } => {
                Self::DimensionOutOfRange { index: f(index), got, max }
            }
            Self::ZeroNorm { index } => Self::ZeroNorm { index: f(index) },
            other @ (Self::TooManyCandidates { .. }
            | Self::KOutOfRange { .. }
            | Self::LambdaOutOfRange { .. }
            | Self::WindowOutOfRange { .. }
            | Self::InvalidFairness { .. }
            | Self::InvalidProfile { .. }) => other,
        }
    }
}

/// Why a fairness floor was refused.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum FairnessField {
    /// `share`, outside (0, 1).
    Share,
    /// `alpha`, outside (0, 1).
    Alpha,
}

impl FairnessField {
    /// The wire name of the field.
    #[must_use]
    pub fn name(self) -> &'static str {
        match self {
            Self::Share => "share",
            Self::Alpha => "alpha",
        }
    }
}

/// Largest `window` accepted ([`Params::with_window`]).
pub const MAX_WINDOW: usize = 1000;

/// Most categories in one profile ([`RerankInput::with_profile`]).
pub const MAX_PROFILE_CATEGORIES: usize = 10_000;

/// A user's taste profile over categories, normalised to sum 1 and laid over one slate's groups:
/// the target distribution `p` that calibration (Steck 2018) measures a slate against.
#[derive(Debug, Clone, PartialEq)]
pub struct Profile {
    /// `p` of each group of the slate, by group id; 0 for groups the profile does not name (and
    /// for the group of candidates without a category).
    by_group: Vec<f64>,
    /// `p` of profile categories that no candidate has.
    absent: Vec<f64>,
}

impl Profile {
    /// `p` of each group of the slate, by group id.
    #[must_use]
    pub fn by_group(&self) -> &[f64] {
        &self.by_group
    }

    /// `p` of the profile's categories that no candidate has (a slate can never cover them).
    #[must_use]
    pub fn absent(&self) -> &[f64] {
        &self.absent
    }
}

/// Row-major matrix of L2-normalised embeddings, one row per candidate.
///
/// Stored as `f32`: the kernels are bound by memory traffic over these rows, and `f32` halves it.
/// Rounding to f32 leaves each row's norm within ~1e-7 of 1, so the exact f64 inverse norm of every
/// stored row is kept too: [`Embeddings::cosine`] is then the cosine of the stored rows to ~1e-16,
/// with `cos(i, i) = 1`, and the similarity kernel is a Gram matrix of unit vectors (PSD).
#[derive(Debug, Clone, PartialEq)]
pub struct Embeddings {
    dim: usize,
    data: Vec<f32>,
    inv_norm: Vec<f64>,
}

impl Embeddings {
    /// Embedding dimension d.
    #[must_use]
    pub fn dim(&self) -> usize {
        self.dim
    }

    /// All rows, contiguous, `n × d`.
    #[must_use]
    pub fn as_slice(&self) -> &[f32] {
        &self.data
    }

    /// Row `i` (unit norm up to f32 rounding).
    ///
    /// # Panics
    /// If `i` is not a candidate index.
    #[must_use]
    pub fn row(&self, i: usize) -> &[f32] {
        &self.data[i * self.dim..(i + 1) * self.dim]
    }

    /// `1 / ‖row_i‖` of every stored row, in f64.
    #[must_use]
    pub fn inv_norms(&self) -> &[f64] {
        &self.inv_norm
    }

    /// Cosine similarity of rows `i` and `j`, in f64. O(d).
    ///
    /// # Panics
    /// If `i` or `j` is not a candidate index.
    #[must_use]
    pub fn cosine(&self, i: usize, j: usize) -> f64 {
        let dot: f64 = self.row(i).iter().zip(self.row(j)).map(|(&a, &b)| f64::from(a) * f64::from(b)).sum();
        dot * self.inv_norm[i] * self.inv_norm[j]
    }
}

/// A validated slate: what every diversifier takes.
///
/// # Invariants
/// - ids are unique; scores are finite; `normalized` has one finite entry per candidate;
/// - `groups[i] < group_names.len()`; equal categories (and all missing ones) share a group;
///   groups are numbered in order of first appearance;
/// - embeddings, if present, cover every candidate with one dimension in `1..=max_dim`, and each
///   row has unit L2 norm (computed in f64, then rounded to f32).
#[derive(Debug, Clone, PartialEq)]
pub struct RerankInput {
    ids: Vec<String>,
    /// Scores as sent, except that `-0.0` is stored as `0.0` (see [`RerankInput::scores`]).
    scores: Vec<f64>,
    /// Indices (ascending) of the candidates that sent `-0.0`, so the answer echoes it; almost
    /// always empty, so it costs nothing.
    sent_negative_zero: Vec<usize>,
    normalized: Vec<f64>,
    groups: Vec<u32>,
    group_names: Vec<Option<String>>,
    embeddings: Option<Embeddings>,
    profile: Option<Profile>,
    fairness: Option<crate::fairness::FairnessFloor>,
}

impl RerankInput {
    /// Validates candidates into a slate.
    ///
    /// `require_embeddings` is set by callers whose algorithm needs embeddings (MMR, DPP).
    ///
    /// # Errors
    /// [`ValidationError::TooManyCandidates`] first, then the first over-long
    /// ([`ValidationError::TooLong`]) or repeated ([`ValidationError::DuplicateId`]) id, then the
    /// first other error scanning candidates in order.
    ///
    /// # Complexity
    /// O(N·d) time. Allocates the slate's own arrays plus one id index for the duplicate check;
    /// category strings are moved, never copied, and each distinct category is hashed once per
    /// candidate.
    pub fn new(
        candidates: Vec<CandidateInput>,
        transform: ScoreTransform,
        require_embeddings: bool,
        limits: &Limits,
    ) -> Result<Self, ValidationError> {
        let n = candidates.len();
        if n > limits.max_candidates {
            return Err(ValidationError::TooManyCandidates { got: n, max: limits.max_candidates });
        }
        let mut ids = Vec::with_capacity(n);
        let mut scores = Vec::with_capacity(n);
        let mut categories = Vec::with_capacity(n);
        let mut embeddings: Vec<Option<Vec<f32>>> = Vec::with_capacity(n);
        for c in candidates {
            ids.push(c.id);
            scores.push(c.score);
            categories.push(c.category);
            embeddings.push(c.embedding);
        }
        Self::assemble(
            ids,
            &scores,
            categories,
            RowsIn::Each(|i: usize| embeddings[i].as_deref()),
            transform,
            require_embeddings,
            limits,
        )
    }

    /// Validates a slate given as columns: ids, scores, categories, and optionally an `n × d`
    /// row-major embedding matrix. The same checks, errors and result as [`RerankInput::new`]
    /// on the same candidates, without a vector per candidate: for callers that hold arrays
    /// (the Python package's numpy inputs).
    ///
    /// # Errors
    /// As [`RerankInput::new`].
    ///
    /// # Panics
    /// If `scores`, `categories` or the matrix's rows do not have one entry per id (a caller
    /// bug).
    pub fn from_columns(
        ids: Vec<String>,
        scores: &[f64],
        categories: Vec<Option<String>>,
        embeddings: Option<(&[f32], usize)>,
        transform: ScoreTransform,
        require_embeddings: bool,
        limits: &Limits,
    ) -> Result<Self, ValidationError> {
        let n = ids.len();
        match embeddings {
            None => {
                let none = RowsIn::Each(|_| None);
                Self::assemble(ids, scores, categories, none, transform, require_embeddings, limits)
            }
            Some((data, d)) => {
                assert_eq!(data.len(), n * d, "an n x d embedding matrix");
                let row = RowsIn::Each(|i: usize| Some(&data[i * d..(i + 1) * d]));
                Self::assemble(ids, scores, categories, row, transform, require_embeddings, limits)
            }
        }
    }

    /// [`RerankInput::from_columns`] taking the `n × d` matrix by value: its rows are normalised
    /// where they lie and it becomes the slate's own, so no row is copied. For callers that
    /// gather a request's rows into one buffer anyway (the service, whose catalog rows and sent
    /// embeddings land there).
    ///
    /// # Errors
    /// As [`RerankInput::new`].
    ///
    /// # Panics
    /// As [`RerankInput::from_columns`].
    pub fn from_matrix(
        ids: Vec<String>,
        scores: &[f64],
        categories: Vec<Option<String>>,
        embeddings: Option<(Vec<f32>, usize)>,
        transform: ScoreTransform,
        require_embeddings: bool,
        limits: &Limits,
    ) -> Result<Self, ValidationError> {
        let n = ids.len();
        let rows = match embeddings {
            None => RowsIn::Each(|_| None),
            Some((data, d)) => {
                assert_eq!(data.len(), n * d, "an n x d embedding matrix");
                RowsIn::Matrix(data, d)
            }
        };
        Self::assemble(ids, scores, categories, rows, transform, require_embeddings, limits)
    }

    /// The validation every constructor shares, over columns; `rows` gives the embeddings.
    fn assemble<'e, F: Fn(usize) -> Option<&'e [f32]>>(
        ids: Vec<String>,
        sent_scores: &[f64],
        categories: Vec<Option<String>>,
        rows: RowsIn<F>,
        transform: ScoreTransform,
        require_embeddings: bool,
        limits: &Limits,
    ) -> Result<Self, ValidationError> {
        let n = ids.len();
        assert!(sent_scores.len() == n && categories.len() == n, "one score and one category per id");
        if n > limits.max_candidates {
            return Err(ValidationError::TooManyCandidates { got: n, max: limits.max_candidates });
        }
        let (any_embedding, dim) = match &rows {
            RowsIn::Matrix(_, d) => (n > 0, *d),
            RowsIn::Each(embedding) => {
                let any_embedding = (0..n).any(|i| embedding(i).is_some());
                let dim = match (n > 0).then(|| embedding(0)) {
                    Some(Some(e)) => e.len(),
                    Some(None) if any_embedding || require_embeddings => {
                        let reason = if require_embeddings {
                            "the chosen algorithm compares embeddings"
                        } else {
                            "other candidates have one (send embeddings for all candidates or for none)"
                        };
                        return Err(ValidationError::MissingEmbedding { index: 0, reason });
                    }
                    _ => 0,
                };
                (any_embedding, dim)
            }
        };
        if any_embedding && (dim == 0 || dim > limits.max_dim) {
            return Err(ValidationError::DimensionOutOfRange { index: 0, got: dim, max: limits.max_dim });
        }

        // Duplicate ids first, borrowing the ids, so no id string is copied.
        {
            let mut first_index: HashMap<&str, usize, KeyedHash> =
                HashMap::with_capacity_and_hasher(n, KeyedHash::default());
            for (index, id) in ids.iter().enumerate() {
                if id.len() > MAX_LABEL_BYTES {
                    let got = id.len();
                    return Err(ValidationError::TooLong {
                        index,
                        field: Field::Id,
                        got,
                        max: MAX_LABEL_BYTES,
                    });
                }
                if let Some(&first) = first_index.get(id.as_str()) {
                    return Err(ValidationError::DuplicateId { id: id.clone(), first, index });
                }
                first_index.insert(id, index);
            }
        }

        let mut scores = Vec::with_capacity(n);
        let mut groups = Vec::with_capacity(n);
        // Groups by first appearance, keyed on borrowed categories; each group's name is moved
        // out of `categories` once the scan is done.
        let mut first_of_group: Vec<usize> = Vec::new();
        let mut group_of: HashMap<Option<&str>, u32, KeyedHash> = HashMap::default();
        let mut sent_negative_zero = Vec::new();
        let (each, mut data) = match rows {
            RowsIn::Each(f) => (Some(f), Vec::with_capacity(if any_embedding { n * dim } else { 0 })),
            RowsIn::Matrix(data, _) => (None, data),
        };
        let mut inv_norm = Vec::with_capacity(if any_embedding { n } else { 0 });

        for (index, category) in categories.iter().enumerate() {
            let score = sent_scores[index];
            if !score.is_finite() {
                return Err(ValidationError::NonFinite { index, field: Field::Score });
            }
            if let Some(got) = category.as_ref().map(String::len).filter(|&l| l > MAX_LABEL_BYTES) {
                return Err(ValidationError::TooLong {
                    index,
                    field: Field::Category,
                    got,
                    max: MAX_LABEL_BYTES,
                });
            }
            if any_embedding {
                let norm2 = match &each {
                    None => unit_row_in_place(&mut data[index * dim..(index + 1) * dim], index)?,
                    Some(embedding) => match embedding(index) {
                        None => return Err(ValidationError::MissingEmbedding {
                            index,
                            reason:
                                "other candidates have one (send embeddings for all candidates or for none)",
                        }),
                        Some(e) if e.len() != dim => {
                            return Err(ValidationError::DimensionMismatch {
                                index,
                                got: e.len(),
                                expected: dim,
                            });
                        }
                        Some(e) => push_unit_row(e, index, &mut data)?,
                    },
                };
                inv_norm.push(1.0 / norm2.sqrt());
            }
            let group = *group_of.entry(category.as_deref()).or_insert_with(|| {
                first_of_group.push(index);
                u32::try_from(first_of_group.len() - 1).unwrap_or(u32::MAX)
            });
            groups.push(group);
            if score == 0.0 && score.is_sign_negative() {
                sent_negative_zero.push(index);
            }
            // `-0.0` equals `0.0`; stored as `0.0` so every ordering sees one value.
            scores.push(score + 0.0);
        }

        drop(group_of);
        let mut categories = categories;
        let group_names = first_of_group.iter().map(|&i| categories[i].take()).collect();
        let normalized = normalize_scores(&scores, transform);
        let embeddings = any_embedding.then_some(Embeddings { dim, data, inv_norm });
        Ok(Self {
            ids,
            scores,
            sent_negative_zero,
            normalized,
            groups,
            group_names,
            embeddings,
            profile: None,
            fairness: None,
        })
    }

    /// Number of candidates N.
    #[must_use]
    pub fn len(&self) -> usize {
        self.ids.len()
    }

    /// True for an empty slate.
    #[must_use]
    pub fn is_empty(&self) -> bool {
        self.ids.is_empty()
    }

    /// Candidate ids in input order.
    #[must_use]
    pub fn ids(&self) -> &[String] {
        &self.ids
    }

    /// Raw scores as sent, except that `-0.0` reads as `0.0`: the two are equal numbers, and a
    /// slate must order them as a tie (toward the lower index), which `total_cmp` and bit-level
    /// comparisons would not. Every kernel orders by these.
    #[must_use]
    pub fn scores(&self) -> &[f64] {
        &self.scores
    }

    /// Candidate `i`'s score exactly as the caller sent it (`-0.0` included), for echoing.
    ///
    /// # Panics
    /// If `i` is not a candidate index.
    #[must_use]
    pub fn sent_score(&self, i: usize) -> f64 {
        if self.sent_negative_zero.binary_search(&i).is_ok() {
            -0.0
        } else {
            self.scores[i]
        }
    }

    /// Normalised scores `s_i` (see [`ScoreTransform`]).
    #[must_use]
    pub fn normalized(&self) -> &[f64] {
        &self.normalized
    }

    /// Group (category) id of every candidate.
    #[must_use]
    pub fn groups(&self) -> &[u32] {
        &self.groups
    }

    /// Number of distinct groups; a missing category counts as one group.
    #[must_use]
    pub fn group_count(&self) -> usize {
        self.group_names.len()
    }

    /// Category label of candidate `i`, if it had one.
    ///
    /// # Panics
    /// If `i` is not a candidate index.
    #[must_use]
    pub fn category(&self, i: usize) -> Option<&str> {
        self.group_names[self.groups[i] as usize].as_deref()
    }

    /// Unit embeddings, if the slate has them.
    #[must_use]
    pub fn embeddings(&self) -> Option<&Embeddings> {
        self.embeddings.as_ref()
    }

    /// Attaches a taste profile: `(category, weight)` pairs, weights finite and non-negative with
    /// a positive sum, normalised to sum 1 (a repeated category's weights add up).
    ///
    /// # Errors
    /// [`ValidationError::InvalidProfile`] naming the first bad weight, or the whole profile when
    /// it is empty, sums to 0, or names more than [`MAX_PROFILE_CATEGORIES`] categories.
    ///
    /// # Complexity
    /// O(P + G) with P profile entries and G groups in the slate.
    pub fn with_profile(mut self, weights: Vec<(String, f64)>) -> Result<Self, ValidationError> {
        let whole = |reason| ValidationError::InvalidProfile { category: None, reason };
        if weights.len() > MAX_PROFILE_CATEGORIES {
            return Err(whole("more than 10 000 categories"));
        }
        let mut total = 0.0;
        for (category, w) in &weights {
            if !w.is_finite() || *w < 0.0 {
                return Err(ValidationError::InvalidProfile {
                    category: Some(category.clone()),
                    reason: "is not a finite number >= 0",
                });
            }
            total += w;
        }
        if !(total > 0.0 && total.is_finite()) {
            return Err(whole("must have a positive, finite sum"));
        }
        let group_of: HashMap<&str, usize> =
            self.group_names.iter().enumerate().filter_map(|(g, name)| Some((name.as_deref()?, g))).collect();
        let mut by_group = vec![0.0; self.group_names.len()];
        let mut absent: HashMap<String, f64> = HashMap::new();
        for (category, w) in weights {
            let p = w / total;
            match group_of.get(category.as_str()) {
                Some(&g) => by_group[g] += p,
                None => *absent.entry(category).or_insert(0.0) += p,
            }
        }
        // Sorted, so sums over them do not depend on hashing order.
        let mut absent: Vec<(String, f64)> = absent.into_iter().collect();
        absent.sort_by(|a, b| a.0.cmp(&b.0));
        self.profile = Some(Profile { by_group, absent: absent.into_iter().map(|(_, p)| p).collect() });
        Ok(self)
    }

    /// Attaches a fairness floor (Zehlike et al. 2017): `protected[i]` says whether candidate i
    /// belongs to the protected group; every prefix of the slate must hold the share `share` of
    /// them at significance `alpha` ([`crate::fairness`]).
    ///
    /// # Errors
    /// [`ValidationError::InvalidFairness`] when `share` or `alpha` is outside (0, 1).
    ///
    /// # Panics
    /// If `protected` does not have one entry per candidate (a caller bug).
    pub fn with_fairness(
        mut self,
        protected: Vec<bool>,
        share: f64,
        alpha: f64,
    ) -> Result<Self, ValidationError> {
        assert_eq!(protected.len(), self.len(), "one protected flag per candidate");
        let open = |x: f64| x > 0.0 && x < 1.0;
        if !open(share) {
            return Err(ValidationError::InvalidFairness { field: FairnessField::Share, got: share });
        }
        if !open(alpha) {
            return Err(ValidationError::InvalidFairness { field: FairnessField::Alpha, got: alpha });
        }
        self.fairness = Some(crate::fairness::FairnessFloor { protected, share, alpha });
        Ok(self)
    }

    /// The fairness floor, when one was attached.
    #[must_use]
    pub fn fairness(&self) -> Option<&crate::fairness::FairnessFloor> {
        self.fairness.as_ref()
    }

    /// The taste profile, when one was attached.
    #[must_use]
    pub fn profile(&self) -> Option<&Profile> {
        self.profile.as_ref()
    }
}

/// Where [`RerankInput::assemble`] finds the embeddings.
enum RowsIn<F> {
    /// Candidate `i`'s row as sent (`None` without one), copied into the slate's matrix.
    Each(F),
    /// Every candidate's row, `n × d` row-major: normalised where it lies, and kept.
    Matrix(Vec<f32>, usize),
}

/// Candidate `index`'s row fault as a validation error.
fn row_error(fault: RowFault, index: usize) -> ValidationError {
    match fault {
        RowFault::NonFinite => ValidationError::NonFinite { index, field: Field::Embedding },
        RowFault::ZeroNorm => ValidationError::ZeroNorm { index },
    }
}

/// L2-normalises `e` in f64 and appends it to `data` as f32 ([`push_unit`]).
fn push_unit_row(e: &[f32], index: usize, data: &mut Vec<f32>) -> Result<f64, ValidationError> {
    push_unit(e, data).map_err(|fault| row_error(fault, index))
}

/// L2-normalises candidate `index`'s row where it lies ([`unit_in_place`]).
fn unit_row_in_place(row: &mut [f32], index: usize) -> Result<f64, ValidationError> {
    unit_in_place(row).map_err(|fault| row_error(fault, index))
}

/// Why one embedding row cannot be normalised.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum RowFault {
    /// A NaN or infinite value.
    NonFinite,
    /// Zero norm, or a norm so small that dividing by it would overflow f32.
    ZeroNorm,
}

/// How far `‖r‖²` of a row may be from 1 for the row to count as unit already: rounding each
/// component of an exactly unit vector to f32 moves it by at most a relative 2⁻²⁴, so `‖r‖²` moves
/// by at most 2·2⁻²⁴ + 2⁻⁴⁸; twice that leaves room for the f64 sum.
pub const UNIT_NORM2_TOLERANCE: f64 = 4.0 / 16_777_216.0;

/// Appends the L2-normalised `e` to `data` as f32: the one normalisation every embedding goes
/// through, a request's and the item catalog's alike.
///
/// The norm is summed in f64 and each component is scaled in f64, then rounded to f32. A row that
/// is unit already, up to f32 rounding (`|‖e‖² − 1| ≤` [`UNIT_NORM2_TOLERANCE`]), is appended as
/// it is, so the function is idempotent: normalising a normalised row gives the same bits. The item
/// catalog relies on that: rows normalised once at load go through a request unchanged, and a slate
/// built from catalog rows equals the slate built from the same embeddings sent inline.
///
/// Returns `‖r‖²` of the row as stored ([`norm2_f64`] of the appended values), so callers that
/// keep `1 / ‖r‖` need no second pass: for a row appended as it is, that is the norm already
/// summed; for a scaled row it is summed over the new values while they are in cache.
///
/// # Errors
/// [`RowFault::NonFinite`] for a NaN or infinite value, [`RowFault::ZeroNorm`] for a norm below
/// 1e-30; `data` is unchanged then.
///
/// # Complexity
/// O(d) time, no allocation beyond `data`'s growth.
pub fn push_unit(e: &[f32], data: &mut Vec<f32>) -> Result<f64, RowFault> {
    let start = data.len();
    data.extend_from_slice(e);
    unit_in_place(&mut data[start..]).inspect_err(|_| data.truncate(start))
}

/// [`push_unit`] on a row where it lies: the same checks, and the same f32 values as
/// `push_unit` appends (each component scaled in f64 by `1 / ‖row‖`, then rounded), so a slate
/// built from one buffer equals one built row by row. Returns `‖row‖²` as stored.
///
/// # Errors
/// As [`push_unit`]; the row is unchanged then.
///
/// # Complexity
/// O(d) time, no allocation.
pub fn unit_in_place(row: &mut [f32]) -> Result<f64, RowFault> {
    let norm2 = norm2_f64(row);
    // Squares of finite f32 values cannot overflow f64, so the sum is finite exactly when every
    // value is.
    if !norm2.is_finite() {
        return Err(RowFault::NonFinite);
    }
    // A norm this small would divide into infinities once rounded back to f32.
    if norm2 < 1e-60 {
        return Err(RowFault::ZeroNorm);
    }
    if (norm2 - 1.0).abs() <= UNIT_NORM2_TOLERANCE {
        return Ok(norm2);
    }
    let inv = 1.0 / norm2.sqrt();
    for x in row.iter_mut() {
        *x = (f64::from(*x) * inv) as f32;
    }
    Ok(norm2_f64(row))
}

/// `‖e‖²` summed in f64 over eight interleaved partial sums (lane `j` takes `e[j], e[j+8], …`;
/// the lanes are added pairwise, then the tail in order): the same value wherever a row is
/// normalised, and free of the single serial chain of additions that left the copy of a
/// request's embeddings latency-bound (four cycles an element).
///
/// NaN or infinite when any value is.
#[must_use]
pub fn norm2_f64(e: &[f32]) -> f64 {
    let mut lanes = [0.0_f64; 8];
    let chunks = e.chunks_exact(8);
    let tail = chunks.remainder();
    for c in chunks {
        for (acc, &x) in lanes.iter_mut().zip(c) {
            *acc += f64::from(x) * f64::from(x);
        }
    }
    let [a, b, c, d, e2, f, g, h] = lanes;
    let mut sum = ((a + b) + (c + d)) + ((e2 + f) + (g + h));
    for &x in tail {
        sum += f64::from(x) * f64::from(x);
    }
    sum
}

/// Applies `transform` to the slate's scores.
///
/// Every output is `+ 0.0`'d: `-0.0` and `0.0` are equal scores, but orderings built on
/// `total_cmp` (and bit-level comparisons) put `-0.0` first from the bottom, so a candidate
/// scored `-0.0` (numpy's rounding makes them routinely) would lose its tie to a later `0.0`.
/// `x + 0.0` is `x` for every other value, and `+0.0` for both zeros (IEEE 754 §6.3).
fn normalize_scores(scores: &[f64], transform: ScoreTransform) -> Vec<f64> {
    let mut out = normalize_scores_signed(scores, transform);
    for s in &mut out {
        *s += 0.0;
    }
    out
}

fn normalize_scores_signed(scores: &[f64], transform: ScoreTransform) -> Vec<f64> {
    match transform {
        ScoreTransform::None => scores.to_vec(),
        ScoreTransform::MinMax => {
            let (lo, hi) =
                scores.iter().fold((f64::INFINITY, f64::NEG_INFINITY), |(lo, hi), &x| (lo.min(x), hi.max(x)));
            let range = hi - lo;
            // `range` can overflow to +inf for scores near ±f64::MAX; halve both sides then.
            if range.is_finite() && range > 0.0 {
                scores.iter().map(|&x| (x - lo) / range).collect()
            } else if range > 0.0 {
                scores.iter().map(|&x| (x / 2.0 - lo / 2.0) / (hi / 2.0 - lo / 2.0)).collect()
            } else {
                vec![1.0; scores.len()]
            }
        }
    }
}

/// Per-call parameters, validated.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Params {
    k: usize,
    lambda: f64,
    max_per_category: Option<usize>,
    window: Option<usize>,
}

impl Params {
    /// Checks `k` in `1..=limits.max_k` and `lambda` in `[0, 1]`.
    ///
    /// # Errors
    /// [`ValidationError::KOutOfRange`] or [`ValidationError::LambdaOutOfRange`].
    pub fn new(k: u64, lambda: f64, limits: &Limits) -> Result<Self, ValidationError> {
        let k_ok = usize::try_from(k).ok().filter(|&k| (1..=limits.max_k).contains(&k));
        let Some(k) = k_ok else {
            return Err(ValidationError::KOutOfRange { got: k, max: limits.max_k });
        };
        if !(0.0..=1.0).contains(&lambda) {
            return Err(ValidationError::LambdaOutOfRange { got: lambda });
        }
        // -0.0 is inside the range; store +0.0 so `lambda == 0` paths see one value.
        Ok(Self { k, lambda: lambda + 0.0, max_per_category: None, window: None })
    }

    /// Adds a hard cap on items per category (`None` removes it). A cap of 0 is treated as none.
    #[must_use]
    pub fn with_max_per_category(mut self, cap: Option<usize>) -> Self {
        self.max_per_category = cap.filter(|&c| c > 0);
        self
    }

    /// Sets the sliding window of windowed DPP and SSD: each step compares a candidate with the
    /// last `w − 1` picks only. `None` compares with every pick.
    ///
    /// # Errors
    /// [`ValidationError::WindowOutOfRange`] outside `2..=`[`MAX_WINDOW`].
    pub fn with_window(mut self, window: Option<u64>) -> Result<Self, ValidationError> {
        self.window = match window {
            None => None,
            Some(w) if (2..=MAX_WINDOW as u64).contains(&w) => Some(w as usize),
            Some(got) => return Err(ValidationError::WindowOutOfRange { got, max: MAX_WINDOW }),
        };
        Ok(self)
    }

    /// The sliding window `w`, if any.
    #[must_use]
    pub fn window(&self) -> Option<usize> {
        self.window
    }

    /// Requested slate length (the output has `min(k, N)` items, fewer only under a category cap).
    #[must_use]
    pub fn k(&self) -> usize {
        self.k
    }

    /// Diversity weight in `[0, 1]`; 0 is pure relevance.
    #[must_use]
    pub fn lambda(&self) -> f64 {
        self.lambda
    }

    /// Hard cap on items per category, if any.
    #[must_use]
    pub fn max_per_category(&self) -> Option<usize> {
        self.max_per_category
    }
}

/// A chosen slate.
#[derive(Debug, Clone, PartialEq, Default)]
pub struct Selection {
    /// Candidate indices in slate order; no duplicates.
    pub indices: Vec<usize>,
    /// Per pick, the quantity that decided it: the DPP residual `d_j²`, the MMR objective, or the
    /// normalised score for score-ordered picks.
    pub gains: Vec<f64>,
    /// Slot at which the kernel ran out of signal (DPP: numerical rank reached) and the rest was
    /// filled by score; `None` when it never did.
    pub exhausted_at: Option<usize>,
}

#[cfg(test)]
mod tests {
    use super::*;

    fn cand(id: &str, score: f64, emb: Option<Vec<f32>>) -> CandidateInput {
        CandidateInput { id: id.into(), score, category: None, embedding: emb }
    }

    /// The three constructors are one validation: on random slates (duplicates, non-finite
    /// scores and values, zero rows, rows already unit, shared and missing categories) `new`,
    /// `from_columns` and `from_matrix` return equal slates or equal errors, and a slate built
    /// in place stores the bits `push_unit` appends. Slates with all rows present, since
    /// `from_matrix` takes a full matrix.
    #[test]
    fn the_constructors_agree() {
        let mut state = 0x2545_f491_4f6c_dd1d_u64;
        let mut next = || {
            state ^= state << 13;
            state ^= state >> 7;
            state ^= state << 17;
            state
        };
        let limits = Limits::default();
        let (mut oks, mut errs) = (0, 0);
        for round in 0..3_000 {
            let n = (next() % 12) as usize;
            let d = 1 + (next() % 9) as usize;
            let mut candidates = Vec::with_capacity(n);
            for i in 0..n {
                let mut e: Vec<f32> = (0..d).map(|_| (next() % 2001) as f32 / 1000.0 - 1.0).collect();
                match next() % 40 {
                    0 => e[0] = f32::NAN,
                    1 => e.fill(0.0),
                    2 => {
                        let norm = e.iter().map(|&x| f64::from(x).powi(2)).sum::<f64>().sqrt();
                        e.iter_mut().for_each(|x| *x = (f64::from(*x) / norm) as f32);
                    }
                    _ => {}
                }
                let score = if next() % 50 == 0 { f64::INFINITY } else { (next() % 100) as f64 / 10.0 };
                let id = if next() % 30 == 0 { "dup".to_owned() } else { format!("item-{i}") };
                let category = match next() % 4 {
                    0 => None,
                    c => Some(format!("cat-{c}")),
                };
                candidates.push(CandidateInput { id, score, category, embedding: Some(e) });
            }
            let ids: Vec<String> = candidates.iter().map(|c| c.id.clone()).collect();
            let scores: Vec<f64> = candidates.iter().map(|c| c.score).collect();
            let cats: Vec<Option<String>> = candidates.iter().map(|c| c.category.clone()).collect();
            let flat: Vec<f32> = candidates.iter().flat_map(|c| c.embedding.clone().unwrap()).collect();
            let t = ScoreTransform::MinMax;
            let by_rows = RerankInput::new(candidates, t, true, &limits);
            let by_slice = RerankInput::from_columns(
                ids.clone(),
                &scores,
                cats.clone(),
                Some((&flat, d)),
                t,
                true,
                &limits,
            );
            let by_matrix = RerankInput::from_matrix(ids, &scores, cats, Some((flat, d)), t, true, &limits);
            assert_eq!(by_rows, by_slice, "round {round}");
            assert_eq!(by_rows, by_matrix, "round {round}");
            if by_rows.is_ok() {
                oks += 1
            } else {
                errs += 1
            }
        }
        assert!(oks > 500 && errs > 500, "both outcomes exercised: {oks} slates, {errs} errors");
    }

    /// The catalog's contract (issue 16): a row normalised once goes through a request's
    /// normalisation bit for bit unchanged, because every normalised row lands inside
    /// [`UNIT_NORM2_TOLERANCE`]. Checked on 20,000 rows of SplitMix64 values over dimensions 1 to
    /// 300 and scales from 1e-6 to 1e6.
    #[test]
    fn normalising_a_normalised_row_changes_no_bit() {
        let mut state = 0x9e37_79b9_7f4a_7c15_u64;
        let mut next = || {
            state = state.wrapping_add(0x9e37_79b9_7f4a_7c15);
            let mut z = state;
            z = (z ^ (z >> 30)).wrapping_mul(0xbf58_476d_1ce4_e5b9);
            z = (z ^ (z >> 27)).wrapping_mul(0x94d0_49bb_1331_11eb);
            z ^ (z >> 31)
        };
        for row in 0..20_000 {
            let d = 1 + (next() % 300) as usize;
            let scale = 10f64.powi(row % 13 - 6);
            let e: Vec<f32> =
                (0..d).map(|_| ((next() >> 11) as f64 / (1u64 << 53) as f64 - 0.5) as f32).collect();
            let e: Vec<f32> = e.iter().map(|&x| (f64::from(x) * scale) as f32).collect();
            let mut once = Vec::new();
            let Ok(stored_norm2) = push_unit(&e, &mut once) else { continue };
            assert_eq!(stored_norm2.to_bits(), norm2_f64(&once).to_bits(), "row {row}: the returned norm");
            let norm2: f64 = once.iter().map(|&x| f64::from(x) * f64::from(x)).sum();
            assert!((norm2 - 1.0).abs() <= UNIT_NORM2_TOLERANCE, "row {row}: |r|^2 - 1 = {}", norm2 - 1.0);
            let mut twice = Vec::new();
            push_unit(&once, &mut twice).expect("a unit row normalises");
            let bits = |v: &[f32]| v.iter().map(|x| x.to_bits()).collect::<Vec<_>>();
            assert_eq!(bits(&once), bits(&twice), "row {row} (d = {d})");
        }
        assert_eq!(push_unit(&[0.0, f32::NAN], &mut Vec::new()), Err(RowFault::NonFinite));
        assert_eq!(push_unit(&[0.0, 0.0], &mut Vec::new()), Err(RowFault::ZeroNorm));
    }

    #[test]
    fn minmax_maps_to_unit_interval_and_equal_scores_to_one() {
        assert_eq!(normalize_scores(&[2.0, 4.0, 3.0], ScoreTransform::MinMax), vec![0.0, 1.0, 0.5]);
        assert_eq!(normalize_scores(&[7.0, 7.0], ScoreTransform::MinMax), vec![1.0, 1.0]);
        let huge = normalize_scores(&[-f64::MAX, f64::MAX], ScoreTransform::MinMax);
        assert_eq!(huge, vec![0.0, 1.0]);
    }

    /// Issue 13, item 5: `-0.0` and `0.0` are one score, so neither transform may tell them apart.
    #[test]
    fn negative_zero_scores_normalise_to_positive_zero() {
        for t in [ScoreTransform::None, ScoreTransform::MinMax] {
            let out = normalize_scores(&[-0.0, 0.0, 1.0], t);
            assert_eq!(out[0].to_bits(), 0.0_f64.to_bits(), "{t:?}");
            assert_eq!(out[1].to_bits(), 0.0_f64.to_bits(), "{t:?}");
        }
    }

    #[test]
    fn embeddings_are_unit_norm() {
        let input = RerankInput::new(
            vec![cand("a", 1.0, Some(vec![3.0, 4.0]))],
            ScoreTransform::MinMax,
            true,
            &Limits::default(),
        )
        .unwrap();
        let row = input.embeddings().unwrap().row(0);
        assert!((row[0] - 0.6).abs() < 1e-7 && (row[1] - 0.8).abs() < 1e-7);
    }

    #[test]
    fn rejects_each_bad_candidate_with_its_index() {
        let l = Limits::default();
        let t = ScoreTransform::MinMax;
        let dup = vec![cand("a", 1.0, None), cand("a", 2.0, None)];
        assert!(matches!(
            RerankInput::new(dup, t, false, &l),
            Err(ValidationError::DuplicateId { index: 1, .. })
        ));
        let nan = vec![cand("a", f64::NAN, None)];
        assert!(matches!(
            RerankInput::new(nan, t, false, &l),
            Err(ValidationError::NonFinite { index: 0, .. })
        ));
        let zero = vec![cand("a", 1.0, Some(vec![1.0])), cand("b", 1.0, Some(vec![0.0]))];
        assert_eq!(RerankInput::new(zero, t, false, &l), Err(ValidationError::ZeroNorm { index: 1 }));
        let mixed = vec![cand("a", 1.0, Some(vec![1.0])), cand("b", 1.0, Some(vec![1.0, 2.0]))];
        assert!(matches!(
            RerankInput::new(mixed, t, false, &l),
            Err(ValidationError::DimensionMismatch { index: 1, .. })
        ));
        let partial = vec![cand("a", 1.0, Some(vec![1.0])), cand("b", 1.0, None)];
        assert!(matches!(
            RerankInput::new(partial, t, false, &l),
            Err(ValidationError::MissingEmbedding { index: 1, .. })
        ));
        let needed = vec![cand("a", 1.0, None)];
        assert!(matches!(
            RerankInput::new(needed, t, true, &l),
            Err(ValidationError::MissingEmbedding { index: 0, .. })
        ));
        let inf = vec![cand("a", 1.0, Some(vec![f32::INFINITY]))];
        assert!(matches!(
            RerankInput::new(inf, t, false, &l),
            Err(ValidationError::NonFinite { field: Field::Embedding, .. })
        ));
    }

    #[test]
    fn params_bounds() {
        let l = Limits::default();
        assert!(Params::new(0, 0.5, &l).is_err());
        assert!(Params::new(1001, 0.5, &l).is_err());
        assert!(Params::new(10, 1.0001, &l).is_err());
        assert!(Params::new(10, f64::NAN, &l).is_err());
        assert_eq!(Params::new(10, -0.0, &l).unwrap().lambda().to_bits(), 0.0_f64.to_bits());
    }
}
