//! End-to-end tests of the gRPC server: `serve_on` on 127.0.0.1:0 in a task, real tonic
//! clients over TCP, shutdown through a oneshot channel.
//!
//! Values are checked against the batch output (`compute_heights`) for the same file and
//! grid points; the protocol parts against the standard gRPC health and reflection services.

mod common;

use std::net::SocketAddr;
use std::sync::{Arc, OnceLock};
use std::time::Duration;

use hypsogrid::compute::{compute_heights, ComputeConfig};
use hypsogrid::demo::{write_demo_cycle, DEMO_FILE_NAME, DEMO_LEAD_HOURS, DEMO_LEVELS_HPA};
use hypsogrid::ingest::IngestConfig;
use hypsogrid::model::{Heights, Layer};
use hypsogrid::netcdf_session::NoFileOpen;
use hypsogrid::pb;
use hypsogrid::pb::height_service_client::HeightServiceClient;
use hypsogrid::query::LoadedCycle;
use hypsogrid::service::{serve_on, ServiceConfig, ServiceError, TlsFiles, SERVICE_NAME};
use hypsogrid::store::{CycleStore, StoreConfig};
use tokio::sync::oneshot;
use tokio::task::JoinHandle;
use tonic::metadata::MetadataValue;
use tonic::transport::Channel;
use tonic::{Code, Request};
use tonic_health::pb::health_check_response::ServingStatus;
use tonic_health::pb::health_client::HealthClient;
use tonic_health::pb::HealthCheckRequest;

const THICKNESS_1000_500: Layer = Layer {
    bottom_pa: 100_000.0,
    top_pa: 50_000.0,
};

/// The demo cycle loaded once, and the batch output for the same file.
struct Demo {
    /// Removed at exit ([`common::scratch`]).
    dir: std::path::PathBuf,
    batch: Heights,
}

fn demo() -> &'static Demo {
    static D: OnceLock<Demo> = OnceLock::new();
    D.get_or_init(|| {
        let dir = common::scratch::until_exit();
        let path = write_demo_cycle(&dir).expect("demo cycle");
        let lc = load(&path);
        let batch = compute_heights(
            &lc.cycle,
            &ComputeConfig {
                layers: vec![THICKNESS_1000_500],
                ..ComputeConfig::default()
            },
            &|_| {},
        )
        .expect("batch");
        Demo { dir, batch }
    })
}

fn load(path: &std::path::Path) -> LoadedCycle {
    LoadedCycle::load(path, &IngestConfig::default(), &ComputeConfig::default()).expect("load")
}

/// A store holding the demo cycle.
fn demo_store() -> Arc<CycleStore> {
    let store = Arc::new(CycleStore::new(StoreConfig::default()));
    store.insert(load(&demo().dir.join(DEMO_FILE_NAME)));
    store
}

struct Running {
    addr: SocketAddr,
    stop: oneshot::Sender<()>,
    task: JoinHandle<Result<(), ServiceError>>,
}

async fn start(store: Arc<CycleStore>, config: ServiceConfig) -> Running {
    let listener = tokio::net::TcpListener::bind("127.0.0.1:0")
        .await
        .expect("bind");
    let addr = listener.local_addr().expect("addr");
    let (stop, stopped) = oneshot::channel::<()>();
    let task = tokio::spawn(serve_on(listener, store, config, async move {
        // A dropped sender also means stop.
        let _ = stopped.await;
    }));
    Running { addr, stop, task }
}

impl Running {
    async fn channel(&self) -> Channel {
        let url = format!("http://{}", self.addr);
        // The server task may not have polled its listener yet; the socket is bound, so a
        // connection is queued by the kernel and accepted as soon as it does.
        Channel::from_shared(url)
            .expect("url")
            .connect()
            .await
            .expect("connect")
    }

    async fn shutdown(self) {
        let _ = self.stop.send(());
        let ended = tokio::time::timeout(Duration::from_secs(10), self.task)
            .await
            .expect("serve_on returns within 10 s of shutdown")
            .expect("server task");
        ended.expect("serve_on ends without error");
    }
}

