//! Fitting Bayesian Binning into Quantiles (Naeini, Cooper & Hauskrecht 2015, AAAI, "Obtaining
//! well calibrated probabilities using Bayesian binning"; METHODS.md 2.9).
//!
//! Each model is an equal-mass binning of the sorted probability scores (the cut and edge rule
//! of histogram binning, `super::histogram`, ties kept together). Its evidence is the
//! Beta–Binomial marginal likelihood with prior strength N' split evenly over its B bins and
//! prior means at the bin midpoints; models are averaged with weights ∝ evidence (uniform model
//! prior, log-sum-exp). Bin values are Beta posterior means. B counts the bins a model really
//! has after ties. Partitions already produced by a smaller B are dropped, and so are models
//! whose weight underflows to exactly 0 (they add nothing to a prediction).
//!
//! Weights turn counts into weighted counts (the evidence then takes real arguments in lnΓ).

use std::collections::BTreeSet;

use super::histogram::equal_mass_edges;
use super::ovr::{check_binary, cross_entropy, identity_log_loss, weight_at};
use super::{FitDiagnostics, FitError};
use crate::method::{Bbq, BbqModel, BinaryMap};

/// Prior strength N' of the paper's BDeu-style score (METHODS.md 2.9, from memory there).
pub const PRIOR_STRENGTH: f64 = 2.0;
/// C in the paper's model range B = ⌊N^{1/3}/C⌋ … ⌈C·N^{1/3}⌉ (METHODS.md 2.9).
pub const SPREAD: f64 = 10.0;

const METHOD: &str = "BBQ";

/// Options of a BBQ fit.
#[derive(Debug, Clone, Default, PartialEq, Eq)]
pub struct BbqOptions {
    /// Explicit bin counts to average over; `None` uses the paper's range capped at the number
    /// of distinct scores.
    pub bins: Option<Vec<usize>>,
}

/// One scored binning model.
#[derive(Debug, Clone, PartialEq)]
struct Scored {
    edges: Vec<f64>,
    values: Vec<f64>,
    log_evidence: f64,
}

/// Fits a BBQ map of probability scores to 0/1 labels with optional weights. Diagnostics report
/// the mean NLL of the identity map and of the averaged map on the calibration set.
///
/// # Errors
/// [`FitError::Empty`], [`FitError::LengthMismatch`], [`FitError::NonFinite`] for a score,
/// [`FitError::NotApplicable`] for a score outside [0, 1], [`FitError::BadOption`] for an
/// explicit bin count of 0, an empty list, or bad weights.
pub fn fit_binary(
    scores: &[f64],
    positive: &[bool],
    weights: Option<&[f64]>,
    options: &BbqOptions,
) -> Result<(Bbq, FitDiagnostics), FitError> {
    let total = check_binary(METHOD, scores, positive.len(), weights, true)?;
    let mut order: Vec<usize> = (0..scores.len()).collect();
    order.sort_by(|&a, &b| scores[a].total_cmp(&scores[b]));
    let sorted: Vec<f64> = order.iter().map(|&i| scores[i]).collect();
    let bins = match &options.bins {
        Some(list) => check_bins(list)?,
        None => paper_bins(&sorted),
    };
    // Prefix sums of weight and positive weight in sorted order: a bin's counts in O(1).
    let (mut cum_w, mut cum_m) = (vec![0.0], vec![0.0]);
    for &i in &order {
        let w = weight_at(weights, i);
        cum_w.push(cum_w[cum_w.len() - 1] + w);
        cum_m.push(cum_m[cum_m.len() - 1] + if positive[i] { w } else { 0.0 });
    }
    let mut seen = BTreeSet::new();
    let mut models = Vec::new();
    for &b in &bins {
        let (cuts, edges) = equal_mass_edges(&sorted, b);
        if seen.insert(cuts.clone()) {
            models.push(score_model(&cuts, edges, &cum_w, &cum_m));
        }
    }
    let considered = models.len();
    let weights_m = posterior_weights(&models);
    let kept: Vec<BbqModel> = models
        .into_iter()
        .zip(weights_m)
        .filter(|(_, w)| *w > 0.0)
        .map(|(m, weight)| BbqModel {
            weight,
            edges: m.edges,
            values: m.values,
        })
        .collect();
    let mut diag = FitDiagnostics {
        converged: true,
        ..FitDiagnostics::default()
    };
    diag.flags.push(format!(
        "{} models kept of {considered} distinct partitions from B in {}..={}",
        kept.len(),
        bins.iter().min().copied().unwrap_or(0),
        bins.iter().max().copied().unwrap_or(0)
    ));
    let map = Bbq::try_new(kept, "bbq").map_err(FitError::InvalidResult)?;
    let target = |i: usize| if positive[i] { 1.0 } else { 0.0 };
    diag.objective_start = Some(identity_log_loss(scores, target, weights, total));
    let end: f64 = (0..scores.len())
        .map(|i| weight_at(weights, i) * cross_entropy(map.apply(scores[i]), target(i)))
        .sum();
    diag.objective_end = Some(end / total);
    Ok((map, diag))
}

