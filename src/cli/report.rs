//! `candor report --map M (--data F | --logits X --labels Y) --out report.html`

use super::inputs::{self, InputArgs};
use crate::dataset::{LabelNeed, Source};
use crate::eval::{BootstrapConfig, DEFAULT_LEVEL};
use crate::mapfile::CalibrationMap;
use crate::report::{
    self, replicates_for, DataIdentity, ReportInput, ReportSettings, DEFAULT_REPORT_BINS,
};
use anyhow::Context;
use std::path::PathBuf;
use std::process::ExitCode;

/// Arguments of `candor report`.
#[derive(Debug, clap::Args)]
pub struct ReportArgs {
    /// The map file to review.
    #[arg(long, value_name = "MAP.json")]
    map: PathBuf,
    #[command(flatten)]
    input: InputArgs,
    /// Where to write the HTML report.
    #[arg(long, value_name = "FILE")]
    out: PathBuf,
    /// Equal-width bins of the reliability diagrams and ECE.
    #[arg(long, default_value_t = DEFAULT_REPORT_BINS)]
    bins: usize,
    /// Bootstrap replicates for the metric intervals; 0 = no intervals. Default: 1000, lowered
    /// on large data so that items × replicates stays within 50,000,000 (never below 50).
    #[arg(long, value_name = "R")]
    bootstrap: Option<usize>,
    /// Seed of the bootstrap.
    #[arg(long, default_value_t = 0)]
    seed: u64,
}

/// How the user named the data.
fn describe(source: &Source) -> String {
    match source {
        Source::Npy {
            logits,
            labels: Some(labels),
        } => format!("{} with labels {}", logits.display(), labels.display()),
        other => other.path().display().to_string(),
    }
}

pub(super) fn run(args: &ReportArgs) -> anyhow::Result<ExitCode> {
    let map = CalibrationMap::load(&args.map)?;
    let source = args.input.source()?;
    let set = args.input.read(LabelNeed::Required)?;
    let labels = inputs::labels(&set)?;
    let calibrated = inputs::calibrate(&map, &set)?;
    let uncalibrated = inputs::uncalibrated(&set);
    let replicates = replicates_for(set.n(), args.bootstrap);
    let bootstrap = if replicates == 0 {
        None
    } else {
        let threads = std::thread::available_parallelism().map_or(1, |n| n.get());
        Some(BootstrapConfig::try_new(replicates, DEFAULT_LEVEL, args.seed)?.with_threads(threads))
    };
    let settings = ReportSettings::try_new(args.bins, bootstrap)?;
    let data = DataIdentity {
        source: describe(&source),
        digest: set.digest(),
    };
    let input = ReportInput {
        map: &map,
        uncalibrated: &uncalibrated,
        calibrated: &calibrated,
        labels,
        data: &data,
    };
    let built = report::assemble(&input, &settings)?;
    let page = report::render_html(&built)?;
    std::fs::write(&args.out, page)
        .with_context(|| format!("cannot write the report to {}", args.out.display()))?;
    let ece = built.metrics.iter().find(|m| m.name == "ECE");
    let outcome = &built.policy.calibrated;
    println!(
        "wrote {}: model {} version {}, {} items, ECE {:.4} -> {:.4}, {} accepted and {} deferred \
         under the map's policy",
        args.out.display(),
        map.model(),
        map.map_version(),
        built.n,
        ece.map_or(f64::NAN, |m| m.uncalibrated.value),
        ece.map_or(f64::NAN, |m| m.calibrated.value),
        outcome.accepted,
        outcome.deferred()
    );
    Ok(ExitCode::SUCCESS)
}
