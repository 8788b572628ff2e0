//! Soak: a real server under steady load while new cycles arrive and old ones are evicted.
//!
//! An in-process server (`serve_on` on 127.0.0.1:0) answers from a store that keeps the
//! newest 2 cycles, filled by the folder watcher from a temporary data folder. A writer thread
//! drops a new cycle every few seconds (written as `.partial`, then renamed), each the
//! invented demo cycle (`hypsogrid::demo`) with its reference time moved 6 h later, and
//! deletes files that are long evicted. Concurrent tonic clients send area, position and
//! profile requests, mostly for the newest cycle, sometimes naming one by id.
//!
//! Asserted at the end:
//! - no failed request other than the deliberate one: `NOT_FOUND` for a request naming a
//!   cycle that was evicted (and is gone from the store afterwards);
//! - no torn reads: every answer names the cycle it was asked for (or, for the newest, one
//!   of the cycles written), its valid time minus its lead time is that cycle's reference
//!   time, and its values agree with one another (an area's or a position's thickness equals
//!   the difference of its two heights in the same answer; a profile's heights rise);
//! - memory stable: VmRSS at the end within 150 MB of VmRSS after the warm-up (both printed);
//! - the run did what it claims: several cycles loaded, some evicted, many requests answered.
//!
//! About 45 s by default; `HYPSOGRID_SOAK_SECONDS=600 cargo test --release --test soak --
//! --nocapture` runs longer by hand (docs/OPERATIONS.md).

#[path = "common/hdf5.rs"]
mod quiet;

use std::collections::{BTreeMap, HashMap};
use std::net::SocketAddr;
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicBool, AtomicUsize, Ordering};
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

use hypsogrid::compute::ComputeConfig;
use hypsogrid::demo::{write_demo_cycle, DEMO_LEAD_HOURS, DEMO_REFERENCE_TIME};
use hypsogrid::ingest::time::{format_rfc3339_utc, parse_date_time};
use hypsogrid::ingest::IngestConfig;
use hypsogrid::pb;
use hypsogrid::pb::height_service_client::HeightServiceClient;
use hypsogrid::service::{serve_on, ServiceConfig};
use hypsogrid::store::{CycleStore, StoreConfig};
use hypsogrid::watch::{watch, WatchConfig};
use quiet::quiet_hdf5_on_this_thread;
use tokio_stream::StreamExt;
use tonic::transport::Channel;
use tonic::Code;

/// Seconds of load by default (plus a few seconds of set-up and warm-up).
const DEFAULT_SECONDS: u64 = 36;
/// Seconds between two new cycles.
const CYCLE_EVERY: Duration = Duration::from_secs(3);
/// Cycles the store keeps.
const KEEP: usize = 2;
/// Concurrent clients.
const CLIENTS: usize = 4;
/// Allowed growth of the resident set between warm-up and the end.
const RSS_BOUND_BYTES: u64 = 150 * 1024 * 1024;

/// Bounds of the demo grid: 50–62° N, 45–25° W (`hypsogrid::demo`).
const SOUTH: f64 = 50.0;
const NORTH: f64 = 62.0;
const WEST: f64 = -45.0;
const EAST: f64 = -25.0;

fn soak_seconds() -> u64 {
    std::env::var("HYPSOGRID_SOAK_SECONDS")
        .ok()
        .and_then(|s| s.trim().parse().ok())
        .filter(|&s| s > 0)
        .unwrap_or(DEFAULT_SECONDS)
}

/// Resident set size of this process, bytes, from /proc/self/status (Linux).
fn vm_rss_bytes() -> Option<u64> {
    let status = std::fs::read_to_string("/proc/self/status").ok()?;
    let line = status.lines().find(|l| l.starts_with("VmRSS:"))?;
    let kb: u64 = line.split_whitespace().nth(1)?.parse().ok()?;
    Some(kb * 1024)
}

/// Cycle ids written so far, with their reference times (Unix seconds).
type Written = Arc<Mutex<HashMap<String, i64>>>;

