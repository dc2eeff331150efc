//! Fitting temperature scaling by safeguarded Newton on β = 1/T (Guo, Pleiss, Sun & Weinberger
//! 2017, ICML; algorithm of METHODS.md 2.1).
//!
//! L(β) = mean_i [lse(β z_i) − β z_{i,y_i}] is convex in β with L'(β) = mean(E_i − z_{i,y_i}) and
//! L''(β) = mean(V_i), E_i and V_i the mean and variance of z_i under softmax(β z_i).
//!
//! Each evaluation of (L, L', L'') is one pass over the rows, split over threads in fixed chunks
//! (`temperature_pass`); the first pass also finds L'(0), constant rows and mean |z|, and
//! evaluations are remembered so a β the algorithm revisits costs nothing. On well-behaved data
//! a fit takes 4–6 passes.

use pulp::Arch;

use super::temperature_pass::{Objective, Passes, Point};
use super::{class_counts, FitDiagnostics, FitError};
use crate::method::Temperature;
use crate::numeric::Logit;

/// Smallest β tried: T ≤ e^10, the bound scikit-learn's temperature calibrator uses
/// (METHODS.md 2.1, source-read there).
pub const BETA_MIN: f64 = 4.5399929762484854e-5; // e^-10
/// Largest β tried: T ≥ e^-10.
pub const BETA_MAX: f64 = 22026.465794806718; // e^10
/// Newton iterations cap.
pub const MAX_ITERATIONS: u32 = 100;
/// Stop when |L'(β)| ≤ this × max(1, mean |z|).
pub const GRADIENT_TOLERANCE: f64 = 1e-12;
/// Stop when a step changes β by at most this × β.
pub const STEP_TOLERANCE: f64 = 1e-15;

/// Rows of logits for a fit: `width` values per row; width 1 is one binary log-odds score f per
/// row, read as the pair (0, f) (METHODS.md 0.3).
#[derive(Debug, Clone, Copy)]
pub struct Rows<'a, L> {
    values: &'a [L],
    width: usize,
}

impl<'a, L: Logit> Rows<'a, L> {
    /// Wraps a row-major slice.
    ///
    /// # Errors
    /// A zero width, a length not divisible by the width, or a NaN/±∞ value (named by row).
    pub fn try_new(values: &'a [L], width: usize) -> Result<Self, FitError> {
        if width == 0 || values.is_empty() {
            return Err(FitError::Empty);
        }
        if !values.len().is_multiple_of(width) {
            return Err(FitError::BadOption {
                name: "classes",
                value: width.to_string(),
                reason: format!("{} values do not split into rows of {width}", values.len()),
            });
        }
        // One branch-free scan (it vectorises); the position only when something is wrong.
        let finite = values
            .iter()
            .fold(true, |ok, v| ok & v.to_f64().is_finite());
        let bad = (!finite)
            .then(|| values.iter().position(|v| !v.to_f64().is_finite()))
            .flatten();
        if let Some(i) = bad {
            return Err(FitError::NonFinite {
                row: i / width,
                column: i % width,
                value: values[i].to_f64(),
            });
        }
        Ok(Rows { values, width })
    }

    /// Number of rows.
    pub fn len(&self) -> usize {
        self.values.len() / self.width
    }

    /// True when there are no rows (never, once constructed).
    pub fn is_empty(&self) -> bool {
        self.values.is_empty()
    }

    /// Number of classes the rows describe (2 for width 1).
    pub fn classes(&self) -> usize {
        self.width.max(2)
    }

    /// The stored values, row-major.
    pub(crate) fn values(&self) -> &'a [L] {
        self.values
    }

    /// Values per row (1 for the binary-score form).
    pub(crate) fn width(&self) -> usize {
        self.width
    }

    /// Row `i` widened into `out` (length [`Self::classes`]).
    #[inline]
    pub fn row_into(&self, i: usize, out: &mut [f64]) {
        let row = &self.values[i * self.width..(i + 1) * self.width];
        if self.width == 1 {
            out[0] = 0.0;
            out[1] = row[0].to_f64();
        } else {
            for (o, v) in out.iter_mut().zip(row) {
                *o = v.to_f64();
            }
        }
    }
}

/// Cap on the default thread count, so a fit does not take every core of a large server.
pub const MAX_DEFAULT_THREADS: usize = 8;

/// Settings of the temperature fit.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct TemperatureOptions {
    /// Threads for the passes over the rows (≥ 1); results are bit-identical for any value.
    pub threads: usize,
}

impl Default for TemperatureOptions {
    /// [`std::thread::available_parallelism`], at most [`MAX_DEFAULT_THREADS`] (1 if unknown).
    fn default() -> Self {
        let threads = std::thread::available_parallelism().map_or(1, |n| n.get());
        TemperatureOptions {
            threads: threads.min(MAX_DEFAULT_THREADS),
        }
    }
}

