//! Histogram binning: a probability score s ∈ [0, 1] is looked up in fixed bins and the bin's
//! stored frequency is served (Zadrozny & Elkan 2001, ICML; METHODS.md 2.7).
//!
//! Bins are right-closed like sklearn.calibration.calibration_curve (METHODS.md 1.2):
//! bin 0 = [e₀, e₁], bin m = (e_m, e_{m+1}]; a score on an interior edge goes to the lower bin,
//! scores outside [e₀, e_B] go to the first or last bin.

use super::{BinaryMap, Problem, Problems, ScoreKind};

/// Validated bins: B + 1 strictly increasing edges from 0 to 1 and B values in [0, 1].
#[derive(Debug, Clone, PartialEq)]
pub struct Histogram {
    edges: Vec<f64>,
    values: Vec<f64>,
}

impl Histogram {
    /// Validates edges and values.
    ///
    /// # Errors
    /// Fewer than two edges, edges not strictly increasing or not covering [0, 1] exactly,
    /// a values length other than edges − 1, non-finite numbers, values outside [0, 1].
    pub fn try_new(edges: Vec<f64>, values: Vec<f64>, field: &str) -> Result<Self, Vec<Problem>> {
        let mut p = Problems::new();
        check_bins(&edges, &values, field, &mut p);
        p.finish(Histogram { edges, values })
    }

    /// Bin edges e₀ = 0 < … < e_B = 1.
    pub fn edges(&self) -> &[f64] {
        &self.edges
    }

    /// Per-bin probability of the class.
    pub fn values(&self) -> &[f64] {
        &self.values
    }
}

impl BinaryMap for Histogram {
    const SCORE: ScoreKind = ScoreKind::Probability;

    #[inline]
    fn apply(&self, s: f64) -> f64 {
        self.values[bin_index(&self.edges, s)]
    }
}

/// Index of the right-closed bin holding `s` (edges as in the module docs).
#[inline]
pub fn bin_index(edges: &[f64], s: f64) -> usize {
    let interior = &edges[1..edges.len() - 1];
    interior.partition_point(|&e| e < s)
}

/// The shared checks for binned maps (histogram and each BBQ model).
pub(super) fn check_bins(edges: &[f64], values: &[f64], field: &str, p: &mut Problems) {
    let ef = format!("{field}.edges");
    let vf = format!("{field}.values");
    p.check_finite(&ef, edges);
    p.check_finite(&vf, values);
    p.check_unit_interval(&vf, values);
    if edges.len() < 2 {
        p.push(&ef, format!("needs at least 2 edges, got {}", edges.len()));
        return;
    }
    p.check_increasing(&ef, edges);
    if edges[0] != 0.0 || edges[edges.len() - 1] != 1.0 {
        p.push(
            &ef,
            format!(
                "bins must cover [0, 1]: first edge must be 0 and last 1, got {} and {}",
                edges[0],
                edges[edges.len() - 1]
            ),
        );
    }
    p.check_len(&vf, values.len(), edges.len() - 1);
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn worked_example_e11_laplace_values() {
        // METHODS.md E11: equal-width 5 bins, Laplace θ = [0.25, 0.5, 0.5, 0.5, 0.75].
        let h = Histogram::try_new(
            vec![0.0, 0.2, 0.4, 0.6000000000000001, 0.8, 1.0],
            vec![0.25, 0.5, 0.5, 0.5, 0.75],
            "m",
        )
        .unwrap();
        assert_eq!(h.apply(0.05), 0.25);
        assert_eq!(h.apply(0.93), 0.75);
        // Right-closed: 0.2 sits on an interior edge and goes to the lower bin (METHODS.md 1.2).
        assert_eq!(bin_index(h.edges(), 0.2), 0);
        assert_eq!(bin_index(h.edges(), 0.2000001), 1);
        assert_eq!(bin_index(h.edges(), 0.0), 0);
        assert_eq!(bin_index(h.edges(), 1.0), 4);
        // Out of range goes to the end bins.
        assert_eq!(h.apply(-3.0), 0.25);
        assert_eq!(h.apply(7.0), 0.75);
    }

    #[test]
    fn every_bin_problem_is_named() {
        let err = Histogram::try_new(vec![0.1, 0.5, 0.5, 0.9], vec![0.2, 1.5], "h").unwrap_err();
        let text: Vec<String> = err.iter().map(|p| p.to_string()).collect();
        assert!(
            text.iter()
                .any(|t| t.starts_with("h.values[1]: must lie in [0, 1]")),
            "{text:?}"
        );
        assert!(
            text.iter()
                .any(|t| t.starts_with("h.edges[2]: must be greater")),
            "{text:?}"
        );
        assert!(text.iter().any(|t| t.contains("cover [0, 1]")), "{text:?}");
        assert!(
            text.iter()
                .any(|t| t.starts_with("h.values: must have 3 entries")),
            "{text:?}"
        );
        assert!(Histogram::try_new(vec![0.0], vec![], "h").is_err());
    }
}
