//! Choosing the decision policy during `candor fit`: a fixed threshold, or one certified on rows
//! the map was not fitted on (METHODS.md section 3).

use super::inputs::{apply_rows, calibrate_set, InputArgs};
use crate::dataset::{LabelNeed, LabelledSet};
use crate::decision::certify::{
    coverage_target, default_grid, default_min_accepted, fixed_sequence_skipping, items_needed,
    per_class, sgr, Certification, Method as CertMethod, Procedure,
};
use crate::decision::{DecisionPolicy, Evidence};
use crate::fit::split::{stratified_holdout, take_rows};
use crate::method::Method;
use serde_json::{json, Value};
use std::path::PathBuf;

/// Holdout used to certify when a target is given and no separate data is.
pub const DEFAULT_HOLDOUT: f64 = 0.3;

/// Policy flags of `candor fit`.
#[derive(Debug, Clone, clap::Args)]
pub struct PolicyArgs {
    /// Accept when calibrated confidence ≥ T, with no certificate (a policy, not a guarantee).
    #[arg(long, value_name = "T", conflicts_with_all = ["target_accuracy", "target_coverage"])]
    threshold: Option<f64>,
    /// Certify the lowest threshold whose accepted items are at least this accurate.
    #[arg(long, value_name = "A", conflicts_with = "target_coverage")]
    target_accuracy: Option<f64>,
    /// Keep at least this fraction of items automated (with --confidence); the accuracy that comes
    /// with it is reported, not guaranteed.
    #[arg(long, value_name = "C")]
    target_coverage: Option<f64>,
    /// Statistical confidence 1 − δ of the certificate.
    #[arg(long, default_value_t = 0.95, value_name = "LEVEL")]
    confidence: f64,
    /// Selection procedure: sgr (Geifman & El-Yaniv 2017, binary search with a Bonferroni
    /// correction; assumption-free beyond i.i.d. data) or fixed-sequence (Learn then Test on the
    /// grid 0.999, 0.998, …, 0.500 fixed in advance, starting where enough items are accepted;
    /// that start rule assumes higher confidence is not less accurate).
    #[arg(long, value_enum, default_value = "sgr")]
    procedure: ProcedureName,
    /// One certified threshold per predicted class (δ split over the K classes); a class without
    /// enough data gets no auto-accept.
    #[arg(long, requires = "target_accuracy")]
    per_class: bool,
    /// Fraction of the labelled rows held out (stratified, seeded) to certify the threshold on.
    #[arg(long, value_name = "FRACTION", conflicts_with_all = ["certify_logits", "certify_data"])]
    holdout: Option<f64>,
    /// Separate logits (.npy) to certify on, instead of a holdout.
    #[arg(long, value_name = "X.npy", requires = "certify_labels")]
    certify_logits: Option<PathBuf>,
    /// Labels (.npy) of --certify-logits.
    #[arg(long, value_name = "Y.npy")]
    certify_labels: Option<PathBuf>,
    /// Separate CSV or JSON Lines data to certify on, instead of a holdout.
    #[arg(long, value_name = "FILE", conflicts_with = "certify_logits")]
    certify_data: Option<PathBuf>,
    /// Share of accepted items the sidecar marks for audit with this map (`policy.audit_rate`),
    /// in [0, 1]; a person checks them too, which is what live accuracy is estimated from.
    #[arg(long, value_name = "SHARE", value_parser = parse_share)]
    audit_rate: Option<f64>,
}

fn parse_share(s: &str) -> Result<f64, String> {
    let x: f64 = s.parse().map_err(|e| format!("{s:?}: {e}"))?;
    if (0.0..=1.0).contains(&x) {
        Ok(x)
    } else {
        Err(format!("must lie in [0, 1], got {x}"))
    }
}

#[derive(Debug, Clone, Copy, PartialEq, Eq, clap::ValueEnum)]
enum ProcedureName {
    Sgr,
    FixedSequence,
}

/// Rows to fit on and rows to certify on.
#[derive(Debug, Clone)]
pub struct Split {
    /// Fit rows.
    pub fit: Vec<usize>,
    /// Certification rows.
    pub certify: Vec<usize>,
    /// The holdout fraction.
    pub fraction: f64,
}

