//! Slices, arms, hot swap, shadows and the admin API, against the real server on loopback.
//! (SIGHUP is exercised on the built binary in tests/cli.rs, so no signal hits this test process.)

mod common;

use std::time::Duration;

use common::server::{post_json, request, Server};
use common::Rng;
use serde_json::{json, Value};

const TOKEN: &str = "test-token-4f1c";

const CONFIG: &str = r#"
[slices.default]
algorithm = "dpp"
lambda = 0.3
k = 10

[slices.home]
k = 6
[[slices.home.arms]]
name = "control"
weight = 90
algorithm = "dpp"
lambda = 0.3
[[slices.home.arms]]
name = "treatment-b"
weight = 10
algorithm = "mmr"
lambda = 0.5
[slices.home.shadow]
algorithm = "mmr"
lambda = 0.5
sample_rate = 1.0

[slices.plain]
algorithm = "dpp"
lambda = 0.3
k = 6
"#;

fn admin(
    server: &Server,
    method: reqwest::Method,
    path: &str,
    token: Option<&str>,
) -> reqwest::RequestBuilder {
    let client = reqwest::Client::new();
    let b = client.request(method, format!("{}{path}", server.admin));
    match token {
        Some(t) => b.bearer_auth(t),
        None => b,
    }
}

/// `GET /admin/config` with the right token.
async fn admin_config(server: &Server) -> Value {
    admin(server, reqwest::Method::GET, "/admin/config", Some(TOKEN))
        .send()
        .await
        .unwrap()
        .json()
        .await
        .unwrap()
}

async fn generation(server: &Server) -> u64 {
    admin_config(server).await["config_generation"].as_u64().unwrap()
}

#[tokio::test]
async fn requests_name_their_slice_arm_and_generation_and_units_stay_in_their_arm() {
    let server = Server::start(CONFIG).await;
    let client = reqwest::Client::new();
    let mut rng = Rng(4);
    let mut body = request(&mut rng, 40, 8, 4);
    body["slice"] = json!("home");
    let mut seen = std::collections::HashMap::new();
    for i in 0..200 {
        body["unit_id"] = json!(format!("user-{i}"));
        let (status, r) = post_json(&client, &server.url("/v1/rerank"), &body).await;
        assert_eq!(status, 200, "{r}");
        assert_eq!(r["config_generation"], 1);
        assert_eq!(r["items"].as_array().unwrap().len(), 6, "the slice's k applies to both arms");
        let arm = r["arm"].as_str().unwrap().to_owned();
        let algorithm = r["algorithm"].as_str().unwrap();
        // Each arm serves its own settings.
        match arm.as_str() {
            "control" => assert_eq!((algorithm, r["lambda"].as_f64()), ("dpp", Some(0.3))),
            "treatment-b" => assert_eq!((algorithm, r["lambda"].as_f64()), ("mmr", Some(0.5))),
            other => panic!("unknown arm {other}"),
        }
        // The same unit lands in the same arm, and the server agrees with the documented hash.
        let expected = server
            .state
            .engine
            .load()
            .config()
            .slice("home")
            .unwrap()
            .arm_for(Some(&format!("user-{i}")))
            .name
            .to_string();
        assert_eq!(arm, expected);
        seen.insert(i, arm);
    }
    for i in 0..50 {
        body["unit_id"] = json!(format!("user-{i}"));
        let (_, r) = post_json(&client, &server.url("/v1/rerank"), &body).await;
        assert_eq!(r["arm"].as_str(), Some(seen[&i].as_str()), "user-{i} moved arm");
    }
    let treated = seen.values().filter(|a| *a == "treatment-b").count();
    assert!((1..=50).contains(&treated), "about 10 % of 200 units: {treated}");
    // No unit_id: the first arm. A slice without arms: the implicit arm "default".
    body.as_object_mut().unwrap().remove("unit_id");
    let (_, r) = post_json(&client, &server.url("/v1/rerank"), &body).await;
    assert_eq!(r["arm"], "control");
    body["slice"] = json!("plain");
    let (_, r) = post_json(&client, &server.url("/v1/rerank"), &body).await;
    assert_eq!(r["arm"], "default");
    // Metrics carry the arm label.
    let text = reqwest::get(format!("{}/metrics", server.admin)).await.unwrap().text().await.unwrap();
    assert!(text.contains(
        "medley_rerank_duration_seconds_count{algorithm=\"mmr\",arm=\"treatment-b\",slice=\"home\"}"
    ));
    server.stop().await;
}