/// Writes cycle `k`: the demo file with its reference time moved `6 k` hours later, as
/// `.partial`, then renamed into the data folder. Returns its id and reference time.
fn write_cycle(template: &Path, dir: &Path, k: usize) -> (String, i64) {
    let base = parse_date_time(DEMO_REFERENCE_TIME).expect("demo reference time");
    let reference = base + 6 * 3600 * k as i64;
    let id = format!("soak_{k:03}.nc");
    let partial = dir.join(format!("{id}.partial"));
    std::fs::copy(template, &partial).expect("copy template");
    {
        let mut file = netcdf::append(&partial).expect("open for append");
        let units = format!("hours since {}", format_rfc3339_utc(reference));
        for name in ["time", "forecast_reference_time"] {
            file.variable_mut(name)
                .expect("time variable")
                .put_attribute("units", units.as_str())
                .expect("units");
        }
    }
    std::fs::rename(&partial, dir.join(&id)).expect("rename into place");
    (id, reference)
}

/// What the clients saw.
#[derive(Default, Debug)]
struct Tally {
    ok: BTreeMap<&'static str, usize>,
    /// NOT_FOUND for a named cycle that had been evicted: deliberate.
    evicted_not_found: usize,
    failures: Vec<String>,
}

struct Ctx {
    store: Arc<CycleStore>,
    written: Written,
    tally: Mutex<Tally>,
    areas_checked_points: AtomicUsize,
}

impl Ctx {
    fn ok(&self, kind: &'static str) {
        let mut t = self.tally.lock().expect("tally");
        *t.ok.entry(kind).or_insert(0) += 1;
    }
    fn fail(&self, what: String) {
        self.tally.lock().expect("tally").failures.push(what);
    }
    /// A refusal: deliberate only when a named cycle is no longer in the store.
    fn refused(&self, kind: &str, asked: &str, s: &tonic::Status) {
        let evicted = s.code() == Code::NotFound
            && s.message().starts_with("cycle_id:")
            && !asked.is_empty()
            && self.store.find(asked).is_none()
            && self.written.lock().expect("written").contains_key(asked);
        if evicted {
            self.tally.lock().expect("tally").evicted_not_found += 1;
        } else {
            self.fail(format!(
                "{kind} asking for '{asked}': {:?} {}",
                s.code(),
                s.message()
            ));
        }
    }
    /// Checks the cycle an answer names and its reference time (valid − lead).
    fn check_cycle(&self, kind: &str, asked: &str, got: &str, valid: &str, lead_s: i64) -> bool {
        if !asked.is_empty() && got != asked {
            self.fail(format!(
                "{kind}: asked for '{asked}', answered from '{got}'"
            ));
            return false;
        }
        let Some(reference) = self.written.lock().expect("written").get(got).copied() else {
            self.fail(format!(
                "{kind}: answered from '{got}', which was never written"
            ));
            return false;
        };
        match parse_date_time(valid) {
            Some(v) if v - lead_s == reference => true,
            other => {
                self.fail(format!(
                    "{kind} from '{got}': valid time {valid} ({other:?}) minus lead {lead_s} s \
                     is not its reference time {}",
                    format_rfc3339_utc(reference)
                ));
                false
            }
        }
    }
}

fn q_height(p: f64) -> pb::Quantity {
    pb::Quantity {
        kind: Some(pb::quantity::Kind::GeopotentialHeight(
            pb::HeightAtPressure { pressure_pa: p },
        )),
    }
}

fn q_thickness(bottom: f64, top: f64) -> pb::Quantity {
    pb::Quantity {
        kind: Some(pb::quantity::Kind::Thickness(pb::LayerBounds {
            bottom_pa: bottom,
            top_pa: top,
        })),
    }
}

/// Thickness 1000–500 hPa, then the two heights it is the difference of.
fn layer_and_heights() -> Vec<pb::Quantity> {
    vec![
        q_thickness(100_000.0, 50_000.0),
        q_height(100_000.0),
        q_height(50_000.0),
    ]
}

fn lead(hours: u32) -> Option<pb::TimeSelection> {
    Some(pb::TimeSelection {
        kind: Some(pb::time_selection::Kind::LeadTimeS(i64::from(hours) * 3600)),
    })
}

/// Thickness against the difference of the heights: both come from stored `f32` heights
/// (about 0.0005 m apart near 5.5 km), so they agree within 0.01 m in one answer.
fn consistent(thickness: f64, z_bottom: f64, z_top: f64) -> bool {
    if thickness.is_nan() || z_bottom.is_nan() || z_top.is_nan() {
        return true;
    }
    (thickness - (z_top - z_bottom)).abs() < 0.01
}

