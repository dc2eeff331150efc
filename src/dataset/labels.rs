//! Label checks shared by every format: class indices 0..K-1, and 0/1 when K = 1 (one binary
//! log-odds score per row, METHODS.md section 0.3).

use super::error::ErrorKind;

/// Largest magnitude at which every f64 is still an exact integer (2^53); whole-valued float
/// labels beyond it are rejected as out of range rather than rounded.
const MAX_EXACT_F64_INT: f64 = 9_007_199_254_740_992.0;

/// Number of classes labels may name: 2 when `k == 1` (one log-odds score per row), else `k`.
pub fn classes_for(k: usize) -> usize {
    if k == 1 {
        2
    } else {
        k
    }
}

/// Checks an integer label against `classes` and narrows it.
///
/// # Errors
/// [`ErrorKind::LabelNegative`] or [`ErrorKind::LabelOutOfRange`].
pub fn check_int(value: i128, classes: usize) -> Result<u32, ErrorKind> {
    if value < 0 {
        return Err(ErrorKind::LabelNegative { value });
    }
    match u32::try_from(value) {
        Ok(v) if (v as usize) < classes => Ok(v),
        _ => Err(ErrorKind::LabelOutOfRange { value, classes }),
    }
}

/// Checks a float label: it must be a whole number, then as [`check_int`]. `text` is how the
/// label was written, for the message.
///
/// # Errors
/// [`ErrorKind::LabelNotInteger`] for a fractional or non-finite value, else as [`check_int`].
pub fn check_float(value: f64, text: &str, classes: usize) -> Result<u32, ErrorKind> {
    if !value.is_finite() || value.fract() != 0.0 {
        return Err(ErrorKind::LabelNotInteger {
            text: text.to_string(),
        });
    }
    if value.abs() > MAX_EXACT_F64_INT {
        let value = if value < 0.0 { -1 } else { i128::MAX };
        return check_int(value, classes);
    }
    // Exact: |value| ≤ 2^53 and whole.
    check_int(value as i128, classes)
}

/// Parses a label written as text (`"3"`, `" 3 "`, `"3.0"`, `"3e0"`).
///
/// # Errors
/// [`ErrorKind::MissingLabel`] for an empty cell, [`ErrorKind::LabelNotInteger`] for text that is
/// not a whole number, else as [`check_int`].
pub fn parse_text(text: &str, classes: usize) -> Result<u32, ErrorKind> {
    let t = text.trim();
    if t.is_empty() {
        return Err(ErrorKind::MissingLabel);
    }
    if let Ok(v) = t.parse::<i128>() {
        return check_int(v, classes);
    }
    match t.parse::<f64>() {
        Ok(v) => check_float(v, t, classes),
        Err(_) => Err(ErrorKind::LabelNotInteger {
            text: t.to_string(),
        }),
    }
}

/// Tracks label presence row by row in a format where each row may or may not carry one
/// (JSONL): the first data row decides, and every later row must agree.
#[derive(Debug)]
pub(crate) struct Presence {
    required: bool,
    labelled: Option<bool>,
}

impl Presence {
    /// Nothing seen yet; `required` makes an unlabelled row an error.
    pub(crate) fn new(required: bool) -> Self {
        Presence {
            required,
            labelled: None,
        }
    }

    /// Records one row; returns the problem if it disagrees with earlier rows or the need.
    pub(crate) fn observe(&mut self, present: bool) -> Option<ErrorKind> {
        let labelled = *self.labelled.get_or_insert(present || self.required);
        match (labelled, present) {
            (true, false) => Some(ErrorKind::MissingLabel),
            (false, true) => Some(ErrorKind::UnexpectedLabel),
            _ => None,
        }
    }

    /// Whether the rows carry labels (false before any row).
    pub(crate) fn labelled(&self) -> bool {
        self.labelled.unwrap_or(false)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn binary_scores_take_labels_zero_and_one() {
        assert_eq!(classes_for(1), 2);
        assert_eq!(classes_for(2), 2);
        assert_eq!(classes_for(7), 7);
        assert_eq!(check_int(1, classes_for(1)).ok(), Some(1));
        assert!(matches!(
            check_int(2, classes_for(1)),
            Err(ErrorKind::LabelOutOfRange {
                value: 2,
                classes: 2
            })
        ));
    }

    #[test]
    fn int_range_edges() {
        assert_eq!(check_int(0, 3).ok(), Some(0));
        assert_eq!(check_int(2, 3).ok(), Some(2));
        assert!(matches!(
            check_int(-1, 3),
            Err(ErrorKind::LabelNegative { value: -1 })
        ));
        let huge = i128::from(u64::MAX);
        assert!(matches!(
            check_int(huge, 3),
            Err(ErrorKind::LabelOutOfRange { .. })
        ));
    }

    #[test]
    fn text_labels() {
        assert_eq!(parse_text(" 2 ", 3).ok(), Some(2));
        assert_eq!(parse_text("2.0", 3).ok(), Some(2));
        assert_eq!(parse_text("1e0", 3).ok(), Some(1));
        assert!(matches!(parse_text("", 3), Err(ErrorKind::MissingLabel)));
        assert!(
            matches!(parse_text("1.5", 3), Err(ErrorKind::LabelNotInteger { text }) if text == "1.5")
        );
        assert!(matches!(
            parse_text("NaN", 3),
            Err(ErrorKind::LabelNotInteger { .. })
        ));
        assert!(matches!(
            parse_text("cat", 3),
            Err(ErrorKind::LabelNotInteger { .. })
        ));
        assert!(matches!(parse_text("-0.0", 3), Ok(0)));
        assert!(matches!(
            parse_text("-3", 3),
            Err(ErrorKind::LabelNegative { value: -3 })
        ));
        assert!(matches!(
            parse_text("1e300", 3),
            Err(ErrorKind::LabelOutOfRange { .. })
        ));
    }

    #[test]
    fn presence_first_row_decides() {
        let mut p = Presence::new(false);
        assert!(p.observe(false).is_none());
        assert!(matches!(p.observe(true), Some(ErrorKind::UnexpectedLabel)));
        assert!(!p.labelled());
        let mut p = Presence::new(false);
        assert!(p.observe(true).is_none());
        assert!(matches!(p.observe(false), Some(ErrorKind::MissingLabel)));
        assert!(p.labelled());
        let mut p = Presence::new(true);
        assert!(matches!(p.observe(false), Some(ErrorKind::MissingLabel)));
        assert!(matches!(p.observe(false), Some(ErrorKind::MissingLabel)));
    }
}
