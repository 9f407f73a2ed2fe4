//! The real server on ephemeral loopback ports, driven with a real HTTP client: every algorithm,
//! every error code with its path, the stream endpoint, metrics, shedding, deadlines, graceful
//! shutdown, and responses validated against the committed OpenAPI document.

mod common;

use std::time::Duration;

use common::server::{post_json, post_raw, request, Server};
use common::Rng;
use futures_util::StreamExt;
use serde_json::{json, Value};

/// The default slice plus a locked one, with a 1 MiB body limit so limit tests stay small.
const TEST_CONFIG: &str = r#"
[server]
max_body_bytes = 1048576

[slices.default]
algorithm = "dpp"
lambda = 0.3
k = 10

[slices.search]
algorithm = "quota"
lambda = 0.8
k = 5
locked = true
max_per_category = 2
"#;

/// A validator for one schema of docs/openapi.json (OpenAPI 3.1 schemas are JSON Schema 2020-12;
/// `$ref`s resolve inside the document, which rides along as `components`).
fn schema(name: &str) -> jsonschema::Validator {
    let doc: Value = serde_json::from_str(medley::http::OPENAPI_JSON).unwrap();
    let schema = json!({
        "$schema": "https://json-schema.org/draft/2020-12/schema",
        "$ref": format!("#/components/schemas/{name}"),
        "components": doc["components"],
    });
    jsonschema::validator_for(&schema).unwrap()
}

fn assert_valid(validator: &jsonschema::Validator, value: &Value) {
    let errors: Vec<String> =
        validator.iter_errors(value).map(|e| format!("{e} at {}", e.instance_path)).collect();
    assert!(errors.is_empty(), "{value} does not match the OpenAPI schema: {errors:?}");
}

#[tokio::test]
async fn every_algorithm_serves_a_valid_slate() {
    let server = Server::start(TEST_CONFIG).await;
    let client = reqwest::Client::new();
    let response_schema = schema("RerankResponse");
    let mut rng = Rng(7);
    let mut body = request(&mut rng, 60, 8, 4);
    body["request_id"] = json!("req-1");
    body["k"] = json!(12);
    for algorithm in ["relevance", "mmr", "dpp", "quota"] {
        for lambda in [0.0, 0.5, 1.0] {
            body["algorithm"] = json!(algorithm);
            body["lambda"] = json!(lambda);
            let (status, r) = post_json(&client, &server.url("/v1/rerank"), &body).await;
            assert_eq!(status, 200, "{algorithm}: {r}");
            assert_valid(&response_schema, &r);
            assert_eq!(r["algorithm"], algorithm);
            assert_eq!(r["request_id"], "req-1");
            assert_eq!(r["slice"], "default");
            let items = r["items"].as_array().unwrap();
            assert_eq!(items.len(), 12);
            let ids: std::collections::HashSet<&str> =
                items.iter().map(|i| i["id"].as_str().unwrap()).collect();
            assert_eq!(ids.len(), 12, "no duplicates");
            // The caller's scores come back unchanged, and lambda = 0 is the score order.
            let by_id: std::collections::HashMap<&str, f64> = body["candidates"]
                .as_array()
                .unwrap()
                .iter()
                .map(|c| (c["id"].as_str().unwrap(), c["score"].as_f64().unwrap()))
                .collect();
            for item in items {
                let (got, sent) = (item["score"].as_f64().unwrap(), by_id[item["id"].as_str().unwrap()]);
                assert_eq!(got.to_bits(), sent.to_bits(), "score comes back bit for bit");
            }
            if lambda == 0.0 {
                let scores: Vec<f64> = items.iter().map(|i| i["score"].as_f64().unwrap()).collect();
                assert!(scores.windows(2).all(|w| w[0] >= w[1]), "{algorithm} λ=0 is relevance order");
            }
            assert!(r["diversity"]["intra_list_distance"].is_number());
        }
    }
    // Slice defaults apply when the request leaves fields out; an empty list is a 200.
    let (status, r) = post_json(&client, &server.url("/v1/rerank"), &json!({"candidates": []})).await;
    assert_eq!(status, 200);
    assert_valid(&response_schema, &r);
    assert_eq!(
        (r["algorithm"].as_str(), r["k"].as_u64(), r["lambda"].as_f64()),
        (Some("dpp"), Some(10), Some(0.3))
    );
    assert_eq!(r["items"], json!([]));
    assert_eq!(r["diversity"]["intra_list_distance"], Value::Null);
    server.stop().await;
}

#[tokio::test]
async fn base64_embeddings_give_the_same_slate_as_json_arrays() {
    let server = Server::start(TEST_CONFIG).await;
    let client = reqwest::Client::new();
    let mut rng = Rng(11);
    let body = request(&mut rng, 80, 16, 5);
    let mut b64 = body.clone();
    for c in b64["candidates"].as_array_mut().unwrap() {
        let e: Vec<f32> =
            c["embedding"].as_array().unwrap().iter().map(|x| x.as_f64().unwrap() as f32).collect();
        c.as_object_mut().unwrap().remove("embedding");
        c["embedding_b64"] = json!(medley::api::wire::encode_b64_embedding(&e));
    }
    let (s1, a) = post_json(&client, &server.url("/v1/rerank"), &body).await;
    let (s2, b) = post_json(&client, &server.url("/v1/rerank"), &b64).await;
    assert_eq!((s1, s2), (200, 200));
    assert_eq!(a, b);
    server.stop().await;
}

