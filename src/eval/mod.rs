//! Calibration quality of predicted probabilities: accuracy, binned calibration errors (ECE, MCE,
//! ECE_p, adaptive and classwise ECE, debiased CE²), proper scores (NLL, Brier), reliability-diagram
//! data, risk–coverage curves with AURC, percentile bootstrap intervals, and drift statistics of
//! the confidence distribution (KS, PSI). The formulas and conventions are those of METHODS.md
//! sections 1, 3.9 and 4.4.
//!
//! Sources: ECE and MCE — Naeini, Cooper & Hauskrecht 2015 (AAAI); 15-bin top-label ECE — Guo,
//! Pleiss, Sun & Weinberger 2017 (ICML); equal-mass binning — Nixon, Dusenberry, Zhang, Jerfel &
//! Tran 2019 (CVPR Workshops); classwise ECE — Kull et al. 2019 (NeurIPS); debiased CE² — Kumar,
//! Liang & Ma 2019 (NeurIPS); Brier 1950 (Monthly Weather Review); AURC and E-AURC — Geifman,
//! Uziel & El-Yaniv 2019 (ICLR); bootstrap — Efron 1979 (Annals of Statistics) and Efron &
//! Tibshirani 1993; two-sample KS — Kolmogorov 1933, Smirnov 1948, with Stephens' small-sample
//! correction; PSI — common practice in credit-risk monitoring.
//!
//! Conventions pinned down here (METHODS.md 5.2):
//! - equal-width bins are right-closed, `[0, e₁]`, `(e_m, e_{m+1}]`, with edges computed as
//!   numpy.linspace does (`m · (1/M)`, last edge exactly 1), matching
//!   sklearn.calibration.calibration_curve;
//! - equal-mass groups follow numpy.array_split (the first `n mod B` groups hold one extra item);
//! - ties in confidence keep input order (stable sorts);
//! - NLL from probabilities clips to `[ε_mach, 1 − ε_mach]` like sklearn.metrics.log_loss and never
//!   renormalises rows;
//! - the multi-class Brier score is not halved; [`brier_binary`] gives the halved binary form;
//! - bootstrap quantiles use numpy's default 'linear' rule;
//! - [`standard_report`] draws each replicate's multinomial counts chunk by chunk
//!   ([`CHUNKED_RNG_NAME`]) and evaluates blocks of replicates in one sweep over the items
//!   sorted once; the law is that of drawing n indices with replacement, the random stream is
//!   not [`resample_indices`]'s.
//!
//! Entry point: validate probabilities and labels once with [`Predictions::try_new`], then call
//! the metric functions, or [`standard_report`] for the usual set with bootstrap intervals.

mod bins;
mod bootstrap;
mod calibration;
mod drift;
#[cfg(test)]
mod fixtures;
mod ks_distribution;
mod multinomial;
mod order;
mod predictions;
mod replicate;
mod scores;
mod selective;
mod standard;
mod sweep;
mod sweep_block;

pub use bins::{reliability_diagram, EqualWidthBins, ReliabilityBin, DEFAULT_BINS, MAX_BINS};
pub use bootstrap::{
    bootstrap, bootstrap_with_indices, percentile_interval, quantile_linear, resample_indices,
    BootstrapConfig, IndexMatrix, Replicates, DEFAULT_LEVEL, DEFAULT_REPLICATES, RNG_NAME,
};
pub use calibration::{
    adaptive_ece, classwise_ece, ece, ece_lp, mce, rms_calibration_error,
    squared_calibration_error, SquaredCalibrationError,
};
pub use drift::{
    ks_two_sample, psi, psi_from_proportions, KsMethod, KsTest, Psi, PsiConfig, PSI_DEFAULT_BINS,
    PSI_EPSILON,
};
pub use multinomial::CHUNKED_RNG_NAME;
pub use predictions::{Predictions, ROW_SUM_TOLERANCE};
pub use scores::{accuracy, brier, brier_binary, nll, nll_from_logits, NLL_CLIP};
pub use selective::{accept_stats, aurc, risk_coverage, AcceptStats, Aurc, RiskCoverage};
pub use standard::{
    standard_metrics, standard_report, standard_report_with_indices, BootstrapInfo, MetricSummary,
    StandardMetrics, StandardReport, StandardSettings, DEFAULT_ADAPTIVE_GROUPS,
};

/// Everything that can be wrong with the inputs of an evaluation; each variant names the bad
/// value and where it is.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum EvalError {
    /// No items to evaluate (n = 0).
    #[error("no items to evaluate: {what} is empty")]
    Empty {
        /// Which input was empty.
        what: &'static str,
    },
    /// Fewer than two classes.
    #[error("need at least 2 classes, got {n_classes}")]
    TooFewClasses {
        /// The class count given.
        n_classes: usize,
    },
    /// A flat array does not have the length its shape implies.
    #[error("{what} has {got} values, expected {expected}")]
    Length {
        /// Which input.
        what: &'static str,
        /// Length implied by the other inputs.
        expected: usize,
        /// Length received.
        got: usize,
    },
    /// A label is not a valid class index.
    #[error("label {label} at item {item} is not below the class count {n_classes}")]
    LabelOutOfRange {
        /// Item index.
        item: usize,
        /// The label found.
        label: u32,
        /// Number of classes.
        n_classes: usize,
    },
    /// A value that must be finite is NaN or infinite.
    #[error("{what} at item {item}, column {column} is not finite: {value}")]
    NonFinite {
        /// Which input.
        what: &'static str,
        /// Item (row) index.
        item: usize,
        /// Column (class) index; 0 for one-dimensional inputs.
        column: usize,
        /// The value found.
        value: f64,
    },
    /// A probability outside [0, 1].
    #[error("probability at item {item}, class {class} is {value}, outside [0, 1]")]
    ProbabilityRange {
        /// Item index.
        item: usize,
        /// Class index.
        class: usize,
        /// The value found.
        value: f64,
    },
    /// A row of probabilities does not sum to 1 within [`ROW_SUM_TOLERANCE`].
    #[error("probabilities of item {item} sum to {sum}, not 1 (tolerance {tolerance})")]
    RowSum {
        /// Item index.
        item: usize,
        /// The row sum found.
        sum: f64,
        /// The tolerance applied.
        tolerance: f64,
    },
    /// A setting (bin count, level, threshold, exponent …) outside its valid range.
    #[error("invalid {what}: {value} ({rule})")]
    Setting {
        /// Which setting.
        what: &'static str,
        /// The value given, as f64.
        value: f64,
        /// The rule it breaks.
        rule: &'static str,
    },
    /// An injected bootstrap index is not below n.
    #[error("bootstrap index {index} in replicate {replicate}, position {position} is not below n = {n}")]
    IndexOutOfRange {
        /// Replicate (row of the index matrix).
        replicate: usize,
        /// Position within the replicate.
        position: usize,
        /// The index found.
        index: usize,
        /// Number of items.
        n: usize,
    },
    /// A worker thread of the bootstrap could not be started.
    #[error("could not start bootstrap worker thread: {reason}")]
    Thread {
        /// The operating system's message.
        reason: String,
    },
}
