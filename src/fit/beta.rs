//! Fitting beta calibration μ(s) = σ(a·ln s − b·ln(1 − s) + c) (Kull, Silva Filho & Flach 2017,
//! AISTATS, "Beta calibration: a well-founded and easily implemented improvement on logistic
//! calibration for binary classifiers"; METHODS.md 2.10).
//!
//! The fit is a logistic regression with hard labels on the features (ln s, −ln(1 − s)) plus an
//! intercept, s clamped to [[`EPSILON`], 1 − [`EPSILON`]], minimising the weighted mean NLL by
//! Newton's method (3×3 Hessian, Cholesky solve) with Armijo backtracking from the identity
//! a = b = 1, c = 0 (METHODS.md 2.0, 2.5).
//!
//! Refit rule: a and b must be ≥ 0. When the free fit gives a < 0 (or b < 0), the feature is
//! removed and the rest refitted, as the paper does. Implemented exactly: the free fit and, if it
//! is infeasible, the fits with a = 0, with b = 0 and with both removed are compared and the
//! feasible one with the lowest NLL is kept. With one negative coefficient this is the paper's
//! rule (the optimum then lies on that coefficient's face); with both negative it is still the
//! constrained optimum. The identity is feasible, so the result never has a higher NLL than it.

use super::ovr::{check_binary, weight_at};
use super::{FitDiagnostics, FitError};
use crate::method::BetaCalibration;
use crate::numeric::{sigmoid, softplus};

/// Clamp for scores entering the logarithms (METHODS.md 0.2), stored in the map.
pub const EPSILON: f64 = 1e-12;
/// Newton iteration cap per fit.
pub const MAX_ITERATIONS: u32 = 100;
/// Converged when the max-abs gradient of the mean NLL is at most this (METHODS.md 2.5).
pub const GRADIENT_TOLERANCE: f64 = 1e-8;
/// Converged when the relative decrease stays below this for [`STALL_ITERATIONS`] iterations.
pub const RELATIVE_DECREASE: f64 = 1e-14;
/// See [`RELATIVE_DECREASE`].
pub const STALL_ITERATIONS: u32 = 3;
/// Added to the Hessian diagonal so the solve never meets a singular matrix (METHODS.md 2.5).
pub const HESSIAN_RIDGE: f64 = 1e-10;
/// Sufficient-decrease constant of the backtracking line search.
pub const ARMIJO: f64 = 1e-4;
/// Smallest step tried before the line search gives up.
pub const MIN_STEP: f64 = 1e-10;

const METHOD: &str = "beta calibration";

/// Features (ln s, −ln(1 − s)), labels and weights.
struct Design<'a> {
    x: Vec<[f64; 2]>,
    y: &'a [bool],
    w: Option<&'a [f64]>,
    total: f64,
}

/// Which of (a, b) are free; the intercept always is.
type Active = [bool; 2];

/// The result of Newton on one face.
#[derive(Debug, Clone, Copy)]
struct FaceFit {
    theta: [f64; 3],
    nll: f64,
    grad_norm: f64,
    iterations: u32,
    converged: bool,
    line_search_failed: bool,
}

impl Design<'_> {
    fn eta(&self, i: usize, t: &[f64; 3]) -> f64 {
        t[0] * self.x[i][0] + t[1] * self.x[i][1] + t[2]
    }

    fn nll(&self, t: &[f64; 3]) -> f64 {
        let mut sum = 0.0;
        for i in 0..self.x.len() {
            let eta = self.eta(i, t);
            let y = if self.y[i] { eta } else { 0.0 };
            sum += weight_at(self.w, i) * (softplus(eta) - y);
        }
        sum / self.total
    }

    /// Gradient and Hessian (with ridge) of the mean NLL; inactive coordinates get a zero
    /// gradient and a unit Hessian row so their step is 0.
    fn derivatives(&self, t: &[f64; 3], active: Active) -> ([f64; 3], [[f64; 3]; 3]) {
        let (mut g, mut h) = ([0.0; 3], [[0.0; 3]; 3]);
        for i in 0..self.x.len() {
            let p = sigmoid(self.eta(i, t));
            let w = weight_at(self.w, i) / self.total;
            let f = [self.x[i][0], self.x[i][1], 1.0];
            let r = w * (p - if self.y[i] { 1.0 } else { 0.0 });
            let c = w * p * (1.0 - p);
            for j in 0..3 {
                g[j] += r * f[j];
                for k in 0..3 {
                    h[j][k] += c * f[j] * f[k];
                }
            }
        }
        for j in 0..3 {
            h[j][j] += HESSIAN_RIDGE;
            if j < 2 && !active[j] {
                g[j] = 0.0;
                h[j] = [0.0; 3];
                (0..3).for_each(|k| h[k][j] = 0.0);
                h[j][j] = 1.0;
            }
        }
        (g, h)
    }
}

