//! The `candor` command line. Exit codes: 0 success, 1 a check failed, 2 an error (bad usage,
//! unreadable input, a server that could not start).

mod apply;
mod bench;
mod check;
mod demo;
mod eval;
mod fit;
pub mod inputs;
mod maps;
mod policy;
mod report;
mod serve;
mod serve_config;
mod status;

use clap::{Parser, Subcommand};

/// Prints a line to standard output, ignoring a closed pipe (`candor eval | head` must not panic).
macro_rules! say {
    ($($arg:tt)*) => {{
        use std::io::Write as _;
        let _ = writeln!(std::io::stdout(), $($arg)*);
    }};
}
pub(crate) use say;
use std::process::ExitCode;

/// Exit code: a check found problems.
pub const EXIT_CHECK_FAILED: u8 = 1;
/// Exit code: an error.
pub const EXIT_ERROR: u8 = 2;

/// candor recalibrates classifier confidences and decides accept-or-defer.
#[derive(Debug, Parser)]
#[command(
    name = "candor",
    version,
    about,
    after_help = "Exit codes: 0 success, 1 a check found problems, 2 error."
)]
pub struct Cli {
    #[command(subcommand)]
    command: Command,
}

#[derive(Debug, Subcommand)]
enum Command {
    /// Run the gRPC sidecar: raw logits in, calibrated probabilities and accept/defer out.
    Serve(Box<serve::ServeArgs>),
    /// Validate map files with the same validator the sidecar uses; exit 1 if any has problems.
    Check(check::CheckArgs),
    /// Fit a recalibration map from held-out logits and labels and choose its threshold.
    Fit(Box<fit::FitArgs>),
    /// Recalibrate a whole file of logits offline with a map.
    Apply(Box<apply::ApplyArgs>),
    /// Evaluate a map on labelled data: metrics before and after with bootstrap intervals.
    Eval(Box<eval::EvalArgs>),
    /// Run the main job end to end on demo data: start a sidecar, stream letters through it,
    /// compare decisions before and after recalibration.
    Demo(demo::DemoArgs),
    /// Write a self-contained HTML report of a map on labelled data for a reviewer to sign off.
    Report(report::ReportArgs),
    /// Roll maps out on a running sidecar: list, push, activate, rollback, canary, shadow.
    Maps(maps::MapsArgs),
    /// Load a running sidecar in a closed loop: throughput and latency percentiles.
    Bench(Box<bench::BenchArgs>),
    /// Show whether a running sidecar still keeps its maps' promises: live accuracy from the
    /// audit sample, drift, automation rate (from its telemetry listener).
    Status(status::StatusArgs),
}

/// Parses the process arguments and runs the command.
pub fn main() -> ExitCode {
    let cli = Cli::parse();
    let result = match cli.command {
        Command::Serve(args) => serve::run(*args),
        Command::Check(args) => check::run(&args),
        Command::Demo(args) => demo::run(&args),
        Command::Fit(args) => fit::run(&args),
        Command::Eval(args) => eval::run(&args),
        Command::Apply(args) => apply::run(&args),
        Command::Report(args) => report::run(&args),
        Command::Maps(args) => maps::run(&args),
        Command::Status(args) => status::run(&args),
        Command::Bench(args) => bench::run(&args),
    };
    match result {
        Ok(code) => code,
        Err(e) => {
            eprintln!("candor: error: {e:#}");
            ExitCode::from(EXIT_ERROR)
        }
    }
}
