//! TLS and mutual TLS for the gRPC listeners (rustls with the ring provider), reloadable.
//!
//! [`TlsReloader`] holds the current rustls server configuration behind an [`ArcSwap`]: each
//! accepted connection takes the configuration current at that moment, so after
//! [`TlsReloader::reload`] new connections use the new files while open ones keep theirs. A
//! reload that fails (unreadable file, bad PEM, key not matching) keeps the previous
//! configuration.
//!
//! [`incoming`] turns a bound listener into a stream of finished TLS handshakes: every accepted
//! TCP connection gets TCP_NODELAY (see `server::incoming`) and its own handshake task, so a slow
//! or silent client cannot hold up the others.

use arc_swap::ArcSwap;
use std::path::{Path, PathBuf};
use std::sync::Arc;
use std::time::Duration;
use tokio::net::{TcpListener, TcpStream};
use tokio_rustls::rustls;
use tokio_rustls::rustls::pki_types::pem::PemObject;
use tokio_rustls::rustls::pki_types::{CertificateDer, PrivateKeyDer};
use tokio_rustls::server::TlsStream;
use tokio_stream::wrappers::ReceiverStream;

/// How long a client may take to finish the TLS handshake before its connection is closed.
pub const HANDSHAKE_TIMEOUT: Duration = Duration::from_secs(10);

/// Finished handshakes waiting for the server to take them.
const HANDSHAKES_QUEUED: usize = 64;

/// Pause after a failed `accept` (e.g. too many open files) before trying again.
const ACCEPT_RETRY: Duration = Duration::from_millis(50);

/// The PEM files of one listener's TLS configuration.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct TlsFiles {
    /// Certificate chain, leaf first.
    pub cert: PathBuf,
    /// Private key (PKCS#8, PKCS#1 or SEC1).
    pub key: PathBuf,
    /// Certificate authorities whose client certificates are accepted; when set, every client
    /// must present one (mutual TLS).
    pub client_ca: Option<PathBuf>,
}

/// Why a TLS configuration could not be built.
#[derive(Debug, thiserror::Error)]
pub enum TlsError {
    /// A PEM file could not be read or holds nothing usable.
    #[error("{path}: {reason}")]
    File {
        /// The file.
        path: PathBuf,
        /// What is wrong with it.
        reason: String,
    },
    /// rustls refused the combination (e.g. the key does not match the certificate).
    #[error("TLS configuration refused: {0}")]
    Config(String),
}

fn file_error(path: &Path, reason: impl std::fmt::Display) -> TlsError {
    TlsError::File {
        path: path.to_owned(),
        reason: reason.to_string(),
    }
}

fn certificates(path: &Path) -> Result<Vec<CertificateDer<'static>>, TlsError> {
    let certs = CertificateDer::pem_file_iter(path)
        .map_err(|e| file_error(path, e))?
        .collect::<Result<Vec<_>, _>>()
        .map_err(|e| file_error(path, e))?;
    if certs.is_empty() {
        return Err(file_error(path, "no PEM certificate found"));
    }
    Ok(certs)
}

/// Reads the files and builds a rustls server configuration offering HTTP/2.
///
/// # Errors
/// [`TlsError`] naming the file or the reason rustls gave.
pub fn load(files: &TlsFiles) -> Result<rustls::ServerConfig, TlsError> {
    let certs = certificates(&files.cert)?;
    let key = PrivateKeyDer::from_pem_file(&files.key).map_err(|e| file_error(&files.key, e))?;
    let provider = Arc::new(rustls::crypto::ring::default_provider());
    let builder = rustls::ServerConfig::builder_with_provider(provider.clone())
        .with_safe_default_protocol_versions()
        .map_err(|e| TlsError::Config(e.to_string()))?;
    let builder = match &files.client_ca {
        None => builder.with_no_client_auth(),
        Some(ca) => {
            let mut roots = rustls::RootCertStore::empty();
            for c in certificates(ca)? {
                roots.add(c).map_err(|e| file_error(ca, e))?;
            }
            let verifier =
                rustls::server::WebPkiClientVerifier::builder_with_provider(roots.into(), provider)
                    .build()
                    .map_err(|e| file_error(ca, e))?;
            builder.with_client_cert_verifier(verifier)
        }
    };
    let mut config = builder
        .with_single_cert(certs, key)
        .map_err(|e| TlsError::Config(e.to_string()))?;
    config.alpn_protocols = vec![b"h2".to_vec()];
    Ok(config)
}

/// A listener's TLS configuration, re-read from its files on demand; cloning shares it.
#[derive(Debug, Clone)]
pub struct TlsReloader {
    files: TlsFiles,
    current: Arc<ArcSwap<rustls::ServerConfig>>,
}

impl TlsReloader {
    /// Reads the files once.
    ///
    /// # Errors
    /// [`TlsError`] when they do not make a configuration.
    pub fn new(files: TlsFiles) -> Result<Self, TlsError> {
        let config = load(&files)?;
        Ok(TlsReloader {
            files,
            current: Arc::new(ArcSwap::from_pointee(config)),
        })
    }

    /// The files this configuration comes from.
    pub fn files(&self) -> &TlsFiles {
        &self.files
    }

    /// Re-reads the files; new connections use the result. On failure the previous
    /// configuration stays in use.
    ///
    /// # Errors
    /// [`TlsError`] when the new files do not make a configuration.
    pub fn reload(&self) -> Result<(), TlsError> {
        let config = load(&self.files)?;
        self.current.store(Arc::new(config));
        Ok(())
    }

    fn acceptor(&self) -> tokio_rustls::TlsAcceptor {
        tokio_rustls::TlsAcceptor::from(self.current.load_full())
    }
}

/// Accepted connections, each after its TLS handshake, with TCP_NODELAY set. Handshakes that
/// fail or take longer than [`HANDSHAKE_TIMEOUT`] are logged at debug and dropped. The accept
/// task ends when the stream is dropped.
pub fn incoming(
    listener: TcpListener,
    tls: TlsReloader,
) -> ReceiverStream<Result<TlsStream<TcpStream>, std::io::Error>> {
    // mpsc: handshake tasks hand finished connections to the server in any order.
    let (tx, rx) = tokio::sync::mpsc::channel(HANDSHAKES_QUEUED);
    tokio::spawn(async move {
        loop {
            let accepted = tokio::select! {
                a = listener.accept() => a,
                () = tx.closed() => return,
            };
            let (tcp, peer) = match accepted {
                Ok(a) => a,
                Err(e) => {
                    tracing::warn!(error = %e, "accepting a connection failed");
                    tokio::time::sleep(ACCEPT_RETRY).await;
                    continue;
                }
            };
            if let Err(e) = tcp.set_nodelay(true) {
                tracing::debug!(%peer, error = %e, "cannot set TCP_NODELAY");
            }
            let acceptor = tls.acceptor();
            let tx = tx.clone();
            tokio::spawn(async move {
                match tokio::time::timeout(HANDSHAKE_TIMEOUT, acceptor.accept(tcp)).await {
                    Ok(Ok(stream)) => {
                        let _ = tx.send(Ok(stream)).await;
                    }
                    Ok(Err(e)) => tracing::debug!(%peer, error = %e, "TLS handshake refused"),
                    Err(_) => tracing::debug!(%peer, "TLS handshake timed out"),
                }
            });
        }
    });
    ReceiverStream::new(rx)
}
