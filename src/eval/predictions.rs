//! The validated input of every metric: n×K calibrated probabilities and n labels, with the
//! top-label quantities of METHODS.md 0.1 derived once.

use super::EvalError;
use crate::numeric::argmax;

/// Largest accepted |Σ_k q_ik − 1| for a row of probabilities (METHODS.md 1.11). Rows outside it
/// are an error; rows inside it are used as given, never renormalised.
pub const ROW_SUM_TOLERANCE: f64 = 1e-6;

/// Validated view of n×K probabilities (row-major) and labels, plus per-item top-label
/// confidence `conf_i = max_k q_ik`, predicted class (argmax, ties → smallest index) and
/// correctness `c_i = 1[ŷ_i = y_i]`.
#[derive(Debug, Clone)]
pub struct Predictions<'a> {
    probs: &'a [f64],
    labels: &'a [u32],
    n_classes: usize,
    confidence: Vec<f64>,
    predicted: Vec<u32>,
    correct: Vec<bool>,
}

impl<'a> Predictions<'a> {
    /// Validates `probs` (n×K row-major, calibrated probabilities) against `labels` (n class
    /// indices) and derives the top-label quantities.
    ///
    /// # Errors
    /// [`EvalError::Empty`] if n = 0; [`EvalError::TooFewClasses`] if K < 2;
    /// [`EvalError::Length`] if `probs.len() != n·K`; [`EvalError::LabelOutOfRange`];
    /// [`EvalError::NonFinite`] or [`EvalError::ProbabilityRange`] for a bad entry;
    /// [`EvalError::RowSum`] if a row does not sum to 1 within [`ROW_SUM_TOLERANCE`].
    pub fn try_new(
        probs: &'a [f64],
        n_classes: usize,
        labels: &'a [u32],
    ) -> Result<Self, EvalError> {
        let n = labels.len();
        if n == 0 {
            return Err(EvalError::Empty { what: "labels" });
        }
        if n_classes < 2 {
            return Err(EvalError::TooFewClasses { n_classes });
        }
        let expected = n.checked_mul(n_classes).ok_or(EvalError::Length {
            what: "probabilities",
            expected: usize::MAX,
            got: probs.len(),
        })?;
        if probs.len() != expected {
            return Err(EvalError::Length {
                what: "probabilities",
                expected,
                got: probs.len(),
            });
        }
        let mut confidence = Vec::with_capacity(n);
        let mut predicted = Vec::with_capacity(n);
        let mut correct = Vec::with_capacity(n);
        for (item, (row, &label)) in probs.chunks_exact(n_classes).zip(labels).enumerate() {
            check_row(item, row)?;
            if label as usize >= n_classes {
                return Err(EvalError::LabelOutOfRange {
                    item,
                    label,
                    n_classes,
                });
            }
            let k = argmax(row);
            confidence.push(row[k]);
            predicted.push(k as u32);
            correct.push(k == label as usize);
        }
        Ok(Self {
            probs,
            labels,
            n_classes,
            confidence,
            predicted,
            correct,
        })
    }

    /// Number of items n (at least 1).
    pub fn n(&self) -> usize {
        self.labels.len()
    }

    /// Number of classes K (at least 2).
    pub fn n_classes(&self) -> usize {
        self.n_classes
    }

    /// All probabilities, n×K row-major.
    pub fn probs(&self) -> &'a [f64] {
        self.probs
    }

    /// The K probabilities of item `i` (panics if `i >= n`, an internal index).
    pub fn row(&self, i: usize) -> &'a [f64] {
        &self.probs[i * self.n_classes..(i + 1) * self.n_classes]
    }

    /// True labels, one per item.
    pub fn labels(&self) -> &'a [u32] {
        self.labels
    }

    /// Top-label confidence `max_k q_ik` per item, in [0, 1].
    pub fn confidence(&self) -> &[f64] {
        &self.confidence
    }

    /// Predicted class per item (argmax; ties go to the smallest index).
    pub fn predicted(&self) -> &[u32] {
        &self.predicted
    }

    /// Whether the predicted class equals the label, per item.
    pub fn correct(&self) -> &[bool] {
        &self.correct
    }
}