/// One case of the error table: a body, and what must come back.
struct Case {
    name: &'static str,
    body: Value,
    status: u16,
    code: &'static str,
    path: Option<&'static str>,
}

fn case(
    name: &'static str,
    body: Value,
    status: u16,
    code: &'static str,
    path: Option<&'static str>,
) -> Case {
    Case { name, body, status, code, path }
}

fn cand(id: &str, embedding: Value) -> Value {
    json!({"id": id, "score": 0.5, "category": "tents", "embedding": embedding})
}

#[tokio::test]
async fn every_validation_error_has_its_code_and_path() {
    let server = Server::start(TEST_CONFIG).await;
    let client = reqwest::Client::new();
    let error_schema = schema("ErrorBody");
    let ok = || vec![cand("a", json!([1.0, 0.0])), cand("b", json!([0.0, 1.0]))];
    let nan_b64 = medley::api::wire::encode_b64_embedding(&[f32::NAN, 1.0]);
    let too_many: Vec<Value> = (0..10_001).map(|i| json!({"id": i.to_string(), "score": 1})).collect();
    let cases = vec![
        case(
            "wrong type",
            json!({"candidates": [{"id": "a", "score": "high"}]}),
            400,
            "invalid_field",
            Some("candidates[0].score"),
        ),
        case("k as float", json!({"k": 2.5, "candidates": []}), 400, "invalid_field", Some("k")),
        case("missing candidates", json!({"k": 2}), 400, "invalid_field", None),
        case(
            "unknown algorithm",
            json!({"algorithm": "dp", "candidates": ok()}),
            422,
            "unknown_algorithm",
            Some("algorithm"),
        ),
        case(
            "lambda low",
            json!({"lambda": -0.0001, "candidates": ok()}),
            422,
            "lambda_out_of_range",
            Some("lambda"),
        ),
        case(
            "lambda high",
            json!({"lambda": 1.0001, "candidates": ok()}),
            422,
            "lambda_out_of_range",
            Some("lambda"),
        ),
        case("k zero", json!({"k": 0, "candidates": ok()}), 422, "k_out_of_range", Some("k")),
        case("k too big", json!({"k": 1001, "candidates": ok()}), 422, "k_out_of_range", Some("k")),
        case(
            "duplicate id",
            json!({"candidates": [cand("a", json!([1.0])), cand("a", json!([2.0]))]}),
            422,
            "duplicate_id",
            Some("candidates[1].id"),
        ),
        case(
            "missing embedding",
            json!({"candidates": [{"id": "a", "score": 1}]}),
            422,
            "missing_embedding",
            Some("candidates[0].embedding"),
        ),
        case(
            "partial embeddings",
            json!({"algorithm": "relevance", "candidates": [cand("a", json!([1.0])), {"id": "b", "score": 1}]}),
            422,
            "missing_embedding",
            Some("candidates[1].embedding"),
        ),
        case(
            "dimension mismatch",
            json!({"candidates": [cand("a", json!([1.0, 0.0])), cand("b", json!([1.0]))]}),
            422,
            "dimension_mismatch",
            Some("candidates[1].embedding"),
        ),
        case(
            "zero norm",
            json!({"candidates": [cand("a", json!([0.0, 0.0]))]}),
            422,
            "zero_norm_embedding",
            Some("candidates[0].embedding"),
        ),
        case(
            "f32 overflow",
            json!({"candidates": [cand("a", json!([1.0, 1e39]))]}),
            400,
            "invalid_field",
            Some("candidates[0].embedding[1]"),
        ),
        case(
            "NaN via base64",
            json!({"candidates": [{"id": "a", "score": 1, "embedding_b64": nan_b64}]}),
            422,
            "non_finite",
            Some("candidates[0].embedding_b64"),
        ),
        case(
            "bad base64",
            json!({"candidates": [{"id": "a", "score": 1, "embedding_b64": "!!!!"}]}),
            422,
            "invalid_base64",
            Some("candidates[0].embedding_b64"),
        ),
        case(
            "base64 not whole f32",
            json!({"candidates": [{"id": "a", "score": 1, "embedding_b64": "AACA"}]}),
            422,
            "invalid_base64",
            Some("candidates[0].embedding_b64"),
        ),
        case(
            "both embeddings",
            json!({"candidates": [{"id": "a", "score": 1, "embedding": [1.0], "embedding_b64": "AACAPw=="}]}),
            422,
            "conflicting_embedding",
            Some("candidates[0]"),
        ),
        case(
            "dimension too big",
            json!({"candidates": [cand("a", json!(vec![0.5; 4097]))]}),
            422,
            "dimension_out_of_range",
            Some("candidates[0].embedding"),
        ),
        case(
            "unknown slice",
            json!({"slice": "homepage", "candidates": ok()}),
            422,
            "unknown_slice",
            Some("slice"),
        ),
        case(
            "locked slice",
            json!({"slice": "search", "lambda": 0.1, "candidates": ok()}),
            422,
            "slice_locked",
            Some("lambda"),
        ),
        case(
            "too many candidates",
            json!({"algorithm": "relevance", "candidates": too_many}),
            422,
            "too_many_candidates",
            Some("candidates"),
        ),
    ];
    for c in cases {
        let (status, r) = post_json(&client, &server.url("/v1/rerank"), &c.body).await;
        assert_eq!(status, c.status, "{}: {r}", c.name);
        assert_valid(&error_schema, &r);
        assert_eq!(r["error"]["code"], c.code, "{}: {r}", c.name);
        assert_eq!(r["error"]["path"].as_str(), c.path, "{}: {r}", c.name);
        assert!(r["error"]["message"].as_str().unwrap().len() > 10, "{}: {r}", c.name);
    }
    // The locked slice serves its own settings when the request does not override them.
    let (status, r) =
        post_json(&client, &server.url("/v1/rerank"), &json!({"slice": "search", "candidates": ok()})).await;
    assert_eq!((status, r["algorithm"].as_str(), r["k"].as_u64()), (200, Some("quota"), Some(5)));
    server.stop().await;
}

