//! Handlers: read the body, snapshot the engine, hand the work to the pool, map the result.
//!
//! Bodies are read here rather than by an extractor, through [`super::body`], so the size limit
//! and the in-flight memory budget are enforced before and while reading, a refused body is
//! still read to its end (so the client reads the answer), and every failure comes back in our
//! error shape. Small bodies (under [`INLINE_BODY_BELOW`]) are decoded
//! on the async worker; larger ones are decoded, validated and served entirely on the pool, since
//! parsing a multi-megabyte slate costs milliseconds of CPU.

use std::convert::Infallible;
use std::sync::Arc;
use std::time::Instant;

use axum::body::{Body, Bytes};
use axum::extract::{Request, State};
use axum::http::{header, HeaderMap, HeaderValue, Method, StatusCode, Uri};
use axum::response::{IntoResponse, Response};
use axum::Extension;
use futures_util::{stream, StreamExt};

use super::body::{self, BodyLimits, Reservation};
use super::{Admitted, ApiError, AppState};
use crate::api::wire::{decode_request, RerankRequest, RerankResponse};
use crate::serve::engine::Engine;
use crate::serve::exposure::{self, ExposureLog, LoggedRequest, Record, ServedRecord};
use crate::serve::shadow::ShadowRunner;

/// Bodies shorter than this are decoded inline on the async worker (about 100 candidates with
/// 32-dimension JSON embeddings); larger ones go to the pool with the kernel.
pub const INLINE_BODY_BELOW: usize = 64 << 10;

/// The committed OpenAPI document, served as is.
pub const OPENAPI_JSON: &str = include_str!("../../docs/openapi.json");

/// What one served slate leaves behind: the answer, and the sizes metrics and logs record.
pub(crate) struct Served {
    pub(crate) response: RerankResponse,
    /// The request's unit (the exposure log samples by it).
    unit_id: Option<String>,
    n: usize,
    k: usize,
}

impl Served {
    /// Fills the request span's fields and logs the answer at debug level.
    pub(crate) fn record(&self, span: &tracing::Span, latency_us: u64) {
        let r = &self.response;
        span.record("request_id", r.request_id.as_deref().unwrap_or(""));
        span.record("slice", r.slice.as_str());
        span.record("algorithm", r.algorithm);
        span.record("n", self.n);
        span.record("k", self.k);
        span.record("latency_us", latency_us);
        span.in_scope(|| tracing::debug!("served"));
    }

    /// The answer as the JSON body.
    fn json(&self) -> Result<Vec<u8>, ApiError> {
        serde_json::to_vec(&self.response)
            .map_err(|e| ApiError::Panicked(format!("encoding the response: {e}")))
    }
}

fn serve_prepared(
    prepared: crate::serve::engine::Prepared,
    ws: &mut medley_core::Workspace,
    shadow: &ShadowRunner,
) -> Result<Served, ApiError> {
    let mut reranked = prepared.run(ws)?;
    let response = reranked.to_response();
    let served = Served {
        response,
        unit_id: reranked.prepared.unit_id.take(),
        n: reranked.prepared.input.len(),
        k: reranked.selection.indices.len(),
    };
    // The answer is built; the shadow gets the validated slate and the primary picks by move.
    if let Some(sh) = reranked.prepared.shadow {
        shadow.submit(reranked, sh);
    }
    Ok(served)
}

/// One request as a front end hands it over: JSON bytes (decoded on the pool when large), or a
/// request already decoded (gRPC).
pub(crate) enum Job {
    /// A JSON body.
    Json(Bytes),
    /// A decoded request, with its count of embedding values (to size the work).
    Decoded(Box<RerankRequest>, usize),
}

