//! The engine: a validated [`Config`] plus its generation, the unit the service swaps whole.
//!
//! [`Engine::prepare`] is the one place a wire request becomes validated input: it resolves the
//! slice and its defaults, applies per-request overrides, decodes base64 embeddings and builds
//! [`RerankInput`] and [`Params`]. [`Prepared::run`] is synchronous and pure (kernel plus
//! diversity measures), so the HTTP handlers run it on the pool and the batch subcommand calls it
//! directly. Every failure is a [`RequestError`] carrying a stable code and the JSON path at
//! fault; the HTTP layer only adds a status.

use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::Arc;

use crate::api::wire::{decode_b64_embedding, Diversity, Item, RerankRequest, RerankResponse};
use crate::api::{RequestError, Sent};
use crate::serve::catalog::Catalog;
use crate::serve::config::{Config, Shadow, UnknownItems, DEFAULT_SLICE};
use medley_core::diversify::{self, Diversifier, Workspace};
use medley_core::measures;
use medley_core::model::{CandidateInput, Params, RerankInput, Selection, ValidationError, MAX_LABEL_BYTES};

/// A validated config, its generation number and the item catalog it serves with: what one
/// request reads at its start, so one request sees one config and one catalog.
#[derive(Debug, Clone)]
pub struct Engine {
    config: Config,
    generation: u64,
    digest: String,
    catalog: Option<Arc<Catalog>>,
}

impl Engine {
    /// Wraps a validated config, without a catalog.
    #[must_use]
    pub fn new(config: Config, generation: u64) -> Self {
        let digest = config.digest();
        Self { config, generation, digest, catalog: None }
    }

    /// The same engine serving with `catalog`.
    #[must_use]
    pub fn with_catalog(mut self, catalog: Option<Arc<Catalog>>) -> Self {
        self.catalog = catalog;
        self
    }

    /// The item catalog requests look ids up in, when one is configured.
    #[must_use]
    pub fn catalog(&self) -> Option<&Arc<Catalog>> {
        self.catalog.as_ref()
    }

    /// [`Config::digest`] of the config served: equal across replicas that serve the same one.
    #[must_use]
    pub fn digest(&self) -> &str {
        &self.digest
    }

    /// The config served.
    #[must_use]
    pub fn config(&self) -> &Config {
        &self.config
    }

    /// Generation number: 1 for the config loaded at start, +1 per successful swap.
    #[must_use]
    pub fn generation(&self) -> u64 {
        self.generation
    }

