//! `hypsogrid serve`: settings from flags, environment and a TOML file; logging; startup scan;
//! the gRPC server with the folder watcher beside it; the metrics page on its own port;
//! token-file reload on SIGHUP; orderly shutdown on SIGTERM or Ctrl-C.
//!
//! A server on a non-loopback address must be protected by TLS or bearer tokens, or be told
//! with `--allow-insecure-remote` that an open port is intended.

use std::net::SocketAddr;
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::Arc;
use std::time::Duration;

use anyhow::{bail, Context, Result};
use serde::Deserialize;

use hypsogrid::compute::{ComputeConfig, NoSurfaceReference};
use hypsogrid::ingest::{load_config, IngestConfig};
use hypsogrid::metrics::Recorder;
use hypsogrid::products::guidance::GuidanceSettings;
use hypsogrid::query::Limits;
use hypsogrid::service::{serve_on, ReloadSignal, ServiceConfig, TlsFiles};
use hypsogrid::store::{CycleStore, StoreConfig};
use hypsogrid::watch::{scan_once, WatchConfig, WatchState};

use super::{parse_reference, Saturation, ServeArgs};

/// Default listen address: loopback only, so that a server started by hand is not reachable
/// from the network until asked.
pub(crate) const DEFAULT_LISTEN: &str = "127.0.0.1:50951";

/// The operations settings of `hypsogrid serve` (flattened into its arguments): client
/// certificates, exposure on the network, metrics, the office's guidance settings.
#[derive(Debug, Default, clap::Args)]
pub(crate) struct OpsArgs {
    /// CA certificate(s) (PEM) that sign client certificates: with TLS on, every client must
    /// present a certificate signed by it
    #[arg(long, value_name = "FILE", env = "HYPSOGRID_TLS_CLIENT_CA")]
    tls_client_ca: Option<PathBuf>,
    /// Listen on a non-loopback address even without TLS or tokens (say that an open port is
    /// intended, e.g. behind a proxy that does both); `--allow-insecure-remote=false` undoes
    /// a true value from the file [default: false]
    #[arg(
        long,
        value_name = "BOOL",
        env = "HYPSOGRID_ALLOW_INSECURE_REMOTE",
        num_args = 0..=1,
        require_equals = true,
        default_missing_value = "true",
        value_parser = clap::builder::BoolishValueParser::new()
    )]
    allow_insecure_remote: Option<bool>,
    /// Serve metrics (Prometheus text format) at http://ADDR/metrics; port 0 picks a free
    /// one (printed on stderr as `metrics on ADDR`) [default: off]
    #[arg(long, value_name = "ADDR", env = "HYPSOGRID_METRICS_LISTEN")]
    metrics_listen: Option<SocketAddr>,
    /// Guidance settings (TOML, the format of `hypsogrid guidance --settings`): the critical
    /// thicknesses, margins and elevation tiers that suit this office's climate and terrain;
    /// every guidance answer and chart starts from them, and a request's thresholds replace
    /// only the critical thicknesses it names [default: the built-in rules of thumb]
    #[arg(long, value_name = "FILE", env = "HYPSOGRID_GUIDANCE_SETTINGS")]
    guidance_settings: Option<PathBuf>,
}

/// Log format on stderr.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq, clap::ValueEnum, Deserialize)]
#[serde(rename_all = "lowercase")]
pub(crate) enum LogFormat {
    /// Lines for people.
    #[default]
    Human,
    /// One JSON object per line, for log collectors.
    Json,
}

// ---------------------------------------------------------------------------------------
// Sizes and durations as people write them
// ---------------------------------------------------------------------------------------

/// Parses a size: `8GiB`, `512MiB`, `64KiB`, `4MB` (decimal), or a number of bytes.
pub(crate) fn parse_bytes(text: &str) -> Result<u64, String> {
    let t = text.trim();
    let split = t.find(|c: char| c.is_ascii_alphabetic()).unwrap_or(t.len());
    let (number, unit) = (t[..split].trim(), t[split..].trim());
    let scale: u64 = match unit {
        "" | "B" => 1,
        "KiB" | "K" | "k" => 1 << 10,
        "MiB" | "M" => 1 << 20,
        "GiB" | "G" => 1 << 30,
        "TiB" | "T" => 1 << 40,
        "kB" | "KB" => 1_000,
        "MB" => 1_000_000,
        "GB" => 1_000_000_000,
        "TB" => 1_000_000_000_000,
        _ => 0,
    };
    let value: f64 = number.parse().unwrap_or(f64::NAN);
    if scale == 0 || !value.is_finite() || value < 0.0 {
        return Err(format!(
            "size '{text}': expected a number with B, KiB, MiB, GiB, TiB (or kB, MB, GB), e.g. 8GiB"
        ));
    }
    let bytes = value * scale as f64;
    if bytes > u64::MAX as f64 {
        return Err(format!("size '{text}' is too large"));
    }
    Ok(bytes.round() as u64)
}

