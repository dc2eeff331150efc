//! `candor bench`: load a running sidecar in a closed loop and report throughput and latency.

use super::{say, EXIT_CHECK_FAILED};
use crate::loadgen::{self, target, Expect, LoadError, LoadPlan, LoadReport, Mode, Reference};
use crate::mapfile::CalibrationMap;
use anyhow::Context;
use serde_json::{json, Value};
use std::path::PathBuf;
use std::process::ExitCode;
use std::time::Duration;

/// Arguments of `candor bench`.
#[derive(Debug, clap::Args)]
pub struct BenchArgs {
    /// The sidecar, HOST:PORT. Must be loopback unless --allow-remote is given.
    #[arg(long, default_value = "127.0.0.1:50551", value_name = "ADDR")]
    target: String,
    /// Allow a target that is not a loopback address.
    #[arg(long)]
    allow_remote: bool,
    /// Model to call (empty: the only model loaded).
    #[arg(long, default_value = "", value_name = "M")]
    model: String,
    /// Number of classes K: logits per request.
    #[arg(long, value_name = "K")]
    classes: usize,
    /// Requests in flight at once (closed-loop workers).
    #[arg(long, default_value_t = 1, value_name = "C")]
    concurrency: usize,
    /// HTTP/2 connections the workers share.
    #[arg(long, default_value_t = 1, value_name = "N")]
    connections: usize,
    /// Length of the timed window, e.g. 10s or 500ms.
    #[arg(long, default_value = "10s", value_parser = humantime::parse_duration, value_name = "D")]
    duration: Duration,
    /// Load before the timed window, not recorded.
    #[arg(long, default_value = "2s", value_parser = humantime::parse_duration, value_name = "W")]
    warmup: Duration,
    /// One Calibrate call per request, or one CalibrateStream per worker.
    #[arg(long, value_enum, default_value = "unary")]
    mode: ModeArg,
    /// Seed of the generated logits.
    #[arg(long, default_value_t = 1)]
    seed: u64,
    /// Distinct payloads, each checked once before timing and then cycled through.
    #[arg(long, default_value_t = 256, value_name = "N")]
    payloads: usize,
    /// The map the sidecar serves for this model: answers are compared with its offline apply.
    #[arg(long, value_name = "FILE")]
    map: Option<PathBuf>,
    /// The sidecar's process id: report its CPU time per request (Linux /proc).
    #[arg(long, value_name = "PID")]
    server_pid: Option<u32>,
    /// Threads of the load generator's own runtime.
    #[arg(long, default_value_t = 1, value_name = "N")]
    client_threads: usize,
    /// Print one JSON object instead of text.
    #[arg(long)]
    json: bool,
}

/// How requests travel.
#[derive(Debug, Clone, Copy, clap::ValueEnum)]
enum ModeArg {
    /// One Calibrate call per request.
    Unary,
    /// One bidirectional CalibrateStream per worker.
    Stream,
}

pub(super) fn run(args: &BenchArgs) -> anyhow::Result<ExitCode> {
    let addr = target::resolve(&args.target, args.allow_remote)?;
    let reference = match &args.map {
        Some(path) => {
            let map = CalibrationMap::load(path)?;
            Some(
                Reference::try_new(map)
                    .map_err(|e| anyhow::anyhow!("--map {}: {e}", path.display()))?,
            )
        }
        None => None,
    };
    let mut plan = LoadPlan {
        target: addr,
        model: args.model.clone(),
        classes: args.classes,
        concurrency: args.concurrency,
        connections: args.connections,
        warmup: args.warmup,
        duration: args.duration,
        mode: match args.mode {
            ModeArg::Unary => Mode::Unary,
            ModeArg::Stream => Mode::Stream,
        },
        seed: args.seed,
        payloads: args.payloads,
        expect: Expect::Probabilities,
        reference,
        server_pid: args.server_pid,
    };
    plan.check()?;
    anyhow::ensure!(
        (1..=loadgen::MAX_CONCURRENCY).contains(&args.client_threads),
        "--client-threads must lie in 1..={}",
        loadgen::MAX_CONCURRENCY
    );
    let runtime = tokio::runtime::Builder::new_multi_thread()
        .worker_threads(args.client_threads)
        .enable_all()
        .build()
        .context("starting the async runtime")?;
    match runtime.block_on(loadgen::run(&mut plan)) {
        Ok(report) => {
            if args.json {
                say!("{}", json_of(&plan, &report));
            } else {
                print_text(&plan, &report);
            }
            Ok(if report.errors == 0 {
                ExitCode::SUCCESS
            } else {
                ExitCode::from(EXIT_CHECK_FAILED)
            })
        }
        Err(e @ (LoadError::Wrong { .. } | LoadError::Refused { .. })) => {
            say!("FAILED {}: {e}", plan.target);
            Ok(ExitCode::from(EXIT_CHECK_FAILED))
        }
        Err(e) => Err(e.into()),
    }
}

