//! `candor fit --journal DIR`: refit a model's map from the decisions and outcomes the sidecar
//! journaled, so the next map is fitted on what the model sees now (METHODS.md 4.1–4.2).
//!
//! Only decisions with logits and a label are fitted on. Items the old map deferred count once
//! (people label what is deferred to them); accepted items count only when they were in the
//! random audit sample, with weight 1/π; labels of accepted items outside the audit sample (a
//! complaint, say) are left out, since how they came to be labelled is unknown. A certified
//! threshold is chosen on a holdout of the journal by the stratified bound of
//! [`crate::decision::stratified`], which also counts the unlabelled accepted items.

use super::super::inputs::input_form;
use super::{created_at, print_summary, FitArgs, FitOutcome, PolicyOutcome};
use crate::decision::certify::{default_grid, default_min_accepted};
use crate::decision::stratified::{certify, StratifiedItem, Stratum};
use crate::decision::{DecisionPolicy, Evidence};
use crate::fit::select::fit_choice_weighted;
use crate::journal::{read_journal, Record};
use crate::mapfile::{CalibrationMap, ConfidenceReference, MapParts};
use crate::method::{InputForm, Method, Workspace};
use anyhow::Context;
use serde_json::{json, Map};
use std::collections::HashMap;
use std::path::Path;
use std::process::ExitCode;

/// Seed of the request-id hash that puts an item in the certification holdout.
const HOLDOUT_SEED: u64 = 0x6a6f_7572_6e61_6c00;

/// One journaled decision of the model, with its label when one came back.
struct Item {
    request_id: String,
    logits: Vec<f32>,
    accepted: bool,
    audit: bool,
    audit_rate: f64,
    label: Option<u32>,
}

impl Item {
    /// Weight in the fit: deferred items 1, audited accepted items 1/π; others are not fitted on.
    fn weight(&self) -> Option<f64> {
        self.label?;
        if !self.accepted {
            Some(1.0)
        } else if self.audit && self.audit_rate > 0.0 {
            Some(1.0 / self.audit_rate)
        } else {
            None
        }
    }
}

/// The model's decisions, last decision per request id, with their labels.
fn items(dir: &Path, model: &str) -> anyhow::Result<(Vec<Item>, usize)> {
    let read = read_journal(dir).map_err(anyhow::Error::msg)?;
    let mut by_id: HashMap<String, usize> = HashMap::new();
    let mut items: Vec<Item> = Vec::new();
    let mut labels: HashMap<String, u32> = HashMap::new();
    let mut without_logits = 0usize;
    for r in read.records {
        match r {
            Record::Decision {
                request_id,
                model: m,
                logits,
                accepted,
                audit,
                audit_rate,
                ..
            } if m == model && !request_id.is_empty() => {
                let Some(logits) = logits else {
                    without_logits += 1;
                    continue;
                };
                let item = Item {
                    request_id: request_id.clone(),
                    logits,
                    accepted,
                    audit,
                    audit_rate,
                    label: None,
                };
                match by_id.get(&request_id) {
                    Some(&i) => items[i] = item,
                    None => {
                        by_id.insert(request_id, items.len());
                        items.push(item);
                    }
                }
            }
            Record::Outcome {
                request_id,
                model: m,
                true_label,
                ..
            } if m == model => {
                labels.insert(request_id, true_label);
            }
            _ => {}
        }
    }
    for it in &mut items {
        it.label = labels.get(&it.request_id).copied();
    }
    Ok((items, without_logits))
}

/// Calibrated top-label (class, confidence) of `logits` under `method`.
fn top(ws: &mut Workspace, method: &Method, classes: usize, logits: &[f32]) -> (usize, f64) {
    let p = ws.apply(method, input_form(logits.len()), classes, logits);
    let c = crate::numeric::argmax(p);
    (c, p[c])
}

