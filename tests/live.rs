//! Live quality of a running sidecar: a simulated stream through the real `candor serve`, with
//! labels returned for deferred items and the audit sample, read back from `/status`, the
//! candor_live_* gauges and `candor status`.

use crate::rollout::{logged_addr, spawn_serve_logged, Served};
use crate::support::{candor, connect_when_serving, http_get, repo, series, terminate};
use candor::live::{DriftLevel, LiveQuality, Promise};
use candor::proto::v1::calibrator_client::CalibratorClient;
use candor::proto::v1::{CalibrateRequest, Decision, OutcomeRequest};

/// Items sent per phase; the decision window holds the last [`WINDOW`] of them.
const ITEMS: usize = 2_500;
const WINDOW: usize = 2_000;
/// Audit rate of the simulation (the demo map's own is 5%; more audits give a tighter check).
const AUDIT_RATE: &str = "0.25";

/// The demo scenario's traffic letters: logits and true labels.
fn traffic() -> Vec<(Vec<f32>, u32)> {
    std::fs::read_to_string(repo("demo-data/traffic.jsonl"))
        .unwrap()
        .lines()
        .map(|l| {
            let v: serde_json::Value = serde_json::from_str(l).unwrap();
            let logits = v["logits"]
                .as_array()
                .unwrap()
                .iter()
                .map(|x| x.as_f64().unwrap() as f32)
                .collect();
            (logits, v["label"].as_u64().unwrap() as u32)
        })
        .collect()
}

/// What one phase measured: the sidecar's view and the truth it should cover.
struct Phase {
    quality: LiveQuality,
    true_accepted_accuracy: f64,
    status_text: String,
    exposition: String,
}

/// Sends the traffic with logits multiplied by `sharpen` through a fresh sidecar, returns labels
/// for every deferred and every audited item, and reads the live state back.
async fn phase(sharpen: f32) -> Phase {
    let dir = tempfile::tempdir().unwrap();
    std::fs::copy(
        repo("demo-data/maps/letter-sorter.json"),
        dir.path().join("letter-sorter.json"),
    )
    .unwrap();
    let (Served { child, data, .. }, early) = spawn_serve_logged(
        dir.path(),
        &[
            "--telemetry-listen",
            "127.0.0.1:0",
            "--audit-rate",
            AUDIT_RATE,
            "--quality-window",
            &WINDOW.to_string(),
            "--quality-labels",
            "100000",
        ],
    );
    let telemetry = logged_addr(&early, "telemetry listening").unwrap();
    let mut client = CalibratorClient::new(connect_when_serving(&data).await);
    let (mut accepted, mut right) = (0u32, 0u32);
    for (i, (logits, label)) in traffic().into_iter().take(ITEMS).enumerate() {
        let request_id = format!("letter-{i}");
        let r = client
            .calibrate(CalibrateRequest {
                model: "letter-sorter".into(),
                logits: logits.iter().map(|z| z * sharpen).collect(),
                request_id: request_id.clone(),
                ..CalibrateRequest::default()
            })
            .await
            .unwrap()
            .into_inner();
        let accept = r.decision == Decision::Accept as i32;
        if accept {
            accepted += 1;
            right += u32::from(r.predicted_class == label);
        }
        // People label what was deferred to them, and the audit sample of what was accepted.
        if !accept || r.audit {
            let ack = client
                .record_outcome(OutcomeRequest {
                    request_id,
                    true_label: label,
                })
                .await
                .unwrap()
                .into_inner();
            assert_eq!(ack.correct, r.predicted_class == label);
        }
    }
    let tele = telemetry.clone();
    let (code, body) = tokio::task::spawn_blocking(move || http_get(&tele, "/status"))
        .await
        .unwrap();
    assert_eq!(code, 200, "{body}");
    let doc: serde_json::Value = serde_json::from_str(&body).unwrap();
    let quality: LiveQuality = serde_json::from_value(doc["windows"][0].clone()).unwrap();
    let tele = telemetry.clone();
    let (_, exposition) = tokio::task::spawn_blocking(move || http_get(&tele, "/metrics"))
        .await
        .unwrap();
    let out = candor()
        .args(["status", "--telemetry", &telemetry, "--fail-on-alarm"])
        .output()
        .unwrap();
    let status_text = String::from_utf8(out.stdout).unwrap();
    let alarm = out.status.code() == Some(1);
    assert_eq!(
        alarm,
        quality.promise == Promise::Broken || quality.drift_level.flagged(),
        "{status_text}"
    );
    terminate(child).await;
    Phase {
        quality,
        true_accepted_accuracy: f64::from(right) / f64::from(accepted),
        status_text,
        exposition,
    }
}

