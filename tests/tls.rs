//! TLS and mutual TLS on the gRPC listeners, with certificates made here (rcgen): a client
//! trusting the CA gets answers; under mutual TLS a client without a certificate, or with one
//! from another CA, is refused; after the files are replaced and SIGHUP sent to the real binary,
//! new connections see the new certificate, and a bad replacement keeps the old one.

use crate::support::{candor, signal, temperature_map, terminate};
use candor::proto::v1::calibrator_client::CalibratorClient;
use candor::proto::v1::map_control_client::MapControlClient;
use candor::proto::v1::{CalibrateRequest, ListModelsRequest};
use candor::registry::Registry;
use candor::server::{run, run_admin_with_tls, ServeOptions};
use candor::tls::{TlsFiles, TlsReloader};
use rcgen::{
    BasicConstraints, CertificateParams, DnType, ExtendedKeyUsagePurpose, IsCa, Issuer, KeyPair,
};
use std::io::{BufRead, BufReader};
use std::net::SocketAddr;
use std::path::{Path, PathBuf};
use std::process::Stdio;
use tonic::transport::{Certificate, Channel, ClientTlsConfig, Identity};

/// A certificate authority made for one test.
struct Ca {
    pem: String,
    issuer: Issuer<'static, KeyPair>,
}

/// A certificate and its key, PEM.
struct Leaf {
    cert: String,
    key: String,
}

impl Ca {
    fn new(name: &str) -> Ca {
        let mut p = CertificateParams::new(Vec::<String>::new()).unwrap();
        p.is_ca = IsCa::Ca(BasicConstraints::Unconstrained);
        p.distinguished_name.push(DnType::CommonName, name);
        let key = KeyPair::generate().unwrap();
        let pem = p.self_signed(&key).unwrap().pem();
        Ca {
            pem,
            issuer: Issuer::new(p, key),
        }
    }

    /// A server certificate for "localhost" or a client certificate for `name`.
    fn leaf(&self, name: &str, server: bool) -> Leaf {
        let mut p = CertificateParams::new(vec![name.to_owned()]).unwrap();
        p.distinguished_name.push(DnType::CommonName, name);
        p.extended_key_usages = vec![if server {
            ExtendedKeyUsagePurpose::ServerAuth
        } else {
            ExtendedKeyUsagePurpose::ClientAuth
        }];
        let key = KeyPair::generate().unwrap();
        let cert = p.signed_by(&key, &self.issuer).unwrap().pem();
        Leaf {
            cert,
            key: key.serialize_pem(),
        }
    }
}

/// Writes the server's files into `dir` and returns their paths.
fn write_files(dir: &Path, server: &Leaf, client_ca: Option<&Ca>) -> TlsFiles {
    let files = TlsFiles {
        cert: dir.join("server.crt"),
        key: dir.join("server.key"),
        client_ca: client_ca.map(|_| dir.join("clients-ca.crt")),
    };
    std::fs::write(&files.cert, &server.cert).unwrap();
    std::fs::write(&files.key, &server.key).unwrap();
    if let (Some(path), Some(ca)) = (&files.client_ca, client_ca) {
        std::fs::write(path, &ca.pem).unwrap();
    }
    files
}

/// A TLS channel to `addr` trusting `ca`, presenting `identity` if given.
async fn tls_channel(
    addr: &str,
    ca: &Ca,
    identity: Option<&Leaf>,
) -> Result<Channel, tonic::transport::Error> {
    let mut tls = ClientTlsConfig::new()
        .ca_certificate(Certificate::from_pem(&ca.pem))
        .domain_name("localhost");
    if let Some(id) = identity {
        tls = tls.identity(Identity::from_pem(&id.cert, &id.key));
    }
    Channel::from_shared(format!("https://{addr}"))
        .unwrap()
        .tls_config(tls)?
        .connect()
        .await
}