#[tokio::test]
async fn transport_errors_have_the_error_body() {
    let server = Server::start(TEST_CONFIG).await;
    let client = reqwest::Client::new();
    let error_schema = schema("ErrorBody");
    let check = |status: u16, text: &str, want_status: u16, code: &str| {
        let v: Value = serde_json::from_str(text).unwrap_or_else(|e| panic!("{text}: {e}"));
        assert_eq!(status, want_status, "{text}");
        assert_eq!(v["error"]["code"], code, "{text}");
        assert_valid(&error_schema, &v);
    };
    let url = server.url("/v1/rerank");
    let (s, _, t) = post_raw(&client, &url, "application/json", "{\"candidates\": [").await;
    check(s, &t, 400, "malformed_json");
    let (s, _, t) = post_raw(&client, &url, "application/json", vec![0xff, 0xfe, 0x00]).await;
    check(s, &t, 400, "malformed_json");
    let (s, _, t) = post_raw(&client, &url, "text/plain", "{}").await;
    check(s, &t, 415, "unsupported_media_type");
    let r = client.post(&url).body("{}").send().await.unwrap();
    let s = r.status().as_u16();
    check(s, &r.text().await.unwrap(), 415, "unsupported_media_type");
    let (s, _, t) = post_raw(&client, &url, "application/json; charset=utf-8", "{\"candidates\": []}").await;
    assert_eq!(s, 200, "{t}");

    // Over the 1 MiB limit: declared length, and chunked with no length.
    let big = vec![b' '; 2 << 20];
    let (s, _, t) = post_raw(&client, &url, "application/json", big.clone()).await;
    check(s, &t, 413, "body_too_large");
    let chunks = futures_util::stream::iter(
        big.chunks(64 << 10).map(|c| Ok::<_, std::io::Error>(c.to_vec())).collect::<Vec<_>>(),
    );
    let (s, _, t) = post_raw(&client, &url, "application/json", reqwest::Body::wrap_stream(chunks)).await;
    check(s, &t, 413, "body_too_large");

    let r = client.get(&url).send().await.unwrap();
    let s = r.status().as_u16();
    check(s, &r.text().await.unwrap(), 405, "method_not_allowed");
    let r = client.get(server.url("/v2/nothing")).send().await.unwrap();
    let s = r.status().as_u16();
    check(s, &r.text().await.unwrap(), 404, "not_found");
    // Admin listener: no re-rank routes there.
    let r = client
        .post(format!("{}/v1/rerank", server.admin))
        .json(&json!({"candidates": []}))
        .send()
        .await
        .unwrap();
    assert_eq!(r.status().as_u16(), 404);
    server.stop().await;
}

#[tokio::test]
async fn stream_answers_each_line_in_order_and_survives_a_bad_line() {
    let server = Server::start(TEST_CONFIG).await;
    let client = reqwest::Client::new();
    let mut rng = Rng(3);
    let mut lines = Vec::new();
    for i in 0..9 {
        let mut r = request(&mut rng, 30 + i, 4, 3);
        r["request_id"] = json!(format!("line-{}", i + 1));
        lines.push(r.to_string());
    }
    lines[4] = "{\"candidates\": [oops".into();
    lines[6] = json!({"lambda": 2.0, "candidates": []}).to_string();
    let mut body = lines.join("\n");
    body.push('\n');
    let (status, headers, text) =
        post_raw(&client, &server.url("/v1/rerank/stream"), "application/x-ndjson", body).await;
    assert_eq!(status, 200);
    assert_eq!(headers["content-type"], "application/x-ndjson");
    let out: Vec<Value> = text.lines().map(|l| serde_json::from_str(l).unwrap()).collect();
    assert_eq!(out.len(), 9);
    let (ok, err) = (schema("RerankResponse"), schema("StreamError"));
    for (i, v) in out.iter().enumerate() {
        match i {
            4 => {
                assert_valid(&err, v);
                assert_eq!(
                    (v["error"]["code"].as_str(), v["line"].as_u64()),
                    (Some("malformed_json"), Some(5))
                );
            }
            6 => {
                assert_valid(&err, v);
                assert_eq!(
                    (v["error"]["code"].as_str(), v["line"].as_u64()),
                    (Some("lambda_out_of_range"), Some(7))
                );
            }
            _ => {
                assert_valid(&ok, v);
                assert_eq!(v["request_id"], format!("line-{}", i + 1));
            }
        }
    }
    // A line over the body limit is answered with an error and the stream goes on.
    let long = format!("{}\n{}\n", " ".repeat(2 << 20), json!({"candidates": []}));
    let (status, _, text) =
        post_raw(&client, &server.url("/v1/rerank/stream"), "application/x-ndjson", long).await;
    assert_eq!(status, 200);
    let out: Vec<Value> = text.lines().map(|l| serde_json::from_str(l).unwrap()).collect();
    assert_eq!(out[0]["error"]["code"], "body_too_large");
    assert_eq!(out[0]["line"], 1);
    assert_eq!(out[1]["items"], json!([]));
    let (status, _, _) = post_raw(&client, &server.url("/v1/rerank/stream"), "application/json", "{}").await;
    assert_eq!(status, 415);
    server.stop().await;
}

