//! The gRPC front end: `medley.v1.Reranker` (`proto/medley/v1/reranker.proto`) on
//! `server.grpc_listen`, beside the HTTP API and sharing everything behind it.
//!
//! A call takes the same path as `POST /v1/rerank` once decoded: a concurrency permit from the
//! same semaphore (or `UNAVAILABLE`, code `overloaded`), the live engine snapshot, the same
//! validation, pool, shadows, deadline and metrics ([`crate::http`]'s `serve_one`). Only the
//! envelope differs: protobuf in, protobuf out, and errors as a gRPC status whose details carry
//! a `google.rpc.ErrorInfo` (reason = the medley code, domain `medley`, metadata `path`).
//!
//! Status codes: `INVALID_ARGUMENT` for every request error (HTTP 400 and 422),
//! `RESOURCE_EXHAUSTED` for a message over `server.max_body_bytes`, `UNAVAILABLE` for
//! `overloaded` and `shutting_down`, `DEADLINE_EXCEEDED`, and `INTERNAL`. A client's
//! `grpc-timeout` shortens the request's deadline. Health (`grpc.health.v1`) reports `SERVING`
//! until shutdown starts, then `NOT_SERVING`; reflection serves the descriptor of this proto.

use std::pin::Pin;
use std::time::{Duration, Instant};

use futures_util::{Stream, StreamExt};
use tonic::{Request, Response, Status};
use tonic_types::{ErrorDetails, StatusExt};

use crate::api::wire;
use crate::http::{ApiError, AppState, Job};
use crate::serve::shutdown::Shutdown;

pub mod candidate;
pub mod codec;

/// The generated messages, the service trait and a client.
#[allow(missing_docs, unreachable_pub, clippy::all, clippy::pedantic)]
pub mod proto {
    tonic::include_proto!("medley.v1");

    /// Hand-written ([`super::candidate`]), re-exported where the generated type would be.
    pub use super::candidate::Candidate;

    /// The encoded `FileDescriptorSet` of `reranker.proto`, served by reflection.
    pub const DESCRIPTOR: &[u8] = include_bytes!(concat!(env!("OUT_DIR"), "/medley_descriptor.bin"));
}

use proto::reranker_server::{Reranker, RerankerServer};

/// The `ErrorInfo` domain of every medley error.
pub const DOMAIN: &str = "medley";

/// The service, over the HTTP front end's state (engine, pool, permits, metrics).
#[derive(Debug, Clone)]
pub struct Front {
    state: AppState,
}

impl Front {
    /// A service answering from `state`.
    #[must_use]
    pub fn new(state: AppState) -> Self {
        Self { state }
    }

    /// The live engine's message size limit.
    fn max_message(&self) -> usize {
        self.state.engine.load().config().server.max_body_bytes
    }

    /// Takes a concurrency permit, or says why not.
    fn admit(&self) -> Result<crate::http::Admitted, ApiError> {
        self.state.admit().ok_or_else(|| {
            if self.state.is_draining() {
                ApiError::ShuttingDown
            } else {
                self.state.metrics.shed.inc();
                ApiError::Overloaded { limit: self.state.max_in_flight() }
            }
        })
    }

    /// Serves one decoded request within `deadline`.
    async fn serve(
        &self,
        request: proto::RerankRequest,
        deadline: Duration,
    ) -> Result<proto::RerankResponse, ApiError> {
        let encoded = prost::Message::encoded_len(&request);
        let limit = self.max_message();
        if encoded > limit {
            return Err(ApiError::PayloadTooLarge { limit });
        }
        // The message counts against the in-flight body budget while it is served.
        let mut reservation = self.state.body_budget.empty();
        if !reservation.grow_to(encoded) {
            self.state.metrics.body_budget_refused.inc();
            return Err(ApiError::BodyBudget { budget: self.state.body_budget.bytes() });
        }
        let (request, values) = from_proto(request);
        let engine = self.state.engine.load_full();
        let deadline = deadline.min(engine.config().server.request_timeout);
        let served =
            crate::http::serve_one(&self.state, engine, Job::Decoded(Box::new(request), values), deadline)
                .await?;
        drop(reservation);
        Ok(to_proto(served.response))
    }
}

