//! The sidecar against the transport floor and a hand-written Python server, with the same client,
//! payloads and machine, in one run (issue targets: candor's server CPU per request at most 1.15x
//! the floor's and throughput at least 0.9x for K = 10 and 1000; p50 at C = 1 at most 1.1x the
//! floor's; throughput at least 10x the Python server's at C = 32; a sidecar holding 100 matrix
//! maps of K = 1000 resident in less than their parameters plus 50 MiB).
//!
//! Run: `cargo bench --bench sidecar_compare` (about 6 minutes, plus writing the memory maps once;
//! `-- --quick` for a short run, `--no-python`, `--no-memory`, `--memory-only`, `--rounds N`,
//! `--serve-arg ARG` to pass a flag to `candor serve`). Servers, each its own process:
//! - floor: a bare tonic Calibrator echoing the logits with the message types prost generates
//!   (this binary re-invoked with `--floor`): the floor the targets are measured against;
//! - bulk floor: the same echo with candor's message types, which move float arrays in bulk
//!   (`--floor --bulk`): candor's transport without calibration;
//! - candor: the release `candor serve` with temperature and isotonic maps for K = 10 and 1000;
//! - python: `bench/python_server.py`, grpcio + numpy, temperature maps.
//!
//! The client is `candor bench`'s load generator (`candor::loadgen`) on a one-thread runtime in
//! this process: unary Calibrate, one connection, 256 seeded payloads checked before timing (for
//! candor and Python against the offline apply of the map). With two or more CPUs the load
//! generator is pinned to the first and every server to the last (`--no-pin` to leave the
//! scheduler free): a server's figures are then those of one core, and the client and server do
//! not trade cores between runs, which made unpinned runs vary by ±15%. Each round measures
//! every server once in a rotated order; server CPU time is utime + stime from /proc/PID/stat
//! over the timed window.
//! Everything measured is also written to `target/tmp/sidecar-compare/results.json`.

mod floor;
mod maps;
mod memory;
mod servers;
mod table;

use candor::loadgen::{self, Expect, LoadPlan, Mode, Reference};
use clap::Parser;
use serde_json::json;
use std::path::PathBuf;
use std::time::Duration;
use table::{Cell, Sample, SERVERS};

type Failure = Box<dyn std::error::Error>;

/// Threads of the client's runtime (`candor bench`'s default).
const CLIENT_THREADS: usize = 1;
/// Flags that switch on the sidecar's telemetry, for measuring candor as deployed (the decision
/// log runs in every `candor serve`; a journal directory is not set).
const TELEMETRY_SERVE_ARGS: &[&str] = &["--telemetry-listen", "127.0.0.1:0"];
/// Payloads per run and their seed (the same for every server).
const PAYLOADS: usize = 256;
const SEED: u64 = 1;
/// How long `candor serve` may take to load the comparison maps.
const READY_TIMEOUT: Duration = Duration::from_secs(60);

#[derive(Debug, Parser)]
#[command(about = "candor serve against the transport floor and a Python server")]
struct Args {
    /// Short run: 3 rounds of 1 s windows.
    #[arg(long)]
    quick: bool,
    /// Rounds (default 10, quick 3).
    #[arg(long)]
    rounds: Option<usize>,
    /// Timed window per run in seconds (default 2, quick 1).
    #[arg(long)]
    duration_secs: Option<f64>,
    /// Warm-up per run in seconds (default 0.5, quick 0.3).
    #[arg(long)]
    warmup_secs: Option<f64>,
    /// Leave out the Python server.
    #[arg(long)]
    no_python: bool,
    /// Leave out the memory measurement.
    #[arg(long)]
    no_memory: bool,
    /// Only the memory measurement.
    #[arg(long)]
    memory_only: bool,
    /// Only these K (default 10 and 1000).
    #[arg(long, value_delimiter = ',', default_values_t = [10, 1000])]
    classes: Vec<usize>,
    /// Only these concurrencies (default 1 and 32).
    #[arg(long, value_delimiter = ',', default_values_t = [1, 32])]
    concurrency: Vec<usize>,
    /// Only these servers: floor, temperature, isotonic, python, bulk-floor (default all).
    #[arg(long, value_delimiter = ',')]
    servers: Vec<String>,
    /// Extra flag for `candor serve` (repeatable).
    #[arg(long = "serve-arg", allow_hyphen_values = true)]
    serve_args: Vec<String>,
    /// Do not pin: by default, with two or more CPUs, the load generator runs on the first CPU
    /// and every server on the last (`taskset`), so a server's throughput is what one core
    /// takes and the two sides do not trade places between runs.
    #[arg(long)]
    no_pin: bool,
    /// Run as the transport floor server (internal).
    #[arg(long, hide = true)]
    floor: bool,
    /// With `--floor`: serve candor's message types (internal).
    #[arg(long, hide = true)]
    bulk: bool,
    /// Passed by `cargo bench`; ignored.
    #[arg(long, hide = true)]
    bench: bool,
}

