//! `candor fit`, `apply` and `eval` on real files, through the real binary.

use crate::support::Sidecar;
use candor::mapfile::CalibrationMap;
use candor::proto::v1::CalibrateRequest;
use serde_json::Value;
use std::path::{Path, PathBuf};
use std::process::{Command, Output};

fn candor(args: &[&str]) -> Output {
    Command::new(env!("CARGO_BIN_EXE_candor"))
        .args(args)
        .output()
        .unwrap()
}

fn ok(out: Output) -> String {
    assert!(
        out.status.success(),
        "exit {:?}\nstdout:\n{}\nstderr:\n{}",
        out.status.code(),
        String::from_utf8_lossy(&out.stdout),
        String::from_utf8_lossy(&out.stderr)
    );
    String::from_utf8(out.stdout).unwrap()
}

fn demo(file: &str) -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("demo-data")
        .join(file)
}

/// The first `rows` demo calibration rows as (logits, label).
fn demo_rows(rows: usize) -> Vec<(Vec<f64>, u32)> {
    let text = std::fs::read_to_string(demo("calibration.jsonl")).unwrap();
    text.lines()
        .take(rows)
        .map(|l| {
            let v: Value = serde_json::from_str(l).unwrap();
            let z = v["logits"]
                .as_array()
                .unwrap()
                .iter()
                .map(|x| x.as_f64().unwrap())
                .collect();
            (z, v["label"].as_u64().unwrap() as u32)
        })
        .collect()
}

/// A .npy header for `descr` and `shape`, padded as the format requires (16-byte multiple).
fn npy_header(descr: &str, shape: &str) -> Vec<u8> {
    let mut dict = format!("{{'descr': '{descr}', 'fortran_order': False, 'shape': {shape}, }}");
    while (10 + dict.len() + 1) % 64 != 0 {
        dict.push(' ');
    }
    dict.push('\n');
    let mut out = b"\x93NUMPY\x01\x00".to_vec();
    out.extend_from_slice(&(dict.len() as u16).to_le_bytes());
    out.extend_from_slice(dict.as_bytes());
    out
}

/// Writes the rows in the three input forms; returns (jsonl, csv, logits.npy, labels.npy).
fn three_forms(dir: &Path, rows: &[(Vec<f64>, u32)]) -> [PathBuf; 4] {
    let (n, k) = (rows.len(), rows[0].0.len());
    let jsonl = dir.join("data.jsonl");
    let csv = dir.join("data.csv");
    let x = dir.join("x.npy");
    let y = dir.join("y.npy");
    let mut j = String::new();
    let mut c = (0..k)
        .map(|i| format!("z{i}"))
        .collect::<Vec<_>>()
        .join(",")
        + ",label\n";
    let mut xb = npy_header("<f4", &format!("({n}, {k})"));
    let mut yb = npy_header("<i8", &format!("({n},)"));
    for (z, label) in rows {
        // Text forms carry the f32 values exactly (as their f64 widening), so every form holds
        // the same numbers as the float32 .npy.
        let zs: Vec<String> = z
            .iter()
            .map(|v| format!("{:?}", f64::from(*v as f32)))
            .collect();
        j.push_str(&format!(
            "{{\"logits\": [{}], \"label\": {label}}}\n",
            zs.join(", ")
        ));
        c.push_str(&format!("{},{label}\n", zs.join(",")));
        z.iter()
            .for_each(|v| xb.extend_from_slice(&(*v as f32).to_le_bytes()));
        yb.extend_from_slice(&i64::from(*label).to_le_bytes());
    }
    std::fs::write(&jsonl, j).unwrap();
    std::fs::write(&csv, c).unwrap();
    std::fs::write(&x, xb).unwrap();
    std::fs::write(&y, yb).unwrap();
    [jsonl, csv, x, y]
}

fn method_section(path: &Path) -> Value {
    let doc: Value = serde_json::from_str(&std::fs::read_to_string(path).unwrap()).unwrap();
    doc["method"].clone()
}

const METHODS: [&str; 9] = [
    "temperature",
    "vector",
    "matrix",
    "dirichlet",
    "platt",
    "beta",
    "histogram",
    "isotonic",
    "bbq",
];