fn lead(hours: i64) -> Option<pb::TimeSelection> {
    Some(pb::TimeSelection {
        kind: Some(pb::time_selection::Kind::LeadTimeS(hours * 3600)),
    })
}

fn thickness_q(bottom_pa: f64, top_pa: f64) -> pb::Quantity {
    pb::Quantity {
        kind: Some(pb::quantity::Kind::Thickness(pb::LayerBounds {
            bottom_pa,
            top_pa,
        })),
    }
}

fn height_q(pressure_pa: f64) -> pb::Quantity {
    pb::Quantity {
        kind: Some(pb::quantity::Kind::GeopotentialHeight(
            pb::HeightAtPressure { pressure_pa },
        )),
    }
}

/// The whole demo grid (50-62 N, 45-25 W), 1000-500 hPa thickness, at 24 h.
fn whole_grid_request() -> pb::AreaRequest {
    pb::AreaRequest {
        time: lead(24),
        quantities: vec![thickness_q(100_000.0, 50_000.0)],
        bbox: Some(pb::BoundingBox {
            south_deg: 50.0,
            north_deg: 62.0,
            west_deg: -45.0,
            east_deg: -25.0,
        }),
        ..Default::default()
    }
}

async fn health_of(channel: Channel, service: &str) -> ServingStatus {
    let r = HealthClient::new(channel)
        .check(HealthCheckRequest {
            service: service.to_string(),
        })
        .await
        .expect("health check")
        .into_inner();
    ServingStatus::try_from(r.status).expect("known status")
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn values_over_grpc_equal_the_batch_output() {
    let d = demo();
    let server = start(demo_store(), ServiceConfig::default()).await;
    let mut client = HeightServiceClient::new(server.channel().await);

    let catalogue = client
        .get_catalogue(pb::CatalogueRequest {})
        .await
        .expect("catalogue")
        .into_inner();
    assert_eq!(catalogue.cycles.len(), 1);
    assert_eq!(catalogue.cycles[0].id, DEMO_FILE_NAME);

    // Area: the on-level 1000-500 hPa thickness at every grid point of the demo grid.
    let mut stream = client
        .query_area(whole_grid_request())
        .await
        .expect("area")
        .into_inner();
    let t = DEMO_LEAD_HOURS.iter().position(|&h| h == 24).unwrap();
    let mut rows_seen = 0;
    let mut lons = Vec::new();
    let mut compared = 0;
    while let Some(chunk) = stream.message().await.expect("chunk") {
        assert_eq!(chunk.cycle_id, DEMO_FILE_NAME);
        assert_eq!(chunk.lead_time_s, 24 * 3600);
        assert_eq!(chunk.valid_time, "2031-01-15T00:00:00Z");
        if chunk.row_offset == 0 {
            lons = chunk.longitudes_deg.clone();
        }
        assert_eq!(lons.len(), 81);
        for (i, &lat) in chunk.latitudes_deg.iter().enumerate() {
            // The demo grid runs from 62 N southward every 0.25 deg, from 45 W eastward.
            let row = ((62.0 - lat) / 0.25).round() as usize;
            for (j, &lon) in lons.iter().enumerate() {
                let col = ((lon + 45.0) / 0.25).round() as usize;
                let got = chunk.fields[0].values[i * lons.len() + j];
                let want = d.batch.thickness[0].values[[0, t, row, col]];
                if want.is_nan() {
                    assert!(got.is_nan());
                } else {
                    // Difference of two f32 heights near 5.5 km: within 0.002 m.
                    assert!((got - want).abs() < 0.002, "({row},{col}): {got} vs {want}");
                    compared += 1;
                }
            }
        }
        rows_seen += chunk.latitudes_deg.len();
    }
    assert_eq!(rows_seen, 49);
    assert!(compared > 3000, "{compared}");

    // Position at a grid point: the stored 500 hPa height at every lead time.
    let (row, col) = (33, 17);
    let k500 = DEMO_LEVELS_HPA.iter().position(|&l| l == 500.0).unwrap();
    let r = client
        .query_position(pb::PositionRequest {
            points: vec![pb::GeoPoint {
                latitude_deg: 62.0 - 0.25 * row as f64,
                longitude_deg: -45.0 + 0.25 * col as f64,
            }],
            quantities: vec![height_q(50_000.0)],
            ..Default::default()
        })
        .await
        .expect("position")
        .into_inner();
    let samples = &r.series[0].samples;
    assert_eq!(samples.len(), DEMO_LEAD_HOURS.len());
    for (t, s) in samples.iter().enumerate() {
        let want = f64::from(d.batch.geopotential_height[[0, t, k500, row, col]]);
        assert!(
            (s.values[0] - want).abs() < 1e-3,
            "t={t}: {} vs {want}",
            s.values[0]
        );
    }

    // Errors travel with their codes and field names.
    let mut bad = whole_grid_request();
    bad.stride = Some(0);
    let s = client.query_area(bad).await.unwrap_err();
    assert_eq!(s.code(), Code::InvalidArgument);
    assert!(s.message().starts_with("stride: "), "{}", s.message());

    server.shutdown().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn small_messages_stream_in_chunks_that_reassemble_to_the_full_area() {
    let store = demo_store();
    let big = start(Arc::clone(&store), ServiceConfig::default()).await;
    let small = start(
        store,
        ServiceConfig {
            max_message_bytes: 4 * 1024,
            ..ServiceConfig::default()
        },
    )
    .await;
    let collect = |channel: Channel| async move {
        let mut client = HeightServiceClient::new(channel);
        let mut stream = client
            .query_area(whole_grid_request())
            .await
            .expect("area")
            .into_inner();
        let mut chunks = Vec::new();
        while let Some(c) = stream.message().await.expect("chunk") {
            chunks.push(c);
        }
        chunks
    };
    let one = collect(big.channel().await).await;
    let many = collect(small.channel().await).await;
    assert_eq!(one.len(), 1);
    assert!(many.len() >= 5, "{} chunks", many.len());
    let mut values = Vec::new();
    let mut flags = Vec::new();
    let mut lats = Vec::new();
    for c in &many {
        assert!(
            prost::Message::encoded_len(c) + 5 <= 4 * 1024,
            "a chunk of {} bytes",
            prost::Message::encoded_len(c)
        );
        assert_eq!(c.row_offset as usize, lats.len());
        lats.extend_from_slice(&c.latitudes_deg);
        values.extend(c.fields[0].values.iter().map(|v| v.to_bits()));
        flags.extend_from_slice(&c.fields[0].flags);
    }
    assert_eq!(lats, one[0].latitudes_deg);
    assert_eq!(many[0].longitudes_deg, one[0].longitudes_deg);
    let whole: Vec<u32> = one[0].fields[0]
        .values
        .iter()
        .map(|v| v.to_bits())
        .collect();
    assert_eq!(values, whole);
    assert_eq!(flags, one[0].fields[0].flags);
    big.shutdown().await;
    small.shutdown().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn health_follows_the_store_and_reflection_lists_the_service() {
    let store = Arc::new(CycleStore::new(StoreConfig::default()));
    let server = start(Arc::clone(&store), ServiceConfig::default()).await;
    let channel = server.channel().await;
    assert_eq!(
        health_of(channel.clone(), "").await,
        ServingStatus::NotServing
    );
    assert_eq!(
        health_of(channel.clone(), SERVICE_NAME).await,
        ServingStatus::NotServing
    );
    store.insert(load(&demo().dir.join(DEMO_FILE_NAME)));
    let mut serving = false;
    for _ in 0..100 {
        if health_of(channel.clone(), "").await == ServingStatus::Serving {
            serving = true;
            break;
        }
        tokio::time::sleep(Duration::from_millis(20)).await;
    }
    assert!(serving, "SERVING once a cycle is loaded");
    assert_eq!(
        health_of(channel.clone(), SERVICE_NAME).await,
        ServingStatus::Serving
    );

    // Reflection v1.
    {
        use tonic_reflection::pb::v1::server_reflection_client::ServerReflectionClient;
        use tonic_reflection::pb::v1::server_reflection_request::MessageRequest;
        use tonic_reflection::pb::v1::server_reflection_response::MessageResponse;
        use tonic_reflection::pb::v1::ServerReflectionRequest;
        let mut client = ServerReflectionClient::new(channel.clone());
        let requests = vec![
            ServerReflectionRequest {
                host: String::new(),
                message_request: Some(MessageRequest::ListServices(String::new())),
            },
            ServerReflectionRequest {
                host: String::new(),
                message_request: Some(MessageRequest::FileContainingSymbol(
                    "hypsogrid.v1.AreaRequest".into(),
                )),
            },
        ];
        let mut responses = client
            .server_reflection_info(tokio_stream::iter(requests))
            .await
            .expect("reflection v1")
            .into_inner();
        let first = responses.message().await.expect("v1").expect("a reply");
        let Some(MessageResponse::ListServicesResponse(list)) = first.message_response else {
            panic!("expected a service list, got {:?}", first.message_response);
        };
        let names: Vec<String> = list.service.into_iter().map(|s| s.name).collect();
        assert!(names.iter().any(|n| n == SERVICE_NAME), "{names:?}");
        assert!(
            names.iter().any(|n| n == "grpc.health.v1.Health"),
            "{names:?}"
        );
        let second = responses.message().await.expect("v1").expect("a reply");
        let Some(MessageResponse::FileDescriptorResponse(files)) = second.message_response else {
            panic!("expected descriptors, got {:?}", second.message_response);
        };
        assert!(!files.file_descriptor_proto.is_empty());
    }
    // Reflection v1alpha (what Python's grpcio-reflection speaks).
    {
        use tonic_reflection::pb::v1alpha::server_reflection_client::ServerReflectionClient;
        use tonic_reflection::pb::v1alpha::server_reflection_request::MessageRequest;
        use tonic_reflection::pb::v1alpha::server_reflection_response::MessageResponse;
        use tonic_reflection::pb::v1alpha::ServerReflectionRequest;
        let mut client = ServerReflectionClient::new(channel.clone());
        let request = ServerReflectionRequest {
            host: String::new(),
            message_request: Some(MessageRequest::ListServices(String::new())),
        };
        let mut responses = client
            .server_reflection_info(tokio_stream::iter(vec![request]))
            .await
            .expect("reflection v1alpha")
            .into_inner();
        let first = responses
            .message()
            .await
            .expect("v1alpha")
            .expect("a reply");
        let Some(MessageResponse::ListServicesResponse(list)) = first.message_response else {
            panic!("expected a service list, got {:?}", first.message_response);
        };
        assert!(list.service.iter().any(|s| s.name == SERVICE_NAME));
    }
    drop(channel);
    server.shutdown().await;
}

/// A health Watch on the whole server, after checking that its first message is SERVING.
async fn watch_serving(
    channel: tonic::transport::Channel,
) -> tonic::Streaming<tonic_health::pb::HealthCheckResponse> {
    let mut watch = HealthClient::new(channel)
        .watch(HealthCheckRequest {
            service: String::new(),
        })
        .await
        .expect("watch")
        .into_inner();
    let first = watch.message().await.expect("watch").expect("status");
    assert_eq!(first.status, ServingStatus::Serving as i32);
    watch
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn health_watch_sends_a_status_only_when_it_changes() {
    // gRPC health checking protocol (grpc/grpc doc/health-checking.md): Watch sends the
    // current status, then a new message whenever the status changes. The server used to
    // send SERVING a second time when its store follower started.
    let server = start(demo_store(), ServiceConfig::default()).await;
    let channel = server.channel().await;
    let mut watch = watch_serving(channel).await;
    let again = tokio::time::timeout(Duration::from_millis(300), watch.message()).await;
    assert!(
        again.is_err(),
        "no second message without a change: {again:?}"
    );
    drop(watch);
    server.shutdown().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn shutdown_lets_an_in_flight_request_finish_and_reports_not_serving() {
    let server = start(
        demo_store(),
        ServiceConfig {
            // Small messages: the whole grid takes many chunks, so the stream is still
            // going when shutdown starts.
            max_message_bytes: 4 * 1024,
            ..ServiceConfig::default()
        },
    )
    .await;
    let channel = server.channel().await;
    let mut watch = watch_serving(channel.clone()).await;

    let mut client = HeightServiceClient::new(channel.clone());
    let mut stream = client
        .query_area(whole_grid_request())
        .await
        .expect("area")
        .into_inner();
    let mut rows = stream
        .message()
        .await
        .expect("first chunk")
        .expect("a chunk")
        .latitudes_deg
        .len();
    assert!(rows < 49, "the area needs several chunks");

    let Running { addr, stop, task } = server;
    stop.send(()).expect("server still running");
    // Health goes NOT_SERVING first...
    let next = tokio::time::timeout(Duration::from_secs(5), watch.message())
        .await
        .expect("a status change")
        .expect("watch")
        .expect("status");
    assert_eq!(next.status, ServingStatus::NotServing as i32);
    drop(watch);
    // ...the request in flight completes...
    while let Some(chunk) = stream
        .message()
        .await
        .expect("chunk after shutdown started")
    {
        rows += chunk.latitudes_deg.len();
    }
    assert_eq!(rows, 49, "every row arrived");
    drop(stream);
    drop(client);
    drop(channel);
    // ...then serve_on returns, and no new connection is served.
    let ended = tokio::time::timeout(Duration::from_secs(10), task)
        .await
        .expect("serve_on returns")
        .expect("task");
    assert!(ended.is_ok(), "{ended:?}");
    let url = format!("http://{addr}");
    let late = Channel::from_shared(url).unwrap().connect().await;
    assert!(late.is_err(), "the listener is closed");
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn tokens_guard_the_service_but_not_health_and_deadlines_are_honoured() {
    let dir = tempfile::tempdir().unwrap();
    let tokens = dir.path().join("tokens");
    std::fs::write(&tokens, "# chart tooling\nk7-chart-tool\n").unwrap();
    let server = start(
        demo_store(),
        ServiceConfig {
            auth_tokens: Some(tokens),
            ..ServiceConfig::default()
        },
    )
    .await;
    let channel = server.channel().await;
    let mut client = HeightServiceClient::new(channel.clone());
    let s = client
        .get_catalogue(pb::CatalogueRequest {})
        .await
        .unwrap_err();
    assert_eq!(s.code(), Code::Unauthenticated);
    assert!(s.message().starts_with("authorization: "));
    let ok = client
        .get_catalogue(with_token(pb::CatalogueRequest {}))
        .await
        .expect("with a token");
    assert_eq!(ok.into_inner().cycles.len(), 1);
    // Health stays open for probes.
    assert_eq!(health_of(channel.clone(), "").await, ServingStatus::Serving);

    // A client deadline too short for any work: DEADLINE_EXCEEDED from the server. With 1 ms
    // the client's own timer can win the race on a loaded machine (the transport then says
    // CANCELLED); the server's answer must come through within a few tries.
    let mut codes = Vec::new();
    for _ in 0..10 {
        let mut r = with_token(pb::PositionRequest {
            points: vec![pb::GeoPoint {
                latitude_deg: 55.0,
                longitude_deg: -40.0,
            }],
            quantities: vec![height_q(50_000.0)],
            ..Default::default()
        });
        r.set_timeout(Duration::from_millis(1));
        let s = client.query_position(r).await.unwrap_err();
        codes.push(s.code());
        if s.code() == Code::DeadlineExceeded {
            break;
        }
        assert_eq!(
            s.code(),
            Code::Cancelled,
            "only the client's own timer may win: {s:?}"
        );
    }
    assert_eq!(
        codes.last(),
        Some(&Code::DeadlineExceeded),
        "the server answers DEADLINE_EXCEEDED: {codes:?}"
    );
    drop(client);
    drop(channel);
    server.shutdown().await;
}

/// A request carrying the test token.
fn with_token<T>(message: T) -> Request<T> {
    let mut r = Request::new(message);
    r.metadata_mut().insert(
        "authorization",
        MetadataValue::from_static("Bearer k7-chart-tool"),
    );
    r
}

/// Makes a certificate authority and a server certificate for `localhost` with the
/// `openssl` command; `None` when it is not installed.
fn make_certificates(dir: &std::path::Path) -> Option<(Vec<u8>, TlsFiles)> {
    let run = |args: &[&str]| {
        std::process::Command::new("openssl")
            .args(args)
            .current_dir(dir)
            .output_with_no_file_open()
            .map(|o| o.status.success())
            .unwrap_or(false)
    };
    let ext = dir.join("leaf.ext");
    std::fs::write(
        &ext,
        "basicConstraints=CA:FALSE\nsubjectAltName=DNS:localhost\nkeyUsage=digitalSignature\nextendedKeyUsage=serverAuth\n",
    )
    .ok()?;
    let steps: [&[&str]; 4] = [
        &[
            "req",
            "-x509",
            "-newkey",
            "ec",
            "-pkeyopt",
            "ec_paramgen_curve:P-256",
            "-nodes",
            "-keyout",
            "ca.key",
            "-out",
            "ca.pem",
            "-days",
            "2",
            "-subj",
            "/CN=hypsogrid test ca",
        ],
        &[
            "req",
            "-newkey",
            "ec",
            "-pkeyopt",
            "ec_paramgen_curve:P-256",
            "-nodes",
            "-keyout",
            "server.key",
            "-out",
            "server.csr",
            "-subj",
            "/CN=localhost",
        ],
        &[
            "x509",
            "-req",
            "-in",
            "server.csr",
            "-CA",
            "ca.pem",
            "-CAkey",
            "ca.key",
            "-CAcreateserial",
            "-out",
            "server.pem",
            "-days",
            "2",
            "-extfile",
            "leaf.ext",
        ],
        &["version"],
    ];
    for step in steps {
        if !run(step) {
            return None;
        }
    }
    let ca = std::fs::read(dir.join("ca.pem")).ok()?;
    Some((
        ca,
        TlsFiles {
            cert: dir.join("server.pem"),
            key: dir.join("server.key"),
        },
    ))
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn tls_serves_the_same_answers() {
    let dir = tempfile::tempdir().unwrap();
    let Some((ca, files)) = make_certificates(dir.path()) else {
        eprintln!("skipped: the openssl command is needed to make test certificates");
        return;
    };
    let server = start(
        demo_store(),
        ServiceConfig {
            tls: Some(files),
            ..ServiceConfig::default()
        },
    )
    .await;
    let tls = tonic::transport::ClientTlsConfig::new()
        .ca_certificate(tonic::transport::Certificate::from_pem(ca))
        .domain_name("localhost");
    let channel = Channel::from_shared(format!("https://localhost:{}", server.addr.port()))
        .unwrap()
        .tls_config(tls)
        .expect("client tls")
        .connect()
        .await
        .expect("tls connect");
    let r = HeightServiceClient::new(channel.clone())
        .get_catalogue(pb::CatalogueRequest {})
        .await
        .expect("catalogue over tls")
        .into_inner();
    assert_eq!(r.cycles[0].id, DEMO_FILE_NAME);
    // A plain-text client cannot talk to the TLS server.
    let plain = Channel::from_shared(format!("http://{}", server.addr))
        .unwrap()
        .connect()
        .await;
    if let Ok(plain) = plain {
        assert!(HeightServiceClient::new(plain)
            .get_catalogue(pb::CatalogueRequest {})
            .await
            .is_err());
    }
    drop(channel);
    server.shutdown().await;
}