/// The chosen policy and what to record and print about it.
#[derive(Debug)]
pub struct PolicyOutcome {
    /// The policy for the map.
    pub policy: DecisionPolicy,
    /// The certification record for the provenance.
    pub record: Option<Value>,
    /// Lines for the terminal.
    pub summary: Vec<String>,
}

/// The policy flags a refit from the journal understands.
#[derive(Debug, Clone, Copy)]
pub struct JournalPolicy {
    /// A fixed threshold.
    pub threshold: Option<f64>,
    /// The accuracy to certify.
    pub target_accuracy: Option<f64>,
    /// 1 − δ.
    pub confidence: f64,
    /// Share of journaled items held out to certify on.
    pub holdout: f64,
}

impl PolicyArgs {
    /// `--audit-rate`, when given.
    pub fn audit_rate(&self) -> Option<f64> {
        self.audit_rate
    }

    /// The flags for `candor fit --journal`, refusing those it cannot honour.
    ///
    /// # Errors
    /// --target-coverage, --per-class or separate certification data, or values out of range.
    pub fn for_journal(&self) -> anyhow::Result<JournalPolicy> {
        anyhow::ensure!(
            self.target_coverage.is_none() && !self.per_class && self.separate().is_none(),
            "with --journal, the policy is --threshold or --target-accuracy (certified on a holdout of the journal); --target-coverage, --per-class and separate certification data are not supported"
        );
        let holdout = self.holdout.unwrap_or(DEFAULT_HOLDOUT);
        anyhow::ensure!(
            holdout > 0.0 && holdout < 1.0,
            "--holdout must lie in (0, 1), got {holdout}"
        );
        if let Some(a) = self.target_accuracy {
            anyhow::ensure!(
                a > 0.0 && a < 1.0,
                "--target-accuracy must lie in (0, 1), got {a}"
            );
        }
        if let Some(t) = self.threshold {
            anyhow::ensure!(
                (0.0..=1.0).contains(&t),
                "--threshold must lie in [0, 1], got {t}"
            );
        }
        anyhow::ensure!(
            self.confidence > 0.0 && self.confidence < 1.0,
            "--confidence must lie in (0, 1), got {}",
            self.confidence
        );
        Ok(JournalPolicy {
            threshold: self.threshold,
            target_accuracy: self.target_accuracy,
            confidence: self.confidence,
            holdout,
        })
    }

    fn certifies(&self) -> bool {
        self.target_accuracy.is_some() || self.target_coverage.is_some()
    }

    fn separate(&self) -> Option<InputArgs> {
        if self.certify_logits.is_none() && self.certify_data.is_none() {
            return None;
        }
        Some(InputArgs {
            logits: self.certify_logits.clone(),
            labels: self.certify_labels.clone(),
            data: self.certify_data.clone(),
        })
    }

    /// The holdout split, when the threshold is certified on held-out rows.
    ///
    /// # Errors
    /// A fraction outside (0, 1).
    pub fn split(
        &self,
        set: &LabelledSet,
        labels: &[u32],
        seed: u64,
    ) -> anyhow::Result<Option<Split>> {
        if !self.certifies() || self.separate().is_some() {
            anyhow::ensure!(
                self.holdout.is_none() || self.certifies(),
                "--holdout needs --target-accuracy or --target-coverage"
            );
            return Ok(None);
        }
        let fraction = self.holdout.unwrap_or(DEFAULT_HOLDOUT);
        anyhow::ensure!(
            fraction > 0.0 && fraction < 1.0,
            "--holdout must lie in (0, 1), got {fraction}"
        );
        let (fit, certify) = stratified_holdout(labels, set.classes(), fraction, seed);
        anyhow::ensure!(
            !fit.is_empty() && !certify.is_empty(),
            "--holdout {fraction} leaves no rows on one side"
        );
        Ok(Some(Split {
            fit,
            certify,
            fraction,
        }))
    }
}

/// Confidence, correctness and predicted class of each row of n×K probabilities.
fn top_label(probs: &[f64], k: usize, labels: &[u32]) -> (Vec<f64>, Vec<bool>, Vec<u32>) {
    let mut conf = Vec::with_capacity(labels.len());
    let mut correct = Vec::with_capacity(labels.len());
    let mut predicted = Vec::with_capacity(labels.len());
    for (row, &y) in probs.chunks_exact(k).zip(labels) {
        let c = crate::numeric::argmax(row);
        conf.push(row[c]);
        correct.push(c as u32 == y);
        predicted.push(c as u32);
    }
    (conf, correct, predicted)
}

