//! One model's routing table inside a snapshot: which loaded version answers a request.

use super::{DecisionCounters, LookupError};
use crate::mapfile::CalibrationMap;
use std::collections::HashMap;
use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::Arc;

/// Seed of the request-id hash that picks canary requests (any fixed value; changing it moves
/// requests between versions).
const CANARY_SEED: u64 = 0x6361_6e61_7279_0001;
/// Seed of the request-id hash that picks the audit sample; different from the canary's so the
/// audit sample is independent of the canary split.
const AUDIT_SEED: u64 = 0x6175_6469_7400_0002;

/// 2^64 as f64: turns a share in [0, 1] into a cut on [0, 2^64].
const TWO_POW_64: f64 = 18_446_744_073_709_551_616.0;

/// The cut below which a hash in [0, 2^64) falls with probability `share`.
pub(super) fn cut_for(share: f64) -> u128 {
    (share.clamp(0.0, 1.0) * TWO_POW_64) as u128
}

/// Fixed-point scale of the summed absolute confidence change (1e-9 resolution).
const CHANGE_SCALE: f64 = 1e9;

/// A loaded, valid map version with the counters of its (model, version).
#[derive(Debug)]
pub struct ServedMap {
    /// The validated map (shared with the store's file cache: parameters are held once).
    pub map: Arc<CalibrationMap>,
    /// Its model, version and classes, shared with the decision log.
    pub key: Arc<crate::journal::MapKey>,
    /// Shared with every snapshot that serves this (model, version).
    pub counters: Arc<DecisionCounters>,
    /// Accepted items whose request-id hash falls below this cut are marked for audit.
    pub audit_cut: u128,
    /// The share of accepted items marked for audit (the audit probability π of METHODS.md 4.1),
    /// from the serve flag or else the map's `policy.audit_rate`.
    pub audit_rate: f64,
}

impl ServedMap {
    /// True when an accepted item with this request id belongs to the audit sample (never
    /// without a request id: its outcome could not be joined back).
    #[inline]
    pub fn audits(&self, request_id: &str) -> bool {
        self.audit_cut > 0
            && !request_id.is_empty()
            && u128::from(xxhash_rust::xxh3::xxh3_64_with_seed(
                request_id.as_bytes(),
                AUDIT_SEED,
            )) < self.audit_cut
    }
}

/// How a version was chosen for a request.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Route {
    /// The model's active version.
    Active,
    /// The canary version, for its share of request ids.
    Canary,
    /// The version the request pinned.
    Pinned,
}

/// Disagreements between the active version and a shadow version, counted per request.
#[derive(Debug, Default)]
pub struct ShadowStats {
    compared: AtomicU64,
    accept_to_defer: AtomicU64,
    defer_to_accept: AtomicU64,
    /// Sum of |Δ confidence| in units of 1/[`CHANGE_SCALE`].
    abs_change_scaled: AtomicU64,
}

impl ShadowStats {
    /// Counts one comparison: the active and shadow decisions (true = accept) and confidences.
    #[inline]
    pub fn record(&self, active_accept: bool, shadow_accept: bool, confidence_change: f64) {
        self.compared.fetch_add(1, Ordering::Relaxed);
        match (active_accept, shadow_accept) {
            (true, false) => {
                self.accept_to_defer.fetch_add(1, Ordering::Relaxed);
            }
            (false, true) => {
                self.defer_to_accept.fetch_add(1, Ordering::Relaxed);
            }
            _ => {}
        }
        // |Δ| ≤ 1, so one addition is at most 1e9: no overflow for 1.8e10 requests.
        let scaled = (confidence_change.abs().min(1.0) * CHANGE_SCALE).round() as u64;
        self.abs_change_scaled.fetch_add(scaled, Ordering::Relaxed);
    }

    /// (compared, accept→defer, defer→accept, mean |Δ confidence|).
    pub fn get(&self) -> (u64, u64, u64, f64) {
        let n = self.compared.load(Ordering::Relaxed);
        let sum = self.abs_change_scaled.load(Ordering::Relaxed) as f64 / CHANGE_SCALE;
        (
            n,
            self.accept_to_defer.load(Ordering::Relaxed),
            self.defer_to_accept.load(Ordering::Relaxed),
            if n == 0 { 0.0 } else { sum / n as f64 },
        )
    }
}

/// The position of a request id on [0, 2^64): requests whose position falls below the canary's
/// cut go to the canary. Stable across processes and releases (xxh3 with a fixed seed).
#[inline]
pub fn canary_bucket(request_id: &str) -> u64 {
    xxhash_rust::xxh3::xxh3_64_with_seed(request_id.as_bytes(), CANARY_SEED)
}

/// A canary: a version and the cut below which request ids go to it.
#[derive(Debug, Clone)]
pub(super) struct Canary {
    pub(super) map: Arc<ServedMap>,
    /// fraction · 2^64, so `bucket < cut` holds for that fraction of ids.
    pub(super) cut: u128,
}

