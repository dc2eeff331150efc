//! Isotonic regression map: a non-decreasing function of the probability score given by knots
//! (x_j, y_j) (Zadrozny & Elkan 2002, KDD; pool-adjacent-violators: Ayer et al. 1955; METHODS.md
//! 2.8).
//!
//! Between knots the value is interpolated linearly, as scikit-learn's IsotonicRegression does;
//! outside [x₀, x_last] it is clipped to the end values (scikit-learn's out_of_bounds='clip').

use super::{BinaryMap, Problem, Problems, ScoreKind};

/// Validated knots: x strictly increasing and finite, y non-decreasing in [0, 1].
#[derive(Debug, Clone, PartialEq)]
pub struct Isotonic {
    x: Vec<f64>,
    y: Vec<f64>,
    /// slope[i] = (y[i+1] − y[i]) / (x[i+1] − x[i]), and 0 after the last knot (derived).
    slope: Vec<f64>,
}

impl Isotonic {
    /// Validates the knots.
    ///
    /// # Errors
    /// No knots, x and y of different lengths, non-finite numbers, x not strictly increasing,
    /// y decreasing or outside [0, 1].
    pub fn try_new(x: Vec<f64>, y: Vec<f64>, field: &str) -> Result<Self, Vec<Problem>> {
        let mut p = Problems::new();
        let (xf, yf) = (format!("{field}.x"), format!("{field}.y"));
        if x.is_empty() {
            p.push(&xf, "needs at least one knot");
        }
        p.check_len(&yf, y.len(), x.len());
        p.check_finite(&xf, &x);
        p.check_finite(&yf, &y);
        p.check_increasing(&xf, &x);
        p.check_unit_interval(&yf, &y);
        for i in 1..y.len() {
            if y[i] < y[i - 1] {
                p.push(
                    format!("{yf}[{i}]"),
                    format!("must not decrease: {} after {}", y[i], y[i - 1]),
                );
            }
        }
        let slope = slopes(&x, &y);
        p.finish(Isotonic { x, y, slope })
    }

    /// Knot positions.
    pub fn x(&self) -> &[f64] {
        &self.x
    }

    /// Knot values.
    pub fn y(&self) -> &[f64] {
        &self.y
    }

    /// The slope of each knot's segment (0 after the last knot).
    pub fn slopes(&self) -> &[f64] {
        &self.slope
    }
}

/// The segment slopes, as numpy's `interp` and scipy's linear `interp1d` compute them (from
/// memory of their sources): (y[i+1] − y[i]) / (x[i+1] − x[i]). A segment narrower than about
/// 1e-308 · (y[i+1] − y[i]) would overflow; it gets slope 0 (the value y[i] across a sub-1e-308
/// gap), so a lookup never computes ∞ · 0. The last knot gets 0, so clipping above x_last needs
/// no branch.
fn slopes(x: &[f64], y: &[f64]) -> Vec<f64> {
    let mut s: Vec<f64> = x
        .windows(2)
        .zip(y.windows(2))
        .map(|(x, y)| {
            let m = (y[1] - y[0]) / (x[1] - x[0]);
            if m.is_finite() {
                m
            } else {
                0.0
            }
        })
        .collect();
    if !x.is_empty() {
        s.push(0.0);
    }
    s
}

impl BinaryMap for Isotonic {
    const SCORE: ScoreKind = ScoreKind::Probability;

    #[inline(always)]
    fn apply(&self, s: f64) -> f64 {
        // Clipped to [x₀, x_last] (max and min ignore a NaN argument); then s lies in
        // [x[i], x[i+1]) for i = #{x ≤ s} − 1 ≥ 0, or on x_last, whose slope is 0. The one-vs-rest
        // table (`knot_table`) computes exactly this, bit for bit.
        let s = s.max(self.x[0]).min(self.x[self.x.len() - 1]);
        let i = self.x.partition_point(|&k| k <= s) - 1;
        self.y[i] + self.slope[i] * (s - self.x[i])
    }

    fn knots(&self) -> Option<&Isotonic> {
        Some(self)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn worked_example_e1b_interpolation_and_clipping() {
        // METHODS.md E1(b): IsotonicRegression(out_of_bounds='clip') knots and predictions
        // predict([0.05, 0.25, 0.45, 0.55, 0.65, 0.9]) = [0, 0.3333333333, 0.4166666667, 0.5, 0.75, 1].
        let m = Isotonic::try_new(
            vec![0.1, 0.2, 0.4, 0.5, 0.6, 0.7, 0.8],
            vec![0.0, 1.0 / 3.0, 1.0 / 3.0, 0.5, 0.5, 1.0, 1.0],
            "m",
        )
        .unwrap();
        let want = [0.0, 0.3333333333, 0.4166666667, 0.5, 0.75, 1.0];
        for (s, w) in [0.05, 0.25, 0.45, 0.55, 0.65, 0.9].into_iter().zip(want) {
            assert!((m.apply(s) - w).abs() < 1e-10, "s = {s}");
        }
    }

    #[test]
    fn worked_example_e1c_ties() {
        // METHODS.md E1(c): knots x = [0.1, 0.2, 0.3], values [0, 0.5, 1];
        // predict(0.2) = 0.5, predict(0.15) = 0.25, predict(0.25) = 0.75.
        let m = Isotonic::try_new(vec![0.1, 0.2, 0.3], vec![0.0, 0.5, 1.0], "m").unwrap();
        assert!((m.apply(0.2) - 0.5).abs() < 1e-15);
        assert!((m.apply(0.15) - 0.25).abs() < 1e-15);
        assert!((m.apply(0.25) - 0.75).abs() < 1e-15);
    }

    #[test]
    fn single_knot_is_constant() {
        let m = Isotonic::try_new(vec![0.4], vec![0.7], "m").unwrap();
        assert_eq!(m.apply(0.0), 0.7);
        assert_eq!(m.apply(1.0), 0.7);
    }

    #[test]
    fn a_segment_too_narrow_for_its_slope_is_flat_and_nan_lands_on_a_knot() {
        // Two knots one subnormal step apart: (1 − 0) / 5e-324 overflows, so the segment's slope
        // is 0 and s = x₀ gives y₀ rather than ∞ · 0 = NaN.
        let tiny = f64::from_bits(1);
        let m = Isotonic::try_new(vec![0.0, tiny, 0.5], vec![0.0, 1.0, 1.0], "m").unwrap();
        assert_eq!(m.slopes(), [0.0, 0.0, 0.0]);
        assert_eq!(m.apply(0.0), 0.0);
        assert_eq!(m.apply(0.25), 1.0);
        assert_eq!(m.apply(f64::NAN), 0.0);
    }

    #[test]
    fn knot_problems_are_named() {
        let err = Isotonic::try_new(vec![0.2, 0.1], vec![0.5, 0.4], "m").unwrap_err();
        let fields: Vec<_> = err.iter().map(|p| p.field.as_str()).collect();
        assert_eq!(fields, ["m.x[1]", "m.y[1]"]);
        assert!(Isotonic::try_new(vec![], vec![], "m").is_err());
    }
}
