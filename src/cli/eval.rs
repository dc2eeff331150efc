//! `candor eval`: a map's quality on labelled data, before (plain softmax) and after, with
//! bootstrap intervals; a terminal reliability table and risk–coverage summary.

use super::inputs::{calibrate, uncalibrated, InputArgs};
use super::say;
use crate::dataset::LabelNeed;
use crate::eval::{
    accept_stats, reliability_diagram, standard_report, BootstrapConfig, EqualWidthBins,
    MetricSummary, Predictions, ReliabilityBin, StandardReport, StandardSettings,
};
use crate::mapfile::CalibrationMap;
use serde_json::{json, Value};
use std::path::PathBuf;
use std::process::ExitCode;

/// Thresholds the risk–coverage summary lists (the map's own is added).
const SUMMARY_THRESHOLDS: [f64; 6] = [0.5, 0.7, 0.8, 0.9, 0.95, 0.99];

/// Arguments of `candor eval`.
#[derive(Debug, clap::Args)]
pub struct EvalArgs {
    /// The map file.
    #[arg(long, value_name = "FILE")]
    map: PathBuf,
    #[command(flatten)]
    input: InputArgs,
    /// Equal-width bins for ECE, MCE, classwise ECE and the reliability table.
    #[arg(long, default_value_t = 15)]
    bins: usize,
    /// Equal-mass groups for the adaptive ECE.
    #[arg(long, default_value_t = 15)]
    adaptive_groups: usize,
    /// Bootstrap replicates for the intervals (0: no intervals).
    #[arg(long, default_value_t = 1000)]
    bootstrap: usize,
    /// Level of the percentile intervals.
    #[arg(long, default_value_t = 0.95)]
    level: f64,
    /// Seed of the bootstrap (ChaCha8, one stream per replicate; counts drawn per chunk).
    #[arg(long, default_value_t = 0)]
    seed: u64,
    /// Print JSON (schema in the README) instead of tables.
    #[arg(long)]
    json: bool,
}

fn summary(m: &MetricSummary) -> Value {
    json!({"value": m.value, "low": m.low, "high": m.high})
}

fn side(r: &StandardReport, bins: &[ReliabilityBin]) -> Value {
    json!({
        "n": r.n,
        "accuracy": summary(&r.accuracy),
        "ece": summary(&r.ece),
        "adaptive_ece": summary(&r.adaptive_ece),
        "mce": summary(&r.mce),
        "classwise_ece": summary(&r.classwise_ece),
        "nll": summary(&r.nll),
        "brier": summary(&r.brier),
        "aurc": summary(&r.aurc),
        "coverage": summary(&r.coverage),
        "accepted_accuracy": r.accepted_accuracy.as_ref().map(summary),
        "reliability": bins,
    })
}

pub(super) fn run(args: &EvalArgs) -> anyhow::Result<ExitCode> {
    let map = CalibrationMap::load(&args.map)?;
    let set = args.input.read(LabelNeed::Required)?;
    let labels = set.require_labels()?;
    let after_probs = calibrate(&map, &set)?;
    let before_probs = uncalibrated(&set);
    let k = set.classes();
    let before = Predictions::try_new(&before_probs, k, labels)?;
    let after = Predictions::try_new(&after_probs, k, labels)?;
    // The standard set's coverage uses one threshold: the map's global one (per-class policies
    // are summarised separately below); "none" is represented by a threshold above 1.
    let threshold = map.policy().global_threshold();
    let settings =
        StandardSettings::try_new(args.bins, args.adaptive_groups, threshold.unwrap_or(1.0))?;
    let config = BootstrapConfig::try_new(args.bootstrap.max(1), args.level, args.seed)?;
    let bins = EqualWidthBins::try_new(args.bins)?;
    let report_before = standard_report(&before, &settings, &config)?;
    let report_after = standard_report(&after, &settings, &config)?;
    let rel_before = reliability_diagram(&before, &bins);
    let rel_after = reliability_diagram(&after, &bins);
    let policy = policy_outcome(&map, &before, &after);
    if args.json {
        let doc = json!({
            "map": {"model": map.model(), "map_version": map.map_version(), "digest": map.digest(), "method": map.method().kind()},
            "n": set.n(),
            "bins": args.bins,
            "adaptive_groups": args.adaptive_groups,
            "bootstrap": {"replicates": args.bootstrap, "level": args.level, "seed": args.seed, "rng": report_after.bootstrap.rng},
            "threshold": threshold,
            "before": side(&report_before, &rel_before),
            "after": side(&report_after, &rel_after),
            "policy": policy,
            "risk_coverage": risk_coverage_rows(&map, &before, &after),
        });
        say!("{}", serde_json::to_string_pretty(&doc)?);
        return Ok(ExitCode::SUCCESS);
    }
    print_tables(
        args,
        &map,
        &report_before,
        &report_after,
        &rel_before,
        &rel_after,
        &before,
        &after,
        &policy,
    );
    Ok(ExitCode::SUCCESS)
}

