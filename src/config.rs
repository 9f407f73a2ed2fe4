//! Configuration: the TOML a deployment writes ([`RawConfig`]) and the validated [`Config`] the
//! engine serves.
//!
//! Parsing and validation are one step, [`Config::from_toml`], shared by `medley serve`,
//! `medley check-config` and `medley rerank`, so a file that one of them accepts all of them
//! accept. The embedded default (`config/default.toml`) is compiled in and goes through the same
//! path. Unknown keys are refused, naming the key: a typo in a config must not silently fall back
//! to a default.

use std::collections::BTreeMap;
use std::net::SocketAddr;
use std::time::Duration;

use serde::Deserialize;

use crate::diversify::{self, Diversifier};
use crate::model::{Limits, ScoreTransform};

/// The configuration compiled into the binary; `medley serve` without `--config` serves it.
pub const DEFAULT_TOML: &str = include_str!("../config/default.toml");

/// The slice a request without a `slice` field is served by; every config must define it.
pub const DEFAULT_SLICE: &str = "default";

/// Why a configuration was refused.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
pub enum ConfigError {
    /// Not TOML, a wrong type, or an unknown key. The message names the key and the line.
    #[error("{0}")]
    Parse(String),
    /// Well-formed TOML with a value the service cannot serve.
    #[error("{field}: {message}")]
    Invalid {
        /// Dotted path of the offending key (`slices.home.lambda`).
        field: String,
        /// What is wrong and what is allowed.
        message: String,
    },
}

fn invalid(field: impl Into<String>, message: impl Into<String>) -> ConfigError {
    ConfigError::Invalid { field: field.into(), message: message.into() }
}

/// The file as written: every key optional except the slices themselves.
#[derive(Debug, Clone, Default, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawConfig {
    /// Listeners and limits.
    #[serde(default)]
    pub server: RawServer,
    /// Traffic slices by name.
    #[serde(default)]
    pub slices: BTreeMap<String, RawSlice>,
}

/// The `[server]` table.
#[derive(Debug, Clone, Default, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawServer {
    /// Public listener (`"127.0.0.1:8080"`).
    pub listen: Option<String>,
    /// Private listener for metrics and health (`"127.0.0.1:8081"`).
    pub admin_listen: Option<String>,
    /// Largest accepted request body, and the longest line on the stream endpoint.
    pub max_body_bytes: Option<u64>,
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
    /// When true, requests may not override `algorithm`, `lambda` or `k`.
    pub locked: Option<bool>,
}

/// Validated server settings.
#[derive(Debug, Clone, PartialEq)]
pub struct ServerSettings {
    /// Public listener.
    pub listen: SocketAddr,
    /// Private listener.
    pub admin_listen: SocketAddr,
    /// Largest body (and stream line) in bytes.
    pub max_body_bytes: usize,
    /// Candidate, dimension and k limits.
    pub limits: Limits,
    /// Per-request deadline.
    pub request_timeout: Duration,
    /// Concurrency limit before shedding.
    pub max_in_flight: usize,
    /// Kernel pool threads (resolved: never 0).
    pub pool_threads: usize,
    /// Stream lines in flight per stream.
    pub stream_in_flight: usize,
    /// Inline cut-off in work units (see [`crate::Diversifier::work`]).
    pub inline_work_below: u64,
}

/// A validated slice: what a request on it is served with unless it overrides.
#[derive(Debug, Clone)]
pub struct Slice {
    /// Slice name, as configured (used as a metric label).
    pub name: String,
    /// Default diversifier.
    pub algorithm: &'static dyn Diversifier,
    /// Default lambda.
    pub lambda: f64,
    /// Default k.
    pub k: u64,
    /// Score transform.
    pub score_transform: ScoreTransform,
    /// Per-category cap.
    pub max_per_category: Option<usize>,
    /// Refuse per-request overrides.
    pub locked: bool,
    /// The table as written, for `check-config` and the admin view.
    pub raw: RawSlice,
}