    /// Resolves the slice and validates the request into ready-to-run input.
    ///
    /// Checks run in this order, and the first failure is returned: slice, locked overrides,
    /// algorithm, k, lambda, then candidates in order.
    ///
    /// # Errors
    /// A [`RequestError`] naming the field at fault.
    pub fn prepare(&self, request: RerankRequest) -> Result<Prepared, RequestError> {
        for (path, label) in
            [("request_id", &request.request_id), ("unit_id", &request.unit_id), ("slice", &request.slice)]
        {
            if let Some(got) = label.as_ref().map(String::len).filter(|&l| l > MAX_LABEL_BYTES) {
                return Err(RequestError::LabelTooLong { field: path, got, max: MAX_LABEL_BYTES });
            }
        }
        let slice_name = request.slice.as_deref().unwrap_or(DEFAULT_SLICE);
        let slice = self.config.slice(slice_name).ok_or_else(|| RequestError::UnknownSlice {
            name: slice_name.to_owned(),
            known: self.config.slices.keys().cloned().collect::<Vec<_>>().join(", "),
        })?;
        if slice.locked {
            let overrides = [
                ("algorithm", request.algorithm.is_some()),
                ("lambda", request.lambda.is_some()),
                ("k", request.k.is_some()),
                ("window", request.window.is_some()),
                ("profile", request.profile.is_some()),
                ("fairness", request.fairness.is_some()),
            ];
            if let Some(&(field, _)) = overrides.iter().find(|(_, set)| *set) {
                return Err(RequestError::SliceLocked { slice: slice.name.to_string(), field });
            }
        }
        let arm = slice.arm_for(request.unit_id.as_deref());
        let st = &arm.settings;
        let algorithm = match request.algorithm.as_deref() {
            None => st.algorithm,
            Some(name) => diversify::by_name(name).ok_or_else(|| RequestError::UnknownAlgorithm {
                name: name.to_owned(),
                known: diversify::names().collect::<Vec<_>>().join(", "),
            })?,
        };
        let limits = &self.config.server.limits;
        let k = request.k.unwrap_or(st.k);
        let params = Params::new(k, request.lambda.unwrap_or(st.lambda), limits)
            .and_then(|p| p.with_window(request.window.or(st.window)))
            .map_err(|error| RequestError::Invalid { error, sent: Sent::Json })?
            .with_max_per_category(st.max_per_category);
        let profile: Option<Vec<(String, f64)>> = match request.profile {
            Some(map) => Some(map.into_iter().collect()),
            None => slice.profile.clone(),
        };
        if profile.is_none() && algorithm.needs_profile() {
            return Err(RequestError::MissingProfile { algorithm: algorithm.name() });
        }

        if request.candidates.len() > limits.max_candidates {
            let error = ValidationError::TooManyCandidates {
                got: request.candidates.len(),
                max: limits.max_candidates,
            };
            return Err(RequestError::Invalid { error, sent: Sent::Json });
        }
        let fairness = request.fairness.or_else(|| slice.fairness.clone());
        if let Some(f) = &fairness {
            if f.protected.len() > MAX_LABEL_BYTES {
                return Err(RequestError::LabelTooLong {
                    field: "fairness.protected",
                    got: f.protected.len(),
                    max: MAX_LABEL_BYTES,
                });
            }
        }
        let catalog = self.catalog.as_deref();
        let needs_embeddings = algorithm.needs_embeddings();
        let n_sent = request.candidates.len();
        let mut protected = Vec::with_capacity(if fairness.is_some() { n_sent } else { 0 });
        // Per kept candidate: where its embedding came from, and its index as sent.
        let mut sources = Vec::with_capacity(n_sent);
        let mut sent_index = Vec::with_capacity(n_sent);
        let mut unresolved = false;
        let mut ids = Vec::with_capacity(n_sent);
        let mut scores = Vec::with_capacity(n_sent);
        let mut categories = Vec::with_capacity(n_sent);
        // The values the rows can hold at most: what the request carries inline (base64 text
        // counted at its decoded length) and a catalog row for each of the others. The matrix is
        // reserved at that size, so it neither grows by copies nor reserves beyond the request.
        let catalog_dim = catalog.map_or(0, |c| c.dim());
        let values = request
            .candidates
            .iter()
            .map(|c| match (&c.embedding, &c.embedding_b64) {
                (Some(e), _) => e.len(),
                (None, Some(text)) => text.len() / 4 * 3 / 4 + 1,
                (None, None) => catalog_dim,
            })
            .fold(0_usize, usize::saturating_add);
        let mut rows = Rows::Absent(0);
        for (index, c) in request.candidates.into_iter().enumerate() {
            if let Some(got) = c.group.as_ref().map(String::len).filter(|&l| l > MAX_LABEL_BYTES) {
                return Err(RequestError::GroupTooLong { index, got });
            }
            let (embedding, mut source) = match (c.embedding, c.embedding_b64) {
                (Some(_), Some(_)) => return Err(RequestError::ConflictingEmbedding { index }),
                (Some(e), None) => (Some(e), Sent::Json),
                (None, Some(text)) => (
                    Some(
                        decode_b64_embedding(&text)
                            .map_err(|reason| RequestError::InvalidBase64 { index, reason })?,
                    ),
                    Sent::Base64,
                ),
                (None, None) => (None, Sent::Json),
            };
            let mut category = c.category;
            let mut from_catalog = None;
            if let Some(catalog) = catalog.filter(|_| embedding.is_none() || category.is_none()) {
                match catalog.get(&c.id) {
                    Some(item) => {
                        if embedding.is_none() {
                            from_catalog = Some(item.embedding);
                            source = Sent::Catalog;
                        }
                        if category.is_none() {
                            category = item.category.map(str::to_owned);
                        }
                    }
                    None if embedding.is_none() && needs_embeddings => match st.unknown_items {
                        UnknownItems::Refuse => {
                            return Err(RequestError::UnknownItem {
                                index,
                                id: c.id,
                                algorithm: algorithm.name(),
                            })
                        }
                        UnknownItems::Drop => continue,
                    },
                    None => unresolved |= embedding.is_none(),
                }
            }
            if let Some(f) = &fairness {
                protected.push(c.group.as_deref() == Some(f.protected.as_str()));
            }
            sources.push(source);
            sent_index.push(index);
            rows.push(embedding.as_deref().or(from_catalog), values);
            ids.push(c.id);
            scores.push(c.score);
            categories.push(category);
        }
        // An algorithm that does not compare embeddings serves a slate whose ids the catalog
        // partly knows: the catalog's rows are then left out rather than refusing the slate for
        // the candidates it lacks (the diversity measures skip the embedding distance).
        if unresolved {
            let mut each = rows.into_each();
            for (row, source) in each.iter_mut().zip(&sources) {
                if *source == Sent::Catalog {
                    *row = None;
                }
            }
            rows = Rows::Each(each);
        }
        let dropped = n_sent - ids.len();
        let as_sent = |error: ValidationError| {
            let source = error.index().and_then(|i| sources.get(i).copied()).unwrap_or_default();
            let error = if dropped == 0 {
                error
            } else {
                error.map_index(|i| sent_index.get(i).copied().unwrap_or(i))
            };
            RequestError::Invalid { error, sent: source }
        };
        // A shadow that compares embeddings can only run when the slate has them.
        let shadow = slice.shadow.filter(|sh| sampled(sh.sample_rate));
        let input = rows.validate(ids, &scores, categories, st.score_transform, needs_embeddings, limits);
        let input = input.map_err(as_sent)?;
        let input = match profile {
            None => input,
            Some(weights) => input
                .with_profile(weights)
                .map_err(|error| RequestError::Invalid { error, sent: Sent::Json })?,
        };
        let input = match fairness {
            None => input,
            Some(f) => input
                .with_fairness(protected, f.share, f.alpha)
                .map_err(|error| RequestError::Invalid { error, sent: Sent::Json })?,
        };
        // Likewise a shadow that calibrates needs a profile.
        let shadow = shadow.filter(|sh| !sh.algorithm.needs_embeddings() || input.embeddings().is_some());
        let shadow = shadow.filter(|sh| !sh.algorithm.needs_profile() || input.profile().is_some());
        Ok(Prepared {
            request_id: request.request_id,
            unit_id: request.unit_id,
            slice: slice.name.clone(),
            arm: arm.name.clone(),
            algorithm,
            params,
            k,
            input,
            generation: self.generation,
            shadow,
            catalog_version: catalog.map(|c| c.version().to_owned()),
            dropped: (catalog.is_some() && st.unknown_items == UnknownItems::Drop).then_some(dropped as u64),
        })
    }
}

