//! The map file, format version 1: a JSON document holding one fitted recalibration map, its
//! decision policy and its provenance, sealed by a SHA-256 digest of its canonical content.
//!
//! ```json
//! {
//!   "format_version": 1,
//!   "model": "letter-sorter",
//!   "map_version": "2026-12-01.1",
//!   "classes": 3,
//!   "class_names": ["billing", "leak", "other"],
//!   "input": "logits",
//!   "method": {"kind": "temperature", "temperature": 2.1},
//!   "policy": {"threshold": 0.95, "per_class": null, "evidence": {"procedure": "sgr"}},
//!   "provenance": {"created_at": "2026-12-01T10:00:00Z",
//!                  "fit_data": {"sha256": "…", "rows": 2000},
//!                  "metrics": {"before": {"nll": 0.61}, "after": {"nll": 0.38}}},
//!   "digest": "sha256:…"
//! }
//! ```
//!
//! Reading parses the bytes, then validates every field and collects every problem with its field
//! path ([`MapError`]); a map that fails is never partly used. The same reader serves
//! `candor check` and the sidecar. Writing goes through [`CalibrationMap::to_json`], which seals
//! the document with its digest (see [`canonical`] for the canonical form). A document that says
//! the same thing in another form than candor writes (`input` left to its default, `null` for an
//! absent `per_class` or `evidence`, an integer beyond what f64 holds exactly) is kept as read,
//! so writing the map back reproduces the content its digest seals.

pub mod canonical;
mod method_section;
mod read;
mod reference;
mod sections;

pub use reference::{ConfidenceReference, PROPORTION_SUM_TOLERANCE};

pub use method_section::KINDS;

use crate::decision::DecisionPolicy;
use crate::method::{InputForm, Method, Problem, Problems};
use read::Reader;
use serde_json::{json, Map, Value};
use std::path::{Path, PathBuf};

/// The map-file format version this build reads and writes.
pub const FORMAT_VERSION: u64 = 1;
/// Largest number of classes a map may declare.
pub const MAX_CLASSES: usize = 100_000;

/// A validated map: every field checked, parameters consistent with `classes`, digest verified.
#[derive(Debug, Clone)]
pub struct CalibrationMap {
    model: String,
    map_version: String,
    classes: usize,
    class_names: Option<Vec<String>>,
    input: InputForm,
    method: Method,
    policy: DecisionPolicy,
    provenance: Map<String, Value>,
    digest: String,
    /// `provenance.reference`, validated: the fit-time confidence distribution.
    reference: Option<ConfidenceReference>,
    /// The document as read, kept only when candor would write these parts differently (a field
    /// left to its default, `null` for an absent section, an integer f64 cannot hold exactly),
    /// so that [`CalibrationMap::to_json`] reproduces the content its digest seals.
    original: Option<Box<Value>>,
}

/// Why a map file was refused: every problem found, each with its field path.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
#[error("{}{}", source_prefix(.path), list(.problems))]
pub struct MapError {
    /// The file, when the map came from one.
    pub path: Option<PathBuf>,
    /// Every problem found.
    pub problems: Vec<Problem>,
}

impl MapError {
    /// Every problem on one line, without the file name: "field: message; field: message".
    pub fn problems_text(&self) -> String {
        let items: Vec<String> = self.problems.iter().map(ToString::to_string).collect();
        items.join("; ")
    }
}

fn source_prefix(path: &Option<PathBuf>) -> String {
    path.as_ref()
        .map_or_else(String::new, |p| format!("{}: ", p.display()))
}

fn list(problems: &[Problem]) -> String {
    let n = problems.len();
    let items: Vec<String> = problems.iter().map(|p| format!("  - {p}")).collect();
    format!(
        "{n} problem{}:\n{}",
        if n == 1 { "" } else { "s" },
        items.join("\n")
    )
}

/// The parts of a map before it is sealed: what a fit or a hand-written map provides.
#[derive(Debug, Clone)]
pub struct MapParts {
    /// Model name ([A-Za-z0-9._-], 1–128 characters).
    pub model: String,
    /// Map version ([A-Za-z0-9._-], 1–128 characters).
    pub map_version: String,
    /// Number of classes K ≥ 2.
    pub classes: usize,
    /// Optional class names, K distinct non-empty strings.
    pub class_names: Option<Vec<String>>,
    /// How requests carry their numbers.
    pub input: InputForm,
    /// The recalibration method.
    pub method: Method,
    /// The decision policy.
    pub policy: DecisionPolicy,
    /// Provenance record (created_at, fit_data, metrics, and anything else worth keeping).
    pub provenance: Map<String, Value>,
}

