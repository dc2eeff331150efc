//! `candor demo`: the main job end to end on the Fernhill Water scenario.

use super::say;
use super::status::fetch;
use crate::decision::DecisionPolicy;
use crate::demo::{self, Letters};
use crate::journal::{DecisionLog, JournalOptions};
use crate::live::{verdict_lines, LiveQuality};
use crate::mapfile::{CalibrationMap, MapParts};
use crate::method::Method;
use crate::proto::v1::calibrate_result::Outcome;
use crate::proto::v1::calibrator_client::CalibratorClient;
use crate::proto::v1::{CalibrateRequest, Decision, OutcomeRequest};
use crate::registry::{load_dir, Registry};
use crate::server::{run as serve, ServeOptions};
use crate::telemetry::{run_telemetry, RpcStats, Telemetry};
use anyhow::Context;
use std::path::PathBuf;
use std::process::ExitCode;
use std::time::Instant;

/// Arguments of `candor demo`.
#[derive(Debug, clap::Args)]
pub struct DemoArgs {
    /// Instead of running the demo, write its data set and fitted map into DIR
    /// (this is how demo-data/ was made).
    #[arg(long, value_name = "DIR")]
    write_data: Option<PathBuf>,
    /// Address of the demo sidecar's telemetry listener (/metrics, /status).
    #[arg(long, default_value = "127.0.0.1:0", value_name = "ADDR")]
    telemetry_listen: std::net::SocketAddr,
    /// Keep the sidecar running this many seconds after the demo, so /metrics can be scraped and
    /// `candor status --telemetry ADDR` run against it.
    #[arg(long, default_value_t = 0, value_name = "SECS")]
    linger_secs: u64,
}

/// The uncalibrated baseline: the same policy on plain softmax.
const BASELINE_MODEL: &str = "letter-sorter-uncalibrated";

pub(super) fn run(args: &DemoArgs) -> anyhow::Result<ExitCode> {
    if let Some(dir) = &args.write_data {
        demo::write_data(dir)
            .with_context(|| format!("writing demo data into {}", dir.display()))?;
        say!(
            "wrote {}/calibration.jsonl, traffic.jsonl and maps/{}.json",
            dir.display(),
            demo::MODEL
        );
        return Ok(ExitCode::SUCCESS);
    }
    let runtime = tokio::runtime::Builder::new_multi_thread()
        .enable_all()
        .build()?;
    runtime.block_on(run_demo(args))?;
    Ok(ExitCode::SUCCESS)
}

/// Tally of decisions against the truth.
#[derive(Debug, Default)]
struct Tally {
    accepted: usize,
    accepted_right: usize,
    deferred: usize,
    deferred_right: usize,
}

impl Tally {
    fn add(&mut self, accepted: bool, right: bool) {
        if accepted {
            self.accepted += 1;
            self.accepted_right += usize::from(right);
        } else {
            self.deferred += 1;
            self.deferred_right += usize::from(right);
        }
    }
}

fn pct(part: usize, whole: usize) -> String {
    if whole == 0 {
        "–".to_owned()
    } else {
        format!("{:.1}%", 100.0 * part as f64 / whole as f64)
    }
}

/// Decisions of the letter-sorter model: count of accepted and deferred, from a scrape.
fn requests_counted(exposition: &str, version: &str) -> (f64, f64) {
    let value = |decision: &str| {
        let key = format!(
            "candor_requests_total{{model=\"{}\",map_version=\"{version}\",decision=\"{decision}\"}}",
            demo::MODEL
        );
        exposition
            .lines()
            .find_map(|l| l.strip_prefix(&key)?.trim().parse().ok())
            .unwrap_or(0.0)
    };
    (value("accept"), value("defer"))
}

