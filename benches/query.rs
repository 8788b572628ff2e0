//! In-process benchmarks of the query paths (no network) on a synthetic 0.5° global cycle
//! (361 x 720, 37 isobaric levels, one time step, float32), large enough for the 200 x 200
//! areas that chart tools ask for.
//!
//! Run with `cargo bench --bench query` (about a minute and a half); `cargo test --benches`
//! runs every benchmark once as a smoke run. The cycle is written into a temporary folder
//! once per run with `hypsogrid::demo::write_synthetic_global`, loaded with
//! `LoadedCycle::load` (heights on every level), and then queried:
//!
//! - `area` of 200 x 200 grid points for a layer thickness whose bounds are both levels
//!   (1000–500 hPa on the common 37-level set: a difference of stored heights), for a height
//!   between two levels (between 925 and 900 hPa: every column is rebuilt), and for a
//!   thickness whose top lies between levels (1000 hPa to between 550 and 500 hPa: rebuilt);
//! - `position` of 1 and of 1000 points, bilinear, one time: the on-level 1000–500 hPa
//!   thickness, and for 1000 points also the height between levels;
//! - `trajectory` of a route of 1000 waypoints at the one valid time, bilinear: the same
//!   on-level thickness and height between levels;
//! - one bilinear `profile`;
//! - precipitation-type guidance on a 50 x 50 area (`guidance_on`, what `GetGuidanceArea`
//!   computes).
//!
//! Throughput is reported in points per second (criterion's "elem/s").
//!
//! The pressures are picked from the cycle's own levels when the fixture is built (the
//! synthetic level set has changed before): the levels nearest 1000 and 500 hPa for the
//! on-level layer, and geometric means of neighbouring levels (the middle in ln p) for the
//! pressures between levels. The names of the benchmarks carry the pressures used.

use std::sync::OnceLock;
use std::time::{Duration, Instant};

use criterion::{criterion_group, criterion_main, BenchmarkId, Criterion, Throughput};

use hypsogrid::compute::ComputeConfig;
use hypsogrid::demo::{write_synthetic_global, SyntheticGlobal};
use hypsogrid::ingest::IngestConfig;
use hypsogrid::model::{Layer, Vertical};
use hypsogrid::products::guidance::{guidance_on, GuidanceSettings};
use hypsogrid::query::{
    area, area_shape, position, profile, trajectory, AreaQuery, BoundingBox, Interpolation, Limits,
    LoadedCycle, PositionQuery, ProfileQuery, Quantity, TimeSelector, TrajectoryQuery, Waypoint,
};

/// Grid of the synthetic cycle: 0.5° global, the size of a common global product.
const ROWS: usize = 361;
const COLS: usize = 720;
const LEVELS: usize = 37;

/// Side of the area queries, grid points (the largest area the load generator asks for).
const AREA_SIDE: usize = 200;

/// Points of the large position query.
const MANY_POINTS: usize = 1000;

/// The loaded cycle, shared by every benchmark of the run, with the temporary folder that
/// holds its file. Statics are never dropped, so the last group ([`cleanup`]) removes the
/// folder explicitly.
struct Fixture {
    dir: Option<tempfile::TempDir>,
    cycle: LoadedCycle,
    /// The pressure levels of the cycle, Pa, bottom-up.
    levels_pa: Vec<f64>,
    /// Thickness between the levels nearest 1000 and 500 hPa (the copy path).
    layer_on_levels: Layer,
    /// A pressure between the level nearest 925 hPa and the next one up, Pa.
    p_between: f64,
    /// From the level nearest 1000 hPa to between the level nearest 500 hPa and the next
    /// one down (a rebuilt column).
    layer_rebuilt: Layer,
}

impl Fixture {
    /// The thickness between levels (a difference of stored heights), named with its levels.
    fn on_levels(&self) -> (String, Quantity) {
        let on = self.layer_on_levels;
        let name = format!(
            "thickness_on_levels_{:.0}_{:.0}hPa",
            on.bottom_pa / 100.0,
            on.top_pa / 100.0
        );
        (name, Quantity::Thickness(on))
    }

    /// The height between levels (rebuilt columns), named with its pressure.
    fn between_levels(&self) -> (String, Quantity) {
        let name = format!("height_between_levels_{:.1}hPa", self.p_between / 100.0);
        let quantity = Quantity::GeopotentialHeight {
            pressure_pa: self.p_between,
        };
        (name, quantity)
    }
}

static FIXTURE: OnceLock<std::sync::Mutex<Option<Fixture>>> = OnceLock::new();

