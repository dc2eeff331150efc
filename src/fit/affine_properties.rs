//! Properties of the affine fits (METHODS.md 2.0, 2.2–2.5, 5.5): the fitted NLL never exceeds the
//! identity's, probabilities are invariant where the parameters are not, the edge cases (absent
//! class, identical logits, separable data) end cleanly, and threads never change a bit.

use super::affine::{
    fit_dirichlet, fit_matrix, fit_vector, AffineOptions, Regularisation, DIRICHLET_EPSILON,
};
use super::affine_objective::{AffineObjective, Penalty, Shape, CHUNK_ROWS};
use super::lbfgs::Smooth;
use super::FitError;
use crate::numeric::softmax_in_place;
use pulp::Arch;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;

/// Seeded over-confident logits: noise plus a bump on the true class, scaled by 3.
fn data(n: usize, k: usize, seed: u64) -> (Vec<f64>, Vec<u32>) {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let labels: Vec<u32> = (0..n).map(|_| rng.random_range(0..k as u32)).collect();
    let mut z = Vec::with_capacity(n * k);
    for &y in &labels {
        z.extend((0..k).map(|c| 3.0 * (rng.random_range(-1.0..1.0) + f64::from(c == y as usize))));
    }
    (z, labels)
}

/// Mean of −ln q_y over rows, with q from the fitted map.
fn map_nll(z: &[f64], y: &[u32], k: usize, apply: impl Fn(&mut [f64])) -> f64 {
    let mut total = 0.0;
    for (row, &label) in z.chunks_exact(k).zip(y) {
        let mut q = row.to_vec();
        apply(&mut q);
        total -= q[label as usize].ln();
    }
    total / y.len() as f64
}

fn probabilities(z: &[f64], k: usize, apply: impl Fn(&mut [f64])) -> Vec<f64> {
    let mut q = z.to_vec();
    q.chunks_exact_mut(k).for_each(&apply);
    q
}

fn max_diff(a: &[f64], b: &[f64]) -> f64 {
    a.iter()
        .zip(b)
        .map(|(x, y)| (x - y).abs())
        .fold(0.0, f64::max)
}

#[test]
fn every_fit_ends_at_or_below_the_identity_nll() {
    // METHODS.md 2.0: a calibration-set NLL above the identity's is a bug.
    let (z, y) = data(150, 4, 11);
    let o = AffineOptions::default();
    let identity = map_nll(&z, &y, 4, |q| {
        softmax_in_place(q);
    });
    let (v, dv) = fit_vector(&z, 4, &y, o).unwrap();
    let (m, dm) = fit_matrix(&z, 4, &y, Regularisation::odir(0.1), o).unwrap();
    let (d, dd) = fit_dirichlet(&z, 4, &y, Regularisation::NONE, DIRICHLET_EPSILON, o).unwrap();
    for diag in [&dv, &dm, &dd] {
        assert!(diag.converged, "{diag:?}");
        assert!((diag.objective_start.unwrap() - identity).abs() < 1e-12);
        assert!(diag.objective_end.unwrap() <= identity);
    }
    assert!(map_nll(&z, &y, 4, |q| v.apply_in_place(q)) <= identity);
    assert!(map_nll(&z, &y, 4, |q| m.apply_in_place(q, &mut Vec::new())) <= identity);
    assert!(map_nll(&z, &y, 4, |q| d.apply_in_place(q, &mut Vec::new())) <= identity);
}

#[test]
fn a_global_logit_shift_leaves_probabilities_unchanged() {
    // w ⊙ (z + c) + b and W (z + c1) + b: the free bias absorbs c·w or c·W1 [derived], so the
    // fitted probabilities agree although the parameters do not (METHODS.md 5.5).
    let (z, y) = data(80, 3, 12);
    let shifted: Vec<f64> = z.iter().map(|v| v + 5.0).collect();
    let o = AffineOptions::default();
    let (a, _) = fit_vector(&z, 3, &y, o).unwrap();
    let (b, _) = fit_vector(&shifted, 3, &y, o).unwrap();
    let pa = probabilities(&z, 3, |q| a.apply_in_place(q));
    let pb = probabilities(&shifted, 3, |q| b.apply_in_place(q));
    assert!(max_diff(&pa, &pb) < 1e-7);
    let (a, _) = fit_matrix(&z, 3, &y, Regularisation::NONE, o).unwrap();
    let (b, _) = fit_matrix(&shifted, 3, &y, Regularisation::NONE, o).unwrap();
    let pa = probabilities(&z, 3, |q| a.apply_in_place(q, &mut Vec::new()));
    let pb = probabilities(&shifted, 3, |q| b.apply_in_place(q, &mut Vec::new()));
    assert!(max_diff(&pa, &pb) < 1e-7);
}

