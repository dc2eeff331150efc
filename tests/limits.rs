//! Limits against a real server on a loopback port: message size, classes (requests and maps),
//! batch rows, requests in flight (shed with RESOURCE_EXHAUSTED, counted by code, released when
//! a client goes away) and client deadlines.

use crate::support::temperature_map;
use candor::proto::v1::calibrator_client::CalibratorClient;
use candor::proto::v1::{CalibrateBatchRequest, CalibrateRequest};
use candor::registry::{Registry, RegistryOptions};
use candor::server::{run, ServeOptions};
use candor::service::Limits;
use candor::telemetry::RpcStats;
use std::sync::Arc;
use std::time::Duration;
use tokio::sync::oneshot;
use tonic::transport::Channel;
use tonic::Code;

/// A data plane with `limits` serving the K = 3 temperature map of model "triage".
struct Limited {
    addr: std::net::SocketAddr,
    client: CalibratorClient<Channel>,
    stats: Arc<RpcStats>,
    _stop: oneshot::Sender<()>,
}

async fn start(limits: Limits) -> Limited {
    let registry = Registry::new();
    registry.publish(vec![temperature_map()]);
    registry.mark_ready();
    let listener = tokio::net::TcpListener::bind("127.0.0.1:0").await.unwrap();
    let addr = listener.local_addr().unwrap();
    let stats = Arc::new(RpcStats::default());
    let (tx, rx) = oneshot::channel::<()>();
    let options = ServeOptions {
        stats: stats.clone(),
        limits,
        ..ServeOptions::default()
    };
    tokio::spawn(run(listener, registry, options, async {
        let _ = rx.await;
    }));
    let channel = Channel::from_shared(format!("http://{addr}"))
        .unwrap()
        .connect()
        .await
        .unwrap();
    Limited {
        addr,
        client: CalibratorClient::new(channel),
        stats,
        _stop: tx,
    }
}

fn row(logits: Vec<f32>) -> CalibrateRequest {
    CalibrateRequest {
        model: "triage".into(),
        logits,
        request_id: "r".into(),
        ..CalibrateRequest::default()
    }
}

#[tokio::test]
async fn a_message_over_the_size_limit_is_refused_before_decoding() {
    let mut s = start(Limits {
        max_message_bytes: 1024,
        ..Limits::default()
    })
    .await;
    assert!(s.client.calibrate(row(vec![4.0, 0.0, 0.0])).await.is_ok());
    // 1000 f32 logits are 4000 bytes of packed field alone.
    let e = s.client.calibrate(row(vec![0.5; 1000])).await.unwrap_err();
    assert_eq!(e.code(), Code::OutOfRange, "{e:?}");
    assert!(e.message().contains("the limit is: 1024"), "{e:?}");
}

#[tokio::test]
async fn more_logits_than_max_classes_are_refused_before_the_lookup() {
    let mut s = start(Limits {
        max_classes: 3,
        ..Limits::default()
    })
    .await;
    assert!(s.client.calibrate(row(vec![4.0, 0.0, 0.0])).await.is_ok());
    let e = s
        .client
        .calibrate(row(vec![0.0, 0.0, 0.0, 0.0]))
        .await
        .unwrap_err();
    assert_eq!(e.code(), Code::InvalidArgument);
    // Refused by the limit, not by the map's length check ("expected 3 logits, got 4").
    assert!(e.message().contains("--max-classes"), "{e:?}");
    // The limit holds for a model that does not exist as well: no lookup happens.
    let mut unknown = row(vec![0.0; 4]);
    unknown.model = "nobody".into();
    let e = s.client.calibrate(unknown).await.unwrap_err();
    assert_eq!(e.code(), Code::InvalidArgument, "{e:?}");
    assert_eq!(s.stats.errors(Code::InvalidArgument), 2);
}

