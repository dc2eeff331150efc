//! `candor maps`: drive a running sidecar's admin plane (list, push, activate, rollback, canary,
//! shadow).

use super::say;
use crate::proto::v1::map_control_client::MapControlClient;
use crate::proto::v1::{
    ActivateRequest, ListModelsRequest, ModelStatus, PushMapRequest, RollbackRequest,
    SetCanaryRequest, SetShadowRequest, VersionState,
};
use anyhow::Context;
use std::path::PathBuf;
use std::process::ExitCode;
use tonic::metadata::MetadataValue;
use tonic::transport::Channel;

/// Arguments of `candor maps`.
#[derive(Debug, clap::Args)]
pub struct MapsArgs {
    /// Address of the sidecar's admin listener.
    #[arg(
        long,
        env = "CANDOR_ADMIN_ADDR",
        default_value = "127.0.0.1:50552",
        value_name = "ADDR",
        global = true
    )]
    admin: String,
    /// File holding the admin bearer token.
    #[arg(
        long,
        env = "CANDOR_ADMIN_TOKEN_FILE",
        value_name = "PATH",
        global = true
    )]
    admin_token_file: Option<PathBuf>,
    /// The admin bearer token (prefer the environment variable or the file).
    #[arg(
        long,
        env = "CANDOR_ADMIN_TOKEN",
        hide_env_values = true,
        value_name = "TOKEN",
        global = true
    )]
    admin_token: Option<String>,
    #[command(subcommand)]
    action: Action,
}

#[derive(Debug, clap::Subcommand)]
enum Action {
    /// Every model with its versions, their state and counts, and recent rejections.
    List {
        /// Print the admin API's answer as JSON.
        #[arg(long)]
        json: bool,
    },
    /// Upload a map file into the sidecar's store (validated there, written atomically).
    Push {
        /// The map file.
        file: PathBuf,
        /// Make it the active version once stored.
        #[arg(long)]
        activate: bool,
    },
    /// Make a loaded version the active one.
    Activate {
        /// Model name.
        model: String,
        /// Map version.
        version: String,
    },
    /// Make the previously active version active again.
    Rollback {
        /// Model name.
        model: String,
    },
    /// Send a share of request ids to a candidate version (or clear the canary).
    Canary {
        /// Model name.
        model: String,
        /// Candidate version (omit with --clear).
        #[arg(required_unless_present = "clear")]
        version: Option<String>,
        /// Share of request ids in (0, 1].
        #[arg(long, default_value_t = 0.05, value_name = "SHARE")]
        fraction: f64,
        /// Remove the canary.
        #[arg(long, conflicts_with = "version")]
        clear: bool,
    },
    /// Compute a candidate version beside the active one and count disagreements (or clear).
    Shadow {
        /// Model name.
        model: String,
        /// Candidate version (omit with --clear).
        #[arg(required_unless_present = "clear")]
        version: Option<String>,
        /// Remove the shadow.
        #[arg(long, conflicts_with = "version")]
        clear: bool,
    },
}

pub(super) fn run(args: &MapsArgs) -> anyhow::Result<ExitCode> {
    let runtime = tokio::runtime::Builder::new_current_thread()
        .enable_all()
        .build()
        .context("starting the async runtime")?;
    runtime.block_on(drive(args))
}

/// The admin token's text from a file or the value itself (the file wins), if either is set.
pub(super) fn admin_token_text(
    file: Option<&std::path::Path>,
    value: Option<&str>,
) -> anyhow::Result<Option<String>> {
    match (file, value) {
        (Some(p), _) => std::fs::read_to_string(p)
            .map(Some)
            .with_context(|| format!("reading --admin-token-file {}", p.display())),
        (None, v) => Ok(v.map(str::to_owned)),
    }
}

fn token(args: &MapsArgs) -> anyhow::Result<Option<MetadataValue<tonic::metadata::Ascii>>> {
    let Some(text) = admin_token_text(
        args.admin_token_file.as_deref(),
        args.admin_token.as_deref(),
    )?
    else {
        return Ok(None);
    };
    let value = format!("Bearer {}", text.trim());
    Ok(Some(value.parse().context(
        "the admin token must be printable ASCII without line breaks",
    )?))
}

fn request<T>(msg: T, token: &Option<MetadataValue<tonic::metadata::Ascii>>) -> tonic::Request<T> {
    let mut r = tonic::Request::new(msg);
    if let Some(t) = token {
        r.metadata_mut().insert("authorization", t.clone());
    }
    r
}

