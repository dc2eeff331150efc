//! One-vs-rest fitting of binary monotone maps for K classes (Zadrozny & Elkan 2002, KDD;
//! METHODS.md 0.3 and 2.11 (A)), plus the input checks the five binary fits share.
//!
//! Each class's score is built exactly as `crate::method::OneVsRest::apply_in_place` reads it:
//! - one column (the binary-score form, METHODS.md 0.3): the logit pair (0, f), so the score is
//!   f = f − 0 (log-odds) or σ(f) (probability), and the map is fitted on class 1;
//! - K = 2 columns: f = z₁ − z₀ or σ(f), one map on class 1;
//! - K ≥ 3 columns: one map per class k on ln p_k − ln(1 − p_k) or p_k = softmax(z)_k.
//!
//! For K ≥ 3 the serving formula's log-odds become +∞ once p_k rounds to 1 (a logit margin of
//! about 37 or more). A fit cannot use +∞, so those rows are fitted on the exact log-odds
//! z_k − lse(z_{j≠k}) instead, and the class's diagnostics say how many rows that concerned.

use super::bbq::{self, BbqOptions};
use super::histogram::{self, HistogramOptions};
use super::{beta, class_counts, isotonic, platt, FitDiagnostics, FitError};
use crate::method::{
    Bbq, BetaCalibration, BinaryMap, Histogram, Isotonic, OneVsRest, Platt, ScoreKind,
};
use crate::numeric::{ln_one_minus_exp, lse, sigmoid, Logit};

/// Probabilities entering a logarithm in a reported objective are clipped to
/// [CLIP, 1 − CLIP], as sklearn.metrics.log_loss does (METHODS.md 0.2: machine epsilon).
pub const LOG_LOSS_CLIP: f64 = f64::EPSILON;

/// A binary fit usable per class: scores (as [`BinaryMap::SCORE`] says), labels, weights.
pub trait BinaryFit {
    /// The fitted map.
    type Map: BinaryMap;
    /// Fits one class against the rest.
    ///
    /// # Errors
    /// The binary fit's own errors.
    fn fit_binary(
        &self,
        scores: &[f64],
        positive: &[bool],
        weights: Option<&[f64]>,
    ) -> Result<(Self::Map, FitDiagnostics), FitError>;
}

/// Platt scaling by Lin–Lin–Weng (METHODS.md 2.6).
#[derive(Debug, Clone, Copy, Default)]
pub struct PlattFit;
/// Isotonic regression by PAV on 0/1 targets (METHODS.md 2.8).
#[derive(Debug, Clone, Copy, Default)]
pub struct IsotonicFit;
/// Beta calibration (METHODS.md 2.10).
#[derive(Debug, Clone, Copy, Default)]
pub struct BetaFit;

impl BinaryFit for PlattFit {
    type Map = Platt;
    fn fit_binary(&self, s: &[f64], y: &[bool], w: Option<&[f64]>) -> FitResult<Platt> {
        platt::fit_binary_weighted(s, y, w)
    }
}

impl BinaryFit for IsotonicFit {
    type Map = Isotonic;
    fn fit_binary(&self, s: &[f64], y: &[bool], w: Option<&[f64]>) -> FitResult<Isotonic> {
        let targets: Vec<f64> = y.iter().map(|&v| if v { 1.0 } else { 0.0 }).collect();
        isotonic::fit_binary(s, &targets, w)
    }
}

impl BinaryFit for BetaFit {
    type Map = BetaCalibration;
    fn fit_binary(&self, s: &[f64], y: &[bool], w: Option<&[f64]>) -> FitResult<BetaCalibration> {
        beta::fit_binary(s, y, w)
    }
}

impl BinaryFit for HistogramOptions {
    type Map = Histogram;
    fn fit_binary(&self, s: &[f64], y: &[bool], w: Option<&[f64]>) -> FitResult<Histogram> {
        histogram::fit_binary(s, y, w, self)
    }
}

impl BinaryFit for BbqOptions {
    type Map = Bbq;
    fn fit_binary(&self, s: &[f64], y: &[bool], w: Option<&[f64]>) -> FitResult<Bbq> {
        bbq::fit_binary(s, y, w, self)
    }
}

type FitResult<M> = Result<(M, FitDiagnostics), FitError>;

