//! Ensemble statistics (`hypsogrid::products::ensemble`) on a constructed ensemble whose
//! answers are known in closed form.
//!
//! Every member's column is isothermal and dry, so its 1000–500 hPa thickness is
//! `(R_d / g0) T ln 2` exactly (the hypsometric equation for an isothermal layer; Wallace &
//! Hobbs 2006, §3.2), and the member temperatures are placed a known number of members below
//! the temperature whose thickness is 5400 m. The 5400 m threshold itself is a rule of thumb
//! (common practice, GUIDE §3); here it is only a number to count against. The values are
//! invented test data, written by a small CF NetCDF writer in this file that holds the
//! crate's NetCDF session lock.

use std::path::{Path, PathBuf};

use hypsogrid::compute::ComputeConfig;
use hypsogrid::ingest::IngestConfig;
use hypsogrid::model::Layer;
use hypsogrid::physics::constants::DRY_AIR_GAS_CONSTANT;
use hypsogrid::products::ensemble::{
    ensemble_at_points, ensemble_grid, ensemble_grids, EnsembleError, EnsembleStatistic,
};
use hypsogrid::query::{LoadedCycle, Quantity};

/// Standard gravity, m s⁻² (WMO definition of the geopotential metre).
const G0: f64 = 9.80665;
const MEMBERS: usize = 10;
const LATS: [f64; 3] = [30.0, 40.0, 50.0];
const LONS: [f64; 4] = [0.0, 10.0, 20.0, 30.0];
const LEVELS_HPA: [f64; 4] = [1000.0, 850.0, 700.0, 500.0];
const THRESHOLD_M: f64 = 5400.0;
/// The member masked at column (1, 1), and the column masked in every member.
const MASKED_MEMBER: usize = 3;
const MASKED_ONE: (usize, usize) = (1, 1);
const MASKED_ALL: (usize, usize) = (2, 3);
const FILL: f32 = 1.0e20;

/// Metres of 1000–500 hPa thickness per kelvin of an isothermal layer.
fn metres_per_kelvin() -> f64 {
    DRY_AIR_GAS_CONSTANT / G0 * 2f64.ln()
}

/// The temperature whose 1000–500 hPa thickness is the threshold.
fn critical_temperature() -> f64 {
    THRESHOLD_M / metres_per_kelvin()
}

/// How many members lie below the threshold at column `(r, c)`: 0 to 10.
fn members_below(r: usize, c: usize) -> usize {
    (r * LONS.len() + c) % (MEMBERS + 1)
}

/// Member `m`'s temperature at column `(r, c)`: members below `members_below` sit at least
/// 0.75 K (about 15 m of thickness) below the critical temperature, the others as far above.
fn member_temperature(m: usize, r: usize, c: usize) -> f64 {
    critical_temperature() + 1.5 * (m as f64 - members_below(r, c) as f64) + 0.75
}

fn write_ensemble(path: &Path, members: Option<usize>) -> PathBuf {
    let _session = hypsogrid::netcdf_session::lock();
    let mut f = netcdf::create(path).expect("creating a test file");
    f.add_attribute("Conventions", "CF-1.8").expect("attribute");
    let nm = members.unwrap_or(1);
    let mut dims: Vec<&str> = Vec::new();
    if let Some(m) = members {
        f.add_dimension("realization", m).expect("dimension");
        let mut v = f
            .add_variable::<i32>("realization", &["realization"])
            .expect("variable");
        v.put_attribute("standard_name", "realization")
            .expect("attribute");
        v.put_values(&(0..m as i32).collect::<Vec<_>>(), ..)
            .expect("values");
        dims.push("realization");
    }
    for (name, n) in [
        ("time", 1),
        ("plev", LEVELS_HPA.len()),
        ("lat", LATS.len()),
        ("lon", LONS.len()),
    ] {
        f.add_dimension(name, n).expect("dimension");
    }
    dims.extend(["time", "plev", "lat", "lon"]);
    let coords: [(&str, &str, &str, Vec<f64>); 4] = [
        ("lat", "degrees_north", "latitude", LATS.to_vec()),
        ("lon", "degrees_east", "longitude", LONS.to_vec()),
        (
            "plev",
            "Pa",
            "air_pressure",
            LEVELS_HPA.iter().map(|p| p * 100.0).collect(),
        ),
        ("time", "hours since 2011-01-10 12:00:00", "time", vec![0.0]),
    ];
    for (name, units, std, vals) in coords {
        let mut v = f.add_variable::<f64>(name, &[name]).expect("variable");
        v.put_attribute("units", units).expect("units");
        v.put_attribute("standard_name", std)
            .expect("standard_name");
        v.put_values(&vals, ..).expect("values");
    }
    let mut vals = Vec::new();
    for m in 0..nm {
        for _k in 0..LEVELS_HPA.len() {
            for r in 0..LATS.len() {
                for c in 0..LONS.len() {
                    let masked =
                        (r, c) == MASKED_ALL || (m == MASKED_MEMBER && (r, c) == MASKED_ONE);
                    vals.push(if masked {
                        FILL
                    } else {
                        member_temperature(m, r, c) as f32
                    });
                }
            }
        }
    }
    let mut v = f.add_variable::<f32>("t", &dims).expect("variable");
    v.put_attribute("_FillValue", FILL).expect("fill");
    v.put_attribute("units", "K").expect("units");
    v.put_attribute("standard_name", "air_temperature")
        .expect("standard_name");
    v.put_values(&vals, ..).expect("values");
    path.to_path_buf()
}

