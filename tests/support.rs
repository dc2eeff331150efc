//! Shared set-up: maps built in code and a sidecar on an ephemeral loopback port.

use candor::decision::DecisionPolicy;
use candor::mapfile::{CalibrationMap, MapParts};
use candor::method::{InputForm, Isotonic, Method, OneVsRest, Temperature};
use candor::proto::v1::calibrator_client::CalibratorClient;
use candor::registry::Registry;
use candor::server::{run, ServeOptions};
use std::net::SocketAddr;
use std::path::{Path, PathBuf};
use std::process::Command;
use std::sync::Arc;
use tokio::sync::oneshot;
use tokio::task::JoinHandle;
use tonic::transport::Channel;

/// The real `candor` binary.
pub fn candor() -> Command {
    Command::new(env!("CARGO_BIN_EXE_candor"))
}

/// A path inside the repository.
pub fn repo(path: &str) -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join(path)
}

/// A map for `model` with `method`, K classes and a global threshold.
pub fn map(
    model: &str,
    classes: usize,
    input: InputForm,
    method: Method,
    threshold: f64,
) -> CalibrationMap {
    CalibrationMap::from_parts(MapParts {
        model: model.into(),
        map_version: format!("{model}-v1"),
        classes,
        class_names: None,
        input,
        method,
        policy: DecisionPolicy::global(threshold),
        provenance: serde_json::Map::new(),
    })
    .expect("test map is valid")
}

/// Temperature map, K = 3, T = 2, threshold 0.6.
pub fn temperature_map() -> CalibrationMap {
    let t = Temperature::try_new(2.0, "t").unwrap();
    map("triage", 3, InputForm::Logits, Method::Temperature(t), 0.6)
}

/// Isotonic map on one binary score, threshold 0.8.
pub fn binary_isotonic_map() -> CalibrationMap {
    let iso = Isotonic::try_new(vec![0.1, 0.5, 0.9], vec![0.05, 0.5, 0.97], "m").unwrap();
    map(
        "spam",
        2,
        InputForm::BinaryScore,
        Method::Isotonic(OneVsRest::try_new(2, vec![iso], "m").unwrap()),
        0.8,
    )
}

/// A sidecar running in this process.
pub struct Sidecar {
    pub addr: SocketAddr,
    pub registry: Arc<Registry>,
    stop: Option<oneshot::Sender<()>>,
    handle: JoinHandle<Result<(), candor::server::ServeError>>,
}

impl Sidecar {
    /// Starts a server on 127.0.0.1:0 with an empty, not-ready registry.
    pub async fn start() -> Sidecar {
        Self::serving(Registry::new()).await
    }

    /// Starts a server on 127.0.0.1:0 answering from `registry`.
    pub async fn serving(registry: Arc<Registry>) -> Sidecar {
        let listener = tokio::net::TcpListener::bind("127.0.0.1:0").await.unwrap();
        let addr = listener.local_addr().unwrap();
        let (tx, rx) = oneshot::channel::<()>();
        let handle = tokio::spawn(run(
            listener,
            registry.clone(),
            ServeOptions::default(),
            async {
                let _ = rx.await;
            },
        ));
        Sidecar {
            addr,
            registry,
            stop: Some(tx),
            handle,
        }
    }

    /// Starts a server and publishes `maps` as ready.
    pub async fn with_maps(maps: Vec<CalibrationMap>) -> Sidecar {
        let s = Self::start().await;
        s.registry.publish(maps);
        s.registry.mark_ready();
        s
    }

    /// A connected channel.
    pub async fn channel(&self) -> Channel {
        Channel::from_shared(format!("http://{}", self.addr))
            .unwrap()
            .connect()
            .await
            .unwrap()
    }

    /// A connected data-plane client.
    pub async fn client(&self) -> CalibratorClient<Channel> {
        CalibratorClient::new(self.channel().await)
    }

    /// Signals shutdown without waiting.
    pub fn begin_stop(&mut self) {
        if let Some(tx) = self.stop.take() {
            let _ = tx.send(());
        }
    }

    /// Signals shutdown and waits for the server to finish cleanly.
    pub async fn stop(mut self) {
        self.begin_stop();
        self.handle.await.unwrap().unwrap();
    }
}

/// The admin plane of a registry, running in this process on 127.0.0.1:0.
pub struct AdminPlane {
    pub addr: SocketAddr,
    stop: Option<oneshot::Sender<()>>,
    handle: JoinHandle<Result<(), candor::server::ServeError>>,
}

impl AdminPlane {
    /// Starts MapControl for `registry`, requiring `token` when given.
    pub async fn start(registry: Arc<Registry>, token: Option<&str>) -> AdminPlane {
        let listener = tokio::net::TcpListener::bind("127.0.0.1:0").await.unwrap();
        let addr = listener.local_addr().unwrap();
        let (tx, rx) = oneshot::channel::<()>();
        let token = token.map(|t| candor::service::AdminToken::try_new(t).unwrap());
        let handle = tokio::spawn(candor::server::run_admin(
            listener,
            registry,
            token,
            async {
                let _ = rx.await;
            },
        ));
        AdminPlane {
            addr,
            stop: Some(tx),
            handle,
        }
    }

