//! Fitting histogram-binning maps (Zadrozny & Elkan 2001, ICML; METHODS.md 2.7): bins over the
//! probability score, each serving the (optionally smoothed) frequency of the class in it.
//!
//! - Equal-width edges are e_m = m·(1/M) with the last edge 1.0, as numpy.linspace builds them
//!   (METHODS.md 1.2); bins are right-closed like `crate::method::bin_index`.
//! - Equal-mass edges split the sorted scores by the floor rule (group b holds sorted positions
//!   [⌊b·n/M⌋, ⌊(b+1)·n/M⌋), METHODS.md 1.4), move each cut to the nearer end of a run of tied
//!   scores so ties stay together, and put each edge at the midpoint of the two scores across the
//!   cut; the first edge is 0 and the last 1. Bins hold equal numbers of rows, whatever the
//!   weights. Ties, or fewer distinct scores than bins, give fewer bins (flagged).
//! - An empty bin (no weight) under [`BinPrior::None`] serves the overall weighted frequency of
//!   the class; under a Beta prior it serves the prior mean a/(a + b). Never NaN.

use super::ovr::{check_binary, cross_entropy, identity_log_loss, weight_at};
use super::{FitDiagnostics, FitError};
use crate::method::{bin_index, Histogram};

const METHOD: &str = "histogram binning";

/// How bin edges are placed.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum BinStrategy {
    /// M bins of width 1/M over [0, 1].
    EqualWidth,
    /// About n/M calibration scores per bin, ties kept together.
    EqualMass,
}

/// The per-bin estimate θ_b = (m_b + a)/(n_b + a + b) with m_b positives among n_b (weighted).
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum BinPrior {
    /// Raw frequency m_b/n_b; empty bins fall back to the overall frequency.
    None,
    /// a = b = 1 (Laplace's rule of succession).
    Laplace,
    /// Any Beta(a, b) prior, a > 0 and b > 0.
    Beta {
        /// Pseudo-count of positives, > 0.
        a: f64,
        /// Pseudo-count of negatives, > 0.
        b: f64,
    },
}

/// Options of a histogram-binning fit.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct HistogramOptions {
    /// Requested number of bins M ≥ 1.
    pub bins: usize,
    /// Edge placement.
    pub strategy: BinStrategy,
    /// Smoothing of the bin frequencies.
    pub prior: BinPrior,
}

/// Fits a histogram map of probability scores to 0/1 labels with optional weights (weighted
/// counts). Diagnostics report the mean NLL of the identity map and of the fitted map on the
/// calibration set (clipped as `ovr::LOG_LOSS_CLIP` says).
///
/// # Errors
/// [`FitError::Empty`], [`FitError::LengthMismatch`], [`FitError::NonFinite`] for a score,
/// [`FitError::NotApplicable`] for a score outside [0, 1], [`FitError::BadOption`] for bins = 0,
/// a Beta prior with a or b not positive and finite, or bad weights.
pub fn fit_binary(
    scores: &[f64],
    positive: &[bool],
    weights: Option<&[f64]>,
    options: &HistogramOptions,
) -> Result<(Histogram, FitDiagnostics), FitError> {
    let total = check_binary(METHOD, scores, positive.len(), weights, true)?;
    let (pa, pb) = prior_counts(options)?;
    let edges = match options.strategy {
        BinStrategy::EqualWidth => equal_width_edges(options.bins),
        BinStrategy::EqualMass => {
            let mut sorted = scores.to_vec();
            sorted.sort_unstable_by(f64::total_cmp);
            equal_mass_edges(&sorted, options.bins).1
        }
    };
    let bins = edges.len() - 1;
    let (mut n, mut m) = (vec![0.0; bins], vec![0.0; bins]);
    let mut m_total = 0.0;
    for (i, &s) in scores.iter().enumerate() {
        let (b, w) = (bin_index(&edges, s), weight_at(weights, i));
        n[b] += w;
        if positive[i] {
            m[b] += w;
            m_total += w;
        }
    }
    let fallback = m_total / total;
    let values: Vec<f64> = n
        .iter()
        .zip(&m)
        .map(|(&nb, &mb)| match options.prior {
            BinPrior::None if nb == 0.0 => fallback,
            _ => ((mb + pa) / (nb + pa + pb)).clamp(0.0, 1.0),
        })
        .collect();
    // Σ over a bin of w·ce(θ, y) = n_b·ce(θ, m_b/n_b): the cross-entropy is linear in the target.
    let end: f64 = (0..bins)
        .filter(|&b| n[b] > 0.0)
        .map(|b| n[b] * cross_entropy(values[b], (m[b] / n[b]).clamp(0.0, 1.0)))
        .sum();
    let target = |i: usize| if positive[i] { 1.0 } else { 0.0 };
    let mut diag = FitDiagnostics {
        converged: true,
        objective_start: Some(identity_log_loss(scores, target, weights, total)),
        objective_end: Some(end / total),
        ..FitDiagnostics::default()
    };
    if bins < options.bins {
        diag.flags.push(format!(
            "{bins} bins instead of {} (tied scores)",
            options.bins
        ));
    }
    let empty = n.iter().filter(|&&v| v == 0.0).count();
    if empty > 0 {
        diag.flags.push(format!("{empty} empty bins"));
    }
    let map = Histogram::try_new(edges, values, "histogram").map_err(FitError::InvalidResult)?;
    Ok((map, diag))
}

