//! Operational metrics in the Prometheus text exposition format (version 0.0.4), served over
//! plain HTTP/1.1 on a port of their own.
//!
//! [`Recorder`] is the one place where the service counts: requests by method and gRPC status
//! code, a latency histogram per method with fixed buckets, load failures and evictions of the
//! [`CycleStore`]. Counting is a few relaxed atomic additions, with no lock, so it costs the
//! request path nothing measurable. Gauges (cycles loaded, the newest cycle's age, memory
//! held) are read from the store's current snapshot when the page is rendered, so they are
//! never stale.
//!
//! [`serve_http`] is a deliberately tiny HTTP/1.1 responder: `GET /metrics` (and `HEAD`) only,
//! one request per connection, a bounded request head and read time, a bounded number of
//! connections at once. It never reads a file and has nothing to configure.
//!
//! The families exposed:
//!
//! | name | type | labels |
//! |---|---|---|
//! | `hypsogrid_requests_total` | counter | `method`, `code` |
//! | `hypsogrid_request_duration_seconds` | histogram | `method` |
//! | `hypsogrid_cycles_loaded` | gauge | |
//! | `hypsogrid_newest_cycle_reference_age_seconds` | gauge | |
//! | `hypsogrid_newest_cycle_load_age_seconds` | gauge | |
//! | `hypsogrid_cycle_memory_bytes` | gauge | |
//! | `hypsogrid_cycle_load_seconds` | gauge | `cycle_id` |
//! | `hypsogrid_cycle_steps_without_heights` | gauge | `state` (`computing`, `failed`) |
//! | `hypsogrid_failed_files` | gauge | |
//! | `hypsogrid_cycle_load_failures_total` | counter | |
//! | `hypsogrid_cycle_evictions_total` | counter | |

use std::fmt::Write as _;
use std::future::Future;
use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::Arc;
use std::time::{Duration, SystemTime, UNIX_EPOCH};

use tokio::io::{AsyncReadExt, AsyncWriteExt};
use tokio::net::{TcpListener, TcpStream};
use tokio::sync::Semaphore;

use crate::store::{CycleStore, Snapshot};

/// The methods of `hypsogrid.v1.HeightService`, as the metrics label them.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Method {
    /// `GetCatalogue`.
    GetCatalogue,
    /// `QueryArea` (server streaming: its latency runs to the end of the stream).
    QueryArea,
    /// `QueryPosition`.
    QueryPosition,
    /// `QueryProfile`.
    QueryProfile,
    /// `QueryTrajectory`.
    QueryTrajectory,
    /// `ProductService.GetIsolines`.
    GetIsolines,
    /// `ProductService.RenderChart`.
    RenderChart,
    /// `ProductService.GetGuidanceArea`.
    GetGuidanceArea,
    /// `ProductService.GetGuidancePoints`.
    GetGuidancePoints,
    /// `ProductService.GetEnsembleArea`.
    GetEnsembleArea,
    /// `ProductService.GetEnsemblePoints`.
    GetEnsemblePoints,
    /// `ProductService.Verify`.
    Verify,
}

impl Method {
    /// Every method, in label order.
    pub const ALL: [Method; 12] = [
        Method::GetCatalogue,
        Method::QueryArea,
        Method::QueryPosition,
        Method::QueryProfile,
        Method::QueryTrajectory,
        Method::GetIsolines,
        Method::RenderChart,
        Method::GetGuidanceArea,
        Method::GetGuidancePoints,
        Method::GetEnsembleArea,
        Method::GetEnsemblePoints,
        Method::Verify,
    ];

    /// The method's name in the protos, used as the `method` label.
    pub fn name(self) -> &'static str {
        match self {
            Method::GetCatalogue => "GetCatalogue",
            Method::QueryArea => "QueryArea",
            Method::QueryPosition => "QueryPosition",
            Method::QueryProfile => "QueryProfile",
            Method::QueryTrajectory => "QueryTrajectory",
            Method::GetIsolines => "GetIsolines",
            Method::RenderChart => "RenderChart",
            Method::GetGuidanceArea => "GetGuidanceArea",
            Method::GetGuidancePoints => "GetGuidancePoints",
            Method::GetEnsembleArea => "GetEnsembleArea",
            Method::GetEnsemblePoints => "GetEnsemblePoints",
            Method::Verify => "Verify",
        }
    }

    fn index(self) -> usize {
        self as usize
    }
}

