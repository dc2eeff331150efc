//! Beta calibration: μ(s) = σ(a·ln s − b·ln(1 − s) + c) with s clamped to [ε, 1 − ε] (Kull, Silva
//! Filho & Flach 2017, AISTATS; METHODS.md 2.10).

use super::{BinaryMap, Problem, Problems, ScoreKind};
use crate::numeric::sigmoid;

/// Validated beta-calibration parameters: a, b ≥ 0 and finite, c finite, ε in (0, 0.5).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct BetaCalibration {
    a: f64,
    b: f64,
    c: f64,
    epsilon: f64,
}

impl BetaCalibration {
    /// Validates (a, b, c, ε).
    ///
    /// # Errors
    /// Non-finite values, a or b negative, ε outside (0, 0.5).
    pub fn try_new(
        a: f64,
        b: f64,
        c: f64,
        epsilon: f64,
        field: &str,
    ) -> Result<Self, Vec<Problem>> {
        let mut p = Problems::new();
        for (name, v) in [("a", a), ("b", b), ("c", c)] {
            p.check_finite(&format!("{field}.{name}"), &[v]);
        }
        for (name, v) in [("a", a), ("b", b)] {
            if v < 0.0 {
                p.push(format!("{field}.{name}"), format!("must be >= 0, got {v}"));
            }
        }
        if !(epsilon > 0.0 && epsilon < 0.5) {
            p.push(
                format!("{field}.epsilon"),
                format!("must lie in (0, 0.5), got {epsilon}"),
            );
        }
        p.finish(BetaCalibration { a, b, c, epsilon })
    }

    /// (a, b, c).
    pub fn params(&self) -> (f64, f64, f64) {
        (self.a, self.b, self.c)
    }

    /// Clamp ε for the logarithms.
    pub fn epsilon(&self) -> f64 {
        self.epsilon
    }
}

impl BinaryMap for BetaCalibration {
    const SCORE: ScoreKind = ScoreKind::Probability;

    #[inline]
    fn apply(&self, s: f64) -> f64 {
        let s = s.clamp(self.epsilon, 1.0 - self.epsilon);
        sigmoid(self.a * s.ln() - self.b * (-s).ln_1p() + self.c)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn worked_example_e11() {
        // METHODS.md E11: a = 0.14911067, b = 2.38196983, c = −1.68861981;
        // μ(0.1) = 0.1441804162, μ(0.5) = 0.4648282262, μ(0.9) = 0.9776943719
        // (parameters printed to 8 digits there, so agreement is to ~1e−8).
        let m = BetaCalibration::try_new(0.14911067, 2.38196983, -1.68861981, 1e-12, "m").unwrap();
        for (s, want) in [
            (0.1, 0.1441804162),
            (0.5, 0.4648282262),
            (0.9, 0.9776943719),
        ] {
            assert!((m.apply(s) - want).abs() < 5e-8, "s = {s}: {}", m.apply(s));
        }
    }

    #[test]
    fn identity_parameters_return_the_score() {
        // METHODS.md 2.10: a = b = 1, c = 0 is the identity map.
        let m = BetaCalibration::try_new(1.0, 1.0, 0.0, 1e-12, "m").unwrap();
        for s in [0.01, 0.3, 0.77] {
            assert!((m.apply(s) - s).abs() < 1e-14);
        }
    }

    #[test]
    fn negative_shape_parameters_are_refused() {
        let err = BetaCalibration::try_new(-0.1, 1.0, 0.0, 1e-12, "m").unwrap_err();
        assert_eq!(err[0].field, "m.a");
    }
}
