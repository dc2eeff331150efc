//! `candor serve`: configuration parsed once, then the sidecar runs until SIGTERM or SIGINT.

use crate::journal::{DecisionLog, JournalOptions};
use crate::live::WindowSizes;
use crate::registry::{spawn_store_watcher, Registry, RegistryOptions, WatchOptions};
use crate::server::{run as serve, run_admin_with_tls, ServeOptions};
use crate::service::{self, AdminToken};
use crate::telemetry::{run_telemetry, RpcStats, Telemetry};
use crate::tls::{TlsFiles, TlsReloader};
use anyhow::Context;
use std::net::SocketAddr;
use std::path::PathBuf;
use std::process::ExitCode;
use std::sync::Arc;
use std::time::Duration;
use tokio::sync::watch;

/// Arguments of `candor serve`. Every flag has a CANDOR_* environment fallback.
#[derive(Debug, clap::Args)]
pub struct ServeArgs {
    /// TOML file of settings. Its keys are the long flag names in kebab-case, e.g.
    /// `rescan-secs = 5`, `listen = "0.0.0.0:50551"`, `no-file-events = true`; an unknown key is
    /// an error. Precedence: flag > environment variable > this file > default.
    #[arg(long, env = "CANDOR_CONFIG", value_name = "FILE")]
    pub(super) config: Option<PathBuf>,
    /// Print the effective configuration as TOML (which --config accepts back), each value with
    /// where it came from, the admin token redacted; then exit. (No environment fallback: a
    /// deployment's environment must not turn the server into a printer.)
    #[arg(long)]
    print_config: bool,
    /// The map store: DIR/<model>/<version>.json plus an optional DIR/<model>/active-version
    /// pointer file, and/or flat DIR/*.json files. Watched for changes. Required (here, in the
    /// environment or in the config file).
    #[arg(long, env = "CANDOR_MAPS", value_name = "DIR")]
    maps: Option<PathBuf>,
    /// Seconds between full rescans of the map store (the fallback when file events are lost).
    #[arg(
        long,
        env = "CANDOR_RESCAN_SECS",
        default_value_t = 5,
        value_name = "SECS",
        value_parser = clap::value_parser!(u64).range(1..)
    )]
    rescan_secs: u64,
    /// Do not watch the store for file events; rely on the periodic rescan and SIGHUP.
    #[arg(long, env = "CANDOR_NO_FILE_EVENTS")]
    no_file_events: bool,
    /// Address of the admin listener (MapControl), or "off". Without a token it must be a
    /// loopback address.
    #[arg(
        long,
        env = "CANDOR_ADMIN_LISTEN",
        default_value = "127.0.0.1:50552",
        value_name = "ADDR|off",
        value_parser = parse_listen
    )]
    admin_listen: Listen,
    /// Address of the telemetry listener (HTTP: /metrics in the Prometheus text format, /ready,
    /// /live), or "off". Always plain HTTP, also when --tls-cert is set: keep it on a private
    /// network or behind the scraper's own proxy.
    #[arg(
        long,
        env = "CANDOR_TELEMETRY_LISTEN",
        default_value = "off",
        value_name = "ADDR|off",
        value_parser = parse_listen
    )]
    telemetry_listen: Listen,
    /// Share of accepted items marked `audit = true` for a person to check as well, chosen from a
    /// hash of the request id; in [0, 1]. Overrides every map's `policy.audit_rate`; without it,
    /// each map's own rate applies (0 when the map sets none).
    #[arg(
        long,
        env = "CANDOR_AUDIT_RATE",
        value_name = "SHARE",
        value_parser = parse_share
    )]
    audit_rate: Option<f64>,
    /// Directory of the decision journal (decisions and outcomes, JSON Lines, rotated by size).
    /// Without it, outcomes are still joined to recent decisions but nothing is written.
    #[arg(long, env = "CANDOR_JOURNAL_DIR", value_name = "DIR")]
    journal_dir: Option<PathBuf>,
    /// Sync the journal to disk after each batch, before acknowledging its outcomes (without it,
    /// each batch reaches the OS at once: it survives a crash of the process, not of the machine).
    #[arg(long, env = "CANDOR_JOURNAL_FSYNC")]
    journal_fsync: bool,
    /// Rotate a journal file once it would grow past this many MiB.
    #[arg(long, env = "CANDOR_JOURNAL_MAX_MIB", default_value_t = 64, value_name = "MIB",
          value_parser = clap::value_parser!(u64).range(1..))]
    journal_max_mib: u64,
    /// Journal files kept (older ones are removed).
    #[arg(long, env = "CANDOR_JOURNAL_KEEP", default_value_t = 16, value_name = "N",
          value_parser = clap::value_parser!(u64).range(1..))]
    journal_keep: u64,
    /// Leave the raw logits out of the journal (smaller, but no refit from it).
    #[arg(long, env = "CANDOR_JOURNAL_WITHOUT_LOGITS")]
    journal_without_logits: bool,
    /// Recent decisions remembered for joining outcomes.
    #[arg(
        long,
        env = "CANDOR_REMEMBER_DECISIONS",
        default_value_t = 1_000_000,
        value_name = "N"
    )]
    remember_decisions: usize,
    /// Most recent decisions per (model, map version) behind the live automation rate and drift
    /// (`/status`, `candor status` and the candor_live_* gauges).
    #[arg(long, env = "CANDOR_QUALITY_WINDOW", default_value_t = crate::live::DEFAULT_WINDOW_DECISIONS,
          value_name = "N")]
    quality_window: usize,
    /// Most recent labelled items per (model, map version) behind the live accuracy estimates.
    #[arg(long, env = "CANDOR_QUALITY_LABELS", default_value_t = crate::live::DEFAULT_WINDOW_LABELS,
          value_name = "N")]
    quality_labels: usize,
    /// File holding the admin bearer token (surrounding whitespace ignored).
    #[arg(long, env = "CANDOR_ADMIN_TOKEN_FILE", value_name = "PATH")]
    admin_token_file: Option<PathBuf>,
    /// The admin bearer token itself. Prefer the environment variable or --admin-token-file:
    /// a flag's value is visible to other users in the process list.
    #[arg(
        long,
        env = "CANDOR_ADMIN_TOKEN",
        hide_env_values = true,
        value_name = "TOKEN",
        conflicts_with = "admin_token_file"
    )]
    admin_token: Option<String>,
    /// Address for the gRPC listener.
    #[arg(
        long,
        env = "CANDOR_LISTEN",
        default_value = "127.0.0.1:50551",
        value_name = "ADDR"
    )]
    listen: SocketAddr,
    /// Seconds in-flight requests may take to finish after SIGTERM/SIGINT.
    #[arg(
        long,
        env = "CANDOR_GRACE_PERIOD_SECS",
        default_value_t = 10,
        value_name = "SECS"
    )]
    grace_period_secs: u64,
    /// Largest encoded request message the data listener accepts, in bytes; larger ones are
    /// refused with OUT_OF_RANGE before decoding. (The admin listener keeps its own
    /// limit, sized for map pushes of up to 64 MiB.)
    #[arg(long, env = "CANDOR_MAX_MESSAGE_BYTES", value_name = "BYTES",
          default_value_t = service::DEFAULT_MAX_MESSAGE_BYTES, value_parser = at_least_one)]
    max_message_bytes: usize,
    /// Most classes a map may have: maps with more are refused at load (the reason is logged
    /// and shown by `candor maps list`), and requests with more logits are refused with
    /// INVALID_ARGUMENT before any work.
    #[arg(long, env = "CANDOR_MAX_CLASSES", value_name = "K",
          default_value_t = service::DEFAULT_MAX_CLASSES, value_parser = at_least_one)]
    max_classes: usize,
    /// Most rows in one CalibrateBatch request; larger batches are refused with
    /// INVALID_ARGUMENT. (CalibrateStream carries one row per message.)
    #[arg(long, env = "CANDOR_MAX_BATCH", value_name = "ROWS",
          default_value_t = service::MAX_BATCH_ROWS, value_parser = at_least_one)]
    max_batch: usize,
    /// Most data-plane requests answered at once (an open stream counts as one until it ends);
    /// beyond it a request is refused at once with RESOURCE_EXHAUSTED, never queued. 0: no
    /// bound. Health checks and reflection are not counted.
    #[arg(long, env = "CANDOR_MAX_CONCURRENT_REQUESTS", value_name = "N",
          default_value_t = service::DEFAULT_MAX_CONCURRENT_REQUESTS)]
    max_concurrent_requests: usize,
    /// Certificate chain (PEM, leaf first) for TLS on the gRPC listener and the admin listener.
    /// Needs --tls-key. Re-read with the key and the client CA on SIGHUP: new connections use
    /// the new files; if they are bad, the previous configuration stays and the reason is logged.
    #[arg(
        long,
        env = "CANDOR_TLS_CERT",
        value_name = "PEM",
        requires = "tls_key"
    )]
    tls_cert: Option<PathBuf>,
    /// Private key (PEM: PKCS#8, PKCS#1 or SEC1) of --tls-cert.
    #[arg(
        long,
        env = "CANDOR_TLS_KEY",
        value_name = "PEM",
        requires = "tls_cert"
    )]
    tls_key: Option<PathBuf>,
    /// Certificate authorities (PEM) for mutual TLS: every client of the gRPC and admin
    /// listeners must present a certificate signed by one of them, or the handshake is refused.
    /// Needs --tls-cert.
    #[arg(
        long,
        env = "CANDOR_TLS_CLIENT_CA",
        value_name = "PEM",
        requires = "tls_cert"
    )]
    tls_client_ca: Option<PathBuf>,
    /// Log format.
    #[arg(long, env = "CANDOR_LOG_FORMAT", value_enum, default_value = "text")]
    log_format: LogFormat,
    /// Log filter (tracing env-filter syntax), e.g. "info" or "candor=debug".
    #[arg(
        long,
        env = "CANDOR_LOG",
        default_value = "info",
        value_name = "FILTER"
    )]
    log: String,
}

