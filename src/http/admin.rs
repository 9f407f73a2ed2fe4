//! `/admin/*` on the private listener: reload, runtime slices, the live config.
//!
//! Every route requires `Authorization: Bearer <token>` with the token from `MEDLEY_ADMIN_TOKEN`,
//! compared in constant time. Without a configured token the routes answer 403 saying how to
//! enable them, so they are never open by default; a missing or wrong token is 401. The public
//! router has no admin routes at all.

use axum::body::Bytes;
use axum::extract::{Path, Request, State};
use axum::http::{header, HeaderValue, StatusCode};
use axum::middleware::{self, Next};
use axum::response::{IntoResponse, Response};
use axum::routing::{get, post, put};
use axum::Router;
use subtle::ConstantTimeEq as _;

use super::{ApiError, AppState};
use crate::api::wire::decode_json;
use crate::serve::config::RawSlice;
use crate::serve::reload::{SliceChange, SliceChangeError, Trigger};

/// The admin routes, behind the token check.
pub(super) fn routes(state: AppState) -> Router<AppState> {
    Router::new()
        .route("/admin/reload", post(reload))
        .route("/admin/config", get(config))
        .route("/admin/slices/{name}", put(put_slice).delete(delete_slice))
        .route_layer(middleware::from_fn_with_state(state, require_token))
}

async fn require_token(State(state): State<AppState>, request: Request, next: Next) -> Response {
    let Some(expected) = state.admin_token.as_deref() else {
        return ApiError::AdminDisabled.into_response();
    };
    let sent = request
        .headers()
        .get(header::AUTHORIZATION)
        .and_then(|v| v.to_str().ok())
        .and_then(|v| v.strip_prefix("Bearer "))
        .unwrap_or("");
    // Constant time in the token's content; lengths that differ fail without comparing.
    if bool::from(sent.as_bytes().ct_eq(expected.as_bytes())) {
        next.run(request).await
    } else {
        ApiError::Unauthorized.into_response()
    }
}

fn json(value: &serde_json::Value) -> Response {
    (
        StatusCode::OK,
        [(header::CONTENT_TYPE, HeaderValue::from_static("application/json"))],
        value.to_string(),
    )
        .into_response()
}

/// What the admin answers say about persistence, so nobody has to guess.
fn persistence_note(persisted: bool) -> &'static str {
    if persisted {
        "written to the overlay file: survives a restart"
    } else {
        "in memory only (no --overlay file): lost on restart; a file reload keeps it"
    }
}

/// `POST /admin/reload`: re-read the config file now. `"changed": false` when the file
/// validates to the config already serving (no swap, same generation).
async fn reload(State(state): State<AppState>) -> Result<Response, ApiError> {
    let reloader = state.reloader.clone();
    let reloaded = tokio::task::spawn_blocking(move || reloader.reload(Trigger::Admin))
        .await
        .map_err(|e| ApiError::Panicked(e.to_string()))??;
    Ok(json(&serde_json::json!({
        "config_generation": reloaded.generation,
        "changed": reloaded.changed,
    })))
}

/// `GET /admin/config`: the live config as served, its generation and where it came from.
async fn config(State(state): State<AppState>) -> Response {
    let engine = state.engine.load_full();
    let source = state.reloader.source();
    let bound = state.bound();
    json(&serde_json::json!({
        "config_generation": engine.generation(),
        "config_digest": engine.digest(),
        "catalog_version": engine.catalog().map(|c| c.version()),
        "catalog": engine.catalog().map(|c| serde_json::json!({
            "path": c.path().display().to_string(),
            "items": c.len(),
            "dim": c.dim(),
        })),
        "source": source.describe(),
        "overlay": source.overlay.as_ref().map(|p| p.display().to_string()),
        "runtime_slices": state.reloader.runtime_slices(),
        // The listeners as bound: `config` holds the file's values (with runtime slices merged),
        // where a port may be 0 and `--listen` / `--admin-listen` may have overridden it.
        "listen": bound.map_or(engine.config().server.listen, |(p, _)| p).to_string(),
        "admin_listen": bound.map_or(engine.config().server.admin_listen, |(_, a)| a).to_string(),
        "config": engine.config().raw,
    }))
}

fn change_response(name: &str, change: &SliceChange) -> Response {
    json(&serde_json::json!({
        "slice": name,
        "config_generation": change.generation,
        "changed": change.changed,
        "persisted": change.persisted,
        "note": persistence_note(change.persisted),
    }))
}

fn map_change_error(e: SliceChangeError) -> ApiError {
    match e {
        SliceChangeError::Invalid(e) => ApiError::InvalidConfig(e),
        SliceChangeError::NotRuntime(_) => ApiError::NotRuntimeSlice(e.to_string()),
        SliceChangeError::Persist { .. } => ApiError::PersistFailed(e.to_string()),
    }
}

/// `PUT /admin/slices/{name}`: the body is a JSON object with the keys of a slice table.
async fn put_slice(
    State(state): State<AppState>,
    Path(name): Path<String>,
    body: Bytes,
) -> Result<Response, ApiError> {
    let slice: RawSlice = decode_json(&body)?;
    let reloader = state.reloader.clone();
    let key = name.clone();
    let change = tokio::task::spawn_blocking(move || reloader.put_slice(&key, slice))
        .await
        .map_err(|e| ApiError::Panicked(e.to_string()))?
        .map_err(map_change_error)?;
    Ok(change_response(&name, &change))
}

/// `DELETE /admin/slices/{name}`: drop a runtime slice; the file's slice of that name serves again.
async fn delete_slice(State(state): State<AppState>, Path(name): Path<String>) -> Result<Response, ApiError> {
    let reloader = state.reloader.clone();
    let key = name.clone();
    let change = tokio::task::spawn_blocking(move || reloader.delete_slice(&key))
        .await
        .map_err(|e| ApiError::Panicked(e.to_string()))?
        .map_err(map_change_error)?;
    Ok(change_response(&name, &change))
}
