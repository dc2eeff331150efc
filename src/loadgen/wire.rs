//! The load generator's own view of the wire during timing: each request is encoded once, before
//! timing, and sent as its bytes; an answer is read only as far as success or failure.
//!
//! A real caller encodes its logits and decodes every probability. The load generator has already
//! checked every answer in full before timing ([`super::verify`]); while timing, encoding and
//! decoding K floats per request would only spend the CPU the server under test shares on one
//! machine. On the wire nothing changes: the bytes are those the generated client would send.

use crate::proto::v1::{CalibrateRequest, RowError};
use prost::bytes::{BufMut, Bytes};
use prost::Message;
use std::marker::PhantomData;
use tokio_stream::Stream;
use tonic::codec::{Codec, EncodeBuf, Encoder, Streaming};
use tonic::codegen::http::uri::PathAndQuery;
use tonic::transport::Channel;
use tonic::{Request, Status};
use tonic_prost::ProstDecoder;

const CALIBRATE: &str = "/candor.v1.Calibrator/Calibrate";
const CALIBRATE_STREAM: &str = "/candor.v1.Calibrator/CalibrateStream";

/// A CalibrateRequest encoded once.
#[derive(Debug, Clone)]
pub struct Encoded(Bytes);

impl Encoded {
    /// The request's protobuf bytes.
    pub fn new(req: &CalibrateRequest) -> Self {
        Encoded(Bytes::from(req.encode_to_vec()))
    }
}

/// A unary answer with every field skipped: success is the gRPC status.
#[derive(Clone, PartialEq, prost::Message)]
pub struct Answered {}

/// A stream result read only for its error (tag 2); the response (tag 1) is skipped.
#[derive(Clone, PartialEq, prost::Message)]
pub struct StreamAnswer {
    /// Present when the row was refused.
    #[prost(message, optional, tag = "2")]
    pub error: Option<RowError>,
}

/// Writes pre-encoded bytes.
#[derive(Debug, Default)]
struct BytesEncoder;

impl Encoder for BytesEncoder {
    type Item = Encoded;
    type Error = Status;

    fn encode(&mut self, item: Encoded, dst: &mut EncodeBuf<'_>) -> Result<(), Status> {
        dst.put_slice(&item.0);
        Ok(())
    }
}

/// Pre-encoded requests out, `D` in.
#[derive(Debug)]
struct LeanCodec<D>(PhantomData<D>);

impl<D: Message + Default + Send + 'static> Codec for LeanCodec<D> {
    type Encode = Encoded;
    type Decode = D;
    type Encoder = BytesEncoder;
    type Decoder = ProstDecoder<D>;

    fn encoder(&mut self) -> BytesEncoder {
        BytesEncoder
    }

    fn decoder(&mut self) -> ProstDecoder<D> {
        ProstDecoder::default()
    }
}

/// A Calibrator client that sends [`Encoded`] requests.
#[derive(Debug, Clone)]
pub struct LeanClient {
    grpc: tonic::client::Grpc<Channel>,
}

impl LeanClient {
    /// A client on `channel`.
    pub fn new(channel: Channel) -> Self {
        LeanClient {
            grpc: tonic::client::Grpc::new(channel),
        }
    }

    async fn ready(&mut self) -> Result<(), Status> {
        self.grpc
            .ready()
            .await
            .map_err(|e| Status::unavailable(format!("connection not ready: {e}")))
    }

    /// One Calibrate call.
    ///
    /// # Errors
    /// The call's status when it failed.
    pub async fn calibrate(&mut self, req: Encoded) -> Result<(), Status> {
        self.ready().await?;
        let codec = LeanCodec::<Answered>(PhantomData);
        let path = PathAndQuery::from_static(CALIBRATE);
        self.grpc.unary(Request::new(req), path, codec).await?;
        Ok(())
    }

    /// Opens a CalibrateStream sending `requests`.
    ///
    /// # Errors
    /// The call's status when the stream could not be opened.
    pub async fn calibrate_stream(
        &mut self,
        requests: impl Stream<Item = Encoded> + Send + 'static,
    ) -> Result<Streaming<StreamAnswer>, Status> {
        self.ready().await?;
        let codec = LeanCodec::<StreamAnswer>(PhantomData);
        let path = PathAndQuery::from_static(CALIBRATE_STREAM);
        let r = self
            .grpc
            .streaming(Request::new(requests), path, codec)
            .await?;
        Ok(r.into_inner())
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::proto::v1::{calibrate_result::Outcome, CalibrateResponse, CalibrateResult};

    #[test]
    fn stream_answers_keep_the_error_and_skip_the_response() {
        let ok = CalibrateResult {
            outcome: Some(Outcome::Response(CalibrateResponse {
                probabilities: vec![0.25; 1000],
                ..Default::default()
            })),
        };
        assert_eq!(
            StreamAnswer::decode(&ok.encode_to_vec()[..]).unwrap().error,
            None
        );
        let refused = RowError {
            code: 3,
            message: "expected 3 logits, got 4".into(),
            ..Default::default()
        };
        let bad = CalibrateResult {
            outcome: Some(Outcome::Error(refused.clone())),
        };
        assert_eq!(
            StreamAnswer::decode(&bad.encode_to_vec()[..])
                .unwrap()
                .error,
            Some(refused)
        );
        assert!(Answered::decode(&ok.encode_to_vec()[..]).is_ok());
    }
}
