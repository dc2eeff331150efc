//! The standard metric set of an evaluation report — n, accuracy, ECE, adaptive ECE, MCE,
//! classwise ECE, NLL, Brier, AURC, coverage and accepted accuracy at θ — with percentile
//! bootstrap intervals computed in one evaluation per replicate (METHODS.md 1.9).

use super::bins::DEFAULT_BINS;
use super::bootstrap::check_level;
use super::calibration::check_groups;
use super::multinomial::{ChunkedMultinomial, CHUNKED_RNG_NAME, MAX_ITEMS};
use super::replicate::Prepared;
use super::selective::check_threshold;
use super::sweep::Sweep;
use super::{
    percentile_interval, BootstrapConfig, EqualWidthBins, EvalError, IndexMatrix, Predictions,
};
use serde::Serialize;

/// Equal-mass group count used when none is given (the same as the bin count).
pub const DEFAULT_ADAPTIVE_GROUPS: usize = DEFAULT_BINS;

/// Settings of the standard set: equal-width bins (ECE, MCE, classwise ECE), equal-mass
/// groups (adaptive ECE) and the acceptance threshold θ (accept iff confidence ≥ θ).
#[derive(Debug, Clone, PartialEq)]
pub struct StandardSettings {
    bins: EqualWidthBins,
    adaptive_groups: usize,
    threshold: f64,
}

impl StandardSettings {
    /// Validated settings.
    ///
    /// # Errors
    /// [`EvalError::Setting`] for a bin count outside 1..=[`super::MAX_BINS`], a group count of
    /// 0, or a NaN threshold.
    pub fn try_new(
        n_bins: usize,
        adaptive_groups: usize,
        threshold: f64,
    ) -> Result<Self, EvalError> {
        check_groups(adaptive_groups)?;
        check_threshold(threshold)?;
        Ok(Self {
            bins: EqualWidthBins::try_new(n_bins)?,
            adaptive_groups,
            threshold,
        })
    }

    /// 15 equal-width bins and 15 equal-mass groups with the given threshold.
    ///
    /// # Errors
    /// [`EvalError::Setting`] if `threshold` is NaN.
    pub fn with_threshold(threshold: f64) -> Result<Self, EvalError> {
        Self::try_new(DEFAULT_BINS, DEFAULT_ADAPTIVE_GROUPS, threshold)
    }

    /// The equal-width bins.
    pub fn bins(&self) -> &EqualWidthBins {
        &self.bins
    }

    /// Number of equal-mass groups B.
    pub fn adaptive_groups(&self) -> usize {
        self.adaptive_groups
    }

    /// Acceptance threshold θ.
    pub fn threshold(&self) -> f64 {
        self.threshold
    }
}

/// Point values of the standard set on one sample.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct StandardMetrics {
    /// Number of items.
    pub n: usize,
    /// Top-label accuracy.
    pub accuracy: f64,
    /// Top-label ECE on the equal-width bins.
    pub ece: f64,
    /// ECE on equal-mass groups (array_split sizes).
    pub adaptive_ece: f64,
    /// MCE on the equal-width bins.
    pub mce: f64,
    /// Classwise ECE on the equal-width bins.
    pub classwise_ece: f64,
    /// NLL in nats, probabilities clipped to [ε_mach, 1 − ε_mach].
    pub nll: f64,
    /// Multi-class Brier score, not halved.
    pub brier: f64,
    /// AURC (mean risk over the stable descending order).
    pub aurc: f64,
    /// Fraction of items with confidence ≥ θ.
    pub coverage: f64,
    /// Accuracy of the accepted items; `None` if none is accepted.
    pub accepted_accuracy: Option<f64>,
}

/// A point value with its percentile bootstrap interval.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct MetricSummary {
    /// Value on the full evaluation set.
    pub value: f64,
    /// Lower end of the interval.
    pub low: f64,
    /// Upper end of the interval.
    pub high: f64,
}

/// How the intervals of a report were made.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct BootstrapInfo {
    /// Number of replicates R.
    pub replicates: usize,
    /// Interval level, e.g. 0.95.
    pub level: f64,
    /// Seed of the replicate streams; `None` for injected indices.
    pub seed: Option<u64>,
    /// The RNG and stream scheme, or "injected index matrix".
    pub rng: &'static str,
}

/// The standard set with intervals, settings and bootstrap provenance.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct StandardReport {
    /// Number of items.
    pub n: usize,
    /// Top-label accuracy.
    pub accuracy: MetricSummary,
    /// Top-label ECE.
    pub ece: MetricSummary,
    /// Adaptive (equal-mass) ECE.
    pub adaptive_ece: MetricSummary,
    /// MCE.
    pub mce: MetricSummary,
    /// Classwise ECE.
    pub classwise_ece: MetricSummary,
    /// NLL in nats.
    pub nll: MetricSummary,
    /// Multi-class Brier score, not halved.
    pub brier: MetricSummary,
    /// AURC.
    pub aurc: MetricSummary,
    /// Coverage at θ.
    pub coverage: MetricSummary,
    /// Accuracy of accepted items; `None` if no item is accepted on the full set or in any
    /// replicate.
    pub accepted_accuracy: Option<MetricSummary>,
    /// Replicates without any accepted item (skipped for `accepted_accuracy`).
    pub accepted_accuracy_skipped: usize,
    /// Number of equal-width bins M.
    pub n_bins: usize,
    /// Number of equal-mass groups B.
    pub adaptive_groups: usize,
    /// Acceptance threshold θ.
    pub threshold: f64,
    /// Bootstrap provenance.
    pub bootstrap: BootstrapInfo,
}

