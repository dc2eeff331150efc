//! `candor serve`: configuration parsed once, then the sidecar runs until SIGTERM or SIGINT.

use crate::registry::{load_dir, Registry};
use crate::server::{run as serve, ServeOptions};
use anyhow::Context;
use std::net::SocketAddr;
use std::path::PathBuf;
use std::process::ExitCode;
use std::time::Duration;

/// Arguments of `candor serve`. Every flag has a CANDOR_* environment fallback.
#[derive(Debug, clap::Args)]
pub struct ServeArgs {
    /// Directory of map files (DIR/*.json or DIR/<model>/*.json; one map per model).
    #[arg(long, env = "CANDOR_MAPS", value_name = "DIR")]
    maps: PathBuf,
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
    init_logging(args.log_format, &args.log)?;
    if !args.maps.is_dir() {
        anyhow::bail!("--maps {}: not a directory", args.maps.display());
    }
    let runtime = tokio::runtime::Builder::new_multi_thread()
        .enable_all()
        .build()
        .context("starting the async runtime")?;
    runtime.block_on(serve_until_signal(args))?;
    Ok(ExitCode::SUCCESS)
}

async fn serve_until_signal(args: ServeArgs) -> anyhow::Result<()> {
    let listener = tokio::net::TcpListener::bind(args.listen)
        .await
        .with_context(|| format!("binding {}", args.listen))?;
    let addr = listener.local_addr()?;
    let registry = Registry::new();
    let options = ServeOptions {
        grace_period: Duration::from_secs(args.grace_period_secs),
    };
    let server = tokio::spawn(serve(
        listener,
        registry.clone(),
        options,
        shutdown_signal(),
    ));
    tracing::info!(%addr, "listening");

    let dir = args.maps.clone();
    let loaded = tokio::task::spawn_blocking(move || load_dir(&dir)).await?;
    for m in &loaded.maps {
        tracing::info!(
            model = m.model(),
            version = m.map_version(),
            method = m.method().kind(),
            digest = m.digest(),
            "map loaded"
        );
    }
    for e in &loaded.errors {
        tracing::error!(error = %e, "map rejected");
    }
    let complete = loaded.errors.is_empty() && !loaded.maps.is_empty();
    registry.publish(loaded.maps);
    if complete {
        registry.mark_ready();
    } else if loaded.errors.is_empty() {
        tracing::warn!(dir = %args.maps.display(), "no map files found; health stays NOT_SERVING");
    } else {
        tracing::warn!("some maps were rejected; health stays NOT_SERVING");
    }
    server.await??;
    tracing::info!("stopped");
    Ok(())
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
