//! The rollout state: per model, the loaded versions, the active one and its history, the canary
//! and the shadow; and the rules that move it (a store scan, or an admin call).
//!
//! Rules, all so that a bad map never takes the place of a good one:
//! - a version, once loaded, is immutable: a file that changes its content under the same
//!   version is refused and the loaded content keeps serving;
//! - a new version must take as many inputs and classes as the active version;
//! - the active version is the one the model's pointer file names or, without a pointer file,
//!   the newest valid version (latest `provenance.created_at`, then the greater version name in
//!   natural order); a pointer to a version that is not loaded is refused and the current active
//!   version stays;
//! - a file that disappears unloads its version unless that version is active, canary or
//!   shadow, which keep serving from memory.

use super::route::{cut_for, Canary, ModelRoute, ServedMap, Shadow, ShadowStats};
use super::store::{self, FileCache, StoreError};
use super::{DecisionCounters, Snapshot};
use crate::mapfile::CalibrationMap;
use std::cmp::Ordering;
use std::collections::{BTreeMap, HashMap, VecDeque};
use std::path::{Path, PathBuf};
use std::sync::Arc;
use std::time::SystemTime;

/// Earlier active versions remembered per model for rollback.
pub const HISTORY_LEN: usize = 16;
/// Rejections kept for the admin API (older ones are dropped; the total is still counted).
pub const REJECTIONS_KEPT: usize = 64;

/// Why an admin change was refused.
#[derive(Debug, thiserror::Error)]
pub enum RolloutError {
    /// The pushed bytes are not a valid map.
    #[error("the map is invalid: {0}")]
    InvalidMap(String),
    /// No such model is loaded.
    #[error("no model {model:?} is loaded (loaded: {})", .known.join(", "))]
    UnknownModel {
        /// The model asked for.
        model: String,
        /// Loaded models.
        known: Vec<String>,
    },
    /// No such version of the model is loaded.
    #[error("model {model:?} has no loaded version {version:?} (loaded: {}){}", .known.join(", "), .detail)]
    UnknownVersion {
        /// The model.
        model: String,
        /// The version asked for.
        version: String,
        /// Loaded versions.
        known: Vec<String>,
        /// Why the version's file was refused, if it was.
        detail: String,
    },
    /// The version exists with other content.
    #[error("model {model:?} already has version {version:?} with digest {existing}; this map's digest is {pushed}. A changed map needs a new map_version")]
    VersionConflict {
        /// The model.
        model: String,
        /// The version.
        version: String,
        /// Digest of the loaded content.
        existing: String,
        /// Digest of the pushed content.
        pushed: String,
    },
    /// The map's shape differs from the active version's.
    #[error("version {version:?} of model {model:?} takes {got} inputs for {got_classes} classes; the active version takes {active} for {active_classes}")]
    ShapeMismatch {
        /// The model.
        model: String,
        /// The refused version.
        version: String,
        /// Its input length.
        got: usize,
        /// Its class count.
        got_classes: usize,
        /// The active version's input length.
        active: usize,
        /// The active version's class count.
        active_classes: usize,
    },
    /// The sidecar runs without a map store.
    #[error("this sidecar has no map store to write to")]
    NoStore,
    /// The store could not be written.
    #[error(transparent)]
    Store(#[from] StoreError),
    /// Nothing to roll back to.
    #[error("model {model:?} has no earlier active version that is still loaded")]
    NoHistory {
        /// The model.
        model: String,
    },
    /// A canary or shadow cannot be the active version.
    #[error("version {version:?} is the active version of {model:?}; a canary or shadow must be another version")]
    IsActive {
        /// The model.
        model: String,
        /// The version.
        version: String,
    },
    /// A canary fraction outside (0, 1].
    #[error("canary fraction must lie in (0, 1], got {fraction}")]
    BadFraction {
        /// The value given.
        fraction: f64,
    },
    /// The store did not end up serving what was asked (e.g. the file vanished meanwhile).
    #[error("model {model:?}: asked for version {version:?} but {active:?} is active after the store was read again")]
    NotHonoured {
        /// The model.
        model: String,
        /// The version asked for.
        version: String,
        /// The version active now.
        active: String,
    },
}

/// Where a version stands.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum VersionState {
    /// Answers requests.
    Active,
    /// Loaded, not serving.
    Staged,
    /// Answers its share of requests.
    Canary,
    /// Computed beside the active version, never returned.
    Shadow,
    /// Its file was refused.
    Rejected,
}