/// Checks one row: finite entries in [0, 1] summing to 1 within [`ROW_SUM_TOLERANCE`].
fn check_row(item: usize, row: &[f64]) -> Result<(), EvalError> {
    for (class, &value) in row.iter().enumerate() {
        if !value.is_finite() {
            return Err(EvalError::NonFinite {
                what: "probability",
                item,
                column: class,
                value,
            });
        }
        if !(0.0..=1.0).contains(&value) {
            return Err(EvalError::ProbabilityRange { item, class, value });
        }
    }
    let sum: f64 = row.iter().sum();
    if (sum - 1.0).abs() > ROW_SUM_TOLERANCE {
        return Err(EvalError::RowSum {
            item,
            sum,
            tolerance: ROW_SUM_TOLERANCE,
        });
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::super::fixtures::{E3_LABELS, E3_PROBS};
    use super::*;

    #[test]
    fn derives_top_label_quantities_of_e3() {
        let p = Predictions::try_new(&E3_PROBS, 3, &E3_LABELS).unwrap();
        // METHODS.md E3: conf, ŷ and c.
        assert_eq!(
            p.confidence(),
            &[0.72, 0.61, 0.83, 0.55, 0.93, 0.41, 0.45, 0.77]
        );
        assert_eq!(p.predicted(), &[0, 0, 1, 1, 2, 0, 2, 1]);
        let c: Vec<u8> = p.correct().iter().map(|&b| u8::from(b)).collect();
        assert_eq!(c, [1, 0, 1, 0, 1, 1, 0, 1]);
        assert_eq!((p.n(), p.n_classes()), (8, 3));
        assert_eq!(p.row(4), &[0.03, 0.04, 0.93]);
    }

    #[test]
    fn argmax_ties_go_to_smallest_index() {
        let p = Predictions::try_new(&[0.4, 0.4, 0.2, 0.25, 0.25, 0.5], 3, &[1, 2]).unwrap();
        assert_eq!(p.predicted(), &[0, 2]);
        assert_eq!(p.correct(), &[false, true]);
    }

    #[test]
    fn rejects_bad_inputs_with_location() {
        let e = Predictions::try_new(&[], 3, &[]).unwrap_err();
        assert_eq!(e, EvalError::Empty { what: "labels" });
        let e = Predictions::try_new(&[0.5, 0.5], 1, &[0, 0]).unwrap_err();
        assert_eq!(e, EvalError::TooFewClasses { n_classes: 1 });
        let e = Predictions::try_new(&[0.5, 0.5, 1.0], 2, &[0, 0]).unwrap_err();
        assert_eq!(
            e,
            EvalError::Length {
                what: "probabilities",
                expected: 4,
                got: 3
            }
        );
        let e = Predictions::try_new(&[0.5, 0.5, 0.1, 0.9], 2, &[0, 2]).unwrap_err();
        assert_eq!(
            e,
            EvalError::LabelOutOfRange {
                item: 1,
                label: 2,
                n_classes: 2
            }
        );
        let e = Predictions::try_new(&[0.5, 0.5, f64::NAN, 0.9], 2, &[0, 1]).unwrap_err();
        assert!(
            matches!(
                e,
                EvalError::NonFinite {
                    item: 1,
                    column: 0,
                    ..
                }
            ),
            "{e}"
        );
        let e = Predictions::try_new(&[1.5, -0.5], 2, &[0]).unwrap_err();
        assert_eq!(
            e,
            EvalError::ProbabilityRange {
                item: 0,
                class: 0,
                value: 1.5
            }
        );
        let e = Predictions::try_new(&[0.5, 0.5, 0.6, 0.3], 2, &[0, 1]).unwrap_err();
        assert!(matches!(e, EvalError::RowSum { item: 1, .. }), "{e}");
        assert!(e.to_string().contains("item 1"), "{e}");
    }

    #[test]
    fn rows_within_tolerance_are_kept_as_given() {
        // METHODS.md 1.11: accept within 1e-6, never renormalise.
        let probs = [0.6, 0.4 + 5e-7];
        let p = Predictions::try_new(&probs, 2, &[0]).unwrap();
        assert_eq!(p.row(0), &probs);
        assert!(Predictions::try_new(&[0.6, 0.4 + 2e-6], 2, &[0]).is_err());
    }
}