/// A request's embeddings as [`Engine::prepare`] gathers them: one `n × d` buffer while every
/// row so far is present with one dimension (the usual slate: no vector per candidate, catalog
/// rows copied once, and the buffer becomes the slate's own matrix), else one entry per
/// candidate, so validation sees exactly what was sent and refuses it as before.
enum Rows {
    /// `count` candidates so far, none with a row.
    Absent(usize),
    /// `count` candidates so far, each with a row of `dim` values, concatenated.
    Flat { data: Vec<f32>, dim: usize, count: usize },
    /// One entry per candidate so far.
    Each(Vec<Option<Vec<f32>>>),
}

impl Rows {
    /// Appends the next candidate's row. `reserve` (at most the values the request can yield)
    /// sizes the buffer at its first row: never the first row's length times the slate's size,
    /// which a hostile first row would make far larger than the request.
    fn push(&mut self, row: Option<&[f32]>, reserve: usize) {
        match (&mut *self, row) {
            (Self::Absent(count), None) => *count += 1,
            (Self::Absent(0), Some(r)) => {
                let mut data = Vec::with_capacity(reserve.max(r.len()));
                data.extend_from_slice(r);
                *self = Self::Flat { data, dim: r.len(), count: 1 };
            }
            (Self::Flat { data, dim, count }, Some(r)) if r.len() == *dim => {
                data.extend_from_slice(r);
                *count += 1;
            }
            (Self::Each(each), r) => each.push(r.map(<[f32]>::to_vec)),
            (_, r) => {
                let mut each = std::mem::replace(self, Self::Absent(0)).into_each();
                each.push(r.map(<[f32]>::to_vec));
                *self = Self::Each(each);
            }
        }
    }

