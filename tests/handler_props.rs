//! Property tests of the gRPC handlers against random requests: whatever arrives, no panic,
//! every refusal is a deliberate code (never `UNKNOWN` or `INTERNAL`), its message starts
//! with a field of that request's wire message, and big requests are refused quickly.
//!
//! The handlers are called directly (no network) over the invented demo cycle (see
//! `hypsogrid::demo`; invented data, used here only as something to query). The generated
//! requests mix plausible values (the demo's grid, levels and lead times) with hostile ones:
//! NaN and infinite coordinates, zero and negative pressures, huge point lists, absurd
//! strides, unknown enum numbers, random cycle ids and time strings, unset messages.

use std::sync::{Arc, OnceLock};
use std::time::{Duration, Instant};

use hypsogrid::compute::ComputeConfig;
use hypsogrid::demo::{write_demo_cycle, DEMO_FILE_NAME, DEMO_LEVELS_HPA};
use hypsogrid::ingest::IngestConfig;
use hypsogrid::pb;
use hypsogrid::pb::height_service_server::HeightService;
use hypsogrid::query::{Limits, LoadedCycle};
use hypsogrid::service::{HandlerSettings, HeightServiceHandlers, ServiceConfig};
use hypsogrid::store::{CycleStore, StoreConfig};
use proptest::prelude::*;
use tokio_stream::StreamExt;
use tonic::{Code, Request, Status};

/// The codes a client mistake may get. `UNKNOWN`, `INTERNAL` and `DEADLINE_EXCEEDED` (these
/// requests are small enough to answer well within the default 30 s budget) are not among
/// them; `UNAUTHENTICATED` cannot occur without a token file.
const DELIBERATE: [Code; 4] = [
    Code::InvalidArgument,
    Code::NotFound,
    Code::OutOfRange,
    Code::ResourceExhausted,
];

/// Longest any one generated request may take to be answered or refused. The demo grid is
/// 49 x 81 points, so even a full area answer is a few hundred kilobytes.
const QUICK: Duration = Duration::from_secs(5);

struct World {
    runtime: tokio::runtime::Runtime,
    store: Arc<CycleStore>,
}

/// The demo cycle loaded once into a store, and a runtime to drive the async handlers from
/// synchronous proptest bodies.
fn world() -> &'static World {
    static W: OnceLock<World> = OnceLock::new();
    W.get_or_init(|| {
        let dir = tempfile::tempdir().expect("tempdir");
        let path = write_demo_cycle(dir.path()).expect("demo cycle");
        let lc = LoadedCycle::load(&path, &IngestConfig::default(), &ComputeConfig::default())
            .expect("load demo");
        let store = Arc::new(CycleStore::new(StoreConfig::default()));
        store.insert(lc);
        let runtime = tokio::runtime::Builder::new_multi_thread()
            .worker_threads(2)
            .enable_all()
            .build()
            .expect("runtime");
        World { runtime, store }
    })
}

fn settings_with(limits: Limits) -> HandlerSettings {
    ServiceConfig {
        limits,
        ..ServiceConfig::default()
    }
    .handler_settings()
    .expect("settings")
}

fn service() -> HeightServiceHandlers {
    HeightServiceHandlers::new(Arc::clone(&world().store), settings_with(Limits::default()))
}

/// The top-level fields of each request message, as `proto/hypsogrid/v1/service.proto`
/// names them.
const AREA_FIELDS: &[&str] = &[
    "cycle_id",
    "time",
    "member",
    "quantities",
    "bbox",
    "stride",
    "allow_extrapolation",
];
const POSITION_FIELDS: &[&str] = &[
    "cycle_id",
    "points",
    "quantities",
    "times",
    "member",
    "interpolation",
    "allow_extrapolation",
];
const PROFILE_FIELDS: &[&str] = &["cycle_id", "point", "time", "member", "interpolation"];
const TRAJECTORY_FIELDS: &[&str] = &[
    "cycle_id",
    "waypoints",
    "quantities",
    "member",
    "interpolation",
    "allow_extrapolation",
];

