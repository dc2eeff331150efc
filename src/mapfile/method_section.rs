//! The `method` section of a map file: `{"kind": ..., <parameters>}`.
//!
//! | kind | parameters |
//! |---|---|
//! | identity | none |
//! | temperature | `temperature` (T > 0) |
//! | vector | `weights` [K], `biases` [K] |
//! | matrix | `weights` [K][K] (row j gives output logit j), `biases` [K] |
//! | dirichlet | as matrix, plus `epsilon` (clamp of p before ln) |
//! | platt | `per_class`: [{`a`, `b`}] |
//! | histogram | `per_class`: [{`edges` [B+1], `values` [B]}] |
//! | isotonic | `per_class`: [{`x` [J], `y` [J]}] |
//! | bbq | `per_class`: [{`models`: [{`weight`, `edges`, `values`}]}] |
//! | beta | `per_class`: [{`a`, `b`, `c`}], `epsilon` |
//!
//! `per_class` holds one entry for K = 2 (the map of class 1) and K entries for K ≥ 3, following
//! the one-vs-rest rule of `crate::method::OneVsRest`.

use super::read::{join, Reader};
use crate::method::{
    Bbq, BbqModel, BetaCalibration, Dirichlet, Histogram, Isotonic, MatrixScaling, Method,
    OneVsRest, Platt, Problem, Temperature, VectorScaling,
};
use serde_json::{json, Map, Value};

/// Every method kind a map file may name.
pub const KINDS: [&str; 10] = [
    "identity",
    "temperature",
    "vector",
    "matrix",
    "dirichlet",
    "platt",
    "histogram",
    "isotonic",
    "bbq",
    "beta",
];

/// Reads and validates the method section for `classes` classes.
pub(super) fn read(r: &mut Reader<'_>, v: &Value, classes: usize) -> Option<Method> {
    const P: &str = "method";
    let obj = r.object(v, P)?;
    let kind = r.string_field(obj, "kind", P)?;
    let (allowed, method): (&[&str], Option<Method>) = match kind {
        "identity" => (&["kind"], Some(Method::Identity)),
        "temperature" => (&["kind", "temperature"], {
            let t = r.number_field(obj, "temperature", P);
            t.and_then(|t| absorb(r, Temperature::try_new(t, "method.temperature")))
                .map(Method::Temperature)
        }),
        "vector" => (&["kind", "weights", "biases"], {
            let w = r.numbers_field(obj, "weights", P);
            let b = r.numbers_field(obj, "biases", P);
            w.zip(b)
                .and_then(|(w, b)| absorb(r, VectorScaling::try_new(classes, w, b, P)))
                .map(Method::Vector)
        }),
        "matrix" => (&["kind", "weights", "biases"], {
            let w = r.matrix_field(obj, "weights", P);
            let b = r.numbers_field(obj, "biases", P);
            w.zip(b)
                .and_then(|(w, b)| absorb(r, MatrixScaling::try_new(classes, w, b, P)))
                .map(Method::Matrix)
        }),
        "dirichlet" => (&["kind", "weights", "biases", "epsilon"], {
            let w = r.matrix_field(obj, "weights", P);
            let b = r.numbers_field(obj, "biases", P);
            let e = r.number_field(obj, "epsilon", P);
            match (w, b, e) {
                (Some(w), Some(b), Some(e)) => {
                    absorb(r, Dirichlet::try_new(classes, w, b, e, P)).map(Method::Dirichlet)
                }
                _ => None,
            }
        }),
        "platt" => (&["kind", "per_class"], {
            per_class(r, obj, classes, |r, o, p| {
                r.deny_unknown(o, &["a", "b"], p);
                let a = r.number_field(o, "a", p);
                let b = r.number_field(o, "b", p);
                a.zip(b)
                    .and_then(|(a, b)| absorb(r, Platt::try_new(a, b, p)))
            })
            .map(Method::Platt)
        }),
        "histogram" => (&["kind", "per_class"], {
            per_class(r, obj, classes, |r, o, p| {
                r.deny_unknown(o, &["edges", "values"], p);
                let e = r.numbers_field(o, "edges", p);
                let v = r.numbers_field(o, "values", p);
                e.zip(v)
                    .and_then(|(e, v)| absorb(r, Histogram::try_new(e, v, p)))
            })
            .map(Method::Histogram)
        }),
        "isotonic" => (&["kind", "per_class"], {
            per_class(r, obj, classes, |r, o, p| {
                r.deny_unknown(o, &["x", "y"], p);
                let x = r.numbers_field(o, "x", p);
                let y = r.numbers_field(o, "y", p);
                x.zip(y)
                    .and_then(|(x, y)| absorb(r, Isotonic::try_new(x, y, p)))
            })
            .map(Method::Isotonic)
        }),
        "bbq" => (&["kind", "per_class"], {
            per_class(r, obj, classes, |r, o, p| {
                r.deny_unknown(o, &["models"], p);
                let models = r.objects_field(o, "models", p)?;
                let mut out = Vec::with_capacity(models.len());
                for (mp, m) in models {
                    r.deny_unknown(m, &["weight", "edges", "values"], &mp);
                    let w = r.number_field(m, "weight", &mp);
                    let e = r.numbers_field(m, "edges", &mp);
                    let v = r.numbers_field(m, "values", &mp);
                    if let (Some(weight), Some(edges), Some(values)) = (w, e, v) {
                        out.push(BbqModel {
                            weight,
                            edges,
                            values,
                        });
                    }
                }
                absorb(r, Bbq::try_new(out, p))
            })
            .map(Method::Bbq)
        }),
        "beta" => (&["kind", "per_class", "epsilon"], {
            let eps = r.number_field(obj, "epsilon", P);
            let maps = per_class(r, obj, classes, |r, o, p| {
                r.deny_unknown(o, &["a", "b", "c"], p);
                let a = r.number_field(o, "a", p);
                let b = r.number_field(o, "b", p);
                let c = r.number_field(o, "c", p);
                match (a, b, c, eps) {
                    (Some(a), Some(b), Some(c), Some(e)) => {
                        absorb(r, BetaCalibration::try_new(a, b, c, e, p))
                    }
                    _ => None,
                }
            });
            maps.map(Method::Beta)
        }),
        other => {
            r.problems.push(
                "method.kind",
                format!("unknown method {other:?} (known: {})", KINDS.join(", ")),
            );
            return None;
        }
    };
    r.deny_unknown(obj, allowed, P);
    method
}

