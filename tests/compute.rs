//! End to end through read and compute: every encoding of the same atmosphere gives the same
//! heights; missing values mask their own column only; hybrid levels need the ground.
//!
//! The fixtures (tests/common/fixtures.rs) encode one smooth invented atmosphere in many
//! ways; what must not change across them is physics, so the reference here is the default
//! variant itself, and the tolerances are the encodings' own precision.

mod common;

use std::collections::HashMap;

use ndarray::s;

use common::fixtures::{
    hybrid_variants, isobaric_variants, FileHeights, FixtureSpec, HumidityEncoding,
};
use hypsogrid::compute::{compute_heights, ComputeConfig, ComputeError};
use hypsogrid::ingest::{read_cycle, IngestConfig};
use hypsogrid::model::{Cycle, Heights, Layer};

/// Layers on levels and between levels (the fixture has 1000 925 850 700 500 300 200 100 hPa).
fn layers() -> Vec<Layer> {
    vec![
        Layer {
            bottom_pa: 100_000.0,
            top_pa: 50_000.0,
        },
        Layer {
            bottom_pa: 85_000.0,
            top_pa: 70_000.0,
        },
        Layer {
            bottom_pa: 96_250.0,
            top_pa: 41_000.0,
        },
    ]
}

fn run(spec: &FixtureSpec, dir: &std::path::Path, name: &str) -> (Cycle, Heights) {
    let path = spec.write(&dir.join(format!("{name}.nc")));
    let cycle = read_cycle(&path, &IngestConfig::default())
        .unwrap_or_else(|e| panic!("variant {name}: {e}"));
    let config = ComputeConfig {
        layers: layers(),
        ..ComputeConfig::default()
    };
    let heights = compute_heights(&cycle, &config, &|_| {}).expect("computing");
    (cycle, heights)
}

/// Column index by (latitude, longitude mod 360), so that variants with flipped latitude or
/// shifted longitude are compared column for column.
fn columns(cycle: &Cycle) -> HashMap<(i64, i64), (usize, usize)> {
    let mut map = HashMap::new();
    for (r, &lat) in cycle.grid.latitudes.iter().enumerate() {
        for (c, &lon) in cycle.grid.longitudes.iter().enumerate() {
            map.insert(
                (
                    (lat * 1000.0).round() as i64,
                    (lon.rem_euclid(360.0) * 1000.0).round() as i64,
                ),
                (r, c),
            );
        }
    }
    map
}

/// Largest difference between two runs, over levels (when `compare_heights`) and layers.
fn largest_difference(a: (&Cycle, &Heights), b: (&Cycle, &Heights), compare_heights: bool) -> f64 {
    let (ca, ha) = a;
    let (cb, hb) = b;
    let cols_b = columns(cb);
    let mut worst = 0.0f64;
    let diff = |x: f32, y: f32| {
        if x.is_nan() && y.is_nan() {
            0.0
        } else {
            f64::from((x - y).abs())
        }
    };
    for (key, &(ra, ka)) in &columns(ca) {
        let &(rb, kb) = cols_b.get(key).expect("same grid points");
        let (members, times, levels, _, _) = ha.geopotential_height.dim();
        for m in 0..members {
            for t in 0..times {
                if compare_heights {
                    for k in 0..levels {
                        let d = diff(
                            ha.geopotential_height[[m, t, k, ra, ka]],
                            hb.geopotential_height[[m, t, k, rb, kb]],
                        );
                        worst = worst.max(d);
                        assert_eq!(
                            ha.below_ground[[m, t, k, ra, ka]],
                            hb.below_ground[[m, t, k, rb, kb]],
                            "below-ground flag"
                        );
                    }
                }
                for (la, lb) in ha.thickness.iter().zip(&hb.thickness) {
                    worst = worst.max(diff(la.values[[m, t, ra, ka]], lb.values[[m, t, rb, kb]]));
                }
            }
        }
    }
    worst
}

