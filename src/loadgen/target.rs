//! Where the load goes: `HOST:PORT` (optionally written `http://HOST:PORT`), resolved once, and
//! refused unless every address it resolves to is loopback or the caller allows remote targets.
//!
//! A load generator pointed at the wrong address is a denial-of-service tool; the loopback rule
//! makes measuring someone else's server a deliberate choice.

use std::net::{SocketAddr, ToSocketAddrs};

/// Why a target address cannot be used.
#[derive(Debug, thiserror::Error)]
pub enum TargetError {
    /// Not `HOST:PORT`.
    #[error("--target {target:?}: {reason}")]
    Malformed {
        /// The text given.
        target: String,
        /// What is wrong with it.
        reason: String,
    },
    /// Name resolution failed or gave nothing.
    #[error("--target {target:?} does not resolve: {reason}")]
    Unresolved {
        /// The text given.
        target: String,
        /// The resolver's message.
        reason: String,
    },
    /// A non-loopback address without `--allow-remote`.
    #[error(
        "--target {target:?} resolves to {addr}, which is not a loopback address; \
         pass --allow-remote to load a server on another host"
    )]
    NotLoopback {
        /// The text given.
        target: String,
        /// The first non-loopback address it resolved to.
        addr: SocketAddr,
    },
}

/// Resolves `target` and returns the address to connect to (the first one resolved).
///
/// # Errors
/// [`TargetError`] when the text is not `HOST:PORT`, does not resolve, or resolves to any
/// non-loopback address while `allow_remote` is false.
pub fn resolve(target: &str, allow_remote: bool) -> Result<SocketAddr, TargetError> {
    let malformed = |reason: &str| TargetError::Malformed {
        target: target.to_owned(),
        reason: reason.to_owned(),
    };
    let bare = match target.split_once("://") {
        Some(("http", rest)) => rest,
        Some((scheme, _)) => {
            return Err(malformed(&format!(
                "scheme {scheme:?} is not supported; the sidecar speaks plaintext gRPC (http)"
            )))
        }
        None => target,
    };
    let bare = bare.strip_suffix('/').unwrap_or(bare);
    if bare.is_empty() || bare.contains('/') {
        return Err(malformed("expected HOST:PORT"));
    }
    let addrs: Vec<SocketAddr> = bare
        .to_socket_addrs()
        .map_err(|e| TargetError::Unresolved {
            target: target.to_owned(),
            reason: e.to_string(),
        })?
        .collect();
    let first = *addrs.first().ok_or_else(|| TargetError::Unresolved {
        target: target.to_owned(),
        reason: "no addresses".into(),
    })?;
    if !allow_remote {
        if let Some(addr) = addrs.iter().find(|a| !a.ip().to_canonical().is_loopback()) {
            return Err(TargetError::NotLoopback {
                target: target.to_owned(),
                addr: *addr,
            });
        }
    }
    Ok(first)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn loopback_forms_are_accepted() {
        for t in [
            "127.0.0.1:50551",
            "http://127.0.0.1:9/",
            "[::1]:7",
            "127.8.9.10:1",
        ] {
            let a = resolve(t, false).unwrap();
            assert!(a.ip().is_loopback(), "{t} -> {a}");
        }
        // IPv4 loopback written as an IPv4-mapped IPv6 address.
        assert!(resolve("[::ffff:127.0.0.1]:5", false).is_ok());
    }

    #[test]
    fn remote_needs_permission() {
        let err = resolve("192.0.2.1:50551", false).unwrap_err();
        assert!(matches!(err, TargetError::NotLoopback { .. }), "{err}");
        assert!(err.to_string().contains("--allow-remote"), "{err}");
        assert_eq!(
            resolve("192.0.2.1:50551", true).unwrap(),
            "192.0.2.1:50551".parse().unwrap()
        );
        assert!(resolve("[::ffff:192.0.2.1]:5", false).is_err());
    }

    #[test]
    fn malformed_targets_are_named() {
        for t in [
            "",
            "https://127.0.0.1:1",
            "127.0.0.1",
            "http://127.0.0.1:1/x",
        ] {
            let err = resolve(t, true).unwrap_err();
            assert!(err.to_string().contains(&format!("{t:?}")), "{err}");
        }
    }
}