/// The gRPC status code names, indexed by code number (gRPC's `doc/statuscodes.md`), used as
/// the `code` label.
pub const GRPC_CODE_NAMES: [&str; 17] = [
    "OK",
    "CANCELLED",
    "UNKNOWN",
    "INVALID_ARGUMENT",
    "DEADLINE_EXCEEDED",
    "NOT_FOUND",
    "ALREADY_EXISTS",
    "PERMISSION_DENIED",
    "RESOURCE_EXHAUSTED",
    "FAILED_PRECONDITION",
    "ABORTED",
    "OUT_OF_RANGE",
    "UNIMPLEMENTED",
    "INTERNAL",
    "UNAVAILABLE",
    "DATA_LOSS",
    "UNAUTHENTICATED",
];

/// Upper bounds of the latency buckets, seconds. On-level answers take about a millisecond
/// and large areas some seconds, so the buckets run from 1 ms to the 30 s default request
/// timeout in steps of about 2.5×; slower calls land in `+Inf` only.
pub const LATENCY_BUCKETS_S: [f64; 14] = [
    0.001, 0.0025, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5, 5.0, 10.0, 30.0,
];

/// The content type of the text exposition format, version 0.0.4.
pub const CONTENT_TYPE: &str = "text/plain; version=0.0.4; charset=utf-8";

const METHODS: usize = Method::ALL.len();
const CODES: usize = GRPC_CODE_NAMES.len();
/// gRPC's UNKNOWN, for a code number outside 0..=16.
const UNKNOWN_CODE: usize = 2;

/// One latency histogram. Buckets are stored per bucket (not cumulative), one more than the
/// bounds for the calls slower than every bound; the count is their sum, so that `_count`
/// always equals the `+Inf` bucket even while calls are being recorded.
#[derive(Debug)]
struct Histogram {
    buckets: [AtomicU64; LATENCY_BUCKETS_S.len() + 1],
    sum_ns: AtomicU64,
}

impl Histogram {
    fn new() -> Self {
        Self {
            buckets: std::array::from_fn(|_| AtomicU64::new(0)),
            sum_ns: AtomicU64::new(0),
        }
    }

    fn observe(&self, elapsed: Duration) {
        let seconds = elapsed.as_secs_f64();
        let slot = LATENCY_BUCKETS_S
            .iter()
            .position(|&bound| seconds <= bound)
            .unwrap_or(LATENCY_BUCKETS_S.len());
        self.buckets[slot].fetch_add(1, Ordering::Relaxed);
        let ns = u64::try_from(elapsed.as_nanos()).unwrap_or(u64::MAX);
        self.sum_ns.fetch_add(ns, Ordering::Relaxed);
    }
}

/// The counters and histograms of one server. Share it with `Arc`; every method takes
/// `&self` and only adds to atomics.
#[derive(Debug)]
pub struct Recorder {
    requests: [[AtomicU64; CODES]; METHODS],
    latency: [Histogram; METHODS],
    load_failures: AtomicU64,
    evictions: AtomicU64,
}

impl Default for Recorder {
    fn default() -> Self {
        Self::new()
    }
}

impl Recorder {
    /// A recorder with every count at zero.
    pub fn new() -> Self {
        Self {
            requests: std::array::from_fn(|_| std::array::from_fn(|_| AtomicU64::new(0))),
            latency: std::array::from_fn(|_| Histogram::new()),
            load_failures: AtomicU64::new(0),
            evictions: AtomicU64::new(0),
        }
    }

