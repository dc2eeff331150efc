//! `candor fit`: fit a map from held-out logits and labels, choose its acceptance threshold, write
//! the map file.

use super::inputs::{input_form, InputArgs};
use super::policy::{choose_policy, PolicyArgs, PolicyOutcome};
use super::say;
use crate::dataset::{LabelNeed, LabelledSet, LogitsView};
use crate::eval::{standard_metrics, Predictions, StandardSettings};
use crate::fit::histogram::{BinPrior, BinStrategy, HistogramOptions};
use crate::fit::select::{choose, fit_choice, CandidateScore, Fitted, MethodChoice, Strength};
use crate::fit::split::take_rows;
use crate::mapfile::{CalibrationMap, ConfidenceReference, MapParts};
use crate::numeric::Logit;
use anyhow::Context;
use serde_json::{json, Map, Value};
use std::path::PathBuf;
use std::process::ExitCode;

#[path = "fit_journal.rs"]
mod from_journal;

/// Arguments of `candor fit`.
#[derive(Debug, clap::Args)]
pub struct FitArgs {
    #[command(flatten)]
    input: InputArgs,
    /// Refit from a sidecar's decision journal (its --journal-dir) instead of a data file:
    /// decisions of --model with logits and a returned label; deferred items weigh 1, audited
    /// accepted items 1/audit rate, other accepted items are left out (METHODS.md 4.1–4.2).
    #[arg(long, value_name = "DIR", conflicts_with_all = ["logits", "data"])]
    journal: Option<PathBuf>,
    /// With --journal and temperature scaling: re-estimate the class priors of the most recent
    /// decisions by EM (label shift, METHODS.md 4.3) and move the map's posteriors to them
    /// (written as vector scaling). Needs --threshold: a certificate would not survive the shift.
    #[arg(long, requires = "journal")]
    prior_shift: bool,
    /// Most recent journaled decisions whose class mix --prior-shift estimates.
    #[arg(
        long,
        default_value_t = 10_000,
        value_name = "N",
        requires = "prior_shift"
    )]
    prior_shift_recent: usize,
    /// Recalibration method; `auto` compares the methods that suit the data size and K by
    /// 5-fold cross-validated NLL (ECE breaks ties) and records every candidate's score.
    #[arg(long, value_enum, default_value = "temperature")]
    method: MethodName,
    /// Model name written into the map.
    #[arg(long)]
    model: String,
    /// Map version written into the map.
    #[arg(long)]
    map_version: String,
    /// Where to write the map file.
    #[arg(long, value_name = "FILE")]
    out: PathBuf,
    /// Class names, comma-separated, in class order.
    #[arg(long, value_delimiter = ',', value_name = "NAMES")]
    class_names: Option<Vec<String>>,
    /// Bins for histogram binning.
    #[arg(long, default_value_t = 15)]
    bins: usize,
    /// Bin placement for histogram binning.
    #[arg(long, value_enum, default_value = "equal-mass")]
    binning: Binning,
    /// ODIR strength λ = μ for matrix and Dirichlet; omitted: chosen by 5-fold cross-validation.
    #[arg(long, value_name = "STRENGTH")]
    regularisation: Option<f64>,
    /// Seed for every random choice (folds, holdout split).
    #[arg(long, default_value_t = 0)]
    seed: u64,
    /// Creation time written into the provenance (RFC 3339); default: now, or SOURCE_DATE_EPOCH.
    #[arg(long, value_name = "TIME")]
    created_at: Option<String>,
    #[command(flatten)]
    policy: PolicyArgs,
}

#[derive(Debug, Clone, Copy, PartialEq, Eq, clap::ValueEnum)]
enum MethodName {
    Temperature,
    Vector,
    Matrix,
    Dirichlet,
    Platt,
    Beta,
    Histogram,
    Isotonic,
    Bbq,
    Auto,
}

#[derive(Debug, Clone, Copy, clap::ValueEnum)]
enum Binning {
    EqualWidth,
    EqualMass,
}

impl FitArgs {
    fn choice(&self) -> Option<MethodChoice> {
        let strength = self
            .regularisation
            .map_or(Strength::CrossValidated, Strength::Fixed);
        Some(match self.method {
            MethodName::Temperature => MethodChoice::Temperature,
            MethodName::Vector => MethodChoice::Vector,
            MethodName::Matrix => MethodChoice::Matrix(strength),
            MethodName::Dirichlet => MethodChoice::Dirichlet(strength),
            MethodName::Platt => MethodChoice::Platt,
            MethodName::Beta => MethodChoice::Beta,
            MethodName::Isotonic => MethodChoice::Isotonic,
            MethodName::Bbq => MethodChoice::Bbq,
            MethodName::Histogram => MethodChoice::Histogram(HistogramOptions {
                bins: self.bins,
                strategy: match self.binning {
                    Binning::EqualWidth => BinStrategy::EqualWidth,
                    Binning::EqualMass => BinStrategy::EqualMass,
                },
                prior: BinPrior::Laplace,
            }),
            MethodName::Auto => return None,
        })
    }
}

