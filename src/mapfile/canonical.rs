//! The canonical form a map's digest is computed over.
//!
//! Compact JSON of the whole document without its top-level `digest` key; object keys sorted by
//! their UTF-8 bytes; strings escaped as serde_json escapes them; numbers with an integral value of
//! magnitude below 2^53 written as integers (so `2`, `2.0` and `2e0` agree), every other number in
//! Rust's shortest round-trip form. The digest is `sha256:` + lowercase hex of SHA-256 of these bytes.

use serde_json::Value;
use sha2::{Digest, Sha256};

/// Largest integer every f64 holds exactly.
const EXACT_INTEGER_LIMIT: f64 = 9007199254740992.0; // 2^53

/// `sha256:<hex>` of the canonical form of `doc` without its top-level `digest` key.
pub fn digest(doc: &Value) -> String {
    let mut out = String::new();
    match doc {
        Value::Object(map) => {
            let mut keys: Vec<&String> = map.keys().filter(|k| *k != "digest").collect();
            keys.sort();
            write_object(&mut out, keys.into_iter().map(|k| (k, &map[k])));
        }
        other => write_value(&mut out, other),
    }
    format!("sha256:{}", hex::encode(Sha256::digest(out.as_bytes())))
}

fn write_object<'a>(out: &mut String, entries: impl Iterator<Item = (&'a String, &'a Value)>) {
    out.push('{');
    for (i, (k, v)) in entries.enumerate() {
        if i > 0 {
            out.push(',');
        }
        write_string(out, k);
        out.push(':');
        write_value(out, v);
    }
    out.push('}');
}

fn write_string(out: &mut String, s: &str) {
    // serde_json's string escaping cannot fail for a &str.
    out.push_str(&Value::String(s.to_owned()).to_string());
}

fn write_value(out: &mut String, v: &Value) {
    match v {
        Value::Null => out.push_str("null"),
        Value::Bool(b) => out.push_str(if *b { "true" } else { "false" }),
        Value::String(s) => write_string(out, s),
        Value::Number(n) => match (n.as_i64(), n.as_u64(), n.as_f64()) {
            (Some(i), _, _) => out.push_str(&i.to_string()),
            (_, Some(u), _) => out.push_str(&u.to_string()),
            (_, _, Some(f)) if f.fract() == 0.0 && f.abs() < EXACT_INTEGER_LIMIT => {
                out.push_str(&(f as i64).to_string())
            }
            (_, _, Some(f)) => out.push_str(&format!("{f:?}")),
            _ => out.push_str(&n.to_string()),
        },
        Value::Array(items) => {
            out.push('[');
            for (i, item) in items.iter().enumerate() {
                if i > 0 {
                    out.push(',');
                }
                write_value(out, item);
            }
            out.push(']');
        }
        Value::Object(map) => {
            let mut keys: Vec<&String> = map.keys().collect();
            keys.sort();
            write_object(out, keys.into_iter().map(|k| (k, &map[k])));
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use serde_json::json;

    #[test]
    fn key_order_number_spelling_and_digest_field_do_not_matter() {
        let a = json!({"b": 2.0, "a": [1, 0.5, {"y": true, "x": null}], "digest": "x"});
        let b: Value =
            serde_json::from_str(r#"{"a":[1.0,5e-1,{"x":null,"y":true}],"b":2}"#).unwrap();
        assert_eq!(digest(&a), digest(&b));
        let c = json!({"b": 2.5, "a": [1, 0.5, {"y": true, "x": null}]});
        assert_ne!(digest(&a), digest(&c));
    }

    #[test]
    fn digest_of_a_known_document() {
        // The canonical bytes of {"a":1} are `{"a":1}`; their SHA-256 was computed with Python's
        // hashlib.sha256(b'{"a":1}').hexdigest().
        assert_eq!(
            digest(&json!({"a": 1.0})),
            "sha256:015abd7f5cc57a2dd94b7590f04ad8084273905ee33ec5cebeae62276a97f862"
        );
    }
}