/// Weighted NLL and ECE of the fitted rows before (softmax) and after the map: what the fit
/// optimised, weighted as it was.
fn weighted_metrics(
    ws: &mut Workspace,
    method: &Method,
    classes: usize,
    k: usize,
    x: &[f32],
    y: &[u32],
    w: &[f64],
) -> serde_json::Value {
    // T = 1 is valid by construction; the before side is left out if it were not.
    let identity = crate::method::Temperature::try_new(1.0, "identity")
        .ok()
        .map(Method::Temperature);
    let bins = crate::eval::EqualWidthBins::try_new(crate::eval::DEFAULT_BINS);
    let mut side = |m: &Method| {
        let (mut nll, mut total) = (0.0, 0.0);
        let mut labelled = Vec::with_capacity(y.len());
        for ((row, &label), &wi) in x.chunks_exact(k).zip(y).zip(w) {
            let p = ws.apply(m, input_form(k), classes, row);
            nll -= wi * p[label as usize].max(crate::eval::NLL_CLIP).ln();
            total += wi;
            let c = crate::numeric::argmax(p);
            labelled.push(crate::live::estimate::Labelled {
                confidence: p[c],
                correct: c == label as usize,
                pi: 1.0 / wi,
            });
        }
        let ece = bins
            .as_ref()
            .ok()
            .and_then(|b| crate::live::estimate::weighted_ece(&labelled, b));
        json!({"nll": nll / total, "ece": ece})
    };
    let before = identity.as_ref().map(&mut side);
    json!({"before": before, "after": side(method)})
}

/// `--prior-shift`: the class priors of the most recent decisions by EM (METHODS.md 4.3), and the
/// temperature map rewritten as vector scaling that moves its posteriors to them.
fn shift_priors(
    args: &FitArgs,
    method: &Method,
    items: &[Item],
    classes: usize,
    y: &[u32],
    w: &[f64],
) -> anyhow::Result<(Method, serde_json::Value)> {
    let Method::Temperature(t) = method else {
        anyhow::bail!(
            "--prior-shift needs --method temperature (its shift is exact vector scaling)"
        );
    };
    anyhow::ensure!(
        items[0].logits.len() >= 2,
        "--prior-shift needs logits (K ≥ 2 values per row), not a binary score"
    );
    // Source priors: the weighted class mix of the rows the map was fitted on.
    let total: f64 = w.iter().sum();
    let mut source = vec![0.0; classes];
    for (&label, &wi) in y.iter().zip(w) {
        source[label as usize] += wi / total;
    }
    if let Some(c) = source.iter().position(|&p| p <= 0.0) {
        anyhow::bail!(
            "--prior-shift: class {c} has no fitted label, so its prior cannot be re-estimated"
        );
    }
    let recent = &items[items.len().saturating_sub(args.prior_shift_recent)..];
    let mut ws = Workspace::new();
    let mut q = Vec::with_capacity(recent.len() * classes);
    for it in recent {
        q.extend_from_slice(ws.apply(method, InputForm::Logits, classes, &it.logits));
    }
    let em = crate::fit::prior_shift::saerens_em(&q, classes, &source)?;
    let target = crate::fit::prior_shift::floored(&em.priors);
    let v = crate::fit::prior_shift::shifted_temperature(t, &source, &target)?;
    super::say!(
        "prior shift over the last {} decisions: {:?} -> {:?} ({} EM iterations)",
        recent.len(),
        source
            .iter()
            .map(|p| (p * 1000.0).round() / 1000.0)
            .collect::<Vec<_>>(),
        target
            .iter()
            .map(|p| (p * 1000.0).round() / 1000.0)
            .collect::<Vec<_>>(),
        em.iterations
    );
    let record = json!({
        "method": "EM re-estimation of class priors (Saerens, Latinne & Decaestecker 2002)",
        "recent_decisions": recent.len(),
        "source_priors": source,
        "target_priors": target,
        "em": em,
        "temperature": t.temperature(),
    });
    Ok((Method::Vector(v), record))
}

