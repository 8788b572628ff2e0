//! The metrics page: a real server (`serve_on` on 127.0.0.1:0) with a [`Recorder`], the
//! metrics responder on a second port, real gRPC calls (some deliberately failing), then
//! `GET /metrics` over plain HTTP/1.1.
//!
//! The page is parsed by the rules of the Prometheus text exposition format, version 0.0.4
//! (the "Exposition formats" page of the Prometheus documentation): `# HELP` and `# TYPE`
//! lines before a family's samples, metric and label name syntax, quoted label values,
//! histograms as cumulative `_bucket` series with an `le="+Inf"` bucket equal to `_count`,
//! plus `_sum`. Counters are checked against the calls made and the store changes made; the
//! reference-time age against the demo's reference time converted independently
//! (`date -u -d '2031-01-14 00:00:00' +%s` = 1926115200, GNU coreutils).

use std::collections::{BTreeMap, HashMap, HashSet};
use std::net::SocketAddr;
use std::sync::Arc;
use std::time::{Duration, SystemTime, UNIX_EPOCH};

use hypsogrid::compute::ComputeConfig;
use hypsogrid::demo::{write_demo_cycle, DEMO_FILE_NAME};
use hypsogrid::ingest::IngestConfig;
use hypsogrid::metrics::{serve_http, Recorder};
use hypsogrid::netcdf_session::NoFileOpen;
use hypsogrid::pb;
use hypsogrid::pb::height_service_client::HeightServiceClient;
use hypsogrid::query::LoadedCycle;
use hypsogrid::service::{serve_on, ServiceConfig};
use hypsogrid::store::{CycleStore, StoreConfig};
use tokio::io::{AsyncReadExt, AsyncWriteExt};
use tonic::transport::Channel;
use tonic::Code;

/// The demo's reference time, 2031-01-14 00:00:00 UTC, in Unix seconds (GNU `date`).
const DEMO_REFERENCE_UNIX_S: f64 = 1_926_115_200.0;

// ---------------------------------------------------------------------------------------
// A parser of the text exposition format
// ---------------------------------------------------------------------------------------

/// One sample line.
#[derive(Debug, Clone)]
struct Sample {
    name: String,
    labels: BTreeMap<String, String>,
    value: f64,
}

/// The page, parsed and checked.
#[derive(Debug)]
struct Page {
    types: HashMap<String, String>,
    samples: Vec<Sample>,
}

fn is_metric_name(s: &str) -> bool {
    let mut chars = s.chars();
    matches!(chars.next(), Some(c) if c.is_ascii_alphabetic() || c == '_' || c == ':')
        && chars.all(|c| c.is_ascii_alphanumeric() || c == '_' || c == ':')
}

fn is_label_name(s: &str) -> bool {
    let mut chars = s.chars();
    matches!(chars.next(), Some(c) if c.is_ascii_alphabetic() || c == '_')
        && chars.all(|c| c.is_ascii_alphanumeric() || c == '_')
}

fn parse_value(s: &str) -> Option<f64> {
    match s {
        "+Inf" => Some(f64::INFINITY),
        "-Inf" => Some(f64::NEG_INFINITY),
        "NaN" => Some(f64::NAN),
        _ => s.parse().ok(),
    }
}

