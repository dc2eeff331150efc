//! Reading a directory of map files.
//!
//! Layouts accepted: map files directly in DIR (`DIR/*.json`) and one folder per model
//! (`DIR/<model>/*.json`). Each model must have exactly one map file; two files for one model are
//! an error naming both (choosing between versions is the rollout's job).

use crate::mapfile::{CalibrationMap, MapError};
use crate::method::Problem;
use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

/// What a directory held: the maps that loaded and the problems of those that did not.
#[derive(Debug, Default)]
pub struct DirLoad {
    /// Valid maps, one per model, sorted by model.
    pub maps: Vec<CalibrationMap>,
    /// One error per file (or conflict) that failed.
    pub errors: Vec<MapError>,
}

/// Loads every `*.json` map in `dir` and its direct subfolders (sorted, so the result does not
/// depend on directory order). Hidden files and folders (starting with '.') are skipped.
pub fn load_dir(dir: &Path) -> DirLoad {
    let mut out = DirLoad::default();
    let files = match map_files(dir) {
        Ok(f) => f,
        Err(e) => {
            out.errors.push(MapError {
                path: Some(dir.to_owned()),
                problems: vec![Problem {
                    field: "directory".into(),
                    message: format!("cannot read: {e}"),
                }],
            });
            return out;
        }
    };
    let mut by_model: BTreeMap<String, (PathBuf, CalibrationMap)> = BTreeMap::new();
    for path in files {
        match CalibrationMap::load(&path) {
            Ok(map) => {
                if let Some((first, _)) = by_model.get(map.model()) {
                    out.errors.push(MapError {
                        path: Some(path.clone()),
                        problems: vec![Problem {
                            field: "model".into(),
                            message: format!(
                                "model {:?} already has a map in {}; keep one map per model",
                                map.model(),
                                first.display()
                            ),
                        }],
                    });
                    continue;
                }
                by_model.insert(map.model().to_owned(), (path, map));
            }
            Err(e) => out.errors.push(e),
        }
    }
    out.maps = by_model.into_values().map(|(_, m)| m).collect();
    out
}

fn map_files(dir: &Path) -> std::io::Result<Vec<PathBuf>> {
    let mut files = Vec::new();
    for entry in std::fs::read_dir(dir)? {
        let path = entry?.path();
        if hidden(&path) {
            continue;
        }
        if path.is_dir() {
            for inner in std::fs::read_dir(&path)? {
                let p = inner?.path();
                if !hidden(&p) && is_json(&p) {
                    files.push(p);
                }
            }
        } else if is_json(&path) {
            files.push(path);
        }
    }
    files.sort();
    Ok(files)
}

fn hidden(p: &Path) -> bool {
    p.file_name()
        .and_then(|n| n.to_str())
        .is_some_and(|n| n.starts_with('.'))
}

fn is_json(p: &Path) -> bool {
    p.is_file() && p.extension().is_some_and(|e| e == "json")
}
