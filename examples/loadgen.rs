//! Load generator for the `hypsogrid.v1.HeightService` on loopback.
//!
//! Runs N concurrent gRPC clients for T seconds against a server on this machine, each
//! sending a weighted mix of area, position and profile requests on the newest cycle of the
//! server's catalogue, and reports requests per second and latency percentiles per kind
//! (from HDR histograms) with the count of failed requests by status code.
//!
//! ```sh
//! cargo run --release --example loadgen -- --target 127.0.0.1:50051 \
//!     --clients 16 --seconds 10 --mix area:1,position:8,profile:1
//! cargo run --release --example loadgen -- --serve-demo --seconds 5 --json
//! ```
//!
//! Only loopback targets are accepted: this is a measuring tool, not a way to load someone
//! else's server. `--serve-demo` starts an in-process server on the invented demo cycle so
//! that one command measures the whole path. The exit status is non-zero when any request
//! failed unexpectedly (anything but a `NOT_FOUND` for a cycle evicted during the run, after
//! which the clients move to the new newest cycle) or when no request completed.
//! docs/OPERATIONS.md describes the output.

use std::collections::BTreeMap;
use std::net::{SocketAddr, ToSocketAddrs};
use std::process::ExitCode;
use std::sync::Arc;
use std::time::{Duration, Instant};

use anyhow::{anyhow, bail, Context};
use clap::Parser;
use hdrhistogram::Histogram;
use hypsogrid::pb;
use hypsogrid::pb::height_service_client::HeightServiceClient;
use tokio::sync::RwLock;
use tokio_stream::StreamExt;
use tonic::transport::Channel;
use tonic::Code;

/// Most concurrent clients: beyond this the generator measures itself more than the server.
const MAX_CLIENTS: usize = 512;
/// Longest run, seconds (an hour: long soaks are run by hand, not by this tool in a loop).
const MAX_SECONDS: u64 = 3600;
/// Side of the largest area asked for, grid points.
const AREA_SIDE: usize = 200;
/// Points per position request.
const POSITION_POINTS: usize = 10;
/// Per-request deadline sent to the server.
const REQUEST_DEADLINE: Duration = Duration::from_secs(10);
/// Largest answer message the clients accept (the server cuts area answers to its own
/// maximum, 4 MiB by default).
const CLIENT_MAX_MESSAGE: usize = 64 * 1024 * 1024;

/// The parts of a `hypsogrid.v1.AreaChunk` the generator checks, decoded without turning
/// every value into an `f32`.
///
/// Packed `repeated float` and `bytes` share the protobuf wire form (a length-delimited run of
/// bytes), so declaring `values` as bytes reads the same message as a slice of the received
/// buffer instead of a decode call per value: prost's generic decoding of packed floats took
/// about a fifth of the machine in an area-only run, time a load generator should leave to
/// the server it measures. (`pb::QuantityValues` now decodes such a run in one copy too, see
/// `src/wire.rs`; the view still saves that copy.) Real clients read packed floats as one
/// block too (Python's protobuf runtime does).
#[derive(Clone, PartialEq, prost::Message)]
struct AreaChunkView {
    #[prost(string, tag = "1")]
    cycle_id: String,
    #[prost(uint32, tag = "4")]
    row_offset: u32,
    #[prost(uint32, tag = "5")]
    total_rows: u32,
    #[prost(double, repeated, tag = "6")]
    latitudes_deg: Vec<f64>,
    #[prost(double, repeated, tag = "7")]
    longitudes_deg: Vec<f64>,
    #[prost(message, repeated, tag = "8")]
    fields: Vec<QuantityValuesView>,
}

/// `hypsogrid.v1.QuantityValues` with its values as the raw little-endian `f32` bytes.
#[derive(Clone, PartialEq, prost::Message)]
struct QuantityValuesView {
    #[prost(bytes = "bytes", tag = "2")]
    values: prost::bytes::Bytes,
    #[prost(bytes = "bytes", tag = "3")]
    flags: prost::bytes::Bytes,
}

/// `QueryArea` answered as [`AreaChunkView`]s.
async fn query_area_view(
    grpc: &mut tonic::client::Grpc<Channel>,
    request: pb::AreaRequest,
) -> Result<tonic::codec::Streaming<AreaChunkView>, tonic::Status> {
    grpc.ready()
        .await
        .map_err(|e| tonic::Status::unknown(format!("service was not ready: {e}")))?;
    let path = tonic::codegen::http::uri::PathAndQuery::from_static(
        "/hypsogrid.v1.HeightService/QueryArea",
    );
    let codec = tonic_prost::ProstCodec::<pb::AreaRequest, AreaChunkView>::default();
    grpc.server_streaming(with_deadline(request), path, codec)
        .await
        .map(tonic::Response::into_inner)
}

