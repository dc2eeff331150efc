//! `candor status`: a readable view of a running sidecar's live quality, fetched from its
//! telemetry listener's `/status`.

use super::say;
use crate::live::{verdict_lines, LiveQuality, Promise};
use anyhow::Context;
use http_body_util::{BodyExt, Empty};
use hyper::body::Bytes;
use hyper_util::rt::TokioIo;
use std::process::ExitCode;
use std::time::Duration;

/// How long `candor status` waits for the sidecar.
const TIMEOUT: Duration = Duration::from_secs(10);

/// Arguments of `candor status`.
#[derive(Debug, clap::Args)]
pub struct StatusArgs {
    /// Address of the sidecar's telemetry listener (its --telemetry-listen).
    #[arg(long, env = "CANDOR_TELEMETRY_ADDR", value_name = "ADDR")]
    telemetry: String,
    /// Only this model.
    #[arg(long)]
    model: Option<String>,
    /// Print the sidecar's JSON instead of the text view.
    #[arg(long)]
    json: bool,
    /// Exit with status 1 when a promise is broken or drift is flagged (for a scheduled check).
    #[arg(long)]
    fail_on_alarm: bool,
}

/// The body of `/status`.
#[derive(Debug, serde::Deserialize)]
struct StatusDoc {
    ready: bool,
    windows: Vec<LiveQuality>,
}

/// GET `path` from the telemetry listener at `addr`; the body of a 2xx answer.
pub(super) async fn fetch(addr: &str, path: &str) -> anyhow::Result<String> {
    let stream = tokio::net::TcpStream::connect(addr)
        .await
        .with_context(|| format!("connecting to the telemetry listener {addr}"))?;
    let (mut sender, conn) = hyper::client::conn::http1::handshake(TokioIo::new(stream))
        .await
        .with_context(|| format!("HTTP handshake with {addr}"))?;
    tokio::spawn(conn);
    let req = hyper::Request::get(path)
        .header(hyper::header::HOST, addr)
        .body(Empty::<Bytes>::new())?;
    let resp = sender
        .send_request(req)
        .await
        .with_context(|| format!("GET http://{addr}{path}"))?;
    let code = resp.status();
    let body = resp.into_body().collect().await?.to_bytes();
    let text = String::from_utf8_lossy(&body).into_owned();
    anyhow::ensure!(
        code.is_success(),
        "GET http://{addr}{path} answered {code}: {text}"
    );
    Ok(text)
}

pub(super) fn run(args: &StatusArgs) -> anyhow::Result<ExitCode> {
    let rt = tokio::runtime::Builder::new_current_thread()
        .enable_all()
        .build()?;
    let text = rt
        .block_on(async { tokio::time::timeout(TIMEOUT, fetch(&args.telemetry, "/status")).await })
        .with_context(|| format!("no answer from {} within {TIMEOUT:?}", args.telemetry))??;
    let doc: StatusDoc = serde_json::from_str(&text)
        .with_context(|| format!("reading /status of {}", args.telemetry))?;
    let windows: Vec<&LiveQuality> = doc
        .windows
        .iter()
        .filter(|q| args.model.as_deref().is_none_or(|m| q.model == m))
        .collect();
    if args.json {
        say!("{text}");
    } else {
        say!(
            "sidecar {}: {}",
            args.telemetry,
            if doc.ready {
                "ready"
            } else {
                "NOT READY (a model has no valid map)"
            }
        );
        if windows.is_empty() {
            say!(
                "no decisions yet{}",
                args.model
                    .as_deref()
                    .map(|m| format!(" for model {m}"))
                    .unwrap_or_default()
            );
        }
        for q in &windows {
            say!("");
            say!(
                "{} version {}: {} decisions since start, {} labels (audit rate {:.1}%)",
                q.model,
                q.map_version,
                q.decisions_total,
                q.labels_total,
                100.0 * q.audit_rate
            );
            for line in verdict_lines(q) {
                say!("  {line}");
            }
        }
    }
    let alarm = windows
        .iter()
        .any(|q| q.promise == Promise::Broken || q.drift_level.flagged());
    Ok(if args.fail_on_alarm && alarm {
        ExitCode::from(1)
    } else {
        ExitCode::SUCCESS
    })
}