impl CalibrationMap {
    /// Parses and validates a map document.
    ///
    /// # Errors
    /// [`MapError`] listing every problem (without a path; see [`CalibrationMap::load`]).
    pub fn from_slice(bytes: &[u8]) -> Result<Self, MapError> {
        let doc: Value = serde_json::from_slice(bytes).map_err(|e| MapError {
            path: None,
            problems: vec![Problem {
                field: format!("line {}, column {}", e.line(), e.column()),
                message: format!("not valid JSON: {e}"),
            }],
        })?;
        Self::from_value(&doc)
    }

    /// Reads and validates a map file.
    ///
    /// # Errors
    /// [`MapError`] naming the file: unreadable, not JSON, or every validation problem.
    pub fn load(path: &Path) -> Result<Self, MapError> {
        let bytes = std::fs::read(path).map_err(|e| MapError {
            path: Some(path.to_owned()),
            problems: vec![Problem {
                field: "file".into(),
                message: format!("cannot read: {e}"),
            }],
        })?;
        Self::from_slice(&bytes).map_err(|mut e| {
            e.path = Some(path.to_owned());
            e
        })
    }

    /// Validates a parsed document.
    ///
    /// # Errors
    /// [`MapError`] listing every problem.
    pub fn from_value(doc: &Value) -> Result<Self, MapError> {
        let mut problems = Problems::new();
        let map = read_document(
            &mut Reader {
                problems: &mut problems,
            },
            doc,
        );
        match map {
            Some(m) if problems.is_empty() => Ok(m),
            _ => Err(MapError {
                path: None,
                problems: problems.into_vec(),
            }),
        }
    }

    /// Validates parts and seals them into a map (computing the digest).
    ///
    /// # Errors
    /// [`MapError`] when the parts are inconsistent (the same checks as reading a file).
    pub fn from_parts(parts: MapParts) -> Result<Self, MapError> {
        let mut doc = document(&parts);
        let digest = canonical::digest(&doc);
        doc["digest"] = json!(digest);
        Self::from_value(&doc)
    }

    /// The sealed document, pretty-printed, ending with a newline: the one its digest was
    /// computed over, so the text always reads back as the same map with the same digest.
    pub fn to_json(&self) -> String {
        if let Some(doc) = &self.original {
            let mut s = serde_json::to_string_pretty(doc).unwrap_or_default();
            s.push('\n');
            return s;
        }
        let mut doc = document(&MapParts {
            model: self.model.clone(),
            map_version: self.map_version.clone(),
            classes: self.classes,
            class_names: self.class_names.clone(),
            input: self.input,
            method: self.method.clone(),
            policy: self.policy.clone(),
            provenance: self.provenance.clone(),
        });
        doc["digest"] = json!(self.digest);
        let mut s = serde_json::to_string_pretty(&doc).unwrap_or_default();
        s.push('\n');
        s
    }

    /// Model name.
    pub fn model(&self) -> &str {
        &self.model
    }
    /// Map version.
    pub fn map_version(&self) -> &str {
        &self.map_version
    }
    /// Number of classes K.
    pub fn classes(&self) -> usize {
        self.classes
    }
    /// Class names, when given.
    pub fn class_names(&self) -> Option<&[String]> {
        self.class_names.as_deref()
    }
    /// Input form of requests.
    pub fn input(&self) -> InputForm {
        self.input
    }
    /// Number of values a request must carry.
    pub fn input_len(&self) -> usize {
        self.input.input_len(self.classes)
    }
    /// The recalibration method.
    pub fn method(&self) -> &Method {
        &self.method
    }
    /// The decision policy.
    pub fn policy(&self) -> &DecisionPolicy {
        &self.policy
    }
    /// The provenance record.
    pub fn provenance(&self) -> &Map<String, Value> {
        &self.provenance
    }
    /// `sha256:<hex>` of the canonical content.
    pub fn digest(&self) -> &str {
        &self.digest
    }
    /// The fit-time distribution of calibrated confidences (`provenance.reference`), when the
    /// map carries one.
    pub fn reference(&self) -> Option<&ConfidenceReference> {
        self.reference.as_ref()
    }
}

