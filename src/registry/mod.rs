//! The live maps: one active [`CalibrationMap`] per model, held in an immutable [`Snapshot`] that
//! is published whole and never changed in place.
//!
//! Readers take the current snapshot without locking (arc-swap) and keep it for one request; a
//! new set of maps is published by swapping in a new snapshot. Decision counters belong to a
//! (model, map version) pair and survive swaps.

mod store;

pub use store::{load_dir, DirLoad};

use crate::mapfile::CalibrationMap;
use arc_swap::ArcSwap;
use std::collections::{BTreeMap, HashMap};
use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::{Arc, Mutex};
use tokio::sync::watch;

/// Accepted and deferred decisions of one (model, map version).
#[derive(Debug, Default)]
pub struct DecisionCounters {
    accepted: AtomicU64,
    deferred: AtomicU64,
}

impl DecisionCounters {
    /// Counts one decision.
    #[inline]
    pub fn record(&self, accepted: bool) {
        let c = if accepted {
            &self.accepted
        } else {
            &self.deferred
        };
        c.fetch_add(1, Ordering::Relaxed);
    }

    /// (accepted, deferred) so far.
    pub fn get(&self) -> (u64, u64) {
        (
            self.accepted.load(Ordering::Relaxed),
            self.deferred.load(Ordering::Relaxed),
        )
    }
}

/// A map being served, with the counters of its (model, version).
#[derive(Debug)]
pub struct ActiveMap {
    /// The validated map.
    pub map: CalibrationMap,
    /// Shared with every snapshot that serves this (model, version).
    pub counters: Arc<DecisionCounters>,
}

/// An immutable set of active maps, one per model.
#[derive(Debug, Default)]
pub struct Snapshot {
    by_model: HashMap<String, Arc<ActiveMap>>,
}

/// Why a request names no usable map.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum LookupError {
    /// Nothing is loaded yet.
    NoMaps,
    /// No map for this model.
    UnknownModel {
        /// The model asked for.
        model: String,
        /// Models that are loaded, sorted.
        known: Vec<String>,
    },
    /// The request left the model empty while several are loaded.
    ModelRequired {
        /// How many models are loaded.
        loaded: usize,
    },
}

impl Snapshot {
    /// The active map for `model`; an empty name picks the only model when exactly one is loaded.
    ///
    /// # Errors
    /// [`LookupError`] when nothing matches.
    #[inline]
    pub fn get(&self, model: &str) -> Result<&Arc<ActiveMap>, LookupError> {
        if let Some(m) = self.by_model.get(model) {
            return Ok(m);
        }
        if self.by_model.is_empty() {
            return Err(LookupError::NoMaps);
        }
        if model.is_empty() {
            if self.by_model.len() == 1 {
                if let Some(m) = self.by_model.values().next() {
                    return Ok(m);
                }
            }
            return Err(LookupError::ModelRequired {
                loaded: self.by_model.len(),
            });
        }
        let mut known: Vec<String> = self.by_model.keys().cloned().collect();
        known.sort();
        Err(LookupError::UnknownModel {
            model: model.to_owned(),
            known,
        })
    }

    /// Every active map, sorted by model name.
    pub fn maps(&self) -> Vec<&Arc<ActiveMap>> {
        let mut v: Vec<_> = self.by_model.values().collect();
        v.sort_by(|a, b| a.map.model().cmp(b.map.model()));
        v
    }
}

/// The live registry shared by every request handler.
#[derive(Debug)]
pub struct Registry {
    /// ArcSwap: readers load the current snapshot without a lock; writers replace it whole.
    current: ArcSwap<Snapshot>,
    /// watch: the readiness latch health reporting waits on (true once every map has loaded).
    ready: watch::Sender<bool>,
    /// Mutex: touched only when maps are published or counts are listed, never per request.
    counters: Mutex<BTreeMap<(String, String), Arc<DecisionCounters>>>,
}

impl Default for Registry {
    fn default() -> Self {
        Registry {
            current: ArcSwap::from_pointee(Snapshot::default()),
            ready: watch::channel(false).0,
            counters: Mutex::new(BTreeMap::new()),
        }
    }
}

impl Registry {
    /// An empty, not-ready registry.
    pub fn new() -> Arc<Self> {
        Arc::new(Self::default())
    }

    /// The current snapshot (cheap: one atomic load and a reference-count increment).
    #[inline]
    pub fn snapshot(&self) -> Arc<Snapshot> {
        self.current.load_full()
    }

    /// Runs `f` on the current snapshot without touching its reference count.
    #[inline]
    pub fn with_snapshot<T>(&self, f: impl FnOnce(&Snapshot) -> T) -> T {
        let guard = self.current.load();
        f(&guard)
    }

    /// Publishes `maps` as the new set of active maps (one per model; the caller has checked
    /// that models are distinct — a later duplicate replaces an earlier one).
    pub fn publish(&self, maps: Vec<CalibrationMap>) {
        let mut counters = self.counters.lock().unwrap_or_else(|e| e.into_inner());
        let mut by_model = HashMap::with_capacity(maps.len());
        for map in maps {
            let key = (map.model().to_owned(), map.map_version().to_owned());
            let c = counters.entry(key).or_default().clone();
            by_model.insert(
                map.model().to_owned(),
                Arc::new(ActiveMap { map, counters: c }),
            );
        }
        self.current.store(Arc::new(Snapshot { by_model }));
    }

    /// Releases the readiness latch.
    pub fn mark_ready(&self) {
        self.ready.send_replace(true);
    }

    /// A receiver that sees the readiness latch change.
    pub fn readiness(&self) -> watch::Receiver<bool> {
        self.ready.subscribe()
    }

    /// True once every map has loaded.
    pub fn is_ready(&self) -> bool {
        *self.ready.borrow()
    }

    /// (model, map version, accepted, deferred) for every pair seen since start, sorted.
    pub fn decision_counts(&self) -> Vec<(String, String, u64, u64)> {
        let counters = self.counters.lock().unwrap_or_else(|e| e.into_inner());
        counters
            .iter()
            .map(|((m, v), c)| {
                let (a, d) = c.get();
                (m.clone(), v.clone(), a, d)
            })
            .collect()
    }
}