fn with_fixture<R>(f: impl FnOnce(&Fixture) -> R) -> R {
    let cell = FIXTURE.get_or_init(|| std::sync::Mutex::new(Some(build_fixture())));
    let guard = cell
        .lock()
        .expect("fixture lock poisoned by a failed benchmark");
    let fixture = guard
        .as_ref()
        .expect("the fixture was already removed: the cleanup group must run last");
    f(fixture)
}

fn build_fixture() -> Fixture {
    let dir = tempfile::tempdir().expect("creating a temporary folder for the synthetic cycle");
    let path = dir.path().join("synthetic_global_0p5deg.nc");
    let spec = SyntheticGlobal {
        rows: ROWS,
        cols: COLS,
        levels: LEVELS,
        times: 1,
        deflate_level: None,
    };
    let started = Instant::now();
    write_synthetic_global(&path, &spec).expect("writing the synthetic global cycle");
    let written = started.elapsed();
    let cycle = LoadedCycle::load(&path, &IngestConfig::default(), &ComputeConfig::default())
        .expect("loading the synthetic global cycle");
    let levels_pa = match &cycle.cycle.vertical {
        Vertical::Isobaric { pressure_pa } => pressure_pa.clone(),
        Vertical::Hybrid { .. } => panic!("the synthetic cycle should be on isobaric levels"),
    };
    eprintln!(
        "synthetic cycle {ROWS} x {COLS} x {LEVELS}: written in {:.2} s, loaded (read and heights \
         on every level) in {:.2} s, {:.0} MB held",
        written.as_secs_f64(),
        cycle.load_seconds,
        cycle.bytes as f64 / 1e6
    );
    let kb = nearest_level(&levels_pa, 100_000.0);
    let kt = nearest_level(&levels_pa, 50_000.0);
    let k925 = nearest_level(&levels_pa, 92_500.0);
    assert!(
        kt > kb && kt >= 1 && k925 + 1 < levels_pa.len(),
        "the synthetic levels do not span 1000 to 500 hPa: {levels_pa:?}"
    );
    let p_between = (levels_pa[k925] * levels_pa[k925 + 1]).sqrt();
    let layer_on_levels = Layer {
        bottom_pa: levels_pa[kb],
        top_pa: levels_pa[kt],
    };
    let layer_rebuilt = Layer {
        bottom_pa: levels_pa[kb],
        top_pa: (levels_pa[kt] * levels_pa[kt - 1]).sqrt(),
    };
    eprintln!(
        "levels used: on-level layer {} hPa, height between levels at {:.1} hPa, rebuilt layer \
         {:.0}-{:.1} hPa",
        layer_on_levels.label_hpa(),
        p_between / 100.0,
        layer_rebuilt.bottom_pa / 100.0,
        layer_rebuilt.top_pa / 100.0
    );
    Fixture {
        dir: Some(dir),
        cycle,
        levels_pa,
        layer_on_levels,
        p_between,
        layer_rebuilt,
    }
}

/// Index of the level nearest a pressure.
fn nearest_level(levels_pa: &[f64], p_pa: f64) -> usize {
    levels_pa
        .iter()
        .enumerate()
        .min_by(|a, b| (a.1 - p_pa).abs().total_cmp(&(b.1 - p_pa).abs()))
        .map(|(k, _)| k)
        .expect("the cycle has levels")
}

fn lead_zero() -> TimeSelector {
    TimeSelector::LeadTime { seconds: 0 }
}

/// A 200 x 200 box of grid points: latitudes 60° N to 39.5° S, longitudes 10° E to
/// 109.5° E, every 0.5°; it takes in the largest invented mountain (35° N, 90° E), so that
/// some columns have levels below the ground.
fn area_query(quantity: Quantity) -> AreaQuery {
    AreaQuery {
        quantities: vec![quantity],
        time: lead_zero(),
        member: 0,
        bbox: BoundingBox {
            south: 60.0 - 0.5 * (AREA_SIDE - 1) as f64,
            north: 60.0,
            west: 10.0,
            east: 10.0 + 0.5 * (AREA_SIDE - 1) as f64,
        },
        stride: 1,
        allow_extrapolation: false,
    }
}

/// Deterministic positions spread over the globe between 80° S and 80° N, off the grid
/// points (a linear congruential generator, Knuth's MMIX constants, so that no crate is
/// needed and every run asks for the same points).
fn points(n: usize) -> Vec<(f64, f64)> {
    let mut state: u64 = 0x2545_f491_4f6c_dd1d;
    let mut next = || {
        state = state
            .wrapping_mul(6_364_136_223_846_793_005)
            .wrapping_add(1_442_695_040_888_963_407);
        (state >> 11) as f64 / (1u64 << 53) as f64
    };
    (0..n)
        .map(|_| (-80.0 + 160.0 * next(), 360.0 * next()))
        .collect()
}

