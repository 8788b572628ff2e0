//! Queries on a loaded cycle (`hypsogrid::query`): area, position, profile and trajectory.
//!
//! Two kinds of check:
//! - consistency with the batch path: on the invented demo scenario (`demo::write_demo_cycle`)
//!   every answer must equal `compute::compute_heights` (or a column rebuilt with
//!   `StepColumns` and `thickness_between`) at the same grid points;
//! - physics against outside sources: a column that follows the U.S. Standard Atmosphere 1976
//!   must give the standard's heights between its levels and above its top, and isothermal
//!   columns must follow the closed-form hypsometric equation (Wallace and Hobbs 2006, §3.2).
//!
//! The small synthetic cycles built below are invented test data.

use std::path::PathBuf;
use std::sync::OnceLock;
use std::time::Instant;

use ndarray::{Array4, Array5};

use hypsogrid::compute::{
    compute_heights, ColumnScratch, ComputeConfig, NoSurfaceReference, StepColumns,
};
use hypsogrid::demo::{write_demo_cycle, DEMO_LEAD_HOURS, DEMO_LEVELS_HPA};
use hypsogrid::ingest::IngestConfig;
use hypsogrid::model::{Cycle, Grid, Layer, Surface, Vertical};
use hypsogrid::physics::column::thickness_between;
use hypsogrid::physics::Constants;
use hypsogrid::query::{
    area, area_rows, area_shape, grid_field, position, profile, trajectory, AreaQuery, BoundingBox,
    Interpolation, Limits, LoadedCycle, PositionQuery, ProfileQuery, Quantity, QueryError,
    TimeSelector, TrajectoryQuery, Waypoint, FLAG_BELOW_GROUND, FLAG_MISSING,
};

// ----- fixtures -----

/// The demo cycle, loaded once for every test of this file.
fn demo() -> &'static LoadedCycle {
    static DEMO: OnceLock<LoadedCycle> = OnceLock::new();
    DEMO.get_or_init(|| {
        let dir = tempfile::tempdir().unwrap();
        let path = write_demo_cycle(dir.path()).unwrap();
        LoadedCycle::load(&path, &IngestConfig::default(), &ComputeConfig::default()).unwrap()
    })
}

fn height(p_hpa: f64) -> Quantity {
    Quantity::GeopotentialHeight {
        pressure_pa: p_hpa * 100.0,
    }
}

fn thickness(bottom_hpa: f64, top_hpa: f64) -> Quantity {
    Quantity::Thickness(Layer {
        bottom_pa: bottom_hpa * 100.0,
        top_pa: top_hpa * 100.0,
    })
}

fn lead(hours: i64) -> TimeSelector {
    TimeSelector::LeadTime {
        seconds: hours * 3600,
    }
}

fn area_query(quantities: Vec<Quantity>, bbox: BoundingBox) -> AreaQuery {
    AreaQuery {
        quantities,
        time: lead(12),
        member: 0,
        bbox,
        stride: 1,
        allow_extrapolation: false,
    }
}

fn demo_box() -> BoundingBox {
    BoundingBox {
        south: 52.0,
        north: 58.0,
        west: -40.0,
        east: -30.0,
    }
}

fn position_query(points: Vec<(f64, f64)>, quantities: Vec<Quantity>) -> PositionQuery {
    PositionQuery {
        points,
        quantities,
        times: vec![lead(0)],
        member: 0,
        interpolation: Interpolation::Bilinear,
        allow_extrapolation: false,
    }
}

/// Index of a coordinate on an axis (exact grid values only).
fn index_of(axis: &[f64], x: f64) -> usize {
    let x = if x > 180.0 && axis.iter().all(|&a| a <= 180.0) {
        x - 360.0
    } else {
        x
    };
    axis.iter()
        .position(|&a| (a - x).abs() < 1e-9 || ((a - x).abs() - 360.0).abs() < 1e-9)
        .unwrap_or_else(|| panic!("{x} not on the axis"))
}

/// An invented isobaric cycle held in memory: temperature `t(member, time, level, row, col)`
/// in K, no humidity; with surface fields when `surface` gives (p_s, z_s) per column.
#[allow(clippy::too_many_arguments)]
fn synthetic(
    latitudes: Vec<f64>,
    longitudes: Vec<f64>,
    levels_pa: Vec<f64>,
    lead_times_s: Vec<i64>,
    reference_time: Option<&str>,
    t: impl Fn(usize, usize, usize, usize, usize) -> f64,
    surface: Option<&dyn Fn(usize, usize) -> (f64, f64)>,
    config: ComputeConfig,
) -> LoadedCycle {
    let (nlat, nlon, nlev, nt) = (
        latitudes.len(),
        longitudes.len(),
        levels_pa.len(),
        lead_times_s.len(),
    );
    let temperature = Array5::from_shape_fn((1, nt, nlev, nlat, nlon), |(m, ti, k, r, c)| {
        t(m, ti, k, r, c) as f32
    });
    let surface = surface.map(|f| Surface {
        pressure_pa: Array4::from_shape_fn((1, nt, nlat, nlon), |(_, _, r, c)| f(r, c).0 as f32),
        height_m: Array4::from_shape_fn((1, nt, nlat, nlon), |(_, _, r, c)| f(r, c).1 as f32),
    });
    let cycle = Cycle {
        source: PathBuf::from("synthetic.nc"),
        reference_time: reference_time.map(str::to_string),
        lead_times_s,
        members: 1,
        grid: Grid {
            latitudes,
            longitudes,
        },
        vertical: Vertical::Isobaric {
            pressure_pa: levels_pa,
        },
        levels_top_down_in_file: false,
        temperature,
        humidity: None,
        surface,
        file_heights: None,
        constants: Constants::us_standard_atmosphere_1976(),
        variables: Vec::new(),
        notes: Vec::new(),
    };
    LoadedCycle::computed("synthetic.nc", cycle, &config).unwrap()
}

fn standard_reference() -> ComputeConfig {
    ComputeConfig {
        no_surface_reference: NoSurfaceReference::StandardAtmosphere,
        ..ComputeConfig::default()
    }
}

/// R_d / g0 of the U.S. Standard Atmosphere 1976: R* = 8.31432 J mol-1 K-1,
/// M0 = 0.0289644 kg mol-1, g0 = 9.80665 m s-2 (NOAA/NASA/USAF 1976, Table 2).
fn rd_over_g0_1976() -> f64 {
    8.31432 / 0.0289644 / 9.80665
}

// ----- area -----