    /// Counts one finished call: its method, its gRPC status code number (a number outside
    /// 0..=16 counts as UNKNOWN) and how long it took.
    pub fn record_request(&self, method: Method, code: i32, elapsed: Duration) {
        let code = usize::try_from(code)
            .ok()
            .filter(|&c| c < CODES)
            .unwrap_or(UNKNOWN_CODE);
        self.requests[method.index()][code].fetch_add(1, Ordering::Relaxed);
        self.latency[method.index()].observe(elapsed);
    }

    /// Calls counted for this method and code number.
    pub fn requests(&self, method: Method, code: i32) -> u64 {
        usize::try_from(code)
            .ok()
            .filter(|&c| c < CODES)
            .map_or(0, |c| {
                self.requests[method.index()][c].load(Ordering::Relaxed)
            })
    }

    /// Load failures counted so far.
    pub fn load_failures(&self) -> u64 {
        self.load_failures.load(Ordering::Relaxed)
    }

    /// Evictions counted so far.
    pub fn evictions(&self) -> u64 {
        self.evictions.load(Ordering::Relaxed)
    }

    /// Counts the load failures and evictions that `next` records and `previous` does not.
    ///
    /// A failure is new when its file and time are not in `previous` (a file that fails again
    /// with a new error counts again); an eviction when its cycle, time and reason are not.
    /// The store keeps the 32 most recent evictions, so more than 32 between two looks count
    /// as 32.
    pub fn observe_store_change(&self, previous: &Snapshot, next: &Snapshot) {
        let new_failures = next
            .failures
            .iter()
            .filter(|f| {
                !previous
                    .failures
                    .iter()
                    .any(|p| p.path == f.path && p.at == f.at)
            })
            .count();
        let new_evictions = next
            .evictions
            .iter()
            .filter(|e| {
                !previous
                    .evictions
                    .iter()
                    .any(|p| p.id == e.id && p.at == e.at && p.reason == e.reason)
            })
            .count();
        self.load_failures
            .fetch_add(new_failures as u64, Ordering::Relaxed);
        self.evictions
            .fetch_add(new_evictions as u64, Ordering::Relaxed);
    }

    /// Follows the store for as long as it lives, counting its new failures and evictions
    /// (those already recorded when this starts count too).
    pub async fn follow_store(self: Arc<Self>, store: Arc<CycleStore>) {
        let (changes, current) = self.observe_current(&store);
        self.follow_from(store, changes, current).await;
    }

    /// Counts what the store already records, and returns the change receiver and snapshot
    /// to follow from. The generation is marked seen before the snapshot is read, so that a
    /// change made after the read is not missed.
    fn observe_current(
        &self,
        store: &CycleStore,
    ) -> (tokio::sync::watch::Receiver<u64>, Arc<Snapshot>) {
        let mut changes = store.on_change();
        changes.borrow_and_update();
        let current = store.snapshot();
        self.observe_store_change(&Snapshot::default(), &current);
        (changes, current)
    }

    async fn follow_from(
        &self,
        store: Arc<CycleStore>,
        mut changes: tokio::sync::watch::Receiver<u64>,
        mut previous: Arc<Snapshot>,
    ) {
        while changes.changed().await.is_ok() {
            changes.borrow_and_update();
            let next = store.snapshot();
            self.observe_store_change(&previous, &next);
            previous = next;
        }
    }

