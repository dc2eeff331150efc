//! One-vs-rest Platt and isotonic maps with renormalisation against scikit-learn's
//! CalibratedClassifierCV fed with candor's per-class scores.
//!
//! The reduction rule is the same on both sides (one map per class, K = 2 one map on class 1 with
//! q0 = 1 − q1, q = u / Σu, uniform when Σu = 0). The per-class score is not: scikit-learn
//! calibrates a model's decision_function columns when it has one, candor the class's softmax
//! probability (isotonic) or its log-odds (Platt). The fixtures therefore give scikit-learn
//! candor's scores, and these tests compare the per-class maps and the renormalised probabilities.

use super::fixture::{load, scores, Checker, References, Tolerance};
use super::{KNOT, PARAMETER_RELATIVE, PROBABILITY};
use candor::fit::ovr::{fit_one_vs_rest, IsotonicFit, PlattFit};
use candor::method::{Isotonic, Method, Platt};
use serde::Deserialize;

/// Knots of an isotonic map, relative tolerance of the positions: candor derives the scores
/// from the logits itself, so they can differ from numpy's in the last bits.
const SCORE_KNOT: Tolerance = Tolerance::Relative(1e-9);
/// scikit-learn's per-class (a_, b_): its L-BFGS-B stops at gtol 1e-6 on the summed objective,
/// which leaves them up to about 2e-6 (relative) from the root of the gradient on these sets, so
/// the 1e-6 check is made against the root and this looser one against scikit-learn.
const SKLEARN_PLATT: Tolerance = Tolerance::Relative(1e-5);

#[derive(Debug, Deserialize)]
#[serde(untagged)]
enum ClassMap {
    /// scikit-learn's (a_, b_) and the root of the gradient of the same objective.
    Platt {
        a: f64,
        b: f64,
        tight: PlattParams,
    },
    Isotonic {
        x: Vec<f64>,
        y: Vec<f64>,
    },
}

#[derive(Debug, Deserialize)]
struct PlattParams {
    a: f64,
    b: f64,
}

#[derive(Debug, Deserialize)]
struct Case {
    scores: String,
    method: String,
    maps: Vec<ClassMap>,
    test_probabilities: Vec<Vec<f64>>,
}

/// Checks candor's per-class Platt maps against the tight roots (and scikit-learn's values).
///
/// (A, B) are held to 1e-6 relative to max(|A|, |B|) rather than per component: candor's class
/// log-odds come from `lse` = m + ln Σ exp(z − m) (METHODS.md 0.2), which loses relative precision
/// of ln p_k when p_k is within about 1e-12 of 1 (random-forest logits ln max(p, 1e-12)), where
/// scipy.special.logsumexp keeps it. On wine with the random forest those rows' scores differ by
/// up to 3.3e-6 relative, which moves B of class 1 (|B| = 0.12) by 2.8e-6 relative, 3.4e-7
/// absolute, with calibrated probabilities within 1.5e-7.
fn check_platt(check: &mut Checker, name: &str, got: &[Platt], want: &[ClassMap]) {
    for (k, (got, want)) in got.iter().zip(want).enumerate() {
        let ClassMap::Platt { a, b, tight } = want else {
            check.fail(format!("{name}: class map {k} is not a Platt map"));
            continue;
        };
        let what = format!("{name}: class map {k}");
        let scale = Tolerance::Absolute(PARAMETER_RELATIVE * tight.a.abs().max(tight.b.abs()));
        check.close("A", &format!("{what} A"), got.a(), tight.a, scale);
        check.close("B", &format!("{what} B"), got.b(), tight.b, scale);
        check.close(
            "A vs sklearn",
            &format!("{what} A vs sklearn"),
            got.a(),
            *a,
            SKLEARN_PLATT,
        );
        check.close(
            "B vs sklearn",
            &format!("{what} B vs sklearn"),
            got.b(),
            *b,
            SKLEARN_PLATT,
        );
    }
}

/// Checks candor's per-class isotonic knots against IsotonicRegression's thresholds.
fn check_isotonic(check: &mut Checker, name: &str, got: &[Isotonic], want: &[ClassMap]) {
    for (k, (got, want)) in got.iter().zip(want).enumerate() {
        let ClassMap::Isotonic { x, y } = want else {
            check.fail(format!("{name}: class map {k} is not an isotonic map"));
            continue;
        };
        let what = format!("{name}: class map {k}");
        check.all_close("knot x", &format!("{what} x"), got.x(), x, SCORE_KNOT);
        check.all_close("knot y", &format!("{what} y"), got.y(), y, KNOT);
    }
}

#[test]
fn one_vs_rest_matches_calibrated_classifier_cv() {
    const FILE: &str = "reference_one_vs_rest.json";
    let refs: References<Case> = load(FILE);
    let mut check = Checker::new(FILE, &refs);
    assert!(refs.cases.len() >= 4, "{FILE}: too few cases");
    for case in &refs.cases {
        let set = scores(&case.scores);
        let name = format!("{} {}", case.scores, case.method);
        let (logits, labels) = (set.calibration.flat(), &set.calibration.labels);
        let fitted = match case.method.as_str() {
            "sigmoid" => {
                fit_one_vs_rest(&PlattFit, &logits, set.columns, labels, None).map(|(m, _)| {
                    check_platt(&mut check, &name, m.maps(), &case.maps);
                    (m.maps().len(), Method::Platt(m))
                })
            }
            "isotonic" => {
                fit_one_vs_rest(&IsotonicFit, &logits, set.columns, labels, None).map(|(m, _)| {
                    check_isotonic(&mut check, &name, m.maps(), &case.maps);
                    (m.maps().len(), Method::Isotonic(m))
                })
            }
            other => panic!("{FILE}: unknown method {other}"),
        };
        let (count, method) = match fitted {
            Ok(f) => f,
            Err(e) => {
                check.fail(format!("{name}: fit failed: {e}"));
                continue;
            }
        };
        if count != case.maps.len() {
            check.fail(format!(
                "{name}: expected {} class maps, got {count}",
                case.maps.len()
            ));
        }
        let got = set.apply_test(&method);
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