/// What the fit produced before the policy is chosen.
struct FitOutcome {
    fitted: Fitted,
    chosen: &'static str,
    candidates: Option<Vec<CandidateScore>>,
}

fn fit_on<L: Logit>(
    args: &FitArgs,
    logits: &[L],
    k: usize,
    labels: &[u32],
) -> anyhow::Result<FitOutcome> {
    let (choice, candidates) = match args.choice() {
        Some(c) => (c, None),
        None => {
            let (c, scores) = choose(logits, k, labels, args.seed)?;
            (c, Some(scores))
        }
    };
    let fitted = fit_choice(&choice, logits, k, labels, args.seed)
        .with_context(|| format!("fitting {}", choice.kind()))?;
    Ok(FitOutcome {
        fitted,
        chosen: choice.kind(),
        candidates,
    })
}

pub(super) fn run(args: &FitArgs) -> anyhow::Result<ExitCode> {
    if let Some(dir) = &args.journal {
        return from_journal::run(args, dir);
    }
    let set = args.input.read(LabelNeed::Required)?;
    let labels = set.require_labels()?.to_vec();
    set.require_rows(2, "fitting a map")?;
    let classes = set.classes();
    if let Some(names) = &args.class_names {
        anyhow::ensure!(
            names.len() == classes,
            "--class-names has {} names for {classes} classes",
            names.len()
        );
    }
    // Rows to fit on and rows to certify the threshold on.
    let split = args.policy.split(&set, &labels, args.seed)?;
    let (fit_idx, certify_rows) = match &split {
        Some(s) => (s.fit.clone(), Some(&s.certify)),
        None => ((0..set.n()).collect(), None),
    };
    let fit_labels: Vec<u32> = fit_idx.iter().map(|&i| labels[i]).collect();
    let whole = fit_idx.len() == set.n();
    let outcome = match set.view() {
        LogitsView::F32(v) if whole => fit_on(args, v, set.k(), &fit_labels)?,
        LogitsView::F64(v) if whole => fit_on(args, v, set.k(), &fit_labels)?,
        LogitsView::F32(v) => fit_on(args, &take_rows(v, set.k(), &fit_idx), set.k(), &fit_labels)?,
        LogitsView::F64(v) => fit_on(args, &take_rows(v, set.k(), &fit_idx), set.k(), &fit_labels)?,
    };
    let method = outcome.fitted.method.clone();
    let mut policy: PolicyOutcome = choose_policy(
        &args.policy,
        &method,
        &set,
        &labels,
        split.as_ref(),
        certify_rows,
    )?;

    policy.policy = policy.policy.with_audit_rate(args.policy.audit_rate());
    let mut provenance = Map::new();
    provenance.insert(
        "created_at".into(),
        json!(created_at(args.created_at.as_deref())?),
    );
    provenance.insert(
        "fit_data".into(),
        data_record(&set, &args.input, fit_idx.len()),
    );
    provenance.insert(
        "metrics".into(),
        metrics_record(&set, &labels, &fit_idx, &method)?,
    );
    let mut fit = json!({
        "method": outcome.chosen,
        "seed": args.seed,
        "diagnostics": outcome.fitted.diagnostics,
    });
    if let Some(s) = outcome.fitted.strength {
        fit["odir_strength"] = json!(s);
    }
    if let Some(c) = &outcome.candidates {
        fit["selection"] = json!({"rule": "lowest 5-fold cross-validated NLL; ECE breaks ties within 1e-4", "candidates": c});
    }
    provenance.insert("fit".into(), fit);
    provenance.insert(
        "reference".into(),
        reference_record(&set, &method, &policy.policy)?.to_value(),
    );
    if let Some(record) = &policy.record {
        provenance.insert("certification".into(), record.clone());
    }
    let map = CalibrationMap::from_parts(MapParts {
        model: args.model.clone(),
        map_version: args.map_version.clone(),
        classes,
        class_names: args.class_names.clone(),
        input: input_form(set.k()),
        method,
        policy: policy.policy.clone(),
        provenance,
    })?;
    write_map(&args.out, &map)?;
    print_summary(&map, &outcome, &policy);
    Ok(ExitCode::SUCCESS)
}

