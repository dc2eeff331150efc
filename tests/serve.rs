//! The sidecar over real gRPC on an ephemeral loopback port.

use crate::support::{binary_isotonic_map, map, temperature_map, Sidecar};
use candor::method::{
    BetaCalibration, Histogram, InputForm, MatrixScaling, Method, OneVsRest, Platt, VectorScaling,
    Workspace,
};
use candor::proto::v1::calibrate_result::Outcome;
use candor::proto::v1::{
    CalibrateBatchRequest, CalibrateRequest, Decision, GetDecisionCountsRequest, ListMapsRequest,
};
use tonic::Code;
use tonic_health::pb::health_check_response::ServingStatus;
use tonic_health::pb::health_client::HealthClient;
use tonic_health::pb::HealthCheckRequest;

fn req(model: &str, logits: &[f32]) -> CalibrateRequest {
    CalibrateRequest {
        model: model.into(),
        logits: logits.to_vec(),
        request_id: "r-1".into(),
        ..CalibrateRequest::default()
    }
}

/// Maps of several kinds for K = 4, each with a threshold of 0.5.
fn four_class_maps() -> Vec<candor::mapfile::CalibrationMap> {
    let k = 4;
    let platt = Platt::try_new(-1.2, 0.3, "m").unwrap();
    let hist = Histogram::try_new(vec![0.0, 0.25, 0.5, 1.0], vec![0.1, 0.4, 0.9], "m").unwrap();
    let beta = BetaCalibration::try_new(0.8, 1.3, 0.2, 1e-12, "m").unwrap();
    vec![
        map("identity", k, InputForm::Logits, Method::Identity, 0.5),
        map(
            "vector",
            k,
            InputForm::Logits,
            Method::Vector(
                VectorScaling::try_new(k, vec![0.5, 1.0, 2.0, 0.7], vec![0.1, 0.0, -0.2, 0.3], "m")
                    .unwrap(),
            ),
            0.5,
        ),
        map(
            "matrix",
            k,
            InputForm::Logits,
            Method::Matrix(
                MatrixScaling::try_new(
                    k,
                    vec![
                        vec![0.9, 0.1, 0.0, 0.0],
                        vec![0.0, 1.1, 0.2, 0.0],
                        vec![0.0, 0.0, 0.7, 0.1],
                        vec![0.3, 0.0, 0.0, 1.0],
                    ],
                    vec![0.0, 0.1, 0.2, -0.3],
                    "m",
                )
                .unwrap(),
            ),
            0.5,
        ),
        map(
            "platt",
            k,
            InputForm::Logits,
            Method::Platt(OneVsRest::try_new(k, vec![platt; 4], "m").unwrap()),
            0.5,
        ),
        map(
            "histogram",
            k,
            InputForm::Logits,
            Method::Histogram(OneVsRest::try_new(k, vec![hist; 4], "m").unwrap()),
            0.5,
        ),
        map(
            "beta",
            k,
            InputForm::Logits,
            Method::Beta(OneVsRest::try_new(k, vec![beta; 4], "m").unwrap()),
            0.5,
        ),
    ]
}

#[tokio::test]
async fn calibrate_answers_what_the_map_gives_offline() {
    let mut maps = four_class_maps();
    maps.push(temperature_map());
    maps.push(binary_isotonic_map());
    let sidecar = Sidecar::with_maps(maps.clone()).await;
    let mut client = sidecar.client().await;
    let rows: [&[f32]; 3] = [
        &[2.0, -1.0, 0.5, 0.0],
        &[0.1, 0.2, 0.3, 9.0],
        &[-5.0, 4.0, 4.0, 1.0],
    ];
    let mut ws = Workspace::new();
    for m in &maps {
        for row in rows {
            let logits: Vec<f32> = row.iter().copied().cycle().take(m.input_len()).collect();
            let got = client
                .calibrate(req(m.model(), &logits))
                .await
                .unwrap()
                .into_inner();
            let q = ws
                .apply(m.method(), m.input(), m.classes(), &logits)
                .to_vec();
            let want: Vec<f32> = q.iter().map(|&v| v as f32).collect();
            assert_eq!(got.probabilities, want, "{}", m.model());
            let sum: f32 = got.probabilities.iter().sum();
            assert!((sum - 1.0).abs() < 1e-5, "{} sums to {sum}", m.model());
            let best = candor::numeric::argmax(&q);
            assert_eq!(got.predicted_class as usize, best);
            assert_eq!(got.confidence, q[best] as f32);
            let threshold = m.policy().global_threshold().unwrap();
            let decision = if q[best] >= threshold {
                Decision::Accept
            } else {
                Decision::Defer
            };
            assert_eq!(got.decision, decision as i32, "{}", m.model());
            assert_eq!(got.threshold, threshold as f32);
            assert_eq!(got.map_version, m.map_version());
            assert_eq!(got.request_id, "r-1");
        }
    }
    sidecar.stop().await;
}