#[test]
fn every_isobaric_encoding_gives_the_same_heights() {
    let dir = tempfile::tempdir().unwrap();
    let (c0, h0) = run(&FixtureSpec::default(), dir.path(), "reference");
    assert!(
        h0.geopotential_height.iter().all(|v| v.is_finite()),
        "the reference is complete"
    );
    for (label, spec) in isobaric_variants() {
        let (c, h) = run(&spec, dir.path(), &label);
        // Variants without surface fields are anchored differently: thickness must agree,
        // absolute heights need not.
        let same_anchor = spec.surface.as_ref().is_some_and(|sf| sf.with_height);
        let worst = largest_difference((&c0, &h0), (&c, &h), same_anchor);
        // Packing to 16-bit integers rounds temperature and humidity to their steps; through
        // the hypsometric equation that is a few centimetres over the column (measured 5 cm).
        // Every other encoding is exact up to f32 rounding (measured at most 1 mm).
        println!("variant {label}: largest difference {worst:.4} m");
        let tolerance = if spec.packed { 0.1 } else { 0.01 };
        assert!(
            worst <= tolerance,
            "variant {label}: differs by {worst} m (tolerance {tolerance} m)"
        );
    }
}

/// Specific humidity, mixing ratio, relative humidity and dewpoint describe the same air in
/// the fixtures (derived from one vapour pressure with the WMO-No. 8 Magnus form over water,
/// which is also the compute's default), so they must give the same heights; without
/// humidity the column is colder in virtual temperature and lower.
#[test]
fn every_humidity_variable_gives_the_same_heights() {
    let dir = tempfile::tempdir().unwrap();
    let (c0, h0) = run(&FixtureSpec::default(), dir.path(), "q");
    for humidity in [
        HumidityEncoding::SpecificGPerKg,
        HumidityEncoding::MixingRatio,
        HumidityEncoding::RelativePercent,
        HumidityEncoding::RelativeFraction,
        HumidityEncoding::DewPoint,
    ] {
        let spec = FixtureSpec {
            humidity,
            ..FixtureSpec::default()
        };
        let (c, h) = run(&spec, dir.path(), &format!("{humidity:?}"));
        let worst = largest_difference((&c0, &h0), (&c, &h), true);
        println!("humidity {humidity:?}: largest difference {worst:.4} m");
        assert!(worst <= 0.02, "humidity {humidity:?}: differs by {worst} m");
    }
    let dry = FixtureSpec {
        humidity: HumidityEncoding::None,
        ..FixtureSpec::default()
    };
    let (_, h) = run(&dry, dir.path(), "dry");
    let moist = h0.thickness[0].values.sum();
    assert!(
        h.thickness[0].values.sum() < moist,
        "dry air gives thinner layers"
    );
}

#[test]
fn every_hybrid_encoding_gives_the_same_heights() {
    let dir = tempfile::tempdir().unwrap();
    let variants = hybrid_variants();
    let (label0, spec0) = &variants[0];
    let (c0, h0) = run(spec0, dir.path(), label0);
    assert!(h0.geopotential_height.iter().all(|v| v.is_finite()));
    for (label, spec) in &variants[1..] {
        let (c, h) = run(spec, dir.path(), label);
        let worst = largest_difference((&c0, &h0), (&c, &h), true);
        assert!(
            worst <= 0.02,
            "hybrid variant {label}: differs by {worst} m"
        );
    }
}

