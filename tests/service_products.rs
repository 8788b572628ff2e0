//! End-to-end tests of `hypsogrid.v1.ProductService`: a real server (`serve_on` on
//! 127.0.0.1:0) holding the invented demo cycle and ensemble (and the real GFS 2.5° cycle in
//! `../shared/data/` when that folder exists), real tonic clients over TCP.
//!
//! Every answer is checked against the library function the command line calls on the same
//! cycle (the products themselves are checked against outside sources in tests/isolines.rs,
//! tests/chart.rs, tests/guidance.rs, tests/wetbulb.rs, tests/ensemble.rs and
//! tests/verify.rs), so these tests prove the wire path: conversions, defaults, error codes
//! and the caution on every guidance answer.

mod common;

use std::net::SocketAddr;
use std::path::{Path, PathBuf};
use std::sync::{Arc, OnceLock};

use hypsogrid::compute::ComputeConfig;
use hypsogrid::demo::{
    write_demo_cycle, write_demo_ensemble, DEMO_ENSEMBLE_FILE_NAME, DEMO_FILE_NAME,
};
use hypsogrid::ingest::IngestConfig;
use hypsogrid::model::Layer;
use hypsogrid::pb;
use hypsogrid::pb::product_service_client::ProductServiceClient;
use hypsogrid::products::ensemble::{ensemble_at_points, EnsembleStatistic};
use hypsogrid::products::guidance::{guidance_at_point, guidance_grid, GuidanceSettings, CAUTION};
use hypsogrid::products::orders::{
    field_chart, field_isolines, ChartOptions, FieldChoice, LevelChoice,
};
use hypsogrid::products::verify::{consistency, ConsistencyRequest};
use hypsogrid::query::{LoadedCycle, Quantity, TimeSelector};
use hypsogrid::service::{serve_on, ServiceConfig};
use hypsogrid::store::{CycleStore, StoreConfig};
use tonic::transport::Channel;
use tonic::Code;

const LAYER_1000_500: Layer = Layer {
    bottom_pa: 100_000.0,
    top_pa: 50_000.0,
};

/// The GFS 2.5° +120 h cycle (NCEP, public domain; see its PROVENANCE.md), when present.
fn gfs_path() -> Option<PathBuf> {
    let p = Path::new("../shared/data/gfs-2p5deg-global-2011011012-f120")
        .join("gfs_2p5deg_2011011012_f120_isobaric_subset.nc");
    if p.exists() {
        Some(p)
    } else {
        eprintln!("skipping the GFS part: ../shared/data/ is absent");
        None
    }
}

struct Fixture {
    demo: Arc<LoadedCycle>,
    ensemble: Arc<LoadedCycle>,
    gfs: Option<Arc<LoadedCycle>>,
    store: Arc<CycleStore>,
}

fn load(path: &Path) -> LoadedCycle {
    LoadedCycle::load(path, &IngestConfig::default(), &ComputeConfig::default()).expect("load")
}

fn fixture() -> &'static Fixture {
    static F: OnceLock<Fixture> = OnceLock::new();
    F.get_or_init(|| {
        // Removed at exit ([`common::scratch`]): the fixture lives in a `static`.
        let dir = common::scratch::until_exit();
        let demo = load(&write_demo_cycle(&dir).expect("demo"));
        let ensemble = load(&write_demo_ensemble(&dir).expect("ensemble"));
        let gfs = gfs_path().map(|p| load(&p));
        let store = Arc::new(CycleStore::new(StoreConfig::default()));
        store.insert(load(&dir.join(DEMO_FILE_NAME)));
        store.insert(load(&dir.join(DEMO_ENSEMBLE_FILE_NAME)));
        if let Some(p) = gfs_path() {
            store.insert(load(&p));
        }
        Fixture {
            demo: Arc::new(demo),
            ensemble: Arc::new(ensemble),
            gfs: gfs.map(Arc::new),
            store,
        }
    })
}

async fn client() -> (
    ProductServiceClient<Channel>,
    tokio::sync::oneshot::Sender<()>,
) {
    client_with(ServiceConfig::default()).await
}

