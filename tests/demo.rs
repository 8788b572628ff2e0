//! The invented demo cycle and the synthetic global cycle: what their files promise, read
//! back raw with the netcdf crate (no ingest, no compute).
//!
//! Plausibility bounds used below are common practice for the winter troposphere (surface
//! pressure 500–1050 hPa, air temperature 180–320 K, specific humidity below 0.03 kg kg-1),
//! not values from one source.

use std::path::Path;

use hypsogrid::demo::{
    demo_sites, write_demo_cycle, write_synthetic_global, DemoError, SyntheticGlobal,
    DEMO_FILE_NAME, DEMO_LEAD_HOURS, DEMO_LEVELS_HPA,
};

/// netCDF default fill for `float` (`NC_FILL_FLOAT` in netcdf.h).
const FILL: f32 = 9.969_21e36;

fn text(var: &netcdf::Variable<'_>, name: &str) -> String {
    match var.attribute_value(name) {
        Some(Ok(netcdf::AttributeValue::Str(s))) => s,
        other => panic!("attribute '{name}' of '{}': {other:?}", var.name()),
    }
}

fn global_text(file: &netcdf::File, name: &str) -> String {
    match file.attribute(name).map(|a| a.value()) {
        Some(Ok(netcdf::AttributeValue::Str(s))) => s,
        other => panic!("global attribute '{name}': {other:?}"),
    }
}

/// The variable with this CF standard name (the way the ingest finds it).
fn by_standard_name<'f>(file: &'f netcdf::File, standard_name: &str) -> netcdf::Variable<'f> {
    let mut found: Vec<netcdf::Variable<'f>> = file
        .variables()
        .filter(|v| {
            matches!(v.attribute_value("standard_name"),
                     Some(Ok(netcdf::AttributeValue::Str(s))) if s == standard_name)
        })
        .collect();
    assert_eq!(
        found.len(),
        1,
        "one variable with standard_name {standard_name}"
    );
    found.remove(0)
}

fn dim_names(var: &netcdf::Variable<'_>) -> Vec<String> {
    var.dimensions().iter().map(|d| d.name()).collect()
}

fn f32s(file: &netcdf::File, standard_name: &str) -> Vec<f32> {
    by_standard_name(file, standard_name)
        .get_values::<f32, _>(..)
        .unwrap()
}

fn f64s(file: &netcdf::File, standard_name: &str) -> Vec<f64> {
    by_standard_name(file, standard_name)
        .get_values::<f64, _>(..)
        .unwrap()
}

fn demo_file(dir: &Path) -> netcdf::File {
    let path = write_demo_cycle(dir).unwrap();
    assert_eq!(path, dir.join(DEMO_FILE_NAME));
    netcdf::open(&path).unwrap()
}

const ROWS: usize = 49;
const COLS: usize = 81;
const LEVELS: usize = 21;
const TIMES: usize = 7;
const PLANE: usize = ROWS * COLS;

#[test]
fn two_demo_writes_hold_identical_data() {
    let (a, b) = (tempfile::tempdir().unwrap(), tempfile::tempdir().unwrap());
    let (fa, fb) = (demo_file(a.path()), demo_file(b.path()));
    let names_a: Vec<String> = fa.variables().map(|v| v.name()).collect();
    let names_b: Vec<String> = fb.variables().map(|v| v.name()).collect();
    assert_eq!(names_a, names_b);
    for name in &names_a {
        let (va, vb) = (fa.variable(name).unwrap(), fb.variable(name).unwrap());
        let (ra, rb) = (
            va.get_raw_values(..).unwrap(),
            vb.get_raw_values(..).unwrap(),
        );
        assert_eq!(ra, rb, "variable {name} is byte-identical");
        let attrs_a: Vec<_> = va.attributes().map(|x| x.value().unwrap()).collect();
        let attrs_b: Vec<_> = vb.attributes().map(|x| x.value().unwrap()).collect();
        assert_eq!(attrs_a, attrs_b, "attributes of {name}");
    }
}

