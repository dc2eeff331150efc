//! Live quality of a running sidecar, per model and map version, over sliding windows
//! (METHODS.md 4.1–4.4): how much is automated, how accurate the accepted items are according to
//! the audit sample, how accurate the deferred ones are, the calibration error of labelled items
//! weighted by their audit probabilities, and drift of the confidence distribution against the
//! map's fit-time reference.
//!
//! Pure: the decision log's writer thread feeds a [`Tracker`] with decisions and joined outcomes
//! and asks it for a [`LiveQuality`] per window now and then; nothing here reads a clock or does
//! I/O.

pub mod estimate;
mod verdict;

pub use verdict::{verdict_lines, DriftLevel, Promise};

use crate::eval::EqualWidthBins;
use crate::mapfile::{CalibrationMap, ConfidenceReference};
use estimate::{binned_drift, hajek, proportion, weighted_ece, BinnedDrift, Labelled, Proportion};
use serde::{Deserialize, Serialize};
use std::collections::{BTreeMap, VecDeque};

/// Decisions kept per window by default.
pub const DEFAULT_WINDOW_DECISIONS: usize = 10_000;
/// Labelled items kept per window by default.
pub const DEFAULT_WINDOW_LABELS: usize = 5_000;
/// Audited accepted items needed before the promise is judged.
pub const MIN_AUDITED: u64 = 30;
/// Decisions needed in the window before drift is judged.
pub const MIN_DRIFT_ITEMS: u64 = 500;
/// Statistical confidence of the intervals when the map states none.
pub const DEFAULT_CONFIDENCE_LEVEL: f64 = 0.95;
/// Equal-width bins of the weighted calibration error (METHODS.md 1.3's common default).
pub const ECE_BINS: usize = 15;

/// What a window needs to know about its map.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct WindowSpec {
    /// The fit-time confidence distribution.
    pub reference: Option<ConfidenceReference>,
    /// Accuracy the policy promises for accepted items.
    pub target_accuracy: Option<f64>,
    /// Statistical confidence 1 − δ of the promise (and of the live intervals).
    pub confidence_level: Option<f64>,
    /// The audit rate π in force for this version (the same for all its items in one process).
    pub audit_rate: f64,
}

impl WindowSpec {
    /// What `map` states: its reference and its policy's target and confidence.
    pub fn of(map: &CalibrationMap) -> Self {
        let evidence = map.policy().evidence();
        WindowSpec {
            reference: map.reference().cloned(),
            target_accuracy: evidence.and_then(|e| e.target_accuracy),
            confidence_level: evidence.and_then(|e| e.confidence_level),
            audit_rate: 0.0,
        }
    }

    /// The same with the audit rate the sidecar applies to this version.
    pub fn with_audit_rate(mut self, rate: f64) -> Self {
        self.audit_rate = rate;
        self
    }
}

/// Window sizes.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct WindowSizes {
    /// Most recent decisions kept per (model, map version).
    pub decisions: usize,
    /// Most recent labelled items kept per (model, map version).
    pub labels: usize,
}

impl Default for WindowSizes {
    fn default() -> Self {
        WindowSizes {
            decisions: DEFAULT_WINDOW_DECISIONS,
            labels: DEFAULT_WINDOW_LABELS,
        }
    }
}

/// A labelled decision, as the outcome join sees it.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct LabelledDecision {
    /// Calibrated top-label confidence.
    pub confidence: f64,
    /// The prediction was right.
    pub correct: bool,
    /// The item was accepted.
    pub accepted: bool,
    /// The item was in the audit sample.
    pub audit: bool,
}

/// Accuracy of accepted items estimated from the audit sample.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct AuditedAccuracy {
    /// Audited accepted items with a label.
    pub n: u64,
    /// Hájek estimate Σ(c/π)/Σ(1/π) (the plain share when π is the same for all).
    pub estimate: f64,
    /// Lower end of the two-sided Clopper–Pearson interval on the audited items.
    pub lower: f64,
    /// Upper end of it.
    pub upper: f64,
    /// Linearised standard error of the Hájek estimate.
    pub standard_error: f64,
    /// Mean calibrated confidence of the same items, weighted the same way.
    pub mean_confidence: f64,
}

