//! The admin plane: the `candor.v1.MapControl` service and its bearer-token check.
//!
//! Every change goes through the registry, which validates, writes the store atomically and
//! publishes a new snapshot; the handlers only convert and run the blocking work off the async
//! threads.

use super::status::rollout_status;
use crate::proto::v1::map_control_server::MapControl;
use crate::proto::v1::{
    ActivateRequest, ListModelsRequest, ListModelsResponse, ModelStatus, PushMapRequest,
    PushMapResponse, Rejection, RollbackRequest, SetCanaryRequest, SetShadowRequest,
    ShadowStats as PbShadow, VersionState as PbState, VersionStatus,
};
use crate::registry::{ModelView, Registry, RolloutError, RolloutView, VersionState};
use std::sync::Arc;
use tonic::{Request, Response, Status};

/// Largest map accepted by PushMap, in bytes (a K = 1000 matrix map is about 20 MB of JSON).
pub const MAX_PUSH_BYTES: usize = 64 * 1024 * 1024;

/// A bearer token the admin plane requires, compared in constant time.
#[derive(Clone)]
pub struct AdminToken(Arc<[u8]>);

impl std::fmt::Debug for AdminToken {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str("AdminToken(<redacted>)")
    }
}

impl AdminToken {
    /// A token from its text (surrounding whitespace, such as a file's final newline, removed).
    ///
    /// # Errors
    /// When the token is empty.
    pub fn try_new(text: &str) -> Result<Self, &'static str> {
        let t = text.trim();
        if t.is_empty() {
            return Err("the admin token is empty");
        }
        Ok(AdminToken(t.as_bytes().into()))
    }

    /// True when `header` is `Bearer <this token>`.
    pub fn admits(&self, header: Option<&[u8]>) -> bool {
        use subtle::ConstantTimeEq as _;
        let Some(value) = header.and_then(|h| h.strip_prefix(b"Bearer ")) else {
            return false;
        };
        // ct_eq on slices of different lengths is false without comparing contents; the length
        // of the token is not a secret worth hiding.
        bool::from(value.ct_eq(&self.0))
    }
}

/// The interceptor that admits a call only with the right bearer token (or always, with none).
///
/// # Errors
/// UNAUTHENTICATED when the token is required and missing or wrong.
pub fn check_token(
    token: Option<AdminToken>,
) -> impl FnMut(Request<()>) -> Result<Request<()>, Status> + Clone {
    move |req: Request<()>| match &token {
        None => Ok(req),
        Some(t) => {
            let header = req
                .metadata()
                .get("authorization")
                .map(tonic::metadata::MetadataValue::as_bytes);
            if t.admits(header) {
                Ok(req)
            } else {
                Err(Status::unauthenticated(
                    "the admin API needs `authorization: Bearer <token>` with the sidecar's token",
                ))
            }
        }
    }
}

/// Handlers of MapControl over a shared [`Registry`].
#[derive(Debug, Clone)]
pub struct MapControlService {
    registry: Arc<Registry>,
}

impl MapControlService {
    /// A service changing `registry`.
    pub fn new(registry: Arc<Registry>) -> Self {
        MapControlService { registry }
    }

    async fn blocking<T: Send + 'static>(
        &self,
        f: impl FnOnce(&Registry) -> Result<T, RolloutError> + Send + 'static,
    ) -> Result<T, Status> {
        let r = self.registry.clone();
        tokio::task::spawn_blocking(move || f(&r))
            .await
            .map_err(|e| Status::internal(format!("admin task failed: {e}")))?
            .map_err(|e| rollout_status(&e))
    }
}

fn state(s: VersionState) -> PbState {
    match s {
        VersionState::Active => PbState::Active,
        VersionState::Staged => PbState::Staged,
        VersionState::Canary => PbState::Canary,
        VersionState::Shadow => PbState::Shadow,
        VersionState::Rejected => PbState::Rejected,
    }
}

