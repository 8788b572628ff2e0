//! The fast row-wise kernel (`hypsogrid::kernel`) against the column path
//! (`compute::compute_heights_by_columns`, built on `ColumnNodes::isobaric`), column by
//! column, and against closed forms and published tables.
//!
//! Agreement is asked to 1 mm, or one `f32` rounding step where that is larger (about 4 mm
//! at 48 km): both paths integrate in `f64` and store `f32`, so a last-bit difference in
//! `f64` may round a height to the neighbouring `f32`.

use std::path::PathBuf;

use ndarray::{s, Array4, Array5, ShapeBuilder};

use hypsogrid::compute::{
    compute_heights, compute_heights_by_columns, ComputeConfig, NoSurfaceReference,
};
use hypsogrid::ingest::{read_cycle, IngestConfig};
use hypsogrid::kernel::{
    exp_by_reduction, logarithmic_mean_by_series, IsobaricKernel, KernelOutput, LowestLevelHeight,
    NotApplicable, StepFields, SERIES_LIMIT, SURFACE_SERIES_LIMIT,
};
use hypsogrid::lanes::Lanes;
use hypsogrid::model::{Cycle, Grid, Heights, Humidity, HumidityKind, Layer, Surface, Vertical};
use hypsogrid::physics::humidity::{RelativeHumidityPhase, SaturationFormula};
use hypsogrid::physics::hypsometric::scale_height;
use hypsogrid::physics::standard_atmosphere::{
    us_standard_atmosphere_height_at_pressure, us_standard_atmosphere_temperature,
};
use hypsogrid::physics::Constants;

/// The 31 levels of a GFS-like isobaric file from 1000 to 1 hPa, Pa, bottom-up (a subset of
/// the NCEP 0.25° pressure levels, from memory).
const LEVELS_HPA: [f64; 31] = [
    1000.0, 975.0, 950.0, 925.0, 900.0, 850.0, 800.0, 750.0, 700.0, 650.0, 600.0, 550.0, 500.0,
    450.0, 400.0, 350.0, 300.0, 250.0, 200.0, 150.0, 100.0, 70.0, 50.0, 30.0, 20.0, 10.0, 7.0, 5.0,
    3.0, 2.0, 1.0,
];

fn levels_pa() -> Vec<f64> {
    LEVELS_HPA.iter().map(|h| h * 100.0).collect()
}

/// A deterministic stream of numbers in [0, 1) (a 64-bit linear congruential generator,
/// Knuth's MMIX constants, from memory): invented inputs, whose answer is the column path's.
struct Lcg(u64);

impl Lcg {
    fn next(&mut self) -> f64 {
        self.0 = self
            .0
            .wrapping_mul(6364136223846793005)
            .wrapping_add(1442695040888963407);
        (self.0 >> 11) as f64 / (1u64 << 53) as f64
    }
}

/// A cycle on an `rows x cols` grid with `members x times` steps: smooth temperature with
/// noise, a tropopause and a warm stratosphere, surfaces from sea level to high mountains.
fn invented_cycle(
    members: usize,
    times: usize,
    rows: usize,
    cols: usize,
    kind: Option<HumidityKind>,
) -> Cycle {
    let p = levels_pa();
    let n = p.len();
    let mut rng = Lcg(20_240_601);
    let mut t = Array5::<f32>::zeros((members, times, n, rows, cols));
    let mut q = Array5::<f32>::zeros((members, times, n, rows, cols));
    let mut ps = Array4::<f32>::zeros((members, times, rows, cols));
    let mut zs = Array4::<f32>::zeros((members, times, rows, cols));
    for m in 0..members {
        for ti in 0..times {
            for r in 0..rows {
                for c in 0..cols {
                    let t0 = 300.0 - 40.0 * r as f64 / rows as f64 + 4.0 * rng.next();
                    let z_ground = 4500.0 * rng.next().powi(3);
                    // Surface pressure from the ground height on a 8 km scale height.
                    ps[[m, ti, r, c]] =
                        (101_500.0 * (-z_ground / 8000.0).exp() + 800.0 * rng.next()) as f32;
                    zs[[m, ti, r, c]] = z_ground as f32;
                    for (k, &pk) in p.iter().enumerate() {
                        let z = us_standard_atmosphere_height_at_pressure(pk);
                        let trop = (t0 - 0.0065 * z).max(205.0 + 5.0 * rng.next());
                        let strat = if z > 20_000.0 {
                            0.0015 * (z - 20_000.0)
                        } else {
                            0.0
                        };
                        t[[m, ti, k, r, c]] = (trop + strat + 1.5 * rng.next()) as f32;
                        let rh = 0.2 + 0.7 * rng.next();
                        let es = 611.2 * (17.62 * (trop - 273.15) / (trop - 30.03)).exp();
                        let spec = 0.622 * rh * es / pk.max(es * 1.01);
                        q[[m, ti, k, r, c]] = spec.min(0.03) as f32;
                    }
                }
            }
        }
    }
    Cycle {
        source: PathBuf::from("invented-kernel-cycle.nc"),
        reference_time: None,
        lead_times_s: (0..times as i64).map(|i| i * 21_600).collect(),
        members,
        grid: Grid {
            latitudes: (0..rows).map(|r| 60.0 - r as f64).collect(),
            longitudes: (0..cols).map(|c| c as f64).collect(),
        },
        vertical: Vertical::Isobaric { pressure_pa: p },
        levels_top_down_in_file: false,
        temperature: t,
        humidity: kind.map(|kind| Humidity {
            kind,
            values: q,
            missing_levels: Vec::new(),
        }),
        surface: Some(Surface {
            pressure_pa: ps,
            height_m: zs,
        }),
        file_heights: None,
        constants: Constants::default(),
        variables: Vec::new(),
        notes: Vec::new(),
    }
}

/// Layers on levels, between levels, below the lowest level, from the surface region to the
/// top, and one above the top level (always masked).
fn layers() -> Vec<Layer> {
    [
        (100_000.0, 50_000.0),
        (100_000.0, 85_000.0),
        (85_000.0, 70_000.0),
        (96_250.0, 41_000.0),
        (105_000.0, 92_500.0),
        (103_000.0, 99_000.0),
        (70_500.0, 150.0),
        (80_000.0, 50.0),
    ]
    .into_iter()
    .map(|(bottom_pa, top_pa)| Layer { bottom_pa, top_pa })
    .collect()
}

