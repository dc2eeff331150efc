//! Label (prior) shift: the EM re-estimation of class priors of Saerens, Latinne & Decaestecker
//! 2002 (METHODS.md 4.3), and the adjusted posteriors q'_k ∝ (π'_k/π_k)·q_k.
//!
//! For a temperature map the adjustment is exactly vector scaling with every weight 1/T and bias
//! ln(π'_k/π_k): softmax(z/T + ln(π'/π)) ∝ (π'/π)·softmax(z/T). That is how `candor fit
//! --journal --prior-shift` writes it, so the sidecar needs no new map kind.

use super::FitError;
use crate::method::{Temperature, VectorScaling};

/// EM stops when no prior moves more than this (METHODS.md 4.3: 1e−8 … 1e−12).
pub const EM_TOLERANCE: f64 = 1e-12;
/// At most this many EM iterations (METHODS.md 4.3).
pub const EM_MAX_ITERATIONS: usize = 1000;
/// Estimated priors are floored at this and renormalised before use, so a class never gets a
/// bias of −∞ (ours; METHODS.md 4.3 suggests floors such as 1e−6).
pub const PRIOR_FLOOR: f64 = 1e-6;

/// The EM result.
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct PriorShift {
    /// Estimated target priors π' (before any floor).
    pub priors: Vec<f64>,
    /// Iterations run.
    pub iterations: usize,
    /// Whether the tolerance was reached.
    pub converged: bool,
    /// ℓ(π) = Σ_i ln Σ_k (π_k/π_source,k)·q_ik at the start (π = source) and at the end.
    pub log_likelihood: [f64; 2],
}

fn log_likelihood(q: &[f64], k: usize, ratio: &[f64]) -> f64 {
    q.chunks_exact(k)
        .map(|row| row.iter().zip(ratio).map(|(a, r)| a * r).sum::<f64>().ln())
        .sum()
}

/// Estimates the class priors of the items whose calibrated posteriors are `q` (n × K, rows
/// summing to 1), given the priors `source` the posteriors refer to.
///
/// # Errors
/// [`FitError::BadOption`] for an empty `q`, a length that is not a multiple of K, or source
/// priors that are not positive and summing to 1.
pub fn saerens_em(q: &[f64], k: usize, source: &[f64]) -> Result<PriorShift, FitError> {
    let bad = |value: String, reason: &str| FitError::BadOption {
        name: "prior shift",
        value,
        reason: reason.into(),
    };
    if k < 2 || source.len() != k || q.is_empty() || !q.len().is_multiple_of(k) {
        return Err(bad(
            format!(
                "{} posteriors, {} source priors, K = {k}",
                q.len(),
                source.len()
            ),
            "needs n × K posteriors and K source priors, K ≥ 2",
        ));
    }
    if source.iter().any(|p| !(p.is_finite() && *p > 0.0))
        || (source.iter().sum::<f64>() - 1.0).abs() > 1e-9
    {
        return Err(bad(
            format!("{source:?}"),
            "source priors must be positive and sum to 1 (a class absent from the source cannot be handled)",
        ));
    }
    let n = (q.len() / k) as f64;
    let mut priors = source.to_vec();
    let mut ratio = vec![1.0; k];
    let start = log_likelihood(q, k, &ratio);
    let (mut iterations, mut converged) = (0, false);
    let mut next = vec![0.0; k];
    while iterations < EM_MAX_ITERATIONS {
        iterations += 1;
        next.fill(0.0);
        for row in q.chunks_exact(k) {
            let norm: f64 = row.iter().zip(&ratio).map(|(a, r)| a * r).sum();
            for ((acc, a), r) in next.iter_mut().zip(row).zip(&ratio) {
                *acc += a * r / norm;
            }
        }
        let mut moved = 0.0f64;
        for (p, acc) in priors.iter_mut().zip(&next) {
            let new = acc / n;
            moved = moved.max((new - *p).abs());
            *p = new;
        }
        for ((r, p), s) in ratio.iter_mut().zip(&priors).zip(source) {
            *r = p / s;
        }
        if moved < EM_TOLERANCE {
            converged = true;
            break;
        }
    }
    let end = log_likelihood(q, k, &ratio);
    Ok(PriorShift {
        priors,
        iterations,
        converged,
        log_likelihood: [start, end],
    })
}

/// Priors floored at [`PRIOR_FLOOR`] and renormalised.
pub fn floored(priors: &[f64]) -> Vec<f64> {
    let v: Vec<f64> = priors.iter().map(|p| p.max(PRIOR_FLOOR)).collect();
    let s: f64 = v.iter().sum();
    v.iter().map(|p| p / s).collect()
}