/// Whether the chunks of one area answer fit together: every row once, in order, and as
/// many values and flags per quantity as the chunk has points.
#[derive(Default)]
struct AreaCheck {
    rows: usize,
    cols: usize,
}

impl AreaCheck {
    fn take(&mut self, chunk: &AreaChunkView, quantities: usize) -> Result<(), &'static str> {
        if chunk.row_offset as usize != self.rows {
            return Err("AreaRowsOutOfOrder");
        }
        if self.rows == 0 {
            self.cols = chunk.longitudes_deg.len();
        }
        let points = chunk.latitudes_deg.len() * self.cols;
        let sizes_ok = chunk.fields.len() == quantities
            && chunk
                .fields
                .iter()
                .all(|f| f.values.len() == 4 * points && f.flags.len() == points);
        if !sizes_ok {
            return Err("AreaValueCount");
        }
        self.rows += chunk.latitudes_deg.len();
        if self.rows > chunk.total_rows as usize {
            return Err("AreaTooManyRows");
        }
        Ok(())
    }
}

#[derive(Parser, Debug)]
#[command(
    about = "Load generator for the hypsogrid gRPC service (loopback only)",
    long_about = None
)]
struct Args {
    /// Server address, HOST:PORT, resolving to loopback only (127.0.0.1:PORT, [::1]:PORT,
    /// localhost:PORT).
    #[arg(
        long,
        conflicts_with = "serve_demo",
        required_unless_present_any = ["serve_demo", "serve_synthetic"]
    )]
    target: Option<String>,
    /// Start an in-process server on the invented demo cycle and measure it.
    #[arg(long, conflicts_with = "serve_synthetic")]
    serve_demo: bool,
    /// Start an in-process server on a synthetic 0.5° global cycle (361 × 720 points, 37
    /// levels; large enough for 200 × 200 areas) and measure it.
    #[arg(long, conflicts_with = "target")]
    serve_synthetic: bool,
    /// Concurrent clients, each with its own connection (1-512).
    #[arg(long, default_value_t = 16)]
    clients: usize,
    /// Duration of the run, seconds (1-3600).
    #[arg(long, default_value_t = 10)]
    seconds: u64,
    /// Relative weights of the request kinds, KIND:WEIGHT,... with kinds area, position and
    /// profile; a kind left out is not sent.
    #[arg(long, default_value = "area:1,position:8,profile:1")]
    mix: String,
    /// Offered load, requests per second over all clients (open loop): each client sends on
    /// a fixed schedule of RATE/CLIENTS requests a second, whatever its answers take, so the
    /// latencies are those at this load. Without it each client sends its next request as
    /// soon as the last is answered (closed loop: the most the server can do, where the
    /// latency is mostly waiting behind the other clients).
    #[arg(long)]
    rate: Option<f64>,
    /// Print the report as one JSON object instead of a table.
    #[arg(long)]
    json: bool,
}

/// Highest `--rate`, requests per second.
const MAX_RATE: f64 = 1.0e6;

/// A send this much behind its schedule counts as late in an open-loop run.
const LATE_SEND: Duration = Duration::from_millis(1);

/// The open-loop schedule of one client: its first send and the interval between sends.
/// Clients are spread evenly over one interval, so that they do not all send at once.
fn schedule(rate: f64, clients: usize, id: usize, start: Instant) -> (Instant, Duration) {
    let interval = Duration::from_secs_f64(clients as f64 / rate);
    let offset = interval.mul_f64(id as f64 / clients as f64);
    (start + offset, interval)
}

/// The request kinds the generator sends.
#[derive(Clone, Copy, Debug, PartialEq, Eq, PartialOrd, Ord)]
enum Kind {
    Area,
    Position,
    Profile,
}

impl Kind {
    const ALL: [Kind; 3] = [Kind::Area, Kind::Position, Kind::Profile];

    fn name(self) -> &'static str {
        match self {
            Kind::Area => "area",
            Kind::Position => "position",
            Kind::Profile => "profile",
        }
    }
}

/// Parses `area:1,position:8,profile:1` into weights per kind.
fn parse_mix(text: &str) -> anyhow::Result<Vec<(Kind, u32)>> {
    let mut mix: Vec<(Kind, u32)> = Vec::new();
    for part in text.split(',').map(str::trim).filter(|p| !p.is_empty()) {
        let (name, weight) = part
            .split_once(':')
            .ok_or_else(|| anyhow!("--mix: '{part}' is not KIND:WEIGHT"))?;
        let kind = Kind::ALL
            .into_iter()
            .find(|k| k.name() == name.trim())
            .ok_or_else(|| {
                anyhow!("--mix: unknown kind '{name}': expected area, position or profile")
            })?;
        let weight: u32 = weight
            .trim()
            .parse()
            .map_err(|_| anyhow!("--mix: weight '{weight}' of {name} is not a whole number"))?;
        if mix.iter().any(|(k, _)| *k == kind) {
            bail!("--mix: {name} is given twice");
        }
        if weight > 0 {
            mix.push((kind, weight));
        }
    }
    if mix.is_empty() {
        bail!("--mix: no kind has a weight above zero");
    }
    Ok(mix)
}