/// Solves H d = −g for a symmetric positive-definite 3×3 H by Cholesky; `None` if not SPD.
fn newton_step(h: &[[f64; 3]; 3], g: &[f64; 3]) -> Option<[f64; 3]> {
    let mut l = [[0.0; 3]; 3];
    for i in 0..3 {
        for j in 0..=i {
            let s = h[i][j] - (0..j).map(|k| l[i][k] * l[j][k]).sum::<f64>();
            if i == j {
                if s.is_nan() || s <= 0.0 {
                    return None;
                }
                l[i][i] = s.sqrt();
            } else {
                l[i][j] = s / l[j][j];
            }
        }
    }
    let mut z = [0.0; 3];
    for i in 0..3 {
        z[i] = (-g[i] - (0..i).map(|k| l[i][k] * z[k]).sum::<f64>()) / l[i][i];
    }
    let mut d = [0.0; 3];
    for i in (0..3).rev() {
        d[i] = (z[i] - (i + 1..3).map(|k| l[k][i] * d[k]).sum::<f64>()) / l[i][i];
    }
    Some(d)
}

/// Newton with backtracking on the face `active`, from a = b = 1 (where free), c = 0.
fn fit_face(d: &Design<'_>, active: Active) -> FaceFit {
    let mut t = [
        f64::from(u8::from(active[0])),
        f64::from(u8::from(active[1])),
        0.0,
    ];
    let mut fit = FaceFit {
        theta: t,
        nll: d.nll(&t),
        grad_norm: f64::INFINITY,
        iterations: 0,
        converged: false,
        line_search_failed: false,
    };
    let mut stalls = 0;
    while fit.iterations < MAX_ITERATIONS {
        let (g, h) = d.derivatives(&t, active);
        fit.grad_norm = g.iter().fold(0.0, |m, v| v.abs().max(m));
        if fit.grad_norm <= GRADIENT_TOLERANCE || stalls >= STALL_ITERATIONS {
            fit.converged = true;
            break;
        }
        // Not SPD only if rounding broke the ridge: fall back to steepest descent.
        let step = newton_step(&h, &g).unwrap_or([-g[0], -g[1], -g[2]]);
        let slope: f64 = (0..3).map(|j| g[j] * step[j]).sum();
        let mut size = 1.0;
        let accepted = loop {
            let trial = [0, 1, 2].map(|j| t[j] + size * step[j]);
            let value = d.nll(&trial);
            if value <= fit.nll + ARMIJO * size * slope {
                break Some((trial, value));
            }
            size /= 2.0;
            if size < MIN_STEP {
                break None;
            }
        };
        let Some((trial, value)) = accepted else {
            fit.line_search_failed = true;
            break;
        };
        let decrease = (fit.nll - value) / fit.nll.abs().max(f64::MIN_POSITIVE);
        stalls = if decrease < RELATIVE_DECREASE {
            stalls + 1
        } else {
            0
        };
        (t, fit.nll) = (trial, value);
        fit.theta = t;
        fit.iterations += 1;
    }
    fit
}