fn position_query(points: Vec<(f64, f64)>, quantity: Quantity) -> PositionQuery {
    PositionQuery {
        points,
        quantities: vec![quantity],
        times: vec![lead_zero()],
        member: 0,
        interpolation: Interpolation::Bilinear,
        allow_extrapolation: false,
    }
}

fn area_benches(c: &mut Criterion) {
    with_fixture(|fx| {
        let lc = &fx.cycle;
        let cases = [
            fx.on_levels(),
            fx.between_levels(),
            (
                format!(
                    "thickness_rebuilt_{:.0}_{:.1}hPa",
                    fx.layer_rebuilt.bottom_pa / 100.0,
                    fx.layer_rebuilt.top_pa / 100.0
                ),
                Quantity::Thickness(fx.layer_rebuilt),
            ),
        ];
        let limits = Limits::default();
        let mut group = c.benchmark_group("query_area_200x200");
        group
            .sample_size(10)
            .warm_up_time(Duration::from_millis(500))
            .measurement_time(Duration::from_secs(3));
        for (name, quantity) in cases {
            let q = area_query(quantity);
            let shape = area_shape(lc, &q).expect("planning the area query");
            assert_eq!(
                (shape.rows, shape.cols),
                (AREA_SIDE, AREA_SIDE),
                "area of {name}"
            );
            // One answer checked outside the timing: every point has a value.
            let answer = area(lc, &q, &limits).expect("answering the area query");
            let values = &answer.fields[0].values;
            let finite = values.iter().filter(|v| v.is_finite()).count();
            assert_eq!(finite, AREA_SIDE * AREA_SIDE, "{name}: missing values");
            let (lo, hi) = values
                .iter()
                .fold((f32::INFINITY, f32::NEG_INFINITY), |(lo, hi), &v| {
                    (lo.min(v), hi.max(v))
                });
            eprintln!("{name}: values {lo:.1} to {hi:.1} m");
            group.throughput(Throughput::Elements((AREA_SIDE * AREA_SIDE) as u64));
            group.bench_function(BenchmarkId::from_parameter(&name), |b| {
                b.iter(|| area(lc, &q, &limits).expect("answering the area query"))
            });
        }
        group.finish();
    });
}

fn position_benches(c: &mut Criterion) {
    with_fixture(|fx| {
        let lc = &fx.cycle;
        let limits = Limits::default();
        let ((on_name, thickness), (between_name, between)) = (fx.on_levels(), fx.between_levels());
        let cases = [
            (on_name.clone(), 1, thickness),
            (on_name, MANY_POINTS, thickness),
            (between_name, MANY_POINTS, between),
        ];
        let mut group = c.benchmark_group("query_position_bilinear");
        group
            .sample_size(10)
            .warm_up_time(Duration::from_millis(500))
            .measurement_time(Duration::from_secs(3));
        for (name, n, quantity) in cases {
            let q = position_query(points(n), quantity);
            let answer = position(lc, &q, &limits).expect("answering the position query");
            let finite = answer
                .iter()
                .filter(|s| s.samples[0].values[0].is_finite())
                .count();
            assert_eq!(finite, n, "{name}, {n} points: missing values");
            group.throughput(Throughput::Elements(n as u64));
            group.bench_function(BenchmarkId::new(format!("{name}/points"), n), |b| {
                b.iter(|| position(lc, &q, &limits).expect("answering the position query"))
            });
        }
        group.finish();
    });
}