#[test]
fn every_method_fits_the_same_map_from_all_three_input_forms() {
    let dir = tempfile::tempdir().unwrap();
    let rows = demo_rows(600);
    let [jsonl, csv, x, y] = three_forms(dir.path(), &rows);
    for method in METHODS {
        let mut sections = Vec::new();
        for (form, inputs) in [
            ("jsonl", vec!["--data", jsonl.to_str().unwrap()]),
            ("csv", vec!["--data", csv.to_str().unwrap()]),
            (
                "npy",
                vec![
                    "--logits",
                    x.to_str().unwrap(),
                    "--labels",
                    y.to_str().unwrap(),
                ],
            ),
        ] {
            let out = dir.path().join(format!("{method}-{form}.json"));
            let mut args = vec![
                "fit",
                "--method",
                method,
                "--model",
                "m",
                "--map-version",
                "1",
                "--threshold",
                "0.9",
                "--regularisation",
                "1",
                "--out",
                out.to_str().unwrap(),
            ];
            args.extend(inputs);
            let stdout = ok(candor(&args));
            assert!(
                stdout.contains(&format!("fitted {method} on 600 rows")),
                "{stdout}"
            );
            CalibrationMap::load(&out).unwrap_or_else(|e| panic!("{method} {form}: {e}"));
            sections.push(method_section(&out));
        }
        assert_eq!(sections[0], sections[1], "{method}: jsonl vs csv");
        assert_eq!(sections[0], sections[2], "{method}: jsonl vs npy");
    }
}

#[test]
fn fit_is_deterministic_byte_for_byte() {
    let dir = tempfile::tempdir().unwrap();
    let rows = demo_rows(600);
    let [data, ..] = three_forms(dir.path(), &rows);
    let mut maps = Vec::new();
    for i in 0..2 {
        let out = dir.path().join(format!("m{i}.json"));
        ok(candor(&[
            "fit",
            "--method",
            "auto",
            "--data",
            data.to_str().unwrap(),
            "--model",
            "m",
            "--map-version",
            "1",
            "--target-accuracy",
            "0.9",
            "--seed",
            "3",
            "--created-at",
            "2026-12-01T00:00:00Z",
            "--out",
            out.to_str().unwrap(),
        ]));
        maps.push(std::fs::read(out).unwrap());
    }
    assert!(
        maps[0] == maps[1],
        "two fits with the same input and seed differ"
    );
    let doc: Value = serde_json::from_slice(&maps[0]).unwrap();
    let candidates = doc["provenance"]["fit"]["selection"]["candidates"]
        .as_array()
        .unwrap();
    assert!(
        candidates.len() >= 2,
        "auto records every candidate: {candidates:?}"
    );
    assert!(candidates.iter().all(|c| c["nll"].is_number()));
    let evidence = &doc["policy"]["evidence"];
    assert_eq!(evidence["procedure"], "sgr");
    assert_eq!(evidence["certified_on"]["kind"], "holdout");
    assert!(evidence["certified_accuracy"].as_f64().unwrap() >= 0.9);
}

#[tokio::test]
async fn apply_gives_the_sidecars_numbers() {
    let dir = tempfile::tempdir().unwrap();
    let map_path = dir.path().join("map.json");
    // float32 logits: the numbers the sidecar receives on the wire.
    let [_, _, x, _] = three_forms(dir.path(), &demo_rows(200));
    ok(candor(&[
        "fit",
        "--method",
        "vector",
        "--data",
        demo("calibration.jsonl").to_str().unwrap(),
        "--model",
        "letters",
        "--map-version",
        "1",
        "--threshold",
        "0.9",
        "--out",
        map_path.to_str().unwrap(),
    ]));
    let out = dir.path().join("probs.csv");
    let stdout = ok(candor(&[
        "apply",
        "--map",
        map_path.to_str().unwrap(),
        "--logits",
        x.to_str().unwrap(),
        "--out",
        out.to_str().unwrap(),
        "--decisions",
    ]));
    assert!(stdout.contains("wrote 200 rows x 6"), "{stdout}");
    let text = std::fs::read_to_string(&out).unwrap();
    let mut lines = text.lines();
    assert_eq!(
        lines.next().unwrap(),
        "p0,p1,p2,p3,p4,p5,predicted,confidence,decision"
    );
    let offline: Vec<Vec<String>> = lines
        .take(50)
        .map(|l| l.split(',').map(str::to_owned).collect())
        .collect();

    let map = CalibrationMap::load(&map_path).unwrap();
    let sidecar = Sidecar::with_maps(vec![map]).await;
    let mut client = sidecar.client().await;
    for ((z, _), row) in demo_rows(200).iter().zip(&offline) {
        let logits: Vec<f32> = z.iter().map(|&v| v as f32).collect();
        let r = client
            .calibrate(CalibrateRequest {
                model: "letters".into(),
                logits,
                request_id: String::new(),
                ..CalibrateRequest::default()
            })
            .await
            .unwrap()
            .into_inner();
        let probs: Vec<f32> = row[..6].iter().map(|s| s.parse().unwrap()).collect();
        assert_eq!(r.probabilities, probs);
        assert_eq!(r.predicted_class.to_string(), row[6]);
        assert_eq!(r.confidence, row[7].parse::<f32>().unwrap());
        assert_eq!(if r.decision == 1 { "accept" } else { "defer" }, row[8]);
    }
    sidecar.stop().await;
}