/// The largest allowed difference between two stored heights: 1 mm, or one `f32` step.
fn tolerance(z: f32) -> f32 {
    let ulp = f32::from_bits(z.abs().to_bits() + 1) - z.abs();
    (1.0e-3f32).max(ulp)
}

/// Compares two outputs element by element; returns (largest difference in m, compared
/// finite values). NaN must meet NaN, flags must be equal.
fn compare(a: &Heights, b: &Heights) -> (f64, usize) {
    assert_eq!(a.geopotential_height.dim(), b.geopotential_height.dim());
    assert_eq!(a.below_ground, b.below_ground, "below-ground flags differ");
    let mut worst = 0.0f64;
    let mut finite = 0usize;
    let mut check = |x: f32, y: f32, what: &str| {
        if x.is_nan() || y.is_nan() {
            assert!(x.is_nan() && y.is_nan(), "{what}: {x} vs {y}");
            return;
        }
        if x == y {
            finite += 1;
            return;
        }
        let d = (x - y).abs();
        assert!(d <= tolerance(x.max(y)), "{what}: {x} vs {y}");
        worst = worst.max(f64::from(d));
        finite += 1;
    };
    for ((idx, &x), &y) in a
        .geopotential_height
        .indexed_iter()
        .zip(b.geopotential_height.iter())
    {
        check(x, y, &format!("height at {idx:?}"));
    }
    assert_eq!(a.thickness.len(), b.thickness.len());
    for (ta, tb) in a.thickness.iter().zip(&b.thickness) {
        assert_eq!(ta.layer, tb.layer);
        assert_eq!(ta.below_ground, tb.below_ground, "{}", ta.layer.label_hpa());
        for ((idx, &x), &y) in ta.values.indexed_iter().zip(tb.values.iter()) {
            check(
                x,
                y,
                &format!("thickness {} at {idx:?}", ta.layer.label_hpa()),
            );
        }
    }
    (worst, finite)
}

fn both_paths(cycle: &Cycle, layers: Vec<Layer>) -> (Heights, Heights) {
    let config = ComputeConfig {
        layers,
        ..ComputeConfig::default()
    };
    both_paths_with(cycle, &config)
}

/// [`both_paths`] with every setting of `config` (saturation formula and phase too).
fn both_paths_with(cycle: &Cycle, config: &ComputeConfig) -> (Heights, Heights) {
    let config = config.clone();
    IsobaricKernel::with_saturation(
        cycle,
        &config.layers,
        config.saturation_formula,
        config.rh_phase,
    )
    .expect("the fast kernel applies");
    let fast = compute_heights(cycle, &config, &|_| {}).expect("fast path");
    let columns = compute_heights_by_columns(cycle, &config, &|_| {}).expect("column path");
    (fast, columns)
}

/// Puts the edge cases of GUIDE §2 and `ColumnNodes::isobaric` into row 0 of step (0, 0).
fn plant_edge_cases(cycle: &mut Cycle) {
    let p = levels_pa();
    let n = p.len();
    let t = &mut cycle.temperature;
    let sf = cycle.surface.as_mut().expect("surface fields");
    let (ps, zs) = (&mut sf.pressure_pa, &mut sf.height_m);
    let mut set_surface = |c: usize, p_s: f32, z_s: f32| {
        ps[[0, 0, 0, c]] = p_s;
        zs[[0, 0, 0, c]] = z_s;
    };
    // Surface exactly on a level (1000, 925, 850 hPa) and exactly on the top level.
    set_surface(0, 100_000.0, 110.0);
    set_surface(1, 92_500.0, 760.0);
    set_surface(2, 85_000.0, 1460.0);
    set_surface(3, 100.0, 48_000.0);
    // Surface above the top level: nothing can be computed.
    set_surface(4, 80.0, 50_000.0);
    // Surface below the lowest level (p_s > 1000 hPa), and below sea level.
    set_surface(5, 104_500.0, -350.0);
    // Missing surface pressure, missing surface height, non-positive surface pressure.
    set_surface(6, f32::NAN, 100.0);
    set_surface(7, 95_000.0, f32::NAN);
    set_surface(8, -5.0, 100.0);
    // Missing temperature above ground (at 500 hPa), masking it and everything above.
    set_surface(9, 99_000.0, 90.0);
    t[[0, 0, 12, 0, 9]] = f32::NAN;
    // Missing temperature at the lowest level above ground: the column is masked.
    set_surface(10, 97_000.0, 300.0);
    t[[0, 0, 2, 0, 10]] = f32::NAN;
    // Missing and fill temperatures below ground must not matter.
    set_surface(11, 84_000.0, 1550.0);
    t[[0, 0, 0, 0, 11]] = f32::NAN;
    t[[0, 0, 1, 0, 11]] = 9.96921e36;
    t[[0, 0, 2, 0, 11]] = -999.0;
    // An isothermal column.
    set_surface(12, 101_000.0, 20.0);
    for k in 0..n {
        t[[0, 0, k, 0, 12]] = 250.0;
    }
    // Temperature not positive above ground (masks from there up).
    set_surface(13, 101_000.0, 20.0);
    t[[0, 0, 20, 0, 13]] = -3.0;
    // A jump beyond the series' limit between adjacent levels (u = 0.33 at 700 hPa).
    set_surface(14, 101_000.0, 20.0);
    t[[0, 0, 8, 0, 14]] = 500.0;
    // Infinite temperature above ground masks too.
    set_surface(15, 101_000.0, 20.0);
    t[[0, 0, 5, 0, 15]] = f32::INFINITY;
    // A missing humidity value above ground (a level the file has) masks like temperature.
    set_surface(16, 101_000.0, 20.0);
    if let Some(h) = cycle.humidity.as_mut() {
        h.values[[0, 0, 6, 0, 16]] = f32::NAN;
    }
    // The surface between two levels very close to one of them.
    set_surface(17, 85_000.01, 1450.0);
    set_surface(18, 84_999.99, 1450.0);
    // Surfaces high in the column: p_s/p_k0 = 1.8 (beyond the series' range of the
    // surface set-up, exact forms) and 1.12 (inside it).
    set_surface(19, 180.0, 45_000.0);
    set_surface(20, 560.0, 36_000.0);
    // A strong inversion just beyond the layer series' limit: virtual temperature 14 %
    // warmer at 700 hPa than at 750 hPa (u about 0.066), recomputed exactly.
    set_surface(21, 101_000.0, 20.0);
    t[[0, 0, 8, 0, 21]] = t[[0, 0, 7, 0, 21]] * 1.14;
    let _ = p;
}