/// One version of a model, for listing.
#[derive(Debug, Clone)]
pub struct VersionView {
    /// Version name (for a refused file that could not be read: its file stem).
    pub version: String,
    /// State.
    pub state: VersionState,
    /// Digest (empty when rejected).
    pub digest: String,
    /// Classes (0 when rejected).
    pub classes: usize,
    /// Method kind (empty when rejected).
    pub method: String,
    /// Source file, if any.
    pub path: Option<PathBuf>,
    /// Why the file was refused (rejected only).
    pub reason: Option<String>,
    /// Accepted decisions served by this version.
    pub accepted: u64,
    /// Deferred decisions served by this version.
    pub deferred: u64,
}

/// One model, for listing.
#[derive(Debug, Clone)]
pub struct ModelView {
    /// Model name.
    pub model: String,
    /// Active version.
    pub active: Option<String>,
    /// Earlier active versions, most recent first.
    pub history: Vec<String>,
    /// Canary version and fraction.
    pub canary: Option<(String, f64)>,
    /// Shadow version and (compared, accept→defer, defer→accept, mean |Δ confidence|).
    pub shadow: Option<(String, (u64, u64, u64, f64))>,
    /// Loaded and refused versions, by name.
    pub versions: Vec<VersionView>,
}

/// One refused file or pointer.
#[derive(Debug, Clone)]
pub struct RejectionView {
    /// The file.
    pub path: PathBuf,
    /// Why.
    pub reason: String,
    /// When it was refused.
    pub at: SystemTime,
}

/// The whole rollout state, for listing.
#[derive(Debug, Clone)]
pub struct RolloutView {
    /// Models, sorted.
    pub models: Vec<ModelView>,
    /// Recent rejections, oldest first.
    pub rejections: Vec<RejectionView>,
    /// Publications of a changed snapshot since start.
    pub publishes_total: u64,
    /// Refused files since start.
    pub rejections_total: u64,
}

#[derive(Debug)]
struct Loaded {
    served: Arc<ServedMap>,
    path: Option<PathBuf>,
}

#[derive(Debug, Default)]
struct ModelState {
    versions: BTreeMap<String, Loaded>,
    active: Option<String>,
    history: Vec<String>,
    canary: Option<(String, f64)>,
    shadow: Option<(String, Arc<ShadowStats>)>,
    /// Files of this model refused at the latest scan: (label, path, reason).
    rejected: Vec<(String, PathBuf, String)>,
    /// The pointer problem last recorded, so an unchanged one is not counted again.
    pointer_problem: Option<String>,
}

impl ModelState {
    fn active_map(&self) -> Option<&CalibrationMap> {
        let v = self.active.as_ref()?;
        self.versions.get(v).map(|l| &*l.served.map)
    }

    fn is_referenced(&self, version: &str) -> bool {
        self.active.as_deref() == Some(version)
            || self.canary.as_ref().is_some_and(|(v, _)| v == version)
            || self.shadow.as_ref().is_some_and(|(v, _)| v == version)
    }

    fn set_active(&mut self, model: &str, version: &str) -> bool {
        if self.active.as_deref() == Some(version) {
            return false;
        }
        if let Some(old) = self.active.replace(version.to_owned()) {
            self.history.retain(|h| h != &old);
            self.history.insert(0, old);
            self.history.truncate(HISTORY_LEN);
        }
        if self.canary.as_ref().is_some_and(|(v, _)| v == version) {
            self.canary = None;
        }
        if self.shadow.as_ref().is_some_and(|(v, _)| v == version) {
            self.shadow = None;
        }
        tracing::info!(model, version, "map version activated");
        true
    }

