//! The live maps. For each model: the active version, the other loaded versions (which a request
//! may pin), an optional canary and an optional shadow, all held in an immutable [`Snapshot`]
//! that is published whole and never changed in place.
//!
//! Readers take the current snapshot without locking (arc-swap) and keep it for one request.
//! Writers (the store watcher and the admin API) take the rollout state's mutex, compute the next
//! state, and publish a new snapshot. Decision counters belong to a (model, map version) pair and
//! survive swaps.

mod rollout;
mod route;
mod store;
mod watch;

pub use rollout::{
    ModelView, RejectionView, RolloutError, RolloutView, VersionState, VersionView, HISTORY_LEN,
    REJECTIONS_KEPT,
};
pub use route::{canary_bucket, ModelRoute, Route, ServedMap, ShadowStats};
pub use store::{load_dir, DirLoad, StoreError, POINTER_FILE};
pub use watch::{spawn_store_watcher, WatchOptions};

use crate::mapfile::CalibrationMap;
use arc_swap::ArcSwap;
use rollout::Rollout;
use std::collections::{BTreeMap, HashMap};
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::{Arc, Mutex, MutexGuard};
use tokio::sync::watch as latch;

/// Accepted, deferred and audited decisions of one (model, map version).
#[derive(Debug, Default)]
pub struct DecisionCounters {
    accepted: AtomicU64,
    deferred: AtomicU64,
    audited: AtomicU64,
}

impl DecisionCounters {
    /// Counts one decision; `audited` only for an accepted item marked for audit.
    #[inline]
    pub fn record(&self, accepted: bool, audited: bool) {
        let c = if accepted {
            &self.accepted
        } else {
            &self.deferred
        };
        c.fetch_add(1, Ordering::Relaxed);
        if audited {
            self.audited.fetch_add(1, Ordering::Relaxed);
        }
    }

    /// (accepted, deferred) so far.
    pub fn get(&self) -> (u64, u64) {
        (
            self.accepted.load(Ordering::Relaxed),
            self.deferred.load(Ordering::Relaxed),
        )
    }

    /// Accepted items marked for audit so far.
    pub fn audited(&self) -> u64 {
        self.audited.load(Ordering::Relaxed)
    }
}

/// Settings of a registry that apply to every map it loads.
#[derive(Debug, Clone, Copy)]
pub struct RegistryOptions {
    /// Share of accepted items, chosen from a hash of the request id, marked for audit; in
    /// [0, 1]. `None`: each map's own `policy.audit_rate` (0 when it sets none).
    pub audit_rate: Option<f64>,
    /// Maps with more classes are refused at load (from the store or pushed), with the reason.
    pub max_classes: usize,
}

impl Default for RegistryOptions {
    fn default() -> Self {
        RegistryOptions {
            audit_rate: None,
            max_classes: crate::service::DEFAULT_MAX_CLASSES,
        }
    }
}

/// An immutable routing table: one [`ModelRoute`] per model.
#[derive(Debug, Default)]
pub struct Snapshot {
    by_model: HashMap<String, ModelRoute>,
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
    /// The request pinned a version that is not loaded.
    UnknownVersion {
        /// The model.
        model: String,
        /// The version asked for.
        version: String,
        /// Versions that are loaded, sorted.
        known: Vec<String>,
    },
}