/// A configuration the engine can serve.
#[derive(Debug, Clone)]
pub struct Config {
    /// Listeners and limits.
    pub server: ServerSettings,
    /// Slices by name; always contains [`DEFAULT_SLICE`].
    pub slices: BTreeMap<String, Slice>,
}

/// Defaults for keys a slice leaves out.
pub const SLICE_DEFAULT_ALGORITHM: &str = "relevance";
/// Default `k` of a slice.
pub const SLICE_DEFAULT_K: u64 = 10;

impl Config {
    /// Parses and validates a TOML document.
    ///
    /// # Errors
    /// [`ConfigError::Parse`] for syntax, types and unknown keys; [`ConfigError::Invalid`] naming
    /// the field for values out of range.
    pub fn from_toml(text: &str) -> Result<Self, ConfigError> {
        let raw: RawConfig = toml::from_str(text).map_err(|e| ConfigError::Parse(e.to_string()))?;
        Self::from_raw(raw)
    }

    /// The embedded default configuration.
    ///
    /// # Panics
    /// If `config/default.toml` does not validate, which a unit test rules out.
    #[must_use]
    pub fn embedded_default() -> Self {
        Self::from_toml(DEFAULT_TOML).expect("config/default.toml is valid (tested)")
    }

    /// Validates a parsed document.
    ///
    /// # Errors
    /// [`ConfigError::Invalid`] naming the first offending field.
    pub fn from_raw(raw: RawConfig) -> Result<Self, ConfigError> {
        let server = validate_server(&raw.server)?;
        if !raw.slices.contains_key(DEFAULT_SLICE) {
            return Err(invalid(
                "slices",
                format!("a [slices.{DEFAULT_SLICE}] table is required: requests without a slice use it"),
            ));
        }
        let mut slices = BTreeMap::new();
        for (name, raw_slice) in raw.slices {
            let slice = validate_slice(&name, raw_slice, &server.limits)?;
            slices.insert(name, slice);
        }
        Ok(Self { server, slices })
    }

    /// The slice called `name`.
    #[must_use]
    pub fn slice(&self, name: &str) -> Option<&Slice> {
        self.slices.get(name)
    }
}

fn parse_addr(field: &str, value: Option<&String>, default: &str) -> Result<SocketAddr, ConfigError> {
    let text = value.map_or(default, String::as_str);
    text.parse().map_err(|_| invalid(field, format!("{text:?} is not an address like \"127.0.0.1:8080\"")))
}

fn in_range(
    field: &str,
    value: Option<u64>,
    default: u64,
    range: std::ops::RangeInclusive<u64>,
) -> Result<u64, ConfigError> {
    let v = value.unwrap_or(default);
    if range.contains(&v) {
        Ok(v)
    } else {
        Err(invalid(field, format!("{v} is outside {}..={}", range.start(), range.end())))
    }
}

fn to_usize(v: u64) -> usize {
    usize::try_from(v).unwrap_or(usize::MAX)
}