/// Whether one Calibrate over a fresh connection is answered; the error text otherwise.
async fn answered(addr: &str, ca: &Ca, identity: Option<&Leaf>) -> Result<(), String> {
    let channel = tls_channel(addr, ca, identity)
        .await
        .map_err(|e| format!("connect: {e:?}"))?;
    CalibratorClient::new(channel)
        .calibrate(CalibrateRequest {
            model: "triage".into(),
            logits: vec![4.0, 0.0, 0.0],
            request_id: "t".into(),
            ..CalibrateRequest::default()
        })
        .await
        .map(|r| assert_eq!(r.into_inner().predicted_class, 0))
        .map_err(|e| format!("call: {e:?}"))
}

/// A data plane over TLS on a loopback port; it stops when the sender is dropped.
async fn start(files: TlsFiles) -> (SocketAddr, tokio::sync::oneshot::Sender<()>) {
    let registry = Registry::new();
    registry.publish(vec![temperature_map()]);
    registry.mark_ready();
    let listener = tokio::net::TcpListener::bind("127.0.0.1:0").await.unwrap();
    let addr = listener.local_addr().unwrap();
    let (tx, rx) = tokio::sync::oneshot::channel::<()>();
    let options = ServeOptions {
        tls: Some(TlsReloader::new(files).unwrap()),
        ..ServeOptions::default()
    };
    tokio::spawn(run(listener, registry, options, async {
        let _ = rx.await;
    }));
    (addr, tx)
}

#[tokio::test]
async fn a_client_trusting_the_ca_gets_answers_and_plaintext_is_refused() {
    let dir = tempfile::tempdir().unwrap();
    let ca = Ca::new("candor test CA");
    let files = write_files(dir.path(), &ca.leaf("localhost", true), None);
    let (addr, _stop) = start(files).await;
    let addr = addr.to_string();
    answered(&addr, &ca, None).await.unwrap();
    // A client that does not trust the CA refuses the server.
    assert!(answered(&addr, &Ca::new("other CA"), None).await.is_err());
    // A plaintext client gets no answer.
    let plain = async {
        let ch = Channel::from_shared(format!("http://{addr}"))
            .unwrap()
            .connect()
            .await
            .map_err(|e| e.to_string())?;
        CalibratorClient::new(ch)
            .calibrate(CalibrateRequest::default())
            .await
            .map_err(|e| e.to_string())
    };
    assert!(plain.await.is_err());
}

#[tokio::test]
async fn under_mutual_tls_only_clients_with_a_certificate_from_the_client_ca_are_answered() {
    let dir = tempfile::tempdir().unwrap();
    let server_ca = Ca::new("server CA");
    let client_ca = Ca::new("client CA");
    let stranger_ca = Ca::new("stranger CA");
    let files = write_files(
        dir.path(),
        &server_ca.leaf("localhost", true),
        Some(&client_ca),
    );
    let (addr, _stop) = start(files).await;
    let addr = addr.to_string();

    let good = client_ca.leaf("model-server", false);
    answered(&addr, &server_ca, Some(&good)).await.unwrap();
    let none = answered(&addr, &server_ca, None).await;
    assert!(none.is_err(), "a client without a certificate was answered");
    let stranger = stranger_ca.leaf("model-server", false);
    let other = answered(&addr, &server_ca, Some(&stranger)).await;
    assert!(other.is_err(), "a certificate from another CA was accepted");
    // The refusals did not disturb the server.
    answered(&addr, &server_ca, Some(&good)).await.unwrap();
}

