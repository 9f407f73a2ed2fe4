//! The built `medley` binary: `check-config`, `rerank` on files and pipes, and `serve` draining
//! on SIGTERM with exit status 0.

mod common;

use std::io::{BufRead, BufReader, Write};
use std::process::{Command, Stdio};
use std::time::{Duration, Instant};

use common::server::request;
use common::Rng;
use serde_json::{json, Value};

const BIN: &str = env!("CARGO_BIN_EXE_medley");

fn tempdir(name: &str) -> std::path::PathBuf {
    let dir = std::env::temp_dir().join(format!("medley-cli-{name}-{}", std::process::id()));
    let _ = std::fs::remove_dir_all(&dir);
    std::fs::create_dir_all(&dir).unwrap();
    dir
}

#[test]
fn check_config_accepts_the_samples_and_refuses_bad_files_naming_the_field() {
    let example = concat!(env!("CARGO_MANIFEST_DIR"), "/config/example.toml");
    let out = Command::new(BIN).args(["check-config", example]).output().unwrap();
    assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
    let text = String::from_utf8(out.stdout).unwrap();
    assert!(text.contains("slice search: algorithm=quota lambda=0.8 k=10"), "{text}");
    assert!(text.contains("locked=true"), "{text}");

    let dir = tempdir("check");
    let bad = dir.join("bad.toml");
    std::fs::write(&bad, "[slices.default]\nalgorithm = \"dpp\"\nlambda = 3\n").unwrap();
    let out = Command::new(BIN).args(["check-config", bad.to_str().unwrap()]).output().unwrap();
    assert_eq!(out.status.code(), Some(1));
    let err = String::from_utf8(out.stderr).unwrap();
    assert!(err.contains("slices.default.lambda: 3 is outside [0, 1]"), "{err}");
    let out = Command::new(BIN).args(["check-config", "/nonexistent/medley.toml"]).output().unwrap();
    assert_eq!(out.status.code(), Some(1));
}

#[test]
fn rerank_batch_keeps_input_order_and_reports_bad_lines() {
    let dir = tempdir("batch");
    let (input, output) = (dir.join("in.jsonl"), dir.join("out.jsonl"));
    let mut rng = Rng(21);
    let mut lines = Vec::new();
    for i in 0..40 {
        let mut r = request(&mut rng, 20 + i % 7, 6, 3);
        r["request_id"] = json!(format!("req-{i}"));
        r["algorithm"] = json!(["relevance", "mmr", "dpp", "quota"][i % 4]);
        lines.push(r.to_string());
    }
    lines[17] = "not json".into();
    lines[30] = json!({"k": 0, "candidates": []}).to_string();
    std::fs::write(&input, lines.join("\n") + "\n").unwrap();
    let out = Command::new(BIN)
        .args(["rerank", "--input", input.to_str().unwrap(), "--output", output.to_str().unwrap()])
        .output()
        .unwrap();
    assert!(out.status.success());
    let summary = String::from_utf8(out.stderr).unwrap();
    assert!(summary.contains("40 lines, 2 errors"), "{summary}");
    let answers: Vec<Value> =
        std::fs::read_to_string(&output).unwrap().lines().map(|l| serde_json::from_str(l).unwrap()).collect();
    assert_eq!(answers.len(), 40);
    for (i, a) in answers.iter().enumerate() {
        match i {
            17 => assert_eq!(
                (a["error"]["code"].as_str(), a["line"].as_u64()),
                (Some("malformed_json"), Some(18))
            ),
            30 => assert_eq!(
                (a["error"]["code"].as_str(), a["line"].as_u64()),
                (Some("k_out_of_range"), Some(31))
            ),
            _ => {
                assert_eq!(a["request_id"], format!("req-{i}"));
                assert_eq!(a["items"].as_array().unwrap().len(), 10);
            }
        }
    }

    // stdin to stdout gives the same bytes as file to file.
    let mut child = Command::new(BIN)
        .args(["rerank", "--input", "-", "--output", "-"])
        .stdin(Stdio::piped())
        .stdout(Stdio::piped())
        .stderr(Stdio::null())
        .spawn()
        .unwrap();
    child.stdin.take().unwrap().write_all((lines.join("\n") + "\n").as_bytes()).unwrap();
    let piped = child.wait_with_output().unwrap();
    assert!(piped.status.success());
    assert_eq!(piped.stdout, std::fs::read(&output).unwrap());

    let out = Command::new(BIN).args(["rerank", "--input", "/nonexistent/in.jsonl"]).output().unwrap();
    assert_eq!(out.status.code(), Some(1), "I/O failure is the only non-zero exit");
}

#[test]
fn serve_drains_and_exits_zero_on_sigterm() {
    let mut child = Command::new(BIN)
        .args(["serve", "--listen", "127.0.0.1:0", "--admin-listen", "127.0.0.1:0"])
        .stderr(Stdio::piped())
        .spawn()
        .unwrap();
    let mut stderr = BufReader::new(child.stderr.take().unwrap());
    let mut line = String::new();
    let deadline = Instant::now() + Duration::from_secs(30);
    let addr = loop {
        line.clear();
        assert!(stderr.read_line(&mut line).unwrap() > 0, "server exited early");
        if let Some(rest) = line.split(" listen=").nth(1) {
            break rest.split_whitespace().next().unwrap().to_owned();
        }
        assert!(Instant::now() < deadline, "no listen line");
    };
    let runtime = tokio::runtime::Builder::new_current_thread().enable_all().build().unwrap();
    let health =
        runtime.block_on(async { reqwest::get(format!("http://{addr}/healthz")).await.unwrap().status() });
    assert_eq!(health, 200);
    let status = runtime.block_on(async {
        let client = reqwest::Client::new();
        let r = client
            .post(format!("http://{addr}/v1/rerank"))
            .json(&json!({"candidates": []}))
            .send()
            .await
            .unwrap();
        let v: Value = r.json().await.unwrap();
        v["algorithm"].as_str().map(str::to_owned)
    });
    assert_eq!(status.as_deref(), Some("dpp"), "the embedded default serves dpp");

    let kill = Command::new("kill").args(["-TERM", &child.id().to_string()]).status().unwrap();
    assert!(kill.success());
    let exit = loop {
        if let Some(s) = child.try_wait().unwrap() {
            break s;
        }
        assert!(Instant::now() < deadline + Duration::from_secs(30), "did not exit after SIGTERM");
        std::thread::sleep(Duration::from_millis(20));
    };
    assert_eq!(exit.code(), Some(0));
}
