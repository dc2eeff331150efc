//! Fitting the affine recalibration maps: vector scaling softmax(w ⊙ z + b) and matrix scaling
//! softmax(W z + b) (Guo, Pleiss, Sun & Weinberger 2017, ICML; METHODS.md 2.2–2.3) and Dirichlet
//! calibration softmax(W ln p + b) with the ODIR penalty (Kull, Perello-Nieto, Kängsepp, Silva
//! Filho, Song & Flach 2019, NeurIPS; METHODS.md 2.4).
//!
//! Each fit minimises mean NLL (+ ODIR) from the identity map with L-BFGS (METHODS.md 2.5), so the
//! fitted objective is never above the identity's. A class absent from the calibration set has
//! its parameters frozen at the identity and the penalty raised to [`ABSENT_CLASS_PENALTY`]: under
//! softmax's shift invariance freezing alone cannot stop the other classes' biases from running off
//! together (derived, METHODS.md 2.2–2.3 invariances).

use super::affine_objective::{AffineObjective, Penalty, Shape};
use super::lbfgs::minimise;
use super::{class_counts, FitDiagnostics, FitError};
use crate::method::{Dirichlet, MatrixScaling, VectorScaling};
use crate::numeric::{softmax_in_place, Logit};

/// Default iteration cap of the L-BFGS run (METHODS.md 2.5: "e.g. 10 000").
pub const MAX_ITERATIONS: u32 = 10_000;
/// Default worker threads for the objective's row sum; the result does not depend on it.
pub const DEFAULT_THREADS: usize = 2;
/// Smallest λ and μ used when a class is absent, so no parameter diverges (our choice for the
/// edge cases of METHODS.md 2.2–2.4).
pub const ABSENT_CLASS_PENALTY: f64 = 1e-2;
/// Default clamp ε for probabilities before the logarithm in Dirichlet calibration (METHODS.md
/// 0.2).
pub const DIRICHLET_EPSILON: f64 = 1e-12;
/// Field prefix for validation messages of fitted parameters.
const FIELD: &str = "method";

/// ODIR strengths on the mean-NLL scale (METHODS.md 2.4): λ on off-diagonal weights, μ on biases.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Regularisation {
    /// λ ≥ 0: weight of (1/(K(K−1))) Σ_{j≠k} W_jk².
    pub lambda: f64,
    /// μ ≥ 0: weight of (1/K) Σ_k b_k².
    pub mu: f64,
}

impl Regularisation {
    /// No penalty: the plain maximum-likelihood fit.
    pub const NONE: Regularisation = Regularisation {
        lambda: 0.0,
        mu: 0.0,
    };

    /// λ = μ = `strength`, the single knob tuned by [`crate::fit::odir::cross_validate_odir`].
    pub fn odir(strength: f64) -> Self {
        Regularisation {
            lambda: strength,
            mu: strength,
        }
    }
}

/// Settings shared by the affine fits.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct AffineOptions {
    /// L-BFGS iteration cap (≥ 1).
    pub max_iterations: u32,
    /// Threads for the objective's row sum (≥ 1); results are bit-identical for any value.
    pub threads: usize,
    /// Smallest λ and μ applied when a class has no calibration rows (≥ 0).
    pub absent_class_penalty: f64,
}

impl Default for AffineOptions {
    fn default() -> Self {
        AffineOptions {
            max_iterations: MAX_ITERATIONS,
            threads: DEFAULT_THREADS,
            absent_class_penalty: ABSENT_CLASS_PENALTY,
        }
    }
}

/// Fits vector scaling softmax(w ⊙ z + b) to row-major n×K `logits` (METHODS.md 2.2).
///
/// # Errors
/// [`FitError`] for empty input, shape mismatch, non-finite logits, labels ≥ K, K < 2 or bad
/// options; [`FitError::InvalidResult`] if the fitted parameters fail validation (a bug).
pub fn fit_vector<L: Logit>(
    logits: &[L],
    classes: usize,
    labels: &[u32],
    options: AffineOptions,
) -> Result<(VectorScaling, FitDiagnostics), FitError> {
    check_rows(logits, classes, labels)?;
    check_options(options, Regularisation::NONE)?;
    let fit = fit_features(
        logits,
        classes,
        labels,
        Shape::Vector,
        Regularisation::NONE,
        options,
    );
    let (w, b) = fit.params.split_at(classes);
    let map = VectorScaling::try_new(classes, w.to_vec(), b.to_vec(), FIELD)
        .map_err(FitError::InvalidResult)?;
    Ok((map, fit.diagnostics))
}