fn assert_covers(p: &Phase) {
    let a = p.quality.accepted_accuracy.unwrap();
    assert!(
        a.lower <= p.true_accepted_accuracy && p.true_accepted_accuracy <= a.upper,
        "interval {}–{} (n = {}) misses the true accepted accuracy {}",
        a.lower,
        a.upper,
        a.n,
        p.true_accepted_accuracy
    );
    assert!(a.n >= 100, "audited labels: {}", a.n);
}

#[tokio::test]
async fn live_accuracy_covers_the_truth_and_drift_is_flagged_only_after_a_shift() {
    // Traffic like the calibration data: the estimate covers the truth, no drift is flagged.
    let steady = phase(1.0).await;
    let q = &steady.quality;
    assert_eq!(q.model, "letter-sorter");
    assert_eq!(
        (q.decisions_total, q.window_decisions),
        (ITEMS as u64, WINDOW as u64)
    );
    assert_eq!(q.audit_rate, 0.25);
    assert_covers(&steady);
    assert_eq!(q.drift_level, DriftLevel::Stable, "{}", steady.status_text);
    assert!(
        steady.status_text.contains("No drift"),
        "{}",
        steady.status_text
    );
    assert!(q.deferred_accuracy.unwrap().n > 100);
    let labels = r#"{model="letter-sorter",map_version="2026-12-01.1"}"#;
    assert_eq!(
        series(
            &steady.exposition,
            &format!("candor_live_window_decisions{labels}")
        ),
        Some(WINDOW as f64)
    );
    assert_eq!(
        series(
            &steady.exposition,
            &format!("candor_live_drift_flagged{labels}")
        ),
        Some(0.0)
    );

    // The model server starts sending sharper logits (an overconfident new model build): the
    // confidence distribution moves, more is accepted and accuracy on accepted items falls.
    let shifted = phase(3.0).await;
    let q = &shifted.quality;
    assert_covers(&shifted);
    assert!(
        q.drift_level.flagged(),
        "{:?}\n{}",
        q.drift,
        shifted.status_text
    );
    assert!(
        shifted.status_text.contains("DRIFT"),
        "{}",
        shifted.status_text
    );
    assert!(q.automation_rate.unwrap() > steady.quality.automation_rate.unwrap());
    assert!(
        shifted.true_accepted_accuracy < steady.true_accepted_accuracy,
        "{} vs {}",
        shifted.true_accepted_accuracy,
        steady.true_accepted_accuracy
    );
    assert_eq!(
        series(
            &shifted.exposition,
            &format!("candor_live_drift_flagged{labels}")
        ),
        Some(1.0)
    );
    // What `candor status` says about the promise matches the state in the JSON.
    let head = match q.promise {
        Promise::Kept => "PROMISE KEPT",
        Promise::Broken => "PROMISE BROKEN",
        _ => "NOT YET KNOWN",
    };
    assert!(
        shifted.status_text.contains(head),
        "{}",
        shifted.status_text
    );
}

/// Temperature of a map file.
fn temperature_of(path: &std::path::Path) -> f64 {
    let v: serde_json::Value = serde_json::from_slice(&std::fs::read(path).unwrap()).unwrap();
    v["method"]["temperature"].as_f64().unwrap()
}

