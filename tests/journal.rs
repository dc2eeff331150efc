//! Outcomes and the decision journal of a running `candor serve`: joining labels, kill -9, and a
//! disk that fills up.

use crate::rollout::{logged_addr, spawn_serve, Served};
use crate::support::{
    connect_when_serving, http_get, series, signal, terminate, versioned_map, write_atomically,
};
use candor::journal::{read_journal, Record};
use candor::proto::v1::calibrator_client::CalibratorClient;
use candor::proto::v1::outcome_result::Outcome;
use candor::proto::v1::{CalibrateRequest, OutcomeRequest};
use std::collections::HashSet;
use std::path::Path;
use tonic::transport::Channel;
use tonic::Code;

fn store(dir: &Path) -> std::path::PathBuf {
    let s = dir.join("store");
    write_atomically(
        &s.join("triage/v1.json"),
        versioned_map("triage", "v1", 3, 1.0).to_json().as_bytes(),
    );
    s
}

async fn decide(c: &mut CalibratorClient<Channel>, i: usize) -> u32 {
    c.calibrate(CalibrateRequest {
        model: "triage".into(),
        logits: vec![(i % 5) as f32, 1.0, 0.0],
        request_id: format!("d-{i}"),
        ..CalibrateRequest::default()
    })
    .await
    .unwrap()
    .into_inner()
    .predicted_class
}

fn outcome(i: usize, label: u32) -> OutcomeRequest {
    OutcomeRequest {
        request_id: format!("d-{i}"),
        true_label: label,
    }
}

