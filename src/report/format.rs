//! Number formatting for the report's prose and tables: thousands separators, percentages and
//! fixed decimals, with a dash for a missing value.

/// Placeholder for a value that does not exist (an empty bin, no accepted item).
pub const MISSING: &str = "–";

/// `n` with a comma every three digits: 2310 → "2,310".
pub fn count(n: u64) -> String {
    let digits = n.to_string();
    let mut out = String::with_capacity(digits.len() + digits.len() / 3);
    for (i, ch) in digits.chars().enumerate() {
        if i > 0 && (digits.len() - i).is_multiple_of(3) {
            out.push(',');
        }
        out.push(ch);
    }
    out
}

/// A fraction in [0, 1] as a percentage with `decimals` decimals: 0.981 → "98.1%".
pub fn percent(fraction: f64, decimals: usize) -> String {
    if fraction.is_finite() {
        format!("{:.*}%", decimals, fraction * 100.0)
    } else {
        MISSING.to_owned()
    }
}

/// A fraction as a percentage floored (never rounded up) at `decimals` decimals, for lower
/// bounds: 0.98149 → "98.1%", 0.9999 → "99.9%".
pub fn percent_floor(fraction: f64, decimals: usize) -> String {
    if !fraction.is_finite() {
        return MISSING.to_owned();
    }
    let scale = 10f64.powi(decimals as i32);
    let floored = (fraction * 100.0 * scale).floor() / scale;
    format!("{floored:.decimals$}%")
}

/// A value with `decimals` decimals, or [`MISSING`] if it is not finite.
pub fn fixed(value: f64, decimals: usize) -> String {
    if value.is_finite() {
        format!("{value:.decimals$}")
    } else {
        MISSING.to_owned()
    }
}

/// A threshold in [0, 1] with as few decimals as show it exactly (up to 4): 0.95 → "0.95",
/// 0.912345 → "0.9123"; `None` (never accept) → "none".
pub fn threshold(value: Option<f64>) -> String {
    match value {
        None => "none".to_owned(),
        Some(t) => {
            let s = format!("{t:.4}");
            let s = s.trim_end_matches('0');
            let s = s.strip_suffix('.').unwrap_or(s);
            if s.is_empty() {
                "0".to_owned()
            } else {
                s.to_owned()
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn counts_get_thousands_separators() {
        assert_eq!(count(0), "0");
        assert_eq!(count(999), "999");
        assert_eq!(count(2310), "2,310");
        assert_eq!(count(1_000_000), "1,000,000");
        assert_eq!(count(12_345_678), "12,345,678");
    }

    #[test]
    fn percentages_round_and_floor() {
        assert_eq!(percent(0.981, 1), "98.1%");
        assert_eq!(percent(0.5, 0), "50%");
        assert_eq!(percent(f64::NAN, 1), MISSING);
        // A lower bound never rounds up: 0.98199 is "98.1%", not "98.2%".
        assert_eq!(percent_floor(0.98199, 1), "98.1%");
        assert_eq!(percent_floor(0.9999, 1), "99.9%");
        assert_eq!(fixed(0.12345, 3), "0.123");
    }

    #[test]
    fn thresholds_drop_trailing_zeros() {
        assert_eq!(threshold(Some(0.95)), "0.95");
        assert_eq!(threshold(Some(0.912345)), "0.9123");
        assert_eq!(threshold(Some(1.0)), "1");
        assert_eq!(threshold(Some(0.0)), "0");
        assert_eq!(threshold(None), "none");
    }
}
