//! The one error type of every fit.

use crate::method::Problem;

/// Why a map could not be fitted.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum FitError {
    /// No rows.
    #[error("no rows to fit on")]
    Empty,
    /// Logits and labels disagree in length.
    #[error("{logits} logit rows but {labels} labels")]
    LengthMismatch {
        /// Rows of logits (or scores).
        logits: usize,
        /// Labels given.
        labels: usize,
    },
    /// A NaN or infinite input value.
    #[error("row {row}, column {column}: value {value} is not finite")]
    NonFinite {
        /// 0-based row.
        row: usize,
        /// 0-based column.
        column: usize,
        /// The value.
        value: f64,
    },
    /// A label ≥ K.
    #[error("row {row}: label {label} is out of range for {classes} classes")]
    LabelOutOfRange {
        /// 0-based row.
        row: usize,
        /// The label.
        label: u32,
        /// K.
        classes: usize,
    },
    /// Fewer rows than the method needs.
    #[error("{method} needs at least {needed} rows, got {got}")]
    TooFewRows {
        /// Method name.
        method: &'static str,
        /// Rows needed.
        needed: usize,
        /// Rows given.
        got: usize,
    },
    /// An option outside its range.
    #[error("option {name} = {value}: {reason}")]
    BadOption {
        /// Option name as the CLI spells it.
        name: &'static str,
        /// The value given.
        value: String,
        /// What is allowed.
        reason: String,
    },
    /// The method does not apply to this data (e.g. a binary-only method on K = 3).
    #[error("{method} does not apply here: {reason}")]
    NotApplicable {
        /// Method name.
        method: &'static str,
        /// Why.
        reason: String,
    },
    /// The fitted parameters failed validation: a bug in the fit, reported rather than hidden.
    #[error("fitted parameters are invalid: {}", .0.iter().map(|p| p.to_string()).collect::<Vec<_>>().join("; "))]
    InvalidResult(Vec<Problem>),
}