/// Checks one refusal: a deliberate code, and a message `field.path[i].sub: text` whose first
/// segment (index stripped) is a field of the request.
fn check_refusal(s: &Status, fields: &[&str]) -> Result<(), TestCaseError> {
    prop_assert!(
        DELIBERATE.contains(&s.code()),
        "undeliberate code {:?}: {}",
        s.code(),
        s.message()
    );
    let message = s.message();
    let Some((path, text)) = message.split_once(": ") else {
        return Err(TestCaseError::fail(format!(
            "message names no field: {message}"
        )));
    };
    let first = path.split('.').next().unwrap_or_default();
    let first = first.split('[').next().unwrap_or_default();
    prop_assert!(
        fields.contains(&first),
        "message starts with '{path}', which is not a request field: {message}"
    );
    prop_assert!(!text.trim().is_empty(), "empty explanation: {message}");
    // House style: messages are lowercase sentences without a trailing period.
    prop_assert!(!message.ends_with('.'), "trailing period: {message}");
    Ok(())
}

// ----- strategies -----

/// A latitude or longitude: mostly on or near the demo grid (50–62° N, 45–25° W), sometimes
/// anywhere on Earth, sometimes not a coordinate at all.
fn coordinate() -> impl Strategy<Value = f64> {
    prop_oneof![
        4 => 49.0..63.0f64,
        4 => -46.0..-24.0f64,
        2 => -400.0..400.0f64,
        1 => Just(f64::NAN),
        1 => Just(f64::INFINITY),
        1 => Just(f64::NEG_INFINITY),
        1 => any::<f64>(),
    ]
}

/// A pressure in Pa: the demo's levels, values between them, and nonsense.
fn pressure() -> impl Strategy<Value = f64> {
    prop_oneof![
        4 => proptest::sample::select(DEMO_LEVELS_HPA.to_vec()).prop_map(|h| h * 100.0),
        3 => 1.0..120_000.0f64,
        1 => Just(0.0),
        1 => Just(-0.0),
        1 => -1.0e6..0.0f64,
        1 => Just(f64::NAN),
        1 => Just(f64::INFINITY),
        1 => Just(f64::NEG_INFINITY),
        1 => any::<f64>(),
    ]
}

fn quantity() -> impl Strategy<Value = pb::Quantity> {
    use pb::quantity::Kind;
    prop_oneof![
        1 => Just(pb::Quantity { kind: None }),
        4 => pressure().prop_map(|p| pb::Quantity {
            kind: Some(Kind::GeopotentialHeight(pb::HeightAtPressure { pressure_pa: p })),
        }),
        4 => (pressure(), pressure()).prop_map(|(b, t)| pb::Quantity {
            kind: Some(Kind::Thickness(pb::LayerBounds { bottom_pa: b, top_pa: t })),
        }),
    ]
}

fn quantities() -> impl Strategy<Value = Vec<pb::Quantity>> {
    proptest::collection::vec(quantity(), 0..4)
}

/// A time string: RFC 3339 times in and out of the demo's range, and junk.
fn time_text() -> impl Strategy<Value = String> {
    prop_oneof![
        3 => (0i64..72).prop_map(|h| format!("2031-01-{:02}T{:02}:00:00Z", 14 + h / 24, h % 24)),
        1 => Just(String::new()),
        1 => Just("2031-02-30T00:00:00Z".to_string()),
        1 => Just("9999999-01-01T00:00:00Z".to_string()),
        2 => ".{0,24}",
    ]
}

