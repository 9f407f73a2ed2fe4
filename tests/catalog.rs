//! The item catalog (issue 16), end to end: catalogs written by pyarrow are read and serve the
//! slates the same embeddings serve inline, for every algorithm; bad catalogs are refused naming
//! the row and column while the old one keeps serving; unknown ids are refused or dropped; and a
//! served catalog swaps under load (file rename plus SIGHUP) without a failed request.
//!
//! The catalogs come from `tests/fixtures/make_catalog.py` (pyarrow and numpy), run here. The
//! Python is `$MEDLEY_PYTHON`, else `python3`; without pyarrow these tests fail, unless
//! `MEDLEY_SKIP_PYARROW=1` says to skip them (CI installs pyarrow and never sets it).

mod common;

use std::path::{Path, PathBuf};
use std::sync::Arc;

use common::server::{post_json, Server};
use medley::serve::catalog::Catalog;
use serde_json::{json, Value};

const TOKEN: &str = "catalog-test-token";

/// Runs the fixtures script into a fresh directory; `None` only when skipping is asked for.
fn pyarrow_fixtures(name: &str) -> Option<PathBuf> {
    let dir = common::process::tempdir(name);
    let python = std::env::var("MEDLEY_PYTHON").unwrap_or_else(|_| "python3".into());
    let script = Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/fixtures/make_catalog.py");
    let out = std::process::Command::new(&python).arg(&script).arg(&dir).output();
    match out {
        Ok(o) if o.status.success() => Some(dir),
        _ if std::env::var("MEDLEY_SKIP_PYARROW").as_deref() == Ok("1") => {
            eprintln!("skipped: MEDLEY_SKIP_PYARROW=1 and no working pyarrow");
            None
        }
        Ok(o) => panic!(
            "{python} {} failed (pyarrow and numpy needed; set MEDLEY_PYTHON, or MEDLEY_SKIP_PYARROW=1 to skip): {}",
            script.display(),
            String::from_utf8_lossy(&o.stderr)
        ),
        Err(e) => panic!("cannot run {python}: {e} (set MEDLEY_PYTHON, or MEDLEY_SKIP_PYARROW=1 to skip)"),
    }
}

/// The fixtures' items: (id, embedding, category).
fn items(dir: &Path) -> Vec<(String, Vec<f32>, Option<String>)> {
    let v: Value = serde_json::from_slice(&std::fs::read(dir.join("items.json")).unwrap()).unwrap();
    v.as_array()
        .unwrap()
        .iter()
        .map(|i| {
            let e = i["embedding"].as_array().unwrap().iter().map(|x| x.as_f64().unwrap() as f32).collect();
            (i["id"].as_str().unwrap().to_owned(), e, i["category"].as_str().map(str::to_owned))
        })
        .collect()
}

fn config(catalog: &Path, slice_extra: &str) -> String {
    format!(
        "[catalog]\npath = {:?}\n\n[slices.default]\nalgorithm = \"dpp\"\nlambda = 0.5\nk = 10\n{slice_extra}\n",
        catalog.display().to_string()
    )
}

/// A request over `n` of the items (a stride through them), inline or ids only.
fn request(items: &[(String, Vec<f32>, Option<String>)], seed: usize, n: usize, inline: bool) -> Value {
    let mut rng = common::Rng(seed as u64);
    let start = rng.below(items.len());
    let candidates: Vec<Value> = (0..n)
        .map(|j| {
            let (id, e, c) = &items[(start + j * 7) % items.len()];
            let mut cand = json!({"id": id, "score": (rng.unit() * 1e6).round() / 1e6});
            if inline {
                cand["embedding"] = json!(e);
                if let Some(c) = c {
                    cand["category"] = json!(c);
                }
            }
            cand
        })
        .collect();
    json!({"request_id": format!("r{seed}"), "candidates": candidates,
           "profile": {"cat-0": 0.5, "cat-1": 0.3, "cat-4": 0.2}})
}