#[test]
fn a_missing_temperature_masks_its_own_column_only() {
    let dir = tempfile::tempdir().unwrap();
    // One missing temperature at 700 hPa (bottom-up level 3) in one column.
    let spec = FixtureSpec {
        masked_points: vec![[0, 0, 3, 1, 2]],
        ..FixtureSpec::default()
    };
    let (c, h) = run(&spec, dir.path(), "one-missing");
    let (c0, h0) = run(&FixtureSpec::default(), dir.path(), "complete");
    let masked: Vec<(usize, usize)> = (0..c.grid.rows())
        .flat_map(|r| (0..c.grid.cols()).map(move |k| (r, k)))
        .filter(|&(r, k)| c.temperature[[0, 0, 3, r, k]].is_nan())
        .collect();
    assert_eq!(masked.len(), 1, "exactly one missing input");
    let (r, k) = masked[0];
    let z = h.geopotential_height.slice(s![0, 0, .., r, k]);
    // Levels below the missing one keep their heights; the missing level and all above it
    // depend on it and are masked.
    for level in 0..3usize {
        assert!(z[level].is_finite(), "level {level} below the gap is kept");
    }
    for level in 3..z.len() {
        assert!(
            z[level].is_nan(),
            "level {level} at or above the gap is masked"
        );
    }
    // 1000-500 spans the gap: masked. 850-700 ends at the gap: masked, it depends on it.
    assert!(h.thickness[0].values[[0, 0, r, k]].is_nan());
    // Every other column is exactly as without the gap: nothing leaked into neighbours.
    assert_eq!(c0.grid, c.grid);
    for rr in 0..c.grid.rows() {
        for kk in 0..c.grid.cols() {
            if (rr, kk) == (r, k) {
                continue;
            }
            let a = h.geopotential_height.slice(s![0, 0, .., rr, kk]);
            let b = h0.geopotential_height.slice(s![0, 0, .., rr, kk]);
            assert_eq!(
                a, b,
                "column ({rr}, {kk}) unchanged by a gap in its neighbour"
            );
        }
    }
}

#[test]
fn an_all_missing_column_is_masked_not_an_error() {
    let dir = tempfile::tempdir().unwrap();
    let levels = FixtureSpec::default().levels();
    let spec = FixtureSpec {
        masked_points: (0..levels).map(|k| [0, 0, k, 2, 4]).collect(),
        ..FixtureSpec::default()
    };
    let (c, h) = run(&spec, dir.path(), "all-missing-column");
    let column: Vec<(usize, usize)> = (0..c.grid.rows())
        .flat_map(|r| (0..c.grid.cols()).map(move |k| (r, k)))
        .filter(|&(r, k)| {
            c.temperature
                .slice(s![0, 0, .., r, k])
                .iter()
                .all(|v| v.is_nan())
        })
        .collect();
    assert_eq!(column.len(), 1);
    let (r, k) = column[0];
    assert!(h
        .geopotential_height
        .slice(s![0, 0, .., r, k])
        .iter()
        .all(|v| v.is_nan()));
    assert!(h.thickness.iter().all(|l| l.values[[0, 0, r, k]].is_nan()));
    let finite = h
        .geopotential_height
        .iter()
        .filter(|v| v.is_finite())
        .count();
    assert_eq!(
        finite,
        h.geopotential_height.len() - levels,
        "only that column is masked"
    );
}

#[test]
fn file_heights_anchor_reproduces_the_files_heights_where_there_is_no_surface() {
    let dir = tempfile::tempdir().unwrap();
    let spec = FixtureSpec {
        surface: None,
        file_heights: FileHeights::Geopotential,
        ..FixtureSpec::default()
    };
    let (c, h) = run(&spec, dir.path(), "file-heights");
    let file = c.file_heights.as_ref().expect("file heights read");
    // The anchor level is reproduced exactly; the fixture's own heights come from the same
    // atmosphere by the same equation, so the other levels agree closely too.
    let worst_anchor = h
        .geopotential_height
        .slice(s![.., .., 0, .., ..])
        .iter()
        .zip(file.slice(s![.., .., 0, .., ..]).iter())
        .map(|(a, b)| f64::from((a - b).abs()))
        .fold(0.0, f64::max);
    assert!(worst_anchor < 1e-3, "{worst_anchor}");
    assert!(h.method.contains("file's own geopotential height"));
}