/// `{a="x",b="y"}` (the braces removed) to a map; escapes `\\`, `\"`, `\n`.
fn parse_labels(text: &str, line: &str) -> BTreeMap<String, String> {
    let mut labels = BTreeMap::new();
    let mut rest = text;
    while !rest.is_empty() {
        let eq = rest
            .find('=')
            .unwrap_or_else(|| panic!("label without '=': {line}"));
        let name = &rest[..eq];
        assert!(is_label_name(name), "bad label name '{name}': {line}");
        rest = rest[eq + 1..]
            .strip_prefix('"')
            .unwrap_or_else(|| panic!("label value not quoted: {line}"));
        let mut value = String::new();
        let mut chars = rest.char_indices();
        let end = loop {
            match chars.next() {
                Some((_, '\\')) => match chars.next() {
                    Some((_, 'n')) => value.push('\n'),
                    Some((_, c @ ('\\' | '"'))) => value.push(c),
                    other => panic!("bad escape {other:?}: {line}"),
                },
                Some((i, '"')) => break i,
                Some((_, c)) => value.push(c),
                None => panic!("unterminated label value: {line}"),
            }
        };
        assert!(
            labels.insert(name.to_string(), value).is_none(),
            "label '{name}' twice: {line}"
        );
        rest = &rest[end + 1..];
        rest = rest.strip_prefix(',').unwrap_or(rest);
    }
    labels
}

/// The family a sample belongs to: its own name, or the histogram it is a part of.
fn family_of<'a>(name: &'a str, types: &HashMap<String, String>) -> &'a str {
    for suffix in ["_bucket", "_sum", "_count"] {
        if let Some(base) = name.strip_suffix(suffix) {
            if types.get(base).map(String::as_str) == Some("histogram") {
                return base;
            }
        }
    }
    name
}

/// Parses a page and checks every rule of the format it relies on; panics naming the line.
fn parse_page(text: &str) -> Page {
    assert!(text.ends_with('\n'), "the page ends with a line feed");
    let mut types: HashMap<String, String> = HashMap::new();
    let mut helps: HashSet<String> = HashSet::new();
    let mut samples = Vec::new();
    let mut seen_series = HashSet::new();
    let mut families_with_samples: HashSet<String> = HashSet::new();
    for line in text.lines() {
        assert!(!line.is_empty(), "no blank lines in this page");
        if let Some(rest) = line.strip_prefix("# ") {
            let mut parts = rest.splitn(3, ' ');
            let (keyword, name, tail) = (parts.next(), parts.next(), parts.next());
            let name = name.unwrap_or_else(|| panic!("comment without a name: {line}"));
            match keyword {
                Some("HELP") => {
                    assert!(is_metric_name(name), "{line}");
                    assert!(tail.is_some_and(|t| !t.is_empty()), "empty help: {line}");
                    assert!(helps.insert(name.to_string()), "HELP twice: {line}");
                }
                Some("TYPE") => {
                    assert!(is_metric_name(name), "{line}");
                    let kind = tail.unwrap_or_default();
                    assert!(
                        ["counter", "gauge", "histogram", "summary", "untyped"].contains(&kind),
                        "unknown type: {line}"
                    );
                    assert!(
                        !families_with_samples.contains(name),
                        "TYPE after the family's samples: {line}"
                    );
                    assert!(
                        types.insert(name.to_string(), kind.to_string()).is_none(),
                        "TYPE twice: {line}"
                    );
                }
                _ => {}
            }
            continue;
        }
        let (series, value) = line
            .rsplit_once(' ')
            .unwrap_or_else(|| panic!("sample without a value: {line}"));
        let value = parse_value(value).unwrap_or_else(|| panic!("bad value: {line}"));
        let (name, labels) = match series.split_once('{') {
            Some((name, rest)) => {
                let inner = rest
                    .strip_suffix('}')
                    .unwrap_or_else(|| panic!("unclosed labels: {line}"));
                (name, parse_labels(inner, line))
            }
            None => (series, BTreeMap::new()),
        };
        assert!(is_metric_name(name), "bad metric name: {line}");
        let family = family_of(name, &types);
        let kind = types
            .get(family)
            .unwrap_or_else(|| panic!("sample before its TYPE line: {line}"));
        assert!(helps.contains(family), "sample without HELP: {line}");
        families_with_samples.insert(family.to_string());
        if kind == "counter" {
            assert!(value >= 0.0 && value.is_finite(), "counter below 0: {line}");
        }
        assert!(
            seen_series.insert(series.to_string()),
            "the same series twice: {line}"
        );
        samples.push(Sample {
            name: name.to_string(),
            labels,
            value,
        });
    }
    let page = Page { types, samples };
    check_histograms(&page);
    page
}

