//! Real NCEP GFS cycles from `../shared/data/`: heights computed here from the files'
//! temperature and relative humidity against the heights NCEP itself wrote into the files.
//!
//! These tests skip with a message when `../shared/data` is absent (CI always has it).

use std::path::PathBuf;

use ndarray::s;

use hypsogrid::compute::{compute_heights, ComputeConfig, NoSurfaceReference};
use hypsogrid::ingest::{read_cycle, IngestConfig};
use hypsogrid::model::{Cycle, Layer, Vertical};
use hypsogrid::physics::humidity::SaturationFormula;

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

fn levels(cycle: &Cycle) -> Vec<f64> {
    match &cycle.vertical {
        Vertical::Isobaric { pressure_pa } => pressure_pa.clone(),
        Vertical::Hybrid { .. } => panic!("GFS files are on isobaric levels"),
    }
}

/// Root-mean-square and maximum of |a - b| over the finite pairs.
fn rms_max(pairs: impl Iterator<Item = (f64, f64)>) -> (f64, f64, usize) {
    let (mut sum, mut max, mut n) = (0.0, 0.0f64, 0usize);
    for (a, b) in pairs {
        if a.is_finite() && b.is_finite() {
            let d = a - b;
            sum += d * d;
            max = max.max(d.abs());
            n += 1;
        }
    }
    ((sum / n.max(1) as f64).sqrt(), max, n)
}

/// GFS 1° North America, 2010-10-26 12Z analysis (PROVENANCE.md in the folder). The file has
/// no surface fields, so columns are anchored to the file's own 1000 hPa height, and the
/// thickness of every adjacent level pair is compared with the difference of the file's own
/// heights. Tolerances follow the check values quoted in PROVENANCE.md (an independent
/// computation with Bolton e_s and Tv linear in ln p): rms 0.2-1.0 m and max <= 11 m from
/// 1000 to 300 hPa, growing to rms 10 m / max 37 m at 150-100 hPa where the two-point layer
/// mean cannot follow the tropopause. The limits below are set a little above what this
/// implementation measured (printed with --nocapture).
#[test]
fn gfs_1deg_thickness_of_every_level_pair_matches_the_files_own_heights() {
    let Some(path) = shared_data("gfs-1deg-isobaric-2010102612-metpy/GFS_test.nc") else {
        return;
    };
    let cycle = read_cycle(&path, &IngestConfig::default()).expect("reading the GFS file");
    let p = levels(&cycle);
    let layers: Vec<Layer> = p
        .windows(2)
        .map(|w| Layer {
            bottom_pa: w[0],
            top_pa: w[1],
        })
        .collect();
    let config = ComputeConfig {
        layers: layers.clone(),
        saturation_formula: SaturationFormula::Bolton,
        ..ComputeConfig::default()
    };
    let heights = compute_heights(&cycle, &config, &|_| {}).expect("computing");
    let file_z = cycle
        .file_heights
        .as_ref()
        .expect("the file carries heights");
    for (k, lt) in heights.thickness.iter().enumerate() {
        let (pb, pt) = (lt.layer.bottom_pa / 100.0, lt.layer.top_pa / 100.0);
        let ours = lt.values.slice(s![0, 0, .., ..]);
        let theirs_bottom = file_z.slice(s![0, 0, k, .., ..]);
        let theirs_top = file_z.slice(s![0, 0, k + 1, .., ..]);
        let (rms, max, n) = rms_max(
            ours.iter()
                .zip(theirs_bottom.iter().zip(theirs_top.iter()))
                .map(|(&o, (&b, &t))| (f64::from(o), f64::from(t) - f64::from(b))),
        );
        println!("GFS 1deg {pb:>5}-{pt:<5} hPa: rms {rms:6.2} m  max {max:6.2} m  ({n} columns)");
        assert_eq!(n, 46 * 101, "every column has a value for {pb}-{pt} hPa");
        let (rms_limit, max_limit) = match pt {
            t if t >= 300.0 => (1.2, 12.0),
            t if t >= 200.0 => (5.0, 25.0),
            t if t >= 100.0 => (12.0, 45.0),
            // Above 100 hPa the file's heights and temperatures are packed coarsely and
            // humidity is absent; PROVENANCE gives no check value there.
            _ => (25.0, 80.0),
        };
        assert!(
            rms < rms_limit,
            "{pb}-{pt} hPa: rms {rms} m exceeds {rms_limit} m"
        );
        assert!(
            max < max_limit,
            "{pb}-{pt} hPa: max {max} m exceeds {max_limit} m"
        );
    }
    // Anchored to the file's own lowest-level height, the computed 1000 hPa height is the
    // file's, exactly.
    let ours = heights.geopotential_height.slice(s![0, 0, 0, .., ..]);
    let theirs = file_z.slice(s![0, 0, 0, .., ..]);
    let (_, max, _) = rms_max(
        ours.iter()
            .zip(theirs.iter())
            .map(|(&a, &b)| (f64::from(a), f64::from(b))),
    );
    assert!(
        max < 0.01,
        "anchor level reproduced within 0.01 m, got {max}"
    );
}

