//! The decision policy on the report's items: what the map's rule (per-class thresholds where
//! set, METHODS.md 3.1 and 3.7) accepts, exact binomial intervals for the accepted accuracy
//! (Clopper–Pearson, METHODS.md 3.2), the per-class table, and the evidence in plain words.

use super::format::{count, percent, percent_floor, threshold};
use super::{ReportError, ReportSettings};
use crate::decision::{Decision, DecisionPolicy, Evidence};
use crate::eval::{EqualWidthBins, Predictions};
use crate::mapfile::CalibrationMap;
use crate::stats::{clopper_pearson_lower, clopper_pearson_upper};

/// Procedure name that marks a threshold set by hand rather than certified on data.
const FIXED_PROCEDURE: &str = "fixed";

/// What the rule does on one set of confidences.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub struct PolicyOutcome {
    /// Items evaluated.
    pub items: u64,
    /// Items accepted.
    pub accepted: u64,
    /// Accepted items whose prediction is right.
    pub accepted_correct: u64,
}

impl PolicyOutcome {
    /// Items sent to a person.
    pub fn deferred(&self) -> u64 {
        self.items - self.accepted
    }

    /// Accepted fraction of all items (0 when there are none).
    pub fn coverage(&self) -> f64 {
        ratio(self.accepted, self.items).unwrap_or(0.0)
    }

    /// Accuracy of the accepted items; `None` if none is accepted.
    pub fn accepted_accuracy(&self) -> Option<f64> {
        ratio(self.accepted_correct, self.accepted)
    }

    /// (coverage, risk) of the rule: where it sits on a risk–coverage chart.
    pub fn operating_point(&self) -> (f64, Option<f64>) {
        (self.coverage(), self.accepted_accuracy().map(|a| 1.0 - a))
    }
}

/// One row of the per-class table; items are grouped by their calibrated predicted class,
/// the grouping per-class thresholds act on.
#[derive(Debug, Clone, PartialEq)]
pub struct ClassRow {
    /// Class name.
    pub name: String,
    /// Items predicted as this class, the right ones among them, and the accepted ones.
    pub outcome: PolicyOutcome,
    /// Items predicted as this class that are right.
    pub correct: u64,
    /// One-vs-rest ECE of this class's probability before recalibration (all items).
    pub ece_uncalibrated: f64,
    /// The same after recalibration.
    pub ece_calibrated: f64,
    /// The threshold that applies to the class; `None`: never accepted.
    pub threshold: Option<f64>,
}

impl ClassRow {
    /// Accuracy of the predictions of this class; `None` if it is never predicted.
    pub fn accuracy(&self) -> Option<f64> {
        ratio(self.correct, self.outcome.items)
    }
}

/// The policy section of the report.
#[derive(Debug, Clone, PartialEq)]
pub struct PolicySection {
    /// The map's global threshold.
    pub global_threshold: Option<f64>,
    /// Whether per-class thresholds are set.
    pub per_class: bool,
    /// Every distinct threshold in force, ascending.
    pub thresholds: Vec<f64>,
    /// The evidence recorded with the policy.
    pub evidence: Option<Evidence>,
    /// Whether the evidence states a certified accuracy at a confidence level.
    pub certified: bool,
    /// Target risk 1 − target accuracy, when the evidence names a target.
    pub target_risk: Option<f64>,
    /// The rule on the calibrated confidences.
    pub calibrated: PolicyOutcome,
    /// The same rule on the uncalibrated confidences.
    pub uncalibrated: PolicyOutcome,
    /// Level of the intervals and bounds below.
    pub level: f64,
    /// Two-sided Clopper–Pearson interval of the calibrated accepted accuracy.
    pub accuracy_interval: Option<(f64, f64)>,
    /// One-sided Clopper–Pearson lower bound of the calibrated accepted accuracy.
    pub accuracy_lower_bound: Option<f64>,
    /// The per-class table.
    pub classes: Vec<ClassRow>,
    /// The policy and its evidence in plain words, one sentence per entry.
    pub sentences: Vec<String>,
}

