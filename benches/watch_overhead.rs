//! What do telemetry and the decision journal cost a request? Two sidecars run in this process
//! with the same map: **off** (no decision log, no telemetry) and **on** (the decision log with
//! a journal directory, logits kept, a 5% audit sample, live-quality windows, and the telemetry
//! listener scraped once a second for /metrics and /status, as a busy Prometheus would). Closed-
//! loop unary clients load each in alternating rounds; the figure is the median over rounds of
//! each round's median end-to-end latency, and the ratio on/off.
//!
//! Target (issue: watch): telemetry and journaling add at most 10% to median latency.
//!
//! Run: `cargo bench --bench watch_overhead` (add `-- --quick` for a short run).

use candor::decision::DecisionPolicy;
use candor::journal::{DecisionLog, JournalOptions};
use candor::mapfile::{CalibrationMap, MapParts};
use candor::method::{InputForm, Method, Temperature};
use candor::proto::v1::calibrator_client::CalibratorClient;
use candor::proto::v1::CalibrateRequest;
use candor::registry::Registry;
use candor::server::{run, ServeOptions};
use candor::telemetry::{run_telemetry, RpcStats, Telemetry};
use std::io::{Read, Write};
use std::net::SocketAddr;
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::Arc;
use std::time::{Duration, Instant};
use tonic::transport::Channel;

const MODEL: &str = "bench";
const K: usize = 10;

fn map() -> CalibrationMap {
    CalibrationMap::from_parts(MapParts {
        model: MODEL.into(),
        map_version: "v1".into(),
        classes: K,
        class_names: None,
        input: InputForm::Logits,
        method: Method::Temperature(Temperature::try_new(1.5, "t").expect("T > 0")),
        policy: DecisionPolicy::global(0.3).with_audit_rate(Some(0.05)),
        provenance: serde_json::Map::new(),
    })
    .expect("bench map is valid")
}

async fn client_loop(channel: Channel, stop: Arc<AtomicBool>, tag: usize) -> Vec<u32> {
    let mut c = CalibratorClient::new(channel);
    let mut lat = Vec::with_capacity(200_000);
    let mut n = 0u64;
    while !stop.load(Ordering::Relaxed) {
        let logits: Vec<f32> = (0..K)
            .map(|i| ((i as u64 * 7 + n) as f32 * 0.37).sin() * 3.0)
            .collect();
        let req = CalibrateRequest {
            model: MODEL.into(),
            logits,
            request_id: format!("c{tag}-r{n}"),
            ..CalibrateRequest::default()
        };
        let t = Instant::now();
        c.calibrate(req).await.expect("no failed request");
        lat.push(t.elapsed().as_nanos().min(u128::from(u32::MAX)) as u32);
        n += 1;
    }
    lat
}

/// One round against `addr` with `clients` closed-loop clients: (p50, p99) in µs.
async fn round(addr: SocketAddr, clients: usize, length: Duration) -> (f64, f64) {
    let stop = Arc::new(AtomicBool::new(false));
    let mut tasks = Vec::new();
    for tag in 0..clients {
        let ch = Channel::from_shared(format!("http://{addr}"))
            .expect("uri")
            .connect()
            .await
            .expect("connect");
        tasks.push(tokio::spawn(client_loop(ch, stop.clone(), tag)));
    }
    tokio::time::sleep(length).await;
    stop.store(true, Ordering::Relaxed);
    let mut all = Vec::new();
    for t in tasks {
        all.extend(t.await.expect("client task"));
    }
    all.sort_unstable();
    let q = |p: f64| f64::from(all[((all.len() as f64 - 1.0) * p).round() as usize]) / 1000.0;
    (q(0.5), q(0.99))
}

fn median(v: &mut [f64]) -> f64 {
    v.sort_by(f64::total_cmp);
    v[v.len() / 2]
}

fn scrape(addr: SocketAddr, path: &str) -> usize {
    let Ok(mut s) = std::net::TcpStream::connect(addr) else {
        return 0;
    };
    let _ = write!(
        s,
        "GET {path} HTTP/1.1\r\nHost: {addr}\r\nConnection: close\r\n\r\n"
    );
    let mut text = Vec::new();
    let _ = s.read_to_end(&mut text);
    text.len()
}