/// Parses a duration: `500ms`, `2s`, `1.5s`, `10m`, `1h`, or a number of seconds.
pub(crate) fn parse_duration(text: &str) -> Result<Duration, String> {
    let t = text.trim();
    let split = t.find(|c: char| c.is_ascii_alphabetic()).unwrap_or(t.len());
    let (number, unit) = (t[..split].trim(), t[split..].trim());
    let scale = match unit {
        "ms" => 0.001,
        "" | "s" => 1.0,
        "m" | "min" => 60.0,
        "h" => 3600.0,
        _ => f64::NAN,
    };
    let seconds = number.parse::<f64>().unwrap_or(f64::NAN) * scale;
    if !seconds.is_finite() || seconds < 0.0 {
        return Err(format!(
            "duration '{text}': expected a number with ms, s, m or h, e.g. 2s or 500ms"
        ));
    }
    Duration::try_from_secs_f64(seconds).map_err(|_| format!("duration '{text}' is too large"))
}

/// A size in the config file: a number of bytes or a string such as "8GiB".
#[derive(Clone, Debug, Deserialize)]
#[serde(untagged)]
enum SizeValue {
    Bytes(u64),
    Text(String),
}

impl SizeValue {
    fn bytes(&self, key: &str) -> Result<u64> {
        match self {
            SizeValue::Bytes(b) => Ok(*b),
            SizeValue::Text(t) => parse_bytes(t).map_err(|e| anyhow::anyhow!("{key}: {e}")),
        }
    }
}

/// A duration in the config file: a number of seconds or a string such as "500ms".
#[derive(Clone, Debug, Deserialize)]
#[serde(untagged)]
enum DurationValue {
    Seconds(f64),
    Text(String),
}

impl DurationValue {
    fn duration(&self, key: &str) -> Result<Duration> {
        let parsed = match self {
            DurationValue::Seconds(s) => parse_duration(&s.to_string()),
            DurationValue::Text(t) => parse_duration(t),
        };
        parsed.map_err(|e| anyhow::anyhow!("{key}: {e}"))
    }
}

// ---------------------------------------------------------------------------------------
// The config file
// ---------------------------------------------------------------------------------------

/// The server config file. Every key is optional; unknown keys are refused so that a typo
/// does not pass silently. Relative paths are taken from the file's own folder.
#[derive(Debug, Default, Deserialize)]
#[serde(default, deny_unknown_fields)]
struct FileSettings {
    server: ServerTable,
    store: StoreTable,
    limits: LimitsTable,
    watch: WatchTable,
    security: SecurityTable,
    dataset: DatasetTable,
    metrics: MetricsTable,
    products: ProductsTable,
}

#[derive(Debug, Default, Deserialize)]
#[serde(default, deny_unknown_fields)]
struct ServerTable {
    data: Option<PathBuf>,
    listen: Option<SocketAddr>,
    log_format: Option<LogFormat>,
}

#[derive(Debug, Default, Deserialize)]
#[serde(default, deny_unknown_fields)]
struct StoreTable {
    keep_newest: Option<usize>,
    memory_budget: Option<SizeValue>,
}

#[derive(Debug, Default, Deserialize)]
#[serde(default, deny_unknown_fields)]
struct LimitsTable {
    max_points: Option<usize>,
    max_message_bytes: Option<SizeValue>,
    request_timeout: Option<DurationValue>,
    max_concurrent_requests: Option<usize>,
}

#[derive(Debug, Default, Deserialize)]
#[serde(default, deny_unknown_fields)]
struct WatchTable {
    poll_interval: Option<DurationValue>,
    settle: Option<DurationValue>,
    max_wait_for_growth: Option<DurationValue>,
}

#[derive(Debug, Default, Deserialize)]
#[serde(default, deny_unknown_fields)]
struct SecurityTable {
    auth_tokens: Option<PathBuf>,
    tls_cert: Option<PathBuf>,
    tls_key: Option<PathBuf>,
    tls_client_ca: Option<PathBuf>,
    allow_insecure_remote: Option<bool>,
}

#[derive(Debug, Default, Deserialize)]
#[serde(default, deny_unknown_fields)]
struct MetricsTable {
    listen: Option<SocketAddr>,
}

#[derive(Debug, Default, Deserialize)]
#[serde(default, deny_unknown_fields)]
struct ProductsTable {
    guidance_settings: Option<PathBuf>,
}

#[derive(Debug, Default, Deserialize)]
#[serde(default, deny_unknown_fields)]
struct DatasetTable {
    config: Option<PathBuf>,
    reference: Option<String>,
    saturation: Option<Saturation>,
}

fn read_file_settings(path: &Path) -> Result<FileSettings> {
    let text = std::fs::read_to_string(path)
        .with_context(|| format!("cannot read server config '{}'", path.display()))?;
    let mut settings: FileSettings = toml::from_str(&text)
        .map_err(|e| anyhow::anyhow!("server config '{}': {e}", path.display()))?;
    let base = path.parent().map(Path::to_path_buf).unwrap_or_default();
    let rebase = |p: &mut Option<PathBuf>| {
        if let Some(p) = p {
            if p.is_relative() {
                *p = base.join(&*p);
            }
        }
    };
    rebase(&mut settings.server.data);
    rebase(&mut settings.security.auth_tokens);
    rebase(&mut settings.security.tls_cert);
    rebase(&mut settings.security.tls_key);
    rebase(&mut settings.security.tls_client_ca);
    rebase(&mut settings.dataset.config);
    rebase(&mut settings.products.guidance_settings);
    Ok(settings)
}

