//! Verification scores (`hypsogrid::products::verify`).
//!
//! - The weighted scores against NumPy computing the same statistics on the same arrays
//!   (NumPy is a general-purpose reference library; the project's Python venv has it).
//! - The consistency check on the real GFS files in `../shared/data/` (their PROVENANCE.md
//!   quotes the residuals measured independently).
//! - Forecast against analysis on constructed cycles whose answer is known by construction
//!   or by the hypsometric equation's closed form for isothermal layers.
//!
//! The constructed cycles are invented test values (smooth functions), written by a small
//! CF NetCDF writer in this file that holds the crate's NetCDF session lock.

use std::path::{Path, PathBuf};
use std::process::Command;

use ndarray::s;

use hypsogrid::compute::ComputeConfig;
use hypsogrid::ingest::IngestConfig;
use hypsogrid::model::{Layer, Vertical};
use hypsogrid::netcdf_session::NoFileOpen;
use hypsogrid::products::verify::{
    consistency, verify, weighted_scores, ConsistencyRequest, Region, ReportKind, ScoreRow,
    TruthSource, VerifyError, VerifyRequest,
};
use hypsogrid::query::{BoundingBox, LoadedCycle, Quantity, TimeSelector};

/// Standard gravity, m s⁻² (WMO definition of the geopotential metre).
const G0: f64 = 9.80665;

// ---------------------------------------------------------------------------------------------
// A small CF writer for constructed cycles.
// ---------------------------------------------------------------------------------------------

type FieldFn<'a> = &'a dyn Fn(usize, usize, usize, usize) -> f64;

/// One constructed cycle: isobaric levels (hPa, bottom-up), one member, dry air.
/// Field functions take (time, level, row, col) and return SI values; `NaN` is written as
/// the fill value.
struct Constructed<'a> {
    lats: Vec<f64>,
    lons: Vec<f64>,
    levels_hpa: Vec<f64>,
    lead_hours: Vec<f64>,
    time_units: &'a str,
    temperature: FieldFn<'a>,
    heights: Option<FieldFn<'a>>,
}

const FILL: f32 = 1.0e20;

impl Constructed<'_> {
    fn write(&self, path: &Path) -> PathBuf {
        let _session = hypsogrid::netcdf_session::lock();
        let mut f = netcdf::create(path).expect("creating a test file");
        f.add_attribute("Conventions", "CF-1.8").expect("attribute");
        let (nt, nk, ny, nx) = (
            self.lead_hours.len(),
            self.levels_hpa.len(),
            self.lats.len(),
            self.lons.len(),
        );
        for (name, n) in [("time", nt), ("plev", nk), ("lat", ny), ("lon", nx)] {
            f.add_dimension(name, n).expect("dimension");
        }
        let coords: [(&str, &str, &str, Vec<f64>); 4] = [
            ("lat", "degrees_north", "latitude", self.lats.clone()),
            ("lon", "degrees_east", "longitude", self.lons.clone()),
            (
                "plev",
                "Pa",
                "air_pressure",
                self.levels_hpa.iter().map(|p| p * 100.0).collect(),
            ),
            ("time", self.time_units, "time", self.lead_hours.clone()),
        ];
        for (name, units, std, vals) in coords {
            let mut v = f.add_variable::<f64>(name, &[name]).expect("variable");
            v.put_attribute("units", units).expect("units");
            v.put_attribute("standard_name", std)
                .expect("standard_name");
            v.put_values(&vals, ..).expect("values");
        }
        let dims = ["time", "plev", "lat", "lon"];
        let mut fields: Vec<(&str, &str, &str, FieldFn<'_>)> =
            vec![("t", "K", "air_temperature", self.temperature)];
        if let Some(h) = self.heights {
            fields.push(("gh", "gpm", "geopotential_height", h));
        }
        for (name, units, std, func) in fields {
            let mut vals = Vec::with_capacity(nt * nk * ny * nx);
            for t in 0..nt {
                for k in 0..nk {
                    for r in 0..ny {
                        for c in 0..nx {
                            let x = func(t, k, r, c);
                            vals.push(if x.is_finite() { x as f32 } else { FILL });
                        }
                    }
                }
            }
            let mut v = f.add_variable::<f32>(name, &dims).expect("variable");
            v.put_attribute("_FillValue", FILL).expect("fill");
            v.put_attribute("units", units).expect("units");
            v.put_attribute("standard_name", std)
                .expect("standard_name");
            v.put_values(&vals, ..).expect("values");
        }
        path.to_path_buf()
    }
}

fn load(path: &Path) -> LoadedCycle {
    LoadedCycle::load(path, &IngestConfig::default(), &ComputeConfig::default())
        .unwrap_or_else(|e| panic!("loading {}: {e}", path.display()))
}

/// Rows 60° S to 60° N every 20°, columns every 30° (a global grid).
fn global_lats() -> Vec<f64> {
    (0..7).map(|i| -60.0 + 20.0 * i as f64).collect()
}
fn global_lons() -> Vec<f64> {
    (0..12).map(|i| 30.0 * i as f64).collect()
}
const LEVELS_HPA: [f64; 5] = [1000.0, 850.0, 700.0, 500.0, 300.0];