/// Moves a constructor's problems into the reader.
fn absorb<T>(r: &mut Reader<'_>, result: Result<T, Vec<Problem>>) -> Option<T> {
    match result {
        Ok(v) => Some(v),
        Err(list) => {
            for p in list {
                r.problems.push(p.field, p.message);
            }
            None
        }
    }
}

/// Reads `per_class` entries with `each` and checks their number.
fn per_class<M: crate::method::BinaryMap>(
    r: &mut Reader<'_>,
    obj: &Map<String, Value>,
    classes: usize,
    mut each: impl FnMut(&mut Reader<'_>, &Map<String, Value>, &str) -> Option<M>,
) -> Option<OneVsRest<M>> {
    let entries = r.objects_field(obj, "per_class", "method")?;
    let mut maps = Vec::with_capacity(entries.len());
    let mut complete = true;
    for (path, o) in &entries {
        match each(r, o, path) {
            Some(m) => maps.push(m),
            None => complete = false,
        }
    }
    if !complete {
        return None;
    }
    absorb(
        r,
        OneVsRest::try_new(classes, maps, &join("method", "per_class")),
    )
}

/// The method section of `method` as JSON.
pub(super) fn write(method: &Method) -> Value {
    let kind = method.kind();
    let mut v = match method {
        Method::Identity => json!({}),
        Method::Temperature(t) => json!({ "temperature": t.temperature() }),
        Method::Vector(m) => json!({ "weights": m.weights(), "biases": m.biases() }),
        Method::Matrix(m) => json!({ "weights": rows(m), "biases": m.biases() }),
        Method::Dirichlet(d) => json!({
            "weights": rows(d.matrix()), "biases": d.matrix().biases(), "epsilon": d.epsilon()
        }),
        Method::Platt(o) => per_class_json(o.maps(), |m| json!({ "a": m.a(), "b": m.b() })),
        Method::Histogram(o) => per_class_json(
            o.maps(),
            |m| json!({ "edges": m.edges(), "values": m.values() }),
        ),
        Method::Isotonic(o) => per_class_json(o.maps(), |m| json!({ "x": m.x(), "y": m.y() })),
        Method::Bbq(o) => per_class_json(o.maps(), |m| {
            let models: Vec<Value> = m
                .models()
                .iter()
                .map(|b| json!({ "weight": b.weight, "edges": b.edges, "values": b.values }))
                .collect();
            json!({ "models": models })
        }),
        Method::Beta(o) => {
            let mut v = per_class_json(o.maps(), |m| {
                let (a, b, c) = m.params();
                json!({ "a": a, "b": b, "c": c })
            });
            let eps = o.maps().first().map_or(1e-12, |m| m.epsilon());
            v["epsilon"] = json!(eps);
            v
        }
    };
    let mut out = Map::new();
    out.insert("kind".into(), json!(kind));
    if let Value::Object(params) = &mut v {
        out.append(params);
    }
    Value::Object(out)
}

fn rows(m: &MatrixScaling) -> Vec<&[f64]> {
    m.weights().chunks(m.classes()).collect()
}

fn per_class_json<M>(maps: &[M], each: impl Fn(&M) -> Value) -> Value {
    json!({ "per_class": maps.iter().map(each).collect::<Vec<_>>() })
}