#[test]
fn area_values_equal_the_batch_output_at_the_selected_points() {
    let lc = demo();
    let layers = vec![
        Layer {
            bottom_pa: 100_000.0,
            top_pa: 50_000.0,
        },
        Layer {
            bottom_pa: 87_000.0,
            top_pa: 62_000.0,
        },
    ];
    let batch = compute_heights(
        &lc.cycle,
        &ComputeConfig {
            layers: layers.clone(),
            ..ComputeConfig::default()
        },
        &|_| {},
    )
    .unwrap();
    let q = area_query(
        vec![
            height(500.0),
            height(1000.0),
            thickness(1000.0, 500.0),
            thickness(870.0, 620.0),
        ],
        demo_box(),
    );
    let a = area(lc, &q, &Limits::default()).unwrap();
    let t = DEMO_LEAD_HOURS.iter().position(|&h| h == 12).unwrap();
    assert_eq!(a.time_index, t);
    assert_eq!(a.lead_time_s, 12 * 3600);
    // 0.25 degree grid: 25 rows from 58 to 52 N, 41 columns from 40 to 30 W.
    assert_eq!((a.latitudes.len(), a.longitudes.len()), (25, 41));
    assert_eq!(a.latitudes.first(), Some(&58.0));
    assert_eq!(a.longitudes.first(), Some(&-40.0));
    let k500 = DEMO_LEVELS_HPA.iter().position(|&p| p == 500.0).unwrap();
    let mut below_seen = 0;
    for (i, &lat) in a.latitudes.iter().enumerate() {
        for (j, &lon) in a.longitudes.iter().enumerate() {
            let r = index_of(&lc.cycle.grid.latitudes, lat);
            let c = index_of(&lc.cycle.grid.longitudes, lon);
            let n = i * a.longitudes.len() + j;
            // On-level heights come straight from the batch output, bit for bit.
            let z = batch.geopotential_height[[0, t, k500, r, c]];
            assert_eq!(a.fields[0].values[n].to_bits(), z.to_bits());
            let z0 = batch.geopotential_height[[0, t, 0, r, c]];
            assert_eq!(a.fields[1].values[n].to_bits(), z0.to_bits());
            let b0 = batch.below_ground[[0, t, 0, r, c]] != 0;
            assert_eq!(a.fields[1].flags[n] & FLAG_BELOW_GROUND != 0, b0);
            below_seen += usize::from(b0);
            // On-level thickness equals the batch thickness to f32 rounding.
            let th = batch.thickness[0].values[[0, t, r, c]];
            assert!(
                (a.fields[2].values[n] - th).abs() <= 2e-3,
                "{} vs {th}",
                a.fields[2].values[n]
            );
            assert_eq!(
                a.fields[2].flags[n] & FLAG_BELOW_GROUND != 0,
                batch.thickness[0].below_ground[[0, t, r, c]] != 0
            );
            // Off-level thickness is the batch's own computation on the same column.
            let th2 = batch.thickness[1].values[[0, t, r, c]];
            assert_eq!(a.fields[3].values[n].to_bits(), th2.to_bits());
        }
    }
    // The box holds the ridge and the plateau, so 1000 hPa is below ground somewhere.
    assert!(below_seen > 0);
}

#[test]
fn off_level_pressures_match_a_column_built_the_batch_way() {
    let lc = demo();
    let q = AreaQuery {
        time: lead(36),
        ..area_query(vec![height(433.0), thickness(962.5, 512.5)], demo_box())
    };
    let a = area(lc, &q, &Limits::default()).unwrap();
    let t = a.time_index;
    let step = StepColumns::new(&lc.cycle, &lc.config, 0, t).unwrap();
    let mut scratch = ColumnScratch::new(DEMO_LEVELS_HPA.len());
    let c = lc.cycle.constants;
    for (i, &lat) in a.latitudes.iter().enumerate().step_by(4) {
        for (j, &lon) in a.longitudes.iter().enumerate().step_by(5) {
            let (r, col) = (
                index_of(&lc.cycle.grid.latitudes, lat),
                index_of(&lc.cycle.grid.longitudes, lon),
            );
            step.build(r, col, &mut scratch);
            let n = i * a.longitudes.len() + j;
            let z = scratch.nodes.height_at_pressure(43_300.0, &c).unwrap();
            assert_eq!(a.fields[0].values[n], z.height_m as f32);
            let th = thickness_between(&scratch.nodes, 96_250.0, 51_250.0, &c).unwrap();
            assert_eq!(a.fields[1].values[n], th as f32);
            // 433 hPa lies between the 450 and 400 hPa levels, and so does its height.
            let k450 = DEMO_LEVELS_HPA.iter().position(|&p| p == 450.0).unwrap();
            assert!(z.height_m > scratch.height[k450] && z.height_m < scratch.height[k450 + 1]);
        }
    }
}

/// Pressures near the ground need only the lowest levels of a column, and an area of them
/// builds only those (`StepColumns::build_lowest`); over high ground the build must still
/// reach the lowest level above the ground. Every column of the demo grid, against the
/// whole column built the batch way.
#[test]
fn pressures_near_the_ground_match_whole_columns_even_over_high_ground() {
    let lc = demo();
    let whole = BoundingBox {
        south: -90.0,
        north: 90.0,
        west: -180.0,
        east: 180.0,
    };
    let q = AreaQuery {
        allow_extrapolation: true,
        ..area_query(vec![height(987.5), thickness(1012.0, 962.5)], whole)
    };
    let a = area(lc, &q, &Limits::default()).unwrap();
    let step = StepColumns::new(&lc.cycle, &lc.config, 0, a.time_index).unwrap();
    let mut scratch = ColumnScratch::new(DEMO_LEVELS_HPA.len());
    let c = lc.cycle.constants;
    let surface = lc.cycle.surface.as_ref().unwrap();
    let mut high_ground = 0;
    for (i, &lat) in a.latitudes.iter().enumerate() {
        for (j, &lon) in a.longitudes.iter().enumerate() {
            let (r, col) = (
                index_of(&lc.cycle.grid.latitudes, lat),
                index_of(&lc.cycle.grid.longitudes, lon),
            );
            step.build(r, col, &mut scratch);
            let n = i * a.longitudes.len() + j;
            let z = scratch.nodes.height_at_pressure(98_750.0, &c).unwrap();
            assert_eq!(
                a.fields[0].values[n].to_bits(),
                (z.height_m as f32).to_bits()
            );
            let th = thickness_between(&scratch.nodes, 101_200.0, 96_250.0, &c).unwrap();
            assert_eq!(a.fields[1].values[n].to_bits(), (th as f32).to_bits());
            // Columns whose lowest level above ground is 850 hPa or higher.
            if surface.pressure_pa[[0, 0, r, col]] < 90_000.0 {
                high_ground += 1;
            }
        }
    }
    assert!(high_ground > 0, "the demo grid has no high ground");
}

/// A position query of many points (answered in runs on several threads) gives, point for
/// point and in order, what each point gives asked alone (answered on the calling thread):
/// heights on and between levels and a thickness rebuilt, two lead times, bilinear.
#[test]
fn many_points_answer_as_each_point_alone() {
    let lc = demo();
    let points: Vec<(f64, f64)> = (0..700)
        .map(|i| {
            let (a, b) = ((i % 35) as f64, (i / 35) as f64);
            (52.1 + a * 0.17, -39.9 + b * 0.49)
        })
        .collect();
    let quantities = vec![height(500.0), height(433.0), thickness(962.5, 512.5)];
    let ask = |points: Vec<(f64, f64)>| {
        let q = PositionQuery {
            times: vec![lead(0), lead(36)],
            allow_extrapolation: true,
            ..position_query(points, quantities.clone())
        };
        position(lc, &q, &Limits::default()).unwrap()
    };
    let bits = |s: &hypsogrid::query::Sample| {
        let values: Vec<u64> = s.values.iter().map(|v| v.to_bits()).collect();
        (s.lead_time_s, s.valid_time_unix_s, values, s.flags.clone())
    };
    let together = ask(points.clone());
    assert_eq!(together.len(), points.len());
    for (i, (series, &point)) in together.iter().zip(&points).enumerate() {
        let alone = ask(vec![point]).remove(0);
        assert_eq!((series.latitude, series.longitude), point, "point {i}");
        assert_eq!(series.samples.len(), 2, "point {i}");
        for (a, b) in series.samples.iter().zip(&alone.samples) {
            assert_eq!(bits(a), bits(b), "point {i}");
        }
    }
}