#[test]
fn demo_has_the_documented_dimensions_variables_and_attributes() {
    let dir = tempfile::tempdir().unwrap();
    let file = demo_file(dir.path());

    assert_eq!(global_text(&file, "Conventions"), "CF-1.8");
    for name in ["title", "source", "comment"] {
        let value = global_text(&file, name).to_lowercase();
        assert!(
            value.contains("invented"),
            "global {name} says invented: {value}"
        );
    }
    assert!(global_text(&file, "caution").contains("not a forecast or a warning"));

    // Time: hours since the reference time, lead times 0..48 h, and the reference scalar.
    let time = by_standard_name(&file, "time");
    assert!(text(&time, "units").starts_with("hours since "));
    let units = text(&time, "units");
    let stamp = units.trim_start_matches("hours since ");
    assert_eq!(stamp.len(), "YYYY-MM-DD HH:MM:SS".len(), "{units}");
    let hours: Vec<f64> = time.get_values(..).unwrap();
    let expected: Vec<f64> = DEMO_LEAD_HOURS.iter().map(|&h| f64::from(h)).collect();
    assert_eq!(hours, expected);
    assert_eq!(hours, vec![0.0, 6.0, 12.0, 18.0, 24.0, 36.0, 48.0]);
    let frt = by_standard_name(&file, "forecast_reference_time");
    assert!(frt.dimensions().is_empty());
    assert_eq!(text(&frt, "units"), units);

    // Levels top-down in hPa.
    let p = by_standard_name(&file, "air_pressure");
    assert_eq!(text(&p, "units"), "hPa");
    let levels: Vec<f64> = p.get_values(..).unwrap();
    let mut top_down = DEMO_LEVELS_HPA.to_vec();
    top_down.reverse();
    assert_eq!(levels, top_down);
    assert_eq!(levels.first(), Some(&100.0));
    assert_eq!(levels.last(), Some(&1000.0));
    assert_eq!(levels.len(), LEVELS);

    // Latitudes north to south about 0.25 deg apart over 50-62 N; longitudes 45-25 W.
    let lat = f64s(&file, "latitude");
    let lon = f64s(&file, "longitude");
    assert_eq!((lat.len(), lon.len()), (ROWS, COLS));
    assert_eq!((lat[0], lat[ROWS - 1]), (62.0, 50.0));
    assert!(lat.windows(2).all(|w| (w[0] - w[1] - 0.25).abs() < 1e-9));
    assert_eq!((lon[0], lon[COLS - 1]), (-45.0, -25.0));
    assert!(lon.windows(2).all(|w| (w[1] - w[0] - 0.25).abs() < 1e-9));
    assert_eq!(
        text(&by_standard_name(&file, "latitude"), "units"),
        "degrees_north"
    );
    assert_eq!(
        text(&by_standard_name(&file, "longitude"), "units"),
        "degrees_east"
    );

    let t = by_standard_name(&file, "air_temperature");
    let q = by_standard_name(&file, "specific_humidity");
    for (v, units) in [(&t, "K"), (&q, "kg kg-1")] {
        assert_eq!(text(v, "units"), units);
        assert_eq!(dim_names(v).len(), 4);
        assert_eq!(v.dimensions()[0].name(), time.name());
        assert_eq!(v.dimensions()[1].name(), p.name());
        assert_eq!(v.fill_value::<f32>().unwrap(), Some(FILL));
    }
    let ps = by_standard_name(&file, "surface_air_pressure");
    assert_eq!(text(&ps, "units"), "Pa");
    assert_eq!(
        dim_names(&ps)[0],
        time.name(),
        "surface pressure has a time axis"
    );
    let zs = by_standard_name(&file, "surface_altitude");
    assert_eq!(text(&zs, "units"), "m");
    assert_eq!(dim_names(&zs).len(), 2, "surface altitude has no time axis");

    // The sites lie inside the grid.
    for site in demo_sites() {
        assert!((50.0..=62.0).contains(&site.latitude), "{}", site.name);
        assert!((-45.0..=-25.0).contains(&site.longitude), "{}", site.name);
    }
}

