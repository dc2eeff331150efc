//! Bayesian binning into quantiles: a posterior-weighted average of several binning models
//! (Naeini, Cooper & Hauskrecht 2015, AAAI; METHODS.md 2.9). Each model's bins are looked up with
//! the same right-closed rule as histogram binning.

use super::histogram::{bin_index, check_bins};
use super::{BinaryMap, Problem, Problems, ScoreKind};

/// Largest tolerated |Σ weights − 1| (weights are written by a fit; 1e−9 allows for rounding
/// in a file while still catching a hand-edit).
pub const WEIGHT_SUM_TOLERANCE: f64 = 1e-9;

/// One binning model of the average, with its posterior weight.
#[derive(Debug, Clone, PartialEq)]
pub struct BbqModel {
    /// Posterior model weight in [0, 1].
    pub weight: f64,
    /// Edges from 0 to 1, strictly increasing.
    pub edges: Vec<f64>,
    /// Posterior mean per bin, in [0, 1].
    pub values: Vec<f64>,
}

/// Validated model average: at least one model, weights in [0, 1] summing to 1.
#[derive(Debug, Clone, PartialEq)]
pub struct Bbq {
    models: Vec<BbqModel>,
}

impl Bbq {
    /// Validates the models.
    ///
    /// # Errors
    /// No models, a model's bins invalid (as for histogram binning), weights outside [0, 1] or not
    /// summing to 1 within [`WEIGHT_SUM_TOLERANCE`].
    pub fn try_new(models: Vec<BbqModel>, field: &str) -> Result<Self, Vec<Problem>> {
        let mut p = Problems::new();
        let mf = format!("{field}.models");
        if models.is_empty() {
            p.push(&mf, "needs at least one model");
        }
        let mut sum = 0.0;
        for (i, m) in models.iter().enumerate() {
            let f = format!("{mf}[{i}]");
            check_bins(&m.edges, &m.values, &f, &mut p);
            if !(0.0..=1.0).contains(&m.weight) {
                p.push(
                    format!("{f}.weight"),
                    format!("must lie in [0, 1], got {}", m.weight),
                );
            }
            sum += m.weight;
        }
        let sum_ok = (sum - 1.0).abs() <= WEIGHT_SUM_TOLERANCE; // false for NaN too
        if !models.is_empty() && !sum_ok {
            p.push(&mf, format!("weights must sum to 1, got {sum}"));
        }
        p.finish(Bbq { models })
    }

    /// The models of the average.
    pub fn models(&self) -> &[BbqModel] {
        &self.models
    }
}

impl BinaryMap for Bbq {
    const SCORE: ScoreKind = ScoreKind::Probability;

    #[inline]
    fn apply(&self, s: f64) -> f64 {
        self.models
            .iter()
            .map(|m| m.weight * m.values[bin_index(&m.edges, s)])
            .sum()
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// METHODS.md E7 (direct implementation, N' = 2): models B = 1, 2, 3, 5 with their weights
    /// and bin values (printed to 5–7 digits there).
    fn e7() -> Bbq {
        let w = [0.26022, 0.57034, 0.02779, 0.14165];
        let total: f64 = w.iter().sum();
        let models = vec![
            BbqModel {
                weight: w[0] / total,
                edges: vec![0.0, 1.0],
                values: vec![0.5],
            },
            BbqModel {
                weight: w[1] / total,
                edges: vec![0.0, 0.465, 1.0],
                values: vec![0.2054167, 0.78875],
            },
            BbqModel {
                weight: w[2] / total,
                edges: vec![0.0, 0.285, 0.575, 1.0],
                values: vec![0.2986364, 0.3509091, 0.7553571],
            },
            BbqModel {
                weight: w[3] / total,
                edges: vec![0.0, 0.185, 0.38, 0.575, 0.775, 1.0],
                values: vec![0.0154167, 0.46375, 0.49625, 0.5291667, 0.98125],
            },
        ];
        Bbq::try_new(models, "m").unwrap()
    }

    #[test]
    fn worked_example_e7_averaged_predictions() {
        // METHODS.md E7: P(0.1) = 0.2577504444, P(0.5) = 0.6600118035, P(0.9) = 0.7399509420.
        // The table's weights carry 5 digits, so agreement is to ~1e−5.
        let m = e7();
        for (s, want) in [
            (0.1, 0.2577504444),
            (0.5, 0.6600118035),
            (0.9, 0.7399509420),
        ] {
            assert!((m.apply(s) - want).abs() < 2e-5, "s = {s}: {}", m.apply(s));
        }
    }

    #[test]
    fn weights_must_sum_to_one() {
        let one = BbqModel {
            weight: 0.7,
            edges: vec![0.0, 1.0],
            values: vec![0.5],
        };
        let err = Bbq::try_new(vec![one], "m").unwrap_err();
        assert!(err[0].message.contains("sum to 1"), "{}", err[0]);
        assert!(Bbq::try_new(vec![], "m").is_err());
    }
}