#[test]
fn dirichlet_ignores_per_row_shifts_and_odir_respects_class_order() {
    // ln softmax(z + c_i·1) = ln softmax(z): Dirichlet features do not see row shifts.
    let (z, y) = data(80, 3, 13);
    let o = AffineOptions::default();
    let reg = Regularisation::odir(0.2);
    let shifted: Vec<f64> = z
        .iter()
        .enumerate()
        .map(|(i, v)| v + (i / 3) as f64 * 0.7)
        .collect();
    let (a, _) = fit_dirichlet(&z, 3, &y, reg, DIRICHLET_EPSILON, o).unwrap();
    let (b, _) = fit_dirichlet(&shifted, 3, &y, reg, DIRICHLET_EPSILON, o).unwrap();
    let pa = probabilities(&z, 3, |q| a.apply_in_place(q, &mut Vec::new()));
    let pb = probabilities(&shifted, 3, |q| b.apply_in_place(q, &mut Vec::new()));
    assert!(max_diff(&pa, &pb) < 1e-7);
    // ODIR is symmetric in the classes: relabel class k as 2 − k and reverse the columns.
    let flipped: Vec<f64> = z.chunks_exact(3).flat_map(|r| [r[2], r[1], r[0]]).collect();
    let y_flipped: Vec<u32> = y.iter().map(|c| 2 - c).collect();
    let (m, _) = fit_matrix(&z, 3, &y, reg, o).unwrap();
    let (mf, _) = fit_matrix(&flipped, 3, &y_flipped, reg, o).unwrap();
    let p = probabilities(&z, 3, |q| m.apply_in_place(q, &mut Vec::new()));
    let pf = probabilities(&flipped, 3, |q| mf.apply_in_place(q, &mut Vec::new()));
    let pf: Vec<f64> = pf
        .chunks_exact(3)
        .flat_map(|r| [r[2], r[1], r[0]])
        .collect();
    assert!(max_diff(&p, &pf) < 1e-7);
}

#[test]
fn an_absent_class_is_frozen_penalised_and_flagged() {
    // METHODS.md 2.2–2.4 edge: class 2 never appears; without a penalty its bias diverges.
    let (z, mut y) = data(60, 3, 14);
    y.iter_mut().for_each(|c| *c %= 2);
    let o = AffineOptions::default();
    let (v, dv) = fit_vector(&z, 3, &y, o).unwrap();
    assert_eq!((v.weights()[2], v.biases()[2]), (1.0, 0.0));
    let (m, dm) = fit_dirichlet(&z, 3, &y, Regularisation::NONE, DIRICHLET_EPSILON, o).unwrap();
    assert_eq!(&m.matrix().weights()[6..9], &[0.0, 0.0, 1.0]);
    for d in [&dv, &dm] {
        assert!(d.converged, "{d:?}");
        assert!(d.flags.iter().any(|f| f.contains("[2] absent")), "{d:?}");
    }
}

#[test]
fn identical_logits_learn_class_frequencies() {
    // Every logit 0: softmax(w·0 + b) = softmax(b), whose NLL optimum is the class
    // frequencies (closed form), here 3/6, 2/6, 1/6.
    let z = [0.0; 18];
    let y = [0, 0, 0, 1, 1, 2];
    let (v, d) = fit_vector(&z, 3, &y, AffineOptions::default()).unwrap();
    let mut q = [0.0; 3];
    v.apply_in_place(&mut q);
    for (got, want) in q.iter().zip([0.5, 1.0 / 3.0, 1.0 / 6.0]) {
        assert!((got - want).abs() < 1e-7, "{q:?}");
    }
    assert!(
        d.flags.iter().any(|f| f.contains("identical inputs")),
        "{d:?}"
    );
}

