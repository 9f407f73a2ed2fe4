//! Runs the built `medley` binary: a scratch directory, and `medley serve` on ephemeral loopback
//! ports with its addresses read from its first log line.

use std::io::{BufRead, BufReader};
use std::process::{Command, Stdio};

/// The binary under test.
pub const BIN: &str = env!("CARGO_BIN_EXE_medley");

/// A fresh scratch directory for one test.
pub fn tempdir(name: &str) -> std::path::PathBuf {
    let dir = std::env::temp_dir().join(format!("medley-proc-{name}-{}", std::process::id()));
    let _ = std::fs::remove_dir_all(&dir);
    std::fs::create_dir_all(&dir).unwrap();
    dir
}

/// Kills a spawned server if its test fails before stopping it.
pub struct KillOnDrop(pub u32);

impl Drop for KillOnDrop {
    fn drop(&mut self) {
        if std::thread::panicking() {
            let _ = Command::new("kill").args(["-KILL", &self.0.to_string()]).status();
        }
    }
}

/// Starts `medley serve` on ephemeral ports with `args`; returns the child and both HTTP
/// addresses.
#[allow(dead_code)]
pub fn spawn_server(args: &[&str], envs: &[(&str, &str)]) -> (std::process::Child, String, String) {
    let (child, public, admin, _) = spawn_server_with_grpc(args, envs);
    (child, public, admin)
}

/// [`spawn_server`], also returning the gRPC listener's address.
pub fn spawn_server_with_grpc(
    args: &[&str],
    envs: &[(&str, &str)],
) -> (std::process::Child, String, String, String) {
    let mut cmd = Command::new(BIN);
    cmd.args([
        "serve",
        "--listen",
        "127.0.0.1:0",
        "--admin-listen",
        "127.0.0.1:0",
        "--grpc-listen",
        "127.0.0.1:0",
    ])
    .args(args)
    .stderr(Stdio::piped());
    for (k, v) in envs {
        cmd.env(k, v);
    }
    let mut child = cmd.spawn().unwrap();
    let mut stderr = BufReader::new(child.stderr.take().unwrap());
    let mut line = String::new();
    let (public, admin, grpc) = loop {
        line.clear();
        assert!(stderr.read_line(&mut line).unwrap() > 0, "server exited early");
        if let (Some(p), Some(a), Some(g)) = (
            line.split(" listen=").nth(1),
            line.split(" admin_listen=").nth(1),
            line.split(" grpc_listen=").nth(1),
        ) {
            let word = |s: &str| s.split_whitespace().next().unwrap().to_owned();
            break (word(p), word(a), word(g));
        }
    };
    // Keep draining stderr so the server never blocks on a full pipe.
    std::thread::spawn(move || for _ in stderr.lines() {});
    // The server sets up its file watcher before it answers anything: once /healthz answers,
    // config writes are seen.
    let runtime = tokio::runtime::Builder::new_current_thread().enable_all().build().unwrap();
    let status =
        runtime.block_on(async { reqwest::get(format!("http://{public}/healthz")).await.unwrap().status() });
    assert_eq!(status, 200);
    (child, public, admin, grpc)
}
