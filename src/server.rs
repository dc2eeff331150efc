//! Running the sidecar: the data-plane service, gRPC health checking and server reflection on one
//! listener, with graceful shutdown.
//!
//! [`run`] takes an already-bound listener and a shutdown future, so tests bind port 0 and stop
//! the server when they are done.

use crate::journal::DecisionLog;
use crate::proto::v1::calibrator_server::CalibratorServer;
use crate::proto::v1::map_control_server::MapControlServer;
use crate::registry::Registry;
use crate::service::{
    check_token, AdminToken, CalibratorService, GatewayLayer, Limits, MapControlService,
    MAX_PUSH_BYTES,
};
use crate::telemetry::RpcStats;
use crate::tls::TlsReloader;
use std::convert::Infallible;
use std::future::Future;
use std::pin::Pin;
use std::sync::Arc;
use std::time::Duration;
use tokio::net::TcpListener;
use tonic::codegen::http;
use tonic::service::Routes;
use tonic::transport::server::TcpIncoming;
use tonic_health::ServingStatus;

/// Name of the data-plane service in gRPC health checking.
pub const SERVICE_NAME: &str = "candor.v1.Calibrator";

/// Settings of a running server.
#[derive(Debug, Clone)]
pub struct ServeOptions {
    /// How long in-flight requests may take to finish after shutdown begins.
    pub grace_period: Duration,
    /// Request counters the data plane keeps (shared with telemetry).
    pub stats: Arc<RpcStats>,
    /// The decision log: journal of decisions and outcomes (none: RecordOutcome is refused).
    pub journal: Option<DecisionLog>,
    /// Message size, classes, batch rows and requests in flight on the data plane.
    pub limits: Limits,
    /// TLS (and mutual TLS) on the listener; none: plaintext HTTP/2.
    pub tls: Option<TlsReloader>,
}

impl Default for ServeOptions {
    fn default() -> Self {
        ServeOptions {
            grace_period: Duration::from_secs(10),
            stats: Arc::default(),
            journal: None,
            limits: Limits::default(),
            tls: None,
        }
    }
}