fn time_selection() -> impl Strategy<Value = pb::TimeSelection> {
    use pb::time_selection::Kind;
    prop_oneof![
        1 => Just(pb::TimeSelection { kind: None }),
        4 => prop_oneof![
            3 => (0i64..9).prop_map(|k| k * 6 * 3600),
            1 => any::<i64>(),
        ]
        .prop_map(|s| pb::TimeSelection { kind: Some(Kind::LeadTimeS(s)) }),
        2 => time_text().prop_map(|t| pb::TimeSelection { kind: Some(Kind::ValidTime(t)) }),
    ]
}

fn cycle_id() -> impl Strategy<Value = String> {
    prop_oneof![
        4 => Just(String::new()),
        3 => Just(DEMO_FILE_NAME.to_string()),
        1 => Just("../../etc/passwd".to_string()),
        2 => ".{0,40}",
    ]
}

fn member() -> impl Strategy<Value = u32> {
    prop_oneof![4 => Just(0u32), 1 => any::<u32>()]
}

/// Wire enum numbers: the two known values and anything else a client might send.
fn interpolation() -> impl Strategy<Value = i32> {
    prop_oneof![4 => 0..2i32, 1 => any::<i32>()]
}

fn point() -> impl Strategy<Value = pb::GeoPoint> {
    (coordinate(), coordinate()).prop_map(|(la, lo)| pb::GeoPoint {
        latitude_deg: la,
        longitude_deg: lo,
    })
}

fn area_request() -> impl Strategy<Value = pb::AreaRequest> {
    let bbox = proptest::option::weighted(
        0.9,
        (coordinate(), coordinate(), coordinate(), coordinate()).prop_map(|(s, n, w, e)| {
            pb::BoundingBox {
                south_deg: s,
                north_deg: n,
                west_deg: w,
                east_deg: e,
            }
        }),
    );
    let stride = proptest::option::of(prop_oneof![3 => 0u32..5, 1 => any::<u32>()]);
    (
        cycle_id(),
        proptest::option::weighted(0.9, time_selection()),
        member(),
        quantities(),
        bbox,
        stride,
        any::<bool>(),
    )
        .prop_map(
            |(cycle_id, time, member, quantities, bbox, stride, allow_extrapolation)| {
                pb::AreaRequest {
                    cycle_id,
                    time,
                    member,
                    quantities,
                    bbox,
                    stride,
                    allow_extrapolation,
                }
            },
        )
}

/// How many points a position request carries: a few, or (one case in eight) a count far
/// past the default limit of 4 000 000 point-values once multiplied by seven lead times.
fn point_count() -> impl Strategy<Value = usize> {
    prop_oneof![7 => 0usize..12, 1 => 600_000usize..1_500_000]
}

fn position_request() -> impl Strategy<Value = pb::PositionRequest> {
    (
        cycle_id(),
        point(),
        proptest::collection::vec(point(), 0..4),
        point_count(),
        quantities(),
        proptest::collection::vec(time_selection(), 0..4),
        member(),
        interpolation(),
        any::<bool>(),
    )
        .prop_map(
            |(cycle_id, fill, mut points, count, quantities, times, member, interp, extra)| {
                // A long list repeats one point: its length is the declared count.
                if count > points.len() {
                    points.resize(count, fill);
                }
                pb::PositionRequest {
                    cycle_id,
                    points,
                    quantities,
                    times,
                    member,
                    interpolation: interp,
                    allow_extrapolation: extra,
                }
            },
        )
}

fn profile_request() -> impl Strategy<Value = pb::ProfileRequest> {
    (
        cycle_id(),
        proptest::option::weighted(0.9, point()),
        proptest::option::weighted(0.9, time_selection()),
        member(),
        interpolation(),
    )
        .prop_map(
            |(cycle_id, point, time, member, interpolation)| pb::ProfileRequest {
                cycle_id,
                point,
                time,
                member,
                interpolation,
            },
        )
}