/// Every layout pyarrow writes (list<float>, fixed_size_list<double> among extra columns,
/// large_list with large_string ids and dictionary categories, Arrow IPC) serves, for every
/// algorithm and with a window, the very response the same embeddings and categories serve inline.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn pyarrow_catalogs_serve_the_slates_of_the_same_embeddings_inline() {
    let Some(dir) = pyarrow_fixtures("catalog-parity") else { return };
    let items = items(&dir);
    let client = reqwest::Client::new();
    for file in ["items.parquet", "items_f64_fixed.parquet", "items_large.parquet", "items.arrow"] {
        let server = Server::start(&config(&dir.join(file), "")).await;
        let mut served = 0;
        for algorithm in medley::diversify::names() {
            for (seed, window) in [(1, None), (2, None), (3, Some(4))] {
                let mut overrides = json!({"algorithm": algorithm, "lambda": 0.6, "k": 12});
                if let Some(w) = window.filter(|_| ["dpp", "ssd"].contains(&algorithm)) {
                    overrides["window"] = json!(w);
                }
                let with = |mut body: Value| {
                    for (k, v) in overrides.as_object().unwrap() {
                        body[k] = v.clone();
                    }
                    body
                };
                let inline = with(request(&items, seed, 80, true));
                let ids_only = with(request(&items, seed, 80, false));
                let (s1, a) = post_json(&client, &server.url("/v1/rerank"), &inline).await;
                let (s2, b) = post_json(&client, &server.url("/v1/rerank"), &ids_only).await;
                assert_eq!((s1, s2), (200, 200), "{file} {algorithm}: {a} / {b}");
                assert_eq!(a, b, "{file} {algorithm} seed {seed}: inline and catalog responses differ");
                assert!(b["catalog_version"].as_str().unwrap().starts_with(&format!("{}-", items.len())));
                assert_eq!(b["items"].as_array().unwrap().len(), 12);
                served += 1;
            }
        }
        assert!(served >= 18, "{file}: {served}");
        server.stop().await;
    }
}

/// Issue 16's bad catalogs, written by pyarrow: each is refused on reload with a message that
/// names the row and column (or the file), counted, and the old catalog keeps serving.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn bad_catalogs_are_refused_naming_the_row_and_column_and_the_old_one_serves() {
    let Some(dir) = pyarrow_fixtures("catalog-bad") else { return };
    let items = items(&dir);
    let live = dir.join("live.parquet");
    std::fs::copy(dir.join("items.parquet"), &live).unwrap();
    let server = Server::start_with(&config(&live, ""), Some(TOKEN), false).await;
    let client = reqwest::Client::new();
    let (_, first) = post_json(&client, &server.url("/v1/rerank"), &request(&items, 5, 40, false)).await;
    let version = first["catalog_version"].as_str().unwrap().to_owned();
    let cases = [
        ("bad_nan.parquet", "row 7, column embedding"),
        ("bad_zero.parquet", "row 3, column embedding"),
        ("bad_ragged.parquet", "row 5, column embedding"),
        ("bad_duplicate.parquet", "row 9, column id"),
        ("bad_no_id.parquet", "column id: missing"),
        ("bad_not_parquet.parquet", "not a readable Parquet file"),
    ];
    for (i, (file, names)) in cases.iter().enumerate() {
        let tmp = dir.join("live.parquet.tmp");
        std::fs::copy(dir.join(file), &tmp).unwrap();
        std::fs::rename(&tmp, &live).unwrap();
        let r =
            client.post(format!("{}/admin/reload", server.admin)).bearer_auth(TOKEN).send().await.unwrap();
        assert_eq!(r.status(), 422, "{file}");
        let body: Value = r.json().await.unwrap();
        assert_eq!(body["error"]["code"], "invalid_config", "{file}: {body}");
        assert_eq!(body["error"]["path"], "catalog.path", "{file}: {body}");
        let message = body["error"]["message"].as_str().unwrap();
        assert!(message.contains(names), "{file}: {message:?} should name {names:?}");
        // The old catalog serves on.
        let (status, b) =
            post_json(&client, &server.url("/v1/rerank"), &request(&items, 6 + i, 40, false)).await;
        assert_eq!(status, 200, "{file}: {b}");
        assert_eq!(b["catalog_version"], version.as_str(), "{file}");
        let ready: Value =
            reqwest::get(format!("{}/readyz", server.admin)).await.unwrap().json().await.unwrap();
        assert_eq!(ready["catalog_version"], version.as_str());
    }
    // Each refusal counted (the file watcher may have refused the same file once more).
    assert!(server.metric_sum("medley_catalog_reload_failures_total").await >= cases.len() as u64);
    assert_eq!(server.metric_sum(&format!("medley_catalog_info{{version=\"{version}\"}}")).await, 1);
    assert_eq!(server.metric_sum("medley_catalog_items").await, items.len() as u64);
    // A good file again swaps in (same bytes as the first: same version, so nothing to swap).
    let tmp = dir.join("live.parquet.tmp");
    std::fs::copy(dir.join("items_large.parquet"), &tmp).unwrap();
    std::fs::rename(&tmp, &live).unwrap();
    let r = client.post(format!("{}/admin/reload", server.admin)).bearer_auth(TOKEN).send().await.unwrap();
    assert_eq!(r.status(), 200);
    let admin: Value = client
        .get(format!("{}/admin/config", server.admin))
        .bearer_auth(TOKEN)
        .send()
        .await
        .unwrap()
        .json()
        .await
        .unwrap();
    assert_ne!(admin["catalog_version"], version.as_str(), "{admin}");
    assert_eq!(admin["catalog"]["items"], items.len());
    server.stop().await;
}