/// Fits T on rows of logits and labels with the default [`TemperatureOptions`].
///
/// # Errors
/// Length mismatch, labels out of range (see [`class_counts`]).
pub fn fit<L: Logit>(
    rows: &Rows<'_, L>,
    labels: &[u32],
) -> Result<(Temperature, FitDiagnostics), FitError> {
    fit_with(rows, labels, TemperatureOptions::default())
}

/// Fits T on rows of logits and labels (METHODS.md 2.1).
///
/// # Errors
/// Length mismatch, labels out of range (see [`class_counts`]), zero threads.
pub fn fit_with<L: Logit>(
    rows: &Rows<'_, L>,
    labels: &[u32],
    options: TemperatureOptions,
) -> Result<(Temperature, FitDiagnostics), FitError> {
    fit_on(rows, labels, None, options, Arch::new())
}

/// Fits T by the weighted NLL Σ w_i·ℓ_i(T) / Σ w_i (METHODS.md 4.2: labels gathered with known
/// probabilities π_i are weighted 1/π_i).
///
/// # Errors
/// As [`fit_with`], and [`FitError::BadOption`] for a weight list of the wrong length, or a
/// weight that is negative or not finite, or weights that sum to 0.
pub fn fit_weighted<L: Logit>(
    rows: &Rows<'_, L>,
    labels: &[u32],
    weights: &[f64],
    options: TemperatureOptions,
) -> Result<(Temperature, FitDiagnostics), FitError> {
    check_weights(weights, labels.len())?;
    fit_on(rows, labels, Some(weights), options, Arch::new())
}

/// Checks per-row weights: one per row, each finite and ≥ 0, not all 0.
pub(crate) fn check_weights(weights: &[f64], rows: usize) -> Result<(), FitError> {
    let bad = |value: String, reason: &str| FitError::BadOption {
        name: "weights",
        value,
        reason: reason.into(),
    };
    if weights.len() != rows {
        return Err(bad(
            format!("{} weights", weights.len()),
            &format!("must have one weight per row ({rows})"),
        ));
    }
    if let Some(i) = weights.iter().position(|w| !(w.is_finite() && *w >= 0.0)) {
        return Err(bad(
            format!("row {i}: {}", weights[i]),
            "every weight must be finite and >= 0",
        ));
    }
    if weights.iter().sum::<f64>() <= 0.0 {
        return Err(bad("all 0".into(), "some weight must be positive"));
    }
    Ok(())
}

/// [`fit_with`] with the row loops compiled for `arch` (tests compare instruction sets).
fn fit_on<L: Logit>(
    rows: &Rows<'_, L>,
    labels: &[u32],
    weights: Option<&[f64]>,
    options: TemperatureOptions,
    arch: Arch,
) -> Result<(Temperature, FitDiagnostics), FitError> {
    if rows.len() != labels.len() {
        return Err(FitError::LengthMismatch {
            logits: rows.len(),
            labels: labels.len(),
        });
    }
    class_counts(labels, rows.classes())?;
    if options.threads == 0 {
        return Err(FitError::BadOption {
            name: "threads",
            value: "0".into(),
            reason: "must be at least 1".into(),
        });
    }
    let total_weight = weights.map_or(labels.len() as f64, |w| w.iter().sum());
    let passes = Passes {
        rows,
        labels,
        weights,
        total_weight,
        threads: options.threads,
        arch,
    };
    let (at_one, survey) = passes.first();
    let mut objective = Objective::new(&passes);
    let mut diag = FitDiagnostics {
        objective_start: Some(objective.remember(1.0, at_one).loss),
        ..FitDiagnostics::default()
    };
    let finish = |beta: f64, mut diag: FitDiagnostics, objective: &mut Objective<'_, '_, '_, L>| {
        let p = objective.point(beta);
        diag.objective_end = Some(p.loss);
        diag.gradient_norm = Some(p.grad.abs());
        let t = Temperature::try_new(1.0 / beta, "method.temperature")
            .map_err(FitError::InvalidResult)?;
        Ok((t, diag))
    };

    let g0 = survey.grad_at_zero / total_weight;
    if !survey.varying {
        diag.converged = true;
        diag.flags
            .push("every row is constant across classes: T does not matter, kept T = 1".into());
        return finish(1.0, diag, &mut objective);
    }
    if g0 >= 0.0 {
        diag.converged = true;
        diag.flags.push(format!(
            "the logits carry no usable signal (L'(0) = {g0:e} ≥ 0): T on its upper bound e^10"
        ));
        return finish(BETA_MIN, diag, &mut objective);
    }
    let (mut lo, mut hi) = (0.0, 1.0);
    // `<= 0`: on a separable set the gradient underflows to exactly 0 long before β_max.
    while objective.point(hi).grad <= 0.0 {
        if hi >= BETA_MAX {
            diag.converged = true;
            diag.flags.push(
                "the calibration set is separable: NLL keeps falling as T → 0; T on its lower bound e^-10"
                    .into(),
            );
            return finish(BETA_MAX, diag, &mut objective);
        }
        lo = hi;
        hi = (hi * 2.0).min(BETA_MAX);
    }
    let scale = (survey.abs_sum / rows.values.len() as f64).max(1.0);
    let mut beta = 1.0f64.clamp(lo.max(BETA_MIN), hi);
    for it in 1..=MAX_ITERATIONS {
        diag.iterations = it;
        let Point {
            grad: g, curv: h, ..
        } = objective.point(beta);
        if g.abs() <= GRADIENT_TOLERANCE * scale {
            diag.converged = true;
            break;
        }
        if g < 0.0 {
            lo = beta;
        } else {
            hi = beta;
        }
        let mut next = beta - g / h;
        if h <= 1e-300 || !(next > lo && next < hi) {
            next = 0.5 * (lo + hi);
        }
        if (next - beta).abs() <= STEP_TOLERANCE * beta {
            diag.converged = true;
            beta = next;
            break;
        }
        beta = next;
    }
    if beta <= BETA_MIN {
        beta = BETA_MIN;
        diag.flags.push("T on its upper bound e^10".into());
    }
    finish(beta, diag, &mut objective)
}

