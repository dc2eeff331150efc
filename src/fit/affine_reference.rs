//! Reference checks of the affine fits against general-purpose libraries (METHODS.md 5.1, 5.5):
//! scipy.optimize.minimize(method='L-BFGS-B', jac=True) on the objectives of METHODS.md 2.2–2.4,
//! and sklearn.linear_model.LogisticRegression(C=np.inf) for unregularised matrix scaling (on z)
//! and Dirichlet calibration (on ln p). Tolerances of METHODS.md 5.5: probabilities 1e−7,
//! objective 1e−9, identifiable parameters 1e−6 (relative, absolute near 0).
//!
//! Values computed with numpy 2.4.6, scipy 1.17.1, scikit-learn 1.9.1:
//! ```text
//! rng = np.random.default_rng(7); n, K = 40, 3
//! y = rng.integers(0, K, n); z = rng.normal(0.0, 1.0, (n, K)); z[np.arange(n), y] += 1.0
//! z = np.round(2.0 * z, 3);  lnp = np.log(np.maximum(scipy.special.softmax(z, axis=1), 1e-12))
//! f = mean(logsumexp(u, 1) - u[range(n), y]) + lam/(K(K-1)) Σ_{j≠k} W_jk² + mu/K Σ b²
//!     (with its analytic gradient as jac)
//! minimize(f, identity, jac=True, method='L-BFGS-B',
//!          options=dict(maxiter=100000, gtol=1e-13, ftol=1e-16, maxcor=20))
//! LogisticRegression(C=np.inf, solver='newton-cholesky', tol=1e-14, max_iter=1000).fit(x, y)
//!     .predict_proba(x)   # within 2.4e-10 (z) and 3.4e-10 (ln p) of the scipy fit
//! ```

use super::affine::{fit_dirichlet, fit_matrix, fit_vector, AffineOptions, Regularisation};
use super::affine_objective::{AffineObjective, Penalty, Shape};
use super::FitDiagnostics;

/// The seeded fixture: 40 rows of K = 3 logits (rounded to 3 decimals, so exact in both languages).
#[rustfmt::skip]
const Z: [f64; 120] = [
    -3.683, -0.470, -0.535, 0.543, 2.314, -0.374, -5.034, -1.077, 1.903, 0.227, -3.060, 1.044,
    -1.957, 0.382, 2.122, -1.615, -0.065, 3.769, -1.167, -0.223, 2.221, 2.128, -2.450, 0.152,
    4.718, -3.094, 1.719, 2.239, -1.283, 4.001, 3.525, -2.399, 0.149, 1.153, -0.378, 3.366,
    -0.133, 1.334, 4.877, 0.649, 0.406, -0.927, 0.255, -0.374, -1.159, -0.392, 1.798, 4.290,
    -0.647, -1.589, 1.294, -3.985, -0.926, 1.805, 4.514, 1.379, -0.654, -0.737, 1.500, 3.047,
    -0.856, -0.607, 2.705, 1.758, -0.395, -2.228, -0.023, 1.113, 2.332, 3.306, -0.048, 1.337,
    -0.680, 2.104, 1.989, 3.167, -2.582, 0.693, -3.376, -4.071, 1.391, -1.800, 2.328, 4.490,
    -1.663, 0.752, 0.411, 0.986, 1.647, -0.412, 1.405, 3.040, -2.067, -0.158, 2.071, -2.109,
    0.520, 0.284, 1.944, 0.385, 0.179, 0.818, -0.237, -3.995, -0.263, 0.726, -4.257, 3.693,
    -3.492, 1.513, 0.309, 1.558, 2.262, -3.074, 2.498, 4.883, -0.132, -0.548, -0.320, 0.050,
];

/// Labels of the fixture.
#[rustfmt::skip]
const Y: [u32; 40] = [
    2, 1, 2, 2, 1, 2, 2, 0, 0, 0, 0, 2, 2, 0, 1, 2, 0, 2, 0, 1,
    2, 0, 1, 0, 2, 0, 2, 1, 1, 1, 1, 1, 1, 2, 2, 2, 2, 1, 1, 2,
];

/// Mean NLL of softmax(z) on the fixture: np.mean(logsumexp(z, 1) − z[range(n), y]).
const IDENTITY_NLL: f64 = 0.6126652442913546;

fn assert_close(got: f64, want: f64, tol: f64, what: &str) {
    assert!(
        (got - want).abs() <= tol,
        "{what}: got {got:e}, want {want:e}, tol {tol:e}"
    );
}

