//! Rollout under load: many clients on unary and streaming calls while maps are swapped through
//! the file store and the admin plane (invalid maps included), and SIGTERM under load.

use crate::rollout::{spawn_serve, Served};
use crate::support::{
    connect_when_serving, signal, versioned_map, wait_for_active, write_atomically, AdminPlane,
    Sidecar,
};
use candor::mapfile::CalibrationMap;
use candor::method::Workspace;
use candor::proto::v1::calibrate_result::Outcome;
use candor::proto::v1::calibrator_client::CalibratorClient;
use candor::proto::v1::{CalibrateRequest, PushMapRequest, RollbackRequest};
use candor::registry::{spawn_store_watcher, Registry, WatchOptions, POINTER_FILE};
use std::collections::HashMap;
use std::path::Path;
use std::sync::atomic::{AtomicBool, AtomicU64, Ordering};
use std::sync::Arc;
use std::time::{Duration, Instant};
use tonic::transport::Channel;
use tonic::Code;

const MODEL: &str = "load";
const K: usize = 4;
/// How long the clients run while maps are swapped (the issue asks for at least 10 s).
const LOAD_FOR: Duration = Duration::from_secs(10);
/// Swaps the issue asks for during the load.
const MIN_SWAPS: usize = 100;
const UNARY_CLIENTS: u64 = 6;
const STREAM_CLIENTS: u64 = 3;

/// Temperature of version `v{i}`: every version gives different probabilities.
fn temperature(i: usize) -> f64 {
    0.6 + 0.05 * (i % 37) as f64 + 0.001 * i as f64
}

fn version_map(i: usize) -> CalibrationMap {
    versioned_map(MODEL, &format!("v{i}"), K, temperature(i))
}

/// Deterministic logits of a client's n-th request.
fn logits(client: u64, n: u64) -> Vec<f32> {
    let mut x = client.wrapping_mul(0x9E37_79B9_7F4A_7C15) ^ n.wrapping_mul(0xD1B5_4A32_D192_ED03);
    (0..K)
        .map(|_| {
            x ^= x >> 31;
            x = x.wrapping_mul(0xBF58_476D_1CE4_E5B9);
            ((x >> 40) as f32 / (1u64 << 24) as f32) * 6.0 - 3.0
        })
        .collect()
}

fn request(client: u64, n: u64) -> CalibrateRequest {
    CalibrateRequest {
        model: MODEL.into(),
        logits: logits(client, n),
        request_id: format!("c{client}-{n}"),
        ..CalibrateRequest::default()
    }
}

/// One answered request: who sent it, which one, what came back.
struct Answer {
    client: u64,
    n: u64,
    version: String,
    probabilities: Vec<f32>,
}

#[derive(Default)]
struct Tally {
    answers: Vec<Answer>,
    failures: Vec<String>,
}

async fn unary_client(channel: Channel, client: u64, stop: Arc<AtomicBool>) -> Tally {
    let mut c = CalibratorClient::new(channel);
    let mut t = Tally::default();
    let mut n = 0;
    while !stop.load(Ordering::Relaxed) {
        match c.calibrate(request(client, n)).await {
            Ok(r) => {
                let r = r.into_inner();
                t.answers.push(Answer {
                    client,
                    n,
                    version: r.map_version,
                    probabilities: r.probabilities,
                });
            }
            Err(e) => t.failures.push(format!("unary {client}/{n}: {e:?}")),
        }
        n += 1;
    }
    t
}

async fn stream_client(channel: Channel, client: u64, stop: Arc<AtomicBool>) -> Tally {
    let mut c = CalibratorClient::new(channel);
    let mut t = Tally::default();
    let (tx, rx) = tokio::sync::mpsc::channel(1);
    let mut responses = match c
        .calibrate_stream(tokio_stream::wrappers::ReceiverStream::new(rx))
        .await
    {
        Ok(r) => r.into_inner(),
        Err(e) => {
            t.failures.push(format!("stream {client} open: {e:?}"));
            return t;
        }
    };
    let mut n = 0;
    while !stop.load(Ordering::Relaxed) {
        if tx.send(request(client, n)).await.is_err() {
            t.failures.push(format!("stream {client}/{n}: send failed"));
            break;
        }
        match responses.message().await {
            Ok(Some(r)) => match r.outcome {
                Some(Outcome::Response(r)) => t.answers.push(Answer {
                    client,
                    n,
                    version: r.map_version,
                    probabilities: r.probabilities,
                }),
                other => t.failures.push(format!("stream {client}/{n}: {other:?}")),
            },
            other => {
                t.failures.push(format!("stream {client}/{n}: {other:?}"));
                break;
            }
        }
        n += 1;
    }
    t
}