#[tokio::test]
async fn admin_is_closed_without_a_token_and_checks_it() {
    let closed = Server::start(CONFIG).await;
    let r = admin(&closed, reqwest::Method::GET, "/admin/config", Some("anything")).send().await.unwrap();
    assert_eq!(r.status(), 403);
    let v: Value = r.json().await.unwrap();
    assert_eq!(v["error"]["code"], "admin_disabled");
    assert!(v["error"]["message"].as_str().unwrap().contains("MEDLEY_ADMIN_TOKEN"));
    closed.stop().await;

    let server = Server::start_with(CONFIG, Some(TOKEN), false).await;
    for (token, status) in
        [(None, 401), (Some("wrong"), 401), (Some("test-token-4f1"), 401), (Some(TOKEN), 200)]
    {
        let r = admin(&server, reqwest::Method::GET, "/admin/config", token).send().await.unwrap();
        assert_eq!(r.status().as_u16(), status, "token {token:?}");
        if status == 401 {
            assert_eq!(r.headers()["www-authenticate"], "Bearer");
        }
    }
    for path in ["/admin/config", "/admin/reload", "/admin/slices/home"] {
        let r = reqwest::Client::new().post(server.url(path)).bearer_auth(TOKEN).send().await.unwrap();
        assert_eq!(r.status(), 404, "{path} must not exist on the public listener");
    }
    let v = admin_config(&server).await;
    assert_eq!(v["config"]["slices"]["home"]["arms"][1]["name"], "treatment-b");
    assert_eq!(v["config_generation"], 1);
    // The listeners as bound (ephemeral ports here), not as configured.
    assert_eq!(v["listen"], server.addr.to_string());
    assert_eq!(format!("http://{}", v["admin_listen"].as_str().unwrap()), server.admin);
    server.stop().await;
}

#[tokio::test]
async fn invalid_configs_are_refused_on_every_path_and_the_old_one_keeps_serving() {
    let server = Server::start_with(CONFIG, Some(TOKEN), false).await;
    let client = reqwest::Client::new();
    let serves_lambda = |lambda: f64| {
        let (client, url) = (client.clone(), server.url("/v1/rerank"));
        async move {
            let (status, r) = post_json(&client, &url, &json!({"candidates": []})).await;
            assert_eq!(status, 200);
            assert_eq!(r["lambda"].as_f64(), Some(lambda));
        }
    };
    // File path: an invalid file is refused once the watcher sees it.
    std::fs::write(&server.config_path, CONFIG.replacen("lambda = 0.3", "lambda = 7.0", 1)).unwrap();
    for _ in 0..200 {
        if server.metric_sum("medley_config_reload_failures_total{trigger=\"file\"}").await >= 1 {
            break;
        }
        tokio::time::sleep(Duration::from_millis(20)).await;
    }
    assert!(server.metric_sum("medley_config_reload_failures_total{trigger=\"file\"}").await >= 1);
    assert_eq!(generation(&server).await, 1);
    serves_lambda(0.3).await;

    // Admin reload of the same bad file: 422 naming the field.
    let r = admin(&server, reqwest::Method::POST, "/admin/reload", Some(TOKEN)).send().await.unwrap();
    assert_eq!(r.status(), 422);
    let v: Value = r.json().await.unwrap();
    assert_eq!(v["error"]["code"], "invalid_config");
    assert_eq!(v["error"]["path"], "slices.default.lambda");
    assert!(v["error"]["message"].as_str().unwrap().contains("previous one keeps serving"));

    // Admin slice path: a bad slice body is refused with its field; an unknown key too.
    let r = admin(&server, reqwest::Method::PUT, "/admin/slices/email", Some(TOKEN))
        .json(&json!({"algorithm": "dpp", "lambda": 0.2, "arms": [{"name": "a", "weight": 0}]}))
        .send()
        .await
        .unwrap();
    assert_eq!(r.status(), 422);
    let v: Value = r.json().await.unwrap();
    assert_eq!(v["error"]["path"], "slices.email.arms");
    let r = admin(&server, reqwest::Method::PUT, "/admin/slices/email", Some(TOKEN))
        .json(&json!({"lamda": 0.2}))
        .send()
        .await
        .unwrap();
    assert_eq!(r.status(), 400);
    assert_eq!(generation(&server).await, 1);
    serves_lambda(0.3).await;

    // Fix the file: the watcher swaps it in.
    std::fs::write(&server.config_path, CONFIG.replacen("lambda = 0.3", "lambda = 0.4", 1)).unwrap();
    for _ in 0..200 {
        if generation(&server).await > 1 {
            break;
        }
        tokio::time::sleep(Duration::from_millis(20)).await;
    }
    assert!(generation(&server).await > 1);
    serves_lambda(0.4).await;
    server.stop().await;
}