/// Checks the objective at identity and end, and probabilities of rows 0–3 (METHODS.md 5.5).
fn check(apply: impl Fn(&mut [f64]), d: &FitDiagnostics, objective: f64, rows: [[f64; 3]; 4]) {
    assert!(d.converged, "{d:?}");
    assert_close(
        d.objective_start.unwrap_or(f64::NAN),
        IDENTITY_NLL,
        1e-12,
        "identity NLL",
    );
    assert_close(
        d.objective_end.unwrap_or(f64::NAN),
        objective,
        1e-9,
        "objective",
    );
    for (i, want) in rows.iter().enumerate() {
        let mut q = [Z[3 * i], Z[3 * i + 1], Z[3 * i + 2]];
        apply(&mut q);
        for k in 0..3 {
            assert_close(q[k], want[k], 1e-7, &format!("q[{i}][{k}]"));
        }
    }
}

fn assert_parameters(got: &[f64], want: &[f64]) {
    for (j, (g, w)) in got.iter().zip(want).enumerate() {
        assert_close(*g, *w, 1e-6 * w.abs().max(1.0), &format!("parameter {j}"));
    }
}

#[test]
fn vector_scaling_matches_scipy_lbfgsb() {
    // scipy L-BFGS-B on METHODS.md 2.2 (final ‖∇‖∞ = 7.6e−11); b centred (b + c·1 is invariant).
    let (map, d) = fit_vector(&Z, 3, &Y, AffineOptions::default()).unwrap();
    check(
        |z| map.apply_in_place(z),
        &d,
        0.48459712053384296,
        [
            [
                0.0004988287604409845,
                0.3436009139960327,
                0.6559002572435263,
            ],
            [0.0365442065058551, 0.9277916684010846, 0.035664125093060224],
            [
                1.866798218532769e-05,
                0.05542639484064053,
                0.9445549371771741,
            ],
            [
                0.21528498134381374,
                0.004242832353985819,
                0.7804721863022004,
            ],
        ],
    );
    let b = map.biases();
    let mean = b.iter().sum::<f64>() / 3.0;
    let centred: Vec<f64> = b.iter().map(|v| v - mean).collect();
    assert_parameters(
        map.weights(),
        &[1.725736325412557, 1.434006106637937, 0.5408893937994678],
    );
    assert_parameters(
        &centred,
        &[-0.6560197728753351, 0.19704946848919694, 0.4589703043861382],
    );
}

#[test]
fn vector_scaling_of_f32_logits_equals_the_widened_f64_fit() {
    let z32: Vec<f32> = Z.iter().map(|v| *v as f32).collect();
    let z64: Vec<f64> = z32.iter().map(|v| f64::from(*v)).collect();
    let a = fit_vector(&z32, 3, &Y, AffineOptions::default()).unwrap();
    let b = fit_vector(&z64, 3, &Y, AffineOptions::default()).unwrap();
    assert_eq!(a, b);
}

#[test]
fn matrix_scaling_matches_logistic_regression_on_logits() {
    // LogisticRegression(C=np.inf, solver='newton-cholesky') on z; NLL from predict_proba.
    let (map, d) = fit_matrix(&Z, 3, &Y, Regularisation::NONE, AffineOptions::default()).unwrap();
    check(
        |z| map.apply_in_place(z, &mut Vec::new()),
        &d,
        0.4603318042013476,
        [
            [
                0.0003554740212180823,
                0.10852831304790729,
                0.8911162129308746,
            ],
            [
                0.027453805986868765,
                0.9534118978577021,
                0.01913429615542908,
            ],
            [
                6.121435120851675e-06,
                0.0065438981538969735,
                0.9934499804109821,
            ],
            [
                0.25530937563204836,
                0.007725958925065917,
                0.7369646654428856,
            ],
        ],
    );
}

#[test]
fn dirichlet_matches_logistic_regression_on_log_probabilities() {
    // LogisticRegression(C=np.inf, solver='newton-cholesky') on ln max(softmax(z), 1e−12).
    let (map, d) = fit_dirichlet(
        &Z,
        3,
        &Y,
        Regularisation::NONE,
        1e-12,
        AffineOptions::default(),
    )
    .unwrap();
    check(
        |z| map.apply_in_place(z, &mut Vec::new()),
        &d,
        0.5494803698808051,
        [
            [0.003143672254439042, 0.6194804051595096, 0.3773759225860513],
            [0.03621860116559792, 0.8676319043364719, 0.09614949449793023],
            [
                0.00017883207205893044,
                0.13717168934420576,
                0.8626494785837352,
            ],
            [
                0.48868913517311596,
                0.035116198836695374,
                0.47619466599018867,
            ],
        ],
    );
}