/// Coverage and accepted accuracy under the map's policy (per-class thresholds included).
fn policy_outcome(
    map: &CalibrationMap,
    before: &Predictions<'_>,
    after: &Predictions<'_>,
) -> Value {
    let count = |p: &Predictions<'_>| {
        let (mut acc, mut right) = (0usize, 0usize);
        for i in 0..p.n() {
            let c = p.predicted()[i] as usize;
            if map.policy().decide(c, p.confidence()[i]) == crate::decision::Decision::Accept {
                acc += 1;
                right += usize::from(p.correct()[i]);
            }
        }
        json!({"accepted": acc, "deferred": p.n() - acc, "coverage": acc as f64 / p.n() as f64,
               "accepted_accuracy": (acc > 0).then(|| right as f64 / acc as f64)})
    };
    json!({"before": count(before), "after": count(after)})
}

fn risk_coverage_rows(
    map: &CalibrationMap,
    before: &Predictions<'_>,
    after: &Predictions<'_>,
) -> Vec<Value> {
    let mut ts: Vec<f64> = SUMMARY_THRESHOLDS.to_vec();
    if let Some(t) = map.policy().global_threshold() {
        ts.push(t);
    }
    ts.sort_by(f64::total_cmp);
    ts.dedup();
    ts.iter()
        .filter_map(|&t| {
            let b = accept_stats(before, t).ok()?;
            let a = accept_stats(after, t).ok()?;
            Some(json!({"threshold": t,
                "before": {"coverage": b.coverage, "accepted_accuracy": b.accepted_accuracy},
                "after": {"coverage": a.coverage, "accepted_accuracy": a.accepted_accuracy}}))
        })
        .collect()
}

fn fmt(m: &MetricSummary, digits: usize) -> String {
    format!(
        "{:.d$} [{:.d$}, {:.d$}]",
        m.value,
        m.low,
        m.high,
        d = digits
    )
}

fn pct(v: Option<f64>) -> String {
    v.map_or_else(|| "–".to_owned(), |x| format!("{:.1}%", 100.0 * x))
}