/// The live state of one (model, map version).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct LiveQuality {
    /// Model.
    pub model: String,
    /// Map version.
    pub map_version: String,
    /// Decisions seen since start.
    pub decisions_total: u64,
    /// Decisions in the window.
    pub window_decisions: u64,
    /// Share accepted in the window.
    pub automation_rate: Option<f64>,
    /// The audit rate π applied to this version's accepted items.
    pub audit_rate: f64,
    /// Share the map accepted on its fit-time reference data.
    pub reference_automation_rate: Option<f64>,
    /// Labels joined since start.
    pub labels_total: u64,
    /// Labelled items in the window.
    pub window_labels: u64,
    /// Accuracy of accepted items from the audit sample.
    pub accepted_accuracy: Option<AuditedAccuracy>,
    /// Accuracy of the labelled deferred items, with its interval.
    pub deferred_accuracy: Option<Proportion>,
    /// Labels of accepted items outside the audit sample: not used (their selection is unknown).
    pub unaudited_accepted_labels: u64,
    /// Top-label ECE of the labelled items, audited ones weighted by 1/π.
    pub weighted_ece: Option<f64>,
    /// Drift of the window's confidences against the map's reference.
    pub drift: Option<BinnedDrift>,
    /// Drift judged in words.
    pub drift_level: DriftLevel,
    /// Accuracy the map promises for accepted items.
    pub target_accuracy: Option<f64>,
    /// Statistical confidence of the intervals.
    pub confidence_level: f64,
    /// Whether the promise holds, by the audit sample.
    pub promise: Promise,
}

#[derive(Debug)]
struct Window {
    spec: WindowSpec,
    decisions: VecDeque<(f32, bool)>,
    accepted: u64,
    bins: Vec<u64>,
    labels: VecDeque<LabelledDecision>,
    decisions_total: u64,
    labels_total: u64,
}

impl Window {
    fn new(spec: WindowSpec) -> Self {
        let bins = spec.reference.as_ref().map_or(0, |r| r.proportions.len());
        Window {
            spec,
            decisions: VecDeque::new(),
            accepted: 0,
            bins: vec![0; bins],
            labels: VecDeque::new(),
            decisions_total: 0,
            labels_total: 0,
        }
    }

    fn bin_of(&self, confidence: f32) -> Option<usize> {
        self.spec
            .reference
            .as_ref()
            .map(|r| r.bin_of(f64::from(confidence)))
    }

    fn push_decision(&mut self, confidence: f32, accepted: bool, cap: usize) {
        if cap == 0 {
            return;
        }
        if self.decisions.len() == cap {
            if let Some((c, a)) = self.decisions.pop_front() {
                self.accepted -= u64::from(a);
                if let Some(b) = self.bin_of(c) {
                    self.bins[b] -= 1;
                }
            }
        }
        self.decisions.push_back((confidence, accepted));
        self.accepted += u64::from(accepted);
        if let Some(b) = self.bin_of(confidence) {
            self.bins[b] += 1;
        }
        self.decisions_total += 1;
    }

    fn push_label(&mut self, l: LabelledDecision, cap: usize) {
        if cap == 0 {
            return;
        }
        if self.labels.len() == cap {
            self.labels.pop_front();
        }
        self.labels.push_back(l);
        self.labels_total += 1;
    }