    /// The metrics page: every family with its `# HELP` and `# TYPE` lines, counters from
    /// this recorder, gauges from `snapshot` at time `now`.
    pub fn render(&self, snapshot: &Snapshot, now: SystemTime) -> String {
        let mut out = String::with_capacity(16 * 1024);
        family(
            &mut out,
            "hypsogrid_requests_total",
            "counter",
            "Calls to hypsogrid.v1.HeightService that finished, by method and gRPC status code.",
        );
        for method in Method::ALL {
            for (code, name) in GRPC_CODE_NAMES.iter().enumerate() {
                let n = self.requests[method.index()][code].load(Ordering::Relaxed);
                // Codes never seen are left out, as is usual for labelled counters; OK is
                // always listed so that every method appears from the start.
                if n > 0 || code == 0 {
                    let _ = writeln!(
                        out,
                        "hypsogrid_requests_total{{method=\"{}\",code=\"{name}\"}} {n}",
                        method.name()
                    );
                }
            }
        }

        family(
            &mut out,
            "hypsogrid_request_duration_seconds",
            "histogram",
            "Time from the start of a call to its answer (to the end of the stream for QueryArea), seconds.",
        );
        for method in Method::ALL {
            let h = &self.latency[method.index()];
            let mut cumulative = 0u64;
            for (i, bound) in LATENCY_BUCKETS_S.iter().enumerate() {
                cumulative += h.buckets[i].load(Ordering::Relaxed);
                let _ = writeln!(
                    out,
                    "hypsogrid_request_duration_seconds_bucket{{method=\"{}\",le=\"{bound}\"}} {cumulative}",
                    method.name()
                );
            }
            cumulative += h.buckets[LATENCY_BUCKETS_S.len()].load(Ordering::Relaxed);
            let sum = h.sum_ns.load(Ordering::Relaxed) as f64 * 1e-9;
            let name = method.name();
            let _ = writeln!(
                out,
                "hypsogrid_request_duration_seconds_bucket{{method=\"{name}\",le=\"+Inf\"}} {cumulative}"
            );
            let _ = writeln!(
                out,
                "hypsogrid_request_duration_seconds_sum{{method=\"{name}\"}} {sum}"
            );
            let _ = writeln!(
                out,
                "hypsogrid_request_duration_seconds_count{{method=\"{name}\"}} {cumulative}"
            );
        }

        let now_s = unix_seconds(now);
        gauge(
            &mut out,
            "hypsogrid_cycles_loaded",
            "Cycles being served.",
            Some(snapshot.cycles.len() as f64),
        );
        let newest = snapshot.cycles.first();
        gauge(
            &mut out,
            "hypsogrid_newest_cycle_reference_age_seconds",
            "Now minus the reference time of the newest cycle, seconds (negative for a reference time in the future; absent without cycles or reference time).",
            newest
                .and_then(|c| c.reference_time_unix_s())
                .map(|r| now_s - r as f64),
        );
        gauge(
            &mut out,
            "hypsogrid_newest_cycle_load_age_seconds",
            "Now minus the time the newest cycle finished loading, seconds (absent without cycles).",
            newest.map(|c| now_s - unix_seconds(c.loaded_at)),
        );
        gauge(
            &mut out,
            "hypsogrid_cycle_memory_bytes",
            "Bytes held by the fields and heights of the cycles being served (what the memory budget counts).",
            Some(snapshot.bytes() as f64),
        );
        family(
            &mut out,
            "hypsogrid_cycle_load_seconds",
            "gauge",
            "Time each cycle being served took from the start of its read until it was listed (servable), seconds.",
        );
        for cycle in &snapshot.cycles {
            let _ = writeln!(
                out,
                "hypsogrid_cycle_load_seconds{{cycle_id=\"{}\"}} {}",
                label_value(&cycle.id),
                cycle.load_seconds
            );
        }
        family(
            &mut out,
            "hypsogrid_cycle_steps_without_heights",
            "gauge",
            "(member, time) steps of the cycles being served whose heights are not stored, by state: computing (for tens of milliseconds after a cycle is listed) or failed (never to be stored: queries on them fail; see the log).",
        );
        let (failed, computing) = snapshot.cycles.iter().fold((0, 0), |(f, c), cycle| {
            let failed = cycle.heights.failed_steps();
            let without = cycle.heights.steps() - cycle.heights.ready_steps();
            (f + failed, c + without - failed)
        });
        for (state, n) in [("computing", computing), ("failed", failed)] {
            let _ = writeln!(
                out,
                "hypsogrid_cycle_steps_without_heights{{state=\"{state}\"}} {n}"
            );
        }
        gauge(
            &mut out,
            "hypsogrid_failed_files",
            "Files listed as failed to load in the catalogue now.",
            Some(snapshot.failures.len() as f64),
        );
        family(
            &mut out,
            "hypsogrid_cycle_load_failures_total",
            "counter",
            "Failed loads of cycle files (and failed scans of the data folder).",
        );
        let _ = writeln!(
            out,
            "hypsogrid_cycle_load_failures_total {}",
            self.load_failures()
        );
        family(
            &mut out,
            "hypsogrid_cycle_evictions_total",
            "counter",
            "Cycles that stopped being served: beyond keep_newest, over the memory budget, or removed from the folder; and files passed over unread as older than every cycle served where they would be evicted at once (beyond keep_newest or the memory budget).",
        );
        let _ = writeln!(out, "hypsogrid_cycle_evictions_total {}", self.evictions());
        out
    }
}