// ---------------------------------------------------------------------------------------
// Resolved settings
// ---------------------------------------------------------------------------------------

/// Every setting of the server after flags, environment, file and defaults are merged.
#[derive(Debug)]
pub(crate) struct ServeSettings {
    pub(crate) data: PathBuf,
    pub(crate) listen: SocketAddr,
    pub(crate) keep_newest: usize,
    pub(crate) memory_budget_bytes: u64,
    pub(crate) max_points: usize,
    pub(crate) max_message_bytes: u64,
    pub(crate) request_timeout: Duration,
    pub(crate) max_concurrent_requests: usize,
    pub(crate) poll_interval: Duration,
    pub(crate) settle: Duration,
    pub(crate) max_wait_for_growth: Duration,
    pub(crate) auth_tokens: Option<PathBuf>,
    pub(crate) tls: Option<(PathBuf, PathBuf)>,
    pub(crate) tls_client_ca: Option<PathBuf>,
    pub(crate) allow_insecure_remote: bool,
    pub(crate) metrics_listen: Option<SocketAddr>,
    pub(crate) log_format: LogFormat,
    pub(crate) dataset: Option<PathBuf>,
    pub(crate) reference: NoSurfaceReference,
    pub(crate) saturation: Saturation,
    /// The guidance settings file, if one was given.
    pub(crate) guidance_file: Option<PathBuf>,
    /// Its settings (validated), or the defaults.
    pub(crate) guidance: GuidanceSettings,
}

impl ServeSettings {
    /// Merges the sources: flags and environment (clap has already put a flag before its
    /// variable), then the file, then the defaults.
    pub(crate) fn resolve(args: &ServeArgs) -> Result<Self> {
        let file = match &args.config {
            Some(path) => read_file_settings(path)?,
            None => FileSettings::default(),
        };
        let size = |flag: Option<u64>, file: &Option<SizeValue>, key: &str, default: u64| match (
            flag, file,
        ) {
            (Some(v), _) => Ok(v),
            (None, Some(v)) => v.bytes(key),
            (None, None) => Ok(default),
        };
        let duration =
            |flag: Option<Duration>, file: &Option<DurationValue>, key: &str, default: Duration| {
                match (flag, file) {
                    (Some(v), _) => Ok(v),
                    (None, Some(v)) => v.duration(key),
                    (None, None) => Ok(default),
                }
            };
        let reference = match (args.reference, &file.dataset.reference) {
            (Some(r), _) => r,
            (None, Some(text)) => {
                parse_reference(text).map_err(|e| anyhow::anyhow!("[dataset] reference: {e}"))?
            }
            (None, None) => NoSurfaceReference::default(),
        };
        let tls_cert = args.tls_cert.clone().or(file.security.tls_cert);
        let tls_key = args.tls_key.clone().or(file.security.tls_key);
        let tls = match (tls_cert, tls_key) {
            (Some(c), Some(k)) => Some((c, k)),
            (None, None) => None,
            (Some(_), None) => bail!("--tls-cert needs --tls-key (the certificate's private key)"),
            (None, Some(_)) => bail!("--tls-key needs --tls-cert (the certificate chain)"),
        };
        let guidance_file = args
            .ops
            .guidance_settings
            .clone()
            .or(file.products.guidance_settings);
        let guidance = super::products::guidance_settings(guidance_file.as_deref())?;
        let settings = Self {
            guidance_file,
            guidance,
            data: args
                .data
                .clone()
                .or(file.server.data)
                .unwrap_or_else(|| PathBuf::from(".")),
            listen: match args.listen.or(file.server.listen) {
                Some(a) => a,
                None => DEFAULT_LISTEN
                    .parse()
                    .context("the built-in listen address")?,
            },
            keep_newest: args.keep_newest.or(file.store.keep_newest).unwrap_or(8),
            memory_budget_bytes: size(
                args.memory_budget,
                &file.store.memory_budget,
                "[store] memory_budget",
                8 << 30,
            )?,
            max_points: args
                .max_points
                .or(file.limits.max_points)
                .unwrap_or(4_000_000),
            max_message_bytes: size(
                args.max_message_bytes,
                &file.limits.max_message_bytes,
                "[limits] max_message_bytes",
                4 << 20,
            )?,
            request_timeout: duration(
                args.request_timeout,
                &file.limits.request_timeout,
                "[limits] request_timeout",
                Duration::from_secs(30),
            )?,
            max_concurrent_requests: args
                .max_concurrent_requests
                .or(file.limits.max_concurrent_requests)
                .unwrap_or(64),
            poll_interval: duration(
                args.poll_interval,
                &file.watch.poll_interval,
                "[watch] poll_interval",
                Duration::from_secs(1),
            )?,
            settle: duration(
                args.settle,
                &file.watch.settle,
                "[watch] settle",
                Duration::from_secs(2),
            )?,
            max_wait_for_growth: duration(
                args.max_wait_for_growth,
                &file.watch.max_wait_for_growth,
                "[watch] max_wait_for_growth",
                Duration::from_secs(600),
            )?,
            auth_tokens: args.auth_tokens.clone().or(file.security.auth_tokens),
            tls,
            tls_client_ca: args
                .ops
                .tls_client_ca
                .clone()
                .or(file.security.tls_client_ca),
            allow_insecure_remote: args
                .ops
                .allow_insecure_remote
                .or(file.security.allow_insecure_remote)
                .unwrap_or(false),
            metrics_listen: args.ops.metrics_listen.or(file.metrics.listen),
            log_format: args
                .log_format
                .or(file.server.log_format)
                .unwrap_or_default(),
            dataset: args.dataset.clone().or(file.dataset.config),
            reference,
            saturation: args
                .saturation
                .or(file.dataset.saturation)
                .unwrap_or(Saturation::Wmo),
        };
        settings.validate()?;
        Ok(settings)
    }