fn at_least_one(s: &str) -> Result<usize, String> {
    match s.parse::<usize>() {
        Ok(0) => Err("must be at least 1".to_owned()),
        Ok(n) => Ok(n),
        Err(e) => Err(format!("{s:?} is not a whole number: {e}")),
    }
}

fn parse_share(s: &str) -> Result<f64, String> {
    match s.parse::<f64>() {
        Ok(x) if (0.0..=1.0).contains(&x) => Ok(x),
        Ok(x) => Err(format!("must lie in [0, 1], got {x}")),
        Err(e) => Err(format!("{s:?} is not a number: {e}")),
    }
}

/// Where an optional listener (admin, telemetry) listens.
#[derive(Debug, Clone, Copy)]
enum Listen {
    /// No listener.
    Off,
    /// This address.
    On(SocketAddr),
}

fn parse_listen(s: &str) -> Result<Listen, String> {
    if s == "off" {
        return Ok(Listen::Off);
    }
    s.parse()
        .map(Listen::On)
        .map_err(|e| format!("{s:?} is neither an address nor \"off\": {e}"))
}

/// How log lines are written.
#[derive(Debug, Clone, Copy, clap::ValueEnum)]
enum LogFormat {
    /// Human-readable lines.
    Text,
    /// One JSON object per line.
    Json,
}

