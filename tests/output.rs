//! The CF NetCDF writer: a hand-built cycle and heights written, read back with the netcdf
//! crate, and checked value by value, attribute by attribute; plus the atomic-write promises
//! (no partial file after a failure, a missing directory named in the error, overwriting).
//!
//! Height values are the geopotential heights of the U.S. Standard Atmosphere 1976 mandatory
//! levels as listed in the project guide (1000 hPa 110.9 m, 850 hPa 1457.3 m, 500 hPa
//! 5574.4 m), with a small offset that encodes each value's index so that any reordering
//! shows; only the writing is under test here.

use std::path::{Path, PathBuf};

use ndarray::{Array4, Array5};

use hypsogrid::model::{Cycle, Grid, Heights, Layer, LayerThickness, Vertical};
use hypsogrid::output::{
    write_heights, FileRows, HeightsAbout, HeightsWriter, OutputError, OutputOptions,
    FLOAT_FILL_VALUE,
};
use hypsogrid::physics::Constants;

/// U.S. Standard Atmosphere 1976 geopotential heights, m, bottom-up: 1000, 850, 500 hPa
/// (as listed in the project guide, derived from the standard's definitions).
const USSA_HEIGHTS: [f32; 3] = [110.9, 1457.3, 5574.4];
const LEVELS_PA: [f64; 3] = [100_000.0, 85_000.0, 50_000.0];
/// Height of 512.5 hPa in the U.S. Standard Atmosphere 1976, from its closed form for the
/// 0–11 km′ layer (NOAA/NASA/USAF 1976, eq. 33a): z = (T0/L)(1 − (p/p0)^(R L / g0)) with
/// T0 = 288.15 K, L = 6.5 K/km, R = 287.0531 J kg-1 K-1, g0 = 9.80665, p0 = 101325 Pa.
fn ussa_height(p_pa: f64) -> f64 {
    let (t0, l, r, g0, p0) = (288.15, 0.0065, 287.0531, 9.80665, 101_325.0);
    t0 / l * (1.0 - (p_pa / p0).powf(r * l / g0))
}

const MEMBERS: usize = 2;
const TIMES: usize = 2;
const ROWS: usize = 2;
const COLS: usize = 3;

/// The offset that tags a value with its index, m (at most 0.121 m).
fn tag(m: usize, t: usize, r: usize, c: usize) -> f32 {
    0.1 * m as f32 + 0.01 * t as f32 + 0.001 * r as f32 + 0.0001 * c as f32
}

fn cycle(members: usize, reference_time: Option<&str>) -> Cycle {
    Cycle {
        source: PathBuf::from("input/cycle-2030011500.nc"),
        reference_time: reference_time.map(str::to_string),
        lead_times_s: vec![0, 21_600],
        members,
        grid: Grid {
            // North to south, as many files store them.
            latitudes: vec![60.0, 59.5],
            longitudes: vec![350.0, 350.5, 351.0],
        },
        vertical: Vertical::Isobaric {
            pressure_pa: LEVELS_PA.to_vec(),
        },
        levels_top_down_in_file: true,
        temperature: Array5::zeros((members, TIMES, 3, ROWS, COLS)),
        humidity: None,
        surface: None,
        file_heights: None,
        constants: Constants::default(),
        variables: vec![("temperature".into(), "t".into())],
        notes: vec![
            "no humidity variable: dry air assumed".into(),
            "levels reordered bottom-up".into(),
        ],
    }
}

/// The two layers: 1000-500 hPa and 850-512.5 hPa (a top off the levels, to name `p`).
fn layers() -> [Layer; 2] {
    [
        Layer {
            bottom_pa: 100_000.0,
            top_pa: 50_000.0,
        },
        Layer {
            bottom_pa: 85_000.0,
            top_pa: 51_250.0,
        },
    ]
}

/// Is the value at this index missing in the test heights? (Both members, one time.)
fn height_missing(t: usize, k: usize, r: usize, c: usize) -> bool {
    (t == 1 && k == 0 && r == 1 && c == 2) || (k == 2 && r == 0 && c == 0)
}