/// Resolves the target and refuses anything that is not loopback.
fn loopback_target(text: &str) -> anyhow::Result<SocketAddr> {
    let addrs: Vec<SocketAddr> = text
        .to_socket_addrs()
        .with_context(|| format!("--target: cannot resolve '{text}' (expected HOST:PORT)"))?
        .collect();
    let first = *addrs
        .first()
        .ok_or_else(|| anyhow!("--target: '{text}' resolves to no address"))?;
    if let Some(bad) = addrs.iter().find(|a| !a.ip().is_loopback()) {
        bail!(
            "--target: '{text}' resolves to {bad}, which is not a loopback address: the load \
             generator only measures servers on this machine"
        );
    }
    Ok(first)
}

/// What the clients ask about: the newest cycle and its shape, refreshed when it is evicted.
#[derive(Clone, Debug)]
struct Plan {
    cycle_id: String,
    latitudes: Vec<f64>,
    longitudes: Vec<f64>,
    lead_times_s: Vec<i64>,
    /// The layer every area and position request asks for, Pa (bottom, top).
    layer: (f64, f64),
    /// The pressure of the height every position request asks for, Pa.
    height_pa: f64,
    /// Extrapolate (hybrid levels, whose pressures vary with the surface).
    allow_extrapolation: bool,
}

async fn fetch_plan(client: &mut HeightServiceClient<Channel>) -> anyhow::Result<Plan> {
    let catalogue = client
        .get_catalogue(pb::CatalogueRequest {})
        .await
        .context("GetCatalogue")?
        .into_inner();
    let entry = catalogue
        .cycles
        .first()
        .ok_or_else(|| anyhow!("the server holds no cycle yet"))?;
    let d = entry
        .description
        .as_ref()
        .ok_or_else(|| anyhow!("cycle '{}' has no description", entry.id))?;
    let grid = d
        .grid
        .as_ref()
        .ok_or_else(|| anyhow!("cycle '{}' has no grid", entry.id))?;
    if grid.latitudes_deg.is_empty() || grid.longitudes_deg.is_empty() || d.lead_times_s.is_empty()
    {
        bail!("cycle '{}' has an empty grid or no lead times", entry.id);
    }
    let (layer, height_pa, allow_extrapolation) =
        match d.vertical.as_ref().and_then(|v| v.kind.as_ref()) {
            Some(pb::vertical_axis::Kind::Isobaric(levels)) if levels.pressure_pa.len() >= 2 => {
                // The lowest level and the level nearest 500 hPa above it (1000-500 hPa on
                // most cycles: the thickness forecasters draw).
                let p = &levels.pressure_pa;
                let bottom = p.iter().copied().fold(f64::MIN, f64::max);
                let top = p
                    .iter()
                    .copied()
                    .filter(|&x| x < bottom)
                    .min_by(|a, b| (a - 50_000.0).abs().total_cmp(&(b - 50_000.0).abs()))
                    .unwrap_or(bottom / 2.0);
                ((bottom, top), top, false)
            }
            _ => ((85_000.0, 50_000.0), 50_000.0, true),
        };
    Ok(Plan {
        cycle_id: entry.id.clone(),
        latitudes: grid.latitudes_deg.clone(),
        longitudes: grid.longitudes_deg.clone(),
        lead_times_s: d.lead_times_s.clone(),
        layer,
        height_pa,
        allow_extrapolation,
    })
}

/// A small deterministic generator (xorshift64*) so that each client's requests differ but
/// runs repeat.
struct Rng(u64);

impl Rng {
    fn new(seed: u64) -> Self {
        Rng(seed.wrapping_mul(0x9E37_79B9_7F4A_7C15) | 1)
    }
    fn next(&mut self) -> u64 {
        let mut x = self.0;
        x ^= x >> 12;
        x ^= x << 25;
        x ^= x >> 27;
        self.0 = x;
        x.wrapping_mul(0x2545_F491_4F6C_DD1D)
    }
    fn below(&mut self, n: usize) -> usize {
        if n == 0 {
            0
        } else {
            (self.next() % n as u64) as usize
        }
    }
    /// A value strictly inside the span of `axis` (grid coordinates or between them).
    fn inside(&mut self, axis: &[f64]) -> f64 {
        let i = self.below(axis.len());
        let j = (i + 1).min(axis.len() - 1);
        let f = (self.next() % 1000) as f64 / 1000.0;
        axis[i] + f * (axis[j] - axis[i])
    }
}

