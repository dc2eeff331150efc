//! The gRPC services: the data plane (`candor.v1.Calibrator`) and the admin plane
//! (`candor.v1.MapControl`).

mod admin;
mod gateway;
mod limits;
mod row;
mod status;

pub use admin::{check_token, model_status, AdminToken, MapControlService, MAX_PUSH_BYTES};
pub use gateway::{Gateway, GatewayFuture, GatewayLayer};
pub use limits::{
    client_timeout, InFlight, Limits, OwnedSlot, Slot, DEFAULT_MAX_CLASSES,
    DEFAULT_MAX_CONCURRENT_REQUESTS, DEFAULT_MAX_MESSAGE_BYTES,
};
pub use row::{answer, answer_by, RowError};

use crate::journal::{Decided, DecisionLog, OutcomeError};
use crate::proto::v1::calibrator_server::Calibrator;
use crate::proto::v1::{
    calibrate_result::Outcome, CalibrateBatchRequest, CalibrateBatchResponse, CalibrateRequest,
    CalibrateResponse, CalibrateResult, DecisionCount, GetDecisionCountsRequest,
    GetDecisionCountsResponse, ListMapsRequest, ListMapsResponse, MapInfo,
};
use crate::proto::v1::{outcome_result, OutcomeRequest, OutcomeResponse, OutcomeResult};
use crate::registry::{Registry, Snapshot};
use crate::telemetry::RpcStats;
use std::future::Future;
use std::pin::Pin;
use std::sync::Arc;
use std::task::{Context, Poll};
use std::time::Duration;
use std::time::Instant;
use tokio::sync::watch;
use tokio_stream::{Stream, StreamExt};
use tonic::{Request, Response, Status, Streaming};

/// Default largest batch accepted in one CalibrateBatch call (`--max-batch`).
pub const MAX_BATCH_ROWS: usize = 100_000;

/// Handlers of the Calibrator service over a shared [`Registry`].
#[derive(Debug, Clone)]
pub struct CalibratorService {
    registry: Arc<Registry>,
    /// watch: turns true when shutdown begins, so open streams stop taking new rows.
    draining: watch::Receiver<bool>,
    /// Arc: shared with the telemetry scrape; atomics only.
    stats: Arc<RpcStats>,
    /// The decision log, when outcomes are taken back.
    journal: Option<DecisionLog>,
    /// Message, class, batch and in-flight limits.
    limits: Limits,
    /// Slots for requests in flight (shared by every clone).
    in_flight: InFlight,
}

impl CalibratorService {
    /// A service answering from `registry`; open streams end with UNAVAILABLE once `draining`
    /// turns true.
    pub fn new(
        registry: Arc<Registry>,
        draining: watch::Receiver<bool>,
        stats: Arc<RpcStats>,
    ) -> Self {
        CalibratorService {
            registry,
            draining,
            stats,
            journal: None,
            limits: Limits::default(),
            in_flight: InFlight::new(Limits::default().max_concurrent_requests),
        }
    }

    /// Applies `limits` (the message size is the server's to apply, see [`crate::server`]).
    #[must_use]
    pub fn with_limits(mut self, limits: Limits) -> Self {
        self.limits = limits;
        self.in_flight = InFlight::new(limits.max_concurrent_requests);
        self
    }

