use super::*;
use crate::decision::DecisionPolicy;
use crate::mapfile::MapParts;
use crate::method::{Method, Temperature};

fn temperature_map(t: f64, threshold: f64) -> CalibrationMap {
    CalibrationMap::from_parts(MapParts {
        model: "m".into(),
        map_version: "1".into(),
        classes: 3,
        class_names: None,
        input: InputForm::Logits,
        method: Method::Temperature(Temperature::try_new(t, "t").unwrap()),
        policy: DecisionPolicy::global(threshold),
        provenance: serde_json::Map::new(),
    })
    .unwrap()
}

/// softmax([1, 2, 3] / T) written out: closed form e^{z_k/T} / Σ_j e^{z_j/T}.
fn softmax_over(t: f64) -> Vec<f32> {
    let e: Vec<f64> = [1.0f64, 2.0, 3.0].iter().map(|z| (z / t).exp()).collect();
    let s: f64 = e.iter().sum();
    e.iter().map(|v| (v / s) as f32).collect()
}

fn answer(p: Vec<f32>, threshold: f32) -> CalibrateResponse {
    let (predicted, confidence) = p.iter().enumerate().fold(
        (0, f32::NEG_INFINITY),
        |b, (i, &v)| if v > b.1 { (i, v) } else { b },
    );
    CalibrateResponse {
        decision: if confidence >= threshold {
            PbDecision::Accept as i32
        } else {
            PbDecision::Defer as i32
        },
        probabilities: p,
        predicted_class: predicted as u32,
        confidence,
        threshold,
        ..Default::default()
    }
}

const LOGITS: [f32; 3] = [1.0, 2.0, 3.0];

#[test]
fn a_right_answer_passes_with_and_without_the_map() {
    let resp = answer(softmax_over(2.0), 0.4);
    verify(&resp, &LOGITS, 3, Expect::Probabilities, None).unwrap();
    let mut r = Reference::try_new(temperature_map(2.0, 0.4)).unwrap();
    verify(&resp, &LOGITS, 3, Expect::Probabilities, Some(&mut r)).unwrap();
}

#[test]
fn the_map_catches_a_plausible_but_wrong_answer() {
    // softmax at T = 1 is a valid probability vector but not what the T = 2 map gives.
    let resp = answer(softmax_over(1.0), 0.4);
    verify(&resp, &LOGITS, 3, Expect::Probabilities, None).unwrap();
    let mut r = Reference::try_new(temperature_map(2.0, 0.4)).unwrap();
    let err = verify(&resp, &LOGITS, 3, Expect::Probabilities, Some(&mut r)).unwrap_err();
    assert!(matches!(err, VerifyError::Map { index: 0, .. }), "{err}");
    // Right probabilities, wrong decision: the map's threshold 0.4 accepts confidence ≈ 0.506.
    let mut resp = answer(softmax_over(2.0), 0.4);
    resp.decision = PbDecision::Defer as i32;
    resp.threshold = 0.9;
    let err = verify(&resp, &LOGITS, 3, Expect::Probabilities, Some(&mut r)).unwrap_err();
    assert!(matches!(err, VerifyError::MapDecision { .. }), "{err}");
}

#[test]
fn malformed_answers_are_named() {
    let good = answer(softmax_over(2.0), 0.4);
    let check = |r: &CalibrateResponse| verify(r, &LOGITS, 3, Expect::Probabilities, None);

    let mut r = good.clone();
    r.probabilities.pop();
    assert!(matches!(
        check(&r),
        Err(VerifyError::Length {
            expected: 3,
            got: 2
        })
    ));

    let mut r = good.clone();
    r.probabilities[1] = f32::NAN;
    assert!(matches!(
        check(&r),
        Err(VerifyError::NotProbability { index: 1, .. })
    ));

    let mut r = good.clone();
    r.probabilities[0] += 0.01;
    assert!(matches!(check(&r), Err(VerifyError::Sum { .. })));

    let mut r = good.clone();
    r.predicted_class = 0;
    assert!(matches!(check(&r), Err(VerifyError::Inconsistent(_))));

    let mut r = good.clone();
    r.predicted_class = 7;
    assert!(matches!(check(&r), Err(VerifyError::Inconsistent(_))));

    let mut r = good.clone();
    r.confidence = 0.9;
    assert!(matches!(check(&r), Err(VerifyError::Inconsistent(_))));

    let mut r = good;
    r.decision = PbDecision::Unspecified as i32;
    assert!(matches!(check(&r), Err(VerifyError::Inconsistent(_))));
}

#[test]
fn the_transport_floor_is_only_checked_for_length() {
    let echo = CalibrateResponse {
        probabilities: LOGITS.to_vec(),
        ..Default::default()
    };
    verify(&echo, &LOGITS, 3, Expect::SameLength, None).unwrap();
    assert!(verify(&echo, &LOGITS, 4, Expect::SameLength, None).is_err());
    assert!(verify(&echo, &LOGITS, 3, Expect::Probabilities, None).is_err());
}