#[tokio::test]
async fn outcomes_join_by_request_id_unary_and_streaming() {
    let dir = tempfile::tempdir().unwrap();
    let journal = dir.path().join("journal");
    let Served { child, data, .. } = spawn_serve(
        &store(dir.path()),
        &["--journal-dir", journal.to_str().unwrap()],
    );
    let mut c = CalibratorClient::new(connect_when_serving(&data).await);
    let predicted: Vec<u32> = {
        let mut v = Vec::new();
        for i in 0..20 {
            v.push(decide(&mut c, i).await);
        }
        v
    };
    let r = c
        .record_outcome(outcome(0, predicted[0]))
        .await
        .unwrap()
        .into_inner();
    assert!(r.correct && r.journaled && !r.duplicate);
    assert_eq!((r.model.as_str(), r.map_version.as_str()), ("triage", "v1"));
    assert!(
        c.record_outcome(outcome(0, predicted[0]))
            .await
            .unwrap()
            .into_inner()
            .duplicate
    );
    let e = c
        .record_outcome(outcome(0, (predicted[0] + 1) % 3))
        .await
        .unwrap_err();
    assert_eq!(e.code(), Code::AlreadyExists, "{e:?}");
    let e = c.record_outcome(outcome(999, 0)).await.unwrap_err();
    assert_eq!(e.code(), Code::NotFound, "{e:?}");
    let e = c.record_outcome(outcome(1, 7)).await.unwrap_err();
    assert_eq!(e.code(), Code::InvalidArgument, "{e:?}");

    let labels: Vec<OutcomeRequest> = (1..20).map(|i| outcome(i, 1)).collect();
    let mut results = c
        .record_outcomes(tokio_stream::iter(labels))
        .await
        .unwrap()
        .into_inner();
    let mut n = 0;
    while let Some(r) = results.message().await.unwrap() {
        match r.outcome {
            Some(Outcome::Response(r)) => assert_eq!(r.correct, predicted[n + 1] == 1),
            other => panic!("{other:?}"),
        }
        n += 1;
    }
    assert_eq!(n, 19);
    assert_eq!(terminate(child).await, Some(0));
    let read = read_journal(&journal).unwrap();
    let outcomes = read
        .records
        .iter()
        .filter(|r| matches!(r, Record::Outcome { .. }))
        .count();
    assert_eq!((read.records.len(), outcomes), (40, 20));
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn the_journal_survives_kill_9_with_every_acknowledged_outcome() {
    let dir = tempfile::tempdir().unwrap();
    let journal = dir.path().join("journal");
    let Served {
        child, data, logs, ..
    } = spawn_serve(
        &store(dir.path()),
        &[
            "--journal-dir",
            journal.to_str().unwrap(),
            "--journal-fsync",
        ],
    );
    let channel = connect_when_serving(&data).await;
    // Background load, so the kill lands in the middle of writes.
    let mut bg = CalibratorClient::new(channel.clone());
    let load = tokio::spawn(async move {
        let mut i = 100_000;
        while bg
            .calibrate(CalibrateRequest {
                model: "triage".into(),
                logits: vec![1.0, 2.0, 0.5],
                request_id: format!("bg-{i}"),
                ..CalibrateRequest::default()
            })
            .await
            .is_ok()
        {
            i += 1;
        }
    });
    let mut c = CalibratorClient::new(channel);
    let mut acked = HashSet::new();
    for i in 0..300 {
        let p = decide(&mut c, i).await;
        if i % 2 == 0 {
            let r = c.record_outcome(outcome(i, p)).await.unwrap().into_inner();
            assert!(r.journaled);
            acked.insert(format!("d-{i}"));
        }
    }
    signal(&child, "-KILL");
    let mut child = child;
    let _ = tokio::task::spawn_blocking(move || child.wait())
        .await
        .unwrap();
    let _ = load.await;
    drop(logs.join());

    let read = read_journal(&journal).unwrap();
    assert!(read.torn <= 1, "at most a torn last record: {}", read.torn);
    let mut decided = HashSet::new();
    let mut labelled = HashSet::new();
    for r in &read.records {
        match r {
            Record::Decision { request_id, .. } => {
                decided.insert(request_id.clone());
            }
            Record::Outcome { request_id, .. } => {
                labelled.insert(request_id.clone());
            }
        }
    }
    for id in &acked {
        assert!(labelled.contains(id), "acknowledged outcome {id} lost");
        assert!(decided.contains(id), "the decision of {id} lost");
    }
}

#[tokio::test]
async fn a_full_disk_drops_journal_records_but_never_a_request() {
    let dir = tempfile::tempdir().unwrap();
    let journal = dir.path().join("journal");
    let maps = store(dir.path());
    // A file-size limit of 8 KiB stands in for a full disk: writes past it fail with EFBIG
    // (SIGXFSZ is ignored so the process is not killed).
    let mut cmd = std::process::Command::new("bash");
    cmd.arg("-c")
        .arg("trap '' XFSZ; ulimit -f 8; exec \"$0\" \"$@\"")
        .arg(env!("CARGO_BIN_EXE_candor"));
    let (served, early) = spawn_serve_logged_with(
        cmd,
        &maps,
        &[
            "--journal-dir",
            journal.to_str().unwrap(),
            "--telemetry-listen",
            "127.0.0.1:0",
        ],
    );
    let telemetry = logged_addr(&early, "telemetry listening").unwrap();
    let mut c = CalibratorClient::new(connect_when_serving(&served.data).await);
    for i in 0..400 {
        decide(&mut c, i).await;
    }
    // Outcomes are still joined; they are just not journaled once the disk is full.
    let r = c
        .record_outcome(outcome(399, 0))
        .await
        .unwrap()
        .into_inner();
    assert!(!r.journaled, "{r:?}");
    let (_, text) = tokio::task::spawn_blocking(move || http_get(&telemetry, "/metrics"))
        .await
        .unwrap();
    assert!(
        series(&text, "candor_journal_write_errors_total").unwrap() >= 1.0,
        "{text}"
    );
    assert!(series(&text, "candor_journal_dropped_total").unwrap() >= 1.0);
    let answered = series(
        &text,
        "candor_requests_total{model=\"triage\",map_version=\"v1\",decision=\"defer\"}",
    )
    .unwrap_or(0.0)
        + series(
            &text,
            "candor_requests_total{model=\"triage\",map_version=\"v1\",decision=\"accept\"}",
        )
        .unwrap_or(0.0);
    assert_eq!(answered, 400.0);
    assert_eq!(terminate(served.child).await, Some(0));
}

/// `spawn_serve_logged` through a wrapper command (here: bash setting a resource limit).
fn spawn_serve_logged_with(
    cmd: std::process::Command,
    maps: &Path,
    extra: &[&str],
) -> (Served, Vec<String>) {
    crate::rollout::spawn_with(cmd, maps, extra)
}
