//! The smaller sections of a map file: names, class names, policy and provenance.

use super::read::{join, Reader};
use crate::decision::{DecisionPolicy, Evidence};
use serde_json::{json, Map, Value};

/// Longest model name or map version.
pub const MAX_NAME_LEN: usize = 128;

/// Checks a model name or map version: 1–128 characters from [A-Za-z0-9._-], not starting with
/// a dot (they become directory names and metric labels).
pub(super) fn check_name(r: &mut Reader<'_>, s: &str, field: &str) -> String {
    let ok_chars = s
        .chars()
        .all(|c| c.is_ascii_alphanumeric() || matches!(c, '.' | '_' | '-'));
    if s.is_empty() || s.len() > MAX_NAME_LEN || !ok_chars || s.starts_with('.') {
        r.problems.push(
            field,
            format!(
                "must be 1 to {MAX_NAME_LEN} characters of A-Z a-z 0-9 . _ - not starting with '.', got {s:?}"
            ),
        );
    }
    s.to_owned()
}

pub(super) fn read_class_names(
    r: &mut Reader<'_>,
    v: &Value,
    classes: Option<usize>,
) -> Option<Vec<String>> {
    if v.is_null() {
        return None;
    }
    let items = r.array(v, "class_names")?;
    let mut names = Vec::with_capacity(items.len());
    for (i, item) in items.iter().enumerate() {
        let path = format!("class_names[{i}]");
        if let Some(s) = r.string(item, &path) {
            if s.is_empty() {
                r.problems.push(&path, "must not be empty");
            } else if names.iter().any(|n: &String| n == s) {
                r.problems
                    .push(&path, format!("duplicate class name {s:?}"));
            }
            names.push(s.to_owned());
        }
    }
    if let Some(k) = classes {
        r.problems.check_len("class_names", items.len(), k);
    }
    Some(names)
}

/// Reads `policy`: `threshold` (number in [0, 1] or null), optional `per_class` (K entries, each a
/// number in [0, 1] or null), optional `audit_rate` (share of accepted items marked for audit, in
/// [0, 1]) and optional `evidence`.
pub(super) fn read_policy(r: &mut Reader<'_>, v: &Value, classes: usize) -> Option<DecisionPolicy> {
    const P: &str = "policy";
    let obj = r.object(v, P)?;
    r.deny_unknown(
        obj,
        &["threshold", "per_class", "audit_rate", "evidence"],
        P,
    );
    let before = r.problems.len();
    let global = r
        .required(obj, "threshold", P)
        .and_then(|t| threshold(r, t, "policy.threshold"));
    let per_class = match obj.get("per_class") {
        None | Some(Value::Null) => None,
        Some(list) => r.array(list, "policy.per_class").map(|items| {
            r.problems
                .check_len("policy.per_class", items.len(), classes);
            items
                .iter()
                .enumerate()
                .map(|(i, t)| threshold(r, t, &format!("policy.per_class[{i}]")))
                .collect::<Vec<_>>()
        }),
    };
    let evidence = match obj.get("evidence") {
        None | Some(Value::Null) => None,
        Some(e) => read_evidence(r, e),
    };
    let audit_rate = match obj.get("audit_rate") {
        None | Some(Value::Null) => None,
        Some(a) => r.number(a, "policy.audit_rate").and_then(|a| {
            if (0.0..=1.0).contains(&a) {
                Some(a)
            } else {
                r.problems
                    .push("policy.audit_rate", format!("must lie in [0, 1], got {a}"));
                None
            }
        }),
    };
    (r.problems.len() == before)
        .then(|| DecisionPolicy::new(global, per_class, evidence).with_audit_rate(audit_rate))
}

/// A threshold: a number in [0, 1], or null for "no auto-accept".
fn threshold(r: &mut Reader<'_>, v: &Value, path: &str) -> Option<f64> {
    if v.is_null() {
        return None;
    }
    let t = r.number(v, path)?;
    if !(0.0..=1.0).contains(&t) {
        r.problems
            .push(path, format!("threshold must lie in [0, 1], got {t}"));
        return None;
    }
    Some(t)
}

