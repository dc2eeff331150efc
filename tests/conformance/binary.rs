//! Binary Platt scaling and isotonic regression on breast cancer scores against scikit-learn.

use super::fixture::{load, scores, Checker, References};
use super::{KNOT, OBJECTIVE, PARAMETER, PROBABILITY};
use candor::fit::{isotonic, platt};
use candor::method::BinaryMap;
use serde::Deserialize;

#[derive(Debug, Deserialize)]
struct PlattParams {
    a: f64,
    b: f64,
}

#[derive(Debug, Deserialize)]
struct SklearnPlatt {
    a: f64,
    b: f64,
    test_probabilities: Vec<f64>,
}

#[derive(Debug, Deserialize)]
struct TightPlatt {
    #[serde(flatten)]
    params: PlattParams,
    objective_sum: f64,
}

#[derive(Debug, Deserialize)]
struct PlattCase {
    scores: String,
    sklearn: SklearnPlatt,
    tight: TightPlatt,
}

#[derive(Debug, Deserialize)]
struct IsotonicCase {
    scores: String,
    calibration_scores: Vec<f64>,
    test_scores: Vec<f64>,
    x: Vec<f64>,
    y: Vec<f64>,
    test_predictions: Vec<f64>,
}

/// The single score f of each row of a one-column part.
fn column(rows: &[Vec<f64>]) -> Vec<f64> {
    rows.iter().map(|r| r[0]).collect()
}

#[test]
fn platt_matches_scikit_learn_sigmoid_calibration() {
    const FILE: &str = "reference_platt.json";
    let refs: References<PlattCase> = load(FILE);
    let mut check = Checker::new(FILE, &refs);
    assert!(
        refs.cases.len() >= 2,
        "{FILE}: expected two binary score sets"
    );
    for case in &refs.cases {
        let set = scores(&case.scores);
        let name = &case.scores;
        let f = column(&set.calibration.logits);
        let positive: Vec<bool> = set.calibration.labels.iter().map(|&y| y == 1).collect();
        let (map, diag) = match platt::fit_binary(&f, &positive) {
            Ok(fit) => fit,
            Err(e) => {
                check.fail(format!("{name}: fit failed: {e}"));
                continue;
            }
        };
        // Parameters against both scikit-learn's L-BFGS-B result and the root of the gradient;
        // the two agree to about 1e-9 on these sets, so both comparisons hold at 1e-6.
        for (who, want) in [
            ("sklearn", (case.sklearn.a, case.sklearn.b)),
            ("tight", (case.tight.params.a, case.tight.params.b)),
        ] {
            check.close(
                "A",
                &format!("{name}: A vs {who}"),
                map.a(),
                want.0,
                PARAMETER,
            );
            check.close(
                "B",
                &format!("{name}: B vs {who}"),
                map.b(),
                want.1,
                PARAMETER,
            );
        }
        let n = f.len() as f64;
        check.close(
            "objective",
            &format!("{name}: mean Platt objective"),
            diag.objective_end.unwrap_or(f64::NAN),
            case.tight.objective_sum / n,
            OBJECTIVE,
        );
        let got: Vec<f64> = column(&set.test.logits)
            .iter()
            .map(|&s| map.apply(s))
            .collect();
        check.all_close(
            "test probabilities",
            &format!("{name}: test P(y = 1)"),
            &got,
            &case.sklearn.test_probabilities,
            PROBABILITY,
        );
    }
    check.finish();
}

#[test]
fn isotonic_matches_scikit_learn_isotonic_regression() {
    const FILE: &str = "reference_isotonic.json";
    let refs: References<IsotonicCase> = load(FILE);
    let mut check = Checker::new(FILE, &refs);
    assert!(
        refs.cases.len() >= 2,
        "{FILE}: expected two binary score sets"
    );
    for case in &refs.cases {
        let name = &case.scores;
        let set = scores(name);
        let targets: Vec<f64> = set
            .calibration
            .labels
            .iter()
            .map(|&y| f64::from(y))
            .collect();
        let map = match isotonic::fit_binary(&case.calibration_scores, &targets, None) {
            Ok((map, _)) => map,
            Err(e) => {
                check.fail(format!("{name}: fit failed: {e}"));
                continue;
            }
        };
        check.all_close("knot x", &format!("{name}: knot x"), map.x(), &case.x, KNOT);
        check.all_close("knot y", &format!("{name}: knot y"), map.y(), &case.y, KNOT);
        let got: Vec<f64> = case.test_scores.iter().map(|&s| map.apply(s)).collect();
        check.all_close(
            "test predictions",
            &format!("{name}: test predictions"),
            &got,
            &case.test_predictions,
            KNOT,
        );
    }
    check.finish();
}