#[tokio::test]
async fn the_admin_listener_takes_the_same_tls_configuration() {
    let dir = tempfile::tempdir().unwrap();
    let ca = Ca::new("candor test CA");
    let files = write_files(dir.path(), &ca.leaf("localhost", true), Some(&ca));
    let listener = tokio::net::TcpListener::bind("127.0.0.1:0").await.unwrap();
    let addr = listener.local_addr().unwrap().to_string();
    let (_stop, rx) = tokio::sync::oneshot::channel::<()>();
    tokio::spawn(run_admin_with_tls(
        listener,
        Registry::new(),
        None,
        Some(TlsReloader::new(files).unwrap()),
        async {
            let _ = rx.await;
        },
    ));
    let list = |channel: Channel| async move {
        MapControlClient::new(channel)
            .list_models(ListModelsRequest::default())
            .await
    };
    let me = ca.leaf("operator", false);
    let ch = tls_channel(&addr, &ca, Some(&me)).await.unwrap();
    assert!(list(ch).await.is_ok());
    let refused = match tls_channel(&addr, &ca, None).await {
        Ok(ch) => list(ch).await.is_err(),
        Err(_) => true,
    };
    assert!(
        refused,
        "the admin listener answered a client without a certificate"
    );
}

/// Log lines of a running `candor serve`, as parsed JSON, read by a thread.
struct Logs(std::sync::mpsc::Receiver<serde_json::Value>);

impl Logs {
    /// Waits for the next line whose message is `message` and returns it.
    fn wait_for(&self, message: &str) -> serde_json::Value {
        loop {
            let v = self
                .0
                .recv()
                .unwrap_or_else(|_| panic!("serve exited before logging {message:?}"));
            if v["fields"]["message"] == message {
                return v;
            }
        }
    }
}

fn replace(path: &PathBuf, text: &str) {
    std::fs::write(path, text).unwrap();
}

#[tokio::test]
async fn sighup_rereads_the_files_and_a_bad_replacement_keeps_the_old_configuration() {
    let dir = tempfile::tempdir().unwrap();
    let maps = dir.path().join("maps");
    std::fs::create_dir(&maps).unwrap();
    std::fs::write(maps.join("triage.json"), temperature_map().to_json()).unwrap();
    let first_ca = Ca::new("first CA");
    let files = write_files(dir.path(), &first_ca.leaf("localhost", true), None);
    let mut child = candor()
        .args(["serve", "--listen", "127.0.0.1:0", "--admin-listen", "off"])
        .args(["--log-format", "json", "--no-file-events", "--maps"])
        .arg(&maps)
        .arg("--tls-cert")
        .arg(&files.cert)
        .arg("--tls-key")
        .arg(&files.key)
        .stderr(Stdio::piped())
        .spawn()
        .unwrap();
    let stderr = child.stderr.take().unwrap();
    let (tx, rx) = std::sync::mpsc::channel();
    std::thread::spawn(move || {
        for line in BufReader::new(stderr).lines().map_while(Result::ok) {
            if let Ok(v) = serde_json::from_str::<serde_json::Value>(&line) {
                if tx.send(v).is_err() {
                    return;
                }
            }
        }
    });
    let logs = Logs(rx);
    let listening = logs.wait_for("listening");
    assert_eq!(listening["fields"]["tls"], true);
    let addr = listening["fields"]["addr"].as_str().unwrap().to_owned();
    answered(&addr, &first_ca, None).await.unwrap();

    // New certificate from another CA: after SIGHUP, new connections present it.
    let second_ca = Ca::new("second CA");
    let second = second_ca.leaf("localhost", true);
    replace(&files.cert, &second.cert);
    replace(&files.key, &second.key);
    signal(&child, "-HUP");
    logs.wait_for("TLS configuration reloaded; new connections use it");
    answered(&addr, &second_ca, None).await.unwrap();
    assert!(
        answered(&addr, &first_ca, None).await.is_err(),
        "a new connection still saw the first certificate"
    );

    // A broken certificate file: the reload fails, says why, and the second configuration stays.
    replace(&files.cert, "not a certificate\n");
    signal(&child, "-HUP");
    let failed = logs.wait_for("TLS reload failed; the previous TLS configuration stays in use");
    let reason = failed["fields"]["reason"].as_str().unwrap();
    assert!(reason.contains("server.crt"), "{reason}");
    answered(&addr, &second_ca, None).await.unwrap();

    assert_eq!(terminate(child).await, Some(0));
}
