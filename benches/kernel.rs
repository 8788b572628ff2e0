//! The batch kernel on a 0.25° global grid (721 x 1440, 37 isobaric levels, float32), built
//! in memory: heights on all levels, thickness of one layer, and a memory-floor reference
//! pass that reads temperature and humidity once and writes one `f32` per point-level.
//!
//! Run with `cargo bench --bench kernel` (about two minutes); `cargo bench --bench kernel --
//! --test` runs each once. Throughput is in point-levels (grid points x levels) per second.
//! The fields are invented (smooth, plausible, with mountains so that levels lie below
//! ground): they exercise the code paths; the physics is tested in `tests/kernel.rs`.

use std::path::PathBuf;
use std::time::Duration;

use criterion::{criterion_group, criterion_main, BenchmarkId, Criterion, Throughput};
use ndarray::{Array4, Array5, Axis, Zip};

use hypsogrid::compute::{compute_heights, compute_heights_by_columns, ComputeConfig};
use hypsogrid::kernel::IsobaricKernel;
use hypsogrid::lanes::Lanes;
use hypsogrid::model::{
    zeroed_field, Cycle, Grid, Humidity, HumidityKind, Layer, Surface, Vertical,
};
use hypsogrid::physics::Constants;

const ROWS: usize = 721;
const COLS: usize = 1440;

/// The 37 pressure levels of the ECMWF ERA5 pressure-level data sets, hPa (from memory),
/// bottom-up.
const LEVELS_HPA: [f64; 37] = [
    1000.0, 975.0, 950.0, 925.0, 900.0, 875.0, 850.0, 825.0, 800.0, 775.0, 750.0, 700.0, 650.0,
    600.0, 550.0, 500.0, 450.0, 400.0, 350.0, 300.0, 250.0, 225.0, 200.0, 175.0, 150.0, 125.0,
    100.0, 70.0, 50.0, 30.0, 20.0, 10.0, 7.0, 5.0, 3.0, 2.0, 1.0,
];

/// Invented mountain ranges: (lat°, lon°, peak m, radius°).
const MOUNTAINS: [(f64, f64, f64, f64); 6] = [
    (33.0, 88.0, 5200.0, 9.0),
    (42.0, 252.0, 2800.0, 7.0),
    (-18.0, 291.0, 4200.0, 4.0),
    (74.0, 318.0, 3000.0, 8.0),
    (-80.0, 60.0, 3200.0, 15.0),
    (46.0, 9.0, 2500.0, 3.0),
];

fn ground_height(lat: f64, lon: f64) -> f64 {
    MOUNTAINS
        .iter()
        .map(|&(mlat, mlon, peak, radius)| {
            let dlon = (lon - mlon + 540.0).rem_euclid(360.0) - 180.0;
            let dx = dlon * mlat.to_radians().cos().max(0.05);
            let d2 = (lat - mlat).powi(2) + dx * dx;
            peak * (-d2 / (radius * radius)).exp()
        })
        .sum()
}