/// Every histogram: per label set, `le` buckets in increasing order with non-decreasing
/// counts, a `+Inf` bucket equal to `_count`, and one `_sum`.
fn check_histograms(page: &Page) {
    for (family, kind) in &page.types {
        if kind != "histogram" {
            continue;
        }
        let mut buckets: BTreeMap<String, Vec<(f64, f64)>> = BTreeMap::new();
        let mut counts: BTreeMap<String, f64> = BTreeMap::new();
        let mut sums: BTreeMap<String, f64> = BTreeMap::new();
        for s in &page.samples {
            let mut others = s.labels.clone();
            let le = others.remove("le");
            let key = format!("{others:?}");
            if s.name == format!("{family}_bucket") {
                let le = le.unwrap_or_else(|| panic!("bucket without le: {s:?}"));
                let bound = parse_value(&le).unwrap_or_else(|| panic!("bad le '{le}'"));
                buckets.entry(key).or_default().push((bound, s.value));
            } else if s.name == format!("{family}_count") {
                assert!(le.is_none());
                counts.insert(key, s.value);
            } else if s.name == format!("{family}_sum") {
                assert!(le.is_none());
                sums.insert(key, s.value);
            }
        }
        assert!(!buckets.is_empty(), "histogram {family} has no buckets");
        for (key, list) in &buckets {
            for pair in list.windows(2) {
                assert!(pair[0].0 < pair[1].0, "{family}{key}: le not increasing");
                assert!(pair[0].1 <= pair[1].1, "{family}{key}: not cumulative");
            }
            let last = list.last().copied().unwrap_or_default();
            assert_eq!(last.0, f64::INFINITY, "{family}{key}: no le=\"+Inf\"");
            assert_eq!(
                Some(&last.1),
                counts.get(key),
                "{family}{key}: +Inf != _count"
            );
            assert!(sums.contains_key(key), "{family}{key}: no _sum");
        }
    }
}

impl Page {
    fn value(&self, name: &str, labels: &[(&str, &str)]) -> Option<f64> {
        self.samples
            .iter()
            .find(|s| {
                s.name == name
                    && s.labels.len() == labels.len()
                    && labels
                        .iter()
                        .all(|(k, v)| s.labels.get(*k).map(String::as_str) == Some(*v))
            })
            .map(|s| s.value)
    }

    fn requests(&self, method: &str, code: Code) -> f64 {
        let code = hypsogrid::metrics::GRPC_CODE_NAMES[i32::from(code) as usize];
        self.value(
            "hypsogrid_requests_total",
            &[("method", method), ("code", code)],
        )
        .unwrap_or(0.0)
    }

    fn latency_count(&self, method: &str) -> f64 {
        self.value(
            "hypsogrid_request_duration_seconds_count",
            &[("method", method)],
        )
        .unwrap_or_else(|| panic!("no latency count for {method}"))
    }

    fn steps_without_heights(&self, state: &str) -> f64 {
        self.value("hypsogrid_cycle_steps_without_heights", &[("state", state)])
            .unwrap_or_else(|| panic!("no steps without heights in state {state}"))
    }

    fn scalar(&self, name: &str) -> f64 {
        self.value(name, &[])
            .unwrap_or_else(|| panic!("no sample {name}"))
    }
}

// ---------------------------------------------------------------------------------------
// HTTP
// ---------------------------------------------------------------------------------------