/// Fits matrix scaling softmax(W z + b) with the ODIR penalty (METHODS.md 2.3–2.4).
///
/// # Errors
/// As [`fit_vector`], plus [`FitError::BadOption`] for a negative or non-finite λ or μ.
pub fn fit_matrix<L: Logit>(
    logits: &[L],
    classes: usize,
    labels: &[u32],
    regularisation: Regularisation,
    options: AffineOptions,
) -> Result<(MatrixScaling, FitDiagnostics), FitError> {
    check_rows(logits, classes, labels)?;
    check_options(options, regularisation)?;
    let fit = fit_features(
        logits,
        classes,
        labels,
        Shape::Matrix,
        regularisation,
        options,
    );
    let (rows, b) = matrix_parts(&fit.params, classes);
    let map = MatrixScaling::try_new(classes, rows, b, FIELD).map_err(FitError::InvalidResult)?;
    Ok((map, fit.diagnostics))
}

/// Fits Dirichlet calibration softmax(W ln max(softmax(z), ε) + b) with ODIR (METHODS.md 2.4).
///
/// # Errors
/// As [`fit_matrix`], plus [`FitError::BadOption`] for ε outside (0, 1).
pub fn fit_dirichlet<L: Logit>(
    logits: &[L],
    classes: usize,
    labels: &[u32],
    regularisation: Regularisation,
    epsilon: f64,
    options: AffineOptions,
) -> Result<(Dirichlet, FitDiagnostics), FitError> {
    check_rows(logits, classes, labels)?;
    check_options(options, regularisation)?;
    check_epsilon(epsilon)?;
    let features = dirichlet_features(logits, classes, epsilon);
    let fit = fit_features(
        &features,
        classes,
        labels,
        Shape::Matrix,
        regularisation,
        options,
    );
    let (rows, b) = matrix_parts(&fit.params, classes);
    let map =
        Dirichlet::try_new(classes, rows, b, epsilon, FIELD).map_err(FitError::InvalidResult)?;
    Ok((map, fit.diagnostics))
}

/// W as K rows and b, from `[W row-major, b]`.
fn matrix_parts(params: &[f64], classes: usize) -> (Vec<Vec<f64>>, Vec<f64>) {
    let (w, b) = params.split_at(classes * classes);
    (
        w.chunks_exact(classes).map(<[f64]>::to_vec).collect(),
        b.to_vec(),
    )
}

/// Checks K ≥ 2, the n×K shape, finiteness and labels; returns per-class counts.
pub(crate) fn check_rows<L: Logit>(
    logits: &[L],
    classes: usize,
    labels: &[u32],
) -> Result<Vec<usize>, FitError> {
    if classes < 2 {
        return Err(bad_option(
            "classes",
            classes,
            "at least 2 classes are needed",
        ));
    }
    if !logits.len().is_multiple_of(classes) {
        let reason = format!("length is not a multiple of K = {classes}");
        return Err(bad_option("logits", logits.len(), &reason));
    }
    let counts = class_counts(labels, classes)?;
    if logits.len() / classes != labels.len() {
        return Err(FitError::LengthMismatch {
            logits: logits.len() / classes,
            labels: labels.len(),
        });
    }
    if let Some(i) = logits.iter().position(|v| !v.to_f64().is_finite()) {
        return Err(FitError::NonFinite {
            row: i / classes,
            column: i % classes,
            value: logits[i].to_f64(),
        });
    }
    Ok(counts)
}

/// Checks the options and the ODIR strengths.
pub(crate) fn check_options(options: AffineOptions, reg: Regularisation) -> Result<(), FitError> {
    if options.max_iterations == 0 {
        return Err(bad_option("max-iterations", 0, "must be at least 1"));
    }
    if options.threads == 0 {
        return Err(bad_option("threads", 0, "must be at least 1"));
    }
    let non_negative = [
        ("absent-class-penalty", options.absent_class_penalty),
        ("lambda", reg.lambda),
        ("mu", reg.mu),
    ];
    match non_negative
        .iter()
        .find(|(_, v)| !(v.is_finite() && *v >= 0.0))
    {
        Some((name, v)) => Err(bad_option(name, v, "must be finite and ≥ 0")),
        None => Ok(()),
    }
}