fn heights(members: usize) -> Heights {
    let height = Array5::from_shape_fn((members, TIMES, 3, ROWS, COLS), |(m, t, k, r, c)| {
        if height_missing(t, k, r, c) {
            f32::NAN
        } else {
            USSA_HEIGHTS[k] + tag(m, t, r, c)
        }
    });
    // The lowest level lies below the ground in the first row (as over high terrain).
    let below = Array5::from_shape_fn((members, TIMES, 3, ROWS, COLS), |(_, _, k, r, c)| {
        u8::from(k == 0 && r == 0 && c != 1)
    });
    let [l1, l2] = layers();
    let dz1 = USSA_HEIGHTS[2] - USSA_HEIGHTS[0];
    let dz2 = (ussa_height(51_250.0) - f64::from(USSA_HEIGHTS[1])) as f32;
    let thickness = vec![
        LayerThickness {
            layer: l1,
            values: Array4::from_shape_fn((members, TIMES, ROWS, COLS), |(m, t, r, c)| {
                if t == 0 && r == 1 && c == 0 {
                    f32::NAN
                } else {
                    dz1 + tag(m, t, r, c)
                }
            }),
            below_ground: Array4::from_shape_fn((members, TIMES, ROWS, COLS), |(_, _, r, c)| {
                u8::from(r == 0 && c != 1)
            }),
        },
        LayerThickness {
            layer: l2,
            values: Array4::from_shape_fn((members, TIMES, ROWS, COLS), |(m, t, r, c)| {
                dz2 + tag(m, t, r, c)
            }),
            below_ground: Array4::zeros((members, TIMES, ROWS, COLS)),
        },
    ];
    Heights {
        geopotential_height: height,
        below_ground: below,
        thickness,
        constants: Constants::default(),
        method: "hypsometric equation, layer-mean virtual temperature as the logarithmic mean"
            .into(),
    }
}

fn options(history: &str) -> OutputOptions {
    OutputOptions {
        history: history.into(),
        deflate_level: None,
    }
}

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

fn global_number(file: &netcdf::File, name: &str) -> f64 {
    match file.attribute(name).map(|a| a.value()) {
        Some(Ok(netcdf::AttributeValue::Double(v))) => v,
        other => panic!("global attribute '{name}': {other:?}"),
    }
}

fn number(var: &netcdf::Variable<'_>, name: &str) -> f64 {
    match var.attribute_value(name) {
        Some(Ok(netcdf::AttributeValue::Double(v))) => v,
        other => panic!("attribute '{name}' of '{}': {other:?}", var.name()),
    }
}

fn doubles(var: &netcdf::Variable<'_>, name: &str) -> Vec<f64> {
    match var.attribute_value(name) {
        Some(Ok(netcdf::AttributeValue::Doubles(v))) => v,
        other => panic!("attribute '{name}' of '{}': {other:?}", var.name()),
    }
}

fn assert_close(found: &[f64], expected: &[f64]) {
    assert_eq!(found.len(), expected.len(), "{found:?} vs {expected:?}");
    for (f, e) in found.iter().zip(expected) {
        assert!((f - e).abs() < 1e-9, "{found:?} vs {expected:?}");
    }
}

fn dim_names(var: &netcdf::Variable<'_>) -> Vec<String> {
    var.dimensions().iter().map(|d| d.name()).collect()
}

fn var<'f>(file: &'f netcdf::File, name: &str) -> netcdf::Variable<'f> {
    file.variable(name)
        .unwrap_or_else(|| panic!("variable '{name}' is missing"))
}

fn entries(dir: &Path) -> Vec<String> {
    let mut names: Vec<String> = std::fs::read_dir(dir)
        .expect("listing the directory")
        .map(|e| e.expect("entry").file_name().to_string_lossy().into_owned())
        .collect();
    names.sort();
    names
}

fn assert_flag_attributes(v: &netcdf::Variable<'_>) {
    assert_eq!(
        v.attribute_value("flag_values").unwrap().unwrap(),
        netcdf::AttributeValue::Schars(vec![0, 1]),
        "flag_values of '{}'",
        v.name()
    );
    assert_eq!(text(v, "flag_meanings"), "above_ground below_ground");
    assert!(text(v, "comment").contains("6.5 K/km"), "{}", v.name());
    assert!(text(v, "comment").contains("common practice"));
}

