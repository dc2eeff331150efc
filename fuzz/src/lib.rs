//! Entry points of candor's fuzz targets, one per input boundary. Each takes arbitrary bytes,
//! runs them through the functions the binary runs on that input, and panics only when the
//! library breaks a promise (a crash, or an assertion below, is a finding): no input may panic,
//! and whatever is accepted must give finite probabilities in [0, 1] that sum to 1.
//!
//! The targets in `fuzz_targets/` call these under libFuzzer (`cargo +nightly fuzz run NAME`);
//! `tests/fuzz_corpus.rs` in the main package includes this file as a module and replays every
//! committed seed in `corpus/` on the stable toolchain. Only candor's public API is used.

use candor::cli::inputs::{calibrate, uncalibrated};
use candor::dataset::{self, LabelNeed, LabelledSet, Source};
use candor::eval::{standard_report, BootstrapConfig, Predictions, StandardSettings};
use candor::mapfile::{canonical, CalibrationMap};
use candor::method::Workspace;
use candor::proto::v1::{CalibrateBatchRequest, CalibrateRequest, CalibrateResponse, Decision};
use candor::registry::{Registry, Snapshot};
use candor::service::{answer, MAX_BATCH_ROWS};
use prost::Message;
use serde_json::{json, Value};
use std::path::Path;
use std::sync::{Arc, OnceLock};

/// Largest |Σq − 1| accepted from a map's output (f64 arithmetic on at most a few thousand
/// classes stays far inside it).
const SUM_TOLERANCE: f64 = 1e-9;
/// Bootstrap replicates run on a fuzzed data set (enough to reach every code path).
const FUZZ_REPLICATES: usize = 3;

/// The map reader and validator, as `candor check` and the sidecar's map loading call it. The
/// bytes are read as they are, and once more with the digest recomputed (the fuzzer cannot
/// forge SHA-256, so without this no mutated map would ever be valid). A map that validates
/// must write itself back identically and give valid probabilities on extreme inputs.
pub fn map_file(data: &[u8]) {
    if let Ok(map) = CalibrationMap::from_slice(data) {
        check_map(&map);
    }
    let Ok(mut doc) = serde_json::from_slice::<Value>(data) else {
        return;
    };
    if let Some(obj) = doc.as_object_mut() {
        obj.remove("digest");
        let digest = canonical::digest(&doc);
        doc["digest"] = json!(digest);
        if let Ok(map) = CalibrationMap::from_value(&doc) {
            check_map(&map);
        }
    }
}

/// A valid map: it round-trips through its own text, and applying it to extreme but finite
/// inputs gives K valid probabilities and a decision.
fn check_map(map: &CalibrationMap) {
    let text = map.to_json();
    let again = match CalibrationMap::from_slice(text.as_bytes()) {
        Ok(m) => m,
        Err(e) => panic!("a map that validated does not read back: {e}\n{text}"),
    };
    assert_eq!(again.digest(), map.digest(), "digest changed on round trip");
    assert_eq!(again.to_json(), text, "text changed on round trip");
    let (k, len) = (map.classes(), map.input_len());
    let mut ws = Workspace::new();
    for input in probe_inputs(len) {
        let q = ws.apply(map.method(), map.input(), k, &input);
        check_probabilities(q, k, &input);
        let predicted = candor::numeric::argmax(q);
        let _ = map.policy().decide(predicted, q[predicted]);
        let _ = map.policy().threshold_for(predicted);
    }
}

/// Inputs of `len` finite f32 values: zeros, the largest magnitudes, one large entry, tiny
/// values and a ramp.
fn probe_inputs(len: usize) -> Vec<Vec<f32>> {
    let ramp = (0..len).map(|i| i as f32 * 0.75 - 3.0).collect();
    let alternating = (0..len)
        .map(|i| if i % 2 == 0 { f32::MAX } else { -f32::MAX })
        .collect();
    let mut one_high = vec![-1e30f32; len];
    one_high[len / 2] = 1e30;
    vec![
        vec![0.0; len],
        vec![f32::MAX; len],
        vec![-f32::MAX; len],
        alternating,
        one_high,
        vec![f32::MIN_POSITIVE; len],
        ramp,
    ]
}