/// A request body the test feeds by hand, to hold a request open.
fn held_body() -> (tokio::sync::mpsc::Sender<Vec<u8>>, reqwest::Body) {
    let (tx, rx) = tokio::sync::mpsc::channel::<Vec<u8>>(4);
    let stream = futures_util::stream::unfold(rx, |mut rx| async move {
        rx.recv().await.map(|chunk| (Ok::<_, std::io::Error>(chunk), rx))
    });
    (tx, reqwest::Body::wrap_stream(stream))
}

async fn metric(server: &Server, name: &str) -> Option<f64> {
    let text = reqwest::get(format!("{}/metrics", server.admin)).await.ok()?.text().await.ok()?;
    text.lines().find(|l| l.starts_with(name)).and_then(|l| l.rsplit(' ').next()).and_then(|v| v.parse().ok())
}

async fn wait_for_metric(server: &Server, name: &str, value: f64) {
    for _ in 0..200 {
        if metric(server, name).await == Some(value) {
            return;
        }
        tokio::time::sleep(Duration::from_millis(10)).await;
    }
    panic!("{name} never reached {value}");
}

#[tokio::test]
async fn sheds_with_503_at_the_concurrency_limit_and_recovers() {
    let config =
        TEST_CONFIG.replace("max_body_bytes = 1048576", "max_body_bytes = 1048576\nmax_in_flight = 1");
    let server = Server::start(&config).await;
    let client = reqwest::Client::new();
    // An open stream holds the only permit until its body ends.
    let (tx, body) = held_body();
    let stream_url = server.url("/v1/rerank/stream");
    let held = {
        let client = client.clone();
        tokio::spawn(async move {
            client
                .post(stream_url)
                .header("content-type", "application/x-ndjson")
                .body(body)
                .send()
                .await
                .unwrap()
        })
    };
    tx.send(b"{\"candidates\": []}\n".to_vec()).await.unwrap();
    wait_for_metric(&server, "medley_in_flight_requests", 1.0).await;

    let (status, headers, text) =
        post_raw(&client, &server.url("/v1/rerank"), "application/json", "{\"candidates\": []}").await;
    assert_eq!(status, 503, "{text}");
    assert_eq!(headers["retry-after"], "1");
    let v: Value = serde_json::from_str(&text).unwrap();
    assert_eq!(v["error"]["code"], "overloaded");
    // Health and metrics are never shed.
    assert_eq!(client.get(server.url("/healthz")).send().await.unwrap().status(), 200);
    assert_eq!(metric(&server, "medley_shed_total").await, Some(1.0));

    // Close the stream: the permit comes back and requests are served again.
    drop(tx);
    let response = held.await.unwrap();
    let text = response.text().await.unwrap();
    assert_eq!(text.lines().count(), 1);
    wait_for_metric(&server, "medley_in_flight_requests", 0.0).await;
    let (status, _, _) =
        post_raw(&client, &server.url("/v1/rerank"), "application/json", "{\"candidates\": []}").await;
    assert_eq!(status, 200);
    server.stop().await;
}

#[tokio::test]
async fn deadline_answers_503() {
    let config =
        TEST_CONFIG.replace("max_body_bytes = 1048576", "max_body_bytes = 4194304\nrequest_timeout_ms = 1");
    let server = Server::start(&config).await;
    let client = reqwest::Client::new();
    let mut rng = Rng(5);
    let mut body = request(&mut rng, 2000, 64, 8);
    body["k"] = json!(200);
    let (status, r) = post_json(&client, &server.url("/v1/rerank"), &body).await;
    assert_eq!(status, 503, "{r}");
    assert_eq!(r["error"]["code"], "deadline_exceeded");
    server.stop().await;
}