fn check_bins(list: &[usize]) -> Result<Vec<usize>, FitError> {
    if list.is_empty() || list.contains(&0) {
        return Err(FitError::BadOption {
            name: "bins",
            value: format!("{list:?}"),
            reason: "needs at least one bin count, each >= 1".into(),
        });
    }
    Ok(list.to_vec())
}

/// B from max(1, ⌊N^{1/3}/C⌋) to ⌈C·N^{1/3}⌉, both capped at the number of distinct scores.
fn paper_bins(sorted: &[f64]) -> Vec<usize> {
    let distinct = 1 + sorted.windows(2).filter(|p| p[0] < p[1]).count();
    let root = (sorted.len() as f64).cbrt();
    let hi = ((SPREAD * root).ceil() as usize).clamp(1, distinct);
    let lo = ((root / SPREAD).floor() as usize).clamp(1, hi);
    (lo..=hi).collect()
}

/// Evidence ln P(D|M) and posterior-mean bin values of the model with these cuts.
fn score_model(cuts: &[usize], edges: Vec<f64>, cum_w: &[f64], cum_m: &[f64]) -> Scored {
    let bins = edges.len() - 1;
    let strength = PRIOR_STRENGTH / bins as f64;
    let n = cum_w.len() - 1;
    let mut log_evidence = 0.0;
    let mut values = Vec::with_capacity(bins);
    for b in 0..bins {
        let lo = if b == 0 { 0 } else { cuts[b - 1] };
        let hi = if b + 1 == bins { n } else { cuts[b] };
        let n_b = cum_w[hi] - cum_w[lo];
        let m_b = (cum_m[hi] - cum_m[lo]).clamp(0.0, n_b);
        let mean = (edges[b] + edges[b + 1]) / 2.0;
        let (alpha, beta) = (strength * mean, strength * (1.0 - mean));
        log_evidence += ln_gamma(strength) - ln_gamma(n_b + strength) + ln_gamma(m_b + alpha)
            - ln_gamma(alpha)
            + ln_gamma(n_b - m_b + beta)
            - ln_gamma(beta);
        values.push(((m_b + alpha) / (n_b + strength)).clamp(0.0, 1.0));
    }
    Scored {
        edges,
        values,
        log_evidence,
    }
}

/// w_M = exp(ℓ_M − max ℓ) / Σ exp(ℓ_M' − max ℓ).
fn posterior_weights(models: &[Scored]) -> Vec<f64> {
    let top = models
        .iter()
        .map(|m| m.log_evidence)
        .fold(f64::NEG_INFINITY, f64::max);
    let raw: Vec<f64> = models
        .iter()
        .map(|m| (m.log_evidence - top).exp())
        .collect();
    let sum: f64 = raw.iter().sum();
    raw.iter().map(|r| r / sum).collect()
}

/// Lanczos coefficients for g = 7, n = 9 (the widely reproduced set, relative error ~1e−15).
const LANCZOS: [f64; 9] = [
    0.999_999_999_999_809_9,
    676.520_368_121_885_1,
    -1_259.139_216_722_402_8,
    771.323_428_777_653_1,
    -176.615_029_162_140_6,
    12.507_343_278_686_905,
    -0.138_571_095_265_720_12,
    9.984_369_578_019_572e-6,
    1.505_632_735_149_311_6e-7,
];
/// Lanczos g.
const LANCZOS_G: f64 = 7.0;