#[test]
fn eval_json_has_the_documented_schema() {
    let dir = tempfile::tempdir().unwrap();
    let map = demo("maps/letter-sorter.json");
    let stdout = ok(candor(&[
        "eval",
        "--map",
        map.to_str().unwrap(),
        "--data",
        demo("traffic.jsonl").to_str().unwrap(),
        "--json",
        "--bootstrap",
        "200",
    ]));
    let doc: Value = serde_json::from_str(&stdout).unwrap();
    assert_eq!(doc["n"], 5000);
    for side in ["before", "after"] {
        for key in [
            "accuracy",
            "ece",
            "adaptive_ece",
            "mce",
            "nll",
            "brier",
            "aurc",
            "coverage",
            "accepted_accuracy",
        ] {
            let m = &doc[side][key];
            let (v, lo, hi) = (m["value"].as_f64(), m["low"].as_f64(), m["high"].as_f64());
            assert!(
                v.is_some() && lo.is_some() && hi.is_some(),
                "{side}.{key}: {m}"
            );
            assert!(lo.unwrap() <= hi.unwrap(), "{side}.{key}: {m}");
        }
        assert_eq!(doc[side]["reliability"].as_array().unwrap().len(), 15);
    }
    // Recalibration makes the over-confident demo model calibrated: ECE drops well.
    let ece = |s: &str| doc[s]["ece"]["value"].as_f64().unwrap();
    assert!(
        ece("after") < ece("before") / 3.0,
        "{} vs {}",
        ece("after"),
        ece("before")
    );
    let table = ok(candor(&[
        "eval",
        "--map",
        map.to_str().unwrap(),
        "--data",
        demo("traffic.jsonl").to_str().unwrap(),
        "--bootstrap",
        "50",
    ]));
    assert!(table.contains("risk–coverage"), "{table}");
    assert!(
        table.contains("reliability (15 equal-width bins"),
        "{table}"
    );
    drop(dir);
}

#[test]
fn an_uncertifiable_target_defers_everything_and_says_why() {
    let dir = tempfile::tempdir().unwrap();
    let out = dir.path().join("m.json");
    let stdout = ok(candor(&[
        "fit",
        "--data",
        demo("calibration.jsonl").to_str().unwrap(),
        "--model",
        "m",
        "--map-version",
        "1",
        "--target-accuracy",
        "0.999",
        "--out",
        out.to_str().unwrap(),
    ]));
    assert!(
        stdout.contains("No threshold could be certified"),
        "{stdout}"
    );
    assert!(stdout.contains("would likely be needed"), "{stdout}");
    let map = CalibrationMap::load(&out).unwrap();
    assert_eq!(map.policy().global_threshold(), None);
}

#[test]
fn bad_input_names_the_file_and_line_and_exits_2() {
    let dir = tempfile::tempdir().unwrap();
    let bad = dir.path().join("bad.csv");
    std::fs::write(&bad, "a,b,label\n0.1,0.2,1\n0.3,0\n").unwrap();
    let out = candor(&[
        "fit",
        "--data",
        bad.to_str().unwrap(),
        "--model",
        "m",
        "--map-version",
        "1",
        "--out",
        "x.json",
    ]);
    assert_eq!(out.status.code(), Some(2));
    let err = String::from_utf8_lossy(&out.stderr);
    assert!(err.contains("bad.csv") && err.contains("line 3"), "{err}");
}
