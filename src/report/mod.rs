//! The reviewer's report: one self-contained HTML file (inline SVG, no scripts, no network) that
//! shows what a calibration map does on labelled data, for a person to read and sign off.
//!
//! Two steps, both pure (no I/O, no clock):
//! 1. [`assemble`] evaluates the uncalibrated and calibrated probabilities of the same items with
//!    [`crate::eval`], applies the map's decision policy (per-class thresholds where set) and
//!    gathers everything the page shows into a [`Report`];
//! 2. [`render_html`] draws the charts with the plotters SVG backend and lays out the page.
//!
//! The page holds: the map's identity (model, version, digest, method, provenance); the policy
//! evidence in plain words; before/after reliability diagrams with the diagonal and a per-bin
//! count histogram under each; the confidence histogram with the thresholds; the risk–coverage
//! curve with the policy's operating point and the target risk; the metrics table with
//! percentile bootstrap intervals; and the per-class table.
//!
//! Colours are the Okabe–Ito palette (Okabe & Ito 2008, "Color Universal Design"), which stays
//! distinguishable under the common colour-vision deficiencies; uncalibrated and calibrated
//! series also differ by line style (dashed vs solid) so a grey print still tells them apart.

mod charts;
mod data;
mod format;
mod html;
mod policy;
mod style;

pub use data::{
    assemble, DataIdentity, MapIdentity, MetricRow, Report, ReportInput, SetView, Summary,
    HISTOGRAM_BINS, MAX_PROVENANCE_LINES, MAX_VALUE_CHARS, RISK_COVERAGE_POINTS,
};
pub use html::render_html;
pub use policy::{ClassRow, PolicyOutcome, PolicySection};

use crate::eval::{
    BootstrapConfig, EqualWidthBins, EvalError, DEFAULT_BINS, DEFAULT_LEVEL, DEFAULT_REPLICATES,
};

/// Why a report could not be made.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum ReportError {
    /// The probabilities or labels failed validation, or an evaluation setting is invalid.
    #[error("{which} probabilities: {source}")]
    Eval {
        /// "uncalibrated" or "calibrated".
        which: &'static str,
        /// What was wrong.
        source: EvalError,
    },
    /// A setting of the report itself is invalid.
    #[error("invalid report setting: {0}")]
    Setting(EvalError),
    /// The map and the data disagree.
    #[error("the data has {data} classes but map {map_version} has {map}")]
    Classes {
        /// Classes in the data.
        data: usize,
        /// Classes of the map.
        map: usize,
        /// The map's version, to name it.
        map_version: String,
    },
    /// A binomial bound did not converge (counts far beyond anything a file can hold).
    #[error("binomial bound for {what}: {message}")]
    Bound {
        /// Which figure.
        what: &'static str,
        /// The statistics error.
        message: String,
    },
    /// A chart could not be drawn.
    #[error("chart {chart}: {message}")]
    Chart {
        /// Which chart.
        chart: &'static str,
        /// The drawing backend's message.
        message: String,
    },
}

/// How the report evaluates: equal-width bins for the reliability diagrams and ECE, the
/// bootstrap for the metric intervals (none: point values only) and the level of the binomial
/// intervals and bounds of the policy section.
#[derive(Debug, Clone, PartialEq)]
pub struct ReportSettings {
    bins: EqualWidthBins,
    bootstrap: Option<BootstrapConfig>,
    level: f64,
}

impl ReportSettings {
    /// `n_bins` equal-width bins (1..=[`crate::eval::MAX_BINS`]) and an optional bootstrap;
    /// binomial intervals at the bootstrap's level, or [`DEFAULT_LEVEL`] without one.
    ///
    /// # Errors
    /// [`ReportError::Setting`] for a bin count outside its range.
    pub fn try_new(n_bins: usize, bootstrap: Option<BootstrapConfig>) -> Result<Self, ReportError> {
        let bins = EqualWidthBins::try_new(n_bins).map_err(ReportError::Setting)?;
        let level = bootstrap.map_or(DEFAULT_LEVEL, |b| b.level());
        Ok(Self {
            bins,
            bootstrap,
            level,
        })
    }

    /// The equal-width bins.
    pub fn bins(&self) -> &EqualWidthBins {
        &self.bins
    }

    /// The bootstrap, if intervals are wanted.
    pub fn bootstrap(&self) -> Option<&BootstrapConfig> {
        self.bootstrap.as_ref()
    }

    /// Level of the binomial intervals and one-sided bounds, in (0, 1).
    pub fn level(&self) -> f64 {
        self.level
    }
}

impl Default for ReportSettings {
    /// 15 bins, no bootstrap, 95% binomial intervals.
    fn default() -> Self {
        Self {
            bins: EqualWidthBins::default(),
            bootstrap: None,
            level: DEFAULT_LEVEL,
        }
    }
}

/// The bin count used when none is given (the evaluation default, M = 15).
pub const DEFAULT_REPORT_BINS: usize = DEFAULT_BINS;

/// Most resampled items (n × R) per evaluated set when no replicate count is given, so that a
/// report on a million items stays within seconds (`benches/report.rs`): R is lowered to fit,
/// never below [`MIN_DEFAULT_REPLICATES`]. Up to 50,000 items keep the full 1,000 replicates.
pub const DEFAULT_BOOTSTRAP_DRAWS: usize = 50_000_000;
/// Fewest replicates the default lowers R to; fewer would leave the 95% ends too rough.
pub const MIN_DEFAULT_REPLICATES: usize = 50;

/// Bootstrap replicates for `n` items: the explicit choice, or [`DEFAULT_REPLICATES`] lowered
/// so that n × R stays within [`DEFAULT_BOOTSTRAP_DRAWS`] (never below
/// [`MIN_DEFAULT_REPLICATES`]).
pub fn replicates_for(n: usize, explicit: Option<usize>) -> usize {
    explicit.unwrap_or_else(|| {
        (DEFAULT_BOOTSTRAP_DRAWS / n.max(1)).clamp(MIN_DEFAULT_REPLICATES, DEFAULT_REPLICATES)
    })
}

#[cfg(test)]
mod page_tests;
#[cfg(test)]
mod tests;
