//! Fit speed and memory against plain numpy / scipy / scikit-learn on the same files, in one run
//! (issue targets: temperature scaling on 1,000,000 × 100 float32 logits at least 10x faster than
//! numpy + scipy.optimize.minimize_scalar, peak memory at most 1.3x the logits file; isotonic
//! regression on 10,000,000 binary scores at least 2x faster than scikit-learn's
//! IsotonicRegression; vector scaling on 100,000 × 100 logits within 30 s).
//!
//! Run: `cargo bench --bench fit_speed` (optionally followed by `-- temperature isotonic vector`
//! to pick cases). The data files are generated once, deterministically, into
//! `target/tmp/fit-speed/` (or `$CANDOR_FIT_SPEED_DATA`). Each fit runs in its own child process
//! (this binary re-invoked with `--case NAME DIR`, and `benches/fit_speed.py NAME DIR` for
//! Python), so each peak resident memory (VmHWM / ru_maxrss) belongs to one case. The Python side
//! runs with OPENBLAS_CORETYPE and OPENBLAS_L2_SIZE removed so numpy uses its best kernels.

use std::fs::File;
use std::io::{BufWriter, Write};
use std::path::{Path, PathBuf};
use std::process::Command;
use std::time::Instant;

use candor::dataset::npy_header::write_header;
use candor::dataset::{self, LabelNeed, Logits, Source};
use candor::fit::affine::{fit_vector, AffineOptions};
use candor::fit::ovr::{fit_one_vs_rest, IsotonicFit};
use candor::fit::temperature::{self, Rows};
use candor::method::BinaryMap;
use candor::numeric::Logit;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rand_distr::StandardNormal;
use serde_json::{json, Value};

type Failure = Box<dyn std::error::Error>;

/// One benchmark case: its data shape and the target it checks.
struct Case {
    name: &'static str,
    rows: usize,
    /// Logits per row (1: one binary log-odds score per row, stored as float64 shape [N]).
    width: usize,
    target: &'static str,
}

const CASES: [Case; 3] = [
    Case {
        name: "temperature",
        rows: 1_000_000,
        width: 100,
        target: "fit >= 10x numpy, peak <= 1.3x file",
    },
    Case {
        name: "isotonic",
        rows: 10_000_000,
        width: 1,
        target: "fit >= 2x scikit-learn",
    },
    Case {
        name: "vector",
        rows: 100_000,
        width: 100,
        target: "fit <= 30 s",
    },
];

/// Probability scores at which both isotonic fits are evaluated (same list in fit_speed.py).
const PROBES: [f64; 7] = [0.05, 0.2, 0.4, 0.5, 0.6, 0.8, 0.95];

fn main() -> Result<(), Failure> {
    let args: Vec<String> = std::env::args().skip(1).collect();
    if args.first().map(String::as_str) == Some("--case") {
        let (name, dir) = match (args.get(1), args.get(2)) {
            (Some(n), Some(d)) => (n.as_str(), Path::new(d)),
            _ => return Err("usage: fit_speed --case NAME DIR".into()),
        };
        println!("{}", run_case(name, dir)?);
        return Ok(());
    }
    let picked: Vec<&str> = args
        .iter()
        .filter(|a| !a.starts_with("--"))
        .map(String::as_str)
        .collect();
    let dir = std::env::var_os("CANDOR_FIT_SPEED_DATA")
        .map(PathBuf::from)
        .unwrap_or_else(|| Path::new(env!("CARGO_TARGET_TMPDIR")).join("fit-speed"));
    std::fs::create_dir_all(&dir)?;
    let mut rows = Vec::new();
    for case in CASES
        .iter()
        .filter(|c| picked.is_empty() || picked.contains(&c.name))
    {
        let started = Instant::now();
        if generate(case, &dir)? {
            eprintln!(
                "generated {} data in {:.1} s",
                case.name,
                started.elapsed().as_secs_f64()
            );
        }
        let rust = child(
            Command::new(std::env::current_exe()?).args(["--case", case.name]),
            &dir,
        )?;
        eprintln!("candor {}: {rust}", case.name);
        let script = concat!(env!("CARGO_MANIFEST_DIR"), "/benches/fit_speed.py");
        let python = child(
            Command::new("python3")
                .arg(script)
                .arg(case.name)
                .env_remove("OPENBLAS_CORETYPE")
                .env_remove("OPENBLAS_L2_SIZE"),
            &dir,
        )?;
        eprintln!("python {}: {python}", case.name);
        rows.push((case, rust, python));
    }
    report(&rows, &dir)
}

