//! Does a map swap stall the request path? Closed-loop unary clients call a sidecar running in
//! this process while, in alternate phases, maps are swapped 20 times a second through the file
//! store (new version file + pointer file, picked up by the watcher) and the admin plane
//! (activate). Reports p50 and p99 latency per phase kind and the p99 ratio.
//!
//! Then: how long a changed file takes to be served, with file events and with only the
//! periodic rescan.
//!
//! Targets (issue: rollout): p99 with swaps within 1.5x of p99 without; pickup under 1 s with
//! the watcher, under the rescan interval without it.
//!
//! Run: `cargo bench --bench swap_latency` (add `-- --quick` for a short run).

use candor::decision::DecisionPolicy;
use candor::mapfile::{CalibrationMap, MapParts};
use candor::method::{InputForm, Method, Temperature};
use candor::proto::v1::calibrator_client::CalibratorClient;
use candor::proto::v1::map_control_client::MapControlClient;
use candor::proto::v1::{ActivateRequest, CalibrateRequest};
use candor::registry::{spawn_store_watcher, Registry, WatchOptions, POINTER_FILE};
use candor::server::{run, run_admin, ServeOptions};
use std::path::Path;
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::Arc;
use std::time::{Duration, Instant};
use tonic::transport::Channel;

const MODEL: &str = "bench";
const K: usize = 10;
const CLIENTS: usize = 8;
/// Pause between swaps in a swapping phase (20 swaps a second).
const SWAP_EVERY: Duration = Duration::from_millis(50);
/// Rescan interval of the no-events pickup measurement.
const RESCAN: Duration = Duration::from_millis(500);

fn map(version: &str, t: f64) -> CalibrationMap {
    CalibrationMap::from_parts(MapParts {
        model: MODEL.into(),
        map_version: version.into(),
        classes: K,
        class_names: None,
        input: InputForm::Logits,
        method: Method::Temperature(Temperature::try_new(t, "t").expect("T > 0")),
        policy: DecisionPolicy::global(0.6),
        provenance: serde_json::Map::new(),
    })
    .expect("bench map is valid")
}

fn write_atomically(path: &Path, bytes: &[u8]) {
    std::fs::create_dir_all(path.parent().expect("has parent")).expect("mkdir");
    let tmp = path.with_file_name(".bench-tmp");
    std::fs::write(&tmp, bytes).expect("write");
    std::fs::rename(&tmp, path).expect("rename");
}

async fn client_loop(channel: Channel, stop: Arc<AtomicBool>) -> Vec<u32> {
    let mut c = CalibratorClient::new(channel);
    let logits: Vec<f32> = (0..K).map(|i| (i as f32 * 0.37).sin() * 3.0).collect();
    let mut lat = Vec::with_capacity(100_000);
    let mut n = 0u64;
    while !stop.load(Ordering::Relaxed) {
        let req = CalibrateRequest {
            model: MODEL.into(),
            logits: logits.clone(),
            request_id: format!("r{n}"),
            ..CalibrateRequest::default()
        };
        let t = Instant::now();
        c.calibrate(req).await.expect("no failed request");
        lat.push(t.elapsed().as_nanos().min(u128::from(u32::MAX)) as u32);
        n += 1;
    }
    lat
}

fn quantile(sorted: &[u32], q: f64) -> f64 {
    let i = ((sorted.len() as f64 - 1.0) * q).round() as usize;
    f64::from(sorted[i]) / 1000.0
}

fn median(v: &mut [f64]) -> f64 {
    v.sort_by(f64::total_cmp);
    v[v.len() / 2]
}

/// One phase of load; with `swap`, maps are swapped while it runs. Returns (p50, p99) in µs
/// and the number of swaps.
async fn phase(
    addr: std::net::SocketAddr,
    admin: &mut MapControlClient<Channel>,
    dir: &Path,
    registry: &Registry,
    swap: bool,
    length: Duration,
    next_version: &mut usize,
) -> (f64, f64, usize) {
    let stop = Arc::new(AtomicBool::new(false));
    let mut tasks = Vec::new();
    for _ in 0..CLIENTS {
        let ch = Channel::from_shared(format!("http://{addr}"))
            .expect("uri")
            .connect()
            .await
            .expect("connect");
        tasks.push(tokio::spawn(client_loop(ch, stop.clone())));
    }
    let until = Instant::now() + length;
    let mut swaps = 0;
    while Instant::now() < until {
        tokio::time::sleep(SWAP_EVERY).await;
        if !swap {
            continue;
        }
        let i = *next_version;
        *next_version += 1;
        let version = format!("v{i}");
        if i.is_multiple_of(2) {
            write_atomically(
                &dir.join(MODEL).join(format!("{version}.json")),
                map(&version, 1.0 + (i % 13) as f64 * 0.1)
                    .to_json()
                    .as_bytes(),
            );
            write_atomically(&dir.join(MODEL).join(POINTER_FILE), version.as_bytes());
        } else {
            // Through the admin plane: push as staged via the registry, activate over gRPC.
            registry
                .push(map(&version, 1.05).to_json().as_bytes(), false)
                .expect("push");
            admin
                .activate(ActivateRequest {
                    model: MODEL.into(),
                    map_version: version,
                })
                .await
                .expect("activate");
        }
        swaps += 1;
    }
    stop.store(true, Ordering::Relaxed);
    let mut all = Vec::new();
    for t in tasks {
        all.extend(t.await.expect("client task"));
    }
    all.sort_unstable();
    (quantile(&all, 0.5), quantile(&all, 0.99), swaps)
}

