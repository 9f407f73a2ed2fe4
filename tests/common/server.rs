//! Starts the real server on ephemeral loopback ports, the way the binary does (`http::serve`,
//! with the gRPC front end beside it), and builds request bodies.

use std::net::SocketAddr;
use std::sync::Arc;

use medley::http::{serve_with, AppState};
use medley::serve::metrics::Metrics;
use medley::serve::reload::ConfigSource;
use medley::serve::shutdown::{self, Trigger};
use serde_json::{json, Value};

use super::Rng;

/// A running server; dropping it without [`Server::stop`] fires shutdown too.
pub struct Server {
    pub base: String,
    pub admin: String,
    pub addr: SocketAddr,
    /// The gRPC listener, as `http://127.0.0.1:port` (what a tonic client connects to).
    pub grpc: String,
    /// The config file the server reads (and watches).
    pub config_path: std::path::PathBuf,
    pub state: AppState,
    trigger: Option<Trigger>,
    task: Option<tokio::task::JoinHandle<()>>,
}

impl Server {
    /// Serves `config_toml` from a fresh temporary file, without an admin token.
    pub async fn start(config_toml: &str) -> Self {
        Self::start_with(config_toml, None, false).await
    }

    /// Serves `config_toml` from a fresh temporary file, with an optional admin token and an
    /// optional overlay file beside it.
    pub async fn start_with(config_toml: &str, admin_token: Option<&str>, overlay: bool) -> Self {
        static NEXT: std::sync::atomic::AtomicU32 = std::sync::atomic::AtomicU32::new(0);
        let n = NEXT.fetch_add(1, std::sync::atomic::Ordering::Relaxed);
        let dir = std::env::temp_dir().join(format!("medley-test-{}-{n}", std::process::id()));
        let _ = std::fs::remove_dir_all(&dir);
        std::fs::create_dir_all(&dir).unwrap();
        let config_path = dir.join("medley.toml");
        std::fs::write(&config_path, config_toml).unwrap();
        let source = ConfigSource {
            file: Some(config_path.clone()),
            overlay: overlay.then(|| dir.join("overlay.toml")),
            ..ConfigSource::default()
        };
        let public = tokio::net::TcpListener::bind("127.0.0.1:0").await.unwrap();
        let admin = tokio::net::TcpListener::bind("127.0.0.1:0").await.unwrap();
        let grpc = tokio::net::TcpListener::bind("127.0.0.1:0").await.unwrap();
        let (addr, admin_addr) = (public.local_addr().unwrap(), admin.local_addr().unwrap());
        let grpc_addr = grpc.local_addr().unwrap();
        let state = AppState::start(source, Arc::new(Metrics::new()), admin_token.map(str::to_owned))
            .expect("test config is valid");
        let (trigger, token) = shutdown::channel();
        let beside = medley::grpc::serve(grpc, state.clone(), token.clone());
        let task = tokio::spawn(serve_with(public, admin, state.clone(), token, beside));
        // serve() sets up the file watcher before it answers anything: one answered request
        // means a config write from now on is seen.
        let health = reqwest::get(format!("http://{addr}/healthz")).await.expect("server answers");
        assert_eq!(health.status(), 200);
        Self {
            base: format!("http://{addr}"),
            admin: format!("http://{admin_addr}"),
            addr,
            grpc: format!("http://{grpc_addr}"),
            config_path,
            state,
            trigger: Some(trigger),
            task: Some(task),
        }
    }

    /// The embedded default config.
    pub async fn start_default() -> Self {
        Self::start(medley::serve::config::DEFAULT_TOML).await
    }

    /// Starts shutdown without waiting.
    pub fn begin_stop(&self) {
        if let Some(t) = &self.trigger {
            t.fire();
        }
    }

    /// Fires shutdown and waits until the server has drained.
    pub async fn stop(mut self) {
        self.begin_stop();
        let task = self.task.take().unwrap();
        tokio::time::timeout(std::time::Duration::from_secs(20), task)
            .await
            .expect("server drains within 20 s")
            .unwrap();
    }

    /// Waits for a server whose shutdown was already fired.
    pub async fn join(mut self) {
        let task = self.task.take().unwrap();
        tokio::time::timeout(std::time::Duration::from_secs(20), task).await.expect("drains").unwrap();
    }

    pub fn url(&self, path: &str) -> String {
        format!("{}{path}", self.base)
    }

    /// Sum of the integer-valued series of `/metrics` (counters, histogram counts) that start
    /// with `prefix` (a family name, with labels or not).
    pub async fn metric_sum(&self, prefix: &str) -> u64 {
        let text = reqwest::get(format!("{}/metrics", self.admin)).await.unwrap().text().await.unwrap();
        text.lines()
            .filter(|l| l.starts_with(prefix))
            .filter_map(|l| l.rsplit(' ').next()?.parse::<u64>().ok())
            .sum()
    }
}

impl Drop for Server {
    fn drop(&mut self) {
        self.begin_stop();
    }
}

/// A JSON request with `n` candidates of dimension `d` in `groups` categories.
pub fn request(rng: &mut Rng, n: usize, d: usize, groups: usize) -> Value {
    let candidates: Vec<Value> = (0..n)
        .map(|i| {
            let e: Vec<f32> = (0..d).map(|_| rng.normal() as f32).collect();
            json!({"id": format!("item-{i}"), "score": rng.unit(), "category": format!("cat-{}", rng.below(groups)), "embedding": e})
        })
        .collect();
    json!({"candidates": candidates})
}

/// The candidates of a JSON request as the core takes them (id, score, category, embedding).
pub fn candidate_inputs(body: &Value) -> Vec<medley::CandidateInput> {
    body["candidates"]
        .as_array()
        .unwrap()
        .iter()
        .map(|c| medley::CandidateInput {
            id: c["id"].as_str().unwrap().into(),
            score: c["score"].as_f64().unwrap(),
            category: c["category"].as_str().map(String::from),
            embedding: c["embedding"]
                .as_array()
                .map(|e| e.iter().map(|x| x.as_f64().unwrap() as f32).collect()),
        })
        .collect()
}

/// POSTs JSON and returns (status, body as JSON).
pub async fn post_json(client: &reqwest::Client, url: &str, body: &Value) -> (u16, Value) {
    let r = client.post(url).json(body).send().await.unwrap();
    let status = r.status().as_u16();
    let text = r.text().await.unwrap();
    (status, serde_json::from_str(&text).unwrap_or_else(|e| panic!("non-JSON body {text:?}: {e}")))
}

/// POSTs raw bytes with a content type and returns (status, headers, body text).
pub async fn post_raw(
    client: &reqwest::Client,
    url: &str,
    content_type: &str,
    body: impl Into<reqwest::Body>,
) -> (u16, reqwest::header::HeaderMap, String) {
    let r = client.post(url).header("content-type", content_type).body(body).send().await.unwrap();
    let status = r.status().as_u16();
    let headers = r.headers().clone();
    (status, headers, r.text().await.unwrap())
}