async fn client_with(
    config: ServiceConfig,
) -> (
    ProductServiceClient<Channel>,
    tokio::sync::oneshot::Sender<()>,
) {
    let listener = tokio::net::TcpListener::bind("127.0.0.1:0")
        .await
        .expect("bind");
    let addr: SocketAddr = listener.local_addr().expect("addr");
    let (stop, stopped) = tokio::sync::oneshot::channel::<()>();
    tokio::spawn(serve_on(
        listener,
        Arc::clone(&fixture().store),
        config,
        async move {
            let _ = stopped.await;
        },
    ));
    let channel = tonic::transport::Endpoint::from_shared(format!("http://{addr}"))
        .expect("url")
        .connect()
        .await
        .expect("connect");
    (
        ProductServiceClient::new(channel).max_decoding_message_size(64 << 20),
        stop,
    )
}

fn lead(hours: i64) -> pb::TimeSelection {
    pb::TimeSelection {
        kind: Some(pb::time_selection::Kind::LeadTimeS(hours * 3600)),
    }
}

fn thickness(layer: Layer) -> pb::Quantity {
    pb::Quantity::from(&Quantity::Thickness(layer))
}

fn selection(cycle: &str, hours: i64) -> pb::FieldSelection {
    pb::FieldSelection {
        cycle_id: cycle.to_string(),
        time: Some(lead(hours)),
        member: 0,
        quantity: Some(thickness(LAYER_1000_500)),
        allow_extrapolation: false,
    }
}

