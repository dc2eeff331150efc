//! Limits of the data plane: message size, classes, batch rows, requests in flight, and the
//! client's deadline.
//!
//! The in-flight bound sheds load instead of queueing: a request that finds every slot taken is
//! answered RESOURCE_EXHAUSTED at once. Taking a slot is a compare-and-swap on a shared count
//! and giving it back one atomic subtraction (no lock, no waiting); a unary call borrows its slot,
//! a stream owns one until it ends or the client goes away.

use std::sync::atomic::{AtomicUsize, Ordering};
use std::sync::Arc;
use std::time::Duration;
use tonic::codegen::http;

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
    /// Slots taken.
    taken: Arc<AtomicUsize>,
    /// The bound (0: none).
    max: usize,
}

/// A slot borrowed for one call; given back when dropped.
#[derive(Debug)]
#[must_use = "the slot is given back as soon as it is dropped"]
pub struct Slot<'a>(Option<&'a AtomicUsize>);

/// A slot owned by a stream; given back when dropped.
#[derive(Debug)]
#[must_use = "the slot is given back as soon as it is dropped"]
pub struct OwnedSlot(Option<Arc<AtomicUsize>>);

impl Drop for Slot<'_> {
    fn drop(&mut self) {
        if let Some(taken) = self.0 {
            taken.fetch_sub(1, Ordering::Release);
        }
    }
}

impl Drop for OwnedSlot {
    fn drop(&mut self) {
        if let Some(taken) = &self.0 {
            taken.fetch_sub(1, Ordering::Release);
        }
    }
}

impl InFlight {
    /// At most `max` requests at once; 0 means no bound.
    pub fn new(max: usize) -> Self {
        InFlight {
            taken: Arc::new(AtomicUsize::new(0)),
            max,
        }
    }

    /// Takes a slot if one is free; false when all `max` are taken.
    #[inline]
    fn take(&self) -> bool {
        let mut now = self.taken.load(Ordering::Relaxed);
        loop {
            if now >= self.max {
                return false;
            }
            match self.taken.compare_exchange_weak(
                now,
                now + 1,
                Ordering::Acquire,
                Ordering::Relaxed,
            ) {
                Ok(_) => return true,
                Err(seen) => now = seen,
            }
        }
    }

    /// Takes a slot for the length of one call, without waiting.
    ///
    /// # Errors
    /// The bound, when every slot is taken.
    #[inline]
    pub fn try_enter(&self) -> Result<Slot<'_>, usize> {
        if self.max == 0 {
            return Ok(Slot(None));
        }
        if self.take() {
            Ok(Slot(Some(&self.taken)))
        } else {
            Err(self.max)
        }
    }

    /// Takes a slot a stream keeps until it is dropped, without waiting.
    ///
    /// # Errors
    /// The bound, when every slot is taken.
    pub fn try_enter_owned(&self) -> Result<OwnedSlot, usize> {
        if self.max == 0 {
            return Ok(OwnedSlot(None));
        }
        if self.take() {
            Ok(OwnedSlot(Some(self.taken.clone())))
        } else {
            Err(self.max)
        }
    }

    /// Slots taken now.
    pub fn taken(&self) -> usize {
        self.taken.load(Ordering::Relaxed)
    }
}

/// Most digits a `grpc-timeout` value may have (gRPC over HTTP/2: "TimeoutValue → {positive
/// integer as ASCII string of at most 8 digits}").
const GRPC_TIMEOUT_MAX_DIGITS: usize = 8;

/// The header carrying the client's deadline (gRPC over HTTP/2).
static GRPC_TIMEOUT: http::HeaderName = http::HeaderName::from_static("grpc-timeout");

/// The client's deadline from the `grpc-timeout` header, relative to now; None when absent
/// or malformed (a malformed header is ignored, as the transport ignores it).
pub fn client_timeout(headers: &http::HeaderMap) -> Option<Duration> {
    let text = headers.get(&GRPC_TIMEOUT)?.to_str().ok()?;
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

    fn with(v: &str) -> http::HeaderMap {
        let mut m = http::HeaderMap::new();
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
        assert_eq!(client_timeout(&http::HeaderMap::new()), None);
    }

    #[test]
    fn slots_are_shed_not_queued() {
        let f = InFlight::new(2);
        let a = f.try_enter().unwrap();
        let b = f.try_enter_owned().unwrap();
        assert_eq!(f.try_enter().unwrap_err(), 2);
        assert_eq!(f.try_enter_owned().unwrap_err(), 2);
        assert_eq!(f.taken(), 2);
        drop(a);
        assert_eq!(f.taken(), 1);
        let c = f.try_enter().unwrap();
        assert!(f.try_enter().is_err());
        drop((b, c));
        assert_eq!(f.taken(), 0);
        // A clone shares the slots.
        let g = f.clone();
        let _d = g.try_enter_owned().unwrap();
        let _e = f.try_enter().unwrap();
        assert!(g.try_enter().is_err());
        // No bound: every call enters, nothing is counted.
        let free = InFlight::new(0);
        let many: Vec<_> = (0..10).map(|_| free.try_enter().unwrap()).collect();
        assert_eq!(free.taken(), 0);
        drop(many);
    }

    #[test]
    fn slots_taken_from_many_threads_never_exceed_the_bound() {
        let f = InFlight::new(3);
        let peak = AtomicUsize::new(0);
        std::thread::scope(|s| {
            for _ in 0..4 {
                s.spawn(|| {
                    for _ in 0..20_000 {
                        if let Ok(slot) = f.try_enter() {
                            peak.fetch_max(f.taken(), Ordering::Relaxed);
                            drop(slot);
                        }
                    }
                });
            }
        });
        assert!(peak.load(Ordering::Relaxed) <= 3);
        assert_eq!(f.taken(), 0);
    }
}
