//! The built `medley` binary: `check-config`, `rerank` on files and pipes, and `serve` draining
//! on SIGTERM with exit status 0.

mod common;

use std::io::{BufRead, BufReader, Write};
use std::process::{Command, Stdio};
use std::time::{Duration, Instant};

use common::process::{spawn_server, tempdir, KillOnDrop, BIN};
use common::server::request;
use common::Rng;
use serde_json::{json, Value};

#[test]
fn check_config_accepts_the_samples_and_refuses_bad_files_naming_the_field() {
    let example = concat!(env!("CARGO_MANIFEST_DIR"), "/config/example.toml");
    let out = Command::new(BIN).args(["check-config", example]).output().unwrap();
    assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
    let text = String::from_utf8(out.stdout).unwrap();
    assert!(text.contains("slice search: locked=true"), "{text}");
    assert!(text.contains("arm default (100.0 %): algorithm=quota lambda=0.8 k=10"), "{text}");
    assert!(text.contains("arm treatment-b (10.0 %): algorithm=dpp lambda=0.5 k=20"), "{text}");
    assert!(text.contains("shadow: algorithm=mmr lambda=0.5 sample_rate=0.1"), "{text}");

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
        .args([
            "serve",
            "--listen",
            "127.0.0.1:0",
            "--admin-listen",
            "127.0.0.1:0",
            "--grpc-listen",
            "127.0.0.1:0",
        ])
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

fn swap_config(lambda: f64) -> String {
    format!("[slices.default]\nalgorithm = \"mmr\"\nlambda = {lambda}\nk = 5\n\n[slices.home]\nalgorithm = \"dpp\"\n")
}

/// Hot swap under load: two clients drive the server without pause while the config is swapped
/// 120 times, a third each through file writes (half in place, half by rename, as editors do),
/// SIGHUP and the admin API. Every request must succeed, and every response's settings must be
/// the ones of the generation it reports. Bounded: 120 swaps, each waited for at most 5 s.
#[test]
fn hot_swap_under_load_through_file_sighup_and_admin() {
    let dir = tempdir("swap");
    let config = dir.join("medley.toml");
    std::fs::write(&config, swap_config(0.0)).unwrap();
    let token = "swap-test-token";
    let (mut child, public, admin) =
        spawn_server(&["--config", config.to_str().unwrap()], &[("MEDLEY_ADMIN_TOKEN", token)]);
    let _guard = KillOnDrop(child.id());
    let runtime = tokio::runtime::Builder::new_multi_thread().worker_threads(2).enable_all().build().unwrap();
    let (observed, failures, swaps) = runtime.block_on(async {
        let client = reqwest::Client::new();
        let stop = std::sync::Arc::new(std::sync::atomic::AtomicBool::new(false));
        let mut rng = Rng(99);
        let body = request(&mut rng, 30, 4, 3);
        let mut load = Vec::new();
        for _ in 0..2 {
            let (client, url, body, stop) =
                (client.clone(), format!("http://{public}/v1/rerank"), body.clone(), stop.clone());
            load.push(tokio::spawn(async move {
                let (mut seen, mut failed) = (Vec::new(), 0_u32);
                while !stop.load(std::sync::atomic::Ordering::Relaxed) && seen.len() < 20_000 {
                    match client.post(&url).json(&body).send().await {
                        Ok(r) if r.status() == 200 => {
                            let v: Value = r.json().await.unwrap();
                            seen.push((
                                v["config_generation"].as_u64().unwrap(),
                                v["lambda"].as_f64().unwrap(),
                            ));
                        }
                        _ => failed += 1,
                    }
                }
                (seen, failed)
            }));
        }
        let generation = |client: reqwest::Client, admin: String| async move {
            let v: Value = client
                .get(format!("http://{admin}/admin/config"))
                .bearer_auth(token)
                .send()
                .await
                .unwrap()
                .json()
                .await
                .unwrap();
            v["config_generation"].as_u64().unwrap()
        };
        let mut current = generation(client.clone(), admin.clone()).await;
        let mut swaps = 0;
        for i in 1..=120_u32 {
            let lambda = f64::from(i) / 1000.0;
            match i % 3 {
                0 => {
                    if i % 2 == 0 {
                        std::fs::write(&config, swap_config(lambda)).unwrap();
                    } else {
                        let tmp = dir.join("medley.toml.new");
                        std::fs::write(&tmp, swap_config(lambda)).unwrap();
                        std::fs::rename(&tmp, &config).unwrap();
                    }
                }
                1 => {
                    // A reload of an unchanged file is no swap (issue 13, item 1): give SIGHUP a
                    // new file to find. The watcher may see it first; then SIGHUP is the no-op.
                    let tmp = dir.join("medley.toml.hup");
                    std::fs::write(&tmp, swap_config(lambda)).unwrap();
                    std::fs::rename(&tmp, &config).unwrap();
                    let ok = Command::new("kill").args(["-HUP", &child.id().to_string()]).status().unwrap();
                    assert!(ok.success());
                }
                _ => {
                    let r = client
                        .put(format!("http://{admin}/admin/slices/home"))
                        .bearer_auth(token)
                        .json(&json!({"algorithm": "dpp", "lambda": lambda}))
                        .send()
                        .await
                        .unwrap();
                    assert_eq!(r.status(), 200);
                }
            }
            let deadline = Instant::now() + Duration::from_secs(5);
            loop {
                let g = generation(client.clone(), admin.clone()).await;
                if g > current {
                    current = g;
                    swaps += 1;
                    break;
                }
                assert!(Instant::now() < deadline, "swap {i} (path {}) never landed", i % 3);
                tokio::time::sleep(Duration::from_millis(5)).await;
            }
        }
        stop.store(true, std::sync::atomic::Ordering::Relaxed);
        let (mut observed, mut failures) = (Vec::new(), 0);
        for h in load {
            let (seen, failed) = h.await.unwrap();
            observed.extend(seen);
            failures += failed;
        }
        (observed, failures, swaps)
    });
    assert_eq!(failures, 0, "no request may fail during swaps");
    assert!(swaps >= 120, "{swaps} swaps");
    assert!(observed.len() > 200, "load kept running: {} responses", observed.len());
    // One generation, one setting; and settings only move forward with generations.
    let mut by_generation = std::collections::BTreeMap::new();
    for (g, lambda) in &observed {
        let first = *by_generation.entry(*g).or_insert(*lambda);
        assert_eq!(first.to_bits(), lambda.to_bits(), "generation {g} served two settings");
    }
    let lambdas: Vec<f64> = by_generation.values().copied().collect();
    assert!(lambdas.windows(2).all(|w| w[0] <= w[1]), "settings went backwards: {lambdas:?}");
    assert!(by_generation.len() > 10, "responses saw {} generations", by_generation.len());
    let kill = Command::new("kill").args(["-TERM", &child.id().to_string()]).status().unwrap();
    assert!(kill.success());
    assert_eq!(child.wait().unwrap().code(), Some(0));
}

/// A bad file is refused on SIGHUP too, and the old config keeps serving.
#[test]
fn sighup_with_an_invalid_file_keeps_the_old_config() {
    let dir = tempdir("hup-bad");
    let config = dir.join("medley.toml");
    std::fs::write(&config, swap_config(0.25)).unwrap();
    let (mut child, public, admin) = spawn_server(&["--config", config.to_str().unwrap()], &[]);
    let _guard = KillOnDrop(child.id());
    // Write the bad file, wait out the watcher's refusal, then SIGHUP the same bad file.
    std::fs::write(&config, "[slices.default]\nlambda = \"high\"\n").unwrap();
    let runtime = tokio::runtime::Builder::new_current_thread().enable_all().build().unwrap();
    let failures = |trigger: &'static str| {
        let admin = admin.clone();
        runtime.block_on(async move {
            let text = reqwest::get(format!("http://{admin}/metrics")).await.unwrap().text().await.unwrap();
            let needle = format!("medley_config_reload_failures_total{{trigger=\"{trigger}\"}} ");
            text.lines().find_map(|l| l.strip_prefix(&needle)).map_or(0, |v| v.parse::<u64>().unwrap())
        })
    };
    let deadline = Instant::now() + Duration::from_secs(10);
    while failures("file") == 0 {
        assert!(Instant::now() < deadline, "the watcher never refused the bad file");
        std::thread::sleep(Duration::from_millis(20));
    }
    assert!(Command::new("kill").args(["-HUP", &child.id().to_string()]).status().unwrap().success());
    while failures("sighup") == 0 {
        assert!(Instant::now() < deadline, "SIGHUP never refused the bad file");
        std::thread::sleep(Duration::from_millis(20));
    }
    let lambda = runtime.block_on(async {
        let r = reqwest::Client::new()
            .post(format!("http://{public}/v1/rerank"))
            .json(&json!({"candidates": []}))
            .send()
            .await
            .unwrap();
        let v: Value = r.json().await.unwrap();
        (v["lambda"].as_f64(), v["config_generation"].as_u64())
    });
    assert_eq!(lambda, (Some(0.25), Some(1)));
    assert!(Command::new("kill").args(["-TERM", &child.id().to_string()]).status().unwrap().success());
    assert_eq!(child.wait().unwrap().code(), Some(0));
}