fn prior_counts(options: &HistogramOptions) -> Result<(f64, f64), FitError> {
    if options.bins == 0 {
        let reason = "at least one bin is needed".to_string();
        return Err(FitError::BadOption {
            name: "bins",
            value: "0".into(),
            reason,
        });
    }
    match options.prior {
        BinPrior::None => Ok((0.0, 0.0)),
        BinPrior::Laplace => Ok((1.0, 1.0)),
        BinPrior::Beta { a, b } if a > 0.0 && b > 0.0 && a.is_finite() && b.is_finite() => {
            Ok((a, b))
        }
        BinPrior::Beta { a, b } => Err(FitError::BadOption {
            name: "prior",
            value: format!("beta({a}, {b})"),
            reason: "both pseudo-counts must be positive and finite".into(),
        }),
    }
}

/// Edges m·(1/M) for m = 0..M with the last set to 1.0 (numpy.linspace(0, 1, M + 1)).
pub fn equal_width_edges(bins: usize) -> Vec<f64> {
    let step = 1.0 / bins as f64;
    let mut edges: Vec<f64> = (0..=bins).map(|m| m as f64 * step).collect();
    edges[bins] = 1.0;
    edges
}

/// Equal-mass cuts and edges over `sorted` scores in [0, 1] (module docs): interior cut
/// positions (bin b holds sorted positions [c_b, c_{b+1})) and the edges 0, midpoints, 1.
/// Each edge e across a cut satisfies `sorted[c − 1] ≤ e < sorted[c]`, so right-closed lookup
/// puts every calibration score in the bin its position says.
pub(crate) fn equal_mass_edges(sorted: &[f64], bins: usize) -> (Vec<usize>, Vec<f64>) {
    let n = sorted.len();
    let mut cuts: Vec<usize> = Vec::new();
    let mut edges = vec![0.0];
    for b in 1..bins {
        let Some(c) = untie(sorted, b * n / bins) else {
            continue;
        };
        let (lo, hi) = (sorted[c - 1], sorted[c]);
        let mid = (lo + hi) / 2.0;
        let edge = if mid < hi { mid } else { lo };
        // A cut already taken, or no representable edge above the first edge 0: skip it.
        if cuts.last().is_some_and(|&p| p >= c) || edge <= 0.0 {
            continue;
        }
        cuts.push(c);
        edges.push(edge);
    }
    edges.push(1.0);
    (cuts, edges)
}