impl Canary {
    pub(super) fn new(map: Arc<ServedMap>, fraction: f64) -> Self {
        Canary {
            map,
            cut: cut_for(fraction),
        }
    }
}

/// A shadow: a version computed beside the active one, and its disagreement counters.
#[derive(Debug, Clone)]
pub(super) struct Shadow {
    pub(super) map: Arc<ServedMap>,
    pub(super) stats: Arc<ShadowStats>,
}

/// One model's routing table.
#[derive(Debug, Clone)]
pub struct ModelRoute {
    pub(super) active: Arc<ServedMap>,
    pub(super) canary: Option<Canary>,
    pub(super) shadow: Option<Shadow>,
    /// Every loaded version, for pinned requests.
    pub(super) versions: HashMap<String, Arc<ServedMap>>,
}

impl ModelRoute {
    /// The active version.
    pub fn active(&self) -> &Arc<ServedMap> {
        &self.active
    }

    /// The version that answers a request with this id and pin (empty: no pin).
    ///
    /// # Errors
    /// [`LookupError::UnknownVersion`] when the pinned version is not loaded.
    #[inline]
    pub fn pick(
        &self,
        request_id: &str,
        pin: &str,
    ) -> Result<(&Arc<ServedMap>, Route), LookupError> {
        if !pin.is_empty() {
            return match self.versions.get(pin) {
                Some(m) => Ok((m, Route::Pinned)),
                None => {
                    let mut known: Vec<String> = self.versions.keys().cloned().collect();
                    known.sort();
                    Err(LookupError::UnknownVersion {
                        model: self.active.map.model().to_owned(),
                        version: pin.to_owned(),
                        known,
                    })
                }
            };
        }
        if let Some(c) = &self.canary {
            if !request_id.is_empty() && u128::from(canary_bucket(request_id)) < c.cut {
                return Ok((&c.map, Route::Canary));
            }
        }
        Ok((&self.active, Route::Active))
    }

    /// The shadow version and its counters, if one is set.
    #[inline]
    pub fn shadow(&self) -> Option<(&Arc<ServedMap>, &ShadowStats)> {
        self.shadow.as_ref().map(|s| (&s.map, &*s.stats))
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn canary_share_is_close_to_the_fraction_and_stable() {
        // 20,000 ids: the share's standard error is sqrt(0.1·0.9/20000) ≈ 0.0021 (closed form);
        // allow 5 standard errors.
        let cut = Canary::new(Arc::new(served()), 0.1).cut;
        let n = 20_000;
        let hits = (0..n)
            .filter(|i| u128::from(canary_bucket(&format!("req-{i}"))) < cut)
            .count();
        let share = hits as f64 / n as f64;
        assert!((share - 0.1).abs() < 5.0 * 0.0021, "{share}");
        assert_eq!(canary_bucket("req-7"), canary_bucket("req-7"));
        assert_eq!(Canary::new(Arc::new(served()), 1.0).cut, 1u128 << 64);
        assert_eq!(Canary::new(Arc::new(served()), 0.0).cut, 0);
    }

    #[test]
    fn the_audit_sample_takes_its_share_and_never_an_empty_id() {
        let mut m = served();
        m.audit_cut = cut_for(0.2);
        let n = 20_000;
        let hits = (0..n).filter(|i| m.audits(&format!("req-{i}"))).count();
        // Standard error sqrt(0.2·0.8/20000) ≈ 0.0028 (closed form); allow 5.
        assert!(
            (hits as f64 / n as f64 - 0.2).abs() < 5.0 * 0.0028,
            "{hits}"
        );
        assert!(!m.audits(""));
        m.audit_cut = 0;
        assert!(!m.audits("req-1"));
    }

    #[test]
    fn shadow_stats_count_flips_and_mean_change() {
        let s = ShadowStats::default();
        s.record(true, false, 0.25);
        s.record(false, true, -0.5);
        s.record(true, true, 0.0);
        let (n, ad, da, mean) = s.get();
        assert_eq!((n, ad, da), (3, 1, 1));
        assert!((mean - 0.25).abs() < 1e-9, "{mean}");
    }

    fn served() -> ServedMap {
        // An identity map, K = 2, threshold 0.5.
        use crate::decision::DecisionPolicy;
        use crate::mapfile::MapParts;
        use crate::method::{InputForm, Method};
        ServedMap {
            key: Arc::new(crate::journal::MapKey {
                model: "m".into(),
                map_version: "v1".into(),
                classes: 2,
            }),
            map: Arc::new(
                CalibrationMap::from_parts(MapParts {
                    model: "m".into(),
                    map_version: "v1".into(),
                    classes: 2,
                    class_names: None,
                    input: InputForm::Logits,
                    method: Method::Identity,
                    policy: DecisionPolicy::global(0.5),
                    provenance: serde_json::Map::new(),
                })
                .unwrap(),
            ),
            counters: Arc::default(),
            audit_cut: 0,
            audit_rate: 0.0,
        }
    }
}
