//! Counters and histograms of the running sidecar, exposed in the Prometheus text format.
//!
//! Nothing here is touched under a lock per request: the request path bumps atomics
//! ([`RpcStats`], and the registry's per-version counters); a scrape reads them through one
//! [`Collector`] and encodes them with prometheus-client. Labels are bounded: model, map version,
//! decision, status code, never a request id.

mod http;
mod live;

pub use http::{router, run_telemetry};

use crate::journal::{DecisionLog, JournalStats};
use crate::registry::Registry;
use prometheus_client::collector::Collector;
use prometheus_client::encoding::{DescriptorEncoder, EncodeMetric};
use prometheus_client::metrics::counter::ConstCounter;
use prometheus_client::metrics::gauge::ConstGauge;
use prometheus_client::metrics::MetricType;
use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::Arc;
use std::time::Duration;

/// Upper bounds of the request-duration buckets, in seconds (25 µs to 100 ms, then +Inf).
pub const LATENCY_BUCKETS_SECS: [f64; 12] = [
    25e-6, 50e-6, 100e-6, 250e-6, 500e-6, 1e-3, 2.5e-3, 5e-3, 10e-3, 25e-3, 50e-3, 100e-3,
];

/// gRPC status codes 0..=16.
const CODES: usize = 17;

/// Request counters kept by the data plane: errors by status code and a latency histogram.
#[derive(Debug)]
pub struct RpcStats {
    errors: [AtomicU64; CODES],
    /// One count per bucket of [`LATENCY_BUCKETS_SECS`], plus the +Inf bucket.
    buckets: [AtomicU64; LATENCY_BUCKETS_SECS.len() + 1],
    sum_ns: AtomicU64,
    outcomes: AtomicU64,
}

impl Default for RpcStats {
    fn default() -> Self {
        RpcStats {
            errors: std::array::from_fn(|_| AtomicU64::new(0)),
            buckets: std::array::from_fn(|_| AtomicU64::new(0)),
            sum_ns: AtomicU64::new(0),
            outcomes: AtomicU64::new(0),
        }
    }
}

impl RpcStats {
    /// Counts one refused request or row with its gRPC code.
    #[inline]
    pub fn error(&self, code: tonic::Code) {
        let i = (code as usize).min(CODES - 1);
        self.errors[i].fetch_add(1, Ordering::Relaxed);
    }

    /// Records how long one answered request or row took in the handler.
    #[inline]
    pub fn observe(&self, took: Duration) {
        let secs = took.as_secs_f64();
        let i = LATENCY_BUCKETS_SECS
            .iter()
            .position(|&b| secs <= b)
            .unwrap_or(LATENCY_BUCKETS_SECS.len());
        self.buckets[i].fetch_add(1, Ordering::Relaxed);
        let ns = u64::try_from(took.as_nanos()).unwrap_or(u64::MAX);
        self.sum_ns.fetch_add(ns, Ordering::Relaxed);
    }

    /// Counts one outcome (true label) received.
    pub fn outcome(&self) {
        self.outcomes.fetch_add(1, Ordering::Relaxed);
    }

    /// Errors counted for `code`.
    pub fn errors(&self, code: tonic::Code) -> u64 {
        self.errors[(code as usize).min(CODES - 1)].load(Ordering::Relaxed)
    }
}

/// Everything a scrape reports, over the live registry and the data plane's counters.
#[derive(Debug, Clone)]
pub struct Telemetry {
    registry: Arc<Registry>,
    stats: Arc<RpcStats>,
    journal: Option<Arc<JournalStats>>,
    live: Option<DecisionLog>,
}

impl Telemetry {
    /// Telemetry of `registry` and `stats`.
    pub fn new(registry: Arc<Registry>, stats: Arc<RpcStats>) -> Self {
        Telemetry {
            registry,
            stats,
            journal: None,
            live: None,
        }
    }

    /// Also report the live quality windows of `log` (and its journal counters).
    #[must_use]
    pub fn with_live(mut self, log: DecisionLog) -> Self {
        self.journal = Some(log.stats().clone());
        self.live = Some(log);
        self
    }

    /// The decision log whose live quality is reported, if any.
    pub fn live(&self) -> Option<&DecisionLog> {
        self.live.as_ref()
    }

    /// Also report the decision journal's counters.
    #[must_use]
    pub fn with_journal(mut self, journal: Arc<JournalStats>) -> Self {
        self.journal = Some(journal);
        self
    }

    /// The registry whose readiness `/ready` reports.
    pub fn registry(&self) -> &Arc<Registry> {
        &self.registry
    }

    /// The exposition text (OpenMetrics text format, which Prometheus reads).
    pub fn encode(&self) -> String {
        let mut reg = prometheus_client::registry::Registry::with_prefix("candor");
        reg.register_collector(Box::new(self.clone()));
        let mut out = String::new();
        // Writing to a String cannot fail.
        let _ = prometheus_client::encoding::text::encode(&mut out, &reg);
        out
    }
}