    fn shape_check(&self, model: &str, map: &CalibrationMap) -> Result<(), RolloutError> {
        match self.active_map() {
            Some(a) if a.input_len() != map.input_len() || a.classes() != map.classes() => {
                Err(RolloutError::ShapeMismatch {
                    model: model.to_owned(),
                    version: map.map_version().to_owned(),
                    got: map.input_len(),
                    got_classes: map.classes(),
                    active: a.input_len(),
                    active_classes: a.classes(),
                })
            }
            _ => Ok(()),
        }
    }
}

/// The mutable rollout state behind the registry's mutex.
#[derive(Debug)]
pub(super) struct Rollout {
    store: Option<PathBuf>,
    cache: FileCache,
    models: BTreeMap<String, ModelState>,
    /// Counters of every (model, version) ever served; they outlive unloading.
    counters: BTreeMap<(String, String), Arc<DecisionCounters>>,
    rejections: VecDeque<RejectionView>,
    rejections_total: u64,
    publishes_total: u64,
    /// Map files parsed by scans so far (a file unchanged since its last scan is not re-read).
    files_read: u64,
    /// Refused files at the latest scan that belong to no served model.
    unserved: usize,
    /// Audit cut given to every map loaded.
    audit_override: Option<f64>,
    /// Maps with more classes are refused.
    max_classes: usize,
    last_dir_error: Option<String>,
}

/// Why a map with too many classes is refused.
fn too_many_classes(classes: usize, max: usize) -> String {
    format!("the map has {classes} classes; this sidecar loads at most {max} (--max-classes)")
}

/// Compares two maps for "newest": later `provenance.created_at` first, then version name in
/// natural order.
fn newer(a: &CalibrationMap, b: &CalibrationMap) -> Ordering {
    let at = |m: &CalibrationMap| {
        m.provenance()
            .get("created_at")
            .and_then(|v| v.as_str())
            .and_then(|s| humantime::parse_rfc3339_weak(s).ok())
    };
    at(a)
        .cmp(&at(b))
        .then_with(|| natural_cmp(a.map_version(), b.map_version()))
}

/// Natural order: digit runs compare as numbers ("v10" > "v9"), other runs as text.
pub(super) fn natural_cmp(a: &str, b: &str) -> Ordering {
    let (mut a, mut b) = (a.as_bytes(), b.as_bytes());
    loop {
        match (a.first(), b.first()) {
            (None, None) => return Ordering::Equal,
            (None, Some(_)) => return Ordering::Less,
            (Some(_), None) => return Ordering::Greater,
            (Some(x), Some(y)) if x.is_ascii_digit() && y.is_ascii_digit() => {
                let na = a.iter().take_while(|c| c.is_ascii_digit()).count();
                let nb = b.iter().take_while(|c| c.is_ascii_digit()).count();
                let (da, db) = (&a[..na], &b[..nb]);
                let trim = |d: &[u8]| -> usize { d.iter().take_while(|&&c| c == b'0').count() };
                let (ta, tb) = (&da[trim(da)..], &db[trim(db)..]);
                let o = ta.len().cmp(&tb.len()).then_with(|| ta.cmp(tb));
                if o != Ordering::Equal {
                    return o;
                }
                a = &a[na..];
                b = &b[nb..];
            }
            (Some(x), Some(y)) => {
                if x != y {
                    return x.cmp(y);
                }
                a = &a[1..];
                b = &b[1..];
            }
        }
    }
}