fn init_logging(format: LogFormat, filter: &str) -> anyhow::Result<()> {
    let filter = tracing_subscriber::EnvFilter::try_new(filter)
        .with_context(|| format!("--log {filter:?} is not a valid filter"))?;
    let ansi = std::io::IsTerminal::is_terminal(&std::io::stderr());
    let builder = tracing_subscriber::fmt()
        .with_env_filter(filter)
        .with_ansi(ansi)
        .with_writer(std::io::stderr);
    match format {
        LogFormat::Text => builder.init(),
        LogFormat::Json => builder.json().init(),
    }
    Ok(())
}

pub(super) fn run(args: ServeArgs) -> anyhow::Result<ExitCode> {
    let resolved = super::serve_config::resolve(args)?;
    if resolved.args.print_config {
        super::say!("{}", super::serve_config::print(&resolved).trim_end());
        return Ok(ExitCode::SUCCESS);
    }
    let args = resolved.args;
    init_logging(args.log_format, &args.log)?;
    let Some(maps) = &args.maps else {
        anyhow::bail!("--maps is required (the flag, CANDOR_MAPS or `maps` in the config file)");
    };
    if !maps.is_dir() {
        anyhow::bail!("--maps {}: not a directory", maps.display());
    }
    let maps = maps.clone();
    let token = admin_token(&args)?;
    if let (Listen::On(addr), None) = (args.admin_listen, &token) {
        anyhow::ensure!(
            addr.ip().is_loopback(),
            "--admin-listen {addr} is not a loopback address and no admin token is set; set \
             --admin-token-file or CANDOR_ADMIN_TOKEN, or listen on 127.0.0.1"
        );
    }
    let runtime = tokio::runtime::Builder::new_multi_thread()
        .enable_all()
        .build()
        .context("starting the async runtime")?;
    runtime.block_on(serve_until_signal(args, maps, token))?;
    Ok(ExitCode::SUCCESS)
}