/// Time from writing a new version and its pointer to the registry serving it.
async fn pickup(registry: &Registry, dir: &Path, version: &str) -> Duration {
    let mut gens = registry.generations();
    let t = Instant::now();
    write_atomically(
        &dir.join(MODEL).join(format!("{version}.json")),
        map(version, 1.3).to_json().as_bytes(),
    );
    write_atomically(&dir.join(MODEL).join(POINTER_FILE), version.as_bytes());
    loop {
        let active = registry.with_snapshot(|s| {
            s.get(MODEL)
                .is_ok_and(|r| r.active().map.map_version() == version)
        });
        if active {
            return t.elapsed();
        }
        tokio::time::timeout(Duration::from_secs(30), gens.changed())
            .await
            .expect("picked up within 30 s")
            .expect("registry alive");
    }
}

async fn pickups(file_events: bool, rounds: usize) -> Vec<f64> {
    let dir = tempfile::tempdir().expect("tempdir");
    write_atomically(
        &dir.path().join(MODEL).join("p0.json"),
        map("p0", 1.0).to_json().as_bytes(),
    );
    let registry = Registry::with_store(dir.path());
    registry.rescan();
    let (tx, rx) = tokio::sync::oneshot::channel::<()>();
    spawn_store_watcher(
        registry.clone(),
        WatchOptions {
            rescan_interval: if file_events {
                Duration::from_secs(3600)
            } else {
                RESCAN
            },
            file_events,
            ..WatchOptions::default()
        },
        async {
            let _ = rx.await;
        },
    );
    let mut out = Vec::new();
    for i in 1..=rounds {
        out.push(
            pickup(&registry, dir.path(), &format!("p{i}"))
                .await
                .as_secs_f64()
                * 1000.0,
        );
        tokio::time::sleep(Duration::from_millis(20)).await;
    }
    let _ = tx.send(());
    out
}

fn main() {
    let quick = std::env::args().any(|a| a == "--quick");
    let (rounds, length): (usize, Duration) = if quick {
        (2, Duration::from_secs(2))
    } else {
        (4, Duration::from_secs(4))
    };
    let rt = tokio::runtime::Builder::new_multi_thread()
        .enable_all()
        .build()
        .expect("runtime");
    rt.block_on(async {
        let dir = tempfile::tempdir().expect("tempdir");
        let d = dir.path().to_owned();
        write_atomically(&d.join(MODEL).join("v0.json"), map("v0", 1.5).to_json().as_bytes());
        let registry = Registry::with_store(&d);
        registry.rescan();
        let (tx, rx) = tokio::sync::watch::channel(false);
        let stopped = |mut rx: tokio::sync::watch::Receiver<bool>| async move {
            let _ = rx.wait_for(|s| *s).await;
        };
        spawn_store_watcher(registry.clone(), WatchOptions::default(), stopped(rx.clone()));
        let listener = tokio::net::TcpListener::bind("127.0.0.1:0").await.expect("bind");
        let addr = listener.local_addr().expect("addr");
        let server = tokio::spawn(run(
            listener,
            registry.clone(),
            ServeOptions::default(),
            stopped(rx.clone()),
        ));
        let admin_listener = tokio::net::TcpListener::bind("127.0.0.1:0").await.expect("bind");
        let admin_addr = admin_listener.local_addr().expect("addr");
        let admin_server = tokio::spawn(run_admin(
            admin_listener,
            registry.clone(),
            None,
            stopped(rx.clone()),
        ));
        let mut admin = MapControlClient::connect(format!("http://{admin_addr}"))
            .await
            .expect("admin connect");

        let mut next = 1;
        let (mut p50s, mut p99s, mut p50n, mut p99n) = (vec![], vec![], vec![], vec![]);
        let mut total_swaps = 0;
        // Warm-up.
        phase(addr, &mut admin, &d, &registry, false, Duration::from_secs(1), &mut next).await;
        for round in 0..rounds {
            // Alternate which kind goes first, so drift in machine load does not favour one.
            for swap in if round.is_multiple_of(2) { [false, true] } else { [true, false] } {
                let (p50, p99, swaps) =
                    phase(addr, &mut admin, &d, &registry, swap, length, &mut next).await;
                println!(
                    "round {round} {:<8} p50 {p50:8.1} µs  p99 {p99:8.1} µs  swaps {swaps}",
                    if swap { "swaps" } else { "steady" }
                );
                total_swaps += swaps;
                if swap {
                    p50s.push(p50);
                    p99s.push(p99);
                } else {
                    p50n.push(p50);
                    p99n.push(p99);
                }
            }
        }
        let (a50, a99, b50, b99) = (
            median(&mut p50n),
            median(&mut p99n),
            median(&mut p50s),
            median(&mut p99s),
        );
        println!();
        println!("{CLIENTS} closed-loop unary clients, K = {K}, {rounds} alternating rounds of {length:?}, medians:");
        println!("  without swaps  p50 {a50:8.1} µs  p99 {a99:8.1} µs");
        println!("  with swaps     p50 {b50:8.1} µs  p99 {b99:8.1} µs  ({total_swaps} swaps in all)");
        println!("  p99 ratio {:.2} (target ≤ 1.5)", b99 / a99);
        let _ = tx.send(true);
        server.await.expect("join").expect("server");
        admin_server.await.expect("join").expect("admin");

        let n = if quick { 5 } else { 20 };
        let mut events = pickups(true, n).await;
        let mut rescans = pickups(false, n).await;
        let max = |v: &[f64]| v.iter().copied().fold(0.0, f64::max);
        println!();
        println!(
            "pickup with file events:   median {:6.1} ms  max {:6.1} ms  (target < 1000 ms)",
            median(&mut events),
            max(&events)
        );
        println!(
            "pickup with rescan only:   median {:6.1} ms  max {:6.1} ms  (rescan every {} ms)",
            median(&mut rescans),
            max(&rescans),
            RESCAN.as_millis()
        );
    });
}