#[test]
fn ensemble_cycle_round_trips_values_order_and_attributes() {
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("heights.nc");
    let cycle = cycle(MEMBERS, Some("2030-01-15T00:00:00Z"));
    let heights = heights(MEMBERS);
    write_heights(
        &cycle,
        &heights,
        &path,
        &options("hypsogrid compute cycle.nc"),
    )
    .unwrap();
    assert_eq!(
        entries(dir.path()),
        vec!["heights.nc"],
        "no partial file left"
    );

    let file = netcdf::open(&path).unwrap();
    for (name, len) in [
        ("realization", MEMBERS),
        ("time", TIMES),
        ("air_pressure", 3),
        ("latitude", ROWS),
        ("longitude", COLS),
    ] {
        assert_eq!(file.dimension_len(name), Some(len), "dimension {name}");
    }

    // Coordinates in the file's order: levels top-down as the input listed them.
    let p = var(&file, "air_pressure");
    assert_eq!(
        p.get_values::<f64, _>(..).unwrap(),
        vec![50_000.0, 85_000.0, 100_000.0]
    );
    assert_eq!(text(&p, "units"), "Pa");
    assert_eq!(text(&p, "standard_name"), "air_pressure");
    assert_eq!(text(&p, "positive"), "down");
    assert_eq!(text(&p, "axis"), "Z");
    let lat = var(&file, "latitude");
    assert_eq!(lat.get_values::<f64, _>(..).unwrap(), vec![60.0, 59.5]);
    assert_eq!(text(&lat, "units"), "degrees_north");
    assert_eq!(text(&lat, "standard_name"), "latitude");
    let lon = var(&file, "longitude");
    assert_eq!(
        lon.get_values::<f64, _>(..).unwrap(),
        vec![350.0, 350.5, 351.0]
    );
    assert_eq!(text(&lon, "units"), "degrees_east");
    assert_eq!(text(&lon, "standard_name"), "longitude");

    let time = var(&file, "time");
    assert_eq!(time.get_values::<f64, _>(..).unwrap(), vec![0.0, 21_600.0]);
    assert_eq!(text(&time, "units"), "seconds since 2030-01-15 00:00:00");
    assert_eq!(text(&time, "standard_name"), "time");
    assert_eq!(text(&time, "axis"), "T");
    let frt = var(&file, "forecast_reference_time");
    assert!(frt.dimensions().is_empty(), "scalar");
    assert_eq!(frt.get_value::<f64, _>(()).unwrap(), 0.0);
    assert_eq!(text(&frt, "units"), "seconds since 2030-01-15 00:00:00");
    assert_eq!(text(&frt, "standard_name"), "forecast_reference_time");
    let period = var(&file, "forecast_period");
    assert_eq!(
        period.get_values::<f64, _>(..).unwrap(),
        vec![0.0, 21_600.0]
    );
    assert_eq!(text(&period, "units"), "s");
    assert_eq!(text(&period, "standard_name"), "forecast_period");
    let real = var(&file, "realization");
    assert_eq!(real.get_values::<i32, _>(..).unwrap(), vec![0, 1]);
    assert_eq!(text(&real, "standard_name"), "realization");

    // Heights: file level index kf holds bottom-up level 2 - kf; NaN became the fill value.
    let z = var(&file, "geopotential_height");
    assert_eq!(
        dim_names(&z),
        [
            "realization",
            "time",
            "air_pressure",
            "latitude",
            "longitude"
        ]
    );
    assert_eq!(text(&z, "standard_name"), "geopotential_height");
    assert_eq!(text(&z, "units"), "m");
    assert_eq!(fill_attribute(&z), FLOAT_FILL_VALUE);
    let values = z.get::<f32, _>(..).unwrap();
    assert_eq!(values.shape(), &[MEMBERS, TIMES, 3, ROWS, COLS]);
    let mut fills = 0;
    for ((m, t, kf, r, c), &v) in values
        .into_dimensionality::<ndarray::Ix5>()
        .unwrap()
        .indexed_iter()
    {
        let k = 2 - kf;
        assert!(!v.is_nan(), "no NaN is written");
        if height_missing(t, k, r, c) {
            assert_eq!(v, FLOAT_FILL_VALUE, "fill at {m} {t} {kf} {r} {c}");
            fills += 1;
        } else {
            assert_eq!(
                v,
                USSA_HEIGHTS[k] + tag(m, t, r, c),
                "at {m} {t} {kf} {r} {c}"
            );
        }
    }
    assert_eq!(
        fills,
        MEMBERS * (1 + TIMES),
        "every NaN became a fill value"
    );

    let flag = var(&file, "below_ground");
    assert_eq!(dim_names(&flag), dim_names(&z));
    assert_flag_attributes(&flag);
    let flags = flag.get::<i8, _>(..).unwrap();
    for ((_, _, kf, r, c), &v) in flags
        .into_dimensionality::<ndarray::Ix5>()
        .unwrap()
        .indexed_iter()
    {
        let k = 2 - kf;
        assert_eq!(
            v,
            i8::from(k == 0 && r == 0 && c != 1),
            "flag at {kf} {r} {c}"
        );
    }

    // Thickness per layer, with its flag.
    let t1 = var(&file, "thickness_1000_500");
    assert_eq!(
        dim_names(&t1),
        ["realization", "time", "latitude", "longitude"]
    );
    assert_eq!(
        text(&t1, "standard_name"),
        "atmosphere_layer_thickness_expressed_as_geopotential_height_difference"
    );
    assert_eq!(text(&t1, "units"), "m");
    assert_eq!(number(&t1, "layer_bottom_pressure"), 100_000.0);
    assert_eq!(number(&t1, "layer_top_pressure"), 50_000.0);
    assert!(text(&t1, "long_name").contains("1000-500 hPa"));
    assert_eq!(fill_attribute(&t1), FLOAT_FILL_VALUE);
    let v1 = t1.get::<f32, _>(..).unwrap();
    let dz1 = USSA_HEIGHTS[2] - USSA_HEIGHTS[0];
    for ((m, t, r, c), &v) in v1
        .into_dimensionality::<ndarray::Ix4>()
        .unwrap()
        .indexed_iter()
    {
        if t == 0 && r == 1 && c == 0 {
            assert_eq!(v, FLOAT_FILL_VALUE);
        } else {
            assert_eq!(v, dz1 + tag(m, t, r, c));
        }
    }
    // 1000-500 hPa thickness of the standard atmosphere: 5463.5 m (guide's table).
    assert!((f64::from(dz1) - 5463.5).abs() < 0.05);
    let f1 = var(&file, "thickness_1000_500_below_ground");
    assert_flag_attributes(&f1);
    let f1v = f1.get_values::<i8, _>(..).unwrap();
    assert_eq!(f1v.len(), MEMBERS * TIMES * ROWS * COLS);
    assert_eq!(&f1v[..COLS * ROWS], &[1, 0, 1, 0, 0, 0]);

    let t2 = var(&file, "thickness_850_512p5");
    assert_eq!(number(&t2, "layer_bottom_pressure"), 85_000.0);
    assert_eq!(number(&t2, "layer_top_pressure"), 51_250.0);
    let v2 = t2.get_values::<f32, _>(..).unwrap();
    // 850-512.5 hPa in the standard atmosphere: about 3934.6 m (eq. 33a, see ussa_height).
    assert!((f64::from(v2[0]) - 3934.6).abs() < 0.2, "{}", v2[0]);
    let f2 = var(&file, "thickness_850_512p5_below_ground");
    assert!(f2.get_values::<i8, _>(..).unwrap().iter().all(|&v| v == 0));

    // Global attributes.
    assert_eq!(global_text(&file, "Conventions"), "CF-1.8");
    assert!(!global_text(&file, "title").is_empty());
    assert_eq!(global_text(&file, "history"), "hypsogrid compute cycle.nc");
    assert_eq!(global_text(&file, "source"), "input/cycle-2030011500.nc");
    assert_eq!(global_text(&file, "method"), heights.method);
    let c = Constants::default();
    assert_eq!(
        global_number(&file, "dry_air_gas_constant"),
        c.dry_air_gas_constant
    );
    assert_eq!(global_number(&file, "standard_gravity"), 9.80665);
    assert_eq!(global_number(&file, "molar_mass_ratio"), c.molar_mass_ratio);
    let notes = global_text(&file, "ingest_notes");
    for note in &cycle.notes {
        assert!(notes.contains(note.as_str()), "{notes}");
    }
    assert!(file.attribute("institution").is_none(), "institution-free");
}