async fn start(registry: Arc<Registry>, options: ServeOptions) -> SocketAddr {
    let listener = tokio::net::TcpListener::bind("127.0.0.1:0")
        .await
        .expect("bind");
    let addr = listener.local_addr().expect("addr");
    tokio::spawn(run(listener, registry, options, std::future::pending()));
    addr
}

#[tokio::main(flavor = "multi_thread", worker_threads = 2)]
async fn main() {
    let quick = std::env::args().any(|a| a == "--quick");
    let (rounds, length) = if quick {
        (4, Duration::from_secs(1))
    } else {
        (10, Duration::from_secs(3))
    };
    let registry = Registry::new();
    registry.publish(vec![map()]);

    let off = start(registry.clone(), ServeOptions::default()).await;

    let journal_dir = tempfile::tempdir().expect("tempdir");
    let spec = registry.spec_lookup();
    let log = DecisionLog::spawn_watched(
        JournalOptions {
            dir: Some(journal_dir.path().to_owned()),
            ..JournalOptions::default()
        },
        spec,
    )
    .expect("journal");
    let stats = Arc::new(RpcStats::default());
    let on = start(
        registry.clone(),
        ServeOptions {
            stats: stats.clone(),
            journal: Some(log.clone()),
            ..ServeOptions::default()
        },
    )
    .await;
    let tl = tokio::net::TcpListener::bind("127.0.0.1:0")
        .await
        .expect("bind telemetry");
    let taddr = tl.local_addr().expect("addr");
    tokio::spawn(run_telemetry(
        tl,
        Telemetry::new(registry.clone(), stats).with_live(log),
        std::future::pending(),
    ));
    let scraping = Arc::new(AtomicBool::new(true));
    let s = scraping.clone();
    let scraper = std::thread::spawn(move || {
        let mut bytes = 0;
        while s.load(Ordering::Relaxed) {
            bytes += scrape(taddr, "/metrics") + scrape(taddr, "/status");
            std::thread::sleep(Duration::from_secs(1));
        }
        bytes
    });

    println!(
        "# watch_overhead: {rounds} rounds of {length:?} per server and concurrency, alternating"
    );
    println!("| clients | server | p50 µs (median of rounds) | p99 µs (median of rounds) |");
    println!("|---:|---|---:|---:|");
    let mut ratios = Vec::new();
    for clients in [1usize, 4] {
        round(off, clients, Duration::from_millis(300)).await;
        round(on, clients, Duration::from_millis(300)).await;
        let (mut p50_off, mut p99_off, mut p50_on, mut p99_on) =
            (Vec::new(), Vec::new(), Vec::new(), Vec::new());
        for r in 0..rounds {
            let order = if r % 2 == 0 { [off, on] } else { [on, off] };
            for addr in order {
                let (p50, p99) = round(addr, clients, length).await;
                if addr == off {
                    p50_off.push(p50);
                    p99_off.push(p99);
                } else {
                    p50_on.push(p50);
                    p99_on.push(p99);
                }
            }
        }
        let (a, b) = (median(&mut p50_off), median(&mut p50_on));
        println!("| {clients} | off | {a:.1} | {:.1} |", median(&mut p99_off));
        println!("| {clients} | on | {b:.1} | {:.1} |", median(&mut p99_on));
        ratios.push((clients, b / a));
    }
    scraping.store(false, Ordering::Relaxed);
    let scraped = scraper.join().expect("scraper");
    for (clients, r) in ratios {
        println!(
            "median latency on/off at {clients} client(s): {r:.3} (target ≤ 1.10) {}",
            if r <= 1.10 { "PASS" } else { "MISS" }
        );
    }
    println!("scraped {scraped} bytes of /metrics and /status while measuring");
    let files = std::fs::read_dir(journal_dir.path()).map_or(0, |d| d.count());
    println!("journal files written: {files}");
}
