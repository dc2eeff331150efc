//! Fitting Platt scaling P(y = 1 | f) = 1 / (1 + exp(A·f + B)) by the robust Newton method of
//! Lin, Lin & Weng 2007 ("A note on Platt's probabilistic outputs for support vector machines",
//! Machine Learning 68(3)) on Platt's smoothed targets (Platt 1999/2000, "Probabilistic outputs
//! for support vector machines ..."); METHODS.md 2.6.
//!
//! The optimiser works on the paper's objective, a weighted *sum* of cross-entropies with the
//! smoothed targets, with the paper's constants. [`FitDiagnostics`] reports that objective and its
//! gradient per unit weight (divided by Σw) so they read on the same scale as the other fits.

use super::ovr::{check_binary, weight_at};
use super::{FitDiagnostics, FitError};
use crate::method::Platt;

/// Newton iteration cap (Lin, Lin & Weng 2007: max_iter = 100).
pub const MAX_ITERATIONS: u32 = 100;
/// Smallest line-search step before the search is declared failed (the paper's min_step).
pub const MIN_STEP: f64 = 1e-10;
/// Added to the Hessian diagonal so it stays invertible, e.g. for constant scores (the paper's σ).
pub const HESSIAN_RIDGE: f64 = 1e-12;
/// Stop when both gradient components of the summed objective are below this (the paper's eps).
pub const GRADIENT_TOLERANCE: f64 = 1e-5;
/// Sufficient-decrease constant of the Armijo line search (the paper's 1e−4).
pub const ARMIJO: f64 = 1e-4;

const METHOD: &str = "Platt scaling";

/// Scores, labels, weights and the two smoothed targets of one fit.
struct Problem<'a> {
    f: &'a [f64],
    positive: &'a [bool],
    weights: Option<&'a [f64]>,
    /// (N+ + 1)/(N+ + 2), the target of a positive item.
    t_pos: f64,
    /// 1/(N− + 2), the target of a negative item.
    t_neg: f64,
}

impl Problem<'_> {
    fn target(&self, i: usize) -> f64 {
        if self.positive[i] {
            self.t_pos
        } else {
            self.t_neg
        }
    }

    /// F(A, B) = Σ w·[−t ln p − (1 − t) ln(1 − p)] in the paper's overflow-free form.
    fn objective(&self, a: f64, b: f64) -> f64 {
        let mut sum = 0.0;
        for (i, &f) in self.f.iter().enumerate() {
            let (z, t) = (a * f + b, self.target(i));
            let term = if z >= 0.0 {
                t * z + (-z).exp().ln_1p()
            } else {
                (t - 1.0) * z + z.exp().ln_1p()
            };
            sum += weight_at(self.weights, i) * term;
        }
        sum
    }

    /// Gradient (g_A, g_B) and Hessian (H11, H21, H22) of F, without the ridge.
    fn derivatives(&self, a: f64, b: f64) -> ([f64; 2], [f64; 3]) {
        let (mut g, mut h) = ([0.0; 2], [0.0; 3]);
        for (i, &f) in self.f.iter().enumerate() {
            let z = a * f + b;
            let (p, q) = if z >= 0.0 {
                let e = (-z).exp();
                (e / (1.0 + e), 1.0 / (1.0 + e))
            } else {
                let e = z.exp();
                (1.0 / (1.0 + e), e / (1.0 + e))
            };
            let w = weight_at(self.weights, i);
            let d1 = w * (self.target(i) - p);
            let d2 = w * p * q;
            g[0] += f * d1;
            g[1] += d1;
            h[0] += f * f * d2;
            h[1] += f * d2;
            h[2] += d2;
        }
        (g, h)
    }
}

/// Fits (A, B) on scores `f` (any real score, larger = more positive) and 0/1 labels, all
/// items weighing 1.
///
/// # Errors
/// [`FitError::Empty`], [`FitError::LengthMismatch`], [`FitError::NonFinite`] for a score.
pub fn fit_binary(scores: &[f64], positive: &[bool]) -> Result<(Platt, FitDiagnostics), FitError> {
    fit_binary_weighted(scores, positive, None)
}