/// Fits one map per calibrated class on row-major logits with `columns` values per row
/// (1 = the binary-score form, read as (0, f)) and returns the map with one diagnostics entry
/// per binary map.
///
/// # Errors
/// [`FitError::BadOption`] for zero columns or a logits length that is not a multiple of it,
/// [`FitError::LengthMismatch`], [`FitError::Empty`], [`FitError::LabelOutOfRange`],
/// [`FitError::NonFinite`] for a logit; a class's own fit errors (`NotApplicable` names the class).
pub fn fit_one_vs_rest<L: Logit, F: BinaryFit>(
    fit: &F,
    logits: &[L],
    columns: usize,
    labels: &[u32],
    weights: Option<&[f64]>,
) -> Result<(OneVsRest<F::Map>, Vec<FitDiagnostics>), FitError> {
    check_shape(logits.len(), columns, labels.len())?;
    let classes = columns.max(2);
    class_counts(labels, classes)?;
    for (i, v) in logits.iter().enumerate() {
        let value = v.to_f64();
        if !value.is_finite() {
            let (row, column) = (i / columns, i % columns);
            return Err(FitError::NonFinite { row, column, value });
        }
    }
    let mut scores = class_scores(logits, columns, F::Map::SCORE);
    let (mut maps, mut diags) = (Vec::new(), Vec::new());
    for (m, col) in scores.iter_mut().enumerate() {
        let class = if classes == 2 { 1 } else { m };
        let saturated = replace_saturated(col, logits, columns, class);
        let positive: Vec<bool> = labels.iter().map(|&y| y as usize == class).collect();
        let (map, mut diag) = fit
            .fit_binary(col, &positive, weights)
            .map_err(|e| match e {
                FitError::NotApplicable { method, reason } => FitError::NotApplicable {
                    method,
                    reason: format!("class {class}: {reason}"),
                },
                other => other,
            })?;
        if saturated > 0 {
            diag.flags.push(format!(
                "{saturated} rows have class-{class} log-odds beyond f64 resolution (p rounds \
                 to 1; serving reads +inf there); fitted on the exact log-odds z_k - lse(z_j, j != k)"
            ));
        }
        maps.push(map);
        diags.push(diag);
    }
    let map = OneVsRest::try_new(classes, maps, "one_vs_rest").map_err(FitError::InvalidResult)?;
    Ok((map, diags))
}

fn check_shape(len: usize, columns: usize, labels: usize) -> Result<(), FitError> {
    if columns == 0 || !len.is_multiple_of(columns) {
        return Err(FitError::BadOption {
            name: "columns",
            value: columns.to_string(),
            reason: format!("must be >= 1 and divide the {len} logit values"),
        });
    }
    if len / columns != labels {
        return Err(FitError::LengthMismatch {
            logits: len / columns,
            labels,
        });
    }
    Ok(())
}

/// Each binary map's score for every row, exactly as `OneVsRest::apply_in_place` computes it
/// (see the module docs): one vector for K = 2 or the one-column form, else one per class.
pub fn class_scores<L: Logit>(logits: &[L], columns: usize, kind: ScoreKind) -> Vec<Vec<f64>> {
    let rows = logits.len().checked_div(columns).unwrap_or(0);
    let score = |f: f64| match kind {
        ScoreKind::LogOdds => f,
        ScoreKind::Probability => sigmoid(f),
    };
    if columns <= 2 {
        return vec![logits
            .chunks_exact(columns)
            .map(|r| {
                let (z0, z1) = if columns == 1 {
                    (0.0, r[0].to_f64())
                } else {
                    (r[0].to_f64(), r[1].to_f64())
                };
                let f = z1 - z0;
                score(if f.is_nan() { 0.0 } else { f })
            })
            .collect()];
    }
    let mut out = vec![Vec::with_capacity(rows); columns];
    let mut z = vec![0.0; columns];
    for row in logits.chunks_exact(columns) {
        z.iter_mut().zip(row).for_each(|(d, s)| *d = s.to_f64());
        let norm = lse(&z);
        for (col, &v) in out.iter_mut().zip(&z) {
            let lp = if norm.is_finite() { v - norm } else { 0.0 };
            let s = match kind {
                ScoreKind::LogOdds => lp - ln_one_minus_exp(lp.min(0.0)),
                ScoreKind::Probability => lp.exp(),
            };
            col.push(if s.is_nan() { 0.0 } else { s });
        }
    }
    out
}

