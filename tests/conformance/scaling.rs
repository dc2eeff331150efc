//! Temperature scaling and vector scaling against scipy optimisers of the same mean NLL.

use super::fixture::{load, scores, Checker, References, Tolerance};
use super::{METRIC, OBJECTIVE, PARAMETER, PROBABILITY};
use candor::fit::affine::{fit_vector, AffineOptions};
use candor::fit::temperature::{fit, Rows};
use candor::method::Method;
use serde::Deserialize;

#[derive(Debug, Deserialize)]
struct TemperatureCase {
    scores: String,
    temperature: f64,
    nll_identity: f64,
    nll_fitted: f64,
    test_probabilities: Vec<Vec<f64>>,
}

#[derive(Debug, Deserialize)]
struct VectorCase {
    scores: String,
    nll_identity: f64,
    nll_fitted: f64,
    test_probabilities: Vec<Vec<f64>>,
    /// First-order bound on how far a test probability can lie from the exact optimum at any
    /// point that meets candor's stopping rule (computed by the fixture script).
    probability_bound_at_stopping_rule: f64,
}

/// candor's L-BFGS stops at ‖∇L‖_∞ ≤ 1e-8 (METHODS.md 2.5). On an ill-conditioned problem that
/// rule, not the optimiser, fixes how closely the probabilities can agree: on digits with
/// logistic regression (K = 10, 449 rows; smallest Hessian eigenvalue about 4e-8) a probability
/// can move by up to 2.9e-3 at points meeting the rule. The test allows [`PROBABILITY`] or that
/// first-order bound, whichever is larger; the fitted NLL is still held to [`OBJECTIVE`].
fn probability_tolerance(bound: f64) -> Tolerance {
    match PROBABILITY {
        Tolerance::Absolute(t) => Tolerance::Absolute(t.max(bound)),
        relative => relative,
    }
}

#[test]
fn temperature_matches_bounded_brent_on_log_beta() {
    const FILE: &str = "reference_temperature.json";
    let refs: References<TemperatureCase> = load(FILE);
    let mut check = Checker::new(FILE, &refs);
    assert!(refs.cases.len() >= 6, "{FILE}: expected every score set");
    for case in &refs.cases {
        let set = scores(&case.scores);
        let flat = set.calibration.flat();
        let fitted =
            Rows::try_new(&flat, set.columns).and_then(|rows| fit(&rows, &set.calibration.labels));
        let (map, diag) = match fitted {
            Ok(f) => f,
            Err(e) => {
                check.fail(format!("{}: fit failed: {e}", case.scores));
                continue;
            }
        };
        let name = &case.scores;
        check.close(
            "T",
            &format!("{name}: T"),
            map.temperature(),
            case.temperature,
            PARAMETER,
        );
        let start = diag.objective_start.unwrap_or(f64::NAN);
        let end = diag.objective_end.unwrap_or(f64::NAN);
        check.close(
            "NLL at T = 1",
            &format!("{name}: NLL at T = 1"),
            start,
            case.nll_identity,
            METRIC,
        );
        check.close(
            "fitted NLL",
            &format!("{name}: fitted NLL"),
            end,
            case.nll_fitted,
            OBJECTIVE,
        );
        let got = set.apply_test(&Method::Temperature(map));
        check.rows_close(
            "test probabilities",
            &format!("{name}: test probabilities"),
            &got,
            &case.test_probabilities,
            PROBABILITY,
        );
    }
    check.finish();
}

#[test]
fn vector_scaling_matches_scipy_lbfgsb() {
    const FILE: &str = "reference_vector_scaling.json";
    let refs: References<VectorCase> = load(FILE);
    let mut check = Checker::new(FILE, &refs);
    assert!(!refs.cases.is_empty(), "{FILE}: no cases");
    for case in &refs.cases {
        let set = scores(&case.scores);
        let name = &case.scores;
        let fitted = fit_vector(
            &set.calibration.flat_classes(),
            set.classes,
            &set.calibration.labels,
            AffineOptions::default(),
        );
        let (map, diag) = match fitted {
            Ok(f) => f,
            Err(e) => {
                check.fail(format!("{name}: fit failed: {e}"));
                continue;
            }
        };
        check.close(
            "NLL at identity",
            &format!("{name}: NLL at w = 1, b = 0"),
            diag.objective_start.unwrap_or(f64::NAN),
            case.nll_identity,
            METRIC,
        );
        check.close(
            "fitted NLL",
            &format!("{name}: fitted NLL"),
            diag.objective_end.unwrap_or(f64::NAN),
            case.nll_fitted,
            OBJECTIVE,
        );
        let got = set.apply_test(&Method::Vector(map));
        check.rows_close(
            "test probabilities",
            &format!("{name}: test probabilities"),
            &got,
            &case.test_probabilities,
            probability_tolerance(case.probability_bound_at_stopping_rule),
        );
    }
    check.finish();
}