/// ln Γ(x) for x > 0 (METHODS.md 0.2): Lanczos for x ≥ 0.5, ln Γ(x) = ln Γ(x + 1) − ln x below.
fn ln_gamma(x: f64) -> f64 {
    debug_assert!(x > 0.0);
    if x < 0.5 {
        return ln_gamma(x + 1.0) - x.ln();
    }
    let x = x - 1.0;
    let mut sum = LANCZOS[0];
    for (k, &c) in LANCZOS.iter().enumerate().skip(1) {
        sum += c / (x + k as f64);
    }
    let t = x + LANCZOS_G + 0.5;
    0.5 * (2.0 * std::f64::consts::PI).ln() + (x + 0.5) * t.ln() - t + sum.ln()
}

#[cfg(test)]
mod tests {
    use super::*;
    use proptest::prelude::*;

    /// METHODS.md E7 scores and labels (already sorted).
    const S: [f64; 10] = [0.05, 0.15, 0.22, 0.35, 0.41, 0.52, 0.63, 0.71, 0.84, 0.93];
    const Y: [bool; 10] = [
        false, false, true, false, false, true, false, true, true, true,
    ];

    fn close(got: f64, want: f64, rel: f64) -> bool {
        (got - want).abs() <= rel * want.abs().max(1e-300)
    }

    #[test]
    fn ln_gamma_matches_scipy() {
        // scipy.special.gammaln: METHODS.md 0.2 gives the first three; the rest computed with
        // gammaln([1e-6, 2.5, 0.001, 170.5, 3.7]) (scipy 1.17.1).
        let cases = [
            (0.5, 0.5723649429247),
            (10.3, 13.482036786138359),
            (1e6, 12815504.569147611),
            (1e-6, 13.81550998074943),
            (2.5, 0.2846828704729192),
            (0.001, 6.907178885383853),
            (170.5, 704.0044277342047),
            (3.7, 1.428072326665388),
        ];
        for (x, want) in cases {
            assert!(
                close(ln_gamma(x), want, 1e-13),
                "lnΓ({x}) = {} vs {want}",
                ln_gamma(x)
            );
        }
        // lnΓ(1) = lnΓ(2) = 0: absolute error only.
        assert!(ln_gamma(1.0).abs() < 1e-14 && ln_gamma(2.0).abs() < 1e-14);
    }

    #[test]
    fn worked_example_e7_table() {
        // METHODS.md E7 (direct implementation, scipy.special.gammaln); full-precision values
        // from re-running that transcription: edges, ln P(D|M), θ per model.
        let (mut cw, mut cm) = (vec![0.0], vec![0.0]);
        for &y in &Y {
            cw.push(cw[cw.len() - 1] + 1.0);
            cm.push(cm[cm.len() - 1] + if y { 1.0 } else { 0.0 });
        }
        let table: [(usize, &[f64], f64, &[f64]); 4] = [
            (1, &[0.0, 1.0], -7.927324360309796, &[0.5]),
            (
                2,
                &[0.0, 0.46499999999999997, 1.0],
                -7.142610190287147,
                &[0.20541666666666666, 0.78875],
            ),
            (
                3,
                &[0.0, 0.285, 0.575, 1.0],
                -10.164128905978341,
                &[0.29863636363636364, 0.3509090909090909, 0.7553571428571428],
            ),
            (
                5,
                &[0.0, 0.185, 0.38, 0.575, 0.7749999999999999, 1.0],
                -8.535505400868699,
                &[
                    0.015416666666666667,
                    0.46375,
                    0.49625,
                    0.5291666666666667,
                    0.98125,
                ],
            ),
        ];
        for (b, edges, evidence, theta) in table {
            let (cuts, e) = equal_mass_edges(&S, b);
            let m = score_model(&cuts, e, &cw, &cm);
            assert_eq!(m.edges, edges, "B = {b}");
            assert!(
                close(m.log_evidence, evidence, 1e-13),
                "B = {b}: {}",
                m.log_evidence
            );
            for (g, w) in m.values.iter().zip(theta) {
                assert!(close(*g, *w, 1e-14), "B = {b}: {g} vs {w}");
            }
        }
    }

