//! Configuration: the TOML a deployment writes ([`RawConfig`]) and the validated [`Config`] the
//! engine serves.
//!
//! Parsing and validation are one step, [`Config::from_toml`], shared by `medley serve`,
//! `medley check-config` and `medley rerank`, so a file that one of them accepts all of them
//! accept. The embedded default (`config/default.toml`) is compiled in and goes through the same
//! path. Unknown keys are refused, naming the key: a typo in a config must not silently fall back
//! to a default.
//!
//! One file per step: `raw` (the serde shape), `validated` (the checks and the types they
//! build), `describe` (the `check-config` text), `hash` (arm assignment), `error`.

mod describe;
mod error;
mod hash;
mod raw;
mod validated;

pub use describe::describe;
pub use error::ConfigError;
pub use hash::{arm_bucket, arm_hash, fnv1a64, mix64};
pub use raw::{RawArm, RawCatalog, RawConfig, RawExposureLog, RawServer, RawShadow, RawSlice};
pub use validated::{
    validate_slice, Arm, Config, ExposureLogSettings, ServerSettings, Settings, Shadow, Slice, UnknownItems,
    IMPLICIT_ARM, SLICE_DEFAULT_ALGORITHM, SLICE_DEFAULT_K,
};

/// The configuration compiled into the binary; `medley serve` without `--config` serves it.
pub const DEFAULT_TOML: &str = include_str!("../../../config/default.toml");

/// The slice a request without a `slice` field is served by; every config must define it.
pub const DEFAULT_SLICE: &str = "default";