#[test]
fn kernel_matches_the_column_path_on_many_columns_with_specific_humidity() {
    let mut cycle = invented_cycle(2, 2, 9, 40, Some(HumidityKind::SpecificHumidity));
    plant_edge_cases(&mut cycle);
    let (fast, columns) = both_paths(&cycle, layers());
    let (worst, n) = compare(&fast, &columns);
    println!("specific humidity: {n} values, largest difference {worst:e} m");
    assert!(n > 2 * 2 * 9 * 40 * 25, "most values are finite ({n})");
    // The planted cases did what they say on the fast path itself.
    let z = |k: usize, c: usize| fast.geopotential_height[[0, 0, k, 0, c]];
    let b = |k: usize, c: usize| fast.below_ground[[0, 0, k, 0, c]];
    assert_eq!(
        z(0, 0),
        110.0,
        "level at the surface has the surface height"
    );
    assert_eq!(b(0, 0), 0);
    assert_eq!((z(3, 1), b(3, 1), b(2, 1)), (760.0, 0, 1));
    assert_eq!(z(30, 3), 48_000.0);
    assert!(
        (0..31).all(|k| z(k, 4).is_nan() && b(k, 4) == 0),
        "surface above the top"
    );
    assert!(
        z(0, 5) > -350.0 && b(0, 5) == 0,
        "1000 hPa above a surface at 1045 hPa"
    );
    for c in [6, 7, 8, 10] {
        assert!(
            (0..31).all(|k| z(k, c).is_nan() && b(k, c) == 0),
            "column {c}"
        );
    }
    assert!(z(11, 9).is_finite() && z(12, 9).is_nan() && z(30, 9).is_nan());
    assert!(
        (0..31).all(|k| z(k, 11).is_finite()),
        "buried fill values unused"
    );
    assert!(z(19, 13).is_finite() && z(20, 13).is_nan());
    assert!(
        z(30, 14).is_finite(),
        "a large jump is computed, not masked"
    );
    assert!(z(4, 15).is_finite() && z(5, 15).is_nan());
    assert!(z(5, 16).is_finite() && z(6, 16).is_nan());
    assert!(
        z(30, 19).is_finite() && b(29, 19) == 1,
        "surface between 2 and 1 hPa"
    );
    assert!(z(30, 20).is_finite() && b(26, 20) == 1 && b(27, 20) == 0);
}

#[test]
fn kernel_matches_the_column_path_with_mixing_ratio_dry_air_and_missing_humidity_levels() {
    for kind in [Some(HumidityKind::MixingRatio), None] {
        let mut cycle = invented_cycle(1, 2, 7, 36, kind);
        plant_edge_cases(&mut cycle);
        if let Some(h) = cycle.humidity.as_mut() {
            // Levels the file's humidity axis lacked: NaN and listed, treated as dry.
            h.missing_levels = (20..31).collect();
            for k in 20..31 {
                h.values.slice_mut(s![.., .., k, .., ..]).fill(f32::NAN);
            }
        }
        let (fast, columns) = both_paths(&cycle, layers());
        let (worst, n) = compare(&fast, &columns);
        println!("{kind:?}: {n} values, largest difference {worst:e} m");
        assert!(fast.geopotential_height[[0, 1, 30, 3, 5]].is_finite());
    }
}

/// Relative humidity and dewpoint, made specific humidity row by row before the level step,
/// against the column path (which forms the same specific humidity column by column), with
/// both saturation formulas, relative humidity over water and over ice below freezing, the
/// planted edge cases, and a humidity level missing from the file.
#[test]
fn kernel_matches_the_column_path_with_relative_humidity_and_dewpoint() {
    for kind in [HumidityKind::RelativeHumidity, HumidityKind::DewPoint] {
        let mut cycle = invented_cycle(1, 2, 6, 30, Some(kind));
        let mut rng = Lcg(7);
        let h = cycle.humidity.as_mut().expect("humidity");
        for (v, &t) in h.values.iter_mut().zip(cycle.temperature.iter()) {
            *v = match kind {
                // A fraction, 5 % to 100 %.
                HumidityKind::RelativeHumidity => (0.05 + 0.95 * rng.next()) as f32,
                // 0 to 25 K below the temperature.
                _ => (f64::from(t) - 25.0 * rng.next()) as f32,
            };
        }
        h.missing_levels = vec![30];
        h.values.slice_mut(s![.., .., 30, .., ..]).fill(f32::NAN);
        plant_edge_cases(&mut cycle);
        for formula in [SaturationFormula::WmoMagnus, SaturationFormula::Bolton] {
            for rh_phase in [
                RelativeHumidityPhase::Water,
                RelativeHumidityPhase::IceBelowFreezing,
            ] {
                let config = ComputeConfig {
                    layers: layers(),
                    saturation_formula: formula,
                    rh_phase,
                    ..ComputeConfig::default()
                };
                let (fast, columns) = both_paths_with(&cycle, &config);
                let (worst, n) = compare(&fast, &columns);
                println!("{kind:?}, {formula:?}, {rh_phase:?}: {n} values, largest difference {worst:e} m");
                assert!(n > 2 * 6 * 30 * 20, "most values are finite ({n})");
            }
        }
        // The humidity changes the heights: dry air is several metres lower at 500 hPa.
        let mut dry = cycle.clone();
        dry.humidity = None;
        let (moist, _) = both_paths(&cycle, layers());
        let (dry, _) = both_paths(&dry, layers());
        let (z_moist, z_dry) = (
            moist.geopotential_height[[0, 1, 12, 3, 25]],
            dry.geopotential_height[[0, 1, 12, 3, 25]],
        );
        assert!(z_moist - z_dry > 1.0, "{kind:?}: {z_moist} vs {z_dry} dry");
    }
}

#[test]
fn kernel_matches_the_column_path_when_the_fields_are_not_contiguous() {
    // The same values held in column-major order: no row is a contiguous slice.
    let base = invented_cycle(1, 1, 5, 24, Some(HumidityKind::SpecificHumidity));
    let mut cycle = base.clone();
    let mut t = Array5::<f32>::zeros(base.temperature.dim().f());
    t.assign(&base.temperature);
    assert!(!t.is_standard_layout());
    cycle.temperature = t;
    let (fast, columns) = both_paths(&cycle, layers());
    compare(&fast, &columns);
    let (fast_base, _) = both_paths(&base, layers());
    assert_eq!(fast.geopotential_height, fast_base.geopotential_height);
}

