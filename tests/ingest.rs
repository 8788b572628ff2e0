//! Ingest tests: every encoding variant of the synthetic atmosphere reads to the same
//! canonical fields; the real files in `../shared/data` read to the facts their
//! PROVENANCE.md states; bad files give one clear error each, naming the file and variable.

mod common;

use std::path::{Path, PathBuf};

use common::fixtures::{self, *};
use hypsogrid::ingest::{load_config, read_cycle, IngestConfig, IngestError};
use hypsogrid::model::{Cycle, HumidityKind, Vertical};

fn read(path: &Path) -> Cycle {
    match read_cycle(path, &IngestConfig::default()) {
        Ok(c) => c,
        Err(e) => panic!("reading {}: {e}", path.display()),
    }
}

fn read_err(path: &Path) -> (IngestError, String) {
    match read_cycle(path, &IngestConfig::default()) {
        Ok(_) => panic!("{} read without error", path.display()),
        Err(e) => {
            let msg = e.to_string();
            (e, msg)
        }
    }
}

fn write(dir: &tempfile::TempDir, name: &str, spec: &FixtureSpec) -> PathBuf {
    spec.write(&dir.path().join(name))
}

fn close(a: f64, b: f64, tol: f64) -> bool {
    (a - b).abs() <= tol
}