/// Sends one raw request and returns the status line, the headers (lower-case names) and
/// the body.
async fn http(addr: SocketAddr, request: &str) -> (String, HashMap<String, String>, String) {
    let mut stream = tokio::net::TcpStream::connect(addr)
        .await
        .expect("metrics connect");
    stream.write_all(request.as_bytes()).await.unwrap();
    let mut raw = Vec::new();
    tokio::time::timeout(Duration::from_secs(10), stream.read_to_end(&mut raw))
        .await
        .expect("the responder closes the connection")
        .unwrap();
    let text = String::from_utf8(raw).expect("utf-8 response");
    let (head, body) = text
        .split_once("\r\n\r\n")
        .unwrap_or_else(|| panic!("no header end in {text:?}"));
    let mut lines = head.split("\r\n");
    let status = lines.next().unwrap_or_default().to_string();
    let headers = lines
        .filter_map(|l| l.split_once(": "))
        .map(|(k, v)| (k.to_ascii_lowercase(), v.to_string()))
        .collect::<HashMap<_, _>>();
    // A HEAD answer gives the length of the body it leaves out.
    if let Some(n) = headers
        .get("content-length")
        .filter(|_| !request.starts_with("HEAD "))
    {
        assert_eq!(n.parse::<usize>().ok(), Some(body.len()), "content-length");
    }
    (status, headers, body.to_string())
}

async fn scrape(addr: SocketAddr) -> Page {
    let (status, headers, body) = http(
        addr,
        "GET /metrics HTTP/1.1\r\nHost: localhost\r\nAccept: text/plain\r\n\r\n",
    )
    .await;
    assert_eq!(status, "HTTP/1.1 200 OK");
    assert_eq!(
        headers.get("content-type").map(String::as_str),
        Some("text/plain; version=0.0.4; charset=utf-8")
    );
    parse_page(&body)
}

// ---------------------------------------------------------------------------------------
// The test
// ---------------------------------------------------------------------------------------

fn lead(hours: i64) -> Option<pb::TimeSelection> {
    Some(pb::TimeSelection {
        kind: Some(pb::time_selection::Kind::LeadTimeS(hours * 3600)),
    })
}