#[test]
fn single_member_has_no_realization_and_unknown_reference_time_gives_a_lead_time_axis() {
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("one.nc");
    let mut cycle = cycle(1, None);
    cycle.levels_top_down_in_file = false;
    write_heights(&cycle, &heights(1), &path, &options("one")).unwrap();
    let file = netcdf::open(&path).unwrap();
    assert!(file.dimension("realization").is_none());
    assert!(file.variable("realization").is_none());
    let z = var(&file, "geopotential_height");
    assert_eq!(
        dim_names(&z),
        ["time", "air_pressure", "latitude", "longitude"]
    );
    // Bottom-up in the input, bottom-up in the output.
    assert_eq!(
        var(&file, "air_pressure").get_values::<f64, _>(..).unwrap(),
        LEVELS_PA.to_vec()
    );
    let values = z.get_values::<f32, _>(..).unwrap();
    assert_eq!(values[0], USSA_HEIGHTS[0]);
    let time = var(&file, "time");
    assert_eq!(text(&time, "standard_name"), "forecast_period");
    assert_eq!(text(&time, "units"), "s");
    assert!(file.variable("forecast_reference_time").is_none());
    assert!(z.attribute("coordinates").is_none());
}

#[test]
fn hybrid_levels_are_numbered_from_the_top_with_full_level_coefficients() {
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("hybrid.nc");
    let mut cycle = cycle(1, Some("2030-01-15T12:00:00Z"));
    // Test coefficients (not any model's): surface half level a = 0, b = 1; model top
    // a = 2000 Pa, b = 0, as a hybrid coordinate requires at its ends.
    cycle.vertical = Vertical::Hybrid {
        a_half_pa: vec![0.0, 3000.0, 9000.0, 2000.0],
        b_half: vec![1.0, 0.8, 0.3, 0.0],
    };
    cycle.levels_top_down_in_file = true;
    write_heights(&cycle, &heights(1), &path, &options("hybrid")).unwrap();
    let file = netcdf::open(&path).unwrap();
    let lev = var(&file, "model_level_number");
    assert_eq!(text(&lev, "standard_name"), "model_level_number");
    // Top-down file order: level 1 (the top) first.
    assert_eq!(lev.get_values::<i32, _>(..).unwrap(), vec![1, 2, 3]);
    // Full-level pressure is the mean of the bounding half levels (Simmons and Burridge
    // 1981; IFS documentation Part III): full a = [1500, 6000, 5500] bottom-up.
    assert_close(&doubles(&lev, "full_level_a"), &[5500.0, 6000.0, 1500.0]);
    assert_close(&doubles(&lev, "full_level_b"), &[0.15, 0.55, 0.9]);
    assert_close(
        &doubles(&lev, "half_level_a"),
        &[2000.0, 9000.0, 3000.0, 0.0],
    );
    assert_close(&doubles(&lev, "half_level_b"), &[0.0, 0.3, 0.8, 1.0]);
    assert!(text(&lev, "comment").contains("full_level_a + full_level_b * surface_air_pressure"));
    assert!(global_text(&file, "references").contains("Simmons"));
    let z = var(&file, "geopotential_height");
    assert_eq!(
        dim_names(&z),
        ["time", "model_level_number", "latitude", "longitude"]
    );
    // The first file level is the top (bottom-up index 2).
    let values = z.get_values::<f32, _>(..).unwrap();
    assert_eq!(values[1], USSA_HEIGHTS[2] + tag(0, 0, 0, 1));
}