#[tokio::test]
async fn temperature_map_matches_scipy_softmax() {
    // scipy.special.softmax(np.array([2.0, -1.0, 0.5]) / 2.0)
    //   = [0.5897976636568125, 0.13160164714691433, 0.278600689196273] (scipy 1.17.1).
    let sidecar = Sidecar::with_maps(vec![temperature_map()]).await;
    let mut client = sidecar.client().await;
    let r = client
        .calibrate(req("triage", &[2.0, -1.0, 0.5]))
        .await
        .unwrap()
        .into_inner();
    for (got, want) in r.probabilities.iter().zip([
        0.5897976636568125f64,
        0.13160164714691433,
        0.278600689196273,
    ]) {
        assert!((f64::from(*got) - want).abs() < 1e-7, "{got} vs {want}");
    }
    assert_eq!(r.predicted_class, 0);
    assert_eq!(r.decision, Decision::Defer as i32, "0.5898 < 0.6");
    sidecar.stop().await;
}

#[tokio::test]
async fn top_k_returns_the_largest_with_their_classes() {
    let sidecar = Sidecar::with_maps(vec![temperature_map()]).await;
    let mut client = sidecar.client().await;
    let mut r = req("triage", &[2.0, -1.0, 0.5]);
    r.top_k = 2;
    let got = client.calibrate(r).await.unwrap().into_inner();
    assert_eq!(got.classes, [0, 2]);
    assert_eq!(got.probabilities.len(), 2);
    assert!(got.probabilities[0] >= got.probabilities[1]);
    assert_eq!(got.probabilities[0], got.confidence);
    sidecar.stop().await;
}

#[tokio::test]
async fn bad_requests_get_the_documented_status() {
    let sidecar = Sidecar::with_maps(vec![temperature_map(), binary_isotonic_map()]).await;
    let mut client = sidecar.client().await;
    let cases: Vec<(CalibrateRequest, Code, &str)> = vec![
        (
            req("triage", &[]),
            Code::InvalidArgument,
            "logits is empty; expected 3",
        ),
        (
            req("triage", &[1.0, 2.0]),
            Code::InvalidArgument,
            "expected 3 logits, got 2",
        ),
        (
            req("triage", &[1.0, f32::NAN, 0.0]),
            Code::InvalidArgument,
            "logits[1] is NaN",
        ),
        (
            req("triage", &[1.0, 0.0, f32::INFINITY]),
            Code::InvalidArgument,
            "logits[2] is inf",
        ),
        (
            req("spam", &[0.2, 0.8]),
            Code::InvalidArgument,
            "expected 1 logits, got 2",
        ),
        (
            req("nobody", &[1.0, 2.0, 3.0]),
            Code::NotFound,
            "no map for model \"nobody\" (loaded: spam, triage)",
        ),
        (
            req("", &[1.0, 2.0, 3.0]),
            Code::InvalidArgument,
            "2 models are loaded",
        ),
    ];
    for (r, code, text) in cases {
        let status = client.calibrate(r).await.unwrap_err();
        assert_eq!(status.code(), code, "{}", status.message());
        assert!(
            status.message().contains(text),
            "{:?} lacks {text:?}",
            status.message()
        );
    }
    // Nothing refused was counted.
    let counts = client
        .get_decision_counts(GetDecisionCountsRequest {})
        .await
        .unwrap()
        .into_inner();
    assert!(
        counts.counts.iter().all(|c| c.accepted + c.deferred == 0),
        "{counts:?}"
    );
    sidecar.stop().await;
}

