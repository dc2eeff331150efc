//! Selective classification quality: the risk–coverage curve, AURC, AURC* and E-AURC (Geifman,
//! Uziel & El-Yaniv 2019; METHODS.md 3.9) and the accept-or-defer rule at a threshold
//! (accept iff confidence ≥ θ; METHODS.md 3.10).

use super::order::descending_order;
use super::{EvalError, Predictions};
use serde::Serialize;

/// Risk–coverage curve: items sorted by confidence descending with a stable sort (tied
/// confidences keep input order — the order within a tie is otherwise arbitrary, METHODS.md
/// 3.9); point k (1-based) covers the top k items.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct RiskCoverage {
    /// Confidence of the k-th item in that order (non-increasing).
    pub confidence: Vec<f64>,
    /// k/n.
    pub coverage: Vec<f64>,
    /// Fraction of errors among the top k items.
    pub risk: Vec<f64>,
}

/// Area under the risk–coverage curve as the mean of the n risks (no trapezoids), with the
/// oracle value and their difference.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct Aurc {
    /// AURC = (1/n) Σ_k risk_k.
    pub aurc: f64,
    /// AURC* of the oracle order (all correct items first): (1/n) Σ_{j=1}^{e} j/(n − e + j).
    pub optimal: f64,
    /// E-AURC = AURC − AURC* (≥ 0 up to rounding).
    pub excess: f64,
}

/// The risk–coverage curve of the top-label confidences.
pub fn risk_coverage(p: &Predictions<'_>) -> RiskCoverage {
    let n = p.n();
    let order = descending_order(p.confidence());
    let mut errors = 0u64;
    let mut curve = RiskCoverage {
        confidence: Vec::with_capacity(n),
        coverage: Vec::with_capacity(n),
        risk: Vec::with_capacity(n),
    };
    for (k, &i) in order.iter().enumerate() {
        errors += u64::from(!p.correct()[i]);
        let covered = (k + 1) as f64;
        curve.confidence.push(p.confidence()[i]);
        curve.coverage.push(covered / n as f64);
        curve.risk.push(errors as f64 / covered);
    }
    curve
}

/// AURC* for `n` items of which `errors` are wrong.
pub(crate) fn aurc_optimal(n: u64, errors: u64) -> f64 {
    let correct = (n - errors) as f64;
    let sum: f64 = (1..=errors).map(|j| j as f64 / (correct + j as f64)).sum();
    sum / n as f64
}

/// AURC, AURC* and E-AURC of the top-label confidences (stable sort, as [`risk_coverage`]).
pub fn aurc(p: &Predictions<'_>) -> Aurc {
    let curve = risk_coverage(p);
    let n = p.n() as u64;
    let errors = p.correct().iter().filter(|&&c| !c).count() as u64;
    let aurc = curve.risk.iter().sum::<f64>() / n as f64;
    let optimal = aurc_optimal(n, errors);
    Aurc {
        aurc,
        optimal,
        excess: aurc - optimal,
    }
}

/// What the rule "accept iff confidence ≥ θ" does on an evaluation set.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct AcceptStats {
    /// The threshold θ.
    pub threshold: f64,
    /// Number of accepted items.
    pub accepted: usize,
    /// Accepted fraction of all items.
    pub coverage: f64,
    /// Accuracy of the accepted items; `None` if none is accepted.
    pub accepted_accuracy: Option<f64>,
}

/// Coverage and accuracy of the items with top-label confidence ≥ `threshold`.
///
/// # Errors
/// [`EvalError::Setting`] if `threshold` is NaN.
pub fn accept_stats(p: &Predictions<'_>, threshold: f64) -> Result<AcceptStats, EvalError> {
    check_threshold(threshold)?;
    let mut accepted = 0usize;
    let mut hits = 0usize;
    for (&conf, &hit) in p.confidence().iter().zip(p.correct()) {
        if conf >= threshold {
            accepted += 1;
            hits += usize::from(hit);
        }
    }
    Ok(AcceptStats {
        threshold,
        accepted,
        coverage: accepted as f64 / p.n() as f64,
        accepted_accuracy: (accepted > 0).then(|| hits as f64 / accepted as f64),
    })
}

