//! The metrics on fixed model probabilities against scikit-learn and direct numpy formulas.

use super::fixture::{load, Checker, References};
use super::METRIC;
use candor::eval::{
    accuracy, adaptive_ece, aurc, brier, brier_binary, classwise_ece, ece, mce, nll,
    EqualWidthBins, Predictions,
};
use serde::Deserialize;

/// Equal-width bins and equal-mass groups of the references (reference_metrics.json).
const BINS: usize = 15;
const GROUPS: usize = 15;

#[derive(Debug, Deserialize)]
struct Values {
    accuracy: f64,
    log_loss: f64,
    brier: f64,
    brier_binary: Option<f64>,
    ece: f64,
    mce: f64,
    adaptive_ece: f64,
    classwise_ece: f64,
    aurc: f64,
    aurc_optimal: f64,
    e_aurc: f64,
}

#[derive(Debug, Deserialize)]
struct Case {
    name: String,
    classes: usize,
    labels: Vec<u32>,
    probabilities: Vec<Vec<f64>>,
    reference: Values,
}

#[test]
fn metrics_match_scikit_learn_and_numpy_formulas() {
    const FILE: &str = "reference_metrics.json";
    let refs: References<Case> = load(FILE);
    let mut check = Checker::new(FILE, &refs);
    assert!(refs.cases.len() >= 4, "{FILE}: too few cases");
    let bins = EqualWidthBins::try_new(BINS).expect("15 bins are valid");
    for case in &refs.cases {
        let flat: Vec<f64> = case.probabilities.iter().flatten().copied().collect();
        let p = match Predictions::try_new(&flat, case.classes, &case.labels) {
            Ok(p) => p,
            Err(e) => {
                check.fail(format!("{}: inputs rejected: {e}", case.name));
                continue;
            }
        };
        let r = &case.reference;
        let adaptive = adaptive_ece(&p, GROUPS).unwrap_or(f64::NAN);
        let a = aurc(&p);
        let mut values = vec![
            ("accuracy", accuracy(&p), r.accuracy),
            ("log_loss", nll(&p), r.log_loss),
            ("brier (not halved)", brier(&p), r.brier),
            ("ece (15 bins)", ece(&p, &bins), r.ece),
            ("mce (15 bins)", mce(&p, &bins), r.mce),
            ("adaptive ece (15 groups)", adaptive, r.adaptive_ece),
            (
                "classwise ece (15 bins)",
                classwise_ece(&p, &bins),
                r.classwise_ece,
            ),
            ("aurc", a.aurc, r.aurc),
            ("aurc optimal", a.optimal, r.aurc_optimal),
            ("e-aurc", a.excess, r.e_aurc),
        ];
        if case.classes == 2 {
            let q1: Vec<f64> = case.probabilities.iter().map(|row| row[1]).collect();
            let got = brier_binary(&q1, &case.labels).unwrap_or(f64::NAN);
            values.push((
                "brier binary (halved)",
                got,
                r.brier_binary.unwrap_or(f64::NAN),
            ));
        }
        for (metric, got, want) in values {
            check.close(
                metric,
                &format!("{}: {metric}", case.name),
                got,
                want,
                METRIC,
            );
        }
    }
    check.finish();
}
