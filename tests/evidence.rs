//! Issue 18, end to end against the real binary: `medley serve` with the exposure log on answers
//! HTTP, NDJSON-stream and gRPC requests; SIGTERM drains the log to disk; clicks are synthesised
//! on the served slates; `medley replay` reads the log directory with the clicks joined, and its
//! `--pick` prints a slice that `medley check-config` accepts.
//!
//! The checks that hold the replay to something outside itself: replaying the served policy
//! reproduces every logged slate, so its recall is exactly the clicked share and its
//! position-debiased `ips_clicks` equals the mean number of clicks in the top k, as Joachims et
//! al. (WSDM 2017) note for the logging policy itself (every propensity ratio is 1).

mod common;

use std::collections::{HashMap, HashSet};
use std::process::Command;
use std::time::{Duration, Instant};

use common::process::{spawn_server_with_grpc, tempdir, KillOnDrop, BIN};
use medley::grpc::proto::{self, reranker_client::RerankerClient};
use serde_json::{json, Value};

const REQUESTS: usize = 200;

fn to_proto(body: &Value) -> proto::RerankRequest {
    let s = |k: &str| body[k].as_str().map(String::from);
    proto::RerankRequest {
        request_id: s("request_id"),
        unit_id: s("unit_id"),
        candidates: body["candidates"]
            .as_array()
            .unwrap()
            .iter()
            .map(|c| proto::Candidate {
                id: c["id"].as_str().unwrap().into(),
                score: c["score"].as_f64().unwrap(),
                category: c["category"].as_str().map(String::from),
                embedding: c["embedding"]
                    .as_array()
                    .unwrap()
                    .iter()
                    .map(|x| x.as_f64().unwrap() as f32)
                    .collect(),
                group: None,
            })
            .collect(),
        ..proto::RerankRequest::default()
    }
}

/// A deterministic stand-in for a user: clicks a served item of its latent taste (the sample's
/// `clicked` ids) at rank r with probability 1/r (position bias), by a hash of the id.
fn clicks_on(served: &[String], taste: &HashSet<String>) -> Vec<String> {
    served
        .iter()
        .enumerate()
        .filter(|(r, id)| {
            let h = medley::serve::config::mix64(medley::serve::config::fnv1a64(id.as_bytes()));
            taste.contains(*id) && ((h >> 11) as f64 / (1u64 << 53) as f64) < 1.0 / (r + 1) as f64
        })
        .map(|(_, id)| id.clone())
        .collect()
}

/// A line's candidate ids, joined: the key a logged request is matched to its sample line by.
fn ids_of(request: &Value) -> String {
    let ids: Vec<&str> =
        request["candidates"].as_array().unwrap().iter().map(|c| c["id"].as_str().unwrap()).collect();
    ids.join(",")
}