/// A label value as the text format writes it: backslash, double quote and line feed
/// escaped (a cycle id is a file name, which may hold any of them).
fn label_value(text: &str) -> String {
    text.replace('\\', "\\\\")
        .replace('"', "\\\"")
        .replace('\n', "\\n")
}

fn family(out: &mut String, name: &str, kind: &str, help: &str) {
    let _ = writeln!(out, "# HELP {name} {help}");
    let _ = writeln!(out, "# TYPE {name} {kind}");
}

fn gauge(out: &mut String, name: &str, help: &str, value: Option<f64>) {
    family(out, name, "gauge", help);
    if let Some(v) = value {
        let _ = writeln!(out, "{name} {v}");
    }
}

/// Seconds since the Unix epoch, negative before it.
fn unix_seconds(t: SystemTime) -> f64 {
    match t.duration_since(UNIX_EPOCH) {
        Ok(d) => d.as_secs_f64(),
        Err(e) => -e.duration().as_secs_f64(),
    }
}

/// Largest request head read (request line and headers); a scraper sends a few hundred bytes.
const MAX_REQUEST_HEAD: usize = 8 * 1024;
/// Longest a connection may take to send its request head.
const READ_TIMEOUT: Duration = Duration::from_secs(5);
/// Connections served at once; more are answered 503 at once.
const MAX_CONNECTIONS: usize = 16;

/// Serves the metrics page on `listener` until `shutdown` resolves: `GET /metrics` (or
/// `HEAD`) answers 200 with the page; another path 404, another method 405, a malformed or
/// oversized request 400 or 431. Follows `store` meanwhile for its failures and evictions
/// (see [`Recorder::follow_store`]).
///
/// Returns an error only when accepting connections fails for good.
pub async fn serve_http(
    listener: TcpListener,
    recorder: Arc<Recorder>,
    store: Arc<CycleStore>,
    shutdown: impl Future<Output = ()> + Send,
) -> std::io::Result<()> {
    // What the store already records is counted before the first connection is accepted,
    // so that the first page already shows it.
    let (changes, current) = recorder.observe_current(&store);
    let follower = {
        let (recorder, store) = (Arc::clone(&recorder), Arc::clone(&store));
        tokio::spawn(async move { recorder.follow_from(store, changes, current).await })
    };
    let slots = Arc::new(Semaphore::new(MAX_CONNECTIONS));
    tokio::pin!(shutdown);
    let result = loop {
        let accepted = tokio::select! {
            () = &mut shutdown => break Ok(()),
            accepted = listener.accept() => accepted,
        };
        let (stream, peer) = match accepted {
            Ok(a) => a,
            Err(error) if is_transient(&error) => {
                tracing::warn!(%error, "metrics: accepting a connection failed; retrying");
                tokio::time::sleep(Duration::from_millis(50)).await;
                continue;
            }
            Err(error) => break Err(error),
        };
        let (recorder, store) = (Arc::clone(&recorder), Arc::clone(&store));
        match Arc::clone(&slots).try_acquire_owned() {
            Ok(slot) => {
                tokio::spawn(async move {
                    if let Err(error) = answer(stream, &recorder, &store).await {
                        tracing::debug!(%peer, %error, "metrics: connection ended with an error");
                    }
                    drop(slot);
                });
            }
            Err(_) => {
                tokio::spawn(async move {
                    let mut stream = stream;
                    let _ = respond(
                        &mut stream,
                        "503 Service Unavailable",
                        "too many metrics connections at once\n",
                        &[],
                        true,
                    )
                    .await;
                });
            }
        }
    };
    follower.abort();
    result
}