impl Rollout {
    pub(super) fn new(store: Option<PathBuf>) -> Self {
        Rollout {
            store,
            cache: FileCache::default(),
            models: BTreeMap::new(),
            counters: BTreeMap::new(),
            rejections: VecDeque::new(),
            rejections_total: 0,
            publishes_total: 0,
            files_read: 0,
            unserved: 0,
            audit_override: None,
            max_classes: crate::service::DEFAULT_MAX_CLASSES,
            last_dir_error: None,
        }
    }

    /// The audit rate for every map, overriding the maps' own `policy.audit_rate`.
    pub(super) fn set_audit_rate(&mut self, rate: Option<f64>) {
        self.audit_override = rate;
    }

    pub(super) fn set_max_classes(&mut self, max: usize) {
        self.max_classes = max;
    }

    pub(super) fn store_dir(&self) -> Option<&Path> {
        self.store.as_deref()
    }

    fn reject(&mut self, path: &Path, reason: &str) {
        tracing::error!(path = %path.display(), reason, "map rejected; the serving map is unchanged");
        self.rejections_total += 1;
        if self.rejections.len() == REJECTIONS_KEPT {
            self.rejections.pop_front();
        }
        self.rejections.push_back(RejectionView {
            path: path.to_owned(),
            reason: reason.to_owned(),
            at: SystemTime::now(),
        });
    }

    fn served(&mut self, map: Arc<CalibrationMap>) -> Arc<ServedMap> {
        let key = (map.model().to_owned(), map.map_version().to_owned());
        let counters = self.counters.entry(key).or_default().clone();
        let audit_rate = self
            .audit_override
            .or(map.policy().audit_rate())
            .unwrap_or(0.0);
        Arc::new(ServedMap {
            key: Arc::new(crate::journal::MapKey {
                model: map.model().to_owned(),
                map_version: map.map_version().to_owned(),
                classes: u32::try_from(map.classes()).unwrap_or(u32::MAX),
            }),
            map,
            counters,
            audit_cut: cut_for(audit_rate),
            audit_rate,
        })
    }

    /// Replaces everything with `maps`, each active, without a store.
    pub(super) fn replace_all(&mut self, maps: Vec<CalibrationMap>) {
        self.models.clear();
        for map in maps {
            let (model, version) = (map.model().to_owned(), map.map_version().to_owned());
            let served = self.served(Arc::new(map));
            let st = self.models.entry(model.clone()).or_default();
            st.versions.clear();
            st.versions
                .insert(version.clone(), Loaded { served, path: None });
            st.active = Some(version);
        }
        self.publishes_total += 1;
    }

    /// Map files parsed by scans so far.
    pub(super) fn files_read(&self) -> u64 {
        self.files_read
    }

    /// True when the maps are ready to serve: at least one model is active, every model has an
    /// active version, and no refused file belongs to a model that is not served.
    pub(super) fn ready(&self) -> bool {
        !self.models.is_empty()
            && self.models.values().all(|m| m.active.is_some())
            && self.unserved == 0
            && self.last_dir_error.is_none()
    }

