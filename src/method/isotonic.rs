//! Isotonic regression map: a non-decreasing function of the probability score given by knots
//! (x_j, y_j) (Zadrozny & Elkan 2002, KDD; pool-adjacent-violators: Ayer et al. 1955; METHODS.md
//! 2.8).
//!
//! Between knots the value is interpolated linearly, as scikit-learn's IsotonicRegression does;
//! outside [x₀, x_last] it is clipped to the end values (scikit-learn's out_of_bounds='clip').

use super::{BinaryMap, Problem, Problems, ScoreKind};

/// Knots per block of the two-level search: one block's x values fill a 64-byte cache line.
pub const SEARCH_BLOCK: usize = 8;
/// Up to this many full blocks (512 knots) the interval is found by counting: first the blocks
/// whose last knot is ≤ s, then the knots ≤ s in the next block, each in one short vectorised
/// sweep over one or two cache lines. Longer lists use binary search. Counting avoids binary
/// search's chain of dependent loads, which dominates one-vs-rest rows at K = 1000 (a thousand
/// short lists per row).
pub const COUNTED_BLOCKS_MAX: usize = 64;

/// Validated knots: x strictly increasing and finite, y non-decreasing in [0, 1].
#[derive(Debug, Clone, PartialEq)]
pub struct Isotonic {
    x: Vec<f64>,
    y: Vec<f64>,
    /// The last knot of each full block of [`SEARCH_BLOCK`]: x[B−1], x[2B−1], … (derived from x).
    fences: Vec<f64>,
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
        let fences = x
            .chunks_exact(SEARCH_BLOCK)
            .map(|b| b[SEARCH_BLOCK - 1])
            .collect();
        p.finish(Isotonic { x, y, fences })
    }

    /// Knot positions.
    pub fn x(&self) -> &[f64] {
        &self.x
    }

    /// Knot values.
    pub fn y(&self) -> &[f64] {
        &self.y
    }

    /// The number of knots ≤ s (x is increasing, so the first knot above s is x at this index).
    #[inline(always)]
    fn knots_at_or_below(&self, s: f64) -> usize {
        if self.fences.len() > COUNTED_BLOCKS_MAX {
            return self.x.partition_point(|&k| k <= s);
        }
        let below = |v: &[f64]| v.iter().map(|&k| usize::from(k <= s)).sum::<usize>();
        let start = below(&self.fences) * SEARCH_BLOCK;
        let end = (start + SEARCH_BLOCK).min(self.x.len());
        start + below(&self.x[start..end])
    }
}

impl BinaryMap for Isotonic {
    const SCORE: ScoreKind = ScoreKind::Probability;

    #[inline(always)]
    fn apply(&self, s: f64) -> f64 {
        let n = self.x.len();
        if s <= self.x[0] {
            return self.y[0];
        }
        if s >= self.x[n - 1] {
            return self.y[n - 1];
        }
        // First knot strictly above s; s lies in [x[j-1], x[j]).
        let j = self.knots_at_or_below(s);
        let (x0, x1, y0, y1) = (self.x[j - 1], self.x[j], self.y[j - 1], self.y[j]);
        y0 + (y1 - y0) * ((s - x0) / (x1 - x0))
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
    fn knot_problems_are_named() {
        let err = Isotonic::try_new(vec![0.2, 0.1], vec![0.5, 0.4], "m").unwrap_err();
        let fields: Vec<_> = err.iter().map(|p| p.field.as_str()).collect();
        assert_eq!(fields, ["m.x[1]", "m.y[1]"]);
        assert!(Isotonic::try_new(vec![], vec![], "m").is_err());
    }
}