    #[test]
    fn worked_example_e7_weights_and_predictions() {
        // METHODS.md E7: weights [0.26022, 0.57034, 0.02779, 0.14165] (full precision from the
        // transcription: 0.2602188117255058, 0.5703424846565155, 0.027791169183779395,
        // 0.14164753443419914); P(0.1) = 0.2577504444, P(0.5) = 0.6600118035,
        // P(0.9) = 0.7399509420.
        let o = BbqOptions {
            bins: Some(vec![1, 2, 3, 5]),
        };
        let (m, d) = fit_binary(&S, &Y, None, &o).unwrap();
        let want = [
            0.2602188117255058,
            0.5703424846565155,
            0.027791169183779395,
            0.14164753443419914,
        ];
        assert_eq!(m.models().len(), 4);
        for (model, w) in m.models().iter().zip(want) {
            assert!(close(model.weight, w, 1e-12), "{} vs {w}", model.weight);
        }
        for (s, p) in [
            (0.1, 0.2577504444),
            (0.5, 0.6600118035),
            (0.9, 0.7399509420),
        ] {
            assert!((m.apply(s) - p).abs() < 1e-10, "P({s}) = {}", m.apply(s));
        }
        // Mean NLL of the averaged map on the 10 points, same transcription: 0.5054061287484206
        // (above the identity's 0.4923948744366847: BBQ does not contain the identity).
        assert!(close(d.objective_end.unwrap(), 0.5054061287484206, 1e-12));
    }

    #[test]
    fn paper_model_range_and_duplicates() {
        // n = 10: ⌊10^{1/3}/10⌋ = 0 → 1, ⌈10·10^{1/3}⌉ = 22 → capped at 10 distinct scores.
        assert_eq!(paper_bins(&S), (1..=10).collect::<Vec<_>>());
        // n = 1000 distinct: 1 ..= 100.
        let many: Vec<f64> = (0..1000).map(|i| f64::from(i) / 1000.0).collect();
        assert_eq!(paper_bins(&many), (1..=100).collect::<Vec<_>>());
        // Constant scores: every B collapses to one bin, one model, its posterior mean
        // (m + N'·0.5)/(n + N') = (2 + 1)/(5 + 2).
        let y = [true, false, true, false, false];
        let o = BbqOptions {
            bins: Some(vec![1, 2, 3, 4]),
        };
        let (m, _) = fit_binary(&[0.3; 5], &y, None, &o).unwrap();
        assert_eq!(m.models().len(), 1);
        assert!(close(m.apply(0.3), 3.0 / 7.0, 1e-15));
    }

    #[test]
    fn one_class_absent_shrinks_toward_prior_means() {
        let s = [0.1, 0.2, 0.6, 0.9];
        let (m, _) = fit_binary(&s, &[true; 4], None, &BbqOptions::default()).unwrap();
        for &v in &s {
            let p = m.apply(v);
            assert!(p > 0.5 && p < 1.0, "{p}");
        }
        let err = fit_binary(
            &s,
            &[true; 4],
            None,
            &BbqOptions {
                bins: Some(vec![0]),
            },
        );
        assert!(matches!(err, Err(FitError::BadOption { name: "bins", .. })));
    }

    #[test]
    fn unit_weights_equal_the_unweighted_fit() {
        let o = BbqOptions::default();
        let plain = fit_binary(&S, &Y, None, &o).unwrap();
        assert_eq!(plain, fit_binary(&S, &Y, Some(&[1.0; 10]), &o).unwrap());
    }

    proptest! {
        #[test]
        fn outputs_are_probabilities(
            rows in prop::collection::vec((0u32..=50, any::<bool>()), 1..80)
        ) {
            let s: Vec<f64> = rows.iter().map(|r| f64::from(r.0) / 50.0).collect();
            let y: Vec<bool> = rows.iter().map(|r| r.1).collect();
            let (m, _) = fit_binary(&s, &y, None, &BbqOptions::default()).unwrap();
            let total: f64 = m.models().iter().map(|x| x.weight).sum();
            prop_assert!((total - 1.0).abs() < 1e-12);
            for q in 0..=20 {
                let p = m.apply(f64::from(q) / 20.0);
                prop_assert!(p > 0.0 && p < 1.0, "{p}");
            }
        }
    }
}