#[tokio::test]
async fn graceful_shutdown_lets_an_in_flight_request_finish() {
    let server = Server::start(TEST_CONFIG).await;
    let client = reqwest::Client::new();
    let mut rng = Rng(9);
    let body = request(&mut rng, 200, 16, 4).to_string().into_bytes();
    let (first, rest) = body.split_at(body.len() / 2);
    let (tx, held) = held_body();
    let url = server.url("/v1/rerank");
    let in_flight = {
        let client = client.clone();
        tokio::spawn(async move {
            let r =
                client.post(url).header("content-type", "application/json").body(held).send().await.unwrap();
            (r.status().as_u16(), r.text().await.unwrap())
        })
    };
    tx.send(first.to_vec()).await.unwrap();
    wait_for_metric(&server, "medley_in_flight_requests", 1.0).await;

    server.begin_stop();
    // Readiness flips to draining (the private listener may already have stopped accepting).
    tokio::time::sleep(Duration::from_millis(50)).await;
    let refused = client.get(server.url("/readyz")).send().await;
    assert!(refused.is_err() || refused.unwrap().status() == 503);

    tx.send(rest.to_vec()).await.unwrap();
    drop(tx);
    let (status, text) = in_flight.await.unwrap();
    assert_eq!(status, 200, "{text}");
    let v: Value = serde_json::from_str(&text).unwrap();
    assert_eq!(v["items"].as_array().unwrap().len(), 10);
    let addr = server.addr;
    server.join().await;
    // The listener is closed: new connections are refused.
    assert!(tokio::net::TcpStream::connect(addr).await.is_err());
}

#[tokio::test]
async fn metrics_name_every_family_after_traffic() {
    let server = Server::start(TEST_CONFIG).await;
    let client = reqwest::Client::new();
    let mut rng = Rng(1);
    let body = request(&mut rng, 50, 8, 3);
    assert_eq!(post_json(&client, &server.url("/v1/rerank"), &body).await.0, 200);
    assert_eq!(
        post_json(&client, &server.url("/v1/rerank"), &json!({"k": 0, "candidates": []})).await.0,
        422
    );
    let text = client.get(server.url("/metrics")).send().await.unwrap().text().await.unwrap();
    for needle in [
        "# TYPE medley_rerank_duration_seconds histogram",
        "medley_rerank_duration_seconds_bucket{algorithm=\"dpp\",arm=\"default\",slice=\"default\",le=\"0.00005\"}",
        "medley_rerank_duration_seconds_bucket{algorithm=\"dpp\",arm=\"default\",slice=\"default\",le=\"1\"} 1",
        "# TYPE medley_category_entropy histogram",
        "medley_last_category_entropy{algorithm=\"dpp\",arm=\"default\",slice=\"default\"}",
        "medley_last_intra_list_distance{algorithm=\"dpp\",arm=\"default\",slice=\"default\"}",
        // The start-up /healthz probe and the one re-rank.
        "medley_requests_total{status=\"200\"} 2",
        "medley_requests_total{status=\"422\"} 1",
        "medley_candidates_per_request_count{slice=\"default\"} 1",
        "medley_panics_total 0",
        "medley_config_generation 1",
    ] {
        assert!(text.contains(needle), "missing {needle:?} in\n{text}");
    }
    // Served on both listeners; the OpenAPI document is the committed file.
    let admin_text =
        client.get(format!("{}/metrics", server.admin)).send().await.unwrap().text().await.unwrap();
    assert!(admin_text.contains("medley_rerank_duration_seconds_count"));
    let served = client.get(server.url("/openapi.json")).send().await.unwrap().text().await.unwrap();
    let committed =
        std::fs::read_to_string(concat!(env!("CARGO_MANIFEST_DIR"), "/docs/openapi.json")).unwrap();
    assert_eq!(served, committed);
    let health: Value = client.get(server.url("/healthz")).send().await.unwrap().json().await.unwrap();
    assert_valid(&schema("Health"), &health);
    let ready: Value = client.get(server.url("/readyz")).send().await.unwrap().json().await.unwrap();
    assert_valid(&schema("Ready"), &ready);
    server.stop().await;
}

#[tokio::test]
async fn a_stream_response_starts_before_its_request_ends() {
    let server = Server::start(TEST_CONFIG).await;
    let client = reqwest::Client::new();
    let (tx, body) = held_body();
    let response = {
        let url = server.url("/v1/rerank/stream");
        let client = client.clone();
        tokio::spawn(async move {
            client.post(url).header("content-type", "application/x-ndjson").body(body).send().await.unwrap()
        })
    };
    tx.send(format!("{}\n", json!({"request_id": "first", "candidates": []})).into_bytes()).await.unwrap();
    let response = response.await.unwrap();
    let mut chunks = response.bytes_stream();
    let first = tokio::time::timeout(Duration::from_secs(10), chunks.next())
        .await
        .expect("first line before the body ends");
    let first: Value = serde_json::from_slice(&first.unwrap().unwrap()).unwrap();
    assert_eq!(first["request_id"], "first");
    drop(tx);
    server.stop().await;
}