fn thickness_1000_500() -> pb::Quantity {
    pb::Quantity {
        kind: Some(pb::quantity::Kind::Thickness(pb::LayerBounds {
            bottom_pa: 100_000.0,
            top_pa: 50_000.0,
        })),
    }
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn the_metrics_page_counts_calls_store_changes_and_is_well_formed() {
    let dir = tempfile::tempdir().unwrap();
    let first = write_demo_cycle(dir.path()).unwrap();
    let second = dir.path().join("later_copy.nc");
    std::fs::copy(&first, &second).unwrap();
    let load = |p: &std::path::Path| {
        LoadedCycle::load(p, &IngestConfig::default(), &ComputeConfig::default()).unwrap()
    };
    // One cycle kept, so that loading the copy evicts the first (same reference time, the
    // later load wins).
    let store = Arc::new(CycleStore::new(StoreConfig {
        keep_newest: 1,
        ..StoreConfig::default()
    }));
    store.insert(load(&first));
    store.record_failure(
        &dir.path().join("broken.nc"),
        "'broken.nc' is not a NetCDF file".into(),
    );

    let recorder = Arc::new(Recorder::new());
    let grpc = tokio::net::TcpListener::bind("127.0.0.1:0").await.unwrap();
    let grpc_addr = grpc.local_addr().unwrap();
    let metrics = tokio::net::TcpListener::bind("127.0.0.1:0").await.unwrap();
    let metrics_addr = metrics.local_addr().unwrap();
    let (stop, stopped) = tokio::sync::watch::channel(false);
    let wait = |mut rx: tokio::sync::watch::Receiver<bool>| async move {
        let _ = rx.wait_for(|s| *s).await;
    };
    let server = tokio::spawn(serve_on(
        grpc,
        Arc::clone(&store),
        ServiceConfig {
            metrics: Some(Arc::clone(&recorder)),
            ..ServiceConfig::default()
        },
        wait(stopped.clone()),
    ));
    let metrics_task = tokio::spawn(serve_http(
        metrics,
        Arc::clone(&recorder),
        Arc::clone(&store),
        wait(stopped),
    ));

    // Before any call: every family is there, every request count zero, the failure
    // recorded before the start counted, one cycle loaded.
    let before = scrape(metrics_addr).await;
    for method in [
        "GetCatalogue",
        "QueryArea",
        "QueryPosition",
        "QueryProfile",
        "QueryTrajectory",
    ] {
        assert_eq!(before.requests(method, Code::Ok), 0.0, "{method}");
        assert_eq!(before.latency_count(method), 0.0, "{method}");
    }
    assert_eq!(before.types["hypsogrid_requests_total"], "counter");
    assert_eq!(
        before.types["hypsogrid_request_duration_seconds"],
        "histogram"
    );
    assert_eq!(before.types["hypsogrid_cycles_loaded"], "gauge");
    assert_eq!(before.scalar("hypsogrid_cycles_loaded"), 1.0);
    assert_eq!(before.scalar("hypsogrid_cycle_load_failures_total"), 1.0);
    assert_eq!(before.scalar("hypsogrid_failed_files"), 1.0);
    for state in ["computing", "failed"] {
        assert_eq!(
            before.steps_without_heights(state),
            0.0,
            "the watcher computed every step ({state})"
        );
    }
    assert_eq!(before.scalar("hypsogrid_cycle_evictions_total"), 0.0);
    assert_eq!(
        before.scalar("hypsogrid_cycle_memory_bytes"),
        store.snapshot().bytes() as f64
    );
    let now_s = SystemTime::now()
        .duration_since(UNIX_EPOCH)
        .unwrap()
        .as_secs_f64();
    let reference_age = before.scalar("hypsogrid_newest_cycle_reference_age_seconds");
    assert!(
        (reference_age - (now_s - DEMO_REFERENCE_UNIX_S)).abs() < 60.0,
        "{reference_age}"
    );
    let load_age = before.scalar("hypsogrid_newest_cycle_load_age_seconds");
    assert!((0.0..600.0).contains(&load_age), "{load_age}");

    // Calls: two catalogues, a profile, a whole area stream (OK); an unknown cycle
    // (NOT_FOUND); an empty position request and an area with an inverted box (errors).
    let channel = Channel::from_shared(format!("http://{grpc_addr}"))
        .unwrap()
        .connect()
        .await
        .unwrap();
    let mut client = HeightServiceClient::new(channel);
    for _ in 0..2 {
        client
            .get_catalogue(pb::CatalogueRequest {})
            .await
            .expect("catalogue");
    }
    client
        .query_profile(pb::ProfileRequest {
            point: Some(pb::GeoPoint {
                latitude_deg: 58.65,
                longitude_deg: -29.4,
            }),
            time: lead(6),
            ..Default::default()
        })
        .await
        .expect("profile");
    let mut stream = client
        .query_area(pb::AreaRequest {
            time: lead(24),
            quantities: vec![thickness_1000_500()],
            bbox: Some(pb::BoundingBox {
                south_deg: 50.0,
                north_deg: 62.0,
                west_deg: -45.0,
                east_deg: -25.0,
            }),
            ..Default::default()
        })
        .await
        .expect("area")
        .into_inner();
    let mut chunks = 0;
    while let Some(chunk) = stream.message().await.expect("area chunk") {
        assert!(!chunk.fields.is_empty());
        chunks += 1;
    }
    assert!(chunks >= 1);
    let not_found = client
        .query_position(pb::PositionRequest {
            cycle_id: "no_such_cycle.nc".into(),
            points: vec![pb::GeoPoint {
                latitude_deg: 55.0,
                longitude_deg: -40.0,
            }],
            quantities: vec![thickness_1000_500()],
            ..Default::default()
        })
        .await
        .expect_err("unknown cycle");
    assert_eq!(not_found.code(), Code::NotFound);
    let empty = client
        .query_position(pb::PositionRequest::default())
        .await
        .expect_err("empty position request");
    let inverted = client
        .query_area(pb::AreaRequest {
            time: lead(0),
            quantities: vec![thickness_1000_500()],
            bbox: Some(pb::BoundingBox {
                south_deg: 62.0,
                north_deg: 50.0,
                west_deg: -45.0,
                east_deg: -25.0,
            }),
            ..Default::default()
        })
        .await;
    let inverted_code = match inverted {
        Err(status) => status.code(),
        // An error may also arrive as the stream's first item.
        Ok(response) => {
            let mut s = response.into_inner();
            s.message().await.expect_err("inverted box").code()
        }
    };
    assert_eq!(inverted_code, Code::InvalidArgument);

    // A second cycle arrives and evicts the first.
    store.insert(load(&second));

    let mut after = scrape(metrics_addr).await;
    for _ in 0..50 {
        if after.scalar("hypsogrid_cycle_evictions_total") >= 1.0 {
            break;
        }
        tokio::time::sleep(Duration::from_millis(100)).await;
        after = scrape(metrics_addr).await;
    }
    assert_eq!(after.requests("GetCatalogue", Code::Ok), 2.0);
    assert_eq!(after.requests("QueryProfile", Code::Ok), 1.0);
    assert_eq!(after.requests("QueryArea", Code::Ok), 1.0);
    assert_eq!(after.requests("QueryArea", Code::InvalidArgument), 1.0);
    assert_eq!(after.requests("QueryPosition", Code::NotFound), 1.0);
    // The empty request is counted under the code its caller saw.
    let empty_expected = if empty.code() == Code::NotFound {
        2.0
    } else {
        1.0
    };
    assert_eq!(
        after.requests("QueryPosition", empty.code()),
        empty_expected,
        "{:?}",
        empty.code()
    );
    assert_ne!(empty.code(), Code::Unknown);
    assert_ne!(empty.code(), Code::Internal);
    assert_eq!(after.requests("QueryPosition", Code::Ok), 0.0);
    // Every call is in its method's histogram.
    assert_eq!(after.latency_count("GetCatalogue"), 2.0);
    assert_eq!(after.latency_count("QueryArea"), 2.0);
    assert_eq!(after.latency_count("QueryPosition"), 2.0);
    assert_eq!(after.latency_count("QueryProfile"), 1.0);
    assert_eq!(after.latency_count("QueryTrajectory"), 0.0);
    let sum = after
        .value(
            "hypsogrid_request_duration_seconds_sum",
            &[("method", "QueryArea")],
        )
        .unwrap();
    assert!(sum > 0.0 && sum < 60.0, "{sum}");
    // The store: one eviction, still one cycle (the copy), the failure still counted once.
    assert_eq!(after.scalar("hypsogrid_cycle_evictions_total"), 1.0);
    assert_eq!(after.scalar("hypsogrid_cycles_loaded"), 1.0);
    assert_eq!(after.scalar("hypsogrid_cycle_load_failures_total"), 1.0);
    assert_eq!(store.snapshot().cycles[0].id, "later_copy.nc");
    assert_ne!(store.snapshot().cycles[0].id, DEMO_FILE_NAME);
    assert_eq!(recorder.evictions(), 1, "the recorder and its page agree");

    // The responder answers only GET/HEAD /metrics.
    let (status, headers, body) = http(metrics_addr, "HEAD /metrics HTTP/1.1\r\n\r\n").await;
    assert_eq!(status, "HTTP/1.1 200 OK");
    assert!(body.is_empty());
    assert!(headers["content-length"].parse::<usize>().unwrap() > 1000);
    let (status, _, _) = http(metrics_addr, "GET /other HTTP/1.1\r\n\r\n").await;
    assert_eq!(status, "HTTP/1.1 404 Not Found");
    let (status, headers, _) = http(metrics_addr, "POST /metrics HTTP/1.1\r\n\r\n").await;
    assert_eq!(status, "HTTP/1.1 405 Method Not Allowed");
    assert_eq!(headers["allow"], "GET, HEAD");
    let (status, _, _) = http(metrics_addr, "hello\r\n\r\n").await;
    assert_eq!(status, "HTTP/1.1 400 Bad Request");

    stop.send(true).unwrap();
    tokio::time::timeout(Duration::from_secs(10), server)
        .await
        .expect("grpc server stops")
        .unwrap()
        .unwrap();
    tokio::time::timeout(Duration::from_secs(10), metrics_task)
        .await
        .expect("metrics responder stops")
        .unwrap()
        .unwrap();
}

#[test]
fn the_page_parser_rejects_what_the_format_forbids() {
    // The checker itself must catch the mistakes it is there for.
    let good = "# HELP x_total A counter.\n# TYPE x_total counter\nx_total{a=\"1\"} 3\n";
    assert_eq!(parse_page(good).samples.len(), 1);
    for bad in [
        // No TYPE line before the sample.
        "# HELP x_total A counter.\nx_total 1\n",
        // A label value without quotes.
        "# HELP x A.\n# TYPE x gauge\nx{a=1} 1\n",
        // A histogram without +Inf.
        "# HELP h H.\n# TYPE h histogram\nh_bucket{le=\"1\"} 1\nh_sum 1\nh_count 1\n",
        // A histogram whose buckets are not cumulative.
        "# HELP h H.\n# TYPE h histogram\nh_bucket{le=\"1\"} 2\nh_bucket{le=\"+Inf\"} 1\nh_sum 1\nh_count 1\n",
        // A bad metric name.
        "# HELP 9x A.\n# TYPE 9x gauge\n9x 1\n",
    ] {
        let caught = std::panic::catch_unwind(|| parse_page(bad)).is_err();
        assert!(caught, "accepted: {bad:?}");
    }
}

/// `hypsogrid serve --metrics-listen 127.0.0.1:0` as a child process: the page is served on
/// the port it prints, and counts a call made with the command-line client.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn serve_metrics_listen_serves_the_page_of_the_running_server() {
    use std::io::{BufRead, BufReader};
    use std::process::{Command, Stdio};
    const BIN: &str = env!("CARGO_BIN_EXE_hypsogrid");
    let dir = tempfile::tempdir().unwrap();
    let mut child = Command::new(BIN)
        .args([
            "serve",
            "--listen",
            "127.0.0.1:0",
            "--metrics-listen",
            "127.0.0.1:0",
        ])
        .arg("--data")
        .arg(dir.path())
        .stdout(Stdio::null())
        .stderr(Stdio::piped())
        .spawn_with_no_file_open()
        .expect("starting hypsogrid serve");
    let stderr = child.stderr.take().expect("stderr is piped");
    let (tx, rx) = std::sync::mpsc::channel();
    std::thread::spawn(move || {
        let (mut metrics, mut grpc) = (None, None);
        for line in BufReader::new(stderr).lines().map_while(Result::ok) {
            if let Some(a) = line.strip_prefix("metrics on ") {
                metrics = Some(a.trim().to_string());
            }
            if let Some(a) = line.strip_prefix("listening on ") {
                grpc = Some(a.trim().to_string());
            }
            if let (Some(m), Some(g)) = (&metrics, &grpc) {
                let _ = tx.send((m.clone(), g.clone()));
                metrics = None;
            }
        }
    });
    let (metrics_addr, grpc_addr) = match rx.recv_timeout(Duration::from_secs(60)) {
        Ok(a) => a,
        Err(_) => {
            let _ = child.kill();
            panic!("no 'metrics on' and 'listening on' lines");
        }
    };
    let metrics_addr: SocketAddr = metrics_addr.parse().unwrap();
    let out = Command::new(BIN)
        .args(["catalogue", "--server", &format!("http://{grpc_addr}")])
        .output_with_no_file_open()
        .unwrap();
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let page = scrape(metrics_addr).await;
    assert_eq!(page.requests("GetCatalogue", Code::Ok), 1.0);
    assert_eq!(page.latency_count("GetCatalogue"), 1.0);
    assert_eq!(page.scalar("hypsogrid_cycles_loaded"), 0.0);
    assert_eq!(page.scalar("hypsogrid_cycle_memory_bytes"), 0.0);
    // Without a cycle the age gauges are declared but have no sample.
    assert!(page
        .types
        .contains_key("hypsogrid_newest_cycle_load_age_seconds"));
    assert!(page
        .value("hypsogrid_newest_cycle_load_age_seconds", &[])
        .is_none());
    // SAFETY: kill(2) on the pid of a child this test started and has not reaped.
    let rc = unsafe { libc::kill(child.id() as libc::pid_t, libc::SIGTERM) };
    assert_eq!(rc, 0);
    let status = tokio::task::spawn_blocking(move || child.wait())
        .await
        .unwrap()
        .unwrap();
    assert_eq!(status.code(), Some(0));
}