#[tokio::test]
async fn a_map_refitted_from_the_journal_weights_audits_and_passes_check() {
    let maps = tempfile::tempdir().unwrap();
    std::fs::copy(
        repo("demo-data/maps/letter-sorter.json"),
        maps.path().join("letter-sorter.json"),
    )
    .unwrap();
    let journal = tempfile::tempdir().unwrap();
    let jdir = journal.path().to_str().unwrap().to_owned();
    let (Served { child, data, .. }, _) = spawn_serve_logged(
        maps.path(),
        &[
            "--journal-dir",
            &jdir,
            "--audit-rate",
            AUDIT_RATE,
            "--journal-fsync",
        ],
    );
    let mut client = CalibratorClient::new(connect_when_serving(&data).await);
    let rows = traffic();
    let mut all = String::new();
    for (i, (logits, label)) in rows.iter().enumerate() {
        let request_id = format!("letter-{i}");
        let r = client
            .calibrate(CalibrateRequest {
                model: "letter-sorter".into(),
                logits: logits.clone(),
                request_id: request_id.clone(),
                ..CalibrateRequest::default()
            })
            .await
            .unwrap()
            .into_inner();
        if r.decision != Decision::Accept as i32 || r.audit {
            let ack = client
                .record_outcome(OutcomeRequest {
                    request_id,
                    true_label: *label,
                })
                .await
                .unwrap()
                .into_inner();
            assert!(ack.journaled);
        }
        let z: Vec<String> = logits.iter().map(|v| format!("{v:?}")).collect();
        all.push_str(&format!(
            "{{\"logits\": [{}], \"label\": {label}}}\n",
            z.join(", ")
        ));
    }
    terminate(child).await;

    let out = tempfile::tempdir().unwrap();
    let refit = out.path().join("refit.json");
    let run = candor()
        .args([
            "fit",
            "--journal",
            &jdir,
            "--model",
            "letter-sorter",
            "--map-version",
            "refit-1",
        ])
        .args(["--target-accuracy", "0.95", "--out"])
        .arg(&refit)
        .output()
        .unwrap();
    assert!(
        run.status.success(),
        "{}",
        String::from_utf8_lossy(&run.stderr)
    );
    let check = candor().arg("check").arg(&refit).output().unwrap();
    assert_eq!(
        check.status.code(),
        Some(0),
        "{}",
        String::from_utf8_lossy(&check.stdout)
    );
    let doc: serde_json::Value = serde_json::from_slice(&std::fs::read(&refit).unwrap()).unwrap();
    assert_eq!(doc["policy"]["audit_rate"], 0.25);
    assert_eq!(
        doc["policy"]["evidence"]["procedure"],
        "fixed-sequence-stratified"
    );
    assert!(doc["provenance"]["reference"]["edges"].is_array());

    // What a fit on every label would give (nobody has those in production): the weighted refit
    // on a 70% split of the labelled items lands near it. Measured here: all labels T ≈ 2.40,
    // journal refit ≈ 2.34; the tolerance allows for the weighted fit's larger sampling error.
    let full_data = out.path().join("all.jsonl");
    std::fs::write(&full_data, all).unwrap();
    let full = out.path().join("full.json");
    let run = candor()
        .args([
            "fit",
            "--model",
            "letter-sorter",
            "--map-version",
            "full",
            "--data",
        ])
        .arg(&full_data)
        .arg("--out")
        .arg(&full)
        .output()
        .unwrap();
    assert!(
        run.status.success(),
        "{}",
        String::from_utf8_lossy(&run.stderr)
    );
    let (t_full, t_refit) = (temperature_of(&full), temperature_of(&refit));
    assert!(
        (t_refit - t_full).abs() < 0.1,
        "journal refit T {t_refit}, all-labels T {t_full}"
    );
    // The records carry the audit rate the weights come from.
    let records = candor::journal::read_journal(journal.path())
        .unwrap()
        .records;
    assert!(records.iter().any(|r| matches!(
        r,
        candor::journal::Record::Decision { audit_rate, .. } if *audit_rate == 0.25
    )));
}