#[test]
fn separable_data_stops_with_a_tiny_finite_objective() {
    // Every label is the argmax with margin 2: unregularised NLL has no finite minimiser.
    let z = [2.0, 0.0, 0.0, 0.0, 2.0, 0.0, 0.0, 0.0, 2.0, 3.0, 1.0, 0.0];
    let y = [0, 1, 2, 0];
    let (m, d) = fit_matrix(&z, 3, &y, Regularisation::NONE, AffineOptions::default()).unwrap();
    assert!(d.objective_end.unwrap() < 1e-6, "{d:?}");
    assert!(m.weights().iter().all(|w| w.is_finite()));
}

#[test]
fn thread_count_does_not_change_the_fit() {
    // Fixed chunks reduced in order (METHODS.md 2.5): bit-identical parameters.
    let (z, y) = data(5000, 3, 15);
    let one = AffineOptions {
        threads: 1,
        ..AffineOptions::default()
    };
    let two = AffineOptions {
        threads: 2,
        ..AffineOptions::default()
    };
    assert_eq!(
        fit_vector(&z, 3, &y, one).unwrap(),
        fit_vector(&z, 3, &y, two).unwrap()
    );
}

#[test]
fn threads_and_instruction_sets_do_not_change_a_single_bit() {
    // Fixed chunks reduced in chunk order (METHODS.md 2.5 determinism).
    let (f, y) = data(3 * CHUNK_ROWS + 17, 3, 5);
    let mut p = Shape::Matrix.identity(3);
    p.iter_mut()
        .enumerate()
        .for_each(|(j, v)| *v += 0.05 * j as f64);
    let penalty = Penalty {
        lambda: 0.1,
        mu: 0.1,
    };
    let mut results = Vec::new();
    // Nor does the instruction set: the x86-64 baseline against the best one detected.
    let runs = [1, 2, 3, 8].map(|t| (t, Arch::new()));
    for (threads, arch) in runs.into_iter().chain([(2, Arch::Scalar)]) {
        let o = AffineObjective::new(&f, &y, 3, Shape::Matrix, penalty, vec![false; 3], threads)
            .with_arch(arch);
        let mut g = vec![0.0; p.len()];
        let v = o.value_and_gradient(&p, &mut g);
        results.push((
            v.to_bits(),
            g.iter().map(|x| x.to_bits()).collect::<Vec<_>>(),
        ));
    }
    assert!(results.windows(2).all(|w| w[0] == w[1]));
}

#[test]
fn bad_inputs_are_named() {
    let o = AffineOptions::default();
    let z = [0.0, 1.0, 2.0, 1.0, f64::NAN, 0.0];
    let err = fit_vector(&z, 3, &[0, 1], o).unwrap_err();
    assert!(
        matches!(
            err,
            FitError::NonFinite {
                row: 1,
                column: 1,
                ..
            }
        ),
        "{err}"
    );
    let z = [0.0; 6];
    let err = fit_matrix(&z, 3, &[0, 3], Regularisation::NONE, o).unwrap_err();
    assert_eq!(
        err,
        FitError::LabelOutOfRange {
            row: 1,
            label: 3,
            classes: 3
        }
    );
    let err = fit_vector(&z, 3, &[0], o).unwrap_err();
    assert_eq!(
        err,
        FitError::LengthMismatch {
            logits: 2,
            labels: 1
        }
    );
    assert!(matches!(
        fit_vector(&z, 4, &[0], o),
        Err(FitError::BadOption { name: "logits", .. })
    ));
    assert!(matches!(
        fit_vector(&z, 1, &[0], o),
        Err(FitError::BadOption {
            name: "classes",
            ..
        })
    ));
    assert_eq!(fit_vector(&z[..0], 3, &[], o).unwrap_err(), FitError::Empty);
    let reg = Regularisation {
        lambda: -1.0,
        mu: 0.0,
    };
    let err = fit_matrix(&z, 3, &[0, 1], reg, o).unwrap_err();
    assert!(
        matches!(err, FitError::BadOption { name: "lambda", .. }),
        "{err}"
    );
    let err = fit_dirichlet(&z, 3, &[0, 1], Regularisation::NONE, 0.0, o).unwrap_err();
    assert!(
        matches!(
            err,
            FitError::BadOption {
                name: "epsilon",
                ..
            }
        ),
        "{err}"
    );
    let zero_threads = AffineOptions { threads: 0, ..o };
    let err = fit_vector(&z, 3, &[0, 1], zero_threads).unwrap_err();
    assert!(
        matches!(
            err,
            FitError::BadOption {
                name: "threads",
                ..
            }
        ),
        "{err}"
    );
}