#[test]
fn maps_with_more_classes_than_the_limit_are_refused_at_load_with_the_reason() {
    let dir = tempfile::tempdir().unwrap();
    std::fs::write(dir.path().join("triage.json"), temperature_map().to_json()).unwrap();
    let registry = Registry::with_options(
        Some(dir.path()),
        RegistryOptions {
            max_classes: 2,
            ..RegistryOptions::default()
        },
    );
    let view = registry.rescan();
    assert!(!registry.is_ready());
    assert_eq!(view.rejections.len(), 1, "{view:?}");
    let reason = &view.rejections[0].reason;
    assert!(
        reason.contains("3 classes") && reason.contains("at most 2 (--max-classes)"),
        "{reason}"
    );
    // The same store loads under the default limit.
    let registry = Registry::with_store(dir.path());
    registry.rescan();
    assert!(registry.is_ready());
}

#[tokio::test]
async fn batches_over_max_batch_are_refused() {
    let mut s = start(Limits {
        max_batch: 2,
        ..Limits::default()
    })
    .await;
    let batch = |n: usize| CalibrateBatchRequest {
        rows: vec![row(vec![4.0, 0.0, 0.0]); n],
    };
    let ok = s.client.calibrate_batch(batch(2)).await.unwrap();
    assert_eq!(ok.into_inner().results.len(), 2);
    let e = s.client.calibrate_batch(batch(3)).await.unwrap_err();
    assert_eq!(e.code(), Code::InvalidArgument);
    assert!(e.message().contains("3 rows; at most 2"), "{e:?}");
}

#[tokio::test]
async fn beyond_the_in_flight_bound_requests_are_shed_at_once_and_counted() {
    let mut s = start(Limits {
        max_concurrent_requests: 1,
        ..Limits::default()
    })
    .await;
    // An open stream holds the only slot; its first answer proves it was admitted.
    let (tx, rx) = tokio::sync::mpsc::channel(4);
    tx.send(row(vec![4.0, 0.0, 0.0])).await.unwrap();
    let mut stream = s
        .client
        .calibrate_stream(tokio_stream::wrappers::ReceiverStream::new(rx))
        .await
        .unwrap()
        .into_inner();
    assert!(stream.message().await.unwrap().is_some());

    let e = s
        .client
        .calibrate(row(vec![4.0, 0.0, 0.0]))
        .await
        .unwrap_err();
    assert_eq!(e.code(), Code::ResourceExhausted, "{e:?}");
    let e = s
        .client
        .calibrate_batch(CalibrateBatchRequest { rows: vec![] })
        .await
        .unwrap_err();
    assert_eq!(e.code(), Code::ResourceExhausted, "{e:?}");
    assert_eq!(s.stats.errors(Code::ResourceExhausted), 2);

    // The client goes away: the server drops the stream and frees its slot. How soon depends
    // on the reset reaching the server, so ask until a request is admitted (each ask is a
    // round trip; a bounded number of them).
    drop(stream);
    drop(tx);
    const ASKS: usize = 10_000;
    let admitted = async {
        for _ in 0..ASKS {
            if s.client.calibrate(row(vec![4.0, 0.0, 0.0])).await.is_ok() {
                return true;
            }
        }
        false
    }
    .await;
    assert!(admitted, "the slot of a closed stream was never released");
}

/// Sends one Calibrate with `grpc-timeout: timeout` over a bare HTTP/2 connection and returns
/// the server's `grpc-status` (from the headers of a trailers-only answer, else the trailers).
async fn grpc_status_of_calibrate(addr: std::net::SocketAddr, timeout: &str) -> i32 {
    grpc_status_of(addr, "/candor.v1.Calibrator/Calibrate", timeout).await
}

/// [`grpc_status_of_calibrate`] for a call to `path`.
async fn grpc_status_of(addr: std::net::SocketAddr, path: &str, timeout: &str) -> i32 {
    use prost::Message as _;
    use tonic::codegen::http;
    let tcp = tokio::net::TcpStream::connect(addr).await.unwrap();
    let (client, connection) = h2::client::handshake(tcp).await.unwrap();
    tokio::spawn(connection);
    let mut client = client.ready().await.unwrap();
    let req = http::Request::post(format!("http://{addr}{path}"))
        .header("content-type", "application/grpc")
        .header("te", "trailers")
        .header("grpc-timeout", timeout)
        .body(())
        .unwrap();
    let (response, mut send) = client.send_request(req, false).unwrap();
    let msg = row(vec![4.0, 0.0, 0.0]).encode_to_vec();
    let mut frame = vec![0u8];
    frame.extend(u32::try_from(msg.len()).unwrap().to_be_bytes());
    frame.extend(msg);
    send.send_data(frame.into(), true).unwrap();
    let response = response.await.unwrap();
    let status = |h: &http::HeaderMap| {
        h.get("grpc-status")
            .map(|v| v.to_str().unwrap().parse::<i32>().unwrap())
    };
    if let Some(code) = status(response.headers()) {
        return code;
    }
    let mut body = response.into_body();
    while let Some(chunk) = body.data().await {
        let chunk = chunk.unwrap();
        let _ = body.flow_control().release_capacity(chunk.len());
    }
    let trailers = body.trailers().await.unwrap().expect("trailers");
    status(&trailers).expect("grpc-status in the trailers")
}