    /// One entry per candidate.
    fn into_each(self) -> Vec<Option<Vec<f32>>> {
        match self {
            Self::Absent(count) => vec![None; count],
            Self::Flat { dim: 0, count, .. } => vec![Some(Vec::new()); count],
            Self::Flat { data, dim, .. } => data.chunks_exact(dim).map(|r| Some(r.to_vec())).collect(),
            Self::Each(each) => each,
        }
    }

    /// The validated slate of these rows and columns ([`RerankInput::from_matrix`], or
    /// [`RerankInput::new`] when the rows are not one matrix: the same checks either way).
    fn validate(
        self,
        ids: Vec<String>,
        scores: &[f64],
        categories: Vec<Option<String>>,
        transform: medley_core::model::ScoreTransform,
        require_embeddings: bool,
        limits: &medley_core::model::Limits,
    ) -> Result<RerankInput, ValidationError> {
        let matrix = match self {
            Self::Absent(_) => None,
            Self::Flat { data, dim, .. } => Some((data, dim)),
            Self::Each(each) => {
                let candidates = ids
                    .into_iter()
                    .zip(scores)
                    .zip(categories)
                    .zip(each)
                    .map(|(((id, &score), category), embedding)| CandidateInput {
                        id,
                        score,
                        category,
                        embedding,
                    })
                    .collect();
                return RerankInput::new(candidates, transform, require_embeddings, limits);
            }
        };
        RerankInput::from_matrix(ids, scores, categories, matrix, transform, require_embeddings, limits)
    }
}

/// Whether this request is in the shadow sample: a SplitMix64 stream over a process-wide
/// counter, so samples spread evenly without a random-number crate or a lock.
fn sampled(rate: f64) -> bool {
    static COUNTER: AtomicU64 = AtomicU64::new(0x853c_49e6_748f_ea9b);
    if rate >= 1.0 {
        return true;
    }
    let z = crate::serve::config::mix64(COUNTER.fetch_add(0x9e37_79b9_7f4a_7c15, Ordering::Relaxed));
    ((z >> 11) as f64) / ((1u64 << 53) as f64) < rate
}

/// A validated request, ready to run.
#[derive(Debug, Clone)]
pub struct Prepared {
    /// Echoed back.
    pub request_id: Option<String>,
    /// The request's unit, when it named one (the exposure log samples by it).
    pub unit_id: Option<String>,
    /// Name of the slice serving it.
    pub slice: Arc<str>,
    /// Name of the arm serving it.
    pub arm: Arc<str>,
    /// The diversifier.
    pub algorithm: &'static dyn Diversifier,
    /// k, lambda, caps.
    pub params: Params,
    /// k as requested (echoed).
    pub k: u64,
    /// The validated slate.
    pub input: RerankInput,
    /// Config generation it was validated against.
    pub generation: u64,
    /// The slice's shadow, when this request is in its sample.
    pub shadow: Option<Shadow>,
    /// Version of the catalog that served it.
    pub catalog_version: Option<String>,
    /// Candidates dropped as unknown to the catalog (`Some` under `unknown_items = "drop"`).
    pub dropped: Option<u64>,
}

impl Prepared {
    /// Estimated kernel work ([`Diversifier::work`]).
    #[must_use]
    pub fn work(&self) -> u64 {
        let d = self.input.embeddings().map_or(0, |e| e.dim());
        self.algorithm.work(self.input.len(), d, self.params.k())
    }

    /// Runs the diversifier and measures the slate.
    ///
    /// # Errors
    /// [`RequestError::Kernel`] only if validation let through input the kernel refuses (a bug).
    pub fn run(self, ws: &mut Workspace) -> Result<Reranked, RequestError> {
        let selection = if self.input.is_empty() {
            Selection { indices: Vec::new(), gains: Vec::new(), exhausted_at: None }
        } else {
            self.algorithm.select(&self.input, &self.params, ws)?
        };
        Ok(Reranked { prepared: self, selection })
    }
}

/// The outcome of one request.
#[derive(Debug, Clone)]
pub struct Reranked {
    /// What was asked.
    pub prepared: Prepared,
    /// What the kernel chose.
    pub selection: Selection,
}