/// Fits (a, b, c) on probability scores and 0/1 labels with optional weights. Diagnostics report
/// the mean NLL at the identity (a = b = 1, c = 0) and at the fit, the Newton iterations and
/// final gradient of the kept fit, and a flag when the refit rule applied.
///
/// # Errors
/// [`FitError::Empty`], [`FitError::LengthMismatch`], [`FitError::NonFinite`] for a score,
/// [`FitError::NotApplicable`] for a score outside [0, 1] or when one class has no weight (the
/// hard-label fit then has no finite optimum), [`FitError::BadOption`] for bad weights.
pub fn fit_binary(
    scores: &[f64],
    positive: &[bool],
    weights: Option<&[f64]>,
) -> Result<(BetaCalibration, FitDiagnostics), FitError> {
    let total = check_binary(METHOD, scores, positive.len(), weights, true)?;
    let pos: f64 = (0..scores.len())
        .filter(|&i| positive[i])
        .map(|i| weight_at(weights, i))
        .sum();
    if !(pos > 0.0 && pos < total) {
        let reason = format!(
            "needs both classes with positive weight, got {pos} positive of {total} in total"
        );
        return Err(FitError::NotApplicable {
            method: METHOD,
            reason,
        });
    }
    let x = scores
        .iter()
        .map(|&s| {
            let s = s.clamp(EPSILON, 1.0 - EPSILON);
            [s.ln(), -(-s).ln_1p()]
        })
        .collect();
    let design = Design {
        x,
        y: positive,
        w: weights,
        total,
    };
    let free = fit_face(&design, [true, true]);
    let mut flags = Vec::new();
    let kept = if free.theta[0] >= 0.0 && free.theta[1] >= 0.0 {
        free
    } else {
        let best = [[false, true], [true, false], [false, false]]
            .into_iter()
            .map(|active| fit_face(&design, active))
            .filter(|f| f.theta[0] >= 0.0 && f.theta[1] >= 0.0)
            .min_by(|p, q| p.nll.total_cmp(&q.nll))
            .unwrap_or(free);
        flags.push(format!(
            "free fit had a = {}, b = {}; refitted with {}",
            free.theta[0],
            free.theta[1],
            match (best.theta[0] == 0.0, best.theta[1] == 0.0) {
                (true, true) => "a = b = 0",
                (true, false) => "a = 0",
                (false, true) => "b = 0",
                (false, false) => "both free",
            }
        ));
        best
    };
    if kept.line_search_failed {
        flags.push("line search failed".to_string());
    } else if !kept.converged {
        flags.push(format!(
            "reached the iteration cap {MAX_ITERATIONS} (separable data?)"
        ));
    }
    let diag = FitDiagnostics {
        iterations: kept.iterations,
        converged: kept.converged,
        gradient_norm: Some(kept.grad_norm),
        objective_start: Some(design.nll(&[1.0, 1.0, 0.0])),
        objective_end: Some(kept.nll),
        flags,
    };
    let [a, b, c] = kept.theta;
    let map =
        BetaCalibration::try_new(a, b, c, EPSILON, "beta").map_err(FitError::InvalidResult)?;
    Ok((map, diag))
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::method::BinaryMap;
    use proptest::prelude::*;

    /// METHODS.md E7/E11 scores and labels.
    const S: [f64; 10] = [0.05, 0.15, 0.22, 0.35, 0.41, 0.52, 0.63, 0.71, 0.84, 0.93];
    const Y: [bool; 10] = [
        false, false, true, false, false, true, false, true, true, true,
    ];

    fn close(got: f64, want: f64, rel: f64) -> bool {
        (got - want).abs() <= rel * want.abs().max(1e-300)
    }

    #[test]
    fn worked_example_e11() {
        // METHODS.md E11: LogisticRegression(C=np.inf) on [ln s, −ln(1−s)]: a = 0.14911067,
        // b = 2.38196983, c = −1.68861981, mean NLL 0.478186571. Full precision from 100 plain
        // numpy Newton steps on the mean NLL (final gradient 4e−17): a = 0.14911067108660625,
        // b = 2.3819698274347942, c = −1.6886198058231656, NLL 0.47818657104622686; μ(0.1, 0.5,
        // 0.9) = 0.1441804083921275, 0.4648282410150819, 0.9776943706647344. (METHODS.md prints
        // μ = 0.1441804162, 0.4648282262, 0.9776943719, from the 8-digit parameters.)
        let (m, d) = fit_binary(&S, &Y, None).unwrap();
        let (a, b, c) = m.params();
        assert!(
            close(a, 0.14911067, 1e-6) && close(b, 2.38196983, 1e-6),
            "{a} {b}"
        );
        assert!(close(c, -1.68861981, 1e-6), "{c}");
        assert!(close(a, 0.14911067108660625, 1e-9), "{a}");
        assert!(close(b, 2.3819698274347942, 1e-9), "{b}");
        assert!(close(c, -1.6886198058231656, 1e-9), "{c}");
        assert!(close(d.objective_end.unwrap(), 0.47818657104622686, 1e-12));
        let mu = [
            (0.1, 0.1441804083921275),
            (0.5, 0.4648282410150819),
            (0.9, 0.9776943706647344),
        ];
        for (s, want) in mu {
            assert!((m.apply(s) - want).abs() < 1e-10, "μ({s}) = {}", m.apply(s));
        }
        for (s, want) in [
            (0.1, 0.1441804162),
            (0.5, 0.4648282262),
            (0.9, 0.9776943719),
        ] {
            assert!((m.apply(s) - want).abs() < 5e-8, "μ({s}) = {}", m.apply(s));
        }
        // Identity NLL: −mean(y ln s + (1 − y) ln(1 − s)) = 0.4923948744366847 (numpy).
        assert!(close(d.objective_start.unwrap(), 0.4923948744366847, 1e-12));
        assert!(d.converged && d.flags.is_empty(), "{d:?}");
    }

    #[test]
    fn negative_a_is_refitted_without_it() {
        // s, y below; LogisticRegression(C=np.inf, tol=1e-12) on [ln s, −ln(1−s)] gives
        // a = −4.28203872 < 0, b = 11.01438853, c = −11.97267309. Refit on −ln(1−s) alone
        // (numpy Newton): b = 1.5489765868408463, c = −0.8179414674598016, NLL
        // 0.5509287511741442 (sklearn: 1.54897662, −0.81794149); μ(0.1, 0.5, 0.9) =
        // 0.3419220740129318, 0.5635856756229841, 0.9398403936598685.
        let s = [
            0.02, 0.05, 0.1, 0.2, 0.3, 0.4, 0.5, 0.6, 0.7, 0.8, 0.9, 0.95,
        ];
        let y = [1, 1, 0, 0, 0, 0, 1, 0, 1, 1, 1, 1].map(|v| v == 1);
        let (m, d) = fit_binary(&s, &y, None).unwrap();
        let (a, b, c) = m.params();
        assert_eq!(a, 0.0);
        assert!(close(b, 1.5489765868408463, 1e-9) && close(c, -0.8179414674598016, 1e-9));
        assert!(close(d.objective_end.unwrap(), 0.5509287511741442, 1e-12));
        let mu = [
            (0.1, 0.3419220740129318),
            (0.5, 0.5635856756229841),
            (0.9, 0.9398403936598685),
        ];
        for (q, want) in mu {
            assert!((m.apply(q) - want).abs() < 1e-10);
        }
        assert!(d.flags[0].contains("refitted with a = 0"), "{:?}", d.flags);
        assert!(d.flags[0].contains("a = -4.28203"), "{:?}", d.flags);
    }

    #[test]
    fn gradient_matches_central_differences() {
        // METHODS.md 2.5: h = 1e−6, relative error < 1e−6.
        let x = S.iter().map(|&s| [s.ln(), -(-s).ln_1p()]).collect();
        let w = [0.5, 1.0, 2.0, 1.0, 0.5, 1.0, 2.0, 1.0, 0.5, 1.0];
        let d = Design {
            x,
            y: &Y,
            w: Some(&w),
            total: w.iter().sum(),
        };
        let t = [0.7, 1.3, -0.4];
        let (g, _) = d.derivatives(&t, [true, true]);
        for j in 0..3 {
            let (mut up, mut down) = (t, t);
            up[j] += 1e-6;
            down[j] -= 1e-6;
            let numeric = (d.nll(&up) - d.nll(&down)) / 2e-6;
            assert!(close(numeric, g[j], 1e-6), "j = {j}: {numeric} vs {}", g[j]);
        }
    }

    #[test]
    fn bad_inputs_are_named() {
        let err = fit_binary(&[0.2, 0.7], &[true, true], None).unwrap_err();
        assert!(err.to_string().contains("needs both classes"), "{err}");
        let err = fit_binary(&[0.2, 0.7], &[true, false], Some(&[1.0, 0.0])).unwrap_err();
        assert!(err.to_string().contains("needs both classes"), "{err}");
        let err = fit_binary(&[0.2, 1.7], &[true, false], None).unwrap_err();
        assert!(err.to_string().contains("row 1: score 1.7"), "{err}");
        let plain = fit_binary(&S, &Y, None).unwrap();
        assert_eq!(plain, fit_binary(&S, &Y, Some(&[1.0; 10])).unwrap());
    }

    proptest! {
        #[test]
        fn never_worse_than_the_identity(
            rows in prop::collection::vec((0.0f64..=1.0, any::<bool>()), 2..60)
        ) {
            let (s, y): (Vec<f64>, Vec<bool>) = rows.into_iter().unzip();
            prop_assume!(y.iter().any(|&v| v) && y.iter().any(|&v| !v));
            let (m, d) = fit_binary(&s, &y, None).unwrap();
            let (start, end) = (d.objective_start.unwrap(), d.objective_end.unwrap());
            prop_assert!(end <= start + 1e-12, "{end} > {start}");
            let (a, b, _) = m.params();
            prop_assert!(a >= 0.0 && b >= 0.0);
            for q in [0.0, 0.01, 0.5, 0.99, 1.0] {
                let p = m.apply(q);
                prop_assert!((0.0..=1.0).contains(&p));
            }
        }
    }
}