    /// Admits a call: refuses it with RESOURCE_EXHAUSTED when every in-flight slot is taken,
    /// counting the refusal. Returns the slot, held until dropped. (A deadline that has already
    /// passed is refused earlier, by the [`Gateway`].)
    #[inline]
    fn admit(&self) -> Result<Slot<'_>, Status> {
        self.in_flight
            .try_enter()
            .map_err(|max| self.overloaded(max))
    }

    /// [`CalibratorService::admit`] for a stream, which owns its slot; also returns the
    /// client's timeout.
    fn admit_stream<T>(
        &self,
        request: &Request<T>,
    ) -> Result<(OwnedSlot, Option<Duration>), Status> {
        let slot = self
            .in_flight
            .try_enter_owned()
            .map_err(|max| self.overloaded(max))?;
        Ok((slot, client_timeout(request.metadata().as_ref())))
    }

    fn overloaded(&self, max: usize) -> Status {
        self.stats.error(tonic::Code::ResourceExhausted);
        status::overloaded(max)
    }

    /// Hands every answered request to `journal` and takes outcomes back through it.
    #[must_use]
    pub fn with_journal(mut self, journal: Option<DecisionLog>) -> Self {
        self.journal = journal;
        self
    }

    async fn outcome(&self, req: &OutcomeRequest) -> Result<OutcomeResponse, OutcomeError> {
        let Some(j) = &self.journal else {
            return Err(OutcomeError::Stopped);
        };
        let ack = j.outcome(&req.request_id, req.true_label).await?;
        self.stats.outcome();
        Ok(OutcomeResponse {
            request_id: req.request_id.clone(),
            model: ack.model,
            map_version: ack.map_version,
            correct: ack.correct,
            duplicate: ack.duplicate,
            journaled: ack.journaled,
        })
    }
}

/// A response stream that ends with UNAVAILABLE once shutdown begins: a row already read is
/// answered first, no row is read after.
struct Draining<S> {
    rows: S,
    drained: Pin<Box<dyn Future<Output = ()> + Send>>,
    /// The client's deadline: the stream ends with DEADLINE_EXCEEDED when it passes.
    deadline: Option<(Pin<Box<tokio::time::Sleep>>, Duration)>,
    /// Where an ended deadline is counted.
    stats: Arc<RpcStats>,
    /// The in-flight slot, released when the stream ends or the client goes away (the
    /// transport drops the response stream then).
    _slot: OwnedSlot,
    done: bool,
}

impl<S> Stream for Draining<S>
where
    S: Stream<Item = Result<CalibrateResult, Status>> + Unpin,
{
    type Item = Result<CalibrateResult, Status>;

    fn poll_next(mut self: Pin<&mut Self>, cx: &mut Context<'_>) -> Poll<Option<Self::Item>> {
        if self.done {
            return Poll::Ready(None);
        }
        if self.drained.as_mut().poll(cx).is_ready() {
            self.done = true;
            return Poll::Ready(Some(Err(Status::unavailable(
                "the sidecar is shutting down; open a new stream elsewhere",
            ))));
        }
        if let Some((sleep, timeout)) = &mut self.deadline {
            if sleep.as_mut().poll(cx).is_ready() {
                let timeout = *timeout;
                self.done = true;
                self.stats.error(tonic::Code::DeadlineExceeded);
                return Poll::Ready(Some(Err(status::deadline_passed(timeout))));
            }
        }
        let next = Pin::new(&mut self.rows).poll_next(cx);
        if let Poll::Ready(None | Some(Err(_))) = &next {
            self.done = true;
        }
        next
    }
}

/// Answers one request, counting its latency or its error code, and hands it to the journal
/// (the request id is copied once, for the journal; the logits move to the journal when it keeps
/// them, and otherwise their buffer carries the probabilities).
#[inline]
fn counted(
    snapshot: &Snapshot,
    req: &mut CalibrateRequest,
    stats: &RpcStats,
    journal: Option<&DecisionLog>,
    max_classes: usize,
) -> Result<CalibrateResponse, RowError> {
    let started = Instant::now();
    let keep_logits = journal.is_some_and(DecisionLog::keeps_logits);
    let r = if req.logits.len() > max_classes {
        Err(RowError::TooManyLogits {
            max: max_classes,
            got: req.logits.len(),
        })
    } else {
        answer_by(snapshot, req, !keep_logits)
    };
    match r {
        Ok((resp, served)) => {
            stats.observe(started.elapsed());
            if let Some(j) = journal {
                j.decision(Decided {
                    request_id: &resp.request_id,
                    map: &served.key,
                    predicted: resp.predicted_class,
                    confidence: resp.confidence,
                    accepted: resp.decision == crate::proto::v1::Decision::Accept as i32,
                    audit: resp.audit,
                    logits: std::mem::take(&mut req.logits),
                    at: started,
                });
            }
            Ok(resp)
        }
        Err(e) => {
            stats.error(status::code(&e));
            Err(e)
        }
    }
}