#[test]
fn kernel_matches_the_column_path_across_blocks_of_columns() {
    // Rows of 600 columns: the level step runs in blocks of columns (256 at a time, each
    // asking for the next level's rows ahead), so these rows take two whole blocks and a
    // part. The planted cases (columns 0–21 of row 0) are copied across the first block's
    // end (columns 245–266) and into the row's last columns (578–599).
    let mut cycle = invented_cycle(1, 1, 3, 600, Some(HumidityKind::SpecificHumidity));
    plant_edge_cases(&mut cycle);
    let planted = 22;
    let copies = [245, 600 - planted];
    for &at in &copies {
        let t = cycle
            .temperature
            .slice(s![.., .., .., 0, ..planted])
            .to_owned();
        let t_to = s![.., .., .., 0, at..at + planted];
        cycle.temperature.slice_mut(t_to).assign(&t);
        let h = cycle.humidity.as_mut().expect("humidity");
        let q = h.values.slice(s![.., .., .., 0, ..planted]).to_owned();
        h.values.slice_mut(t_to).assign(&q);
        let sf = cycle.surface.as_mut().expect("surface fields");
        for field in [&mut sf.pressure_pa, &mut sf.height_m] {
            let v = field.slice(s![.., .., 0, ..planted]).to_owned();
            field.slice_mut(s![.., .., 0, at..at + planted]).assign(&v);
        }
    }
    let (fast, columns) = both_paths(&cycle, layers());
    let (worst, n) = compare(&fast, &columns);
    println!("600 columns: {n} values, largest difference {worst:e} m");
    assert!(n > 3 * 600 * 25, "most values are finite ({n})");
    // Every copy gives the bits of the planted columns, wherever the block boundary falls.
    let bits = |c: usize| {
        let z = fast.geopotential_height.slice(s![0, 0, .., 0, c]);
        let b = fast.below_ground.slice(s![0, 0, .., 0, c]);
        let z: Vec<u32> = z.iter().map(|v| v.to_bits()).collect();
        (z, b.to_vec())
    };
    for &at in &copies {
        for c in 0..planted {
            assert_eq!(
                bits(at + c),
                bits(c),
                "column {} against column {c}",
                at + c
            );
        }
    }
}

#[test]
fn every_simd_build_gives_identical_bits() {
    // Specific humidity, and relative humidity (converted in lanes of its own).
    for kind in [
        HumidityKind::SpecificHumidity,
        HumidityKind::RelativeHumidity,
    ] {
        every_simd_build_gives_identical_bits_with(kind);
    }
}

fn every_simd_build_gives_identical_bits_with(kind: HumidityKind) {
    let mut cycle = invented_cycle(1, 1, 6, 40, Some(kind));
    if kind == HumidityKind::RelativeHumidity {
        let mut rng = Lcg(11);
        let h = cycle.humidity.as_mut().expect("humidity");
        h.values.iter_mut().for_each(|v| *v = rng.next() as f32);
    }
    plant_edge_cases(&mut cycle);
    let layers = layers();
    let kernel = IsobaricKernel::with_saturation(
        &cycle,
        &layers,
        SaturationFormula::WmoMagnus,
        RelativeHumidityPhase::IceBelowFreezing,
    )
    .expect("applies");
    println!("widest SIMD build: {}", kernel.lanes().name());
    let portable = kernel
        .clone()
        .with_lanes(Lanes::Portable)
        .run(&cycle, &|_| {})
        .expect("run");
    // No fused multiply-add is enabled, so every build does the same IEEE operations; a build
    // this processor lacks falls back to a narrower one (and is then compared with itself).
    let bits = |x: &Array5<f32>| x.iter().map(|v| v.to_bits()).collect::<Vec<_>>();
    let bits4 = |v: &Array4<f32>| v.iter().map(|f| f.to_bits()).collect::<Vec<_>>();
    for lanes in [Lanes::Avx2, Lanes::Avx512] {
        let k = kernel.clone().with_lanes(lanes);
        assert!(k.lanes() <= lanes && k.lanes().available());
        let a = k.run(&cycle, &|_| {}).expect("run");
        let what = lanes.name();
        assert_eq!(
            bits(&a.geopotential_height),
            bits(&portable.geopotential_height),
            "{what}"
        );
        assert_eq!(a.below_ground, portable.below_ground, "{what}");
        for (x, y) in a.thickness.iter().zip(&portable.thickness) {
            assert_eq!(bits4(&x.values), bits4(&y.values), "{what}");
            assert_eq!(x.below_ground, y.below_ground, "{what}");
        }
    }
}

/// The branch-free `exp` of the relative-humidity and dewpoint conversion against the
/// standard library's `exp` (the platform's libm), over its whole range and densely over
/// the Magnus forms' arguments (−45 to +5): within two units of `f64`'s last place
/// (2·2⁻⁵² relative); exact at 0; `NaN` for `NaN`; the clamped ends as documented.
#[test]
fn the_reduced_exp_agrees_with_the_standard_librarys() {
    let mut worst = 0.0f64;
    let mut check = |x: f64| {
        let (got, want) = (exp_by_reduction(x), x.exp());
        let rel = ((got - want) / want).abs();
        assert!(rel <= 2.0 * f64::EPSILON, "exp({x}) = {got}, libm {want}");
        worst = worst.max(rel);
    };
    let mut rng = Lcg(3);
    for _ in 0..200_000 {
        check(-708.0 + 1417.0 * rng.next());
    }
    for i in 0..=500_000 {
        check(-45.0 + 50.0 * f64::from(i) / 500_000.0);
    }
    println!("largest relative difference from libm: {worst:e}");
    assert_eq!(exp_by_reduction(0.0), 1.0);
    assert!(exp_by_reduction(f64::NAN).is_nan());
    assert_eq!(exp_by_reduction(1000.0), exp_by_reduction(709.0));
    assert_eq!(exp_by_reduction(-1000.0), exp_by_reduction(-708.0));
}