/// The README's Python arm hash (docs/arm_bucket.py, run by CPython) agrees with the server's.
#[test]
fn python_arm_hash_matches_the_server() {
    let script = concat!(env!("CARGO_MANIFEST_DIR"), "/docs/arm_bucket.py");
    for (slice, unit, total) in [
        ("home", "user-1", 100_u64),
        ("home", "user-8812", 100),
        ("search", "", 7),
        ("email", "s-ü-1", 1_000_000),
    ] {
        let out = Command::new("python3")
            .args([script, slice, unit, &total.to_string()])
            .output()
            .expect("python3 on PATH");
        assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
        let python: u64 = String::from_utf8(out.stdout).unwrap().trim().parse().unwrap();
        assert_eq!(python, medley::serve::config::arm_bucket(slice, unit, total), "{slice}/{unit}");
    }
}

/// `medley sample`: the same seed writes the same bytes; `--one` writes one small request that
/// the server accepts; on its corpus, score order repeats the dominant category and DPP does not
/// (the accuracy–diversity trade-off the corpus exists to show; common practice, not a proof).
#[test]
fn sample_is_deterministic_and_gives_diversification_something_to_trade() {
    let run = |args: &[&str]| {
        let out = Command::new(BIN).arg("sample").args(args).output().unwrap();
        assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
        out.stdout
    };
    let a = run(&["--requests", "60", "--candidates", "80", "--dim", "16", "--seed", "5", "--with-clicks"]);
    assert_eq!(
        a,
        run(&["--requests", "60", "--candidates", "80", "--dim", "16", "--seed", "5", "--with-clicks"])
    );
    let one = run(&["--one"]);
    assert_eq!(one.iter().filter(|&&b| b == b'\n').count(), 1);

    let dir = tempdir("sample");
    let mut mean_entropy = Vec::new();
    for (algorithm, lambda) in [("relevance", 0.0), ("dpp", 0.5)] {
        let lines: Vec<String> = String::from_utf8(a.clone())
            .unwrap()
            .lines()
            .map(|l| {
                let mut v: Value = serde_json::from_str(l).unwrap();
                v["algorithm"] = json!(algorithm);
                v["lambda"] = json!(lambda);
                v.to_string()
            })
            .collect();
        let input = dir.join(format!("{algorithm}.jsonl"));
        std::fs::write(&input, lines.join("\n")).unwrap();
        let out = Command::new(BIN).args(["rerank", "--input", input.to_str().unwrap()]).output().unwrap();
        let entropies: Vec<f64> = String::from_utf8(out.stdout)
            .unwrap()
            .lines()
            .map(|l| {
                serde_json::from_str::<Value>(l).unwrap()["diversity"]["category_entropy_bits"]
                    .as_f64()
                    .unwrap()
            })
            .collect();
        assert_eq!(entropies.len(), 60);
        mean_entropy.push(entropies.iter().sum::<f64>() / 60.0);
    }
    assert!(mean_entropy[0] < 1.0, "score order should repeat the favourite category: {mean_entropy:?}");
    assert!(mean_entropy[1] > mean_entropy[0] + 1.0, "dpp at 0.5 should spread categories: {mean_entropy:?}");
}

