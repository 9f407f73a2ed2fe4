//! The gRPC front end against the real server, through a real tonic client: the answers equal
//! the JSON API's, every error class comes back with its status code, medley code and path (in
//! a `google.rpc.ErrorInfo`), a bad message mid-stream gets an error reply and the stream goes
//! on, the client's deadline shortens the request's, shedding and draining answer UNAVAILABLE,
//! and health and reflection are served.

mod common;

use std::time::Duration;

use common::server::{post_json, request, Server};
use common::Rng;
use medley::grpc::proto::{self, rerank_stream_reply::Reply, reranker_client::RerankerClient};
use serde_json::{json, Value};
use tonic::transport::Channel;
use tonic::Code;
use tonic_types::StatusExt;

const CONFIG: &str = r#"
[server]
max_body_bytes = 200000
max_in_flight = 2
request_timeout_ms = 5000

[slices.default]
algorithm = "dpp"
lambda = 0.3
k = 5
"#;

async fn client(server: &Server) -> RerankerClient<Channel> {
    RerankerClient::connect(server.grpc.clone()).await.expect("gRPC server answers")
}

/// The proto request of a JSON request (the same fields; embeddings packed).
fn to_proto(body: &Value) -> proto::RerankRequest {
    let s = |k: &str| body[k].as_str().map(String::from);
    proto::RerankRequest {
        request_id: s("request_id"),
        slice: s("slice"),
        algorithm: s("algorithm"),
        unit_id: s("unit_id"),
        k: body["k"].as_u64().map(|k| k as u32),
        lambda: body["lambda"].as_f64(),
        window: body["window"].as_u64().map(|w| w as u32),
        profile: body["profile"]
            .as_object()
            .map(|p| p.iter().map(|(k, v)| (k.clone(), v.as_f64().unwrap())).collect())
            .unwrap_or_default(),
        fairness: None,
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
                    .map(|e| e.iter().map(|x| x.as_f64().unwrap() as f32).collect())
                    .unwrap_or_default(),
                group: None,
            })
            .collect(),
    }
}

/// The medley code and path a status carries in its `ErrorInfo`.
fn info(status: &tonic::Status) -> (String, Option<String>) {
    let details = status.get_error_details();
    let info = details.error_info().expect("an ErrorInfo in the status details");
    assert_eq!(info.domain, "medley");
    (info.reason.clone(), info.metadata.get("path").cloned())
}