#[test]
fn series_log_mean_agrees_with_the_exact_formula_within_its_bound() {
    // The exact logarithmic mean (t1 − t2)/ln(t1/t2), with ln(t1/t2) = ln_1p((t1 − t2)/t2)
    // to keep its own rounding to a few ulps; t1 − t2 is exact (Sterbenz lemma).
    let exact = |t1: f64, t2: f64| {
        if t1 == t2 {
            t1
        } else {
            (t1 - t2) / ((t1 - t2) / t2).ln_1p()
        }
    };
    let mut worst = 0.0f64;
    for i in 0..=400 {
        let t2 = 150.0 + i as f64 * 0.5;
        for j in -200..=200 {
            let u = SERIES_LIMIT * j as f64 / 200.0;
            // t1 with (t1 − t2)/(t1 + t2) = u.
            let t1 = t2 * (1.0 + u) / (1.0 - u);
            let rel = (logarithmic_mean_by_series(t1, t2) / exact(t1, t2) - 1.0).abs();
            worst = worst.max(rel);
        }
    }
    println!("largest relative difference to the exact formula: {worst:e}");
    // A few ulps of f64 (2.2e-16 each): the truncation itself is below 6e-18.
    assert!(worst < 1.0e-15, "{worst:e}");
    // Isothermal: exactly the temperature. Symmetric in its arguments.
    assert_eq!(logarithmic_mean_by_series(250.0, 250.0), 250.0);
    assert_eq!(
        logarithmic_mean_by_series(231.5, 244.25),
        logarithmic_mean_by_series(244.25, 231.5)
    );
    // The documented bound on the omitted terms of u/artanh(u) (Cauchy's estimate with
    // ρ = 0.9, the series kept to s⁶) at the limit.
    let (s_max, rho) = (SERIES_LIMIT * SERIES_LIMIT, 0.9);
    let cauchy = (1.0 + rho) * (s_max / rho).powi(7) / (1.0 - s_max / rho);
    assert!(cauchy < 2.5e-18, "{cauchy:e}");
    // The truncation bound of the documentation of the surface set-up's artanh(w)/w: the
    // omitted tail Σ_{j≥8} s^j/(2j+1) at its limit, summed on its own, stays under
    // s⁸/(17(1 − s)) < 6.0e-18.
    let s2 = SURFACE_SERIES_LIMIT * SURFACE_SERIES_LIMIT;
    let tail: f64 = (8..80).map(|j| s2.powi(j) / f64::from(2 * j + 1)).sum();
    let bound = s2.powi(8) / (17.0 * (1.0 - s2));
    assert!(tail <= bound && bound < 6.0e-18, "{tail:e} {bound:e}");
}

#[test]
fn isothermal_column_matches_the_closed_form() {
    // p = p0 exp(−(z − z0)/H), H = R_d T / g0 (Wallace & Hobbs 2006, §3.2.2).
    let mut cycle = invented_cycle(1, 1, 2, 3, None);
    cycle.temperature.fill(240.0);
    let sf = cycle.surface.as_mut().expect("surface");
    sf.pressure_pa.fill(100_000.0);
    sf.height_m.fill(12.0);
    let heights = compute_heights(&cycle, &ComputeConfig::default(), &|_| {}).expect("compute");
    let h = scale_height(240.0, &cycle.constants);
    for (k, &p) in levels_pa().iter().enumerate() {
        let want = 12.0 + h * (100_000.0 / p).ln();
        for &z in heights
            .geopotential_height
            .slice(s![0, 0, k, .., ..])
            .iter()
        {
            assert!(
                (f64::from(z) - want).abs() <= f64::from(tolerance(z)),
                "{p}: {z} vs {want}"
            );
        }
    }
}

#[test]
fn standard_atmosphere_column_reproduces_the_mandatory_heights() {
    // Heights of the mandatory levels in the U.S. Standard Atmosphere 1976, as derived in
    // GUIDE §2 from the standard's definition (0.1 m rounding). Only up to 250 hPa: the
    // 250–200 hPa layer holds the tropopause (11 km′, about 226 hPa), where the lapse rate
    // changes inside the layer and a two-point layer mean cannot be exact.
    let table = [
        (1000.0, 110.9),
        (925.0, 762.0),
        (850.0, 1457.3),
        (700.0, 3012.2),
        (500.0, 5574.4),
        (400.0, 7185.4),
        (300.0, 9164.0),
        (250.0, 10_362.9),
    ];
    let mut cycle = invented_cycle(1, 1, 1, 2, None);
    cycle.constants = Constants::us_standard_atmosphere_1976();
    for (k, &p) in levels_pa().iter().enumerate() {
        let tk = us_standard_atmosphere_temperature(us_standard_atmosphere_height_at_pressure(p));
        cycle
            .temperature
            .slice_mut(s![.., .., k, .., ..])
            .fill(tk as f32);
    }
    let sf = cycle.surface.as_mut().expect("surface");
    sf.pressure_pa.fill(101_325.0);
    sf.height_m.fill(0.0);
    let heights = compute_heights(&cycle, &ComputeConfig::default(), &|_| {}).expect("compute");
    for (hpa, want) in table {
        let k = LEVELS_HPA.iter().position(|&l| l == hpa).expect("a level");
        let z = f64::from(heights.geopotential_height[[0, 0, k, 0, 1]]);
        // 0.1 m table rounding plus the f32 storage of the level temperatures.
        assert!((z - want).abs() <= 0.15, "{hpa} hPa: {z} vs {want}");
    }
}

#[test]
fn other_cycles_are_left_to_the_column_path() {
    // Relative humidity needs a saturation formula: refused without one.
    let cycle = invented_cycle(1, 1, 2, 2, Some(HumidityKind::RelativeHumidity));
    assert!(matches!(
        IsobaricKernel::new(&cycle, &[]),
        Err(NotApplicable::Humidity { .. })
    ));
    let with = IsobaricKernel::with_saturation(
        &cycle,
        &[],
        SaturationFormula::WmoMagnus,
        RelativeHumidityPhase::Water,
    );
    assert!(with.is_ok_and(|k| k.converts_humidity()));
    let mut dry = invented_cycle(1, 1, 2, 2, None);
    dry.surface = None;
    assert_eq!(
        IsobaricKernel::new(&dry, &[]).err(),
        Some(NotApplicable::NoSurface)
    );
    let mut hybrid = invented_cycle(1, 1, 2, 2, None);
    hybrid.vertical = Vertical::Hybrid {
        a_half_pa: vec![0.0; 32],
        b_half: vec![1.0; 32],
    };
    assert_eq!(
        IsobaricKernel::new(&hybrid, &[]).err(),
        Some(NotApplicable::HybridLevels)
    );
    let mut unordered = invented_cycle(1, 1, 2, 2, None);
    if let Vertical::Isobaric { pressure_pa } = &mut unordered.vertical {
        pressure_pa.swap(3, 4);
    }
    assert!(matches!(
        IsobaricKernel::new(&unordered, &[]),
        Err(NotApplicable::Levels { levels: 31 })
    ));
    // The kernel refuses a cycle it was not prepared for.
    let a = invented_cycle(1, 1, 2, 2, None);
    let b = invented_cycle(1, 1, 2, 2, Some(HumidityKind::SpecificHumidity));
    let kernel = IsobaricKernel::new(&a, &[]).expect("applies");
    assert!(matches!(
        kernel.run(&b, &|_| {}),
        Err(NotApplicable::OtherCycle { .. })
    ));
    // Progress is reported once per step.
    let steps = std::sync::atomic::AtomicUsize::new(0);
    let c = invented_cycle(2, 3, 2, 2, None);
    IsobaricKernel::new(&c, &[])
        .expect("applies")
        .run(&c, &|done| {
            steps.store(done, std::sync::atomic::Ordering::SeqCst);
        })
        .expect("run");
    assert_eq!(steps.into_inner(), 6);
}