/// The digest from `/readyz`, checked against `GET /admin/config` and `medley_config_info`.
async fn digest(server: &Server) -> String {
    let ready: Value = reqwest::get(format!("{}/readyz", server.admin)).await.unwrap().json().await.unwrap();
    let d = ready["config_digest"].as_str().unwrap().to_owned();
    assert!(d.len() == 16 && d.bytes().all(|b| b.is_ascii_hexdigit()), "{d}");
    assert_eq!(admin_config(server).await["config_digest"], d.as_str());
    let text = reqwest::get(format!("{}/metrics", server.admin)).await.unwrap().text().await.unwrap();
    let series: Vec<&str> = text.lines().filter(|l| l.starts_with("medley_config_info{")).collect();
    assert_eq!(series, [format!("medley_config_info{{digest=\"{d}\"}} 1")], "one series, the live digest");
    d
}

/// Two replicas of the same config report one digest (comments and key order aside); a runtime
/// slice changes one replica's digest only, and deleting it brings the first digest back.
#[tokio::test]
async fn the_config_digest_names_the_config_not_the_replica() {
    let a = Server::start_with(CONFIG, Some(TOKEN), false).await;
    let reordered = format!(
        "# the other replica's copy\n{}\n{}",
        &CONFIG[CONFIG.find("[slices.plain]").unwrap()..],
        &CONFIG[..CONFIG.find("[slices.plain]").unwrap()]
    );
    let b = Server::start_with(&reordered, Some(TOKEN), false).await;
    let first = digest(&a).await;
    assert_eq!(digest(&b).await, first);

    let r = admin(&a, reqwest::Method::PUT, "/admin/slices/email", Some(TOKEN))
        .json(&json!({"algorithm": "mmr", "lambda": 0.4, "k": 8}))
        .send()
        .await
        .unwrap();
    assert_eq!(r.status(), 200);
    let changed = digest(&a).await;
    assert_ne!(changed, first);
    assert_eq!(digest(&b).await, first, "a runtime slice changes one replica only");
    let r = admin(&a, reqwest::Method::DELETE, "/admin/slices/email", Some(TOKEN)).send().await.unwrap();
    assert_eq!(r.status(), 200);
    assert_eq!(digest(&a).await, first, "the same config again, the same digest");
    assert_eq!(generation(&a).await, 3, "while the generation counts swaps");
    a.stop().await;
    b.stop().await;
}

/// Waits (bounded) until the live generation reaches `at_least`.
async fn wait_for_generation(server: &Server, at_least: u64) -> u64 {
    for _ in 0..250 {
        let g = generation(server).await;
        if g >= at_least {
            return g;
        }
        tokio::time::sleep(Duration::from_millis(20)).await;
    }
    generation(server).await
}