#[test]
fn compressed_output_reads_back_the_same_values() {
    let dir = tempfile::tempdir().unwrap();
    let plain = dir.path().join("plain.nc");
    let packed = dir.path().join("packed.nc");
    let cycle = cycle(MEMBERS, Some("2030-01-15T00:00:00Z"));
    let heights = heights(MEMBERS);
    write_heights(&cycle, &heights, &plain, &options("x")).unwrap();
    let deflate = OutputOptions {
        history: "x".into(),
        deflate_level: Some(5),
    };
    write_heights(&cycle, &heights, &packed, &deflate).unwrap();
    let a = netcdf::open(&plain).unwrap();
    let b = netcdf::open(&packed).unwrap();
    for name in [
        "geopotential_height",
        "thickness_1000_500",
        "thickness_850_512p5",
    ] {
        assert_eq!(
            var(&a, name).get_values::<f32, _>(..).unwrap(),
            var(&b, name).get_values::<f32, _>(..).unwrap(),
            "{name}"
        );
    }
    assert_eq!(
        var(&a, "below_ground").get_values::<i8, _>(..).unwrap(),
        var(&b, "below_ground").get_values::<i8, _>(..).unwrap()
    );
    assert_eq!(
        var(&b, "geopotential_height").chunking().unwrap(),
        Some(vec![1, 1, 1, ROWS, COLS]),
        "one map per chunk"
    );
}

/// The error of writing the test cycle's heights to `path`, which must fail.
fn write_error(path: &Path) -> OutputError {
    write_heights(
        &cycle(MEMBERS, None),
        &heights(MEMBERS),
        path,
        &options("x"),
    )
    .unwrap_err()
}

#[test]
fn a_missing_directory_is_named_and_nothing_is_created() {
    let dir = tempfile::tempdir().unwrap();
    let missing = dir.path().join("no").join("such");
    let path = missing.join("out.nc");
    let err = write_error(&path);
    assert!(
        matches!(err, OutputError::MissingDirectory { .. }),
        "{err:?}"
    );
    let message = err.to_string();
    assert!(message.contains(&path.display().to_string()), "{message}");
    assert!(message.contains("does not exist"), "{message}");
    let without_path = message.replace(&missing.display().to_string(), "");
    assert_eq!(
        without_path,
        without_path.to_lowercase(),
        "lowercase messages"
    );
    assert!(!missing.exists());
    assert!(entries(dir.path()).is_empty());
}