#[test]
fn demo_contents_meet_the_scenario_promises() {
    let dir = tempfile::tempdir().unwrap();
    let file = demo_file(dir.path());
    let zs = f32s(&file, "surface_altitude");
    let ps = f32s(&file, "surface_air_pressure");
    let t = f32s(&file, "air_temperature");
    let q = f32s(&file, "specific_humidity");
    assert_eq!(zs.len(), PLANE);
    assert_eq!(ps.len(), TIMES * PLANE);
    assert_eq!(t.len(), TIMES * LEVELS * PLANE);

    // A ridge above 2000 m (the scenario promises about 2400 m) and open sea at 0 m.
    let z_max = zs.iter().copied().fold(f32::MIN, f32::max);
    assert!(z_max > 2000.0 && z_max < 2600.0, "ridge {z_max}");
    assert_eq!(
        zs.iter().copied().fold(f32::MAX, f32::min),
        0.0,
        "sea level"
    );

    let mut top_down = DEMO_LEVELS_HPA.to_vec();
    top_down.reverse();
    let k850 = top_down.iter().position(|&p| p == 850.0).unwrap();
    let k925 = top_down.iter().position(|&p| p == 925.0).unwrap();
    for time in 0..TIMES {
        let ps_t = &ps[time * PLANE..(time + 1) * PLANE];
        // Surface pressure plausible and below 850 hPa (and so 925 hPa) over the ridge.
        assert!(ps_t.iter().all(|&p| (50_000.0..105_000.0).contains(&p)));
        assert!(
            ps_t.iter().any(|&p| p < 85_000.0),
            "850 hPa below ground at {time}"
        );
        let mut t850 = Vec::new();
        for (k, &p_hpa) in top_down.iter().enumerate() {
            let p = (p_hpa * 100.0) as f32;
            for (i, &ps_i) in ps_t.iter().enumerate() {
                let idx = (time * LEVELS + k) * PLANE + i;
                let (tv, qv) = (t[idx], q[idx]);
                if p > ps_i + 5000.0 {
                    // More than 50 hPa below the ground: masked.
                    assert_eq!(tv, FILL, "masked T at level {p_hpa} point {i}");
                    assert_eq!(qv, FILL, "masked q at level {p_hpa} point {i}");
                } else {
                    assert!((180.0..320.0).contains(&tv), "T {tv} at {p_hpa} hPa");
                    assert!((0.0..0.03).contains(&qv), "q {qv} at {p_hpa} hPa");
                    if k == k850 {
                        t850.push(tv);
                    }
                }
            }
        }
        // Some fill where 925 hPa is deep below the ridge.
        let masked_925 = (0..PLANE)
            .filter(|&i| t[(time * LEVELS + k925) * PLANE + i] == FILL)
            .count();
        assert!(masked_925 > 0, "925 hPa masked somewhere at {time}");
        let (lo, hi) = t850
            .iter()
            .fold((f32::MAX, f32::MIN), |(a, b), &v| (a.min(v), b.max(v)));
        assert!(
            hi - lo >= 15.0,
            "cold and mild sectors at 850 hPa at time index {time}: {lo}..{hi}"
        );
    }
    // Extrapolated (not masked) values exist as well, within 50 hPa below the ground.
    let extrapolated = (0..TIMES).any(|time| {
        top_down.iter().enumerate().any(|(k, &p_hpa)| {
            let p = (p_hpa * 100.0) as f32;
            (0..PLANE).any(|i| {
                let ps_i = ps[time * PLANE + i];
                p > ps_i && p <= ps_i + 5000.0 && t[(time * LEVELS + k) * PLANE + i] != FILL
            })
        })
    });
    assert!(extrapolated);
    // Humid and dry air: the specific humidity at 1000 hPa over sea spans a wide range.
    let k1000 = LEVELS - 1;
    let q1000: Vec<f32> = (0..PLANE)
        .map(|i| q[k1000 * PLANE + i])
        .filter(|&v| v != FILL)
        .collect();
    let q_max = q1000.iter().copied().fold(f32::MIN, f32::max);
    let q_min = q1000.iter().copied().fold(f32::MAX, f32::min);
    assert!(q_max > 0.008 && q_min < 0.003, "{q_min}..{q_max}");
}

#[test]
fn a_demo_into_a_missing_directory_fails_and_names_it() {
    let dir = tempfile::tempdir().unwrap();
    let missing = dir.path().join("absent");
    let err = write_demo_cycle(&missing).unwrap_err();
    assert!(matches!(err, DemoError::MissingDirectory { .. }), "{err:?}");
    assert!(err.to_string().contains(&missing.display().to_string()));
    assert!(!missing.exists());
}