#[cfg(test)]
mod tests {
    use super::*;

    const E5_Z: [f64; 18] = [
        4.0, 1.0, 0.0, 3.0, 2.5, 0.0, 0.5, 3.0, 1.0, 2.0, 0.0, 2.5, 1.0, 1.0, 5.0, 3.5, 0.5, 1.0,
    ];
    const E5_Y: [u32; 6] = [0, 1, 1, 0, 2, 1];

    #[test]
    fn worked_example_e5() {
        // METHODS.md E5 (safeguarded Newton, direct implementation): β = 0.5684075964373381,
        // T = 1.7593009070740686, NLL 0.9084955362194663 → 0.8100602346069765.
        // scipy.optimize.minimize_scalar agrees to 1e-8 (β = 0.5684076006323255).
        let rows = Rows::try_new(&E5_Z, 3).unwrap();
        let (t, d) = fit(&rows, &E5_Y).unwrap();
        assert!(
            (t.inverse() - 0.5684075964373381).abs() < 1e-9,
            "{}",
            t.inverse()
        );
        assert!((t.temperature() - 1.7593009070740686).abs() < 1e-8);
        assert!((d.objective_start.unwrap() - 0.9084955362194663).abs() < 1e-12);
        assert!((d.objective_end.unwrap() - 0.8100602346069765).abs() < 1e-12);
        assert!(d.converged && d.iterations <= 10, "{d:?}");
    }

    #[test]
    fn worked_example_e5b_one_logit_binary() {
        // METHODS.md E5(b): scikit-learn's calibrator on 1-D f gives β_ = 1.0704513163379705, i.e.
        // 2·β_ = 2.1409026327 for the pair (0, f). (E5(b)'s direct-implementation figure
        // 2.140902607668856 stops early: L'(β) = −1.3e−9 there, −3.6e−17 at our optimum.)
        let f = [-2.0, -1.0, -0.3, 0.2, 0.8, 1.5, 3.0];
        let y = [0, 0, 1, 0, 1, 1, 1];
        let rows = Rows::try_new(&f, 1).unwrap();
        let (t, _) = fit(&rows, &y).unwrap();
        assert!((t.inverse() - 2.1409026327).abs() < 1e-9, "{}", t.inverse());
    }

    #[test]
    fn separable_set_stops_on_the_bound() {
        // METHODS.md E5(c): no finite optimum.
        let z = [2.0, 0.0, 0.0, 0.0, 3.0, 1.0, 0.0, 0.0, 1.5];
        let rows = Rows::try_new(&z, 3).unwrap();
        let (t, d) = fit(&rows, &[0, 1, 2]).unwrap();
        assert_eq!(t.inverse(), BETA_MAX);
        assert!(d.flags[0].contains("separable"), "{:?}", d.flags);
    }

    #[test]
    fn f32_logits_and_bad_inputs() {
        let z32: Vec<f32> = E5_Z.iter().map(|&v| v as f32).collect();
        let rows = Rows::try_new(&z32, 3).unwrap();
        let (t, _) = fit(&rows, &E5_Y).unwrap();
        assert!((t.inverse() - 0.5684075964373381).abs() < 1e-9);
        assert_eq!(
            fit(&rows, &E5_Y[..5]).unwrap_err(),
            FitError::LengthMismatch {
                logits: 6,
                labels: 5
            }
        );
        let mut bad = E5_Y;
        bad[2] = 3;
        assert!(matches!(
            fit(&rows, &bad),
            Err(FitError::LabelOutOfRange { row: 2, .. })
        ));
        let nan = [1.0, f64::NAN, 0.0];
        assert!(matches!(
            Rows::try_new(&nan, 3),
            Err(FitError::NonFinite {
                row: 0,
                column: 1,
                ..
            })
        ));
    }