/// When a call's headers arrived, stamped by a layer before the message is read.
#[derive(Debug, Clone, Copy)]
struct Arrived(Instant);

/// What is left of the request's deadline, from the client's `grpc-timeout` (`<digits><unit>`,
/// unit one of H M S m u n) counted from the call's arrival: a tenth earlier, and 2 ms more, so
/// that the client receives our `DEADLINE_EXCEEDED` (with its medley code) before its own timer
/// gives up on the call. `None` without the header.
fn client_deadline<T>(request: &Request<T>) -> Option<Duration> {
    let timeout = client_timeout(request)?;
    let spent = request.extensions().get::<Arrived>().map_or(Duration::ZERO, |a| a.0.elapsed());
    Some(timeout.saturating_sub(timeout / 10 + Duration::from_millis(2) + spent))
}

/// The client's `grpc-timeout`, as sent.
fn client_timeout<T>(request: &Request<T>) -> Option<Duration> {
    let text = request.metadata().get("grpc-timeout")?.to_str().ok()?;
    let (digits, unit) = text.split_at(text.len().checked_sub(1)?);
    let n: u64 = digits.parse().ok()?;
    Some(match unit {
        "H" => Duration::from_secs(n.saturating_mul(3600)),
        "M" => Duration::from_secs(n.saturating_mul(60)),
        "S" => Duration::from_secs(n),
        "m" => Duration::from_millis(n),
        "u" => Duration::from_micros(n),
        "n" => Duration::from_nanos(n),
        _ => return None,
    })
}

/// The gRPC status for an error, with the medley code and path in an `ErrorInfo` and in the
/// message (`"<code>: <message> (at <path>)"`).
#[must_use]
pub fn status_of(error: &ApiError) -> Status {
    let body = error.body();
    let detail = body.error;
    let grpc = match detail.code {
        "body_too_large" => tonic::Code::ResourceExhausted,
        "overloaded" | "shutting_down" => tonic::Code::Unavailable,
        "deadline_exceeded" => tonic::Code::DeadlineExceeded,
        _ if error.status().is_client_error() => tonic::Code::InvalidArgument,
        _ => tonic::Code::Internal,
    };
    let mut metadata = std::collections::HashMap::new();
    let mut message = format!("{}: {}", detail.code, detail.message);
    if let Some(path) = &detail.path {
        metadata.insert("path".to_owned(), path.clone());
        message.push_str(&format!(" (at {path})"));
    }
    let details = ErrorDetails::with_error_info(detail.code, DOMAIN, metadata);
    Status::with_error_details(grpc, message, details)
}

/// A gRPC status code's name as the metric labels it (`OK`, `INVALID_ARGUMENT`, ...).
fn code_name(code: tonic::Code) -> &'static str {
    use tonic::Code;
    match code {
        Code::Ok => "OK",
        Code::Cancelled => "CANCELLED",
        Code::Unknown => "UNKNOWN",
        Code::InvalidArgument => "INVALID_ARGUMENT",
        Code::DeadlineExceeded => "DEADLINE_EXCEEDED",
        Code::NotFound => "NOT_FOUND",
        Code::AlreadyExists => "ALREADY_EXISTS",
        Code::PermissionDenied => "PERMISSION_DENIED",
        Code::ResourceExhausted => "RESOURCE_EXHAUSTED",
        Code::FailedPrecondition => "FAILED_PRECONDITION",
        Code::Aborted => "ABORTED",
        Code::OutOfRange => "OUT_OF_RANGE",
        Code::Unimplemented => "UNIMPLEMENTED",
        Code::Internal => "INTERNAL",
        Code::Unavailable => "UNAVAILABLE",
        Code::DataLoss => "DATA_LOSS",
        Code::Unauthenticated => "UNAUTHENTICATED",
    }
}