/// A cycle without surface fields whose file carries heights on its levels: the invented
/// cycle's, with its surface dropped, and heights from the column path's own standard
/// atmosphere plus noise; edge cases in row 0 of step (0, 0).
fn surface_less_cycle() -> Cycle {
    let mut cycle = invented_cycle(2, 2, 5, 24, Some(HumidityKind::SpecificHumidity));
    cycle.surface = None;
    let (members, times, n, rows, cols) = cycle.temperature.dim();
    let p = levels_pa();
    let mut rng = Lcg(7);
    let mut z = Array5::<f32>::zeros((members, times, n, rows, cols));
    for ((_, _, k, _, _), v) in z.indexed_iter_mut() {
        *v = (us_standard_atmosphere_height_at_pressure(p[k]) + 80.0 * rng.next()) as f32;
    }
    cycle.file_heights = Some(z);
    let t = &mut cycle.temperature;
    // Missing temperature at the lowest level: the whole column is masked.
    t[[0, 0, 0, 0, 1]] = f32::NAN;
    // Missing (500 hPa), not positive (250 hPa) and infinite (850 hPa) higher up: masked
    // from there up.
    t[[0, 0, 12, 0, 2]] = f32::NAN;
    t[[0, 0, 17, 0, 3]] = -3.0;
    t[[0, 0, 5, 0, 4]] = f32::INFINITY;
    // A jump beyond the series' limit between adjacent levels.
    t[[0, 0, 8, 0, 5]] = 500.0;
    // An isothermal column.
    for k in 0..n {
        t[[0, 0, k, 0, 6]] = 250.0;
    }
    cycle
}

/// The heights and flags of `out` are those of `heights`, bit for bit.
fn same_bits_as_kernel(heights: &Heights, out: &KernelOutput) -> bool {
    let bits = |a: &Array5<f32>| a.iter().map(|v| v.to_bits()).collect::<Vec<_>>();
    bits(&heights.geopotential_height) == bits(&out.geopotential_height)
        && heights.below_ground == out.below_ground
}

/// Cycles without surface fields whose columns all start at the lowest level (the standard
/// atmosphere's height there, or the file's own height at that level) go through the kernel,
/// the lowest level taken as a surface lying on it: the column path's answers (1 mm, or one
/// `f32` step), nothing below ground, the same masking. A column that starts higher (no file
/// height at the lowest level) or a layer reaching below the lowest level leaves the cycle
/// to the column path.
#[test]
fn cycles_without_surface_fields_start_at_the_lowest_level_in_the_kernel() {
    let cycle = surface_less_cycle();
    let (formula, phase) = (
        SaturationFormula::default(),
        RelativeHumidityPhase::default(),
    );
    // Layers from the lowest level up (none reaches below it).
    let in_range: Vec<Layer> = [
        (100_000.0, 50_000.0),
        (96_250.0, 41_000.0),
        (70_500.0, 150.0),
    ]
    .into_iter()
    .map(|(bottom_pa, top_pa)| Layer { bottom_pa, top_pa })
    .collect();
    let z_std = us_standard_atmosphere_height_at_pressure(100_000.0);
    let mut no_heights = cycle.clone();
    no_heights.file_heights = None;
    let mut nan_at_lowest = cycle.clone();
    if let Some(z) = nan_at_lowest.file_heights.as_mut() {
        z[[1, 1, 0, 3, 7]] = f32::NAN;
    }
    let cases = [
        // No file heights: the standard atmosphere's height at 1000 hPa everywhere.
        (
            "standard atmosphere",
            &no_heights,
            NoSurfaceReference::FileHeightAtLowestLevel,
            LowestLevelHeight::Everywhere(z_std),
        ),
        // The file's heights, level 0 everywhere.
        (
            "file heights",
            &cycle,
            NoSurfaceReference::FileHeightAtLowestLevel,
            LowestLevelHeight::FromFile,
        ),
        // Asked at 1000 hPa: level 0 for every column, a missing height masks its column.
        (
            "file heights at 1000 hPa",
            &nan_at_lowest,
            NoSurfaceReference::FileHeightAt {
                pressure_pa: 100_000.0,
            },
            LowestLevelHeight::FromFile,
        ),
    ];
    for (label, cycle, reference, start) in cases {
        let config = ComputeConfig {
            layers: in_range.clone(),
            no_surface_reference: reference,
            ..ComputeConfig::default()
        };
        let kernel = IsobaricKernel::from_lowest_level(cycle, &in_range, formula, phase, start)
            .unwrap_or_else(|e| panic!("{label}: {e}"));
        let out = kernel.run(cycle, &|_| {}).expect(label);
        let fast = compute_heights(cycle, &config, &|_| {}).expect(label);
        assert!(
            same_bits_as_kernel(&fast, &out),
            "{label}: computed by the kernel"
        );
        let columns = compute_heights_by_columns(cycle, &config, &|_| {}).expect(label);
        let (worst, n) = compare(&fast, &columns);
        println!("{label}: {n} values, largest difference {worst:e} m");
        assert!(fast.below_ground.iter().all(|&b| b == 0), "{label}");
        assert_eq!(fast.method, columns.method, "{label}");
        // The masked columns of row 0, step (0, 0).
        let z = &fast.geopotential_height;
        assert!(
            z.slice(s![0, 0, .., 0, 1]).iter().all(|v| v.is_nan()),
            "{label}"
        );
        assert!(
            z[[0, 0, 11, 0, 2]].is_finite() && z[[0, 0, 12, 0, 2]].is_nan(),
            "{label}"
        );
        assert!(
            z.slice(s![0, 0, 12.., 0, 2]).iter().all(|v| v.is_nan()),
            "{label}"
        );
    }
    // The column whose 1000 hPa height is missing, asked at 1000 hPa: masked.
    let config = ComputeConfig {
        no_surface_reference: NoSurfaceReference::FileHeightAt {
            pressure_pa: 100_000.0,
        },
        ..ComputeConfig::default()
    };
    let z = compute_heights(&nan_at_lowest, &config, &|_| {})
        .expect("masked column")
        .geopotential_height;
    assert!(z.slice(s![1, 1, .., 3, 7]).iter().all(|v| v.is_nan()));

    // At the lowest level that has a height, where that is level 1 for one column: the
    // column path, which starts that column at 975 hPa.
    let config = ComputeConfig::default();
    let fast = compute_heights(&nan_at_lowest, &config, &|_| {}).expect("column path");
    let columns = compute_heights_by_columns(&nan_at_lowest, &config, &|_| {}).expect("columns");
    let bits = |h: &Heights| {
        h.geopotential_height
            .iter()
            .map(|v| v.to_bits())
            .collect::<Vec<_>>()
    };
    assert_eq!(bits(&fast), bits(&columns), "the column path's own bits");
    assert!(fast.geopotential_height[[1, 1, 1, 3, 7]].is_finite());
    // A layer from below the lowest level, or a lowest level not exact in f32: refused.
    let below = IsobaricKernel::from_lowest_level(
        &cycle,
        &layers(),
        formula,
        phase,
        LowestLevelHeight::FromFile,
    );
    assert!(
        matches!(below, Err(NotApplicable::LowestLevel { .. })),
        "{below:?}"
    );
    let mut odd = no_heights.clone();
    if let Vertical::Isobaric { pressure_pa } = &mut odd.vertical {
        pressure_pa[0] = 100_000.3;
    }
    let odd_kernel = IsobaricKernel::from_lowest_level(
        &odd,
        &[],
        formula,
        phase,
        LowestLevelHeight::Everywhere(z_std),
    );
    assert!(matches!(odd_kernel, Err(NotApplicable::LowestLevel { .. })));
    // Without file heights, `FromFile` has nothing to start from.
    let none = IsobaricKernel::from_lowest_level(
        &no_heights,
        &[],
        formula,
        phase,
        LowestLevelHeight::FromFile,
    );
    assert!(matches!(none, Err(NotApplicable::LowestLevel { .. })));
}