/// A Kubernetes ConfigMap volume, as the kubelet's atomic writer lays it out: each key is a
/// symlink `key -> ..data/key`, `..data` is a symlink to a timestamped directory, and an update
/// writes a new directory, points a new `..data_tmp` symlink at it and renames that over
/// `..data`. The config file's own name sees no event at all (layout as documented for
/// ConfigMap volumes and the kubelet's `AtomicWriter`; recalled from memory, not copied).
#[cfg(unix)]
#[tokio::test]
async fn a_configmap_style_symlink_swap_is_seen_by_the_watcher() {
    use std::os::unix::fs::symlink;
    let server = Server::start_with(CONFIG, Some(TOKEN), false).await;
    let dir = server.config_path.parent().unwrap().to_path_buf();
    // Turn the plain file into the ConfigMap layout (itself a rename over the file's name).
    std::fs::create_dir(dir.join("..2026_12_02_v1")).unwrap();
    // An edited copy: a rename that leaves the content as it was is no swap (issue 13, item 1).
    let first = CONFIG.replacen("lambda = 0.3", "lambda = 0.35", 1);
    std::fs::write(dir.join("..2026_12_02_v1/medley.toml"), &first).unwrap();
    symlink("..2026_12_02_v1", dir.join("..data")).unwrap();
    symlink("..data/medley.toml", dir.join("medley.toml.link")).unwrap();
    std::fs::rename(dir.join("medley.toml.link"), &server.config_path).unwrap();
    let g = wait_for_generation(&server, 2).await;
    assert_eq!(g, 2, "the rename onto the config's name is a reload");

    // The ConfigMap update: only `..data` changes.
    std::fs::create_dir(dir.join("..2026_12_02_v2")).unwrap();
    let edited = CONFIG.replacen("lambda = 0.3", "lambda = 0.45", 1);
    std::fs::write(dir.join("..2026_12_02_v2/medley.toml"), &edited).unwrap();
    symlink("..2026_12_02_v2", dir.join("..data_tmp")).unwrap();
    std::fs::rename(dir.join("..data_tmp"), dir.join("..data")).unwrap();
    std::fs::remove_dir_all(dir.join("..2026_12_02_v1")).unwrap();
    assert_eq!(wait_for_generation(&server, 3).await, 3, "the ..data swap is a reload");
    let (status, r) =
        post_json(&reqwest::Client::new(), &server.url("/v1/rerank"), &json!({"candidates": []})).await;
    assert_eq!(status, 200);
    assert_eq!(r["lambda"].as_f64(), Some(0.45));
    assert_eq!(r["config_generation"], 3);
    server.stop().await;
}

#[tokio::test]
async fn runtime_slices_persist_in_the_overlay_and_say_so() {
    let server = Server::start_with(CONFIG, Some(TOKEN), true).await;
    let r = admin(&server, reqwest::Method::PUT, "/admin/slices/email", Some(TOKEN))
        .json(&json!({"algorithm": "quota", "lambda": 1.0, "k": 3}))
        .send()
        .await
        .unwrap();
    assert_eq!(r.status(), 200);
    let v: Value = r.json().await.unwrap();
    assert_eq!((v["persisted"].as_bool(), v["config_generation"].as_u64()), (Some(true), Some(2)));
    let overlay = server.config_path.with_file_name("overlay.toml");
    let text = std::fs::read_to_string(&overlay).unwrap();
    assert!(text.contains("[slices.email]"), "{text}");
    let client = reqwest::Client::new();
    let (status, r) =
        post_json(&client, &server.url("/v1/rerank"), &json!({"slice": "email", "candidates": []})).await;
    assert_eq!(
        (status, r["algorithm"].as_str(), r["config_generation"].as_u64()),
        (200, Some("quota"), Some(2))
    );
    // A file reload keeps the runtime slice.
    let r = admin(&server, reqwest::Method::POST, "/admin/reload", Some(TOKEN)).send().await.unwrap();
    assert_eq!(r.status(), 200);
    let (_, r) =
        post_json(&client, &server.url("/v1/rerank"), &json!({"slice": "email", "candidates": []})).await;
    assert_eq!(r["algorithm"], "quota");
    // Deleting a file slice is refused; deleting the runtime one removes it.
    let r = admin(&server, reqwest::Method::DELETE, "/admin/slices/home", Some(TOKEN)).send().await.unwrap();
    assert_eq!(r.status(), 404);
    let r = admin(&server, reqwest::Method::DELETE, "/admin/slices/email", Some(TOKEN)).send().await.unwrap();
    assert_eq!(r.status(), 200);
    let (status, r) =
        post_json(&client, &server.url("/v1/rerank"), &json!({"slice": "email", "candidates": []})).await;
    assert_eq!((status, r["error"]["code"].as_str()), (422, Some("unknown_slice")));
    server.stop().await;

    // Without an overlay the answer says the change is in memory only.
    let server = Server::start_with(CONFIG, Some(TOKEN), false).await;
    let v: Value = admin(&server, reqwest::Method::PUT, "/admin/slices/email", Some(TOKEN))
        .json(&json!({"algorithm": "relevance"}))
        .send()
        .await
        .unwrap()
        .json()
        .await
        .unwrap();
    assert_eq!(v["persisted"], false);
    assert!(v["note"].as_str().unwrap().contains("lost on restart"));
    server.stop().await;
}

