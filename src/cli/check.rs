//! `candor check FILE...`

use super::say;
use super::EXIT_CHECK_FAILED;
use crate::mapfile::CalibrationMap;
use std::path::PathBuf;
use std::process::ExitCode;

/// Arguments of `candor check`.
#[derive(Debug, clap::Args)]
pub struct CheckArgs {
    /// Map files to validate.
    #[arg(required = true, value_name = "FILE")]
    files: Vec<PathBuf>,
}

pub(super) fn run(args: &CheckArgs) -> anyhow::Result<ExitCode> {
    let mut failed = 0usize;
    for path in &args.files {
        match CalibrationMap::load(path) {
            Ok(m) => {
                let threshold = m
                    .policy()
                    .global_threshold()
                    .map_or_else(|| "none".to_owned(), |t| t.to_string());
                say!(
                    "ok {}: model {} version {}, {} classes, method {}, threshold {}, {}",
                    path.display(),
                    m.model(),
                    m.map_version(),
                    m.classes(),
                    m.method().kind(),
                    threshold,
                    m.digest()
                );
            }
            Err(e) => {
                failed += 1;
                say!("FAILED {e}");
            }
        }
    }
    Ok(if failed == 0 {
        ExitCode::SUCCESS
    } else {
        ExitCode::from(EXIT_CHECK_FAILED)
    })
}