/// Errors of `accept` that concern one connection (or a passing shortage of descriptors),
/// not the listener.
fn is_transient(error: &std::io::Error) -> bool {
    use std::io::ErrorKind::*;
    matches!(
        error.kind(),
        ConnectionAborted | ConnectionReset | Interrupted | WouldBlock
    ) || error.raw_os_error() == Some(24) // EMFILE: too many open files
}

/// What a request head asks for.
#[derive(Debug, PartialEq, Eq)]
enum Asked {
    /// `GET /metrics`, or `HEAD` (`body` false).
    Page {
        /// Whether to send the body.
        body: bool,
    },
    /// Another path.
    NotFound,
    /// Another method.
    WrongMethod,
    /// Not an HTTP/1.x request line.
    Malformed,
}

/// Reads the request line (and ignores the headers) of one HTTP/1.x request.
fn parse_request_head(head: &[u8]) -> Asked {
    let Some(line_end) = head.iter().position(|&b| b == b'\n') else {
        return Asked::Malformed;
    };
    let Ok(line) = std::str::from_utf8(&head[..line_end]) else {
        return Asked::Malformed;
    };
    let mut parts = line.trim_end_matches('\r').split(' ');
    let (Some(method), Some(target), Some(version), None) =
        (parts.next(), parts.next(), parts.next(), parts.next())
    else {
        return Asked::Malformed;
    };
    if !version.starts_with("HTTP/1.") || method.is_empty() || !target.starts_with('/') {
        return Asked::Malformed;
    }
    let path = target.split('?').next().unwrap_or(target);
    let body = match method {
        "GET" => true,
        "HEAD" => false,
        _ => return Asked::WrongMethod,
    };
    if path == "/metrics" {
        Asked::Page { body }
    } else {
        Asked::NotFound
    }
}

/// Position just after the blank line that ends a request head, if it has arrived.
fn head_end(buffer: &[u8]) -> Option<usize> {
    buffer
        .windows(4)
        .position(|w| w == b"\r\n\r\n")
        .map(|i| i + 4)
        .or_else(|| buffer.windows(2).position(|w| w == b"\n\n").map(|i| i + 2))
}

async fn answer(
    mut stream: TcpStream,
    recorder: &Recorder,
    store: &CycleStore,
) -> std::io::Result<()> {
    let mut buffer = Vec::with_capacity(1024);
    let mut chunk = [0u8; 1024];
    let read = tokio::time::timeout(READ_TIMEOUT, async {
        loop {
            if head_end(&buffer).is_some() {
                return Ok(true);
            }
            if buffer.len() > MAX_REQUEST_HEAD {
                return Ok(false);
            }
            let n = stream.read(&mut chunk).await?;
            if n == 0 {
                return Ok(head_end(&buffer).is_some());
            }
            buffer.extend_from_slice(&chunk[..n]);
        }
    })
    .await;
    let complete = match read {
        Ok(Ok(complete)) => complete,
        Ok(Err(e)) => return Err(e),
        // A client too slow to send a few hundred bytes gets nothing.
        Err(_elapsed) => return Ok(()),
    };
    if !complete {
        let status = if buffer.len() > MAX_REQUEST_HEAD {
            "431 Request Header Fields Too Large"
        } else {
            "400 Bad Request"
        };
        return respond(&mut stream, status, "bad request\n", &[], true).await;
    }
    match parse_request_head(&buffer) {
        Asked::Page { body } => {
            let page = recorder.render(&store.snapshot(), SystemTime::now());
            respond(
                &mut stream,
                "200 OK",
                &page,
                &[("Content-Type", CONTENT_TYPE)],
                body,
            )
            .await
        }
        Asked::NotFound => {
            respond(
                &mut stream,
                "404 Not Found",
                "not found: the metrics are at /metrics\n",
                &[],
                true,
            )
            .await
        }
        Asked::WrongMethod => {
            respond(
                &mut stream,
                "405 Method Not Allowed",
                "only GET and HEAD are answered\n",
                &[("Allow", "GET, HEAD")],
                true,
            )
            .await
        }
        Asked::Malformed => {
            respond(&mut stream, "400 Bad Request", "bad request\n", &[], true).await
        }
    }
}