/// Check every canonical field of a cycle against the truth functions of the fixture.
fn check_against_truth(label: &str, spec: &FixtureSpec, c: &Cycle) {
    let (m_n, t_n, z_n) = (spec.member_count(), spec.time_count(), spec.levels());
    let lats = spec.latitudes();
    let lons = spec.longitudes();
    assert_eq!(
        c.temperature.shape(),
        &[m_n, t_n, z_n, lats.len(), lons.len()],
        "{label}: shape"
    );
    assert_eq!(c.members, m_n, "{label}");
    assert_eq!(
        c.grid.latitudes, lats,
        "{label}: latitudes keep the file's order"
    );
    assert_eq!(
        c.grid.longitudes, lons,
        "{label}: longitudes keep the file's values"
    );
    assert_eq!(c.levels_top_down_in_file, spec.levels_top_down, "{label}");
    assert_eq!(c.lead_times_s, spec.lead_times_s(), "{label}: lead times");
    if spec.time_steps.is_some() || spec.reference_time_variable {
        assert_eq!(c.reference_time.as_deref(), Some(REFERENCE_TIME), "{label}");
    }
    match (&c.vertical, spec.vertical) {
        (Vertical::Isobaric { pressure_pa }, VerticalSpec::Isobaric) => {
            assert_eq!(pressure_pa.len(), LEVELS_PA.len(), "{label}");
            for (a, b) in pressure_pa.iter().zip(LEVELS_PA) {
                assert!(close(*a, b, 1e-6 * b), "{label}: level {a} vs {b}");
            }
        }
        (Vertical::Hybrid { a_half_pa, b_half }, VerticalSpec::Hybrid { .. }) => {
            for (a, b) in a_half_pa.iter().zip(HYBRID_A_HALF_PA) {
                assert!(close(*a, b, 1e-6), "{label}: a half {a} vs {b}");
            }
            for (a, b) in b_half.iter().zip(HYBRID_B_HALF) {
                assert!(close(*a, b, 1e-12), "{label}: b half {a} vs {b}");
            }
            assert_eq!(a_half_pa.len(), HYBRID_A_HALF_PA.len(), "{label}");
        }
        (v, _) => panic!("{label}: unexpected vertical {v:?}"),
    }
    let t_tol = spec.temperature_tolerance();
    let h_tol = spec.humidity_tolerance();
    let (ps_tol, zs_tol, gh_tol) = spec.surface_tolerances();
    for m in 0..m_n {
        for t in 0..t_n {
            for k in 0..z_n {
                for (j, &lat) in lats.iter().enumerate() {
                    for (i, &lon) in lons.iter().enumerate() {
                        let p = spec.level_pressure_pa(k, lat, lon);
                        let masked = spec.masked_points.contains(&[m, t, k, j, i]);
                        let got = f64::from(c.temperature[[m, t, k, j, i]]);
                        if masked {
                            assert!(got.is_nan(), "{label}: masked T at {m},{t},{k},{j},{i}");
                        } else {
                            let want = fixtures::temperature_k(m, t, p, lat, lon);
                            assert!(
                                close(got, want, t_tol),
                                "{label}: T[{m},{t},{k},{j},{i}] = {got}, want {want}"
                            );
                        }
                        if let Some(h) = &c.humidity {
                            let got = f64::from(h.values[[m, t, k, j, i]]);
                            if masked || h.missing_levels.contains(&k) {
                                assert!(got.is_nan(), "{label}: humidity at {m},{t},{k},{j},{i}");
                            } else {
                                let want = spec.humidity_value(m, t, p, lat, lon);
                                assert!(
                                    close(got, want, h_tol),
                                    "{label}: humidity[{m},{t},{k},{j},{i}] = {got}, want {want}"
                                );
                            }
                        }
                        if let Some(z) = &c.file_heights {
                            let got = f64::from(z[[m, t, k, j, i]]);
                            if masked {
                                assert!(got.is_nan(), "{label}: masked height");
                            } else {
                                let want = fixtures::geopotential_height_m(m, t, p, lat, lon);
                                assert!(
                                    close(got, want, gh_tol),
                                    "{label}: height {got}, want {want}"
                                );
                            }
                        }
                    }
                }
            }
            if let Some(s) = &c.surface {
                for (j, &lat) in lats.iter().enumerate() {
                    for (i, &lon) in lons.iter().enumerate() {
                        let ps = f64::from(s.pressure_pa[[m, t, j, i]]);
                        let zs = f64::from(s.height_m[[m, t, j, i]]);
                        let want_ps = surface_pressure_pa(lat, lon);
                        let want_zs = surface_height_m(lat, lon);
                        assert!(close(ps, want_ps, ps_tol), "{label}: ps {ps} vs {want_ps}");
                        assert!(close(zs, want_zs, zs_tol), "{label}: zs {zs} vs {want_zs}");
                    }
                }
            }
        }
    }
    let want_kind = spec.humidity_truth().map(|h| match h {
        HumidityTruth::Specific => HumidityKind::SpecificHumidity,
        HumidityTruth::Mixing => HumidityKind::MixingRatio,
        HumidityTruth::Relative => HumidityKind::RelativeHumidity,
        HumidityTruth::DewPoint => HumidityKind::DewPoint,
    });
    assert_eq!(
        c.humidity.as_ref().map(|h| h.kind),
        want_kind,
        "{label}: humidity kind"
    );
    assert_eq!(
        c.surface.is_some(),
        spec.surface.is_some(),
        "{label}: surface"
    );
    assert_eq!(
        c.file_heights.is_some(),
        spec.file_heights != FileHeights::None,
        "{label}: file heights"
    );
}

/// Compare two cycles of the same atmosphere column by column, matching columns by latitude
/// and longitude (mod 360), so that flipped and shifted grids compare equal.
fn check_same_columns(label: &str, a: &Cycle, b: &Cycle, tol: f64) {
    let find = |c: &Cycle, lat: f64, lon: f64| -> (usize, usize) {
        let j = c.grid.latitudes.iter().position(|&x| x == lat);
        let i = c
            .grid
            .longitudes
            .iter()
            .position(|&x| (x - lon).rem_euclid(360.0) < 1e-9);
        match (j, i) {
            (Some(j), Some(i)) => (j, i),
            _ => panic!("{label}: column {lat},{lon} not found"),
        }
    };
    let sh = a.temperature.shape();
    for (j, &lat) in a.grid.latitudes.iter().enumerate() {
        for (i, &lon) in a.grid.longitudes.iter().enumerate() {
            let (jb, ib) = find(b, lat, lon);
            for m in 0..sh[0] {
                for t in 0..sh[1] {
                    for k in 0..sh[2] {
                        let x = a.temperature[[m, t, k, j, i]];
                        let y = b.temperature[[m, t, k, jb, ib]];
                        assert!(
                            (f64::from(x) - f64::from(y)).abs() <= tol,
                            "{label}: T {x} vs {y} at {lat},{lon} level {k}"
                        );
                    }
                }
            }
        }
    }
}