fn latency_json(r: &LoadReport) -> Value {
    let us = |ns: u64| ns as f64 / 1e3;
    json!({
        "min": us(r.latency_ns.min()),
        "mean": r.latency_ns.mean() / 1e3,
        "p50": r.latency_us(0.5),
        "p90": r.latency_us(0.9),
        "p99": r.latency_us(0.99),
        "p99_9": r.latency_us(0.999),
        "max": us(r.latency_ns.max()),
    })
}

fn json_of(plan: &LoadPlan, r: &LoadReport) -> Value {
    json!({
        "target": plan.target.to_string(),
        "model": plan.model,
        "classes": plan.classes,
        "mode": plan.mode.name(),
        "concurrency": plan.concurrency,
        "connections": plan.connections,
        "warmup_secs": plan.warmup.as_secs_f64(),
        "duration_secs": plan.duration.as_secs_f64(),
        "seed": plan.seed,
        "payloads": plan.payloads,
        "checked": r.checked,
        "checked_against_map": plan.reference.as_ref().map(|m| m.map().digest().to_owned()),
        "requests": r.requests(),
        "errors": r.errors,
        "first_error": r.first_error,
        "window_secs": r.window.as_secs_f64(),
        "throughput_per_sec": r.throughput(),
        "latency_us": latency_json(r),
        "client_cpu_us_per_request": r.client_cpu_us_per_request(),
        "server": plan.server_pid.map(|pid| json!({
            "pid": pid,
            "cpu_secs": r.server_cpu_secs,
            "cpu_us_per_request": r.server_cpu_us_per_request(),
        })),
    })
}

fn print_text(plan: &LoadPlan, r: &LoadReport) {
    let model = if plan.model.is_empty() {
        "(the only model)"
    } else {
        &plan.model
    };
    say!(
        "candor bench: {} model {model}, K = {}, {}, concurrency {} on {} connection(s)",
        plan.target,
        plan.classes,
        plan.mode.name(),
        plan.concurrency,
        plan.connections
    );
    let against = plan.reference.as_ref().map_or(String::new(), |m| {
        format!(", matching map {}", m.map().digest())
    });
    say!(
        "checked {} payloads before timing (probabilities summing to 1{against})",
        r.checked
    );
    say!(
        "{} requests in {:.2} s after {:.1} s warm-up: {:.0} per second, {} errors",
        r.requests(),
        r.window.as_secs_f64(),
        plan.warmup.as_secs_f64(),
        r.throughput(),
        r.errors
    );
    say!(
        "latency µs: p50 {:.1}  p90 {:.1}  p99 {:.1}  p99.9 {:.1}  max {:.1}  (mean {:.1})",
        r.latency_us(0.5),
        r.latency_us(0.9),
        r.latency_us(0.99),
        r.latency_us(0.999),
        r.latency_ns.max() as f64 / 1e3,
        r.latency_ns.mean() / 1e3
    );
    if let (Some(pid), Some(cpu)) = (plan.server_pid, r.server_cpu_secs) {
        say!(
            "server CPU (pid {pid}): {cpu:.2} s, {:.1} µs per request",
            r.server_cpu_us_per_request().unwrap_or(f64::NAN)
        );
    }
    if let Some(us) = r.client_cpu_us_per_request() {
        say!("load generator CPU: {us:.1} µs per request");
    }
    if let Some(e) = &r.first_error {
        say!("first error: {e}");
    }
}