/// Why the server stopped abnormally.
#[derive(Debug, thiserror::Error)]
pub enum ServeError {
    /// The transport failed.
    #[error("gRPC transport failed: {0}")]
    Transport(#[from] tonic::transport::Error),
    /// The reflection service could not be built from the descriptor set.
    #[error("server reflection could not be set up: {0}")]
    Reflection(#[from] tonic_reflection::server::Error),
}

/// Accepted connections with TCP_NODELAY set, as tonic sets it when it binds the port itself.
///
/// Without it, Nagle's algorithm holds back the second write of a response (an HTTP/2 response
/// is written as headers and data, then trailers) until the client acknowledges the first, and
/// the client delays that acknowledgement by up to 40 ms: a K = 1000 answer took 44 ms at
/// concurrency 1 instead of about 0.2 ms (measured with `cargo bench --bench sidecar_compare`).
fn incoming(listener: TcpListener) -> TcpIncoming {
    TcpIncoming::from(listener).with_nodelay(Some(true))
}

/// A running transport, plaintext or TLS.
type Serving = Pin<Box<dyn Future<Output = Result<(), tonic::transport::Error>> + Send>>;

/// Serves `router` on `listener`, over TLS when `tls` is given, until `stop` completes.
fn serve_on<L>(
    router: tonic::transport::server::Router<L>,
    listener: TcpListener,
    tls: Option<TlsReloader>,
    stop: impl Future<Output = ()> + Send + 'static,
) -> Serving
where
    L: tower_layer::Layer<Routes> + Send + 'static,
    L::Service: tower_service::Service<
            http::Request<tonic::body::Body>,
            Response = http::Response<tonic::body::Body>,
            Error = Infallible,
        > + Clone
        + Send
        + 'static,
    <L::Service as tower_service::Service<http::Request<tonic::body::Body>>>::Future: Send,
{
    match tls {
        None => Box::pin(router.serve_with_incoming_shutdown(incoming(listener), stop)),
        Some(t) => {
            Box::pin(router.serve_with_incoming_shutdown(crate::tls::incoming(listener, t), stop))
        }
    }
}

/// Serves until `shutdown` completes, then marks health NOT_SERVING, stops accepting connections
/// and waits up to the grace period for in-flight requests; streams still open after it are
/// closed.
///
/// Health reports NOT_SERVING until the registry's readiness latch is released, SERVING after.
///
/// # Errors
/// [`ServeError`] when the transport fails or reflection cannot be set up.
pub async fn run(
    listener: TcpListener,
    registry: Arc<Registry>,
    options: ServeOptions,
    shutdown: impl Future<Output = ()> + Send + 'static,
) -> Result<(), ServeError> {
    let (reporter, health) = tonic_health::server::health_reporter();
    for name in ["", SERVICE_NAME] {
        reporter
            .set_service_status(name, ServingStatus::NotServing)
            .await;
    }
    let reflection = tonic_reflection::server::Builder::configure()
        .register_encoded_file_descriptor_set(crate::proto::FILE_DESCRIPTOR_SET)
        .register_encoded_file_descriptor_set(tonic_health::pb::FILE_DESCRIPTOR_SET)
        .build_v1()?;

    let mut ready = registry.readiness();
    let ready_reporter = reporter.clone();
    let readiness_task = tokio::spawn(async move {
        if ready.wait_for(|r| *r).await.is_ok() {
            for name in ["", SERVICE_NAME] {
                ready_reporter
                    .set_service_status(name, ServingStatus::Serving)
                    .await;
            }
            tracing::info!("every map loaded: health is SERVING");
        }
    });

    let (drain_tx, drain_rx) = tokio::sync::oneshot::channel::<()>();
    let (draining_tx, draining) = tokio::sync::watch::channel(false);
    let stop = async move {
        shutdown.await;
        readiness_task.abort();
        for name in ["", SERVICE_NAME] {
            reporter
                .set_service_status(name, ServingStatus::NotServing)
                .await;
        }
        tracing::info!("shutting down: health is NOT_SERVING, draining in-flight requests");
        draining_tx.send_replace(true);
        let _ = drain_tx.send(());
    };

    let calibrator = CalibratorServer::new(
        CalibratorService::new(registry, draining, options.stats.clone())
            .with_journal(options.journal.clone())
            .with_limits(options.limits),
    )
    .max_decoding_message_size(options.limits.max_message_bytes);
    // The calibrator is reached through the gateway, health and reflection through the router.
    let router = tonic::transport::Server::builder()
        .layer(GatewayLayer::new(calibrator, options.stats.clone()))
        .add_service(health)
        .add_service(reflection);
    let server = serve_on(router, listener, options.tls.clone(), stop);
    tokio::pin!(server);
    let grace = options.grace_period;
    tokio::select! {
        r = &mut server => return r.map_err(ServeError::from),
        _ = drain_rx => {}
    }
    match tokio::time::timeout(grace, &mut server).await {
        Ok(r) => r.map_err(ServeError::from),
        Err(_) => {
            // Long-lived streams (health watches, CalibrateStream) may never end by themselves;
            // the grace period is their notice, and stopping after it is the normal outcome.
            tracing::warn!(
                ?grace,
                "grace period over with streams still open; closing them"
            );
            Ok(())
        }
    }
}

/// Serves the admin plane (`candor.v1.MapControl`) until `shutdown` completes. With a token,
/// every call must carry it; the caller decides whether running without one is allowed (the CLI
/// allows it only on a loopback address).
///
/// # Errors
/// [`ServeError`] when the transport fails.
pub async fn run_admin(
    listener: TcpListener,
    registry: Arc<Registry>,
    token: Option<AdminToken>,
    shutdown: impl Future<Output = ()> + Send + 'static,
) -> Result<(), ServeError> {
    run_admin_with_tls(listener, registry, token, None, shutdown).await
}

/// [`run_admin`], over TLS (and mutual TLS) when `tls` is given.
///
/// # Errors
/// [`ServeError`] when the transport fails.
pub async fn run_admin_with_tls(
    listener: TcpListener,
    registry: Arc<Registry>,
    token: Option<AdminToken>,
    tls: Option<TlsReloader>,
    shutdown: impl Future<Output = ()> + Send + 'static,
) -> Result<(), ServeError> {
    let service = tonic::service::interceptor::InterceptedService::new(
        MapControlServer::new(MapControlService::new(registry))
            .max_decoding_message_size(MAX_PUSH_BYTES + 1024),
        check_token(token),
    );
    let router = tonic::transport::Server::builder().add_service(service);
    serve_on(router, listener, tls, shutdown)
        .await
        .map_err(ServeError::from)
}
