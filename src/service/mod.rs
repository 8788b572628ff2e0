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
//! - TLS: a PEM certificate chain and private key (rustls with the ring provider).
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
/// Errors to `tonic::Status`, in one place.
pub mod status;

use std::future::Future;
use std::path::PathBuf;
use std::sync::Arc;
use std::time::Duration;

use tokio::sync::Mutex;
use tokio_stream::wrappers::TcpListenerStream;
use tonic::server::NamedService;
use tonic::transport::{Identity, Server, ServerTlsConfig};
use tonic_health::server::HealthReporter;
use tonic_health::ServingStatus;

pub use handlers::{HandlerSettings, HeightServiceHandlers};

use crate::pb::height_service_server::HeightServiceServer;
use crate::query::Limits;
use crate::store::CycleStore;

/// Encoded `FileDescriptorSet` of the `hypsogrid.v1` protos, for reflection.
pub const FILE_DESCRIPTOR_SET: &[u8] = tonic::include_file_descriptor_set!("hypsogrid_descriptor");

/// Full name of the project's gRPC service, as health checks and reflection list it.
pub const SERVICE_NAME: &str = <HeightServiceServer<HeightServiceHandlers> as NamedService>::NAME;

/// Settings of the server.
#[derive(Clone, Debug)]
pub struct ServiceConfig {
    /// Point limit of one answer.
    pub limits: Limits,
    /// Largest message sent or accepted, bytes (area answers are streamed in chunks that fit).
    pub max_message_bytes: usize,
    /// Longest a request may run, whatever the client's deadline.
    pub request_timeout: Duration,
    /// Token file (one token per line; blank lines and `#` comments ignored): when set, every
    /// call to the project's service must carry `authorization: Bearer <token>`.
    pub auth_tokens: Option<PathBuf>,
    /// Serve TLS with this certificate and key.
    pub tls: Option<TlsFiles>,
    /// Calls served at once; further calls are refused with RESOURCE_EXHAUSTED.
    pub max_concurrent_requests: usize,
}

impl Default for ServiceConfig {
    fn default() -> Self {
        Self {
            limits: Limits::default(),
            max_message_bytes: 4 * 1024 * 1024,
            request_timeout: Duration::from_secs(30),
            auth_tokens: None,
            tls: None,
            max_concurrent_requests: 64,
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
        /// "certificate" or "key".
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
    let handlers = HeightServiceHandlers::new(Arc::clone(&store), settings);

    let (reporter, health_service) = tonic_health::server::health_reporter();
    let health = Arc::new(HealthState {
        reporter,
        stopped: Mutex::new(false),
    });
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

    let mut builder = Server::builder();
    if let Some(tls) = &config.tls {
        let read = |what: &'static str, path: &PathBuf| {
            std::fs::read(path).map_err(|source| ServiceError::TlsFile {
                what,
                path: path.clone(),
                source,
            })
        };
        let identity = Identity::from_pem(read("certificate", &tls.cert)?, read("key", &tls.key)?);
        builder = builder.tls_config(ServerTlsConfig::new().identity(identity))?;
    }
    let mut builder = builder
        .concurrency_limit_per_connection(config.max_concurrent_requests)
        .load_shed(true);

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
        .add_service(service);
    let serving = router.serve_with_incoming_shutdown(TcpListenerStream::new(listener), signal);

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
    health.stop().await;
    result
}

/// The health reporter, and whether shutdown has begun (after which nothing sets SERVING).
struct HealthState {
    reporter: HealthReporter,
    stopped: Mutex<bool>,
}

impl HealthState {
    /// Sets both names SERVING or NOT_SERVING, unless shutdown has begun.
    async fn set(&self, serving: bool) {
        let stopped = self.stopped.lock().await;
        if *stopped {
            return;
        }
        let status = if serving {
            ServingStatus::Serving
        } else {
            ServingStatus::NotServing
        };
        self.reporter.set_service_status("", status).await;
        self.reporter.set_service_status(SERVICE_NAME, status).await;
    }

    /// NOT_SERVING for good.
    async fn stop(&self) {
        let mut stopped = self.stopped.lock().await;
        *stopped = true;
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