fn thickness(layer: (f64, f64)) -> pb::Quantity {
    pb::Quantity {
        kind: Some(pb::quantity::Kind::Thickness(pb::LayerBounds {
            bottom_pa: layer.0,
            top_pa: layer.1,
        })),
    }
}

fn lead(seconds: i64) -> Option<pb::TimeSelection> {
    Some(pb::TimeSelection {
        kind: Some(pb::time_selection::Kind::LeadTimeS(seconds)),
    })
}

/// An area of at most 200 x 200 grid points at a random place on the grid (the whole grid
/// when it is smaller), one layer.
fn area_request(plan: &Plan, rng: &mut Rng) -> pb::AreaRequest {
    let (lats, lons) = (&plan.latitudes, &plan.longitudes);
    let rows = lats.len().min(AREA_SIDE);
    let cols = lons.len().min(AREA_SIDE);
    let r0 = rng.below(lats.len() - rows + 1);
    let c0 = rng.below(lons.len() - cols + 1);
    let (a, b) = (lats[r0], lats[r0 + rows - 1]);
    pb::AreaRequest {
        cycle_id: plan.cycle_id.clone(),
        time: lead(plan.lead_times_s[rng.below(plan.lead_times_s.len())]),
        member: 0,
        quantities: vec![thickness(plan.layer)],
        bbox: Some(pb::BoundingBox {
            south_deg: a.min(b),
            north_deg: a.max(b),
            west_deg: lons[c0],
            east_deg: lons[c0 + cols - 1],
        }),
        stride: None,
        allow_extrapolation: plan.allow_extrapolation,
    }
}

fn position_request(plan: &Plan, rng: &mut Rng) -> pb::PositionRequest {
    let points = (0..POSITION_POINTS)
        .map(|_| pb::GeoPoint {
            latitude_deg: rng.inside(&plan.latitudes),
            longitude_deg: rng.inside(&plan.longitudes),
        })
        .collect();
    pb::PositionRequest {
        cycle_id: plan.cycle_id.clone(),
        points,
        quantities: vec![
            thickness(plan.layer),
            pb::Quantity {
                kind: Some(pb::quantity::Kind::GeopotentialHeight(
                    pb::HeightAtPressure {
                        pressure_pa: plan.height_pa,
                    },
                )),
            },
        ],
        times: vec![lead(plan.lead_times_s[rng.below(plan.lead_times_s.len())]).unwrap_or_default()],
        member: 0,
        interpolation: pb::Interpolation::Bilinear as i32,
        allow_extrapolation: plan.allow_extrapolation,
    }
}

fn profile_request(plan: &Plan, rng: &mut Rng) -> pb::ProfileRequest {
    pb::ProfileRequest {
        cycle_id: plan.cycle_id.clone(),
        point: Some(pb::GeoPoint {
            latitude_deg: rng.inside(&plan.latitudes),
            longitude_deg: rng.inside(&plan.longitudes),
        }),
        time: lead(plan.lead_times_s[rng.below(plan.lead_times_s.len())]),
        member: 0,
        interpolation: pb::Interpolation::Bilinear as i32,
    }
}

/// How one request ended.
enum Outcome {
    Ok,
    /// The cycle asked for was evicted meanwhile: expected while cycles roll over.
    Evicted,
    Failed(String),
}

fn outcome_of(status: &tonic::Status) -> Outcome {
    if status.code() == Code::NotFound && status.message().starts_with("cycle_id:") {
        Outcome::Evicted
    } else {
        Outcome::Failed(format!("{:?}", status.code()))
    }
}

fn with_deadline<T>(message: T) -> tonic::Request<T> {
    let mut r = tonic::Request::new(message);
    r.set_timeout(REQUEST_DEADLINE);
    r
}