    /// Reads the store and applies what changed; true when the snapshot must be republished.
    pub(super) fn rescan(&mut self) -> bool {
        let Some(dir) = self.store.clone() else {
            return false;
        };
        let scan = store::scan(&dir, &mut self.cache);
        if let Some(e) = scan.dir_error {
            if self.last_dir_error.as_ref() != Some(&e) {
                self.reject(&dir, &e);
                self.last_dir_error = Some(e);
            }
            return false;
        }
        self.last_dir_error = None;
        self.files_read += scan.files.iter().filter(|f| f.fresh).count() as u64;
        let mut found: BTreeMap<String, Vec<(PathBuf, Arc<CalibrationMap>, bool)>> =
            BTreeMap::new();
        let mut refused: BTreeMap<Option<String>, Vec<(String, PathBuf, String)>> = BTreeMap::new();
        for f in scan.files {
            let max = self.max_classes;
            let result = f.result.and_then(|m| {
                if m.classes() > max {
                    Err(too_many_classes(m.classes(), max))
                } else {
                    Ok(m)
                }
            });
            match result {
                Ok(m) => found
                    .entry(m.model().to_owned())
                    .or_default()
                    .push((f.path, m, f.fresh)),
                Err(reason) => {
                    if f.fresh {
                        self.reject(&f.path, &reason);
                    }
                    let label = stem(&f.path);
                    refused
                        .entry(f.folder_model)
                        .or_default()
                        .push((label, f.path, reason));
                }
            }
        }
        let mut names: Vec<String> = found.keys().cloned().collect();
        names.extend(self.models.keys().cloned());
        names.extend(scan.pointers.keys().cloned());
        names.sort();
        names.dedup();
        let mut changed = false;
        for model in names {
            let files = found.remove(&model).unwrap_or_default();
            let pointer = scan.pointers.get(&model).cloned();
            let rejected = refused.remove(&Some(model.clone())).unwrap_or_default();
            changed |= self.apply_model(&dir, &model, files, pointer, rejected);
        }
        self.unserved = refused.values().map(Vec::len).sum::<usize>()
            + self
                .models
                .values()
                .filter(|m| m.active.is_none())
                .map(|m| m.rejected.len().max(1))
                .sum::<usize>();
        if changed {
            self.publishes_total += 1;
        }
        changed
    }

    fn apply_model(
        &mut self,
        dir: &Path,
        model: &str,
        files: Vec<(PathBuf, Arc<CalibrationMap>, bool)>,
        pointer: Option<Result<String, String>>,
        mut rejected: Vec<(String, PathBuf, String)>,
    ) -> bool {
        if files.is_empty()
            && rejected.is_empty()
            && pointer.is_none()
            && !self.models.contains_key(model)
        {
            return false;
        }
        let mut st = self.models.remove(model).unwrap_or_default();
        let mut changed = false;
        // Versions present on disk now, after the immutability and shape rules.
        let mut on_disk: BTreeMap<String, (PathBuf, Arc<CalibrationMap>)> = BTreeMap::new();
        // Loaded versions whose file now holds other content: the loaded content stays.
        let mut conflicted: Vec<String> = Vec::new();
        for (path, map, fresh) in files {
            let version = map.map_version().to_owned();
            let problem = if let Some((other, m)) = on_disk.get(&version) {
                (m.digest() != map.digest()).then(|| {
                    format!(
                        "version {version:?} is also in {} with other content",
                        other.display()
                    )
                })
            } else if let Some(l) = st.versions.get(&version) {
                if l.served.map.digest() != map.digest() {
                    conflicted.push(version.clone());
                }
                (l.served.map.digest() != map.digest()).then(|| {
                    RolloutError::VersionConflict {
                        model: model.to_owned(),
                        version: version.clone(),
                        existing: l.served.map.digest().to_owned(),
                        pushed: map.digest().to_owned(),
                    }
                    .to_string()
                })
            } else {
                st.shape_check(model, &map).err().map(|e| e.to_string())
            };
            match problem {
                Some(reason) => {
                    if fresh {
                        self.reject(&path, &reason);
                    }
                    rejected.push((version, path, reason));
                }
                None => {
                    on_disk.entry(version).or_insert((path, map));
                }
            }
        }
        for (version, (path, map)) in &on_disk {
            if let Some(l) = st.versions.get_mut(version) {
                l.path = Some(path.clone());
                continue;
            }
            tracing::info!(
                model,
                version = version.as_str(),
                method = map.method().kind(),
                digest = map.digest(),
                path = %path.display(),
                "map loaded"
            );
            let served = self.served(Arc::clone(map));
            st.versions.insert(
                version.clone(),
                Loaded {
                    served,
                    path: Some(path.clone()),
                },
            );
            changed = true;
        }
        let gone: Vec<String> = st
            .versions
            .iter()
            .filter(|(v, l)| {
                l.path.is_some() && !on_disk.contains_key(*v) && !conflicted.contains(v)
            })
            .map(|(v, _)| v.clone())
            .collect();
        for v in gone {
            if st.is_referenced(&v) {
                tracing::warn!(
                    model,
                    version = v.as_str(),
                    "map file removed; still serving it from memory"
                );
                if let Some(l) = st.versions.get_mut(&v) {
                    l.path = None;
                }
            } else {
                tracing::info!(
                    model,
                    version = v.as_str(),
                    "map file removed; version unloaded"
                );
                st.versions.remove(&v);
                changed = true;
            }
        }
        let wanted = match pointer {
            Some(Ok(v)) if st.versions.contains_key(&v) => {
                st.pointer_problem = None;
                Some(v)
            }
            Some(Ok(v)) => {
                let why = rejected
                    .iter()
                    .find(|(label, _, _)| *label == v)
                    .map_or_else(
                        || "no valid file holds it".to_owned(),
                        |(_, _, r)| r.clone(),
                    );
                let problem =
                    format!("the pointer names version {v:?}, which is not loaded: {why}");
                self.pointer_problem(dir, model, &mut st, problem);
                None
            }
            Some(Err(reason)) => {
                self.pointer_problem(dir, model, &mut st, reason);
                None
            }
            None => {
                st.pointer_problem = None;
                on_disk
                    .values()
                    .max_by(|a, b| newer(&a.1, &b.1))
                    .map(|(_, m)| m.map_version().to_owned())
            }
        };
        if let Some(v) = wanted {
            changed |= st.set_active(model, &v);
        }
        st.rejected = rejected;
        if st.active.is_some()
            || !st.versions.is_empty()
            || !st.rejected.is_empty()
            || st.pointer_problem.is_some()
        {
            self.models.insert(model.to_owned(), st);
        }
        changed
    }