fn family<M: EncodeMetric>(
    encoder: &mut DescriptorEncoder,
    name: &str,
    help: &str,
    rows: &[([(&str, &str); 3], M)],
) -> Result<(), std::fmt::Error> {
    let Some(first) = rows.first() else {
        return Ok(());
    };
    let mut f = encoder.encode_descriptor(name, help, None, first.1.metric_type())?;
    for (labels, m) in rows {
        m.encode(f.encode_family(labels)?)?;
    }
    Ok(())
}

impl Collector for Telemetry {
    fn encode(&self, mut encoder: DescriptorEncoder) -> Result<(), std::fmt::Error> {
        let counts = self.registry.decision_counts();
        let mut decisions = Vec::new();
        let mut audits = Vec::new();
        for (m, v, a, d, audited) in &counts {
            decisions.push((
                [
                    ("model", m.as_str()),
                    ("map_version", v),
                    ("decision", "accept"),
                ],
                ConstCounter::new(*a),
            ));
            decisions.push((
                [
                    ("model", m.as_str()),
                    ("map_version", v),
                    ("decision", "defer"),
                ],
                ConstCounter::new(*d),
            ));
            audits.push((
                [
                    ("model", m.as_str()),
                    ("map_version", v),
                    ("decision", "accept"),
                ],
                ConstCounter::new(*audited),
            ));
        }
        family(
            &mut encoder,
            "requests",
            "Requests answered, by model, map version and decision.",
            &decisions,
        )?;
        family(
            &mut encoder,
            "audit_samples",
            "Accepted items marked for audit.",
            &audits,
        )?;

        let mut f = encoder.encode_descriptor(
            "request_errors",
            "Requests and rows refused, by gRPC status code.",
            None,
            MetricType::Counter,
        )?;
        for (i, c) in self.stats.errors.iter().enumerate() {
            let n = c.load(Ordering::Relaxed);
            if n > 0 {
                let code = format!("{:?}", tonic::Code::from(i as i32));
                ConstCounter::new(n).encode(f.encode_family(&[("code", code.as_str())])?)?;
            }
        }

        let mut buckets = Vec::with_capacity(LATENCY_BUCKETS_SECS.len() + 1);
        let mut count = 0;
        for (i, b) in self.stats.buckets.iter().enumerate() {
            let n = b.load(Ordering::Relaxed);
            count += n;
            buckets.push((
                LATENCY_BUCKETS_SECS
                    .get(i)
                    .copied()
                    .unwrap_or(f64::INFINITY),
                n,
            ));
        }
        let sum = self.stats.sum_ns.load(Ordering::Relaxed) as f64 * 1e-9;
        let mut h = encoder.encode_descriptor(
            "request_duration_seconds",
            "Time from a decoded request to its answer, in the handler.",
            None,
            MetricType::Histogram,
        )?;
        h.encode_histogram::<prometheus_client::encoding::NoLabelSet>(sum, count, &buckets, None)?;

        let outcomes = ConstCounter::new(self.stats.outcomes.load(Ordering::Relaxed));
        outcomes.encode(encoder.encode_descriptor(
            "outcomes",
            "True labels received for earlier decisions.",
            None,
            MetricType::Counter,
        )?)?;

        let view = self.registry.view();
        ConstCounter::new(view.publishes_total).encode(encoder.encode_descriptor(
            "map_publications",
            "Snapshots of changed maps published.",
            None,
            MetricType::Counter,
        )?)?;
        ConstCounter::new(view.rejections_total).encode(encoder.encode_descriptor(
            "map_rejections",
            "Map files, pointers or pushes refused.",
            None,
            MetricType::Counter,
        )?)?;
        let mut info = Vec::new();
        for m in &view.models {
            for v in &m.versions {
                let state = match v.state {
                    crate::registry::VersionState::Active => "active",
                    crate::registry::VersionState::Canary => "canary",
                    crate::registry::VersionState::Shadow => "shadow",
                    _ => continue,
                };
                info.push((m.model.clone(), v.version.clone(), state));
            }
        }
        let rows: Vec<_> = info
            .iter()
            .map(|(m, v, s)| {
                (
                    [
                        ("model", m.as_str()),
                        ("map_version", v.as_str()),
                        ("state", *s),
                    ],
                    ConstGauge::new(1i64),
                )
            })
            .collect();
        family(
            &mut encoder,
            "map_serving",
            "Map versions serving requests (1), by state.",
            &rows,
        )?;
        if let Some(j) = &self.journal {
            for (name, help, v) in [
                ("journal_records", "Records written to the decision journal.", &j.written),
                ("journal_dropped", "Decision-log records dropped (writer behind, or a failed write); requests are never held up.", &j.dropped),
                ("journal_write_errors", "Journal writes that failed (full or broken disk).", &j.write_errors),
            ] {
                ConstCounter::new(v.load(Ordering::Relaxed)).encode(encoder.encode_descriptor(
                    name,
                    help,
                    None,
                    MetricType::Counter,
                )?)?;
            }
        }
        if let Some(log) = &self.live {
            live::encode(&mut encoder, &log.live())?;
        }
        ConstGauge::new(i64::from(self.registry.is_ready())).encode(encoder.encode_descriptor(
            "ready",
            "1 once every model has a valid active map.",
            None,
            MetricType::Gauge,
        )?)?;
        Ok(())
    }
}