async fn one_request(
    client: &mut HeightServiceClient<Channel>,
    area: &mut tonic::client::Grpc<Channel>,
    kind: Kind,
    plan: &Plan,
    rng: &mut Rng,
) -> Outcome {
    // An answer naming another cycle than the one asked for would be a torn read.
    let mismatch = |got: &str| Outcome::Failed(format!("WrongCycle({got})"));
    match kind {
        Kind::Area => {
            let req = area_request(plan, rng);
            let quantities = req.quantities.len();
            let mut stream = match query_area_view(area, req).await {
                Ok(s) => s,
                Err(s) => return outcome_of(&s),
            };
            let mut check = AreaCheck::default();
            while let Some(item) = stream.next().await {
                match item {
                    Ok(chunk) if chunk.cycle_id != plan.cycle_id => {
                        return mismatch(&chunk.cycle_id)
                    }
                    Ok(chunk) => {
                        if let Err(what) = check.take(&chunk, quantities) {
                            return Outcome::Failed(what.into());
                        }
                    }
                    Err(s) => return outcome_of(&s),
                }
            }
            if check.rows == 0 {
                return Outcome::Failed("EmptyArea".into());
            }
            Outcome::Ok
        }
        Kind::Position => match client
            .query_position(with_deadline(position_request(plan, rng)))
            .await
        {
            Ok(r) if r.get_ref().cycle_id != plan.cycle_id => mismatch(&r.get_ref().cycle_id),
            Ok(r) if r.get_ref().series.len() != POSITION_POINTS => {
                Outcome::Failed("WrongPointCount".into())
            }
            Ok(_) => Outcome::Ok,
            Err(s) => outcome_of(&s),
        },
        Kind::Profile => match client
            .query_profile(with_deadline(profile_request(plan, rng)))
            .await
        {
            Ok(r) if r.get_ref().cycle_id != plan.cycle_id => mismatch(&r.get_ref().cycle_id),
            Ok(_) => Outcome::Ok,
            Err(s) => outcome_of(&s),
        },
    }
}

/// What one client measured.
struct ClientResult {
    /// Open loop: sends more than [`LATE_SEND`] behind the schedule.
    late_sends: u64,
    latencies: BTreeMap<Kind, Histogram<u64>>,
    failures: BTreeMap<(Kind, String), u64>,
    evicted: u64,
}

fn new_histogram() -> anyhow::Result<Histogram<u64>> {
    // Microseconds from 1 µs to 10 minutes, three significant digits.
    Histogram::new_with_bounds(1, 600_000_000, 3).map_err(|e| anyhow!("histogram: {e}"))
}

async fn run_client(
    id: u64,
    channel: Channel,
    plan: Arc<RwLock<Plan>>,
    mix: Arc<Vec<(Kind, u32)>>,
    until: Instant,
    open_loop: Option<(Instant, Duration)>,
) -> anyhow::Result<ClientResult> {
    let mut area =
        tonic::client::Grpc::new(channel.clone()).max_decoding_message_size(CLIENT_MAX_MESSAGE);
    let mut client =
        HeightServiceClient::new(channel).max_decoding_message_size(CLIENT_MAX_MESSAGE);
    let mut rng = Rng::new(id + 1);
    let total: u32 = mix.iter().map(|(_, w)| w).sum();
    let mut latencies = BTreeMap::new();
    for (k, _) in mix.iter() {
        latencies.insert(*k, new_histogram()?);
    }
    let mut failures = BTreeMap::new();
    let mut evicted = 0;
    let mut late_sends = 0;
    let mut next_send = open_loop.map(|(first, _)| first);
    while Instant::now() < until {
        if let (Some(due), Some((_, interval))) = (next_send.as_mut(), open_loop) {
            if *due >= until {
                break;
            }
            let now = Instant::now();
            if *due > now {
                tokio::time::sleep_until((*due).into()).await;
            } else if now - *due > LATE_SEND {
                // Behind schedule: the answers take longer than the interval allows.
                late_sends += 1;
            }
            *due += interval;
        }
        let mut pick = (rng.next() % u64::from(total)) as u32;
        let mut kind = mix[0].0;
        for (k, w) in mix.iter() {
            if pick < *w {
                kind = *k;
                break;
            }
            pick -= w;
        }
        let current = plan.read().await.clone();
        let started = Instant::now();
        let outcome = one_request(&mut client, &mut area, kind, &current, &mut rng).await;
        let micros = u64::try_from(started.elapsed().as_micros()).unwrap_or(u64::MAX);
        match outcome {
            Outcome::Ok => {
                if let Some(h) = latencies.get_mut(&kind) {
                    h.saturating_record(micros.max(1));
                }
            }
            Outcome::Evicted => {
                evicted += 1;
                // Move to the new newest cycle (one client refreshing is enough; the others
                // see the new plan on their next request).
                let fresh = fetch_plan(&mut client).await?;
                let mut shared = plan.write().await;
                if shared.cycle_id == current.cycle_id {
                    *shared = fresh;
                }
            }
            Outcome::Failed(code) => *failures.entry((kind, code)).or_insert(0) += 1,
        }
    }
    Ok(ClientResult {
        late_sends,
        latencies,
        failures,
        evicted,
    })
}

