//! A closed-loop load generator for a running sidecar, behind `candor bench` and the sidecar
//! comparison benchmark.
//!
//! A run: generate seeded payloads; connect; send every payload once and check its answer
//! ([`verify`]); then C workers each send a request, wait for the answer and send the next, for a
//! warm-up (not recorded) and a timed window. Round trips of requests sent inside the window go
//! into an HDR histogram; throughput is their count over the window. With a server PID, the
//! server's CPU time over the window is read from /proc ([`process`]), as is the generator's own.
//! While timing, requests go out pre-encoded and answers are read only for success ([`wire`]):
//! the generator shares the machine with the server and should spend as little of it as it can.

pub mod payload;
mod precheck;
pub mod process;
pub mod target;
pub mod verify;
pub mod wire;
mod workers;

pub use verify::{Expect, Reference, VerifyError};
pub use workers::HISTOGRAM_SIGNIFICANT_DIGITS;

use crate::proto::v1::calibrator_client::CalibratorClient;
use crate::proto::v1::CalibrateRequest;
use hdrhistogram::Histogram;
use std::net::SocketAddr;
use std::sync::Arc;
use std::time::Duration;
use tonic::transport::{Channel, Endpoint};

/// Longest timed window or warm-up a run accepts.
pub const MAX_DURATION: Duration = Duration::from_secs(3600);
/// Most concurrent workers (each keeps its own latency histogram).
pub const MAX_CONCURRENCY: usize = 1024;
/// Most connections.
pub const MAX_CONNECTIONS: usize = 256;
/// Most logits held in the payload set (payloads × K), about 256 MiB of f32.
pub const MAX_PAYLOAD_VALUES: usize = 64 << 20;
/// How long one request (or opening a stream) may take before it counts as failed; with the
/// window and warm-up this bounds the whole run.
pub const REQUEST_TIMEOUT: Duration = Duration::from_secs(10);
/// How long connecting may take.
pub const CONNECT_TIMEOUT: Duration = Duration::from_secs(5);

/// How requests travel.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Mode {
    /// One Calibrate call per request.
    Unary,
    /// One CalibrateStream per worker; one message per request.
    Stream,
}

impl Mode {
    /// The name used on the command line and in JSON.
    pub fn name(self) -> &'static str {
        match self {
            Mode::Unary => "unary",
            Mode::Stream => "stream",
        }
    }
}

/// Everything a run needs, validated by [`LoadPlan::check`].
#[derive(Debug)]
pub struct LoadPlan {
    /// The server (already resolved and allowed; see [`target::resolve`]).
    pub target: SocketAddr,
    /// Model name sent with each request (empty: the only model loaded).
    pub model: String,
    /// K: logits per request and probabilities per answer.
    pub classes: usize,
    /// Closed-loop workers (requests in flight at once).
    pub concurrency: usize,
    /// HTTP/2 connections the workers share, round robin.
    pub connections: usize,
    /// Load before the timed window, not recorded.
    pub warmup: Duration,
    /// The timed window.
    pub duration: Duration,
    /// Unary or stream.
    pub mode: Mode,
    /// Seed of the payloads.
    pub seed: u64,
    /// Number of distinct payloads, cycled through.
    pub payloads: usize,
    /// What a correct answer looks like.
    pub expect: Expect,
    /// The map the answers must match, if known.
    pub reference: Option<Reference>,
    /// The server's process id, to read its CPU time (Linux /proc).
    pub server_pid: Option<u32>,
}