/// The proto form of one model's view.
pub fn model_status(m: ModelView) -> ModelStatus {
    let (canary_version, canary_fraction) = m.canary.unwrap_or_default();
    ModelStatus {
        model: m.model,
        active_version: m.active.unwrap_or_default(),
        history: m.history,
        canary_version,
        canary_fraction,
        shadow: m.shadow.map(|(v, (n, ad, da, mean))| PbShadow {
            map_version: v,
            compared: n,
            accept_to_defer: ad,
            defer_to_accept: da,
            mean_abs_confidence_change: mean,
        }),
        versions: m
            .versions
            .into_iter()
            .map(|v| VersionStatus {
                map_version: v.version,
                state: state(v.state) as i32,
                digest: v.digest,
                classes: v.classes as u32,
                method: v.method,
                reason: v.reason.unwrap_or_default(),
                path: v.path.map(|p| p.display().to_string()).unwrap_or_default(),
                accepted: v.accepted,
                deferred: v.deferred,
            })
            .collect(),
    }
}

fn list_response(v: RolloutView) -> ListModelsResponse {
    ListModelsResponse {
        models: v.models.into_iter().map(model_status).collect(),
        rejections: v
            .rejections
            .into_iter()
            .map(|r| Rejection {
                path: r.path.display().to_string(),
                reason: r.reason,
                at_unix_secs: r
                    .at
                    .duration_since(std::time::UNIX_EPOCH)
                    .map_or(0, |d| d.as_secs() as i64),
            })
            .collect(),
        publishes_total: v.publishes_total,
        rejections_total: v.rejections_total,
    }
}

#[tonic::async_trait]
impl MapControl for MapControlService {
    async fn list_models(
        &self,
        _request: Request<ListModelsRequest>,
    ) -> Result<Response<ListModelsResponse>, Status> {
        Ok(Response::new(list_response(self.registry.view())))
    }

    async fn push_map(
        &self,
        request: Request<PushMapRequest>,
    ) -> Result<Response<PushMapResponse>, Status> {
        let PushMapRequest { map_json, activate } = request.into_inner();
        if map_json.len() > MAX_PUSH_BYTES {
            return Err(Status::invalid_argument(format!(
                "map is {} bytes; at most {MAX_PUSH_BYTES} are accepted",
                map_json.len()
            )));
        }
        let (model, map_version, digest, written, view) = self
            .blocking(move |r| {
                let (model, version, digest, written) = r.push(&map_json, activate)?;
                let view = r.view().models.into_iter().find(|m| m.model == model);
                Ok((model, version, digest, written, view))
            })
            .await?;
        Ok(Response::new(PushMapResponse {
            model,
            map_version,
            digest,
            written,
            status: view.map(model_status),
        }))
    }

    async fn activate(
        &self,
        request: Request<ActivateRequest>,
    ) -> Result<Response<ModelStatus>, Status> {
        let ActivateRequest { model, map_version } = request.into_inner();
        let v = self
            .blocking(move |r| r.activate(&model, &map_version))
            .await?;
        Ok(Response::new(model_status(v)))
    }

    async fn rollback(
        &self,
        request: Request<RollbackRequest>,
    ) -> Result<Response<ModelStatus>, Status> {
        let RollbackRequest { model } = request.into_inner();
        let v = self.blocking(move |r| r.rollback(&model)).await?;
        Ok(Response::new(model_status(v)))
    }

    async fn set_canary(
        &self,
        request: Request<SetCanaryRequest>,
    ) -> Result<Response<ModelStatus>, Status> {
        let SetCanaryRequest {
            model,
            map_version,
            fraction,
        } = request.into_inner();
        let v = self
            .blocking(move |r| r.set_canary(&model, &map_version, fraction))
            .await?;
        Ok(Response::new(model_status(v)))
    }

    async fn set_shadow(
        &self,
        request: Request<SetShadowRequest>,
    ) -> Result<Response<ModelStatus>, Status> {
        let SetShadowRequest { model, map_version } = request.into_inner();
        let v = self
            .blocking(move |r| r.set_shadow(&model, &map_version))
            .await?;
        Ok(Response::new(model_status(v)))
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn token_admits_only_the_exact_bearer_value() {
        let t = AdminToken::try_new("s3cret\n").unwrap();
        assert!(t.admits(Some(b"Bearer s3cret")));
        assert!(!t.admits(Some(b"Bearer s3cre")));
        assert!(!t.admits(Some(b"Bearer s3cretX")));
        assert!(!t.admits(Some(b"bearer s3cret")));
        assert!(!t.admits(Some(b"s3cret")));
        assert!(!t.admits(None));
        assert!(AdminToken::try_new("  \n").is_err());
        assert_eq!(format!("{t:?}"), "AdminToken(<redacted>)");
    }
}