async fn connect(addr: SocketAddr) -> anyhow::Result<Channel> {
    Channel::from_shared(format!("http://{addr}"))
        .context("target url")?
        .connect_timeout(Duration::from_secs(5))
        .tcp_nodelay(true)
        .initial_stream_window_size(hypsogrid::service::STREAM_WINDOW_BYTES)
        .initial_connection_window_size(hypsogrid::service::CONNECTION_WINDOW_BYTES)
        .max_frame_size(hypsogrid::service::MAX_FRAME_BYTES)
        .connect()
        .await
        .with_context(|| format!("cannot connect to {addr}"))
}

/// A server on the demo cycle, in this process, on 127.0.0.1 with an ephemeral port.
struct DemoServer {
    addr: SocketAddr,
    stop: tokio::sync::oneshot::Sender<()>,
    task: tokio::task::JoinHandle<Result<(), hypsogrid::service::ServiceError>>,
    _dir: tempfile::TempDir,
}

/// Which cycle an in-process server holds.
#[derive(Clone, Copy, Debug)]
enum LocalCycle {
    /// The invented demo scenario (49 × 81 points).
    Demo,
    /// A synthetic 0.5° global cycle, one time step.
    SyntheticGlobal,
}

async fn serve_local(which: LocalCycle) -> anyhow::Result<DemoServer> {
    use hypsogrid::compute::ComputeConfig;
    use hypsogrid::ingest::IngestConfig;
    use hypsogrid::store::{CycleStore, StoreConfig};
    use hypsogrid::watch::{scan_once, WatchConfig, WatchState};

    let dir = tempfile::tempdir().context("temporary data folder")?;
    match which {
        LocalCycle::Demo => {
            hypsogrid::demo::write_demo_cycle(dir.path()).context("writing the demo cycle")?;
        }
        LocalCycle::SyntheticGlobal => {
            let spec = hypsogrid::demo::SyntheticGlobal {
                rows: 361,
                cols: 720,
                levels: 37,
                times: 1,
                deflate_level: None,
            };
            hypsogrid::demo::write_synthetic_global(&dir.path().join("synthetic_0p5.nc"), &spec)
                .context("writing the synthetic global cycle")?;
        }
    }
    let store = Arc::new(CycleStore::new(StoreConfig::default()));
    // The file was written just now and completely: no need to wait for it to settle.
    let watch = WatchConfig {
        settle: Duration::ZERO,
        ..WatchConfig::new(dir.path())
    };
    let report = scan_once(
        &store,
        &mut WatchState::new(),
        &watch,
        &IngestConfig::default(),
        &ComputeConfig::default(),
    )
    .await;
    if report.loaded.is_empty() {
        bail!("the demo cycle did not load: {report:?}");
    }
    let listener = tokio::net::TcpListener::bind("127.0.0.1:0")
        .await
        .context("bind 127.0.0.1:0")?;
    let addr = listener.local_addr().context("local address")?;
    let (stop, stopped) = tokio::sync::oneshot::channel::<()>();
    let task = tokio::spawn(hypsogrid::service::serve_on(
        listener,
        store,
        hypsogrid::service::ServiceConfig::default(),
        async move {
            let _ = stopped.await;
        },
    ));
    Ok(DemoServer {
        addr,
        stop,
        task,
        _dir: dir,
    })
}

/// Latency summary of one kind, milliseconds.
#[derive(serde::Serialize)]
struct KindReport {
    requests: u64,
    requests_per_s: f64,
    p50_ms: f64,
    p90_ms: f64,
    p99_ms: f64,
    max_ms: f64,
}

#[derive(serde::Serialize)]
struct FailureReport {
    kind: &'static str,
    code: String,
    count: u64,
}

#[derive(serde::Serialize)]
struct Report {
    target: String,
    cycle_id: String,
    clients: usize,
    /// `--rate`: the offered load of an open-loop run; `None` for a closed loop.
    offered_per_s: Option<f64>,
    /// Open loop: sends more than 1 ms behind their schedule (the offered load was not kept).
    late_sends: u64,
    seconds: f64,
    requests: u64,
    requests_per_s: f64,
    kinds: BTreeMap<&'static str, KindReport>,
    /// Requests that named a cycle evicted during the run (expected, not failures).
    evicted_cycle_answers: u64,
    failures: Vec<FailureReport>,
}

fn ms(micros: u64) -> f64 {
    micros as f64 / 1000.0
}