/// Swaps maps until `until`, alternating the file store and the admin plane, with invalid maps
/// and rollbacks in between. Returns (swaps, invalid maps offered).
async fn swap_maps(
    dir: &Path,
    registry: &Registry,
    admin: &AdminPlane,
    until: Instant,
) -> (usize, usize) {
    let mut control = admin.client().await;
    let (mut swaps, mut invalid) = (0, 0);
    let mut i = 1;
    while Instant::now() < until {
        let version = format!("v{i}");
        let map = version_map(i);
        match i % 5 {
            0 | 1 => {
                // Through the file store: the map by atomic rename, then the pointer.
                write_atomically(
                    &dir.join(MODEL).join(format!("{version}.json")),
                    map.to_json().as_bytes(),
                );
                write_atomically(&dir.join(MODEL).join(POINTER_FILE), version.as_bytes());
                assert!(
                    wait_for_active(registry, MODEL, &version, Duration::from_secs(5)).await,
                    "the watcher did not pick up {version}"
                );
                swaps += 1;
            }
            2 => {
                let r = control
                    .push_map(PushMapRequest {
                        map_json: map.to_json().into_bytes(),
                        activate: true,
                    })
                    .await
                    .expect("a valid push is accepted")
                    .into_inner();
                assert_eq!(r.status.unwrap().active_version, version);
                swaps += 1;
            }
            3 => {
                // Invalid maps, by both routes: a truncated file, a map for 5 classes, garbage.
                let json = map.to_json();
                write_atomically(
                    &dir.join(MODEL).join(format!("{version}.json")),
                    &json.as_bytes()[..json.len() / 2],
                );
                let five = versioned_map(MODEL, &format!("{version}x"), 5, 1.0);
                let e = control
                    .push_map(PushMapRequest {
                        map_json: five.to_json().into_bytes(),
                        activate: true,
                    })
                    .await
                    .unwrap_err();
                assert_eq!(e.code(), Code::FailedPrecondition, "{e:?}");
                let e = control
                    .push_map(PushMapRequest {
                        map_json: b"{\"format_version\": 1, \"model\": \"load\"".to_vec(),
                        activate: true,
                    })
                    .await
                    .unwrap_err();
                assert_eq!(e.code(), Code::InvalidArgument, "{e:?}");
                invalid += 3;
            }
            _ => {
                control
                    .rollback(RollbackRequest {
                        model: MODEL.into(),
                    })
                    .await
                    .expect("there is a version to roll back to");
                swaps += 1;
            }
        }
        i += 1;
    }
    (swaps, invalid)
}

/// Every answer must equal what the version it names gives offline for its logits.
fn check_answers(answers: &[Answer]) -> usize {
    let mut maps: HashMap<String, CalibrationMap> = HashMap::new();
    let mut ws = Workspace::new();
    for a in answers {
        let map = maps.entry(a.version.clone()).or_insert_with(|| {
            let i: usize = a.version.trim_start_matches('v').parse().unwrap();
            version_map(i)
        });
        let q = ws.apply(map.method(), map.input(), K, &logits(a.client, a.n));
        let expected: Vec<f32> = q.iter().map(|&v| v as f32).collect();
        assert_eq!(
            a.probabilities, expected,
            "client {} request {} answered by {} does not match that version offline",
            a.client, a.n, a.version
        );
    }
    maps.len()
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn maps_swapped_under_load_fail_no_request_and_never_mix() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    write_atomically(
        &d.join(MODEL).join("v0.json"),
        version_map(0).to_json().as_bytes(),
    );
    let registry = Registry::with_store(d);
    registry.rescan();
    let (stop_watch, watch_rx) = tokio::sync::oneshot::channel::<()>();
    spawn_store_watcher(
        registry.clone(),
        WatchOptions {
            rescan_interval: Duration::from_secs(1),
            ..WatchOptions::default()
        },
        async {
            let _ = watch_rx.await;
        },
    );
    let sidecar = Sidecar::serving(registry.clone()).await;
    registry.mark_ready();
    let admin = AdminPlane::start(registry.clone(), None).await;

    let stop = Arc::new(AtomicBool::new(false));
    let mut clients = Vec::new();
    for c in 0..UNARY_CLIENTS + STREAM_CLIENTS {
        let channel = sidecar.channel().await;
        let stop = stop.clone();
        clients.push(if c < UNARY_CLIENTS {
            tokio::spawn(unary_client(channel, c, stop))
        } else {
            tokio::spawn(stream_client(channel, c, stop))
        });
    }
    let until = Instant::now() + LOAD_FOR;
    let (swaps, invalid) = swap_maps(d, &registry, &admin, until).await;
    stop.store(true, Ordering::Relaxed);
    let mut all = Tally::default();
    for c in clients {
        let t = c.await.unwrap();
        all.answers.extend(t.answers);
        all.failures.extend(t.failures);
    }
    assert!(
        all.failures.is_empty(),
        "failed RPCs: {:?}",
        &all.failures[..all.failures.len().min(5)]
    );
    assert!(swaps >= MIN_SWAPS, "only {swaps} swaps in {LOAD_FOR:?}");
    let versions = check_answers(&all.answers);
    let counted: u64 = registry
        .decision_counts()
        .iter()
        .filter(|c| c.0 == MODEL)
        .map(|c| c.2 + c.3)
        .sum();
    assert_eq!(
        counted,
        all.answers.len() as u64,
        "accepted + deferred = answered"
    );
    let view = registry.view();
    assert!(
        view.rejections_total as usize >= invalid / 3,
        "every invalid file was refused and counted: {} < {}",
        view.rejections_total,
        invalid / 3
    );
    eprintln!(
        "{} answers from {versions} versions, {swaps} swaps, {invalid} invalid maps offered, {} rejections logged",
        all.answers.len(),
        view.rejections_total
    );
    assert!(versions >= 20, "the load met only {versions} versions");
    let _ = stop_watch.send(());
    admin.stop().await;
    sidecar.stop().await;
}

