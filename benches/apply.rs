//! Applying a map to one request in-process, without the transport.
//!
//! Targets (issue: the sidecar): temperature with K = 1000 under 5 µs, K = 10 under 0.3 µs per
//! request. `workspace/*` measures the numerical apply; `answer/*` the whole hot path of one
//! Calibrate request (lookup, checks, apply, decision, response vector); `wire/*` decoding a
//! request and encoding a response of K floats, candor's messages against what prost generates
//! for the same fields.

use candor::decision::DecisionPolicy;
use candor::mapfile::{CalibrationMap, MapParts};
use candor::method::{
    InputForm, Isotonic, Method, OneVsRest, Temperature, VectorScaling, Workspace,
};
use candor::proto::twins::{GeneratedRequest, GeneratedResponse};
use candor::proto::v1::{CalibrateRequest, CalibrateResponse};
use candor::registry::Registry;
use criterion::{criterion_group, criterion_main, BatchSize, BenchmarkId, Criterion};
use prost::Message as _;
use std::hint::black_box;

fn logits(k: usize) -> Vec<f32> {
    // Deterministic, spread-out logits (a fixed pseudo-random pattern).
    (0..k)
        .map(|i| ((i * 7919 % 1000) as f32) / 100.0 - 5.0)
        .collect()
}

fn map_of(k: usize, method: Method) -> CalibrationMap {
    CalibrationMap::from_parts(MapParts {
        model: "bench".into(),
        map_version: "1".into(),
        classes: k,
        class_names: None,
        input: InputForm::Logits,
        method,
        policy: DecisionPolicy::global(0.9),
        provenance: serde_json::Map::new(),
    })
    .expect("bench map is valid")
}

fn methods(k: usize) -> Vec<(&'static str, Method)> {
    let iso = Isotonic::try_new(
        (0..64).map(|i| f64::from(i) / 63.0).collect(),
        (0..64).map(|i| (f64::from(i) / 63.0).powi(2)).collect(),
        "m",
    )
    .expect("valid knots");
    // Knots spread evenly in log score from 1e-6 to 1, as a fit on large-K softmax scores puts
    // them where the scores are: here most classes' scores fall past the first segment, the
    // knot table's slow path.
    let x_low: Vec<f64> = (0..64)
        .map(|i| 10f64.powf(-6.0 + 6.0 * f64::from(i) / 63.0))
        .collect();
    let y_low = x_low.iter().map(|v| v.powf(1.2)).collect();
    let iso_low = Isotonic::try_new(x_low, y_low, "m").expect("valid knots");
    vec![
        (
            "temperature",
            Method::Temperature(Temperature::try_new(1.7, "t").expect("T > 0")),
        ),
        (
            "vector",
            Method::Vector(
                VectorScaling::try_new(k, vec![0.8; k], vec![0.1; k], "m").expect("valid"),
            ),
        ),
        (
            "isotonic",
            Method::Isotonic(OneVsRest::try_new(k, vec![iso; k], "m").expect("valid")),
        ),
        (
            "isotonic_log_knots",
            Method::Isotonic(OneVsRest::try_new(k, vec![iso_low; k], "m").expect("valid")),
        ),
    ]
}

/// Bytes written between two cold rows: four times a 2 MiB per-core L2 cache.
const COLD_BYTES: usize = 8 << 20;

/// Writes every cache line of `other`, pushing earlier data out of the core's own caches.
fn evict(other: &mut [u64]) {
    for line in other.chunks_mut(8) {
        line[0] = line[0].wrapping_add(1);
    }
    black_box(&other[0]);
}

fn bench_apply(c: &mut Criterion) {
    let mut group = c.benchmark_group("workspace");
    for k in [10usize, 1000] {
        let z = logits(k);
        for (name, method) in methods(k) {
            let mut ws = Workspace::new();
            group.bench_with_input(BenchmarkId::new(name, k), &z, |b, z| {
                b.iter(|| {
                    let q = ws.apply(black_box(&method), InputForm::Logits, k, black_box(z));
                    black_box(q[0])
                })
            });
        }
    }
    group.finish();

    // The same rows after the core's caches were filled with other data, as a sidecar at low
    // load finds them after the kernel's network work between two requests (the tables of a map
    // and the workspace then come from the shared cache or memory).
    let mut group = c.benchmark_group("workspace_cold");
    let mut other = vec![0u64; COLD_BYTES / 8];
    for k in [10usize, 1000] {
        let z = logits(k);
        for (name, method) in methods(k) {
            let mut ws = Workspace::new();
            group.bench_with_input(BenchmarkId::new(name, k), &z, |b, z| {
                b.iter_batched(
                    || evict(&mut other),
                    |_| {
                        let q = ws.apply(black_box(&method), InputForm::Logits, k, black_box(z));
                        black_box(q[0])
                    },
                    BatchSize::PerIteration,
                )
            });
        }
    }
    group.finish();

    let mut group = c.benchmark_group("answer");
    for k in [10usize, 1000] {
        let registry = Registry::new();
        let t = Temperature::try_new(1.7, "t").expect("T > 0");
        registry.publish(vec![map_of(k, Method::Temperature(t))]);
        let req = CalibrateRequest {
            model: "bench".into(),
            logits: logits(k),
            request_id: "bench-1".into(),
            ..CalibrateRequest::default()
        };
        // A fresh request per call, as the transport decodes one (its making is not timed); the
        // logits' buffer carries the probabilities back, as in the sidecar without a journal.
        group.bench_with_input(BenchmarkId::new("temperature", k), &req, |b, req| {
            b.iter_batched(
                || req.clone(),
                |mut r| {
                    registry.with_snapshot(|s| {
                        candor::service::answer_by(s, black_box(&mut r), true)
                            .map(|(resp, _)| resp.confidence)
                    })
                },
                BatchSize::SmallInput,
            )
        });
    }
    group.finish();
}

fn bench_wire(c: &mut Criterion) {
    let mut g = c.benchmark_group("wire");
    for k in [10usize, 1000] {
        let req = CalibrateRequest {
            model: "triage".into(),
            logits: logits(k),
            request_id: "req-000001".into(),
            ..Default::default()
        };
        let bytes = req.encode_to_vec();
        g.bench_function(BenchmarkId::new("decode_request", k), |b| {
            b.iter(|| CalibrateRequest::decode(black_box(bytes.as_slice())).unwrap())
        });
        g.bench_function(BenchmarkId::new("decode_request_generated", k), |b| {
            b.iter(|| GeneratedRequest::decode(black_box(bytes.as_slice())).unwrap())
        });
        let resp = CalibrateResponse {
            probabilities: logits(k),
            predicted_class: 3,
            confidence: 0.5,
            map_version: "v1".into(),
            request_id: "req-000001".into(),
            ..Default::default()
        };
        let generated = GeneratedResponse {
            probabilities: resp.probabilities.clone(),
            predicted_class: 3,
            confidence: 0.5,
            map_version: "v1".into(),
            request_id: "req-000001".into(),
            ..Default::default()
        };
        let mut out = Vec::with_capacity(resp.encoded_len());
        g.bench_function(BenchmarkId::new("encode_response", k), |b| {
            b.iter(|| {
                out.clear();
                black_box(&resp).encode(&mut out).unwrap();
            })
        });
        g.bench_function(BenchmarkId::new("encode_response_generated", k), |b| {
            b.iter(|| {
                out.clear();
                black_box(&generated).encode(&mut out).unwrap();
            })
        });
    }
    g.finish();
}

criterion_group!(benches, bench_apply, bench_wire);
criterion_main!(benches);
