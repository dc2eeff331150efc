//! Deterministic generation of the demo letters and the demo map.

use crate::decision::{DecisionPolicy, Evidence};
use crate::fit::temperature::{fit, Rows};
use crate::mapfile::{CalibrationMap, MapError, MapParts};
use crate::method::{InputForm, Method};
use crate::numeric::lse;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rand_distr::{Distribution, StandardNormal};
use serde_json::{json, Map};
use sha2::{Digest, Sha256};
use std::io::Write;
use std::path::Path;

/// The model name the demo map serves.
pub const MODEL: &str = "letter-sorter";
/// The six trays.
pub const CLASS_NAMES: [&str; 6] = [
    "billing",
    "leak-report",
    "meter-reading",
    "new-connection",
    "complaint",
    "other",
];
/// Share of letters per tray.
const SHARES: [f64; 6] = [0.30, 0.12, 0.22, 0.08, 0.18, 0.10];
/// Signal strength a: the true tray's mean score.
const SIGNAL: f64 = 2.2;
/// How much sharper than the truth the model's logits are.
const OVERCONFIDENCE: f64 = 2.4;
/// Fernhill's policy: auto-route a letter when calibrated confidence ≥ 0.95.
pub const THRESHOLD: f64 = 0.95;
/// Labelled letters held out for fitting.
pub const CALIBRATION_ROWS: usize = 2_000;
/// Letters in the demo's live traffic.
pub const TRAFFIC_ROWS: usize = 5_000;
const CALIBRATION_SEED: u64 = 20_261_201;
const TRAFFIC_SEED: u64 = 20_261_202;

/// A batch of letters: n×6 logits as the model emits them (f32) and the true trays.
#[derive(Debug, Clone, PartialEq)]
pub struct Letters {
    /// Row-major n×6 logits.
    pub logits: Vec<f32>,
    /// True tray of each letter.
    pub labels: Vec<u32>,
}

impl Letters {
    /// Number of letters.
    pub fn len(&self) -> usize {
        self.labels.len()
    }

    /// True when there are none.
    pub fn is_empty(&self) -> bool {
        self.labels.is_empty()
    }

    /// Logits of letter `i`.
    pub fn row(&self, i: usize) -> &[f32] {
        &self.logits[i * 6..(i + 1) * 6]
    }
}

/// Draws `rows` letters from the scenario with `seed` (ChaCha8, so the same on every machine).
pub fn generate(seed: u64, rows: usize) -> Letters {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let mut logits = Vec::with_capacity(rows * 6);
    let mut labels = Vec::with_capacity(rows);
    for _ in 0..rows {
        let u: f64 = rng.random();
        let mut acc = 0.0;
        let y = SHARES.iter().position(|s| {
            acc += s;
            u < acc
        });
        let y = y.unwrap_or(SHARES.len() - 1);
        for k in 0..6 {
            let noise: f64 = StandardNormal.sample(&mut rng);
            let z = if k == y { SIGNAL } else { 0.0 } + noise;
            logits.push((OVERCONFIDENCE * SIGNAL * z) as f32);
        }
        labels.push(y as u32);
    }
    Letters { logits, labels }
}

/// The labelled calibration letters.
pub fn calibration_set() -> Letters {
    generate(CALIBRATION_SEED, CALIBRATION_ROWS)
}

/// The live traffic letters.
pub fn traffic_set() -> Letters {
    generate(TRAFFIC_SEED, TRAFFIC_ROWS)
}

/// Mean NLL of softmax(β·z) and accuracy.
fn nll_and_accuracy(letters: &Letters, beta: f64) -> (f64, f64) {
    let (mut nll, mut correct) = (0.0, 0usize);
    let mut z = [0.0f64; 6];
    for i in 0..letters.len() {
        for (o, v) in z.iter_mut().zip(letters.row(i)) {
            *o = beta * f64::from(*v);
        }
        let y = letters.labels[i] as usize;
        nll += lse(&z) - z[y];
        correct += usize::from(crate::numeric::argmax(&z) == y);
    }
    let n = letters.len() as f64;
    (nll / n, correct as f64 / n)
}