/// Decodes, validates and serves one request against `engine`, within `deadline`, and records
/// the duration and diversity metrics.
pub(crate) async fn serve_one(
    state: &AppState,
    engine: Arc<Engine>,
    job: Job,
    deadline: std::time::Duration,
) -> Result<Served, ApiError> {
    let started = Instant::now();
    let shadow = state.shadow.clone();
    let exposure = ExposureCapture::before(state, &engine, &job);
    let work = async {
        match job {
            Job::Json(bytes) if bytes.len() >= INLINE_BODY_BELOW => {
                state
                    .pool
                    .run(u64::MAX, move |ws| {
                        serve_prepared(engine.prepare(decode_request(&bytes)?)?, ws, &shadow)
                    })
                    .await
            }
            // Validating a large decoded slate (norms of every row) is CPU work too.
            Job::Decoded(request, values) if values >= INLINE_BODY_BELOW / 8 => {
                state
                    .pool
                    .run(u64::MAX, move |ws| serve_prepared(engine.prepare(*request)?, ws, &shadow))
                    .await
            }
            job => {
                let decoded = match job {
                    Job::Json(bytes) => decode_request(&bytes),
                    Job::Decoded(request, _) => Ok(*request),
                };
                match decoded.and_then(|r| engine.prepare(r)) {
                    Ok(prepared) => {
                        state.pool.run(prepared.work(), move |ws| serve_prepared(prepared, ws, &shadow)).await
                    }
                    Err(e) => Ok(Err(e.into())),
                }
            }
        }
    };
    let mut served = match tokio::time::timeout(deadline, work).await {
        Err(_) => return Err(ApiError::DeadlineExceeded { ms: deadline.as_millis() }),
        Ok(Err(crate::serve::pool::PoolError::Panicked(message))) => {
            state.metrics.panics.inc();
            return Err(ApiError::Panicked(message));
        }
        Ok(Ok(result)) => result?,
    };
    let r = &served.response;
    state.metrics.observe_slate(
        &r.slice,
        &r.arm,
        r.algorithm,
        started.elapsed().as_secs_f64(),
        served.n,
        r.diversity.category_entropy_bits,
        r.diversity.intra_list_distance,
        r.diversity.miscalibration,
    );
    if r.fairness_shortfall {
        state.metrics.fairness_shortfall.with_label_values(&[&r.slice]).inc();
    }
    if let Some(dropped) = r.dropped.filter(|&d| d > 0) {
        state.metrics.unknown_items.with_label_values(&[&r.slice]).inc_by(dropped);
    }
    if let Some(capture) = exposure {
        capture.after(&mut served);
    }
    Ok(served)
}

/// What the exposure log keeps of a request while it is served: the body (a reference-counted
/// view, not a copy) or a copy of the decoded gRPC request, and the config digest.
struct ExposureCapture {
    log: Arc<ExposureLog>,
    rate: f64,
    digest: String,
    request: CapturedRequest,
}

enum CapturedRequest {
    /// A JSON body; whether it is sampled is known once its `unit_id` is decoded.
    Json(Bytes),
    /// A decoded request already found to be in the sample (a copy: the original is consumed by
    /// validation); the writer thread encodes it.
    Sampled(Box<RerankRequest>),
}

impl ExposureCapture {
    /// `None` when the log is off, its sample rate is 0, or a decoded request is not sampled.
    fn before(state: &AppState, engine: &Engine, job: &Job) -> Option<Self> {
        let log = state.exposure.as_ref()?;
        let rate = engine.config().exposure_log.as_ref()?.sample_rate;
        if rate <= 0.0 {
            return None;
        }
        let request = match job {
            Job::Json(bytes) => CapturedRequest::Json(bytes.clone()),
            Job::Decoded(request, _) => {
                if !exposure::sampled(rate, request.unit_id.as_deref()) {
                    return None;
                }
                CapturedRequest::Sampled(request.clone())
            }
        };
        Some(Self { log: log.clone(), rate, digest: engine.digest().to_owned(), request })
    }