/// Checks the Dirichlet clamp ε ∈ (0, 1).
pub(crate) fn check_epsilon(epsilon: f64) -> Result<(), FitError> {
    if epsilon > 0.0 && epsilon < 1.0 {
        Ok(())
    } else {
        Err(bad_option("epsilon", epsilon, "must lie in (0, 1)"))
    }
}

fn bad_option(name: &'static str, value: impl ToString, reason: &str) -> FitError {
    FitError::BadOption {
        name,
        value: value.to_string(),
        reason: reason.to_string(),
    }
}

/// ln max(softmax(z_i), ε) row by row: the Dirichlet features, computed as serving does.
pub(crate) fn dirichlet_features<L: Logit>(logits: &[L], classes: usize, epsilon: f64) -> Vec<f64> {
    let mut out: Vec<f64> = logits.iter().map(|v| v.to_f64()).collect();
    for row in out.chunks_exact_mut(classes) {
        softmax_in_place(row);
        row.iter_mut().for_each(|v| *v = v.max(epsilon).ln());
    }
    out
}

/// Fitted flat parameters and how the fit ended.
pub(crate) struct AffineFit {
    /// `[w, b]` or `[W row-major, b]`.
    pub params: Vec<f64>,
    /// Iterations, convergence, objective at identity and at the end, flags.
    pub diagnostics: FitDiagnostics,
}

/// Minimises mean NLL + ODIR over checked features (n ≥ 1, labels < K) from the identity, with the
/// edge cases of METHODS.md 2.2–2.4 (absent classes frozen and penalised, identical inputs
/// flagged).
pub(crate) fn fit_features<X: Logit>(
    features: &[X],
    classes: usize,
    labels: &[u32],
    shape: Shape,
    reg: Regularisation,
    options: AffineOptions,
) -> AffineFit {
    let mut flags = Vec::new();
    let mut frozen = vec![true; classes];
    labels.iter().for_each(|&y| frozen[y as usize] = false);
    let mut penalty = Penalty {
        lambda: if shape == Shape::Matrix {
            reg.lambda
        } else {
            0.0
        },
        mu: reg.mu,
    };
    if frozen.iter().any(|f| *f) {
        let floor = options.absent_class_penalty;
        penalty.mu = penalty.mu.max(floor);
        if shape == Shape::Matrix {
            penalty.lambda = penalty.lambda.max(floor);
        }
        let absent: Vec<usize> = (0..classes).filter(|&k| frozen[k]).collect();
        flags.push(format!(
            "classes {absent:?} absent from the calibration set: their parameters stay at the \
             identity; penalty raised to λ = {}, μ = {}",
            penalty.lambda, penalty.mu
        ));
    }
    if features.windows(2).all(|w| w[0].to_f64() == w[1].to_f64()) {
        flags.push(
            "identical inputs in every row and class: only class frequencies are learned \
             (weights and biases are not separately identified)"
                .to_string(),
        );
    }
    let objective = AffineObjective::new(
        features,
        labels,
        classes,
        shape,
        penalty,
        frozen,
        options.threads,
    );
    let start = shape.identity(classes);
    let identity_value = objective.mean_nll(&start);
    let m = minimise(&objective, start, options.max_iterations);
    flags.extend(m.note);
    let end_penalty = objective.penalty(&m.x, None);
    if end_penalty > 0.0 {
        flags.push(format!(
            "objective includes the ODIR penalty {end_penalty:e}; mean NLL {:e}",
            m.value - end_penalty
        ));
    }
    let diagnostics = FitDiagnostics {
        iterations: m.iterations,
        converged: m.converged,
        gradient_norm: Some(m.gradient_norm),
        objective_start: Some(identity_value),
        objective_end: Some(m.value),
        flags,
    };
    AffineFit {
        params: m.x,
        diagnostics,
    }
}