    fn pointer_problem(&mut self, dir: &Path, model: &str, st: &mut ModelState, problem: String) {
        if st.pointer_problem.as_ref() != Some(&problem) {
            let path = dir.join(model).join(store::POINTER_FILE);
            self.reject(&path, &problem);
            st.pointer_problem = Some(problem);
        }
    }

    fn model(&self, model: &str) -> Result<&ModelState, RolloutError> {
        self.models
            .get(model)
            .filter(|m| m.active.is_some())
            .ok_or_else(|| RolloutError::UnknownModel {
                model: model.to_owned(),
                known: self.models.keys().cloned().collect(),
            })
    }

    fn loaded_version(&self, model: &str, version: &str) -> Result<(), RolloutError> {
        let st = self.model(model)?;
        if st.versions.contains_key(version) {
            return Ok(());
        }
        let detail = st
            .rejected
            .iter()
            .find(|(label, _, _)| label == version)
            .map_or_else(String::new, |(_, p, r)| {
                format!("; its file {} was refused: {r}", p.display())
            });
        Err(RolloutError::UnknownVersion {
            model: model.to_owned(),
            version: version.to_owned(),
            known: st.versions.keys().cloned().collect(),
            detail,
        })
    }

    /// Validates and stores a pushed map; see [`super::Registry::push`].
    pub(super) fn push(
        &mut self,
        bytes: &[u8],
        activate: bool,
    ) -> Result<(String, String, String, bool), RolloutError> {
        let dir = self.store.clone().ok_or(RolloutError::NoStore)?;
        let map = CalibrationMap::from_slice(bytes)
            .map_err(|e| RolloutError::InvalidMap(e.problems_text()))?;
        if map.classes() > self.max_classes {
            return Err(RolloutError::InvalidMap(too_many_classes(
                map.classes(),
                self.max_classes,
            )));
        }
        let (model, version) = (map.model().to_owned(), map.map_version().to_owned());
        let digest = map.digest().to_owned();
        let mut written = true;
        if let Some(st) = self.models.get(&model) {
            if let Some(l) = st.versions.get(&version) {
                if l.served.map.digest() != digest {
                    return Err(RolloutError::VersionConflict {
                        model,
                        version,
                        existing: l.served.map.digest().to_owned(),
                        pushed: digest,
                    });
                }
                written = false;
            } else {
                st.shape_check(&model, &map)?;
                // Without a pointer file the newest version would become active by itself;
                // pin the current one so a pushed version stays staged until activated.
                if let Some(active) = st.active.clone() {
                    if !dir.join(&model).join(store::POINTER_FILE).is_file() {
                        store::write_pointer(&dir, &model, &active)?;
                    }
                }
            }
        }
        if written {
            store::write_map(&dir, &map, bytes)?;
            // The caller publishes the snapshot whatever the scan found.
            self.rescan();
            self.loaded_version(&model, &version)?;
        }
        if activate {
            self.activate(&model, &version)?;
        }
        Ok((model, version, digest, written))
    }