/// K finite probabilities in [0, 1] summing to 1.
fn check_probabilities(q: &[f64], k: usize, input: &[f32]) {
    assert_eq!(q.len(), k, "wrong number of probabilities for {input:?}");
    assert!(
        q.iter().all(|p| p.is_finite() && (0.0..=1.0).contains(p)),
        "probabilities {q:?} for {input:?}"
    );
    let sum: f64 = q.iter().sum();
    assert!(
        (sum - 1.0).abs() <= SUM_TOLERANCE,
        "probabilities sum to {sum} for {input:?}"
    );
}

/// Fixed maps of every method kind and both input forms, sealed at first use.
fn fixed_maps() -> &'static [CalibrationMap] {
    static MAPS: OnceLock<Vec<CalibrationMap>> = OnceLock::new();
    MAPS.get_or_init(|| {
        let demo = include_str!("../../demo-data/maps/letter-sorter.json");
        let mut maps = vec![CalibrationMap::from_slice(demo.as_bytes()).expect("demo map")];
        let docs = [
            (
                "binary",
                2,
                "binary_score",
                json!({"kind": "platt", "per_class": [{"a": -1.5, "b": 0.2}]}),
                json!({"threshold": 0.8}),
            ),
            (
                "matrix",
                3,
                "logits",
                json!({"kind": "matrix", "weights": [[1.2, 0.1, 0.0], [0.0, 0.9, 0.2], [0.3, 0.0, 1.1]], "biases": [0.1, -0.2, 0.0]}),
                json!({"threshold": null, "per_class": [0.6, null, 0.95]}),
            ),
            (
                "isotonic",
                3,
                "logits",
                json!({"kind": "isotonic", "per_class": [{"x": [0.0, 0.4, 1.0], "y": [0.0, 0.3, 1.0]}, {"x": [0.1, 0.9], "y": [0.05, 0.95]}, {"x": [0.5], "y": [0.5]}]}),
                json!({"threshold": 0.5}),
            ),
            (
                "histogram",
                2,
                "logits",
                json!({"kind": "histogram", "per_class": [{"edges": [0.0, 0.5, 1.0], "values": [0.0, 1.0]}]}),
                json!({"threshold": null}),
            ),
            (
                "bbq",
                2,
                "logits",
                json!({"kind": "bbq", "per_class": [{"models": [{"weight": 0.7, "edges": [0.0, 0.3, 1.0], "values": [0.2, 0.8]}, {"weight": 0.3, "edges": [0.0, 1.0], "values": [0.5]}]}]}),
                json!({"threshold": 1.0}),
            ),
            (
                "beta",
                3,
                "logits",
                json!({"kind": "beta", "epsilon": 1e-12, "per_class": [{"a": 1.0, "b": 2.0, "c": 0.5}, {"a": 0.0, "b": 0.0, "c": -3.0}, {"a": 5.0, "b": 0.1, "c": 0.0}]}),
                json!({"threshold": 0.0}),
            ),
            (
                "dirichlet",
                3,
                "logits",
                json!({"kind": "dirichlet", "epsilon": 1e-12, "weights": [[1.0, 0.0, 0.2], [0.0, 1.0, 0.0], [-0.5, 0.0, 1.0]], "biases": [0.0, 0.1, -0.1]}),
                json!({"threshold": 0.7}),
            ),
            (
                "vector",
                4,
                "logits",
                json!({"kind": "vector", "weights": [1.0, 2.0, 0.5, 1e-3], "biases": [0.0, 0.1, -0.1, 3.0]}),
                json!({"threshold": 0.9, "per_class": [null, null, null, null]}),
            ),
        ];
        for (model, classes, input, method, policy) in docs {
            let mut doc = json!({
                "format_version": 1, "model": model, "map_version": "fuzz-1",
                "classes": classes, "input": input, "method": method, "policy": policy,
                "provenance": {"created_at": "2026-12-01T00:00:00Z"},
            });
            doc["digest"] = json!(canonical::digest(&doc));
            match CalibrationMap::from_value(&doc) {
                Ok(m) => maps.push(m),
                Err(e) => panic!("fixed map {model} is invalid: {e}"),
            }
        }
        maps
    })
}