/// A route of 1000 waypoints (a flight or a drifting buoy, one a minute) at the cycle's one
/// valid time, bilinear: the on-level thickness (stored heights) and the height between
/// levels (every waypoint's columns rebuilt, in runs of waypoints on every core).
fn trajectory_benches(c: &mut Criterion) {
    with_fixture(|fx| {
        let lc = &fx.cycle;
        let limits = Limits::default();
        let valid = lc
            .reference_time_unix_s()
            .expect("the synthetic cycle has a reference time")
            + lc.cycle.lead_times_s[0];
        let waypoints: Vec<Waypoint> = points(MANY_POINTS)
            .into_iter()
            .map(|(latitude, longitude)| Waypoint {
                latitude,
                longitude,
                valid_time_unix_s: valid,
            })
            .collect();
        let cases = [fx.on_levels(), fx.between_levels()];
        let mut group = c.benchmark_group("query_trajectory_bilinear");
        group
            .sample_size(10)
            .warm_up_time(Duration::from_millis(500))
            .measurement_time(Duration::from_secs(3));
        for (name, quantity) in cases {
            let q = TrajectoryQuery {
                waypoints: waypoints.clone(),
                quantities: vec![quantity],
                member: 0,
                interpolation: Interpolation::Bilinear,
                allow_extrapolation: false,
            };
            let answer = trajectory(lc, &q, &limits).expect("answering the trajectory query");
            let finite = answer.iter().filter(|s| s.values[0].is_finite()).count();
            assert_eq!(finite, MANY_POINTS, "{name}: missing values");
            group.throughput(Throughput::Elements(MANY_POINTS as u64));
            group.bench_function(
                BenchmarkId::new(format!("{name}/waypoints"), MANY_POINTS),
                |b| b.iter(|| trajectory(lc, &q, &limits).expect("answering the trajectory query")),
            );
        }
        group.finish();
    });
}

fn profile_benches(c: &mut Criterion) {
    with_fixture(|fx| {
        let lc = &fx.cycle;
        // Inside the 200 x 200 box, between grid points, over open (invented) lowland.
        let q = ProfileQuery {
            latitude: 47.3,
            longitude: 18.8,
            time: lead_zero(),
            member: 0,
            interpolation: Interpolation::Bilinear,
        };
        let answer = profile(lc, &q).expect("answering the profile query");
        assert_eq!(answer.levels.len(), fx.levels_pa.len());
        let mut group = c.benchmark_group("query_profile_bilinear");
        group
            .sample_size(10)
            .warm_up_time(Duration::from_millis(500))
            .measurement_time(Duration::from_secs(2));
        group.throughput(Throughput::Elements(1));
        group.bench_function("one_point", |b| {
            b.iter(|| profile(lc, &q).expect("answering the profile query"))
        });
        group.finish();
    });
}

/// Removes the temporary folder (statics are never dropped, so `TempDir` alone would leave
/// the 80 MB file behind).
/// Side of the guidance area, grid points.
const GUIDANCE_SIDE: usize = 50;

/// Precipitation-type guidance on a 50 × 50 area (what `GetGuidanceArea` computes: the
/// area's own columns), as columns per second.
fn guidance_benches(c: &mut Criterion) {
    with_fixture(|fx| {
        let lc = &fx.cycle;
        let settings = GuidanceSettings::default();
        // 45° N to 20.5° N, 167.5° E to 168° W: subtropical and mid-latitude columns.
        let rows: Vec<usize> = (ROWS / 4..ROWS / 4 + GUIDANCE_SIDE).collect();
        let cols: Vec<usize> =
            (COLS / 2 - GUIDANCE_SIDE / 2..COLS / 2 + GUIDANCE_SIDE / 2).collect();
        // One answer checked outside the timing: every point has a thickness and a category.
        let g = guidance_on(lc, (0, 0), &settings, &rows, &cols).expect("guidance on the area");
        let finite = g
            .thickness_1000_500
            .iter()
            .filter(|v| v.is_finite())
            .count();
        assert_eq!(
            finite,
            GUIDANCE_SIDE * GUIDANCE_SIDE,
            "guidance: missing thickness"
        );
        eprintln!("guidance area: {:?}", g.summary().categories);
        let mut group = c.benchmark_group("guidance_area");
        group
            .sample_size(10)
            .warm_up_time(Duration::from_millis(500))
            .measurement_time(Duration::from_secs(3));
        group.throughput(Throughput::Elements((GUIDANCE_SIDE * GUIDANCE_SIDE) as u64));
        group.bench_function(format!("{GUIDANCE_SIDE}x{GUIDANCE_SIDE}"), |b| {
            b.iter(|| guidance_on(lc, (0, 0), &settings, &rows, &cols).expect("guidance"))
        });
        group.finish();
    });
}

fn cleanup(_c: &mut Criterion) {
    if let Some(cell) = FIXTURE.get() {
        if let Ok(mut guard) = cell.lock() {
            if let Some(mut fixture) = guard.take() {
                if let Some(dir) = fixture.dir.take() {
                    let shown = dir.path().display().to_string();
                    if let Err(e) = dir.close() {
                        eprintln!("could not remove the temporary folder '{shown}': {e}");
                    }
                }
            }
        }
    }
}

criterion_group!(
    benches,
    area_benches,
    position_benches,
    trajectory_benches,
    profile_benches,
    guidance_benches,
    cleanup
);
criterion_main!(benches);