    /// Makes `version` active; see [`super::Registry::activate`].
    pub(super) fn activate(&mut self, model: &str, version: &str) -> Result<(), RolloutError> {
        self.loaded_version(model, version)?;
        match self.store.clone() {
            Some(dir) => {
                store::write_pointer(&dir, model, version)?;
                self.rescan();
                let active = self.model(model)?.active.clone().unwrap_or_default();
                if active != version {
                    return Err(RolloutError::NotHonoured {
                        model: model.to_owned(),
                        version: version.to_owned(),
                        active,
                    });
                }
            }
            None => {
                if let Some(st) = self.models.get_mut(model) {
                    if st.set_active(model, version) {
                        self.publishes_total += 1;
                    }
                }
            }
        }
        Ok(())
    }

    /// Goes back to the previous active version; see [`super::Registry::rollback`].
    pub(super) fn rollback(&mut self, model: &str) -> Result<(), RolloutError> {
        let st = self.model(model)?;
        let leaving = st.active.clone();
        let Some(previous) = st
            .history
            .iter()
            .find(|h| st.versions.contains_key(*h))
            .cloned()
        else {
            return Err(RolloutError::NoHistory {
                model: model.to_owned(),
            });
        };
        self.activate(model, &previous)?;
        if let Some(st) = self.models.get_mut(model) {
            // Going back is not a step forward: forget the version left and the one returned to.
            st.history
                .retain(|h| Some(h) != leaving.as_ref() && *h != previous);
        }
        Ok(())
    }

    fn candidate(&self, model: &str, version: &str) -> Result<(), RolloutError> {
        self.loaded_version(model, version)?;
        if self.model(model)?.active.as_deref() == Some(version) {
            return Err(RolloutError::IsActive {
                model: model.to_owned(),
                version: version.to_owned(),
            });
        }
        Ok(())
    }

    /// Sets or clears the canary; see [`super::Registry::set_canary`].
    pub(super) fn set_canary(
        &mut self,
        model: &str,
        version: &str,
        fraction: f64,
    ) -> Result<(), RolloutError> {
        self.model(model)?;
        let next = if version.is_empty() {
            None
        } else {
            self.candidate(model, version)?;
            if !(fraction > 0.0 && fraction <= 1.0) {
                return Err(RolloutError::BadFraction { fraction });
            }
            Some((version.to_owned(), fraction))
        };
        if let Some(st) = self.models.get_mut(model) {
            tracing::info!(model, canary = ?next, "canary set");
            st.canary = next;
        }
        self.publishes_total += 1;
        Ok(())
    }

    /// Sets or clears the shadow; see [`super::Registry::set_shadow`].
    pub(super) fn set_shadow(&mut self, model: &str, version: &str) -> Result<(), RolloutError> {
        self.model(model)?;
        if !version.is_empty() {
            self.candidate(model, version)?;
        }
        if let Some(st) = self.models.get_mut(model) {
            let same = st.shadow.as_ref().is_some_and(|(v, _)| v == version);
            if !same {
                st.shadow = (!version.is_empty())
                    .then(|| (version.to_owned(), Arc::new(ShadowStats::default())));
                tracing::info!(model, shadow = version, "shadow set");
            }
        }
        self.publishes_total += 1;
        Ok(())
    }