#[tokio::test]
async fn shadow_runs_are_measured_and_never_change_the_answer() {
    let server = Server::start(CONFIG).await;
    let client = reqwest::Client::new();
    let mut rng = Rng(8);
    for _ in 0..20 {
        let mut body = request(&mut rng, 60, 8, 5);
        body["slice"] = json!("home");
        let (status, shadowed) = post_json(&client, &server.url("/v1/rerank"), &body).await;
        assert_eq!(status, 200);
        body["slice"] = json!("plain");
        let (_, plain) = post_json(&client, &server.url("/v1/rerank"), &body).await;
        assert_eq!(shadowed["items"], plain["items"], "the shadow must not change the slate");
    }
    for _ in 0..200 {
        if server.metric_sum("medley_shadow_runs_total{slice=\"home\"}").await >= 20 {
            break;
        }
        tokio::time::sleep(Duration::from_millis(10)).await;
    }
    assert_eq!(server.metric_sum("medley_shadow_runs_total{slice=\"home\"}").await, 20);
    for family in [
        "medley_shadow_rbo_count{slice=\"home\"}",
        "medley_shadow_overlap_count{slice=\"home\"}",
        "medley_shadow_entropy_delta_count{slice=\"home\"}",
        "medley_shadow_ild_delta_count{slice=\"home\"}",
        "medley_shadow_relevance_retained_count{slice=\"home\"}",
    ] {
        assert_eq!(server.metric_sum(family).await, 20, "{family}");
    }
    assert_eq!(server.metric_sum("medley_shadow_runs_total{slice=\"plain\"}").await, 0);
    server.stop().await;
}

#[tokio::test]
async fn a_full_shadow_queue_drops_and_counts_without_failing_requests() {
    // One-slot queue and a slow shadow (DPP with a large k on every request).
    let config = format!(
        "[server]\nshadow_queue = 1\nmax_body_bytes = 8388608\n{}",
        CONFIG.replace(
            "[slices.home.shadow]\nalgorithm = \"mmr\"\nlambda = 0.5",
            "[slices.home.shadow]\nalgorithm = \"dpp\"\nlambda = 0.9"
        )
    );
    let server = Server::start(&config).await;
    let client = reqwest::Client::new();
    let mut rng = Rng(12);
    let mut body = request(&mut rng, 1500, 256, 8);
    for c in body["candidates"].as_array_mut().unwrap() {
        let e: Vec<f32> =
            c["embedding"].as_array().unwrap().iter().map(|x| x.as_f64().unwrap() as f32).collect();
        c.as_object_mut().unwrap().remove("embedding");
        c["embedding_b64"] = json!(medley::api::wire::encode_b64_embedding(&e));
    }
    // The primary is cheap (relevance); the shadow is DPP choosing 300 of 1500 in d = 256.
    body["slice"] = json!("home");
    body["algorithm"] = json!("relevance");
    body["k"] = json!(300);
    let mut handles = Vec::new();
    for _ in 0..16 {
        let (client, url, body) = (client.clone(), server.url("/v1/rerank"), body.clone());
        handles.push(tokio::spawn(async move { post_json(&client, &url, &body).await.0 }));
    }
    for h in handles {
        assert_eq!(h.await.unwrap(), 200);
    }
    let dropped = server.metric_sum("medley_shadow_dropped_total{slice=\"home\"}").await;
    assert!(dropped >= 1, "16 concurrent requests into a one-slot queue must drop some shadow runs");
    server.stop().await;
    // stop() drained the queue; every request was either shadowed or counted as dropped.
}