fn admin_token(args: &ServeArgs) -> anyhow::Result<Option<AdminToken>> {
    let text = super::maps::admin_token_text(
        args.admin_token_file.as_deref(),
        args.admin_token.as_deref(),
    )?;
    text.map(|t| AdminToken::try_new(&t).map_err(|e| anyhow::anyhow!("{e}")))
        .transpose()
}

/// A future that completes once `stop` turns true (or its sender is gone).
async fn stopped(mut stop: watch::Receiver<bool>) {
    let _ = stop.wait_for(|s| *s).await;
}

async fn serve_until_signal(
    args: ServeArgs,
    maps: PathBuf,
    token: Option<AdminToken>,
) -> anyhow::Result<()> {
    // Take over SIGHUP before anything is announced: its default action ends the process, and
    // the store watcher, which handles it, starts only after the first scan.
    #[cfg(unix)]
    let hangup = tokio::signal::unix::signal(tokio::signal::unix::SignalKind::hangup())
        .context("listening for SIGHUP")?;
    let tls = match (&args.tls_cert, &args.tls_key) {
        (Some(cert), Some(key)) => Some(
            TlsReloader::new(TlsFiles {
                cert: cert.clone(),
                key: key.clone(),
                client_ca: args.tls_client_ca.clone(),
            })
            .context("setting up TLS")?,
        ),
        _ => None,
    };
    // Kept (unused) without TLS so the handler stays installed for the whole run.
    #[cfg(unix)]
    let _hangup = match &tls {
        Some(t) => {
            tokio::spawn(reload_tls_on_hangup(hangup, t.clone()));
            None
        }
        None => Some(hangup),
    };
    let listener = tokio::net::TcpListener::bind(args.listen)
        .await
        .with_context(|| format!("binding {}", args.listen))?;
    let addr = listener.local_addr()?;
    let admin_listener = match args.admin_listen {
        Listen::Off => None,
        Listen::On(a) => Some(
            tokio::net::TcpListener::bind(a)
                .await
                .with_context(|| format!("binding the admin listener {a}"))?,
        ),
    };
    // watch: one stop signal fanned out to the data plane, the admin plane and the watcher.
    let (stop_tx, stop_rx) = watch::channel(false);
    tokio::spawn(async move {
        shutdown_signal().await;
        stop_tx.send_replace(true);
    });

    let registry = Registry::with_options(
        Some(&maps),
        RegistryOptions {
            audit_rate: args.audit_rate,
            max_classes: args.max_classes,
        },
    );
    // The first scan runs before anything is served or logged as listening, so the first
    // answer of /ready or health already reflects the store.
    let r = registry.clone();
    let view = tokio::task::spawn_blocking(move || r.rescan()).await?;
    let stats = Arc::new(RpcStats::default());
    let spec = registry.spec_lookup();
    let journal = DecisionLog::spawn_watched(
        JournalOptions {
            dir: args.journal_dir.clone(),
            max_file_bytes: args.journal_max_mib * 1024 * 1024,
            keep_files: usize::try_from(args.journal_keep).unwrap_or(usize::MAX),
            fsync: args.journal_fsync,
            logits: !args.journal_without_logits,
            remember: args.remember_decisions,
            windows: WindowSizes {
                decisions: args.quality_window,
                labels: args.quality_labels,
            },
            ..JournalOptions::default()
        },
        spec,
    )
    .context("starting the decision journal")?;
    if let Some(d) = &args.journal_dir {
        tracing::info!(dir = %d.display(), fsync = args.journal_fsync, "journal open");
    }
    let live = journal.clone();
    let options = ServeOptions {
        grace_period: Duration::from_secs(args.grace_period_secs),
        stats: stats.clone(),
        journal: Some(journal),
        tls: tls.clone(),
        limits: service::Limits {
            max_message_bytes: args.max_message_bytes,
            max_classes: args.max_classes,
            max_batch: args.max_batch,
            max_concurrent_requests: args.max_concurrent_requests,
        },
    };
    let telemetry = match args.telemetry_listen {
        Listen::Off => None,
        Listen::On(a) => {
            let l = tokio::net::TcpListener::bind(a)
                .await
                .with_context(|| format!("binding the telemetry listener {a}"))?;
            tracing::info!(addr = %l.local_addr()?, "telemetry listening");
            Some(tokio::spawn(run_telemetry(
                l,
                Telemetry::new(registry.clone(), stats.clone()).with_live(live),
                stopped(stop_rx.clone()),
            )))
        }
    };
    let server = tokio::spawn(serve(
        listener,
        registry.clone(),
        options,
        stopped(stop_rx.clone()),
    ));
    tracing::info!(%addr, tls = tls.is_some(), mutual_tls = args.tls_client_ca.is_some(), "listening");
    let admin = match admin_listener {
        Some(l) => {
            let admin_addr = l.local_addr()?;
            tracing::info!(addr = %admin_addr, authenticated = token.is_some(), "admin listening");
            Some(tokio::spawn(run_admin_with_tls(
                l,
                registry.clone(),
                token,
                tls.clone(),
                stopped(stop_rx.clone()),
            )))
        }
        None => None,
    };

    if !registry.is_ready() {
        if view.models.is_empty() {
            tracing::warn!(dir = %maps.display(), "no valid map found; health stays NOT_SERVING");
        } else {
            tracing::warn!("some maps were rejected; health stays NOT_SERVING until every model has a valid active map");
        }
    }
    let watcher = spawn_store_watcher(
        registry.clone(),
        WatchOptions {
            rescan_interval: Duration::from_secs(args.rescan_secs),
            file_events: !args.no_file_events,
            sighup: true,
            ..WatchOptions::default()
        },
        stopped(stop_rx.clone()),
    );
    server.await??;
    if let Some(a) = admin {
        a.await??;
    }
    watcher.await?;
    if let Some(t) = telemetry {
        t.await?.context("telemetry listener")?;
    }
    let counts = registry.decision_counts();
    let (accepted, deferred) = counts.iter().fold((0, 0), |(a, d), c| (a + c.2, d + c.3));
    tracing::info!(accepted, deferred, "stopped");
    Ok(())
}

