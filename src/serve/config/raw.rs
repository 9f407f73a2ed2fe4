//! The TOML a deployment writes, as serde reads it: every key optional except the slices, and
//! unknown keys refused (a typo must not silently fall back to a default). Nothing here checks
//! values; `validated` does.

use std::collections::BTreeMap;

use serde::Deserialize;

/// The file as written: every key optional except the slices themselves.
#[derive(Debug, Clone, Default, Deserialize, serde::Serialize)]
#[serde(deny_unknown_fields)]
pub struct RawConfig {
    /// Listeners and limits.
    #[serde(default)]
    pub server: RawServer,
    /// Traffic slices by name.
    #[serde(default)]
    pub slices: BTreeMap<String, RawSlice>,
    /// The item catalog, when requests may send ids without embeddings.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub catalog: Option<RawCatalog>,
    /// The exposure log: what was served, one JSON line a request, for offline replay.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub exposure_log: Option<RawExposureLog>,
}

/// The `[exposure_log]` table.
#[derive(Debug, Clone, Default, PartialEq, Deserialize, serde::Serialize)]
#[serde(deny_unknown_fields)]
pub struct RawExposureLog {
    /// Directory the files go to (created if missing); a relative path is relative to the
    /// config file's directory.
    pub dir: String,
    /// Share of traffic logged, in `[0, 1]` (default 1): by a stable hash of `unit_id` when the
    /// request has one, else per request.
    pub sample_rate: Option<f64>,
    /// A file is closed and a new one started once it holds this many bytes (default 256 MiB).
    pub max_file_bytes: Option<u64>,
    /// Records waiting for the writer; beyond it new ones are dropped and counted (default
    /// 10 000).
    pub queue: Option<u64>,
    /// Bytes of records waiting for the writer; beyond it new ones are dropped and counted
    /// (default 256 MiB), so a queue of large slates stays bounded in memory too.
    pub queue_bytes: Option<u64>,
    /// Write zstd-compressed `.jsonl.zst` files (default false).
    pub compress: Option<bool>,
}

/// The `[catalog]` table.
#[derive(Debug, Clone, Default, PartialEq, Deserialize, serde::Serialize)]
#[serde(deny_unknown_fields)]
pub struct RawCatalog {
    /// A Parquet file, or an Arrow IPC file (`.arrow`, `.feather`, `.ipc`); a relative path is
    /// relative to the config file's directory.
    pub path: String,
}

/// The `[server]` table.
#[derive(Debug, Clone, Default, Deserialize, serde::Serialize)]
#[serde(deny_unknown_fields)]
pub struct RawServer {
    /// Public listener (`"127.0.0.1:8080"`).
    pub listen: Option<String>,
    /// Private listener for metrics and health (`"127.0.0.1:8081"`).
    pub admin_listen: Option<String>,
    /// gRPC listener (`"127.0.0.1:8082"`); the empty string turns gRPC off.
    pub grpc_listen: Option<String>,
    /// Largest accepted request body, and the longest line on the stream endpoint.
    pub max_body_bytes: Option<u64>,
    /// Request body bytes held at once across all requests (reserved at the declared
    /// Content-Length, or as a chunked body or stream line arrives); beyond it, 503 at once.
    pub max_inflight_body_bytes: Option<u64>,
    /// Most candidates in one request.
    pub max_candidates: Option<u64>,
    /// Largest embedding dimension.
    pub max_dim: Option<u64>,
    /// Largest k.
    pub max_k: Option<u64>,
    /// Deadline for one request (or one stream line), in milliseconds.
    pub request_timeout_ms: Option<u64>,
    /// Requests processed at once; beyond it the service answers 503 at once.
    pub max_in_flight: Option<u64>,
    /// Threads of the kernel pool; 0 means one per core.
    pub pool_threads: Option<u64>,
    /// Lines of one stream processed at once.
    pub stream_in_flight: Option<u64>,
    /// Slates whose estimated work is below this run inline on the async worker.
    pub inline_work_below: Option<u64>,
    /// Shadow jobs waiting for the shadow worker; beyond it new ones are dropped and counted.
    pub shadow_queue: Option<u64>,
    /// Time a connection has to send a request's headers, counted from when it opens or from
    /// the end of the previous response: the slow-header limit and the keep-alive idle limit.
    pub header_timeout_ms: Option<u64>,
    /// Time a request has to send its whole body once its headers are in (on the stream
    /// endpoint: the longest gap between body chunks).
    pub body_timeout_ms: Option<u64>,
    /// Open connections per listener; beyond it new connections wait in the accept backlog.
    pub max_connections: Option<u64>,
}

/// One `[slices.NAME]` table.
#[derive(Debug, Clone, Default, PartialEq, Deserialize, serde::Serialize)]
#[serde(deny_unknown_fields)]
pub struct RawSlice {
    /// Diversifier name (`relevance`, `mmr`, `dpp`, `quota`).
    pub algorithm: Option<String>,
    /// Diversity weight in `[0, 1]`.
    pub lambda: Option<f64>,
    /// Slate length.
    pub k: Option<u64>,
    /// `minmax` or `none`.
    pub score_transform: Option<String>,
    /// Hard cap on items per category in one slate.
    pub max_per_category: Option<u64>,
    /// When true, requests may not override `algorithm`, `lambda`, `k`, `window` or `profile`.
    pub locked: Option<bool>,
    /// Sliding window of `dpp` and `ssd` (2..=1000); absent compares with every pick.
    pub window: Option<u64>,
    /// What a request's candidate that the catalog does not know becomes when the algorithm needs
    /// its embedding: `refuse` (422 `unknown_item`, the default) or `drop`.
    pub unknown_items: Option<String>,
    /// Default taste profile (category → weight) for requests that send none.
    pub profile: Option<BTreeMap<String, f64>>,
    /// Fairness floor for requests that send none.
    pub fairness: Option<crate::api::wire::WireFairness>,
    /// Weighted A/B arms; each overrides the slice's settings it names.
    pub arms: Option<Vec<RawArm>>,
    /// A diversifier run beside production on a sample of requests, never affecting answers.
    pub shadow: Option<RawShadow>,
}

/// One `[[slices.NAME.arms]]` entry.
#[derive(Debug, Clone, Default, PartialEq, Deserialize, serde::Serialize)]
#[serde(deny_unknown_fields)]
pub struct RawArm {
    /// Arm name, reported in responses and metric labels.
    pub name: String,
    /// Relative share of units assigned to this arm.
    pub weight: u64,
    /// Overrides the slice's algorithm.
    pub algorithm: Option<String>,
    /// Overrides the slice's lambda.
    pub lambda: Option<f64>,
    /// Overrides the slice's k.
    pub k: Option<u64>,
    /// Overrides the slice's score transform.
    pub score_transform: Option<String>,
    /// Overrides the slice's per-category cap.
    pub max_per_category: Option<u64>,
    /// Overrides the slice's window.
    pub window: Option<u64>,
    /// Overrides the slice's unknown-item policy.
    pub unknown_items: Option<String>,
}

/// The `[slices.NAME.shadow]` table.
#[derive(Debug, Clone, Default, PartialEq, Deserialize, serde::Serialize)]
#[serde(deny_unknown_fields)]
pub struct RawShadow {
    /// The shadow diversifier.
    pub algorithm: String,
    /// Its lambda (default 0.5).
    pub lambda: Option<f64>,
    /// Share of the slice's requests shadowed, in `[0, 1]` (default 1).
    pub sample_rate: Option<f64>,
}