/// Applies the map's policy to both sets and puts the evidence into words.
///
/// # Errors
/// [`ReportError::Bound`] if a Clopper–Pearson bound fails to converge.
pub(super) fn section(
    map: &CalibrationMap,
    before: &Predictions<'_>,
    after: &Predictions<'_>,
    settings: &ReportSettings,
) -> Result<PolicySection, ReportError> {
    let policy = map.policy();
    let (calibrated, by_class) = apply(policy, after);
    let (uncalibrated, _) = apply(policy, before);
    let level = settings.level();
    let bound = |what| {
        move |e: crate::stats::StatsError| ReportError::Bound {
            what,
            message: e.to_string(),
        }
    };
    let (accuracy_interval, accuracy_lower_bound) = if calibrated.accepted > 0 {
        let (x, m) = (calibrated.accepted_correct, calibrated.accepted);
        let alpha = 1.0 - level;
        let low = clopper_pearson_lower(x, m, alpha / 2.0).map_err(bound("interval"))?;
        let high = clopper_pearson_upper(x, m, alpha / 2.0).map_err(bound("interval"))?;
        let lower = clopper_pearson_lower(x, m, alpha).map_err(bound("lower bound"))?;
        (Some((low, high)), Some(lower))
    } else {
        (None, None)
    };
    let mut thresholds: Vec<f64> = match policy.per_class() {
        Some(list) => list.iter().flatten().copied().collect(),
        None => policy.global_threshold().into_iter().collect(),
    };
    thresholds.sort_by(f64::total_cmp);
    thresholds.dedup();
    let evidence = policy.evidence().cloned();
    let certified = evidence.as_ref().is_some_and(is_certified);
    let target_risk = evidence
        .as_ref()
        .and_then(|e| e.target_accuracy)
        .map(|a| 1.0 - a);
    let classes = class_rows(map, before, after, settings.bins(), &by_class);
    let mut s = PolicySection {
        global_threshold: policy.global_threshold(),
        per_class: policy.per_class().is_some(),
        thresholds,
        evidence,
        certified,
        target_risk,
        calibrated,
        uncalibrated,
        level,
        accuracy_interval,
        accuracy_lower_bound,
        classes,
        sentences: Vec::new(),
    };
    s.sentences = sentences(&s);
    Ok(s)
}

/// The rule's outcome overall and per predicted class.
fn apply(policy: &DecisionPolicy, p: &Predictions<'_>) -> (PolicyOutcome, Vec<PolicyOutcome>) {
    let mut by_class = vec![PolicyOutcome::default(); p.n_classes()];
    for ((&class, &conf), &hit) in p.predicted().iter().zip(p.confidence()).zip(p.correct()) {
        let o = &mut by_class[class as usize];
        o.items += 1;
        if policy.decide(class as usize, conf) == Decision::Accept {
            o.accepted += 1;
            o.accepted_correct += u64::from(hit);
        }
    }
    let total = by_class
        .iter()
        .fold(PolicyOutcome::default(), |t, o| PolicyOutcome {
            items: t.items + o.items,
            accepted: t.accepted + o.accepted,
            accepted_correct: t.accepted_correct + o.accepted_correct,
        });
    (total, by_class)
}

/// Per-class rows: counts by calibrated predicted class, one-vs-rest ECE before and after.
fn class_rows(
    map: &CalibrationMap,
    before: &Predictions<'_>,
    after: &Predictions<'_>,
    bins: &EqualWidthBins,
    by_class: &[PolicyOutcome],
) -> Vec<ClassRow> {
    let k_count = after.n_classes();
    let (ece_before, ece_after) = (one_vs_rest_ece(before, bins), one_vs_rest_ece(after, bins));
    let mut correct = vec![0u64; k_count];
    for (&class, &hit) in after.predicted().iter().zip(after.correct()) {
        correct[class as usize] += u64::from(hit);
    }
    (0..k_count)
        .map(|k| ClassRow {
            name: map
                .class_names()
                .and_then(|names| names.get(k).cloned())
                .unwrap_or_else(|| format!("class {k}")),
            outcome: by_class[k],
            correct: correct[k],
            ece_uncalibrated: ece_before[k],
            ece_calibrated: ece_after[k],
            threshold: map.policy().threshold_for(k),
        })
        .collect()
}

/// For each class k, the ECE of q_k against 1[y = k] on the equal-width bins (the terms whose
/// mean is the classwise ECE; Kull et al. 2019, METHODS.md 1.5).
fn one_vs_rest_ece(p: &Predictions<'_>, bins: &EqualWidthBins) -> Vec<f64> {
    let (k_count, m) = (p.n_classes(), bins.n_bins());
    // Per (class, bin): item count, Σ q, Σ 1[y = k].
    let mut sums = vec![(0u64, 0.0f64, 0u64); k_count * m];
    for (row, &label) in p.probs().chunks_exact(k_count).zip(p.labels()) {
        for (k, &q) in row.iter().enumerate() {
            let s = &mut sums[k * m + bins.bin_of(q)];
            s.0 += 1;
            s.1 += q;
            s.2 += u64::from(k == label as usize);
        }
    }
    let n = p.n() as f64;
    sums.chunks_exact(m)
        .map(|class| {
            class
                .iter()
                .filter(|s| s.0 > 0)
                // (n_m/n)·|acc_m − conf_m| = |Σ 1[y = k] − Σ q| / n.
                .map(|&(_, sq, hits)| (hits as f64 - sq).abs() / n)
                .sum()
        })
        .collect()
}

/// Whether the evidence states a certificate: a certified accuracy at a confidence level, from
/// a procedure other than a hand-set threshold.
fn is_certified(e: &Evidence) -> bool {
    e.certified_accuracy.is_some()
        && e.confidence_level.is_some()
        && e.procedure.as_deref() != Some(FIXED_PROCEDURE)
}