/// Issue 17 in batch: `medley rerank` serves windowed DPP, SSD, calibration and a fairness floor
/// line by line, the same as the server (the engine is shared), and refuses a bad window with its
/// line number.
#[test]
fn rerank_batch_serves_the_new_algorithms_and_fields() {
    let dir = tempdir("batch17");
    let (input, output) = (dir.join("in.jsonl"), dir.join("out.jsonl"));
    let mut rng = Rng(31);
    let mut lines = Vec::new();
    for (i, extra) in [
        json!({"algorithm": "dpp", "window": 3, "lambda": 0.7}),
        json!({"algorithm": "ssd", "lambda": 0.5}),
        json!({"algorithm": "calibrated", "lambda": 0.6, "profile": {"cat-0": 2.0, "cat-1": 1.0}}),
        json!({"algorithm": "mmr", "lambda": 0.5, "fairness": {"protected": "maker", "share": 0.5, "alpha": 0.1}}),
        json!({"algorithm": "dpp", "window": 1}),
    ]
    .into_iter()
    .enumerate()
    {
        let mut r = request(&mut rng, 30, 6, 3);
        for (n, c) in r["candidates"].as_array_mut().unwrap().iter_mut().enumerate() {
            c["group"] = json!(if n % 4 == 0 { "maker" } else { "brand" });
        }
        r["request_id"] = json!(format!("req-{i}"));
        for (key, value) in extra.as_object().unwrap() {
            r[key] = value.clone();
        }
        lines.push(r.to_string());
    }
    std::fs::write(&input, lines.join("\n") + "\n").unwrap();
    let out = Command::new(BIN)
        .args(["rerank", "--input", input.to_str().unwrap(), "--output", output.to_str().unwrap()])
        .output()
        .unwrap();
    assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
    let answers: Vec<Value> =
        std::fs::read_to_string(&output).unwrap().lines().map(|l| serde_json::from_str(l).unwrap()).collect();
    assert_eq!(answers[0]["algorithm"], "dpp");
    assert_eq!(answers[1]["algorithm"], "ssd");
    assert!(answers[2]["diversity"]["miscalibration"].as_f64().is_some());
    assert!(answers[3]["diversity"]["protected_share"].as_f64().unwrap() >= 0.3);
    assert_eq!(
        (answers[4]["error"]["code"].as_str(), answers[4]["line"].as_u64()),
        (Some("window_out_of_range"), Some(5))
    );
}