#[test]
fn served_logged_clicked_replayed_and_picked() {
    let dir = tempdir("evidence");
    // The demo corpus: requests with their latent clicks.
    let corpus = dir.join("corpus.jsonl");
    let out = Command::new(BIN)
        .args(["sample", "--requests", &REQUESTS.to_string(), "--candidates", "60", "--dim", "8"])
        .args(["--with-clicks", "--seed", "7", "--output"])
        .arg(&corpus)
        .output()
        .unwrap();
    assert!(out.status.success());
    let lines: Vec<Value> =
        std::fs::read_to_string(&corpus).unwrap().lines().map(|l| serde_json::from_str(l).unwrap()).collect();
    let config = dir.join("medley.toml");
    // 64 KiB files: the log rotates several times.
    std::fs::write(
        &config,
        "[exposure_log]\ndir = \"exposure\"\nmax_file_bytes = 65536\n[slices.default]\nalgorithm = \"dpp\"\nlambda = 0.3\nk = 10\n",
    )
    .unwrap();
    let (mut child, public, admin, grpc) =
        spawn_server_with_grpc(&["--config", config.to_str().unwrap()], &[]);
    let _guard = KillOnDrop(child.id());

    // Requests as callers send them: without "clicked"; every third without a request id (the
    // log assigns one and the answer returns it); a unit id on some.
    let mut requests: Vec<Value> = Vec::new();
    let mut taste: HashMap<String, HashSet<String>> = HashMap::new();
    for (i, line) in lines.iter().enumerate() {
        let mut r = line.clone();
        let clicked = r.as_object_mut().unwrap().remove("clicked").unwrap();
        let set: HashSet<String> =
            clicked.as_array().unwrap().iter().map(|c| c.as_str().unwrap().into()).collect();
        if i % 3 == 0 {
            r.as_object_mut().unwrap().remove("request_id");
        }
        if i % 4 == 0 {
            r["unit_id"] = json!(format!("shopper-{}", i % 17));
        }
        requests.push(r);
        // Keyed by the line's candidate ids until the served request id is known.
        taste.insert(ids_of(line), set);
    }
    let runtime = tokio::runtime::Builder::new_multi_thread().enable_all().build().unwrap();
    let assigned = runtime.block_on(async {
        let client = reqwest::Client::new();
        let mut assigned = 0;
        // 0..120 over POST /v1/rerank, 120..160 in one NDJSON stream, 160.. over gRPC.
        for r in &requests[..120] {
            let resp = client.post(format!("http://{public}/v1/rerank")).json(r).send().await.unwrap();
            assert_eq!(resp.status(), 200);
            let v: Value = resp.json().await.unwrap();
            let id = v["request_id"].as_str().expect("a logged request always has an id in its answer");
            if r.get("request_id").is_none() {
                assert_eq!(&id[14..15], "7", "a UUID v7: {id}");
                assigned += 1;
            } else {
                assert_eq!(id, r["request_id"].as_str().unwrap());
            }
        }
        let body: String = requests[120..160].iter().map(|r| format!("{r}\n")).collect();
        let resp = client
            .post(format!("http://{public}/v1/rerank/stream"))
            .header("content-type", "application/x-ndjson")
            .body(body)
            .send()
            .await
            .unwrap();
        assert_eq!(resp.status(), 200);
        let text = resp.text().await.unwrap();
        for (line, r) in text.lines().zip(&requests[120..160]) {
            let v: Value = serde_json::from_str(line).unwrap();
            assert!(v["request_id"].is_string(), "{line}");
            assigned += usize::from(r.get("request_id").is_none());
        }
        let mut grpc_client = RerankerClient::connect(format!("http://{grpc}")).await.unwrap();
        for r in &requests[160..] {
            let answer = grpc_client.rerank(to_proto(r)).await.unwrap().into_inner();
            let id = answer.request_id.expect("a logged gRPC request has an id");
            if r.get("request_id").is_none() {
                assert_eq!(&id[14..15], "7");
                assigned += 1;
            }
        }
        let metrics =
            client.get(format!("http://{admin}/metrics")).send().await.unwrap().text().await.unwrap();
        assert!(metrics.contains("medley_exposure_log_records_total"), "{metrics}");
        assert!(metrics.contains("medley_exposure_log_dropped_total 0"), "{metrics}");
        assigned
    });
    assert_eq!(assigned, REQUESTS.div_ceil(3));

    // SIGTERM: the queue drains to disk before exit 0.
    assert!(Command::new("kill").args(["-TERM", &child.id().to_string()]).status().unwrap().success());
    let deadline = Instant::now() + Duration::from_secs(30);
    let status = loop {
        if let Some(s) = child.try_wait().unwrap() {
            break s;
        }
        assert!(Instant::now() < deadline, "did not exit after SIGTERM");
        std::thread::sleep(Duration::from_millis(50));
    };
    assert!(status.success(), "{status:?}");

    let log_dir = dir.join("exposure");
    let mut files: Vec<_> = std::fs::read_dir(&log_dir).unwrap().map(|e| e.unwrap().path()).collect();
    files.sort();
    assert!(files.len() >= 3, "rotation at 64 KiB: {files:?}");
    let mut records: Vec<Value> = Vec::new();
    for f in &files {
        let name = f.file_name().unwrap().to_str().unwrap();
        assert!(name.starts_with("exposure-") && name.ends_with(".jsonl"), "{name}");
        let text = std::fs::read_to_string(f).unwrap();
        assert!(text.ends_with('\n'), "{name} ends with a whole line");
        records.extend(text.lines().map(|l| serde_json::from_str::<Value>(l).unwrap()));
    }
    assert_eq!(records.len(), REQUESTS, "every request logged, none lost at shutdown");
    let mut with_embeddings = 0;
    for rec in &records {
        let served = &rec["served"];
        for key in
            ["request_id", "slice", "arm", "algorithm", "lambda", "k", "config_generation", "config_digest"]
        {
            assert!(!served[key].is_null(), "served.{key} in {served}");
        }
        assert_eq!(served["items"].as_array().unwrap().len(), 10);
        assert!(rec["ts"].as_str().unwrap().ends_with('Z'));
        assert_eq!(rec["request"]["candidates"].as_array().unwrap().len(), 60, "the request as sent");
        assert!(rec["request"].get("clicked").is_none());
        // HTTP bodies are logged as sent, gRPC requests re-encoded: embeddings stay in both.
        with_embeddings += usize::from(rec["request"]["candidates"][59]["embedding"].is_array());
    }
    assert_eq!(with_embeddings, REQUESTS, "every logged request keeps its embeddings");

    // Clicks on what was served, by request id.
    let mut clicks = String::new();
    let (mut clicked_slates, mut clicks_total) = (0, 0);
    for rec in &records {
        let key = ids_of(&rec["request"]);
        let served: Vec<String> =
            rec["served"]["items"].as_array().unwrap().iter().map(|i| i.as_str().unwrap().into()).collect();
        let c = clicks_on(&served, &taste[&key]);
        if !c.is_empty() {
            clicked_slates += 1;
            clicks_total += c.len();
            let id = rec["served"]["request_id"].as_str().unwrap();
            clicks.push_str(&format!("{}\n", json!({"request_id": id, "clicked": c})));
        }
    }
    assert!(clicked_slates > 20 && clicked_slates < REQUESTS, "{clicked_slates}");
    let clicks_file = dir.join("clicks.jsonl");
    std::fs::write(&clicks_file, clicks).unwrap();

    let out_dir = dir.join("replay");
    let out = Command::new(BIN)
        .args(["replay", "--input"])
        .arg(&log_dir)
        .arg("--clicks")
        .arg(&clicks_file)
        .args(["--algorithms", "dpp,mmr", "--lambdas", "0,0.3,0.6,0.9", "--k", "10"])
        .args(["--pick", "ndcg>=0.5*baseline", "--out"])
        .arg(&out_dir)
        .output()
        .unwrap();
    let report = String::from_utf8_lossy(&out.stdout).to_string();
    assert!(out.status.success(), "{report}\n{}", String::from_utf8_lossy(&out.stderr));
    let skipped = REQUESTS - clicked_slates;
    assert!(
        report.contains(&format!("{clicked_slates} slates"))
            && report.contains(&format!("{skipped} of {REQUESTS} lines skipped without clicks")),
        "{report}"
    );
    let csv = std::fs::read_to_string(out_dir.join("frontier.csv")).unwrap();
    let header: Vec<&str> = csv.lines().next().unwrap().split(',').collect();
    let col =
        |name: &str| header.iter().position(|h| *h == name).unwrap_or_else(|| panic!("{name} in {header:?}"));
    let served_row: Vec<&str> =
        csv.lines().find(|r| r.starts_with("dpp,0.3,,")).unwrap().split(',').collect();
    let num = |row: &[&str], name: &str| row[col(name)].parse::<f64>().unwrap();
    // The served policy replayed: every click is on its slate, in its top 10.
    let mean_clicks = clicks_total as f64 / clicked_slates as f64;
    assert!((num(&served_row, "ips_clicks") - mean_clicks).abs() < 1e-6, "{served_row:?} vs {mean_clicks}");
    assert!((num(&served_row, "recall_reachable") - 1.0).abs() < 1e-9, "{served_row:?}");
    for name in
        ["ndcg_lo", "ndcg_hi", "entropy_lo", "entropy_hi", "ndcg_diff_lo", "ndcg_diff_hi", "alpha_ndcg"]
    {
        assert!(num(&served_row, name).is_finite(), "{name}");
    }
    assert!(
        num(&served_row, "ndcg_lo") <= num(&served_row, "ndcg")
            && num(&served_row, "ndcg") <= num(&served_row, "ndcg_hi")
    );
    assert!(report.contains("ips_clicks"), "{report}");

    // The pick's slice, loaded as a config.
    let snippet = report.split("[slices.SLICE]").nth(1).unwrap_or_else(|| panic!("a pick in {report}"));
    assert!(report.contains("refined lambda =") || report.contains("nothing to refine"), "{report}");
    let picked = dir.join("picked.toml");
    std::fs::write(&picked, format!("[slices.default]{snippet}")).unwrap();
    let check = Command::new(BIN).arg("check-config").arg(&picked).output().unwrap();
    assert!(
        check.status.success(),
        "{}\n{}",
        String::from_utf8_lossy(&check.stderr),
        std::fs::read_to_string(&picked).unwrap()
    );
}