/// The policy, its evidence and its outcome in plain words.
fn sentences(s: &PolicySection) -> Vec<String> {
    let mut out = Vec::new();
    let at = match (s.per_class, s.global_threshold) {
        (true, _) => "At the per-class thresholds".to_owned(),
        (false, Some(t)) => format!("At threshold {}", threshold(Some(t))),
        (false, None) => String::new(),
    };
    out.push(match (s.per_class, s.global_threshold) {
        (true, _) => "Rule: accept a prediction when its calibrated confidence is at least the \
                      threshold of its predicted class (see the per-class table); classes \
                      without a threshold always go to a person."
            .to_owned(),
        (false, Some(t)) => format!(
            "Rule: accept a prediction when its calibrated confidence is at least {}; \
             otherwise send the item to a person.",
            threshold(Some(t))
        ),
        (false, None) => {
            "Rule: no prediction is accepted automatically; every item goes to a person.".to_owned()
        }
    });
    if let Some(e) = s.evidence.as_ref().filter(|_| s.certified) {
        out.push(certificate(&at, e));
    } else if !s.thresholds.is_empty() {
        out.push(not_certified(s.evidence.as_ref()));
    }
    let c = &s.calibrated;
    let mut outcome = format!(
        "On the {} items of this report, {} ({}) would be accepted and {} sent to a person",
        count(c.items),
        count(c.accepted),
        percent(c.coverage(), 1),
        count(c.deferred())
    );
    if let (Some(acc), Some((lo, hi))) = (c.accepted_accuracy(), s.accuracy_interval) {
        outcome.push_str(&format!(
            "; {} of the accepted items are right ({}, {} interval {} to {})",
            count(c.accepted_correct),
            percent(acc, 1),
            percent(s.level, 0),
            percent(lo, 1),
            percent(hi, 1)
        ));
    }
    outcome.push('.');
    out.push(outcome);
    if let Some(lower) = s.accuracy_lower_bound {
        out.push(format!(
            "If these items played no part in fitting the map or choosing the threshold, then at \
             {} confidence at least {} of items accepted this way are right (one-sided \
             Clopper–Pearson bound).",
            percent(s.level, 0),
            percent_floor(lower, 1)
        ));
    }
    if let (Some(target), Some(acc)) = (s.target_risk, c.accepted_accuracy()) {
        if acc < 1.0 - target {
            out.push(format!(
                "Warning: on these items the accepted accuracy {} is below the target {}.",
                percent(acc, 1),
                percent(1.0 - target, 1)
            ));
        }
    }
    let u = &s.uncalibrated;
    if !s.thresholds.is_empty() {
        out.push(match u.accepted_accuracy() {
            Some(acc) => format!(
                "Without recalibration the same rule would accept {} items, {} of them right.",
                count(u.accepted),
                percent(acc, 1)
            ),
            None => "Without recalibration the same rule would accept no item.".to_owned(),
        });
    }
    out
}

/// "At threshold 0.91, 2,310 of 2,500 held-out items would be accepted; at 95% confidence at
/// least 98.1% of accepted items are right." with whatever the evidence records.
fn certificate(at: &str, e: &Evidence) -> String {
    let mut text = String::from("Certificate: ");
    if let (Some(items), Some(accepted)) = (e.items, e.accepted) {
        text.push_str(&format!(
            "{at}, {} of {} held-out items would be accepted; ",
            count(accepted),
            count(items)
        ));
    } else if let Some(cov) = e.expected_coverage {
        text.push_str(&format!(
            "{at}, about {} of items would be accepted; ",
            percent(cov, 1)
        ));
    } else {
        text.push_str(&format!("{at}, "));
    }
    if let (Some(level), Some(acc)) = (e.confidence_level, e.certified_accuracy) {
        text.push_str(&format!(
            "at {} confidence at least {} of accepted items are right",
            percent(level, 0),
            percent_floor(acc, 1)
        ));
    }
    if let Some(target) = e.target_accuracy {
        text.push_str(&format!(" (target {})", percent(target, 1)));
    }
    if let Some(p) = &e.procedure {
        text.push_str(&format!("; procedure: {p}"));
    }
    text.push('.');
    text
}

/// Says plainly that the threshold carries no statistical guarantee.
fn not_certified(e: Option<&Evidence>) -> String {
    let mut text =
        String::from("Not certified: the map records no statistical guarantee for its threshold");
    if let Some(p) = e.and_then(|e| e.procedure.as_deref()) {
        text.push_str(&format!(" (procedure: {p}"));
        if let Some(note) = e.and_then(|e| e.extra.get("note")).and_then(|v| v.as_str()) {
            text.push_str(&format!("; note: {note}"));
        }
        text.push(')');
    }
    text.push_str(". It is a policy, not a guarantee.");
    text
}

/// a / b, `None` when b = 0.
fn ratio(a: u64, b: u64) -> Option<f64> {
    (b > 0).then(|| a as f64 / b as f64)
}