impl Reranked {
    /// Diversity of the chosen slate.
    #[must_use]
    pub fn diversity(&self) -> Diversity {
        let (input, slate) = (&self.prepared.input, &self.selection.indices);
        Diversity {
            category_entropy_bits: measures::category_entropy_bits(input, slate),
            distinct_categories: measures::distinct_categories(input, slate),
            intra_list_distance: measures::intra_list_distance(input, slate),
            miscalibration: measures::miscalibration(input, slate),
            protected_share: medley_core::fairness::protected_share(input, slate),
        }
    }

    /// The wire response.
    #[must_use]
    pub fn to_response(&self) -> RerankResponse {
        let p = &self.prepared;
        let items = self
            .selection
            .indices
            .iter()
            .map(|&i| Item {
                id: p.input.ids()[i].clone(),
                score: p.input.sent_score(i),
                category: p.input.category(i).map(str::to_owned),
            })
            .collect();
        RerankResponse {
            request_id: p.request_id.clone(),
            slice: p.slice.to_string(),
            arm: p.arm.to_string(),
            config_generation: p.generation,
            algorithm: p.algorithm.name(),
            lambda: p.params.lambda(),
            k: p.k,
            items,
            fairness_shortfall: medley_core::fairness::shortfall(&p.input, &self.selection.indices)
                .unwrap_or(false),
            catalog_version: p.catalog_version.clone(),
            dropped: p.dropped,
            diversity: self.diversity(),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::api::wire::WireCandidate;
    use crate::testing::Rng;
    use medley_core::model::{Limits, ScoreTransform};

    /// `prepare` gathers rows into one matrix when it can and per candidate when it cannot; either
    /// way the slate or the error equals `RerankInput::new` on the candidates as sent. Random
    /// requests with rows absent, present, of other dimensions, empty, non-finite and zero, in
    /// any mix; the embedded default (DPP, min-max scores) needs embeddings, so a request with
    /// none is refused too.
    #[test]
    fn gathered_rows_validate_as_the_candidates_sent() {
        let engine = Engine::new(Config::embedded_default(), 1);
        let limits = Limits::default();
        let mut rng = Rng(0x00c0_ffee_d00d_5eed);
        let mut outcomes = [0_usize; 2];
        for round in 0..2_000 {
            let n = (rng.next() % 10) as usize;
            let d = 1 + (rng.next() % 6) as usize;
            let mixed = rng.next().is_multiple_of(3);
            let candidates: Vec<WireCandidate> = (0..n)
                .map(|i| {
                    let mut e: Vec<f32> = (0..d).map(|_| (rng.next() % 201) as f32 / 100.0 - 1.0).collect();
                    let embedding = match (mixed, rng.next() % 12) {
                        (true, 0) => None,
                        (true, 1) => Some(vec![0.5; d + 1]),
                        (true, 2) => Some(Vec::new()),
                        (_, 3) => {
                            e[0] = f32::NAN;
                            Some(e)
                        }
                        (_, 4) => Some(vec![0.0; d]),
                        _ => Some(e),
                    };
                    WireCandidate {
                        id: format!("tent-{}", if rng.next().is_multiple_of(25) { 0 } else { i }),
                        score: (rng.next() % 50) as f64,
                        category: (!rng.next().is_multiple_of(3)).then(|| format!("cat-{}", rng.next() % 3)),
                        embedding,
                        embedding_b64: None,
                        group: None,
                    }
                })
                .collect();
            let expected: Vec<CandidateInput> = candidates
                .iter()
                .map(|c| CandidateInput {
                    id: c.id.clone(),
                    score: c.score,
                    category: c.category.clone(),
                    embedding: c.embedding.clone(),
                })
                .collect();
            let expected = RerankInput::new(expected, ScoreTransform::MinMax, true, &limits);
            let request = RerankRequest { candidates, ..RerankRequest::default() };
            match (engine.prepare(request), expected) {
                (Ok(p), Ok(e)) => {
                    assert_eq!(p.input, e, "round {round}");
                    outcomes[0] += 1;
                }
                (Err(RequestError::Invalid { error, .. }), Err(e)) => {
                    assert_eq!(error, e, "round {round}");
                    outcomes[1] += 1;
                }
                (got, e) => panic!("round {round}: prepare gave {got:?}, new gave {e:?}"),
            }
        }
        assert!(outcomes.iter().all(|&c| c > 300), "both outcomes exercised: {outcomes:?}");
    }
}