impl Snapshot {
    /// The route of `model`; an empty name picks the only model when exactly one is loaded.
    ///
    /// # Errors
    /// [`LookupError`] when nothing matches.
    #[inline]
    pub fn get(&self, model: &str) -> Result<&ModelRoute, LookupError> {
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

    /// A loaded version of a model (active, canary, shadow or any other loaded version).
    pub fn version(&self, model: &str, version: &str) -> Option<&Arc<ServedMap>> {
        self.by_model.get(model)?.versions.get(version)
    }

    /// The active map of every model, sorted by model name.
    pub fn maps(&self) -> Vec<&Arc<ServedMap>> {
        let mut v: Vec<_> = self.by_model.values().map(ModelRoute::active).collect();
        v.sort_by(|a, b| a.map.model().cmp(b.map.model()));
        v
    }
}

/// The live registry shared by every request handler.
#[derive(Debug)]
pub struct Registry {
    /// ArcSwap: readers load the current snapshot without a lock; writers replace it whole.
    current: ArcSwap<Snapshot>,
    /// watch: the readiness latch health reporting waits on (true once the maps have loaded).
    ready: latch::Sender<bool>,
    /// watch: how many snapshots have been published, for whoever waits for a change.
    generation: latch::Sender<u64>,
    /// Mutex: the rollout state, taken by the store watcher and the admin API, never per
    /// request. Holding it across a store scan serialises scans and admin changes.
    rollout: Mutex<Rollout>,
}

impl Default for Registry {
    fn default() -> Self {
        Registry {
            current: ArcSwap::from_pointee(Snapshot::default()),
            ready: latch::channel(false).0,
            generation: latch::channel(0).0,
            rollout: Mutex::new(Rollout::new(None)),
        }
    }
}

/// Gives the memory that reading maps freed back to the system (see [`crate::heap`]), logging
/// how long it took.
fn release_freed() {
    let started = std::time::Instant::now();
    let released = crate::heap::release_freed();
    tracing::debug!(
        released,
        micros = started.elapsed().as_micros() as u64,
        "gave the memory freed by reading maps back to the system"
    );
}

impl Registry {
    /// An empty, not-ready registry with no store on disk (maps arrive by [`Registry::publish`]).
    pub fn new() -> Arc<Self> {
        Arc::new(Self::default())
    }

    /// An empty, not-ready registry backed by the map store in `dir`; call
    /// [`Registry::rescan`] (or start the watcher) to load it.
    pub fn with_store(dir: &Path) -> Arc<Self> {
        Self::with_options(Some(dir), RegistryOptions::default())
    }

    /// An empty, not-ready registry, with a store in `dir` if given.
    pub fn with_options(dir: Option<&Path>, options: RegistryOptions) -> Arc<Self> {
        let mut rollout = Rollout::new(dir.map(Path::to_owned));
        rollout.set_audit_rate(options.audit_rate);
        rollout.set_max_classes(options.max_classes);
        Arc::new(Registry {
            rollout: Mutex::new(rollout),
            ..Self::default()
        })
    }

    /// The map store's directory, if there is one.
    pub fn store_dir(&self) -> Option<PathBuf> {
        self.lock().store_dir().map(Path::to_owned)
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

    fn lock(&self) -> MutexGuard<'_, Rollout> {
        self.rollout.lock().unwrap_or_else(|e| e.into_inner())
    }

    fn publish_from(&self, rollout: &Rollout) {
        self.current.store(Arc::new(rollout.snapshot()));
        self.generation.send_modify(|g| *g += 1);
    }

    /// A receiver that sees every publication of a new snapshot (the value counts them).
    pub fn generations(&self) -> latch::Receiver<u64> {
        self.generation.subscribe()
    }

    /// Publishes `maps` as the active versions (one per model; a later duplicate replaces an
    /// earlier one), without a store: for embedding and tests.
    pub fn publish(&self, maps: Vec<CalibrationMap>) {
        let mut r = self.lock();
        r.replace_all(maps);
        self.publish_from(&r);
    }

    /// Reads the store again and publishes what changed. Releases the readiness latch once every
    /// model seen has an active version and no unattributed file was refused.
    ///
    /// Blocking: reads files. Returns the view after the scan. After a scan that read files, the
    /// memory their parsing freed is given back to the system (see [`crate::heap`]).
    pub fn rescan(&self) -> RolloutView {
        let (view, read) = {
            let mut r = self.lock();
            let before = r.files_read();
            if r.rescan() {
                self.publish_from(&r);
            }
            if r.ready() {
                self.mark_ready();
            }
            (r.view(), r.files_read() != before)
        };
        if read {
            release_freed();
        }
        view
    }