fn trajectory_request() -> impl Strategy<Value = pb::TrajectoryRequest> {
    let waypoint = (proptest::option::weighted(0.9, point()), time_text())
        .prop_map(|(point, valid_time)| pb::Waypoint { point, valid_time });
    (
        cycle_id(),
        proptest::collection::vec(waypoint, 0..6),
        quantities(),
        member(),
        interpolation(),
        any::<bool>(),
    )
        .prop_map(
            |(cycle_id, waypoints, quantities, member, interpolation, extra)| {
                pb::TrajectoryRequest {
                    cycle_id,
                    waypoints,
                    quantities,
                    member,
                    interpolation,
                    allow_extrapolation: extra,
                }
            },
        )
}

// ----- calls -----

/// Every chunk of an area answer, or the status it ended with (at the start or mid-stream).
async fn area_all(
    svc: &HeightServiceHandlers,
    r: pb::AreaRequest,
) -> Result<Vec<pb::AreaChunk>, Status> {
    let mut stream = svc.query_area(Request::new(r)).await?.into_inner();
    let mut chunks = Vec::new();
    while let Some(item) = stream.next().await {
        chunks.push(item?);
    }
    Ok(chunks)
}

/// Runs one call on the shared runtime and returns its result and how long it took.
fn timed<T>(f: impl std::future::Future<Output = T>) -> (T, Duration) {
    let started = Instant::now();
    let out = world().runtime.block_on(f);
    (out, started.elapsed())
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(160))]

    #[test]
    fn random_area_requests_are_answered_or_refused_deliberately(r in area_request()) {
        let svc = service();
        let (result, took) = timed(area_all(&svc, r.clone()));
        prop_assert!(took < QUICK, "took {took:?} for {r:?}");
        match result {
            Ok(chunks) => {
                prop_assert!(!chunks.is_empty());
                for c in &chunks {
                    prop_assert_eq!(c.fields.len(), r.quantities.len());
                    prop_assert_eq!(&c.cycle_id, DEMO_FILE_NAME);
                }
            }
            Err(s) => check_refusal(&s, AREA_FIELDS)?,
        }
    }

    #[test]
    fn random_position_requests_are_answered_or_refused_deliberately(r in position_request()) {
        let svc = service();
        let points = r.points.len();
        let (result, took) = timed(svc.query_position(Request::new(r.clone())));
        prop_assert!(took < QUICK, "took {took:?} for {points} points");
        match result {
            Ok(answer) => {
                let answer = answer.into_inner();
                prop_assert_eq!(answer.series.len(), points);
                prop_assert_eq!(answer.quantities.len(), r.quantities.len());
            }
            Err(s) => check_refusal(&s, POSITION_FIELDS)?,
        }
    }

    #[test]
    fn random_profile_requests_are_answered_or_refused_deliberately(r in profile_request()) {
        let svc = service();
        let (result, took) = timed(svc.query_profile(Request::new(r.clone())));
        prop_assert!(took < QUICK, "took {took:?} for {r:?}");
        match result {
            Ok(answer) => {
                prop_assert_eq!(answer.into_inner().levels.len(), DEMO_LEVELS_HPA.len());
            }
            Err(s) => check_refusal(&s, PROFILE_FIELDS)?,
        }
    }

    #[test]
    fn random_trajectory_requests_are_answered_or_refused_deliberately(r in trajectory_request()) {
        let svc = service();
        let (result, took) = timed(svc.query_trajectory(Request::new(r.clone())));
        prop_assert!(took < QUICK, "took {took:?} for {r:?}");
        match result {
            Ok(answer) => {
                prop_assert_eq!(answer.into_inner().samples.len(), r.waypoints.len());
            }
            Err(s) => check_refusal(&s, TRAJECTORY_FIELDS)?,
        }
    }
}

/// Asserts a refusal with a deliberate code whose message starts with `field`.
fn assert_refused(result: Result<(), Status>, code: Code, field: &str) {
    let s = result.expect_err("a deliberate refusal");
    assert_eq!(s.code(), code, "{s:?}");
    assert!(
        s.message().starts_with(&format!("{field}: ")),
        "message should name '{field}': {}",
        s.message()
    );
}