/// An id the catalog lacks: 422 `unknown_item` at its path under the default policy; left out,
/// reported in `dropped` and counted under `unknown_items = "drop"`; and served as sent by an
/// algorithm that needs no embedding. Sent values win over the catalog's.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn unknown_ids_are_refused_or_dropped_and_sent_values_win() {
    let dir = common::process::tempdir("catalog-unknown");
    let path = dir.join("items.parquet");
    let spec = medley::offline::sample::SampleSpec {
        requests: 1,
        candidates: 30,
        dim: 8,
        seed: 4,
        ..Default::default()
    };
    let mut sink = Vec::new();
    medley::offline::sample::write_with_catalog(&spec, &path, &mut sink).unwrap();
    let body: Value = serde_json::from_slice(sink.split(|&b| b == b'\n').next().unwrap()).unwrap();
    let extra = "\n[slices.lenient]\nalgorithm = \"mmr\"\nlambda = 0.4\nunknown_items = \"drop\"\n";
    let server = Server::start(&config(&path, extra)).await;
    let client = reqwest::Client::new();
    let url = server.url("/v1/rerank");

    let mut unknown = body.clone();
    unknown["candidates"][3]["id"] = json!("not-in-the-catalog");
    unknown["candidates"][11]["id"] = json!("nor-this");
    let (status, e) = post_json(&client, &url, &unknown).await;
    assert_eq!(status, 422, "{e}");
    assert_eq!(e["error"]["code"], "unknown_item");
    assert_eq!(e["error"]["path"], "candidates[3].id");

    let mut lenient = unknown.clone();
    lenient["slice"] = json!("lenient");
    let (status, r) = post_json(&client, &url, &lenient).await;
    assert_eq!(status, 200, "{r}");
    assert_eq!(r["dropped"], 2);
    assert!(r["items"].as_array().unwrap().iter().all(|i| i["id"] != "nor-this"));
    assert_eq!(server.metric_sum("medley_unknown_items_total{slice=\"lenient\"}").await, 2);
    // Indices in later errors are the ones sent, not the ones after dropping.
    let mut bad_score = lenient.clone();
    bad_score["candidates"][20]["score"] = json!("high");
    let (status, e) = post_json(&client, &url, &bad_score).await;
    assert_eq!((status, e["error"]["path"].as_str()), (400, Some("candidates[20].score")), "{e}");
    let mut dim = lenient.clone();
    dim["candidates"][20]["embedding"] = json!([1.0, 2.0]);
    let (status, e) = post_json(&client, &url, &dim).await;
    assert_eq!(status, 422, "{e}");
    assert_eq!(e["error"]["code"], "dimension_mismatch");
    assert_eq!(e["error"]["path"], "candidates[20].embedding", "{e}");

    // Relevance needs no embedding: unknown ids are served as sent.
    let mut relevance = unknown.clone();
    relevance["algorithm"] = json!("relevance");
    let (status, r) = post_json(&client, &url, &relevance).await;
    assert_eq!(status, 200, "{r}");
    assert!(r.get("dropped").is_none());

    // A sent category wins over the catalog's.
    let mut sent = body.clone();
    for c in sent["candidates"].as_array_mut().unwrap() {
        c["category"] = json!("sent-category");
    }
    sent["algorithm"] = json!("relevance");
    let (_, r) = post_json(&client, &url, &sent).await;
    assert!(r["items"].as_array().unwrap().iter().all(|i| i["category"] == "sent-category"), "{r}");
    assert_eq!(r["diversity"]["distinct_categories"], 1);

    // gRPC: ids and scores only (no embedding values), the same slate and catalog version as the
    // JSON answer, and unknown_item as INVALID_ARGUMENT with its medley code (a tonic client).
    use medley::grpc::proto;
    let mut grpc = proto::reranker_client::RerankerClient::connect(server.grpc.clone()).await.unwrap();
    let candidates = |b: &Value| -> Vec<proto::Candidate> {
        b["candidates"]
            .as_array()
            .unwrap()
            .iter()
            .map(|c| proto::Candidate {
                id: c["id"].as_str().unwrap().into(),
                score: c["score"].as_f64().unwrap(),
                ..Default::default()
            })
            .collect()
    };
    let call = proto::RerankRequest { candidates: candidates(&body), ..Default::default() };
    let answer = grpc.rerank(call).await.unwrap().into_inner();
    let (_, json_answer) = post_json(&client, &url, &body).await;
    let ids: Vec<&str> = answer.items.iter().map(|i| i.id.as_str()).collect();
    let json_ids: Vec<&str> =
        json_answer["items"].as_array().unwrap().iter().map(|i| i["id"].as_str().unwrap()).collect();
    assert_eq!(ids, json_ids);
    assert_eq!(answer.catalog_version.as_deref(), json_answer["catalog_version"].as_str());
    let call = proto::RerankRequest { candidates: candidates(&unknown), ..Default::default() };
    let status = grpc.rerank(call).await.unwrap_err();
    assert_eq!(status.code(), tonic::Code::InvalidArgument);
    assert!(
        status.message().contains("unknown_item") || status.message().contains("not in the item catalog"),
        "{status:?}"
    );
    server.stop().await;
}