#[test]
fn stride_thins_both_axes_and_chunks_rebuild_the_whole() {
    let lc = demo();
    let full = area(
        lc,
        &area_query(vec![thickness(1000.0, 500.0)], demo_box()),
        &Limits::default(),
    )
    .unwrap();
    let q = AreaQuery {
        stride: 3,
        ..area_query(vec![thickness(1000.0, 500.0)], demo_box())
    };
    let shape = area_shape(lc, &q).unwrap();
    assert_eq!((shape.rows, shape.cols), (9, 14));
    // Both bounds on levels: copied from the stored heights. A pressure between levels (the
    // demo's levels are whole tens of hPa) rebuilds columns.
    assert!(shape.stored);
    let between = area_query(vec![thickness(1000.0, 500.0), height(912.4)], demo_box());
    assert!(!area_shape(lc, &between).unwrap().stored);
    let thin = area(lc, &q, &Limits::default()).unwrap();
    let nf = full.longitudes.len();
    for (i, &lat) in thin.latitudes.iter().enumerate() {
        assert_eq!(lat, full.latitudes[3 * i]);
        for (j, &lon) in thin.longitudes.iter().enumerate() {
            assert_eq!(lon, full.longitudes[3 * j]);
            let v = thin.fields[0].values[i * thin.longitudes.len() + j];
            assert_eq!(v, full.fields[0].values[3 * i * nf + 3 * j]);
        }
    }
    // Streaming: chunks of rows concatenate to the whole answer.
    let mut values = Vec::new();
    let mut lats = Vec::new();
    for start in (0..9).step_by(4) {
        let part = area_rows(lc, &q, start, (start + 4).min(9)).unwrap();
        assert_eq!(part.longitudes, thin.longitudes);
        lats.extend(part.latitudes);
        values.extend(part.fields[0].values.iter().copied());
    }
    assert_eq!(lats, thin.latitudes);
    assert_eq!(values, thin.fields[0].values);
    assert!(matches!(
        area_rows(lc, &q, 5, 10),
        Err(QueryError::InvalidArgument { field, .. }) if field == "row_end"
    ));
}

/// A global grid whose temperature identifies the column: 10 degree columns, three rows
/// listed south to north. The height at 500 hPa then tells which column a value came from.
fn global(longitudes: Vec<f64>) -> LoadedCycle {
    synthetic(
        vec![-10.0, 0.0, 10.0],
        longitudes,
        vec![100_000.0, 50_000.0],
        vec![0],
        None,
        |_, _, _, r, c| 220.0 + c as f64 + 0.25 * r as f64,
        None,
        standard_reference(),
    )
}

#[test]
fn a_box_across_the_antimeridian_selects_the_right_columns_in_order() {
    let east_360: Vec<f64> = (0..36).map(|i| 10.0 * i as f64).collect();
    let east_180: Vec<f64> = (0..36).map(|i| -180.0 + 10.0 * i as f64).collect();
    let cases = [
        // (grid, box west, box east, expected longitudes, expected grid columns)
        (
            &east_360,
            160.0,
            -160.0,
            vec![160.0, 170.0, 180.0, -170.0, -160.0],
            vec![16, 17, 18, 19, 20],
        ),
        (
            &east_180,
            160.0,
            -160.0,
            vec![160.0, 170.0, 180.0, -170.0, -160.0],
            vec![34, 35, 0, 1, 2],
        ),
        (
            &east_360,
            160.0,
            200.0,
            vec![160.0, 170.0, 180.0, 190.0, 200.0],
            vec![16, 17, 18, 19, 20],
        ),
        (
            &east_360,
            350.0,
            10.0,
            vec![350.0, 0.0, 10.0],
            vec![35, 0, 1],
        ),
        (
            &east_180,
            -10.0,
            10.0,
            vec![-10.0, 0.0, 10.0],
            vec![17, 18, 19],
        ),
    ];
    for (grid, west, east, lons, cols) in cases {
        let lc = global(grid.clone());
        let q = AreaQuery {
            time: lead(0),
            ..area_query(
                vec![height(500.0)],
                BoundingBox {
                    south: -10.0,
                    north: 10.0,
                    west,
                    east,
                },
            )
        };
        let a = area(&lc, &q, &Limits::default()).unwrap();
        assert_eq!(a.longitudes, lons, "box {west}..{east}");
        // Latitudes north to south although the grid lists them south to north.
        assert_eq!(a.latitudes, vec![10.0, 0.0, -10.0]);
        for (i, r) in [2usize, 1, 0].into_iter().enumerate() {
            for (j, &c) in cols.iter().enumerate() {
                let z = lc.heights.ready(0, 0).unwrap().geopotential_height[[1, r, c]];
                assert_eq!(
                    a.fields[0].values[i * cols.len() + j],
                    z,
                    "box {west}..{east} col {c}"
                );
            }
        }
    }
}

// ----- position -----

#[test]
fn bilinear_and_nearest_follow_the_closed_form_of_isothermal_columns() {
    // Isothermal columns anchored at one height: Z(500) - Z(1000) = (R_d T / g0) ln 2
    // (hypsometric equation, Wallace and Hobbs 2006, §3.2), linear in T and so in longitude
    // when T is; bilinear interpolation must reproduce it between columns.
    let lc = synthetic(
        vec![40.0, 41.0],
        vec![10.0, 11.0, 12.0],
        vec![100_000.0, 50_000.0],
        vec![0],
        None,
        |_, _, _, _, c| 240.0 + 10.0 * c as f64,
        None,
        standard_reference(),
    );
    let z1000 = f64::from(lc.heights.ready(0, 0).unwrap().geopotential_height[[0, 0, 0]]);
    let closed = |t: f64| z1000 + rd_over_g0_1976() * t * 2f64.ln();
    let mut q = position_query(
        vec![(40.5, 10.25), (40.5, 11.75)],
        vec![height(500.0), thickness(1000.0, 500.0)],
    );
    let bilinear = position(&lc, &q, &Limits::default()).unwrap();
    let t_at = |lon: f64| 240.0 + 10.0 * (lon - 10.0);
    for (series, lon) in bilinear.iter().zip([10.25, 11.75]) {
        let v = &series.samples[0].values;
        assert!(
            (v[0] - closed(t_at(lon))).abs() < 1e-3,
            "{} vs {}",
            v[0],
            closed(t_at(lon))
        );
        assert!((v[1] - rd_over_g0_1976() * t_at(lon) * 2f64.ln()).abs() < 1e-3);
    }
    q.interpolation = Interpolation::Nearest;
    let nearest = position(&lc, &q, &Limits::default()).unwrap();
    // 10.25 is nearest to column 0 (10 E), 11.75 to column 2 (12 E).
    for (series, c) in nearest.iter().zip([0usize, 2]) {
        let z = lc.heights.ready(0, 0).unwrap().geopotential_height[[1, 1, c]];
        assert_eq!(series.samples[0].values[0], f64::from(z));
    }
}

