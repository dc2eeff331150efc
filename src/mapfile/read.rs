//! A permissive walker over a parsed JSON document that records every problem with its field path
//! instead of stopping at the first one.

use crate::method::Problems;
use serde_json::{Map, Value};

/// Reads typed fields out of JSON objects, recording problems by path.
pub(super) struct Reader<'p> {
    pub problems: &'p mut Problems,
}

fn kind(v: &Value) -> &'static str {
    match v {
        Value::Null => "null",
        Value::Bool(_) => "a boolean",
        Value::Number(_) => "a number",
        Value::String(_) => "a string",
        Value::Array(_) => "an array",
        Value::Object(_) => "an object",
    }
}

/// `parent.key`, or `key` at the top level.
pub(super) fn join(parent: &str, key: &str) -> String {
    if parent.is_empty() {
        key.to_owned()
    } else {
        format!("{parent}.{key}")
    }
}

impl Reader<'_> {
    /// `v` as an object, or a problem.
    pub fn object<'v>(&mut self, v: &'v Value, path: &str) -> Option<&'v Map<String, Value>> {
        match v {
            Value::Object(m) => Some(m),
            other => {
                self.problems
                    .push(path, format!("must be an object, got {}", kind(other)));
                None
            }
        }
    }

    /// Records a problem for each key of `obj` not in `allowed`.
    pub fn deny_unknown(&mut self, obj: &Map<String, Value>, allowed: &[&str], path: &str) {
        for key in obj.keys() {
            if !allowed.contains(&key.as_str()) {
                self.problems.push(
                    join(path, key),
                    format!("unknown field (expected one of: {})", allowed.join(", ")),
                );
            }
        }
    }

    /// A required field.
    pub fn required<'v>(
        &mut self,
        obj: &'v Map<String, Value>,
        key: &str,
        path: &str,
    ) -> Option<&'v Value> {
        let v = obj.get(key);
        if v.is_none() {
            self.problems.push(join(path, key), "is required");
        }
        v
    }

    /// A number.
    pub fn number(&mut self, v: &Value, path: &str) -> Option<f64> {
        match v.as_f64() {
            Some(x) if v.is_number() => Some(x),
            _ => {
                self.problems
                    .push(path, format!("must be a number, got {}", kind(v)));
                None
            }
        }
    }

    /// A required number field.
    pub fn number_field(&mut self, obj: &Map<String, Value>, key: &str, path: &str) -> Option<f64> {
        let v = self.required(obj, key, path)?;
        self.number(v, &join(path, key))
    }

    /// A required non-negative integer field.
    pub fn integer_field(
        &mut self,
        obj: &Map<String, Value>,
        key: &str,
        path: &str,
    ) -> Option<u64> {
        let v = self.required(obj, key, path)?;
        self.integer(v, &join(path, key))
    }

    /// A non-negative integer.
    pub fn integer(&mut self, v: &Value, path: &str) -> Option<u64> {
        match v.as_u64() {
            Some(x) => Some(x),
            None => {
                self.problems
                    .push(path, format!("must be a non-negative integer, got {v}"));
                None
            }
        }
    }

    /// A required string field.
    pub fn string_field<'v>(
        &mut self,
        obj: &'v Map<String, Value>,
        key: &str,
        path: &str,
    ) -> Option<&'v str> {
        let v = self.required(obj, key, path)?;
        self.string(v, &join(path, key))
    }

    /// A string.
    pub fn string<'v>(&mut self, v: &'v Value, path: &str) -> Option<&'v str> {
        match v {
            Value::String(s) => Some(s),
            other => {
                self.problems
                    .push(path, format!("must be a string, got {}", kind(other)));
                None
            }
        }
    }

    /// An array.
    pub fn array<'v>(&mut self, v: &'v Value, path: &str) -> Option<&'v [Value]> {
        match v {
            Value::Array(a) => Some(a),
            other => {
                self.problems
                    .push(path, format!("must be an array, got {}", kind(other)));
                None
            }
        }
    }

    /// An array of numbers (every bad entry named).
    pub fn numbers(&mut self, v: &Value, path: &str) -> Option<Vec<f64>> {
        let items = self.array(v, path)?;
        let before = self.problems.len();
        let out: Vec<f64> = items
            .iter()
            .enumerate()
            .map(|(i, x)| self.number(x, &format!("{path}[{i}]")).unwrap_or(f64::NAN))
            .collect();
        (self.problems.len() == before).then_some(out)
    }

    /// A required array-of-numbers field.
    pub fn numbers_field(
        &mut self,
        obj: &Map<String, Value>,
        key: &str,
        path: &str,
    ) -> Option<Vec<f64>> {
        let v = self.required(obj, key, path)?;
        self.numbers(v, &join(path, key))
    }

    /// A required array of arrays of numbers.
    pub fn matrix_field(
        &mut self,
        obj: &Map<String, Value>,
        key: &str,
        path: &str,
    ) -> Option<Vec<Vec<f64>>> {
        let v = self.required(obj, key, path)?;
        let p = join(path, key);
        let rows = self.array(v, &p)?;
        let before = self.problems.len();
        let out: Vec<Vec<f64>> = rows
            .iter()
            .enumerate()
            .map(|(j, r)| self.numbers(r, &format!("{p}[{j}]")).unwrap_or_default())
            .collect();
        (self.problems.len() == before).then_some(out)
    }

    /// Each object of a required array field, with its path.
    pub fn objects_field<'v>(
        &mut self,
        obj: &'v Map<String, Value>,
        key: &str,
        path: &str,
    ) -> Option<Vec<(String, &'v Map<String, Value>)>> {
        let v = self.required(obj, key, path)?;
        let p = join(path, key);
        let items = self.array(v, &p)?;
        let before = self.problems.len();
        let out: Vec<_> = items
            .iter()
            .enumerate()
            .filter_map(|(i, x)| {
                let ip = format!("{p}[{i}]");
                self.object(x, &ip).map(|o| (ip, o))
            })
            .collect();
        (self.problems.len() == before).then_some(out)
    }
}
