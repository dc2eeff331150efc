//! The transport floor: a bare tonic implementation of `candor.v1.Calibrator` that answers every
//! row with its own logits, untouched, as the probabilities (the same-sized payload back, no
//! calibration). It runs in a child process (this benchmark re-invoked with `--floor`) so its CPU
//! time can be read from /proc like any other server's.
//!
//! Its transport settings are tonic's defaults, as `Server::builder().serve(addr)` would use them
//! (including TCP_NODELAY on accepted sockets): the floor is what tonic gives for free.

use candor::proto::v1::calibrate_result::Outcome;
use candor::proto::v1::calibrator_server::{Calibrator, CalibratorServer};
use candor::proto::v1::{
    CalibrateBatchRequest, CalibrateBatchResponse, CalibrateRequest, CalibrateResponse,
    CalibrateResult, GetDecisionCountsRequest, GetDecisionCountsResponse, ListMapsRequest,
    ListMapsResponse,
};
use std::pin::Pin;
use tokio_stream::{Stream, StreamExt};
use tonic::transport::server::TcpIncoming;
use tonic::{Request, Response, Status, Streaming};

/// Echoes each row's logits as its probabilities.
#[derive(Debug, Default)]
struct Floor;

fn echo(req: CalibrateRequest) -> CalibrateResponse {
    CalibrateResponse {
        probabilities: req.logits,
        request_id: req.request_id,
        ..Default::default()
    }
}

type ResultStream = Pin<Box<dyn Stream<Item = Result<CalibrateResult, Status>> + Send + 'static>>;

#[tonic::async_trait]
impl Calibrator for Floor {
    async fn calibrate(
        &self,
        request: Request<CalibrateRequest>,
    ) -> Result<Response<CalibrateResponse>, Status> {
        Ok(Response::new(echo(request.into_inner())))
    }

    async fn calibrate_batch(
        &self,
        request: Request<CalibrateBatchRequest>,
    ) -> Result<Response<CalibrateBatchResponse>, Status> {
        let results = request
            .into_inner()
            .rows
            .into_iter()
            .map(|r| CalibrateResult {
                outcome: Some(Outcome::Response(echo(r))),
            })
            .collect();
        Ok(Response::new(CalibrateBatchResponse { results }))
    }

    type CalibrateStreamStream = ResultStream;

    async fn calibrate_stream(
        &self,
        request: Request<Streaming<CalibrateRequest>>,
    ) -> Result<Response<Self::CalibrateStreamStream>, Status> {
        let out = request.into_inner().map(|item| {
            Ok(CalibrateResult {
                outcome: Some(Outcome::Response(echo(item?))),
            })
        });
        Ok(Response::new(Box::pin(out)))
    }

    async fn list_maps(
        &self,
        _request: Request<ListMapsRequest>,
    ) -> Result<Response<ListMapsResponse>, Status> {
        Ok(Response::new(ListMapsResponse::default()))
    }

    async fn get_decision_counts(
        &self,
        _request: Request<GetDecisionCountsRequest>,
    ) -> Result<Response<GetDecisionCountsResponse>, Status> {
        Ok(Response::new(GetDecisionCountsResponse::default()))
    }

    // The floor keeps no decisions, so outcomes cannot be joined: the same answer candor gives
    // without a decision log.
    async fn record_outcome(
        &self,
        _request: Request<candor::proto::v1::OutcomeRequest>,
    ) -> Result<Response<candor::proto::v1::OutcomeResponse>, Status> {
        Err(Status::failed_precondition("the floor keeps no decisions"))
    }

    type RecordOutcomesStream = Pin<
        Box<dyn Stream<Item = Result<candor::proto::v1::OutcomeResult, Status>> + Send + 'static>,
    >;

    async fn record_outcomes(
        &self,
        _request: Request<Streaming<candor::proto::v1::OutcomeRequest>>,
    ) -> Result<Response<Self::RecordOutcomesStream>, Status> {
        Err(Status::failed_precondition("the floor keeps no decisions"))
    }
}

/// The child process: bind a loopback port, print `listening ADDR`, serve until killed. The
/// runtime is built like `candor serve`'s (multi-threaded, one worker per core).
pub fn serve_child() -> Result<(), Box<dyn std::error::Error>> {
    let runtime = tokio::runtime::Builder::new_multi_thread()
        .enable_all()
        .build()?;
    runtime.block_on(async {
        let listener = tokio::net::TcpListener::bind("127.0.0.1:0").await?;
        println!("listening {}", listener.local_addr()?);
        let incoming = TcpIncoming::from(listener).with_nodelay(Some(true));
        tonic::transport::Server::builder()
            .add_service(CalibratorServer::new(Floor))
            .serve_with_incoming(incoming)
            .await?;
        Ok(())
    })
}
