//! Answering one row: look up the map, check the logits, apply, decide, encode. This is the
//! request hot path: no lock, no I/O, no logging above debug, and no allocation but the response's
//! own vectors (the f64 workspace is per thread and reused).

use crate::decision::Decision;
use crate::method::Workspace;
use crate::proto::v1::{
    CalibrateRequest, CalibrateResponse, Decision as PbDecision, Route as PbRoute,
};
use crate::registry::{LookupError, Route, ServedMap, Snapshot};
use std::cell::RefCell;
use std::sync::Arc;

thread_local! {
    /// One workspace per worker thread: grown once to the largest K, then reused.
    static WORKSPACE: RefCell<Workspace> = RefCell::new(Workspace::new());
}

/// Why one row could not be answered.
#[derive(Debug, Clone, PartialEq)]
pub enum RowError {
    /// The map lookup failed.
    Lookup(LookupError),
    /// No logits at all.
    EmptyLogits {
        /// Values the map expects.
        expected: usize,
    },
    /// The wrong number of logits.
    LogitsLen {
        /// Values the map expects.
        expected: usize,
        /// Values received.
        got: usize,
    },
    /// More logits than this sidecar accepts (`--max-classes`); refused before any lookup.
    TooManyLogits {
        /// The limit.
        max: usize,
        /// Values received.
        got: usize,
    },
    /// A NaN or infinite logit.
    NonFinite {
        /// 0-based position.
        index: usize,
        /// The value.
        value: f32,
    },
}

impl std::fmt::Display for RowError {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match self {
            RowError::Lookup(LookupError::NoMaps) => write!(f, "no map is loaded yet"),
            RowError::Lookup(LookupError::UnknownModel { model, known }) => {
                write!(
                    f,
                    "no map for model {model:?} (loaded: {})",
                    known.join(", ")
                )
            }
            RowError::Lookup(LookupError::ModelRequired { loaded }) => {
                write!(f, "model is empty but {loaded} models are loaded; name one")
            }
            RowError::Lookup(LookupError::UnknownVersion {
                model,
                version,
                known,
            }) => write!(
                f,
                "model {model:?} has no loaded map version {version:?} (loaded: {})",
                known.join(", ")
            ),
            RowError::EmptyLogits { expected } => {
                write!(f, "logits is empty; expected {expected} values")
            }
            RowError::LogitsLen { expected, got } => {
                write!(f, "expected {expected} logits, got {got}")
            }
            RowError::TooManyLogits { max, got } => {
                write!(
                    f,
                    "{got} logits; this sidecar accepts at most {max} (--max-classes)"
                )
            }
            RowError::NonFinite { index, value } => {
                write!(f, "logits[{index}] is {value}; every logit must be finite")
            }
        }
    }
}

/// Calibrates one request against `snapshot`, counting the decision. The version is the pinned
/// one, else the canary for its share of request ids, else the active one; a shadow version, if
/// set, is computed beside the active one and only its disagreement is counted.
///
/// # Errors
/// [`RowError`] for an unknown model or version, missing maps or bad logits; nothing is counted
/// then.
pub fn answer(snapshot: &Snapshot, req: &CalibrateRequest) -> Result<CalibrateResponse, RowError> {
    // The copy is this call's own, so its logits' buffer can carry the probabilities.
    answer_by(snapshot, &mut req.clone(), true).map(|(resp, _)| resp)
}