/// The wire request of a proto request, and its count of embedding values. A candidate with no
/// embedding values has none (proto3 cannot tell an empty list from an absent one).
pub(crate) fn from_proto(r: proto::RerankRequest) -> (wire::RerankRequest, usize) {
    let values = r.candidates.iter().map(|c| c.embedding.len()).sum();
    let request = wire::RerankRequest {
        request_id: r.request_id,
        slice: r.slice,
        k: r.k.map(u64::from),
        algorithm: r.algorithm,
        lambda: r.lambda,
        unit_id: r.unit_id,
        window: r.window.map(u64::from),
        profile: (!r.profile.is_empty()).then(|| r.profile.into_iter().collect()),
        fairness: r.fairness.map(|f| wire::WireFairness {
            protected: f.protected,
            share: f.share,
            alpha: f.alpha,
        }),
        candidates: r
            .candidates
            .into_iter()
            .map(|c| wire::WireCandidate {
                id: c.id,
                score: c.score,
                category: c.category,
                embedding: (!c.embedding.is_empty()).then_some(c.embedding),
                embedding_b64: None,
                group: c.group,
            })
            .collect(),
    };
    (request, values)
}

/// The proto answer of a wire answer (the same fields as the JSON body).
fn to_proto(r: wire::RerankResponse) -> proto::RerankResponse {
    proto::RerankResponse {
        request_id: r.request_id,
        slice: r.slice,
        arm: r.arm,
        config_generation: r.config_generation,
        algorithm: r.algorithm.to_owned(),
        lambda: r.lambda,
        k: r.k,
        items: r
            .items
            .into_iter()
            .map(|i| proto::Item { id: i.id, score: i.score, category: i.category })
            .collect(),
        diversity: Some(proto::Diversity {
            category_entropy_bits: r.diversity.category_entropy_bits,
            distinct_categories: r.diversity.distinct_categories as u64,
            intra_list_distance: r.diversity.intra_list_distance,
            miscalibration: r.diversity.miscalibration,
            protected_share: r.diversity.protected_share,
        }),
        fairness_shortfall: r.fairness_shortfall,
        catalog_version: r.catalog_version,
        dropped: r.dropped,
    }
}

/// The stream of replies to `RerankStream`.
type Replies = Pin<Box<dyn Stream<Item = Result<proto::RerankStreamReply, Status>> + Send>>;

#[tonic::async_trait]
impl Reranker for Front {
    async fn rerank(
        &self,
        request: Request<proto::RerankRequest>,
    ) -> Result<Response<proto::RerankResponse>, Status> {
        let started = Instant::now();
        let deadline = client_deadline(&request).unwrap_or(Duration::MAX);
        let outcome = match self.admit() {
            Ok(_admitted) => self.serve(request.into_inner(), deadline).await,
            Err(e) => Err(e),
        };
        let span = tracing::info_span!("grpc_rerank", latency_us = started.elapsed().as_micros() as u64);
        match outcome {
            Ok(response) => {
                self.state.metrics.grpc_requests.with_label_values(&["OK"]).inc();
                Ok(Response::new(response))
            }
            Err(e) => {
                span.in_scope(|| tracing::debug!(code = e.code(), error = %e, "refused"));
                let status = status_of(&e);
                self.state.metrics.grpc_requests.with_label_values(&[code_name(status.code())]).inc();
                Err(status)
            }
        }
    }

    type RerankStreamStream = Replies;

