//! The check before timing: every payload sent once, in the run's mode, through the generated
//! client, and each answer decoded in full and verified.

use super::verify::{verify, Expect, Reference, VerifyError};
use super::{LoadError, Mode, REQUEST_TIMEOUT};
use crate::proto::v1::calibrate_result::Outcome;
use crate::proto::v1::calibrator_client::CalibratorClient;
use crate::proto::v1::{CalibrateRequest, CalibrateResponse, CalibrateResult};
use tokio::sync::mpsc;
use tokio::time::timeout;
use tokio_stream::wrappers::ReceiverStream;
use tonic::transport::Channel;
use tonic::Streaming;

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
