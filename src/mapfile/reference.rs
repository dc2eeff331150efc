//! `provenance.reference`: the fit-time distribution of calibrated top-label confidences, kept
//! in the map so a running sidecar can measure drift against it (METHODS.md 4.4).
//!
//! ```json
//! "reference": {"items": 1400, "edges": [0.41, 0.55, …], "proportions": [0.1, 0.1, …],
//!               "accept_rate": 0.47, "mean_confidence": 0.80}
//! ```
//!
//! `edges` are the distinct interior bin edges (reference deciles, ascending, in [0, 1]); bins
//! are right-closed, (−∞, e₁], (e₁, e₂], …, (e_last, ∞), as in [`crate::eval::psi`];
//! `proportions` has one entry more than `edges` and sums to 1.

use super::read::Reader;
use crate::eval::{psi, Psi, PsiConfig};
use serde_json::{json, Map, Value};

/// How far the reference proportions may sum from 1.
pub const PROPORTION_SUM_TOLERANCE: f64 = 1e-6;

/// The fit-time confidence distribution of a map.
#[derive(Debug, Clone, PartialEq)]
pub struct ConfidenceReference {
    /// Items the reference was taken on.
    pub items: u64,
    /// Interior bin edges, strictly ascending, in [0, 1].
    pub edges: Vec<f64>,
    /// Share of reference items in each bin (`edges.len() + 1` entries, summing to 1).
    pub proportions: Vec<f64>,
    /// Share of reference items the policy accepts, when known.
    pub accept_rate: Option<f64>,
    /// Mean calibrated top-label confidence of the reference items, when known.
    pub mean_confidence: Option<f64>,
}

impl ConfidenceReference {
    /// The reference of a sample of calibrated top-label confidences (PSI's decile bins).
    ///
    /// # Errors
    /// [`crate::eval::EvalError`] for an empty or non-finite sample.
    pub fn from_confidences(
        confidences: &[f64],
        accepted: Option<usize>,
    ) -> Result<Self, crate::eval::EvalError> {
        let Psi {
            edges, reference, ..
        } = psi(
            confidences,
            confidences,
            &PsiConfig {
                epsilon: 0.0,
                ..PsiConfig::default()
            },
        )?;
        let n = confidences.len();
        Ok(ConfidenceReference {
            items: n as u64,
            edges,
            proportions: reference,
            accept_rate: accepted.map(|a| a as f64 / n as f64),
            mean_confidence: Some(confidences.iter().sum::<f64>() / n as f64),
        })
    }

    /// The JSON form written under `provenance.reference`.
    pub fn to_value(&self) -> Value {
        let mut obj = Map::new();
        obj.insert("items".into(), json!(self.items));
        obj.insert("edges".into(), json!(self.edges));
        obj.insert("proportions".into(), json!(self.proportions));
        if let Some(a) = self.accept_rate {
            obj.insert("accept_rate".into(), json!(a));
        }
        if let Some(m) = self.mean_confidence {
            obj.insert("mean_confidence".into(), json!(m));
        }
        Value::Object(obj)
    }

    /// Index of the right-closed bin holding `confidence`.
    #[inline]
    pub fn bin_of(&self, confidence: f64) -> usize {
        self.edges.partition_point(|&e| e < confidence)
    }
}

/// Reads and checks `provenance.reference`, naming each problem's field.
pub(super) fn read(r: &mut Reader<'_>, v: &Value) -> Option<ConfidenceReference> {
    const P: &str = "provenance.reference";
    let obj = r.object(v, P)?;
    r.deny_unknown(
        obj,
        &[
            "items",
            "edges",
            "proportions",
            "accept_rate",
            "mean_confidence",
        ],
        P,
    );
    let before = r.problems.len();
    let items = r.integer_field(obj, "items", P);
    let edges = r.numbers_field(obj, "edges", P);
    let proportions = r.numbers_field(obj, "proportions", P);
    if let Some(e) = &edges {
        if let Some(i) = e.iter().position(|x| !(0.0..=1.0).contains(x)) {
            r.problems.push(
                format!("{P}.edges[{i}]"),
                format!("must lie in [0, 1], got {}", e[i]),
            );
        } else if let Some(i) = e.windows(2).position(|w| w[0] >= w[1]) {
            r.problems.push(
                format!("{P}.edges[{}]", i + 1),
                format!(
                    "edges must be strictly ascending: {} after {}",
                    e[i + 1],
                    e[i]
                ),
            );
        }
    }
    if let Some(p) = &proportions {
        if let Some(i) = p.iter().position(|x| !(0.0..=1.0).contains(x)) {
            r.problems.push(
                format!("{P}.proportions[{i}]"),
                format!("must lie in [0, 1], got {}", p[i]),
            );
        } else {
            let sum: f64 = p.iter().sum();
            if (sum - 1.0).abs() > PROPORTION_SUM_TOLERANCE {
                r.problems.push(
                    format!("{P}.proportions"),
                    format!("must sum to 1 (within {PROPORTION_SUM_TOLERANCE}), got {sum}"),
                );
            }
        }
        if let Some(e) = &edges {
            if p.len() != e.len() + 1 {
                r.problems.push(
                    format!("{P}.proportions"),
                    format!(
                        "needs one entry more than edges ({}), got {}",
                        e.len() + 1,
                        p.len()
                    ),
                );
            }
        }
    }
    let mut share = |name: &str| -> Option<f64> {
        let x = r.number(obj.get(name)?, &format!("{P}.{name}"))?;
        if !(0.0..=1.0).contains(&x) {
            r.problems.push(
                format!("{P}.{name}"),
                format!("must lie in [0, 1], got {x}"),
            );
        }
        Some(x)
    };
    let accept_rate = share("accept_rate");
    let mean_confidence = share("mean_confidence");
    (r.problems.len() == before).then_some(ConfidenceReference {
        items: items?,
        edges: edges?,
        proportions: proportions?,
        accept_rate,
        mean_confidence,
    })
}