/// Re-reads the TLS files on every SIGHUP (beside the map-store rescan the watcher does then).
#[cfg(unix)]
async fn reload_tls_on_hangup(mut hangup: tokio::signal::unix::Signal, tls: TlsReloader) {
    while hangup.recv().await.is_some() {
        match tls.reload() {
            Ok(()) => tracing::info!(
                cert = %tls.files().cert.display(),
                "TLS configuration reloaded; new connections use it"
            ),
            Err(e) => tracing::error!(
                reason = %e,
                "TLS reload failed; the previous TLS configuration stays in use"
            ),
        }
    }
}

/// Completes on SIGTERM or SIGINT.
async fn shutdown_signal() {
    let ctrl_c = async {
        if let Err(e) = tokio::signal::ctrl_c().await {
            tracing::error!(error = %e, "cannot listen for SIGINT");
            std::future::pending::<()>().await;
        }
    };
    #[cfg(unix)]
    let term = async {
        match tokio::signal::unix::signal(tokio::signal::unix::SignalKind::terminate()) {
            Ok(mut s) => {
                s.recv().await;
            }
            Err(e) => {
                tracing::error!(error = %e, "cannot listen for SIGTERM");
                std::future::pending::<()>().await;
            }
        }
    };
    #[cfg(not(unix))]
    let term = std::future::pending::<()>();
    tokio::select! {
        _ = ctrl_c => tracing::info!("SIGINT received"),
        _ = term => tracing::info!("SIGTERM received"),
    }
}