fn shared_data(relative: &str) -> Option<PathBuf> {
    let path = PathBuf::from(concat!(env!("CARGO_MANIFEST_DIR"), "/../shared/data")).join(relative);
    if path.exists() {
        Some(path)
    } else {
        eprintln!(
            "skipped: {} is absent (the shared data folder is needed)",
            path.display()
        );
        None
    }
}

#[test]
fn kernel_matches_the_column_path_on_a_real_gfs_cycle() {
    // GFS 2.5° global, 2011-01-10 12Z + 120 h (PROVENANCE.md in the folder): real
    // temperature on 26 levels over real orography, so that many columns have levels below
    // the ground. Both paths run on its own relative humidity, then on dry columns (the
    // humidity dropped), then on a specific humidity made from it with Bolton's formula.
    let Some(path) = shared_data(
        "gfs-2p5deg-global-2011011012-f120/gfs_2p5deg_2011011012_f120_isobaric_subset.nc",
    ) else {
        return;
    };
    let real = read_cycle(&path, &IngestConfig::default()).expect("reading the GFS file");
    let p = match &real.vertical {
        Vertical::Isobaric { pressure_pa } => pressure_pa.clone(),
        Vertical::Hybrid { .. } => panic!("GFS is isobaric"),
    };
    let on_levels = |bottom: f64, top: f64| Layer {
        bottom_pa: bottom,
        top_pa: top,
    };
    let layers = vec![
        on_levels(100_000.0, 50_000.0),
        on_levels(85_000.0, 70_000.0),
        on_levels(96_250.0, 41_000.0),
    ];
    let kind = real.humidity.as_ref().map(|h| h.kind);
    assert_eq!(kind, Some(HumidityKind::RelativeHumidity), "GFS gives RH");
    let (fast, columns) = both_paths(&real, layers.clone());
    let (worst, n) = compare(&fast, &columns);
    println!("GFS 2.5° relative humidity: {n} values, largest difference {worst:e} m");
    assert!(n > 10_000, "most values are finite ({n})");
    let mut dry = real.clone();
    dry.humidity = None;
    let (fast, columns) = both_paths(&dry, layers.clone());
    let (worst, n) = compare(&fast, &columns);
    let buried = fast.below_ground.iter().filter(|&&b| b == 1).count();
    println!("GFS 2.5° dry: {n} values, {buried} below ground, largest difference {worst:e} m");
    assert!(buried > 0, "the orography puts some levels below ground");

    if let Some(h) = &real.humidity {
        if h.kind == HumidityKind::RelativeHumidity {
            let mut moist = real.clone();
            let mut q = h.values.clone();
            for ((idx, v), &t) in q.indexed_iter_mut().zip(real.temperature.iter()) {
                let tc = f64::from(t) - 273.15;
                // Bolton (1980), e_s = 6.112 exp(17.67 t / (t + 243.5)) hPa.
                let e = f64::from(*v) * 611.2 * (17.67 * tc / (tc + 243.5)).exp();
                let pk = p[idx.2];
                *v = (0.622 * e / (pk - 0.378 * e)) as f32;
            }
            moist.humidity = Some(Humidity {
                kind: HumidityKind::SpecificHumidity,
                values: q,
                missing_levels: h.missing_levels.clone(),
            });
            let (fast, columns) = both_paths(&moist, layers);
            let (worst, n) = compare(&fast, &columns);
            println!("GFS 2.5° moist: {n} values, largest difference {worst:e} m");
        }
    }
}