    fn validate(&self) -> Result<()> {
        if self.keep_newest == 0 {
            bail!("keep_newest must be at least 1");
        }
        if self.max_points == 0 {
            bail!("max_points must be at least 1");
        }
        if self.max_concurrent_requests == 0 {
            bail!("max_concurrent_requests must be at least 1");
        }
        if self.max_message_bytes < 1024 {
            bail!(
                "max_message_bytes {} is too small: at least 1KiB",
                self.max_message_bytes
            );
        }
        if self.max_message_bytes > u64::from(u32::MAX) {
            bail!(
                "max_message_bytes {} is above the 4GiB that gRPC allows",
                self.max_message_bytes
            );
        }
        if self.poll_interval.is_zero() {
            bail!("poll_interval must be longer than zero");
        }
        if self.request_timeout.is_zero() {
            bail!("request_timeout must be longer than zero");
        }
        if self.tls_client_ca.is_some() && self.tls.is_none() {
            bail!("--tls-client-ca needs --tls-cert and --tls-key: client certificates are checked only over TLS");
        }
        if let Some(metrics) = self.metrics_listen {
            if metrics == self.listen && metrics.port() != 0 {
                bail!("--metrics-listen {metrics} is the gRPC address too: give the metrics a port of their own");
            }
        }
        self.check_exposure()?;
        if !self.data.is_dir() {
            bail!(
                "data folder '{}' does not exist or is not a folder",
                self.data.display()
            );
        }
        Ok(())
    }

    /// Refuses a non-loopback gRPC address that neither TLS nor tokens protect, unless
    /// `allow_insecure_remote` says that this is intended.
    fn check_exposure(&self) -> Result<()> {
        let protected = self.tls.is_some() || self.auth_tokens.is_some();
        if self.listen.ip().is_loopback() || protected || self.allow_insecure_remote {
            return Ok(());
        }
        bail!(
            "refusing to listen on {} without TLS or bearer tokens: protect it with --tls-cert/--tls-key or --auth-tokens, or pass --allow-insecure-remote (env HYPSOGRID_ALLOW_INSECURE_REMOTE=true, file [security] allow_insecure_remote = true) if an open port is intended",
            self.listen
        )
    }

    /// The dataset ingest config used for every file.
    pub(crate) fn ingest_config(&self) -> Result<IngestConfig> {
        Ok(match &self.dataset {
            Some(path) => load_config(path)?,
            None => IngestConfig::default(),
        })
    }

    /// The compute config: heights on every level (no layers: thickness is computed per
    /// request from the heights).
    pub(crate) fn compute_config(&self, ingest: &IngestConfig) -> ComputeConfig {
        ComputeConfig {
            layers: Vec::new(),
            no_surface_reference: self.reference,
            saturation_formula: self.saturation.formula(),
            rh_phase: ingest.rh_phase,
        }
    }
}

// ---------------------------------------------------------------------------------------
// Running
// ---------------------------------------------------------------------------------------

impl ServeSettings {
    pub(crate) fn store_config(&self) -> StoreConfig {
        StoreConfig {
            keep_newest: self.keep_newest,
            memory_budget_bytes: usize::try_from(self.memory_budget_bytes).unwrap_or(usize::MAX),
        }
    }

    pub(crate) fn watch_config(&self) -> WatchConfig {
        WatchConfig {
            dir: self.data.clone(),
            poll_interval: self.poll_interval,
            settle: self.settle,
            max_wait_for_growth: self.max_wait_for_growth,
        }
    }

    pub(crate) fn service_config(&self) -> ServiceConfig {
        ServiceConfig {
            limits: Limits {
                max_points: self.max_points,
            },
            // validate() keeps it below 4 GiB.
            max_message_bytes: usize::try_from(self.max_message_bytes).unwrap_or(usize::MAX),
            request_timeout: self.request_timeout,
            auth_tokens: self.auth_tokens.clone(),
            reload: None,
            tls: self.tls.as_ref().map(|(cert, key)| TlsFiles {
                cert: cert.clone(),
                key: key.clone(),
            }),
            tls_client_ca: self.tls_client_ca.clone(),
            max_concurrent_requests: self.max_concurrent_requests,
            metrics: None,
            guidance: self.guidance.clone(),
            guidance_file: self.guidance_file.clone(),
        }
    }
}