async fn client_loop(ctx: Arc<Ctx>, addr: SocketAddr, seed: usize, until: Instant) {
    let channel = Channel::from_shared(format!("http://{addr}"))
        .expect("url")
        .connect()
        .await
        .expect("connect");
    let mut client = HeightServiceClient::new(channel);
    let mut n = seed;
    while Instant::now() < until {
        n += 1;
        // Every fourth request names a cycle from a fresh catalogue (the oldest one kept,
        // which the next arrival evicts); the others ask for the newest.
        let asked = if n % 4 == 0 {
            match client.get_catalogue(pb::CatalogueRequest {}).await {
                Ok(c) => c
                    .into_inner()
                    .cycles
                    .last()
                    .map(|e| e.id.clone())
                    .unwrap_or_default(),
                Err(s) => {
                    ctx.fail(format!("catalogue: {s:?}"));
                    continue;
                }
            }
        } else {
            String::new()
        };
        let lead_h = DEMO_LEAD_HOURS[n % DEMO_LEAD_HOURS.len()];
        let frac = (n % 97) as f64 / 97.0;
        let (lat, lon) = (
            SOUTH + 0.9 * frac * (NORTH - SOUTH) + 0.3,
            WEST + frac * 19.0,
        );
        match n % 3 {
            0 => area(&ctx, &mut client, &asked, lead_h).await,
            1 => position(&ctx, &mut client, &asked, lead_h, lat, lon).await,
            _ => profile(&ctx, &mut client, &asked, lead_h, lat, lon).await,
        }
    }
}

async fn area(ctx: &Ctx, client: &mut HeightServiceClient<Channel>, asked: &str, lead_h: u32) {
    let request = pb::AreaRequest {
        cycle_id: asked.to_string(),
        time: lead(lead_h),
        quantities: layer_and_heights(),
        bbox: Some(pb::BoundingBox {
            south_deg: SOUTH,
            north_deg: NORTH,
            west_deg: WEST,
            east_deg: EAST,
        }),
        ..pb::AreaRequest::default()
    };
    let mut stream = match client.query_area(request).await {
        Ok(r) => r.into_inner(),
        Err(s) => return ctx.refused("area", asked, &s),
    };
    let mut first_id: Option<String> = None;
    let mut rows = 0;
    while let Some(item) = stream.next().await {
        let chunk = match item {
            Ok(c) => c,
            Err(s) => return ctx.refused("area", asked, &s),
        };
        // Every chunk of one answer from one cycle.
        match &first_id {
            None => {
                if !ctx.check_cycle(
                    "area",
                    asked,
                    &chunk.cycle_id,
                    &chunk.valid_time,
                    chunk.lead_time_s,
                ) {
                    return;
                }
                first_id = Some(chunk.cycle_id.clone());
            }
            Some(id) if *id != chunk.cycle_id => {
                return ctx.fail(format!(
                    "area: chunks from '{id}' and '{}' in one answer",
                    chunk.cycle_id
                ));
            }
            Some(_) => {}
        }
        if chunk.fields.len() != 3 {
            return ctx.fail(format!("area: {} fields", chunk.fields.len()));
        }
        let (t, z1, z5) = (
            &chunk.fields[0].values,
            &chunk.fields[1].values,
            &chunk.fields[2].values,
        );
        for i in 0..t.len() {
            if !consistent(f64::from(t[i]), f64::from(z1[i]), f64::from(z5[i])) {
                return ctx.fail(format!(
                    "area from '{}': thickness {} but heights {} and {} at point {i}",
                    chunk.cycle_id, t[i], z1[i], z5[i]
                ));
            }
        }
        ctx.areas_checked_points
            .fetch_add(t.len(), Ordering::Relaxed);
        rows += chunk.latitudes_deg.len();
    }
    // The whole demo grid: 49 rows.
    if rows != 49 {
        return ctx.fail(format!("area: {rows} rows instead of 49"));
    }
    ctx.ok("area");
}