#[tokio::test]
async fn no_map_loaded_is_unavailable_and_one_model_needs_no_name() {
    let sidecar = Sidecar::start().await;
    let mut client = sidecar.client().await;
    let status = client
        .calibrate(req("triage", &[1.0, 2.0, 3.0]))
        .await
        .unwrap_err();
    assert_eq!(status.code(), Code::Unavailable);
    assert!(status.message().contains("no map is loaded"));
    sidecar.registry.publish(vec![temperature_map()]);
    let ok = client
        .calibrate(req("", &[1.0, 2.0, 3.0]))
        .await
        .unwrap()
        .into_inner();
    assert_eq!(ok.map_version, "triage-v1");
    sidecar.stop().await;
}

#[tokio::test]
async fn a_bad_row_fails_alone_in_a_batch_and_a_stream() {
    let sidecar = Sidecar::with_maps(vec![temperature_map()]).await;
    let mut client = sidecar.client().await;
    let rows = vec![
        req("triage", &[3.0, 0.0, 0.0]),
        req("triage", &[1.0]),
        req("elsewhere", &[1.0, 0.0, 0.0]),
        req("triage", &[0.0, 0.0, 5.0]),
    ];
    let batch = client
        .calibrate_batch(CalibrateBatchRequest { rows: rows.clone() })
        .await
        .unwrap()
        .into_inner();
    let stream = client
        .calibrate_stream(tokio_stream::iter(rows))
        .await
        .unwrap()
        .into_inner();
    let streamed: Vec<_> = tokio_stream::StreamExt::collect::<Vec<_>>(stream).await;
    let streamed: Vec<_> = streamed.into_iter().map(|r| r.unwrap()).collect();
    for results in [batch.results, streamed] {
        assert_eq!(results.len(), 4);
        let kinds: Vec<_> = results
            .iter()
            .map(|r| match r.outcome.as_ref().unwrap() {
                Outcome::Response(resp) => format!("ok {}", resp.predicted_class),
                Outcome::Error(e) => format!("err {} {} at {}", e.code, e.message, e.index),
            })
            .collect();
        assert_eq!(kinds[0], "ok 0");
        assert_eq!(
            kinds[1],
            format!(
                "err {} expected 3 logits, got 1 at 1",
                Code::InvalidArgument as i32
            )
        );
        assert!(
            kinds[2].starts_with(&format!("err {} no map for model", Code::NotFound as i32)),
            "{}",
            kinds[2]
        );
        assert_eq!(kinds[3], "ok 2");
    }
    sidecar.stop().await;
}

#[tokio::test]
async fn list_maps_and_decision_counts_report_what_was_served() {
    let sidecar = Sidecar::with_maps(vec![temperature_map(), binary_isotonic_map()]).await;
    let mut client = sidecar.client().await;
    // T = 2: [8, 0, 0] → confidence 0.964 (accept at 0.6); [0, 0, 0] → 1/3 (defer).
    for logits in [[8.0, 0.0, 0.0], [8.0, 0.0, 0.0], [0.0, 0.0, 0.0]] {
        client.calibrate(req("triage", &logits)).await.unwrap();
    }
    let maps = client
        .list_maps(ListMapsRequest {})
        .await
        .unwrap()
        .into_inner()
        .maps;
    assert_eq!(maps.len(), 2);
    let spam = &maps[0];
    assert_eq!(
        (
            spam.model.as_str(),
            spam.classes,
            spam.input_len,
            spam.method.as_str()
        ),
        ("spam", 2, 1, "isotonic")
    );
    let triage = &maps[1];
    assert_eq!(triage.model, "triage");
    assert_eq!(triage.threshold, Some(0.6));
    assert_eq!(triage.digest, temperature_map().digest());
    assert_eq!((triage.accepted, triage.deferred), (2, 1));
    let counts = client
        .get_decision_counts(GetDecisionCountsRequest {})
        .await
        .unwrap()
        .into_inner()
        .counts;
    let t = counts.iter().find(|c| c.model == "triage").unwrap();
    assert_eq!(
        (t.map_version.as_str(), t.accepted, t.deferred),
        ("triage-v1", 2, 1)
    );
    sidecar.stop().await;
}

