//! Medians, paired ratios and the printed tables.
//!
//! Each round measures every server once, back to back, so a ratio taken within a round compares
//! runs that met the same background load; the reported ratio is the median of the per-round
//! ratios, and the reported absolute figures are medians over rounds.

use serde_json::{json, Value};

/// Issue targets.
pub const CPU_RATIO_MAX: f64 = 1.15;
pub const THROUGHPUT_RATIO_MIN: f64 = 0.9;
pub const P50_RATIO_MAX_AT_C1: f64 = 1.1;
pub const PYTHON_RATIO_MIN_AT_C32: f64 = 10.0;

/// One measurement of one server.
#[derive(Debug, Clone, Copy)]
pub struct Sample {
    pub throughput: f64,
    pub p50_us: f64,
    pub p99_us: f64,
    pub cpu_us: f64,
    /// The load generator's own CPU per request (it shares the machine).
    pub client_cpu_us: f64,
}

impl Sample {
    pub fn json(&self) -> Value {
        json!({"throughput_per_sec": self.throughput, "p50_us": self.p50_us,
               "p99_us": self.p99_us, "cpu_us_per_request": self.cpu_us,
               "client_cpu_us_per_request": self.client_cpu_us})
    }
}

/// The servers compared, in their order within a round before rotation.
pub const SERVERS: [&str; 5] = [
    "floor",
    "candor temperature",
    "candor isotonic",
    "python temperature",
    "bulk floor",
];
/// Index of the bulk floor in SERVERS.
const BULK_FLOOR: usize = 4;

/// Every round's samples for one (K, C): `rounds[r][s]` is server `s` (index into SERVERS) in
/// round `r`; None when that server was not run.
pub struct Cell {
    pub classes: usize,
    pub concurrency: usize,
    pub rounds: Vec<[Option<Sample>; SERVERS.len()]>,
}

pub fn median(mut v: Vec<f64>) -> f64 {
    v.retain(|x| x.is_finite());
    if v.is_empty() {
        return f64::NAN;
    }
    v.sort_by(f64::total_cmp);
    let n = v.len();
    if n % 2 == 1 {
        v[n / 2]
    } else {
        (v[n / 2 - 1] + v[n / 2]) / 2.0
    }
}

impl Cell {
    fn values(&self, s: usize, f: fn(&Sample) -> f64) -> Vec<f64> {
        self.rounds
            .iter()
            .filter_map(|r| r[s].as_ref().map(f))
            .collect()
    }

    /// Median over rounds of server `s`'s figure.
    pub fn median_of(&self, s: usize, f: fn(&Sample) -> f64) -> f64 {
        median(self.values(s, f))
    }

    /// Median over rounds of (server `a`'s figure / server `b`'s) within each round.
    pub fn ratio(&self, a: usize, b: usize, f: fn(&Sample) -> f64) -> f64 {
        median(
            self.rounds
                .iter()
                .filter_map(|r| Some(f(r[a].as_ref()?) / f(r[b].as_ref()?)))
                .collect(),
        )
    }
}

pub const THROUGHPUT: fn(&Sample) -> f64 = |s| s.throughput;
pub const P50: fn(&Sample) -> f64 = |s| s.p50_us;
pub const P99: fn(&Sample) -> f64 = |s| s.p99_us;
pub const CPU: fn(&Sample) -> f64 = |s| s.cpu_us;

fn mark(ok: bool) -> &'static str {
    if ok {
        "ok"
    } else {
        "MISS"
    }
}

