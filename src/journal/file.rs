//! The journal's files: JSON Lines, one record per line, in `decisions-NNNNNN.jsonl` files
//! rotated by size. A process killed mid-write leaves at most one torn last line per file; the
//! reader detects it (no final newline, or not valid JSON) and skips it.

use serde::{Deserialize, Serialize};
use std::io::Write as _;
use std::path::{Path, PathBuf};

/// File name prefix and suffix of journal files.
const PREFIX: &str = "decisions-";
const SUFFIX: &str = ".jsonl";

/// One journal line.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(tag = "kind", rename_all = "snake_case")]
pub enum Record {
    /// An answered request.
    Decision {
        /// Milliseconds since the Unix epoch.
        at_ms: u64,
        /// The caller's id (may be empty).
        request_id: String,
        /// Model.
        model: String,
        /// Map version that answered.
        map_version: String,
        /// Predicted class.
        predicted: u32,
        /// Calibrated confidence of the predicted class.
        confidence: f32,
        /// True when accepted.
        accepted: bool,
        /// True when marked for audit.
        audit: bool,
        /// The audit rate π in force for this map version: an accepted item was marked for
        /// audit with this probability (METHODS.md 4.1).
        #[serde(default)]
        audit_rate: f64,
        /// The raw logits, when the journal keeps them.
        #[serde(default, skip_serializing_if = "Option::is_none")]
        logits: Option<Vec<f32>>,
    },
    /// A true label joined to an earlier decision.
    Outcome {
        /// Milliseconds since the Unix epoch.
        at_ms: u64,
        /// The decision's request id.
        request_id: String,
        /// Model.
        model: String,
        /// Map version that answered.
        map_version: String,
        /// The true class.
        true_label: u32,
        /// Predicted class.
        predicted: u32,
        /// True when the decision accepted the item.
        accepted: bool,
        /// True when the item was in the audit sample.
        audit: bool,
    },
}

/// An open journal: the current file and the rotation rule.
#[derive(Debug)]
pub(super) struct JournalFiles {
    dir: PathBuf,
    max_bytes: u64,
    keep: usize,
    seq: u64,
    file: std::fs::File,
    written: u64,
}

fn seq_of(name: &str) -> Option<u64> {
    name.strip_prefix(PREFIX)?
        .strip_suffix(SUFFIX)?
        .parse()
        .ok()
}

fn files(dir: &Path) -> std::io::Result<Vec<(u64, PathBuf)>> {
    let mut v = Vec::new();
    for e in std::fs::read_dir(dir)? {
        let p = e?.path();
        if let Some(s) = p.file_name().and_then(|n| n.to_str()).and_then(seq_of) {
            v.push((s, p));
        }
    }
    v.sort();
    Ok(v)
}

impl JournalFiles {
    /// Opens a new file after the highest existing one (never appends to a file a crash may have
    /// torn).
    pub(super) fn open(dir: &Path, max_bytes: u64, keep: usize) -> std::io::Result<Self> {
        std::fs::create_dir_all(dir)?;
        let seq = files(dir)?.last().map_or(1, |(s, _)| s + 1);
        let file = Self::create(dir, seq)?;
        Ok(JournalFiles {
            dir: dir.to_owned(),
            max_bytes,
            keep: keep.max(1),
            seq,
            file,
            written: 0,
        })
    }

    fn create(dir: &Path, seq: u64) -> std::io::Result<std::fs::File> {
        std::fs::OpenOptions::new()
            .create_new(true)
            .append(true)
            .open(dir.join(format!("{PREFIX}{seq:06}{SUFFIX}")))
    }

    /// Appends `bytes` (whole lines) and syncs when asked; rotates first when the file is full.
    pub(super) fn append(&mut self, bytes: &[u8], fsync: bool) -> std::io::Result<()> {
        if self.written > 0 && self.written + bytes.len() as u64 > self.max_bytes {
            self.rotate()?;
        }
        self.file.write_all(bytes)?;
        self.written += bytes.len() as u64;
        if fsync {
            self.file.sync_data()?;
        }
        Ok(())
    }

    fn rotate(&mut self) -> std::io::Result<()> {
        self.file.sync_data()?;
        self.seq += 1;
        self.file = Self::create(&self.dir, self.seq)?;
        self.written = 0;
        let all = files(&self.dir)?;
        if all.len() > self.keep {
            for (_, p) in &all[..all.len() - self.keep] {
                std::fs::remove_file(p)?;
            }
        }
        Ok(())
    }
}

/// What a journal directory holds.
#[derive(Debug, Default)]
pub struct JournalRead {
    /// Every whole record, oldest first.
    pub records: Vec<Record>,
    /// Torn last lines skipped (at most one per file).
    pub torn: usize,
}

