//! Resident memory of a sidecar holding 100 matrix scaling maps of K = 1000 (issue target: VmRSS
//! below the maps' parameter bytes plus 50 MiB).

use candor::loadgen::payload;
use candor::proto::v1::calibrator_client::CalibratorClient;
use candor::proto::v1::CalibrateRequest;
use serde_json::{json, Value};
use std::path::Path;
use std::time::{Duration, Instant};

use crate::{maps, servers, Failure};

/// Maps loaded.
pub const MAPS: usize = 100;
/// Classes per map.
pub const CLASSES: usize = 1000;
/// Allowed resident memory above the maps' own bytes.
pub const OVERHEAD_BUDGET_BYTES: u64 = 50 << 20;
/// How long loading every map may take.
const LOAD_TIMEOUT: Duration = Duration::from_secs(900);

const MIB: f64 = (1u64 << 20) as f64;

/// Writes (once) and loads the maps, calls each model once, and reads the sidecar's VmRSS.
pub fn measure(
    runtime: &tokio::runtime::Runtime,
    dir: &Path,
    serve_args: &[String],
    pin: servers::Pin,
) -> Result<Value, Failure> {
    let started = Instant::now();
    let files = maps::matrix_set(dir, MAPS, CLASSES)?;
    let written_secs = started.elapsed().as_secs_f64();
    let file_bytes: u64 = files
        .iter()
        .map(|f| std::fs::metadata(f).map(|m| m.len()))
        .sum::<Result<u64, _>>()?;
    let parameter_bytes = MAPS as u64 * maps::matrix_parameter_bytes(CLASSES);

    let loading = Instant::now();
    let server = servers::candor(runtime, dir, serve_args, LOAD_TIMEOUT, pin)?;
    let load_secs = loading.elapsed().as_secs_f64();
    let rss_loaded = server.resident_bytes()?;
    // Touch every map once: each answer runs the K × K product and grows the worker's workspace.
    runtime.block_on(async {
        let mut client = CalibratorClient::connect(format!("http://{}", server.addr)).await?;
        let logits = payload::generate(1, CLASSES, 1).remove(0);
        for i in 0..MAPS {
            let r = client
                .calibrate(CalibrateRequest {
                    model: format!("matrix-{i:03}"),
                    logits: logits.clone(),
                    ..Default::default()
                })
                .await?
                .into_inner();
            if r.probabilities.len() != CLASSES {
                return Err(
                    format!("matrix-{i:03} answered {} values", r.probabilities.len()).into(),
                );
            }
        }
        Ok::<(), Failure>(())
    })?;
    let rss = server.resident_bytes()?;
    let peak = candor::loadgen::process::peak_resident_bytes(server.pid)?;
    let budget = parameter_bytes + OVERHEAD_BUDGET_BYTES;
    println!();
    println!("Memory: {MAPS} matrix scaling maps of K = {CLASSES} in one sidecar");
    println!(
        "  parameters {:.1} MiB (W and b as f64), files {:.1} MiB, loaded in {load_secs:.1} s \
         (maps written in {written_secs:.1} s)",
        parameter_bytes as f64 / MIB,
        file_bytes as f64 / MIB
    );
    println!(
        "  VmRSS {:.1} MiB after loading, {:.1} MiB after one call per model (peak {:.1} MiB)",
        rss_loaded as f64 / MIB,
        rss as f64 / MIB,
        peak as f64 / MIB
    );
    println!(
        "  overhead above the parameters {:.1} MiB; target: VmRSS < parameters + 50 MiB = {:.1} MiB: {}",
        (rss as f64 - parameter_bytes as f64) / MIB,
        budget as f64 / MIB,
        if rss < budget { "met" } else { "MISSED" }
    );
    Ok(json!({
        "maps": MAPS,
        "classes": CLASSES,
        "parameter_bytes": parameter_bytes,
        "file_bytes": file_bytes,
        "load_secs": load_secs,
        "rss_after_load_bytes": rss_loaded,
        "rss_bytes": rss,
        "peak_rss_bytes": peak,
        "budget_bytes": budget,
        "met": rss < budget,
    }))
}
