//! Handler tests of the gRPC service: each RPC called directly on the service struct (no
//! network), over the invented demo cycle, and each error code with the field it names.
//!
//! Reference values are the batch output (`compute_heights` on the same file), which the
//! service must reproduce, and the hypsometric equation itself (Wallace & Hobbs 2006,
//! *Atmospheric Science*, 2nd ed., §3.2) for the profile.

use std::sync::{Arc, OnceLock};
use std::time::Duration;

use hypsogrid::compute::{compute_heights, ComputeConfig};
use hypsogrid::demo::{write_demo_cycle, DEMO_FILE_NAME, DEMO_LEAD_HOURS, DEMO_LEVELS_HPA};
use hypsogrid::ingest::IngestConfig;
use hypsogrid::model::{Heights, Layer};
use hypsogrid::pb;
use hypsogrid::pb::height_service_server::HeightService;
use hypsogrid::query::{Limits, LoadedCycle};
use hypsogrid::service::{HandlerSettings, HeightServiceHandlers, ServiceConfig};
use hypsogrid::store::{CycleStore, StoreConfig};
use tokio_stream::StreamExt;
use tonic::metadata::MetadataValue;
use tonic::{Code, Request, Status};

/// The demo grid: rows from 62° N southward every 0.25°, columns from 45° W eastward every
/// 0.25° (see `hypsogrid::demo`).
fn demo_lat(row: usize) -> f64 {
    62.0 - 0.25 * row as f64
}
fn demo_lon(col: usize) -> f64 {
    -45.0 + 0.25 * col as f64
}

const THICKNESS_1000_500: Layer = Layer {
    bottom_pa: 100_000.0,
    top_pa: 50_000.0,
};

struct Fixture {
    store: Arc<CycleStore>,
    /// The batch output for the same file, with the 1000-500 hPa layer.
    batch: Heights,
}

/// One demo cycle, loaded once for all tests of this file.
fn fixture() -> &'static Fixture {
    static F: OnceLock<Fixture> = OnceLock::new();
    F.get_or_init(|| {
        let dir = tempfile::tempdir().expect("tempdir");
        let path = write_demo_cycle(dir.path()).expect("demo cycle");
        let lc = LoadedCycle::load(&path, &IngestConfig::default(), &ComputeConfig::default())
            .expect("load demo");
        let batch = compute_heights(
            &lc.cycle,
            &ComputeConfig {
                layers: vec![THICKNESS_1000_500],
                ..ComputeConfig::default()
            },
            &|_| {},
        )
        .expect("batch");
        let store = Arc::new(CycleStore::new(StoreConfig::default()));
        store.insert(lc);
        Fixture { store, batch }
    })
}

fn settings() -> HandlerSettings {
    ServiceConfig::default()
        .handler_settings()
        .expect("settings")
}

fn service() -> HeightServiceHandlers {
    HeightServiceHandlers::new(Arc::clone(&fixture().store), settings())
}

fn level_index(hpa: f64) -> usize {
    DEMO_LEVELS_HPA
        .iter()
        .position(|&l| l == hpa)
        .expect("a demo level")
}

fn lead(hours: i64) -> Option<pb::TimeSelection> {
    Some(pb::TimeSelection {
        kind: Some(pb::time_selection::Kind::LeadTimeS(hours * 3600)),
    })
}

fn height_q(pressure_pa: f64) -> pb::Quantity {
    pb::Quantity {
        kind: Some(pb::quantity::Kind::GeopotentialHeight(
            pb::HeightAtPressure { pressure_pa },
        )),
    }
}

fn thickness_q(bottom_pa: f64, top_pa: f64) -> pb::Quantity {
    pb::Quantity {
        kind: Some(pb::quantity::Kind::Thickness(pb::LayerBounds {
            bottom_pa,
            top_pa,
        })),
    }
}

fn point(lat: f64, lon: f64) -> pb::GeoPoint {
    pb::GeoPoint {
        latitude_deg: lat,
        longitude_deg: lon,
    }
}

fn area_request() -> pb::AreaRequest {
    pb::AreaRequest {
        cycle_id: String::new(),
        time: lead(12),
        member: 0,
        quantities: vec![thickness_q(100_000.0, 50_000.0), height_q(50_000.0)],
        bbox: Some(pb::BoundingBox {
            south_deg: 53.0,
            north_deg: 57.0,
            west_deg: -40.0,
            east_deg: -35.0,
        }),
        stride: None,
        allow_extrapolation: false,
    }
}

