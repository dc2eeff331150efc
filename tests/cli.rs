//! The real `candor` binary.

use crate::support::{candor, repo, temperature_map, terminate};
use candor::proto::v1::calibrator_client::CalibratorClient;
use candor::proto::v1::CalibrateRequest;
use std::io::{BufRead, BufReader};
use std::process::Stdio;
use tonic_health::pb::health_check_response::ServingStatus;
use tonic_health::pb::health_client::HealthClient;
use tonic_health::pb::HealthCheckRequest;

#[test]
fn check_accepts_a_valid_map_and_lists_every_problem_of_a_bad_one() {
    let dir = tempfile::tempdir().unwrap();
    let good = dir.path().join("good.json");
    std::fs::write(&good, temperature_map().to_json()).unwrap();
    let out = candor().arg("check").arg(&good).output().unwrap();
    assert_eq!(
        out.status.code(),
        Some(0),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let stdout = String::from_utf8(out.stdout).unwrap();
    assert!(stdout.starts_with("ok "), "{stdout}");
    assert!(
        stdout.contains("method temperature, threshold 0.6"),
        "{stdout}"
    );

    let bad = dir.path().join("bad.json");
    let text = temperature_map()
        .to_json()
        .replace("\"temperature\": 2.0", "\"temperature\": -2.0")
        .replace("\"threshold\": 0.6", "\"threshold\": 1.6");
    std::fs::write(&bad, text).unwrap();
    let out = candor().arg("check").arg(&good).arg(&bad).output().unwrap();
    assert_eq!(out.status.code(), Some(1));
    let stdout = String::from_utf8(out.stdout).unwrap();
    assert!(stdout.contains("bad.json: 3 problems:"), "{stdout}");
    assert!(
        stdout.contains("method.temperature: temperature must be finite and > 0, got -2"),
        "{stdout}"
    );
    assert!(
        stdout.contains("policy.threshold: threshold must lie in [0, 1], got 1.6"),
        "{stdout}"
    );
    assert!(
        stdout.contains("digest: does not match the content"),
        "{stdout}"
    );

    let out = candor()
        .arg("check")
        .arg(dir.path().join("missing.json"))
        .output()
        .unwrap();
    assert_eq!(out.status.code(), Some(1));
    assert!(String::from_utf8_lossy(&out.stdout).contains("file: cannot read"));
    assert_eq!(
        candor().arg("check").output().unwrap().status.code(),
        Some(2),
        "usage error"
    );
}

#[test]
fn committed_demo_data_is_what_the_generator_writes() {
    let dir = tempfile::tempdir().unwrap();
    let out = candor()
        .args(["demo", "--write-data"])
        .arg(dir.path())
        .output()
        .unwrap();
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    for file in [
        "calibration.jsonl",
        "traffic.jsonl",
        "maps/letter-sorter.json",
    ] {
        let fresh = std::fs::read(dir.path().join(file)).unwrap();
        let committed = std::fs::read(repo("demo-data").join(file)).unwrap();
        assert!(
            fresh == committed,
            "demo-data/{file} differs from the generator's output"
        );
    }
    let out = candor()
        .arg("check")
        .arg(repo("demo-data/maps/letter-sorter.json"))
        .output()
        .unwrap();
    assert_eq!(out.status.code(), Some(0));
}

#[test]
fn demo_runs_end_to_end_and_calibration_pays_off() {
    let out = candor().arg("demo").output().unwrap();
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let stdout = String::from_utf8(out.stdout).unwrap();
    let row = |name: &str| -> Vec<String> {
        let line = stdout
            .lines()
            .find(|l| l.trim_start().starts_with(name))
            .unwrap_or_else(|| panic!("{stdout}"));
        line.split_whitespace().map(str::to_owned).collect()
    };
    // Columns: name words, accepted, (share), deferred, accuracy accepted, accuracy deferred.
    let pct = |s: &str| s.trim_end_matches('%').parse::<f64>().unwrap();
    let raw = row("raw model confidence");
    let cal = row("candor-calibrated");
    let (raw_acc, cal_acc) = (pct(&raw[raw.len() - 2]), pct(&cal[cal.len() - 2]));
    assert!(
        raw_acc < 95.0,
        "raw confidence over-promises in this scenario: {raw_acc}"
    );
    assert!(
        cal_acc >= 95.0,
        "calibrated accepted accuracy meets the 95% policy: {cal_acc}"
    );
    assert!(stdout.contains("2. Serve: 5000 new letters"), "{stdout}");
    // The demo scrapes its own /metrics before and after serving: the counters moved by exactly
    // the calibrated row's counts.
    let watch = stdout
        .lines()
        .find(|l| l.starts_with("3. Watch: /metrics on "))
        .unwrap_or_else(|| panic!("{stdout}"));
    let moved = format!("accept 0 -> {}, defer 0 -> {}", cal[1], cal[cal.len() - 3]);
    assert!(watch.ends_with(&moved), "{watch} vs {moved}");
    assert!(stdout.contains("No drift"), "{stdout}");
}

#[tokio::test]
async fn serve_starts_turns_healthy_answers_and_exits_cleanly_on_sigterm() {
    let dir = tempfile::tempdir().unwrap();
    std::fs::write(dir.path().join("triage.json"), temperature_map().to_json()).unwrap();
    let mut child = candor()
        .args([
            "serve",
            "--listen",
            "127.0.0.1:0",
            "--log-format",
            "json",
            "--maps",
        ])
        .arg(dir.path())
        .stderr(Stdio::piped())
        .spawn()
        .unwrap();
    let mut lines = BufReader::new(child.stderr.take().unwrap()).lines();
    let addr = loop {
        let line = lines
            .next()
            .expect("serve exited before listening")
            .unwrap();
        let v: serde_json::Value = serde_json::from_str(&line).unwrap();
        if v["fields"]["message"] == "listening" {
            break v["fields"]["addr"].as_str().unwrap().to_owned();
        }
    };
    let drain = std::thread::spawn(move || lines.map_while(Result::ok).collect::<Vec<_>>());
    let channel = tonic::transport::Channel::from_shared(format!("http://{addr}"))
        .unwrap()
        .connect()
        .await
        .unwrap();
    let mut health = HealthClient::new(channel.clone());
    let mut watch = health
        .watch(HealthCheckRequest {
            service: "candor.v1.Calibrator".into(),
        })
        .await
        .unwrap()
        .into_inner();
    while watch.message().await.unwrap().unwrap().status != ServingStatus::Serving as i32 {}
    let mut client = CalibratorClient::new(channel);
    let r = client
        .calibrate(CalibrateRequest {
            model: "triage".into(),
            logits: vec![4.0, 0.0, 0.0],
            request_id: "x".into(),
            ..CalibrateRequest::default()
        })
        .await
        .unwrap()
        .into_inner();
    assert_eq!(r.predicted_class, 0);
    drop(watch);
    assert_eq!(terminate(child).await, Some(0));
    let logs = drain.join().unwrap().join("\n");
    assert!(logs.contains("SIGTERM received"), "{logs}");
}
