//! The gRPC data plane: the `candor.v1.Calibrator` service.

mod row;
mod status;

pub use row::{answer, RowError};

use crate::proto::v1::calibrator_server::Calibrator;
use crate::proto::v1::{
    calibrate_result::Outcome, CalibrateBatchRequest, CalibrateBatchResponse, CalibrateRequest,
    CalibrateResponse, CalibrateResult, DecisionCount, GetDecisionCountsRequest,
    GetDecisionCountsResponse, ListMapsRequest, ListMapsResponse, MapInfo,
};
use crate::registry::{Registry, Snapshot};
use std::pin::Pin;
use std::sync::Arc;
use tokio_stream::{Stream, StreamExt};
use tonic::{Request, Response, Status, Streaming};

/// Largest batch accepted in one CalibrateBatch call.
pub const MAX_BATCH_ROWS: usize = 100_000;

/// Handlers of the Calibrator service over a shared [`Registry`].
#[derive(Debug, Clone)]
pub struct CalibratorService {
    registry: Arc<Registry>,
}

impl CalibratorService {
    /// A service answering from `registry`.
    pub fn new(registry: Arc<Registry>) -> Self {
        CalibratorService { registry }
    }
}

fn result_of(snapshot: &Snapshot, req: &CalibrateRequest, index: usize) -> CalibrateResult {
    let outcome = match answer(snapshot, req) {
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
        let req = request.get_ref();
        let resp = self.registry.with_snapshot(|s| answer(s, req))?;
        Ok(Response::new(resp))
    }

    async fn calibrate_batch(
        &self,
        request: Request<CalibrateBatchRequest>,
    ) -> Result<Response<CalibrateBatchResponse>, Status> {
        let rows = &request.get_ref().rows;
        if rows.len() > MAX_BATCH_ROWS {
            return Err(Status::invalid_argument(format!(
                "batch has {} rows; at most {MAX_BATCH_ROWS} are accepted",
                rows.len()
            )));
        }
        // One snapshot for the whole batch: every row is answered by the same maps.
        let snapshot = self.registry.snapshot();
        let results = rows
            .iter()
            .enumerate()
            .map(|(i, r)| result_of(&snapshot, r, i))
            .collect();
        Ok(Response::new(CalibrateBatchResponse { results }))
    }

    type CalibrateStreamStream = ResultStream;

    async fn calibrate_stream(
        &self,
        request: Request<Streaming<CalibrateRequest>>,
    ) -> Result<Response<Self::CalibrateStreamStream>, Status> {
        let registry = self.registry.clone();
        let mut index = 0usize;
        let out = request.into_inner().map(move |item| {
            let req = item?;
            let r = registry.with_snapshot(|s| result_of(s, &req, index));
            index += 1;
            Ok(r)
        });
        Ok(Response::new(Box::pin(out)))
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
            .map(|(model, map_version, accepted, deferred)| DecisionCount {
                model,
                map_version,
                accepted,
                deferred,
            })
            .collect();
        Ok(Response::new(GetDecisionCountsResponse { counts }))
    }
}
