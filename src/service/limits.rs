//! Limits of the data plane: message size, classes, batch rows, requests in flight, and the
//! client's deadline.
//!
//! The in-flight bound sheds load instead of queueing: a request that finds every slot taken is
//! answered RESOURCE_EXHAUSTED at once. Taking a slot is one `Semaphore::try_acquire_owned`
//! (a compare-and-swap on the permit count, no lock, no waiting); a stream holds its slot until
//! it ends or the client goes away.

use std::sync::Arc;
use std::time::Duration;
use tokio::sync::{OwnedSemaphorePermit, Semaphore};

/// Default largest encoded request message, bytes (gRPC's customary 4 MiB).
pub const DEFAULT_MAX_MESSAGE_BYTES: usize = 4 * 1024 * 1024;
/// Default largest number of classes of a map, and of logits in a request.
pub const DEFAULT_MAX_CLASSES: usize = 100_000;
/// Default largest number of requests (a stream counts as one) answered at the same time.
pub const DEFAULT_MAX_CONCURRENT_REQUESTS: usize = 1024;

/// The limits of one data plane.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Limits {
    /// Largest encoded request message, bytes.
    pub max_message_bytes: usize,
    /// Largest number of logits in a request (maps with more classes are refused at load by the
    /// registry, which has its own copy of this limit).
    pub max_classes: usize,
    /// Largest number of rows in one CalibrateBatch request.
    pub max_batch: usize,
    /// Largest number of requests in flight; 0 means no bound.
    pub max_concurrent_requests: usize,
}

impl Default for Limits {
    fn default() -> Self {
        Limits {
            max_message_bytes: DEFAULT_MAX_MESSAGE_BYTES,
            max_classes: DEFAULT_MAX_CLASSES,
            max_batch: super::MAX_BATCH_ROWS,
            max_concurrent_requests: DEFAULT_MAX_CONCURRENT_REQUESTS,
        }
    }
}

/// Slots for requests in flight; cloning shares them.
#[derive(Debug, Clone)]
pub struct InFlight {
    /// None: no bound.
    slots: Option<Arc<Semaphore>>,
    /// The bound (0: none).
    max: usize,
}

impl InFlight {
    /// At most `max` requests at once; 0 means no bound.
    pub fn new(max: usize) -> Self {
        InFlight {
            slots: (max > 0).then(|| Arc::new(Semaphore::new(max.min(Semaphore::MAX_PERMITS)))),
            max,
        }
    }

    /// Takes a slot without waiting: `Err(limit)` when every slot is taken.
    ///
    /// # Errors
    /// The bound, when it is reached.
    #[inline]
    pub fn try_enter(&self) -> Result<Option<OwnedSemaphorePermit>, usize> {
        match &self.slots {
            None => Ok(None),
            Some(s) => s
                .clone()
                .try_acquire_owned()
                .map(Some)
                .map_err(|_| self.max),
        }
    }
}

/// An interceptor answering DEADLINE_EXCEEDED, counted in `stats`, to a request whose client
/// deadline has already passed (`grpc-timeout` of zero), before its message is read.
///
/// It runs when the call starts, inside the transport's own deadline timer: that timer answers
/// CANCELLED ("Timeout expired") when it fires while a handler is still waiting, e.g. for the
/// request body, so a passed deadline must be refused before any waiting.
pub fn deadline_check(
    stats: Arc<crate::telemetry::RpcStats>,
) -> impl FnMut(tonic::Request<()>) -> Result<tonic::Request<()>, tonic::Status> + Clone {
    move |req: tonic::Request<()>| {
        if client_timeout(req.metadata()) == Some(Duration::ZERO) {
            stats.error(tonic::Code::DeadlineExceeded);
            return Err(super::status::deadline_passed(Duration::ZERO));
        }
        Ok(req)
    }
}

/// Most digits a `grpc-timeout` value may have (gRPC over HTTP/2: "TimeoutValue → {positive
/// integer as ASCII string of at most 8 digits}").
const GRPC_TIMEOUT_MAX_DIGITS: usize = 8;

/// The client's deadline from the `grpc-timeout` metadata, relative to now; None when absent
/// or malformed (a malformed header is ignored, as the transport ignores it).
pub fn client_timeout(metadata: &tonic::metadata::MetadataMap) -> Option<Duration> {
    let text = metadata.get("grpc-timeout")?.to_str().ok()?;
    let digits = text.get(..text.len().checked_sub(1)?)?;
    if digits.is_empty()
        || digits.len() > GRPC_TIMEOUT_MAX_DIGITS
        || !digits.bytes().all(|b| b.is_ascii_digit())
    {
        return None;
    }
    let n: u64 = digits.parse().ok()?;
    Some(match text.as_bytes().last()? {
        b'H' => Duration::from_secs(n.saturating_mul(3600)),
        b'M' => Duration::from_secs(n.saturating_mul(60)),
        b'S' => Duration::from_secs(n),
        b'm' => Duration::from_millis(n),
        b'u' => Duration::from_micros(n),
        b'n' => Duration::from_nanos(n),
        _ => return None,
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    fn with(v: &str) -> tonic::metadata::MetadataMap {
        let mut m = tonic::metadata::MetadataMap::new();
        m.insert("grpc-timeout", v.parse().unwrap());
        m
    }

    #[test]
    fn grpc_timeout_units_and_malformed_values() {
        assert_eq!(client_timeout(&with("2S")), Some(Duration::from_secs(2)));
        assert_eq!(client_timeout(&with("1H")), Some(Duration::from_secs(3600)));
        assert_eq!(
            client_timeout(&with("250m")),
            Some(Duration::from_millis(250))
        );
        assert_eq!(client_timeout(&with("0n")), Some(Duration::ZERO));
        assert_eq!(client_timeout(&with("123456789S")), None);
        assert_eq!(client_timeout(&with("5x")), None);
        assert_eq!(client_timeout(&with("S")), None);
        assert_eq!(client_timeout(&tonic::metadata::MetadataMap::new()), None);
    }

    #[test]
    fn slots_are_shed_not_queued() {
        let f = InFlight::new(2);
        let a = f.try_enter().unwrap();
        let _b = f.try_enter().unwrap();
        assert!(f.try_enter().is_err());
        drop(a);
        assert!(f.try_enter().is_ok());
        assert!(InFlight::new(0).try_enter().unwrap().is_none());
    }
}