async fn drive(args: &MapsArgs) -> anyhow::Result<ExitCode> {
    let token = token(args)?;
    let endpoint = if args.admin.contains("://") {
        args.admin.clone()
    } else {
        format!("http://{}", args.admin)
    };
    let channel = Channel::from_shared(endpoint.clone())
        .with_context(|| format!("--admin {:?} is not a valid address", args.admin))?
        .connect()
        .await
        .with_context(|| format!("connecting to the admin listener at {endpoint}"))?;
    let mut c = MapControlClient::new(channel).max_decoding_message_size(usize::MAX);
    let fail = |e: tonic::Status| anyhow::anyhow!("{:?}: {}", e.code(), e.message());
    match &args.action {
        Action::List { json } => {
            let r = c
                .list_models(request(ListModelsRequest {}, &token))
                .await
                .map_err(fail)?
                .into_inner();
            if *json {
                say!("{}", list_json(&r));
            } else {
                for m in &r.models {
                    print_model(m);
                }
                say!(
                    "{} publication(s), {} rejection(s) since start",
                    r.publishes_total,
                    r.rejections_total
                );
                for j in &r.rejections {
                    say!("  rejected {}: {}", j.path, j.reason);
                }
            }
        }
        Action::Push { file, activate } => {
            let bytes =
                std::fs::read(file).with_context(|| format!("reading {}", file.display()))?;
            let r = c
                .push_map(request(
                    PushMapRequest {
                        map_json: bytes,
                        activate: *activate,
                    },
                    &token,
                ))
                .await
                .map_err(fail)?
                .into_inner();
            say!(
                "{} {} {} ({})",
                if r.written {
                    "stored"
                } else {
                    "already stored"
                },
                r.model,
                r.map_version,
                r.digest
            );
            if let Some(m) = &r.status {
                print_model(m);
            }
        }
        Action::Activate { model, version } => {
            let m = c
                .activate(request(
                    ActivateRequest {
                        model: model.clone(),
                        map_version: version.clone(),
                    },
                    &token,
                ))
                .await
                .map_err(fail)?
                .into_inner();
            print_model(&m);
        }
        Action::Rollback { model } => {
            let m = c
                .rollback(request(
                    RollbackRequest {
                        model: model.clone(),
                    },
                    &token,
                ))
                .await
                .map_err(fail)?
                .into_inner();
            print_model(&m);
        }
        Action::Canary {
            model,
            version,
            fraction,
            ..
        } => {
            let m = c
                .set_canary(request(
                    SetCanaryRequest {
                        model: model.clone(),
                        map_version: version.clone().unwrap_or_default(),
                        fraction: *fraction,
                    },
                    &token,
                ))
                .await
                .map_err(fail)?
                .into_inner();
            print_model(&m);
        }
        Action::Shadow { model, version, .. } => {
            let m = c
                .set_shadow(request(
                    SetShadowRequest {
                        model: model.clone(),
                        map_version: version.clone().unwrap_or_default(),
                    },
                    &token,
                ))
                .await
                .map_err(fail)?
                .into_inner();
            print_model(&m);
        }
    }
    Ok(ExitCode::SUCCESS)
}

fn state_name(s: i32) -> &'static str {
    match VersionState::try_from(s) {
        Ok(VersionState::Active) => "active",
        Ok(VersionState::Staged) => "staged",
        Ok(VersionState::Canary) => "canary",
        Ok(VersionState::Shadow) => "shadow",
        Ok(VersionState::Rejected) => "rejected",
        _ => "unknown",
    }
}

fn print_model(m: &ModelStatus) {
    let history = if m.history.is_empty() {
        String::new()
    } else {
        format!(" (before: {})", m.history.join(", "))
    };
    say!("{}: active {}{history}", m.model, m.active_version);
    if !m.canary_version.is_empty() {
        say!(
            "  canary {} takes {:.1}% of request ids",
            m.canary_version,
            100.0 * m.canary_fraction
        );
    }
    if let Some(s) = &m.shadow {
        say!(
            "  shadow {}: {} compared, {} accept->defer, {} defer->accept, mean |change in confidence| {:.4}",
            s.map_version,
            s.compared,
            s.accept_to_defer,
            s.defer_to_accept,
            s.mean_abs_confidence_change
        );
    }
    say!(
        "  {:<24} {:<9} {:>7} {:<12} {:>10} {:>10}  digest / reason",
        "version",
        "state",
        "classes",
        "method",
        "accepted",
        "deferred"
    );
    for v in &m.versions {
        let tail = if v.reason.is_empty() {
            v.digest.clone()
        } else {
            v.reason.clone()
        };
        say!(
            "  {:<24} {:<9} {:>7} {:<12} {:>10} {:>10}  {tail}",
            v.map_version,
            state_name(v.state),
            v.classes,
            v.method,
            v.accepted,
            v.deferred
        );
    }
}

fn list_json(r: &crate::proto::v1::ListModelsResponse) -> String {
    use serde_json::json;
    let models: Vec<_> = r
        .models
        .iter()
        .map(|m| {
            json!({
                "model": m.model,
                "active_version": m.active_version,
                "history": m.history,
                "canary": (!m.canary_version.is_empty()).then(|| json!({
                    "map_version": m.canary_version, "fraction": m.canary_fraction})),
                "shadow": m.shadow.as_ref().map(|s| json!({
                    "map_version": s.map_version, "compared": s.compared,
                    "accept_to_defer": s.accept_to_defer, "defer_to_accept": s.defer_to_accept,
                    "mean_abs_confidence_change": s.mean_abs_confidence_change})),
                "versions": m.versions.iter().map(|v| json!({
                    "map_version": v.map_version, "state": state_name(v.state),
                    "digest": v.digest, "classes": v.classes, "method": v.method,
                    "path": v.path, "reason": v.reason,
                    "accepted": v.accepted, "deferred": v.deferred})).collect::<Vec<_>>(),
            })
        })
        .collect();
    let rejections: Vec<_> = r
        .rejections
        .iter()
        .map(|j| json!({"path": j.path, "reason": j.reason, "at_unix_secs": j.at_unix_secs}))
        .collect();
    serde_json::to_string_pretty(&json!({
        "models": models,
        "rejections": rejections,
        "publishes_total": r.publishes_total,
        "rejections_total": r.rejections_total,
    }))
    .unwrap_or_default()
}