#[test]
fn a_time_series_covers_every_lead_time_when_none_is_named() {
    let lc = demo();
    let (lat, lon) = (55.0, -35.0);
    let q = PositionQuery {
        times: Vec::new(),
        ..position_query(
            vec![(lat, lon)],
            vec![height(700.0), thickness(1000.0, 500.0)],
        )
    };
    let series = position(lc, &q, &Limits::default()).unwrap();
    assert_eq!(series.len(), 1);
    assert_eq!((series[0].latitude, series[0].longitude), (lat, lon));
    let leads: Vec<i64> = series[0].samples.iter().map(|s| s.lead_time_s).collect();
    let expected: Vec<i64> = DEMO_LEAD_HOURS
        .iter()
        .map(|&h| i64::from(h) * 3600)
        .collect();
    assert_eq!(leads, expected);
    let r = index_of(&lc.cycle.grid.latitudes, lat);
    let c = index_of(&lc.cycle.grid.longitudes, lon);
    let k700 = DEMO_LEVELS_HPA.iter().position(|&p| p == 700.0).unwrap();
    let k500 = DEMO_LEVELS_HPA.iter().position(|&p| p == 500.0).unwrap();
    let reference = lc.reference_time_unix_s().unwrap();
    for (t, s) in series[0].samples.iter().enumerate() {
        // A point on a grid point takes that grid point's value.
        let z = lc.heights.ready(0, t).unwrap().geopotential_height[[k700, r, c]];
        assert_eq!(s.values[0], f64::from(z));
        let th = lc.heights.ready(0, t).unwrap().geopotential_height[[k500, r, c]]
            - lc.heights.ready(0, t).unwrap().geopotential_height[[0, r, c]];
        assert!((s.values[1] - f64::from(th)).abs() < 2e-3);
        assert_eq!(s.valid_time_unix_s, Some(reference + s.lead_time_s));
    }
    // The demo's reference time, 2031-01-14 00:00 UTC, is 1926115200 s after the Unix epoch:
    // 61 years of 365 days plus 15 leap days (1972 to 2028) plus 13 days, 22293 days of
    // 86400 s (proleptic Gregorian calendar, ISO 8601).
    assert_eq!(reference, 1_926_115_200);
}

// ----- profile -----

#[test]
fn a_profile_lists_the_batch_column_bottom_up() {
    let lc = demo();
    let (lat, lon) = (58.75, -29.5);
    let q = ProfileQuery {
        latitude: lat,
        longitude: lon,
        time: lead(24),
        member: 0,
        interpolation: Interpolation::Nearest,
    };
    let p = profile(lc, &q).unwrap();
    let t = DEMO_LEAD_HOURS.iter().position(|&h| h == 24).unwrap();
    let r = index_of(&lc.cycle.grid.latitudes, lat);
    let c = index_of(&lc.cycle.grid.longitudes, lon);
    assert_eq!(p.levels.len(), DEMO_LEVELS_HPA.len());
    let surface = lc.cycle.surface.as_ref().unwrap();
    assert_eq!(
        p.surface_pressure_pa,
        Some(f64::from(surface.pressure_pa[[0, t, r, c]]))
    );
    assert_eq!(
        p.surface_height_m,
        Some(f64::from(surface.height_m[[0, t, r, c]]))
    );
    let mut below = 0;
    for (k, level) in p.levels.iter().enumerate() {
        assert_eq!(level.pressure_pa, DEMO_LEVELS_HPA[k] * 100.0);
        assert_eq!(
            level.geopotential_height_m as f32,
            lc.heights.ready(0, t).unwrap().geopotential_height[[k, r, c]]
        );
        assert_eq!(
            level.below_ground,
            lc.heights.ready(0, t).unwrap().below_ground[[k, r, c]] != 0
        );
        below += usize::from(level.below_ground);
        if !level.below_ground {
            // Above ground the file's temperature is there, and humidity only warms T_v.
            let tk = f64::from(lc.cycle.temperature[[0, t, k, r, c]]);
            assert_eq!(level.temperature_k, tk);
            assert!(level.virtual_temperature_k >= tk && level.virtual_temperature_k < tk + 5.0);
        }
        assert!(level.virtual_temperature_k.is_finite());
    }
    // The plateau is about 1150 m high: the lowest levels are below its ground.
    assert!(below >= 1);
    // Bilinear: each height is the weighted mean of the four surrounding columns.
    let qb = ProfileQuery {
        latitude: lat + 0.1,
        longitude: lon + 0.05,
        interpolation: Interpolation::Bilinear,
        ..q
    };
    let pb = profile(lc, &qb).unwrap();
    let (fr, fc) = (0.4, 0.2);
    let r2 = index_of(&lc.cycle.grid.latitudes, lat + 0.25);
    for (k, level) in pb.levels.iter().enumerate() {
        let z = |r: usize, c: usize| {
            f64::from(lc.heights.ready(0, t).unwrap().geopotential_height[[k, r, c]])
        };
        let expected = (1.0 - fr) * ((1.0 - fc) * z(r, c) + fc * z(r, c + 1))
            + fr * ((1.0 - fc) * z(r2, c) + fc * z(r2, c + 1));
        assert!(
            (level.geopotential_height_m - expected).abs() < 1e-2,
            "level {k}"
        );
    }
}

// ----- trajectory -----

#[test]
fn a_trajectory_interpolates_linearly_in_time() {
    // Isothermal columns whose temperature rises 2 K per 6 h step: the 500 hPa height is
    // linear in T (hypsometric equation, Wallace and Hobbs 2006, §3.2), so linear in time.
    let six_h = 6 * 3600;
    let lc = synthetic(
        vec![0.0, 1.0],
        vec![0.0, 1.0],
        vec![100_000.0, 50_000.0],
        vec![0, six_h, 2 * six_h],
        Some("2030-03-01T00:00:00Z"),
        |_, t, _, _, _| 250.0 + 2.0 * t as f64,
        None,
        standard_reference(),
    );
    let t0 = lc.reference_time_unix_s().unwrap();
    let z1000 = f64::from(lc.heights.ready(0, 0).unwrap().geopotential_height[[0, 0, 0]]);
    let expected = |dt: i64| {
        let temperature = 250.0 + 2.0 * dt as f64 / six_h as f64;
        z1000 + rd_over_g0_1976() * temperature * 2f64.ln()
    };
    let offsets = [0, 3 * 3600, 6 * 3600, 9 * 3600 + 900, 12 * 3600];
    let q = TrajectoryQuery {
        waypoints: offsets
            .iter()
            .enumerate()
            .map(|(i, &dt)| Waypoint {
                latitude: 0.2 * i as f64,
                longitude: 0.9 - 0.2 * i as f64,
                valid_time_unix_s: t0 + dt,
            })
            .collect(),
        quantities: vec![height(500.0), height(700.0)],
        member: 0,
        interpolation: Interpolation::Bilinear,
        allow_extrapolation: false,
    };
    let samples = trajectory(&lc, &q, &Limits::default()).unwrap();
    assert_eq!(samples.len(), offsets.len());
    for (s, &dt) in samples.iter().zip(&offsets) {
        assert!(
            (s.values[0] - expected(dt)).abs() < 2e-3,
            "{dt}: {} vs {}",
            s.values[0],
            expected(dt)
        );
        assert_eq!(s.flags, vec![0, 0]);
        // 700 hPa is between the levels: the isothermal closed form again.
        let t = 250.0 + 2.0 * dt as f64 / six_h as f64;
        let z700 = z1000 + rd_over_g0_1976() * t * (1000.0f64 / 700.0).ln();
        assert!((s.values[1] - z700).abs() < 2e-3);
    }
    // Outside the valid times: out of range, naming the waypoint.
    let mut late = q.clone();
    late.waypoints[4].valid_time_unix_s = t0 + 13 * 3600;
    assert!(matches!(
        trajectory(&lc, &late, &Limits::default()),
        Err(QueryError::OutOfRange { field, .. }) if field == "waypoints[4].valid_time_unix_s"
    ));
    let mut backwards = q.clone();
    backwards.waypoints[2].valid_time_unix_s = t0;
    assert!(matches!(
        trajectory(&lc, &backwards, &Limits::default()),
        Err(QueryError::InvalidArgument { field, .. }) if field == "waypoints[2].valid_time_unix_s"
    ));
}

