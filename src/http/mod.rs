//! The HTTP edge: routers for the public and the private listener, the middleware stack, and
//! [`serve`], the one way to start the server (the binary and the tests both call it).
//!
//! Middleware, outermost first: `observe` (counts `medley_requests_total{status}` and logs 5xx
//! detail once), panic catching (a panic becomes our 500 body and `medley_panics_total`), then,
//! on `/v1/*` only, `admit` (the concurrency limit: a permit or an immediate 503 with
//! `Retry-After`). Health, readiness and metrics are never shed.

mod admin;
pub mod body;
pub mod conn;
mod error;
mod handlers;

use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::Arc;

use arc_swap::ArcSwap;
use axum::extract::{Request, State};

use axum::middleware::{self, Next};
use axum::response::{IntoResponse, Response};
use axum::routing::{get, post};
use axum::Router;
use tokio::net::TcpListener;
use tokio::sync::{OwnedSemaphorePermit, Semaphore};
use tower_http::catch_panic::CatchPanicLayer;

pub use error::{ApiError, InternalDetail, RETRY_AFTER_SECONDS};
pub(crate) use handlers::{serve_one, Job};
pub use handlers::{INLINE_BODY_BELOW, OPENAPI_JSON};

use crate::serve::config::ConfigError;
use crate::serve::engine::Engine;
use crate::serve::exposure::ExposureLog;
use crate::serve::metrics::Metrics;
use crate::serve::pool::{panic_message, Pool};
use crate::serve::reload::{ConfigSource, Reloader};
use crate::serve::shadow::ShadowRunner;
use crate::serve::shutdown::Shutdown;