/// Runs a child with the data directory as its last argument; parses its one JSON line.
fn child(command: &mut Command, dir: &Path) -> Result<Value, Failure> {
    let out = command.arg(dir).output()?;
    if !out.status.success() {
        let err = String::from_utf8_lossy(&out.stderr);
        return Err(format!("{command:?} failed: {err}").into());
    }
    let text = String::from_utf8(out.stdout)?;
    let line = text.lines().last().ok_or("child printed nothing")?;
    Ok(serde_json::from_str(line)?)
}

fn secs(v: &Value, key: &str) -> f64 {
    v[key].as_f64().unwrap_or(f64::NAN)
}

fn report(rows: &[(&Case, Value, Value)], dir: &Path) -> Result<(), Failure> {
    println!();
    println!(
        "{:<12} {:>8} {:>8} {:>9} {:>9} {:>8} {:>10} {:>10}  target",
        "case", "read s", "fit s", "np read s", "np fit s", "fit x", "peak/file", "np pk/file"
    );
    for (case, rust, python) in rows {
        let file = std::fs::metadata(dir.join(format!("{}_logits.npy", case.name)))?.len() as f64;
        let (fit, np_fit) = (secs(rust, "fit_secs"), secs(python, "fit_secs"));
        println!(
            "{:<12} {:>8.2} {:>8.2} {:>9.2} {:>9.2} {:>8.1} {:>10.2} {:>10.2}  {}",
            case.name,
            secs(rust, "read_secs"),
            fit,
            secs(python, "read_secs"),
            np_fit,
            np_fit / fit,
            secs(rust, "peak_bytes") / file,
            secs(python, "peak_bytes") / file,
            case.target
        );
    }
    println!();
    for (case, rust, python) in rows {
        println!("{}: candor {}", case.name, rust["result"]);
        println!("{}: python {}", case.name, python["result"]);
    }
    if let Some((_, _, python)) = rows.first() {
        println!("python BLAS: {}", python["blas"]);
    }
    Ok(())
}

/// Peak resident memory of this process (VmHWM), in bytes.
fn peak_bytes() -> Result<u64, Failure> {
    let status = std::fs::read_to_string("/proc/self/status")?;
    let line = status
        .lines()
        .find(|l| l.starts_with("VmHWM:"))
        .ok_or("no VmHWM in /proc/self/status")?;
    let kb: u64 = line
        .trim_start_matches("VmHWM:")
        .trim()
        .trim_end_matches("kB")
        .trim()
        .parse()?;
    Ok(kb * 1024)
}

/// Reads a case's files with candor's reader, fits, and returns timings, peak memory, results.
fn run_case(name: &str, dir: &Path) -> Result<Value, Failure> {
    let source = Source::Npy {
        logits: dir.join(format!("{name}_logits.npy")),
        labels: Some(dir.join(format!("{name}_labels.npy"))),
    };
    let started = Instant::now();
    let set = dataset::read(&source, LabelNeed::Required)?;
    let read_secs = started.elapsed().as_secs_f64();
    let labels = set.require_labels()?;
    let started = Instant::now();
    let result = match (name, set.logits()) {
        ("temperature", Logits::F32(v)) => fit_temperature(v, set.k(), labels)?,
        ("temperature", Logits::F64(v)) => fit_temperature(v, set.k(), labels)?,
        ("isotonic", Logits::F32(v)) => fit_isotonic(v, set.k(), labels)?,
        ("isotonic", Logits::F64(v)) => fit_isotonic(v, set.k(), labels)?,
        ("vector", Logits::F32(v)) => fit_vector_scaling(v, set.k(), labels)?,
        ("vector", Logits::F64(v)) => fit_vector_scaling(v, set.k(), labels)?,
        _ => return Err(format!("unknown case {name}").into()),
    };
    let fit_secs = started.elapsed().as_secs_f64();
    Ok(json!({
        "read_secs": read_secs,
        "fit_secs": fit_secs,
        "peak_bytes": peak_bytes()?,
        "result": result,
    }))
}

fn fit_temperature<L: Logit>(z: &[L], k: usize, y: &[u32]) -> Result<Value, Failure> {
    let rows = Rows::try_new(z, k)?;
    let (t, d) = temperature::fit(&rows, y)?;
    Ok(json!({
        "temperature": t.temperature(),
        "nll_start": d.objective_start,
        "nll_end": d.objective_end,
        "iterations": d.iterations,
    }))
}

