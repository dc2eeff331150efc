//! Telemetry of a running `candor serve`: the Prometheus scrape, /ready and /live, and the
//! audit sample.

use crate::rollout::{logged_addr, spawn_serve_logged, Served};
use crate::support::{
    connect_when_serving, http_get, series, signal, terminate, versioned_map, write_atomically,
};
use candor::proto::v1::calibrator_client::CalibratorClient;
use candor::proto::v1::CalibrateRequest;

/// Audit share asked of the sidecar in this test.
const AUDIT_RATE: f64 = 0.3;
const REQUESTS: usize = 400;

#[tokio::test]
async fn metrics_count_what_was_answered_refused_and_audited() {
    let dir = tempfile::tempdir().unwrap();
    write_atomically(
        &dir.path().join("triage/v1.json"),
        versioned_map("triage", "v1", 3, 1.0).to_json().as_bytes(),
    );
    // A file that fails keeps /ready at 503 until it is fixed or removed.
    std::fs::write(dir.path().join("broken.json"), "{").unwrap();
    let (
        Served {
            child, data, logs, ..
        },
        early,
    ) = spawn_serve_logged(
        dir.path(),
        &[
            "--telemetry-listen",
            "127.0.0.1:0",
            "--audit-rate",
            &AUDIT_RATE.to_string(),
            "--rescan-secs",
            "3600",
        ],
    );
    let telemetry = logged_addr(&early, "telemetry listening").expect("telemetry address logged");
    let tele = telemetry.clone();
    let (live, _) = tokio::task::spawn_blocking(move || http_get(&tele, "/live"))
        .await
        .unwrap();
    assert_eq!(live, 200);
    let tele = telemetry.clone();
    let (code, why) = tokio::task::spawn_blocking(move || http_get(&tele, "/ready"))
        .await
        .unwrap();
    assert_eq!(code, 503, "{why}");
    assert!(why.contains("broken.json"), "{why}");
    std::fs::remove_file(dir.path().join("broken.json")).unwrap();
    // SIGHUP forces the rescan that clears it.
    signal(&child, "-HUP");

    // Health turns SERVING once the rescan has cleared the broken file.
    let mut client = CalibratorClient::new(connect_when_serving(&data).await);
    let (mut accepted, mut deferred, mut audited) = (0, 0, 0);
    for i in 0..REQUESTS {
        let x = (i % 7) as f32;
        let r = client
            .calibrate(CalibrateRequest {
                model: "triage".into(),
                logits: vec![x, 0.0, 1.0],
                request_id: format!("req-{i}"),
                ..CalibrateRequest::default()
            })
            .await
            .unwrap()
            .into_inner();
        if r.decision == candor::proto::v1::Decision::Accept as i32 {
            accepted += 1;
            audited += u32::from(r.audit);
        } else {
            deferred += 1;
            assert!(!r.audit, "deferred items are never in the audit sample");
        }
    }
    let bad = client
        .calibrate(CalibrateRequest {
            model: "triage".into(),
            logits: vec![1.0],
            ..CalibrateRequest::default()
        })
        .await
        .unwrap_err();
    assert_eq!(bad.code(), tonic::Code::InvalidArgument);
    // The audit share among accepted items: binomial(accepted, 0.3), within 5 standard errors.
    let share = f64::from(audited) / f64::from(accepted);
    let se = (AUDIT_RATE * (1.0 - AUDIT_RATE) / f64::from(accepted)).sqrt();
    assert!(
        (share - AUDIT_RATE).abs() < 5.0 * se,
        "{share} of {accepted}"
    );

    let tele = telemetry.clone();
    let (code, text) = tokio::task::spawn_blocking(move || http_get(&tele, "/metrics"))
        .await
        .unwrap();
    assert_eq!(code, 200);
    let labels = |d: &str| format!("{{model=\"triage\",map_version=\"v1\",decision=\"{d}\"}}");
    assert_eq!(
        series(&text, &format!("candor_requests_total{}", labels("accept"))),
        Some(f64::from(accepted)),
        "{text}"
    );
    assert_eq!(
        series(&text, &format!("candor_requests_total{}", labels("defer"))),
        Some(f64::from(deferred))
    );
    assert_eq!(
        series(
            &text,
            &format!("candor_audit_samples_total{}", labels("accept"))
        ),
        Some(f64::from(audited))
    );
    assert_eq!(
        series(
            &text,
            "candor_request_errors_total{code=\"InvalidArgument\"}"
        ),
        Some(1.0)
    );
    assert_eq!(
        series(&text, "candor_request_duration_seconds_count"),
        Some(REQUESTS as f64)
    );
    assert_eq!(
        series(&text, "candor_request_duration_seconds_bucket{le=\"+Inf\"}"),
        Some(REQUESTS as f64)
    );
    assert_eq!(
        series(
            &text,
            "candor_map_serving{model=\"triage\",map_version=\"v1\",state=\"active\"}"
        ),
        Some(1.0)
    );
    assert_eq!(series(&text, "candor_map_rejections_total"), Some(1.0));
    assert_eq!(
        series(&text, "candor_ready"),
        Some(1.0),
        "the SIGHUP rescan made it ready"
    );
    assert!(
        text.trim_end().ends_with("# EOF"),
        "OpenMetrics text ends with # EOF"
    );
    let (code, _) = tokio::task::spawn_blocking(move || http_get(&telemetry, "/ready"))
        .await
        .unwrap();
    assert_eq!(code, 200);

    assert_eq!(terminate(child).await, Some(0));
    drop(logs.join());
}