    async fn rerank_stream(
        &self,
        request: Request<tonic::Streaming<proto::RerankRequest>>,
    ) -> Result<Response<Replies>, Status> {
        let admitted = match self.admit() {
            Ok(a) => a,
            Err(e) => {
                let status = status_of(&e);
                self.state.metrics.grpc_requests.with_label_values(&[code_name(status.code())]).inc();
                return Err(status);
            }
        };
        let deadline = client_deadline(&request).unwrap_or(Duration::MAX);
        let in_flight = self.state.engine.load().config().server.stream_in_flight;
        let front = self.clone();
        let messages = request.into_inner();
        // Messages are served up to `stream_in_flight` at a time and answered in order; a bad
        // message gets an Error reply and the stream goes on. A transport error ends it.
        let replies = messages
            .enumerate()
            .map(move |(index, message)| {
                let front = front.clone();
                async move {
                    let outcome = match message {
                        Ok(m) => front.serve(m, deadline).await,
                        Err(status) => return Err(status),
                    };
                    let metrics = &front.state.metrics;
                    Ok(match outcome {
                        Ok(response) => {
                            metrics.grpc_requests.with_label_values(&["OK"]).inc();
                            metrics.stream_lines.with_label_values(&["ok"]).inc();
                            proto::RerankStreamReply {
                                reply: Some(proto::rerank_stream_reply::Reply::Response(response)),
                            }
                        }
                        Err(e) => {
                            let status = status_of(&e);
                            metrics.grpc_requests.with_label_values(&[code_name(status.code())]).inc();
                            metrics.stream_lines.with_label_values(&["error"]).inc();
                            let body = e.body().error;
                            proto::RerankStreamReply {
                                reply: Some(proto::rerank_stream_reply::Reply::Error(proto::Error {
                                    code: body.code.to_owned(),
                                    message: body.message,
                                    path: body.path.unwrap_or_default(),
                                    index: index as u64,
                                })),
                            }
                        }
                    })
                }
            })
            .buffered(in_flight)
            // The permit lives as long as the stream.
            .map(move |reply| {
                let _hold = &admitted;
                reply
            });
        Ok(Response::new(Box::pin(replies)))
    }
}

/// Serves `medley.v1.Reranker`, health and reflection on `listener` until `shutdown` starts,
/// then stops accepting and lets open calls finish.
pub async fn serve(listener: tokio::net::TcpListener, state: AppState, shutdown: Shutdown) {
    let max = state.engine.load().config().server.max_body_bytes;
    let (reporter, health) = tonic_health::server::health_reporter();
    reporter.set_serving::<RerankerServer<Front>>().await;
    let reflection = tonic_reflection::server::Builder::configure()
        .register_encoded_file_descriptor_set(proto::DESCRIPTOR)
        .register_encoded_file_descriptor_set(tonic_health::pb::FILE_DESCRIPTOR_SET)
        .build_v1();
    let reflection = match reflection {
        Ok(r) => Some(r),
        Err(e) => {
            tracing::warn!(error = %e, "gRPC reflection is off");
            None
        }
    };
    // Oversized messages are refused by the service itself (RESOURCE_EXHAUSTED with the medley
    // code); the codec's own limit sits above it so that check is reached, and bounds memory.
    let service = RerankerServer::new(Front::new(state))
        .max_decoding_message_size(max.saturating_mul(2))
        .max_encoding_message_size(usize::MAX);
    let mark = shutdown.clone();
    tokio::spawn(async move {
        mark.started().await;
        reporter.set_not_serving::<RerankerServer<Front>>().await;
        reporter.set_service_status("", tonic_health::ServingStatus::NotServing).await;
    });
    // Small answers go out at once (no Nagle wait for the client's delayed ACK, which held every
    // call ~40 ms), and a whole request fits the HTTP/2 windows without waiting for updates.
    let incoming = tokio_stream::wrappers::TcpListenerStream::new(listener).map(|conn| {
        conn.inspect(|c| {
            let _ = c.set_nodelay(true);
        })
    });
    let window = u32::try_from(max.saturating_mul(2)).unwrap_or(u32::MAX).max(1 << 20);
    let stamp = tower::util::MapRequestLayer::new(|mut r: axum::http::Request<tonic::body::Body>| {
        r.extensions_mut().insert(Arrived(Instant::now()));
        r
    });
    let router = tonic::transport::Server::builder()
        .initial_stream_window_size(window)
        .initial_connection_window_size(window)
        .layer(stamp)
        .add_service(health)
        .add_service(service);
    let router = router.add_optional_service(reflection);
    if let Err(e) = router.serve_with_incoming_shutdown(incoming, shutdown.started()).await {
        tracing::error!(error = %e, "the gRPC server stopped");
    }
}