pub(super) fn run(args: ServeArgs) -> Result<()> {
    let settings = ServeSettings::resolve(&args)?;
    init_logging(settings.log_format);
    let ingest = settings.ingest_config()?;
    let compute = settings.compute_config(&ingest);
    let runtime = tokio::runtime::Builder::new_multi_thread()
        .enable_all()
        .thread_name("hypsogrid")
        .build()
        .context("starting the async runtime")?;
    let result = runtime.block_on(serve(settings, ingest, compute));
    // Do not wait for the tasks of a file load still running on a blocking thread...
    runtime.shutdown_background();
    // ...but for its read, if one is inside the NetCDF and HDF5 libraries: their exit
    // handlers must not run under it. The session lock is held for a file's whole read;
    // once it is ours, no thread is inside the libraries, and none enters before the
    // process has exited (the guard is never released).
    std::mem::forget(hypsogrid::netcdf_session::lock());
    result
}

/// Binds and serves at once, with the folder watcher beside it (its first scan loads what
/// the folder holds, newest first), until SIGTERM or Ctrl-C.
async fn serve(
    settings: ServeSettings,
    ingest: IngestConfig,
    compute: ComputeConfig,
) -> Result<()> {
    // Bind before the scan, so that a taken port fails at once rather than after loading.
    let listener = tokio::net::TcpListener::bind(settings.listen)
        .await
        .with_context(|| format!("cannot listen on {}", settings.listen))?;
    let address = listener.local_addr().context("reading the bound address")?;
    let metrics_listener = match settings.metrics_listen {
        Some(addr) => Some(
            tokio::net::TcpListener::bind(addr)
                .await
                .with_context(|| format!("cannot listen for metrics on {addr}"))?,
        ),
        None => None,
    };
    // Installed before the first scan, so that a SIGTERM during a long scan ends it in an orderly
    // stop rather than the default abrupt exit, and a SIGHUP does not end the process (its
    // default action).
    let signal = shutdown_signal()?;
    tokio::pin!(signal);
    let reload = ReloadSignal::new();
    let hangups = forward_hangups(reload.clone())?;
    let store = Arc::new(CycleStore::new(settings.store_config()));
    let (stop_tx, stop_rx) = tokio::sync::watch::channel(false);
    let stopped = |mut stop: tokio::sync::watch::Receiver<bool>| async move {
        // Either the signal task said stop, or it is gone: both end the serving.
        let _ = stop.wait_for(|stop| *stop).await;
    };
    let mut service_config = settings.service_config();
    service_config.reload = Some(reload);
    let g = &settings.guidance;
    tracing::info!(
        file = %settings
            .guidance_file
            .as_deref()
            .map_or_else(|| "built-in defaults".to_string(), |p| p.display().to_string()),
        settings = %g.one_line(),
        "guidance settings (guidance from model fields, not a forecast or warning: thresholds \
         must suit the local climate and terrain)"
    );
    let metrics = match metrics_listener {
        Some(metrics_listener) => {
            let recorder = Arc::new(Recorder::new());
            service_config.metrics = Some(Arc::clone(&recorder));
            let metrics_address = metrics_listener
                .local_addr()
                .context("reading the bound metrics address")?;
            tracing::info!(address = %metrics_address, "serving metrics at /metrics");
            // Tests and scripts read this line to learn the port chosen for port 0.
            eprintln!("metrics on {metrics_address}");
            Some(tokio::spawn(hypsogrid::metrics::serve_http(
                metrics_listener,
                recorder,
                Arc::clone(&store),
                stopped(stop_rx.clone()),
            )))
        }
        None => None,
    };
    let server = tokio::spawn(serve_on(
        listener,
        Arc::clone(&store),
        service_config,
        stopped(stop_rx.clone()),
    ));
    tracing::info!(
        %address,
        tls = settings.tls.is_some(),
        client_certificates = settings.tls_client_ca.is_some(),
        auth = settings.auth_tokens.is_some(),
        "serving hypsogrid.v1.HeightService, health and reflection"
    );
    // Scripts read this line to learn the port chosen for --listen 127.0.0.1:0.
    eprintln!("listening on {address}");

    // The startup scan is the watcher's first: health answers NOT_SERVING (and calls say no
    // cycle is loaded yet) until the first cycle is in, newest first, while the rest of the
    // folder loads behind it.
    let startup_scan_done = Arc::new(AtomicBool::new(false));
    let watcher = tokio::spawn(watch_folder(
        Arc::clone(&store),
        settings.watch_config(),
        ingest,
        compute,
        stop_rx.clone(),
        Arc::clone(&startup_scan_done),
    ));

    let mut server = server;
    let served = tokio::select! {
        name = &mut signal => {
            if startup_scan_done.load(Ordering::Acquire) {
                tracing::info!(signal = name, "shutting down");
            } else {
                tracing::info!(
                    signal = name,
                    cycles_loaded = store.snapshot().cycles.len(),
                    "shutting down during the startup scan: the files not yet loaded are read at the next start"
                );
            }
            // A file being read stops at its next step: the exit waits for that read.
            hypsogrid::netcdf_session::stop_reads();
            let _ = stop_tx.send(true);
            server.await
        }
        // The server stopped by itself: a transport failure. Stop the watcher too, and a
        // file being read at its next step (the exit waits for that read).
        finished = &mut server => {
            hypsogrid::netcdf_session::stop_reads();
            let _ = stop_tx.send(true);
            finished
        }
    };
    // A load in progress is not waited for: the process is stopping, and the file will be
    // read again at the next start.
    let mut watcher = watcher;
    if tokio::time::timeout(Duration::from_secs(2), &mut watcher)
        .await
        .is_err()
    {
        watcher.abort();
    }
    hangups.abort();
    if let Some(mut metrics) = metrics {
        match tokio::time::timeout(Duration::from_secs(2), &mut metrics).await {
            Ok(Ok(Err(error))) => tracing::warn!(%error, "the metrics listener failed"),
            Ok(_) => {}
            Err(_) => metrics.abort(),
        }
    }
    served
        .context("the server task stopped abnormally")?
        .context("serving")?;
    tracing::info!("stopped");
    Ok(())
}

