//! One test per defect, named after its issue and item (ripgrep's tests/regression.rs habit).
//! Each failed on the code before its fix. Issue 13, item 7 (standard nDCG and recall in replay)
//! is held in tests/reference_fixtures.rs, beside the numpy fixtures it is checked against; items
//! 3 and 4 (body memory budget, refused bodies read to their end) run the built binary in
//! tests/regression_bodies.rs, so their peak RSS is the server's alone.

mod common;

use std::time::{Duration, Instant};

use common::server::{post_json, Server};
use medley::{diversify, CandidateInput, Limits, Params, RerankInput, ScoreTransform, Workspace};
use serde_json::{json, Value};

const TOKEN: &str = "regression-token-7e21";

fn admin(server: &Server, method: reqwest::Method, path: &str) -> reqwest::RequestBuilder {
    reqwest::Client::new().request(method, format!("{}{path}", server.admin)).bearer_auth(TOKEN)
}

async fn generation(server: &Server) -> u64 {
    let v: Value = reqwest::get(format!("{}/readyz", server.admin)).await.unwrap().json().await.unwrap();
    v["config_generation"].as_u64().unwrap()
}

/// Writes `text` over `path` the way editors and config tools save: a new file renamed over it.
fn atomic_save(path: &std::path::Path, text: &str) {
    let tmp = path.with_extension("toml.saving");
    std::fs::write(&tmp, text).unwrap();
    std::fs::rename(&tmp, path).unwrap();
}

const CONFIG: &str = "[slices.default]\nalgorithm = \"mmr\"\nlambda = 0.2\nk = 5\n";

/// Issue 13, item 1: reading the file during a reload made inotify events that triggered the
/// next reload, forever. One save must be exactly one swap; a reload of an unchanged file is no
/// swap and says so.
#[tokio::test]
async fn issue13_1_one_save_is_one_swap_and_an_unchanged_reload_is_none() {
    let server = Server::start_with(CONFIG, Some(TOKEN), false).await;
    assert_eq!(generation(&server).await, 1);
    atomic_save(&server.config_path, &CONFIG.replace("lambda = 0.2", "lambda = 0.25"));
    let deadline = Instant::now() + Duration::from_secs(5);
    while generation(&server).await < 2 {
        assert!(Instant::now() < deadline, "the save was never swapped in");
        tokio::time::sleep(Duration::from_millis(20)).await;
    }
    // The storm went 1 → 37 in 7 s; a stable generation over 5 s is 25 debounce periods.
    tokio::time::sleep(Duration::from_secs(5)).await;
    assert_eq!(generation(&server).await, 2, "one save, one swap");
    assert_eq!(server.metric_sum("medley_config_reloads_total{trigger=\"file\"}").await, 1);
    // And the watcher went quiet: the reload's own reading of the file triggers nothing.
    assert!(server.metric_sum("medley_config_reload_unchanged_total{trigger=\"file\"}").await <= 1);

    for _ in 0..2 {
        let r = admin(&server, reqwest::Method::POST, "/admin/reload").send().await.unwrap();
        assert_eq!(r.status(), 200);
        let v: Value = r.json().await.unwrap();
        assert_eq!(v, json!({"config_generation": 2, "changed": false}));
    }
    assert_eq!(server.metric_sum("medley_config_reload_unchanged_total{trigger=\"admin\"}").await, 2);
    // The admin re-reads did not start a file-triggered round either.
    tokio::time::sleep(Duration::from_millis(600)).await;
    assert_eq!(generation(&server).await, 2);
    let (status, r) =
        post_json(&reqwest::Client::new(), &server.url("/v1/rerank"), &json!({"candidates": []})).await;
    assert_eq!((status, r["lambda"].as_f64(), r["config_generation"].as_u64()), (200, Some(0.25), Some(2)));
    server.stop().await;
}

/// The event filter alone: opening, reading and closing the file, or changing its metadata,
/// cannot change its content and must not trigger a reload; creation, writes, renames, removal
/// and the overflow rescan must.
#[test]
fn issue13_1_only_content_events_trigger_a_reload() {
    use notify::event::{
        AccessKind, AccessMode, CreateKind, MetadataKind, ModifyKind, RemoveKind, RenameMode,
    };
    use notify::EventKind;
    let may = medley::serve::reload::content_may_change;
    for quiet in [
        EventKind::Access(AccessKind::Open(AccessMode::Any)),
        EventKind::Access(AccessKind::Read),
        EventKind::Access(AccessKind::Close(AccessMode::Read)),
        EventKind::Access(AccessKind::Close(AccessMode::Write)),
        EventKind::Modify(ModifyKind::Metadata(MetadataKind::Any)),
    ] {
        assert!(!may(&quiet), "{quiet:?}");
    }
    for loud in [
        EventKind::Create(CreateKind::File),
        EventKind::Modify(ModifyKind::Data(notify::event::DataChange::Any)),
        EventKind::Modify(ModifyKind::Name(RenameMode::To)),
        EventKind::Modify(ModifyKind::Name(RenameMode::From)),
        EventKind::Remove(RemoveKind::File),
        EventKind::Other,
    ] {
        assert!(may(&loud), "{loud:?}");
    }
}