/// Writes the sealed map to `out`, creating its folder.
fn write_map(out: &std::path::Path, map: &CalibrationMap) -> anyhow::Result<()> {
    if let Some(parent) = out.parent().filter(|p| !p.as_os_str().is_empty()) {
        std::fs::create_dir_all(parent)
            .with_context(|| format!("creating {}", parent.display()))?;
    }
    std::fs::write(out, map.to_json()).with_context(|| format!("writing {}", out.display()))
}

fn print_summary(map: &CalibrationMap, outcome: &FitOutcome, policy: &PolicyOutcome) {
    if let Some(c) = &outcome.candidates {
        say!("method selection (5-fold cross-validated NLL, ECE):");
        for s in c {
            match (s.nll, s.ece) {
                (Some(n), Some(e)) => say!("  {:<12} NLL {n:.5}  ECE {e:.5}", s.method),
                _ => say!(
                    "  {:<12} failed: {}",
                    s.method,
                    s.error.as_deref().unwrap_or("")
                ),
            }
        }
    }
    let m = &map.provenance()["metrics"];
    say!(
        "fitted {} on {} rows: NLL {:.5} -> {:.5}, ECE {:.5} -> {:.5}",
        outcome.chosen,
        map.provenance()["fit_data"]["rows"],
        m["before"]["nll"].as_f64().unwrap_or(f64::NAN),
        m["after"]["nll"].as_f64().unwrap_or(f64::NAN),
        m["before"]["ece"].as_f64().unwrap_or(f64::NAN),
        m["after"]["ece"].as_f64().unwrap_or(f64::NAN),
    );
    for line in &policy.summary {
        say!("{line}");
    }
    say!(
        "wrote map {} version {} ({})",
        map.model(),
        map.map_version(),
        map.digest()
    );
}

fn created_at(given: Option<&str>) -> anyhow::Result<String> {
    if let Some(t) = given {
        humantime::parse_rfc3339(t)
            .with_context(|| format!("--created-at {t:?} is not RFC 3339"))?;
        return Ok(t.to_owned());
    }
    let now = match std::env::var("SOURCE_DATE_EPOCH") {
        Ok(s) => {
            let secs: u64 = s
                .trim()
                .parse()
                .with_context(|| format!("SOURCE_DATE_EPOCH={s:?}"))?;
            std::time::UNIX_EPOCH + std::time::Duration::from_secs(secs)
        }
        Err(_) => std::time::SystemTime::now(),
    };
    Ok(humantime::format_rfc3339_seconds(now).to_string())
}

fn data_record(set: &LabelledSet, input: &InputArgs, rows_used: usize) -> Value {
    let source = input
        .source()
        .map(|s| s.path().display().to_string())
        .unwrap_or_default();
    json!({
        "sha256": set.digest(),
        "rows": rows_used,
        "rows_in_file": set.n(),
        "class_counts": set.class_counts(),
        "source": source,
    })
}

/// The calibrated top-label confidences of every row and the share the policy accepts: what a
/// running sidecar compares its live traffic with (METHODS.md 4.4).
fn reference_record(
    set: &LabelledSet,
    method: &crate::method::Method,
    policy: &crate::decision::DecisionPolicy,
) -> anyhow::Result<ConfidenceReference> {
    let k = set.classes();
    let probs = super::inputs::apply_rows(method, set);
    let mut accepted = 0;
    let confidences: Vec<f64> = probs
        .chunks_exact(k)
        .map(|row| {
            let class = crate::numeric::argmax(row);
            let conf = row[class];
            if policy.decide(class, conf) == crate::decision::Decision::Accept {
                accepted += 1;
            }
            conf
        })
        .collect();
    Ok(ConfidenceReference::from_confidences(
        &confidences,
        Some(accepted),
    )?)
}

/// Before (softmax) and after metrics on the rows the map was fitted on.
fn metrics_record(
    set: &LabelledSet,
    labels: &[u32],
    rows: &[usize],
    method: &crate::method::Method,
) -> anyhow::Result<Value> {
    let k = set.classes();
    let all_before = super::inputs::uncalibrated(set);
    let all_after = super::inputs::apply_rows(method, set);
    let pick = |all: &[f64]| take_rows(all, k, rows);
    let y: Vec<u32> = rows.iter().map(|&i| labels[i]).collect();
    let settings = StandardSettings::with_threshold(1.0)?;
    let record = |probs: Vec<f64>| -> anyhow::Result<Value> {
        let p = Predictions::try_new(&probs, k, &y)?;
        let m = standard_metrics(&p, &settings);
        Ok(
            json!({"accuracy": m.accuracy, "nll": m.nll, "brier": m.brier, "ece": m.ece,
                  "adaptive_ece": m.adaptive_ece, "mce": m.mce, "classwise_ece": m.classwise_ece}),
        )
    };
    Ok(json!({"before": record(pick(&all_before))?, "after": record(pick(&all_after))?}))
}