#[test]
fn every_isobaric_variant_reads_to_the_same_canonical_fields() {
    let dir = tempfile::tempdir().expect("tempdir");
    let reference_spec = FixtureSpec::default();
    let reference = read(&write(&dir, "reference.nc", &reference_spec));
    check_against_truth("reference", &reference_spec, &reference);
    for (label, spec) in isobaric_variants() {
        let path = write(&dir, &format!("{label}.nc"), &spec);
        let c = read(&path);
        check_against_truth(&label, &spec, &c);
        check_same_columns(&label, &reference, &c, spec.temperature_tolerance() + 1e-4);
        assert_eq!(c.source, path);
        assert!(
            c.variables
                .iter()
                .any(|(role, name)| role == "air_temperature" && name == "t"),
            "{label}: {:?}",
            c.variables
        );
    }
}

#[test]
fn every_humidity_encoding_reads_to_its_kind_in_si_units() {
    let dir = tempfile::tempdir().expect("tempdir");
    for humidity in [
        HumidityEncoding::SpecificKgPerKg,
        HumidityEncoding::SpecificGPerKg,
        HumidityEncoding::MixingRatio,
        HumidityEncoding::RelativePercent,
        HumidityEncoding::RelativeFraction,
        HumidityEncoding::DewPoint,
        HumidityEncoding::None,
    ] {
        for packed in [false, true] {
            for temperature_units in [TemperatureUnits::Kelvin, TemperatureUnits::Celsius] {
                let spec = FixtureSpec {
                    humidity,
                    packed,
                    temperature_units,
                    ..FixtureSpec::default()
                };
                let label = format!("{humidity:?}-packed-{packed}-{temperature_units:?}");
                let c = read(&write(&dir, &format!("{label}.nc"), &spec));
                check_against_truth(&label, &spec, &c);
                if humidity == HumidityEncoding::None {
                    assert!(
                        c.notes.iter().any(|n| n.contains("dry air")),
                        "{label}: {:?}",
                        c.notes
                    );
                }
            }
        }
    }
}

#[test]
fn humidity_on_its_own_axis_one_level_short_is_aligned_by_pressure() {
    let dir = tempfile::tempdir().expect("tempdir");
    for top_down in [false, true] {
        for humidity in [
            HumidityEncoding::RelativePercent,
            HumidityEncoding::SpecificKgPerKg,
        ] {
            // Level 6 bottom-up is 200 hPa.
            let spec = FixtureSpec {
                humidity,
                humidity_missing_level: Some(6),
                levels_top_down: top_down,
                ..FixtureSpec::default()
            };
            let label = format!("own-axis-{humidity:?}-top-down-{top_down}");
            let c = read(&write(&dir, &format!("{label}.nc"), &spec));
            let h = c.humidity.as_ref().expect("humidity");
            assert_eq!(h.missing_levels, vec![6], "{label}");
            assert_eq!(h.values.shape(), c.temperature.shape(), "{label}");
            assert!(h
                .values
                .slice(ndarray::s![.., .., 6, .., ..])
                .iter()
                .all(|v| v.is_nan()));
            check_against_truth(&label, &spec, &c);
            assert!(
                c.notes
                    .iter()
                    .any(|n| n.contains("own level axis") && n.contains("200 hPa")),
                "{label}: {:?}",
                c.notes
            );
        }
    }
}