fn main() -> Result<(), Failure> {
    let args = Args::parse();
    if args.floor {
        return floor::serve_child(args.bulk);
    }
    let runtime = tokio::runtime::Builder::new_multi_thread()
        .worker_threads(CLIENT_THREADS)
        .enable_all()
        .build()?;
    let work = PathBuf::from(env!("CARGO_TARGET_TMPDIR")).join("sidecar-compare");
    let mut serve_args: Vec<String> = TELEMETRY_SERVE_ARGS.iter().map(|s| s.to_string()).collect();
    serve_args.extend(args.serve_args.iter().cloned());
    // Read before pinning, which leaves this process one CPU.
    let machine = machine();
    let cpus = std::thread::available_parallelism().map_or(1, |n| n.get());
    let pin = if args.no_pin || cpus < 2 {
        None
    } else {
        servers::pin_self(0)?;
        Some(cpus - 1)
    };
    let mut results = json!({"machine": machine,
        "pinning": pin.map(|cpu| json!({"load_generator_cpu": 0, "server_cpu": cpu}))});
    if let Some(cpu) = pin {
        eprintln!("load generator pinned to CPU 0, servers to CPU {cpu}");
    }
    if !args.memory_only {
        let (cells, ratios, met) = compare(&args, &runtime, &work, &serve_args, pin)?;
        results["comparison"] = json!({"cells": cells, "ratios": ratios, "targets_met": met});
    }
    if !args.no_memory || args.memory_only {
        results["memory"] = memory::measure(&runtime, &work.join("matrix-maps"), &serve_args, pin)?;
    }
    std::fs::create_dir_all(&work)?;
    let out = work.join("results.json");
    std::fs::write(&out, serde_json::to_string_pretty(&results)?)?;
    println!("\nwritten {}", out.display());
    Ok(())
}

/// What the run ran on, for the record.
fn machine() -> serde_json::Value {
    let cpu = std::fs::read_to_string("/proc/cpuinfo")
        .ok()
        .and_then(|t| {
            t.lines()
                .find(|l| l.starts_with("model name"))
                .map(|l| l.to_owned())
        })
        .and_then(|l| l.split_once(':').map(|(_, v)| v.trim().to_owned()));
    let load = std::fs::read_to_string("/proc/loadavg").ok();
    json!({"cores": std::thread::available_parallelism().map(|n| n.get()).ok(),
           "cpu": cpu, "loadavg_at_end": load.map(|l| l.trim().to_owned())})
}

type Compared = (serde_json::Value, serde_json::Value, bool);