/// Fits (A, B) with optional per-item weights (e.g. inverse inclusion probabilities): the
/// class counts in the smoothed targets become weighted counts and each item's term in the
/// objective is multiplied by its weight. `None` is the unweighted fit.
///
/// # Errors
/// As [`fit_binary`], plus [`FitError::BadOption`] for weights of the wrong length, negative,
/// non-finite or all zero.
pub fn fit_binary_weighted(
    scores: &[f64],
    positive: &[bool],
    weights: Option<&[f64]>,
) -> Result<(Platt, FitDiagnostics), FitError> {
    let total = check_binary(METHOD, scores, positive.len(), weights, false)?;
    let (mut n_pos, mut n_neg) = (0.0, 0.0);
    for (i, &y) in positive.iter().enumerate() {
        let w = weight_at(weights, i);
        if y {
            n_pos += w;
        } else {
            n_neg += w;
        }
    }
    let pb = Problem {
        f: scores,
        positive,
        weights,
        t_pos: (n_pos + 1.0) / (n_pos + 2.0),
        t_neg: 1.0 / (n_neg + 2.0),
    };
    let start = ((n_neg + 1.0) / (n_pos + 1.0)).ln();
    let (a, b, mut diag) = newton(&pb, start);
    let (g, _) = pb.derivatives(a, b);
    diag.gradient_norm = Some(g[0].abs().max(g[1].abs()) / total);
    diag.objective_start = Some(pb.objective(-1.0, 0.0) / total);
    diag.objective_end = Some(pb.objective(a, b) / total);
    let map = Platt::try_new(a, b, "platt").map_err(FitError::InvalidResult)?;
    Ok((map, diag))
}

