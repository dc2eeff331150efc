//! Validation problems: every check records what is wrong and where, and a constructor fails once
//! with the whole list (so a map file's author sees every problem in one pass).

use std::fmt;

/// One thing wrong with an input, located by a field path such as `method.weights[3][1]`.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Problem {
    /// Where: a dotted path with indices into the document.
    pub field: String,
    /// What is wrong, naming the bad value.
    pub message: String,
}

impl fmt::Display for Problem {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(f, "{}: {}", self.field, self.message)
    }
}

/// A collector of [`Problem`]s.
#[derive(Debug, Default, Clone)]
pub struct Problems {
    list: Vec<Problem>,
}

impl Problems {
    /// No problems yet.
    pub fn new() -> Self {
        Self::default()
    }

    /// Records a problem at `field`.
    pub fn push(&mut self, field: impl fmt::Display, message: impl fmt::Display) {
        self.list.push(Problem {
            field: field.to_string(),
            message: message.to_string(),
        });
    }

    /// True when nothing was recorded.
    pub fn is_empty(&self) -> bool {
        self.list.is_empty()
    }

    /// Number of problems recorded.
    pub fn len(&self) -> usize {
        self.list.len()
    }

    /// The recorded problems, in the order found.
    pub fn into_vec(self) -> Vec<Problem> {
        self.list
    }

    /// Records a problem for every non-finite entry of `values`.
    pub fn check_finite(&mut self, field: &str, values: &[f64]) {
        for (i, v) in values.iter().enumerate() {
            if !v.is_finite() {
                self.push(format!("{field}[{i}]"), format!("must be finite, got {v}"));
            }
        }
    }

    /// Records a problem unless `values` has exactly `expected` entries.
    pub fn check_len(&mut self, field: &str, values: usize, expected: usize) -> bool {
        if values != expected {
            self.push(field, format!("must have {expected} entries, got {values}"));
            return false;
        }
        true
    }

    /// Records a problem for every entry of `values` outside [0, 1].
    pub fn check_unit_interval(&mut self, field: &str, values: &[f64]) {
        for (i, v) in values.iter().enumerate() {
            if v.is_finite() && !(0.0..=1.0).contains(v) {
                self.push(
                    format!("{field}[{i}]"),
                    format!("must lie in [0, 1], got {v}"),
                );
            }
        }
    }

    /// Records a problem where `values` fails to increase strictly.
    pub fn check_increasing(&mut self, field: &str, values: &[f64]) {
        for i in 1..values.len() {
            if values[i].is_finite() && values[i - 1].is_finite() && values[i] <= values[i - 1] {
                self.push(
                    format!("{field}[{i}]"),
                    format!(
                        "must be greater than the previous entry {}, got {}",
                        values[i - 1],
                        values[i]
                    ),
                );
            }
        }
    }

    /// Turns the collector into `Ok(value)` when empty, else `Err(list)`.
    pub fn finish<T>(self, value: T) -> Result<T, Vec<Problem>> {
        if self.list.is_empty() {
            Ok(value)
        } else {
            Err(self.list)
        }
    }
}
