//! `candor apply`: recalibrate a whole file of logits offline (batch scoring, backfills), with
//! the same code and numbers as the sidecar.

use super::inputs::{calibrate, InputArgs};
use super::say;
use crate::dataset::{write_probabilities_csv, write_probabilities_npy, LabelNeed, Precision};
use crate::decision::Decision;
use crate::mapfile::CalibrationMap;
use anyhow::Context;
use std::io::Write;
use std::path::{Path, PathBuf};
use std::process::ExitCode;

/// Arguments of `candor apply`.
#[derive(Debug, clap::Args)]
pub struct ApplyArgs {
    /// The map file.
    #[arg(long, value_name = "FILE")]
    map: PathBuf,
    #[command(flatten)]
    input: InputArgs,
    /// Output: `.npy` (float32 [N, K], as the sidecar returns) or `.csv` (header p0..p{K-1}).
    #[arg(long, value_name = "FILE")]
    out: PathBuf,
    /// Also write the predicted class, its calibrated confidence and accept/defer per row: extra
    /// columns in a CSV output; a sibling `<out stem>.decisions.csv` next to an .npy output.
    #[arg(long)]
    decisions: bool,
    /// Write float64 instead of float32 to an .npy output.
    #[arg(long)]
    float64: bool,
}

pub(super) fn run(args: &ApplyArgs) -> anyhow::Result<ExitCode> {
    let map = CalibrationMap::load(&args.map)?;
    let set = args.input.read(LabelNeed::Optional)?;
    let probs = calibrate(&map, &set)?;
    let k = map.classes();
    let ext = args
        .out
        .extension()
        .and_then(|e| e.to_str())
        .unwrap_or("")
        .to_ascii_lowercase();
    match ext.as_str() {
        "npy" => {
            let precision = if args.float64 {
                Precision::F64
            } else {
                Precision::F32
            };
            write_probabilities_npy(&args.out, &probs, k, precision)?;
            if args.decisions {
                let side = args.out.with_extension("decisions.csv");
                write_decisions_csv(&side, &map, &probs, k, false)?;
            }
        }
        "csv" if args.decisions => write_decisions_csv(&args.out, &map, &probs, k, true)?,
        "csv" => write_probabilities_csv(&args.out, &probs, k)?,
        _ => anyhow::bail!("--out {}: use a .npy or .csv file name", args.out.display()),
    }
    let accepted = if args.decisions {
        let n = probs
            .chunks_exact(k)
            .filter(|q| {
                let c = crate::numeric::argmax(q);
                map.policy().decide(c, q[c]) == Decision::Accept
            })
            .count();
        format!(", {n} accepted by the map's policy")
    } else {
        String::new()
    };
    say!(
        "wrote {} rows x {k} calibrated probabilities to {}{accepted}",
        set.n(),
        args.out.display()
    );
    Ok(ExitCode::SUCCESS)
}

/// CSV with (optionally) p0..p{K-1} then predicted, confidence, decision.
fn write_decisions_csv(
    path: &Path,
    map: &CalibrationMap,
    probs: &[f64],
    k: usize,
    with_probabilities: bool,
) -> anyhow::Result<()> {
    let file =
        std::fs::File::create(path).with_context(|| format!("creating {}", path.display()))?;
    let mut out = std::io::BufWriter::new(file);
    let mut header: Vec<String> = if with_probabilities {
        (0..k).map(|j| format!("p{j}")).collect()
    } else {
        vec![]
    };
    header.extend(["predicted".into(), "confidence".into(), "decision".into()]);
    writeln!(out, "{}", header.join(","))?;
    for q in probs.chunks_exact(k) {
        let c = crate::numeric::argmax(q);
        let decision = match map.policy().decide(c, q[c]) {
            Decision::Accept => "accept",
            Decision::Defer => "defer",
        };
        if with_probabilities {
            for v in q {
                write!(out, "{:?},", *v as f32)?;
            }
        }
        writeln!(out, "{c},{:?},{decision}", q[c] as f32)?;
    }
    out.flush()
        .with_context(|| format!("writing {}", path.display()))
}