/// One snapshot per fixed map (so an empty model name finds it), one with all of them, and an
/// empty one.
fn snapshots() -> &'static [Arc<Snapshot>] {
    static SNAPSHOTS: OnceLock<Vec<Arc<Snapshot>>> = OnceLock::new();
    SNAPSHOTS.get_or_init(|| {
        let publish = |maps: Vec<CalibrationMap>| {
            let registry = Registry::new();
            registry.publish(maps);
            registry.snapshot()
        };
        let mut out: Vec<Arc<Snapshot>> = fixed_maps()
            .iter()
            .map(|m| publish(vec![m.clone()]))
            .collect();
        out.push(publish(fixed_maps().to_vec()));
        out.push(publish(Vec::new()));
        out
    })
}

/// The request path: the bytes decoded as a `CalibrateRequest` (Calibrate, CalibrateStream)
/// and as a `CalibrateBatchRequest` (CalibrateBatch, at most [`MAX_BATCH_ROWS`] rows), each
/// row answered by the service's own row function against every fixed snapshot; a refusal
/// must map to a client error code, an answer must be a valid response.
pub fn request(data: &[u8]) {
    if let Ok(req) = CalibrateRequest::decode(data) {
        for snapshot in snapshots() {
            check_answer(snapshot, &req);
        }
    }
    if let Ok(batch) = CalibrateBatchRequest::decode(data) {
        if batch.rows.len() <= MAX_BATCH_ROWS {
            for row in &batch.rows {
                for snapshot in snapshots() {
                    check_answer(snapshot, row);
                }
            }
        }
    }
}

fn check_answer(snapshot: &Snapshot, req: &CalibrateRequest) {
    match answer(snapshot, req) {
        Ok(resp) => check_response(snapshot, req, &resp),
        Err(e) => {
            let status = tonic::Status::from(e.clone());
            assert!(
                matches!(
                    status.code(),
                    tonic::Code::InvalidArgument | tonic::Code::NotFound | tonic::Code::Unavailable
                ),
                "{e} became {status:?}"
            );
            assert!(!status.message().is_empty());
        }
    }
}

fn check_response(snapshot: &Snapshot, req: &CalibrateRequest, resp: &CalibrateResponse) {
    let map = match snapshot
        .get(&req.model)
        .and_then(|route| route.pick(&req.request_id, &req.map_version))
    {
        Ok((served, _)) => &served.map,
        Err(e) => panic!("answered without a map: {e:?}"),
    };
    let k = map.classes();
    let top_k = (req.top_k as usize).min(k);
    let shown = if top_k == 0 { k } else { top_k };
    assert_eq!(resp.probabilities.len(), shown);
    assert_eq!(resp.classes.len(), if top_k == 0 { 0 } else { top_k });
    assert!(resp.classes.iter().all(|&c| (c as usize) < k));
    assert!((resp.predicted_class as usize) < k);
    let in_unit = |p: &f32| p.is_finite() && (0.0..=1.0).contains(p);
    assert!(resp.probabilities.iter().all(in_unit), "{resp:?}");
    assert!(in_unit(&resp.confidence), "{resp:?}");
    let top = resp.probabilities.iter().copied().fold(0.0f32, f32::max);
    assert_eq!(
        resp.confidence, top,
        "confidence is not the largest probability"
    );
    let accept = resp.decision == Decision::Accept as i32;
    assert!(accept || resp.decision == Decision::Defer as i32);
    assert_eq!(resp.map_version, map.map_version());
    assert_eq!(resp.request_id, req.request_id);
}

/// The `.npy` reader of `fit`, `apply` and `eval` (`--logits X.npy [--labels y.npy]`). Byte 0
/// picks whether labels are given and required; bytes 1–2 (little-endian) the length of the
/// logits file; the rest is the labels file.
pub fn dataset_npy(data: &[u8]) {
    let Some((&mode, rest)) = data.split_first() else {
        return;
    };
    let (split, rest) = match rest {
        [a, b, rest @ ..] => (usize::from(u16::from_le_bytes([*a, *b])), rest),
        _ => return,
    };
    let (logits, labels) = rest.split_at(split.min(rest.len()));
    let Ok(dir) = scratch_dir() else { return };
    let logits_path = dir.path().join("x.npy");
    let labels_path = dir.path().join("y.npy");
    let with_labels = mode & 1 == 1;
    let wrote = std::fs::write(&logits_path, logits).is_ok()
        && (!with_labels || std::fs::write(&labels_path, labels).is_ok());
    if !wrote {
        return;
    }
    let source = Source::Npy {
        logits: logits_path,
        labels: with_labels.then_some(labels_path),
    };
    read_and_use(&source, need(mode));
}

