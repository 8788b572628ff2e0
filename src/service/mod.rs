//! The gRPC service: `hypsogrid.v1.HeightService` over the cycles of a [`CycleStore`], beside
//! the standard `grpc.health.v1` health service and server reflection (v1 and v1alpha).
//!
//! This layer is the only place that knows tonic: wire types stay in [`crate::pb`], domain
//! types in [`crate::query`], and [`convert`] translates at the edge; [`status`] is the one
//! place where errors become status codes.
//!
//! - Health: the overall service (`""`) and `hypsogrid.v1.HeightService` are SERVING while the
//!   store holds at least one cycle, NOT_SERVING before that and from the moment shutdown
//!   starts.
//! - Auth: with a token file, every call to `HeightService` needs metadata
//!   `authorization: Bearer <token>`; health and reflection stay open for probes and tools.
//!   The file may hold SHA-256 digests instead of tokens ([`auth`]); a [`ReloadSignal`]
//!   re-reads it, swapping the whole set at once, and a bad new file leaves the old set.
//! - Guidance: every guidance answer starts from the server's settings
//!   ([`ServiceConfig::guidance`]); the same signal re-reads their file, with the same rule.
//! - TLS: a PEM certificate chain and private key (rustls with the ring provider); with a
//!   client CA, every client must present a certificate signed by it (mutual TLS).
//! - Metrics: with a [`Recorder`], every call to `HeightService` is counted by method and
//!   status code with its latency ([`crate::metrics`] serves the page).
//! - Load: at most `max_concurrent_requests` calls run at once across all connections, and
//!   the same number per connection through tower's concurrency-limit and load-shed layers;
//!   a call beyond that is refused at once with RESOURCE_EXHAUSTED rather than queued.
//! - Deadlines: a call gets the shorter of the client's `grpc-timeout` and the configured
//!   `request_timeout`, and answers DEADLINE_EXCEEDED when it runs out.

/// Bearer-token file and the constant-time check.
pub mod auth;
/// Wire (`pb`) to domain (`query`) and back.
pub mod convert;
/// The RPC handlers.
pub mod handlers;
/// The product RPCs: isolines, charts, guidance, ensembles, verification.
pub mod products;
/// Errors to `tonic::Status`, in one place.
pub mod status;

use std::future::Future;
use std::path::PathBuf;
use std::pin::Pin;
use std::sync::Arc;
use std::task::{Context, Poll};
use std::time::{Duration, Instant};

use tokio::sync::Mutex;
use tonic::server::NamedService;
use tonic::transport::{Certificate, Identity, Server, ServerTlsConfig};
use tonic::{Request, Response, Status};
use tonic_health::server::HealthReporter;
use tonic_health::ServingStatus;

pub use auth::ReloadSignal;
pub use handlers::{GuidanceInForce, HandlerSettings, HeightServiceHandlers};

use crate::metrics::{Method, Recorder};
use crate::pb;
use crate::pb::height_service_server::{HeightService, HeightServiceServer};
use crate::products::guidance::GuidanceSettings;
use crate::query::Limits;
use crate::store::CycleStore;

/// Encoded `FileDescriptorSet` of the `hypsogrid.v1` protos, for reflection.
pub const FILE_DESCRIPTOR_SET: &[u8] = tonic::include_file_descriptor_set!("hypsogrid_descriptor");

/// Full name of the project's gRPC service, as health checks and reflection list it.
pub const SERVICE_NAME: &str = <HeightServiceServer<HeightServiceHandlers> as NamedService>::NAME;

/// HTTP/2 stream flow-control window the server offers (and clients should offer), bytes.
pub const STREAM_WINDOW_BYTES: u32 = 4 << 20;
/// HTTP/2 connection flow-control window, bytes.
pub const CONNECTION_WINDOW_BYTES: u32 = 16 << 20;
/// Largest HTTP/2 frame the server accepts and this crate's clients advertise, bytes. A peer
/// may send frames only up to the size the other side advertises, 16 KiB unless it says
/// more: a 200 × 200 area answer (about 160 kB) then leaves as ten frames, each its own
/// `writev` on the sending side and two or three reads on the receiving side. Advertising
/// 1 MiB lets such an answer go as one frame (16 KiB frames: 16 `writev` and 26 reads a
/// request on loopback, counted with `strace -c`; 1 MiB: 4 and 4). Small frames interleave
/// streams more finely, which matters little at these sizes.
pub const MAX_FRAME_BYTES: u32 = 1 << 20;