/// Every chunk of an area answer, or the status it ended with.
async fn area_chunks(
    svc: &HeightServiceHandlers,
    request: Request<pb::AreaRequest>,
) -> Result<Vec<pb::AreaChunk>, Status> {
    let mut stream = svc.query_area(request).await?.into_inner();
    let mut chunks = Vec::new();
    while let Some(item) = stream.next().await {
        chunks.push(item?);
    }
    Ok(chunks)
}

/// Asserts a status's code and that its message starts with the field named.
fn assert_status(s: &Status, code: Code, field: &str) {
    assert_eq!(s.code(), code, "{s:?}");
    assert!(
        s.message().starts_with(&format!("{field}: ")),
        "message should name '{field}': {}",
        s.message()
    );
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn catalogue_describes_the_loaded_cycle() {
    let r = service()
        .get_catalogue(Request::new(pb::CatalogueRequest {}))
        .await
        .expect("catalogue")
        .into_inner();
    assert_eq!(r.cycles.len(), 1);
    assert!(r.failures.is_empty());
    let entry = &r.cycles[0];
    assert_eq!(entry.id, DEMO_FILE_NAME);
    assert!(entry.load_s > 0.0);
    assert!(entry.memory_bytes > 0);
    assert!(
        entry.heights_ready,
        "the fixture's cycle was loaded with its heights"
    );
    assert!(entry.loaded_at.ends_with('Z'), "{}", entry.loaded_at);
    let d = entry.description.as_ref().expect("description");
    // The demo's invented reference time, 2031-01-14 00:00 UTC (hypsogrid::demo).
    assert_eq!(d.reference_time, "2031-01-14T00:00:00Z");
    let leads: Vec<i64> = DEMO_LEAD_HOURS
        .iter()
        .map(|&h| i64::from(h) * 3600)
        .collect();
    assert_eq!(d.lead_times_s, leads);
    assert_eq!(d.valid_times.len(), leads.len());
    assert_eq!(d.valid_times[1], "2031-01-14T06:00:00Z");
    assert_eq!(d.valid_times[6], "2031-01-16T00:00:00Z");
    assert_eq!(d.members, 1);
    let grid = d.grid.as_ref().expect("grid");
    assert_eq!(grid.latitudes_deg.len(), 49);
    assert_eq!(grid.longitudes_deg.len(), 81);
    match d.vertical.as_ref().and_then(|v| v.kind.as_ref()) {
        Some(pb::vertical_axis::Kind::Isobaric(levels)) => {
            let want: Vec<f64> = DEMO_LEVELS_HPA.iter().map(|h| h * 100.0).collect();
            assert_eq!(levels.pressure_pa, want);
        }
        other => panic!("expected isobaric levels, got {other:?}"),
    }
    assert_eq!(d.humidity, "specific_humidity");
    assert!(d.from_surface);
    // Default constants: R_d = 287.04 J kg-1 K-1 and g0 = 9.80665 m s-2 (WMO standard gravity).
    let c = d.constants.as_ref().expect("constants");
    assert_eq!(c.standard_gravity, 9.80665);
    assert_eq!(c.dry_air_gas_constant, 287.04);
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn area_on_levels_equals_the_batch_output_at_the_grid_points() {
    let f = fixture();
    let chunks = area_chunks(&service(), Request::new(area_request()))
        .await
        .expect("area");
    assert_eq!(chunks.len(), 1, "a small box fits in one message");
    let c = &chunks[0];
    assert_eq!(c.cycle_id, DEMO_FILE_NAME);
    assert_eq!(c.lead_time_s, 12 * 3600);
    assert_eq!(c.valid_time, "2031-01-14T12:00:00Z");
    // Rows 20..=36 (57 to 53 N) and columns 20..=40 (40 W to 35 W) of the demo grid.
    assert_eq!(c.total_rows, 17);
    assert_eq!(c.latitudes_deg.len(), 17);
    assert_eq!(c.longitudes_deg.len(), 21);
    assert_eq!(c.latitudes_deg[0], 57.0, "north first");
    assert_eq!(*c.latitudes_deg.last().unwrap(), 53.0);
    assert_eq!(c.longitudes_deg[0], -40.0, "west first");
    assert_eq!(*c.longitudes_deg.last().unwrap(), -35.0);
    let t = DEMO_LEAD_HOURS.iter().position(|&h| h == 12).unwrap();
    let k500 = level_index(500.0);
    let thick = f.batch.thickness[0].values.view();
    let thick_below = f.batch.thickness[0].below_ground.view();
    let z = f.batch.geopotential_height.view();
    let mut compared = 0;
    for (i, &lat) in c.latitudes_deg.iter().enumerate() {
        let row = ((62.0 - lat) / 0.25).round() as usize;
        for (j, &lon) in c.longitudes_deg.iter().enumerate() {
            let col = ((lon + 45.0) / 0.25).round() as usize;
            let n = i * c.longitudes_deg.len() + j;
            let got = c.fields[0].values[n];
            let want = thick[[0, t, row, col]];
            if want.is_nan() {
                assert!(got.is_nan());
                assert_eq!(c.fields[0].flags[n] & 2, 2, "missing is flagged");
            } else {
                // Heights are stored as f32: near 5.5 km one unit in the last place is
                // 0.0005 m, so a difference of two stored heights agrees within 0.002 m.
                assert!(
                    (got - want).abs() < 0.002,
                    "thickness at row {row} col {col}: {got} vs batch {want}"
                );
                compared += 1;
            }
            assert_eq!(
                c.fields[0].flags[n] & 1,
                thick_below[[0, t, row, col]],
                "below-ground flag at row {row} col {col}"
            );
            let zwant = z[[0, t, k500, row, col]];
            assert_eq!(
                c.fields[1].values[n], zwant,
                "500 hPa height straight from the batch"
            );
        }
    }
    assert!(compared > 300, "compared {compared} points");
    // Physical range of the demo scenario's 1000-500 hPa thickness (hypsogrid::demo docs,
    // invented data): about 5150-5550 m.
    assert!(c.fields[0]
        .values
        .iter()
        .filter(|v| v.is_finite())
        .all(|&v| (5000.0..5700.0).contains(&v)));
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn area_stride_and_small_messages_reassemble_to_the_whole() {
    let whole = area_chunks(&service(), Request::new(area_request()))
        .await
        .expect("area")
        .remove(0);
    // A 1 KiB message limit forces several chunks of whole rows.
    let small = HeightServiceHandlers::new(
        Arc::clone(&fixture().store),
        HandlerSettings {
            max_message_bytes: 1024,
            ..settings()
        },
    );
    let chunks = area_chunks(&small, Request::new(area_request()))
        .await
        .expect("area in chunks");
    assert!(chunks.len() > 3, "{} chunks", chunks.len());
    let mut next_row = 0;
    let mut values: [Vec<f32>; 2] = [Vec::new(), Vec::new()];
    let mut lats = Vec::new();
    for (i, c) in chunks.iter().enumerate() {
        assert!(prost::Message::encoded_len(c) + 5 <= 1024);
        assert_eq!(c.row_offset as usize, next_row);
        assert_eq!(c.total_rows, whole.total_rows);
        assert_eq!(
            c.longitudes_deg.is_empty(),
            i > 0,
            "longitudes in the first chunk only"
        );
        next_row += c.latitudes_deg.len();
        lats.extend_from_slice(&c.latitudes_deg);
        for (q, f) in c.fields.iter().enumerate() {
            assert_eq!(
                f.values.len(),
                c.latitudes_deg.len() * whole.longitudes_deg.len()
            );
            values[q].extend_from_slice(&f.values);
        }
    }
    assert_eq!(next_row, whole.total_rows as usize);
    assert_eq!(lats, whole.latitudes_deg);
    assert_eq!(chunks[0].longitudes_deg, whole.longitudes_deg);
    for (q, (got, want)) in values.iter().zip(&whole.fields).enumerate() {
        let a: Vec<u32> = got.iter().map(|v| v.to_bits()).collect();
        let b: Vec<u32> = want.values.iter().map(|v| v.to_bits()).collect();
        assert_eq!(a, b, "quantity {q}");
    }

    // Stride 4 keeps every fourth row and column, starting at the north-west corner.
    let mut r = area_request();
    r.stride = Some(4);
    let thin = area_chunks(&service(), Request::new(r))
        .await
        .expect("stride")
        .remove(0);
    assert_eq!(thin.latitudes_deg, vec![57.0, 56.0, 55.0, 54.0, 53.0]);
    assert_eq!(
        thin.longitudes_deg,
        vec![-40.0, -39.0, -38.0, -37.0, -36.0, -35.0]
    );
    let ncols = whole.longitudes_deg.len();
    for (i, _) in thin.latitudes_deg.iter().enumerate() {
        for (j, _) in thin.longitudes_deg.iter().enumerate() {
            assert_eq!(
                thin.fields[0].values[i * 6 + j].to_bits(),
                whole.fields[0].values[4 * i * ncols + 4 * j].to_bits()
            );
        }
    }
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn position_gives_a_time_series_equal_to_the_batch_at_a_grid_point() {
    let f = fixture();
    let (row, col) = (24, 32);
    let r = service()
        .query_position(Request::new(pb::PositionRequest {
            points: vec![point(demo_lat(row), demo_lon(col))],
            quantities: vec![height_q(50_000.0), thickness_q(100_000.0, 50_000.0)],
            ..Default::default()
        }))
        .await
        .expect("position")
        .into_inner();
    assert_eq!(r.cycle_id, DEMO_FILE_NAME);
    assert_eq!(r.quantities.len(), 2);
    assert_eq!(r.series.len(), 1);
    let samples = &r.series[0].samples;
    assert_eq!(samples.len(), DEMO_LEAD_HOURS.len(), "every lead time");
    let k500 = level_index(500.0);
    for (t, s) in samples.iter().enumerate() {
        assert_eq!(s.lead_time_s, i64::from(DEMO_LEAD_HOURS[t]) * 3600);
        assert!(s.valid_time.starts_with("2031-01-1"));
        let z = f64::from(f.batch.geopotential_height[[0, t, k500, row, col]]);
        assert!(
            (s.values[0] - z).abs() < 1e-3,
            "t={t}: {} vs {z}",
            s.values[0]
        );
        let th = f64::from(f.batch.thickness[0].values[[0, t, row, col]]);
        assert!(
            (s.values[1] - th).abs() < 0.002,
            "t={t}: {} vs {th}",
            s.values[1]
        );
        assert_eq!(s.flags.len(), 2);
    }
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn nearest_takes_the_closest_column_and_bilinear_lies_between_the_corners() {
    let f = fixture();
    let k500 = level_index(500.0);
    // A point 0.05 deg north and 0.2 deg east of grid point (row 20, col 20): nearest is
    // (row 20, col 21) (the column 0.05 deg away).
    let (lat, lon) = (demo_lat(20) + 0.05, demo_lon(20) + 0.2);
    let ask = |interpolation: pb::Interpolation| pb::PositionRequest {
        points: vec![point(lat, lon)],
        quantities: vec![height_q(50_000.0)],
        times: vec![lead(0).unwrap()],
        interpolation: interpolation as i32,
        ..Default::default()
    };
    let svc = service();
    let nearest = svc
        .query_position(Request::new(ask(pb::Interpolation::Nearest)))
        .await
        .expect("nearest")
        .into_inner();
    let bilinear = svc
        .query_position(Request::new(ask(pb::Interpolation::Bilinear)))
        .await
        .expect("bilinear")
        .into_inner();
    let zn = nearest.series[0].samples[0].values[0];
    let zb = bilinear.series[0].samples[0].values[0];
    let z = |r: usize, c: usize| f64::from(f.batch.geopotential_height[[0, 0, k500, r, c]]);
    assert!(
        (zn - z(20, 21)).abs() < 1e-3,
        "row 20 is 0.05 deg away, row 19 0.2 deg"
    );
    let corners = [z(19, 20), z(19, 21), z(20, 20), z(20, 21)];
    let lo = corners.iter().cloned().fold(f64::INFINITY, f64::min);
    let hi = corners.iter().cloned().fold(f64::NEG_INFINITY, f64::max);
    assert!(zb >= lo - 1e-6 && zb <= hi + 1e-6, "{zb} within {lo}..{hi}");
    // Bilinear weights: 0.2 of the way north (to row 19), 0.8 of the way east (to col 21).
    let want =
        0.8 * (0.2 * z(20, 20) + 0.8 * z(20, 21)) + 0.2 * (0.2 * z(19, 20) + 0.8 * z(19, 21));
    assert!((zb - want).abs() < 1e-3, "{zb} vs {want}");
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn profile_heights_obey_the_hypsometric_equation() {
    let f = fixture();
    let (row, col) = (10, 60);
    let p = service()
        .query_profile(Request::new(pb::ProfileRequest {
            point: Some(point(demo_lat(row), demo_lon(col))),
            time: lead(24),
            interpolation: pb::Interpolation::Nearest as i32,
            ..Default::default()
        }))
        .await
        .expect("profile")
        .into_inner();
    assert_eq!(p.cycle_id, DEMO_FILE_NAME);
    assert_eq!(p.lead_time_s, 24 * 3600);
    assert_eq!(p.valid_time, "2031-01-15T00:00:00Z");
    assert!(p.surface_pressure_pa.is_some() && p.surface_height_m.is_some());
    assert_eq!(p.levels.len(), DEMO_LEVELS_HPA.len());
    let t = DEMO_LEAD_HOURS.iter().position(|&h| h == 24).unwrap();
    // R_d / g0 with R_d = 287.04 J kg-1 K-1 (the crate's default, within the 287.04-287.06
    // of operational models) and g0 = 9.80665 m s-2 (WMO).
    let rd_over_g0 = 287.04 / 9.80665;
    let mut checked = 0;
    for (k, pair) in p.levels.windows(2).enumerate() {
        let (a, b) = (&pair[0], &pair[1]);
        assert_eq!(a.pressure_pa, DEMO_LEVELS_HPA[k] * 100.0, "bottom-up");
        assert!(
            b.geopotential_height_m > a.geopotential_height_m,
            "heights increase upward"
        );
        let zb = f64::from(f.batch.geopotential_height[[0, t, k, row, col]]);
        assert!(
            (a.geopotential_height_m - zb).abs() < 1e-3,
            "level {k} vs batch"
        );
        if a.below_ground || b.below_ground {
            continue;
        }
        // Hypsometric equation with a constant lapse rate in the layer: the layer-mean
        // virtual temperature is the logarithmic mean of the end values (Wallace & Hobbs
        // 2006, §3.2).
        let (t1, t2) = (a.virtual_temperature_k, b.virtual_temperature_k);
        let tv_mean = if (t1 - t2).abs() < 1e-9 {
            t1
        } else {
            (t1 - t2) / (t1 / t2).ln()
        };
        let dz = rd_over_g0 * tv_mean * (a.pressure_pa / b.pressure_pa).ln();
        let got = b.geopotential_height_m - a.geopotential_height_m;
        // Heights travel as f32 (0.002 m near 16 km per unit in the last place).
        assert!((got - dz).abs() < 0.01, "layer {k}: {got} vs {dz}");
        assert!(
            a.virtual_temperature_k >= a.temperature_k - 1e-9,
            "moist air is lighter"
        );
        checked += 1;
    }
    assert!(checked >= 10, "{checked} layers checked");
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn trajectory_interpolates_linearly_in_time_between_lead_times() {
    let f = fixture();
    let (row, col) = (30, 50);
    let k500 = level_index(500.0);
    let at = |time: &str| pb::Waypoint {
        point: Some(point(demo_lat(row), demo_lon(col))),
        valid_time: time.into(),
    };
    let r = service()
        .query_trajectory(Request::new(pb::TrajectoryRequest {
            waypoints: vec![
                at("2031-01-14T06:00:00Z"),
                // 09 UTC is halfway between the 6 h and 12 h steps; given with an offset.
                at("2031-01-14T10:00:00+01:00"),
                at("2031-01-14T12:00:00Z"),
            ],
            quantities: vec![height_q(50_000.0)],
            ..Default::default()
        }))
        .await
        .expect("trajectory")
        .into_inner();
    assert_eq!(r.cycle_id, DEMO_FILE_NAME);
    assert_eq!(r.samples.len(), 3);
    assert_eq!(
        r.samples[1].waypoint.as_ref().unwrap().valid_time,
        "2031-01-14T09:00:00Z",
        "answered in UTC"
    );
    let z6 = f64::from(f.batch.geopotential_height[[0, 1, k500, row, col]]);
    let z12 = f64::from(f.batch.geopotential_height[[0, 2, k500, row, col]]);
    let v: Vec<f64> = r.samples.iter().map(|s| s.values[0]).collect();
    assert!((v[0] - z6).abs() < 1e-3);
    assert!((v[2] - z12).abs() < 1e-3);
    assert!(
        (v[1] - 0.5 * (z6 + z12)).abs() < 1e-3,
        "{} vs {}",
        v[1],
        0.5 * (z6 + z12)
    );
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn invalid_arguments_name_their_fields() {
    let svc = service();

    let mut inverted = area_request();
    inverted.bbox = Some(pb::BoundingBox {
        south_deg: 58.0,
        north_deg: 54.0,
        west_deg: -40.0,
        east_deg: -35.0,
    });
    let s = area_chunks(&svc, Request::new(inverted)).await.unwrap_err();
    assert_status(&s, Code::InvalidArgument, "bbox.south_deg");

    let s = svc
        .query_position(Request::new(pb::PositionRequest {
            points: vec![point(55.0, -40.0), point(95.0, -40.0)],
            quantities: vec![height_q(50_000.0)],
            ..Default::default()
        }))
        .await
        .unwrap_err();
    assert_status(&s, Code::InvalidArgument, "points[1].latitude_deg");

    let s = svc
        .query_profile(Request::new(pb::ProfileRequest {
            point: Some(point(95.0, -40.0)),
            time: lead(0),
            ..Default::default()
        }))
        .await
        .unwrap_err();
    assert_status(&s, Code::InvalidArgument, "point.latitude_deg");

    let mut upside_down = area_request();
    upside_down.quantities = vec![height_q(50_000.0), thickness_q(50_000.0, 70_000.0)];
    let s = area_chunks(&svc, Request::new(upside_down))
        .await
        .unwrap_err();
    assert_status(&s, Code::InvalidArgument, "quantities[1].thickness.top_pa");

    let mut stride0 = area_request();
    stride0.stride = Some(0);
    let s = area_chunks(&svc, Request::new(stride0)).await.unwrap_err();
    assert_status(&s, Code::InvalidArgument, "stride");

    // Empty requests: the first required field is named.
    let s = area_chunks(&svc, Request::new(pb::AreaRequest::default()))
        .await
        .unwrap_err();
    assert_status(&s, Code::InvalidArgument, "bbox");
    let mut no_time = area_request();
    no_time.time = None;
    let s = area_chunks(&svc, Request::new(no_time)).await.unwrap_err();
    assert_status(&s, Code::InvalidArgument, "time");
    let mut no_quantities = area_request();
    no_quantities.quantities.clear();
    let s = area_chunks(&svc, Request::new(no_quantities))
        .await
        .unwrap_err();
    assert_status(&s, Code::InvalidArgument, "quantities");
    let s = svc
        .query_position(Request::new(pb::PositionRequest::default()))
        .await
        .unwrap_err();
    assert_status(&s, Code::InvalidArgument, "points");
    let s = svc
        .query_profile(Request::new(pb::ProfileRequest::default()))
        .await
        .unwrap_err();
    assert_status(&s, Code::InvalidArgument, "point");
    let s = svc
        .query_trajectory(Request::new(pb::TrajectoryRequest::default()))
        .await
        .unwrap_err();
    assert_status(&s, Code::InvalidArgument, "waypoints");
    let s = svc
        .query_position(Request::new(pb::PositionRequest {
            points: vec![point(55.0, -40.0)],
            quantities: vec![pb::Quantity { kind: None }],
            ..Default::default()
        }))
        .await
        .unwrap_err();
    assert_status(&s, Code::InvalidArgument, "quantities[0]");
    let s = svc
        .query_position(Request::new(pb::PositionRequest {
            points: vec![point(55.0, -40.0)],
            quantities: vec![height_q(50_000.0)],
            interpolation: 9,
            ..Default::default()
        }))
        .await
        .unwrap_err();
    assert_status(&s, Code::InvalidArgument, "interpolation");
    let s = svc
        .query_trajectory(Request::new(pb::TrajectoryRequest {
            waypoints: vec![pb::Waypoint {
                point: Some(point(55.0, -40.0)),
                valid_time: "next tuesday".into(),
            }],
            quantities: vec![height_q(50_000.0)],
            ..Default::default()
        }))
        .await
        .unwrap_err();
    assert_status(&s, Code::InvalidArgument, "waypoints[0].valid_time");
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn not_found_names_cycle_lead_time_and_member() {
    let svc = service();
    let mut r = area_request();
    r.cycle_id = "no_such_cycle.nc".into();
    let s = area_chunks(&svc, Request::new(r)).await.unwrap_err();
    assert_status(&s, Code::NotFound, "cycle_id");
    assert!(s.message().contains(DEMO_FILE_NAME), "lists what is loaded");

    let mut r = area_request();
    r.time = lead(7);
    let s = area_chunks(&svc, Request::new(r)).await.unwrap_err();
    assert_status(&s, Code::NotFound, "time.lead_time_s");
    assert!(
        s.message().contains("21600"),
        "lists the lead times: {}",
        s.message()
    );

    let mut r = area_request();
    r.time = Some(pb::TimeSelection {
        kind: Some(pb::time_selection::Kind::ValidTime(
            "2031-01-14T03:00:00Z".into(),
        )),
    });
    let s = area_chunks(&svc, Request::new(r)).await.unwrap_err();
    assert_status(&s, Code::NotFound, "time.valid_time");

    let s = svc
        .query_position(Request::new(pb::PositionRequest {
            points: vec![point(55.0, -40.0)],
            quantities: vec![height_q(50_000.0)],
            times: vec![lead(0).unwrap(), lead(5).unwrap()],
            ..Default::default()
        }))
        .await
        .unwrap_err();
    assert_status(&s, Code::NotFound, "times[1].lead_time_s");

    let s = svc
        .query_profile(Request::new(pb::ProfileRequest {
            point: Some(point(55.0, -40.0)),
            time: lead(0),
            member: 3,
            ..Default::default()
        }))
        .await
        .unwrap_err();
    assert_status(&s, Code::NotFound, "member");
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_pressure_above_the_data_is_out_of_range_unless_extrapolation_is_allowed() {
    let svc = service();
    let (row, col) = (12, 12);
    let ask = |allow: bool| pb::PositionRequest {
        points: vec![point(demo_lat(row), demo_lon(col))],
        // 5 hPa lies above the demo's top level (100 hPa).
        quantities: vec![height_q(500.0), height_q(10_000.0)],
        times: vec![lead(0).unwrap()],
        allow_extrapolation: allow,
        interpolation: pb::Interpolation::Nearest as i32,
        ..Default::default()
    };
    let s = svc
        .query_position(Request::new(ask(false)))
        .await
        .unwrap_err();
    assert_status(
        &s,
        Code::OutOfRange,
        "quantities[0].geopotential_height.pressure_pa",
    );
    let mut r = area_request();
    r.quantities = vec![thickness_q(100_000.0, 500.0)];
    let s = area_chunks(&svc, Request::new(r)).await.unwrap_err();
    assert_status(&s, Code::OutOfRange, "quantities[0].thickness.top_pa");

    let r = svc
        .query_position(Request::new(ask(true)))
        .await
        .expect("extrapolated")
        .into_inner();
    let v = &r.series[0].samples[0].values;
    // The demo's stratosphere is isothermal above about 250 hPa, and extrapolation above
    // the top continues the top layer isothermally, so Z(5 hPa) - Z(100 hPa) follows the
    // isothermal hypsometric equation (R_d Tv / g0) ln(100/5) (Wallace & Hobbs 2006, §3.2).
    let top = svc
        .query_profile(Request::new(pb::ProfileRequest {
            point: Some(point(demo_lat(row), demo_lon(col))),
            time: lead(0),
            interpolation: pb::Interpolation::Nearest as i32,
            ..Default::default()
        }))
        .await
        .expect("profile")
        .into_inner();
    let tv_top = top.levels.last().unwrap().virtual_temperature_k;
    let want = 287.04 / 9.80665 * tv_top * (10_000.0f64 / 500.0).ln();
    assert!(
        (v[0] - v[1] - want).abs() < 0.5,
        "{} vs {want}",
        v[0] - v[1]
    );
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn the_point_limit_refuses_before_any_work() {
    let tiny = HeightServiceHandlers::new(
        Arc::clone(&fixture().store),
        HandlerSettings {
            limits: Limits { max_points: 10 },
            ..settings()
        },
    );
    let s = area_chunks(&tiny, Request::new(area_request()))
        .await
        .unwrap_err();
    assert_status(&s, Code::ResourceExhausted, "bbox");
    let s = tiny
        .query_position(Request::new(pb::PositionRequest {
            points: vec![point(55.0, -40.0), point(56.0, -40.0)],
            quantities: vec![height_q(50_000.0)],
            // Every lead time: 2 points x 1 quantity x 7 times = 14 > 10.
            ..Default::default()
        }))
        .await
        .unwrap_err();
    assert_status(&s, Code::ResourceExhausted, "points");

    // A huge request is refused at once with the default limit, without allocating.
    let started = std::time::Instant::now();
    let s = service()
        .query_position(Request::new(pb::PositionRequest {
            points: vec![point(55.0, -40.0); 1_000],
            quantities: vec![height_q(50_000.0); 1_000],
            ..Default::default()
        }))
        .await
        .unwrap_err();
    assert_status(&s, Code::ResourceExhausted, "points");
    assert!(started.elapsed() < Duration::from_secs(2));
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn calls_without_a_listed_token_are_unauthenticated() {
    let dir = tempfile::tempdir().unwrap();
    let tokens = dir.path().join("tokens.txt");
    std::fs::write(&tokens, "# office tools\nfirst-token\n\nsecond-token\n").unwrap();
    let config = ServiceConfig {
        auth_tokens: Some(tokens),
        ..ServiceConfig::default()
    };
    let svc = HeightServiceHandlers::new(
        Arc::clone(&fixture().store),
        config.handler_settings().unwrap(),
    );
    let s = svc
        .get_catalogue(Request::new(pb::CatalogueRequest {}))
        .await
        .unwrap_err();
    assert_status(&s, Code::Unauthenticated, "authorization");
    let with = |value: &'static str| {
        let mut r = Request::new(pb::CatalogueRequest {});
        r.metadata_mut()
            .insert("authorization", MetadataValue::from_static(value));
        r
    };
    let s = svc
        .get_catalogue(with("Bearer third-token"))
        .await
        .unwrap_err();
    assert_status(&s, Code::Unauthenticated, "authorization");
    let s = svc.get_catalogue(with("second-token")).await.unwrap_err();
    assert_status(&s, Code::Unauthenticated, "authorization");
    assert!(svc.get_catalogue(with("Bearer second-token")).await.is_ok());
    let mut r = Request::new(area_request());
    r.metadata_mut()
        .insert("authorization", MetadataValue::from_static("Bearer nope"));
    let s = area_chunks(&svc, r).await.unwrap_err();
    assert_eq!(s.code(), Code::Unauthenticated);
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn an_expired_deadline_is_deadline_exceeded() {
    // A client deadline of 1 ms leaves no time once the reply margin is kept.
    let mut r = Request::new(pb::PositionRequest {
        points: vec![point(55.0, -40.0)],
        quantities: vec![height_q(50_000.0)],
        ..Default::default()
    });
    r.metadata_mut()
        .insert("grpc-timeout", MetadataValue::from_static("1m"));
    let s = service().query_position(r).await.unwrap_err();
    assert_status(&s, Code::DeadlineExceeded, "deadline");
    // The server's own timeout bounds every call too: 1 ns runs out during the work.
    let strict = HeightServiceHandlers::new(
        Arc::clone(&fixture().store),
        HandlerSettings {
            request_timeout: Duration::from_nanos(1),
            ..settings()
        },
    );
    let s = strict
        .query_profile(Request::new(pb::ProfileRequest {
            point: Some(point(55.0, -40.0)),
            time: lead(0),
            ..Default::default()
        }))
        .await
        .unwrap_err();
    assert_status(&s, Code::DeadlineExceeded, "deadline");
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn calls_beyond_the_concurrency_limit_are_shed() {
    let one = HeightServiceHandlers::new(
        Arc::clone(&fixture().store),
        HandlerSettings {
            max_concurrent_requests: 1,
            max_message_bytes: 1024,
            ..settings()
        },
    );
    // An area stream that is not read holds its slot: its producer waits on a full channel.
    let held = one
        .query_area(Request::new(area_request()))
        .await
        .expect("first call");
    let s = one
        .get_catalogue(Request::new(pb::CatalogueRequest {}))
        .await
        .unwrap_err();
    assert_status(&s, Code::ResourceExhausted, "server");
    drop(held);
    // Once the stream is dropped, the producer notices and frees the slot.
    let mut ok = false;
    for _ in 0..100 {
        if one
            .get_catalogue(Request::new(pb::CatalogueRequest {}))
            .await
            .is_ok()
        {
            ok = true;
            break;
        }
        tokio::time::sleep(Duration::from_millis(20)).await;
    }
    assert!(ok, "the slot is released when the stream ends");
}

/// A cycle in the store whose heights are still being computed is listed as such, and
/// answers over the service as it will once they are in: areas wait for the step (off the
/// async threads), points rebuild their columns.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_cycle_still_computing_answers_as_it_will_once_computed() {
    let ready = fixture().store.find(DEMO_FILE_NAME).expect("demo");
    let pending = LoadedCycle::from_cycle(DEMO_FILE_NAME, ready.cycle.clone(), &ready.config)
        .expect("pending cycle");
    let store = Arc::new(CycleStore::new(StoreConfig::default()));
    let pending = store.insert(pending);
    let svc = HeightServiceHandlers::new(Arc::clone(&store), settings());
    let catalogue = svc
        .get_catalogue(Request::new(pb::CatalogueRequest {}))
        .await
        .expect("catalogue")
        .into_inner();
    assert!(!catalogue.cycles[0].heights_ready);

    let points = pb::PositionRequest {
        points: vec![point(55.1, -37.3), point(58.6, -41.9)],
        quantities: vec![thickness_q(100_000.0, 50_000.0), height_q(50_000.0)],
        ..Default::default()
    };
    let rebuilt = svc
        .query_position(Request::new(points.clone()))
        .await
        .expect("points while computing")
        .into_inner();

    // The area is asked first; the heights are computed while it waits.
    let asked = {
        let svc = HeightServiceHandlers::new(Arc::clone(&store), settings());
        tokio::spawn(async move { area_chunks(&svc, Request::new(area_request())).await })
    };
    let computing = Arc::clone(&pending);
    tokio::task::spawn_blocking(move || computing.finish_heights())
        .await
        .expect("heights");
    let waited = asked
        .await
        .expect("area task")
        .expect("area while computing");
    let stored = area_chunks(&service(), Request::new(area_request()))
        .await
        .expect("area on the computed cycle");
    assert_eq!(waited, stored);

    let after = svc
        .query_position(Request::new(points))
        .await
        .expect("points once computed")
        .into_inner();
    for (a, b) in rebuilt.series.iter().zip(&after.series) {
        for (sa, sb) in a.samples.iter().zip(&b.samples) {
            assert_eq!(sa.flags, sb.flags);
            for (va, vb) in sa.values.iter().zip(&sb.values) {
                // 1 mm: the rebuilt column against the kernel's stored heights.
                assert!((va - vb).abs() <= 1e-3, "{va} rebuilt vs {vb} stored");
            }
        }
    }
    let catalogue = svc
        .get_catalogue(Request::new(pb::CatalogueRequest {}))
        .await
        .expect("catalogue")
        .into_inner();
    assert!(catalogue.cycles[0].heights_ready);
}