#[tokio::test]
async fn health_turns_serving_only_once_maps_are_loaded() {
    let sidecar = Sidecar::start().await;
    let mut health = HealthClient::new(sidecar.channel().await);
    for service in ["", "candor.v1.Calibrator"] {
        let r = health
            .check(HealthCheckRequest {
                service: service.into(),
            })
            .await
            .unwrap();
        assert_eq!(
            r.into_inner().status,
            ServingStatus::NotServing as i32,
            "{service:?}"
        );
    }
    let mut watch = health
        .watch(HealthCheckRequest {
            service: "candor.v1.Calibrator".into(),
        })
        .await
        .unwrap()
        .into_inner();
    let first = watch.message().await.unwrap().unwrap();
    assert_eq!(first.status, ServingStatus::NotServing as i32);
    sidecar.registry.publish(vec![temperature_map()]);
    sidecar.registry.mark_ready();
    let next = watch.message().await.unwrap().unwrap();
    assert_eq!(next.status, ServingStatus::Serving as i32);
    drop(watch);
    sidecar.stop().await;
}

#[tokio::test]
async fn reflection_lists_the_services() {
    use tonic_reflection::pb::v1::server_reflection_client::ServerReflectionClient;
    use tonic_reflection::pb::v1::server_reflection_request::MessageRequest;
    use tonic_reflection::pb::v1::server_reflection_response::MessageResponse;
    use tonic_reflection::pb::v1::ServerReflectionRequest;
    let sidecar = Sidecar::with_maps(vec![temperature_map()]).await;
    let mut client = ServerReflectionClient::new(sidecar.channel().await);
    let request = ServerReflectionRequest {
        host: String::new(),
        message_request: Some(MessageRequest::ListServices(String::new())),
    };
    let mut responses = client
        .server_reflection_info(tokio_stream::iter(vec![request]))
        .await
        .unwrap()
        .into_inner();
    let reply = responses.message().await.unwrap().unwrap();
    let Some(MessageResponse::ListServicesResponse(list)) = reply.message_response else {
        panic!("unexpected reflection reply {reply:?}");
    };
    let names: Vec<_> = list.service.into_iter().map(|s| s.name).collect();
    assert!(
        names.contains(&"candor.v1.Calibrator".to_owned()),
        "{names:?}"
    );
    assert!(
        names.contains(&"grpc.health.v1.Health".to_owned()),
        "{names:?}"
    );
    drop(responses);
    sidecar.stop().await;
}

#[tokio::test]
async fn shutdown_ends_an_open_stream_with_unavailable_after_answering_what_it_read() {
    let mut sidecar = Sidecar::with_maps(vec![temperature_map()]).await;
    let mut client = sidecar.client().await;
    let (tx, rx) = tokio::sync::mpsc::channel::<CalibrateRequest>(4);
    let mut responses = client
        .calibrate_stream(tokio_stream::wrappers::ReceiverStream::new(rx))
        .await
        .unwrap()
        .into_inner();
    tx.send(req("triage", &[1.0, 0.0, 0.0])).await.unwrap();
    let r = responses.message().await.unwrap().unwrap();
    assert!(matches!(r.outcome, Some(Outcome::Response(_))));
    // Shutdown begins while the stream is open: it ends with UNAVAILABLE, so the caller knows
    // every row without an answer was not processed and can send it elsewhere.
    sidecar.begin_stop();
    let _ = tx.send(req("triage", &[0.0, 1.0, 0.0])).await;
    let end = responses.message().await.unwrap_err();
    assert_eq!(end.code(), tonic::Code::Unavailable, "{end:?}");
    assert_eq!(
        sidecar.registry.decision_counts()[0].2 + sidecar.registry.decision_counts()[0].3,
        1,
        "only the answered row was counted"
    );
    drop(tx);
    sidecar.stop().await;
}