/// The CSV reader (`--data FILE.csv`). Byte 0 picks whether labels are required.
pub fn dataset_csv(data: &[u8]) {
    text_dataset(data, "d.csv");
}

/// The JSON Lines reader (`--data FILE.jsonl`). Byte 0 picks whether labels are required.
pub fn dataset_jsonl(data: &[u8]) {
    text_dataset(data, "d.jsonl");
}

fn text_dataset(data: &[u8], name: &str) {
    let Some((&mode, text)) = data.split_first() else {
        return;
    };
    let Ok(dir) = scratch_dir() else { return };
    let path = dir.path().join(name);
    if std::fs::write(&path, text).is_err() {
        return;
    }
    let Ok(source) = Source::from_data_path(&path) else {
        return;
    };
    read_and_use(&source, need(mode));
}

fn need(mode: u8) -> LabelNeed {
    if mode & 2 == 2 {
        LabelNeed::Required
    } else {
        LabelNeed::Optional
    }
}

/// A fresh directory for one input's files: in memory (/dev/shm) where there is one.
fn scratch_dir() -> std::io::Result<tempfile::TempDir> {
    let shm = Path::new("/dev/shm");
    if shm.is_dir() {
        if let Ok(dir) = tempfile::Builder::new()
            .prefix("candor-fuzz")
            .tempdir_in(shm)
        {
            return Ok(dir);
        }
    }
    tempfile::Builder::new().prefix("candor-fuzz").tempdir()
}

/// Reads `source` as the commands do, then does what they do with a set: the set-level
/// checks, the digest, plain softmax, each fixed map whose shape fits, and the evaluation
/// with a small bootstrap.
fn read_and_use(source: &Source, need: LabelNeed) {
    let Ok(set) = dataset::read(source, need) else {
        return;
    };
    assert!(set.n() > 0 && set.k() > 0, "an empty set was accepted");
    assert_eq!(set.digest().len(), 64);
    let _ = set.class_counts();
    let _ = set.require_two_classes();
    let _ = set.check_classes(set.classes());
    let mut row = vec![0.0; set.k()];
    for i in 0..set.n() {
        set.row_f64(i, &mut row);
        assert!(row.iter().all(|v| v.is_finite()), "row {i} holds {row:?}");
    }
    evaluate(&set, &uncalibrated(&set));
    for map in fixed_maps() {
        if let Ok(probs) = calibrate(map, &set) {
            evaluate(&set, &probs);
        }
    }
}

/// What `eval` and `report` do with a labelled set's probabilities.
fn evaluate(set: &LabelledSet, probs: &[f64]) {
    let classes = set.classes();
    assert_eq!(probs.len(), set.n() * classes);
    for row in probs.chunks_exact(classes) {
        let sum: f64 = row.iter().sum();
        assert!(
            row.iter().all(|p| p.is_finite() && (0.0..=1.0).contains(p))
                && (sum - 1.0).abs() <= SUM_TOLERANCE,
            "probabilities {row:?}"
        );
    }
    let Some(labels) = set.labels() else { return };
    let p = match Predictions::try_new(probs, classes, labels) {
        Ok(p) => p,
        Err(e) => panic!("valid probabilities refused by eval: {e}"),
    };
    let Ok(settings) = StandardSettings::with_threshold(0.5) else {
        return;
    };
    let Ok(config) = BootstrapConfig::try_new(FUZZ_REPLICATES, 0.9, 7) else {
        return;
    };
    let report = match standard_report(&p, &settings, &config) {
        Ok(r) => r,
        Err(e) => panic!("evaluation failed: {e}"),
    };
    for m in [
        report.accuracy,
        report.ece,
        report.nll,
        report.brier,
        report.aurc,
    ] {
        assert!(
            m.value.is_finite() && m.low.is_finite() && m.high.is_finite(),
            "{m:?}"
        );
    }
}