fn print_table(r: &Report) {
    println!(
        "target {}  cycle '{}'  {} clients  {:.1} s  {} requests  {:.1} req/s",
        r.target, r.cycle_id, r.clients, r.seconds, r.requests, r.requests_per_s
    );
    if let Some(rate) = r.offered_per_s {
        println!(
            "open loop: {rate:.1} req/s offered, {} sends more than 1 ms late",
            r.late_sends
        );
    }
    println!(
        "{:<9} {:>9} {:>9} {:>9} {:>9} {:>9} {:>9}",
        "kind", "requests", "req/s", "p50 ms", "p90 ms", "p99 ms", "max ms"
    );
    for (name, k) in &r.kinds {
        println!(
            "{:<9} {:>9} {:>9.1} {:>9.3} {:>9.3} {:>9.3} {:>9.3}",
            name, k.requests, k.requests_per_s, k.p50_ms, k.p90_ms, k.p99_ms, k.max_ms
        );
    }
    if r.evicted_cycle_answers > 0 {
        println!(
            "{} requests named a cycle evicted during the run (expected; the clients moved on)",
            r.evicted_cycle_answers
        );
    }
    if r.failures.is_empty() {
        println!("no failed requests");
    } else {
        println!("failed requests:");
        for f in &r.failures {
            println!("  {:<9} {:<24} {}", f.kind, f.code, f.count);
        }
    }
}

async fn run(args: Args) -> anyhow::Result<bool> {
    if args.clients == 0 || args.clients > MAX_CLIENTS {
        bail!("--clients: {} is outside 1..={MAX_CLIENTS}", args.clients);
    }
    if args.seconds == 0 || args.seconds > MAX_SECONDS {
        bail!("--seconds: {} is outside 1..={MAX_SECONDS}", args.seconds);
    }
    if let Some(rate) = args.rate {
        if !(rate > 0.0 && rate <= MAX_RATE) {
            bail!("--rate: {rate} is outside (0, {MAX_RATE}] requests per second");
        }
    }
    let mix = Arc::new(parse_mix(&args.mix)?);
    let demo = if args.serve_demo {
        Some(serve_local(LocalCycle::Demo).await?)
    } else if args.serve_synthetic {
        Some(serve_local(LocalCycle::SyntheticGlobal).await?)
    } else {
        None
    };
    let addr = match (&demo, &args.target) {
        (Some(d), _) => d.addr,
        (None, Some(t)) => loopback_target(t)?,
        (None, None) => bail!("give --target HOST:PORT, --serve-demo or --serve-synthetic"),
    };
    let first = connect(addr).await?;
    let plan = fetch_plan(
        &mut HeightServiceClient::new(first.clone()).max_decoding_message_size(CLIENT_MAX_MESSAGE),
    )
    .await?;
    let cycle_id = plan.cycle_id.clone();
    let plan = Arc::new(RwLock::new(plan));

    let started = Instant::now();
    let until = started + Duration::from_secs(args.seconds);
    let mut tasks = Vec::with_capacity(args.clients);
    for id in 0..args.clients {
        // One connection per client, as separate tools would have.
        let channel = if id == 0 {
            first.clone()
        } else {
            connect(addr).await?
        };
        tasks.push(tokio::spawn(run_client(
            id as u64,
            channel,
            Arc::clone(&plan),
            Arc::clone(&mix),
            until,
            args.rate.map(|r| schedule(r, args.clients, id, started)),
        )));
    }
    let mut latencies: BTreeMap<Kind, Histogram<u64>> = BTreeMap::new();
    let mut failures: BTreeMap<(Kind, String), u64> = BTreeMap::new();
    let mut evicted = 0;
    let mut late_sends = 0;
    for t in tasks {
        let r = t.await.context("client task")??;
        late_sends += r.late_sends;
        for (k, h) in r.latencies {
            match latencies.get_mut(&k) {
                Some(total) => total.add(&h).map_err(|e| anyhow!("histogram: {e}"))?,
                None => {
                    latencies.insert(k, h);
                }
            }
        }
        for (key, n) in r.failures {
            *failures.entry(key).or_insert(0) += n;
        }
        evicted += r.evicted;
    }
    let seconds = started.elapsed().as_secs_f64();

    if let Some(d) = demo {
        let _ = d.stop.send(());
        match tokio::time::timeout(Duration::from_secs(15), d.task).await {
            Ok(Ok(Ok(()))) => {}
            Ok(Ok(Err(e))) => bail!("the demo server failed: {e}"),
            Ok(Err(e)) => bail!("the demo server task failed: {e}"),
            Err(_) => bail!("the demo server did not stop within 15 s"),
        }
    }

    let mut kinds = BTreeMap::new();
    let mut requests = 0;
    for (k, h) in &latencies {
        let n = h.len();
        requests += n;
        kinds.insert(
            k.name(),
            KindReport {
                requests: n,
                requests_per_s: n as f64 / seconds,
                p50_ms: ms(h.value_at_quantile(0.50)),
                p90_ms: ms(h.value_at_quantile(0.90)),
                p99_ms: ms(h.value_at_quantile(0.99)),
                max_ms: ms(h.max()),
            },
        );
    }
    let failures: Vec<FailureReport> = failures
        .into_iter()
        .map(|((k, code), count)| FailureReport {
            kind: k.name(),
            code,
            count,
        })
        .collect();
    let report = Report {
        target: addr.to_string(),
        cycle_id,
        clients: args.clients,
        offered_per_s: args.rate,
        late_sends,
        seconds,
        requests,
        requests_per_s: requests as f64 / seconds,
        kinds,
        evicted_cycle_answers: evicted,
        failures,
    };
    if args.json {
        println!("{}", serde_json::to_string_pretty(&report)?);
    } else {
        print_table(&report);
    }
    Ok(report.failures.is_empty() && report.requests > 0)
}