#[test]
fn a_write_that_fails_after_the_file_is_made_leaves_no_partial_file() {
    let dir = tempfile::tempdir().unwrap();
    // The target is a non-empty directory, so the final rename fails after the whole file
    // has been written beside it.
    let path = dir.path().join("taken.nc");
    std::fs::create_dir(&path).unwrap();
    std::fs::write(path.join("keep"), b"x").unwrap();
    let err = write_heights(
        &cycle(MEMBERS, Some("2030-01-15T00:00:00Z")),
        &heights(MEMBERS),
        &path,
        &options("x"),
    )
    .unwrap_err();
    assert!(matches!(err, OutputError::Io { .. }), "{err:?}");
    assert!(
        err.to_string().contains(&path.display().to_string()),
        "{err}"
    );
    assert_eq!(
        entries(dir.path()),
        vec!["taken.nc"],
        "no partial file left"
    );
    assert_eq!(entries(&path), vec!["keep"]);
}

#[test]
fn bad_inputs_fail_before_any_file_is_made() {
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("bad.nc");
    let cycle_ok = cycle(MEMBERS, Some("2030-01-15T00:00:00Z"));

    // Heights of the wrong shape (one member where the cycle has two).
    let err = write_heights(&cycle_ok, &heights(1), &path, &options("x")).unwrap_err();
    assert!(matches!(err, OutputError::Shape { .. }), "{err:?}");
    assert!(err.to_string().contains("geopotential_height"), "{err}");

    // The same layer twice.
    let mut twice = heights(MEMBERS);
    twice.thickness.push(twice.thickness[0].clone());
    let err = write_heights(&cycle_ok, &twice, &path, &options("x")).unwrap_err();
    assert!(err.to_string().contains("thickness_1000_500"), "{err}");

    // A deflate level out of range.
    let bad = OutputOptions {
        history: "x".into(),
        deflate_level: Some(12),
    };
    let err = write_heights(&cycle_ok, &heights(MEMBERS), &path, &bad).unwrap_err();
    assert!(err.to_string().contains("deflate level 12"), "{err}");

    // A reference time that is not RFC 3339.
    let err = write_heights(
        &cycle(MEMBERS, Some("15/01/2030 00Z")),
        &heights(MEMBERS),
        &path,
        &options("x"),
    )
    .unwrap_err();
    assert!(err.to_string().contains("15/01/2030 00Z"), "{err}");
    assert!(err.to_string().contains(&path.display().to_string()));
    assert!(entries(dir.path()).is_empty(), "nothing written");
}

#[test]
fn an_existing_output_is_replaced() {
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("again.nc");
    let cycle = cycle(MEMBERS, Some("2030-01-15T00:00:00Z"));
    write_heights(&cycle, &heights(MEMBERS), &path, &options("first run")).unwrap();
    let mut second = heights(MEMBERS);
    second.geopotential_height.mapv_inplace(|v| v + 1.0);
    write_heights(&cycle, &second, &path, &options("second run")).unwrap();
    assert_eq!(entries(dir.path()), vec!["again.nc"]);
    let file = netcdf::open(&path).unwrap();
    assert_eq!(global_text(&file, "history"), "second run");
    let values = var(&file, "geopotential_height")
        .get_values::<f32, _>(..)
        .unwrap();
    // File level 0 is 500 hPa (top-down): 5574.4 m + 1 m.
    assert_eq!(values[1], USSA_HEIGHTS[2] + tag(0, 0, 0, 1) + 1.0);
}

/// The `_FillValue` attribute of a float variable: what CF readers mask by. (The writer
/// switches off the library's fill pass, so the library's own fill inquiry answers "none".)
fn fill_attribute(v: &netcdf::Variable<'_>) -> f32 {
    match v.attribute_value("_FillValue") {
        Some(Ok(netcdf::AttributeValue::Float(x))) => x,
        other => panic!("_FillValue of '{}': {other:?}", v.name()),
    }
}