#[tokio::test]
async fn grpc_answers_equal_the_json_answers() {
    let server = Server::start(CONFIG).await;
    let mut grpc = client(&server).await;
    let http = reqwest::Client::new();
    let mut rng = Rng(15);
    for (algorithm, extra) in [
        ("dpp", json!({})),
        ("mmr", json!({})),
        ("dpp", json!({"window": 3})),
        ("ssd", json!({"window": 4})),
        ("calibrated", json!({"profile": {"cat-0": 0.7, "cat-1": 0.3}})),
        ("quota", json!({})),
    ] {
        let mut body = request(&mut rng, 60, 8, 4);
        body["algorithm"] = json!(algorithm);
        body["lambda"] = json!(0.6);
        body["k"] = json!(7);
        body["request_id"] = json!(format!("req-{algorithm}"));
        for (k, v) in extra.as_object().unwrap() {
            body[k] = v.clone();
        }
        let (status, want) = post_json(&http, &server.url("/v1/rerank"), &body).await;
        assert_eq!(status, 200, "{want}");
        let got = grpc.rerank(to_proto(&body)).await.expect("served").into_inner();
        let ids: Vec<&str> = got.items.iter().map(|i| i.id.as_str()).collect();
        let want_ids: Vec<&str> =
            want["items"].as_array().unwrap().iter().map(|i| i["id"].as_str().unwrap()).collect();
        assert_eq!(ids, want_ids, "{algorithm}");
        assert_eq!(got.request_id.as_deref(), want["request_id"].as_str());
        assert_eq!(got.slice, want["slice"].as_str().unwrap());
        assert_eq!(got.arm, want["arm"].as_str().unwrap());
        assert_eq!(got.algorithm, want["algorithm"].as_str().unwrap());
        assert_eq!(got.config_generation, want["config_generation"].as_u64().unwrap());
        assert_eq!(got.k, want["k"].as_u64().unwrap());
        assert_eq!(got.lambda.to_bits(), want["lambda"].as_f64().unwrap().to_bits());
        let d = got.diversity.unwrap();
        assert_eq!(
            d.category_entropy_bits.to_bits(),
            want["diversity"]["category_entropy_bits"].as_f64().unwrap().to_bits()
        );
        assert_eq!(d.distinct_categories, want["diversity"]["distinct_categories"].as_u64().unwrap());
        assert_eq!(d.intra_list_distance, want["diversity"]["intra_list_distance"].as_f64());
        assert_eq!(d.miscalibration, want["diversity"]["miscalibration"].as_f64());
        for (i, w) in got.items.iter().zip(want["items"].as_array().unwrap()) {
            assert_eq!(i.score.to_bits(), w["score"].as_f64().unwrap().to_bits());
            assert_eq!(i.category.as_deref(), w["category"].as_str());
        }
    }
    assert!(server.metric_sum("medley_grpc_requests_total{code=\"OK\"}").await >= 6);
    // The shared duration histogram counts gRPC requests too (6 HTTP + 6 gRPC).
    assert!(server.metric_sum("medley_rerank_duration_seconds_count").await >= 12);
}

#[tokio::test]
async fn every_error_class_has_its_status_medley_code_and_path() {
    let server = Server::start(CONFIG).await;
    let mut grpc = client(&server).await;
    let mut rng = Rng(16);
    let good = to_proto(&request(&mut rng, 20, 4, 3));
    let cases: Vec<(&str, proto::RerankRequest, Code, &str, Option<&str>)> = vec![
        (
            "lambda",
            proto::RerankRequest { lambda: Some(2.0), ..good.clone() },
            Code::InvalidArgument,
            "lambda_out_of_range",
            Some("lambda"),
        ),
        (
            "k",
            proto::RerankRequest { k: Some(0), ..good.clone() },
            Code::InvalidArgument,
            "k_out_of_range",
            Some("k"),
        ),
        (
            "algorithm",
            proto::RerankRequest { algorithm: Some("nope".into()), ..good.clone() },
            Code::InvalidArgument,
            "unknown_algorithm",
            Some("algorithm"),
        ),
        (
            "window",
            proto::RerankRequest { window: Some(1), ..good.clone() },
            Code::InvalidArgument,
            "window_out_of_range",
            Some("window"),
        ),
        (
            "non-finite embedding",
            {
                let mut r = good.clone();
                r.candidates[3].embedding[1] = f32::NAN;
                r
            },
            Code::InvalidArgument,
            "non_finite",
            Some("candidates[3].embedding"),
        ),
        (
            "dimension mismatch",
            {
                let mut r = good.clone();
                r.candidates[2].embedding.push(0.5);
                r
            },
            Code::InvalidArgument,
            "dimension_mismatch",
            Some("candidates[2].embedding"),
        ),
        (
            "calibrated without a profile",
            proto::RerankRequest { algorithm: Some("calibrated".into()), ..good.clone() },
            Code::InvalidArgument,
            "missing_profile",
            Some("profile"),
        ),
        (
            "over max_body_bytes",
            to_proto(&request(&mut rng, 400, 128, 3)),
            Code::ResourceExhausted,
            "body_too_large",
            None,
        ),
    ];
    for (what, req, code, medley_code, path) in cases {
        let status = grpc.rerank(req).await.expect_err(what);
        assert_eq!(status.code(), code, "{what}: {status:?}");
        let (reason, got_path) = info(&status);
        assert_eq!(reason, medley_code, "{what}");
        assert_eq!(got_path.as_deref(), path, "{what}");
        // The code is in the message too, for clients that read only that.
        assert!(status.message().starts_with(medley_code), "{what}: {}", status.message());
    }
    // The same request over HTTP gives the same code and path (one spot check).
    let mut body = request(&mut Rng(17), 5, 4, 2);
    body["lambda"] = json!(2.0);
    let (status, v) = post_json(&reqwest::Client::new(), &server.url("/v1/rerank"), &body).await;
    assert_eq!(
        (status, v["error"]["code"].as_str(), v["error"]["path"].as_str()),
        (422, Some("lambda_out_of_range"), Some("lambda"))
    );
    assert!(server.metric_sum("medley_grpc_requests_total{code=\"INVALID_ARGUMENT\"}").await >= 7);
    assert!(server.metric_sum("medley_grpc_requests_total{code=\"RESOURCE_EXHAUSTED\"}").await >= 1);
}