#[test]
fn an_inverted_layer_is_refused_before_any_work() {
    let dir = tempfile::tempdir().unwrap();
    let path = FixtureSpec::default().write(&dir.path().join("c.nc"));
    let cycle = read_cycle(&path, &IngestConfig::default()).unwrap();
    let config = ComputeConfig {
        layers: vec![Layer {
            bottom_pa: 50_000.0,
            top_pa: 100_000.0,
        }],
        ..ComputeConfig::default()
    };
    let err = compute_heights(&cycle, &config, &|_| {}).unwrap_err();
    assert!(matches!(err, ComputeError::InvertedLayer { .. }));
    assert!(err.to_string().contains("500 hPa"), "{err}");
}

#[test]
fn hybrid_levels_without_the_ground_are_refused_naming_the_file() {
    let dir = tempfile::tempdir().unwrap();
    let (_, spec) = hybrid_variants().remove(0);
    let path = spec.write(&dir.path().join("hybrid.nc"));
    let mut cycle = read_cycle(&path, &IngestConfig::default()).unwrap();
    cycle.surface = None;
    let err = compute_heights(&cycle, &ComputeConfig::default(), &|_| {}).unwrap_err();
    assert!(err.to_string().contains("hybrid.nc"), "{err}");
}

/// A served cycle has no layers, and its hybrid heights skip the nodes that layers need: the
/// heights and flags must be the bits the full column gives (Simmons and Burridge, as
/// `ColumnNodes::hybrid` computes them), whatever the humidity, the model top (at p = 0 or
/// above it) and whatever masks a column: a missing temperature at the lowest level or
/// higher up, a surface pressure missing, zero, negative or so low that the half levels no
/// longer decrease, a surface height missing. Also on the hybrid file variants.
#[test]
fn hybrid_heights_alone_are_the_full_columns_bits() {
    use hypsogrid::model::{Grid, Humidity, HumidityKind, Surface, Vertical};
    use hypsogrid::physics::Constants;
    use ndarray::{Array4, Array5};

    let (rows, cols, levels, times) = (3, 7, 10, 2);
    // Invented coefficients, bottom-up: terrain following near the ground, pure pressure aloft.
    let b_half: Vec<f64> = (0..=levels)
        .map(|k| (1.0 - k as f64 / 6.0).max(0.0).powi(2))
        .collect();
    let a_shape: Vec<f64> = (0..=levels)
        .map(|k| {
            let s = k as f64 / levels as f64;
            18_000.0 * (std::f64::consts::PI * s).sin()
        })
        .collect();
    let surface_pressure = |r: usize, c: usize| -> f32 {
        match (r, c) {
            (0, 1) => f32::NAN,
            (0, 2) => 0.0,
            (0, 3) => -500.0,
            // So low that a half level above lies at a higher pressure: not ordered.
            (0, 4) => 300.0,
            _ => 101_000.0 - 4_000.0 * r as f32 - 1_500.0 * c as f32,
        }
    };
    let surface_height = |r: usize, c: usize| -> f32 {
        if (r, c) == (0, 5) {
            f32::NAN
        } else {
            120.0 * r as f32 + 40.0 * c as f32
        }
    };
    let temperature = |t: usize, k: usize, r: usize, c: usize| -> f32 {
        match (r, c, k) {
            (1, 1, 0) => f32::NAN,
            (1, 2, 6) => f32::NAN,
            (1, 3, 3) => -5.0,
            _ => 288.0 - 6.0 * k as f32 + 0.7 * r as f32 - 0.3 * c as f32 + t as f32,
        }
    };
    let humidities: Vec<Option<(HumidityKind, f32, f32)>> = vec![
        None,
        Some((HumidityKind::SpecificHumidity, 0.012, 0.001)),
        Some((HumidityKind::MixingRatio, 0.012, 0.001)),
        Some((HumidityKind::RelativeHumidity, 0.9, 0.08)),
        Some((HumidityKind::DewPoint, 283.0, 6.0)),
    ];
    let mut compared = 0;
    let mut masked = 0;
    for top_pa in [0.0, 1_000.0] {
        let mut a_half = a_shape.clone();
        a_half[levels] = top_pa;
        for humidity in &humidities {
            let cycle = Cycle {
                source: std::path::PathBuf::from("invented-hybrid.nc"),
                reference_time: None,
                lead_times_s: vec![0, 3600],
                members: 1,
                grid: Grid {
                    latitudes: (0..rows).map(|r| 50.0 + r as f64).collect(),
                    longitudes: (0..cols).map(|c| 10.0 + c as f64).collect(),
                },
                vertical: Vertical::Hybrid {
                    a_half_pa: a_half.clone(),
                    b_half: b_half.clone(),
                },
                levels_top_down_in_file: false,
                temperature: Array5::from_shape_fn(
                    (1, times, levels, rows, cols),
                    |(_, t, k, r, c)| temperature(t, k, r, c),
                ),
                humidity: humidity.map(|(kind, base, step)| Humidity {
                    kind,
                    values: Array5::from_shape_fn(
                        (1, times, levels, rows, cols),
                        |(_, _, k, _, c)| {
                            if kind == HumidityKind::DewPoint {
                                base - step * k as f32 - 0.2 * c as f32
                            } else {
                                (base - step * k as f32).max(step / 4.0)
                            }
                        },
                    ),
                    missing_levels: vec![levels - 1],
                }),
                surface: Some(Surface {
                    pressure_pa: Array4::from_shape_fn((1, times, rows, cols), |(_, _, r, c)| {
                        surface_pressure(r, c)
                    }),
                    height_m: Array4::from_shape_fn((1, times, rows, cols), |(_, _, r, c)| {
                        surface_height(r, c)
                    }),
                }),
                file_heights: None,
                constants: Constants::default(),
                variables: Vec::new(),
                notes: Vec::new(),
            };
            let alone = compute_heights(&cycle, &ComputeConfig::default(), &|_| {}).unwrap();
            let with_layers = ComputeConfig {
                layers: vec![Layer {
                    bottom_pa: 90_000.0,
                    top_pa: 50_000.0,
                }],
                ..ComputeConfig::default()
            };
            let full = compute_heights(&cycle, &with_layers, &|_| {}).unwrap();
            let what = format!("top {top_pa} Pa, humidity {:?}", humidity.map(|h| h.0));
            for (a, b) in alone
                .geopotential_height
                .iter()
                .zip(full.geopotential_height.iter())
            {
                assert!(
                    a.to_bits() == b.to_bits() || (a.is_nan() && b.is_nan()),
                    "{what}: {a} alone against {b} from the full column"
                );
                compared += 1;
                masked += usize::from(a.is_nan());
            }
            assert_eq!(alone.below_ground, full.below_ground, "{what}");
            assert!(alone.below_ground.iter().all(|&f| f == 0), "{what}");
        }
    }
    // Every masking case above masks something, and most values are heights.
    assert!(
        masked > 0 && masked < compared / 2,
        "{masked} of {compared}"
    );

    // The hybrid file variants, read as the service reads them.
    let dir = tempfile::tempdir().unwrap();
    for (label, spec) in hybrid_variants() {
        let path = spec.write(&dir.path().join(format!("{label}.nc")));
        let cycle = read_cycle(&path, &IngestConfig::default()).unwrap();
        let alone = compute_heights(&cycle, &ComputeConfig::default(), &|_| {}).unwrap();
        let (_, full) = run(&spec, dir.path(), &format!("{label}-layers"));
        let bits = |h: &Heights| -> Vec<u32> {
            h.geopotential_height.iter().map(|v| v.to_bits()).collect()
        };
        assert_eq!(bits(&alone), bits(&full), "{label}");
    }
}