/// Point values of the standard set (the same engine as the bootstrap, all weights 1).
pub fn standard_metrics(p: &Predictions<'_>, settings: &StandardSettings) -> StandardMetrics {
    Prepared::new(p, settings).evaluate(&vec![1; p.n()], &mut Vec::new())
}

/// The standard set with percentile bootstrap intervals. Replicate r is the multinomial
/// bootstrap (n items drawn with replacement) with its counts drawn chunk by chunk from stream
/// (seed, r) ([`CHUNKED_RNG_NAME`]), and all replicates are evaluated in blocks, one sweep over
/// the items per block. Results depend on the seed only, not on the thread count.
///
/// # Errors
/// [`EvalError::Setting`] for more than 2³² − 1 items; [`EvalError::Thread`] if a worker
/// thread cannot start.
pub fn standard_report(
    p: &Predictions<'_>,
    settings: &StandardSettings,
    config: &BootstrapConfig,
) -> Result<StandardReport, EvalError> {
    if p.n() > MAX_ITEMS {
        return Err(EvalError::Setting {
            what: "bootstrap item count",
            value: p.n() as f64,
            rule: "must be at most 4294967295",
        });
    }
    let sweep = Sweep::new(p, settings);
    let draw = ChunkedMultinomial::new(p.n(), config.seed());
    let replicates = sweep.run(&draw, config.replicates(), config.threads())?;
    let info = BootstrapInfo {
        replicates: config.replicates(),
        level: config.level(),
        seed: Some(config.seed()),
        rng: CHUNKED_RNG_NAME,
    };
    let point = sweep.prepared().evaluate(&vec![1; p.n()], &mut Vec::new());
    assemble(point, settings, &replicates, info)
}

/// The standard set with intervals from injected resampling indices (e.g. made by numpy).
///
/// # Errors
/// [`EvalError::Length`] if the matrix is for a different n; [`EvalError::Setting`] if
/// `level` is not strictly between 0 and 1.
pub fn standard_report_with_indices(
    p: &Predictions<'_>,
    settings: &StandardSettings,
    level: f64,
    indices: &IndexMatrix,
) -> Result<StandardReport, EvalError> {
    check_level(level)?;
    if indices.n() != p.n() {
        return Err(EvalError::Length {
            what: "bootstrap index rows",
            expected: p.n(),
            got: indices.n(),
        });
    }
    let prepared = Prepared::new(p, settings);
    let (mut w, mut gathered) = (vec![0u32; p.n()], Vec::with_capacity(p.n()));
    let replicates: Vec<StandardMetrics> = (0..indices.replicates())
        .map(|r| {
            w.iter_mut().for_each(|c| *c = 0);
            indices.row(r).iter().for_each(|&i| w[i] += 1);
            prepared.evaluate(&w, &mut gathered)
        })
        .collect();
    let info = BootstrapInfo {
        replicates: indices.replicates(),
        level,
        seed: None,
        rng: "injected index matrix",
    };
    let point = prepared.evaluate(&vec![1; prepared.n()], &mut Vec::new());
    assemble(point, settings, &replicates, info)
}

/// Point values plus one interval per metric from the replicate values.
fn assemble(
    point: StandardMetrics,
    settings: &StandardSettings,
    reps: &[StandardMetrics],
    info: BootstrapInfo,
) -> Result<StandardReport, EvalError> {
    let level = info.level;
    let summary =
        |value: f64, get: fn(&StandardMetrics) -> f64| -> Result<MetricSummary, EvalError> {
            let values: Vec<f64> = reps.iter().map(get).collect();
            let (low, high) = percentile_interval(&values, level)?.unwrap_or((f64::NAN, f64::NAN));
            Ok(MetricSummary { value, low, high })
        };
    let accepted: Vec<f64> = reps.iter().filter_map(|m| m.accepted_accuracy).collect();
    let accepted_interval = percentile_interval(&accepted, level)?;
    Ok(StandardReport {
        n: point.n,
        accuracy: summary(point.accuracy, |m| m.accuracy)?,
        ece: summary(point.ece, |m| m.ece)?,
        adaptive_ece: summary(point.adaptive_ece, |m| m.adaptive_ece)?,
        mce: summary(point.mce, |m| m.mce)?,
        classwise_ece: summary(point.classwise_ece, |m| m.classwise_ece)?,
        nll: summary(point.nll, |m| m.nll)?,
        brier: summary(point.brier, |m| m.brier)?,
        aurc: summary(point.aurc, |m| m.aurc)?,
        coverage: summary(point.coverage, |m| m.coverage)?,
        accepted_accuracy: point
            .accepted_accuracy
            .zip(accepted_interval)
            .map(|(value, (low, high))| MetricSummary { value, low, high }),
        accepted_accuracy_skipped: reps.len() - accepted.len(),
        n_bins: settings.bins().n_bins(),
        adaptive_groups: settings.adaptive_groups(),
        threshold: settings.threshold(),
        bootstrap: info,
    })
}

#[cfg(test)]
#[path = "standard_tests.rs"]
mod tests;