/// Writes a catalog of `ids` whose embeddings and categories depend on `variant`, with the
/// parquet crate (the pyarrow tests cover outside writers).
fn write_catalog(path: &Path, ids: &[String], d: usize, variant: u64) {
    use arrow_array::{ArrayRef, FixedSizeListArray, Float32Array, RecordBatch, StringArray};
    let mut rng = common::Rng(variant);
    let values: Float32Array = (0..ids.len() * d).map(|_| rng.normal() as f32).collect();
    let item = Arc::new(arrow_schema::Field::new("item", arrow_schema::DataType::Float32, false));
    let embedding = FixedSizeListArray::try_new(item, d as i32, Arc::new(values), None).unwrap();
    let categories = StringArray::from_iter_values(ids.iter().map(|_| format!("c{}", rng.below(4))));
    let columns: Vec<(&str, ArrayRef)> = vec![
        ("id", Arc::new(StringArray::from_iter_values(ids))),
        ("embedding", Arc::new(embedding)),
        ("category", Arc::new(categories)),
    ];
    let batch = RecordBatch::try_from_iter(columns).unwrap();
    let mut w =
        parquet::arrow::ArrowWriter::try_new(std::fs::File::create(path).unwrap(), batch.schema(), None)
            .unwrap();
    w.write(&batch).unwrap();
    w.close().unwrap();
}