fn fit_isotonic<L: Logit>(f: &[L], k: usize, y: &[u32]) -> Result<Value, Failure> {
    let (map, _) = fit_one_vs_rest(&IsotonicFit, f, k, y, None)?;
    let iso = map.maps().first().ok_or("no binary map")?;
    let probes: Vec<f64> = PROBES.iter().map(|&p| iso.apply(p)).collect();
    Ok(json!({ "knots": iso.x().len(), "probes": probes }))
}

fn fit_vector_scaling<L: Logit>(z: &[L], k: usize, y: &[u32]) -> Result<Value, Failure> {
    let (_, d) = fit_vector(z, k, y, AffineOptions::default())?;
    Ok(json!({
        "nll_start": d.objective_start,
        "nll_end": d.objective_end,
        "iterations": d.iterations,
        "converged": d.converged,
    }))
}

/// Writes the case's files unless both exist; returns whether it wrote them.
fn generate(case: &Case, dir: &Path) -> Result<bool, Failure> {
    let logits_path = dir.join(format!("{}_logits.npy", case.name));
    let labels_path = dir.join(format!("{}_labels.npy", case.name));
    if logits_path.exists() && labels_path.exists() {
        return Ok(false);
    }
    let (n, k) = (case.rows, case.width);
    let tmp = dir.join(format!("{}_logits.npy.partial", case.name));
    let mut out = BufWriter::new(File::create(&tmp)?);
    let mut rng = ChaCha8Rng::seed_from_u64(case.name.len() as u64 * 7919);
    let mut labels: Vec<i64> = Vec::with_capacity(n);
    if k == 1 {
        // Log-odds f ~ N(0, 2²), y ~ Bernoulli(σ(0.6 f − 0.2)): a miscalibrated binary score.
        write_header(&mut out, "<f8", &[n as u64])?;
        for _ in 0..n {
            let f: f64 = 2.0 * rng.sample::<f64, _>(StandardNormal);
            let p = 1.0 / (1.0 + (-(0.6 * f - 0.2)).exp());
            labels.push(i64::from(rng.random::<f64>() < p));
            out.write_all(&f.to_le_bytes())?;
        }
    } else {
        write_header(&mut out, "<f4", &[n as u64, k as u64])?;
        let mut t = vec![0.0f64; k];
        for _ in 0..n {
            // True logits t ~ N(0, 2.5²) per class; y ~ softmax(t).
            t.iter_mut()
                .for_each(|v| *v = 2.5 * rng.sample::<f64, _>(StandardNormal));
            labels.push(sample_class(&t, rng.random::<f64>()) as i64);
            for (j, &v) in t.iter().enumerate() {
                let z = if case.name == "temperature" {
                    // Over-confident by a factor 2: the fitted T should be close to 2.
                    2.0 * v
                } else {
                    // Per-class scale a_j ∈ [0.5, 2] and shift c_j ∈ [−1, 1] for vector scaling.
                    let a = 0.5 + 1.5 * j as f64 / (k - 1) as f64;
                    let c = -1.0 + 2.0 * ((j * 37) % k) as f64 / k as f64;
                    (v - c) / a
                };
                out.write_all(&(z as f32).to_le_bytes())?;
            }
        }
    }
    out.into_inner().map_err(|e| e.into_error())?.sync_all()?;
    std::fs::rename(&tmp, &logits_path)?;
    let tmp = dir.join(format!("{}_labels.npy.partial", case.name));
    let mut out = BufWriter::new(File::create(&tmp)?);
    write_header(&mut out, "<i8", &[n as u64])?;
    for y in labels {
        out.write_all(&y.to_le_bytes())?;
    }
    out.into_inner().map_err(|e| e.into_error())?.sync_all()?;
    std::fs::rename(&tmp, &labels_path)?;
    Ok(true)
}

/// Index drawn from softmax(t) by the uniform `u` (inverse CDF).
fn sample_class(t: &[f64], u: f64) -> usize {
    let m = t.iter().copied().fold(f64::NEG_INFINITY, f64::max);
    let total: f64 = t.iter().map(|v| (v - m).exp()).sum();
    let mut acc = 0.0;
    for (j, v) in t.iter().enumerate() {
        acc += (v - m).exp() / total;
        if u < acc {
            return j;
        }
    }
    t.len() - 1
}
