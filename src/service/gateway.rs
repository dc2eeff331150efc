//! The data plane's front door: calls to `candor.v1.Calibrator` go straight to its service,
//! everything else (gRPC health checking, server reflection) to the transport's router.
//!
//! The transport's router matches every path against its route table, stores the matched path
//! parameters in the request (two shared strings and a vector, allocated per call) and clones a
//! boxed service per call. The calibrator's calls are told apart by their path prefix instead,
//! and the router still answers the rest. Counted with callgrind (`valgrind --tool=callgrind
//! candor serve` under `candor bench`, K = 10, C = 32), a Calibrate call took 63,900
//! instructions in the sidecar with the router and an interceptor in front, 57,400 through the
//! gateway.
//!
//! The gateway is also where a call whose client deadline has already passed (`grpc-timeout`
//! of zero) is refused: before its message is read, and inside the transport's own deadline
//! timer, which answers CANCELLED ("Timeout expired") when it fires while a handler is still
//! waiting, e.g. for the request body.

use super::limits::client_timeout;
use super::CalibratorService;
use crate::proto::v1::calibrator_server::CalibratorServer;
use crate::telemetry::RpcStats;
use std::convert::Infallible;
use std::future::Future;
use std::pin::Pin;
use std::sync::Arc;
use std::task::{Context, Poll};
use std::time::Duration;
use tonic::codegen::{http, Body, BoxFuture, StdError};

/// Path prefix of every `candor.v1.Calibrator` method.
const CALIBRATOR_PREFIX: &str = "/candor.v1.Calibrator/";

/// The response every route of the data plane gives.
type HttpResponse = http::Response<tonic::body::Body>;

/// Puts a [`Gateway`] in front of the transport's router.
#[derive(Debug, Clone)]
pub struct GatewayLayer {
    calibrator: CalibratorServer<CalibratorService>,
    /// Where a refused deadline is counted.
    stats: Arc<RpcStats>,
}

impl GatewayLayer {
    /// A gateway sending calibrator calls to `calibrator`, counting refusals in `stats`.
    pub fn new(calibrator: CalibratorServer<CalibratorService>, stats: Arc<RpcStats>) -> Self {
        GatewayLayer { calibrator, stats }
    }
}

impl<R> tower_layer::Layer<R> for GatewayLayer {
    type Service = Gateway<R>;

    fn layer(&self, rest: R) -> Gateway<R> {
        Gateway {
            calibrator: self.calibrator.clone(),
            rest,
            stats: self.stats.clone(),
        }
    }
}

/// The front door: see the module documentation.
#[derive(Debug, Clone)]
pub struct Gateway<R> {
    calibrator: CalibratorServer<CalibratorService>,
    rest: R,
    stats: Arc<RpcStats>,
}

impl<R, B> tower_service::Service<http::Request<B>> for Gateway<R>
where
    R: tower_service::Service<http::Request<B>, Response = HttpResponse, Error = Infallible>,
    B: Body + Send + 'static,
    B::Error: Into<StdError> + Send + 'static,
{
    type Response = HttpResponse;
    type Error = Infallible;
    type Future = GatewayFuture<R::Future>;

    fn poll_ready(&mut self, cx: &mut Context<'_>) -> Poll<Result<(), Infallible>> {
        // Both are always ready (neither applies backpressure), but the contract is kept.
        match tower_service::Service::<http::Request<B>>::poll_ready(&mut self.calibrator, cx) {
            Poll::Ready(Ok(())) => self.rest.poll_ready(cx),
            Poll::Ready(Err(never)) => match never {},
            Poll::Pending => Poll::Pending,
        }
    }

    fn call(&mut self, req: http::Request<B>) -> Self::Future {
        if !req.uri().path().starts_with(CALIBRATOR_PREFIX) {
            return GatewayFuture::Rest {
                inner: self.rest.call(req),
            };
        }
        if client_timeout(req.headers()) == Some(Duration::ZERO) {
            self.stats.error(tonic::Code::DeadlineExceeded);
            return GatewayFuture::Refused {
                response: Some(super::status::deadline_passed(Duration::ZERO).into_http()),
            };
        }
        GatewayFuture::Calibrator {
            inner: self.calibrator.call(req),
        }
    }
}

pin_project_lite::pin_project! {
    /// The future of a [`Gateway`] call: the calibrator's, the router's, or an answer already
    /// made.
    #[project = GatewayProj]
    pub enum GatewayFuture<F> {
        /// A calibrator call.
        Calibrator { inner: BoxFuture<HttpResponse, Infallible> },
        /// A call the router answers.
        Rest { #[pin] inner: F },
        /// A call refused at the door (taken once).
        Refused { response: Option<HttpResponse> },
    }
}

impl<F> Future for GatewayFuture<F>
where
    F: Future<Output = Result<HttpResponse, Infallible>>,
{
    type Output = Result<HttpResponse, Infallible>;

    fn poll(self: Pin<&mut Self>, cx: &mut Context<'_>) -> Poll<Self::Output> {
        match self.project() {
            GatewayProj::Calibrator { inner } => inner.as_mut().poll(cx),
            GatewayProj::Rest { inner } => inner.poll(cx),
            GatewayProj::Refused { response } => match response.take() {
                Some(r) => Poll::Ready(Ok(r)),
                None => panic!("a refused gateway call was polled after it answered"),
            },
        }
    }
}