/// The folder watcher: the startup scan (logged, with a `data folder scanned` line on stderr
/// that scripts and tests wait for), then a scan every poll interval until `stop`. Raises
/// `startup_scan_done` after the first scan, unless the process stopped during it.
async fn watch_folder(
    store: Arc<CycleStore>,
    config: WatchConfig,
    ingest: IngestConfig,
    compute: ComputeConfig,
    mut stop: tokio::sync::watch::Receiver<bool>,
    startup_scan_done: Arc<AtomicBool>,
) {
    let mut state = WatchState::new();
    let mut report = scan_once(&store, &mut state, &config, &ingest, &compute).await;
    if hypsogrid::netcdf_session::reads_stopped() {
        return;
    }
    tracing::info!(
        data = %config.dir.display(),
        loaded = report.loaded.len(),
        passed_over = report.passed_over.len(),
        failed = report.failed.len(),
        waiting = report.waiting.len(),
        "startup scan of the data folder done"
    );
    eprintln!(
        "data folder scanned: {} loaded, {} passed over, {} failed, {} waiting",
        report.loaded.len(),
        report.passed_over.len(),
        report.failed.len(),
        report.waiting.len()
    );
    startup_scan_done.store(true, Ordering::Release);
    loop {
        if let Some(error) = &report.folder_error {
            tracing::warn!(%error, "data folder scan failed");
        }
        tokio::select! {
            () = tokio::time::sleep(config.poll_interval) => {}
            changed = stop.changed() => {
                if changed.is_err() || *stop.borrow() {
                    return;
                }
            }
        }
        report = scan_once(&store, &mut state, &config, &ingest, &compute).await;
    }
}

/// Installs the SIGHUP handler now and raises `reload` on every SIGHUP: the token file is
/// then re-read (the server logs whether the new set took effect).
fn forward_hangups(reload: ReloadSignal) -> Result<tokio::task::JoinHandle<()>> {
    #[cfg(unix)]
    {
        use tokio::signal::unix::{signal, SignalKind};
        let mut hangup = signal(SignalKind::hangup()).context("listening for SIGHUP")?;
        Ok(tokio::spawn(async move {
            while hangup.recv().await.is_some() {
                tracing::info!(
                    signal = "SIGHUP",
                    "re-reading the token file and the guidance settings file"
                );
                reload.request();
            }
        }))
    }
    #[cfg(not(unix))]
    {
        // No SIGHUP: the token and guidance settings files are read at start only.
        let _ = reload;
        Ok(tokio::spawn(async {}))
    }
}

/// Installs the handlers now; the future resolves on SIGTERM or Ctrl-C (SIGINT) with the
/// signal's name.
fn shutdown_signal() -> Result<impl std::future::Future<Output = &'static str>> {
    #[cfg(unix)]
    {
        use tokio::signal::unix::{signal, SignalKind};
        let mut term = signal(SignalKind::terminate()).context("listening for SIGTERM")?;
        let mut interrupt = signal(SignalKind::interrupt()).context("listening for Ctrl-C")?;
        Ok(async move {
            tokio::select! {
                _ = term.recv() => "SIGTERM",
                _ = interrupt.recv() => "SIGINT",
            }
        })
    }
    #[cfg(not(unix))]
    {
        Ok(async {
            match tokio::signal::ctrl_c().await {
                Ok(()) => "Ctrl-C",
                Err(_) => std::future::pending().await,
            }
        })
    }
}

// ---------------------------------------------------------------------------------------
// Logging
// ---------------------------------------------------------------------------------------

/// Installs the tracing subscriber on stderr: RUST_LOG filters (default `info`), human or
/// JSON lines. A second call (tests, the demo) leaves the first subscriber in place.
pub(crate) fn init_logging(format: LogFormat) {
    use tracing_subscriber::EnvFilter;
    let filter = EnvFilter::try_from_default_env().unwrap_or_else(|_| EnvFilter::new("info"));
    let builder = tracing_subscriber::fmt()
        .with_env_filter(filter)
        .with_writer(std::io::stderr);
    let _ = match format {
        LogFormat::Human => builder
            .with_ansi(std::io::IsTerminal::is_terminal(&std::io::stderr()))
            .try_init(),
        LogFormat::Json => builder.json().with_current_span(true).try_init(),
    };
}

#[cfg(test)]
mod tests {
    use super::*;
    use clap::Parser;

    #[test]
    fn sizes_parse_binary_and_decimal_units() {
        assert_eq!(parse_bytes("8GiB"), Ok(8 << 30));
        assert_eq!(parse_bytes("512MiB"), Ok(512 << 20));
        assert_eq!(parse_bytes("1.5KiB"), Ok(1536));
        assert_eq!(parse_bytes("4MB"), Ok(4_000_000));
        assert_eq!(parse_bytes("1024"), Ok(1024));
        assert_eq!(parse_bytes(" 2 G "), Ok(2 << 30));
        assert!(parse_bytes("8 gallons").is_err());
        assert!(parse_bytes("-1").is_err());
        assert!(parse_bytes("").is_err());
    }