fn result_of(
    snapshot: &Snapshot,
    mut req: CalibrateRequest,
    index: usize,
    stats: &RpcStats,
    journal: Option<&DecisionLog>,
    max_classes: usize,
) -> CalibrateResult {
    let outcome = match counted(snapshot, &mut req, stats, journal, max_classes) {
        Ok(r) => Outcome::Response(r),
        Err(e) => {
            tracing::debug!(index, error = %e, "row refused");
            Outcome::Error(status::row_error(&e, index, &req.request_id))
        }
    };
    CalibrateResult {
        outcome: Some(outcome),
    }
}

type ResultStream = Pin<Box<dyn Stream<Item = Result<CalibrateResult, Status>> + Send + 'static>>;

#[tonic::async_trait]
impl Calibrator for CalibratorService {
    async fn calibrate(
        &self,
        request: Request<CalibrateRequest>,
    ) -> Result<Response<CalibrateResponse>, Status> {
        let _slot = self.admit()?;
        let mut req = request.into_inner();
        let max = self.limits.max_classes;
        let resp = self
            .registry
            .with_snapshot(|s| counted(s, &mut req, &self.stats, self.journal.as_ref(), max))?;
        Ok(Response::new(resp))
    }

    async fn calibrate_batch(
        &self,
        request: Request<CalibrateBatchRequest>,
    ) -> Result<Response<CalibrateBatchResponse>, Status> {
        let _slot = self.admit()?;
        let rows = request.into_inner().rows;
        if rows.len() > self.limits.max_batch {
            self.stats.error(tonic::Code::InvalidArgument);
            return Err(status::batch_too_large(rows.len(), self.limits.max_batch));
        }
        let max = self.limits.max_classes;
        // One snapshot for the whole batch: every row is answered by the same maps.
        let snapshot = self.registry.snapshot();
        let results = rows
            .into_iter()
            .enumerate()
            .map(|(i, r)| result_of(&snapshot, r, i, &self.stats, self.journal.as_ref(), max))
            .collect();
        Ok(Response::new(CalibrateBatchResponse { results }))
    }

    type CalibrateStreamStream = ResultStream;

    async fn calibrate_stream(
        &self,
        request: Request<Streaming<CalibrateRequest>>,
    ) -> Result<Response<Self::CalibrateStreamStream>, Status> {
        let (slot, timeout) = self.admit_stream(&request)?;
        let registry = self.registry.clone();
        let stats = self.stats.clone();
        let journal = self.journal.clone();
        let max = self.limits.max_classes;
        let mut index = 0usize;
        let rows = request.into_inner().map(move |item| {
            let req = item?;
            let r =
                registry.with_snapshot(|s| result_of(s, req, index, &stats, journal.as_ref(), max));
            index += 1;
            Ok(r)
        });
        let mut draining = self.draining.clone();
        let drained = Box::pin(async move {
            // An error means the sender is gone: the server is stopping anyway.
            let _ = draining.wait_for(|d| *d).await;
        });
        Ok(Response::new(Box::pin(Draining {
            rows,
            drained,
            deadline: timeout.map(|t| (Box::pin(tokio::time::sleep(t)), t)),
            stats: self.stats.clone(),
            _slot: slot,
            done: false,
        })))
    }

    async fn record_outcome(
        &self,
        request: Request<OutcomeRequest>,
    ) -> Result<Response<OutcomeResponse>, Status> {
        if self.journal.is_none() {
            return Err(Status::failed_precondition(
                "this sidecar keeps no decision log, so outcomes cannot be joined",
            ));
        }
        let _slot = self.admit()?;
        let answered = match client_timeout(request.metadata().as_ref()) {
            None => self.outcome(request.get_ref()).await,
            Some(t) => match tokio::time::timeout(t, self.outcome(request.get_ref())).await {
                Ok(r) => r,
                Err(_) => {
                    self.stats.error(tonic::Code::DeadlineExceeded);
                    return Err(status::deadline_passed(t));
                }
            },
        };
        match answered {
            Ok(r) => Ok(Response::new(r)),
            Err(e) => {
                let code = status::outcome_code(&e);
                self.stats.error(code);
                Err(Status::new(code, e.to_string()))
            }
        }
    }

