//! The closed loop: each worker sends one request, waits for its answer, records the round trip
//! and sends the next, until the end of the run. Unary workers make one Calibrate call per request;
//! stream workers keep one CalibrateStream open and time each message's round trip on it.

use super::wire::{Encoded, LeanClient, StreamAnswer};
use super::{LoadError, REQUEST_TIMEOUT};
use hdrhistogram::Histogram;
use std::sync::Arc;
use tokio::sync::mpsc;
use tokio::time::{timeout, Instant};
use tokio_stream::wrappers::ReceiverStream;
use tonic::codec::Streaming;

/// Significant decimal digits the latency histogram keeps (0.1% resolution).
pub const HISTOGRAM_SIGNIFICANT_DIGITS: u8 = 3;

/// When a worker's requests count: sent at or after `window_start`; none is sent after `end`.
#[derive(Debug, Clone, Copy)]
pub(super) struct Clock {
    pub window_start: Instant,
    pub end: Instant,
}

/// One worker's results.
#[derive(Debug)]
pub(super) struct Tally {
    /// Round trips of requests sent inside the window, in nanoseconds.
    pub latency_ns: Histogram<u64>,
    /// Failed requests (refused, wrong outcome, timed out), warm-up included.
    pub errors: u64,
    /// The first failure's description.
    pub first_error: Option<String>,
}

impl Tally {
    fn new() -> Result<Self, LoadError> {
        Ok(Tally {
            latency_ns: Histogram::new(HISTOGRAM_SIGNIFICANT_DIGITS)
                .map_err(|e| LoadError::Histogram(e.to_string()))?,
            errors: 0,
            first_error: None,
        })
    }

    fn fail(&mut self, what: impl FnOnce() -> String) {
        self.errors += 1;
        if self.first_error.is_none() {
            self.first_error = Some(what());
        }
    }

    fn done(&mut self, sent: Instant, clock: &Clock) {
        if sent >= clock.window_start {
            let ns = u64::try_from(sent.elapsed().as_nanos()).unwrap_or(u64::MAX);
            // The histogram grows to the largest value recorded; should growing fail, the value
            // is clamped to the largest it can hold.
            if self.latency_ns.record(ns).is_err() {
                self.latency_ns.saturating_record(ns);
            }
        }
    }
}

/// Runs one unary worker, starting at payload `first`.
pub(super) async fn unary(
    mut client: LeanClient,
    requests: Arc<[Encoded]>,
    first: usize,
    clock: Clock,
) -> Result<Tally, LoadError> {
    let mut tally = Tally::new()?;
    let mut i = first;
    while Instant::now() < clock.end {
        let req = requests[i % requests.len()].clone();
        i += 1;
        let sent = Instant::now();
        match timeout(REQUEST_TIMEOUT, client.calibrate(req)).await {
            Ok(Ok(_)) => tally.done(sent, &clock),
            Ok(Err(status)) => tally.fail(|| format!("Calibrate refused: {status}")),
            Err(_) => tally.fail(|| format!("no answer within {REQUEST_TIMEOUT:?}")),
        }
    }
    Ok(tally)
}

/// An open CalibrateStream: a one-slot outbox and the answers.
struct LeanStream {
    outbox: mpsc::Sender<Encoded>,
    answers: Streaming<StreamAnswer>,
}

impl LeanStream {
    /// Opens a stream with `first` already queued (a server may hold back its response headers
    /// until it has read a message).
    async fn open(client: &mut LeanClient, first: Encoded) -> Result<Self, String> {
        let (outbox, rx) = mpsc::channel(1);
        outbox
            .send(first)
            .await
            .map_err(|_| "the stream's outbox closed".to_owned())?;
        match timeout(
            REQUEST_TIMEOUT,
            client.calibrate_stream(ReceiverStream::new(rx)),
        )
        .await
        {
            Ok(Ok(answers)) => Ok(LeanStream { outbox, answers }),
            Ok(Err(status)) => Err(format!("CalibrateStream refused: {status}")),
            Err(_) => Err(format!(
                "CalibrateStream not opened within {REQUEST_TIMEOUT:?}"
            )),
        }
    }

    /// Waits for the answer to the message sent last.
    async fn answer(&mut self) -> Result<(), String> {
        match timeout(REQUEST_TIMEOUT, self.answers.message()).await {
            Ok(Ok(Some(StreamAnswer { error: None }))) => Ok(()),
            Ok(Ok(Some(StreamAnswer { error: Some(e) }))) => {
                Err(format!("row refused: code {}: {}", e.code, e.message))
            }
            Ok(Ok(None)) => Err("the server closed the stream".into()),
            Ok(Err(status)) => Err(format!("stream failed: {status}")),
            Err(_) => Err(format!("no answer within {REQUEST_TIMEOUT:?}")),
        }
    }

    async fn send(&mut self, req: Encoded) -> Result<(), String> {
        self.outbox
            .send(req)
            .await
            .map_err(|_| "the stream closed".to_owned())
    }
}

/// Runs one stream worker on one open stream, starting at payload `first`. A broken stream ends
/// the worker (its failure is counted).
pub(super) async fn stream(
    mut client: LeanClient,
    requests: Arc<[Encoded]>,
    first: usize,
    clock: Clock,
) -> Result<Tally, LoadError> {
    let mut tally = Tally::new()?;
    let n = requests.len();
    let mut sent = Instant::now();
    let mut open = match LeanStream::open(&mut client, requests[first % n].clone()).await {
        Ok(s) => s,
        Err(e) => {
            tally.fail(|| e);
            return Ok(tally);
        }
    };
    let mut i = first + 1;
    loop {
        if let Err(e) = open.answer().await {
            tally.fail(|| e);
            break;
        }
        tally.done(sent, &clock);
        if Instant::now() >= clock.end {
            break;
        }
        sent = Instant::now();
        if let Err(e) = open.send(requests[i % n].clone()).await {
            tally.fail(|| e);
            break;
        }
        i += 1;
    }
    Ok(tally)
}