#[allow(clippy::too_many_arguments)]
fn print_tables(
    args: &EvalArgs,
    map: &CalibrationMap,
    b: &StandardReport,
    a: &StandardReport,
    rel_b: &[ReliabilityBin],
    rel_a: &[ReliabilityBin],
    before: &Predictions<'_>,
    after: &Predictions<'_>,
    policy: &Value,
) {
    say!(
        "map {} version {} ({}), {} rows",
        map.model(),
        map.map_version(),
        map.method().kind(),
        b.n
    );
    say!(
        "intervals: {:.0}% percentile bootstrap, {} replicates, seed {}",
        args.level * 100.0,
        args.bootstrap,
        args.seed
    );
    say!();
    say!(
        "{:<20} {:>28} {:>28}",
        "metric",
        "before (softmax)",
        "after (map)"
    );
    let rows: [(&str, &MetricSummary, &MetricSummary); 9] = [
        ("accuracy", &b.accuracy, &a.accuracy),
        ("ECE (top-label)", &b.ece, &a.ece),
        ("adaptive ECE", &b.adaptive_ece, &a.adaptive_ece),
        ("MCE", &b.mce, &a.mce),
        ("classwise ECE", &b.classwise_ece, &a.classwise_ece),
        ("NLL", &b.nll, &a.nll),
        ("Brier (not halved)", &b.brier, &a.brier),
        ("AURC", &b.aurc, &a.aurc),
        ("coverage", &b.coverage, &a.coverage),
    ];
    for (name, x, y) in rows {
        say!("{:<20} {:>28} {:>28}", name, fmt(x, 4), fmt(y, 4));
    }
    let acc = |r: &StandardReport| {
        r.accepted_accuracy
            .as_ref()
            .map_or("–".into(), |m| fmt(m, 4))
    };
    say!("{:<20} {:>28} {:>28}", "accepted accuracy", acc(b), acc(a));
    say!();
    say!("policy of the map: {}", describe_policy(map));
    for (name, key) in [("before", "before"), ("after", "after")] {
        let p = &policy[key];
        say!(
            "  {name:<7} accepted {} ({}), deferred {}, accuracy of accepted {}",
            p["accepted"],
            pct(p["coverage"].as_f64()),
            p["deferred"],
            pct(p["accepted_accuracy"].as_f64())
        );
    }
    say!();
    say!(
        "reliability ({} equal-width bins of top-label confidence)",
        args.bins
    );
    say!(
        "{:<15} {:>7} {:>9} {:>9}   {:>7} {:>9} {:>9}",
        "confidence",
        "n",
        "conf",
        "acc",
        "n",
        "conf",
        "acc"
    );
    say!("{:<15} {:>27}   {:>27}", "", "before", "after");
    for (x, y) in rel_b.iter().zip(rel_a) {
        if x.count == 0 && y.count == 0 {
            continue;
        }
        let cell = |r: &ReliabilityBin| match (r.mean_confidence, r.accuracy) {
            (Some(c), Some(a)) => format!("{:>7} {:>9.3} {:>9.3}", r.count, c, a),
            _ => format!("{:>7} {:>9} {:>9}", 0, "–", "–"),
        };
        say!("({:.3}, {:.3}] {}   {}", x.lower, x.upper, cell(x), cell(y));
    }
    say!();
    say!("risk–coverage: coverage and accuracy of accepted items at a threshold");
    say!(
        "{:>10} {:>12} {:>12}   {:>12} {:>12}",
        "threshold",
        "coverage",
        "accuracy",
        "coverage",
        "accuracy"
    );
    say!("{:>10} {:>25}   {:>25}", "", "before", "after");
    for row in risk_coverage_rows(map, before, after) {
        say!(
            "{:>10.4} {:>12} {:>12}   {:>12} {:>12}",
            row["threshold"].as_f64().unwrap_or(f64::NAN),
            pct(row["before"]["coverage"].as_f64()),
            pct(row["before"]["accepted_accuracy"].as_f64()),
            pct(row["after"]["coverage"].as_f64()),
            pct(row["after"]["accepted_accuracy"].as_f64())
        );
    }
}

fn describe_policy(map: &CalibrationMap) -> String {
    let p = map.policy();
    let mut s = match (p.per_class(), p.global_threshold()) {
        (Some(list), _) => {
            let parts: Vec<String> = list
                .iter()
                .enumerate()
                .map(|(c, t)| format!("{c}: {}", t.map_or("none".into(), |t| format!("{t:.4}"))))
                .collect();
            format!("per-class thresholds {}", parts.join(", "))
        }
        (None, Some(t)) => format!("accept when calibrated confidence ≥ {t:.4}"),
        (None, None) => "no auto-accept".into(),
    };
    if let Some(e) = p.evidence() {
        if let (Some(a), Some(c)) = (e.certified_accuracy, e.confidence_level) {
            s.push_str(&format!(
                " (certified: accuracy ≥ {:.1}% at {:.0}% confidence)",
                100.0 * a,
                100.0 * c
            ));
        } else if e.procedure.as_deref() == Some("fixed") {
            s.push_str(" (fixed, not certified)");
        }
    }
    s
}