    /// The routing snapshot of the current state.
    pub(super) fn snapshot(&self) -> Snapshot {
        let mut by_model = HashMap::with_capacity(self.models.len());
        for (model, st) in &self.models {
            let Some(active) = st.active.as_ref().and_then(|v| st.versions.get(v)) else {
                continue;
            };
            let get = |v: &str| st.versions.get(v).map(|l| l.served.clone());
            let route = ModelRoute {
                active: active.served.clone(),
                canary: st
                    .canary
                    .as_ref()
                    .and_then(|(v, f)| get(v).map(|m| Canary::new(m, *f))),
                shadow: st.shadow.as_ref().and_then(|(v, stats)| {
                    get(v).map(|map| Shadow {
                        map,
                        stats: stats.clone(),
                    })
                }),
                versions: st
                    .versions
                    .iter()
                    .map(|(v, l)| (v.clone(), l.served.clone()))
                    .collect(),
            };
            by_model.insert(model.clone(), route);
        }
        Snapshot { by_model }
    }

    /// (accepted, deferred, audited) of every (model, version) served.
    pub(super) fn counters(&self) -> BTreeMap<(String, String), (u64, u64, u64)> {
        self.counters
            .iter()
            .map(|(k, c)| {
                let (a, d) = c.get();
                (k.clone(), (a, d, c.audited()))
            })
            .filter(|(_, (a, d, _))| a + d > 0)
            .collect()
    }

    pub(super) fn model_view(&self, model: &str) -> Result<ModelView, RolloutError> {
        let st = self.model(model)?;
        Ok(view_of(model, st))
    }

    pub(super) fn view(&self) -> RolloutView {
        RolloutView {
            models: self.models.iter().map(|(m, st)| view_of(m, st)).collect(),
            rejections: self.rejections.iter().cloned().collect(),
            publishes_total: self.publishes_total,
            rejections_total: self.rejections_total,
        }
    }
}

fn stem(path: &Path) -> String {
    path.file_stem()
        .and_then(|s| s.to_str())
        .unwrap_or_default()
        .to_owned()
}

fn view_of(model: &str, st: &ModelState) -> ModelView {
    let mut versions: Vec<VersionView> = st
        .versions
        .iter()
        .map(|(v, l)| {
            let state = if st.active.as_deref() == Some(v.as_str()) {
                VersionState::Active
            } else if st.canary.as_ref().is_some_and(|(c, _)| c == v) {
                VersionState::Canary
            } else if st.shadow.as_ref().is_some_and(|(s, _)| s == v) {
                VersionState::Shadow
            } else {
                VersionState::Staged
            };
            let m = &l.served.map;
            let (accepted, deferred) = l.served.counters.get();
            VersionView {
                version: v.clone(),
                state,
                digest: m.digest().to_owned(),
                classes: m.classes(),
                method: m.method().kind().to_owned(),
                path: l.path.clone(),
                reason: None,
                accepted,
                deferred,
            }
        })
        .collect();
    versions.extend(st.rejected.iter().map(|(label, path, reason)| VersionView {
        version: label.clone(),
        state: VersionState::Rejected,
        digest: String::new(),
        classes: 0,
        method: String::new(),
        path: Some(path.clone()),
        reason: Some(reason.clone()),
        accepted: 0,
        deferred: 0,
    }));
    versions.sort_by(|a, b| natural_cmp(&a.version, &b.version));
    ModelView {
        model: model.to_owned(),
        active: st.active.clone(),
        history: st.history.clone(),
        canary: st.canary.clone(),
        shadow: st
            .shadow
            .as_ref()
            .map(|(v, stats)| (v.clone(), stats.get())),
        versions,
    }
}

#[cfg(test)]
#[path = "rollout_tests.rs"]
mod tests;
