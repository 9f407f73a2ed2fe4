//! The running service, apart from any front end: the validated config and its hot swap, the
//! engine that turns a wire request into a served slate, the kernel pool, shadow runs, metrics
//! and the shutdown token.
//!
//! May import `api` (the wire contract) and `medley-core`; never a front end (`http`) or the
//! offline tools. The front ends and the offline tools build on it.
//!
//! - [`config`]: the TOML a deployment writes, validated into slices and server settings;
//! - [`engine`]: a config snapshot and its generation; `prepare` validates, `run` serves;
//! - [`reload`]: where the config comes from, runtime slices, the file watch, SIGHUP;
//! - [`pool`]: the bounded CPU pool kernels run on, with per-thread workspaces;
//! - [`shadow`]: the bounded shadow queue and its worker;
//! - [`exposure`]: the exposure log of served requests and its writer thread;
//! - [`metrics`]: the Prometheus registry and every handle;
//! - [`shutdown`]: the SIGINT/SIGTERM future and the token background tasks hold.

pub mod catalog;
pub mod config;
pub mod engine;
pub mod exposure;
pub mod metrics;
pub mod pool;
pub mod reload;
pub mod shadow;
pub mod shutdown;