    #[test]
    fn durations_parse_with_units_and_bare_seconds() {
        assert_eq!(parse_duration("500ms"), Ok(Duration::from_millis(500)));
        assert_eq!(parse_duration("2s"), Ok(Duration::from_secs(2)));
        assert_eq!(parse_duration("1.5"), Ok(Duration::from_millis(1500)));
        assert_eq!(parse_duration("10m"), Ok(Duration::from_secs(600)));
        assert_eq!(parse_duration("1h"), Ok(Duration::from_secs(3600)));
        assert!(parse_duration("2 fortnights").is_err());
        assert!(parse_duration("-1s").is_err());
    }

    fn serve_args(extra: &[&str]) -> ServeArgs {
        let mut argv = vec!["hypsogrid", "serve"];
        argv.extend_from_slice(extra);
        match super::super::Cli::try_parse_from(argv) {
            Ok(cli) => match cli.command {
                super::super::Command::Serve(args) => args,
                other => panic!("parsed as {other:?}"),
            },
            Err(e) => panic!("{e}"),
        }
    }

    #[test]
    fn file_values_apply_below_flags_and_relative_paths_follow_the_file() {
        let dir = tempfile::tempdir().unwrap();
        std::fs::create_dir(dir.path().join("cycles")).unwrap();
        let config = dir.path().join("server.toml");
        std::fs::write(
            &config,
            r#"
[server]
data = "cycles"
listen = "127.0.0.1:6000"
log_format = "json"

[store]
keep_newest = 3
memory_budget = "2GiB"

[limits]
max_points = 1000
max_message_bytes = 1048576
request_timeout = "5s"
max_concurrent_requests = 4

[watch]
poll_interval = 0.25
settle = "750ms"
max_wait_for_growth = "1m"

[security]
auth_tokens = "tokens.txt"

[dataset]
reference = "standard"
saturation = "bolton"
"#,
        )
        .unwrap();
        let config_arg = config.to_string_lossy().into_owned();
        let s = ServeSettings::resolve(&serve_args(&[
            "--config",
            &config_arg,
            "--listen",
            "127.0.0.1:7000",
            "--keep-newest",
            "5",
        ]))
        .unwrap();
        // Flags win over the file.
        assert_eq!(s.listen, "127.0.0.1:7000".parse().unwrap());
        assert_eq!(s.keep_newest, 5);
        // The file wins over the defaults.
        assert_eq!(s.data, dir.path().join("cycles"));
        assert_eq!(s.log_format, LogFormat::Json);
        assert_eq!(s.memory_budget_bytes, 2 << 30);
        assert_eq!(s.max_points, 1000);
        assert_eq!(s.max_message_bytes, 1 << 20);
        assert_eq!(s.request_timeout, Duration::from_secs(5));
        assert_eq!(s.max_concurrent_requests, 4);
        assert_eq!(s.poll_interval, Duration::from_millis(250));
        assert_eq!(s.settle, Duration::from_millis(750));
        assert_eq!(s.max_wait_for_growth, Duration::from_secs(60));
        assert_eq!(s.auth_tokens, Some(dir.path().join("tokens.txt")));
        assert_eq!(s.reference, NoSurfaceReference::StandardAtmosphere);
        assert!(matches!(s.saturation, Saturation::Bolton));
    }

    #[test]
    fn defaults_apply_when_nothing_is_given() {
        let dir = tempfile::tempdir().unwrap();
        let data = dir.path().to_string_lossy().into_owned();
        let s = ServeSettings::resolve(&serve_args(&["--data", &data])).unwrap();
        assert_eq!(s.listen, DEFAULT_LISTEN.parse().unwrap());
        assert_eq!(s.keep_newest, 8);
        assert_eq!(s.memory_budget_bytes, 8 << 30);
        assert_eq!(s.max_points, 4_000_000);
        assert_eq!(s.max_message_bytes, 4 << 20);
        assert_eq!(s.poll_interval, Duration::from_secs(1));
        assert_eq!(s.settle, Duration::from_secs(2));
        assert_eq!(s.log_format, LogFormat::Human);
        assert!(s.tls.is_none() && s.auth_tokens.is_none());
    }

    #[test]
    fn bad_settings_are_refused_naming_the_setting() {
        let dir = tempfile::tempdir().unwrap();
        let data = dir.path().to_string_lossy().into_owned();
        let config = dir.path().join("server.toml");
        std::fs::write(&config, "[store]\nkeep_newst = 3\n").unwrap();
        let config_arg = config.to_string_lossy().into_owned();
        let e = ServeSettings::resolve(&serve_args(&["--data", &data, "--config", &config_arg]))
            .unwrap_err()
            .to_string();
        assert!(e.contains("keep_newst") && e.contains("server.toml"), "{e}");

        std::fs::write(&config, "[store]\nmemory_budget = \"lots\"\n").unwrap();
        let e = ServeSettings::resolve(&serve_args(&["--data", &data, "--config", &config_arg]))
            .unwrap_err()
            .to_string();
        assert!(e.contains("memory_budget"), "{e}");

        let e = ServeSettings::resolve(&serve_args(&["--data", &data, "--tls-cert", "c.pem"]))
            .unwrap_err()
            .to_string();
        assert!(e.contains("--tls-key"), "{e}");

        let e = ServeSettings::resolve(&serve_args(&["--data", "/no/such/folder"]))
            .unwrap_err()
            .to_string();
        assert!(e.contains("/no/such/folder"), "{e}");

        let e = ServeSettings::resolve(&serve_args(&["--data", &data, "--keep-newest", "0"]))
            .unwrap_err()
            .to_string();
        assert!(e.contains("keep_newest"), "{e}");
    }