#[test]
fn fill_missing_and_out_of_range_values_become_nan() {
    let dir = tempfile::tempdir().expect("tempdir");
    let points = vec![[0, 0, 0, 0, 0], [0, 0, 3, 2, 4], [0, 0, 7, 3, 5]];
    for mask in [
        MaskEncoding::FillValue,
        MaskEncoding::MissingValue,
        MaskEncoding::ValidRange,
    ] {
        for packed in [false, true] {
            for format in [Format::Classic, Format::Netcdf4] {
                let spec = FixtureSpec {
                    mask,
                    packed,
                    format,
                    masked_points: points.clone(),
                    file_heights: FileHeights::GeopotentialHeight,
                    lat_north_to_south: true,
                    ..FixtureSpec::default()
                };
                let label = format!("{mask:?}-packed-{packed}-{format:?}");
                let c = read(&write(&dir, &format!("{label}.nc"), &spec));
                check_against_truth(&label, &spec, &c);
                let nan = c.temperature.iter().filter(|v| v.is_nan()).count();
                assert_eq!(
                    nan,
                    points.len(),
                    "{label}: exactly the masked points are NaN"
                );
            }
        }
    }
}

#[test]
fn members_time_steps_and_surface_axes_broadcast() {
    let dir = tempfile::tempdir().expect("tempdir");
    for standard_names in [true, false] {
        for (time_axis, member_axis) in [(true, true), (true, false), (false, false), (false, true)]
        {
            let spec = FixtureSpec {
                members: Some(3),
                time_steps: Some(4),
                standard_names,
                reference_time_variable: !standard_names,
                surface: Some(SurfaceSpec {
                    time_axis,
                    member_axis,
                    ..SurfaceSpec::default()
                }),
                file_heights: FileHeights::Geopotential,
                ..FixtureSpec::default()
            };
            let label =
                format!("members-std-{standard_names}-sfc-time-{time_axis}-member-{member_axis}");
            let c = read(&write(&dir, &format!("{label}.nc"), &spec));
            assert_eq!(c.members, 3);
            // 6-hourly steps from 2011-01-10 12Z: 0, 21600, 43200, 64800 s.
            assert_eq!(c.lead_times_s, vec![0, 21_600, 43_200, 64_800], "{label}");
            let s = c.surface.as_ref().expect("surface");
            assert_eq!(s.pressure_pa.shape(), &[3, 4, 4, 6], "{label}");
            check_against_truth(&label, &spec, &c);
        }
    }
}

#[test]
fn hybrid_sigma_pressure_variants_read_bottom_up() {
    let dir = tempfile::tempdir().expect("tempdir");
    for (label, spec) in hybrid_variants() {
        let c = read(&write(&dir, &format!("{label}.nc"), &spec));
        check_against_truth(&label, &spec, &c);
        assert!(
            c.surface.is_some(),
            "{label}: the ps term gives the surface pressure"
        );
        assert!(
            c.variables
                .iter()
                .any(|(r, n)| r == "surface_air_pressure" && n == "ps"),
            "{label}: {:?}",
            c.variables
        );
    }
}

#[test]
fn hybrid_without_half_levels_is_an_error_with_a_hint() {
    let dir = tempfile::tempdir().expect("tempdir");
    let spec = FixtureSpec {
        vertical: VerticalSpec::Hybrid {
            form: HybridForm::Ap,
            half_levels: HalfLevels::Absent,
        },
        ..FixtureSpec::default()
    };
    let path = write(&dir, "no-halves.nc", &spec);
    let (e, msg) = read_err(&path);
    assert!(matches!(e, IngestError::MissingHalfLevels { .. }), "{msg}");
    assert!(
        msg.contains("no-halves.nc") && msg.contains("'lev'"),
        "{msg}"
    );
    assert!(
        msg.contains("bounds") && msg.contains("hybrid_a_half_levels"),
        "{msg}"
    );
}