// ----- physics against the standard atmosphere -----

/// A long route whose columns are rebuilt (a height between levels) is answered in runs of
/// waypoints on several threads: waypoint for waypoint, and in order, what each waypoint
/// gives as a route of its own (answered on the calling thread), bit for bit.
#[test]
fn a_long_route_answers_as_each_waypoint_alone() {
    let lc = demo();
    let t0 = lc.reference_time_unix_s().unwrap();
    let n = 700;
    let waypoints: Vec<Waypoint> = (0..n)
        .map(|i| Waypoint {
            latitude: 52.0 + 6.0 * i as f64 / n as f64,
            longitude: -40.0 + 10.0 * ((i * 37) % n) as f64 / n as f64,
            valid_time_unix_s: t0 + 12 * 3600 + (i as i64) * 60,
        })
        .collect();
    let q = TrajectoryQuery {
        waypoints: waypoints.clone(),
        quantities: vec![height(433.0), thickness(1000.0, 500.0)],
        member: 0,
        interpolation: Interpolation::Bilinear,
        allow_extrapolation: false,
    };
    let all = trajectory(lc, &q, &Limits::default()).unwrap();
    assert_eq!(all.len(), n);
    for (i, (sample, w)) in all.iter().zip(&waypoints).enumerate().step_by(7) {
        let alone = TrajectoryQuery {
            waypoints: vec![*w],
            ..q.clone()
        };
        let one = trajectory(lc, &alone, &Limits::default()).unwrap();
        assert_eq!(sample.waypoint, *w, "waypoint {i}");
        let bits = |s: &hypsogrid::query::TrajectorySample| {
            s.values.iter().map(|v| v.to_bits()).collect::<Vec<_>>()
        };
        assert_eq!(bits(sample), bits(&one[0]), "waypoint {i}");
        assert_eq!(sample.flags, one[0].flags, "waypoint {i}");
        assert!(sample.values.iter().all(|v| v.is_finite()), "waypoint {i}");
    }
}

/// Temperature of the U.S. Standard Atmosphere 1976 at a pressure in its lowest two layers:
/// `T = 288.15 (p / 101325)^(R* L / (g0 M0))` below 11 km' (L = 6.5 K/km', exponent
/// 0.190263), 216.65 K from 11 to 20 km' (22632 Pa to 5474.9 Pa) (NOAA/NASA/USAF 1976,
/// eqs. 23 and 33a, Table 4).
fn standard_temperature(p_pa: f64) -> f64 {
    if p_pa >= 22_632.06 {
        288.15 * (p_pa / 101_325.0).powf(8.31432 * 0.0065 / (9.80665 * 0.0289644))
    } else {
        216.65
    }
}

#[test]
fn a_standard_atmosphere_column_gives_the_standard_heights_between_and_above_its_levels() {
    // Levels at 1000, 850, 500, 300 and 200 hPa; the query asks for 925, 700 and 400 hPa,
    // which lie between tropospheric levels, where the constant-lapse-rate interpolation is
    // exact. Mandatory-level heights of the U.S. Standard Atmosphere 1976 derived from its
    // definitions (GUIDE §2): 925 hPa 762.0 m, 700 hPa 3012.2 m, 400 hPa 7185.4 m,
    // 1000 hPa 110.9 m, 500 hPa 5574.4 m, 200 hPa 11784.0 m, 100 hPa 16179.7 m.
    let levels = vec![100_000.0, 85_000.0, 50_000.0, 30_000.0, 20_000.0];
    let temps = levels.clone();
    let lc = synthetic(
        vec![45.0, 46.0],
        vec![5.0, 6.0],
        levels,
        vec![0],
        None,
        move |_, _, k, _, _| standard_temperature(temps[k]),
        None,
        standard_reference(),
    );
    let q = position_query(
        vec![(45.5, 5.5)],
        vec![
            height(925.0),
            height(700.0),
            height(400.0),
            thickness(1000.0, 500.0),
        ],
    );
    let v = &position(&lc, &q, &Limits::default()).unwrap()[0].samples[0].values;
    for (got, want) in v.iter().zip([762.0, 3012.2, 7185.4, 5574.4 - 110.9]) {
        assert!((got - want).abs() < 0.15, "{got} vs {want}");
    }
    // Above the top level: refused unless extrapolation is asked for, then isothermal, as
    // the standard is from 11 to 20 km'.
    let mut q = position_query(vec![(45.5, 5.5)], vec![thickness(200.0, 100.0)]);
    assert!(matches!(
        position(&lc, &q, &Limits::default()),
        Err(QueryError::OutOfRange { field, .. }) if field == "quantities[0].thickness.top_pa"
    ));
    q.allow_extrapolation = true;
    let v = position(&lc, &q, &Limits::default()).unwrap()[0].samples[0].values[0];
    assert!((v - (16_179.7 - 11_784.0)).abs() < 0.2, "{v}");
}

#[test]
fn below_ground_extrapolation_is_flagged_and_refused_unless_asked_for() {
    // Surface at 950 hPa and 500 m (invented): 1000 hPa lies below ground.
    let lc = synthetic(
        vec![0.0, 1.0],
        vec![0.0, 1.0],
        vec![100_000.0, 85_000.0, 50_000.0],
        vec![0],
        None,
        |_, _, k, _, _| [285.0, 275.0, 250.0][k],
        Some(&|_, _| (95_000.0, 500.0)),
        ComputeConfig::default(),
    );
    // On the levels: the batch's below-ground convention, flagged.
    let q = position_query(vec![(0.5, 0.5)], vec![height(1000.0), height(975.0)]);
    let s = &position(&lc, &q, &Limits::default()).unwrap()[0].samples[0];
    assert_eq!(s.flags, vec![FLAG_BELOW_GROUND, FLAG_BELOW_GROUND]);
    assert!(s.values[0] < s.values[1] && s.values[1] < 500.0);
    // Below the lowest level: out of range, or extrapolated at 6.5 K/km when asked for.
    let mut q = position_query(vec![(0.5, 0.5)], vec![height(1030.0)]);
    assert!(matches!(
        position(&lc, &q, &Limits::default()),
        Err(QueryError::OutOfRange { field, .. }) if field == "quantities[0].geopotential_height.pressure_pa"
    ));
    q.allow_extrapolation = true;
    let s = &position(&lc, &q, &Limits::default()).unwrap()[0].samples[0];
    assert_eq!(s.flags, vec![FLAG_BELOW_GROUND]);
    assert!(
        s.values[0] < f64::from(lc.heights.ready(0, 0).unwrap().geopotential_height[[0, 0, 0]])
    );
}