async fn position(
    ctx: &Ctx,
    client: &mut HeightServiceClient<Channel>,
    asked: &str,
    lead_h: u32,
    lat: f64,
    lon: f64,
) {
    let points: Vec<pb::GeoPoint> = (0..10)
        .map(|i| pb::GeoPoint {
            latitude_deg: lat + 0.1 * f64::from(i),
            longitude_deg: lon + 0.05 * f64::from(i),
        })
        .collect();
    let request = pb::PositionRequest {
        cycle_id: asked.to_string(),
        points,
        quantities: layer_and_heights(),
        times: vec![lead(lead_h).unwrap_or_default()],
        ..pb::PositionRequest::default()
    };
    let r = match client.query_position(request).await {
        Ok(r) => r.into_inner(),
        Err(s) => return ctx.refused("position", asked, &s),
    };
    if r.series.len() != 10 {
        return ctx.fail(format!("position: {} series", r.series.len()));
    }
    for s in &r.series {
        for sample in &s.samples {
            if !ctx.check_cycle(
                "position",
                asked,
                &r.cycle_id,
                &sample.valid_time,
                sample.lead_time_s,
            ) {
                return;
            }
            let v = &sample.values;
            if v.len() != 3 || !consistent(v[0], v[1], v[2]) {
                return ctx.fail(format!("position from '{}': values {v:?}", r.cycle_id));
            }
        }
    }
    ctx.ok("position");
}