/// Reads every journal file in `dir`, oldest first, skipping a torn last line in each file.
///
/// # Errors
/// When a file cannot be read, or a line that is not the last of its file is not a record
/// (that is damage, not a torn write).
pub fn read_journal(dir: &Path) -> Result<JournalRead, String> {
    let mut out = JournalRead::default();
    for (_, path) in files(dir).map_err(|e| format!("cannot list {}: {e}", dir.display()))? {
        let text = std::fs::read_to_string(&path)
            .map_err(|e| format!("cannot read {}: {e}", path.display()))?;
        let complete = text.ends_with('\n');
        let lines: Vec<&str> = text.lines().collect();
        for (i, line) in lines.iter().enumerate() {
            let last = i + 1 == lines.len();
            match (serde_json::from_str::<Record>(line), last) {
                (Ok(r), false) => out.records.push(r),
                (Ok(r), true) if complete => out.records.push(r),
                (_, true) => out.torn += 1,
                (Err(e), false) => {
                    return Err(format!(
                        "{} line {}: not a journal record: {e}",
                        path.display(),
                        i + 1
                    ))
                }
            }
        }
    }
    Ok(out)
}

/// A decision line written from borrowed parts: serialises exactly as [`Record::Decision`]
/// (tested), without owning copies of the strings and logits.
#[derive(Debug, Serialize)]
pub(super) struct DecisionLine<'a> {
    pub kind: &'static str,
    pub at_ms: u64,
    pub request_id: &'a str,
    pub model: &'a str,
    pub map_version: &'a str,
    pub predicted: u32,
    pub confidence: f32,
    pub accepted: bool,
    pub audit: bool,
    pub audit_rate: f64,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub logits: Option<&'a [f32]>,
}

#[cfg(test)]
mod tests {
    use super::*;

    fn decision(i: u64) -> Record {
        Record::Decision {
            at_ms: i,
            request_id: format!("r{i}"),
            model: "m".into(),
            map_version: "v1".into(),
            predicted: 1,
            confidence: 0.75,
            accepted: true,
            audit: false,
            audit_rate: 0.05,
            logits: Some(vec![1.0, -2.5]),
        }
    }

    fn line(r: &Record) -> Vec<u8> {
        let mut v = serde_json::to_vec(r).unwrap();
        v.push(b'\n');
        v
    }

    #[test]
    fn a_borrowed_decision_line_serialises_as_the_record() {
        for logits in [Some(vec![1.0, -2.5]), None] {
            let mut owned = decision(7);
            if let Record::Decision { logits: l, .. } = &mut owned {
                l.clone_from(&logits);
            }
            let borrowed = DecisionLine {
                kind: "decision",
                at_ms: 7,
                request_id: "r7",
                model: "m",
                map_version: "v1",
                predicted: 1,
                confidence: 0.75,
                accepted: true,
                audit: false,
                audit_rate: 0.05,
                logits: logits.as_deref(),
            };
            assert_eq!(
                serde_json::to_string(&borrowed).unwrap(),
                serde_json::to_string(&owned).unwrap()
            );
        }
    }

    #[test]
    fn rotation_keeps_the_newest_files_and_reading_returns_every_record() {
        let dir = tempfile::tempdir().unwrap();
        let mut j = JournalFiles::open(dir.path(), 300, 3).unwrap();
        for i in 0..20 {
            j.append(&line(&decision(i)), false).unwrap();
        }
        let names = files(dir.path()).unwrap();
        assert_eq!(names.len(), 3, "{names:?}");
        let read = read_journal(dir.path()).unwrap();
        assert_eq!(read.torn, 0);
        assert_eq!(read.records.last(), Some(&decision(19)));
        // A reopened journal starts a new file after the last.
        let again = JournalFiles::open(dir.path(), 300, 3).unwrap();
        assert_eq!(again.seq, names.last().unwrap().0 + 1);
    }

    #[test]
    fn a_torn_last_line_is_skipped_and_damage_elsewhere_is_an_error() {
        let dir = tempfile::tempdir().unwrap();
        let mut bytes = line(&decision(1));
        let second = line(&decision(2));
        bytes.extend_from_slice(&second[..second.len() / 2]);
        std::fs::write(dir.path().join("decisions-000001.jsonl"), &bytes).unwrap();
        let read = read_journal(dir.path()).unwrap();
        assert_eq!((read.records.len(), read.torn), (1, 1));
        let mut damaged = b"{not json}\n".to_vec();
        damaged.extend(line(&decision(3)));
        std::fs::write(dir.path().join("decisions-000002.jsonl"), damaged).unwrap();
        let e = read_journal(dir.path()).unwrap_err();
        assert!(e.contains("decisions-000002.jsonl line 1"), "{e}");
    }
}