    #[test]
    fn thread_count_does_not_change_a_bit() {
        // Several chunks (CHUNK_VALUES = 65,536 values, 3 classes: 21,845 rows per chunk) and a
        // last partial chunk, so 1, 2 and 3 threads split the work differently.
        use rand::{Rng, SeedableRng};
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(5);
        let n = 70_001;
        let z: Vec<f32> = (0..n * 3).map(|_| rng.random_range(-4.0..4.0)).collect();
        // Labels: the argmax of the logits plus uniform noise, so the logits carry signal.
        let y: Vec<u32> = z
            .chunks_exact(3)
            .map(|r| {
                let noisy: Vec<f32> = r.iter().map(|v| v + rng.random_range(-6.0..6.0)).collect();
                (0..3u32).fold(0, |b, k| {
                    if noisy[k as usize] > noisy[b as usize] {
                        k
                    } else {
                        b
                    }
                })
            })
            .collect();
        let rows = Rows::try_new(&z, 3).unwrap();
        let one = fit_with(&rows, &y, TemperatureOptions { threads: 1 }).unwrap();
        for threads in [2, 3] {
            let many = fit_with(&rows, &y, TemperatureOptions { threads }).unwrap();
            assert_eq!(one.0.inverse().to_bits(), many.0.inverse().to_bits());
            assert_eq!(one.1, many.1);
        }
        // Nor does the instruction set: the x86-64 baseline against the best one detected.
        let baseline = fit_on(
            &rows,
            &y,
            None,
            TemperatureOptions { threads: 2 },
            Arch::Scalar,
        )
        .unwrap();
        assert_eq!(one.0.inverse().to_bits(), baseline.0.inverse().to_bits());
        assert_eq!(one.1, baseline.1);
        // The Newton path ran: converged inside the bounds, nothing flagged.
        assert!(one.1.converged && one.1.flags.is_empty(), "{one:?}");
        assert!(one.1.iterations >= 2, "{one:?}");
        assert!(fit_with(&rows, &y, TemperatureOptions { threads: 0 }).is_err());
    }

    #[test]
    fn integer_weights_fit_like_repeated_rows() {
        // Weighted NLL with weight w_i equals the plain NLL of the set with row i repeated w_i
        // times (closed form), so both fits land on the same T.
        let w = [3.0, 1.0, 0.0, 2.0, 1.0, 4.0];
        let (mut z, mut y) = (Vec::new(), Vec::new());
        for (i, &wi) in w.iter().enumerate() {
            for _ in 0..wi as usize {
                z.extend_from_slice(&E5_Z[3 * i..3 * i + 3]);
                y.push(E5_Y[i]);
            }
        }
        let opts = TemperatureOptions { threads: 1 };
        let repeated = fit_with(&Rows::try_new(&z, 3).unwrap(), &y, opts).unwrap();
        let rows = Rows::try_new(&E5_Z, 3).unwrap();
        let weighted = fit_weighted(&rows, &E5_Y, &w, opts).unwrap();
        assert!((repeated.0.inverse() - weighted.0.inverse()).abs() < 1e-10);
        let (a, b) = (repeated.1, weighted.1);
        assert!((a.objective_end.unwrap() - b.objective_end.unwrap()).abs() < 1e-12);
        // Unit weights are the unweighted fit, bit for bit.
        let unit = fit_weighted(&rows, &E5_Y, &[1.0; 6], opts).unwrap();
        let plain = fit_with(&rows, &E5_Y, opts).unwrap();
        assert_eq!(unit.0.inverse().to_bits(), plain.0.inverse().to_bits());
        assert!(fit_weighted(&rows, &E5_Y, &[1.0; 5], opts).is_err());
        assert!(fit_weighted(&rows, &E5_Y, &[1.0, -1.0, 1.0, 1.0, 1.0, 1.0], opts).is_err());
        assert!(fit_weighted(&rows, &E5_Y, &[0.0; 6], opts).is_err());
    }

    #[test]
    fn fitted_nll_never_exceeds_identity() {
        // METHODS.md 2.0: a fit that ends above the identity's NLL is a bug.
        let rows = Rows::try_new(&E5_Z, 3).unwrap();
        let (_, d) = fit(&rows, &E5_Y).unwrap();
        assert!(d.objective_end.unwrap() <= d.objective_start.unwrap());
    }
}