/// README "Try it": the example request and the slate the README shows for it.
#[tokio::test]
async fn readme_example_slate() {
    let server = Server::start_default().await;
    let client = reqwest::Client::new();
    let body: Value = serde_json::from_str(include_str!(concat!(
        env!("CARGO_MANIFEST_DIR"),
        "/examples/requests/tents.json"
    )))
    .unwrap();
    let (status, r) = post_json(&client, &server.url("/v1/rerank"), &body).await;
    assert_eq!(status, 200);
    let ids: Vec<&str> = r["items"].as_array().unwrap().iter().map(|i| i["id"].as_str().unwrap()).collect();
    assert_eq!(ids, ["tent-204", "stove-07", "boot-552", "tent-311"]);
    assert_eq!(r["diversity"]["category_entropy_bits"], 1.5);
    assert_eq!(r["diversity"]["distinct_categories"], 3);
    let mut by_score = body.clone();
    by_score["lambda"] = json!(0.0);
    let (_, r) = post_json(&client, &server.url("/v1/rerank"), &by_score).await;
    let ids: Vec<&str> = r["items"].as_array().unwrap().iter().map(|i| i["id"].as_str().unwrap()).collect();
    assert_eq!(ids, ["tent-204", "tent-311", "tent-118", "stove-07"]);
    // The README's stream example: the second line is answered with invalid_field in place.
    let (status, _, text) = post_raw(
        &client,
        &server.url("/v1/rerank/stream"),
        "application/x-ndjson",
        include_str!(concat!(env!("CARGO_MANIFEST_DIR"), "/examples/requests/mixed.ndjson")),
    )
    .await;
    assert_eq!(status, 200);
    let lines: Vec<Value> = text.lines().map(|l| serde_json::from_str(l).unwrap()).collect();
    assert_eq!(lines.len(), 3);
    assert_eq!(lines[1]["error"]["path"], "candidates[0].score");
    assert_eq!(lines[1]["line"], 2);
    server.stop().await;
}

