//! Deterministic generation of the demo letters and the demo map.

use crate::decision::certify::sgr;
use crate::decision::{DecisionPolicy, Evidence};
use crate::fit::split::{stratified_holdout, take_rows};
use crate::fit::temperature::{fit, Rows};
use crate::mapfile::{CalibrationMap, ConfidenceReference, MapError, MapParts};
use crate::method::{InputForm, Method};
use crate::numeric::lse;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rand_distr::{Distribution, StandardNormal};
use serde_json::{json, Map};
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
/// Fernhill's target: at least 95% of auto-routed letters in the right tray ...
pub const TARGET_ACCURACY: f64 = 0.95;
/// ... with 95% statistical confidence.
pub const CONFIDENCE: f64 = 0.95;
/// Share of the labelled letters held out to certify the threshold on.
pub const HOLDOUT: f64 = 0.3;
/// Share of accepted letters the demo map marks for audit (a person checks them too).
pub const AUDIT_RATE: f64 = 0.05;
const SPLIT_SEED: u64 = 7;
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

/// The data digest `candor fit` records for the same rows (see `LabelledSet::digest`).
fn data_digest(letters: &Letters) -> String {
    let logits = crate::dataset::Logits::F32(letters.logits.clone());
    crate::dataset::LabelledSet::try_new(logits, 6, Some(letters.labels.clone()))
        .map(|s| s.digest())
        .unwrap_or_default()
}

/// Fits the demo's temperature map on 70% of the calibration letters and certifies its threshold
/// with SGR (METHODS.md 3.4) on the other 30%.
///
/// # Errors
/// Only if the fit, the certification or the map's own validation fails (a bug).
pub fn fit_demo_map(cal: &Letters) -> Result<CalibrationMap, MapError> {
    let fail = |e: String| MapError {
        path: None,
        problems: vec![crate::method::Problem {
            field: "method".into(),
            message: e,
        }],
    };
    let (fit_idx, hold_idx) = stratified_holdout(&cal.labels, 6, HOLDOUT, SPLIT_SEED);
    let part = |idx: &[usize]| Letters {
        logits: take_rows(&cal.logits, 6, idx),
        labels: idx.iter().map(|&i| cal.labels[i]).collect(),
    };
    let (fit_set, hold_set) = (part(&fit_idx), part(&hold_idx));
    let rows = Rows::try_new(&fit_set.logits, 6).map_err(|e| fail(e.to_string()))?;
    let (t, diag) = fit(&rows, &fit_set.labels).map_err(|e| fail(e.to_string()))?;
    let (nll_before, acc) = nll_and_accuracy(&fit_set, 1.0);
    let (nll_after, _) = nll_and_accuracy(&fit_set, t.inverse());
    // Certify on the held-out letters: calibrated top-label confidence and correctness.
    let (mut conf, mut correct) = (Vec::new(), Vec::new());
    let mut z = [0.0f64; 6];
    for i in 0..hold_set.len() {
        for (o, v) in z.iter_mut().zip(hold_set.row(i)) {
            *o = f64::from(*v);
        }
        t.apply_in_place(&mut z);
        let c = crate::numeric::argmax(&z);
        conf.push(z[c]);
        correct.push(c as u32 == hold_set.labels[i]);
    }
    let cert = sgr(&conf, &correct, 1.0 - TARGET_ACCURACY, 1.0 - CONFIDENCE)
        .map_err(|e| fail(e.to_string()))?;
    let accepted = cert
        .threshold
        .map_or(0, |t| conf.iter().filter(|&&c| c >= t).count());
    let reference = ConfidenceReference::from_confidences(&conf, Some(accepted))
        .map_err(|e| fail(e.to_string()))?;
    let mut provenance = Map::new();
    provenance.insert("created_at".into(), json!("2026-12-01T00:00:00Z"));
    provenance.insert(
        "fit_data".into(),
        json!({"sha256": data_digest(&fit_set), "rows": fit_set.len(), "source": "demo-data/calibration.jsonl (70%)"}),
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
    provenance.insert(
        "certification".into(),
        serde_json::to_value(&cert).unwrap_or_default(),
    );
    provenance.insert("reference".into(), reference.to_value());
    let evidence = Evidence {
        procedure: Some("sgr".into()),
        target_accuracy: Some(TARGET_ACCURACY),
        confidence_level: Some(CONFIDENCE),
        certified_accuracy: cert.threshold.map(|_| 1.0 - cert.bound),
        expected_coverage: Some(cert.coverage),
        items: Some(cert.n),
        accepted: Some(cert.accepted),
        errors: Some(cert.errors),
        extra: [(
            "certified_on".to_owned(),
            json!({"kind": "holdout", "fraction": HOLDOUT, "seed": SPLIT_SEED, "rows": hold_set.len()}),
        )]
        .into(),
    };
    CalibrationMap::from_parts(MapParts {
        model: MODEL.into(),
        map_version: "2026-12-01.1".into(),
        classes: 6,
        class_names: Some(CLASS_NAMES.iter().map(|s| (*s).to_owned()).collect()),
        input: InputForm::Logits,
        method: Method::Temperature(t),
        policy: DecisionPolicy::new(cert.threshold, None, Some(evidence))
            .with_audit_rate(Some(AUDIT_RATE)),
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