#[test]
fn hybrid_without_surface_height_is_an_error() {
    let dir = tempfile::tempdir().expect("tempdir");
    let spec = FixtureSpec {
        vertical: VerticalSpec::Hybrid {
            form: HybridForm::AP0,
            half_levels: HalfLevels::Bounds,
        },
        surface: Some(SurfaceSpec {
            with_height: false,
            ..SurfaceSpec::default()
        }),
        ..FixtureSpec::default()
    };
    let path = write(&dir, "no-zs.nc", &spec);
    let (_, msg) = read_err(&path);
    assert!(
        msg.contains("no-zs.nc") && msg.contains("surface_geopotential"),
        "{msg}"
    );
}

#[test]
fn temperature_on_the_vertical_axis_is_chosen_over_a_2m_one() {
    let dir = tempfile::tempdir().expect("tempdir");
    let spec = FixtureSpec {
        near_surface_decoys: true,
        ..FixtureSpec::default()
    };
    let c = read(&write(&dir, "decoys.nc", &spec));
    assert!(
        c.notes
            .iter()
            .any(|n| n.contains("air_temperature: chose 't'") && n.contains("'t2m'")),
        "{:?}",
        c.notes
    );
    assert!(
        c.notes
            .iter()
            .any(|n| n.contains("chose 'q'") && n.contains("'q2m'")),
        "{:?}",
        c.notes
    );
}

#[test]
fn dataset_config_sets_constants_and_phase() {
    let dir = tempfile::tempdir().expect("tempdir");
    let cfg_path = dir.path().join("dataset.toml");
    // 287.0531 J/kg/K: U.S. Standard Atmosphere 1976, R* / M0 (GUIDE §2).
    std::fs::write(
        &cfg_path,
        "rh_phase = \"ice_below_freezing\"\n[constants]\ndry_air_gas_constant = 287.0531\n[names]\nair_temperature = [\"t\"]\n",
    )
    .expect("write config");
    let cfg = load_config(&cfg_path).expect("config");
    let spec = FixtureSpec {
        humidity: HumidityEncoding::RelativePercent,
        ..FixtureSpec::default()
    };
    let c = read_cycle(&write(&dir, "c.nc", &spec), &cfg).expect("read");
    assert_eq!(c.constants.dry_air_gas_constant, 287.0531);
    assert!(
        c.notes.iter().any(|n| n.contains("ice below")),
        "{:?}",
        c.notes
    );
}

// ----- real files (../shared/data) -----

fn shared_data(rel: &str) -> Option<PathBuf> {
    let p = Path::new(concat!(env!("CARGO_MANIFEST_DIR"), "/../shared/data")).join(rel);
    if p.exists() {
        Some(p)
    } else {
        eprintln!(
            "skipped: {} is absent (the shared data folder is not here)",
            p.display()
        );
        None
    }
}

fn min_max(values: impl Iterator<Item = f32>) -> (f64, f64) {
    values
        .filter(|v| !v.is_nan())
        .fold((f64::INFINITY, f64::NEG_INFINITY), |(lo, hi), v| {
            (lo.min(f64::from(v)), hi.max(f64::from(v)))
        })
}

