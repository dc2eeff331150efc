//! Platt scaling: P(y = 1 | f) = 1 / (1 + exp(A·f + B)) on a log-odds score f (Platt 1999/2000;
//! sign convention of Lin, Lin & Weng 2007; METHODS.md 2.6).

use super::{BinaryMap, Problem, Problems, ScoreKind};
use crate::numeric::sigmoid;

/// Validated Platt parameters (A, B), both finite. A < 0 when larger f means more positive.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Platt {
    a: f64,
    b: f64,
}

impl Platt {
    /// Validates (A, B).
    ///
    /// # Errors
    /// A non-finite A or B, named.
    pub fn try_new(a: f64, b: f64, field: &str) -> Result<Self, Vec<Problem>> {
        let mut p = Problems::new();
        p.check_finite(&format!("{field}.a"), &[a]);
        p.check_finite(&format!("{field}.b"), &[b]);
        p.finish(Platt { a, b })
    }

    /// Slope A.
    pub fn a(&self) -> f64 {
        self.a
    }

    /// Offset B.
    pub fn b(&self) -> f64 {
        self.b
    }
}

impl BinaryMap for Platt {
    const SCORE: ScoreKind = ScoreKind::LogOdds;

    #[inline]
    fn apply(&self, f: f64) -> f64 {
        let t = self.a * f + self.b;
        // f = ±∞ with A = 0 gives NaN: A = 0 means the score carries no weight.
        let t = if t.is_nan() { self.b } else { t };
        sigmoid(-t)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn worked_example_e4() {
        // METHODS.md E4 (Lin–Lin–Weng fit on 12 points): A = −0.6862610600460243,
        // B = 0.15609409022559542; P(y=1 | f) at f = 0, 1, −1: 0.461055520, 0.629522054, 0.301038994.
        let m = Platt::try_new(-0.6862610600460243, 0.15609409022559542, "m").unwrap();
        for (f, want) in [(0.0, 0.461055520), (1.0, 0.629522054), (-1.0, 0.301038994)] {
            assert!((m.apply(f) - want).abs() < 5e-10, "f = {f}");
        }
        // METHODS.md E4(c): A = 0, B = −1.3862943611198906 gives 0.8 everywhere.
        let c = Platt::try_new(0.0, -1.3862943611198906, "m").unwrap();
        assert!((c.apply(123.0) - 0.8).abs() < 1e-15);
        assert!((c.apply(f64::INFINITY) - 0.8).abs() < 1e-15);
    }

    #[test]
    fn rejects_non_finite() {
        assert_eq!(
            Platt::try_new(f64::NAN, f64::INFINITY, "x")
                .unwrap_err()
                .len(),
            2
        );
    }
}