fn load(path: &Path) -> LoadedCycle {
    LoadedCycle::load(path, &IngestConfig::default(), &ComputeConfig::default())
        .unwrap_or_else(|e| panic!("loading {}: {e}", path.display()))
}

fn thickness_1000_500() -> Quantity {
    Quantity::Thickness(Layer {
        bottom_pa: 100_000.0,
        top_pa: 50_000.0,
    })
}

/// The members usable at a column.
fn usable_members(r: usize, c: usize) -> Vec<usize> {
    (0..MEMBERS)
        .filter(|&m| (r, c) != MASKED_ALL && !(m == MASKED_MEMBER && (r, c) == MASKED_ONE))
        .collect()
}

#[test]
fn probability_mean_and_spread_of_the_1000_500_thickness_are_the_known_values() {
    let dir = tempfile::tempdir().expect("temporary folder");
    let lc = load(&write_ensemble(
        &dir.path().join("ensemble.nc"),
        Some(MEMBERS),
    ));
    assert_eq!(lc.cycle.members, MEMBERS);
    assert_eq!(
        lc.cycle.constants.dry_air_gas_constant, DRY_AIR_GAS_CONSTANT,
        "the test's closed form uses the crate's default R_d"
    );
    let q = thickness_1000_500();
    let stats = [
        EnsembleStatistic::ProbabilityBelow(THRESHOLD_M),
        EnsembleStatistic::ProbabilityAbove(THRESHOLD_M),
        EnsembleStatistic::Mean,
        EnsembleStatistic::Spread,
    ];
    let fields = ensemble_grids(&lc, &q, 0, &stats).expect("ensemble statistics");
    let scale = metres_per_kelvin();
    for r in 0..LATS.len() {
        for c in 0..LONS.len() {
            let used = usable_members(r, c);
            let n = used.len();
            for f in &fields {
                assert_eq!(f.members_used[[r, c]] as usize, n, "({r}, {c})");
            }
            let (p_below, p_above, mean, spread) = (
                fields[0].values[[r, c]],
                fields[1].values[[r, c]],
                fields[2].values[[r, c]],
                fields[3].values[[r, c]],
            );
            if n == 0 {
                assert!(p_below.is_nan() && p_above.is_nan() && mean.is_nan() && spread.is_nan());
                continue;
            }
            // P = k / n exactly: every member sits 15 m or more from the threshold.
            let k = used.iter().filter(|&&m| m < members_below(r, c)).count();
            assert_eq!(p_below, k as f64 / n as f64, "({r}, {c})");
            assert_eq!(p_above, (n - k) as f64 / n as f64, "({r}, {c})");
            // Mean and sample standard deviation (n - 1) of the member temperatures, times the
            // metres per kelvin of the isothermal closed form.
            let temps: Vec<f64> = used.iter().map(|&m| member_temperature(m, r, c)).collect();
            let t_mean = temps.iter().sum::<f64>() / n as f64;
            let t_var = temps.iter().map(|t| (t - t_mean).powi(2)).sum::<f64>() / (n as f64 - 1.0);
            // Heights are stored as f32 (0.5 mm at 5500 m).
            assert!((mean - scale * t_mean).abs() < 2e-3, "({r}, {c}): {mean}");
            assert!(
                (spread - scale * t_var.sqrt()).abs() < 2e-3,
                "({r}, {c}): {spread}"
            );
        }
    }
    // The full ensemble at column (0, 0): members 0..9 at 1.5 K apart, so the spread is
    // 1.5 sqrt(Σ(m - 4.5)² / 9) = 1.5 sqrt(82.5 / 9) kelvin of thickness (arithmetic).
    let want = scale * 1.5 * (82.5f64 / 9.0).sqrt();
    assert!((fields[3].values[[0, 0]] - want).abs() < 2e-3);
    // Every probability from 0 to 1 in tenths occurs somewhere.
    let tenths: std::collections::BTreeSet<i64> = fields[0]
        .values
        .iter()
        .filter(|v| v.is_finite())
        .map(|v| (v * 10.0).round() as i64)
        .collect();
    assert!(tenths.len() >= 10, "{tenths:?}");

    // One statistic at a time gives the same field.
    let single = ensemble_grid(&lc, &q, 0, EnsembleStatistic::ProbabilityBelow(THRESHOLD_M))
        .expect("one statistic");
    assert_eq!(single.values.shape(), fields[0].values.shape());
    for (a, b) in single.values.iter().zip(fields[0].values.iter()) {
        assert!(a == b || (a.is_nan() && b.is_nan()));
    }
    assert_eq!(single.members, MEMBERS);
    assert_eq!(single.lead_time_s, 0);
}