/// The writer the batch uses takes the file band by band: bands that leave a row of a step
/// unwritten, or a band not turned into the file's form, are refused, and nothing is renamed
/// into place (the variables have no fill pass, so a missing row would read as whatever the
/// file held). A complete set of bands writes the same values as `write_heights`.
#[test]
fn the_band_writer_refuses_missing_rows_and_writes_what_write_heights_writes() {
    let dir = tempfile::tempdir().unwrap();
    let cycle = cycle(MEMBERS, Some("2030-01-15T00:00:00Z"));
    let heights = heights(MEMBERS);
    let layers = layers();
    let about = HeightsAbout {
        method: &heights.method,
        constants: &heights.constants,
        layers: &layers,
    };
    // One band per row, from the in-memory heights.
    let band = |m: usize, t: usize, r: usize| {
        let mut rows = FileRows::new((3, 1, COLS), layers.len());
        let fields = rows.fields_mut((3, 1, COLS)).expect("a band that fits");
        for k in 0..3 {
            for c in 0..COLS {
                fields.heights[k * COLS + c] = heights.geopotential_height[[m, t, k, r, c]];
                fields.flags[k * COLS + c] = heights.below_ground[[m, t, k, r, c]];
            }
        }
        for (i, (v, f)) in fields.thickness.into_iter().enumerate() {
            for c in 0..COLS {
                v[c] = heights.thickness[i].values[[m, t, r, c]];
                f[c] = heights.thickness[i].below_ground[[m, t, r, c]];
            }
        }
        rows
    };
    let write_bands = |path: &Path, skip: Option<(usize, usize, usize)>| {
        let session = hypsogrid::netcdf_session::lock();
        let mut writer =
            HeightsWriter::create(&cycle, &about, path, &options("x"), &session).unwrap();
        for m in 0..MEMBERS {
            for t in 0..TIMES {
                for r in 0..ROWS {
                    if skip == Some((m, t, r)) {
                        continue;
                    }
                    let mut rows = band(m, t, r);
                    rows.to_file_form(writer.levels_reversed());
                    writer.put_rows((m, t), r..r + 1, &rows).unwrap();
                }
            }
        }
        writer.commit()
    };

    let missing = dir.path().join("missing.nc");
    let err = write_bands(&missing, Some((1, 1, 0))).unwrap_err();
    assert!(
        err.to_string().contains("step (1, 1)") && err.to_string().contains("missing.nc"),
        "{err}"
    );
    assert!(entries(dir.path()).is_empty(), "{:?}", entries(dir.path()));

    {
        let session = hypsogrid::netcdf_session::lock();
        let path = dir.path().join("raw.nc");
        let mut writer =
            HeightsWriter::create(&cycle, &about, &path, &options("x"), &session).unwrap();
        let err = writer.put_rows((0, 0), 0..1, &band(0, 0, 0)).unwrap_err();
        assert!(err.to_string().contains("not in the file's form"), "{err}");
    }
    assert!(entries(dir.path()).is_empty(), "{:?}", entries(dir.path()));

    let banded = dir.path().join("banded.nc");
    write_bands(&banded, None).unwrap();
    let whole = dir.path().join("whole.nc");
    write_heights(&cycle, &heights, &whole, &options("x")).unwrap();
    assert_same_data(&banded, &whole);
}

/// Every data variable of `banded` holds the bits that `whole` holds (heights, thicknesses
/// and every flag).
fn assert_same_data(banded: &Path, whole: &Path) {
    let _session = hypsogrid::netcdf_session::lock();
    let (a, b) = (netcdf::open(banded).unwrap(), netcdf::open(whole).unwrap());
    for name in [
        "geopotential_height",
        "thickness_1000_500",
        "thickness_850_512p5",
    ] {
        let read = |f: &netcdf::File| -> Vec<u32> {
            let v = f.variable(name).unwrap();
            v.get_values::<f32, _>(..)
                .unwrap()
                .iter()
                .map(|x| x.to_bits())
                .collect()
        };
        assert_eq!(read(&a), read(&b), "{name}");
    }
    for name in [
        "below_ground",
        "thickness_1000_500_below_ground",
        "thickness_850_512p5_below_ground",
    ] {
        let read = |f: &netcdf::File| f.variable(name).unwrap().get_values::<i8, _>(..).unwrap();
        let (x, y) = (read(&a), read(&b));
        assert_eq!(x.len(), y.len(), "{name}");
        assert!(
            x == y,
            "{name}: the banded flags differ from write_heights'"
        );
    }
}