#[test]
fn an_empty_request_to_every_query_method_gets_a_deliberate_error() {
    let svc = service();
    let w = world();
    // The proto3 default of each request: nothing set at all.
    let area = w
        .runtime
        .block_on(area_all(&svc, pb::AreaRequest::default()))
        .map(|_| ());
    assert_refused(area, Code::InvalidArgument, "bbox");
    let position = w
        .runtime
        .block_on(svc.query_position(Request::new(pb::PositionRequest::default())))
        .map(|_| ());
    assert_refused(position, Code::InvalidArgument, "points");
    let profile = w
        .runtime
        .block_on(svc.query_profile(Request::new(pb::ProfileRequest::default())))
        .map(|_| ());
    assert_refused(profile, Code::InvalidArgument, "point");
    let trajectory = w
        .runtime
        .block_on(svc.query_trajectory(Request::new(pb::TrajectoryRequest::default())))
        .map(|_| ());
    assert_refused(trajectory, Code::InvalidArgument, "waypoints");
    // The catalogue request has no fields: empty is its only form, and it is answered.
    let catalogue = w
        .runtime
        .block_on(svc.get_catalogue(Request::new(pb::CatalogueRequest {})))
        .expect("catalogue")
        .into_inner();
    assert_eq!(catalogue.cycles.len(), 1);
}

#[test]
fn ten_million_positions_are_refused_quickly_before_any_work() {
    let svc = service();
    let request = pb::PositionRequest {
        points: vec![
            pb::GeoPoint {
                latitude_deg: 55.0,
                longitude_deg: -35.0,
            };
            10_000_000
        ],
        quantities: vec![pb::Quantity {
            kind: Some(pb::quantity::Kind::GeopotentialHeight(
                pb::HeightAtPressure {
                    pressure_pa: 50_000.0,
                },
            )),
        }],
        ..pb::PositionRequest::default()
    };
    let (result, took) = timed(svc.query_position(Request::new(request)));
    assert_refused(result.map(|_| ()), Code::ResourceExhausted, "points");
    // Refused on the count alone; computing 70 million values would take many seconds.
    assert!(took < Duration::from_secs(2), "took {took:?}");
}

#[test]
fn a_whole_globe_box_at_stride_one_beyond_the_point_limit_is_refused_quickly() {
    // A limit below the demo grid's 49 x 81 = 3969 points, so the whole-globe box (clipped
    // to the grid) at stride 1 is past it.
    let svc = HeightServiceHandlers::new(
        Arc::clone(&world().store),
        settings_with(Limits { max_points: 3000 }),
    );
    let request = pb::AreaRequest {
        time: Some(pb::TimeSelection {
            kind: Some(pb::time_selection::Kind::LeadTimeS(0)),
        }),
        quantities: vec![pb::Quantity {
            kind: Some(pb::quantity::Kind::Thickness(pb::LayerBounds {
                bottom_pa: 100_000.0,
                top_pa: 50_000.0,
            })),
        }],
        bbox: Some(pb::BoundingBox::whole_globe()),
        stride: Some(1),
        ..pb::AreaRequest::default()
    };
    let (result, took) = timed(area_all(&svc, request.clone()));
    assert_refused(result.map(|_| ()), Code::ResourceExhausted, "bbox");
    assert!(took < Duration::from_secs(2), "took {took:?}");
    // At stride 2 the same box holds 25 x 41 = 1025 points and is answered.
    let halved = pb::AreaRequest {
        stride: Some(2),
        ..request
    };
    let chunks = world()
        .runtime
        .block_on(area_all(&svc, halved))
        .expect("answered at stride 2");
    let rows: usize = chunks.iter().map(|c| c.latitudes_deg.len()).sum();
    assert_eq!(rows, 25);
    assert_eq!(chunks[0].longitudes_deg.len(), 41);
}
