//! The closed loop: each worker sends one request, waits for its answer, records the round trip
//! and sends the next, until the end of the run. Unary workers make one Calibrate call per request;
//! stream workers keep one CalibrateStream open and time each message's round trip on it.

use super::verify::{verify, Expect, Reference, VerifyError};
use super::{LoadError, Mode, REQUEST_TIMEOUT};
use crate::proto::v1::calibrate_result::Outcome;
use crate::proto::v1::calibrator_client::CalibratorClient;
use crate::proto::v1::{CalibrateRequest, CalibrateResponse, CalibrateResult};
use hdrhistogram::Histogram;
use std::sync::Arc;
use tokio::sync::mpsc;
use tokio::time::{timeout, Instant};
use tokio_stream::wrappers::ReceiverStream;
use tonic::transport::Channel;
use tonic::Streaming;

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
    mut client: CalibratorClient<Channel>,
    requests: Arc<[CalibrateRequest]>,
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
struct OpenStream {
    outbox: mpsc::Sender<CalibrateRequest>,
    answers: Streaming<CalibrateResult>,
}

impl OpenStream {
    /// Opens a stream with `first` already queued (a server may hold back its response headers
    /// until it has read a message).
    async fn open(
        client: &mut CalibratorClient<Channel>,
        first: CalibrateRequest,
    ) -> Result<Self, String> {
        let (outbox, rx) = mpsc::channel(1);
        outbox
            .send(first)
            .await
            .map_err(|_| "the stream's outbox closed".to_owned())?;
        let call = client.calibrate_stream(ReceiverStream::new(rx));
        match timeout(REQUEST_TIMEOUT, call).await {
            Ok(Ok(r)) => Ok(OpenStream {
                outbox,
                answers: r.into_inner(),
            }),
            Ok(Err(status)) => Err(format!("CalibrateStream refused: {status}")),
            Err(_) => Err(format!(
                "CalibrateStream not opened within {REQUEST_TIMEOUT:?}"
            )),
        }
    }

    /// The answer to the message sent last.
    async fn answer(&mut self) -> Result<CalibrateResponse, String> {
        match timeout(REQUEST_TIMEOUT, self.answers.message()).await {
            Ok(Ok(Some(CalibrateResult {
                outcome: Some(Outcome::Response(r)),
            }))) => Ok(r),
            Ok(Ok(Some(CalibrateResult {
                outcome: Some(Outcome::Error(e)),
            }))) => Err(format!("row refused: code {}: {}", e.code, e.message)),
            Ok(Ok(Some(CalibrateResult { outcome: None }))) => Err("empty result".into()),
            Ok(Ok(None)) => Err("the server closed the stream".into()),
            Ok(Err(status)) => Err(format!("stream failed: {status}")),
            Err(_) => Err(format!("no answer within {REQUEST_TIMEOUT:?}")),
        }
    }

    async fn send(&mut self, req: CalibrateRequest) -> Result<(), String> {
        self.outbox
            .send(req)
            .await
            .map_err(|_| "the stream closed".to_owned())
    }
}

/// Runs one stream worker on one open stream, starting at payload `first`. A broken stream ends
/// the worker (its failure is counted).
pub(super) async fn stream(
    mut client: CalibratorClient<Channel>,
    requests: Arc<[CalibrateRequest]>,
    first: usize,
    clock: Clock,
) -> Result<Tally, LoadError> {
    let mut tally = Tally::new()?;
    let n = requests.len();
    let mut sent = Instant::now();
    let mut open = match OpenStream::open(&mut client, requests[first % n].clone()).await {
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

/// Sends every payload once (in the run's mode) and checks each answer; returns how many.
///
/// # Errors
/// [`LoadError::Refused`] or [`LoadError::Wrong`] naming the first payload that failed.
pub(super) async fn check_all(
    client: &mut CalibratorClient<Channel>,
    requests: &[CalibrateRequest],
    mode: Mode,
    classes: usize,
    expect: Expect,
    mut reference: Option<&mut Reference>,
) -> Result<usize, LoadError> {
    let wrong = |index: usize| move |source: VerifyError| LoadError::Wrong { index, source };
    let refused = |index: usize| move |reason: String| LoadError::Refused { index, reason };
    match mode {
        Mode::Unary => {
            for (index, req) in requests.iter().enumerate() {
                let resp = match timeout(REQUEST_TIMEOUT, client.calibrate(req.clone())).await {
                    Ok(Ok(r)) => r.into_inner(),
                    Ok(Err(status)) => return Err(refused(index)(status.to_string())),
                    Err(_) => {
                        return Err(refused(index)(format!(
                            "no answer within {REQUEST_TIMEOUT:?}"
                        )))
                    }
                };
                verify(
                    &resp,
                    &req.logits,
                    classes,
                    expect,
                    reference.as_deref_mut(),
                )
                .map_err(wrong(index))?;
            }
        }
        Mode::Stream => {
            let Some(first) = requests.first() else {
                return Ok(0);
            };
            let mut open = OpenStream::open(client, first.clone())
                .await
                .map_err(refused(0))?;
            for (index, req) in requests.iter().enumerate() {
                if index > 0 {
                    open.send(req.clone()).await.map_err(refused(index))?;
                }
                let resp = open.answer().await.map_err(refused(index))?;
                verify(
                    &resp,
                    &req.logits,
                    classes,
                    expect,
                    reference.as_deref_mut(),
                )
                .map_err(wrong(index))?;
            }
        }
    }
    Ok(requests.len())
}