/// Hybrid layers are found along each row as its heights go up the levels; they must be what
/// each column's nodes, built whole and interpolated (`ColumnNodes::height_at_pressure`,
/// the path queries use), give, bit for bit: bounds below the ground, between levels, on a
/// level exactly (a pure-pressure level, whose full-level pressure is the same everywhere),
/// above the model top, and above a column whose temperature is missing part-way up. A table
/// whose lowest half level is not the surface itself goes through the nodes.
#[test]
fn hybrid_layers_found_along_the_rows_are_those_of_each_columns_nodes() {
    use hypsogrid::compute::{ColumnScratch, StepColumns};
    use hypsogrid::model::Vertical;
    use hypsogrid::physics::column::thickness_between;

    let dir = tempfile::tempdir().unwrap();
    let (_, spec) = hybrid_variants()
        .into_iter()
        .next()
        .expect("a hybrid fixture");
    let (mut cycle, _) = run(&spec, dir.path(), "hybrid-rows");
    let Vertical::Hybrid { a_half_pa, b_half } = &mut cycle.vertical else {
        panic!("a hybrid fixture");
    };
    // The top two half levels pure pressure: the top full level at 0.5 (5000 + 2000) Pa.
    let n = a_half_pa.len();
    assert_eq!(
        (a_half_pa[0], b_half[0]),
        (0.0, 1.0),
        "the fixture starts at the surface"
    );
    a_half_pa[n - 2] = 5000.0;
    b_half[n - 2] = 0.0;
    a_half_pa[n - 1] = 2000.0;
    b_half[n - 1] = 0.0;
    let top_full_pa = 3500.0;
    // A column missing its temperature from the fourth level up, and one from the ground.
    let (_, _, levels, rows, cols) = cycle.temperature.dim();
    assert!(levels >= 4 && rows >= 2 && cols >= 3);
    for k in 3..levels {
        cycle.temperature[[0, 0, k, 1, 2]] = f32::NAN;
    }
    cycle.temperature[[0, 0, 0, 0, 1]] = f32::NAN;
    let pairs = [
        (105_000.0, 100_000.0),  // both below the ground everywhere or nearly
        (100_000.0, 50_000.0),   // from below or above the ground, between levels
        (97_000.0, top_full_pa), // to a level exactly
        (50_000.0, 1_000.0),     // above the model top: none
        (80_000.0, 20_000.0),
    ];
    let config = ComputeConfig {
        layers: pairs
            .iter()
            .map(|&(bottom_pa, top_pa)| Layer { bottom_pa, top_pa })
            .collect(),
        ..ComputeConfig::default()
    };
    for surface_first in [true, false] {
        let mut cycle = cycle.clone();
        if !surface_first {
            // A lowest half level 1 Pa above the surface: the nodes' path.
            if let Vertical::Hybrid { a_half_pa, .. } = &mut cycle.vertical {
                a_half_pa[0] = -1.0;
            }
        }
        let heights = compute_heights(&cycle, &config, &|_| {}).expect("computing");
        let step = StepColumns::new(&cycle, &config, 0, 0).expect("the step's columns");
        let mut scratch = ColumnScratch::new(levels);
        let (mut on_a_level, mut found, mut none) = (0, 0, 0);
        for row in 0..rows {
            for col in 0..cols {
                step.build(row, col, &mut scratch);
                for (k, &z) in scratch.height.iter().enumerate() {
                    let ours = heights.geopotential_height[[0, 0, k, row, col]];
                    assert_eq!(
                        ours.to_bits(),
                        (z as f32).to_bits(),
                        "height ({row}, {col}, {k})"
                    );
                }
                for (l, layer) in config.layers.iter().enumerate() {
                    let want = thickness_between(
                        &scratch.nodes,
                        layer.bottom_pa,
                        layer.top_pa,
                        &cycle.constants,
                    )
                    .map_or(f32::NAN, |v| v as f32);
                    let got = heights.thickness[l].values[[0, 0, row, col]];
                    assert_eq!(
                        got.to_bits(),
                        want.to_bits(),
                        "surface first {surface_first}, layer {layer:?} at ({row}, {col}): {got} against {want}"
                    );
                    if want.is_nan() {
                        none += 1;
                    } else {
                        found += 1;
                        on_a_level += usize::from(layer.top_pa == top_full_pa);
                    }
                }
            }
        }
        // Each kind of case was met.
        assert!(
            on_a_level > 0 && found > 0 && none > 0,
            "{on_a_level} {found} {none}"
        );
    }
}