fn read_evidence(r: &mut Reader<'_>, v: &Value) -> Option<Evidence> {
    const P: &str = "policy.evidence";
    let e: Evidence = match serde_json::from_value(v.clone()) {
        Ok(e) => e,
        Err(err) => {
            r.problems.push(P, format!("malformed: {err}"));
            return None;
        }
    };
    let open = [
        ("target_accuracy", e.target_accuracy),
        ("confidence_level", e.confidence_level),
    ];
    for (name, value) in open {
        if let Some(x) = value {
            if !(x > 0.0 && x < 1.0) {
                r.problems
                    .push(join(P, name), format!("must lie in (0, 1), got {x}"));
            }
        }
    }
    let closed = [
        ("certified_accuracy", e.certified_accuracy),
        ("expected_coverage", e.expected_coverage),
    ];
    for (name, value) in closed {
        if let Some(x) = value {
            if !(0.0..=1.0).contains(&x) {
                r.problems
                    .push(join(P, name), format!("must lie in [0, 1], got {x}"));
            }
        }
    }
    if let (Some(a), Some(n)) = (e.accepted, e.items) {
        if a > n {
            r.problems.push(
                join(P, "accepted"),
                format!("{a} accepted out of only {n} items"),
            );
        }
    }
    if let (Some(err), Some(a)) = (e.errors, e.accepted) {
        if err > a {
            r.problems.push(
                join(P, "errors"),
                format!("{err} errors among only {a} accepted"),
            );
        }
    }
    Some(e)
}

pub(super) fn write_policy(p: &DecisionPolicy) -> Value {
    let mut obj = Map::new();
    obj.insert("threshold".into(), json!(p.global_threshold()));
    if let Some(list) = p.per_class() {
        obj.insert("per_class".into(), json!(list));
    }
    if let Some(a) = p.audit_rate() {
        obj.insert("audit_rate".into(), json!(a));
    }
    if let Some(e) = p.evidence() {
        obj.insert(
            "evidence".into(),
            serde_json::to_value(e).unwrap_or(Value::Null),
        );
    }
    Value::Object(obj)
}

/// Reads `provenance`: an object whose known fields are checked (`created_at` a string,
/// `fit_data.sha256` 64 hex digits, `fit_data.rows` an integer, `metrics.before/after` objects of
/// numbers); other fields are kept as they are.
pub(super) fn read_provenance(r: &mut Reader<'_>, v: &Value) -> Option<Map<String, Value>> {
    const P: &str = "provenance";
    let obj = r.object(v, P)?;
    if let Some(c) = obj.get("created_at") {
        r.string(c, "provenance.created_at");
    }
    if let Some(fd) = obj.get("fit_data") {
        if let Some(fd) = r.object(fd, "provenance.fit_data") {
            if let Some(h) = fd.get("sha256") {
                if let Some(s) = r.string(h, "provenance.fit_data.sha256") {
                    if s.len() != 64 || !s.bytes().all(|b| b.is_ascii_hexdigit()) {
                        r.problems.push(
                            "provenance.fit_data.sha256",
                            format!("must be 64 hex digits, got {s:?}"),
                        );
                    }
                }
            }
            if let Some(n) = fd.get("rows") {
                r.integer(n, "provenance.fit_data.rows");
            }
        }
    }
    if let Some(m) = obj.get("metrics") {
        if let Some(m) = r.object(m, "provenance.metrics") {
            for side in ["before", "after"] {
                let Some(s) = m.get(side) else { continue };
                let path = format!("provenance.metrics.{side}");
                if let Some(s) = r.object(s, &path) {
                    for (name, value) in s {
                        r.number(value, &join(&path, name));
                    }
                }
            }
        }
    }
    Some(obj.clone())
}