/// The Lin–Lin–Weng iteration from A = 0, B = `b0` (METHODS.md 2.6, transcribed step by step).
fn newton(pb: &Problem<'_>, b0: f64) -> (f64, f64, FitDiagnostics) {
    let (mut a, mut b) = (0.0, b0);
    let mut fval = pb.objective(a, b);
    let mut diag = FitDiagnostics::default();
    let mut iter = 0;
    while iter < MAX_ITERATIONS {
        let (g, h) = pb.derivatives(a, b);
        let (h11, h21, h22) = (h[0] + HESSIAN_RIDGE, h[1], h[2] + HESSIAN_RIDGE);
        if g[0].abs() < GRADIENT_TOLERANCE && g[1].abs() < GRADIENT_TOLERANCE {
            diag.converged = true;
            break;
        }
        let det = h11 * h22 - h21 * h21;
        let da = -(h22 * g[0] - h21 * g[1]) / det;
        let db = -(-h21 * g[0] + h11 * g[1]) / det;
        let gd = g[0] * da + g[1] * db;
        let mut step = 1.0;
        while step >= MIN_STEP {
            let (na, nb) = (a + step * da, b + step * db);
            let nf = pb.objective(na, nb);
            if nf < fval + ARMIJO * step * gd {
                (a, b, fval) = (na, nb, nf);
                break;
            }
            step /= 2.0;
        }
        if step < MIN_STEP {
            diag.flags.push(format!(
                "line search failed at iteration {iter}: kept A = {a}, B = {b}"
            ));
            break;
        }
        iter += 1;
    }
    if iter == MAX_ITERATIONS {
        diag.flags
            .push(format!("reached the iteration cap {MAX_ITERATIONS}"));
    }
    diag.iterations = iter;
    (a, b, diag)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::method::BinaryMap;

    fn close(got: f64, want: f64, rel: f64) -> bool {
        (got - want).abs() <= rel * want.abs().max(1e-300)
    }

    /// METHODS.md E4 inputs: 12 scores, N+ = N− = 6.
    const E4_F: [f64; 12] = [
        -3.0, -2.0, -1.5, -1.0, -0.5, 0.0, 0.5, 1.0, 1.5, 2.0, 2.5, 3.0,
    ];
    const E4_Y: [u8; 12] = [0, 0, 0, 1, 0, 0, 1, 0, 1, 1, 1, 1];

    fn labels(y: &[u8]) -> Vec<bool> {
        y.iter().map(|&v| v == 1).collect()
    }

    #[test]
    fn worked_example_e4a() {
        // METHODS.md E4: direct Lin–Lin–Weng: A = −0.6862610600460243, B = 0.15609409022559542,
        // objective (sum) 6.638653033959222, 4 iterations; P(y=1 | f) at f = 0, 1, −1:
        // 0.461055520, 0.629522054, 0.301038994.
        let (m, d) = fit_binary(&E4_F, &labels(&E4_Y)).unwrap();
        assert!(close(m.a(), -0.6862610600460243, 1e-12), "{}", m.a());
        assert!(close(m.b(), 0.15609409022559542, 1e-12), "{}", m.b());
        assert!(close(
            d.objective_end.unwrap() * 12.0,
            6.638653033959222,
            1e-12
        ));
        assert_eq!(d.iterations, 4);
        assert!(d.converged && d.flags.is_empty());
        for (f, want) in [(0.0, 0.461055520), (1.0, 0.629522054), (-1.0, 0.301038994)] {
            assert!((m.apply(f) - want).abs() < 5e-10, "f = {f}");
        }
        // sklearn.calibration._sigmoid_calibration(f, y) = (−0.6862610575924701,
        // 0.15609409511627945) (METHODS.md E4): a different optimiser, agreement ~1e−8.
        assert!(close(m.a(), -0.6862610575924701, 1e-7));
        assert!(close(m.b(), 0.15609409511627945, 1e-7));
    }

    #[test]
    fn worked_example_e4b_separable_stays_finite() {
        // METHODS.md E4(b): A = −0.6739935599, B ≈ 0 (−2e−16), 3 iterations,
        // P(y=1 | 2) = 0.7938003521.
        let (m, d) = fit_binary(&[-2.0, -1.0, 1.0, 2.0], &[false, false, true, true]).unwrap();
        assert!((m.a() - -0.6739935599).abs() < 1e-10, "{}", m.a());
        assert!(m.b().abs() < 1e-14, "{}", m.b());
        assert_eq!(d.iterations, 3);
        assert!((m.apply(2.0) - 0.7938003521).abs() < 1e-10);
    }

    #[test]
    fn worked_example_e4c_one_class_absent() {
        // METHODS.md E4(c) and 2.6: all positive, start point optimal: A = 0,
        // B = −1.3862943611198906 = ln(1/4), p = 0.8 everywhere, no Newton step.
        let (m, d) = fit_binary(&[0.1, 0.5, 0.9], &[true; 3]).unwrap();
        assert_eq!(m.a(), 0.0);
        assert!(close(m.b(), -1.3862943611198906, 1e-15));
        assert!((m.apply(-40.0) - 0.8).abs() < 1e-15);
        assert_eq!(d.iterations, 0);
        assert!(d.converged);
    }

    /// First 30 calibration decision values of load_breast_cancer, rounded to 4 decimals:
    /// X, y = load_breast_cancer(return_X_y=True)
    /// Xtr, Xr, ytr, yr = train_test_split(X, y, test_size=0.5, random_state=0, stratify=y)
    /// Xc, Xte, yc, yte = train_test_split(Xr, yr, test_size=0.5, random_state=0, stratify=yr)
    /// clf = make_pipeline(StandardScaler(), LogisticRegression(C=100.0, max_iter=10000)).fit(Xtr, ytr)
    /// f = np.round(clf.decision_function(Xc)[:30], 4); y = yc[:30]      (scikit-learn 1.9.1)
    const BC_F: [f64; 30] = [
        -23.0557, 6.6898, 21.1737, 18.1713, 9.0625, -25.7387, 27.8868, -28.0878, 12.5878, 24.437,
        -70.1432, 11.9277, 13.9425, 21.6032, 15.5914, 27.1963, -18.942, 13.2735, -21.0721,
        -84.2251, 25.7659, 26.5421, 17.0947, 9.554, -25.4546, 1.1088, 16.63, 2.5931, 11.6683,
        -45.8032,
    ];
    const BC_Y: [u8; 30] = [
        0, 1, 1, 1, 1, 0, 1, 0, 1, 1, 0, 1, 1, 1, 1, 1, 0, 1, 0, 0, 1, 1, 1, 1, 0, 1, 1, 0, 1, 0,
    ];

    #[test]
    fn breast_cancer_scores_match_scikit_learn() {
        // sklearn.calibration._sigmoid_calibration(f, y) = (−0.10362407659556232,
        // −0.8005598699924041) (L-BFGS-B, rescales |f| ≥ 30: agreement ~1e−7).
        // A numpy transcription of METHODS.md 2.6 gives A = −0.10362407719566358,
        // B = −0.8005599507705499, objective 9.002525209049404, 6 iterations.
        let (m, d) = fit_binary(&BC_F, &labels(&BC_Y)).unwrap();
        assert!(close(m.a(), -0.10362407659556232, 1e-6), "{}", m.a());
        assert!(close(m.b(), -0.8005598699924041, 1e-6), "{}", m.b());
        assert!(close(m.a(), -0.10362407719566358, 1e-10), "{}", m.a());
        assert!(close(m.b(), -0.8005599507705499, 1e-10), "{}", m.b());
        assert!(close(
            d.objective_end.unwrap() * 30.0,
            9.002525209049404,
            1e-12
        ));
        assert_eq!(d.iterations, 6);
    }

    #[test]
    fn weighted_fit_matches_scikit_learn() {
        // w = [1 + 0.5·(i mod 3)]; _sigmoid_calibration(f, y, sample_weight=w) =
        // (−0.12076823706471516, −1.0352957951002122); the numpy transcription of 2.6 with
        // weighted counts gives (−0.1207682049748877, −1.0352955696703714).
        let w: Vec<f64> = (0..30).map(|i| 1.0 + 0.5 * (i % 3) as f64).collect();
        let (m, _) = fit_binary_weighted(&BC_F, &labels(&BC_Y), Some(&w)).unwrap();
        assert!(close(m.a(), -0.12076823706471516, 1e-6), "{}", m.a());
        assert!(close(m.b(), -1.0352957951002122, 1e-6), "{}", m.b());
        assert!(close(m.a(), -0.1207682049748877, 1e-10), "{}", m.a());
        assert!(close(m.b(), -1.0352955696703714, 1e-10), "{}", m.b());
    }

    #[test]
    fn unit_weights_equal_the_unweighted_fit() {
        let ones = [1.0; 30];
        let (plain, dp) = fit_binary(&BC_F, &labels(&BC_Y)).unwrap();
        let (unit, du) = fit_binary_weighted(&BC_F, &labels(&BC_Y), Some(&ones)).unwrap();
        assert_eq!(plain, unit);
        assert_eq!(dp, du);
    }

    #[test]
    fn constant_scores_give_the_smoothed_base_rate() {
        // Only A·f + B is identified (METHODS.md 2.6); the optimum puts p at the mean target
        // (3·(4/5) + 1·(1/3))/4 = 0.683333…
        let (m, _) = fit_binary(&[0.7; 4], &[true, true, true, false]).unwrap();
        let want = (3.0 * 0.8 + 1.0 / 3.0) / 4.0;
        assert!((m.apply(0.7) - want).abs() < 1e-6, "{}", m.apply(0.7));
    }

    #[test]
    fn bad_inputs_are_named() {
        assert_eq!(fit_binary(&[], &[]), Err(FitError::Empty));
        assert_eq!(
            fit_binary(&[0.0, 1.0], &[true]),
            Err(FitError::LengthMismatch {
                logits: 2,
                labels: 1
            })
        );
        let err = fit_binary(&[0.0, f64::NAN], &[true, false]).unwrap_err();
        assert!(
            matches!(
                err,
                FitError::NonFinite {
                    row: 1,
                    column: 0,
                    ..
                }
            ),
            "{err}"
        );
        let err = fit_binary_weighted(&[0.0, 1.0], &[true, false], Some(&[1.0, -2.0])).unwrap_err();
        assert!(err.to_string().contains("-2"), "{err}");
    }

    proptest::proptest! {
        #[test]
        fn fit_never_worse_than_start_or_identity(
            rows in proptest::collection::vec((-8.0f64..8.0, proptest::bool::ANY), 1..60)
        ) {
            let (f, y): (Vec<f64>, Vec<bool>) = rows.into_iter().unzip();
            let (m, d) = fit_binary(&f, &y).unwrap();
            let end = d.objective_end.unwrap();
            // The identity on log-odds (A = −1, B = 0) is in the family; Newton with Armijo
            // backtracking never increases the objective.
            proptest::prop_assert!(end <= d.objective_start.unwrap() + 1e-9);
            for &v in &f {
                let p = m.apply(v);
                proptest::prop_assert!((0.0..=1.0).contains(&p));
            }
        }
    }
}