/// Settings of the server.
#[derive(Clone, Debug)]
pub struct ServiceConfig {
    /// Point limit of one answer.
    pub limits: Limits,
    /// Largest message sent or accepted, bytes (area answers are streamed in chunks that fit).
    pub max_message_bytes: usize,
    /// Longest a request may run, whatever the client's deadline.
    pub request_timeout: Duration,
    /// Token file (one token or `sha256:<64 hex>` digest per line; blank lines and `#`
    /// comments ignored; see [`auth`]): when set, every call to the project's service must
    /// carry `authorization: Bearer <token>`.
    pub auth_tokens: Option<PathBuf>,
    /// Re-reads the token file and the guidance settings file whenever this signal is raised
    /// (the command line raises it on SIGHUP); a file that cannot be used is logged and what
    /// is in force stays. Without either file a request is logged and changes nothing.
    pub reload: Option<ReloadSignal>,
    /// Serve TLS with this certificate and key.
    pub tls: Option<TlsFiles>,
    /// PEM certificate(s) of the authority that signs client certificates: when set (it
    /// needs `tls`), every client must present a certificate signed by it.
    pub tls_client_ca: Option<PathBuf>,
    /// Calls served at once; further calls are refused with RESOURCE_EXHAUSTED.
    pub max_concurrent_requests: usize,
    /// Counts every call (method, status code, latency) when set.
    pub metrics: Option<Arc<Recorder>>,
    /// The guidance settings of this server (the office's thresholds and tiers, which must
    /// suit its climate and terrain): every guidance answer and chart starts from them, and
    /// a request's thresholds replace only the critical thicknesses it names.
    pub guidance: GuidanceSettings,
    /// The file `guidance` was read from, re-read on [`ServiceConfig::reload`].
    pub guidance_file: Option<PathBuf>,
}

impl Default for ServiceConfig {
    fn default() -> Self {
        Self {
            limits: Limits::default(),
            max_message_bytes: 4 * 1024 * 1024,
            request_timeout: Duration::from_secs(30),
            auth_tokens: None,
            reload: None,
            tls: None,
            tls_client_ca: None,
            max_concurrent_requests: 64,
            metrics: None,
            guidance: GuidanceSettings::default(),
            guidance_file: None,
        }
    }
}

/// A PEM certificate chain and its PEM private key.
#[derive(Clone, Debug)]
pub struct TlsFiles {
    /// Certificate chain, PEM.
    pub cert: PathBuf,
    /// Private key, PEM (PKCS #8, PKCS #1 or SEC1).
    pub key: PathBuf,
}