/// Issue 17 over HTTP and the stream: windowed DPP, SSD and calibration serve the slates the
/// kernels compute (checked here against the in-crate brute force on the same validated input),
/// `diversity.miscalibration` comes with every profile and equals Steck's divergence of the
/// answered slate, slice defaults apply, a locked slice refuses the new fields, and every new
/// refusal has its code and path.
#[tokio::test]
async fn windowed_dpp_ssd_and_calibration_serve_over_http_and_the_stream() {
    const CONFIG: &str = r#"
[slices.default]
algorithm = "dpp"
lambda = 0.3
k = 10

[slices.feed]
algorithm = "ssd"
lambda = 0.6
k = 8
window = 3

[slices.taste]
algorithm = "calibrated"
lambda = 0.7
k = 6
locked = true
profile = { "cat-0" = 5.0, "cat-1" = 3.0, "cat-2" = 2.0 }
"#;
    let server = Server::start(CONFIG).await;
    let client = reqwest::Client::new();
    let response_schema = schema("RerankResponse");
    let mut rng = Rng(17);
    let base = request(&mut rng, 50, 6, 3);
    // The validated input the server sees, for the brute force.
    let cands = common::server::candidate_inputs(&base);
    let profile = vec![("cat-0".to_owned(), 1.0), ("cat-1".to_owned(), 1.0), ("cat-7".to_owned(), 2.0)];
    let input =
        medley::RerankInput::new(cands, medley::ScoreTransform::MinMax, true, &medley::Limits::default())
            .unwrap()
            .with_profile(profile.clone())
            .unwrap();
    let ids = |r: &Value| -> Vec<String> {
        r["items"].as_array().unwrap().iter().map(|i| i["id"].as_str().unwrap().to_owned()).collect()
    };
    let names =
        |picks: Vec<usize>| -> Vec<String> { picks.into_iter().map(|i| input.ids()[i].clone()).collect() };
    let params = |k: u64, lambda: f64, window: Option<u64>| {
        medley::Params::new(k, lambda, &medley::Limits::default()).unwrap().with_window(window).unwrap()
    };
    let profile_json = json!({"cat-0": 1.0, "cat-1": 1.0, "cat-7": 2.0});

    let mut body = base.clone();
    body["algorithm"] = json!("dpp");
    body["lambda"] = json!(0.8);
    body["k"] = json!(12);
    body["window"] = json!(4);
    let (status, r) = post_json(&client, &server.url("/v1/rerank"), &body).await;
    assert_eq!(status, 200, "{r}");
    assert_valid(&response_schema, &r);
    assert_eq!(
        ids(&r),
        names(medley::diversify::reference::dpp_window(&input, &params(12, 0.8, Some(4)), 4))
    );
    assert!(r["diversity"].get("miscalibration").is_none(), "no profile, no miscalibration");

    body["algorithm"] = json!("ssd");
    let (status, r) = post_json(&client, &server.url("/v1/rerank"), &body).await;
    assert_eq!(status, 200, "{r}");
    assert_eq!(ids(&r), names(medley::diversify::reference::ssd(&input, &params(12, 0.8, Some(4)))));

    body["algorithm"] = json!("calibrated");
    body.as_object_mut().unwrap().remove("window");
    body["profile"] = profile_json.clone();
    let (status, r) = post_json(&client, &server.url("/v1/rerank"), &body).await;
    assert_eq!(status, 200, "{r}");
    assert_valid(&response_schema, &r);
    let picks = medley::diversify::reference::calibrated(&input, &params(12, 0.8, None));
    assert_eq!(ids(&r), names(picks.clone()));
    let kl = medley::measures::miscalibration(&input, &picks).unwrap();
    assert!((r["diversity"]["miscalibration"].as_f64().unwrap() - kl).abs() < 1e-12, "{r}");

    // Slice defaults: the feed slice's window, the taste slice's profile.
    let (status, r) = post_json(
        &client,
        &server.url("/v1/rerank"),
        &json!({"slice": "feed", "candidates": base["candidates"]}),
    )
    .await;
    assert_eq!((status, r["algorithm"].as_str()), (200, Some("ssd")), "{r}");
    assert_eq!(ids(&r), names(medley::diversify::reference::ssd(&input, &params(8, 0.6, Some(3)))));
    let (status, r) = post_json(
        &client,
        &server.url("/v1/rerank"),
        &json!({"slice": "taste", "candidates": base["candidates"]}),
    )
    .await;
    assert_eq!((status, r["algorithm"].as_str()), (200, Some("calibrated")), "{r}");
    assert!(r["diversity"]["miscalibration"].as_f64().is_some());

    // Refusals.
    let with = |f: &dyn Fn(&mut Value)| {
        let mut b = base.clone();
        f(&mut b);
        b
    };
    for (what, body, code, path) in [
        ("window 1", with(&|b| b["window"] = json!(1)), "window_out_of_range", "window"),
        ("window 1001", with(&|b| b["window"] = json!(1001)), "window_out_of_range", "window"),
        (
            "calibrated without a profile",
            with(&|b| b["algorithm"] = json!("calibrated")),
            "missing_profile",
            "profile",
        ),
        (
            "a negative weight",
            with(&|b| b["profile"] = json!({"cat-0": 1.0, "cat-1": -0.5})),
            "invalid_profile",
            "profile.cat-1",
        ),
        (
            "weights summing to 0",
            with(&|b| b["profile"] = json!({"cat-0": 0.0})),
            "invalid_profile",
            "profile",
        ),
        (
            "a weight that is not a number",
            with(&|b| b["profile"] = json!({"cat-0": "high"})),
            "invalid_field",
            "profile.cat-0",
        ),
        (
            "a window on a locked slice",
            with(&|b| {
                b["slice"] = json!("taste");
                b["window"] = json!(3);
            }),
            "slice_locked",
            "window",
        ),
        (
            "a profile on a locked slice",
            with(&|b| {
                b["slice"] = json!("taste");
                b["profile"] = json!({"cat-0": 1.0});
            }),
            "slice_locked",
            "profile",
        ),
    ] {
        let (status, r) = post_json(&client, &server.url("/v1/rerank"), &body).await;
        assert!(status == 422 || status == 400, "{what}: {status} {r}");
        assert_valid(&schema("ErrorBody"), &r);
        assert_eq!(
            (r["error"]["code"].as_str(), r["error"]["path"].as_str()),
            (Some(code), Some(path)),
            "{what}: {r}"
        );
    }

    // The stream: each new algorithm on a line, a bad line between them.
    let mut lines = Vec::new();
    for (algorithm, extra) in [
        ("ssd", json!({"window": 2})),
        ("calibrated", json!({"profile": profile_json})),
        ("dpp", json!({"window": 1})),
    ] {
        let mut l = base.clone();
        l["algorithm"] = json!(algorithm);
        l["k"] = json!(5);
        for (key, value) in extra.as_object().unwrap() {
            l[key] = value.clone();
        }
        lines.push(l.to_string());
    }
    let (status, _, text) =
        post_raw(&client, &server.url("/v1/rerank/stream"), "application/x-ndjson", lines.join("\n") + "\n")
            .await;
    assert_eq!(status, 200);
    let out: Vec<Value> = text.lines().map(|l| serde_json::from_str(l).unwrap()).collect();
    assert_eq!(out[0]["algorithm"], "ssd");
    assert!(out[1]["diversity"]["miscalibration"].as_f64().is_some());
    assert_eq!(
        (out[2]["error"]["code"].as_str(), out[2]["line"].as_u64()),
        (Some("window_out_of_range"), Some(3))
    );
    // Every profiled slate is measured: the two calibrated answers above, the taste slice's, and
    // the stream's.
    let text = reqwest::get(format!("{}/metrics", server.admin)).await.unwrap().text().await.unwrap();
    let count: f64 = text
        .lines()
        .filter(|l| l.starts_with("medley_miscalibration_count"))
        .filter_map(|l| l.rsplit(' ').next()?.parse::<f64>().ok())
        .sum();
    assert!(count >= 3.0, "medley_miscalibration_count {count}");
    server.stop().await;
}