/// Swap under load (issue 16): two clients post the same ids-only request while the catalog file
/// is replaced 50 times (a new file renamed over it, then SIGHUP). No request fails, and every
/// response's slate is the one the catalog version it names gives.
#[test]
fn catalog_swaps_under_load_fail_no_request_and_each_slate_matches_its_version() {
    let dir = common::process::tempdir("catalog-swap");
    let ids: Vec<String> = (0..2000).map(|i| format!("sku-{i:05}")).collect();
    let (a, b) = (dir.join("a.parquet"), dir.join("b.parquet"));
    write_catalog(&a, &ids, 24, 1);
    write_catalog(&b, &ids, 24, 2);
    let live = dir.join("items.parquet");
    std::fs::copy(&a, &live).unwrap();
    let config_path = dir.join("medley.toml");
    std::fs::write(&config_path, config(&live, "")).unwrap();

    // The slate each version serves, computed in-process from the same files.
    let mut rng = common::Rng(9);
    let body = json!({"candidates": (0..300).map(|j| json!({"id": ids[(j * 13) % ids.len()], "score": rng.unit()}))
        .collect::<Vec<_>>()});
    let mut expected = std::collections::HashMap::new();
    for file in [&a, &b] {
        let config = medley::serve::config::Config::from_toml(&config(file, "")).unwrap();
        let catalog = Arc::new(Catalog::load(file, 1024).unwrap());
        let version = catalog.version().to_owned();
        let engine = medley::serve::engine::Engine::new(config, 1).with_catalog(Some(catalog));
        let request = serde_json::from_value(body.clone()).unwrap();
        let served = engine.prepare(request).unwrap().run(&mut medley::Workspace::default()).unwrap();
        let slate: Vec<String> = served.to_response().items.into_iter().map(|i| i.id).collect();
        expected.insert(version, slate);
    }
    assert_eq!(expected.len(), 2);
    assert!(
        expected.values().next() != expected.values().nth(1),
        "the two catalogs must serve different slates"
    );

    let config_arg = config_path.display().to_string();
    let (mut child, public, _admin) = common::process::spawn_server(&["--config", &config_arg], &[]);
    let _guard = common::process::KillOnDrop(child.id());
    let runtime = tokio::runtime::Builder::new_multi_thread().worker_threads(2).enable_all().build().unwrap();
    runtime.block_on(swap_under_load(&dir, &child, &public, body, expected, [&a, &b]));
    let _ = std::process::Command::new("kill").args(["-TERM", &child.id().to_string()]).status();
    let _ = child.wait();
}

async fn swap_under_load(
    dir: &Path,
    child: &std::process::Child,
    public: &str,
    body: Value,
    expected: std::collections::HashMap<String, Vec<String>>,
    [a, b]: [&PathBuf; 2],
) {
    let live = dir.join("items.parquet");
    let url = format!("http://{public}/v1/rerank");
    let stop = Arc::new(std::sync::atomic::AtomicBool::new(false));
    let expected = Arc::new(expected);
    let mut clients = Vec::new();
    for _ in 0..2 {
        let (url, body, stop, expected) = (url.clone(), body.clone(), stop.clone(), expected.clone());
        clients.push(tokio::spawn(async move {
            let client = reqwest::Client::new();
            let (mut ok, mut versions) = (0_u64, std::collections::HashSet::new());
            let started = std::time::Instant::now();
            while !stop.load(std::sync::atomic::Ordering::Relaxed) && started.elapsed().as_secs() < 60 {
                let (status, r) = post_json(&client, &url, &body).await;
                assert_eq!(status, 200, "a request failed during swaps: {r}");
                let version = r["catalog_version"].as_str().unwrap().to_owned();
                let slate: Vec<String> = r["items"]
                    .as_array()
                    .unwrap()
                    .iter()
                    .map(|i| i["id"].as_str().unwrap().to_owned())
                    .collect();
                assert_eq!(Some(&slate), expected.get(&version), "slate inconsistent with {version}");
                versions.insert(version);
                ok += 1;
            }
            (ok, versions)
        }));
    }
    for swap in 0..50 {
        let tmp = dir.join("items.parquet.tmp");
        std::fs::copy(if swap % 2 == 0 { b } else { a }, &tmp).unwrap();
        std::fs::rename(&tmp, &live).unwrap();
        let kill =
            std::process::Command::new("kill").args(["-HUP", &child.id().to_string()]).status().unwrap();
        assert!(kill.success());
        tokio::time::sleep(std::time::Duration::from_millis(40)).await;
    }
    tokio::time::sleep(std::time::Duration::from_millis(300)).await;
    stop.store(true, std::sync::atomic::Ordering::Relaxed);
    let mut total = 0;
    let mut seen = std::collections::HashSet::new();
    for c in clients {
        let (ok, versions) = c.await.expect("a client failed");
        total += ok;
        seen.extend(versions);
    }
    assert!(total >= 50, "only {total} requests during the swaps");
    assert_eq!(seen.len(), 2, "both catalogs served: {seen:?}");
    // After 50 swaps (even), catalog a is live again.
    let (_, last) = post_json(&reqwest::Client::new(), &url, &body).await;
    let a_version = Catalog::load(a, 1024).unwrap().version().to_owned();
    assert_eq!(last["catalog_version"], a_version.as_str());
}