/// The temperature map `t` adjusted from `source` to `target` priors, as vector scaling.
///
/// # Errors
/// [`FitError::InvalidResult`] when a ratio is not finite (a zero prior).
pub fn shifted_temperature(
    t: &Temperature,
    source: &[f64],
    target: &[f64],
) -> Result<VectorScaling, FitError> {
    let k = source.len();
    let biases: Vec<f64> = target
        .iter()
        .zip(source)
        .map(|(a, b)| (a / b).ln())
        .collect();
    VectorScaling::try_new(k, vec![t.inverse(); k], biases, "method")
        .map_err(FitError::InvalidResult)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn worked_example_e6_binary() {
        // METHODS.md E6: π' = [0.4634938829, 0.5365061171] after 74 iterations; adjusted q_1 of
        // the first item 0.9124169318 (direct implementation, tol 1e−12).
        let q1 = [0.9, 0.8, 0.7, 0.6, 0.3, 0.2, 0.1, 0.35, 0.75, 0.4];
        // q_1 is class 1's probability (its raw mean is 0.51, as E6 says).
        let q: Vec<f64> = q1.iter().flat_map(|&a| [1.0 - a, a]).collect();
        let s = saerens_em(&q, 2, &[0.5, 0.5]).unwrap();
        assert!(s.converged);
        assert!(
            (s.priors[0] - 0.463_493_882_9).abs() < 1e-9,
            "{:?}",
            s.priors
        );
        assert!((s.priors[1] - 0.536_506_117_1).abs() < 1e-9);
        assert!((s.iterations as i64 - 74).abs() <= 1, "{}", s.iterations);
        assert!(s.log_likelihood[1] >= s.log_likelihood[0]);
        let (r0, r1) = (s.priors[0] / 0.5, s.priors[1] / 0.5);
        let adjusted = 0.9 * r1 / (0.9 * r1 + 0.1 * r0);
        assert!((adjusted - 0.912_416_931_8).abs() < 1e-9, "{adjusted}");
    }

    #[test]
    fn worked_example_e6_boundary_and_the_floor() {
        // METHODS.md E6: [0.887186, 7.1e−12, 0.112814] after 188 iterations.
        let q = [
            0.7, 0.2, 0.1, 0.6, 0.3, 0.1, 0.5, 0.25, 0.25, 0.2, 0.7, 0.1, 0.3, 0.3, 0.4, 0.1, 0.2,
            0.7, 0.25, 0.5, 0.25, 0.8, 0.1, 0.1,
        ];
        let s = saerens_em(&q, 3, &[0.3, 0.4, 0.3]).unwrap();
        assert!((s.priors[0] - 0.887_186).abs() < 1e-6, "{:?}", s.priors);
        assert!(s.priors[1] < 1e-10);
        assert!((s.priors[2] - 0.112_814).abs() < 1e-6);
        assert!((s.iterations as i64 - 188).abs() <= 2, "{}", s.iterations);
        assert!(s.log_likelihood[1] >= s.log_likelihood[0]);
        let f = floored(&s.priors);
        assert!(f[1] >= PRIOR_FLOOR * 0.99 && (f.iter().sum::<f64>() - 1.0).abs() < 1e-15);
    }

    #[test]
    fn the_shifted_temperature_map_is_the_reweighted_posterior() {
        // softmax(z/T + ln(π'/π)) = normalise((π'/π)·softmax(z/T)) (closed form).
        let t = Temperature::try_new(2.0, "t").unwrap();
        let (src, dst) = ([0.5, 0.3, 0.2], [0.2, 0.3, 0.5]);
        let v = shifted_temperature(&t, &src, &dst).unwrap();
        let z = [1.0, -0.5, 2.0];
        let mut a = z.to_vec();
        v.apply_in_place(&mut a);
        let mut b = z.to_vec();
        t.apply_in_place(&mut b);
        let w: Vec<f64> = b
            .iter()
            .zip(dst.iter().zip(&src))
            .map(|(q, (d, s))| q * d / s)
            .collect();
        let sum: f64 = w.iter().sum();
        for (x, y) in a.iter().zip(&w) {
            assert!((x - y / sum).abs() < 1e-12, "{a:?} vs {w:?}");
        }
        assert!(saerens_em(&[0.5, 0.5], 2, &[1.0, 0.0]).is_err());
        assert!(saerens_em(&[0.5, 0.5, 0.1], 2, &[0.5, 0.5]).is_err());
    }
}