async fn run_demo(args: &DemoArgs) -> anyhow::Result<()> {
    let cal = demo::calibration_set();
    let traffic = demo::traffic_set();
    let map = demo::fit_demo_map(&cal)?;
    let threshold = map
        .policy()
        .global_threshold()
        .context("the demo map certified no threshold")?;
    let evidence = map.policy().evidence().cloned().unwrap_or_default();
    let baseline = CalibrationMap::from_parts(MapParts {
        model: BASELINE_MODEL.into(),
        map_version: "softmax".into(),
        classes: map.classes(),
        class_names: map.class_names().map(<[String]>::to_vec),
        input: map.input(),
        method: Method::Identity,
        policy: DecisionPolicy::global(threshold),
        provenance: serde_json::Map::new(),
    })?;
    let dir = tempfile::tempdir().context("creating a temporary map directory")?;
    std::fs::write(dir.path().join("letter-sorter.json"), map.to_json())?;
    std::fs::write(dir.path().join("baseline.json"), baseline.to_json())?;

    // Start the sidecar on a free loopback port and load the maps the way `serve` does.
    let listener = tokio::net::TcpListener::bind("127.0.0.1:0").await?;
    let addr = listener.local_addr()?;
    let registry = Registry::new();
    let spec = registry.spec_lookup();
    let log = DecisionLog::spawn_watched(JournalOptions::default(), spec)?;
    let stats = std::sync::Arc::new(RpcStats::default());
    let (stop_tx, stop_rx) = tokio::sync::watch::channel(false);
    let stopped = |mut rx: tokio::sync::watch::Receiver<bool>| async move {
        let _ = rx.wait_for(|s| *s).await;
    };
    let server = tokio::spawn(serve(
        listener,
        registry.clone(),
        ServeOptions {
            stats: stats.clone(),
            journal: Some(log.clone()),
            ..ServeOptions::default()
        },
        stopped(stop_rx.clone()),
    ));
    let tl = tokio::net::TcpListener::bind(args.telemetry_listen)
        .await
        .with_context(|| format!("binding the telemetry listener {}", args.telemetry_listen))?;
    let taddr = tl.local_addr()?.to_string();
    let telemetry = tokio::spawn(run_telemetry(
        tl,
        Telemetry::new(registry.clone(), stats).with_live(log),
        stopped(stop_rx.clone()),
    ));
    let loaded = load_dir(dir.path());
    anyhow::ensure!(
        loaded.errors.is_empty(),
        "demo maps failed to load: {:?}",
        loaded.errors
    );
    registry.publish(loaded.maps);
    registry.mark_ready();

    let mut client = CalibratorClient::connect(format!("http://{addr}")).await?;
    let version = map.map_version().to_owned();
    let scrape_0 = requests_counted(&fetch(&taddr, "/metrics").await?, &version);
    let started = Instant::now();
    let (before, _) = stream_through(&mut client, BASELINE_MODEL, &traffic).await?;
    let (after, to_label) = stream_through(&mut client, demo::MODEL, &traffic).await?;
    let elapsed = started.elapsed();
    let scrape_1 = requests_counted(&fetch(&taddr, "/metrics").await?, &version);
    // People label the letters deferred to them and the audit sample of the auto-routed ones.
    for (request_id, label) in &to_label {
        client
            .record_outcome(OutcomeRequest {
                request_id: request_id.clone(),
                true_label: *label,
            })
            .await?;
    }
    let status: serde_json::Value = serde_json::from_str(&fetch(&taddr, "/status").await?)?;
    let live: Option<LiveQuality> = status["windows"]
        .as_array()
        .and_then(|w| w.iter().find(|q| q["model"] == demo::MODEL))
        .and_then(|q| serde_json::from_value(q.clone()).ok());
    if args.linger_secs > 0 {
        say!(
            "sidecar {addr} with telemetry on {taddr} stays up {} s: try candor status --telemetry {taddr}",
            args.linger_secs
        );
        tokio::time::sleep(std::time::Duration::from_secs(args.linger_secs)).await;
    }
    let _ = stop_tx.send(true);
    server.await??;
    telemetry.await??;

    let t = match map.method() {
        Method::Temperature(t) => t.temperature(),
        _ => f64::NAN,
    };
    let metric = |side: &str, name: &str| {
        map.provenance()["metrics"][side][name]
            .as_f64()
            .unwrap_or(f64::NAN)
    };
    let n = traffic.len();
    say!("candor demo: Fernhill Water sorts customer letters into 6 trays");
    say!("  ({})", demo::CLASS_NAMES.join(", "));
    say!();
    say!(
        "Fernhill wants at least {:.0}% of auto-routed letters in the right tray, with {:.0}%",
        demo::TARGET_ACCURACY * 100.0,
        demo::CONFIDENCE * 100.0
    );
    say!("statistical confidence; every other letter goes to a person.");
    say!();
    let fit_rows = map.provenance()["fit_data"]["rows"].as_u64().unwrap_or(0);
    say!(
        "1. Fit: temperature scaling on {fit_rows} of {} labelled letters held out from training",
        cal.len()
    );
    say!("   T = {t:.3} (the model's logits are {t:.1}x too sharp)");
    say!(
        "   log loss on those letters: {:.3} before, {:.3} after",
        metric("before", "nll"),
        metric("after", "nll")
    );
    say!(
        "   Certify (SGR) on the other {} letters: auto-route when calibrated confidence ≥ {threshold:.4};",
        evidence.items.unwrap_or(0)
    );
    say!(
        "   {} of them would be auto-routed, and at {:.0}% confidence at least {:.1}% of those are right.",
        evidence.accepted.unwrap_or(0),
        demo::CONFIDENCE * 100.0,
        100.0 * evidence.certified_accuracy.unwrap_or(f64::NAN)
    );
    say!();
    say!("2. Serve: {n} new letters streamed twice through the sidecar on {addr}");
    say!(
        "   ({} rows in {:.2} s over gRPC)",
        2 * n,
        elapsed.as_secs_f64()
    );
    say!();
    say!(
        "   {:<22} {:>16} {:>10} {:>18} {:>18}",
        "",
        "auto-routed",
        "to people",
        "right (auto)",
        "right (people)"
    );
    for (name, tally) in [
        ("raw model confidence", &before),
        ("candor-calibrated", &after),
    ] {
        say!(
            "   {:<22} {:>7} ({:>6}) {:>10} {:>18} {:>18}",
            name,
            tally.accepted,
            pct(tally.accepted, n),
            tally.deferred,
            pct(tally.accepted_right, tally.accepted),
            pct(tally.deferred_right, tally.deferred),
        );
    }
    say!();
    let wrong_before = before.accepted - before.accepted_right;
    let wrong_after = after.accepted - after.accepted_right;
    say!(
        "Raw confidence auto-routed {wrong_before} letters to the wrong tray ({} of its automated letters)",
        pct(wrong_before, before.accepted)
    );
    say!(
        "although it claimed at least {:.1}%. After recalibration: {wrong_after} ({}).",
        threshold * 100.0,
        pct(wrong_after, after.accepted)
    );
    say!();
    say!(
        "3. Watch: /metrics on {taddr} counted letter-sorter decisions accept {} -> {}, defer {} -> {}",
        scrape_0.0, scrape_1.0, scrape_0.1, scrape_1.1
    );
    say!(
        "   People labelled the {} deferred letters and the {} in the {:.0}% audit sample of auto-routed ones;",
        after.deferred,
        to_label.len() - after.deferred,
        100.0 * map.policy().audit_rate().unwrap_or(0.0)
    );
    say!("   what candor status says about the live window:");
    if let Some(q) = &live {
        for line in verdict_lines(q) {
            say!("   - {line}");
        }
    }
    say!();
    say!("The guarantee holds only while live letters resemble the calibration letters.");
    Ok(())
}