/// SHA-256 over n, K, the logits (as f64) and the labels, little-endian.
fn data_digest(letters: &Letters) -> String {
    let mut h = Sha256::new();
    h.update((letters.len() as u64).to_le_bytes());
    h.update(6u64.to_le_bytes());
    for v in &letters.logits {
        h.update(f64::from(*v).to_le_bytes());
    }
    for y in &letters.labels {
        h.update(u64::from(*y).to_le_bytes());
    }
    hex::encode(h.finalize())
}

/// Fits the demo's temperature map on the calibration letters.
///
/// # Errors
/// Only if the fit or the map's own validation fails (a bug).
pub fn fit_demo_map(cal: &Letters) -> Result<CalibrationMap, MapError> {
    let fit_error = |e: String| MapError {
        path: None,
        problems: vec![crate::method::Problem {
            field: "method".into(),
            message: e,
        }],
    };
    let rows = Rows::try_new(&cal.logits, 6).map_err(|e| fit_error(e.to_string()))?;
    let (t, diag) = fit(&rows, &cal.labels).map_err(|e| fit_error(e.to_string()))?;
    let (nll_before, acc) = nll_and_accuracy(cal, 1.0);
    let (nll_after, _) = nll_and_accuracy(cal, t.inverse());
    let mut provenance = Map::new();
    provenance.insert("created_at".into(), json!("2026-12-01T00:00:00Z"));
    provenance.insert(
        "fit_data".into(),
        json!({"sha256": data_digest(cal), "rows": cal.len(), "source": "demo-data/calibration.jsonl"}),
    );
    provenance.insert(
        "metrics".into(),
        json!({"before": {"nll": nll_before, "accuracy": acc},
               "after": {"nll": nll_after, "accuracy": acc}}),
    );
    provenance.insert(
        "fit".into(),
        serde_json::to_value(&diag).unwrap_or_default(),
    );
    let evidence = Evidence {
        procedure: Some("fixed".into()),
        extra: [(
            "note".to_owned(),
            json!("threshold set by policy, not certified on held-out data"),
        )]
        .into(),
        ..Evidence::default()
    };
    CalibrationMap::from_parts(MapParts {
        model: MODEL.into(),
        map_version: "2026-12-01.1".into(),
        classes: 6,
        class_names: Some(CLASS_NAMES.iter().map(|s| (*s).to_owned()).collect()),
        input: InputForm::Logits,
        method: Method::Temperature(t),
        policy: DecisionPolicy::new(Some(THRESHOLD), None, Some(evidence)),
        provenance,
    })
}

fn write_jsonl(path: &Path, letters: &Letters) -> std::io::Result<()> {
    let mut out = std::io::BufWriter::new(std::fs::File::create(path)?);
    for i in 0..letters.len() {
        let row: Vec<String> = letters.row(i).iter().map(|v| format!("{v:?}")).collect();
        writeln!(
            out,
            "{{\"logits\": [{}], \"label\": {}}}",
            row.join(", "),
            letters.labels[i]
        )?;
    }
    out.flush()
}

/// Writes `calibration.jsonl`, `traffic.jsonl` and `maps/letter-sorter.json` into `dir`.
///
/// # Errors
/// I/O errors, or a fit failure turned into an I/O error of kind Other.
pub fn write_data(dir: &Path) -> std::io::Result<()> {
    std::fs::create_dir_all(dir.join("maps"))?;
    let cal = calibration_set();
    write_jsonl(&dir.join("calibration.jsonl"), &cal)?;
    write_jsonl(&dir.join("traffic.jsonl"), &traffic_set())?;
    let map = fit_demo_map(&cal).map_err(std::io::Error::other)?;
    std::fs::write(
        dir.join("maps").join(format!("{MODEL}.json")),
        map.to_json(),
    )
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn generation_is_deterministic_and_overconfident() {
        assert_eq!(generate(7, 50), generate(7, 50));
        assert_ne!(generate(7, 50), generate(8, 50));
        let cal = calibration_set();
        let map = fit_demo_map(&cal).unwrap();
        let Method::Temperature(t) = map.method() else {
            panic!("temperature expected")
        };
        // The scenario sharpens logits by OVERCONFIDENCE·a relative to the truth's a, so the
        // fitted temperature should land near OVERCONFIDENCE (ignoring the tray shares).
        assert!(
            (t.temperature() - OVERCONFIDENCE).abs() < 0.3,
            "T = {}",
            t.temperature()
        );
    }
}