#[tokio::test]
async fn a_bad_message_mid_stream_gets_an_error_reply_and_the_stream_goes_on() {
    let server = Server::start(CONFIG).await;
    let mut grpc = client(&server).await;
    let mut rng = Rng(18);
    let mut messages = Vec::new();
    for i in 0..5 {
        let mut r = to_proto(&request(&mut rng, 30, 4, 3));
        r.request_id = Some(format!("line-{i}"));
        if i == 2 {
            r.lambda = Some(-1.0);
        }
        messages.push(r);
    }
    let replies = grpc.rerank_stream(futures_util::stream::iter(messages)).await.expect("stream opens");
    let mut replies = replies.into_inner();
    let mut got = Vec::new();
    while let Some(reply) = replies.message().await.expect("no transport error") {
        got.push(reply.reply.expect("a reply"));
    }
    assert_eq!(got.len(), 5);
    for (i, reply) in got.iter().enumerate() {
        match (i, reply) {
            (2, Reply::Error(e)) => {
                assert_eq!((e.code.as_str(), e.path.as_str(), e.index), ("lambda_out_of_range", "lambda", 2));
                assert!(!e.message.is_empty());
            }
            (_, Reply::Response(r)) if i != 2 => {
                assert_eq!(r.request_id.as_deref(), Some(format!("line-{i}").as_str()), "in order");
                assert_eq!(r.items.len(), 5);
            }
            other => panic!("unexpected reply {other:?}"),
        }
    }
}

#[tokio::test]
async fn the_clients_deadline_shortens_the_requests() {
    let server = Server::start(&CONFIG.replace("max_body_bytes = 200000", "max_body_bytes = 8000000")).await;
    let mut grpc = client(&server).await;
    // A slate that takes far longer than 300 ms (windowed SSD with a long window, the eager
    // loop: N = 3000, d = 32, k = 1000, w = 900, about 5·10^9 multiply-adds).
    let mut body = request(&mut Rng(19), 3000, 32, 5);
    body["k"] = json!(1000);
    body["lambda"] = json!(0.9);
    body["algorithm"] = json!("ssd");
    body["window"] = json!(900);
    let mut req = tonic::Request::new(to_proto(&body));
    req.set_timeout(Duration::from_millis(300));
    let started = std::time::Instant::now();
    let Err(status) = grpc.rerank(req).await else { panic!("served within 300 ms") };
    // The server answers before the client's own timer: its status, with the medley code.
    assert_eq!(status.code(), Code::DeadlineExceeded, "{status:?}");
    assert_eq!(info(&status).0, "deadline_exceeded");
    assert!(started.elapsed() < Duration::from_secs(2));
    // A small slate under the same client deadline is served.
    let mut req = tonic::Request::new(to_proto(&request(&mut Rng(21), 20, 4, 2)));
    req.set_timeout(Duration::from_millis(300));
    assert!(grpc.rerank(req).await.is_ok());
}