/// A smooth global cycle: temperature falling 6.5 K/km to a tropopause, a warming
/// stratosphere, a wave in longitude, humidity decaying with height, surface pressure from
/// the ground height.
fn global_cycle(rows: usize, cols: usize) -> Cycle {
    let p: Vec<f64> = LEVELS_HPA.iter().map(|h| h * 100.0).collect();
    let n = p.len();
    let lat: Vec<f64> = (0..rows)
        .map(|r| 90.0 - 180.0 * r as f64 / (rows - 1) as f64)
        .collect();
    let lon: Vec<f64> = (0..cols).map(|c| 360.0 * c as f64 / cols as f64).collect();
    // Standard-atmosphere-like height of each level, for the profile shape.
    let z_level: Vec<f64> = p
        .iter()
        .map(|&pk| 44_330.8 * (1.0 - (pk / 101_325.0).powf(0.190263)))
        .collect();
    let mut base = Array4::<f64>::zeros((1, n, rows, 1));
    for k in 0..n {
        for r in 0..rows {
            let s2 = lat[r].to_radians().sin().powi(2);
            let t0 = 300.0 - 45.0 * s2;
            let trop = (t0 - 0.0065 * z_level[k]).max(200.0 + 15.0 * s2);
            let strat = 0.0018 * (z_level[k] - 20_000.0).max(0.0);
            base[[0, k, r, 0]] = trop + strat;
        }
    }
    let wave = |r: usize, c: usize| {
        (3.0 * lon[c].to_radians()).cos() * (2.0 * lat[r].to_radians()).sin().powi(2)
    };
    // Laid out as the reader lays out the fields it reads (huge pages where offered).
    let mut t = zeroed_field((1, 1, n, rows, cols));
    let mut q = zeroed_field((1, 1, n, rows, cols));
    Zip::indexed(&mut t)
        .and(&mut q)
        .par_for_each(|(_, _, k, r, c), tv, qv| {
            let w = wave(r, c);
            let tk = base[[0, k, r, 0]] + 6.0 * w;
            *tv = tk as f32;
            *qv = (0.018 * (-z_level[k] / 2500.0).exp() * (0.6 + 0.3 * w)).max(2.0e-6) as f32;
        });
    let mut ps = Array4::<f32>::zeros((1, 1, rows, cols));
    let mut zs = Array4::<f32>::zeros((1, 1, rows, cols));
    Zip::indexed(&mut ps)
        .and(&mut zs)
        .par_for_each(|(_, _, r, c), pv, zv| {
            let z = ground_height(lat[r], lon[c]);
            *zv = z as f32;
            *pv = ((101_300.0 + 1200.0 * wave(r, c)) * (-z / 8000.0).exp()) as f32;
        });
    Cycle {
        source: PathBuf::from("in-memory-0p25deg"),
        reference_time: None,
        lead_times_s: vec![0],
        members: 1,
        grid: Grid {
            latitudes: lat,
            longitudes: lon,
        },
        vertical: Vertical::Isobaric { pressure_pa: p },
        levels_top_down_in_file: false,
        temperature: t,
        humidity: Some(Humidity {
            kind: HumidityKind::SpecificHumidity,
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

/// `cycle` with its specific humidity given as relative humidity (a fraction) under the
/// saturation settings of `config`, so that the kernel converts it back.
fn with_relative_humidity(cycle: &Cycle, config: &ComputeConfig) -> Cycle {
    use hypsogrid::physics::humidity::{
        relative_humidity_from_vapour_pressure, vapour_pressure_from_specific_humidity,
    };
    let Vertical::Isobaric { pressure_pa } = &cycle.vertical else {
        unreachable!("the bench cycle is isobaric")
    };
    let eps = cycle.constants.molar_mass_ratio;
    let (formula, phase) = (config.saturation_formula, config.rh_phase);
    let mut out = cycle.clone();
    let h = out.humidity.as_mut().expect("the bench cycle has humidity");
    h.kind = HumidityKind::RelativeHumidity;
    Zip::indexed(&mut h.values)
        .and(&cycle.temperature)
        .par_for_each(|(_, _, k, _, _), v, &t| {
            let e = vapour_pressure_from_specific_humidity(f64::from(*v), pressure_pa[k], eps);
            *v = relative_humidity_from_vapour_pressure(e, f64::from(t), formula, phase) as f32;
        });
    out
}

/// The memory floor: read T and q once, write one `f32` (here T_v) per point-level, rows in
/// parallel, into `out`.
fn virtual_temperature_pass(cycle: &Cycle, out: &mut Array5<f32>) {
    let Some(h) = &cycle.humidity else {
        return;
    };
    let k = (1.0 / cycle.constants.molar_mass_ratio - 1.0) as f32;
    Zip::from(out.lanes_mut(Axis(4)))
        .and(cycle.temperature.lanes(Axis(4)))
        .and(h.values.lanes(Axis(4)))
        .par_for_each(|mut o, t, q| {
            Zip::from(&mut o)
                .and(&t)
                .and(&q)
                .for_each(|o, &t, &q| *o = t * (1.0 + k * q));
        });
}

fn kernel_0p25deg(c: &mut Criterion) {
    let cycle = global_cycle(ROWS, COLS);
    let levels = LEVELS_HPA.len();
    let point_levels = (ROWS * COLS * levels) as u64;
    let no_layers = ComputeConfig::default();
    let one_layer = ComputeConfig {
        layers: vec![Layer {
            bottom_pa: 100_000.0,
            top_pa: 50_000.0,
        }],
        ..ComputeConfig::default()
    };
    let kernel = IsobaricKernel::new(&cycle, &[]).expect("the fast kernel applies");
    let layer_kernel = IsobaricKernel::new(&cycle, &one_layer.layers).expect("applies");
    {
        let h = compute_heights(&cycle, &no_layers, &|_| {}).expect("computing");
        let buried = h.below_ground.iter().filter(|&&b| b == 1).count();
        eprintln!(
            "0.25° cycle: {ROWS} x {COLS} x {levels}, {:.1}% of point-levels below ground; SIMD build: {}",
            100.0 * buried as f64 / point_levels as f64,
            kernel.lanes().name()
        );
    }

    let mut group = c.benchmark_group("kernel_0p25deg");
    group
        .sample_size(10)
        .warm_up_time(Duration::from_secs(1))
        .measurement_time(Duration::from_secs(4))
        .throughput(Throughput::Elements(point_levels));
    group.bench_function("heights_all_levels", |b| {
        b.iter(|| compute_heights(&cycle, &no_layers, &|_| {}).expect("computing"))
    });
    // The narrower SIMD builds of the same kernel (same bits), for the README's table.
    for lanes in Lanes::ALL {
        if lanes >= kernel.lanes() || !lanes.available() {
            continue;
        }
        let narrower = kernel.clone().with_lanes(lanes);
        let name = format!("heights_all_levels_{}_build", lanes.name());
        group.bench_function(name, |b| {
            b.iter(|| narrower.run(&cycle, &|_| {}).expect("computing"))
        });
    }
    // The same cycle without its surface fields (columns started at the standard
    // atmosphere's height of 1000 hPa): the kernel too, the lowest level as the surface.
    let mut surface_less = cycle.clone();
    surface_less.surface = None;
    group.bench_function("heights_all_levels_no_surface_fields", |b| {
        b.iter(|| compute_heights(&surface_less, &no_layers, &|_| {}).expect("computing"))
    });
    // The same cycle with its humidity as relative humidity (the default settings: the WMO
    // Magnus form over water): the kernel forms specific humidity per point-level on its way
    // (a Magnus exponential and two divisions each).
    let relative = with_relative_humidity(&cycle, &no_layers);
    let relative_kernel = IsobaricKernel::with_saturation(
        &relative,
        &[],
        no_layers.saturation_formula,
        no_layers.rh_phase,
    )
    .expect("the kernel applies to relative humidity");
    group.bench_function("heights_all_levels_relative_humidity", |b| {
        b.iter(|| relative_kernel.run(&relative, &|_| {}).expect("computing"))
    });
    group.bench_function("heights_and_thickness_1000_500", |b| {
        b.iter(|| layer_kernel.run(&cycle, &|_| {}).expect("computing"))
    });
    group.bench_function("thickness_1000_500_only", |b| {
        b.iter(|| layer_kernel.run_layers(&cycle, &|_| {}).expect("computing"))
    });
    // Fresh output allocated as the kernel allocates its own (untouched, offered for huge
    // pages), so that the floor pays the same first-touch cost as the kernel.
    group.bench_function(BenchmarkId::new("memory_floor_tv", "fresh_output"), |b| {
        b.iter(|| {
            let mut out = kernel.outputs(cycle.temperature.dim()).geopotential_height;
            virtual_temperature_pass(&cycle, &mut out);
            out
        })
    });
    let mut reused = Array5::<f32>::zeros(cycle.temperature.dim());
    group.bench_function(BenchmarkId::new("memory_floor_tv", "reused_output"), |b| {
        b.iter(|| virtual_temperature_pass(&cycle, &mut reused))
    });
    group.finish();

    // The column path on the same grid, for the old-versus-new ratio (about a second per run).
    let mut group = c.benchmark_group("kernel_0p25deg_column_path");
    group
        .sample_size(10)
        .warm_up_time(Duration::from_secs(1))
        .measurement_time(Duration::from_secs(10))
        .throughput(Throughput::Elements(point_levels));
    group.bench_function("heights_all_levels", |b| {
        b.iter(|| compute_heights_by_columns(&cycle, &no_layers, &|_| {}).expect("computing"))
    });
    // What a cycle without surface fields took before the kernel took it.
    group.bench_function("heights_all_levels_no_surface_fields", |b| {
        b.iter(|| {
            compute_heights_by_columns(&surface_less, &no_layers, &|_| {}).expect("computing")
        })
    });
    group.finish();
}

criterion_group!(benches, kernel_0p25deg);
criterion_main!(benches);