#[test]
fn matrix_scaling_with_odir_matches_scipy() {
    // scipy L-BFGS-B on METHODS.md 2.4 with λ = μ = 0.5 (‖∇‖∞ = 3.4e−10). ODIR removes the
    // invariances, so W and b are identifiable; objective includes the penalty.
    let reg = Regularisation {
        lambda: 0.5,
        mu: 0.5,
    };
    let (map, d) = fit_matrix(&Z, 3, &Y, reg, AffineOptions::default()).unwrap();
    check(
        |z| map.apply_in_place(z, &mut Vec::new()),
        &d,
        0.4834304684180776,
        [
            [
                0.003303564103134039,
                0.14798798782067543,
                0.8487084480761905,
            ],
            [
                0.050254411299037405,
                0.9331253980593083,
                0.016620190641654257,
            ],
            [
                9.409162438873356e-05,
                0.009286847248128244,
                0.9906190611274831,
            ],
            [0.3371622861963347, 0.00330817027313449, 0.6595295435305308],
        ],
    );
    assert_parameters(
        map.weights(),
        &[
            1.370334710442974,
            0.03462777805044183,
            -0.017800374754394915,
            0.18342613384683976,
            1.51790938672348,
            0.017800375017167542,
            -0.1834261356544111,
            -0.0346277774059403,
            0.6269631512875867,
        ],
    );
    assert_parameters(
        map.biases(),
        &[
            -0.09518154770980217,
            0.05175211207610455,
            0.043429435633697624,
        ],
    );
}

#[test]
fn dirichlet_with_odir_matches_scipy() {
    // scipy L-BFGS-B on METHODS.md 2.4 with features ln p, λ = 0.3, μ = 0.1 (‖∇‖∞ = 9.4e−10).
    let reg = Regularisation {
        lambda: 0.3,
        mu: 0.1,
    };
    let (map, d) = fit_dirichlet(&Z, 3, &Y, reg, 1e-12, AffineOptions::default()).unwrap();
    check(
        |z| map.apply_in_place(z, &mut Vec::new()),
        &d,
        0.5551738721798224,
        [
            [0.0037847814122970174, 0.593564763683565, 0.4026504549041379],
            [0.0445030017123608, 0.8598078347583697, 0.09568916352926955],
            [
                0.00014190819438680824,
                0.1668593331801337,
                0.8329987586254795,
            ],
            [0.47868266128564013, 0.03669763390369674, 0.484619704810663],
        ],
    );
    assert_parameters(
        map.matrix().weights(),
        &[
            1.4010314447961083,
            -0.1529674793397598,
            0.0357497658545009,
            -0.018641643842547385,
            0.8374899671171183,
            -0.03574976793060354,
            0.018641639298230133,
            0.15296748701909066,
            0.6874000535451872,
        ],
    );
    assert_parameters(
        map.matrix().biases(),
        &[
            -0.04198748177785306,
            0.10575910549823826,
            -0.06377162372038543,
        ],
    );
}

#[test]
fn penalty_normalisation_matches_the_formula() {
    // METHODS.md 2.4: λ/(K(K−1)) Σ_{j≠k} W_jk² + μ/K Σ b_k², K = 2, W = [[1, 2], [3, 4]],
    // b = [1, −1]: 0.6/2 · (4 + 9) + 0.4/2 · 2 = 3.9 + 0.4 = 4.3 (by hand).
    let (f, y) = (vec![0.0; 2], vec![0u32]);
    let penalty = Penalty {
        lambda: 0.6,
        mu: 0.4,
    };
    let o = AffineObjective::new(&f, &y, 2, Shape::Matrix, penalty, vec![false; 2], 1);
    let v = o.penalty(&[1.0, 2.0, 3.0, 4.0, 1.0, -1.0], None);
    assert!((v - 4.3).abs() < 1e-15, "{v}");
}

#[test]
fn nll_at_identity_is_softmax_log_loss() {
    // One row z = [4, 1, 0] with label 0: −ln softmax(z)_0 = ln(1 + e^−3 + e^−4) (closed form).
    let z = [4.0, 1.0, 0.0];
    let o = AffineObjective::new(
        &z,
        &[0],
        3,
        Shape::Vector,
        Penalty {
            lambda: 0.0,
            mu: 0.0,
        },
        vec![false; 3],
        1,
    );
    let want = (1.0 + (-3.0f64).exp() + (-4.0f64).exp()).ln();
    assert!((o.mean_nll(&Shape::Vector.identity(3)) - want).abs() < 1e-15);
}