/// Flags go to the file in runs of rows longer than the 64 KiB the HDF5 library would
/// otherwise read back and write again (its sieve buffer): the band writer keeps them until
/// then. On a grid wide enough for that to happen within a step (1,100 longitudes: 60 rows
/// make a run), bands in order and bands in reverse, every flag and value lands where
/// `write_heights` puts it.
#[test]
fn the_band_writer_keeps_flags_for_longer_runs_and_loses_none() {
    const WIDE: usize = 1_100;
    const TALL: usize = 150;
    const BAND: usize = 10;
    let dir = tempfile::tempdir().unwrap();
    let mut cycle = cycle(1, Some("2030-01-15T00:00:00Z"));
    cycle.grid = Grid {
        latitudes: (0..TALL).map(|r| 60.0 - 0.25 * r as f64).collect(),
        longitudes: (0..WIDE).map(|c| 0.25 * c as f64).collect(),
    };
    cycle.temperature = Array5::zeros((1, TIMES, 3, TALL, WIDE));
    let layers = layers();
    // A flag pattern that changes with every index, so that a run put in the wrong place
    // or a run lost shows.
    let flag = |t: usize, k: usize, r: usize, c: usize| u8::from((r * 7 + c * 3 + k + t) % 5 == 0);
    let heights = Heights {
        geopotential_height: Array5::from_shape_fn((1, TIMES, 3, TALL, WIDE), |(_, t, k, r, c)| {
            USSA_HEIGHTS[k] + 0.01 * t as f32 + 0.001 * (r % 10) as f32 + 0.0001 * (c % 10) as f32
        }),
        below_ground: Array5::from_shape_fn((1, TIMES, 3, TALL, WIDE), |(_, t, k, r, c)| {
            flag(t, k, r, c)
        }),
        thickness: layers
            .iter()
            .enumerate()
            .map(|(i, &layer)| LayerThickness {
                layer,
                values: Array4::from_shape_fn((1, TIMES, TALL, WIDE), |(_, t, r, c)| {
                    5000.0 + (i + t) as f32 + 0.001 * (r % 10) as f32 + 0.0001 * (c % 10) as f32
                }),
                below_ground: Array4::from_shape_fn((1, TIMES, TALL, WIDE), |(_, t, r, c)| {
                    flag(t, 3 + i, r, c)
                }),
            })
            .collect(),
        constants: Constants::default(),
        method: "hypsometric equation".into(),
    };
    let about = HeightsAbout {
        method: &heights.method,
        constants: &heights.constants,
        layers: &layers,
    };
    let band = |t: usize, r0: usize| {
        let mut rows = FileRows::new((3, BAND, WIDE), layers.len());
        let fields = rows.fields_mut((3, BAND, WIDE)).expect("a band that fits");
        for k in 0..3 {
            for r in 0..BAND {
                for c in 0..WIDE {
                    let i = (k * BAND + r) * WIDE + c;
                    fields.heights[i] = heights.geopotential_height[[0, t, k, r0 + r, c]];
                    fields.flags[i] = heights.below_ground[[0, t, k, r0 + r, c]];
                }
            }
        }
        for (i, (v, f)) in fields.thickness.into_iter().enumerate() {
            for r in 0..BAND {
                for c in 0..WIDE {
                    v[r * WIDE + c] = heights.thickness[i].values[[0, t, r0 + r, c]];
                    f[r * WIDE + c] = heights.thickness[i].below_ground[[0, t, r0 + r, c]];
                }
            }
        }
        rows
    };
    let banded = dir.path().join("banded.nc");
    {
        let session = hypsogrid::netcdf_session::lock();
        let mut writer =
            HeightsWriter::create(&cycle, &about, &banded, &options("x"), &session).unwrap();
        let starts: Vec<usize> = (0..TALL).step_by(BAND).collect();
        // Step 0 in order (runs of 60 rows go at 60 and the last 90 at the end), then step 1
        // in reverse (no band continues the one before).
        let order = starts
            .iter()
            .map(|&r0| (0, r0))
            .chain(starts.iter().rev().map(|&r0| (1, r0)));
        for (t, r0) in order {
            let mut rows = band(t, r0);
            rows.to_file_form(writer.levels_reversed());
            writer.put_rows((0, t), r0..r0 + BAND, &rows).unwrap();
        }
        writer.commit().unwrap();
    }
    let whole = dir.path().join("whole.nc");
    write_heights(&cycle, &heights, &whole, &options("x")).unwrap();
    assert_same_data(&banded, &whole);
    // The pattern has both values in every flag variable, so that a lost run shows.
    let _session = hypsogrid::netcdf_session::lock();
    let file = netcdf::open(&whole).unwrap();
    for name in [
        "below_ground",
        "thickness_1000_500_below_ground",
        "thickness_850_512p5_below_ground",
    ] {
        let flags = file
            .variable(name)
            .unwrap()
            .get_values::<i8, _>(..)
            .unwrap();
        assert!(flags.contains(&1) && flags.contains(&0), "{name}");
    }
}

/// A path with a backslash is refused before anything is made, saying why: the NetCDF
/// library cannot create it (as built on Debian it failed with "Permission denied").
#[test]
fn a_backslash_in_the_path_is_refused_with_the_reason() {
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("thickness\\2030.nc");
    let err = write_error(&path);
    assert!(matches!(err, OutputError::Backslash { .. }), "{err:?}");
    let message = err.to_string();
    assert!(message.contains(&path.display().to_string()), "{message}");
    assert!(message.contains("backslash"), "{message}");
    assert!(entries(dir.path()).is_empty());
}