    /// Queues the record of a served request, assigning it a request id when it had none.
    fn after(self, served: &mut Served) {
        let request = match self.request {
            CapturedRequest::Json(bytes) => {
                if !exposure::sampled(self.rate, served.unit_id.as_deref()) {
                    return;
                }
                LoggedRequest::Json(bytes)
            }
            CapturedRequest::Sampled(request) => LoggedRequest::Decoded(request),
        };
        let r = &mut served.response;
        let request_id = r.request_id.get_or_insert_with(exposure::new_request_id).clone();
        self.log.submit(Record {
            ts: chrono::Utc::now(),
            request,
            served: ServedRecord {
                request_id,
                slice: r.slice.clone(),
                arm: r.arm.clone(),
                algorithm: r.algorithm,
                lambda: r.lambda,
                k: r.k,
                config_generation: r.config_generation,
                config_digest: self.digest,
                items: r.items.iter().map(|i| i.id.clone()).collect(),
                catalog_version: r.catalog_version.clone(),
            },
        });
    }
}

/// Accepts `expected` with optional parameters (`application/json; charset=utf-8`).
fn check_content_type(headers: &HeaderMap, expected: &'static str) -> Result<(), ApiError> {
    let got = headers.get(header::CONTENT_TYPE).and_then(|v| v.to_str().ok()).unwrap_or("");
    let essence = got.split(';').next().unwrap_or("").trim();
    if essence.eq_ignore_ascii_case(expected) {
        Ok(())
    } else {
        let got = if got.is_empty() { "nothing".to_owned() } else { format!("{got:?}") };
        Err(ApiError::UnsupportedMediaType { expected, got })
    }
}

/// `POST /v1/rerank`.
pub(super) async fn rerank(State(state): State<AppState>, request: Request) -> Result<Response, ApiError> {
    let engine = state.engine.load_full();
    let (parts, body) = request.into_parts();
    let server = &engine.config().server;
    let limits = BodyLimits { max: server.max_body_bytes, timeout: server.body_timeout };
    if let Err(error) = check_content_type(&parts.headers, "application/json") {
        let reusable = body::linger(&parts.headers, body.into_data_stream(), 0, limits).await;
        return Ok(body::Refusal { error, reusable }.into_response());
    }
    // The reservation lives to the end of this handler: the body and the slate decoded from it
    // count against the budget until the answer is built.
    let (bytes, _reservation) = match body::receive(&state.body_budget, &parts.headers, body, limits).await {
        Ok(received) => received,
        Err(refusal) => {
            if matches!(refusal.error, ApiError::BodyBudget { .. }) {
                state.metrics.body_budget_refused.inc();
            }
            return Ok(refusal.into_response());
        }
    };
    let span = tracing::info_span!(
        "rerank",
        request_id = tracing::field::Empty,
        slice = tracing::field::Empty,
        algorithm = tracing::field::Empty,
        n = tracing::field::Empty,
        k = tracing::field::Empty,
        latency_us = tracing::field::Empty,
    );
    let started = Instant::now();
    let deadline = engine.config().server.request_timeout;
    let result = serve_one(&state, engine, Job::Json(bytes), deadline).await;
    let latency_us = started.elapsed().as_micros() as u64;
    match result {
        Ok(served) => {
            served.record(&span, latency_us);
            Ok(json_response(StatusCode::OK, served.json()?))
        }
        Err(e) => {
            span.record("latency_us", latency_us);
            span.in_scope(|| tracing::debug!(code = e.code(), error = %e, "refused"));
            Err(e)
        }
    }
}

fn json_response(status: StatusCode, body: Vec<u8>) -> Response {
    (status, [(header::CONTENT_TYPE, HeaderValue::from_static("application/json"))], body).into_response()
}

/// One piece of an NDJSON body.
enum Piece {
    /// A non-blank line, its 1-based number, and its bytes' share of the body budget.
    Line(u64, Bytes, Reservation),
    /// A line longer than the limit (its bytes were discarded).
    TooLong(u64),
    /// A line the body budget could not hold (its bytes were discarded).
    OverBudget(u64),
    /// The body failed mid-stream; nothing follows.
    ReadFailed(u64, String),
    /// No body data for the gap limit; nothing follows.
    Stalled(u64),
}

/// Why the rest of a line is being skipped.
#[derive(Clone, Copy)]
enum Skip {
    TooLong,
    OverBudget,
}