fn validate_server(raw: &RawServer) -> Result<ServerSettings, ConfigError> {
    let defaults = Limits::default();
    let listen = parse_addr("server.listen", raw.listen.as_ref(), "127.0.0.1:8080")?;
    let admin_listen = parse_addr("server.admin_listen", raw.admin_listen.as_ref(), "127.0.0.1:8081")?;
    // Upper bounds keep a typo from configuring a service that can be made to allocate without
    // limit; they are far above any realistic slate.
    let max_body_bytes = in_range("server.max_body_bytes", raw.max_body_bytes, 16 << 20, 1024..=1 << 30)?;
    let max_candidates =
        in_range("server.max_candidates", raw.max_candidates, defaults.max_candidates as u64, 1..=100_000)?;
    let max_dim = in_range("server.max_dim", raw.max_dim, defaults.max_dim as u64, 1..=65_536)?;
    let max_k = in_range("server.max_k", raw.max_k, defaults.max_k as u64, 1..=10_000)?;
    let timeout_ms = in_range("server.request_timeout_ms", raw.request_timeout_ms, 1_000, 1..=600_000)?;
    let max_in_flight = in_range("server.max_in_flight", raw.max_in_flight, 256, 1..=1_000_000)?;
    let cores = std::thread::available_parallelism().map_or(1, std::num::NonZero::get) as u64;
    let pool_threads = match in_range("server.pool_threads", raw.pool_threads, 0, 0..=1024)? {
        0 => cores,
        n => n,
    };
    let stream_in_flight = in_range("server.stream_in_flight", raw.stream_in_flight, 4, 1..=1024)?;
    let inline_work_below = in_range(
        "server.inline_work_below",
        raw.inline_work_below,
        crate::pool::INLINE_WORK_BELOW,
        0..=u64::MAX,
    )?;
    Ok(ServerSettings {
        listen,
        admin_listen,
        max_body_bytes: to_usize(max_body_bytes),
        limits: Limits {
            max_candidates: to_usize(max_candidates),
            max_dim: to_usize(max_dim),
            max_k: to_usize(max_k),
        },
        request_timeout: Duration::from_millis(timeout_ms),
        max_in_flight: to_usize(max_in_flight),
        pool_threads: to_usize(pool_threads),
        stream_in_flight: to_usize(stream_in_flight),
        inline_work_below,
    })
}

/// Validates one slice table; `name` is its key under `[slices]`.
///
/// # Errors
/// [`ConfigError::Invalid`] naming `slices.NAME.FIELD`.
pub fn validate_slice(name: &str, raw: RawSlice, limits: &Limits) -> Result<Slice, ConfigError> {
    let field = |key: &str| format!("slices.{name}.{key}");
    if !is_label_safe(name) {
        return Err(invalid(
            format!("slices.{name}"),
            "slice names are 1 to 64 characters of a-z, 0-9, '-' and '_'",
        ));
    }
    let algorithm_name = raw.algorithm.as_deref().unwrap_or(SLICE_DEFAULT_ALGORITHM);
    let algorithm = diversify::by_name(algorithm_name).ok_or_else(|| {
        invalid(
            field("algorithm"),
            format!(
                "unknown algorithm {algorithm_name:?}; known: {}",
                diversify::names().collect::<Vec<_>>().join(", ")
            ),
        )
    })?;
    let lambda = raw.lambda.unwrap_or(0.0);
    if !(0.0..=1.0).contains(&lambda) {
        return Err(invalid(field("lambda"), format!("{lambda} is outside [0, 1]")));
    }
    let k = raw.k.unwrap_or(SLICE_DEFAULT_K);
    if k == 0 || k > limits.max_k as u64 {
        return Err(invalid(field("k"), format!("{k} is outside 1..={}", limits.max_k)));
    }
    let transform_name = raw.score_transform.as_deref().unwrap_or("minmax");
    let score_transform = ScoreTransform::from_name(transform_name).ok_or_else(|| {
        invalid(
            field("score_transform"),
            format!("unknown score transform {transform_name:?}; known: minmax, none"),
        )
    })?;
    let max_per_category = match raw.max_per_category {
        None => None,
        Some(0) => {
            return Err(invalid(
                field("max_per_category"),
                "0 would empty every slate; omit the key for no cap",
            ))
        }
        Some(c) => Some(to_usize(c)),
    };
    Ok(Slice {
        name: name.to_owned(),
        algorithm,
        lambda: lambda + 0.0,
        k,
        score_transform,
        max_per_category,
        locked: raw.locked.unwrap_or(false),
        raw,
    })
}