#[test]
fn statistics_at_points_interpolate_each_member() {
    let dir = tempfile::tempdir().expect("temporary folder");
    let lc = load(&write_ensemble(
        &dir.path().join("ensemble.nc"),
        Some(MEMBERS),
    ));
    let q = thickness_1000_500();
    let stats = [
        EnsembleStatistic::Mean,
        EnsembleStatistic::ProbabilityBelow(THRESHOLD_M),
        EnsembleStatistic::Spread,
    ];
    // On the grid point (40 N, 10 E) = column (1, 1), where member 3 is masked; a quarter of
    // the way from column (0, 2) to (0, 3); and on the column masked in every member.
    let points = [(40.0, 10.0), (30.0, 22.5), (50.0, 30.0)];
    let answers = ensemble_at_points(&lc, &points, &q, 0, &stats).expect("points");
    let grid = ensemble_grids(&lc, &q, 0, &stats).expect("grids");
    let on_node = &answers[0];
    assert_eq!(on_node.members_used, MEMBERS - 1);
    assert!(on_node.member_values[MASKED_MEMBER].is_nan());
    for (i, g) in grid.iter().enumerate() {
        // Grid fields hold each member's thickness rounded to f32 (0.5 mm at 5400 m).
        let tolerance = if i == 1 { 0.0 } else { 1e-3 };
        let d = (on_node.values[i] - g.values[[1, 1]]).abs();
        assert!(d <= tolerance, "{i}: {d}");
    }
    // A quarter of the way between two columns each member's thickness is 0.75 and 0.25 of
    // theirs (bilinear, mathematics): temperature T* + 1.5 (m - 2.25) + 0.75, below the
    // threshold for m < 2 (m = 2 lies 0.375 K, about 7.6 m, above it).
    let half = &answers[1];
    let scale = metres_per_kelvin();
    assert_eq!(half.members_used, MEMBERS);
    assert_eq!(half.values[1], 0.2);
    let t_mean = critical_temperature() + 1.5 * (4.5 - 2.25) + 0.75;
    assert!(
        (half.values[0] - scale * t_mean).abs() < 2e-3,
        "{}",
        half.values[0]
    );
    for (m, v) in half.member_values.iter().enumerate() {
        let t = critical_temperature() + 1.5 * (m as f64 - 2.25) + 0.75;
        assert!((v - scale * t).abs() < 2e-3, "member {m}: {v}");
    }
    let none = &answers[2];
    assert_eq!(none.members_used, 0);
    assert!(none.values.iter().all(|v| v.is_nan()));
    // The answer serialises with NaN as null.
    let json = serde_json::to_string(none).expect("json");
    assert!(json.contains("\"values\":[null,null,null]"), "{json}");
}

#[test]
fn a_deterministic_cycle_and_bad_requests_are_refused_with_clear_errors() {
    let dir = tempfile::tempdir().expect("temporary folder");
    let single = load(&write_ensemble(&dir.path().join("deterministic.nc"), None));
    let q = thickness_1000_500();
    let err = ensemble_grid(&single, &q, 0, EnsembleStatistic::Mean).expect_err("one member");
    assert!(matches!(err, EnsembleError::Deterministic { .. }));
    let text = err.to_string();
    assert!(
        text.contains("deterministic.nc") && text.contains("deterministic cycle"),
        "{text}"
    );
    let err = ensemble_at_points(&single, &[(40.0, 10.0)], &q, 0, &[EnsembleStatistic::Mean])
        .expect_err("one member");
    assert!(matches!(err, EnsembleError::Deterministic { .. }));

    let lc = load(&write_ensemble(
        &dir.path().join("ensemble.nc"),
        Some(MEMBERS),
    ));
    let err = ensemble_grid(&lc, &q, 0, EnsembleStatistic::ProbabilityAbove(f64::NAN))
        .expect_err("NaN threshold");
    assert!(matches!(err, EnsembleError::BadThreshold { index: 0, .. }));
    let err = ensemble_grid(&lc, &q, 5, EnsembleStatistic::Mean).expect_err("no step 5");
    assert!(err.to_string().contains("ensemble.nc") && err.to_string().contains("time"));
    let err = ensemble_at_points(&lc, &[(40.0, 10.0)], &q, 0, &[]).expect_err("no statistic");
    assert!(matches!(err, EnsembleError::NoStatistic));
    let err = ensemble_at_points(&lc, &[(10.0, 10.0)], &q, 0, &[EnsembleStatistic::Mean])
        .expect_err("outside the grid");
    assert!(err.to_string().contains("points[0]"), "{err}");
}