/// An invented, smooth temperature that varies in every direction, K.
fn varied_temperature(t: usize, k: usize, lat: f64, lon: f64) -> f64 {
    255.0 + 25.0 * lat.to_radians().cos() + 3.0 * lon.to_radians().sin() - 6.0 * k as f64
        + 0.5 * t as f64
}

fn row<'a>(rows: &'a [ScoreRow], level_hpa: f64, region: &str) -> &'a ScoreRow {
    rows.iter()
        .find(|r| r.level_hpa == Some(level_hpa) && r.region == region)
        .unwrap_or_else(|| panic!("no row for {level_hpa} hPa, {region}"))
}

fn lc_level(lc: &LoadedCycle, hpa: f64) -> usize {
    let Vertical::Isobaric { pressure_pa } = &lc.cycle.vertical else {
        panic!("isobaric levels expected");
    };
    pressure_pa
        .iter()
        .position(|&p| (p - hpa * 100.0).abs() < 1e-3)
        .unwrap_or_else(|| panic!("{hpa} hPa is not a level"))
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

// ---------------------------------------------------------------------------------------------
// Scores against NumPy.
// ---------------------------------------------------------------------------------------------

/// Deterministic pseudo-random numbers in [0, 1) (a 64-bit linear congruential generator,
/// Knuth's MMIX constants), so that the test needs no random crate.
struct Lcg(u64);
impl Lcg {
    fn next(&mut self) -> f64 {
        self.0 = self
            .0
            .wrapping_mul(6_364_136_223_846_793_005)
            .wrapping_add(1_442_695_040_888_963_407);
        (self.0 >> 11) as f64 / (1u64 << 53) as f64
    }
}

#[test]
fn weighted_scores_agree_with_numpy_on_the_same_arrays() {
    let python = PathBuf::from(concat!(
        env!("CARGO_MANIFEST_DIR"),
        "/target/python-venv/bin/python"
    ));
    if !python.exists() {
        eprintln!(
            "skipped: {} is absent (the project's Python venv with NumPy is needed)",
            python.display()
        );
        return;
    }
    // Heights around 5500 m with errors of a few metres, NaNs on either side, uneven
    // weights (cosines of random latitudes, some exactly zero as at a pole).
    let mut rng = Lcg(20_110_110);
    let n = 5000;
    let mut f = Vec::with_capacity(n);
    let mut t = Vec::with_capacity(n);
    let mut w = Vec::with_capacity(n);
    for i in 0..n {
        let truth = 5500.0 + 300.0 * (rng.next() - 0.5);
        let fc = truth + 3.0 + 8.0 * (rng.next() - 0.5) + 0.01 * (truth - 5500.0);
        t.push(if i % 97 == 5 { f32::NAN } else { truth as f32 });
        f.push(if i % 113 == 7 { f32::NAN } else { fc as f32 });
        let lat: f64 = 180.0 * rng.next() - 90.0;
        w.push(if i % 251 == 0 {
            0.0
        } else {
            lat.to_radians().cos().abs()
        });
    }
    let dir = tempfile::tempdir().expect("temporary folder");
    let data = dir.path().join("pairs.txt");
    let mut text = String::new();
    for i in 0..n {
        // f64 Display prints the shortest text that reads back to the same f64, so NumPy sees
        // exactly the values the crate sees.
        text.push_str(&format!(
            "{} {} {}\n",
            f64::from(f[i]),
            f64::from(t[i]),
            w[i]
        ));
    }
    std::fs::write(&data, text).expect("writing the arrays");
    let script = r#"
import sys, numpy as np
a = np.loadtxt(sys.argv[1])
f, t, w = a[:, 0], a[:, 1], a[:, 2]
ok = np.isfinite(f) & np.isfinite(t)
f, t, w = f[ok], t[ok], w[ok]
e = f - t
bias = np.average(e, weights=w)
rmse = np.sqrt(np.average(e**2, weights=w))
mae = np.average(np.abs(e), weights=w)
sd = np.sqrt(np.average((e - bias)**2, weights=w))
c = np.cov(f, t, aweights=w)
corr = c[0, 1] / np.sqrt(c[0, 0] * c[1, 1])
print(len(f), repr(float(w.sum())), repr(float(bias)), repr(float(rmse)), repr(float(mae)), repr(float(sd)), repr(float(corr)))
"#;
    let out = Command::new(&python)
        .arg("-c")
        .arg(script)
        .arg(&data)
        .output_with_no_file_open()
        .expect("running python");
    assert!(
        out.status.success(),
        "python failed: {}",
        String::from_utf8_lossy(&out.stderr)
    );
    let stdout = String::from_utf8_lossy(&out.stdout);
    let numbers: Vec<f64> = stdout
        .split_whitespace()
        .map(|x| x.parse().expect("a number from numpy"))
        .collect();
    assert_eq!(numbers.len(), 7, "numpy printed {stdout}");
    let s = weighted_scores(&f, &t, &w);
    println!("crate: {s:?}\nnumpy: {stdout}");
    assert_eq!(s.count, numbers[0] as usize);
    let rel = |a: f64, b: f64| (a - b).abs() / b.abs().max(1e-300);
    for (name, ours, theirs) in [
        ("weight_sum", s.weight_sum, numbers[1]),
        ("bias", s.bias_m, numbers[2]),
        ("rmse", s.rmse_m, numbers[3]),
        ("mae", s.mae_m, numbers[4]),
        ("sd", s.sd_m, numbers[5]),
        ("corr", s.corr, numbers[6]),
    ] {
        assert!(
            rel(ours, theirs) < 1e-9,
            "{name}: crate {ours}, numpy {theirs}"
        );
    }
}

// ---------------------------------------------------------------------------------------------
// Consistency on the real GFS files.
// ---------------------------------------------------------------------------------------------

/// Grid points per standard region on a grid, with the ±20° rows counted in both regions
/// adjacent to them (the rule stated in the module documentation).
fn region_counts(lats: &[f64], cols: usize) -> [(&'static str, usize); 4] {
    let rows = |p: &dyn Fn(f64) -> bool| lats.iter().filter(|&&l| p(l)).count() * cols;
    [
        ("global", lats.len() * cols),
        ("northern_extratropics", rows(&|l| l >= 20.0)),
        ("tropics", rows(&|l| l.abs() <= 20.0)),
        ("southern_extratropics", rows(&|l| l <= -20.0)),
    ]
}

/// GFS 2.5° global, 2011-01-10 12Z +120 h (PROVENANCE.md in its folder): the file carries
/// surface pressure and orography, so columns are integrated from the surface, and every
/// level's heights are compared with NCEP's own. The project measured rms 0.7–1.7 m at
/// 1000–300 hPa from the surface (tests/real_cycles.rs, unweighted); PROVENANCE.md quotes
/// 0.1–0.4 m per level pair below 400 hPa, whose sums over the column give that order.
#[test]
fn gfs_2p5deg_consistency_per_level_and_region() {
    let Some(path) = shared_data(
        "gfs-2p5deg-global-2011011012-f120/gfs_2p5deg_2011011012_f120_isobaric_subset.nc",
    ) else {
        return;
    };
    let lc = load(&path);
    let report = consistency(&lc, &ConsistencyRequest::default()).expect("consistency");
    assert_eq!(report.kind, ReportKind::Consistency);
    assert_eq!(report.truth_source, TruthSource::FileHeights);
    assert!(!report.regridded && !report.included_below_ground);
    assert_eq!(report.lead_time_s, 120 * 3600);
    assert_eq!(report.valid_time.as_deref(), Some("2011-01-15T12:00:00Z"));
    let lats = lc.cycle.grid.latitudes.clone();
    let counts = region_counts(&lats, lc.cycle.grid.cols());
    // 73 rows (90N..90S every 2.5°) and 144 columns: 29 rows north of and at 20N, 17 from
    // 20S to 20N.
    assert_eq!(counts[1].1, 29 * 144);
    assert_eq!(counts[2].1, 17 * 144);
    for hpa in [1000.0, 925.0, 850.0, 700.0, 500.0, 400.0, 300.0] {
        for (region, total) in counts {
            let r = row(&report.rows, hpa, region);
            println!(
                "GFS 2.5deg {hpa:>6} hPa {region:<22} count {:>5} (+{:>4} below ground) bias {:7.3} rmse {:6.3} sd {:6.3} corr {:.6}",
                r.scores.count, r.below_ground_excluded, r.scores.bias_m, r.scores.rmse_m, r.scores.sd_m, r.scores.corr
            );
            // Nothing in the file is masked: every point is either scored or below ground.
            assert_eq!(
                r.scores.count + r.below_ground_excluded,
                total,
                "{hpa} {region}"
            );
            if region == "global" {
                // Weighting by cos(latitude) lowers the weight of the many polar points, where
                // the residual is largest, so the weighted rms (this implementation: 0.48-1.49
                // m, a regression figure) lies a little below the unweighted one.
                assert!(
                    (0.3..=1.7).contains(&r.scores.rmse_m),
                    "{hpa} hPa global rms {} m outside 0.3-1.7 m",
                    r.scores.rmse_m
                );
                assert!(r.scores.corr > 0.9999, "{hpa} hPa corr {}", r.scores.corr);
            }
        }
        // The same points unweighted, as the project measured them (rms 0.7-1.7 m).
        let k = lc_level(&lc, hpa);
        let step = lc.heights.ready(0, 0).unwrap();
        let ours = step.geopotential_height.slice(s![k, .., ..]);
        let theirs = lc.cycle.file_heights.as_ref().expect("file heights");
        let theirs = theirs.slice(s![0, 0, k, .., ..]);
        let below = step.below_ground.slice(s![k, .., ..]);
        let (mut f, mut t) = (Vec::new(), Vec::new());
        for ((&a, &b), &g) in ours.iter().zip(theirs.iter()).zip(below.iter()) {
            if g == 0 {
                f.push(a);
                t.push(b);
            }
        }
        let unweighted = weighted_scores(&f, &t, &vec![1.0; f.len()]);
        println!(
            "GFS 2.5deg {hpa:>6} hPa unweighted rms {:.3} m",
            unweighted.rmse_m
        );
        assert_eq!(
            unweighted.count,
            row(&report.rows, hpa, "global").scores.count
        );
        // Limits a little around the project's measured 0.7-1.7 m (tests/real_cycles.rs).
        assert!(
            (0.6..=1.8).contains(&unweighted.rmse_m),
            "{hpa} hPa unweighted rms {} m",
            unweighted.rmse_m
        );
        if hpa <= 400.0 {
            // The surface pressure is 499 hPa or more (PROVENANCE.md): nothing lies below
            // 400 hPa, so every grid point of every region is scored.
            for (region, total) in counts {
                assert_eq!(row(&report.rows, hpa, region).scores.count, total);
            }
        }
    }
    // Keeping the below-ground points scores every grid point at every level.
    let all = consistency(
        &lc,
        &ConsistencyRequest {
            include_below_ground: true,
            ..ConsistencyRequest::default()
        },
    )
    .expect("consistency");
    for (region, total) in counts {
        assert_eq!(row(&all.rows, 1000.0, region).scores.count, total);
    }
    assert!(row(&report.rows, 1000.0, "global").below_ground_excluded > 0);
}

/// GFS 1° North America, 2010-10-26 12Z (PROVENANCE.md): no surface fields, so the columns are
/// anchored to the file's own heights and the physics shows in the thickness of each level
/// pair, which PROVENANCE.md measured at rms 0.2–1.0 m from 1000 to 300 hPa (the project's
/// own measurement: 0.2–1.1 m).
#[test]
fn gfs_1deg_consistency_of_level_pair_thickness() {
    let Some(path) = shared_data("gfs-1deg-isobaric-2010102612-metpy/GFS_test.nc") else {
        return;
    };
    let lc = load(&path);
    let Vertical::Isobaric { pressure_pa } = &lc.cycle.vertical else {
        panic!("the GFS file is on isobaric levels");
    };
    let items: Vec<Quantity> = pressure_pa
        .windows(2)
        .filter(|w| w[1] >= 30_000.0 - 1.0)
        .map(|w| {
            Quantity::Thickness(Layer {
                bottom_pa: w[0],
                top_pa: w[1],
            })
        })
        .collect();
    // 1000, 975, 950, 925, 900, then every 50 hPa to 300 hPa: 17 levels, 16 pairs.
    assert_eq!(items.len(), 16);
    let report = consistency(
        &lc,
        &ConsistencyRequest {
            items,
            ..ConsistencyRequest::default()
        },
    )
    .expect("consistency");
    // 46 rows from 65N to 20N and 101 columns; every row is at or north of 20N, the 20N row
    // is also in the tropics, and no row is in the southern extratropics.
    let expected = [
        ("global", 46 * 101),
        ("northern_extratropics", 46 * 101),
        ("tropics", 101),
        ("southern_extratropics", 0),
    ];
    for r in &report.rows {
        let want = expected
            .iter()
            .find(|(name, _)| *name == r.region)
            .map(|x| x.1)
            .expect("a standard region");
        assert_eq!(
            r.scores.count, want,
            "{:?} {}",
            r.layer_bottom_hpa, r.region
        );
        assert_eq!(
            r.below_ground_excluded, 0,
            "no surface fields: nothing flagged"
        );
        if r.region == "global" {
            println!(
                "GFS 1deg {:>5}-{:<5} hPa rmse {:6.3} bias {:7.3} sd {:6.3}",
                r.layer_bottom_hpa.unwrap_or(f64::NAN),
                r.layer_top_hpa.unwrap_or(f64::NAN),
                r.scores.rmse_m,
                r.scores.bias_m,
                r.scores.sd_m
            );
            assert!(
                (0.15..=1.15).contains(&r.scores.rmse_m),
                "rms {} m outside 0.15-1.15 m",
                r.scores.rmse_m
            );
        }
        if r.region == "southern_extratropics" {
            assert!(r.scores.rmse_m.is_nan());
        }
    }
    assert!(
        report
            .notes
            .iter()
            .any(|n| n.contains("southern_extratropics does not intersect")),
        "{:?}",
        report.notes
    );
}

#[test]
fn consistency_needs_the_files_own_heights_and_items_on_its_levels() {
    let dir = tempfile::tempdir().expect("temporary folder");
    let (lats, lons) = (global_lats(), global_lons());
    let temp = |t: usize, k: usize, r: usize, c: usize| varied_temperature(t, k, lats[r], lons[c]);
    let plain = Constructed {
        lats: lats.clone(),
        lons: lons.clone(),
        levels_hpa: LEVELS_HPA.to_vec(),
        lead_hours: vec![0.0],
        time_units: "hours since 2011-01-10 12:00:00",
        temperature: &temp,
        heights: None,
    }
    .write(&dir.path().join("no-heights.nc"));
    let lc = load(&plain);
    let err = consistency(&lc, &ConsistencyRequest::default()).expect_err("no heights");
    assert!(matches!(err, VerifyError::NoFileHeights { .. }));
    assert!(err.to_string().contains("no-heights.nc"), "{err}");

    let zf = |_t: usize, k: usize, _r: usize, _c: usize| 100.0 + 1500.0 * k as f64;
    let with = Constructed {
        heights: Some(&zf),
        lats: lats.clone(),
        lons: lons.clone(),
        levels_hpa: LEVELS_HPA.to_vec(),
        lead_hours: vec![0.0],
        time_units: "hours since 2011-01-10 12:00:00",
        temperature: &temp,
    }
    .write(&dir.path().join("heights.nc"));
    let lc = load(&with);
    let err = consistency(
        &lc,
        &ConsistencyRequest {
            items: vec![Quantity::GeopotentialHeight {
                pressure_pa: 60_000.0,
            }],
            ..ConsistencyRequest::default()
        },
    )
    .expect_err("600 hPa is not a level");
    assert!(matches!(err, VerifyError::ItemNotOnLevels { index: 0, .. }));
    assert!(err.to_string().contains("heights.nc") && err.to_string().contains("600"));
}

// ---------------------------------------------------------------------------------------------
// Forecast against analysis on constructed cycles.
// ---------------------------------------------------------------------------------------------

#[test]
fn a_constant_and_a_latitude_dependent_offset_give_their_known_scores() {
    let dir = tempfile::tempdir().expect("temporary folder");
    let (lats, lons) = (global_lats(), global_lons());
    let temp = |t: usize, k: usize, r: usize, c: usize| varied_temperature(t, k, lats[r], lons[c]);
    // A forecast with three steps (0, 6, 12 h after 2011-01-10 12Z), no heights of its own:
    // its heights are computed here.
    let fpath = Constructed {
        lats: lats.clone(),
        lons: lons.clone(),
        levels_hpa: LEVELS_HPA.to_vec(),
        lead_hours: vec![0.0, 6.0, 12.0],
        time_units: "hours since 2011-01-10 12:00:00",
        temperature: &temp,
        heights: None,
    }
    .write(&dir.path().join("forecast.nc"));
    let forecast = load(&fpath);
    let (z, _) = forecast.heights.to_arrays().expect("heights");

    // Analysis valid 2011-01-10 18Z (the forecast's +6 h step), whose own heights are the
    // forecast's minus 10 m: forecast - analysis = +10 m everywhere.
    let offset = |t: usize, k: usize, r: usize, c: usize| f64::from(z[[0, t + 1, k, r, c]]) - 10.0;
    let apath = Constructed {
        lats: lats.clone(),
        lons: lons.clone(),
        levels_hpa: LEVELS_HPA.to_vec(),
        lead_hours: vec![0.0],
        time_units: "hours since 2011-01-10 18:00:00",
        temperature: &temp,
        heights: Some(&offset),
    }
    .write(&dir.path().join("analysis-constant.nc"));
    let analysis = load(&apath);
    let report = verify(&forecast, &analysis, &VerifyRequest::default()).expect("verify");
    assert_eq!(report.kind, ReportKind::ForecastVsAnalysis);
    assert_eq!(report.lead_time_s, 6 * 3600);
    assert_eq!(report.valid_time.as_deref(), Some("2011-01-10T18:00:00Z"));
    assert_eq!(report.truth_source, TruthSource::FileHeights);
    assert!(!report.regridded);
    // Default items: every level; default regions: the four standard ones.
    assert_eq!(report.rows.len(), LEVELS_HPA.len() * 4);
    let weight_sum: f64 = lats.iter().map(|l| l.to_radians().cos()).sum::<f64>() * 12.0;
    for r in &report.rows {
        let s = &r.scores;
        // f32 storage of ~9000 m heights rounds to 0.5 mm.
        assert!((s.bias_m - 10.0).abs() < 2e-3, "{r:?}");
        assert!((s.rmse_m - 10.0).abs() < 2e-3 && (s.mae_m - 10.0).abs() < 2e-3);
        assert!(s.sd_m < 2e-3, "{r:?}");
        if r.level_hpa == Some(1000.0) {
            // Every column is anchored at the same standard-atmosphere height of 1000 hPa:
            // a flat field has no variance to correlate.
            assert!(s.corr.is_nan(), "{r:?}");
        } else {
            assert!(s.corr > 0.999_999, "{r:?}");
        }
        assert_eq!(r.truth_source, TruthSource::FileHeights);
        let want = match r.region.as_str() {
            "global" => 84,
            _ => 36, // three rows of 12 (the ±20° rows count in both neighbours)
        };
        assert_eq!(s.count, want, "{}", r.region);
        if r.region == "global" {
            assert!((s.weight_sum - weight_sum).abs() < 1e-9);
        }
    }

    // A latitude-dependent offset a(lat) = 10 + 0.1 lat: the bias is its cos-weighted mean
    // over the rows, the rmse the square root of the weighted mean of a², and sd² = rmse² −
    // bias² (arithmetic on the definitions).
    let a = |lat: f64| 10.0 + 0.1 * lat;
    let by_lat =
        |t: usize, k: usize, r: usize, c: usize| f64::from(z[[0, t + 1, k, r, c]]) - a(lats[r]);
    let apath = Constructed {
        lats: lats.clone(),
        lons: lons.clone(),
        levels_hpa: LEVELS_HPA.to_vec(),
        lead_hours: vec![0.0],
        time_units: "hours since 2011-01-10 18:00:00",
        temperature: &temp,
        heights: Some(&by_lat),
    }
    .write(&dir.path().join("analysis-latitude.nc"));
    let analysis = load(&apath);
    let report = verify(&forecast, &analysis, &VerifyRequest::default()).expect("verify");
    let expect = |pick: &dyn Fn(f64) -> bool| {
        let rows: Vec<f64> = lats.iter().copied().filter(|&l| pick(l)).collect();
        let w: f64 = rows.iter().map(|l| l.to_radians().cos()).sum();
        let bias = rows
            .iter()
            .map(|&l| l.to_radians().cos() * a(l))
            .sum::<f64>()
            / w;
        let ms = rows
            .iter()
            .map(|&l| l.to_radians().cos() * a(l) * a(l))
            .sum::<f64>()
            / w;
        (bias, ms.sqrt(), (ms - bias * bias).max(0.0).sqrt())
    };
    for (region, pick) in [
        ("global", &(|_l: f64| true) as &dyn Fn(f64) -> bool),
        ("northern_extratropics", &|l: f64| l >= 20.0),
        ("tropics", &|l: f64| l.abs() <= 20.0),
        ("southern_extratropics", &|l: f64| l <= -20.0),
    ] {
        let (bias, rmse, sd) = expect(pick);
        for hpa in LEVELS_HPA {
            let s = row(&report.rows, hpa, region).scores;
            assert!(
                (s.bias_m - bias).abs() < 2e-3,
                "{region} {hpa}: {} vs {bias}",
                s.bias_m
            );
            assert!((s.rmse_m - rmse).abs() < 2e-3, "{region} {hpa}");
            assert!(
                (s.sd_m - sd).abs() < 3e-3,
                "{region} {hpa}: {} vs {sd}",
                s.sd_m
            );
        }
    }
    // The tropics are symmetric about the equator: the bias there is exactly a(0) = 10 m.
    assert!((row(&report.rows, 500.0, "tropics").scores.bias_m - 10.0).abs() < 2e-3);

    // A box across the antimeridian (150E to 150W: columns 150, 180, 210) and a box north of
    // the grid, which gives count 0 and a note rather than an error.
    let boxes = VerifyRequest {
        items: vec![Quantity::GeopotentialHeight {
            pressure_pa: 50_000.0,
        }],
        regions: vec![
            Region::Box(BoundingBox {
                south: -90.0,
                north: 90.0,
                west: 150.0,
                east: -150.0,
            }),
            Region::Box(BoundingBox {
                south: 70.0,
                north: 80.0,
                west: 0.0,
                east: 360.0,
            }),
        ],
        ..VerifyRequest::default()
    };
    let report = verify(&forecast, &analysis, &boxes).expect("verify");
    assert_eq!(report.rows[0].scores.count, 7 * 3);
    assert_eq!(report.rows[1].scores.count, 0);
    assert!(report.rows[1].scores.bias_m.is_nan());
    assert!(report
        .notes
        .iter()
        .any(|n| n.contains("does not intersect")));
    // The rows serialise to JSON with the scores flattened and NaN as null.
    let json = serde_json::to_string(&report).expect("json");
    assert!(json.contains("\"bias_m\":null") && json.contains("\"truth_source\":\"file_heights\""));
}

#[test]
fn a_forecast_on_another_grid_is_interpolated_to_the_analysis_grid() {
    let dir = tempfile::tempdir().expect("temporary folder");
    // A regional forecast whose temperature is the same everywhere and whose own heights at
    // 1000 hPa are a plane L(lat, lon): its columns are anchored there, so every level's
    // heights are L plus a constant, and bilinear interpolation of a plane is exact
    // (mathematics).
    let plane = |lat: f64, lon: f64| 100.0 + 2.0 * lat + 0.5 * lon;
    let flats = vec![30.0, 40.0, 50.0, 60.0];
    let flons = vec![0.0, 10.0, 20.0, 30.0, 40.0];
    let uniform = |_t: usize, _k: usize, _r: usize, _c: usize| 250.0;
    let fz =
        |_t: usize, k: usize, r: usize, c: usize| plane(flats[r], flons[c]) + 2000.0 * k as f64;
    let fpath = Constructed {
        lats: flats.clone(),
        lons: flons.clone(),
        levels_hpa: LEVELS_HPA.to_vec(),
        lead_hours: vec![0.0],
        time_units: "hours since 2011-01-10 12:00:00",
        temperature: &uniform,
        heights: Some(&fz),
    }
    .write(&dir.path().join("regional-forecast.nc"));
    let forecast = load(&fpath);
    let (zf, _) = forecast.heights.to_arrays().expect("heights");
    let constant: Vec<f64> = (0..LEVELS_HPA.len())
        .map(|k| f64::from(zf[[0, 0, k, 0, 0]]) - plane(flats[0], flons[0]))
        .collect();

    // The analysis grid is offset by 5° and reaches past the forecast grid on every side
    // (rows 25 and 65, column 45); its heights are the forecast's plane minus 10 m.
    let alats: Vec<f64> = (0..9).map(|i| 25.0 + 5.0 * i as f64).collect();
    let alons: Vec<f64> = (0..9).map(|i| 5.0 + 5.0 * i as f64).collect();
    let az =
        |_t: usize, k: usize, r: usize, c: usize| plane(alats[r], alons[c]) + constant[k] - 10.0;
    let apath = Constructed {
        lats: alats.clone(),
        lons: alons.clone(),
        levels_hpa: LEVELS_HPA.to_vec(),
        lead_hours: vec![0.0],
        time_units: "hours since 2011-01-10 12:00:00",
        temperature: &uniform,
        heights: Some(&az),
    }
    .write(&dir.path().join("offset-analysis.nc"));
    let analysis = load(&apath);
    let report = verify(
        &forecast,
        &analysis,
        &VerifyRequest {
            regions: vec![Region::Global],
            ..VerifyRequest::default()
        },
    )
    .expect("verify");
    assert!(report.regridded);
    assert!(
        report
            .notes
            .iter()
            .any(|n| n.contains("interpolated bilinearly")
                && n.contains("25 analysis points outside")),
        "{:?}",
        report.notes
    );
    // Inside: rows 30..60 (7) by columns 5..40 (8).
    for r in &report.rows {
        assert_eq!(r.scores.count, 56, "{r:?}");
        assert!((r.scores.bias_m - 10.0).abs() < 2e-3, "{r:?}");
        assert!(
            (r.scores.rmse_m - 10.0).abs() < 2e-3 && r.scores.sd_m < 2e-3,
            "{r:?}"
        );
    }
}

#[test]
fn an_analysis_without_heights_is_verified_against_its_computed_heights() {
    let dir = tempfile::tempdir().expect("temporary folder");
    let (lats, lons) = (global_lats(), global_lons());
    // Isothermal dry columns, 260 K in the forecast and 250 K in the analysis, both anchored
    // at the U.S. Standard Atmosphere 1976 height of 1000 hPa (neither has surface fields or
    // heights). The hypsometric equation for an isothermal layer (Wallace & Hobbs 2006, §3.2)
    // gives forecast - analysis = (R_d / g0) (260 - 250) ln(1000 hPa / p) at every point.
    let warm = |_t: usize, _k: usize, _r: usize, _c: usize| 260.0;
    let cold = |_t: usize, _k: usize, _r: usize, _c: usize| 250.0;
    let write = |name: &str, temperature: FieldFn<'_>| {
        Constructed {
            lats: lats.clone(),
            lons: lons.clone(),
            levels_hpa: LEVELS_HPA.to_vec(),
            lead_hours: vec![0.0],
            time_units: "hours since 2011-01-10 12:00:00",
            temperature,
            heights: None,
        }
        .write(&dir.path().join(name))
    };
    let forecast = load(&write("warm.nc", &warm));
    let analysis = load(&write("cold.nc", &cold));
    let report = verify(&forecast, &analysis, &VerifyRequest::default()).expect("verify");
    assert_eq!(report.truth_source, TruthSource::Computed);
    assert!(report.notes.iter().any(|n| n.contains("computed here")));
    let rd = analysis.cycle.constants.dry_air_gas_constant;
    for hpa in LEVELS_HPA {
        let want = rd / G0 * 10.0 * (1000.0 / hpa).ln();
        let r = row(&report.rows, hpa, "global");
        assert_eq!(r.truth_source, TruthSource::Computed);
        assert_eq!(r.scores.count, 84);
        assert!(
            (r.scores.bias_m - want).abs() < 3e-3,
            "{hpa}: {} vs {want}",
            r.scores.bias_m
        );
        assert!((r.scores.rmse_m - want).abs() < 3e-3 && r.scores.sd_m < 3e-3);
    }
    // 500 hPa: (287.04 / 9.80665) 10 ln 2 = 202.9 m with the crate's R_d (GUIDE §2 range).
    assert!((row(&report.rows, 500.0, "global").scores.bias_m - 202.9).abs() < 0.1);
    // Every field is flat, so there is no variance to correlate.
    assert!(row(&report.rows, 500.0, "global").scores.corr.is_nan());
}

#[test]
fn valid_times_must_match_and_errors_name_both_files() {
    let dir = tempfile::tempdir().expect("temporary folder");
    let (lats, lons) = (global_lats(), global_lons());
    let temp = |t: usize, k: usize, r: usize, c: usize| varied_temperature(t, k, lats[r], lons[c]);
    let write = |name: &str, lead_hours: Vec<f64>, time_units: &str| {
        Constructed {
            lats: lats.clone(),
            lons: lons.clone(),
            levels_hpa: LEVELS_HPA.to_vec(),
            lead_hours,
            time_units,
            temperature: &temp,
            heights: None,
        }
        .write(&dir.path().join(name))
    };
    let forecast = load(&write(
        "fc-2011011012.nc",
        vec![0.0, 6.0, 12.0],
        "hours since 2011-01-10 12:00:00",
    ));
    let late = load(&write(
        "an-2011011200.nc",
        vec![0.0],
        "hours since 2011-01-12 00:00:00",
    ));
    let err = verify(&forecast, &late, &VerifyRequest::default()).expect_err("no common time");
    let text = err.to_string();
    assert!(matches!(err, VerifyError::TimeMismatch { .. }));
    assert!(
        text.contains("fc-2011011012.nc") && text.contains("an-2011011200.nc"),
        "{text}"
    );
    assert!(text.contains("2011-01-12T00:00:00Z") && text.contains("2011-01-10T18:00:00Z"));

    // An analysis with two steps (00Z and 06Z on the 11th): without a choice the first with
    // a forecast step is taken (00Z = +12 h); asking for the 06Z step finds nothing.
    let two = load(&write(
        "an-2011011100.nc",
        vec![0.0, 6.0],
        "hours since 2011-01-11 00:00:00",
    ));
    let report = verify(&forecast, &two, &VerifyRequest::default()).expect("verify");
    assert_eq!(report.lead_time_s, 12 * 3600);
    let err = verify(
        &forecast,
        &two,
        &VerifyRequest {
            analysis_time: Some(TimeSelector::LeadTime { seconds: 6 * 3600 }),
            ..VerifyRequest::default()
        },
    )
    .expect_err("06Z is beyond the forecast");
    assert!(matches!(err, VerifyError::TimeMismatch { .. }), "{err}");
    // A lead time the forecast lacks names the forecast.
    let err = verify(
        &forecast,
        &two,
        &VerifyRequest {
            lead_time_s: Some(3 * 3600),
            ..VerifyRequest::default()
        },
    )
    .expect_err("no +3 h step");
    assert!(err.to_string().contains("fc-2011011012.nc") && err.to_string().contains("10800"));
    // A lead time whose valid time differs from the analysis' is a mismatch.
    let err = verify(
        &forecast,
        &two,
        &VerifyRequest {
            lead_time_s: Some(0),
            ..VerifyRequest::default()
        },
    )
    .expect_err("+0 h is valid on the 10th");
    assert!(matches!(err, VerifyError::TimeMismatch { .. }));
    // A member the forecast lacks.
    let err = verify(
        &forecast,
        &two,
        &VerifyRequest {
            member: 3,
            ..VerifyRequest::default()
        },
    )
    .expect_err("deterministic forecast");
    assert!(matches!(err, VerifyError::MemberNotFound { member: 3, .. }));
    // A malformed box names the region.
    let err = verify(
        &forecast,
        &two,
        &VerifyRequest {
            regions: vec![
                Region::Global,
                Region::Box(BoundingBox {
                    south: 50.0,
                    north: 40.0,
                    west: 0.0,
                    east: 10.0,
                }),
            ],
            ..VerifyRequest::default()
        },
    )
    .expect_err("south of north");
    assert!(err.to_string().starts_with("regions[1]"), "{err}");

    // The command line: a valid time picks the analysis step valid then and the forecast
    // step valid then (00Z on the 11th: +12 h); a valid time the forecast does not reach is
    // refused naming both files; a lead time still picks the forecast step.
    let run = |time: &str| {
        Command::new(env!("CARGO_BIN_EXE_hypsogrid"))
            .arg("verify")
            .arg(dir.path().join("fc-2011011012.nc"))
            .arg(dir.path().join("an-2011011100.nc"))
            .args(["--height", "500", "--region", "global", "--time", time])
            .output_with_no_file_open()
            .expect("running hypsogrid verify")
    };
    for time in ["2011-01-11T00:00:00Z", "12h"] {
        let out = run(time);
        let text = String::from_utf8_lossy(&out.stdout);
        assert!(
            out.status.success(),
            "{time}: {}",
            String::from_utf8_lossy(&out.stderr)
        );
        assert!(
            text.contains("(lead +12h)") && text.contains("valid 2011-01-11T00:00:00Z"),
            "{time}: {text}"
        );
    }
    let out = run("2011-01-11T06:00:00Z");
    let err = String::from_utf8_lossy(&out.stderr);
    assert_eq!(out.status.code(), Some(1), "{err}");
    assert!(
        err.contains("fc-2011011012.nc") && err.contains("an-2011011100.nc"),
        "{err}"
    );
}