/// A plain-text summary of what `config` serves, for `medley check-config`.
#[must_use]
pub fn describe(config: &Config) -> String {
    use std::fmt::Write as _;
    let s = &config.server;
    let mut out = String::new();
    let _ = writeln!(out, "config ok");
    let _ = writeln!(out, "listen {} (public), {} (private)", s.listen, s.admin_listen);
    let _ = writeln!(
        out,
        "limits: body {} bytes, {} candidates, dim {}, k {}; timeout {} ms; {} in flight; {} pool threads",
        s.max_body_bytes,
        s.limits.max_candidates,
        s.limits.max_dim,
        s.limits.max_k,
        s.request_timeout.as_millis(),
        s.max_in_flight,
        s.pool_threads
    );
    for slice in config.slices.values() {
        let cap = slice.max_per_category.map_or_else(|| "none".to_owned(), |c| c.to_string());
        let _ = writeln!(
            out,
            "slice {}: algorithm={} lambda={} k={} score_transform={} max_per_category={} locked={}",
            slice.name,
            slice.algorithm.name(),
            slice.lambda,
            slice.k,
            slice.score_transform.name(),
            cap,
            slice.locked
        );
    }
    out
}

/// Slice names become metric label values; keep them short and plain.
fn is_label_safe(name: &str) -> bool {
    (1..=64).contains(&name.len())
        && name.bytes().all(|b| b.is_ascii_lowercase() || b.is_ascii_digit() || b == b'-' || b == b'_')
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn embedded_default_validates_and_serves_dpp() {
        let c = Config::embedded_default();
        let d = c.slice(DEFAULT_SLICE).unwrap();
        assert_eq!(d.algorithm.name(), "dpp");
        assert_eq!(c.server.listen.to_string(), "127.0.0.1:8080");
        assert_eq!(c.server.admin_listen.to_string(), "127.0.0.1:8081");
        assert_eq!(c.server.max_body_bytes, 16 << 20);
        assert_eq!(c.server.limits, Limits::default());
    }

    #[test]
    fn every_sample_in_config_dir_validates() {
        let dir = std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("config");
        let mut seen = 0;
        for entry in std::fs::read_dir(dir).unwrap() {
            let path = entry.unwrap().path();
            if path.extension().is_some_and(|e| e == "toml") {
                let text = std::fs::read_to_string(&path).unwrap();
                Config::from_toml(&text).unwrap_or_else(|e| panic!("{}: {e}", path.display()));
                seen += 1;
            }
        }
        assert!(seen >= 2, "config/ holds default.toml and example.toml");
    }

    fn err(text: &str) -> String {
        Config::from_toml(text).unwrap_err().to_string()
    }

    #[test]
    fn refusals_name_the_field() {
        assert!(err("[slices.home]\nk = 3\n").contains("[slices.default]"));
        assert!(err("[slices.default]\nlambda = 1.5\n").starts_with("slices.default.lambda: 1.5"));
        assert!(err("[slices.default]\nalgorithm = \"dp\"\n").starts_with("slices.default.algorithm"));
        assert!(err("[slices.default]\nk = 0\n").starts_with("slices.default.k"));
        assert!(err("[slices.default]\nk = 1001\n").starts_with("slices.default.k"));
        assert!(
            err("[slices.default]\nscore_transform = \"z\"\n").starts_with("slices.default.score_transform")
        );
        assert!(
            err("[slices.default]\nmax_per_category = 0\n").starts_with("slices.default.max_per_category")
        );
        assert!(err("[slices.default]\nlamda = 0.2\n").contains("unknown field `lamda`"));
        assert!(err("[server]\nlisten = \"nowhere\"\n[slices.default]\n").starts_with("server.listen"));
        assert!(err("[server]\nmax_in_flight = 0\n[slices.default]\n").starts_with("server.max_in_flight"));
        assert!(err("[slices.default]\n[slices.Home]\n").starts_with("slices.Home"));
        assert!(err("[slices.default]\nlambda = \"x\"\n").contains("invalid type"));
    }

    #[test]
    fn slice_defaults_are_documented_values() {
        let c = Config::from_toml("[slices.default]\n").unwrap();
        let d = c.slice("default").unwrap();
        assert_eq!(d.algorithm.name(), SLICE_DEFAULT_ALGORITHM);
        assert_eq!(d.k, SLICE_DEFAULT_K);
        assert!(d.lambda == 0.0 && !d.locked && d.max_per_category.is_none());
        assert_eq!(d.score_transform, ScoreTransform::MinMax);
    }
}
