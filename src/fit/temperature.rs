//! Fitting temperature scaling by safeguarded Newton on β = 1/T (Guo, Pleiss, Sun & Weinberger
//! 2017, ICML; algorithm of METHODS.md 2.1).
//!
//! L(β) = mean_i [lse(β z_i) − β z_{i,y_i}] is convex in β with L'(β) = mean(E_i − z_{i,y_i}) and
//! L''(β) = mean(V_i), E_i and V_i the mean and variance of z_i under softmax(β z_i).

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
        if values.len() % width != 0 {
            return Err(FitError::BadOption {
                name: "classes",
                value: width.to_string(),
                reason: format!("{} values do not split into rows of {width}", values.len()),
            });
        }
        if let Some(i) = values.iter().position(|v| !v.to_f64().is_finite()) {
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

/// Objective pieces at one β: (L, L', L'').
fn objective<L: Logit>(rows: &Rows<'_, L>, labels: &[u32], beta: f64, buf: &mut [f64]) -> [f64; 3] {
    let (mut loss, mut grad, mut curv) = (0.0, 0.0, 0.0);
    for (i, &y) in labels.iter().enumerate() {
        rows.row_into(i, buf);
        let m = buf.iter().copied().fold(f64::NEG_INFINITY, f64::max);
        let (mut s, mut e1) = (0.0, 0.0);
        for &z in buf.iter() {
            let w = (beta * (z - m)).exp();
            s += w;
            e1 += w * z;
        }
        let mean = e1 / s;
        let mut var = 0.0;
        for &z in buf.iter() {
            let w = (beta * (z - m)).exp() / s;
            var += w * (z - mean) * (z - mean);
        }
        let zy = buf[y as usize];
        loss += beta * m + s.ln() - beta * zy;
        grad += mean - zy;
        curv += var;
    }
    let n = labels.len() as f64;
    [loss / n, grad / n, curv / n]
}

/// Fits T on rows of logits and labels.
///
/// # Errors
/// Length mismatch, labels out of range (see [`class_counts`]).
pub fn fit<L: Logit>(
    rows: &Rows<'_, L>,
    labels: &[u32],
) -> Result<(Temperature, FitDiagnostics), FitError> {
    if rows.len() != labels.len() {
        return Err(FitError::LengthMismatch {
            logits: rows.len(),
            labels: labels.len(),
        });
    }
    class_counts(labels, rows.classes())?;
    let mut buf = vec![0.0; rows.classes()];
    let mut diag = FitDiagnostics {
        objective_start: Some(objective(rows, labels, 1.0, &mut buf)[0]),
        ..FitDiagnostics::default()
    };
    let finish = |beta: f64, mut diag: FitDiagnostics, buf: &mut [f64]| {
        let [loss, grad, _] = objective(rows, labels, beta, buf);
        diag.objective_end = Some(loss);
        diag.gradient_norm = Some(grad.abs());
        let t = Temperature::try_new(1.0 / beta, "method.temperature")
            .map_err(FitError::InvalidResult)?;
        Ok((t, diag))
    };

    let g0 = objective(rows, labels, 0.0, &mut buf)[1];
    let constant_rows = (0..rows.len()).all(|i| {
        rows.row_into(i, &mut buf);
        buf.iter().all(|&v| v == buf[0])
    });
    if constant_rows {
        diag.converged = true;
        diag.flags
            .push("every row is constant across classes: T does not matter, kept T = 1".into());
        return finish(1.0, diag, &mut buf);
    }
    if g0 >= 0.0 {
        diag.converged = true;
        diag.flags.push(format!(
            "the logits carry no usable signal (L'(0) = {g0:e} ≥ 0): T on its upper bound e^10"
        ));
        return finish(BETA_MIN, diag, &mut buf);
    }
    let (mut lo, mut hi) = (0.0, 1.0);
    // `<= 0`: on a separable set the gradient underflows to exactly 0 long before β_max.
    while objective(rows, labels, hi, &mut buf)[1] <= 0.0 {
        if hi >= BETA_MAX {
            diag.converged = true;
            diag.flags.push(
                "the calibration set is separable: NLL keeps falling as T → 0; T on its lower bound e^-10"
                    .into(),
            );
            return finish(BETA_MAX, diag, &mut buf);
        }
        lo = hi;
        hi = (hi * 2.0).min(BETA_MAX);
    }
    let scale = {
        let total: f64 = rows.values.iter().map(|v| v.to_f64().abs()).sum();
        (total / rows.values.len() as f64).max(1.0)
    };
    let mut beta = 1.0f64.clamp(lo.max(BETA_MIN), hi);
    for it in 1..=MAX_ITERATIONS {
        diag.iterations = it;
        let [_, g, h] = objective(rows, labels, beta, &mut buf);
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
    finish(beta, diag, &mut buf)
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
    fn fitted_nll_never_exceeds_identity() {
        // METHODS.md 2.0: a fit that ends above the identity's NLL is a bug.
        let rows = Rows::try_new(&E5_Z, 3).unwrap();
        let (_, d) = fit(&rows, &E5_Y).unwrap();
        assert!(d.objective_end.unwrap() <= d.objective_start.unwrap());
    }
}