/// Prints the medians of every cell, then the ratio table with the targets; returns the ratios
/// as JSON and whether every target was met.
pub fn print(cells: &[Cell]) -> (Value, bool) {
    println!();
    println!("Medians over rounds (unary Calibrate, 1 connection)");
    println!(
        "{:>5} {:>3}  {:<20} {:>10} {:>9} {:>9} {:>11} {:>12}",
        "K", "C", "server", "req/s", "p50 µs", "p99 µs", "CPU µs/req", "client µs/req"
    );
    for c in cells {
        for (s, name) in SERVERS.iter().enumerate() {
            if c.values(s, THROUGHPUT).is_empty() {
                continue;
            }
            println!(
                "{:>5} {:>3}  {:<20} {:>10.0} {:>9.1} {:>9.1} {:>11.1} {:>12.1}",
                c.classes,
                c.concurrency,
                name,
                c.median_of(s, THROUGHPUT),
                c.median_of(s, P50),
                c.median_of(s, P99),
                c.median_of(s, CPU),
                c.median_of(s, |x| x.client_cpu_us)
            );
        }
    }
    println!();
    println!("Ratios (median of per-round ratios); targets: req/s ≥ {THROUGHPUT_RATIO_MIN}x floor, CPU ≤ {CPU_RATIO_MAX}x floor,");
    println!("p50 ≤ {P50_RATIO_MAX_AT_C1}x floor at C = 1, req/s ≥ {PYTHON_RATIO_MIN_AT_C32}x Python at C = 32");
    println!(
        "{:<12} {:>5} {:>3}  {:>14} {:>14} {:>10} {:>14} {:>15} {:>10}",
        "candor map",
        "K",
        "C",
        "req/s / floor",
        "p50 / floor",
        "p99/floor",
        "CPU / floor",
        "req/s / Python",
        "CPU / bulk"
    );
    let mut all_met = true;
    let mut out = Vec::new();
    for c in cells {
        for (s, map) in [(1usize, "temperature"), (2, "isotonic")] {
            if c.values(s, THROUGHPUT).is_empty() {
                continue;
            }
            let thr = c.ratio(s, 0, THROUGHPUT);
            let p50 = c.ratio(s, 0, P50);
            let p99 = c.ratio(s, 0, P99);
            let cpu = c.ratio(s, 0, CPU);
            let thr_ok = thr >= THROUGHPUT_RATIO_MIN;
            let cpu_ok = cpu <= CPU_RATIO_MAX;
            let p50_ok = c.concurrency != 1 || p50 <= P50_RATIO_MAX_AT_C1;
            let py = if s == 1 {
                c.ratio(1, 3, THROUGHPUT)
            } else {
                f64::NAN
            };
            let py_ok = c.concurrency != 32 || s != 1 || py >= PYTHON_RATIO_MIN_AT_C32;
            all_met &= thr_ok && cpu_ok && p50_ok && py_ok;
            let p50_mark = if c.concurrency == 1 { mark(p50_ok) } else { "" };
            let py_text = if py.is_finite() {
                let m = if c.concurrency == 32 { mark(py_ok) } else { "" };
                format!("{py:.1} {m:<4}")
            } else {
                "-     ".into()
            };
            // Informational: candor over the same transport without calibration.
            let cpu_bulk = c.ratio(s, BULK_FLOOR, CPU);
            println!(
                "{:<12} {:>5} {:>3}  {:>9.3} {:<4} {:>9.3} {:<4} {:>10.3} {:>9.3} {:<4} {:>15} {:>10.3}",
                map,
                c.classes,
                c.concurrency,
                thr,
                mark(thr_ok),
                p50,
                p50_mark,
                p99,
                cpu,
                mark(cpu_ok),
                py_text,
                cpu_bulk
            );
            out.push(
                json!({"map": map, "classes": c.classes, "concurrency": c.concurrency,
                "throughput_ratio": thr, "p50_ratio": p50, "p99_ratio": p99, "cpu_ratio": cpu,
                "cpu_ratio_to_bulk_floor": if cpu_bulk.is_finite() { json!(cpu_bulk) } else { Value::Null },
                "python_throughput_ratio": if py.is_finite() { json!(py) } else { Value::Null }}),
            );
        }
    }
    (Value::Array(out), all_met)
}