/// The unsealed JSON document of `parts`.
fn document(parts: &MapParts) -> Value {
    let mut doc = Map::new();
    doc.insert("format_version".into(), json!(FORMAT_VERSION));
    doc.insert("model".into(), json!(parts.model));
    doc.insert("map_version".into(), json!(parts.map_version));
    doc.insert("classes".into(), json!(parts.classes));
    if let Some(names) = &parts.class_names {
        doc.insert("class_names".into(), json!(names));
    }
    doc.insert("input".into(), json!(parts.input.name()));
    doc.insert("method".into(), method_section::write(&parts.method));
    doc.insert("policy".into(), sections::write_policy(&parts.policy));
    doc.insert("provenance".into(), Value::Object(parts.provenance.clone()));
    Value::Object(doc)
}

const TOP_FIELDS: [&str; 10] = [
    "format_version",
    "model",
    "map_version",
    "classes",
    "class_names",
    "input",
    "method",
    "policy",
    "provenance",
    "digest",
];

fn read_document(r: &mut Reader<'_>, doc: &Value) -> Option<CalibrationMap> {
    let obj = r.object(doc, "(document)")?;
    r.deny_unknown(obj, &TOP_FIELDS, "");
    let version = r.integer_field(obj, "format_version", "");
    if let Some(v) = version {
        if v != FORMAT_VERSION {
            r.problems.push(
                "format_version",
                format!("unknown format version {v} (this build of candor reads {FORMAT_VERSION})"),
            );
            return None;
        }
    }
    let model = r
        .string_field(obj, "model", "")
        .map(|s| sections::check_name(r, s, "model"));
    let map_version = r
        .string_field(obj, "map_version", "")
        .map(|s| sections::check_name(r, s, "map_version"));
    let classes = r.integer_field(obj, "classes", "").and_then(|k| {
        if (2..=MAX_CLASSES as u64).contains(&k) {
            Some(k as usize)
        } else {
            r.problems
                .push("classes", format!("must lie in 2..={MAX_CLASSES}, got {k}"));
            None
        }
    });
    let input = match obj.get("input") {
        None => Some(InputForm::Logits),
        Some(v) => match r.string(v, "input") {
            Some("logits") => Some(InputForm::Logits),
            Some("binary_score") => Some(InputForm::BinaryScore),
            Some(other) => {
                r.problems.push(
                    "input",
                    format!("must be \"logits\" or \"binary_score\", got {other:?}"),
                );
                None
            }
            None => None,
        },
    };
    if let (Some(InputForm::BinaryScore), Some(k)) = (input, classes) {
        if k != 2 {
            r.problems.push(
                "input",
                format!("\"binary_score\" needs classes = 2, got {k}"),
            );
        }
    }
    let class_names = obj
        .get("class_names")
        .and_then(|v| sections::read_class_names(r, v, classes));
    let provenance = r
        .required(obj, "provenance", "")
        .and_then(|v| sections::read_provenance(r, v));
    let reference = provenance
        .as_ref()
        .and_then(|p| p.get("reference"))
        .map(|v| reference::read(r, v));
    let digest = r.string_field(obj, "digest", "").map(str::to_owned);
    // Sections whose shape depends on K are read only once K is known.
    let k = classes?;
    let method = r
        .required(obj, "method", "")
        .and_then(|v| method_section::read(r, v, k));
    let policy = r
        .required(obj, "policy", "")
        .and_then(|v| sections::read_policy(r, v, k));
    if let Some(d) = &digest {
        let want = canonical::digest(doc);
        if *d != want {
            r.problems.push(
                "digest",
                format!("does not match the content: file says {d}, content hashes to {want}"),
            );
        }
    }
    let parts = MapParts {
        model: model?,
        map_version: map_version?,
        classes: k,
        class_names,
        input: input?,
        method: method?,
        policy: policy?,
        provenance: provenance?,
    };
    let digest = digest?;
    // Parts written back must hash to the digest they were sealed with; when this document says
    // the same thing in another form, keep it as it is.
    let original = (canonical::digest(&document(&parts)) != digest).then(|| Box::new(doc.clone()));
    Some(CalibrationMap {
        model: parts.model,
        map_version: parts.map_version,
        classes: parts.classes,
        class_names: parts.class_names,
        input: parts.input,
        method: parts.method,
        policy: parts.policy,
        provenance: parts.provenance,
        digest,
        reference: reference.flatten(),
        original,
    })
}

#[cfg(test)]
mod tests;