#[test]
fn a_masked_corner_masks_a_bilinear_value_but_not_the_nearest() {
    let lc = synthetic(
        vec![0.0, 1.0],
        vec![0.0, 1.0],
        vec![100_000.0, 50_000.0],
        vec![0],
        None,
        |_, _, k, r, c| {
            if (k, r, c) == (1, 1, 1) {
                f64::NAN
            } else {
                250.0
            }
        },
        None,
        standard_reference(),
    );
    let mut q = position_query(
        vec![(0.2, 0.2), (0.0, 0.0)],
        vec![height(500.0), height(1000.0)],
    );
    let s = position(&lc, &q, &Limits::default()).unwrap();
    assert!(s[0].samples[0].values[0].is_nan());
    assert_eq!(s[0].samples[0].flags, vec![FLAG_MISSING, 0]);
    // Exactly on a grid point the masked corner has no weight.
    assert!(s[1].samples[0].values[0].is_finite());
    q.interpolation = Interpolation::Nearest;
    let s = position(&lc, &q, &Limits::default()).unwrap();
    assert_eq!(s[0].samples[0].flags, vec![0, 0]);
}

// ----- errors -----

fn field_of(e: QueryError) -> (&'static str, String) {
    match e {
        QueryError::InvalidArgument { field, .. } => ("invalid", field),
        QueryError::NotFound { field, .. } => ("not_found", field),
        QueryError::OutOfRange { field, .. } => ("out_of_range", field),
        QueryError::ResourceExhausted { field, .. } => ("exhausted", field),
        QueryError::HeightsUnavailable { detail } => ("unavailable", detail),
    }
}

#[test]
fn every_error_names_its_field() {
    let lc = demo();
    let ok = area_query(vec![height(500.0)], demo_box());
    let limits = Limits::default();
    let area_cases: Vec<(AreaQuery, &str, &str)> = vec![
        (
            AreaQuery {
                bbox: BoundingBox {
                    south: 58.0,
                    north: 52.0,
                    ..demo_box()
                },
                ..ok.clone()
            },
            "invalid",
            "bbox.south",
        ),
        (
            AreaQuery {
                bbox: BoundingBox {
                    north: 91.0,
                    ..demo_box()
                },
                ..ok.clone()
            },
            "invalid",
            "bbox.north",
        ),
        (
            AreaQuery {
                bbox: BoundingBox {
                    west: f64::NAN,
                    ..demo_box()
                },
                ..ok.clone()
            },
            "invalid",
            "bbox.west",
        ),
        (
            AreaQuery {
                stride: 0,
                ..ok.clone()
            },
            "invalid",
            "stride",
        ),
        (
            AreaQuery {
                quantities: vec![],
                ..ok.clone()
            },
            "invalid",
            "quantities",
        ),
        (
            AreaQuery {
                quantities: vec![height(500.0), thickness(500.0, 700.0)],
                ..ok.clone()
            },
            "invalid",
            "quantities[1].thickness.top_pa",
        ),
        (
            AreaQuery {
                quantities: vec![height(f64::NAN)],
                ..ok.clone()
            },
            "invalid",
            "quantities[0].geopotential_height.pressure_pa",
        ),
        (
            AreaQuery {
                quantities: vec![height(-5.0)],
                ..ok.clone()
            },
            "invalid",
            "quantities[0].geopotential_height.pressure_pa",
        ),
        (
            AreaQuery {
                member: 1,
                ..ok.clone()
            },
            "not_found",
            "member",
        ),
        (
            AreaQuery {
                time: lead(3),
                ..ok.clone()
            },
            "not_found",
            "lead_time",
        ),
        (
            AreaQuery {
                time: TimeSelector::ValidTime { unix_seconds: 0 },
                ..ok.clone()
            },
            "not_found",
            "valid_time",
        ),
        (
            AreaQuery {
                quantities: vec![height(1050.0)],
                ..ok.clone()
            },
            "out_of_range",
            "quantities[0].geopotential_height.pressure_pa",
        ),
        (
            AreaQuery {
                quantities: vec![thickness(1000.0, 50.0)],
                ..ok.clone()
            },
            "out_of_range",
            "quantities[0].thickness.top_pa",
        ),
        (
            AreaQuery {
                bbox: BoundingBox {
                    south: 10.0,
                    north: 20.0,
                    ..demo_box()
                },
                ..ok.clone()
            },
            "out_of_range",
            "bbox",
        ),
    ];
    for (q, kind, field) in area_cases {
        let e = area(lc, &q, &limits).unwrap_err();
        assert_eq!(field_of(e.clone()), (kind, field.to_string()), "{e}");
        // The message starts with the field, is one lowercase line and names what is wrong.
        let text = e.to_string();
        assert!(text.starts_with(&format!("{field}: ")), "{text}");
        assert!(!text.contains('\n') && !text.ends_with('.'), "{text}");
    }
    let e = area(
        lc,
        &AreaQuery {
            time: lead(3),
            ..ok.clone()
        },
        &limits,
    )
    .unwrap_err();
    assert!(e.to_string().contains("0, 21600, 43200"), "{e}");
    let e = area(lc, &ok, &Limits { max_points: 10 }).unwrap_err();
    assert_eq!(field_of(e), ("exhausted", "bbox".to_string()));

    let p = position_query(vec![(55.0, -35.0), (95.0, -35.0)], vec![height(500.0)]);
    let point_cases: Vec<(PositionQuery, &str, &str)> = vec![
        (p.clone(), "invalid", "points[1].latitude"),
        (
            PositionQuery {
                points: vec![(55.0, f64::INFINITY)],
                ..p.clone()
            },
            "invalid",
            "points[0].longitude",
        ),
        (
            PositionQuery {
                points: vec![],
                ..p.clone()
            },
            "invalid",
            "points",
        ),
        (
            PositionQuery {
                points: vec![(10.0, 0.0)],
                ..p.clone()
            },
            "out_of_range",
            "points[0]",
        ),
        (
            PositionQuery {
                points: vec![(55.0, -35.0)],
                times: vec![lead(0), lead(7)],
                ..p.clone()
            },
            "not_found",
            "times[1].lead_time",
        ),
    ];
    for (q, kind, field) in point_cases {
        let e = position(lc, &q, &limits).unwrap_err();
        assert_eq!(field_of(e), (kind, field.to_string()));
    }
    let pq = ProfileQuery {
        latitude: 55.0,
        longitude: -35.0,
        time: lead(0),
        member: 2,
        interpolation: Interpolation::Bilinear,
    };
    assert_eq!(
        field_of(profile(lc, &pq).unwrap_err()),
        ("not_found", "member".to_string())
    );
    let pq = ProfileQuery {
        member: 0,
        latitude: -91.0,
        ..pq
    };
    assert_eq!(
        field_of(profile(lc, &pq).unwrap_err()),
        ("invalid", "latitude".to_string())
    );
    let tq = TrajectoryQuery {
        waypoints: vec![],
        quantities: vec![height(500.0)],
        member: 0,
        interpolation: Interpolation::Bilinear,
        allow_extrapolation: false,
    };
    assert_eq!(
        field_of(trajectory(lc, &tq, &limits).unwrap_err()),
        ("invalid", "waypoints".to_string())
    );
}

#[test]
fn extrapolation_when_asked_for_answers_outside_the_levels() {
    let lc = demo();
    let q = AreaQuery {
        allow_extrapolation: true,
        ..area_query(vec![height(1050.0), height(50.0)], demo_box())
    };
    let a = area(lc, &q, &Limits::default()).unwrap();
    // Below the lowest level: from the surface at 6.5 K/km, always below ground.
    assert!(a.fields[0].flags.iter().all(|&f| f == FLAG_BELOW_GROUND));
    // Above the top: isothermal from 100 hPa, about one scale height (~6.4 km at 220 K,
    // common practice) times ln 2 above the 100 hPa height.
    let k100 = DEMO_LEVELS_HPA.len() - 1;
    let north_west = a.fields[1].values[0];
    let r = index_of(&lc.cycle.grid.latitudes, a.latitudes[0]);
    let c = index_of(&lc.cycle.grid.longitudes, a.longitudes[0]);
    let z100_here = lc
        .heights
        .ready(0, a.time_index)
        .unwrap()
        .geopotential_height[[k100, r, c]];
    let dz = north_west - z100_here;
    assert!((3_900.0..5_200.0).contains(&dz), "{dz}");
}