/// [`answer`] for an owned request, also returning the map version that answered. On success
/// the request id moves into the response, and with `reuse_logits` the logits' buffer carries
/// the response's probabilities (the logits are read into the workspace first), so the answer
/// allocates only the version name; without it the logits stay in `req`. On error `req` is
/// untouched.
///
/// # Errors
/// As [`answer`].
#[inline]
pub fn answer_by<'s>(
    snapshot: &'s Snapshot,
    req: &mut CalibrateRequest,
    reuse_logits: bool,
) -> Result<(CalibrateResponse, &'s Arc<ServedMap>), RowError> {
    let route = snapshot.get(&req.model).map_err(RowError::Lookup)?;
    let (served, how) = route
        .pick(&req.request_id, &req.map_version)
        .map_err(RowError::Lookup)?;
    let map = &served.map;
    let expected = map.input_len();
    if req.logits.is_empty() {
        return Err(RowError::EmptyLogits { expected });
    }
    if req.logits.len() != expected {
        return Err(RowError::LogitsLen {
            expected,
            got: req.logits.len(),
        });
    }
    // One vectorised scan for the common case; the position is looked for only on failure.
    if !crate::numeric::all_finite(&req.logits) {
        let index = req.logits.iter().position(|v| !v.is_finite()).unwrap_or(0);
        return Err(RowError::NonFinite {
            index,
            value: req.logits[index],
        });
    }
    let k = map.classes();
    let top_k = (req.top_k as usize).min(k);
    let shadow = route.shadow().filter(|_| how == Route::Active);
    let mut resp = WORKSPACE.with_borrow_mut(|ws| {
        ws.apply(map.method(), map.input(), k, &req.logits);
        // All K probabilities go back unless the caller asked for the top few; a shadow version
        // still reads the logits below, so their buffer is reused only without one.
        let mut out = (top_k == 0).then(|| {
            if reuse_logits && shadow.is_none() {
                std::mem::take(&mut req.logits)
            } else {
                Vec::with_capacity(k)
            }
        });
        let predicted = ws.argmax_narrowed(out.as_mut());
        let q = ws.row();
        let confidence = q[predicted];
        let (probabilities, classes) = match out {
            Some(all) => (all, Vec::new()),
            None => top_entries(q, top_k),
        };
        let accept = map.policy().decide(predicted, confidence) == Decision::Accept;
        if let Some((candidate, stats)) = shadow {
            // The shadow shares the active version's shape (the rollout rules ensure it).
            let m = &candidate.map;
            let qs = ws.apply(m.method(), m.input(), m.classes(), &req.logits);
            let ps = crate::numeric::argmax(qs);
            let shadow_accept = m.policy().decide(ps, qs[ps]) == Decision::Accept;
            stats.record(accept, shadow_accept, qs[ps] - confidence);
        }
        CalibrateResponse {
            probabilities,
            predicted_class: predicted as u32,
            confidence: confidence as f32,
            decision: if accept {
                PbDecision::Accept as i32
            } else {
                PbDecision::Defer as i32
            },
            threshold: map
                .policy()
                .threshold_for(predicted)
                .map_or(f32::INFINITY, |t| t as f32),
            map_version: String::new(),
            request_id: String::new(),
            classes,
            audit: false,
            route: match how {
                Route::Active => PbRoute::Active as i32,
                Route::Canary => PbRoute::Canary as i32,
                Route::Pinned => PbRoute::Pinned as i32,
            },
        }
    });
    let accepted = resp.decision == PbDecision::Accept as i32;
    resp.audit = accepted && served.audits(&req.request_id);
    served.counters.record(accepted, resp.audit);
    resp.map_version = map.map_version().to_owned();
    resp.request_id = std::mem::take(&mut req.request_id);
    Ok((resp, served))
}

/// The `top_k` largest probabilities, largest first (ties: smaller class first), with classes.
fn top_entries(q: &[f64], top_k: usize) -> (Vec<f32>, Vec<u32>) {
    let mut idx: Vec<u32> = (0..q.len() as u32).collect();
    let order = |a: &u32, b: &u32| q[*b as usize].total_cmp(&q[*a as usize]).then(a.cmp(b));
    if top_k < idx.len() {
        idx.select_nth_unstable_by(top_k - 1, order);
        idx.truncate(top_k);
    }
    idx.sort_unstable_by(order);
    let probs = idx.iter().map(|&i| q[i as usize] as f32).collect();
    (probs, idx)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn an_owned_answer_reuses_the_logits_buffer_or_leaves_the_logits() {
        use crate::decision::DecisionPolicy;
        use crate::mapfile::{CalibrationMap, MapParts};
        use crate::method::{InputForm, Method, Temperature};
        let registry = crate::registry::Registry::new();
        registry.publish(vec![CalibrationMap::from_parts(MapParts {
            model: "m".into(),
            map_version: "v1".into(),
            classes: 3,
            class_names: None,
            input: InputForm::Logits,
            method: Method::Temperature(Temperature::try_new(2.0, "t").unwrap()),
            policy: DecisionPolicy::global(0.5),
            provenance: serde_json::Map::new(),
        })
        .unwrap()]);
        let req = CalibrateRequest {
            model: "m".into(),
            request_id: "r-1".into(),
            logits: vec![0.5, 2.0, -1.0],
            ..CalibrateRequest::default()
        };
        let snapshot = registry.snapshot();
        let want = answer(&snapshot, &req).unwrap();
        for reuse in [true, false] {
            let mut owned = req.clone();
            let buffer = owned.logits.as_ptr();
            let (resp, served) = answer_by(&snapshot, &mut owned, reuse).unwrap();
            assert_eq!(resp, want);
            assert_eq!(served.key.map_version, "v1");
            assert!(owned.request_id.is_empty());
            if reuse {
                assert!(owned.logits.is_empty());
                assert_eq!(resp.probabilities.as_ptr(), buffer);
            } else {
                assert_eq!(owned.logits, req.logits);
            }
        }
        // A refused row leaves the request as it was.
        let mut bad = CalibrateRequest {
            logits: vec![0.5, f32::NAN, 1.0],
            ..req.clone()
        };
        assert!(answer_by(&snapshot, &mut bad, true).is_err());
        assert_eq!(bad.request_id, "r-1");
        assert_eq!(bad.logits.len(), 3);
    }

    #[test]
    fn top_entries_are_sorted_with_stable_ties() {
        let (p, c) = top_entries(&[0.1, 0.3, 0.3, 0.05, 0.25], 3);
        assert_eq!(c, [1, 2, 4]);
        assert_eq!(p, [0.3f32, 0.3, 0.25]);
        let (_, c) = top_entries(&[0.5, 0.5], 2);
        assert_eq!(c, [0, 1]);
    }
}