/// Writes one response and closes the connection.
async fn respond(
    stream: &mut TcpStream,
    status: &str,
    body: &str,
    headers: &[(&str, &str)],
    send_body: bool,
) -> std::io::Result<()> {
    let mut head = format!(
        "HTTP/1.1 {status}\r\nContent-Length: {}\r\nConnection: close\r\nCache-Control: no-store\r\n",
        body.len()
    );
    if !headers.iter().any(|(k, _)| *k == "Content-Type") {
        head.push_str("Content-Type: text/plain; charset=utf-8\r\n");
    }
    for (k, v) in headers {
        let _ = write!(head, "{k}: {v}\r\n");
    }
    head.push_str("\r\n");
    stream.write_all(head.as_bytes()).await?;
    if send_body {
        stream.write_all(body.as_bytes()).await?;
    }
    stream.shutdown().await
}

#[cfg(test)]
mod tests {
    use super::*;

    fn sample(page: &str, line_start: &str) -> f64 {
        page.lines()
            .find_map(|l| l.strip_prefix(line_start))
            .and_then(|rest| rest.trim().parse().ok())
            .unwrap_or_else(|| panic!("no sample '{line_start}' in\n{page}"))
    }

    #[test]
    fn latencies_land_in_the_first_bucket_whose_bound_they_do_not_exceed() {
        let r = Recorder::new();
        // Prometheus buckets are "less than or equal" (le): 1 ms exactly is in le="0.001".
        r.record_request(Method::QueryProfile, 0, Duration::from_millis(1));
        r.record_request(Method::QueryProfile, 0, Duration::from_micros(1001));
        r.record_request(Method::QueryProfile, 5, Duration::from_secs(40));
        let page = r.render(&Snapshot::default(), SystemTime::now());
        let b = |le: &str| {
            sample(
                &page,
                &format!("hypsogrid_request_duration_seconds_bucket{{method=\"QueryProfile\",le=\"{le}\"}} "),
            )
        };
        assert_eq!(b("0.001"), 1.0);
        assert_eq!(b("0.0025"), 2.0);
        assert_eq!(b("30"), 2.0);
        assert_eq!(b("+Inf"), 3.0);
        let sum = sample(
            &page,
            "hypsogrid_request_duration_seconds_sum{method=\"QueryProfile\"} ",
        );
        assert!((sum - 40.002001).abs() < 1e-9, "{sum}");
        assert_eq!(
            sample(
                &page,
                "hypsogrid_requests_total{method=\"QueryProfile\",code=\"NOT_FOUND\"} "
            ),
            1.0
        );
        assert_eq!(r.requests(Method::QueryProfile, 0), 2);
    }

    #[test]
    fn codes_outside_the_grpc_range_count_as_unknown() {
        let r = Recorder::new();
        r.record_request(Method::GetCatalogue, 99, Duration::ZERO);
        r.record_request(Method::GetCatalogue, -1, Duration::ZERO);
        assert_eq!(r.requests(Method::GetCatalogue, 2), 2);
        assert_eq!(r.requests(Method::GetCatalogue, 99), 0);
    }

    /// Text format 0.0.4: in a label value, backslash, double quote and line feed are
    /// written `\\`, `\"` and `\n`; nothing else is escaped.
    #[test]
    fn label_values_escape_what_the_text_format_says() {
        assert_eq!(label_value("cycle-2030.nc"), "cycle-2030.nc");
        assert_eq!(label_value("a\\b \"c\"\nd é"), "a\\\\b \\\"c\\\"\\nd é");
    }

