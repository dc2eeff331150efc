//! The transport floors: bare tonic implementations of `candor.v1.Calibrator` that answer every
//! row with its own logits, untouched, as the probabilities (the same-sized payload back, no
//! calibration). Each runs in a child process (this benchmark re-invoked with `--floor` or
//! `--floor --bulk`) so its CPU time can be read from /proc like any other server's.
//! - The floor: the message types prost generates for `candor.v1`, served the way tonic's
//!   generated server code serves them. What a bare tonic service costs.
//! - The bulk floor: candor's own message types, whose float arrays are encoded and decoded in
//!   bulk (`candor::proto::messages`). The same transport as `candor serve`, so candor's figures
//!   over it are what calibrating costs on top of the transport.
//!
//! Transport settings are tonic's defaults, as `Server::builder().serve(addr)` would use them
//! (including TCP_NODELAY on accepted sockets): the floor is what tonic gives for free.

use candor::proto::twins::{GeneratedRequest, GeneratedResponse};
use candor::proto::v1::calibrate_result::Outcome;
use candor::proto::v1::calibrator_server::{Calibrator, CalibratorServer};
use candor::proto::v1::{
    CalibrateBatchRequest, CalibrateBatchResponse, CalibrateRequest, CalibrateResponse,
    CalibrateResult, GetDecisionCountsRequest, GetDecisionCountsResponse, ListMapsRequest,
    ListMapsResponse,
};
use std::pin::Pin;
use tokio_stream::{Stream, StreamExt};
use tonic::codegen::{http, Body, BoxFuture, Context, Poll, Service, StdError};
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

/// The floor's Calibrate on prost's generated messages.
struct GeneratedEcho;

impl tonic::server::UnaryService<GeneratedRequest> for GeneratedEcho {
    type Response = GeneratedResponse;
    type Future = BoxFuture<Response<GeneratedResponse>, Status>;

    fn call(&mut self, request: Request<GeneratedRequest>) -> Self::Future {
        let req = request.into_inner();
        Box::pin(async move {
            Ok(Response::new(GeneratedResponse {
                probabilities: req.logits,
                request_id: req.request_id,
                ..Default::default()
            }))
        })
    }
}

/// `candor.v1.Calibrator` with prost's generated messages: Calibrate echoes, every other method
/// is UNIMPLEMENTED. The dispatch is what tonic's generated server does for one unary method.
#[derive(Debug, Clone, Copy)]
struct GeneratedFloor;

impl tonic::server::NamedService for GeneratedFloor {
    const NAME: &'static str = "candor.v1.Calibrator";
}

impl<B> Service<http::Request<B>> for GeneratedFloor
where
    B: Body + Send + 'static,
    B::Error: Into<StdError> + Send + 'static,
{
    type Response = http::Response<tonic::body::Body>;
    type Error = std::convert::Infallible;
    type Future = BoxFuture<Self::Response, Self::Error>;

    fn poll_ready(&mut self, _cx: &mut Context<'_>) -> Poll<Result<(), Self::Error>> {
        Poll::Ready(Ok(()))
    }

    fn call(&mut self, req: http::Request<B>) -> Self::Future {
        if req.uri().path() == "/candor.v1.Calibrator/Calibrate" {
            return Box::pin(async move {
                let codec =
                    tonic_prost::ProstCodec::<GeneratedResponse, GeneratedRequest>::default();
                Ok(tonic::server::Grpc::new(codec)
                    .unary(GeneratedEcho, req)
                    .await)
            });
        }
        Box::pin(async move {
            Ok(Status::unimplemented("the floor answers Calibrate only").into_http())
        })
    }
}

/// The child process: bind a loopback port, print `listening ADDR`, serve until killed. The
/// runtime is built like `candor serve`'s (multi-threaded, one worker per core). `bulk` serves
/// candor's message types instead of prost's generated ones.
pub fn serve_child(bulk: bool) -> Result<(), Box<dyn std::error::Error>> {
    let runtime = tokio::runtime::Builder::new_multi_thread()
        .enable_all()
        .build()?;
    runtime.block_on(async {
        let listener = tokio::net::TcpListener::bind("127.0.0.1:0").await?;
        println!("listening {}", listener.local_addr()?);
        let incoming = TcpIncoming::from(listener).with_nodelay(Some(true));
        let mut server = tonic::transport::Server::builder();
        if bulk {
            server
                .add_service(CalibratorServer::new(Floor))
                .serve_with_incoming(incoming)
                .await?;
        } else {
            server
                .add_service(GeneratedFloor)
                .serve_with_incoming(incoming)
                .await?;
        }
        Ok(())
    })
}