#[test]
fn the_point_limit_refuses_a_huge_request_before_allocating() {
    let lc = demo();
    // 2 million points x 2 quantities x 7 lead times = 28 million point-values.
    let q = PositionQuery {
        times: Vec::new(),
        ..position_query(
            vec![(55.0, -35.0); 2_000_000],
            vec![height(500.0), thickness(1000.0, 500.0)],
        )
    };
    let started = Instant::now();
    let e = position(lc, &q, &Limits::default()).unwrap_err();
    let elapsed = started.elapsed();
    assert_eq!(field_of(e.clone()), ("exhausted", "points".to_string()));
    assert!(e.to_string().contains("28000000"), "{e}");
    // Refused without touching the points: far below the time to locate two million.
    assert!(elapsed.as_millis() < 50, "{elapsed:?}");
    // A global 0.25 degree box at stride 1 on a big grid is refused the same way: here the
    // demo box with a limit below its size.
    let aq = area_query(vec![height(500.0), height(700.0)], demo_box());
    let e = area(
        lc,
        &aq,
        &Limits {
            max_points: 2 * 25 * 41 - 1,
        },
    )
    .unwrap_err();
    assert_eq!(field_of(e), ("exhausted", "bbox".to_string()));
    assert!(area(
        lc,
        &aq,
        &Limits {
            max_points: 2 * 25 * 41
        }
    )
    .is_ok());
}

// ----- hybrid levels -----

/// An invented cycle on six hybrid sigma-pressure levels (the half-level a and b of the
/// ingest fixtures), with the ground at 1000 hPa / 0 m in the west and 950 hPa / 430 m in
/// the east.
fn hybrid() -> LoadedCycle {
    let a_half = vec![0.0, 2000.0, 6000.0, 10_000.0, 9000.0, 5000.0, 2000.0];
    let b_half = vec![1.0, 0.9, 0.7, 0.45, 0.25, 0.1, 0.0];
    let (nlat, nlon, nlev) = (2, 2, 6);
    let temperature = Array5::from_shape_fn((1, 1, nlev, nlat, nlon), |(_, _, k, _, _)| {
        (285.0 - 12.0 * k as f64) as f32
    });
    let ground = |c: usize| {
        if c == 0 {
            (100_000.0, 0.0)
        } else {
            (95_000.0, 430.0)
        }
    };
    let surface = Surface {
        pressure_pa: Array4::from_shape_fn((1, 1, nlat, nlon), |(_, _, _, c)| ground(c).0 as f32),
        height_m: Array4::from_shape_fn((1, 1, nlat, nlon), |(_, _, _, c)| ground(c).1 as f32),
    };
    let cycle = Cycle {
        source: PathBuf::from("hybrid.nc"),
        reference_time: None,
        lead_times_s: vec![0],
        members: 1,
        grid: Grid {
            latitudes: vec![60.0, 61.0],
            longitudes: vec![20.0, 21.0],
        },
        vertical: Vertical::Hybrid {
            a_half_pa: a_half,
            b_half,
        },
        levels_top_down_in_file: false,
        temperature,
        humidity: None,
        surface: Some(surface),
        file_heights: None,
        constants: Constants::default(),
        variables: Vec::new(),
        notes: Vec::new(),
    };
    let config = ComputeConfig::default();
    LoadedCycle::computed("hybrid.nc", cycle, &config).unwrap()
}

#[test]
fn hybrid_levels_rebuild_the_column_and_refuse_pressures_outside_it() {
    let lc = hybrid();
    let bbox = BoundingBox {
        south: 60.0,
        north: 61.0,
        west: 20.0,
        east: 21.0,
    };
    let q = AreaQuery {
        time: lead(0),
        ..area_query(vec![height(800.0), thickness(900.0, 300.0)], bbox)
    };
    let a = area(&lc, &q, &Limits::default()).unwrap();
    let step = StepColumns::new(&lc.cycle, &lc.config, 0, 0).unwrap();
    let mut scratch = ColumnScratch::new(6);
    let c = lc.cycle.constants;
    for (i, &lat) in a.latitudes.iter().enumerate() {
        for (j, &lon) in a.longitudes.iter().enumerate() {
            let r = index_of(&lc.cycle.grid.latitudes, lat);
            let col = index_of(&lc.cycle.grid.longitudes, lon);
            step.build(r, col, &mut scratch);
            let n = i * 2 + j;
            let z = scratch
                .nodes
                .height_at_pressure(80_000.0, &c)
                .unwrap()
                .height_m;
            assert_eq!(a.fields[0].values[n], z as f32);
            let th = thickness_between(&scratch.nodes, 90_000.0, 30_000.0, &c).unwrap();
            assert_eq!(a.fields[1].values[n], th as f32);
            assert_eq!(a.fields[0].flags[n], 0);
        }
    }
    // 980 hPa is below the ground of the eastern columns; 50 hPa above the top full level
    // (about 85 hPa here).
    for (p, at) in [(980.0, "below"), (50.0, "above")] {
        let q = AreaQuery {
            time: lead(0),
            ..area_query(vec![height(p)], bbox)
        };
        let e = area(&lc, &q, &Limits::default()).unwrap_err();
        assert!(
            matches!(&e, QueryError::OutOfRange { field, message }
                if field == "quantities[0].geopotential_height.pressure_pa" && message.contains(at)),
            "{e}"
        );
        let q = AreaQuery {
            allow_extrapolation: true,
            ..q
        };
        let a = area(&lc, &q, &Limits::default()).unwrap();
        assert!(a.fields[0].values.iter().all(|v| v.is_finite()));
        if p == 980.0 {
            // Below ground in the east (index 1 of each row), above it in the west.
            assert_eq!(
                a.fields[0].flags,
                vec![0, FLAG_BELOW_GROUND, 0, FLAG_BELOW_GROUND]
            );
        }
    }
    // A profile lists the full levels, their pressures halfway between the half levels.
    let p = profile(
        &lc,
        &ProfileQuery {
            latitude: 60.0,
            longitude: 21.0,
            time: lead(0),
            member: 0,
            interpolation: Interpolation::Nearest,
        },
    )
    .unwrap();
    assert_eq!(p.surface_pressure_pa, Some(95_000.0));
    let ps = 95_000.0;
    assert!((p.levels[0].pressure_pa - 0.5 * (ps + 2000.0 + 0.9 * ps)).abs() < 1e-6);
    for (k, level) in p.levels.iter().enumerate() {
        assert_eq!(
            level.geopotential_height_m as f32,
            lc.heights.ready(0, 0).unwrap().geopotential_height[[k, 0, 1]]
        );
        assert!(!level.below_ground);
    }
}

// ----- a cycle served while its heights are computed -----

/// The largest difference allowed between a height from a rebuilt column and the stored
/// one, which the row kernel computed: 1 mm, or one `f32` step where that is larger (the
/// agreement `tests/kernel.rs` asks of the kernel against the column path).
fn stored_tolerance(z: f64) -> f64 {
    let step = f64::from(z.abs() as f32) * f64::from(f32::EPSILON);
    step.max(1e-3)
}