    #[test]
    fn code_names_follow_the_grpc_numbering() {
        // gRPC doc/statuscodes.md: 0 OK, 5 NOT_FOUND, 8 RESOURCE_EXHAUSTED, 16 UNAUTHENTICATED.
        assert_eq!(GRPC_CODE_NAMES[0], "OK");
        assert_eq!(GRPC_CODE_NAMES[5], "NOT_FOUND");
        assert_eq!(GRPC_CODE_NAMES[8], "RESOURCE_EXHAUSTED");
        assert_eq!(GRPC_CODE_NAMES[16], "UNAUTHENTICATED");
        for (n, name) in GRPC_CODE_NAMES.iter().enumerate() {
            assert_eq!(
                format!("{:?}", tonic::Code::from(n as i32)).to_uppercase(),
                name.replace('_', ""),
            );
        }
    }

    #[test]
    fn store_changes_count_new_failures_and_evictions_once() {
        use crate::store::{Eviction, LoadFailure};
        let t0 = SystemTime::UNIX_EPOCH + Duration::from_secs(1_000);
        let failure = |p: &str, at| LoadFailure {
            path: p.into(),
            error: "bad".into(),
            at,
        };
        let eviction = |id: &str, at| Eviction {
            id: id.into(),
            reason: "older".into(),
            at,
        };
        let a = Snapshot {
            failures: vec![failure("/d/a.nc", t0)],
            evictions: vec![eviction("x.nc", t0)],
            ..Snapshot::default()
        };
        let b = Snapshot {
            failures: vec![
                failure("/d/a.nc", t0 + Duration::from_secs(5)),
                failure("/d/b.nc", t0),
            ],
            evictions: vec![
                eviction("y.nc", t0 + Duration::from_secs(5)),
                eviction("x.nc", t0),
            ],
            ..Snapshot::default()
        };
        let r = Recorder::new();
        r.observe_store_change(&Snapshot::default(), &a);
        assert_eq!((r.load_failures(), r.evictions()), (1, 1));
        r.observe_store_change(&a, &a);
        assert_eq!((r.load_failures(), r.evictions()), (1, 1));
        r.observe_store_change(&a, &b);
        // a.nc failed again (new time) and b.nc is new; y.nc is the one new eviction.
        assert_eq!((r.load_failures(), r.evictions()), (3, 2));
    }

    #[test]
    fn request_heads_are_read_strictly() {
        assert_eq!(
            parse_request_head(b"GET /metrics HTTP/1.1\r\nHost: x\r\n\r\n"),
            Asked::Page { body: true }
        );
        assert_eq!(
            parse_request_head(b"GET /metrics?x=1 HTTP/1.0\r\n\r\n"),
            Asked::Page { body: true }
        );
        assert_eq!(
            parse_request_head(b"HEAD /metrics HTTP/1.1\r\n\r\n"),
            Asked::Page { body: false }
        );
        assert_eq!(
            parse_request_head(b"GET / HTTP/1.1\r\n\r\n"),
            Asked::NotFound
        );
        assert_eq!(
            parse_request_head(b"POST /metrics HTTP/1.1\r\n\r\n"),
            Asked::WrongMethod
        );
        for bad in [
            &b"GET /metrics\r\n\r\n"[..],
            b"GET metrics HTTP/1.1\r\n\r\n",
            b"GET /metrics HTTP/2\r\n\r\n",
            b"\xff\xfe /metrics HTTP/1.1\r\n\r\n",
            b"GET  /metrics HTTP/1.1\r\n\r\n",
            b"",
        ] {
            assert_eq!(parse_request_head(bad), Asked::Malformed, "{bad:?}");
        }
        assert_eq!(head_end(b"GET / HTTP/1.1\r\n\r\nrest"), Some(18));
        assert_eq!(head_end(b"GET / HTTP/1.1\r\n"), None);
    }
}