/// Humidity matters: without it the low-level residuals grow (PROVENANCE.md: 1.0 m becomes
/// 1.3 m at 1000-975 hPa, 0.75 m becomes 2.0 m at 900-850 hPa).
#[test]
fn gfs_1deg_virtual_temperature_reduces_the_low_level_residual() {
    let Some(path) = shared_data("gfs-1deg-isobaric-2010102612-metpy/GFS_test.nc") else {
        return;
    };
    let mut cycle = read_cycle(&path, &IngestConfig::default()).expect("reading the GFS file");
    let layer = Layer {
        bottom_pa: 90000.0,
        top_pa: 85000.0,
    };
    let config = ComputeConfig {
        layers: vec![layer],
        saturation_formula: SaturationFormula::Bolton,
        ..ComputeConfig::default()
    };
    let p = levels(&cycle);
    let k900 = p.iter().position(|&v| v == 90000.0).expect("900 hPa level");
    let file_z = cycle.file_heights.clone().expect("heights");
    let score = |cycle: &Cycle| {
        let h = compute_heights(cycle, &config, &|_| {}).expect("computing");
        let ours = h.thickness[0].values.slice(s![0, 0, .., ..]).to_owned();
        let (rms, _, _) = rms_max(
            ours.iter()
                .zip(
                    file_z
                        .slice(s![0, 0, k900 + 1, .., ..])
                        .iter()
                        .zip(file_z.slice(s![0, 0, k900, .., ..]).iter()),
                )
                .map(|(&o, (&t, &b))| (f64::from(o), f64::from(t) - f64::from(b))),
        );
        rms
    };
    let with = score(&cycle);
    cycle.humidity = None;
    let without = score(&cycle);
    println!("GFS 1deg 900-850 hPa rms: {with:.2} m with humidity, {without:.2} m without");
    assert!(with < 1.0, "with humidity {with}");
    assert!(
        without > 1.5 * with,
        "humidity should matter: {with} vs {without}"
    );
}

/// GFS 2.5° global +120 h (PROVENANCE.md in the folder): this file has surface pressure and
/// orography, so heights are integrated from the ground, and every level above the ground is
/// compared with NCEP's own height there. The surface start adds the uncertainty of the
/// surface temperature (extrapolated from the lowest level above ground at 6.5 K/km) to every
/// level above; the limits are set a little above what this implementation measured.
#[test]
fn gfs_2p5deg_heights_from_the_surface_match_the_files_own_heights() {
    let Some(path) = shared_data(
        "gfs-2p5deg-global-2011011012-f120/gfs_2p5deg_2011011012_f120_isobaric_subset.nc",
    ) else {
        return;
    };
    let cycle = read_cycle(&path, &IngestConfig::default()).expect("reading the GFS file");
    assert!(
        cycle.surface.is_some(),
        "surface pressure and orography found"
    );
    let config = ComputeConfig {
        saturation_formula: SaturationFormula::Bolton,
        ..ComputeConfig::default()
    };
    let heights = compute_heights(&cycle, &config, &|_| {}).expect("computing");
    let file_z = cycle
        .file_heights
        .as_ref()
        .expect("the file carries heights");
    let p = levels(&cycle);
    let mut below_seen = 0usize;
    for (k, &pk) in p.iter().enumerate() {
        let hpa = pk / 100.0;
        if hpa < 100.0 {
            break;
        }
        let ours = heights.geopotential_height.slice(s![0, 0, k, .., ..]);
        let flags = heights.below_ground.slice(s![0, 0, k, .., ..]);
        below_seen += flags.iter().filter(|&&b| b == 1).count();
        let theirs = file_z.slice(s![0, 0, k, .., ..]);
        let (rms, max, n) = rms_max(
            ours.iter()
                .zip(theirs.iter())
                .zip(flags.iter())
                .filter(|(_, &b)| b == 0)
                .map(|((&a, &b), _)| (f64::from(a), f64::from(b))),
        );
        println!(
            "GFS 2.5deg {hpa:>6} hPa: rms {rms:6.2} m  max {max:6.2} m  ({n} columns above ground)"
        );
        let (rms_limit, max_limit) = if hpa >= 300.0 {
            (6.0, 40.0)
        } else {
            (12.0, 60.0)
        };
        assert!(
            rms < rms_limit,
            "{hpa} hPa: rms {rms} m exceeds {rms_limit} m"
        );
        assert!(
            max < max_limit,
            "{hpa} hPa: max {max} m exceeds {max_limit} m"
        );
    }
    assert!(
        below_seen > 0,
        "some levels lie below the orography and are flagged"
    );
}

/// Without surface fields or file heights the standard-atmosphere anchor still gives the
/// right thickness (anchor-independent), only absolute heights shift.
#[test]
fn gfs_1deg_thickness_does_not_depend_on_the_anchor() {
    let Some(path) = shared_data("gfs-1deg-isobaric-2010102612-metpy/GFS_test.nc") else {
        return;
    };
    let cycle = read_cycle(&path, &IngestConfig::default()).expect("reading the GFS file");
    let layer = Layer {
        bottom_pa: 100000.0,
        top_pa: 50000.0,
    };
    let run = |reference| {
        let config = ComputeConfig {
            layers: vec![layer],
            no_surface_reference: reference,
            ..ComputeConfig::default()
        };
        compute_heights(&cycle, &config, &|_| {}).expect("computing")
    };
    let a = run(NoSurfaceReference::FileHeightAtLowestLevel);
    let b = run(NoSurfaceReference::StandardAtmosphere);
    let c = run(NoSurfaceReference::FileHeightAt {
        pressure_pa: 50000.0,
    });
    for other in [&b, &c] {
        let (_, max, n) = rms_max(
            a.thickness[0]
                .values
                .iter()
                .zip(other.thickness[0].values.iter())
                .map(|(&x, &y)| (f64::from(x), f64::from(y))),
        );
        assert!(
            n > 0 && max < 0.01,
            "thickness independent of the anchor: {max}"
        );
    }
    assert!(a.method.contains("file's own geopotential height"));
    assert!(b.method.contains("Standard Atmosphere"));
}