async fn profile(
    ctx: &Ctx,
    client: &mut HeightServiceClient<Channel>,
    asked: &str,
    lead_h: u32,
    lat: f64,
    lon: f64,
) {
    let request = pb::ProfileRequest {
        cycle_id: asked.to_string(),
        point: Some(pb::GeoPoint {
            latitude_deg: lat,
            longitude_deg: lon,
        }),
        time: lead(lead_h),
        ..pb::ProfileRequest::default()
    };
    let r = match client.query_profile(request).await {
        Ok(r) => r.into_inner(),
        Err(s) => return ctx.refused("profile", asked, &s),
    };
    if !ctx.check_cycle("profile", asked, &r.cycle_id, &r.valid_time, r.lead_time_s) {
        return;
    }
    // Levels bottom-up: geopotential height rises with every level (hydrostatic balance).
    let z: Vec<f64> = r
        .levels
        .iter()
        .map(|l| l.geopotential_height_m)
        .filter(|z| z.is_finite())
        .collect();
    if r.levels.len() != 21 || z.len() < 15 || z.windows(2).any(|w| w[1] <= w[0]) {
        return ctx.fail(format!(
            "profile from '{}': {} levels, heights {z:?}",
            r.cycle_id,
            r.levels.len()
        ));
    }
    ctx.ok("profile");
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn the_server_stays_correct_and_bounded_while_cycles_roll_over() {
    let seconds = soak_seconds();
    let scratch = tempfile::tempdir().expect("tempdir");
    let template = write_demo_cycle(scratch.path()).expect("demo cycle");
    let data = tempfile::tempdir().expect("data folder");
    let dir: PathBuf = data.path().to_path_buf();

    let store = Arc::new(CycleStore::new(StoreConfig {
        keep_newest: KEEP,
        ..StoreConfig::default()
    }));
    let written: Written = Arc::new(Mutex::new(HashMap::new()));
    quiet_hdf5_on_this_thread();
    let (id, reference) = write_cycle(&template, &dir, 0);
    written.lock().expect("written").insert(id, reference);

    let (stop_watch, watch_shutdown) = tokio::sync::watch::channel(false);
    let watcher = tokio::spawn(watch(
        Arc::clone(&store),
        WatchConfig {
            dir: dir.clone(),
            poll_interval: Duration::from_millis(100),
            settle: Duration::from_millis(300),
            max_wait_for_growth: Duration::from_secs(60),
        },
        IngestConfig::default(),
        ComputeConfig::default(),
        watch_shutdown,
    ));
    let mut changes = store.on_change();
    tokio::time::timeout(Duration::from_secs(30), async {
        while store.snapshot().cycles.is_empty() {
            changes.changed().await.expect("store alive");
        }
    })
    .await
    .expect("the first cycle loads");

    let listener = tokio::net::TcpListener::bind("127.0.0.1:0")
        .await
        .expect("bind");
    let addr = listener.local_addr().expect("addr");
    let (stop_server, stopped) = tokio::sync::oneshot::channel::<()>();
    let server = tokio::spawn(serve_on(
        listener,
        Arc::clone(&store),
        ServiceConfig::default(),
        async move {
            let _ = stopped.await;
        },
    ));

    let ctx = Arc::new(Ctx {
        store: Arc::clone(&store),
        written: Arc::clone(&written),
        tally: Mutex::new(Tally::default()),
        areas_checked_points: AtomicUsize::new(0),
    });

    // Warm-up: every client path once, a couple of seconds, before the first RSS reading.
    let warm_until = Instant::now() + Duration::from_secs(3);
    let warm: Vec<_> = (0..CLIENTS)
        .map(|c| tokio::spawn(client_loop(Arc::clone(&ctx), addr, c * 1000, warm_until)))
        .collect();
    for w in warm {
        w.await.expect("warm-up client");
    }
    let rss_warm = vm_rss_bytes();

    // The writer: a new cycle every few seconds; files of long-evicted cycles deleted.
    let writing = Arc::new(AtomicBool::new(true));
    let writer = {
        let (writing, written, template, dir) = (
            Arc::clone(&writing),
            Arc::clone(&written),
            template.clone(),
            dir.clone(),
        );
        std::thread::spawn(move || {
            quiet_hdf5_on_this_thread();
            let mut k = 1;
            while writing.load(Ordering::SeqCst) {
                std::thread::sleep(CYCLE_EVERY);
                if !writing.load(Ordering::SeqCst) {
                    break;
                }
                // Registered before it appears, so that any answer from it is recognised.
                let base = parse_date_time(DEMO_REFERENCE_TIME).expect("reference");
                written
                    .lock()
                    .expect("written")
                    .insert(format!("soak_{k:03}.nc"), base + 6 * 3600 * k as i64);
                write_cycle(&template, &dir, k);
                if k >= KEEP + 2 {
                    let old = dir.join(format!("soak_{:03}.nc", k - KEEP - 2));
                    std::fs::remove_file(&old).expect("delete an evicted cycle's file");
                }
                k += 1;
            }
            k
        })
    };

    let until = Instant::now() + Duration::from_secs(seconds);
    let clients: Vec<_> = (0..CLIENTS)
        .map(|c| tokio::spawn(client_loop(Arc::clone(&ctx), addr, c * 7919, until)))
        .collect();
    for c in clients {
        c.await.expect("client task");
    }
    writing.store(false, Ordering::SeqCst);
    let cycles_written = tokio::task::spawn_blocking(move || writer.join().expect("writer"))
        .await
        .expect("join writer");
    let rss_end = vm_rss_bytes();

    let _ = stop_server.send(());
    tokio::time::timeout(Duration::from_secs(40), server)
        .await
        .expect("server stops")
        .expect("server task")
        .expect("server ends cleanly");
    stop_watch.send(true).expect("stop watcher");
    watcher.await.expect("watcher");

    let tally = ctx.tally.lock().expect("tally");
    let snap = store.snapshot();
    println!(
        "soak {seconds} s: {cycles_written} cycles written; answered {:?}; {} deliberate \
         NOT_FOUND for evicted cycles; {} area points checked; {} evictions listed; \
         {} load failures",
        tally.ok,
        tally.evicted_not_found,
        ctx.areas_checked_points.load(Ordering::Relaxed),
        snap.evictions.len(),
        snap.failures.len()
    );
    match (rss_warm, rss_end) {
        (Some(w), Some(e)) => {
            println!(
                "VmRSS after warm-up {:.1} MB, at the end {:.1} MB",
                w as f64 / 1e6,
                e as f64 / 1e6
            );
            assert!(
                e <= w + RSS_BOUND_BYTES,
                "VmRSS grew from {w} to {e} bytes, more than {RSS_BOUND_BYTES}"
            );
        }
        _ => println!("VmRSS unavailable (no /proc/self/status): memory not checked"),
    }
    assert!(
        tally.failures.is_empty(),
        "{} failed requests, first: {:?}",
        tally.failures.len(),
        tally.failures.iter().take(5).collect::<Vec<_>>()
    );
    assert!(
        snap.failures.is_empty(),
        "load failures: {:?}",
        snap.failures
    );
    assert!(snap.cycles.len() <= KEEP);
    // The run did roll cycles over, under load.
    let min_cycles = (seconds / CYCLE_EVERY.as_secs()).saturating_sub(2).max(2) as usize;
    assert!(
        cycles_written >= min_cycles,
        "only {cycles_written} cycles written"
    );
    assert!(
        snap.evictions
            .iter()
            .any(|e| e.reason.contains("only the newest 2 cycles are kept")),
        "{:?}",
        snap.evictions
    );
    for kind in ["area", "position", "profile"] {
        let n = tally.ok.get(kind).copied().unwrap_or(0);
        assert!(n >= 20, "only {n} {kind} answers");
    }
}
