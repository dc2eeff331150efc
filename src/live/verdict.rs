//! The live state judged in words: is the map's promise kept, has the traffic drifted.

use super::estimate::BinnedDrift;
use super::{AuditedAccuracy, LiveQuality, MIN_AUDITED, MIN_DRIFT_ITEMS};
use serde::{Deserialize, Serialize};

/// PSI at or above this is a moderate shift (rule of thumb, common practice, METHODS.md 4.4).
pub const PSI_MODERATE: f64 = 0.1;
/// PSI at or above this is a large shift (rule of thumb, common practice, METHODS.md 4.4).
pub const PSI_LARGE: f64 = 0.25;

/// Whether the accuracy promised for accepted items holds, by the audit sample.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Promise {
    /// The map states no target accuracy.
    NoTarget,
    /// Fewer than [`MIN_AUDITED`] audited accepted items have a label.
    TooFewAudits,
    /// The whole interval lies at or above the target.
    Kept,
    /// The whole interval lies below the target.
    Broken,
    /// The target lies inside the interval: more audits are needed to tell.
    Uncertain,
}

impl Promise {
    /// Judges `accuracy` against `target`.
    pub fn judge(target: Option<f64>, accuracy: Option<&AuditedAccuracy>) -> Self {
        let Some(t) = target else {
            return Promise::NoTarget;
        };
        match accuracy {
            Some(a) if a.n >= MIN_AUDITED => {
                if a.lower >= t {
                    Promise::Kept
                } else if a.upper < t {
                    Promise::Broken
                } else {
                    Promise::Uncertain
                }
            }
            _ => Promise::TooFewAudits,
        }
    }

    /// The label value used in telemetry.
    pub fn name(self) -> &'static str {
        match self {
            Promise::NoTarget => "no_target",
            Promise::TooFewAudits => "too_few_audits",
            Promise::Kept => "kept",
            Promise::Broken => "broken",
            Promise::Uncertain => "uncertain",
        }
    }

    /// Every state, for exposing one gauge per state.
    pub const ALL: [Promise; 5] = [
        Promise::NoTarget,
        Promise::TooFewAudits,
        Promise::Kept,
        Promise::Broken,
        Promise::Uncertain,
    ];
}

/// Drift of the confidence distribution, judged on PSI.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum DriftLevel {
    /// The map carries no fit-time reference.
    NoReference,
    /// Fewer than [`MIN_DRIFT_ITEMS`] decisions in the window.
    TooFewItems,
    /// PSI below 0.1.
    Stable,
    /// PSI in [0.1, 0.25).
    Moderate,
    /// PSI of 0.25 or more.
    Large,
}

impl DriftLevel {
    /// Judges the drift of a window of `n` decisions.
    pub fn judge(has_reference: bool, n: u64, drift: Option<&BinnedDrift>) -> Self {
        if !has_reference {
            return DriftLevel::NoReference;
        }
        match drift {
            Some(d) if n >= MIN_DRIFT_ITEMS => {
                if d.psi >= PSI_LARGE {
                    DriftLevel::Large
                } else if d.psi >= PSI_MODERATE {
                    DriftLevel::Moderate
                } else {
                    DriftLevel::Stable
                }
            }
            _ => DriftLevel::TooFewItems,
        }
    }

    /// True when the drift calls for a look (moderate or large).
    pub fn flagged(self) -> bool {
        matches!(self, DriftLevel::Moderate | DriftLevel::Large)
    }
}

fn pct(x: f64) -> String {
    format!("{:.1}%", 100.0 * x)
}

/// The state of one window in plain sentences, most important first.
pub fn verdict_lines(q: &LiveQuality) -> Vec<String> {
    let mut out = Vec::new();
    let level = pct(q.confidence_level);
    match (q.promise, q.target_accuracy, &q.accepted_accuracy) {
        (Promise::Kept, Some(t), Some(a)) => out.push(format!(
            "PROMISE KEPT: accepted items are {} accurate by {} audited items ({level} interval {}–{}), at or above the target {}.",
            pct(a.estimate), a.n, pct(a.lower), pct(a.upper), pct(t)
        )),
        (Promise::Broken, Some(t), Some(a)) => out.push(format!(
            "PROMISE BROKEN: accepted items are {} accurate by {} audited items ({level} interval {}–{}), below the target {}. Stop auto-accepting or refit the map.",
            pct(a.estimate), a.n, pct(a.lower), pct(a.upper), pct(t)
        )),
        (Promise::Uncertain, Some(t), Some(a)) => out.push(format!(
            "NOT YET KNOWN: accepted items are {} accurate by {} audited items ({level} interval {}–{}), which contains the target {}; more audits are needed.",
            pct(a.estimate), a.n, pct(a.lower), pct(a.upper), pct(t)
        )),
        (Promise::TooFewAudits, Some(t), a) => out.push(format!(
            "NOT YET KNOWN: {} audited accepted items have a label; at least {MIN_AUDITED} are needed to check the target {}.",
            a.map_or(0, |a| a.n), pct(t)
        )),
        _ => out.push("The map states no target accuracy; nothing to check the accepted items against.".into()),
    }
    if let Some(a) = &q.accepted_accuracy {
        if a.n >= MIN_AUDITED && (a.mean_confidence - a.estimate).abs() > a.upper - a.lower {
            out.push(format!(
                "Audited items average {} confidence but are {} accurate: the map is no longer calibrated on them.",
                pct(a.mean_confidence), pct(a.estimate)
            ));
        }
    }
    match (q.drift_level, &q.drift) {
        (DriftLevel::Large, Some(d)) => out.push(format!(
            "DRIFT: the confidence distribution has shifted a lot from the map's fit-time data (PSI {:.3} ≥ {PSI_LARGE}; binned KS {:.3}). The guarantee assumes traffic like the calibration data: refit.",
            d.psi, d.ks_binned
        )),
        (DriftLevel::Moderate, Some(d)) => out.push(format!(
            "DRIFT: the confidence distribution has moved from the map's fit-time data (PSI {:.3}, moderate; binned KS {:.3}). Watch it and plan a refit.",
            d.psi, d.ks_binned
        )),
        (DriftLevel::Stable, Some(d)) => out.push(format!(
            "No drift: the confidence distribution matches the map's fit-time data (PSI {:.3}).",
            d.psi
        )),
        (DriftLevel::NoReference, _) => out.push("Drift not checked: the map carries no fit-time reference (refit with this version of candor).".into()),
        _ => out.push(format!(
            "Drift not yet judged: {} decisions in the window, {MIN_DRIFT_ITEMS} needed.",
            q.window_decisions
        )),
    }
    if let Some(rate) = q.automation_rate {
        let mut line = format!(
            "Automation: {} of the last {} items accepted",
            pct(rate),
            q.window_decisions
        );
        if let Some(r) = q.reference_automation_rate {
            line.push_str(&format!(" ({} on the fit-time data)", pct(r)));
        }
        line.push('.');
        out.push(line);
    }
    if let Some(d) = &q.deferred_accuracy {
        out.push(format!(
            "Deferred items: {} accurate by {} labels ({level} interval {}–{}).",
            pct(d.estimate),
            d.n,
            pct(d.lower),
            pct(d.upper)
        ));
    }
    if let Some(e) = q.weighted_ece {
        out.push(format!(
            "Calibration error of labelled items (audited ones weighted by 1/audit rate): ECE {e:.4}."
        ));
    }
    if q.unaudited_accepted_labels > 0 {
        out.push(format!(
            "{} labels of accepted items outside the audit sample were not used (their selection is unknown).",
            q.unaudited_accepted_labels
        ));
    }
    out
}
