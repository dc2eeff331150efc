//! The maps the servers load: temperature and isotonic maps for the comparison, and 100 matrix
//! scaling maps of K = 1000 for the memory measurement.

use candor::decision::DecisionPolicy;
use candor::mapfile::{CalibrationMap, MapParts};
use candor::method::{InputForm, Isotonic, MatrixScaling, Method, OneVsRest, Temperature};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rand_distr::StandardNormal;
use std::path::{Path, PathBuf};

use crate::Failure;

/// Temperature of the comparison's temperature maps.
const TEMPERATURE: f64 = 1.7;
/// Global threshold of every comparison map.
const THRESHOLD: f64 = 0.9;
/// Knots per class of the comparison's isotonic maps (a fit on a few thousand rows has tens).
const ISOTONIC_KNOTS: usize = 64;
/// Off-diagonal spread of the memory measurement's matrix maps, and the decimals they keep.
const MATRIX_OFF_DIAGONAL: f64 = 0.01;
const MATRIX_DECIMALS: i32 = 4;

fn sealed(model: String, classes: usize, method: Method) -> Result<CalibrationMap, Failure> {
    Ok(CalibrationMap::from_parts(MapParts {
        map_version: format!("{model}.1"),
        model,
        classes,
        class_names: None,
        input: InputForm::Logits,
        method,
        policy: DecisionPolicy::global(THRESHOLD),
        provenance: serde_json::Map::new(),
    })?)
}

/// Model name of the temperature map for K classes.
pub fn temperature_model(k: usize) -> String {
    format!("temperature-{k}")
}

/// Model name of the isotonic map for K classes.
pub fn isotonic_model(k: usize) -> String {
    format!("isotonic-{k}")
}

/// softmax(z / 1.7) for K classes.
pub fn temperature(k: usize) -> Result<CalibrationMap, Failure> {
    let t = Temperature::try_new(TEMPERATURE, "t").map_err(|p| format!("{p:?}"))?;
    sealed(temperature_model(k), k, Method::Temperature(t))
}

/// One-vs-rest isotonic maps for K classes, each with its own curve y = x^(1 + c/K) on
/// evenly spaced knots.
pub fn isotonic(k: usize) -> Result<CalibrationMap, Failure> {
    let x: Vec<f64> = (0..ISOTONIC_KNOTS)
        .map(|i| i as f64 / (ISOTONIC_KNOTS - 1) as f64)
        .collect();
    let per_class = (0..k)
        .map(|c| {
            let power = 1.0 + c as f64 / k as f64;
            let y = x.iter().map(|v| v.powf(power)).collect();
            Isotonic::try_new(x.clone(), y, "iso").map_err(|p| format!("{p:?}"))
        })
        .collect::<Result<Vec<_>, _>>()?;
    let ovr = OneVsRest::try_new(k, per_class, "iso").map_err(|p| format!("{p:?}"))?;
    sealed(isotonic_model(k), k, Method::Isotonic(ovr))
}

/// Writes `map` to `dir/<model>.json`, compactly (the digest covers content, not layout).
pub fn write_compact(map: &CalibrationMap, dir: &Path) -> Result<PathBuf, Failure> {
    let doc: serde_json::Value = serde_json::from_str(&map.to_json())?;
    let path = dir.join(format!("{}.json", map.model()));
    std::fs::write(&path, serde_json::to_string(&doc)?)?;
    Ok(path)
}

/// Bytes of the parameters a matrix scaling map of K classes holds in memory: W (K²) and b (K)
/// as f64.
pub fn matrix_parameter_bytes(k: usize) -> u64 {
    ((k * k + k) * std::mem::size_of::<f64>()) as u64
}

/// `count` matrix scaling maps of K classes in `dir/<model>/<version>.json` (the store's folder
/// layout: one folder per model, the file named after the map version),
/// written once: a `complete` marker lets later runs reuse them. W = I + seeded N(0, 0.01²)
/// off-diagonals rounded to 4 decimals; b = 0.
pub fn matrix_set(dir: &Path, count: usize, k: usize) -> Result<Vec<PathBuf>, Failure> {
    let marker = dir.join("complete");
    let files: Vec<PathBuf> = (0..count)
        .map(|i| {
            let model = format!("matrix-{i:03}");
            dir.join(&model).join(format!("{model}.1.json"))
        })
        .collect();
    if marker.exists() && files.iter().all(|f| f.exists()) {
        return Ok(files);
    }
    let scale = 10f64.powi(MATRIX_DECIMALS);
    for (i, file) in files.iter().enumerate() {
        let mut rng = ChaCha8Rng::seed_from_u64(i as u64);
        let rows = (0..k)
            .map(|r| {
                (0..k)
                    .map(|c| {
                        if r == c {
                            1.0
                        } else {
                            let z: f64 = rng.sample(StandardNormal);
                            (z * MATRIX_OFF_DIAGONAL * scale).round() / scale
                        }
                    })
                    .collect()
            })
            .collect();
        let m = MatrixScaling::try_new(k, rows, vec![0.0; k], "m").map_err(|p| format!("{p:?}"))?;
        let map = sealed(format!("matrix-{i:03}"), k, Method::Matrix(m))?;
        let folder = file.parent().ok_or("map file without a folder")?;
        std::fs::create_dir_all(folder)?;
        let written = write_compact(&map, folder)?;
        std::fs::rename(written, file)?;
    }
    std::fs::write(marker, format!("{count} maps of K = {k}\n"))?;
    Ok(files)
}