/// A cycle listed before its heights are in counts its pending steps as computing, until
/// they are in; steps whose computation failed count as failed, apart.
#[test]
fn steps_without_heights_are_counted_until_they_are_computed() {
    let dir = tempfile::tempdir().unwrap();
    let path = write_demo_cycle(dir.path()).unwrap();
    let read = |path: &std::path::Path| {
        LoadedCycle::read(path, &IngestConfig::default(), &ComputeConfig::default()).expect("demo")
    };
    let first = read(&path);
    let steps = first.heights.steps();
    let pending = first.heights.pending_steps().len();
    assert!(pending >= 1 && pending <= steps);
    let store = CycleStore::new(StoreConfig::default());
    let served = store.insert(first);
    let recorder = Recorder::new();
    let page =
        |store: &CycleStore| parse_page(&recorder.render(&store.snapshot(), SystemTime::now()));
    let before = page(&store);
    assert_eq!(
        before.types["hypsogrid_cycle_steps_without_heights"],
        "gauge"
    );
    assert_eq!(before.steps_without_heights("computing"), pending as f64);
    assert_eq!(before.steps_without_heights("failed"), 0.0);
    served.finish_heights();
    let after = page(&store);
    assert_eq!(after.steps_without_heights("computing"), 0.0);
    assert_eq!(after.steps_without_heights("failed"), 0.0);

    // A second cycle (the same file under another name) whose pending steps fail: they
    // leave "computing" for "failed", and the first cycle's steps count in neither.
    // Named with a character the text format must escape in a label value (the NetCDF
    // library cannot open a path with a backslash, the other one: see tests/ingest.rs).
    let second_path = dir.path().join("second \"run\" b.nc");
    std::fs::copy(&path, &second_path).unwrap();
    let second = read(&second_path);
    let second_pending = second.heights.pending_steps().len();
    assert!(second_pending >= 1);
    second.heights.fail_pending("an injected failure");
    store.insert(second);
    let failed = page(&store);
    assert_eq!(failed.steps_without_heights("computing"), 0.0);
    assert_eq!(
        failed.steps_without_heights("failed"),
        second_pending as f64
    );
    // Each cycle's time to servable, labelled with its id as it is.
    assert_eq!(failed.types["hypsogrid_cycle_load_seconds"], "gauge");
    let snapshot = store.snapshot();
    assert_eq!(snapshot.cycles.len(), 2);
    for cycle in &snapshot.cycles {
        let value = failed
            .value("hypsogrid_cycle_load_seconds", &[("cycle_id", &cycle.id)])
            .unwrap_or_else(|| panic!("no load time for '{}'", cycle.id));
        assert_eq!(value, cycle.load_seconds, "{}", cycle.id);
        assert!(value > 0.0);
    }
    assert!(snapshot.cycles.iter().any(|c| c.id.contains('"')));
}