/// Moves cut position `c` (between `sorted[c − 1]` and `sorted[c]`) to the nearer end of the
/// run of scores equal to `sorted[c]` (the later end on a tie); `None` when no cut is possible.
fn untie(sorted: &[f64], c: usize) -> Option<usize> {
    let n = sorted.len();
    if c == 0 || c >= n {
        return None;
    }
    let v = sorted[c];
    if sorted[c - 1] < v {
        return Some(c);
    }
    let lo = sorted.partition_point(|&s| s < v);
    let hi = sorted.partition_point(|&s| s <= v);
    match (lo > 0, hi < n) {
        (true, true) if c - lo < hi - c => Some(lo),
        (_, true) => Some(hi),
        (true, false) => Some(lo),
        (false, false) => None,
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::method::BinaryMap;
    use proptest::prelude::*;

    /// METHODS.md E7/E11 scores and labels.
    const S: [f64; 10] = [0.05, 0.15, 0.22, 0.35, 0.41, 0.52, 0.63, 0.71, 0.84, 0.93];
    const Y: [bool; 10] = [
        false, false, true, false, false, true, false, true, true, true,
    ];

    fn opts(bins: usize, strategy: BinStrategy, prior: BinPrior) -> HistogramOptions {
        HistogramOptions {
            bins,
            strategy,
            prior,
        }
    }

    #[test]
    fn worked_example_e11_raw_and_laplace() {
        // METHODS.md E11: equal-width 5 bins (right-closed): counts [2, 2, 2, 2, 2], positives
        // [0, 1, 1, 1, 2]; raw θ = [0, 0.5, 0.5, 0.5, 1]; Laplace θ = [0.25, 0.5, 0.5, 0.5, 0.75].
        let o = opts(5, BinStrategy::EqualWidth, BinPrior::None);
        let (raw, d) = fit_binary(&S, &Y, None, &o).unwrap();
        assert_eq!(raw.values(), [0.0, 0.5, 0.5, 0.5, 1.0]);
        // numpy.linspace(0, 1, 6) = [0, 0.2, 0.4, 0.6000000000000001, 0.8, 1] (METHODS.md 1.2).
        assert_eq!(raw.edges(), [0.0, 0.2, 0.4, 0.6000000000000001, 0.8, 1.0]);
        assert!(d.flags.is_empty(), "{:?}", d.flags);
        let o = opts(5, BinStrategy::EqualWidth, BinPrior::Laplace);
        let (lap, _) = fit_binary(&S, &Y, None, &o).unwrap();
        assert_eq!(lap.values(), [0.25, 0.5, 0.5, 0.5, 0.75]);
    }

    #[test]
    fn numpy_linspace_edges_for_ten_bins() {
        // numpy.linspace(0, 1, 11)[3] = 0.30000000000000004 (METHODS.md 1.2).
        let e = equal_width_edges(10);
        assert_eq!(e[3], 0.30000000000000004);
        assert_eq!((e[0], e[10]), (0.0, 1.0));
    }

    #[test]
    fn equal_mass_edges_match_worked_example_e7() {
        // METHODS.md E7: floor-rule cuts with midpoint edges; B = 5 → [0, 0.185, 0.38, 0.575,
        // 0.775, 1] ((0.71 + 0.84)/2 = 0.7749999999999999 in f64, as numpy prints it).
        let (cuts, edges) = equal_mass_edges(&S, 5);
        assert_eq!(cuts, [2, 4, 6, 8]);
        assert_eq!(edges, [0.0, 0.185, 0.38, 0.575, 0.7749999999999999, 1.0]);
        let o = opts(5, BinStrategy::EqualMass, BinPrior::None);
        let (m, _) = fit_binary(&S, &Y, None, &o).unwrap();
        assert_eq!(m.values(), [0.0, 0.5, 0.5, 0.5, 1.0]);
    }

    #[test]
    fn ties_stay_together() {
        // Six scores, three bins: the cut at 2 falls inside the run of 0.3s (positions 1..4)
        // and moves to its nearer end (1); the cut at 4 is on a boundary already.
        let s = [0.1, 0.3, 0.3, 0.3, 0.8, 0.9];
        let (cuts, edges) = equal_mass_edges(&s, 3);
        assert_eq!(cuts, [1, 4]);
        assert_eq!(edges, [0.0, 0.2, 0.55, 1.0]);
        // All scores equal: one bin.
        let (cuts, edges) = equal_mass_edges(&[0.4; 7], 3);
        assert!(cuts.is_empty());
        assert_eq!(edges, [0.0, 1.0]);
        let y = [true, false, true, false, true, false, true];
        let o = opts(3, BinStrategy::EqualMass, BinPrior::None);
        let (m, d) = fit_binary(&[0.4; 7], &y, None, &o).unwrap();
        assert_eq!(m.values(), [4.0 / 7.0]);
        assert!(d.flags[0].contains("1 bins instead of 3"), "{:?}", d.flags);
    }

    #[test]
    fn empty_bins_fall_back_without_nan() {
        // Scores only in [0, 0.2]: bins 1..4 are empty. No prior → the overall rate 2/3;
        // Laplace → 1/2; Beta(2, 6) → 2/8.
        let (s, y) = ([0.05, 0.1, 0.15], [true, false, true]);
        let o = opts(5, BinStrategy::EqualWidth, BinPrior::None);
        let (m, d) = fit_binary(&s, &y, None, &o).unwrap();
        assert_eq!(m.values(), [2.0 / 3.0; 5]);
        assert!(d.flags.iter().any(|f| f == "4 empty bins"), "{:?}", d.flags);
        let o = opts(5, BinStrategy::EqualWidth, BinPrior::Laplace);
        assert_eq!(
            fit_binary(&s, &y, None, &o).unwrap().0.values()[1..],
            [0.5; 4]
        );
        let o = opts(
            5,
            BinStrategy::EqualWidth,
            BinPrior::Beta { a: 2.0, b: 6.0 },
        );
        assert_eq!(fit_binary(&s, &y, None, &o).unwrap().0.values()[4], 0.25);
    }

    #[test]
    fn weights_are_counts_and_bad_options_are_named() {
        let (s, y) = ([0.1, 0.9, 0.95], [true, false, true]);
        let o = opts(2, BinStrategy::EqualWidth, BinPrior::None);
        let (m, _) = fit_binary(&s, &y, Some(&[1.0, 3.0, 1.0]), &o).unwrap();
        assert_eq!(m.values(), [1.0, 0.25]);
        let (u, du) = fit_binary(&s, &y, Some(&[1.0; 3]), &o).unwrap();
        assert_eq!((u, du), fit_binary(&s, &y, None, &o).unwrap());
        let err = fit_binary(
            &s,
            &y,
            None,
            &opts(0, BinStrategy::EqualMass, BinPrior::None),
        );
        assert!(matches!(err, Err(FitError::BadOption { name: "bins", .. })));
        let bad = opts(
            2,
            BinStrategy::EqualWidth,
            BinPrior::Beta { a: 0.0, b: 1.0 },
        );
        assert!(fit_binary(&s, &y, None, &bad)
            .unwrap_err()
            .to_string()
            .contains("beta(0, 1)"));
        let err = fit_binary(&[0.2, -0.1], &[true, false], None, &o).unwrap_err();
        assert!(err.to_string().contains("row 1: score -0.1"), "{err}");
    }

    proptest! {
        #[test]
        fn fitted_maps_are_valid_and_in_unit_interval(
            rows in prop::collection::vec((0u32..=20, any::<bool>()), 1..60),
            bins in 1usize..12,
            mass in any::<bool>(),
        ) {
            // Scores on a coarse grid so ties are common; 0 and 1 included.
            let s: Vec<f64> = rows.iter().map(|r| f64::from(r.0) / 20.0).collect();
            let y: Vec<bool> = rows.iter().map(|r| r.1).collect();
            let strategy = if mass { BinStrategy::EqualMass } else { BinStrategy::EqualWidth };
            for prior in [BinPrior::None, BinPrior::Laplace] {
                let (m, _) = fit_binary(&s, &y, None, &opts(bins, strategy, prior)).unwrap();
                prop_assert!(m.edges().len() <= bins + 1);
                for &v in &s {
                    let p = m.apply(v);
                    prop_assert!((0.0..=1.0).contains(&p));
                }
            }
        }
    }
}
