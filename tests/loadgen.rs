//! `candor bench` (the real binary) against a real sidecar on an ephemeral loopback port.

use crate::support::{candor, temperature_map, Sidecar};
use candor::method::{InputForm, Method, Temperature};
use serde_json::Value;
use std::process::Output;

/// Runs `candor bench ARGS` off the runtime's threads, so the in-process sidecar keeps serving.
async fn bench(args: Vec<String>) -> Output {
    tokio::task::spawn_blocking(move || candor().arg("bench").args(args).output().unwrap())
        .await
        .unwrap()
}

fn args(s: &str) -> Vec<String> {
    s.split_whitespace().map(str::to_owned).collect()
}

fn json_of(out: &Output) -> Value {
    assert_eq!(
        out.status.code(),
        Some(0),
        "stdout: {}\nstderr: {}",
        String::from_utf8_lossy(&out.stdout),
        String::from_utf8_lossy(&out.stderr)
    );
    serde_json::from_slice(&out.stdout).unwrap()
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn unary_run_checks_answers_and_reports_json() {
    let map = temperature_map();
    let dir = tempfile::tempdir().unwrap();
    let file = dir.path().join("triage.json");
    std::fs::write(&file, map.to_json()).unwrap();
    let s = Sidecar::with_maps(vec![map.clone()]).await;
    let mut a = args("--model triage --classes 3 --concurrency 4 --duration 1s --warmup 200ms");
    a.extend(["--target".into(), s.addr.to_string(), "--json".into()]);
    a.extend(["--map".into(), file.display().to_string()]);
    a.extend(["--server-pid".into(), std::process::id().to_string()]);
    let j = json_of(&bench(a).await);

    let requests = j["requests"].as_u64().unwrap();
    assert!(requests > 0, "{j}");
    assert_eq!(j["errors"], 0);
    assert_eq!(j["checked"], 256);
    assert_eq!(j["checked_against_map"], map.digest());
    assert_eq!(
        (j["mode"].as_str(), j["concurrency"].as_u64()),
        (Some("unary"), Some(4))
    );
    // Throughput is the request count over the measured window.
    let window = j["window_secs"].as_f64().unwrap();
    assert!((1.0..5.0).contains(&window), "{j}");
    let throughput = j["throughput_per_sec"].as_f64().unwrap();
    assert!(
        (throughput - requests as f64 / window).abs() < 1e-6 * throughput,
        "{j}"
    );
    let l = &j["latency_us"];
    let q = |k: &str| l[k].as_f64().unwrap();
    assert!(q("min") > 0.0, "{l}");
    for (a, b) in [
        ("min", "p50"),
        ("p50", "p90"),
        ("p90", "p99"),
        ("p99", "p99_9"),
        ("p99_9", "max"),
    ] {
        assert!(q(a) <= q(b), "{a} > {b}: {l}");
    }
    assert!(
        j["server"]["cpu_us_per_request"].as_f64().unwrap() >= 0.0,
        "{j}"
    );
    // Every request reached the sidecar: its decision counters saw the check and the load.
    let counted: u64 = s.registry.decision_counts().iter().map(|c| c.2 + c.3).sum();
    assert!(
        counted >= requests + 256,
        "{counted} decisions for {requests} requests"
    );
    s.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn stream_run_keeps_one_stream_per_worker() {
    let s = Sidecar::with_maps(vec![temperature_map()]).await;
    let mut a = args("--classes 3 --concurrency 2 --duration 500ms --warmup 100ms --mode stream");
    a.extend(["--target".into(), s.addr.to_string(), "--json".into()]);
    let j = json_of(&bench(a).await);
    assert_eq!(j["mode"], "stream");
    assert!(j["requests"].as_u64().unwrap() > 0, "{j}");
    assert_eq!(j["errors"], 0);
    assert!(j["server"].is_null());
    s.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_map_the_sidecar_does_not_serve_fails_the_check() {
    // The sidecar applies T = 2; the file says T = 3: valid probabilities, wrong numbers.
    let other = crate::support::map(
        "triage",
        3,
        InputForm::Logits,
        Method::Temperature(Temperature::try_new(3.0, "t").unwrap()),
        0.6,
    );
    let dir = tempfile::tempdir().unwrap();
    let file = dir.path().join("other.json");
    std::fs::write(&file, other.to_json()).unwrap();
    let s = Sidecar::with_maps(vec![temperature_map()]).await;
    let mut a = args("--classes 3 --duration 1s --warmup 0s");
    a.extend(["--target".into(), s.addr.to_string()]);
    a.extend(["--map".into(), file.display().to_string()]);
    let out = bench(a).await;
    let stdout = String::from_utf8_lossy(&out.stdout);
    assert_eq!(out.status.code(), Some(1), "{stdout}");
    assert!(
        stdout.contains("payload 0 was answered wrongly"),
        "{stdout}"
    );
    assert!(stdout.contains("the map applied offline gives"), "{stdout}");

    // Wrong K: the sidecar refuses the first payload, naming the count it expects.
    let mut a = args("--classes 4 --duration 1s --warmup 0s");
    a.extend(["--target".into(), s.addr.to_string()]);
    let out = bench(a).await;
    let stdout = String::from_utf8_lossy(&out.stdout);
    assert_eq!(out.status.code(), Some(1), "{stdout}");
    assert!(stdout.contains("expected 3 logits, got 4"), "{stdout}");
    s.stop().await;
}

#[test]
fn a_remote_target_needs_allow_remote() {
    // 192.0.2.0/24 is reserved for documentation (RFC 5737): refused before any connection.
    let out = candor()
        .args(args("bench --classes 3 --target 192.0.2.1:50551"))
        .output()
        .unwrap();
    assert_eq!(out.status.code(), Some(2));
    let stderr = String::from_utf8_lossy(&out.stderr);
    assert!(stderr.contains("not a loopback address"), "{stderr}");
    assert!(stderr.contains("--allow-remote"), "{stderr}");
}