#[tokio::test]
async fn shedding_and_draining_answer_unavailable() {
    let server = Server::start(CONFIG).await;
    let mut grpc = client(&server).await;
    let mut rng = Rng(20);
    let one = to_proto(&request(&mut rng, 10, 4, 2));
    // Two open streams hold both permits (max_in_flight = 2) until their senders close.
    let mut senders = Vec::new();
    let mut open = Vec::new();
    for _ in 0..2 {
        let (tx, rx) = tokio::sync::mpsc::channel::<proto::RerankRequest>(4);
        tx.send(one.clone()).await.unwrap();
        let mut c = client(&server).await;
        let mut replies =
            c.rerank_stream(tokio_stream::wrappers::ReceiverStream::new(rx)).await.unwrap().into_inner();
        // The first reply proves the stream holds its permit.
        assert!(matches!(replies.message().await.unwrap().unwrap().reply, Some(Reply::Response(_))));
        senders.push(tx);
        open.push((c, replies));
    }
    let status = grpc.rerank(one.clone()).await.expect_err("no permit left");
    assert_eq!(status.code(), Code::Unavailable);
    assert_eq!(info(&status).0, "overloaded");
    assert!(server.metric_sum("medley_shed_total").await >= 1);

    // Drain: shutdown starts while the streams are open; they are still answered, new calls
    // are refused (UNAVAILABLE), and the server finishes once the streams close.
    server.begin_stop();
    tokio::time::sleep(Duration::from_millis(100)).await;
    for tx in &senders {
        tx.send(one.clone()).await.unwrap();
    }
    for (_, replies) in &mut open {
        let reply = replies.message().await.expect("the open stream is still served").unwrap();
        assert!(matches!(reply.reply, Some(Reply::Response(_))), "{reply:?}");
    }
    let refused = grpc.rerank(one.clone()).await.expect_err("draining");
    assert_eq!(refused.code(), Code::Unavailable, "{refused:?}");
    drop(senders);
    for (_, mut replies) in open {
        assert!(replies.message().await.unwrap().is_none(), "the stream ends when its sender closes");
    }
    server.join().await;
}

#[tokio::test]
async fn health_and_reflection_are_served() {
    use tonic_health::pb::health_check_response::ServingStatus;
    use tonic_health::pb::health_client::HealthClient;
    use tonic_health::pb::HealthCheckRequest;
    use tonic_reflection::pb::v1::server_reflection_client::ServerReflectionClient;
    use tonic_reflection::pb::v1::server_reflection_request::MessageRequest;
    use tonic_reflection::pb::v1::server_reflection_response::MessageResponse;
    use tonic_reflection::pb::v1::ServerReflectionRequest;

    let server = Server::start(CONFIG).await;
    let channel = Channel::from_shared(server.grpc.clone()).unwrap().connect().await.unwrap();
    let mut health = HealthClient::new(channel.clone());
    let status = health
        .check(HealthCheckRequest { service: "medley.v1.Reranker".into() })
        .await
        .unwrap()
        .into_inner()
        .status;
    assert_eq!(status, ServingStatus::Serving as i32);

    let mut reflection = ServerReflectionClient::new(channel);
    let ask = ServerReflectionRequest {
        host: String::new(),
        message_request: Some(MessageRequest::ListServices(String::new())),
    };
    let mut answers =
        reflection.server_reflection_info(futures_util::stream::iter([ask])).await.unwrap().into_inner();
    let answer = answers.message().await.unwrap().unwrap();
    let Some(MessageResponse::ListServicesResponse(list)) = answer.message_response else {
        panic!("{answer:?}")
    };
    let names: Vec<String> = list.service.into_iter().map(|s| s.name).collect();
    assert!(names.contains(&"medley.v1.Reranker".to_owned()), "{names:?}");
    assert!(names.contains(&"grpc.health.v1.Health".to_owned()), "{names:?}");
}