/// Chooses the policy for a fitted `method`.
///
/// # Errors
/// Bad levels, unreadable or mismatched certification data, certification errors.
pub fn choose_policy(
    args: &PolicyArgs,
    method: &Method,
    set: &LabelledSet,
    labels: &[u32],
    split: Option<&Split>,
    certify_rows: Option<&Vec<usize>>,
) -> anyhow::Result<PolicyOutcome> {
    if let Some(t) = args.threshold {
        anyhow::ensure!(
            (0.0..=1.0).contains(&t),
            "--threshold must lie in [0, 1], got {t}"
        );
        let evidence = Evidence {
            procedure: Some("fixed".into()),
            ..Evidence::default()
        };
        return Ok(PolicyOutcome {
            policy: DecisionPolicy::new(Some(t), None, Some(evidence)),
            record: None,
            summary: vec![format!(
                "policy: accept when confidence ≥ {t} (fixed, not certified)"
            )],
        });
    }
    if !args.certifies() {
        return Ok(PolicyOutcome {
            policy: DecisionPolicy::new(None, None, None),
            record: None,
            summary: vec!["policy: no threshold given (--threshold, --target-accuracy or --target-coverage): the map defers everything".into()],
        });
    }
    anyhow::ensure!(
        args.confidence > 0.0 && args.confidence < 1.0,
        "--confidence must lie in (0, 1), got {}",
        args.confidence
    );
    let delta = 1.0 - args.confidence;
    // Calibrated probabilities of the certification rows.
    let (probs, cert_labels, source) = match (args.separate(), certify_rows) {
        (Some(input), _) => {
            let other = input.read(LabelNeed::Required)?;
            let y = other.require_labels()?.to_vec();
            let probs = calibrate_set(method, set.k(), set.classes(), &other)?;
            let path = input.source()?.path().display().to_string();
            (
                probs,
                y,
                json!({"kind": "separate", "source": path, "sha256": other.digest(), "rows": other.n()}),
            )
        }
        (None, Some(rows)) => {
            let all = apply_rows(method, set);
            let y: Vec<u32> = rows.iter().map(|&i| labels[i]).collect();
            let fraction = split.map_or(DEFAULT_HOLDOUT, |s| s.fraction);
            (
                take_rows(&all, set.classes(), rows),
                y,
                json!({"kind": "holdout", "fraction": fraction, "rows": rows.len()}),
            )
        }
        (None, None) => anyhow::bail!("no certification rows"),
    };
    let k = set.classes();
    let (conf, correct, predicted) = top_label(&probs, k, &cert_labels);
    let n = conf.len();
    if let Some(c) = args.target_coverage {
        let cov = coverage_target(&conf, Some(&correct), c, delta)?;
        let mut summary = vec![];
        let policy = match cov.threshold {
            Some(t) => {
                summary.push(format!(
                    "At threshold {t:.4}, {} of {n} held-out items would be accepted; at {:.0}% confidence at least {:.1}% of future items will be (accuracy of those accepted here: {}).",
                    cov.accepted, args.confidence * 100.0, c * 100.0,
                    cov.empirical_accuracy.map_or("–".into(), |a| format!("{:.1}%", 100.0 * a))));
                let evidence = Evidence {
                    procedure: Some("coverage-target".into()),
                    confidence_level: Some(args.confidence),
                    expected_coverage: Some(cov.empirical_coverage),
                    items: Some(n as u64),
                    accepted: Some(cov.accepted),
                    errors: cov
                        .empirical_accuracy
                        .map(|a| ((1.0 - a) * cov.accepted as f64).round() as u64),
                    extra: [
                        ("target_coverage".to_owned(), json!(c)),
                        ("certified_on".to_owned(), source.clone()),
                    ]
                    .into(),
                    ..Evidence::default()
                };
                DecisionPolicy::new(Some(t), None, Some(evidence))
            }
            None => {
                summary.push(format!("no threshold keeps {:.1}% coverage at {:.0}% confidence with {n} items: {}; the map defers everything",
                    c * 100.0, args.confidence * 100.0, cov.reason_if_none.as_deref().unwrap_or("too few items")));
                DecisionPolicy::new(None, None, None)
            }
        };
        return Ok(PolicyOutcome {
            policy,
            record: Some(json!({"certified_on": source, "coverage": cov})),
            summary,
        });
    }
    let target = args.target_accuracy.unwrap_or(1.0);
    anyhow::ensure!(
        target > 0.0 && target < 1.0,
        "--target-accuracy must lie in (0, 1), got {target}"
    );
    let risk = 1.0 - target;
    let grid = default_grid();
    let min_accepted = default_min_accepted(risk, delta)?;
    let (procedure, name) = match args.procedure {
        ProcedureName::Sgr => (Procedure::Sgr, "sgr"),
        ProcedureName::FixedSequence => (Procedure::FixedSequence, "fixed-sequence"),
    };
    if args.per_class {
        let method = match procedure {
            Procedure::Sgr => CertMethod::Sgr,
            Procedure::FixedSequence => CertMethod::FixedSequence {
                grid: &grid,
                min_accepted,
            },
        };
        let pc = per_class(&conf, &correct, &predicted, k as u32, method, risk, delta)?;
        let mut thresholds = vec![None; k];
        let mut summary = vec![format!(
            "per-class thresholds ({name}, δ = {delta} split over {k} classes):"
        )];
        for c in &pc.classes {
            let cert = &c.certification;
            thresholds[c.class as usize] = cert.threshold;
            summary.push(match cert.threshold {
                Some(t) => format!(
                    "  class {}: threshold {t:.4}, {} of {} accepted, accuracy ≥ {:.1}%",
                    c.class,
                    cert.accepted,
                    cert.n,
                    100.0 * (1.0 - cert.bound)
                ),
                None => format!(
                    "  class {}: no auto-accept ({})",
                    c.class,
                    cert.reason_if_none.as_deref().unwrap_or("not certified")
                ),
            });
        }
        let evidence = Evidence {
            procedure: Some(format!("{name}-per-class")),
            target_accuracy: Some(target),
            confidence_level: Some(args.confidence),
            expected_coverage: Some(pc.coverage),
            items: Some(pc.n),
            accepted: Some(pc.accepted),
            errors: Some(pc.errors),
            extra: [("certified_on".to_owned(), source.clone())].into(),
            ..Evidence::default()
        };
        return Ok(PolicyOutcome {
            policy: DecisionPolicy::new(None, Some(thresholds), Some(evidence)),
            record: Some(json!({"certified_on": source, "per_class": pc})),
            summary,
        });
    }
    let cert: Certification = match procedure {
        Procedure::Sgr => sgr(&conf, &correct, risk, delta)?,
        Procedure::FixedSequence => {
            fixed_sequence_skipping(&conf, &correct, &grid, min_accepted, risk, delta)?
        }
    };
    let mut summary = Vec::new();
    let policy = match cert.threshold {
        Some(t) => {
            summary.push(format!(
                "At threshold {t:.4}, {} of {n} held-out items would be accepted; at {:.0}% confidence at least {:.1}% of accepted items are right.",
                cert.accepted, args.confidence * 100.0, 100.0 * (1.0 - cert.bound)));
            let evidence = Evidence {
                procedure: Some(name.into()),
                target_accuracy: Some(target),
                confidence_level: Some(args.confidence),
                certified_accuracy: Some(1.0 - cert.bound),
                expected_coverage: Some(cert.coverage),
                items: Some(cert.n),
                accepted: Some(cert.accepted),
                errors: Some(cert.errors),
                extra: [("certified_on".to_owned(), source.clone())].into(),
            };
            DecisionPolicy::new(Some(t), None, Some(evidence))
        }
        None => {
            summary.push(format!(
                "No threshold could be certified: {}. The map defers everything.",
                cert.reason_if_none
                    .as_deref()
                    .unwrap_or("no tested threshold passed")
            ));
            if let Some(more) = items_needed(&conf, &correct, risk, delta, procedure)? {
                summary.push(format!(
                    "About {} labelled items for certification ({} more) would likely be needed, if accuracy near threshold {:.3} stays at {:.1}%.",
                    more.total, more.additional, more.threshold, 100.0 * (1.0 - more.observed_risk)));
            } else {
                summary.push(format!(
                    "More data will not help: the accuracy of confident items stays below {:.1}%.",
                    target * 100.0
                ));
            }
            DecisionPolicy::new(None, None, None)
        }
    };
    Ok(PolicyOutcome {
        policy,
        record: Some(json!({"certified_on": source, "certification": cert})),
        summary,
    })
}
