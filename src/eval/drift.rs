//! Drift of the confidence distribution between a reference window and a current window
//! (METHODS.md 4.4): the two-sample Kolmogorov–Smirnov test (Kolmogorov 1933; Smirnov 1948)
//! and the Population Stability Index (common practice in credit-risk monitoring).
//!
//! With large windows trivial shifts become significant: alert on the effect sizes (D, PSI),
//! not only on the p-value.

use super::bootstrap::quantile_linear;
use super::ks_distribution::{exact_p_value, gcd, stephens_p_value, KS_EXACT_MAX_N};
use super::predictions::ROW_SUM_TOLERANCE;
use super::EvalError;
use serde::Serialize;

/// How a KS p-value was obtained.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "lowercase")]
pub enum KsMethod {
    /// Exact lattice-path probability (both samples ≤ 10 000, as scipy's 'auto' mode).
    Exact,
    /// Kolmogorov distribution at λ = (√n_e + 0.12 + 0.11/√n_e)·D (Stephens). scipy instead
    /// uses kstwo.sf(D, round(n_e)) here, so large-sample p-values differ slightly from scipy.
    Asymptotic,
}

/// Result of a two-sided two-sample KS test.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct KsTest {
    /// D = sup_x |F_ref(x) − F_cur(x)|, in [0, 1].
    pub statistic: f64,
    /// P(D ≥ observed) under "same distribution"; ties make it conservative.
    pub p_value: f64,
    /// Exact or asymptotic.
    pub method: KsMethod,
}

/// Sorted copy of a sample after checking it is non-empty and finite.
fn sorted_sample(what: &'static str, x: &[f64]) -> Result<Vec<f64>, EvalError> {
    if x.is_empty() {
        return Err(EvalError::Empty { what });
    }
    if let Some(item) = x.iter().position(|v| !v.is_finite()) {
        return Err(EvalError::NonFinite {
            what,
            item,
            column: 0,
            value: x[item],
        });
    }
    let mut s = x.to_vec();
    s.sort_by(f64::total_cmp);
    Ok(s)
}

/// h = max over x of |F1(x)·lcm − F2(x)·lcm|, an integer, and lcm(n1, n2); ties in either
/// sample are handled by stepping past every copy of a value before comparing.
fn ks_lattice_statistic(x1: &[f64], x2: &[f64]) -> (u64, u64) {
    let (n1, n2) = (x1.len() as u64, x2.len() as u64);
    let g = gcd(n1, n2);
    let (a, b) = (i128::from(n2 / g), i128::from(n1 / g));
    let (mut i, mut j, mut h) = (0usize, 0usize, 0i128);
    while i < x1.len() && j < x2.len() {
        let x = x1[i].min(x2[j]);
        while i < x1.len() && x1[i] <= x {
            i += 1;
        }
        while j < x2.len() && x2[j] <= x {
            j += 1;
        }
        h = h.max((i as i128 * a - j as i128 * b).abs());
    }
    // The rest of one sample only moves its ECDF towards 1, closing the gap.
    (h as u64, (n1 / g) * n2)
}

/// Two-sided two-sample KS test of `reference` against `current` (as scipy.stats.ks_2samp
/// with method='auto'): exact p-value when both sizes are ≤ 10 000, else the asymptotic form.
///
/// # Errors
/// [`EvalError::Empty`] for an empty sample; [`EvalError::NonFinite`] for NaN or ±∞.
pub fn ks_two_sample(reference: &[f64], current: &[f64]) -> Result<KsTest, EvalError> {
    let x1 = sorted_sample("reference sample", reference)?;
    let x2 = sorted_sample("current sample", current)?;
    let (n1, n2) = (x1.len(), x2.len());
    let (h, lcm) = ks_lattice_statistic(&x1, &x2);
    let statistic = h as f64 / lcm as f64;
    if h == 0 {
        return Ok(KsTest {
            statistic,
            p_value: 1.0,
            method: KsMethod::Exact,
        });
    }
    if n1.max(n2) <= KS_EXACT_MAX_N {
        if let Some(p_value) = exact_p_value(n1, n2, h) {
            return Ok(KsTest {
                statistic,
                p_value,
                method: KsMethod::Exact,
            });
        }
    }
    let p_value = stephens_p_value(n1, n2, statistic);
    Ok(KsTest {
        statistic,
        p_value,
        method: KsMethod::Asymptotic,
    })
}

/// Smoothing ε added to every proportion when a bin is empty (METHODS.md 4.4 suggests 1e−4).
pub const PSI_EPSILON: f64 = 1e-4;

/// Number of reference-quantile bins used when none is given (deciles).
pub const PSI_DEFAULT_BINS: usize = 10;

/// PSI settings: number of reference-quantile bins and the empty-bin smoothing ε.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct PsiConfig {
    /// Bins B ≥ 1: interior edges at the reference quantiles b/B, b = 1..B−1.
    pub n_bins: usize,
    /// ε ≥ 0 added to every proportion when some proportion is 0.
    pub epsilon: f64,
}

impl Default for PsiConfig {
    fn default() -> Self {
        Self {
            n_bins: PSI_DEFAULT_BINS,
            epsilon: PSI_EPSILON,
        }
    }
}

