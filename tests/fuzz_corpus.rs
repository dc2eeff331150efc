//! The committed fuzz corpus (fuzz/corpus/<target>/) replayed through the fuzz targets' own
//! entry functions on the stable toolchain, so CI checks every seed and every past finding
//! without nightly or libFuzzer.

#[path = "../fuzz/src/lib.rs"]
mod entry;

use crate::support::repo;

/// Runs `entry` on every file of fuzz/corpus/`target`; there must be some.
fn replay(target: &str, entry: fn(&[u8])) {
    let dir = repo(&format!("fuzz/corpus/{target}"));
    let mut files: Vec<_> = std::fs::read_dir(&dir)
        .unwrap()
        .map(|e| e.unwrap().path())
        .collect();
    files.sort();
    assert!(files.len() >= 3, "{} holds only {files:?}", dir.display());
    for file in files {
        eprintln!("{}", file.display());
        entry(&std::fs::read(&file).unwrap());
    }
}

#[test]
fn map_file_corpus() {
    replay("map_file", entry::map_file);
}

#[test]
fn request_corpus() {
    replay("request", entry::request);
}

#[test]
fn dataset_npy_corpus() {
    replay("dataset_npy", entry::dataset_npy);
}

#[test]
fn dataset_csv_corpus() {
    replay("dataset_csv", entry::dataset_csv);
}

#[test]
fn dataset_jsonl_corpus() {
    replay("dataset_jsonl", entry::dataset_jsonl);
}