/// Why the service could not start.
#[derive(Debug, thiserror::Error)]
pub enum StartError {
    /// The config (or the overlay) is invalid.
    #[error("invalid config: {0}")]
    Config(#[from] ConfigError),
    /// The item catalog the config names is refused.
    #[error("invalid item catalog: {0}")]
    Catalog(#[from] crate::serve::catalog::CatalogError),
    /// The kernel pool could not start its threads.
    #[error("starting the kernel pool: {0}")]
    Pool(#[from] rayon::ThreadPoolBuildError),
    /// The shadow worker could not start.
    #[error("starting the shadow worker: {0}")]
    Thread(#[from] std::io::Error),
    /// The exposure log's directory or writer thread could not be set up.
    #[error("starting the exposure log: {0}")]
    ExposureLog(std::io::Error),
}

/// Everything a handler needs; cheap to clone.
#[derive(Debug, Clone)]
pub struct AppState {
    /// The live engine. `ArcSwap` because every request loads it once and reloads replace it
    /// whole: readers never lock, and a request keeps its snapshot to the end.
    pub engine: Arc<ArcSwap<Engine>>,
    /// Kernel pool.
    pub pool: Arc<Pool>,
    /// Metric handles.
    pub metrics: Arc<Metrics>,
    /// The shadow queue and worker.
    pub shadow: Arc<ShadowRunner>,
    /// The exposure log's queue and writer, when `[exposure_log]` was configured at start.
    pub exposure: Option<Arc<ExposureLog>>,
    /// Reloads and runtime slice changes.
    pub reloader: Arc<Reloader>,
    /// `MEDLEY_ADMIN_TOKEN`; `None` disables the admin endpoints (403).
    admin_token: Option<Arc<str>>,
    /// Concurrency permits (`server.max_in_flight`, fixed at start). A semaphore rather than a
    /// counter so a stream's permit can live inside its response body until the last line.
    permits: Arc<Semaphore>,
    max_in_flight: usize,
    /// `server.max_inflight_body_bytes`, fixed at start: bodies reserve against it while held.
    pub body_budget: body::BodyBudget,
    /// Set when shutdown starts: readiness turns 503 so load balancers stop sending.
    draining: Arc<AtomicBool>,
    /// The public and private addresses as bound (a configured port 0 becomes a real one); set
    /// once by [`serve`].
    bound: Arc<std::sync::OnceLock<(std::net::SocketAddr, std::net::SocketAddr)>>,
}

impl AppState {
    /// Loads the config from `source` (with its persisted runtime slices) as generation 1 and
    /// starts the pool and the shadow worker, sized from its `[server]` settings.
    ///
    /// # Errors
    /// A [`StartError`] naming what failed.
    pub fn start(
        source: ConfigSource,
        metrics: Arc<Metrics>,
        admin_token: Option<String>,
    ) -> Result<Self, StartError> {
        let runtime = source.read_overlay()?;
        let file = source.read_valid_file()?;
        let config = source.build(file.clone(), &runtime)?;
        let server = &config.server;
        let pool = Pool::new(server.pool_threads, server.inline_work_below)?;
        let shadow = ShadowRunner::start(server.shadow_queue, metrics.clone())?;
        let max_in_flight = server.max_in_flight;
        let body_budget = body::BodyBudget::new(server.max_inflight_body_bytes);
        let catalog = ConfigSource::load_catalog(&config)?;
        let exposure = match &config.exposure_log {
            Some(settings) => Some(Arc::new(
                ExposureLog::start(settings, metrics.clone()).map_err(StartError::ExposureLog)?,
            )),
            None => None,
        };
        let first = Engine::new(config, 1).with_catalog(catalog);
        metrics.set_config(1, first.digest());
        metrics.set_catalog(first.catalog().map(|c| &**c));
        let engine = Arc::new(ArcSwap::from_pointee(first));
        metrics.pool_threads.set(pool.threads() as i64);
        let reloader = Arc::new(Reloader::new(source, engine.clone(), metrics.clone(), file, runtime));
        Ok(Self {
            engine,
            pool: Arc::new(pool),
            metrics,
            shadow: Arc::new(shadow),
            exposure,
            reloader,
            admin_token: admin_token.filter(|t| !t.is_empty()).map(Into::into),
            permits: Arc::new(Semaphore::new(max_in_flight)),
            max_in_flight,
            body_budget,
            draining: Arc::new(AtomicBool::new(false)),
            bound: Arc::default(),
        })
    }

    /// The `(public, private)` addresses as bound, once [`serve`] has started.
    #[must_use]
    pub fn bound(&self) -> Option<(std::net::SocketAddr, std::net::SocketAddr)> {
        self.bound.get().copied()
    }

    /// Whether shutdown has started.
    pub(crate) fn is_draining(&self) -> bool {
        self.draining.load(Ordering::Relaxed)
    }

    /// `server.max_in_flight`, fixed at start.
    pub(crate) fn max_in_flight(&self) -> usize {
        self.max_in_flight
    }

    /// A concurrency permit (and the in-flight gauge) for one request or stream, unless
    /// shutdown has started or every permit is taken. Shared by every front end.
    pub(crate) fn admit(&self) -> Option<Admitted> {
        if self.is_draining() {
            return None;
        }
        let permit = self.permits.clone().try_acquire_owned().ok()?;
        self.metrics.in_flight.inc();
        Some(Admitted { _permit: permit, metrics: self.metrics.clone() })
    }
}

/// Holds one concurrency permit and the in-flight gauge for as long as it lives.
#[derive(Debug)]
pub(crate) struct Admitted {
    _permit: OwnedSemaphorePermit,
    metrics: Arc<Metrics>,
}

impl Drop for Admitted {
    fn drop(&mut self) {
        self.metrics.in_flight.dec();
    }
}

/// The public router: the re-rank API plus health, metrics and the OpenAPI document.
pub fn app(state: AppState) -> Router {
    let v1 = Router::new()
        .route("/v1/rerank", post(handlers::rerank))
        .route("/v1/rerank/stream", post(handlers::rerank_stream))
        .route_layer(middleware::from_fn_with_state(state.clone(), admit));
    Router::new()
        .merge(v1)
        .merge(common_routes())
        .route("/openapi.json", get(handlers::openapi))
        .fallback(handlers::not_found)
        .method_not_allowed_fallback(handlers::method_not_allowed)
        .layer(panic_layer(state.metrics.clone()))
        .layer(middleware::from_fn_with_state(state.clone(), observe))
        .with_state(state)
}

/// The private router: health, metrics and the token-protected `/admin/*` endpoints.
pub fn admin_app(state: AppState) -> Router {
    Router::new()
        .merge(admin::routes(state.clone()))
        .merge(common_routes())
        .fallback(handlers::not_found)
        .method_not_allowed_fallback(handlers::method_not_allowed)
        .layer(panic_layer(state.metrics.clone()))
        .layer(middleware::from_fn_with_state(state.clone(), observe))
        .with_state(state)
}

fn common_routes() -> Router<AppState> {
    Router::new()
        .route("/healthz", get(handlers::healthz))
        .route("/readyz", get(handlers::readyz))
        .route("/metrics", get(handlers::metrics))
}

fn panic_layer(
    metrics: Arc<Metrics>,
) -> CatchPanicLayer<impl Fn(Box<dyn std::any::Any + Send + 'static>) -> Response + Clone> {
    CatchPanicLayer::custom(move |payload: Box<dyn std::any::Any + Send + 'static>| {
        metrics.panics.inc();
        ApiError::Panicked(panic_message(payload.as_ref())).into_response()
    })
}

/// Counts every answer by status and logs server faults once, with their detail.
async fn observe(State(state): State<AppState>, request: Request, next: Next) -> Response {
    let (method, path) = (request.method().clone(), request.uri().path().to_owned());
    let response = next.run(request).await;
    let status = response.status();
    state.metrics.requests.with_label_values(&[status.as_str()]).inc();
    if let Some(InternalDetail(detail)) = response.extensions().get::<InternalDetail>() {
        tracing::error!(%method, %path, status = status.as_u16(), %detail, "request failed");
    }
    response
}

/// The concurrency limit: take a permit or answer 503 at once.
async fn admit(State(state): State<AppState>, mut request: Request, next: Next) -> Response {
    if state.is_draining() {
        return ApiError::ShuttingDown.into_response();
    }
    let Some(admitted) = state.admit() else {
        state.metrics.shed.inc();
        // Read the refused body to its end (bounded), so a client that sends before it reads
        // gets this answer rather than a reset, and the connection stays reusable.
        let limits = {
            let engine = state.engine.load();
            let server = &engine.config().server;
            body::BodyLimits { max: server.max_body_bytes, timeout: server.body_timeout }
        };
        let (parts, incoming) = request.into_parts();
        let reusable = body::linger(&parts.headers, incoming.into_data_stream(), 0, limits).await;
        return body::Refusal { error: ApiError::Overloaded { limit: state.max_in_flight }, reusable }
            .into_response();
    };
    request.extensions_mut().insert(Arc::new(admitted));
    next.run(request).await
}

/// Serves the public and the private router until `shutdown` starts, then stops accepting,
/// lets in-flight requests (and open streams) finish, and returns. Accept errors are logged and
/// retried (see [`conn`]), so it returns only through shutdown.
pub async fn serve(public: TcpListener, admin: TcpListener, state: AppState, shutdown: Shutdown) {
    serve_with(public, admin, state, shutdown, async {}).await;
}

/// [`serve`], running `beside` (another front end on the same state, e.g. gRPC) to its end
/// too before the shadow queue drains.
pub async fn serve_with(
    public: TcpListener,
    admin: TcpListener,
    state: AppState,
    shutdown: Shutdown,
    beside: impl std::future::Future<Output = ()>,
) {
    if let (Ok(p), Ok(a)) = (public.local_addr(), admin.local_addr()) {
        let _ = state.bound.set((p, a));
    }
    let draining = state.draining.clone();
    let mark = shutdown.clone();
    tokio::spawn(async move {
        mark.started().await;
        draining.store(true, Ordering::Relaxed);
    });
    let watcher = match crate::serve::reload::watch(state.reloader.clone(), shutdown.clone()) {
        Ok(w) => w,
        Err(e) => {
            tracing::warn!(error = %e, "cannot watch the config file; reload with SIGHUP or POST /admin/reload");
            None
        }
    };
    let sighup = tokio::spawn(crate::serve::reload::on_sighup(state.reloader.clone(), shutdown.clone()));
    let shadow = state.shadow.clone();
    let limits = {
        let engine = state.engine.load();
        let server = &engine.config().server;
        conn::ConnLimits { header_timeout: server.header_timeout, max_connections: server.max_connections }
    };
    tokio::join!(
        conn::serve_listener(public, app(state.clone()), limits, shutdown.clone()),
        conn::serve_listener(admin, admin_app(state.clone()), limits, shutdown.clone()),
        beside,
    );
    // Background work holds the shutdown token; wait for it, then drain the shadow queue.
    if let Some(w) = watcher {
        let _ = w.await;
    }
    let _ = sighup.await;
    let _ = tokio::task::spawn_blocking(move || shadow.stop()).await;
    // Every front end has answered its last request: write what the exposure queue holds.
    if let Some(log) = state.exposure.clone() {
        let _ = tokio::task::spawn_blocking(move || log.stop()).await;
    }
}