/// Replaces non-finite scores of `class` by its exact log-odds z_k − lse(z_{j≠k}); returns how many.
fn replace_saturated<L: Logit>(
    col: &mut [f64],
    logits: &[L],
    columns: usize,
    class: usize,
) -> usize {
    let mut count = 0;
    let mut rest = Vec::with_capacity(columns);
    for (s, row) in col.iter_mut().zip(logits.chunks_exact(columns)) {
        if s.is_finite() {
            continue;
        }
        rest.clear();
        rest.extend(
            row.iter()
                .enumerate()
                .filter(|(j, _)| *j != class)
                .map(|(_, v)| v.to_f64()),
        );
        *s = row[class].to_f64() - lse(&rest);
        count += 1;
    }
    count
}

/// Weight of row `i` (1 when unweighted).
#[inline]
pub(crate) fn weight_at(weights: Option<&[f64]>, i: usize) -> f64 {
    weights.map_or(1.0, |w| w[i])
}

/// Shared input checks of the binary fits: a row count, equal lengths, finite scores (in
/// [0, 1] when `probabilities`), weights finite, ≥ 0 and not all zero. Returns Σ weights.
pub(crate) fn check_binary(
    method: &'static str,
    scores: &[f64],
    labels: usize,
    weights: Option<&[f64]>,
    probabilities: bool,
) -> Result<f64, FitError> {
    if scores.is_empty() && labels == 0 {
        return Err(FitError::Empty);
    }
    if scores.len() != labels {
        return Err(FitError::LengthMismatch {
            logits: scores.len(),
            labels,
        });
    }
    for (row, &value) in scores.iter().enumerate() {
        if !value.is_finite() {
            return Err(FitError::NonFinite {
                row,
                column: 0,
                value,
            });
        }
        if probabilities && !(0.0..=1.0).contains(&value) {
            let reason = format!("row {row}: score {value} is not a probability in [0, 1]");
            return Err(FitError::NotApplicable { method, reason });
        }
    }
    let Some(w) = weights else {
        return Ok(scores.len() as f64);
    };
    let bad = |value: String, reason: &str| FitError::BadOption {
        name: "weights",
        value,
        reason: reason.to_string(),
    };
    if w.len() != scores.len() {
        let reason = format!("must have one entry per row ({})", scores.len());
        return Err(bad(format!("{} entries", w.len()), &reason));
    }
    if let Some((row, v)) = w
        .iter()
        .enumerate()
        .find(|(_, v)| !(v.is_finite() && **v >= 0.0))
    {
        return Err(bad(format!("{v} at row {row}"), "must be finite and >= 0"));
    }
    let total: f64 = w.iter().sum();
    if !(total > 0.0 && total.is_finite()) {
        return Err(bad(
            format!("sum {total}"),
            "must have a finite, positive sum",
        ));
    }
    Ok(total)
}

/// Cross-entropy −t ln q − (1 − t) ln(1 − q) of a prediction `q` against a 0/1 or soft target
/// `t`, with q clipped to [`LOG_LOSS_CLIP`, 1 − `LOG_LOSS_CLIP`].
#[inline]
pub(crate) fn cross_entropy(q: f64, t: f64) -> f64 {
    let q = q.clamp(LOG_LOSS_CLIP, 1.0 - LOG_LOSS_CLIP);
    let mut sum = 0.0;
    if t > 0.0 {
        sum -= t * q.ln();
    }
    if t < 1.0 {
        sum -= (1.0 - t) * (-q).ln_1p();
    }
    sum
}