/// Streams every letter through CalibrateStream for `model` and tallies the decisions; also
/// returns (request id, true label) of the letters a person labels: deferred or audited.
async fn stream_through(
    client: &mut CalibratorClient<tonic::transport::Channel>,
    model: &str,
    letters: &Letters,
) -> anyhow::Result<(Tally, Vec<(String, u32)>)> {
    let requests: Vec<CalibrateRequest> = (0..letters.len())
        .map(|i| CalibrateRequest {
            model: model.to_owned(),
            logits: letters.row(i).to_vec(),
            request_id: format!("{model}-letter-{i}"),
            ..CalibrateRequest::default()
        })
        .collect();
    let mut responses = client
        .calibrate_stream(tokio_stream::iter(requests))
        .await?
        .into_inner();
    let mut tally = Tally::default();
    let mut to_label = Vec::new();
    let mut i = 0usize;
    while let Some(result) = responses.message().await? {
        let Some(Outcome::Response(r)) = result.outcome else {
            anyhow::bail!("letter {i} was refused: {:?}", result.outcome);
        };
        let right = r.predicted_class == letters.labels[i];
        let accepted = r.decision == Decision::Accept as i32;
        tally.add(accepted, right);
        if !accepted || r.audit {
            to_label.push((format!("{model}-letter-{i}"), letters.labels[i]));
        }
        i += 1;
    }
    anyhow::ensure!(
        i == letters.len(),
        "stream ended after {i} of {} letters",
        letters.len()
    );
    Ok((tally, to_label))
}