/// Why a run could not be made or its answers were wrong.
#[derive(Debug, thiserror::Error)]
pub enum LoadError {
    /// A plan value out of range.
    #[error("{0}")]
    Plan(String),
    /// Connecting failed.
    #[error("cannot connect to {addr}: {source}")]
    Connect {
        /// The target.
        addr: SocketAddr,
        /// The transport's error.
        source: tonic::transport::Error,
    },
    /// A checked payload was refused.
    #[error("payload {index} was refused before timing: {reason}")]
    Refused {
        /// Payload index.
        index: usize,
        /// The status or stream problem.
        reason: String,
    },
    /// A checked payload was answered wrongly.
    #[error("payload {index} was answered wrongly: {source}")]
    Wrong {
        /// Payload index.
        index: usize,
        /// What was wrong.
        source: VerifyError,
    },
    /// The latency histogram could not be made or merged (a bug).
    #[error("latency histogram: {0}")]
    Histogram(String),
    /// The server's /proc entry could not be read.
    #[error("server CPU time: {0}")]
    Proc(#[from] process::ProcError),
    /// A worker task died (a bug).
    #[error("a load worker failed: {0}")]
    Worker(#[from] tokio::task::JoinError),
}

impl LoadPlan {
    /// Checks every value against its limit.
    ///
    /// # Errors
    /// [`LoadError::Plan`] naming the first value out of range.
    pub fn check(&self) -> Result<(), LoadError> {
        let bad = |m: String| Err(LoadError::Plan(m));
        if self.classes == 0 {
            return bad("--classes must be at least 1".into());
        }
        if !(1..=MAX_CONCURRENCY).contains(&self.concurrency) {
            return bad(format!(
                "--concurrency must lie in 1..={MAX_CONCURRENCY}, got {}",
                self.concurrency
            ));
        }
        if !(1..=MAX_CONNECTIONS).contains(&self.connections) {
            return bad(format!(
                "--connections must lie in 1..={MAX_CONNECTIONS}, got {}",
                self.connections
            ));
        }
        if self.duration.is_zero() || self.duration > MAX_DURATION || self.warmup > MAX_DURATION {
            return bad(format!(
                "--duration must be above 0 and --warmup at least 0, both at most {MAX_DURATION:?}"
            ));
        }
        if self.payloads == 0 || self.payloads.saturating_mul(self.classes) > MAX_PAYLOAD_VALUES {
            return bad(format!(
                "--payloads × --classes must lie in 1..={MAX_PAYLOAD_VALUES}, got {} × {}",
                self.payloads, self.classes
            ));
        }
        if let Some(r) = &self.reference {
            if r.map().classes() != self.classes {
                return bad(format!(
                    "--map has {} classes but --classes is {}",
                    r.map().classes(),
                    self.classes
                ));
            }
        }
        Ok(())
    }
}

/// What a run measured.
#[derive(Debug)]
pub struct LoadReport {
    /// Payloads sent once and checked before timing.
    pub checked: usize,
    /// Round trips of the requests sent inside the timed window, in nanoseconds.
    pub latency_ns: Histogram<u64>,
    /// From the window's start until the last worker finished.
    pub window: Duration,
    /// Failed requests during warm-up and window.
    pub errors: u64,
    /// The first failure.
    pub first_error: Option<String>,
    /// Server CPU time (user + system) over the window, in seconds, when a PID was given.
    pub server_cpu_secs: Option<f64>,
    /// The load generator's own process CPU time over the window, in seconds (Linux).
    pub client_cpu_secs: Option<f64>,
}

impl LoadReport {
    /// Requests answered in the window.
    pub fn requests(&self) -> u64 {
        self.latency_ns.len()
    }

    /// Requests per second over the window.
    pub fn throughput(&self) -> f64 {
        self.requests() as f64 / self.window.as_secs_f64()
    }

    /// Latency at quantile `q` (0.5 = median), in microseconds.
    pub fn latency_us(&self, q: f64) -> f64 {
        self.latency_ns.value_at_quantile(q) as f64 / 1e3
    }

    /// Server CPU time per answered request, in microseconds.
    pub fn server_cpu_us_per_request(&self) -> Option<f64> {
        self.per_request_us(self.server_cpu_secs)
    }

    /// The load generator's own CPU time per answered request, in microseconds.
    pub fn client_cpu_us_per_request(&self) -> Option<f64> {
        self.per_request_us(self.client_cpu_secs)
    }

    fn per_request_us(&self, secs: Option<f64>) -> Option<f64> {
        let n = self.requests();
        secs.filter(|_| n > 0).map(|s| s * 1e6 / n as f64)
    }
}

/// Runs the plan: payloads, connections, the check, warm-up and timed window.
///
/// # Errors
/// [`LoadError`] when the plan is invalid, the server cannot be reached, an answer is wrong
/// before timing, or /proc cannot be read. Failures during timing are counted in the report.
pub async fn run(plan: &mut LoadPlan) -> Result<LoadReport, LoadError> {
    plan.check()?;
    let requests: Vec<CalibrateRequest> = payload::generate(plan.seed, plan.classes, plan.payloads)
        .into_iter()
        .enumerate()
        .map(|(i, logits)| CalibrateRequest {
            model: plan.model.clone(),
            logits,
            request_id: format!("bench-{i}"),
            ..CalibrateRequest::default()
        })
        .collect();
    let endpoint = Endpoint::from_shared(format!("http://{}", plan.target))
        .map_err(|source| LoadError::Connect {
            addr: plan.target,
            source,
        })?
        .connect_timeout(CONNECT_TIMEOUT)
        .tcp_nodelay(true);
    let mut channels: Vec<Channel> = Vec::with_capacity(plan.connections);
    for _ in 0..plan.connections {
        let channel = endpoint
            .connect()
            .await
            .map_err(|source| LoadError::Connect {
                addr: plan.target,
                source,
            })?;
        channels.push(channel);
    }
    let checked = precheck::check_all(
        &mut CalibratorClient::new(channels[0].clone()),
        &requests,
        plan.mode,
        plan.classes,
        plan.expect,
        plan.reference.as_mut(),
    )
    .await?;
    let encoded: Arc<[wire::Encoded]> = requests.iter().map(wire::Encoded::new).collect();
    drop(requests);

    let start = tokio::time::Instant::now();
    let clock = workers::Clock {
        window_start: start + plan.warmup,
        end: start + plan.warmup + plan.duration,
    };
    let n = encoded.len();
    let handles: Vec<_> = (0..plan.concurrency)
        .map(|w| {
            let client = wire::LeanClient::new(channels[w % channels.len()].clone());
            let first = w * n / plan.concurrency;
            let requests = encoded.clone();
            match plan.mode {
                Mode::Unary => tokio::spawn(workers::unary(client, requests, first, clock)),
                Mode::Stream => tokio::spawn(workers::stream(client, requests, first, clock)),
            }
        })
        .collect();
    tokio::time::sleep_until(clock.window_start).await;
    let cpu_before = plan.server_pid.map(process::cpu_ticks).transpose()?;
    let own_before = process::cpu_ticks(std::process::id()).ok();
    let mut tallies = Vec::with_capacity(handles.len());
    for h in handles {
        tallies.push(h.await??);
    }
    let window = clock.window_start.elapsed();
    let cpu_after = plan.server_pid.map(process::cpu_ticks).transpose()?;
    let own_after = process::cpu_ticks(std::process::id()).ok();
    let tick = 1.0 / process::clock_ticks_per_sec() as f64;
    let secs = |a: Option<u64>, b: Option<u64>| Some(b?.saturating_sub(a?) as f64 * tick);
    let server_cpu_secs = secs(cpu_before, cpu_after);
    let client_cpu_secs = secs(own_before, own_after);

    let mut latency_ns = Histogram::new(HISTOGRAM_SIGNIFICANT_DIGITS)
        .map_err(|e| LoadError::Histogram(e.to_string()))?;
    let (mut errors, mut first_error) = (0, None);
    for t in tallies {
        latency_ns
            .add(&t.latency_ns)
            .map_err(|e| LoadError::Histogram(e.to_string()))?;
        errors += t.errors;
        first_error = first_error.or(t.first_error);
    }
    Ok(LoadReport {
        checked,
        latency_ns,
        window,
        errors,
        first_error,
        server_cpu_secs,
        client_cpu_secs,
    })
}