/// Issue 17, the fairness floor over HTTP: every algorithm holds m(t) protected items in every
/// prefix (FA*IR with relevance, checked against the brute force), the answer reports the
/// protected share, a floor that cannot be met says `fairness_shortfall` and is counted, slices
/// carry a default floor, and bad floors are refused with their path.
#[tokio::test]
async fn the_fairness_floor_holds_over_http_for_every_algorithm() {
    const CONFIG: &str = r#"
[slices.default]
algorithm = "dpp"
lambda = 0.3
k = 10

[slices.makers]
algorithm = "mmr"
lambda = 0.5
k = 8
fairness = { protected = "small-maker", share = 0.4, alpha = 0.1 }
"#;
    let server = Server::start(CONFIG).await;
    let client = reqwest::Client::new();
    let response_schema = schema("RerankResponse");
    let mut rng = Rng(23);
    let mut base = request(&mut rng, 40, 6, 3);
    // Small makers are few and score low: relevance alone would leave them out.
    for (i, c) in base["candidates"].as_array_mut().unwrap().iter_mut().enumerate() {
        let small = i % 5 == 0;
        c["group"] = json!(if small { "small-maker" } else { "brand" });
        if small {
            c["score"] = json!(c["score"].as_f64().unwrap() * 0.3);
        }
    }
    let protected: Vec<bool> = (0..40).map(|i| i % 5 == 0).collect();
    let minimums = medley::fairness::minimum_protected(12, 0.5, 0.1);
    for algorithm in ["relevance", "mmr", "dpp", "quota", "ssd", "calibrated"] {
        let mut body = base.clone();
        body["algorithm"] = json!(algorithm);
        body["lambda"] = json!(0.5);
        body["k"] = json!(12);
        body["profile"] = json!({"cat-0": 1.0, "cat-1": 1.0});
        body["fairness"] = json!({"protected": "small-maker", "share": 0.5, "alpha": 0.1});
        let (status, r) = post_json(&client, &server.url("/v1/rerank"), &body).await;
        assert_eq!(status, 200, "{algorithm}: {r}");
        assert_valid(&response_schema, &r);
        let picked: Vec<usize> = r["items"]
            .as_array()
            .unwrap()
            .iter()
            .map(|it| it["id"].as_str().unwrap().trim_start_matches("item-").parse().unwrap())
            .collect();
        let mut held = 0;
        for (t, &i) in picked.iter().enumerate() {
            held += usize::from(protected[i]);
            assert!(held >= minimums[t], "{algorithm}: prefix {} holds {held} < {}", t + 1, minimums[t]);
        }
        assert!(r.get("fairness_shortfall").is_none(), "{algorithm}: eight protected candidates suffice");
        let share = r["diversity"]["protected_share"].as_f64().unwrap();
        assert!((share - held as f64 / 12.0).abs() < 1e-12);
        if algorithm == "relevance" {
            let cands = common::server::candidate_inputs(&base);
            let input = medley::RerankInput::new(
                cands,
                medley::ScoreTransform::MinMax,
                false,
                &medley::Limits::default(),
            )
            .unwrap()
            .with_fairness(protected.clone(), 0.5, 0.1)
            .unwrap();
            let p = medley::Params::new(12, 0.5, &medley::Limits::default()).unwrap();
            assert_eq!(picked, medley::diversify::reference::fair_relevance(&input, &p), "FA*IR");
        }
    }
    // Too few protected candidates: met as far as possible, and said.
    let mut body = base.clone();
    body["k"] = json!(30);
    body["fairness"] = json!({"protected": "small-maker", "share": 0.9, "alpha": 0.1});
    let (status, r) = post_json(&client, &server.url("/v1/rerank"), &body).await;
    assert_eq!((status, r["fairness_shortfall"].as_bool()), (200, Some(true)), "{r}");
    // Every prefix still holds min(m(t), 8) of the 8 small makers.
    let strict = medley::fairness::minimum_protected(30, 0.9, 0.1);
    let mut held = 0;
    for (t, it) in r["items"].as_array().unwrap().iter().enumerate() {
        held += usize::from(
            it["id"].as_str().unwrap().trim_start_matches("item-").parse::<usize>().unwrap() % 5 == 0,
        );
        assert!(held >= strict[t].min(8), "prefix {} holds {held}", t + 1);
    }
    assert_eq!(held, 8);
    let text = reqwest::get(format!("{}/metrics", server.admin)).await.unwrap().text().await.unwrap();
    assert!(text.contains("medley_fairness_shortfall_total{slice=\"default\"} 1"), "{text}");
    // A slice's default floor.
    let (status, r) = post_json(
        &client,
        &server.url("/v1/rerank"),
        &json!({"slice": "makers", "candidates": base["candidates"]}),
    )
    .await;
    assert_eq!(status, 200, "{r}");
    let need = medley::fairness::minimum_protected(8, 0.4, 0.1)[7];
    assert!(need >= 1 && r["diversity"]["protected_share"].as_f64().unwrap() >= need as f64 / 8.0, "{r}");
    // Refusals.
    for (fairness, path) in [
        (json!({"protected": "small-maker", "share": 1.0, "alpha": 0.1}), "fairness.share"),
        (json!({"protected": "small-maker", "share": 0.5, "alpha": 0.0}), "fairness.alpha"),
    ] {
        let mut body = base.clone();
        body["fairness"] = fairness;
        let (status, r) = post_json(&client, &server.url("/v1/rerank"), &body).await;
        assert_eq!(
            (status, r["error"]["code"].as_str(), r["error"]["path"].as_str()),
            (422, Some("invalid_fairness"), Some(path)),
            "{r}"
        );
    }
    let mut body = base.clone();
    body["fairness"] = json!({"protected": "small-maker", "share": 0.5});
    let (status, r) = post_json(&client, &server.url("/v1/rerank"), &body).await;
    assert_eq!((status, r["error"]["code"].as_str()), (400, Some("invalid_field")), "{r}");
    let mut body = base.clone();
    body["candidates"][3]["group"] = json!("g".repeat(1025));
    let (status, r) = post_json(&client, &server.url("/v1/rerank"), &body).await;
    assert_eq!((status, r["error"]["path"].as_str()), (422, Some("candidates[3].group")), "{r}");
    server.stop().await;
}