/// Issue 13, item 2: a file whose `[slices.default]` is invalid was swapped in because a runtime
/// slice of the same name hid it, and deleting the runtime slice was then refused forever.
#[tokio::test]
async fn issue13_2_a_file_invalid_alone_is_refused_though_a_runtime_slice_hides_it() {
    let server = Server::start_with(CONFIG, Some(TOKEN), false).await;
    let r = admin(&server, reqwest::Method::PUT, "/admin/slices/default")
        .json(&json!({"algorithm": "dpp", "lambda": 0.5, "k": 3}))
        .send()
        .await
        .unwrap();
    assert_eq!(r.status(), 200);
    assert_eq!(generation(&server).await, 2);
    let bad = "[slices.default]\nalgorithm = 'zigzag'\nlambda = 9\n";
    atomic_save(&server.config_path, bad);

    // File watch: refused and counted.
    let file_failures = "medley_config_reload_failures_total{trigger=\"file\"}";
    let deadline = Instant::now() + Duration::from_secs(5);
    while server.metric_sum(file_failures).await < 1 {
        assert!(Instant::now() < deadline, "the watcher never refused the bad file");
        tokio::time::sleep(Duration::from_millis(20)).await;
    }
    // POST /admin/reload: 422 naming the key, counted.
    let r = admin(&server, reqwest::Method::POST, "/admin/reload").send().await.unwrap();
    assert_eq!(r.status(), 422);
    let v: Value = r.json().await.unwrap();
    assert_eq!(v["error"]["code"], "invalid_config");
    assert_eq!(v["error"]["path"], "slices.default.algorithm");
    assert_eq!(server.metric_sum("medley_config_reload_failures_total{trigger=\"admin\"}").await, 1);
    // SIGHUP runs this same call on the signal; a test process must not signal itself.
    assert!(server.state.reloader.reload(medley::serve::reload::Trigger::Signal).is_err());
    assert_eq!(server.metric_sum("medley_config_reload_failures_total{trigger=\"sighup\"}").await, 1);
    assert_eq!(generation(&server).await, 2, "nothing was swapped");

    // The last valid file stays the base: DELETE works and serves the file's slice again.
    let r = admin(&server, reqwest::Method::DELETE, "/admin/slices/default").send().await.unwrap();
    assert_eq!(r.status(), 200, "{}", r.text().await.unwrap());
    let (status, r) =
        post_json(&reqwest::Client::new(), &server.url("/v1/rerank"), &json!({"candidates": []})).await;
    assert_eq!(status, 200);
    assert_eq!(
        (r["algorithm"].as_str(), r["lambda"].as_f64(), r["k"].as_u64()),
        (Some("mmr"), Some(0.2), Some(5))
    );
    server.stop().await;
}

/// Issue 13, item 5: `-0.0` (index 0) and `0.0` (index 1) are equal scores, yet every algorithm
/// put index 1 first. Equal scores tie toward the lower index, under both score transforms and
/// for every registered algorithm, at lambda 0 and above.
#[test]
fn issue13_5_negative_zero_ties_with_zero_toward_the_lower_index() {
    let cand = |id: &str, score: f64, e: [f32; 2]| CandidateInput {
        id: id.into(),
        score,
        category: Some(id.into()),
        embedding: Some(e.to_vec()),
    };
    let limits = Limits::default();
    let mut ws = Workspace::new();
    for transform in [ScoreTransform::None, ScoreTransform::MinMax] {
        // A third, lower score keeps min-max from mapping everything to 1.
        let input = RerankInput::new(
            vec![cand("neg", -0.0, [1.0, 0.0]), cand("pos", 0.0, [0.0, 1.0]), cand("low", -1.0, [1.0, 1.0])],
            transform,
            true,
            &limits,
        )
        .unwrap()
        // Calibration needs a profile; a symmetric one leaves the tie to the scores.
        .with_profile(vec![("neg".into(), 1.0), ("pos".into(), 1.0), ("low".into(), 1.0)])
        .unwrap();
        assert_eq!(input.sent_score(0).to_bits(), (-0.0_f64).to_bits(), "the caller's score is kept");
        for name in diversify::names() {
            for lambda in [0.0, 0.5] {
                let params = Params::new(1, lambda, &limits).unwrap();
                let picked = diversify::by_name(name).unwrap().select(&input, &params, &mut ws).unwrap();
                assert_eq!(picked.indices, [0], "{name} lambda {lambda} {transform:?}");
            }
        }
    }
}

