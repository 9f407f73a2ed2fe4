//! Command-line types (clap derive) and nothing else; `main.rs` acts on them.

use std::net::SocketAddr;
use std::path::PathBuf;

use clap::{Parser, Subcommand, ValueEnum};

/// Re-ranks scored candidate lists into diverse slates.
#[derive(Debug, Parser)]
#[command(name = "medley", version, about)]
pub struct Cli {
    /// Log line format.
    #[arg(long, global = true, value_enum, default_value_t = LogFormat::Text)]
    pub log_format: LogFormat,
    /// What to do.
    #[command(subcommand)]
    pub command: Command,
}

/// Log line format.
#[derive(Debug, Clone, Copy, PartialEq, Eq, ValueEnum)]
pub enum LogFormat {
    /// Human-readable lines.
    Text,
    /// One JSON object per line.
    Json,
}

/// Subcommands.
#[derive(Debug, Subcommand)]
pub enum Command {
    /// Serve the HTTP and gRPC APIs (embedded default config unless --config is given).
    Serve {
        /// Config file (TOML); without it the embedded config/default.toml is served.
        #[arg(long)]
        config: Option<PathBuf>,
        /// Public listener address; overrides server.listen.
        #[arg(long)]
        listen: Option<SocketAddr>,
        /// Private (metrics, health, admin) listener address; overrides server.admin_listen.
        #[arg(long)]
        admin_listen: Option<SocketAddr>,
        /// gRPC listener address; overrides server.grpc_listen ("" turns gRPC off).
        #[arg(long, value_parser = grpc_addr)]
        grpc_listen: Option<GrpcListen>,
        /// File where slices set through the admin API persist (read at start, rewritten
        /// atomically on each change); without it they are lost on restart.
        #[arg(long)]
        overlay: Option<PathBuf>,
    },
    /// Re-rank a JSONL file of requests into a JSONL file of responses, on all cores.
    Rerank {
        /// Input file of one request per line, or - for stdin.
        #[arg(long, default_value = "-")]
        input: String,
        /// Output file, or - for stdout.
        #[arg(long, default_value = "-")]
        output: String,
        /// Config file whose slices serve the requests (default: the embedded config).
        #[arg(long)]
        config: Option<PathBuf>,
        /// Item catalog (Parquet or Arrow IPC) for candidates sent without embeddings; replaces
        /// the path in the config's catalog table.
        #[arg(long)]
        catalog: Option<PathBuf>,
    },
    /// Write a demo corpus of JSONL requests (an invented outdoor-gear shop), deterministic per seed.
    Sample {
        /// Requests to write.
        #[arg(long, default_value_t = 1000)]
        requests: usize,
        /// Candidates per request (default 200; 6 with --one).
        #[arg(long)]
        candidates: Option<usize>,
        /// Embedding dimension (default 32; 4 with --one).
        #[arg(long)]
        dim: Option<usize>,
        /// Seed; the same seed writes the same bytes.
        #[arg(long, default_value_t = 1)]
        seed: u64,
        /// Add "clicked": held-out positives drawn from each user's taste, for offline replay.
        #[arg(long)]
        with_clicks: bool,
        /// Send embeddings as embedding_b64 (smaller, faster to parse).
        #[arg(long)]
        b64: bool,
        /// Add each user's taste "profile" (category shares), for calibrated and miscalibration.
        #[arg(long)]
        with_profiles: bool,
        /// Add each candidate's maker "group" (independent or mainline; the ranking model
        /// under-scores independent makers) and a fairness floor for them on every request.
        #[arg(long)]
        with_groups: bool,
        /// Print one small request, for a first curl.
        #[arg(long)]
        one: bool,
        /// Write the shop's items to FILE as an item catalog (Parquet), and requests that carry
        /// ids and scores only.
        #[arg(long, value_name = "FILE")]
        catalog: Option<PathBuf>,
        /// Output file, or - for stdout.
        #[arg(long, default_value = "-")]
        output: String,
    },
    /// Replay logged requests with their clicks over a grid of algorithms and lambdas, and report
    /// the accuracy–diversity frontier (table, frontier.csv, frontier.svg).
    Replay {
        /// Logged traffic: a file or a directory of them (.jsonl, .json or .ndjson, optionally .zst),
        /// in the corpus format (requests with "clicked" ids, as `medley sample --with-clicks` writes)
        /// or the exposure log `medley serve` writes.
        #[arg(long)]
        input: PathBuf,
        /// Clicks to join by request id: one {"request_id": "...", "clicked": ["id", ...]} a line.
        #[arg(long, value_name = "FILE")]
        clicks: Option<PathBuf>,
        /// Exponent eta of the examination propensity (1/rank)^eta of the position-debiased
        /// ips_clicks column.
        #[arg(long, default_value_t = 1.0)]
        propensity_eta: f64,
        /// Largest weight of one click in ips_clicks.
        #[arg(long, default_value_t = 10.0)]
        ips_clip: f64,
        /// Algorithms to compare, comma-separated (relevance, mmr, dpp, quota, ssd, calibrated;
        /// calibrated needs a "profile" on every line).
        #[arg(long, default_value = "relevance,mmr,dpp,quota")]
        algorithms: String,
        /// Lambdas: a list (0,0.1,0.5) or start:end:step.
        #[arg(long, default_value = "0:1:0.1")]
        lambdas: String,
        /// Slate length.
        #[arg(long, default_value_t = 10)]
        k: usize,
        /// Sliding windows for dpp and ssd, comma-separated (e.g. 5,10): each adds a line of
        /// cells beside the unbounded one.
        #[arg(long, value_delimiter = ',')]
        windows: Vec<usize>,
        /// Directory for frontier.csv and frontier.svg.
        #[arg(long, default_value = "replay-out")]
        out: PathBuf,
        /// Item catalog (Parquet or Arrow IPC) for logged candidates without embeddings.
        #[arg(long, value_name = "FILE")]
        catalog: Option<PathBuf>,
        /// Choose per algorithm the most diverse lambda shown non-inferior to a bound, e.g.
        /// "ndcg>=0.95*baseline" (metrics: ndcg, recall, ndcg_reachable, recall_reachable,
        /// relevance_retained, alpha_ndcg), refine it by bisection, and print a slice config.
        #[arg(long)]
        pick: Option<String>,
    },
    /// Validate a config file and print what it would serve; exit 1 if it is invalid.
    CheckConfig {
        /// The config file (TOML).
        file: PathBuf,
    },
}

/// `--grpc-listen`: an address, or nothing (the empty string) to turn gRPC off.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct GrpcListen(pub Option<SocketAddr>);

fn grpc_addr(text: &str) -> Result<GrpcListen, String> {
    if text.is_empty() {
        return Ok(GrpcListen(None));
    }
    text.parse()
        .map(|a| GrpcListen(Some(a)))
        .map_err(|e| format!("{text:?} is not an address like 127.0.0.1:8082: {e}"))
}