#[tokio::test]
async fn a_passed_deadline_gets_deadline_exceeded_and_streams_end_at_the_deadline() {
    let mut s = start(Limits::default()).await;
    // A tonic client enforces the deadline itself as well and may give up first, so the
    // server's own answer is read over a bare HTTP/2 connection.
    assert_eq!(
        grpc_status_of_calibrate(s.addr, "0n").await,
        Code::DeadlineExceeded as i32
    );
    assert_eq!(s.stats.errors(Code::DeadlineExceeded), 1);
    assert_eq!(
        grpc_status_of_calibrate(s.addr, "10S").await,
        Code::Ok as i32
    );

    // A stream with a 200 ms deadline answers until then, then ends with DEADLINE_EXCEEDED
    // although the client keeps it open.
    const STREAM_DEADLINE: Duration = Duration::from_millis(200);
    let (tx, rx) = tokio::sync::mpsc::channel(4);
    tx.send(row(vec![4.0, 0.0, 0.0])).await.unwrap();
    let mut req = tonic::Request::new(tokio_stream::wrappers::ReceiverStream::new(rx));
    req.set_timeout(STREAM_DEADLINE);
    let started = std::time::Instant::now();
    let mut stream = s.client.calibrate_stream(req).await.unwrap().into_inner();
    assert!(stream.message().await.unwrap().is_some());
    let e = stream.message().await.unwrap_err();
    assert_eq!(e.code(), Code::DeadlineExceeded, "{e:?}");
    assert!(started.elapsed() >= STREAM_DEADLINE);
    assert_eq!(s.stats.errors(Code::DeadlineExceeded), 2);
    drop(tx);
}

#[tokio::test]
async fn every_path_reaches_its_service_and_a_passed_deadline_is_refused_only_on_the_data_plane() {
    let s = start(Limits::default()).await;
    let status = |path: &'static str, timeout: &'static str| grpc_status_of(s.addr, path, timeout);
    // The calibrator's methods, and a method it does not have.
    assert_eq!(
        status("/candor.v1.Calibrator/Calibrate", "5S").await,
        Code::Ok as i32
    );
    assert_eq!(
        status("/candor.v1.Calibrator/NoSuchMethod", "5S").await,
        Code::Unimplemented as i32
    );
    // Health checking answers through the router: the Calibrate row read as a health request
    // names the service "triage" (field 1), which health checking does not know.
    assert_eq!(
        status("/grpc.health.v1.Health/Check", "5S").await,
        Code::NotFound as i32
    );
    // A service nobody serves, and one whose name only starts like the calibrator's.
    for path in ["/no.such.Service/Call", "/candor.v1.CalibratorX/Calibrate"] {
        assert_eq!(
            status(path, "5S").await,
            Code::Unimplemented as i32,
            "{path}"
        );
    }
    // A passed deadline is refused, and counted, on the data plane only.
    assert_eq!(
        status("/candor.v1.Calibrator/NoSuchMethod", "0n").await,
        Code::DeadlineExceeded as i32
    );
    assert_eq!(s.stats.errors(Code::DeadlineExceeded), 1);
    // Elsewhere the transport's own timer answers (CANCELLED) unless the service is quicker.
    let health = status("/grpc.health.v1.Health/Check", "0n").await;
    assert!(
        [Code::Cancelled as i32, Code::NotFound as i32].contains(&health),
        "{health}"
    );
    assert_eq!(s.stats.errors(Code::DeadlineExceeded), 1);
}
