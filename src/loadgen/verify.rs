//! Checking answers before timing: a fast server that answers wrongly must not be measured.
//!
//! Every payload is sent once and its answer checked: K probabilities in [0, 1] summing to 1, the
//! predicted class holding the largest one, the confidence equal to it and the decision agreeing
//! with the threshold. With a map file, each probability must also match the library's own offline
//! apply of that map (the same code `candor apply` runs) within [`MAP_TOLERANCE`].

use crate::decision::Decision;
use crate::mapfile::CalibrationMap;
use crate::method::{InputForm, Workspace};
use crate::proto::v1::{CalibrateResponse, Decision as PbDecision};

/// Allowed |Σ p − 1|. Each f32 probability is within 2⁻²⁴ (relative) of the server's f64 value,
/// so a sum of K of them is within about 6e-8 of the exact sum; 1e-5 also admits servers that
/// compute in f32.
pub const SUM_TOLERANCE: f64 = 1e-5;
/// Allowed |p − p_ref| per probability against the offline apply: four f32 machine epsilons
/// (the wire carries f32, whose spacing just below 1 is f32::EPSILON / 2).
pub const MAP_TOLERANCE: f64 = 4.0 * f32::EPSILON as f64;

/// What a correct answer looks like.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Expect {
    /// Calibrated probabilities: length K, in [0, 1], summing to 1, consistent class, confidence
    /// and decision.
    Probabilities,
    /// Only K values back (a transport-floor server that echoes its input).
    SameLength,
}

/// An answer that is wrong, with what was wrong.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum VerifyError {
    /// The wrong number of probabilities.
    #[error("{got} probabilities, expected {expected}")]
    Length {
        /// K.
        expected: usize,
        /// Values received.
        got: usize,
    },
    /// A value outside [0, 1] or NaN.
    #[error("probabilities[{index}] = {value} is not a probability")]
    NotProbability {
        /// Position.
        index: usize,
        /// The value.
        value: f32,
    },
    /// The probabilities do not sum to 1.
    #[error("probabilities sum to {sum}, not 1 (tolerance {SUM_TOLERANCE:e})")]
    Sum {
        /// Σ p in f64.
        sum: f64,
    },
    /// predicted_class, confidence or decision disagree with the probabilities.
    #[error("inconsistent answer: {0}")]
    Inconsistent(String),
    /// A probability differs from the offline apply of the map.
    #[error(
        "probabilities[{index}] = {got}, the map applied offline gives {want} \
         (tolerance {MAP_TOLERANCE:e})"
    )]
    Map {
        /// Position.
        index: usize,
        /// The server's value.
        got: f32,
        /// The offline value.
        want: f64,
    },
    /// The decision differs from the map's policy applied offline.
    #[error("decision {got:?}, the map's policy gives {want:?}")]
    MapDecision {
        /// The server's decision.
        got: i32,
        /// The offline decision.
        want: Decision,
    },
}

/// The offline answer of a map file: the library's apply and decision, for comparison.
#[derive(Debug)]
pub struct Reference {
    map: CalibrationMap,
    workspace: Workspace,
}

impl Reference {
    /// A reference for a map whose input is K logits.
    ///
    /// # Errors
    /// A message when the map reads a binary score (the load generator sends K logits).
    pub fn try_new(map: CalibrationMap) -> Result<Self, String> {
        if map.input() != InputForm::Logits {
            return Err(format!(
                "map for model {:?} reads {}; the load generator sends K logits",
                map.model(),
                map.input().name()
            ));
        }
        Ok(Reference {
            map,
            workspace: Workspace::new(),
        })
    }

    /// The map.
    pub fn map(&self) -> &CalibrationMap {
        &self.map
    }
}

/// Checks one answer to `logits` against `expect` and, if given, the map's offline apply.
///
/// # Errors
/// The first thing found wrong, as a [`VerifyError`].
pub fn verify(
    resp: &CalibrateResponse,
    logits: &[f32],
    classes: usize,
    expect: Expect,
    reference: Option<&mut Reference>,
) -> Result<(), VerifyError> {
    let p = &resp.probabilities;
    if p.len() != classes {
        return Err(VerifyError::Length {
            expected: classes,
            got: p.len(),
        });
    }
    if expect == Expect::SameLength {
        return Ok(());
    }
    if let Some(index) = p.iter().position(|v| !(0.0..=1.0).contains(v)) {
        return Err(VerifyError::NotProbability {
            index,
            value: p[index],
        });
    }
    let sum: f64 = p.iter().map(|&v| f64::from(v)).sum();
    if (sum - 1.0).abs() > SUM_TOLERANCE {
        return Err(VerifyError::Sum { sum });
    }
    consistent(resp)?;
    if let Some(r) = reference {
        let q = r
            .workspace
            .apply(r.map.method(), r.map.input(), r.map.classes(), logits);
        if let Some(index) = (0..classes).find(|&i| (f64::from(p[i]) - q[i]).abs() > MAP_TOLERANCE)
        {
            return Err(VerifyError::Map {
                index,
                got: p[index],
                want: q[index],
            });
        }
        let predicted = crate::numeric::argmax(q);
        let confidence = q[predicted];
        let want = r.map.policy().decide(predicted, confidence);
        let at_threshold = r
            .map
            .policy()
            .threshold_for(predicted)
            .is_some_and(|t| (t - confidence).abs() <= MAP_TOLERANCE);
        if !at_threshold && resp.decision != pb_decision(want) {
            return Err(VerifyError::MapDecision {
                got: resp.decision,
                want,
            });
        }
    }
    Ok(())
}

/// The class, confidence and decision agree with the probabilities (up to f32 rounding, which can
/// make two close probabilities equal on the wire).
fn consistent(resp: &CalibrateResponse) -> Result<(), VerifyError> {
    let p = &resp.probabilities;
    let best = p.iter().copied().fold(f32::NEG_INFINITY, f32::max);
    let Some(&at_predicted) = p.get(resp.predicted_class as usize) else {
        return Err(VerifyError::Inconsistent(format!(
            "predicted_class {} is out of range",
            resp.predicted_class
        )));
    };
    if f64::from(best - at_predicted) > MAP_TOLERANCE {
        return Err(VerifyError::Inconsistent(format!(
            "predicted_class {} has probability {at_predicted}, the largest is {best}",
            resp.predicted_class
        )));
    }
    if f64::from((resp.confidence - at_predicted).abs()) > MAP_TOLERANCE {
        return Err(VerifyError::Inconsistent(format!(
            "confidence {} differs from the predicted class's probability {at_predicted}",
            resp.confidence
        )));
    }
    let accept = resp.decision == PbDecision::Accept as i32;
    let defer = resp.decision == PbDecision::Defer as i32;
    let near = f64::from((resp.confidence - resp.threshold).abs()) <= MAP_TOLERANCE;
    let agrees = (accept && resp.confidence >= resp.threshold)
        || (defer && resp.confidence < resp.threshold)
        || ((accept || defer) && near);
    if !agrees {
        return Err(VerifyError::Inconsistent(format!(
            "decision {} with confidence {} and threshold {}",
            resp.decision, resp.confidence, resp.threshold
        )));
    }
    Ok(())
}

fn pb_decision(d: Decision) -> i32 {
    match d {
        Decision::Accept => PbDecision::Accept as i32,
        Decision::Defer => PbDecision::Defer as i32,
    }
}

#[cfg(test)]
#[path = "verify_tests.rs"]
mod tests;