/// Splits a body into lines without holding more than one line (bounded by `max`) in memory,
/// ending with [`Piece::Stalled`] when no data comes for `gap` while a line is awaited. The line
/// being assembled reserves its bytes from `reservation`'s budget as they arrive; a complete
/// line carries its reservation on, so it counts until it is answered.
fn split_lines(
    body: Body,
    max: usize,
    gap: std::time::Duration,
    reservation: Reservation,
) -> impl futures_util::Stream<Item = Piece> + Send {
    struct St {
        frames: axum::body::BodyDataStream,
        buf: Vec<u8>,
        line: u64,
        skipping: Option<Skip>,
        done: bool,
        reservation: Reservation,
    }
    fn take_line(st: &mut St, end: usize, out: &mut Vec<Piece>) {
        st.line += 1;
        let line: Vec<u8> = st.buf.drain(..end).collect();
        match st.skipping.take() {
            Some(Skip::TooLong) => out.push(Piece::TooLong(st.line)),
            Some(Skip::OverBudget) => out.push(Piece::OverBudget(st.line)),
            None if !line.trim_ascii().is_empty() => {
                out.push(Piece::Line(st.line, Bytes::from(line), st.reservation.take()));
            }
            None => {}
        }
    }
    /// Appends to the line being assembled, or starts skipping it.
    fn extend(st: &mut St, bytes: &[u8], max: usize) {
        if st.skipping.is_some() {
            return;
        }
        let len = st.buf.len() + bytes.len();
        if len > max {
            st.skipping = Some(Skip::TooLong);
        } else if !st.reservation.grow_ahead(len, max) {
            st.skipping = Some(Skip::OverBudget);
        } else {
            st.buf.extend_from_slice(bytes);
            return;
        }
        st.buf.clear();
        drop(st.reservation.take());
    }
    let st = St {
        frames: body.into_data_stream(),
        buf: Vec::new(),
        line: 0,
        skipping: None,
        done: false,
        reservation,
    };
    stream::unfold(st, move |mut st| async move {
        if st.done {
            return None;
        }
        let mut out = Vec::new();
        let Ok(frame) = tokio::time::timeout(gap, st.frames.next()).await else {
            st.done = true;
            return Some((stream::iter(vec![Piece::Stalled(st.line + 1)]), st));
        };
        match frame {
            Some(Ok(chunk)) => {
                let mut rest = &chunk[..];
                while let Some(pos) = rest.iter().position(|&b| b == b'\n') {
                    extend(&mut st, &rest[..pos], max);
                    let len = st.buf.len();
                    take_line(&mut st, len, &mut out);
                    rest = &rest[pos + 1..];
                }
                extend(&mut st, rest, max);
            }
            Some(Err(e)) => {
                st.done = true;
                out.push(Piece::ReadFailed(st.line + 1, e.to_string()));
            }
            None => {
                st.done = true;
                if st.skipping.is_some() || !st.buf.is_empty() {
                    let len = st.buf.len();
                    take_line(&mut st, len, &mut out);
                }
            }
        }
        Some((stream::iter(out), st))
    })
    .flatten()
}