/// A folder with a backslash in its name is refused before anything is written, saying why:
/// the NetCDF library cannot create a file there (as built on Debian it failed with
/// "Permission denied"; see tests/output.rs).
#[test]
fn a_demo_into_a_folder_with_a_backslash_is_refused_with_the_reason() {
    let dir = tempfile::tempdir().unwrap();
    let folder = dir.path().join("charts\\2030");
    std::fs::create_dir(&folder).unwrap();
    let err = write_demo_cycle(&folder).unwrap_err();
    assert!(matches!(err, DemoError::Backslash { .. }), "{err:?}");
    let message = err.to_string();
    assert!(message.contains(&folder.display().to_string()), "{message}");
    assert!(message.contains("backslash"), "{message}");
    assert_eq!(std::fs::read_dir(&folder).unwrap().count(), 0);

    let spec = SyntheticGlobal {
        rows: 5,
        cols: 8,
        levels: 2,
        times: 1,
        deflate_level: None,
    };
    let path = folder.join("g.nc");
    let err = write_synthetic_global(&path, &spec).unwrap_err();
    assert!(matches!(err, DemoError::Backslash { .. }), "{err:?}");
    assert_eq!(std::fs::read_dir(&folder).unwrap().count(), 0);
}

#[test]
fn synthetic_global_cycle_is_global_layered_and_deterministic() {
    let dir = tempfile::tempdir().unwrap();
    let spec = SyntheticGlobal {
        rows: 37,
        cols: 72,
        levels: 13,
        times: 2,
        deflate_level: Some(1),
    };
    let a = dir.path().join("a.nc");
    let b = dir.path().join("b.nc");
    write_synthetic_global(&a, &spec).unwrap();
    write_synthetic_global(&b, &spec).unwrap();
    let fa = netcdf::open(&a).unwrap();
    let fb = netcdf::open(&b).unwrap();
    for name in [
        "air_temperature",
        "specific_humidity",
        "surface_air_pressure",
    ] {
        let va = f32s(&fa, name);
        assert_eq!(va, f32s(&fb, name), "{name} deterministic");
        assert!(
            va.iter().all(|v| v.is_finite() && *v != FILL),
            "{name} complete"
        );
    }
    let lat = f64s(&fa, "latitude");
    assert_eq!((lat[0], lat[36]), (90.0, -90.0));
    let lon = f64s(&fa, "longitude");
    assert_eq!((lon[0], lon[71]), (0.0, 355.0));
    let p = by_standard_name(&fa, "air_pressure");
    assert_eq!(text(&p, "units"), "Pa");
    let levels: Vec<f64> = p.get_values(..).unwrap();
    assert!((levels[0] - 100_000.0).abs() < 1e-6 && (levels[12] - 100.0).abs() < 1e-6);
    let t = f32s(&fa, "air_temperature");
    assert_eq!(t.len(), 2 * 13 * 37 * 72);
    assert!(t.iter().all(|&v| (150.0..330.0).contains(&v)));
    let q = f32s(&fa, "specific_humidity");
    assert!(q.iter().all(|&v| (0.0..0.03).contains(&v)));
    let ps = f32s(&fa, "surface_air_pressure");
    assert!(ps.iter().all(|&v| (50_000.0..106_000.0).contains(&v)));
    // Surface geopotential, m2 s-2: mountains up to a few kilometres times g0 = 9.80665.
    let phi = by_standard_name(&fa, "surface_geopotential");
    assert_eq!(text(&phi, "units"), "m2 s-2");
    let phi: Vec<f32> = phi.get_values(..).unwrap();
    let top = phi.iter().copied().fold(f32::MIN, f32::max) / 9.80665;
    assert!((2000.0..6000.0).contains(&top), "{top}");
    // Where the ground is high the surface pressure is low.
    let i_top = phi
        .iter()
        .enumerate()
        .max_by(|x, y| x.1.total_cmp(y.1))
        .map(|(i, _)| i)
        .unwrap();
    assert!(ps[i_top] < 70_000.0, "{}", ps[i_top]);
}

#[test]
fn synthetic_settings_out_of_range_are_refused() {
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("bad.nc");
    let bad = SyntheticGlobal {
        rows: 1,
        cols: 10,
        levels: 3,
        times: 1,
        deflate_level: None,
    };
    let err = write_synthetic_global(&path, &bad).unwrap_err();
    let message = err.to_string();
    assert!(message.contains("rows") && message.contains(&path.display().to_string()));
    let bad = SyntheticGlobal {
        rows: 10,
        deflate_level: Some(0),
        ..bad
    };
    assert!(write_synthetic_global(&path, &bad)
        .unwrap_err()
        .to_string()
        .contains("deflate_level"));
    assert!(!path.exists());
}