    /// What every model serves, with versions, canary, shadow and recent rejections.
    pub fn view(&self) -> RolloutView {
        self.lock().view()
    }

    /// Validates `bytes` as a map, writes it into the store as `<model>/<version>.json`
    /// atomically, rescans, and activates it when asked. Returns (model, version, digest,
    /// written).
    ///
    /// # Errors
    /// [`RolloutError`] for an invalid map, a version that exists with other content, a class
    /// count that differs from the active version's, or a store that cannot be written.
    pub fn push(
        &self,
        bytes: &[u8],
        activate: bool,
    ) -> Result<(String, String, String, bool), RolloutError> {
        let out = {
            let mut r = self.lock();
            let out = r.push(bytes, activate);
            self.publish_from(&r);
            if r.ready() {
                self.mark_ready();
            }
            out
        };
        release_freed();
        out
    }

    /// Makes `version` the active version of `model` (persisted in the pointer file when there
    /// is a store).
    ///
    /// # Errors
    /// [`RolloutError`] when the model or version is not loaded or the pointer cannot be
    /// written.
    pub fn activate(&self, model: &str, version: &str) -> Result<ModelView, RolloutError> {
        self.change(model, |r| r.activate(model, version))
    }

    /// Makes the previously active version of `model` active again.
    ///
    /// # Errors
    /// [`RolloutError`] when there is no earlier version still loaded.
    pub fn rollback(&self, model: &str) -> Result<ModelView, RolloutError> {
        self.change(model, |r| r.rollback(model))
    }

    /// Sends `fraction` of request ids for `model` to `version`; an empty version clears it.
    ///
    /// # Errors
    /// [`RolloutError`] for an unknown model or version, the active version, or a fraction
    /// outside (0, 1].
    pub fn set_canary(
        &self,
        model: &str,
        version: &str,
        fraction: f64,
    ) -> Result<ModelView, RolloutError> {
        self.change(model, |r| r.set_canary(model, version, fraction))
    }

    /// Computes `version` beside the active one for every request of `model`; an empty version
    /// clears it.
    ///
    /// # Errors
    /// [`RolloutError`] for an unknown model or version, or the active version.
    pub fn set_shadow(&self, model: &str, version: &str) -> Result<ModelView, RolloutError> {
        self.change(model, |r| r.set_shadow(model, version))
    }

    fn change(
        &self,
        model: &str,
        f: impl FnOnce(&mut Rollout) -> Result<(), RolloutError>,
    ) -> Result<ModelView, RolloutError> {
        let mut r = self.lock();
        f(&mut r)?;
        self.publish_from(&r);
        r.model_view(model)
    }

    /// Releases the readiness latch.
    pub fn mark_ready(&self) {
        self.ready.send_if_modified(|r| !std::mem::replace(r, true));
    }

    /// A receiver that sees the readiness latch change.
    pub fn readiness(&self) -> latch::Receiver<bool> {
        self.ready.subscribe()
    }

    /// True once every map has loaded.
    pub fn is_ready(&self) -> bool {
        *self.ready.borrow()
    }

    /// What the decision log's live-quality windows need to know about each (model, map
    /// version): the map's reference and promise, and the audit rate applied to it (defaults for
    /// a version no longer loaded).
    pub fn spec_lookup(self: &Arc<Self>) -> crate::journal::SpecLookup {
        let registry = self.clone();
        Arc::new(move |model: &str, version: &str| {
            registry.with_snapshot(|s| {
                s.version(model, version)
                    .map_or_else(crate::live::WindowSpec::default, |m| {
                        crate::live::WindowSpec::of(&m.map).with_audit_rate(m.audit_rate)
                    })
            })
        })
    }

    /// (model, map version, accepted, deferred, audited) for every pair served since start,
    /// sorted.
    pub fn decision_counts(&self) -> Vec<(String, String, u64, u64, u64)> {
        let counters: BTreeMap<(String, String), (u64, u64, u64)> = self.lock().counters();
        counters
            .into_iter()
            .map(|((m, v), (a, d, au))| (m, v, a, d, au))
            .collect()
    }
}