#[test]
fn thickness_alone_equals_thickness_with_heights() {
    let mut cycle = invented_cycle(1, 2, 6, 30, Some(HumidityKind::SpecificHumidity));
    plant_edge_cases(&mut cycle);
    let layers = layers();
    let kernel = IsobaricKernel::new(&cycle, &layers).expect("applies");
    let full = kernel.run(&cycle, &|_| {}).expect("run");
    let alone = kernel.run_layers(&cycle, &|_| {}).expect("run");
    assert_eq!(full.thickness.len(), alone.len());
    for (a, b) in full.thickness.iter().zip(&alone) {
        assert_eq!(a.layer, b.layer);
        let bits = |v: &Array4<f32>| v.iter().map(|f| f.to_bits()).collect::<Vec<_>>();
        assert_eq!(bits(&a.values), bits(&b.values), "{}", a.layer.label_hpa());
        assert_eq!(a.below_ground, b.below_ground);
    }
    // The layer above the top level is masked everywhere.
    assert!(alone[7].values.iter().all(|v| v.is_nan()));
}

/// The steps of a cycle run one at a time from views held anywhere (here: copies, in
/// reverse order) store exactly what the whole run stores; steps that do not fit the
/// outputs are refused before anything is written.
#[test]
fn steps_run_one_at_a_time_equal_the_whole_run() {
    let mut cycle = invented_cycle(2, 3, 4, 40, Some(HumidityKind::SpecificHumidity));
    plant_edge_cases(&mut cycle);
    let kernel = IsobaricKernel::new(&cycle, &layers()).expect("kernel");
    let whole = kernel.run(&cycle, &|_| {}).expect("run");
    let mut out = kernel.outputs(cycle.temperature.dim());
    let surface = cycle.surface.as_ref().expect("surface");
    let humidity = cycle.humidity.as_ref().expect("humidity");
    for m in (0..2).rev() {
        for t in (0..3).rev() {
            let temperature = cycle.temperature.slice(s![m, t, .., .., ..]).to_owned();
            let q = humidity.values.slice(s![m, t, .., .., ..]).to_owned();
            let step = StepFields {
                t: temperature.view(),
                q: Some(q.view()),
                ps: surface.pressure_pa.slice(s![m, t, .., ..]),
                zs: surface.height_m.slice(s![m, t, .., ..]),
            };
            kernel.run_step(step, (m, t), &mut out).expect("step");
        }
    }
    let bits = |a: &Array5<f32>| a.iter().map(|v| v.to_bits()).collect::<Vec<_>>();
    assert_eq!(
        bits(&out.geopotential_height),
        bits(&whole.geopotential_height)
    );
    assert_eq!(out.below_ground, whole.below_ground);
    for (a, b) in out.thickness.iter().zip(&whole.thickness) {
        let bits4 = |a: &Array4<f32>| a.iter().map(|v| v.to_bits()).collect::<Vec<_>>();
        assert_eq!(bits4(&a.values), bits4(&b.values));
        assert_eq!(a.below_ground, b.below_ground);
    }

    let fields = |m: usize, t: usize, with_q: bool| StepFields {
        t: cycle.temperature.slice(s![m, t, .., .., ..]),
        q: with_q.then(|| humidity.values.slice(s![m, t, .., .., ..])),
        ps: surface.pressure_pa.slice(s![m, t, .., ..]),
        zs: surface.height_m.slice(s![m, t, .., ..]),
    };
    let mut fresh = kernel.outputs(cycle.temperature.dim());
    assert!(matches!(
        kernel.run_step(fields(0, 0, true), (2, 0), &mut fresh),
        Err(NotApplicable::StepIndex { member: 2, .. })
    ));
    assert!(matches!(
        kernel.run_step(fields(0, 0, false), (0, 0), &mut fresh),
        Err(NotApplicable::Shape {
            field: "humidity",
            ..
        })
    ));
    let narrow = StepFields {
        t: cycle.temperature.slice(s![0, 0, .., .., ..3]),
        ..fields(0, 0, true)
    };
    assert!(matches!(
        kernel.run_step(narrow, (0, 0), &mut fresh),
        Err(NotApplicable::Shape {
            field: "air_temperature",
            ..
        })
    ));
    assert!(
        fresh.geopotential_height.iter().all(|&z| z == 0.0),
        "nothing written by a refused step"
    );
}

/// The level step writes heights and flags straight into contiguous output rows; outputs laid
/// out otherwise (here column-major) go through scratch rows and must come out the same,
/// every element written. Both layouts are pre-filled with garbage, flags set everywhere:
/// `run` leaves the flags of levels where no column is below ground unread in its zeroed
/// outputs, and steps run into used outputs must clear them.
#[test]
fn steps_into_outputs_of_another_layout_equal_the_whole_run() {
    for column_major in [true, false] {
        steps_into_used_outputs_equal_the_whole_run(column_major);
    }
}

fn steps_into_used_outputs_equal_the_whole_run(column_major: bool) {
    let mut cycle = invented_cycle(1, 2, 5, 40, Some(HumidityKind::SpecificHumidity));
    plant_edge_cases(&mut cycle);
    let kernel = IsobaricKernel::new(&cycle, &layers()).expect("kernel");
    let whole = kernel.run(&cycle, &|_| {}).expect("run");
    let dim = cycle.temperature.dim();
    let fresh = kernel.outputs(dim);
    let shape = dim.set_f(column_major);
    let mut out = KernelOutput {
        geopotential_height: Array5::from_elem(shape, -1.0e9_f32),
        below_ground: Array5::from_elem(shape, 7_u8),
        thickness: fresh.thickness,
    };
    assert_eq!(out.geopotential_height.is_standard_layout(), !column_major);
    let surface = cycle.surface.as_ref().expect("surface");
    let humidity = cycle.humidity.as_ref().expect("humidity");
    for t in 0..2 {
        let step = StepFields {
            t: cycle.temperature.slice(s![0, t, .., .., ..]),
            q: Some(humidity.values.slice(s![0, t, .., .., ..])),
            ps: surface.pressure_pa.slice(s![0, t, .., ..]),
            zs: surface.height_m.slice(s![0, t, .., ..]),
        };
        kernel.run_step(step, (0, t), &mut out).expect("step");
    }
    let bits = |a: &Array5<f32>| a.iter().map(|v| v.to_bits()).collect::<Vec<_>>();
    assert_eq!(
        bits(&out.geopotential_height),
        bits(&whole.geopotential_height)
    );
    assert_eq!(out.below_ground, whole.below_ground);
    assert!(whole.below_ground.iter().any(|&b| b == 1), "some flags set");
}