    /// A connected MapControl client.
    pub async fn client(&self) -> candor::proto::v1::map_control_client::MapControlClient<Channel> {
        candor::proto::v1::map_control_client::MapControlClient::connect(format!(
            "http://{}",
            self.addr
        ))
        .await
        .unwrap()
    }

    /// Stops the admin plane and waits for it.
    pub async fn stop(mut self) {
        if let Some(tx) = self.stop.take() {
            let _ = tx.send(());
        }
        self.handle.await.unwrap().unwrap();
    }
}

/// A temperature map of `model` with K classes, version `version`, threshold 0.6.
pub fn versioned_map(model: &str, version: &str, classes: usize, t: f64) -> CalibrationMap {
    CalibrationMap::from_parts(MapParts {
        model: model.into(),
        map_version: version.into(),
        classes,
        class_names: None,
        input: InputForm::Logits,
        method: Method::Temperature(Temperature::try_new(t, "t").unwrap()),
        policy: DecisionPolicy::global(0.6),
        provenance: serde_json::Map::new(),
    })
    .expect("test map is valid")
}

/// Writes `bytes` to `path` the way a careful tool does: a hidden temporary file, renamed over.
pub fn write_atomically(path: &Path, bytes: &[u8]) {
    std::fs::create_dir_all(path.parent().unwrap()).unwrap();
    let tmp = path.with_file_name(format!(
        ".tmp-{}",
        path.file_name().unwrap().to_string_lossy()
    ));
    std::fs::write(&tmp, bytes).unwrap();
    std::fs::rename(&tmp, path).unwrap();
}

/// Waits (bounded) until `registry` has published a snapshot in which `model`'s active version
/// is `version`; returns false on timeout.
pub async fn wait_for_active(
    registry: &Registry,
    model: &str,
    version: &str,
    timeout: std::time::Duration,
) -> bool {
    let mut gens = registry.generations();
    let check = || {
        registry.with_snapshot(|s| {
            s.get(model)
                .is_ok_and(|r| r.active().map.map_version() == version)
        })
    };
    tokio::time::timeout(timeout, async {
        loop {
            if check() {
                return;
            }
            if gens.changed().await.is_err() {
                return;
            }
        }
    })
    .await
    .is_ok()
        && check()
}

/// A plain HTTP/1.1 GET over loopback: (status code, body).
pub fn http_get(addr: &str, path: &str) -> (u16, String) {
    use std::io::{Read, Write};
    let mut s = std::net::TcpStream::connect(addr).unwrap();
    write!(
        s,
        "GET {path} HTTP/1.1\r\nHost: {addr}\r\nConnection: close\r\n\r\n"
    )
    .unwrap();
    let mut text = String::new();
    s.read_to_string(&mut text).unwrap();
    let status = text
        .split_whitespace()
        .nth(1)
        .and_then(|c| c.parse().ok())
        .unwrap_or(0);
    let body = text
        .split_once("\r\n\r\n")
        .map(|(_, b)| b.to_owned())
        .unwrap_or_default();
    (status, body)
}

/// The value of one series in a Prometheus text exposition, by its exact name and labels as
/// written (e.g. `candor_requests_total{model="m",map_version="v1",decision="accept"}`).
pub fn series(exposition: &str, name_and_labels: &str) -> Option<f64> {
    exposition.lines().find_map(|l| {
        let (key, value) = l.rsplit_once(' ')?;
        (key == name_and_labels).then(|| value.parse().ok())?
    })
}

/// Connects to `addr` and waits until its health service reports the data plane SERVING
/// (event-driven: a health Watch stream, no polling).
pub async fn connect_when_serving(addr: &str) -> Channel {
    use tonic_health::pb::health_check_response::ServingStatus;
    let channel = Channel::from_shared(format!("http://{addr}"))
        .unwrap()
        .connect()
        .await
        .unwrap();
    let mut health = tonic_health::pb::health_client::HealthClient::new(channel.clone());
    let mut watch = health
        .watch(tonic_health::pb::HealthCheckRequest {
            service: "candor.v1.Calibrator".into(),
        })
        .await
        .unwrap()
        .into_inner();
    while watch.message().await.unwrap().unwrap().status != ServingStatus::Serving as i32 {}
    channel
}

/// Sends `signal` (e.g. "-TERM") to a child process.
pub fn signal(child: &std::process::Child, signal: &str) {
    let status = Command::new("kill")
        .args([signal, &child.id().to_string()])
        .status()
        .unwrap();
    assert!(status.success());
}

/// Sends SIGTERM and waits, off the runtime, for the exit code.
pub async fn terminate(mut child: std::process::Child) -> Option<i32> {
    signal(&child, "-TERM");
    // Wait off the runtime so the client's connection task can answer the server's GOAWAY.
    tokio::task::spawn_blocking(move || child.wait())
        .await
        .unwrap()
        .unwrap()
        .code()
}