#[test]
fn gfs_1deg_found_through_the_name_map() {
    let Some(path) = shared_data("gfs-1deg-isobaric-2010102612-metpy/GFS_test.nc") else {
        return;
    };
    let c = read(&path);
    // PROVENANCE.md: 1 time step, 26 levels, 46 rows (65N to 20N), 101 columns (210E to 310E).
    assert_eq!(c.temperature.shape(), &[1, 1, 26, 46, 101]);
    assert_eq!(c.grid.latitudes.first().copied(), Some(65.0));
    assert_eq!(c.grid.latitudes.last().copied(), Some(20.0));
    assert_eq!(c.grid.longitudes.first().copied(), Some(210.0));
    assert_eq!(c.grid.longitudes.last().copied(), Some(310.0));
    // isobaric3 is stored in Pa, ascending (10 hPa first): top-down in the file.
    assert!(c.levels_top_down_in_file);
    let Vertical::Isobaric { pressure_pa } = &c.vertical else {
        panic!("isobaric expected");
    };
    assert_eq!(pressure_pa.first().copied(), Some(100_000.0));
    assert_eq!(pressure_pa.last().copied(), Some(1000.0));
    // Time: 0 h since 2010-10-26T12:00Z.
    assert_eq!(c.reference_time.as_deref(), Some("2010-10-26T12:00:00Z"));
    assert_eq!(c.lead_times_s, vec![0]);
    // Value ranges (PROVENANCE.md): T 192.9-304.2 K, Z -286 to 31018 gpm, RH 0-100 %.
    let (tmin, tmax) = min_max(c.temperature.iter().copied());
    assert!(
        close(tmin, 192.9, 0.06) && close(tmax, 304.2, 0.06),
        "{tmin} {tmax}"
    );
    let (zmin, zmax) = min_max(c.file_heights.as_ref().expect("heights").iter().copied());
    assert!(
        close(zmin, -286.0, 1.0) && close(zmax, 31018.0, 1.0),
        "{zmin} {zmax}"
    );
    let h = c.humidity.as_ref().expect("humidity");
    assert_eq!(h.kind, HumidityKind::RelativeHumidity);
    let (rmin, rmax) = min_max(h.values.iter().copied());
    assert!(
        rmin >= 0.0 && rmax <= 1.0 + 1e-6 && rmax > 0.99,
        "{rmin} {rmax}"
    );
    // isobaric5 lacks 20 hPa: index 24 bottom-up of 26.
    assert_eq!(h.missing_levels, vec![24]);
    assert!(
        c.notes.iter().any(|n| n.contains("20 hPa")),
        "{:?}",
        c.notes
    );
    // No surface pressure or orography in this file (PROVENANCE.md).
    assert!(c.surface.is_none());
    for (role, name) in [
        ("air_temperature", "Temperature_isobaric"),
        ("relative_humidity", "Relative_humidity_isobaric"),
        ("geopotential_height", "Geopotential_height_isobaric"),
    ] {
        assert!(
            c.variables.iter().any(|(r, n)| r == role && n == name),
            "{role}: {:?}",
            c.variables
        );
    }
    // Nothing is masked (PROVENANCE.md).
    assert!(c.temperature.iter().all(|v| !v.is_nan()));
}

#[test]
fn gfs_2p5deg_t_over_t2m_with_surface_fields() {
    let Some(path) = shared_data(
        "gfs-2p5deg-global-2011011012-f120/gfs_2p5deg_2011011012_f120_isobaric_subset.nc",
    ) else {
        return;
    };
    let c = read(&path);
    // PROVENANCE.md: global 2.5 degree, 144 x 73, 26 levels ordered 1000 to 10 hPa.
    assert_eq!(c.temperature.shape(), &[1, 1, 26, 73, 144]);
    assert!(!c.levels_top_down_in_file);
    assert_eq!(c.grid.latitudes.first().copied(), Some(90.0));
    assert_eq!(c.grid.latitudes.last().copied(), Some(-90.0));
    assert_eq!(c.grid.longitudes.first().copied(), Some(0.0));
    assert_eq!(c.grid.longitudes.last().copied(), Some(357.5));
    // Reference 2011-01-10 12Z, step 120 h.
    assert_eq!(c.reference_time.as_deref(), Some("2011-01-10T12:00:00Z"));
    assert_eq!(c.lead_times_s, vec![120 * 3600]);
    assert!(
        c.notes
            .iter()
            .any(|n| n.contains("air_temperature: chose 't'") && n.contains("'t2m'")),
        "{:?}",
        c.notes
    );
    assert!(c
        .variables
        .iter()
        .any(|(r, n)| r == "air_temperature" && n == "t"));
    let h = c.humidity.as_ref().expect("humidity");
    assert_eq!(
        h.kind,
        HumidityKind::RelativeHumidity,
        "q2m is 2-D and is passed over"
    );
    // r has no 20 hPa message: index 24 bottom-up.
    assert_eq!(h.missing_levels, vec![24]);
    let s = c.surface.as_ref().expect("sp and orog");
    // PROVENANCE.md: sp 499-1044 hPa, orog -74.5 to 5635 m.
    let (pmin, pmax) = min_max(s.pressure_pa.iter().copied());
    assert!(
        close(pmin / 100.0, 499.0, 1.0) && close(pmax / 100.0, 1044.0, 1.0),
        "{pmin} {pmax}"
    );
    let (zmin, zmax) = min_max(s.height_m.iter().copied());
    assert!(
        close(zmin, -74.5, 0.5) && close(zmax, 5635.0, 1.0),
        "{zmin} {zmax}"
    );
    assert!(c.file_heights.is_some());
}