/// Why the server could not start or stopped with an error.
#[derive(Debug, thiserror::Error)]
pub enum ServiceError {
    /// A setting that cannot work.
    #[error("service setting {setting}: {message}")]
    InvalidSetting {
        /// The setting.
        setting: &'static str,
        /// What is wrong.
        message: String,
    },
    /// The token file could not be used.
    #[error(transparent)]
    Tokens(#[from] auth::TokenFileError),
    /// A TLS file could not be read.
    #[error("cannot read the tls {what} '{path}': {source}")]
    TlsFile {
        /// "certificate", "key" or "client ca".
        what: &'static str,
        /// The file.
        path: PathBuf,
        /// The operating system's error.
        #[source]
        source: std::io::Error,
    },
    /// Reflection could not be built from the descriptor set.
    #[error("server reflection: {0}")]
    Reflection(#[from] tonic_reflection::server::Error),
    /// The transport refused the TLS settings or failed while serving.
    #[error("grpc transport: {0}")]
    Transport(#[from] tonic::transport::Error),
}

impl ServiceConfig {
    /// Checks the settings and reads the token file into handler settings.
    pub fn handler_settings(&self) -> Result<HandlerSettings, ServiceError> {
        // A message must at least hold one small chunk; 1 KiB is far below any useful size.
        if self.max_message_bytes < 1024 {
            return Err(ServiceError::InvalidSetting {
                setting: "max_message_bytes",
                message: format!(
                    "{} is below the minimum of 1024 bytes",
                    self.max_message_bytes
                ),
            });
        }
        if self.max_concurrent_requests == 0 {
            return Err(ServiceError::InvalidSetting {
                setting: "max_concurrent_requests",
                message: "must be at least 1".into(),
            });
        }
        if self.request_timeout.is_zero() {
            return Err(ServiceError::InvalidSetting {
                setting: "request_timeout",
                message: "must be longer than zero".into(),
            });
        }
        if self.tls_client_ca.is_some() && self.tls.is_none() {
            return Err(ServiceError::InvalidSetting {
                setting: "tls_client_ca",
                message: "client certificates are checked only over tls: give the server's own certificate and key too".into(),
            });
        }
        self.guidance
            .validate()
            .map_err(|e| ServiceError::InvalidSetting {
                setting: "guidance",
                message: e.to_string(),
            })?;
        let tokens = match &self.auth_tokens {
            Some(path) => Some(auth::TokenSet::from_file(path)?),
            None => None,
        };
        Ok(HandlerSettings {
            limits: self.limits,
            max_message_bytes: self.max_message_bytes,
            request_timeout: self.request_timeout,
            tokens,
            max_concurrent_requests: self.max_concurrent_requests,
            guidance: GuidanceInForce::new(self.guidance.clone()),
        })
    }
}

/// Serves on an already-bound listener (tests bind 127.0.0.1:0) until `shutdown` resolves:
/// health goes NOT_SERVING first, in-flight requests finish, then it returns.
///
/// In-flight requests get up to `request_timeout` (plus one second) to finish after the
/// shutdown starts; connections still open after that (a health watch, say) are dropped.
pub async fn serve_on(
    listener: tokio::net::TcpListener,
    store: Arc<CycleStore>,
    config: ServiceConfig,
    shutdown: impl Future<Output = ()> + Send + 'static,
) -> Result<(), ServiceError> {
    let settings = config.handler_settings()?;
    let reloader = config.reload.clone().map(|signal| {
        let tokens = settings.tokens.clone().zip(config.auth_tokens.clone());
        let guidance = config
            .guidance_file
            .clone()
            .map(|path| (settings.guidance.clone(), path));
        tokio::spawn(reload_on_request(signal, tokens, guidance))
    });
    let handlers = Metered {
        inner: HeightServiceHandlers::new(Arc::clone(&store), settings),
        recorder: config.metrics.clone(),
    };

    let (reporter, health_service) = tonic_health::server::health_reporter();
    let health = Arc::new(HealthState::new(reporter));
    health.set(!store.snapshot().cycles.is_empty()).await;
    let follower = tokio::spawn(follow_store(Arc::clone(&store), Arc::clone(&health)));

    let reflection_v1 = tonic_reflection::server::Builder::configure()
        .register_encoded_file_descriptor_set(FILE_DESCRIPTOR_SET)
        .register_encoded_file_descriptor_set(tonic_health::pb::FILE_DESCRIPTOR_SET)
        .build_v1()?;
    let reflection_v1alpha = tonic_reflection::server::Builder::configure()
        .register_encoded_file_descriptor_set(FILE_DESCRIPTOR_SET)
        .register_encoded_file_descriptor_set(tonic_health::pb::FILE_DESCRIPTOR_SET)
        .build_v1alpha()?;

    // HTTP/2 flow-control windows: the default 64 KiB would make a 200 × 200 area answer
    // (about 200 kB) wait for several window updates from the client; these let one answer
    // go out in one flight on a local network. The frame size is what clients may send us.
    let mut builder = Server::builder()
        .initial_stream_window_size(Some(STREAM_WINDOW_BYTES))
        .initial_connection_window_size(Some(CONNECTION_WINDOW_BYTES))
        .max_frame_size(Some(MAX_FRAME_BYTES));
    if let Some(tls) = &config.tls {
        let read = |what: &'static str, path: &PathBuf| {
            std::fs::read(path).map_err(|source| ServiceError::TlsFile {
                what,
                path: path.clone(),
                source,
            })
        };
        let identity = Identity::from_pem(read("certificate", &tls.cert)?, read("key", &tls.key)?);
        let mut tls_config = ServerTlsConfig::new().identity(identity);
        if let Some(ca) = &config.tls_client_ca {
            // Required, not optional: a client without a certificate from this authority
            // fails the handshake.
            tls_config = tls_config.client_ca_root(Certificate::from_pem(read("client ca", ca)?));
        }
        builder = builder.tls_config(tls_config)?;
    }
    let mut builder = builder
        .concurrency_limit_per_connection(config.max_concurrent_requests)
        .load_shed(true);

    let products = crate::pb::product_service_server::ProductServiceServer::new(handlers.clone())
        .max_decoding_message_size(config.max_message_bytes)
        .max_encoding_message_size(config.max_message_bytes);
    let service = HeightServiceServer::new(handlers)
        .max_decoding_message_size(config.max_message_bytes)
        .max_encoding_message_size(config.max_message_bytes);

    let (drain_tx, drain_rx) = tokio::sync::oneshot::channel::<()>();
    let signal_health = Arc::clone(&health);
    let signal = async move {
        shutdown.await;
        tracing::info!("shutdown: health NOT_SERVING, finishing in-flight requests");
        signal_health.stop().await;
        // Tell the grace timer below that draining has begun; if it has gone, so has the
        // server.
        let _ = drain_tx.send(());
    };
    let router = builder
        .add_service(health_service)
        .add_service(reflection_v1)
        .add_service(reflection_v1alpha)
        .add_service(service)
        .add_service(products);
    // TCP_NODELAY: without it Nagle's algorithm holds each small response for the peer's
    // delayed ACK, about 40 ms a request even on loopback.
    let incoming = tonic::transport::server::TcpIncoming::from(listener).with_nodelay(Some(true));
    let serving = router.serve_with_incoming_shutdown(incoming, signal);

    let grace = config.request_timeout + Duration::from_secs(1);
    let result = tokio::select! {
        r = serving => r.map_err(ServiceError::from),
        () = async {
            if drain_rx.await.is_ok() {
                tokio::time::sleep(grace).await;
            } else {
                std::future::pending::<()>().await;
            }
        } => {
            tracing::warn!(grace_s = grace.as_secs_f64(), "shutdown: connections still open after the grace period were dropped");
            Ok(())
        }
    };
    follower.abort();
    if let Some(reloader) = reloader {
        reloader.abort();
    }
    health.stop().await;
    result
}

/// On every request of `signal`, forever: re-reads the token file into its set and the
/// guidance settings file into the settings in force, where configured. A file that cannot
/// be used is logged and what is in force stays in force.
async fn reload_on_request(
    signal: ReloadSignal,
    tokens: Option<(auth::TokenSet, PathBuf)>,
    guidance: Option<(GuidanceInForce, PathBuf)>,
) {
    loop {
        signal.requested().await;
        if tokens.is_none() && guidance.is_none() {
            tracing::info!(
                "reload asked for, but neither a token file nor a guidance settings file is configured"
            );
        }
        if let Some((set, path)) = &tokens {
            auth::reload_tokens(set, path).await;
        }
        if let Some((in_force, path)) = &guidance {
            let read_path = path.clone();
            let read =
                tokio::task::spawn_blocking(move || GuidanceSettings::from_toml_file(&read_path))
                    .await;
            match read {
                Ok(Ok(next)) => {
                    tracing::info!(
                        file = %path.display(),
                        settings = %next.one_line(),
                        "guidance settings re-read; the new settings are in force"
                    );
                    in_force.replace(next);
                }
                Ok(Err(error)) => tracing::warn!(
                    file = %path.display(),
                    %error,
                    "guidance settings not re-read; the previous settings stay in force"
                ),
                Err(error) => tracing::warn!(
                    file = %path.display(),
                    %error,
                    "guidance settings re-read failed; the previous settings stay in force"
                ),
            }
        }
    }
}

/// The handlers with every call counted: method, final status code and latency. Counting is
/// a few atomic additions ([`Recorder`]); without a recorder this only forwards.
#[derive(Clone, Debug)]
struct Metered {
    inner: HeightServiceHandlers,
    recorder: Option<Arc<Recorder>>,
}

impl Metered {
    fn record<T>(&self, method: Method, started: Instant, result: &Result<T, Status>) {
        if let Some(recorder) = &self.recorder {
            let code = match result {
                Ok(_) => tonic::Code::Ok,
                Err(status) => status.code(),
            };
            recorder.record_request(method, i32::from(code), started.elapsed());
        }
    }
}

#[tonic::async_trait]
impl HeightService for Metered {
    async fn get_catalogue(
        &self,
        request: Request<pb::CatalogueRequest>,
    ) -> Result<Response<pb::CatalogueResponse>, Status> {
        let started = Instant::now();
        let result = self.inner.get_catalogue(request).await;
        self.record(Method::GetCatalogue, started, &result);
        result
    }

    type QueryAreaStream = handlers::AreaStream;

    async fn query_area(
        &self,
        request: Request<pb::AreaRequest>,
    ) -> Result<Response<Self::QueryAreaStream>, Status> {
        let started = Instant::now();
        match self.inner.query_area(request).await {
            Ok(response) => match &self.recorder {
                // The call ends with its stream: count it then, with the stream's outcome.
                Some(recorder) => Ok(response.map(|stream| {
                    Box::pin(MeteredStream {
                        inner: stream,
                        recorder: Some(Arc::clone(recorder)),
                        started,
                    }) as handlers::AreaStream
                })),
                None => Ok(response),
            },
            Err(status) => {
                if let Some(recorder) = &self.recorder {
                    recorder.record_request(
                        Method::QueryArea,
                        i32::from(status.code()),
                        started.elapsed(),
                    );
                }
                Err(status)
            }
        }
    }

    async fn query_position(
        &self,
        request: Request<pb::PositionRequest>,
    ) -> Result<Response<pb::PositionResponse>, Status> {
        let started = Instant::now();
        let result = self.inner.query_position(request).await;
        self.record(Method::QueryPosition, started, &result);
        result
    }

    async fn query_profile(
        &self,
        request: Request<pb::ProfileRequest>,
    ) -> Result<Response<pb::ProfileResponse>, Status> {
        let started = Instant::now();
        let result = self.inner.query_profile(request).await;
        self.record(Method::QueryProfile, started, &result);
        result
    }

    async fn query_trajectory(
        &self,
        request: Request<pb::TrajectoryRequest>,
    ) -> Result<Response<pb::TrajectoryResponse>, Status> {
        let started = Instant::now();
        let result = self.inner.query_trajectory(request).await;
        self.record(Method::QueryTrajectory, started, &result);
        result
    }
}

/// The product service, counted the same way as the height service.
#[tonic::async_trait]
impl crate::pb::product_service_server::ProductService for Metered {
    async fn get_isolines(
        &self,
        request: Request<pb::IsolinesRequest>,
    ) -> Result<Response<pb::IsolinesResponse>, Status> {
        let started = Instant::now();
        let result =
            crate::pb::product_service_server::ProductService::get_isolines(&self.inner, request)
                .await;
        self.record(Method::GetIsolines, started, &result);
        result
    }

    async fn render_chart(
        &self,
        request: Request<pb::ChartRequest>,
    ) -> Result<Response<pb::ChartResponse>, Status> {
        let started = Instant::now();
        let result =
            crate::pb::product_service_server::ProductService::render_chart(&self.inner, request)
                .await;
        self.record(Method::RenderChart, started, &result);
        result
    }

    async fn get_guidance_area(
        &self,
        request: Request<pb::GuidanceAreaRequest>,
    ) -> Result<Response<pb::GuidanceAreaResponse>, Status> {
        let started = Instant::now();
        let result = crate::pb::product_service_server::ProductService::get_guidance_area(
            &self.inner,
            request,
        )
        .await;
        self.record(Method::GetGuidanceArea, started, &result);
        result
    }

    async fn get_guidance_points(
        &self,
        request: Request<pb::GuidancePointsRequest>,
    ) -> Result<Response<pb::GuidancePointsResponse>, Status> {
        let started = Instant::now();
        let result = crate::pb::product_service_server::ProductService::get_guidance_points(
            &self.inner,
            request,
        )
        .await;
        self.record(Method::GetGuidancePoints, started, &result);
        result
    }

    async fn get_ensemble_area(
        &self,
        request: Request<pb::EnsembleAreaRequest>,
    ) -> Result<Response<pb::EnsembleAreaResponse>, Status> {
        let started = Instant::now();
        let result = crate::pb::product_service_server::ProductService::get_ensemble_area(
            &self.inner,
            request,
        )
        .await;
        self.record(Method::GetEnsembleArea, started, &result);
        result
    }

    async fn get_ensemble_points(
        &self,
        request: Request<pb::EnsemblePointsRequest>,
    ) -> Result<Response<pb::EnsemblePointsResponse>, Status> {
        let started = Instant::now();
        let result = crate::pb::product_service_server::ProductService::get_ensemble_points(
            &self.inner,
            request,
        )
        .await;
        self.record(Method::GetEnsemblePoints, started, &result);
        result
    }

    async fn verify(
        &self,
        request: Request<pb::VerifyRequest>,
    ) -> Result<Response<pb::VerifyResponse>, Status> {
        let started = Instant::now();
        let result =
            crate::pb::product_service_server::ProductService::verify(&self.inner, request).await;
        self.record(Method::Verify, started, &result);
        result
    }
}

/// An area stream that counts its call once, when it ends: OK at the end of the stream, the
/// code of the first error it carries, or CANCELLED when the client goes away first (the
/// stream is dropped unfinished).
struct MeteredStream {
    inner: handlers::AreaStream,
    /// Taken when the call has been counted.
    recorder: Option<Arc<Recorder>>,
    started: Instant,
}

impl MeteredStream {
    fn count(&mut self, code: tonic::Code) {
        if let Some(recorder) = self.recorder.take() {
            recorder.record_request(Method::QueryArea, i32::from(code), self.started.elapsed());
        }
    }
}

impl tokio_stream::Stream for MeteredStream {
    type Item = Result<pb::AreaChunk, Status>;

    fn poll_next(self: Pin<&mut Self>, cx: &mut Context<'_>) -> Poll<Option<Self::Item>> {
        let this = self.get_mut();
        let next = this.inner.as_mut().poll_next(cx);
        match &next {
            Poll::Ready(None) => this.count(tonic::Code::Ok),
            Poll::Ready(Some(Err(status))) => this.count(status.code()),
            Poll::Ready(Some(Ok(_))) | Poll::Pending => {}
        }
        next
    }
}

impl Drop for MeteredStream {
    fn drop(&mut self) {
        self.count(tonic::Code::Cancelled);
    }
}

/// The health reporter, and what it last reported.
struct HealthState {
    reporter: HealthReporter,
    state: Mutex<Reported>,
}

/// What the health service has been told so far.
#[derive(Default)]
struct Reported {
    /// The status last set on both names, if any.
    last: Option<ServingStatus>,
    /// Shutdown has begun: nothing sets SERVING again.
    stopped: bool,
}

impl HealthState {
    fn new(reporter: HealthReporter) -> Self {
        Self {
            reporter,
            state: Mutex::new(Reported::default()),
        }
    }

    /// Sets both names SERVING or NOT_SERVING, unless shutdown has begun or that is already
    /// the status: the health protocol's Watch sends a message when the status changes, and
    /// the reporter would otherwise send the same status again to every watcher (as when the
    /// store follower starts and confirms the status the server started with).
    async fn set(&self, serving: bool) {
        let mut state = self.state.lock().await;
        let status = if serving {
            ServingStatus::Serving
        } else {
            ServingStatus::NotServing
        };
        if state.stopped || state.last == Some(status) {
            return;
        }
        state.last = Some(status);
        self.reporter.set_service_status("", status).await;
        self.reporter.set_service_status(SERVICE_NAME, status).await;
    }

    /// NOT_SERVING for good.
    async fn stop(&self) {
        let mut state = self.state.lock().await;
        state.stopped = true;
        if state.last == Some(ServingStatus::NotServing) {
            return;
        }
        state.last = Some(ServingStatus::NotServing);
        for name in ["", SERVICE_NAME] {
            self.reporter
                .set_service_status(name, ServingStatus::NotServing)
                .await;
        }
    }
}

/// Follows the store's generation: SERVING while it holds at least one cycle.
async fn follow_store(store: Arc<CycleStore>, health: Arc<HealthState>) {
    let mut changes = store.on_change();
    loop {
        health.set(!store.snapshot().cycles.is_empty()).await;
        if changes.changed().await.is_err() {
            // The store is gone; so is anything to serve.
            health.set(false).await;
            return;
        }
    }
}