fn main() -> ExitCode {
    // The NetCDF library's set-up now, on a thread of its own that stays (the served cycle
    // is read on a worker): see `hypsogrid::netcdf_session::initialize`.
    let _ = hypsogrid::netcdf_session::initialize();
    let args = Args::parse();
    let runtime = match tokio::runtime::Builder::new_multi_thread()
        .enable_all()
        .build()
    {
        Ok(runtime) => runtime,
        Err(e) => {
            eprintln!("loadgen: starting the async runtime: {e}");
            return ExitCode::from(2);
        }
    };
    match runtime.block_on(run(args)) {
        Ok(true) => ExitCode::SUCCESS,
        Ok(false) => ExitCode::FAILURE,
        Err(e) => {
            eprintln!("loadgen: {e:#}");
            ExitCode::from(2)
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_mix_parses_weights_and_refuses_nonsense() {
        let mix = parse_mix("area:1,position:8,profile:1").expect("mix");
        assert_eq!(
            mix,
            [(Kind::Area, 1), (Kind::Position, 8), (Kind::Profile, 1)]
        );
        assert_eq!(
            parse_mix("profile:0,position:2").expect("mix"),
            [(Kind::Position, 2)]
        );
        for bad in [
            "",
            "area",
            "area:x",
            "cube:1",
            "area:0",
            "area:1,area:2",
            "area:-1",
        ] {
            assert!(parse_mix(bad).is_err(), "{bad}");
        }
    }

    #[test]
    fn open_loop_clients_are_spread_over_one_interval() {
        let start = Instant::now();
        let (first0, interval) = schedule(1600.0, 16, 0, start);
        assert_eq!(first0, start);
        // 16 clients at 1600 req/s: each sends every 10 ms, the next client 0.625 ms later.
        assert_eq!(interval, Duration::from_millis(10));
        let (first1, _) = schedule(1600.0, 16, 1, start);
        assert_eq!(first1 - start, Duration::from_micros(625));
        let (last, _) = schedule(1600.0, 16, 15, start);
        assert!(last - start < interval);
    }

    #[test]
    fn only_loopback_targets_are_accepted() {
        assert!(loopback_target("127.0.0.1:50051").is_ok());
        assert!(loopback_target("[::1]:50051").is_ok());
        for bad in [
            "192.0.2.1:50051",
            "10.0.0.1:1",
            "[2001:db8::1]:443",
            "0.0.0.0:1",
        ] {
            let e = loopback_target(bad).expect_err(bad).to_string();
            assert!(e.contains("not a loopback address"), "{e}");
        }
        assert!(loopback_target("no-port").is_err());
    }

    #[test]
    fn areas_stay_within_200_by_200_points_and_the_grid() {
        let plan = Plan {
            cycle_id: "x.nc".into(),
            latitudes: (0..361).map(|i| 90.0 - 0.5 * i as f64).collect(),
            longitudes: (0..720).map(|i| 0.5 * i as f64).collect(),
            lead_times_s: vec![0, 21_600],
            layer: (100_000.0, 50_000.0),
            height_pa: 50_000.0,
            allow_extrapolation: false,
        };
        let mut rng = Rng::new(7);
        for _ in 0..100 {
            let b = area_request(&plan, &mut rng).bbox.expect("bbox");
            assert!(b.south_deg < b.north_deg);
            // 200 rows of 0.5 degrees span 99.5 degrees.
            assert!((b.north_deg - b.south_deg - 99.5).abs() < 1e-9);
            assert!((b.east_deg - b.west_deg - 99.5).abs() < 1e-9);
            assert!(b.south_deg >= -90.0 && b.north_deg <= 90.0);
            assert!(b.west_deg >= 0.0 && b.east_deg <= 359.5);
            let p = position_request(&plan, &mut rng);
            assert_eq!(p.points.len(), POSITION_POINTS);
        }
    }
}
