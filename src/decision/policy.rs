//! The serving-time rule (METHODS.md 3.1, 3.10): accept iff the calibrated top-label confidence is
//! at least the threshold that applies to the predicted class; otherwise defer to a person.

use serde::{Deserialize, Serialize};
use std::collections::BTreeMap;

/// The outcome for one prediction.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum Decision {
    /// Use the prediction automatically.
    Accept,
    /// Send the item to a person.
    Defer,
}

/// What justified a threshold, as recorded by the fit that chose it. Every field is optional so a
/// hand-written policy can state only what it knows; unknown keys are kept, not dropped.
#[derive(Debug, Clone, Default, PartialEq, Serialize, Deserialize)]
pub struct Evidence {
    /// Selection procedure, e.g. "sgr" or "fixed-sequence".
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub procedure: Option<String>,
    /// Target accuracy of accepted items, in (0, 1).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub target_accuracy: Option<f64>,
    /// Statistical confidence 1 − δ of the certificate, in (0, 1).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub confidence_level: Option<f64>,
    /// Certified lower bound on the accuracy of accepted items, in [0, 1].
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub certified_accuracy: Option<f64>,
    /// Fraction of items expected to be accepted, in [0, 1].
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub expected_coverage: Option<f64>,
    /// Labelled items the threshold was certified on.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub items: Option<u64>,
    /// Items accepted at the threshold among them.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub accepted: Option<u64>,
    /// Errors among the accepted items.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub errors: Option<u64>,
    /// Any further fields, kept verbatim.
    #[serde(flatten)]
    pub extra: BTreeMap<String, serde_json::Value>,
}

/// A validated decision policy for K classes: thresholds lie in [0, 1]; `None` means that class
/// (or, globally, every class) is never auto-accepted.
#[derive(Debug, Clone, PartialEq)]
pub struct DecisionPolicy {
    global: Option<f64>,
    per_class: Option<Vec<Option<f64>>>,
    evidence: Option<Evidence>,
    audit_rate: Option<f64>,
}

impl DecisionPolicy {
    /// Builds a policy from already range-checked parts (the map-file reader checks ranges and
    /// lengths and names each problem).
    pub fn new(
        global: Option<f64>,
        per_class: Option<Vec<Option<f64>>>,
        evidence: Option<Evidence>,
    ) -> Self {
        debug_assert!(global.is_none_or(|t| (0.0..=1.0).contains(&t)));
        DecisionPolicy {
            global,
            per_class,
            evidence,
            audit_rate: None,
        }
    }

    /// The same policy with a share of accepted items to mark for audit (in [0, 1], checked by
    /// the map-file reader).
    pub fn with_audit_rate(mut self, rate: Option<f64>) -> Self {
        debug_assert!(rate.is_none_or(|a| (0.0..=1.0).contains(&a)));
        self.audit_rate = rate;
        self
    }

    /// Share of accepted items the map asks to mark for audit, when it sets one.
    pub fn audit_rate(&self) -> Option<f64> {
        self.audit_rate
    }

    /// A policy accepting when confidence ≥ `threshold` for every class, with no evidence.
    pub fn global(threshold: f64) -> Self {
        Self::new(Some(threshold), None, None)
    }

    /// The global threshold (`None`: accept nothing unless a per-class threshold says otherwise).
    pub fn global_threshold(&self) -> Option<f64> {
        self.global
    }

    /// Per-class thresholds, when set; they take precedence over the global one.
    pub fn per_class(&self) -> Option<&[Option<f64>]> {
        self.per_class.as_deref()
    }

    /// The evidence recorded with the policy.
    pub fn evidence(&self) -> Option<&Evidence> {
        self.evidence.as_ref()
    }

    /// The threshold that applies to predicted class `class` (`None`: never accept).
    #[inline]
    pub fn threshold_for(&self, class: usize) -> Option<f64> {
        match &self.per_class {
            Some(list) => list.get(class).copied().flatten(),
            None => self.global,
        }
    }

    /// Accept iff `confidence ≥` the class's threshold (ties accepted, METHODS.md 3.1).
    #[inline]
    pub fn decide(&self, class: usize, confidence: f64) -> Decision {
        match self.threshold_for(class) {
            Some(t) if confidence >= t => Decision::Accept,
            _ => Decision::Defer,
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn ties_are_accepted_and_per_class_overrides() {
        let p = DecisionPolicy::global(0.9);
        assert_eq!(p.decide(0, 0.9), Decision::Accept);
        assert_eq!(p.decide(3, 0.8999999), Decision::Defer);
        let p = DecisionPolicy::new(Some(0.5), Some(vec![Some(0.95), None]), None);
        assert_eq!(p.decide(0, 0.9), Decision::Defer);
        assert_eq!(
            p.decide(1, 1.0),
            Decision::Defer,
            "a class with no threshold never accepts"
        );
        let none = DecisionPolicy::new(None, None, None);
        assert_eq!(none.decide(0, 1.0), Decision::Defer);
    }
}