pub(super) fn run(args: &FitArgs, dir: &Path) -> anyhow::Result<ExitCode> {
    let policy_args = args.policy.for_journal()?;
    anyhow::ensure!(
        !(args.prior_shift && policy_args.target_accuracy.is_some()),
        "--prior-shift changes the posteriors, and a threshold certified under the old class mix is no longer certified (METHODS.md 4.3): give --threshold with --prior-shift"
    );
    let choice = args.choice().context(
        "--method auto is not available with --journal; name a method (temperature, platt, beta, histogram, isotonic or bbq)",
    )?;
    let (items, without_logits) = items(dir, &args.model)
        .with_context(|| format!("reading the journal in {}", dir.display()))?;
    anyhow::ensure!(
        !items.is_empty(),
        "the journal in {} has no decision of model {:?} with logits{}",
        dir.display(),
        args.model,
        if without_logits > 0 {
            format!(" ({without_logits} without: the sidecar ran with --journal-without-logits)")
        } else {
            String::new()
        }
    );
    let k = items[0].logits.len();
    if let Some(bad) = items.iter().find(|it| it.logits.len() != k) {
        anyhow::bail!(
            "request {:?} has {} logits, the first decision has {k}: one map cannot fit both",
            bad.request_id,
            bad.logits.len()
        );
    }
    let classes = k.max(2);
    let certifies = policy_args.target_accuracy.is_some();
    let cut = (policy_args.holdout * u64::MAX as f64) as u64;
    let held_out = |it: &Item| {
        certifies
            && xxhash_rust::xxh3::xxh3_64_with_seed(
                it.request_id.as_bytes(),
                HOLDOUT_SEED ^ args.seed,
            ) < cut
    };
    let (mut x, mut y, mut w) = (Vec::new(), Vec::new(), Vec::new());
    let mut unaudited = 0usize;
    for it in items.iter().filter(|it| !held_out(it)) {
        match (it.label, it.weight()) {
            (Some(l), Some(weight)) => {
                anyhow::ensure!(
                    (l as usize) < classes,
                    "request {:?} has true label {l}, but the logits have {classes} classes",
                    it.request_id
                );
                x.extend_from_slice(&it.logits);
                y.push(l);
                w.push(weight);
            }
            (Some(_), None) => unaudited += 1,
            _ => {}
        }
    }
    anyhow::ensure!(
        y.len() >= 2,
        "only {} labelled decisions of model {:?} can be fitted on (deferred, or accepted and audited)",
        y.len(),
        args.model
    );
    let fitted = fit_choice_weighted(&choice, &x, k, &y, &w, args.seed)
        .with_context(|| format!("fitting {} on the journal", choice.kind()))?;
    let mut method = fitted.method.clone();
    let mut shift_record = None;
    if args.prior_shift {
        let (shifted, record) = shift_priors(args, &method, &items, classes, &y, &w)?;
        method = shifted;
        shift_record = Some(record);
    }

    // New confidences of every journaled item: the drift reference, and the certification.
    let mut ws = Workspace::new();
    let scored: Vec<(usize, f64)> = items
        .iter()
        .map(|it| top(&mut ws, &method, classes, &it.logits))
        .collect();
    let (policy, record, summary) = match (policy_args.threshold, policy_args.target_accuracy) {
        (Some(t), _) => (
            DecisionPolicy::global(t),
            None,
            vec![format!("threshold {t} (fixed, not certified)")],
        ),
        (None, Some(a)) => {
            let (risk, delta) = (1.0 - a, 1.0 - policy_args.confidence);
            let cert_items: Vec<StratifiedItem> = items
                .iter()
                .zip(&scored)
                .filter(|(it, _)| held_out(it))
                .map(|(it, &(class, confidence))| StratifiedItem {
                    confidence,
                    // Only labels the sampling design explains: deferred, or audited.
                    correct: it.weight().and(it.label).map(|l| l as usize == class),
                    stratum: if it.accepted {
                        Stratum::Accepted
                    } else {
                        Stratum::Deferred
                    },
                })
                .collect();
            let min = default_min_accepted(risk, delta)?;
            let cert = certify(&cert_items, risk, delta, &default_grid(), min)?;
            let evidence = Evidence {
                procedure: Some("fixed-sequence-stratified".into()),
                target_accuracy: Some(a),
                confidence_level: Some(policy_args.confidence),
                certified_accuracy: cert.threshold.map(|_| 1.0 - cert.bound),
                expected_coverage: Some(cert.coverage),
                items: Some(cert.n),
                ..Evidence::default()
            };
            let line = match cert.threshold {
                Some(t) => format!(
                    "certified threshold {t}: accuracy ≥ {:.4} at {:.1}% confidence on {} held-out journaled items, coverage {:.3}",
                    1.0 - cert.bound,
                    100.0 * policy_args.confidence,
                    cert.n,
                    cert.coverage
                ),
                None => format!(
                    "no threshold certified at accuracy {a} on {} held-out journaled items: everything is deferred",
                    cert.n
                ),
            };
            (
                DecisionPolicy::new(cert.threshold, None, Some(evidence)),
                Some(serde_json::to_value(&cert)?),
                vec![line],
            )
        }
        (None, None) => (
            DecisionPolicy::new(None, None, None),
            None,
            vec!["no threshold asked for: every item is deferred".into()],
        ),
    };
    let audit_rate = args.policy.audit_rate().or_else(|| {
        items
            .iter()
            .rev()
            .find(|it| it.audit_rate > 0.0)
            .map(|it| it.audit_rate)
    });
    let policy = policy.with_audit_rate(audit_rate);
    let confidences: Vec<f64> = scored.iter().map(|s| s.1).collect();
    let accepted = scored
        .iter()
        .filter(|(c, p)| policy.decide(*c, *p) == crate::decision::Decision::Accept)
        .count();
    let reference = ConfidenceReference::from_confidences(&confidences, Some(accepted))?;

    let labelled = items.iter().filter(|it| it.label.is_some()).count();
    let mut provenance = Map::new();
    provenance.insert(
        "created_at".into(),
        json!(created_at(args.created_at.as_deref())?),
    );
    provenance.insert(
        "fit_data".into(),
        json!({
            "source": format!("journal {}", dir.display()),
            "rows": y.len(),
            "journal": {
                "decisions": items.len(),
                "labelled": labelled,
                "fitted_on": y.len(),
                "weights": "deferred items 1, audited accepted items 1/audit rate",
                "unaudited_accepted_labels_left_out": unaudited,
                "held_out_for_certification": items.iter().filter(|it| held_out(it)).count(),
            },
        }),
    );
    provenance.insert(
        "fit".into(),
        json!({"method": choice.kind(), "seed": args.seed, "diagnostics": fitted.diagnostics}),
    );
    provenance.insert(
        "metrics".into(),
        weighted_metrics(&mut ws, &fitted.method, classes, k, &x, &y, &w),
    );
    if let Some(r) = record {
        provenance.insert("certification".into(), r);
    }
    if let Some(r) = shift_record {
        provenance.insert("prior_shift".into(), r);
    }
    provenance.insert("reference".into(), reference.to_value());
    let map = CalibrationMap::from_parts(MapParts {
        model: args.model.clone(),
        map_version: args.map_version.clone(),
        classes,
        class_names: args.class_names.clone(),
        input: input_form(k),
        method,
        policy: policy.clone(),
        provenance,
    })?;
    super::write_map(&args.out, &map)?;
    super::say!(
        "journal {}: {} decisions of {}, {} labelled, fitted on {} ({} labels of unaudited accepted items left out)",
        dir.display(),
        items.len(),
        args.model,
        labelled,
        y.len(),
        unaudited
    );
    print_summary(
        &map,
        &FitOutcome {
            fitted,
            chosen: choice.kind(),
            candidates: None,
        },
        &PolicyOutcome {
            policy,
            record: None,
            summary,
        },
    );
    Ok(ExitCode::SUCCESS)
}