#[test]
fn wrf_native_levels_are_refused_with_what_was_looked_for() {
    let Some(path) = shared_data("wrf-katrina-2005082800-wrfpython/ci_test_file.nc") else {
        return;
    };
    let (e, msg) = read_err(&path);
    assert!(matches!(e, IngestError::NoVerticalAxis { .. }), "{msg}");
    assert!(
        msg.contains("ci_test_file.nc") && msg.contains("'T'"),
        "{msg}"
    );
    assert!(
        msg.contains("air_pressure") && msg.contains("atmosphere_hybrid_sigma_pressure_coordinate"),
        "{msg}"
    );
    assert!(msg.contains("bottom_top"), "{msg}");
}

// ----- bad files -----

#[test]
fn truncated_files_are_refused() {
    let dir = tempfile::tempdir().expect("tempdir");
    for format in [Format::Classic, Format::Netcdf4] {
        let spec = FixtureSpec {
            format,
            ..FixtureSpec::default()
        };
        let path = write(&dir, &format!("cut-{format:?}.nc"), &spec);
        let bytes = std::fs::read(&path).expect("read");
        std::fs::write(&path, &bytes[..bytes.len() * 2 / 3]).expect("cut");
        let (e, msg) = read_err(&path);
        assert!(
            matches!(e, IngestError::Damaged { .. } | IngestError::Read { .. }),
            "{format:?}: {msg}"
        );
        assert!(msg.contains(&format!("cut-{format:?}.nc")), "{msg}");
        assert!(msg.contains("truncated"), "{msg}");
        if let IngestError::Read { variable, .. } = &e {
            assert!(msg.contains(&format!("'{variable}'")), "{msg}");
        }
        if format == Format::Classic {
            // The NetCDF-3 header names the variable whose data are cut off.
            assert!(msg.contains("the data of variable '"), "{msg}");
        }
    }
}

#[test]
fn text_and_missing_files_are_refused() {
    let dir = tempfile::tempdir().expect("tempdir");
    let text = dir.path().join("cycle.nc");
    std::fs::write(&text, "time,lat,lon,t\n0,50,0,280\n").expect("write");
    let (e, msg) = read_err(&text);
    assert!(matches!(e, IngestError::NotNetcdf { .. }), "{msg}");
    assert!(
        msg.contains("cycle.nc") && msg.contains("not a netcdf file"),
        "{msg}"
    );
    let (e, msg) = read_err(&dir.path().join("absent.nc"));
    assert!(matches!(e, IngestError::Io { .. }), "{msg}");
    assert!(msg.contains("absent.nc"), "{msg}");
}

#[test]
fn no_temperature_is_refused() {
    let dir = tempfile::tempdir().expect("tempdir");
    let spec = FixtureSpec {
        faults: Faults {
            omit_temperature: true,
            ..Faults::default()
        },
        ..FixtureSpec::default()
    };
    let (e, msg) = read_err(&write(&dir, "no-t.nc", &spec));
    assert!(matches!(e, IngestError::NoTemperature { .. }), "{msg}");
    assert!(
        msg.contains("no-t.nc") && msg.contains("air_temperature") && msg.contains("'ta'"),
        "{msg}"
    );
}