    #[test]
    fn a_non_loopback_address_needs_tls_tokens_or_an_explicit_yes() {
        let dir = tempfile::tempdir().unwrap();
        let data = dir.path().to_string_lossy().into_owned();
        let resolve = |extra: &[&str]| {
            let mut argv = vec!["--data", data.as_str()];
            argv.extend_from_slice(extra);
            ServeSettings::resolve(&serve_args(&argv))
        };
        let e = resolve(&["--listen", "0.0.0.0:50951"])
            .unwrap_err()
            .to_string();
        assert!(e.contains("0.0.0.0:50951"), "{e}");
        assert!(e.contains("--allow-insecure-remote"), "{e}");
        assert!(
            e.contains("--auth-tokens") && e.contains("--tls-cert"),
            "{e}"
        );
        assert!(!e.contains('\n'), "one line: {e}");
        assert!(resolve(&["--listen", "192.0.2.7:50951"]).is_err());

        // Loopback, v4 or v6, needs nothing.
        assert!(resolve(&["--listen", "[::1]:0"]).is_ok());
        assert!(resolve(&["--listen", "127.0.0.9:0"]).is_ok());
        // Tokens or TLS protect it; so does saying that it is intended.
        assert!(resolve(&["--listen", "0.0.0.0:0", "--auth-tokens", "t.txt"]).is_ok());
        assert!(resolve(&[
            "--listen",
            "0.0.0.0:0",
            "--tls-cert",
            "c.pem",
            "--tls-key",
            "k.pem"
        ])
        .is_ok());
        let s = resolve(&["--listen", "0.0.0.0:0", "--allow-insecure-remote"]).unwrap();
        assert!(s.allow_insecure_remote);

        // From the file, and a flag that says false wins over the file.
        let config = dir.path().join("server.toml");
        std::fs::write(
            &config,
            "[server]\nlisten = \"0.0.0.0:0\"\n[security]\nallow_insecure_remote = true\n",
        )
        .unwrap();
        let config_arg = config.to_string_lossy().into_owned();
        assert!(resolve(&["--config", &config_arg]).is_ok());
        let e = resolve(&["--config", &config_arg, "--allow-insecure-remote=false"])
            .unwrap_err()
            .to_string();
        assert!(e.contains("0.0.0.0:0"), "{e}");
    }

    #[test]
    fn client_certificates_and_metrics_settings_resolve_and_are_checked() {
        let dir = tempfile::tempdir().unwrap();
        let data = dir.path().to_string_lossy().into_owned();
        let e =
            ServeSettings::resolve(&serve_args(&["--data", &data, "--tls-client-ca", "ca.pem"]))
                .unwrap_err()
                .to_string();
        assert!(
            e.contains("--tls-client-ca") && e.contains("--tls-cert"),
            "{e}"
        );

        let e = ServeSettings::resolve(&serve_args(&[
            "--data",
            &data,
            "--listen",
            "127.0.0.1:7001",
            "--metrics-listen",
            "127.0.0.1:7001",
        ]))
        .unwrap_err()
        .to_string();
        assert!(e.contains("127.0.0.1:7001"), "{e}");

        let config = dir.path().join("server.toml");
        std::fs::write(
            &config,
            "[security]\ntls_cert = \"s.pem\"\ntls_key = \"s.key\"\ntls_client_ca = \"ca.pem\"\n\n[metrics]\nlisten = \"127.0.0.1:9464\"\n",
        )
        .unwrap();
        let config_arg = config.to_string_lossy().into_owned();
        let s = ServeSettings::resolve(&serve_args(&["--data", &data, "--config", &config_arg]))
            .unwrap();
        assert_eq!(s.tls_client_ca, Some(dir.path().join("ca.pem")));
        assert_eq!(s.metrics_listen, Some("127.0.0.1:9464".parse().unwrap()));
        let service = s.service_config();
        assert_eq!(service.tls_client_ca, Some(dir.path().join("ca.pem")));
        assert_eq!(service.tls.map(|t| t.cert), Some(dir.path().join("s.pem")));

        let s = ServeSettings::resolve(&serve_args(&[
            "--data",
            &data,
            "--config",
            &config_arg,
            "--metrics-listen",
            "127.0.0.1:0",
        ]))
        .unwrap();
        assert_eq!(s.metrics_listen, Some("127.0.0.1:0".parse().unwrap()));
        let defaults = ServeSettings::resolve(&serve_args(&["--data", &data])).unwrap();
        assert!(defaults.metrics_listen.is_none() && !defaults.allow_insecure_remote);
    }
}