/// The whole chain on the demo: the project's ingest reads it by standard names, the
/// compute finds the thickness the scenario promises, and the writer stores it.
#[test]
fn demo_through_ingest_compute_and_output_keeps_the_scenario_promises() {
    use hypsogrid::compute::{compute_heights, ComputeConfig};
    use hypsogrid::ingest::{read_cycle, IngestConfig};
    use hypsogrid::model::{Layer, Vertical};
    use hypsogrid::output::{write_heights, OutputOptions};

    let dir = tempfile::tempdir().unwrap();
    let input = write_demo_cycle(dir.path()).unwrap();
    let cycle = read_cycle(&input, &IngestConfig::default()).unwrap();
    assert!(
        cycle.levels_top_down_in_file,
        "the demo lists levels top-down"
    );
    assert_eq!(cycle.lead_times_s.len(), TIMES);
    assert_eq!(cycle.lead_times_s[6], 48 * 3600);
    assert!(
        matches!(&cycle.vertical, Vertical::Isobaric { pressure_pa } if pressure_pa[0] == 100_000.0)
    );
    assert!(
        cycle.surface.is_some(),
        "surface pressure and altitude found"
    );
    assert!(cycle.humidity.is_some(), "specific humidity found");

    let layer = Layer {
        bottom_pa: 100_000.0,
        top_pa: 50_000.0,
    };
    let config = ComputeConfig {
        layers: vec![layer],
        ..ComputeConfig::default()
    };
    let heights = compute_heights(&cycle, &config, &|_| {}).unwrap();
    let dz = &heights.thickness[0].values;
    let (mut lo, mut hi) = (f32::MAX, f32::MIN);
    for time in 0..TIMES {
        let slab = dz.slice(ndarray::s![0, time, .., ..]);
        let finite: Vec<f32> = slab.iter().copied().filter(|v| v.is_finite()).collect();
        assert!(!finite.is_empty());
        // 5280 and 5400 m: rain-snow lines of common practice (European and North
        // American offices); the scenario promises both sides at every lead time.
        assert!(finite.iter().any(|&v| v < 5280.0), "cold side at {time}");
        assert!(finite.iter().any(|&v| v > 5400.0), "mild side at {time}");
        for v in finite {
            lo = lo.min(v);
            hi = hi.max(v);
        }
    }
    // The scenario's promise: roughly 5150-5550 m.
    assert!(lo > 5050.0 && lo < 5250.0, "coldest {lo}");
    assert!(hi > 5450.0 && hi < 5650.0, "mildest {hi}");
    // 850 hPa (bottom-up index 5) lies below the ridge and is flagged.
    assert!(heights
        .below_ground
        .slice(ndarray::s![0, .., 5, .., ..])
        .iter()
        .any(|&f| f == 1));

    let output = dir.path().join("demo_heights.nc");
    write_heights(&cycle, &heights, &output, &OutputOptions::default()).unwrap();
    let file = netcdf::open(&output).unwrap();
    let written = file.variable("thickness_1000_500").unwrap();
    assert_eq!(written.len(), TIMES * PLANE);
    let levels: Vec<f64> = file
        .variable("air_pressure")
        .unwrap()
        .get_values(..)
        .unwrap();
    assert_eq!(levels[0], 10_000.0, "written in the demo's top-down order");
}

/// Regression for a damaged demo file: two threads writing NetCDF-4 files at once interleaved
/// inside HDF5 (`netcdf: hdf error` on reading one back, seen when tests ran in parallel).
/// Every writer and reader now holds `netcdf_session::lock` for the life of its file.
#[test]
fn demo_files_written_from_several_threads_at_once_read_back_whole() {
    let dirs: Vec<tempfile::TempDir> = (0..4).map(|_| tempfile::tempdir().unwrap()).collect();
    let paths: Vec<std::path::PathBuf> = std::thread::scope(|scope| {
        let handles: Vec<_> = dirs
            .iter()
            .map(|d| scope.spawn(move || hypsogrid::demo::write_demo_cycle(d.path()).unwrap()))
            .collect();
        handles.into_iter().map(|h| h.join().unwrap()).collect()
    });
    for path in &paths {
        let cycle =
            hypsogrid::ingest::read_cycle(path, &hypsogrid::ingest::IngestConfig::default())
                .unwrap_or_else(|e| panic!("{e}"));
        assert_eq!(cycle.lead_times_s.len(), 7);
    }
}