/// Item 5 over HTTP: the tie goes to index 0 and the answer echoes the caller's `-0.0`.
#[tokio::test]
async fn issue13_5_the_answer_echoes_negative_zero() {
    let server = Server::start(CONFIG).await;
    let body = r#"{"algorithm":"relevance","k":1,"candidates":[{"id":"neg","score":-0.0},{"id":"pos","score":0.0}]}"#;
    let r = reqwest::Client::new()
        .post(server.url("/v1/rerank"))
        .header("content-type", "application/json")
        .body(body)
        .send()
        .await
        .unwrap();
    assert_eq!(r.status(), 200);
    let text = r.text().await.unwrap();
    assert!(text.contains(r#""items":[{"id":"neg","score":-0.0}]"#), "{text}");
    server.stop().await;
}

/// Issue 13, item 6: over-long `request_id`, `unit_id` and `slice` answered 400 `invalid_field`
/// while an over-long candidate id answered 422 `too_long`. All are 422 `too_long` now, with the
/// field's name as the path.
#[tokio::test]
async fn issue13_6_overlong_labels_are_too_long_like_overlong_ids() {
    let server = Server::start(CONFIG).await;
    let client = reqwest::Client::new();
    let long = "x".repeat(1025);
    for field in ["request_id", "unit_id", "slice"] {
        let mut body = json!({"candidates": [{"id": "a", "score": 1.0}]});
        body[field] = json!(long);
        let (status, v) = post_json(&client, &server.url("/v1/rerank"), &body).await;
        assert_eq!(status, 422, "{field}: {v}");
        assert_eq!(v["error"]["code"], "too_long", "{field}");
        assert_eq!(v["error"]["path"], field);
    }
    let (status, v) = post_json(
        &client,
        &server.url("/v1/rerank"),
        &json!({"algorithm": "relevance", "candidates": [{"id": long, "score": 1.0}]}),
    )
    .await;
    assert_eq!((status, v["error"]["code"].as_str()), (422, Some("too_long")), "the id it matches");
    // Exactly at the limit is fine.
    let (status, _) = post_json(
        &client,
        &server.url("/v1/rerank"),
        &json!({"request_id": "r".repeat(1024), "algorithm": "relevance", "candidates": [{"id": "a", "score": 1.0}]}),
    )
    .await;
    assert_eq!(status, 200);
    server.stop().await;
}

/// One HTTP/1.1 exchange over a raw socket, the way a client that writes before it reads does:
/// the head, then every body chunk, then the answer, read to its declared length (or to EOF).
/// Returns the status and the body; a reset or EPIPE is a panic naming it.
fn exchange(
    stream: &mut std::net::TcpStream,
    head: &str,
    body: &mut dyn Iterator<Item = &[u8]>,
) -> (u16, String) {
    use std::io::Write;
    stream.write_all(head.as_bytes()).expect("writing the head");
    for chunk in body {
        stream.write_all(chunk).expect("writing the body: the server must read a refused body to its end");
    }
    read_answer(stream)
}

fn read_answer(stream: &mut std::net::TcpStream) -> (u16, String) {
    use std::io::Read;
    let mut got = Vec::new();
    let mut buf = [0u8; 8192];
    loop {
        let n = stream.read(&mut buf).expect("reading the answer (a reset here is the defect)");
        got.extend_from_slice(&buf[..n]);
        let text = String::from_utf8_lossy(&got);
        if let Some(end) = text.find("\r\n\r\n") {
            let head = &text[..end];
            let length = head
                .lines()
                .find_map(|l| {
                    l.to_ascii_lowercase().strip_prefix("content-length:").map(|v| v.trim().to_owned())
                })
                .and_then(|v| v.parse::<usize>().ok());
            if length.is_some_and(|len| got.len() >= end + 4 + len) || n == 0 {
                let status = head.split_whitespace().nth(1).unwrap().parse().unwrap();
                let body = String::from_utf8_lossy(&got[end + 4..end + 4 + length.unwrap_or(0)]).into_owned();
                return (status, body);
            }
        }
        assert!(n > 0, "the connection closed before an answer: {:?}", String::from_utf8_lossy(&got));
    }
}

/// Issue 13, item 4: a 413 decided from the headers (or mid-body) never reached a client that
/// sends its whole body first: the connection was closed under it. The refused body is now read
/// and discarded to its end, the client reads 413 `body_too_large`, and the connection serves
/// the next request.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn issue13_4_a_client_that_sends_20_mib_then_reads_gets_its_413() {
    let server = Server::start(CONFIG).await;
    let addr = server.addr;
    tokio::task::spawn_blocking(move || {
        let chunk = vec![b' '; 1 << 20];
        // Declared length over the limit: refused from the headers, then read to its end.
        let mut s = std::net::TcpStream::connect(addr).unwrap();
        s.set_read_timeout(Some(Duration::from_secs(30))).unwrap();
        let head = format!(
            "POST /v1/rerank HTTP/1.1\r\nhost: x\r\ncontent-type: application/json\r\ncontent-length: {}\r\n\r\n",
            20 << 20
        );
        let (status, body) = exchange(&mut s, &head, &mut std::iter::repeat_n(&chunk[..], 20));
        assert_eq!(status, 413, "{body}");
        let v: Value = serde_json::from_str(&body).unwrap();
        assert_eq!(v["error"]["code"], "body_too_large");
        // The same connection is still good.
        let ok = r#"{"algorithm":"relevance","candidates":[{"id":"a","score":1}]}"#;
        let head = format!(
            "POST /v1/rerank HTTP/1.1\r\nhost: x\r\ncontent-type: application/json\r\ncontent-length: {}\r\n\r\n",
            ok.len()
        );
        let (status, body) = exchange(&mut s, &head, &mut std::iter::once(ok.as_bytes()));
        assert_eq!(status, 200, "{body}");

        // Chunked, so the limit is only known mid-body: same answer.
        let mut s = std::net::TcpStream::connect(addr).unwrap();
        s.set_read_timeout(Some(Duration::from_secs(30))).unwrap();
        let framed: Vec<u8> = [format!("{:x}\r\n", chunk.len()).as_bytes(), &chunk[..], b"\r\n"].concat();
        let head = "POST /v1/rerank HTTP/1.1\r\nhost: x\r\ncontent-type: application/json\r\ntransfer-encoding: chunked\r\n\r\n";
        let mut frames = std::iter::repeat_n(&framed[..], 20).chain(std::iter::once(&b"0\r\n\r\n"[..]));
        let (status, body) = exchange(&mut s, head, &mut frames);
        assert_eq!(status, 413, "{body}");

        // A wrong content type with a body sent in full: 415, read by the client.
        let mut s = std::net::TcpStream::connect(addr).unwrap();
        s.set_read_timeout(Some(Duration::from_secs(30))).unwrap();
        let head = format!(
            "POST /v1/rerank HTTP/1.1\r\nhost: x\r\ncontent-type: text/plain\r\ncontent-length: {}\r\n\r\n",
            4 << 20
        );
        let (status, _) = exchange(&mut s, &head, &mut std::iter::repeat_n(&chunk[..], 4));
        assert_eq!(status, 415);

        // A client that asks for 100 Continue gets the 413 without sending the body.
        let mut s = std::net::TcpStream::connect(addr).unwrap();
        s.set_read_timeout(Some(Duration::from_secs(30))).unwrap();
        let head = format!(
            "POST /v1/rerank HTTP/1.1\r\nhost: x\r\ncontent-type: application/json\r\nexpect: 100-continue\r\ncontent-length: {}\r\n\r\n",
            20 << 20
        );
        let (status, _) = exchange(&mut s, &head, &mut std::iter::empty());
        assert_eq!(status, 413);
    })
    .await
    .unwrap();
    server.stop().await;
}

/// A valid re-rank request padded with trailing whitespace to exactly `size` bytes.
fn padded_request(size: usize) -> Vec<u8> {
    let mut rng = common::Rng(13);
    let mut text = String::from("{\"algorithm\":\"dpp\",\"k\":10,\"candidates\":[");
    let mut i = 0;
    // Candidates of 256 dimensions (about 2.7 KB of JSON each) until the next one would not fit.
    while text.len() + 3_000 < size - 2 {
        if i > 0 {
            text.push(',');
        }
        text.push_str(&format!("{{\"id\":\"item-{i}\",\"score\":{:.6},\"embedding\":[", rng.unit()));
        for j in 0..256 {
            text.push_str(if j == 0 { "" } else { "," });
            text.push_str(&format!("{:.6}", rng.normal()));
        }
        text.push_str("]}");
        i += 1;
    }
    text.push_str("]}");
    let mut bytes = text.into_bytes();
    bytes.resize(size, b' ');
    bytes
}

/// Peak resident set of a process, from /proc (Linux).
fn peak_rss_bytes(pid: u32) -> u64 {
    let status = std::fs::read_to_string(format!("/proc/{pid}/status")).unwrap();
    let kib: u64 = status
        .lines()
        .find_map(|l| l.strip_prefix("VmHWM:"))
        .and_then(|v| v.split_whitespace().next())
        .and_then(|v| v.parse().ok())
        .unwrap();
    kib * 1024
}

/// Issue 13, item 3: `max_in_flight` × `max_body_bytes` let 60 slow clients each holding 15 MiB
/// of body push the process to 1.1 GiB. Bodies now reserve against
/// `server.max_inflight_body_bytes` (default 256 MiB): past it, 503 `overloaded` at once. The
/// built binary, so the peak RSS measured is the server's alone.
#[cfg(target_os = "linux")]
#[test]
fn issue13_3_sixty_clients_holding_15_mib_bodies_stay_within_512_mib() {
    use common::process::{spawn_server, tempdir, KillOnDrop};
    use std::io::Write;
    const CLIENTS: usize = 60;
    const SIZE: usize = 15 << 20;
    let dir = tempdir("body-budget");
    let config = dir.join("medley.toml");
    std::fs::write(
        &config,
        "[server]\nbody_timeout_ms = 60000\nrequest_timeout_ms = 60000\n[slices.default]\nalgorithm = \"dpp\"\nlambda = 0.3\nk = 10\n",
    )
    .unwrap();
    let (mut child, public, _admin) = spawn_server(&["--config", config.to_str().unwrap()], &[]);
    let _guard = KillOnDrop(child.id());
    let pid = child.id();
    let body = std::sync::Arc::new(padded_request(SIZE));
    let held = std::sync::Arc::new(std::sync::Barrier::new(CLIENTS + 1));
    let clients: Vec<_> = (0..CLIENTS)
        .map(|_| {
            let (body, held, public) = (body.clone(), held.clone(), public.clone());
            std::thread::spawn(move || {
                let mut s = std::net::TcpStream::connect(&public).unwrap();
                s.set_read_timeout(Some(Duration::from_secs(120))).unwrap();
                let head = format!(
                    "POST /v1/rerank HTTP/1.1\r\nhost: x\r\ncontent-type: application/json\r\ncontent-length: {SIZE}\r\n\r\n"
                );
                s.write_all(head.as_bytes()).unwrap();
                // All but the last byte, then hold the body until every client holds its own.
                s.write_all(&body[..SIZE - 1]).unwrap();
                held.wait();
                s.write_all(&body[SIZE - 1..]).unwrap();
                read_answer(&mut s)
            })
        })
        .collect();
    held.wait();
    let answers: Vec<(u16, String)> = clients.into_iter().map(|c| c.join().unwrap()).collect();
    let peak = peak_rss_bytes(pid);
    let served = answers.iter().filter(|(s, _)| *s == 200).count();
    let shed = answers.iter().filter(|(s, b)| *s == 503 && b.contains("\"overloaded\"")).count();
    println!("60 clients x 15 MiB: {served} served, {shed} refused 503, peak RSS {} MiB", peak >> 20);
    assert_eq!(
        served + shed,
        CLIENTS,
        "every client reads an answer: {:?}",
        answers.iter().map(|a| a.0).collect::<Vec<_>>()
    );
    assert!(served >= 16, "the budget holds 17 bodies of 15 MiB: {served} served");
    assert!(peak <= 512 << 20, "peak RSS {} MiB", peak >> 20);

    // Business as usual afterwards.
    let mut s = std::net::TcpStream::connect(&public).unwrap();
    s.set_read_timeout(Some(Duration::from_secs(30))).unwrap();
    let ok = padded_request(200_000);
    let head = format!(
        "POST /v1/rerank HTTP/1.1\r\nhost: x\r\ncontent-type: application/json\r\ncontent-length: {}\r\n\r\n",
        ok.len()
    );
    assert_eq!(exchange(&mut s, &head, &mut std::iter::once(&ok[..])).0, 200);
    let kill = std::process::Command::new("kill").args(["-TERM", &pid.to_string()]).status().unwrap();
    assert!(kill.success());
    assert_eq!(child.wait().unwrap().code(), Some(0));
}
