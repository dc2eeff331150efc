//! The map store on disk: reading it (with a cache keyed by file identity, so an unchanged file
//! is not parsed again) and writing maps and pointer files atomically.
//!
//! Layout (both may be mixed):
//! - `DIR/<model>/<version>.json`: one file per version; the folder must be the map's model and
//!   the file stem its `map_version`.
//! - `DIR/*.json`: flat files, any name (this is what a mounted Kubernetes ConfigMap gives).
//! - `DIR/<model>/active-version`: optional pointer file holding the active version's name.
//!
//! Names starting with '.' are skipped, so temporary files and a ConfigMap's `..data` folder are
//! never read directly; the ConfigMap's visible files are symlinks into it and are followed.

use crate::mapfile::CalibrationMap;
use std::collections::{BTreeMap, HashMap};
use std::io::Write as _;
use std::path::{Path, PathBuf};
use std::sync::Arc;

/// Name of the per-model pointer file that names the active version.
pub const POINTER_FILE: &str = "active-version";

/// Longest pointer file read, in bytes (a version name is at most 128 characters).
const POINTER_MAX_BYTES: u64 = 1024;

/// A store write that failed.
#[derive(Debug, thiserror::Error)]
pub enum StoreError {
    /// A file or folder could not be written.
    #[error("cannot write {path}: {source}")]
    Write {
        /// What was being written.
        path: PathBuf,
        /// Why.
        source: std::io::Error,
    },
}

/// What one map file held at the last scan.
#[derive(Debug, Clone)]
pub(super) struct FileOutcome {
    pub path: PathBuf,
    /// The folder's name for `DIR/<model>/x.json`; `None` for flat files.
    pub folder_model: Option<String>,
    /// The valid map, or why the file was refused.
    pub result: Result<Arc<CalibrationMap>, String>,
    /// True when the file is new or changed since the previous scan.
    pub fresh: bool,
}

/// Everything one scan of the store found.
#[derive(Debug, Default)]
pub(super) struct Scan {
    pub files: Vec<FileOutcome>,
    /// Per model folder with a pointer file: the named version, or why it is unreadable.
    pub pointers: BTreeMap<String, Result<String, String>>,
    /// The store itself could not be listed.
    pub dir_error: Option<String>,
}

/// Identity of a file's content as the file system reports it: a rewrite in place changes the
/// length or times, an atomic rename or a symlink swap changes the inode.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
struct Identity {
    dev: u64,
    ino: u64,
    len: u64,
    mtime_ns: i128,
    ctime_ns: i128,
}

impl Identity {
    fn of(meta: &std::fs::Metadata) -> Self {
        use std::os::unix::fs::MetadataExt as _;
        Identity {
            dev: meta.dev(),
            ino: meta.ino(),
            len: meta.len(),
            mtime_ns: i128::from(meta.mtime()) * 1_000_000_000 + i128::from(meta.mtime_nsec()),
            ctime_ns: i128::from(meta.ctime()) * 1_000_000_000 + i128::from(meta.ctime_nsec()),
        }
    }
}

/// Parsed files by path, reused while their identity is unchanged.
#[derive(Debug, Default)]
pub(super) struct FileCache {
    entries: HashMap<PathBuf, (Identity, Result<Arc<CalibrationMap>, String>)>,
}

/// Reads the store in `dir`. Files are visited in sorted order, so the result does not depend
/// on directory order.
pub(super) fn scan(dir: &Path, cache: &mut FileCache) -> Scan {
    let mut out = Scan::default();
    let listing = match list(dir) {
        Ok(l) => l,
        Err(e) => {
            out.dir_error = Some(format!("cannot read the map store {}: {e}", dir.display()));
            return out;
        }
    };
    let mut seen = HashMap::with_capacity(listing.files.len());
    for (path, folder_model) in listing.files {
        let (result, fresh) = read_cached(&path, cache);
        let result = result.and_then(|m| check_place(&path, folder_model.as_deref(), m));
        seen.insert(path.clone(), ());
        out.files.push(FileOutcome {
            path,
            folder_model,
            result,
            fresh,
        });
    }
    cache.entries.retain(|p, _| seen.contains_key(p));
    for (model, path) in listing.pointers {
        out.pointers.insert(model, read_pointer(&path));
    }
    out
}

fn read_cached(path: &Path, cache: &mut FileCache) -> (Result<Arc<CalibrationMap>, String>, bool) {
    let meta = match std::fs::metadata(path) {
        Ok(m) => m,
        Err(e) => return (Err(format!("cannot read: {e}")), true),
    };
    let id = Identity::of(&meta);
    if let Some((cached_id, result)) = cache.entries.get(path) {
        if *cached_id == id {
            return (result.clone(), false);
        }
    }
    let result = CalibrationMap::load(path)
        .map(Arc::new)
        .map_err(|e| e.problems_text());
    cache.entries.insert(path.to_owned(), (id, result.clone()));
    (result, true)
}