#[test]
fn fahrenheit_is_refused_naming_the_variable_and_units() {
    let dir = tempfile::tempdir().expect("tempdir");
    let spec = FixtureSpec {
        faults: Faults {
            temperature_units: Some("F".into()),
            ..Faults::default()
        },
        ..FixtureSpec::default()
    };
    let (e, msg) = read_err(&write(&dir, "f.nc", &spec));
    assert!(matches!(e, IngestError::Units { .. }), "{msg}");
    assert!(
        msg.starts_with("variable 't' in '")
            && msg.contains("f.nc' has units 'F': expected K or degC"),
        "{msg}"
    );
}

#[test]
fn non_monotonic_levels_are_refused_naming_the_coordinate() {
    let dir = tempfile::tempdir().expect("tempdir");
    let spec = FixtureSpec {
        faults: Faults {
            non_monotonic_levels: true,
            ..Faults::default()
        },
        ..FixtureSpec::default()
    };
    let (e, msg) = read_err(&write(&dir, "zigzag.nc", &spec));
    assert!(
        matches!(e, IngestError::NonMonotonic { index: 3, .. }),
        "{msg}"
    );
    assert!(msg.contains("'plev'") && msg.contains("zigzag.nc"), "{msg}");
}

#[test]
fn grams_per_kilogram_labelled_kg_per_kg_fail_plausibility() {
    let dir = tempfile::tempdir().expect("tempdir");
    let spec = FixtureSpec {
        humidity: HumidityEncoding::SpecificGPerKg,
        faults: Faults {
            humidity_units: Some("kg/kg".into()),
            ..Faults::default()
        },
        ..FixtureSpec::default()
    };
    let (e, msg) = read_err(&write(&dir, "gkg.nc", &spec));
    assert!(matches!(e, IngestError::Implausible { .. }), "{msg}");
    assert!(
        msg.contains("'q'") && msg.contains("gkg.nc") && msg.contains("g/kg"),
        "{msg}"
    );
    // The first offending index in the file's own dimension order: the lowest level (1000 hPa)
    // of the first column holds about 11 g/kg.
    assert!(msg.contains("[time=0, plev=0, lat=0, lon=0]"), "{msg}");
}

#[test]
fn celsius_labelled_kelvin_fails_plausibility() {
    let dir = tempfile::tempdir().expect("tempdir");
    let spec = FixtureSpec {
        temperature_units: TemperatureUnits::Celsius,
        levels_top_down: true,
        faults: Faults {
            temperature_units: Some("K".into()),
            ..Faults::default()
        },
        ..FixtureSpec::default()
    };
    let (e, msg) = read_err(&write(&dir, "ck.nc", &spec));
    assert!(matches!(e, IngestError::Implausible { .. }), "{msg}");
    assert!(
        msg.contains("'t'") && msg.contains("ck.nc") && msg.contains("150-350 K"),
        "{msg}"
    );
    assert!(msg.contains("plev=0"), "{msg}");
}

/// A good cycle under a name with a backslash is refused up front, saying why, rather than
/// reported as damaged (which is what the NetCDF library says when it is asked to open it).
#[test]
fn a_backslash_in_the_path_is_refused_with_the_reason() {
    let dir = tempfile::tempdir().unwrap();
    let good = FixtureSpec::default().write(&dir.path().join("good.nc"));
    read_cycle(&good, &IngestConfig::default()).expect("the fixture reads under a plain name");
    let odd = dir.path().join("cycle\\2030.nc");
    std::fs::copy(&good, &odd).unwrap();
    let err = read_cycle(&odd, &IngestConfig::default()).unwrap_err();
    assert!(matches!(err, IngestError::Backslash { .. }), "{err:?}");
    let message = err.to_string();
    assert!(message.contains(&odd.display().to_string()), "{message}");
    assert!(
        message.contains("backslash") && !message.contains("damaged"),
        "{message}"
    );
}