/// `POST /v1/rerank/stream`: NDJSON in, NDJSON out, in order, as lines complete.
pub(super) async fn rerank_stream(
    State(state): State<AppState>,
    Extension(admitted): Extension<Arc<Admitted>>,
    request: Request,
) -> Result<Response, ApiError> {
    // One snapshot for the whole stream: every line is served by the same config.
    let engine = state.engine.load_full();
    let (parts, body) = request.into_parts();
    let server = &engine.config().server;
    let (max_line, in_flight, gap) = (server.max_body_bytes, server.stream_in_flight, server.body_timeout);
    if let Err(error) = check_content_type(&parts.headers, "application/x-ndjson") {
        let limits = BodyLimits { max: max_line, timeout: gap };
        let reusable = body::linger(&parts.headers, body.into_data_stream(), 0, limits).await;
        return Ok(body::Refusal { error, reusable }.into_response());
    }
    let reservation = state.body_budget.empty();
    let lines = split_lines(body, max_line, gap, reservation).map(move |piece| {
        let (state, engine) = (state.clone(), engine.clone());
        async move {
            let outcome = match piece {
                Piece::Line(n, bytes, _reservation) => {
                    let deadline = engine.config().server.request_timeout;
                    match serve_one(&state, engine, Job::Json(bytes), deadline).await {
                        Ok(served) => served.json().map_err(|e| (n, e)),
                        Err(e) => Err((n, e)),
                    }
                }
                Piece::TooLong(n) => Err((n, ApiError::PayloadTooLarge { limit: max_line })),
                Piece::OverBudget(n) => {
                    state.metrics.body_budget_refused.inc();
                    Err((n, ApiError::BodyBudget { budget: state.body_budget.bytes() }))
                }
                Piece::ReadFailed(n, message) => Err((n, ApiError::BodyRead(message))),
                Piece::Stalled(n) => Err((n, ApiError::BodyTimeout { ms: gap.as_millis() })),
            };
            let mut line = match outcome {
                Ok(body) => {
                    state.metrics.stream_lines.with_label_values(&["ok"]).inc();
                    body
                }
                Err((n, e)) => {
                    state.metrics.stream_lines.with_label_values(&["error"]).inc();
                    e.body().at_line(n).to_json()
                }
            };
            line.push(b'\n');
            Ok::<Bytes, Infallible>(Bytes::from(line))
        }
    });
    // `buffered` keeps output in input order with at most `in_flight` lines being served; the
    // permit moves into the body so the stream counts against the concurrency limit to its end.
    let body = lines.buffered(in_flight).map(move |line| {
        let _hold = &admitted;
        line
    });
    Ok((
        StatusCode::OK,
        [(header::CONTENT_TYPE, HeaderValue::from_static("application/x-ndjson"))],
        Body::from_stream(body),
    )
        .into_response())
}

/// `GET /healthz`: the process is up and answering.
pub(super) async fn healthz() -> Response {
    json_response(StatusCode::OK, br#"{"status":"ok"}"#.to_vec())
}

/// `GET /readyz`: a config is loaded and the pool is up; 503 once shutdown has started.
pub(super) async fn readyz(State(state): State<AppState>) -> Response {
    let engine = state.engine.load();
    let generation = engine.generation();
    let status = if state.is_draining() { "draining" } else { "ready" };
    let mut body = serde_json::json!({
        "status": status,
        "config_generation": generation,
        "config_digest": engine.digest(),
        "pool_threads": state.pool.threads(),
    });
    if let Some(catalog) = engine.catalog() {
        body["catalog_version"] = catalog.version().into();
    }
    let code = if state.is_draining() { StatusCode::SERVICE_UNAVAILABLE } else { StatusCode::OK };
    json_response(code, body.to_string().into_bytes())
}

/// `GET /metrics`: Prometheus text format.
pub(super) async fn metrics(State(state): State<AppState>) -> Response {
    state.metrics.inflight_body_bytes.set(i64::try_from(state.body_budget.reserved()).unwrap_or(i64::MAX));
    (
        StatusCode::OK,
        [(header::CONTENT_TYPE, HeaderValue::from_static("text/plain; version=0.0.4; charset=utf-8"))],
        state.metrics.render(),
    )
        .into_response()
}

/// `GET /openapi.json`.
pub(super) async fn openapi() -> Response {
    json_response(StatusCode::OK, OPENAPI_JSON.as_bytes().to_vec())
}

/// Unknown path.
pub(super) async fn not_found(method: Method, uri: Uri) -> ApiError {
    ApiError::NotFound { method: method.to_string(), path: uri.path().to_owned() }
}

/// Known path, wrong method.
pub(super) async fn method_not_allowed(method: Method, uri: Uri) -> ApiError {
    ApiError::MethodNotAllowed { method: method.to_string(), path: uri.path().to_owned() }
}