fn compare(
    args: &Args,
    runtime: &tokio::runtime::Runtime,
    work: &std::path::Path,
    serve_args: &[String],
    pin: servers::Pin,
) -> Result<Compared, Failure> {
    let rounds = args
        .rounds
        .unwrap_or(if args.quick { 3 } else { 10 })
        .max(1);
    let secs = |v: Option<f64>, full: f64, quick: f64| {
        Duration::from_secs_f64(v.unwrap_or(if args.quick { quick } else { full }))
    };
    let duration = secs(args.duration_secs, 2.0, 1.0);
    let warmup = secs(args.warmup_secs, 0.5, 0.3);

    let map_dir = work.join("compare-maps");
    let python_dir = work.join("python-maps");
    for d in [&map_dir, &python_dir] {
        let _ = std::fs::remove_dir_all(d);
        std::fs::create_dir_all(d)?;
    }
    let mut python_files = Vec::new();
    for &k in &args.classes {
        maps::write_compact(&maps::temperature(k)?, &map_dir)?;
        maps::write_compact(&maps::isotonic(k)?, &map_dir)?;
        python_files.push(maps::write_compact(&maps::temperature(k)?, &python_dir)?);
    }
    let wanted = |s: usize| {
        let short = ["floor", "temperature", "isotonic", "python", "bulk-floor"][s];
        args.servers.is_empty() || args.servers.iter().any(|n| n == short)
    };
    let floor = servers::floor(pin, false)?;
    let bulk_floor = servers::floor(pin, true)?;
    let candor = servers::candor(runtime, &map_dir, serve_args, READY_TIMEOUT, pin)?;
    let python = if args.no_python || !wanted(3) {
        None
    } else {
        Some(servers::python(&python_files, pin)?)
    };
    eprintln!(
        "servers: floor pid {} on {}, bulk floor pid {} on {}, candor pid {} on {}{}",
        floor.pid,
        floor.addr,
        bulk_floor.pid,
        bulk_floor.addr,
        candor.pid,
        candor.addr,
        python.as_ref().map_or(String::new(), |p| format!(
            ", python pid {} on {}",
            p.pid, p.addr
        ))
    );

    let mut cells = Vec::new();
    for &k in &args.classes {
        for &c in &args.concurrency {
            let mut cell = Cell {
                classes: k,
                concurrency: c,
                rounds: Vec::new(),
            };
            for r in 0..rounds {
                let mut row = [None; SERVERS.len()];
                for step in 0..SERVERS.len() {
                    let s = (step + r) % SERVERS.len();
                    if !wanted(s) {
                        continue;
                    }
                    let (server, model, map) = match s {
                        0 => (&floor, maps::temperature_model(k), None),
                        1 => (
                            &candor,
                            maps::temperature_model(k),
                            Some(maps::temperature(k)?),
                        ),
                        2 => (&candor, maps::isotonic_model(k), Some(maps::isotonic(k)?)),
                        4 => (&bulk_floor, maps::temperature_model(k), None),
                        _ => match &python {
                            Some(p) => (p, maps::temperature_model(k), Some(maps::temperature(k)?)),
                            None => continue,
                        },
                    };
                    let sample = measure(runtime, server, model, map, k, c, warmup, duration)?;
                    eprintln!(
                        "K={k:<4} C={c:<2} round {} {:<19} {:>8.0} req/s  p50 {:>7.1} µs  p99 {:>8.1} µs  CPU {:>6.1} µs/req",
                        r + 1, SERVERS[s], sample.throughput, sample.p50_us, sample.p99_us, sample.cpu_us
                    );
                    row[s] = Some(sample);
                }
                cell.rounds.push(row);
            }
            cells.push(cell);
        }
    }
    let (ratios, met) = table::print(&cells);
    println!(
        "targets {}",
        if met {
            "met"
        } else {
            "MISSED (see MISS above)"
        }
    );
    let cells_json = cells
        .iter()
        .map(|c| {
            json!({"classes": c.classes, "concurrency": c.concurrency,
                "rounds": c.rounds.iter().map(|r| r.iter().zip(SERVERS).map(|(s, n)|
                    json!({"server": n, "sample": s.map(|s| s.json())})).collect::<Vec<_>>()).collect::<Vec<_>>()})
        })
        .collect();
    Ok((serde_json::Value::Array(cells_json), ratios, met))
}

/// One timed run of the load generator against one server.
#[allow(clippy::too_many_arguments)]
fn measure(
    runtime: &tokio::runtime::Runtime,
    server: &servers::Server,
    model: String,
    map: Option<candor::mapfile::CalibrationMap>,
    classes: usize,
    concurrency: usize,
    warmup: Duration,
    duration: Duration,
) -> Result<Sample, Failure> {
    let expect = if map.is_some() {
        Expect::Probabilities
    } else {
        Expect::SameLength
    };
    let mut plan = LoadPlan {
        target: server.addr,
        model,
        classes,
        concurrency,
        connections: 1,
        warmup,
        duration,
        mode: Mode::Unary,
        seed: SEED,
        payloads: PAYLOADS,
        expect,
        reference: map.map(Reference::try_new).transpose()?,
        server_pid: Some(server.pid),
    };
    let report = runtime
        .block_on(loadgen::run(&mut plan))
        .map_err(|e| format!("{}: {e}\n{}", server.name, server.tail()))?;
    if report.errors > 0 {
        return Err(format!(
            "{}: {} failed requests, first: {}",
            server.name,
            report.errors,
            report.first_error.unwrap_or_default()
        )
        .into());
    }
    Ok(Sample {
        throughput: report.throughput(),
        p50_us: report.latency_us(0.5),
        p99_us: report.latency_us(0.99),
        cpu_us: report.server_cpu_us_per_request().unwrap_or(f64::NAN),
        client_cpu_us: report.client_cpu_us_per_request().unwrap_or(f64::NAN),
    })
}