/// Reads a client's result: answers counted, and the error that ended it (if any).
async fn until_error(
    channel: Channel,
    client: u64,
    streaming: bool,
    ok: Arc<AtomicU64>,
) -> (u64, Option<Code>) {
    let mut c = CalibratorClient::new(channel);
    let mut n = 0;
    if streaming {
        let (tx, rx) = tokio::sync::mpsc::channel(1);
        let mut responses = match c
            .calibrate_stream(tokio_stream::wrappers::ReceiverStream::new(rx))
            .await
        {
            Ok(r) => r.into_inner(),
            Err(e) => return (0, Some(e.code())),
        };
        loop {
            if tx.send(request(client, n)).await.is_err() {
                return (n, None);
            }
            match responses.message().await {
                Ok(Some(_)) => {
                    ok.fetch_add(1, Ordering::Relaxed);
                    n += 1;
                }
                Ok(None) => return (n, None),
                Err(e) => return (n, Some(e.code())),
            }
        }
    }
    loop {
        match c.calibrate(request(client, n)).await {
            Ok(_) => {
                ok.fetch_add(1, Ordering::Relaxed);
                n += 1;
            }
            Err(e) => return (n, Some(e.code())),
        }
    }
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn sigterm_under_load_loses_no_accepted_request() {
    let dir = tempfile::tempdir().unwrap();
    let store = dir.path().join("store");
    write_atomically(
        &store.join(MODEL).join("v0.json"),
        version_map(0).to_json().as_bytes(),
    );
    let Served {
        mut child,
        data,
        logs: rest,
        ..
    } = spawn_serve(&store, &["--grace-period-secs", "5"]);
    drop(connect_when_serving(&data).await);

    let ok = Arc::new(AtomicU64::new(0));
    let mut clients = Vec::new();
    for c in 0..UNARY_CLIENTS + STREAM_CLIENTS {
        let channel = Channel::from_shared(format!("http://{data}"))
            .unwrap()
            .connect()
            .await
            .unwrap();
        clients.push(tokio::spawn(until_error(
            channel,
            c,
            c >= UNARY_CLIENTS,
            ok.clone(),
        )));
    }
    // Let the load build up: wait (bounded) until a few thousand requests have been answered.
    let mut progress = tokio::time::interval(Duration::from_millis(10));
    let deadline = Instant::now() + Duration::from_secs(30);
    while ok.load(Ordering::Relaxed) < 2_000 {
        assert!(Instant::now() < deadline, "the load never built up");
        progress.tick().await;
    }
    signal(&child, "-TERM");
    let mut answered = 0;
    for c in clients {
        let (n, code) = tokio::time::timeout(Duration::from_secs(30), c)
            .await
            .expect("every client ends after the signal")
            .unwrap();
        answered += n;
        // New calls meet a closed listener (UNAVAILABLE); an open stream is ended with
        // UNAVAILABLE. A call that was on the wire when the connection was shut can instead
        // see the HTTP/2 cut itself, which tonic reports as CANCELLED or INTERNAL (seen in about
        // one run in six here), or a stream may just end: such a call was never read by the
        // server, as the count below proves.
        assert!(
            matches!(
                code,
                None | Some(Code::Unavailable | Code::Cancelled | Code::Internal)
            ),
            "after SIGTERM a client ends with {code:?}"
        );
    }
    let exit = tokio::task::spawn_blocking(move || child.wait())
        .await
        .unwrap()
        .unwrap();
    assert_eq!(exit.code(), Some(0));
    let logs = rest.join().unwrap();
    let stopped: serde_json::Value = logs
        .iter()
        .filter_map(|l| serde_json::from_str::<serde_json::Value>(l).ok())
        .find(|v| v["fields"]["message"] == "stopped")
        .expect("a final log line with the counts");
    let counted = stopped["fields"]["accepted"].as_u64().unwrap()
        + stopped["fields"]["deferred"].as_u64().unwrap();
    assert_eq!(
        counted, answered,
        "every request the sidecar answered reached its client, and no other was counted"
    );
}