/// PSI with the bins and the proportions it used.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Psi {
    /// Σ_b (a_b − e_b)·ln(a_b/e_b), ≥ 0.
    pub value: f64,
    /// Interior bin edges (distinct reference quantiles, ascending); bins are right-closed,
    /// (−∞, t₁], (t₁, t₂], …, (t_last, ∞).
    pub edges: Vec<f64>,
    /// Reference proportions e_b (after smoothing, if any).
    pub reference: Vec<f64>,
    /// Current proportions a_b (after smoothing, if any).
    pub current: Vec<f64>,
    /// Whether the ε rule was applied because a bin was empty on either side.
    pub smoothed: bool,
}

/// Proportions of `x` in the right-closed bins cut at `edges`.
fn proportions(edges: &[f64], x: &[f64]) -> Vec<f64> {
    let mut counts = vec![0u64; edges.len() + 1];
    for &v in x {
        counts[edges.partition_point(|&e| e < v)] += 1;
    }
    counts.iter().map(|&c| c as f64 / x.len() as f64).collect()
}

/// PSI of `current` against `reference` on bins cut at the reference quantiles (numpy 'linear'
/// rule; coinciding quantiles, e.g. from tied confidences, are merged, so fewer bins may be used).
///
/// # Errors
/// [`EvalError::Empty`] for an empty sample; [`EvalError::NonFinite`] for NaN or ±∞;
/// [`EvalError::Setting`] for 0 bins or a negative or non-finite ε.
pub fn psi(reference: &[f64], current: &[f64], config: &PsiConfig) -> Result<Psi, EvalError> {
    if config.n_bins == 0 {
        return Err(EvalError::Setting {
            what: "PSI bin count",
            value: 0.0,
            rule: "must be at least 1",
        });
    }
    check_epsilon(config.epsilon)?;
    let sorted = sorted_sample("reference sample", reference)?;
    sorted_sample("current sample", current)?;
    let b = config.n_bins as f64;
    let mut edges: Vec<f64> = (1..config.n_bins)
        .filter_map(|k| quantile_linear(&sorted, k as f64 / b))
        .collect();
    edges.dedup();
    let e = proportions(&edges, reference);
    let a = proportions(&edges, current);
    let (value, reference, current, smoothed) = psi_core(e, a, config.epsilon);
    Ok(Psi {
        value,
        edges,
        reference,
        current,
        smoothed,
    })
}

/// PSI of given bin proportions (each list sums to 1 within 1e−6); ε is applied as in [`psi`].
///
/// # Errors
/// [`EvalError::Empty`] or [`EvalError::Length`] for empty or unequal lists;
/// [`EvalError::NonFinite`], [`EvalError::ProbabilityRange`] or [`EvalError::RowSum`] for bad
/// proportions; [`EvalError::Setting`] for a negative or non-finite ε.
pub fn psi_from_proportions(
    expected: &[f64],
    actual: &[f64],
    epsilon: f64,
) -> Result<f64, EvalError> {
    if expected.is_empty() {
        return Err(EvalError::Empty {
            what: "expected proportions",
        });
    }
    if actual.len() != expected.len() {
        return Err(EvalError::Length {
            what: "actual proportions",
            expected: expected.len(),
            got: actual.len(),
        });
    }
    check_epsilon(epsilon)?;
    for (item, list) in [expected, actual].into_iter().enumerate() {
        for (class, &value) in list.iter().enumerate() {
            if !value.is_finite() {
                return Err(EvalError::NonFinite {
                    what: "proportion",
                    item,
                    column: class,
                    value,
                });
            }
            if !(0.0..=1.0).contains(&value) {
                return Err(EvalError::ProbabilityRange { item, class, value });
            }
        }
        let sum: f64 = list.iter().sum();
        if (sum - 1.0).abs() > ROW_SUM_TOLERANCE {
            return Err(EvalError::RowSum {
                item,
                sum,
                tolerance: ROW_SUM_TOLERANCE,
            });
        }
    }
    Ok(psi_core(expected.to_vec(), actual.to_vec(), epsilon).0)
}

/// Rejects a negative or non-finite ε.
fn check_epsilon(epsilon: f64) -> Result<(), EvalError> {
    if !(epsilon.is_finite() && epsilon >= 0.0) {
        return Err(EvalError::Setting {
            what: "PSI epsilon",
            value: epsilon,
            rule: "must be finite and >= 0",
        });
    }
    Ok(())
}

/// The ε rule and the sum: if any proportion on either side is 0, add ε to every proportion of
/// both sides and renormalise each; then Σ (a − e)·ln(a/e). Bins empty on both sides (possible
/// only with ε = 0) contribute 0; a bin empty on one side only with ε = 0 gives +∞.
fn psi_core(mut e: Vec<f64>, mut a: Vec<f64>, epsilon: f64) -> (f64, Vec<f64>, Vec<f64>, bool) {
    let smoothed = e.iter().chain(&a).any(|&v| v == 0.0) && epsilon > 0.0;
    if smoothed {
        for list in [&mut e, &mut a] {
            let total: f64 = list.iter().map(|v| v + epsilon).sum();
            list.iter_mut().for_each(|v| *v = (*v + epsilon) / total);
        }
    }
    let value = e
        .iter()
        .zip(&a)
        .filter(|(&ev, &av)| ev > 0.0 || av > 0.0)
        .map(|(&ev, &av)| (av - ev) * (av / ev).ln())
        .sum();
    (value, e, a, smoothed)
}

#[cfg(test)]
#[path = "drift_tests.rs"]
mod tests;