/// Rejects a NaN threshold (±∞ are allowed: accept everything or nothing).
pub(crate) fn check_threshold(threshold: f64) -> Result<(), EvalError> {
    if threshold.is_nan() {
        return Err(EvalError::Setting {
            what: "acceptance threshold",
            value: threshold,
            rule: "must not be NaN",
        });
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::super::fixtures::{E3_LABELS, E3_PROBS, RANDOM_LABELS, RANDOM_PROBS};
    use super::*;

    fn close(got: f64, want: f64, rel: f64) {
        assert!(
            (got - want).abs() <= rel * want.abs().max(1e-300),
            "got {got}, want {want}"
        );
    }

    #[test]
    fn e3_risk_coverage_and_aurc() {
        let p = Predictions::try_new(&E3_PROBS, 3, &E3_LABELS).unwrap();
        let curve = risk_coverage(&p);
        // METHODS.md E3: risks at k = 1..8.
        let want = [0.0, 0.0, 0.0, 0.0, 0.2, 1.0 / 3.0, 3.0 / 7.0, 0.375];
        for (got, want) in curve.risk.iter().zip(want) {
            assert!((got - want).abs() < 1e-15, "{got} vs {want}");
        }
        assert_eq!(curve.coverage[3], 0.5);
        assert_eq!(curve.confidence[0], 0.93);
        let a = aurc(&p);
        // METHODS.md E3, printed to 10 decimals: compare to half a unit in the last place.
        assert!((a.aurc - 0.1671130952).abs() <= 5e-11, "{a:?}");
        assert!((a.optimal - 0.1034226190).abs() <= 5e-11, "{a:?}"); // (1/8)(1/6 + 2/7 + 3/8)
        close(a.optimal, (1.0 / 6.0 + 2.0 / 7.0 + 3.0 / 8.0) / 8.0, 1e-15);
        assert!((a.excess - 0.0636904762).abs() <= 5e-11, "{a:?}"); // METHODS.md E3
    }

    #[test]
    fn random_set_matches_numpy() {
        let p = Predictions::try_new(&RANDOM_PROBS, 3, &RANDOM_LABELS).unwrap();
        let a = aurc(&p); // aurc(conf, hit)
        close(a.aurc, 0.2345053443013657, 1e-12);
        close(a.optimal, 0.07431984023113508, 1e-12);
        close(a.excess, 0.1601855040702306, 1e-12);
        // acc_mask = conf >= 0.7: acc_mask.mean() = 0.7, hit[acc_mask].mean() = 0.7142857142857143
        let s = accept_stats(&p, 0.7).unwrap();
        assert_eq!(s.accepted, 28);
        close(s.coverage, 0.7, 1e-15);
        close(s.accepted_accuracy.unwrap(), 0.7142857142857143, 1e-15);
    }

    #[test]
    fn ties_keep_input_order_and_threshold_is_inclusive() {
        // Two items tied at 0.6: the wrong one (input first) is ranked first.
        let p = Predictions::try_new(&[0.6, 0.4, 0.6, 0.4, 0.9, 0.1], 2, &[1, 0, 0]).unwrap();
        assert_eq!(risk_coverage(&p).risk, [0.0, 0.5, 1.0 / 3.0]);
        let s = accept_stats(&p, 0.6).unwrap();
        assert_eq!((s.accepted, s.accepted_accuracy), (3, Some(2.0 / 3.0)));
        let s = accept_stats(&p, 0.95).unwrap();
        assert_eq!(
            (s.accepted, s.coverage, s.accepted_accuracy),
            (0, 0.0, None)
        );
        assert!(accept_stats(&p, f64::NAN).is_err());
        // All correct: AURC = AURC* = 0.
        let p = Predictions::try_new(&[0.6, 0.4, 0.9, 0.1], 2, &[0, 0]).unwrap();
        assert_eq!(
            aurc(&p),
            Aurc {
                aurc: 0.0,
                optimal: 0.0,
                excess: 0.0
            }
        );
    }
}