/// Mean cross-entropy of the identity map (the scores read as probabilities): the uncalibrated
/// baseline of the probability-score fits.
pub(crate) fn identity_log_loss(
    scores: &[f64],
    target: impl Fn(usize) -> f64,
    weights: Option<&[f64]>,
    total_weight: f64,
) -> f64 {
    let sum: f64 = scores
        .iter()
        .enumerate()
        .map(|(i, &s)| weight_at(weights, i) * cross_entropy(s, target(i)))
        .sum();
    sum / total_weight
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::fit::bbq::BbqOptions;
    use crate::fit::histogram::{BinPrior, BinStrategy};
    use crate::fit::isotonic::pav;

    /// Deterministic logits and labels: row i of K logits from a fixed LCG, labels drawn
    /// loosely from the argmax so every class appears.
    fn data(rows: usize, k: usize) -> (Vec<f64>, Vec<u32>) {
        let mut state = 12345u64;
        let mut next = || {
            state = state
                .wrapping_mul(6364136223846793005)
                .wrapping_add(1442695040888963407);
            (state >> 11) as f64 / (1u64 << 53) as f64
        };
        let z: Vec<f64> = (0..rows * k).map(|_| 6.0 * next() - 3.0).collect();
        let y = (0..rows)
            .map(|i| {
                let row = &z[i * k..(i + 1) * k];
                let top = crate::numeric::argmax(row) as u32;
                if next() < 0.7 {
                    top
                } else {
                    (i % k) as u32
                }
            })
            .collect();
        (z, y)
    }

    /// PAV fitted value of every row for one class (scores distinct in these fixtures).
    fn pav_by_row(scores: &[f64], positive: &[bool]) -> Vec<f64> {
        let mut order: Vec<usize> = (0..scores.len()).collect();
        order.sort_by(|&a, &b| scores[a].total_cmp(&scores[b]));
        let t: Vec<f64> = order
            .iter()
            .map(|&i| f64::from(u8::from(positive[i])))
            .collect();
        let fitted = pav(&t, &vec![1.0; t.len()]);
        let mut out = vec![0.0; scores.len()];
        order.iter().zip(fitted).for_each(|(&i, v)| out[i] = v);
        out
    }

    #[test]
    fn binary_isotonic_apply_reproduces_fitted_values() {
        let (z, y) = data(60, 2);
        let (map, diags) = fit_one_vs_rest(&IsotonicFit, &z, 2, &y, None).unwrap();
        assert_eq!(diags.len(), 1);
        let s: Vec<f64> = z.chunks(2).map(|r| sigmoid(r[1] - r[0])).collect();
        let want = pav_by_row(&s, &y.iter().map(|&v| v == 1).collect::<Vec<_>>());
        for (row, w) in z.chunks(2).zip(want) {
            let mut q = row.to_vec();
            map.apply_in_place(&mut q, &mut Vec::new());
            assert!((q[1] - w).abs() < 1e-15 && (q[0] - (1.0 - w)).abs() < 1e-15);
        }
    }

    #[test]
    fn multiclass_isotonic_apply_reproduces_normalised_fitted_values() {
        // Fitted from f32 logits, checked on their f64 values: the generic path widens exactly.
        let (z, y) = data(90, 3);
        let z32: Vec<f32> = z.iter().map(|&v| v as f32).collect();
        let z: Vec<f64> = z32.iter().map(|&v| f64::from(v)).collect();
        let (map, diags) = fit_one_vs_rest(&IsotonicFit, &z32, 3, &y, None).unwrap();
        assert_eq!((map.maps().len(), diags.len()), (3, 3));
        let scores = class_scores(&z, 3, ScoreKind::Probability);
        let u: Vec<Vec<f64>> = (0..3)
            .map(|k| {
                pav_by_row(
                    &scores[k],
                    &y.iter().map(|&v| v == k as u32).collect::<Vec<_>>(),
                )
            })
            .collect();
        for (i, row) in z.chunks(3).enumerate() {
            let mut q = row.to_vec();
            map.apply_in_place(&mut q, &mut Vec::new());
            let sum: f64 = (0..3).map(|k| u[k][i]).sum();
            for k in 0..3 {
                let want = if sum > 0.0 { u[k][i] / sum } else { 1.0 / 3.0 };
                assert!(
                    (q[k] - want).abs() < 1e-14,
                    "row {i} class {k}: {} vs {want}",
                    q[k]
                );
            }
        }
    }

    #[test]
    fn one_score_form_is_the_pair_zero_f() {
        // METHODS.md 0.3: one log-odds f is read as (0, f), not (−f, f).
        let (z, _) = data(40, 1);
        let y: Vec<u32> = z.iter().map(|&f| u32::from(f + 0.5 > 0.0)).collect();
        let (map, _) = fit_one_vs_rest(&PlattFit, &z, 1, &y, None).unwrap();
        let positive: Vec<bool> = y.iter().map(|&v| v == 1).collect();
        let (direct, _) = platt::fit_binary(&z, &positive).unwrap();
        assert_eq!(map.maps()[0], direct);
        let mut q = [0.0, 1.5];
        map.apply_in_place(&mut q, &mut Vec::new());
        assert!((q[1] - direct.apply(1.5)).abs() < 1e-16);
        // Two columns (z0, z1) with z0 = 0 give the same map.
        let pairs: Vec<f64> = z.iter().flat_map(|&f| [0.0, f]).collect();
        assert_eq!(
            fit_one_vs_rest(&PlattFit, &pairs, 2, &y, None).unwrap().0,
            map
        );
    }

    #[test]
    fn saturated_log_odds_are_fitted_finitely_and_flagged() {
        // Row [50, 0, 0]: lse rounds to 50, p₀ = 1 and the serving log-odds are +∞.
        let (mut z, y) = data(30, 3);
        z[..3].copy_from_slice(&[50.0, 0.0, 0.0]);
        assert_eq!(class_scores(&z, 3, ScoreKind::LogOdds)[0][0], f64::INFINITY);
        let (map, diags) = fit_one_vs_rest(&PlattFit, &z, 3, &y, None).unwrap();
        assert!(
            diags[0]
                .flags
                .iter()
                .any(|f| f.starts_with("1 rows have class-0")),
            "{diags:?}"
        );
        assert!(diags[1].flags.is_empty());
        let mut q = z[..3].to_vec();
        map.apply_in_place(&mut q, &mut Vec::new());
        assert!(q.iter().all(|v| v.is_finite()) && (q.iter().sum::<f64>() - 1.0).abs() < 1e-15);
    }

    /// Applies `map` to every row and checks a probability vector comes out.
    fn rows_are_probabilities<M: BinaryMap>(map: &OneVsRest<M>, z: &[f64], k: usize) {
        for row in z.chunks(k) {
            let mut q = row.to_vec();
            map.apply_in_place(&mut q, &mut Vec::new());
            assert!(q.iter().all(|v| (0.0..=1.0).contains(v)), "{q:?}");
            assert!((q.iter().sum::<f64>() - 1.0).abs() < 1e-12, "{q:?}");
        }
    }

    #[test]
    fn every_binary_fit_runs_one_vs_rest() {
        let (z, y) = data(120, 4);
        let hist = HistogramOptions {
            bins: 5,
            strategy: BinStrategy::EqualMass,
            prior: BinPrior::Laplace,
        };
        rows_are_probabilities(
            &fit_one_vs_rest(&PlattFit, &z, 4, &y, None).unwrap().0,
            &z,
            4,
        );
        rows_are_probabilities(
            &fit_one_vs_rest(&IsotonicFit, &z, 4, &y, None).unwrap().0,
            &z,
            4,
        );
        rows_are_probabilities(&fit_one_vs_rest(&hist, &z, 4, &y, None).unwrap().0, &z, 4);
        let bbq = BbqOptions::default();
        rows_are_probabilities(&fit_one_vs_rest(&bbq, &z, 4, &y, None).unwrap().0, &z, 4);
        rows_are_probabilities(
            &fit_one_vs_rest(&BetaFit, &z, 4, &y, None).unwrap().0,
            &z,
            4,
        );
    }

    #[test]
    fn bad_inputs_are_named() {
        let z = [0.1, 0.2, 0.3, 0.4, 0.5, 0.6];
        let err = fit_one_vs_rest(&PlattFit, &z, 4, &[0], None).unwrap_err();
        assert!(
            matches!(
                err,
                FitError::BadOption {
                    name: "columns",
                    ..
                }
            ),
            "{err}"
        );
        let err = fit_one_vs_rest(&PlattFit, &z, 3, &[0], None).unwrap_err();
        assert_eq!(
            err,
            FitError::LengthMismatch {
                logits: 2,
                labels: 1
            }
        );
        let err = fit_one_vs_rest(&PlattFit, &z, 3, &[0, 3], None).unwrap_err();
        assert_eq!(
            err,
            FitError::LabelOutOfRange {
                row: 1,
                label: 3,
                classes: 3
            }
        );
        let mut bad = z;
        bad[4] = f64::NAN;
        let err = fit_one_vs_rest(&PlattFit, &bad, 3, &[0, 1], None).unwrap_err();
        assert!(
            matches!(
                err,
                FitError::NonFinite {
                    row: 1,
                    column: 1,
                    ..
                }
            ),
            "{err}"
        );
        // Class 2 never appears: beta calibration cannot fit it and says which class.
        let err = fit_one_vs_rest(&BetaFit, &z, 3, &[0, 1], None).unwrap_err();
        assert!(
            err.to_string().contains("class 2: needs both classes"),
            "{err}"
        );
        let err = fit_one_vs_rest(&IsotonicFit, &z, 3, &[0, 1], Some(&[1.0])).unwrap_err();
        assert!(
            matches!(
                err,
                FitError::BadOption {
                    name: "weights",
                    ..
                }
            ),
            "{err}"
        );
    }
}