/// A versioned file must sit where its content says: `<model>/<version>.json`.
fn check_place(
    path: &Path,
    folder_model: Option<&str>,
    map: Arc<CalibrationMap>,
) -> Result<Arc<CalibrationMap>, String> {
    let Some(folder) = folder_model else {
        return Ok(map);
    };
    if folder != map.model() {
        return Err(format!(
            "the file is in folder {folder:?} but its model is {:?}",
            map.model()
        ));
    }
    let stem = path.file_stem().and_then(|s| s.to_str()).unwrap_or("");
    if stem != map.map_version() {
        return Err(format!(
            "the file is named {stem:?} but its map_version is {:?}; name it {}.json",
            map.map_version(),
            map.map_version()
        ));
    }
    Ok(map)
}

fn read_pointer(path: &Path) -> Result<String, String> {
    use std::io::Read as _;
    let file = std::fs::File::open(path).map_err(|e| format!("cannot read: {e}"))?;
    let mut text = String::new();
    file.take(POINTER_MAX_BYTES)
        .read_to_string(&mut text)
        .map_err(|e| format!("cannot read: {e}"))?;
    let version = text.trim();
    if version.is_empty() || version.contains(['/', '\\']) || version.starts_with('.') {
        return Err(format!(
            "must hold one map version name, found {:?}",
            version.chars().take(64).collect::<String>()
        ));
    }
    Ok(version.to_owned())
}

#[derive(Debug, Default)]
struct Listing {
    /// (path, folder model) of every candidate map file, sorted by path.
    files: Vec<(PathBuf, Option<String>)>,
    /// (model, path) of every pointer file.
    pointers: Vec<(String, PathBuf)>,
}

fn list(dir: &Path) -> std::io::Result<Listing> {
    let mut out = Listing::default();
    for entry in std::fs::read_dir(dir)? {
        let path = entry?.path();
        let Some(name) = visible_name(&path) else {
            continue;
        };
        if path.is_dir() {
            for inner in std::fs::read_dir(&path)? {
                let p = inner?.path();
                if visible_name(&p).is_none() {
                    continue;
                }
                if is_json(&p) {
                    out.files.push((p, Some(name.clone())));
                } else if p.file_name().is_some_and(|n| n == POINTER_FILE) && p.is_file() {
                    out.pointers.push((name.clone(), p));
                }
            }
        } else if is_json(&path) {
            out.files.push((path, None));
        }
    }
    out.files.sort();
    out.pointers.sort();
    Ok(out)
}

fn visible_name(p: &Path) -> Option<String> {
    let n = p.file_name()?.to_str()?;
    (!n.starts_with('.')).then(|| n.to_owned())
}

fn is_json(p: &Path) -> bool {
    p.is_file() && p.extension().is_some_and(|e| e == "json")
}

/// Writes `bytes` to `path` atomically: a hidden temporary file in the same folder, flushed to
/// disk, renamed over `path`, and the folder flushed so the rename survives a crash.
fn write_atomic(path: &Path, bytes: &[u8]) -> Result<(), StoreError> {
    let err = |source| StoreError::Write {
        path: path.to_owned(),
        source,
    };
    let folder = path.parent().unwrap_or(Path::new("."));
    std::fs::create_dir_all(folder).map_err(err)?;
    let mut tmp = tempfile::Builder::new()
        .prefix(".incoming-")
        .tempfile_in(folder)
        .map_err(err)?;
    tmp.write_all(bytes).map_err(err)?;
    tmp.as_file().sync_all().map_err(err)?;
    tmp.persist(path).map_err(|e| err(e.error))?;
    std::fs::File::open(folder)
        .and_then(|f| f.sync_all())
        .map_err(err)?;
    Ok(())
}

/// Writes a map as `DIR/<model>/<version>.json`; returns its path.
pub(super) fn write_map(
    dir: &Path,
    map: &CalibrationMap,
    bytes: &[u8],
) -> Result<PathBuf, StoreError> {
    let path = dir
        .join(map.model())
        .join(format!("{}.json", map.map_version()));
    write_atomic(&path, bytes)?;
    Ok(path)
}

/// Writes `DIR/<model>/active-version`.
pub(super) fn write_pointer(dir: &Path, model: &str, version: &str) -> Result<(), StoreError> {
    write_atomic(
        &dir.join(model).join(POINTER_FILE),
        format!("{version}\n").as_bytes(),
    )
}

/// What a directory held when read once: every valid map and the problems of the rest.
#[derive(Debug, Default)]
pub struct DirLoad {
    /// Valid maps, sorted by path.
    pub maps: Vec<CalibrationMap>,
    /// One message per file that failed, naming the file.
    pub errors: Vec<String>,
}

/// Reads every map in `dir` once (no versions chosen, no pointer files): for tools that want
/// the files themselves.
pub fn load_dir(dir: &Path) -> DirLoad {
    let s = scan(dir, &mut FileCache::default());
    let mut out = DirLoad::default();
    if let Some(e) = s.dir_error {
        out.errors.push(e);
    }
    for f in s.files {
        match f.result {
            Ok(m) => out.maps.push(Arc::unwrap_or_clone(m)),
            Err(e) => out.errors.push(format!("{}: {e}", f.path.display())),
        }
    }
    out
}