fn choice(hours: i64) -> FieldChoice {
    FieldChoice {
        quantity: Quantity::Thickness(LAYER_1000_500),
        time: Some(TimeSelector::LeadTime {
            seconds: hours * 3600,
        }),
        member: 0,
        allow_extrapolation: false,
    }
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn isolines_and_charts_over_grpc_equal_the_library_answers() {
    let f = fixture();
    let (mut c, _stop) = client().await;
    let answer = c
        .get_isolines(pb::IsolinesRequest {
            field: Some(selection(DEMO_FILE_NAME, 24)),
            values: vec![5280.0, 5400.0],
            interval: None,
            base: 0.0,
            include_geojson: true,
        })
        .await
        .expect("isolines")
        .into_inner();
    let local = field_isolines(
        &f.demo,
        &choice(24),
        &LevelChoice::Values(vec![5280.0, 5400.0]),
    )
    .expect("library isolines");
    assert_eq!(answer.isolines.len(), local.lines.len());
    for (wire, lib) in answer.isolines.iter().zip(&local.lines) {
        assert_eq!(wire.value, lib.value);
        assert_eq!(wire.closed, lib.closed);
        assert_eq!(wire.points.len(), lib.points.len());
        for (p, q) in wire.points.iter().zip(&lib.points) {
            assert_eq!((p.longitude_deg, p.latitude_deg), (q[0], q[1]));
        }
    }
    let field = answer.field.expect("resolved field");
    assert_eq!(field.cycle_id, DEMO_FILE_NAME);
    assert_eq!(field.lead_time_s, 24 * 3600);
    // The demo's reference time is 2031-01-14 00 UTC (src/demo.rs), so +24 h is valid at
    // 2031-01-15 00 UTC.
    assert_eq!(field.valid_time, "2031-01-15T00:00:00Z");
    let geojson: serde_json::Value = serde_json::from_str(&answer.geojson).expect("geojson");
    assert_eq!(geojson["type"], "FeatureCollection");
    assert_eq!(
        geojson["features"].as_array().map(Vec::len),
        Some(local.lines.len())
    );

    let chart = c
        .render_chart(pb::ChartRequest {
            field: Some(selection(DEMO_FILE_NAME, 24)),
            kind: pb::ChartKind::Field as i32,
            interval: Some(60.0),
            critical: vec![5400.0],
            fill: true,
            width: Some(800),
            height: Some(600),
            thresholds: None,
        })
        .await
        .expect("chart")
        .into_inner();
    let options = ChartOptions {
        interval: 60.0,
        critical: Some(vec![5400.0]),
        fill: true,
        width: 800,
        height: 600,
        ..ChartOptions::default()
    };
    let local = field_chart(&f.demo, &choice(24), &options).expect("library chart");
    assert_eq!(chart.png, local.png, "the same bytes by either door");
    assert!(
        chart.caution.is_empty(),
        "a thickness chart carries no guidance"
    );

    let guidance_chart = c
        .render_chart(pb::ChartRequest {
            field: Some(selection(DEMO_FILE_NAME, 24)),
            kind: pb::ChartKind::PrecipitationType as i32,
            ..Default::default()
        })
        .await
        .expect("guidance chart")
        .into_inner();
    assert_eq!(guidance_chart.caution, CAUTION);
    assert_eq!(&guidance_chart.png[..4], b"\x89PNG");
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn guidance_over_grpc_carries_the_caution_and_the_thresholds_asked_for() {
    let f = fixture();
    let (mut c, _stop) = client().await;
    let whole = pb::BoundingBox::whole_globe();
    let area = c
        .get_guidance_area(pb::GuidanceAreaRequest {
            field: Some(selection(DEMO_FILE_NAME, 24)),
            bbox: Some(whole),
            stride: None,
            thresholds: None,
        })
        .await
        .expect("guidance area")
        .into_inner();
    assert_eq!(area.caution, CAUTION);
    let grid = guidance_grid(&f.demo, 4, 0, &GuidanceSettings::default()).expect("grid");
    let summary = grid.summary();
    for (category, n) in &summary.categories {
        assert_eq!(
            area.category_counts[usize::from(category.code())],
            *n as u64,
            "{}",
            category.name()
        );
    }
    let rows = area.latitudes_deg.len();
    let cols = area.longitudes_deg.len();
    assert_eq!(area.category.len(), rows * cols);
    assert_eq!(area.thickness_1000_500_m.len(), rows * cols);
    // A box inside the region, every second point: each value is the whole grid's at the
    // point of that latitude and longitude (the server computes the box's columns alone).
    let grid_lats = &f.demo.cycle.grid.latitudes;
    let grid_lons = &f.demo.cycle.grid.longitudes;
    let (south, north) = (
        grid_lats[3].min(grid_lats[14]),
        grid_lats[3].max(grid_lats[14]),
    );
    let (west, east) = (grid_lons[5], grid_lons[20]);
    let part = c
        .get_guidance_area(pb::GuidanceAreaRequest {
            field: Some(selection(DEMO_FILE_NAME, 24)),
            bbox: Some(pb::BoundingBox {
                south_deg: south,
                north_deg: north,
                west_deg: west,
                east_deg: east,
            }),
            stride: Some(2),
            thresholds: None,
        })
        .await
        .expect("guidance on a box")
        .into_inner();
    let (prows, pcols) = (part.latitudes_deg.len(), part.longitudes_deg.len());
    assert!(prows >= 5 && pcols >= 7, "{prows} x {pcols}");
    assert_eq!(part.category.len(), prows * pcols);
    let index = |axis: &[f64], v: f64| {
        axis.iter()
            .position(|&a| (a - v).abs() < 1e-9 || ((a - v).abs() - 360.0).abs() < 1e-9)
            .unwrap_or_else(|| panic!("{v} is not on the grid"))
    };
    for (i, &lat) in part.latitudes_deg.iter().enumerate() {
        let r = index(grid_lats, lat);
        for (j, &lon) in part.longitudes_deg.iter().enumerate() {
            let (k, at) = (i * pcols + j, [r, index(grid_lons, lon)]);
            assert_eq!(part.category[k], grid.category[at], "{at:?}");
            let pairs = [
                (part.thickness_1000_500_m[k], grid.thickness_1000_500[at]),
                (part.thickness_1000_850_m[k], grid.thickness_1000_850[at]),
                (part.thickness_850_700_m[k], grid.thickness_850_700[at]),
                (part.freezing_level_m[k], grid.freezing_level_m[at]),
                (part.wet_bulb_zero_m[k], grid.wet_bulb_zero_m[at]),
            ];
            for (n, (got, want)) in pairs.into_iter().enumerate() {
                assert_eq!(got.to_bits(), want.to_bits(), "value {n} at {at:?}");
            }
        }
    }
    let defaults = area.thresholds.expect("thresholds used");
    // GUIDE §3 common practice: 5400 m, 1300 m, 1540 m.
    assert_eq!(defaults.thickness_1000_500_m, Some(5400.0));
    assert_eq!(defaults.thickness_1000_850_m, Some(1300.0));
    assert_eq!(defaults.thickness_850_700_m, Some(1540.0));

    // A lower critical thickness (many European offices use about 5280 m, GUIDE §3) moves
    // the points the thickness rules decide towards rain; the points whose whole column is
    // below freezing stay snow.
    let european = c
        .get_guidance_area(pb::GuidanceAreaRequest {
            field: Some(selection(DEMO_FILE_NAME, 24)),
            bbox: Some(whole),
            stride: None,
            thresholds: Some(pb::GuidanceThresholds {
                thickness_1000_500_m: Some(5280.0),
                ..Default::default()
            }),
        })
        .await
        .expect("guidance area, 5280 m")
        .into_inner();
    assert_eq!(
        european.thresholds.and_then(|t| t.thickness_1000_500_m),
        Some(5280.0)
    );
    let rain = pb::PrecipitationType::Rain as usize;
    assert_ne!(european.category_counts, area.category_counts);
    assert!(
        european.category_counts[rain] > area.category_counts[rain],
        "more rain points with a 5280 m line: {:?} vs {:?}",
        european.category_counts,
        area.category_counts
    );

    let site = (55.0, -40.0);
    let points = c
        .get_guidance_points(pb::GuidancePointsRequest {
            field: Some(selection(DEMO_FILE_NAME, 24)),
            points: vec![pb::GeoPoint {
                latitude_deg: site.0,
                longitude_deg: site.1,
            }],
            thresholds: None,
        })
        .await
        .expect("guidance points")
        .into_inner();
    assert_eq!(points.caution, CAUTION);
    let local =
        guidance_at_point(&f.demo, site.0, site.1, 4, 0, &GuidanceSettings::default()).unwrap();
    let p = &points.points[0];
    assert_eq!(p.category, i32::from(local.nearest_column.category.code()));
    assert_eq!(p.rule, local.nearest_column.rule.name());
    assert_eq!(p.freezing_level_m, local.freezing_level_m);
    assert_eq!(p.thickness_1000_500_m, local.thickness_1000_500.value_m);

    // A point off the grid is refused as that point: OUT_OF_RANGE, naming `points[1]`.
    let off = c
        .get_guidance_points(pb::GuidancePointsRequest {
            field: Some(selection(DEMO_FILE_NAME, 24)),
            points: vec![
                pb::GeoPoint {
                    latitude_deg: site.0,
                    longitude_deg: site.1,
                },
                pb::GeoPoint {
                    latitude_deg: -60.0,
                    longitude_deg: 120.0,
                },
            ],
            thresholds: None,
        })
        .await
        .expect_err("a point off the grid");
    assert_eq!(off.code(), Code::OutOfRange);
    assert!(off.message().starts_with("points[1]"), "{}", off.message());

    let bad = c
        .get_guidance_area(pb::GuidanceAreaRequest {
            field: Some(selection(DEMO_FILE_NAME, 24)),
            bbox: Some(whole),
            stride: None,
            thresholds: Some(pb::GuidanceThresholds {
                thickness_1000_500_m: Some(f64::NAN),
                ..Default::default()
            }),
        })
        .await
        .expect_err("a NaN threshold");
    assert_eq!(bad.code(), Code::InvalidArgument);
    assert!(
        bad.message().starts_with("thresholds."),
        "{}",
        bad.message()
    );
}

/// A server with an office's own guidance settings answers what the library answers with
/// those settings (thresholds and tiers alike); settings out of range stop it from serving.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_server_with_its_own_guidance_settings_answers_with_them() {
    let f = fixture();
    // 5280 m (GUIDE §3: many European offices, common practice) and a lower limit of the
    // low-ground tier (150 m instead of 300 m): an office's own settings, not only thresholds.
    let office = GuidanceSettings {
        critical_1000_500_m: 5280.0,
        low_ground_max_m: 150.0,
        ..GuidanceSettings::default()
    };
    let (mut c, _stop) = client_with(ServiceConfig {
        guidance: office.clone(),
        ..ServiceConfig::default()
    })
    .await;
    let area = c
        .get_guidance_area(pb::GuidanceAreaRequest {
            field: Some(selection(DEMO_FILE_NAME, 24)),
            bbox: Some(pb::BoundingBox::whole_globe()),
            stride: None,
            thresholds: None,
        })
        .await
        .expect("guidance area")
        .into_inner();
    let want = guidance_grid(&f.demo, 4, 0, &office).expect("library guidance");
    let defaults = guidance_grid(&f.demo, 4, 0, &GuidanceSettings::default()).expect("defaults");
    assert_ne!(
        want.summary(),
        defaults.summary(),
        "the settings change nothing here"
    );
    for (category, n) in &want.summary().categories {
        assert_eq!(
            area.category_counts[usize::from(category.code())],
            *n as u64,
            "{}",
            category.name()
        );
    }
    assert_eq!(
        area.thresholds.and_then(|t| t.thickness_1000_500_m),
        Some(5280.0)
    );

    let listener = tokio::net::TcpListener::bind("127.0.0.1:0")
        .await
        .expect("bind");
    let refused = serve_on(
        listener,
        Arc::clone(&f.store),
        ServiceConfig {
            guidance: GuidanceSettings {
                search_top_hpa: f64::NAN,
                ..GuidanceSettings::default()
            },
            ..ServiceConfig::default()
        },
        std::future::ready(()),
    )
    .await;
    match refused {
        Err(hypsogrid::service::ServiceError::InvalidSetting { setting, message }) => {
            assert_eq!(setting, "guidance");
            assert!(message.contains("search_top_hpa"), "{message}");
        }
        other => panic!("expected an invalid setting, got {other:?}"),
    }
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn ensemble_statistics_over_grpc_equal_the_library_and_refuse_a_deterministic_cycle() {
    let f = fixture();
    let (mut c, _stop) = client().await;
    let stats = [
        EnsembleStatistic::Mean,
        EnsembleStatistic::Spread,
        EnsembleStatistic::ProbabilityBelow(5400.0),
    ];
    let wire_stats = vec![
        pb::EnsembleStatistic {
            kind: Some(pb::ensemble_statistic::Kind::Mean(true)),
        },
        pb::EnsembleStatistic {
            kind: Some(pb::ensemble_statistic::Kind::Spread(true)),
        },
        pb::EnsembleStatistic {
            kind: Some(pb::ensemble_statistic::Kind::ProbabilityBelow(5400.0)),
        },
    ];
    let points = [(55.0, -40.0), (58.0, -30.0)];
    let answer = c
        .get_ensemble_points(pb::EnsemblePointsRequest {
            field: Some(selection(DEMO_ENSEMBLE_FILE_NAME, 48)),
            points: points
                .iter()
                .map(|&(lat, lon)| pb::GeoPoint {
                    latitude_deg: lat,
                    longitude_deg: lon,
                })
                .collect(),
            statistics: wire_stats.clone(),
        })
        .await
        .expect("ensemble points")
        .into_inner();
    assert_eq!(answer.members, 10);
    assert_eq!(
        answer.caution, CAUTION,
        "a probability is rain-snow guidance"
    );
    // Lead time 48 h is the third time step of the ensemble (0, 24, 48 h).
    let local = ensemble_at_points(
        &f.ensemble,
        &points,
        &Quantity::Thickness(LAYER_1000_500),
        2,
        &stats,
    )
    .expect("library ensemble");
    for (wire, lib) in answer.points.iter().zip(&local) {
        assert_eq!(wire.values, lib.values);
        assert_eq!(wire.members_used as usize, lib.members_used);
        // A probability over 10 members is a multiple of 1/10.
        let p = wire.values[2] * 10.0;
        assert!((p - p.round()).abs() < 1e-9, "{p}");
    }

    let area = c
        .get_ensemble_area(pb::EnsembleAreaRequest {
            field: Some(selection(DEMO_ENSEMBLE_FILE_NAME, 48)),
            bbox: Some(pb::BoundingBox {
                south_deg: 54.0,
                north_deg: 56.0,
                west_deg: -41.0,
                east_deg: -39.0,
            }),
            stride: None,
            statistic: Some(wire_stats[2]),
        })
        .await
        .expect("ensemble area")
        .into_inner();
    assert_eq!(
        area.values.len(),
        area.latitudes_deg.len() * area.longitudes_deg.len()
    );
    assert!(area.values.iter().all(|v| (0.0..=1.0).contains(v)));

    let refused = c
        .get_ensemble_points(pb::EnsemblePointsRequest {
            field: Some(selection(DEMO_FILE_NAME, 24)),
            points: vec![pb::GeoPoint {
                latitude_deg: 55.0,
                longitude_deg: -40.0,
            }],
            statistics: wire_stats,
        })
        .await
        .expect_err("a deterministic cycle");
    assert_eq!(refused.code(), Code::FailedPrecondition);
    assert!(
        refused.message().starts_with("field.cycle_id:"),
        "{}",
        refused.message()
    );
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn verification_over_grpc_equals_the_library_and_a_cycle_against_itself_scores_zero() {
    let f = fixture();
    let (mut c, _stop) = client().await;
    // The demo against itself at +24 h: forecast and truth are the same heights.
    let same = c
        .verify(pb::VerifyRequest {
            forecast_cycle_id: DEMO_FILE_NAME.to_string(),
            analysis_cycle_id: DEMO_FILE_NAME.to_string(),
            lead_time_s: Some(0),
            quantities: vec![thickness(LAYER_1000_500)],
            ..Default::default()
        })
        .await;
    match same {
        Ok(r) => {
            let r = r.into_inner();
            assert!(!r.rows.is_empty());
            for row in r.rows.iter().filter(|row| row.count > 0) {
                assert_eq!(row.bias_m, 0.0, "{row:?}");
                assert_eq!(row.rmse_m, 0.0, "{row:?}");
            }
        }
        // A verifier may refuse to compare a cycle with itself at a lead time other than
        // zero; at lead zero it must answer.
        Err(s) => panic!("verify a cycle against itself at lead 0: {s:?}"),
    }

    let Some(gfs) = &f.gfs else {
        return;
    };
    let answer = c
        .verify(pb::VerifyRequest {
            forecast_cycle_id: gfs.id.clone(),
            quantities: vec![pb::Quantity::from(&Quantity::GeopotentialHeight {
                pressure_pa: 50_000.0,
            })],
            ..Default::default()
        })
        .await
        .expect("consistency check")
        .into_inner();
    assert!(answer.analysis_cycle_id.is_empty());
    assert_eq!(answer.truth_source, "file_heights");
    let local = consistency(
        gfs,
        &ConsistencyRequest {
            items: vec![Quantity::GeopotentialHeight {
                pressure_pa: 50_000.0,
            }],
            ..Default::default()
        },
    )
    .expect("library consistency");
    assert_eq!(answer.rows.len(), local.rows.len());
    for (wire, lib) in answer.rows.iter().zip(&local.rows) {
        assert_eq!(wire.region, lib.region);
        assert_eq!(wire.count as usize, lib.scores.count);
        assert_eq!(wire.rmse_m, lib.scores.rmse_m);
        // The project's own measurement on this file (README accuracy table): rms 0.7-1.7 m
        // at 1000-300 hPa from the surface fields.
        assert!(wire.rmse_m < 2.0, "{wire:?}");
    }

    let missing = c
        .verify(pb::VerifyRequest {
            forecast_cycle_id: DEMO_FILE_NAME.to_string(),
            ..Default::default()
        })
        .await
        .expect_err("the demo carries no heights of its own");
    assert_eq!(missing.code(), Code::FailedPrecondition);
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn product_requests_name_the_field_at_fault() {
    let (mut c, _stop) = client().await;
    let no_quantity = c
        .get_isolines(pb::IsolinesRequest {
            field: Some(pb::FieldSelection {
                quantity: None,
                ..selection(DEMO_FILE_NAME, 24)
            }),
            values: vec![5400.0],
            ..Default::default()
        })
        .await
        .expect_err("no quantity");
    assert_eq!(no_quantity.code(), Code::InvalidArgument);
    assert!(
        no_quantity.message().starts_with("field.quantity"),
        "{}",
        no_quantity.message()
    );

    let neither = c
        .get_isolines(pb::IsolinesRequest {
            field: Some(selection(DEMO_FILE_NAME, 24)),
            ..Default::default()
        })
        .await
        .expect_err("neither values nor interval");
    assert_eq!(neither.code(), Code::InvalidArgument);
    assert!(
        neither.message().starts_with("values"),
        "{}",
        neither.message()
    );

    let unknown = c
        .render_chart(pb::ChartRequest {
            field: Some(selection("no_such_cycle.nc", 0)),
            ..Default::default()
        })
        .await
        .expect_err("unknown cycle");
    assert_eq!(unknown.code(), Code::NotFound);

    let lead = c
        .get_isolines(pb::IsolinesRequest {
            field: Some(selection(DEMO_FILE_NAME, 5)),
            values: vec![5400.0],
            ..Default::default()
        })
        .await
        .expect_err("no +5 h step");
    assert_eq!(lead.code(), Code::NotFound);
    assert!(
        lead.message().starts_with("field.time"),
        "{}",
        lead.message()
    );

    let size = c
        .render_chart(pb::ChartRequest {
            field: Some(selection(DEMO_FILE_NAME, 24)),
            width: Some(50),
            ..Default::default()
        })
        .await
        .expect_err("too small");
    assert_eq!(size.code(), Code::InvalidArgument);
    assert!(size.message().starts_with("width"), "{}", size.message());
}