/// A cycle is served before the heights of its steps are in: position and trajectory
/// queries rebuild the columns they need (the batch's own integration), areas wait for the
/// step; the answers agree with those given once the heights are in (areas bit for bit),
/// with the same flags.
#[test]
fn a_cycle_answers_while_its_heights_are_computed() {
    let done = demo();
    let pending = LoadedCycle::from_cycle(&done.id, done.cycle.clone(), &done.config).unwrap();
    assert_eq!(pending.heights.ready_steps(), 0);
    assert_eq!(pending.bytes, done.bytes);
    let grid = &done.cycle.grid;
    // Points between grid columns all over the domain (bilinear: four columns each), on
    // levels, between them and near the ground (1000 hPa lies below the ground at some).
    let points: Vec<(f64, f64)> = (1..grid.latitudes.len() - 1)
        .step_by(3)
        .flat_map(|r| {
            (1..grid.longitudes.len() - 1).step_by(4).map(move |c| {
                let lat = 0.7 * grid.latitudes[r] + 0.3 * grid.latitudes[r + 1];
                let lon = 0.4 * grid.longitudes[c] + 0.6 * grid.longitudes[c + 1];
                (lat, lon)
            })
        })
        .collect();
    let quantities = vec![
        height(1000.0),
        height(500.0),
        thickness(1000.0, 500.0),
        height(912.4),
    ];
    let q = PositionQuery {
        times: Vec::new(),
        allow_extrapolation: true,
        ..position_query(points.clone(), quantities.clone())
    };
    let limits = Limits::default();
    let rebuilt = position(&pending, &q, &limits).unwrap();
    let stored = position(done, &q, &limits).unwrap();
    assert_eq!(pending.heights.ready_steps(), 0, "points do not wait");
    let mut compared = 0;
    let mut below = 0;
    for (a, b) in rebuilt.iter().zip(&stored) {
        for (sa, sb) in a.samples.iter().zip(&b.samples) {
            assert_eq!(sa.flags, sb.flags, "({}, {})", a.latitude, a.longitude);
            below += sa
                .flags
                .iter()
                .filter(|&&f| f & FLAG_BELOW_GROUND != 0)
                .count();
            for (va, vb) in sa.values.iter().zip(&sb.values) {
                assert!(
                    (va - vb).abs() <= stored_tolerance(*vb),
                    "({}, {}) lead {}: {va} rebuilt vs {vb} stored",
                    a.latitude,
                    a.longitude,
                    sa.lead_time_s
                );
                compared += 1;
            }
        }
    }
    assert!(
        compared >= 100 && below > 0,
        "{compared} values, {below} below ground"
    );

    // An area waits for its step, then answers from the stored heights: the same bits.
    let area_q = area_query(quantities, demo_box());
    let waited = std::thread::scope(|scope| {
        let asker = scope.spawn(|| area(&pending, &area_q, &limits));
        pending.finish_heights();
        asker.join().unwrap().unwrap()
    });
    assert_eq!(waited, area(done, &area_q, &limits).unwrap());
    assert!(pending.heights.pending_steps().is_empty());
    // Once the heights are in, points read them too.
    assert_eq!(position(&pending, &q, &limits).unwrap(), stored);
}

/// An area on the last lead time of a cycle whose steps are all pending puts that step first
/// in line (`ServedHeights::next_pending`): the computation, started after the area asked,
/// begins with it, and the area gets the same bits as once every step is in.
#[test]
fn an_area_waiting_on_a_late_step_has_it_computed_first() {
    let done = demo();
    let pending = LoadedCycle::from_cycle(&done.id, done.cycle.clone(), &done.config).unwrap();
    let times = done.cycle.lead_times_s.len();
    assert!(times > 2);
    assert_eq!(pending.heights.next_pending(), Some((0, 0)));
    let last_hours = done.cycle.lead_times_s[times - 1] / 3600;
    let area_q = AreaQuery {
        time: lead(last_hours),
        ..area_query(vec![height(500.0)], demo_box())
    };
    let limits = Limits::default();
    let waited = std::thread::scope(|scope| {
        let asker = scope.spawn(|| area(&pending, &area_q, &limits));
        while pending.heights.next_pending() != Some((0, times - 1)) {
            assert!(!asker.is_finished(), "the area answered without waiting");
            std::thread::yield_now();
        }
        pending.finish_heights();
        asker.join().unwrap().unwrap()
    });
    assert_eq!(waited, area(done, &area_q, &limits).unwrap());
    assert!(pending.heights.pending_steps().is_empty());
}

/// Should the computation of a cycle's heights stop, the steps it left answer areas with an
/// error naming the cycle (nobody waits for ever); points still answer from rebuilt columns.
#[test]
fn heights_that_could_not_be_computed_are_an_error_not_a_wait() {
    let done = demo();
    let lc = LoadedCycle::from_cycle("stopped.nc", done.cycle.clone(), &done.config).unwrap();
    lc.heights.fail_pending("stopped for the test");
    let limits = Limits::default();
    match area(&lc, &area_query(vec![height(500.0)], demo_box()), &limits) {
        Err(QueryError::HeightsUnavailable { detail }) => {
            assert!(detail.contains("'stopped.nc'"), "{detail}");
            assert!(detail.contains("stopped for the test"), "{detail}");
        }
        other => panic!("expected HeightsUnavailable, got {other:?}"),
    }
    let q = position_query(vec![(55.0, -35.0)], vec![height(500.0)]);
    let p = position(&lc, &q, &limits).unwrap();
    assert!(p[0].samples[0].values[0].is_finite());
}

/// Whole-grid fields asked from rayon's own threads while a cycle's heights are computed
/// (verification asks its items in parallel, each field's rows in parallel): every row waits
/// for the step, and the computation must still get threads to run on. It once ran on the
/// same pool as the waiting rows, which could hold every thread of it for ever.
#[test]
fn fields_asked_in_parallel_while_heights_are_computed_do_not_hold_up_the_computation() {
    use rayon::prelude::*;
    let done = demo();
    let pending = LoadedCycle::from_cycle(&done.id, done.cycle.clone(), &done.config).unwrap();
    let quantity = thickness(1000.0, 500.0);
    let (finished_tx, finished_rx) = std::sync::mpsc::channel();
    std::thread::scope(|scope| {
        let pending = &pending;
        let asked = scope.spawn(move || {
            (0..4 * rayon::current_num_threads())
                .into_par_iter()
                .map(|i| grid_field(pending, &quantity, i % 2, 0, false))
                .collect::<Result<Vec<_>, _>>()
        });
        // Let the fields start waiting and occupy rayon's threads, then compute.
        std::thread::sleep(std::time::Duration::from_millis(200));
        scope.spawn(move || {
            pending.finish_heights();
            let _ = finished_tx.send(());
        });
        // A guard against a hang, not a speed check: the whole demo cycle computes in well
        // under a second.
        if finished_rx
            .recv_timeout(std::time::Duration::from_secs(120))
            .is_err()
        {
            // The threads would never end, nor would this test: stop the process.
            eprintln!(
                "the heights were not computed: the computation is held up by waiting queries"
            );
            std::process::abort();
        }
        let fields = asked.join().unwrap().expect("fields");
        for (i, f) in fields.iter().enumerate() {
            let stored = grid_field(done, &quantity, i % 2, 0, false).unwrap();
            assert_eq!(f.values, stored.values);
            assert_eq!(f.flags, stored.flags);
        }
    });
}