    fn quality(&self, model: &str, version: &str) -> LiveQuality {
        let level = self
            .spec
            .confidence_level
            .unwrap_or(DEFAULT_CONFIDENCE_LEVEL);
        let delta = 1.0 - level;
        let n = self.decisions.len() as u64;
        let audited: Vec<Labelled> = self
            .labels
            .iter()
            .filter(|l| l.accepted && l.audit && self.spec.audit_rate > 0.0)
            .map(|l| Labelled {
                confidence: l.confidence,
                correct: l.correct,
                pi: self.spec.audit_rate,
            })
            .collect();
        let deferred: Vec<Labelled> = self
            .labels
            .iter()
            .filter(|l| !l.accepted)
            .map(|l| Labelled {
                confidence: l.confidence,
                correct: l.correct,
                pi: 1.0,
            })
            .collect();
        let unaudited = self
            .labels
            .iter()
            .filter(|l| l.accepted && !l.audit)
            .count() as u64;
        let accepted_accuracy = hajek(&audited).and_then(|(estimate, se)| {
            let hits = audited.iter().filter(|x| x.correct).count() as u64;
            let cp = proportion(hits, audited.len() as u64, delta).ok()??;
            let weight: f64 = audited.iter().map(|x| 1.0 / x.pi).sum();
            let mean_confidence = audited.iter().map(|x| x.confidence / x.pi).sum::<f64>() / weight;
            Some(AuditedAccuracy {
                n: cp.n,
                estimate,
                lower: cp.lower,
                upper: cp.upper,
                standard_error: se,
                mean_confidence,
            })
        });
        let deferred_hits = deferred.iter().filter(|x| x.correct).count() as u64;
        let deferred_accuracy = proportion(deferred_hits, deferred.len() as u64, delta)
            .ok()
            .flatten();
        let labelled: Vec<Labelled> = audited.iter().chain(&deferred).copied().collect();
        let weighted_ece = EqualWidthBins::try_new(ECE_BINS)
            .ok()
            .and_then(|bins| weighted_ece(&labelled, &bins));
        let drift = self
            .spec
            .reference
            .as_ref()
            .and_then(|r| binned_drift(&r.proportions, &self.bins).ok().flatten());
        let drift_level = DriftLevel::judge(self.spec.reference.is_some(), n, drift.as_ref());
        let promise = Promise::judge(self.spec.target_accuracy, accepted_accuracy.as_ref());
        LiveQuality {
            model: model.to_owned(),
            map_version: version.to_owned(),
            decisions_total: self.decisions_total,
            window_decisions: n,
            automation_rate: (n > 0).then(|| self.accepted as f64 / n as f64),
            audit_rate: self.spec.audit_rate,
            reference_automation_rate: self.spec.reference.as_ref().and_then(|r| r.accept_rate),
            labels_total: self.labels_total,
            window_labels: self.labels.len() as u64,
            accepted_accuracy,
            deferred_accuracy,
            unaudited_accepted_labels: unaudited,
            weighted_ece,
            drift,
            drift_level,
            target_accuracy: self.spec.target_accuracy,
            confidence_level: level,
            promise,
        }
    }
}

/// Sliding windows of every (model, map version) seen.
#[derive(Debug)]
pub struct Tracker {
    sizes: WindowSizes,
    /// Window index by model, then version (sorted, for the report).
    index: BTreeMap<String, BTreeMap<String, usize>>,
    /// Every window ever opened; none is removed, so an index stays valid.
    windows: Vec<Window>,
}

/// A window of a [`Tracker`], found once by (model, version) and then used without a lookup.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct WindowSlot(usize);

impl Tracker {
    /// No windows yet.
    pub fn new(sizes: WindowSizes) -> Self {
        Tracker {
            sizes,
            index: BTreeMap::new(),
            windows: Vec::new(),
        }
    }

    /// The window of (model, version), opened (with `spec`) the first time it is asked for.
    pub fn slot(
        &mut self,
        model: &str,
        version: &str,
        spec: &dyn Fn(&str, &str) -> WindowSpec,
    ) -> WindowSlot {
        if let Some(&i) = self.index.get(model).and_then(|v| v.get(version)) {
            return WindowSlot(i);
        }
        let i = self.windows.len();
        self.windows.push(Window::new(spec(model, version)));
        self.index
            .entry(model.to_owned())
            .or_default()
            .insert(version.to_owned(), i);
        WindowSlot(i)
    }

    /// Counts one decision; `spec` describes the map the first time a (model, version) is seen.
    /// Returns the audit rate π in force for that version (for the journal record).
    pub fn decision(
        &mut self,
        model: &str,
        version: &str,
        confidence: f32,
        accepted: bool,
        spec: &dyn Fn(&str, &str) -> WindowSpec,
    ) -> f64 {
        let slot = self.slot(model, version, spec);
        self.decision_in(slot, confidence, accepted)
    }

    /// Counts one decision in a window found before with [`Tracker::slot`]; returns the audit
    /// rate π in force there.
    pub fn decision_in(&mut self, slot: WindowSlot, confidence: f32, accepted: bool) -> f64 {
        let cap = self.sizes.decisions;
        let w = &mut self.windows[slot.0];
        w.push_decision(confidence, accepted, cap);
        w.spec.audit_rate
    }

    /// Counts one joined label.
    pub fn outcome(
        &mut self,
        model: &str,
        version: &str,
        label: LabelledDecision,
        spec: &dyn Fn(&str, &str) -> WindowSpec,
    ) {
        let cap = self.sizes.labels;
        let slot = self.slot(model, version, spec);
        self.windows[slot.0].push_label(label, cap);
    }

    /// The live quality of every window, by model then version.
    pub fn report(&self) -> Vec<LiveQuality> {
        self.index
            .iter()
            .flat_map(|(m, versions)| {
                versions
                    .iter()
                    .map(move |(v, &i)| self.windows[i].quality(m, v))
            })
            .collect()
    }
}

#[cfg(test)]
mod tests;