    type RecordOutcomesStream =
        Pin<Box<dyn Stream<Item = Result<OutcomeResult, Status>> + Send + 'static>>;

    async fn record_outcomes(
        &self,
        request: Request<Streaming<OutcomeRequest>>,
    ) -> Result<Response<Self::RecordOutcomesStream>, Status> {
        if self.journal.is_none() {
            return Err(Status::failed_precondition(
                "this sidecar keeps no decision log, so outcomes cannot be joined",
            ));
        }
        let (slot, _) = self.admit_stream(&request)?;
        let me = self.clone();
        let mut inbound = request.into_inner();
        let out = async_stream_of(move |tx| async move {
            // Held until the task ends: the inbound stream ends or the client goes away.
            let _slot = slot;
            let mut index = 0u64;
            while let Some(item) = inbound.next().await {
                let result = match item {
                    Ok(req) => match me.outcome(&req).await {
                        Ok(r) => OutcomeResult {
                            outcome: Some(outcome_result::Outcome::Response(r)),
                        },
                        Err(e) => {
                            let code = status::outcome_code(&e);
                            me.stats.error(code);
                            OutcomeResult {
                                outcome: Some(outcome_result::Outcome::Error(
                                    crate::proto::v1::RowError {
                                        code: code as i32,
                                        message: e.to_string(),
                                        request_id: req.request_id.clone(),
                                        index,
                                    },
                                )),
                            }
                        }
                    },
                    Err(s) => {
                        let _ = tx.send(Err(s)).await;
                        return;
                    }
                };
                index += 1;
                if tx.send(Ok(result)).await.is_err() {
                    return;
                }
            }
        });
        Ok(Response::new(out))
    }

    async fn list_maps(
        &self,
        _request: Request<ListMapsRequest>,
    ) -> Result<Response<ListMapsResponse>, Status> {
        let snapshot = self.registry.snapshot();
        let maps = snapshot
            .maps()
            .into_iter()
            .map(|a| {
                let m = &a.map;
                let (accepted, deferred) = a.counters.get();
                MapInfo {
                    model: m.model().to_owned(),
                    map_version: m.map_version().to_owned(),
                    classes: m.classes() as u32,
                    method: m.method().kind().to_owned(),
                    threshold: m.policy().global_threshold().map(|t| t as f32),
                    digest: m.digest().to_owned(),
                    input_len: m.input_len() as u32,
                    accepted,
                    deferred,
                }
            })
            .collect();
        Ok(Response::new(ListMapsResponse { maps }))
    }

    async fn get_decision_counts(
        &self,
        _request: Request<GetDecisionCountsRequest>,
    ) -> Result<Response<GetDecisionCountsResponse>, Status> {
        let counts = self
            .registry
            .decision_counts()
            .into_iter()
            .map(
                |(model, map_version, accepted, deferred, _)| DecisionCount {
                    model,
                    map_version,
                    accepted,
                    deferred,
                },
            )
            .collect();
        Ok(Response::new(GetDecisionCountsResponse { counts }))
    }
}

/// A response stream fed by a task: `f` gets the sending half of a small channel.
fn async_stream_of<T, F, Fut>(
    f: F,
) -> Pin<Box<dyn Stream<Item = Result<T, Status>> + Send + 'static>>
where
    T: Send + 'static,
    F: FnOnce(tokio::sync::mpsc::Sender<Result<T, Status>>) -> Fut,
    Fut: Future<Output = ()> + Send + 'static,
{
    // mpsc: the task answers in order and waits when the caller reads slowly.
    let (tx, rx) = tokio::sync::mpsc::channel(16);
    tokio::spawn(f(tx));
    Box::pin(tokio_stream::wrappers::ReceiverStream::new(rx))
}
