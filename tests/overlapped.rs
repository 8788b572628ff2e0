//! Reading and computing overlapped gives exactly what reading the whole cycle first and
//! computing after gives, for every encoding of the fixture atmosphere, and the same errors
//! for bad files: the feed of steps ([`read_cycle_overlapped`]) and the serving read that
//! computes each step while later ones are read ([`LoadedCycle::read`], then its pending
//! steps). The batch's own whole-cycle path ([`read_and_compute`], read then computed) is
//! held to the same answers and errors.
//!
//! The reference here is the project's own two-pass path (`read_cycle` then
//! `compute_heights`), itself checked against published values in `tests/compute.rs`,
//! `tests/kernel.rs` and `tests/real_cycles.rs`: these tests check that overlapping changes
//! nothing, bit for bit. The fixture values are invented (tests/common/fixtures.rs).

mod common;

use std::path::{Path, PathBuf};

use ndarray::s;

use common::fixtures::{
    hybrid_variants, isobaric_variants, two_layer_config, FileHeights, FixtureSpec,
    HumidityEncoding,
};
use hypsogrid::compute::{compute_heights, read_and_compute, ComputeConfig, LoadError};
use hypsogrid::ingest::{
    read_cycle, read_cycle_overlapped, read_cycle_overlapped_unless, IngestConfig, IngestError,
};
use hypsogrid::model::{Cycle, Heights};
use hypsogrid::query::LoadedCycle;

/// The fixture's two layers (see [`two_layer_config`]).
fn config() -> ComputeConfig {
    two_layer_config()
}

/// Bitwise equality of two float arrays (NaN equal to NaN), naming what differs.
fn same_bits<'a>(
    what: &str,
    a: impl IntoIterator<Item = &'a f32>,
    b: impl IntoIterator<Item = &'a f32>,
) {
    let (a, b): (Vec<u32>, Vec<u32>) = (
        a.into_iter().map(|v| v.to_bits()).collect(),
        b.into_iter().map(|v| v.to_bits()).collect(),
    );
    assert_eq!(a.len(), b.len(), "{what}: lengths differ");
    if let Some(i) = a.iter().zip(&b).position(|(x, y)| x != y) {
        panic!(
            "{what}: first difference at flat index {i}: {} vs {}",
            f32::from_bits(a[i]),
            f32::from_bits(b[i])
        );
    }
}

fn same_cycle(label: &str, a: &Cycle, b: &Cycle) {
    assert_eq!(a.temperature.dim(), b.temperature.dim(), "{label}");
    same_bits(
        &format!("{label}: temperature"),
        &a.temperature,
        &b.temperature,
    );
    match (&a.humidity, &b.humidity) {
        (Some(x), Some(y)) => {
            assert_eq!(x.kind, y.kind, "{label}");
            assert_eq!(x.missing_levels, y.missing_levels, "{label}");
            same_bits(&format!("{label}: humidity"), &x.values, &y.values);
        }
        (None, None) => {}
        _ => panic!("{label}: humidity present in one read only"),
    }
    match (&a.surface, &b.surface) {
        (Some(x), Some(y)) => {
            same_bits(&format!("{label}: ps"), &x.pressure_pa, &y.pressure_pa);
            same_bits(&format!("{label}: zs"), &x.height_m, &y.height_m);
        }
        (None, None) => {}
        _ => panic!("{label}: surface present in one read only"),
    }
    assert_eq!(a.notes, b.notes, "{label}");
    assert_eq!(a.variables, b.variables, "{label}");
    assert_eq!(a.lead_times_s, b.lead_times_s, "{label}");
}

fn same_heights(label: &str, a: &Heights, b: &Heights) {
    same_bits(
        &format!("{label}: heights"),
        &a.geopotential_height,
        &b.geopotential_height,
    );
    assert_eq!(
        a.below_ground, b.below_ground,
        "{label}: below-ground flags"
    );
    assert_eq!(a.thickness.len(), b.thickness.len(), "{label}");
    for (x, y) in a.thickness.iter().zip(&b.thickness) {
        assert_eq!(x.layer, y.layer, "{label}");
        same_bits(&format!("{label}: thickness"), &x.values, &y.values);
        assert_eq!(x.below_ground, y.below_ground, "{label}: thickness flags");
    }
    assert_eq!(a.method, b.method, "{label}");
}

/// Every isobaric and hybrid variant, plus several steps and members with levels both ways,
/// and several steps of hybrid levels (the column path) and of relative humidity (the row
/// kernel, made specific humidity first).
fn variants() -> Vec<(String, FixtureSpec)> {
    let mut v = isobaric_variants();
    let hybrid = hybrid_variants();
    v.push((
        "hybrid-steps".into(),
        FixtureSpec {
            time_steps: Some(3),
            ..hybrid[0].1.clone()
        },
    ));
    // Deflated in whole planes: read chunk by chunk on every core, and nothing computed
    // while the serving read goes on.
    let isobaric = FixtureSpec {
        time_steps: Some(3),
        ..FixtureSpec::default()
    };
    let hybrid_steps = FixtureSpec {
        time_steps: Some(3),
        ..hybrid[0].1.clone()
    };
    // Chunked the same way but stored uncompressed (netCDF-4's default for a variable with
    // an unlimited axis): read chunk by chunk on every core as well.
    for (label, base, plain) in [
        ("chunked-deflated-steps", isobaric.clone(), false),
        ("chunked-deflated-hybrid-steps", hybrid_steps.clone(), false),
        ("chunked-plain-steps", isobaric, true),
        ("chunked-plain-hybrid-steps", hybrid_steps, true),
    ] {
        let tiles = [1, base.latitudes().len(), base.longitudes().len()];
        v.push((
            label.into(),
            FixtureSpec {
                deflate_tiles: Some(tiles),
                tiles_stored_plain: plain,
                ..base
            },
        ));
    }
    v.extend(hybrid);
    // No surface fields, the columns started at the file's heights on the lowest level:
    // the row kernel too, while reading.
    v.push((
        "no-surface-steps".into(),
        FixtureSpec {
            time_steps: Some(3),
            surface: None,
            file_heights: FileHeights::GeopotentialHeight,
            ..FixtureSpec::default()
        },
    ));
    v.push((
        "relative-humidity-steps".into(),
        FixtureSpec {
            time_steps: Some(3),
            humidity: HumidityEncoding::RelativePercent,
            ..FixtureSpec::default()
        },
    ));
    for top_down in [false, true] {
        v.push((
            format!("members-and-steps-top-down-{top_down}"),
            FixtureSpec {
                time_steps: Some(3),
                members: Some(2),
                levels_top_down: top_down,
                ..FixtureSpec::default()
            },
        ));
    }
    v
}

fn write(dir: &Path, label: &str, spec: &FixtureSpec) -> PathBuf {
    spec.write(&dir.join(format!("{label}.nc")))
}

#[test]
fn every_variant_reads_and_computes_as_in_two_passes() {
    let dir = tempfile::tempdir().expect("tempdir");
    let ingest = IngestConfig::default();
    let config = config();
    for (label, spec) in variants() {
        let path = write(dir.path(), &label, &spec);
        let cycle = read_cycle(&path, &ingest).expect(&label);
        let heights = compute_heights(&cycle, &config, &|_| {}).expect(&label);
        let (cycle2, heights2) = read_and_compute(&path, &ingest, &config, &|_, _| {})
            .unwrap_or_else(|e| panic!("{label}: {e}"));
        same_cycle(&label, &cycle, &cycle2);
        same_heights(&label, &heights, &heights2);
    }
}

/// A cycle read for serving holds the heights of the steps computed while later steps were
/// read, leaves at least the last step pending, and once finished holds, step for step and
/// bit for bit, what the batch computes (with no layers: a served cycle answers thickness
/// per query).
#[test]
fn every_variant_reads_for_serving_and_finishes_as_the_batch_computes() {
    let dir = tempfile::tempdir().expect("tempdir");
    let ingest = IngestConfig::default();
    let served_config = ComputeConfig::default();
    for (label, spec) in variants() {
        let path = write(dir.path(), &label, &spec);
        let cycle = read_cycle(&path, &ingest).expect(&label);
        let batch = compute_heights(&cycle, &served_config, &|_| {}).expect(&label);
        let lc =
            LoadedCycle::read(&path, &ingest, &config()).unwrap_or_else(|e| panic!("{label}: {e}"));
        same_cycle(&label, &cycle, &lc.cycle);
        assert!(
            lc.config.layers.is_empty(),
            "{label}: served without layers"
        );
        let (members, times, ..) = cycle.temperature.dim();
        let pending = lc.heights.pending_steps();
        assert!(
            pending.contains(&(members - 1, times - 1)),
            "{label}: the last step is left to compute after the read: {pending:?}"
        );
        if label.starts_with("chunked") {
            assert_eq!(
                pending.len(),
                members * times,
                "{label}: nothing computed while the read uses every core"
            );
        }
        // How many steps are in by now depends on how fast the file reads against how fast
        // the kernel computes: once the read has ended the kernel stops at its next piece of
        // rows and leaves the rest for later (src/compute.rs's unit tests pin both sides of
        // that down); these fixtures read in a few milliseconds.
        // Steps already in are the batch's.
        for m in 0..members {
            for t in 0..times {
                if let Some(step) = lc.heights.ready(m, t) {
                    let what = format!("{label}: step ({m}, {t}) computed while reading");
                    same_bits(
                        &what,
                        &step.geopotential_height,
                        batch.geopotential_height.slice(s![m, t, .., .., ..]),
                    );
                }
            }
        }
        assert!(lc.finish_heights() >= 0.0);
        assert!(lc.heights.pending_steps().is_empty(), "{label}");
        assert_eq!(lc.heights.ready_steps(), members * times, "{label}");
        assert_eq!(lc.heights.method(), batch.method, "{label}");
        let (z, below) = lc.heights.to_arrays().expect(&label);
        same_bits(&format!("{label}: heights"), &z, &batch.geopotential_height);
        assert_eq!(below, batch.below_ground, "{label}: below-ground flags");
        // A second call finds nothing left to do.
        lc.finish_heights();
        assert_eq!(lc.heights.ready_steps(), members * times, "{label}");
    }
}

/// The steps handed over while reading are the cycle's own values at those steps, in file
/// order, and every step comes; the files whose layout needs whole-variable reads hand over
/// nothing.
#[test]
fn the_feed_hands_over_each_step_as_the_cycle_holds_it() {
    let dir = tempfile::tempdir().expect("tempdir");
    let ingest = IngestConfig::default();
    let mut overlapped = Vec::new();
    for (label, spec) in variants() {
        let path = write(dir.path(), &label, &spec);
        let prepared_dims = std::cell::Cell::new(None);
        let (cycle, fed) = read_cycle_overlapped(
            &path,
            &ingest,
            |cycle| {
                prepared_dims.set(Some(cycle.temperature.dim()));
                Some(())
            },
            |(), shell, steps| {
                // The arrays are out of the cycle while the steps are read.
                assert_eq!(shell.temperature.len(), 0);
                steps
                    .map(|s| {
                        let q = s.humidity.map(|q| q.to_owned());
                        (s.member, s.time, s.temperature.to_owned(), q)
                    })
                    .collect::<Vec<_>>()
            },
        )
        .unwrap_or_else(|e| panic!("{label}: {e}"));
        same_cycle(&label, &read_cycle(&path, &ingest).expect(&label), &cycle);
        let Some(fed) = fed else {
            continue;
        };
        overlapped.push(label.clone());
        assert_eq!(
            prepared_dims.get(),
            Some(cycle.temperature.dim()),
            "{label}"
        );
        let (members, times, ..) = cycle.temperature.dim();
        let order: Vec<(usize, usize)> = fed.iter().map(|(m, t, ..)| (*m, *t)).collect();
        let expected: Vec<(usize, usize)> = (0..members)
            .flat_map(|m| (0..times).map(move |t| (m, t)))
            .collect();
        assert_eq!(order, expected, "{label}: steps in file order, all of them");
        for (m, t, temperature, humidity) in &fed {
            let want = cycle.temperature.slice(s![*m, *t, .., .., ..]);
            same_bits(&format!("{label}: fed temperature"), want, temperature);
            match (humidity, &cycle.humidity) {
                (Some(q), Some(h)) => same_bits(
                    &format!("{label}: fed humidity"),
                    h.values.slice(s![*m, *t, .., .., ..]),
                    q,
                ),
                (None, None) => {}
                _ => panic!("{label}: humidity fed for a cycle without it, or missing"),
            }
        }
    }
    // Plain float files overlap, with levels either way and with members and steps.
    for want in [
        "default",
        "members-and-steps-top-down-false",
        "members-and-steps-top-down-true",
    ] {
        assert!(
            overlapped.iter().any(|l| l == want),
            "{want} did not overlap: {overlapped:?}"
        );
    }
    // Transposed dimensions need the whole variable: no overlap.
    assert!(
        !overlapped.iter().any(|l| l.contains("transpose")),
        "{overlapped:?}"
    );
}

/// A preparation that declines (as the serving read's does for a one-step cycle on the
/// column path) reads the whole cycle, hands over no step, and still gives the two-pass
/// answers.
#[test]
fn a_declined_preparation_reads_the_whole_cycle_and_hands_over_nothing() {
    let dir = tempfile::tempdir().expect("tempdir");
    let spec = FixtureSpec {
        humidity: HumidityEncoding::RelativePercent,
        time_steps: Some(2),
        ..FixtureSpec::default()
    };
    let path = write(dir.path(), "rh", &spec);
    let ingest = IngestConfig::default();
    let (cycle, fed) =
        read_cycle_overlapped(&path, &ingest, |_| None::<()>, |(), _, steps| steps.count())
            .expect("reading");
    assert!(fed.is_none());
    same_cycle("rh", &read_cycle(&path, &ingest).expect("rh"), &cycle);
}

/// Chunks that span several time steps would be decompressed once per step read: such files
/// are read whole, with the same values.
#[test]
fn chunks_across_time_steps_are_read_whole() {
    let dir = tempfile::tempdir().expect("tempdir");
    let ingest = IngestConfig::default();
    for (label, across) in [("one-step-chunks", false), ("all-step-chunks", true)] {
        let spec = FixtureSpec {
            time_steps: Some(3),
            chunks_across_steps: across,
            ..FixtureSpec::default()
        };
        let path = write(dir.path(), label, &spec);
        let (cycle, fed) =
            read_cycle_overlapped(&path, &ingest, |_| Some(()), |(), _, steps| steps.count())
                .expect(label);
        assert_eq!(fed, (!across).then_some(3), "{label}");
        same_cycle(label, &read_cycle(&path, &ingest).expect(label), &cycle);
    }
}

/// Fields deflated in chunks of one step (whole planes, or tiles with short edges), or stored
/// uncompressed in such chunks, are read step by step chunk by chunk, in parallel without the
/// library: the same cycle as the library's whole read, for every member, step, level order,
/// masked point and packing (packed fields stay with the library).
#[test]
fn deflated_steps_read_as_the_library_reads_them() {
    let dir = tempfile::tempdir().expect("tempdir");
    let ingest = IngestConfig::default();
    let mut variants: Vec<(String, Option<[usize; 3]>, FixtureSpec)> = vec![
        (
            "one-chunk-a-step".into(),
            Some([usize::MAX, usize::MAX, usize::MAX]),
            FixtureSpec {
                time_steps: Some(2),
                ..FixtureSpec::default()
            },
        ),
        (
            "packed".into(),
            Some([1, usize::MAX, usize::MAX]),
            FixtureSpec {
                time_steps: Some(2),
                packed: true,
                ..FixtureSpec::default()
            },
        ),
    ];
    // Deflated, and chunked so but stored uncompressed: read chunk by chunk on every core
    // either way.
    for (kind, plain) in [("deflated", false), ("plain", true)] {
        variants.push((
            format!("{kind}-planes"),
            Some([1, usize::MAX, usize::MAX]),
            FixtureSpec {
                time_steps: Some(3),
                tiles_stored_plain: plain,
                ..FixtureSpec::default()
            },
        ));
        variants.push((
            format!("{kind}-tiles-members-top-down-masked"),
            Some([3, 2, 3]),
            FixtureSpec {
                members: Some(2),
                time_steps: Some(2),
                levels_top_down: true,
                masked_points: vec![[1, 1, 2, 3, 5]],
                tiles_stored_plain: plain,
                ..FixtureSpec::default()
            },
        ));
    }
    for (label, tiles, spec) in variants {
        let label = label.as_str();
        // Tile lengths no longer than the fixture's axes.
        let (levels, rows, cols) = (
            spec.levels(),
            spec.latitudes().len(),
            spec.longitudes().len(),
        );
        let spec = FixtureSpec {
            deflate_tiles: tiles.map(|[z, y, x]| [z.min(levels), y.min(rows), x.min(cols)]),
            ..spec
        };
        let path = write(dir.path(), label, &spec);
        let (cycle, fed) = read_cycle_overlapped(
            &path,
            &ingest,
            |_| Some(()),
            |(), _, steps| (steps.read_uses_every_core(), steps.count()),
        )
        .expect(label);
        // The feed says whether the read uses every core (what the serving read
        // decides by whether to compute meanwhile): packed fields stay with the library.
        let packed = label == "packed";
        assert_eq!(
            fed,
            Some((!packed, spec.member_count() * spec.time_count())),
            "{label}: read step by step"
        );
        same_cycle(label, &read_cycle(&path, &ingest).expect(label), &cycle);
    }
}

/// Writes `value` into variable `name` at `index` of an existing fixture file.
fn overwrite(path: &Path, name: &str, index: &[usize], value: f32) {
    let mut file = netcdf::append(path).expect("opening the fixture for append");
    let mut var = file.variable_mut(name).expect("variable");
    let extents: Vec<std::ops::Range<usize>> = index.iter().map(|&i| i..i + 1).collect();
    var.put_values(&[value], extents)
        .expect("writing one value");
}

fn error_of<T>(r: Result<T, LoadError>) -> String {
    match r {
        Ok(_) => panic!("a bad file was read"),
        Err(LoadError::Ingest(e)) => e.to_string(),
        Err(e) => panic!("not an ingest error: {e}"),
    }
}

/// A value out of the plausible range in the last step is found when that step is read,
/// with the same message (file, variable, index in the file's own order) as the whole read.
#[test]
fn a_bad_value_in_a_later_step_gives_the_whole_read_error() {
    let dir = tempfile::tempdir().expect("tempdir");
    let spec = FixtureSpec {
        time_steps: Some(3),
        ..FixtureSpec::default()
    };
    let ingest = IngestConfig::default();
    for (name, value) in [("t", 400.0_f32), ("q", 0.5)] {
        let path = write(dir.path(), &format!("bad-{name}"), &spec);
        overwrite(&path, name, &[2, 4, 1, 3], value);
        let whole = match read_cycle(&path, &ingest) {
            Ok(_) => panic!("the whole read took a bad value"),
            Err(e @ IngestError::Implausible { .. }) => e.to_string(),
            Err(e) => panic!("unexpected error: {e}"),
        };
        let batch = error_of(read_and_compute(&path, &ingest, &config(), &|_, _| {}));
        assert_eq!(batch, whole);
        // Nothing is served from such a file: its read for serving fails alike.
        let served = error_of(LoadedCycle::read(&path, &ingest, &config()));
        assert_eq!(served, whole);
        assert!(
            whole.contains(&format!("'{name}'")) && whole.contains("time=2, plev=4"),
            "{whole}"
        );
    }
}

/// A read asked whether to go on ([`read_cycle_overlapped_unless`]) asks once, with the
/// reference time and the temperature's size of the cycle the whole read gives, before any
/// field: a file whose temperature holds a bad value is passed over with the caller's reason
/// and no error of its own, and neither the preparation nor the work runs. Told to go on, it
/// reads the same cycle as the whole read.
#[test]
fn a_read_passed_over_stops_before_any_field() {
    let dir = tempfile::tempdir().expect("tempdir");
    let ingest = IngestConfig::default();
    let mut bad = 0;
    for (label, spec) in variants() {
        let path = write(dir.path(), &label, &spec);
        let whole = read_cycle(&path, &ingest).expect(&label);
        let expected = (whole.reference_time.clone(), whole.temperature.len());
        let asked = std::cell::RefCell::new(Vec::new());
        let answer = std::cell::Cell::new(None);
        let test = |reference_time: Option<&str>, point_levels: usize| {
            asked
                .borrow_mut()
                .push((reference_time.map(str::to_string), point_levels));
            answer.get().map(str::to_string)
        };
        let (cycle, _) = read_cycle_overlapped_unless(
            &path,
            &ingest,
            Some(&test),
            |_| Some(()),
            |(), _, steps| steps.count(),
        )
        .expect(&label);
        same_cycle(&label, &whole, &cycle);
        assert_eq!(*asked.borrow(), std::slice::from_ref(&expected), "{label}");

        // A bad value where the temperature is stored as plain floats (the others, packed in
        // integers, would take 400 as a raw value).
        let (rank, plain_floats) = temperature_storage(&path);
        if plain_floats {
            overwrite(&path, "t", &[0, 0, 0, 0, 0][..rank], 400.0);
            let read = read_cycle(&path, &ingest);
            assert!(
                matches!(read, Err(IngestError::Implausible { .. })),
                "{label}: the bad value is found by a read"
            );
            bad += 1;
        }
        asked.borrow_mut().clear();
        answer.set(Some("older than the cycles held"));
        let passed = read_cycle_overlapped_unless(
            &path,
            &ingest,
            Some(&test),
            |_| -> Option<()> { panic!("{label}: prepared") },
            |(), _, _| -> usize { panic!("{label}: worked") },
        );
        match passed {
            Err(IngestError::PassedOver { file, reason }) => {
                assert_eq!(file, path.display().to_string(), "{label}");
                assert_eq!(reason, "older than the cycles held", "{label}");
            }
            Err(e) => panic!("{label}: {e}"),
            Ok(_) => panic!("{label}: read"),
        }
        assert_eq!(*asked.borrow(), [expected], "{label}");
    }
    assert!(bad >= 10, "only {bad} variants with a bad value");
}

/// The rank of the fixture's temperature variable, and whether it is stored as `f32`.
fn temperature_storage(path: &Path) -> (usize, bool) {
    let file = netcdf::open(path).expect("opening the fixture");
    let t = file.variable("t").expect("t");
    let f32_type = netcdf::types::NcVariableType::Float(netcdf::types::FloatType::F32);
    (t.dimensions().len(), t.vartype() == f32_type)
}

/// A temperature with no valid value anywhere is refused by name, as by the whole read.
#[test]
fn a_temperature_with_no_valid_value_is_refused_by_name() {
    let dir = tempfile::tempdir().expect("tempdir");
    let spec = FixtureSpec {
        time_steps: Some(2),
        ..FixtureSpec::default()
    };
    let path = write(dir.path(), "all-missing", &spec);
    {
        let mut file = netcdf::append(&path).expect("append");
        let mut var = file.variable_mut("t").expect("t");
        let n: usize = var.dimensions().iter().map(|d| d.len()).product();
        var.put_values(&vec![f32::NAN; n], ..).expect("writing NaN");
    }
    let ingest = IngestConfig::default();
    let whole = read_cycle(&path, &ingest)
        .map(|_| ())
        .unwrap_err()
        .to_string();
    let batch = error_of(read_and_compute(&path, &ingest, &config(), &|_, _| {}));
    assert_eq!(batch, whole);
    let served = error_of(LoadedCycle::read(&path, &ingest, &config()));
    assert_eq!(served, whole);
    assert!(whole.contains("'t'"), "{whole}");
}

/// Real model files (`../shared/data`, PROVENANCE.md beside each): GFS 1° isobaric
/// (2010-10-26 12Z), GFS 2.5° global subset (2011-01-10 12Z + 120 h), WRF Katrina (hybrid
/// levels, the column path). Read for serving (steps computed while later ones are read) or
/// by the batch's whole-cycle path, the same cycle and the same heights as in two passes.
#[test]
fn real_model_files_read_and_compute_overlapped_as_in_two_passes() {
    let base = PathBuf::from(concat!(env!("CARGO_MANIFEST_DIR"), "/../shared/data"));
    let ingest = IngestConfig::default();
    let config = config();
    let mut seen = 0;
    for relative in [
        "gfs-1deg-isobaric-2010102612-metpy/GFS_test.nc",
        "gfs-2p5deg-global-2011011012-f120/gfs_2p5deg_2011011012_f120_isobaric_subset.nc",
        "wrf-katrina-2005082800-wrfpython/ci_test_file.nc",
    ] {
        let path = base.join(relative);
        if !path.exists() {
            eprintln!("skipped: {} is absent", path.display());
            continue;
        }
        let Ok(cycle) = read_cycle(&path, &ingest) else {
            // Files this reader refuses are refused the same way overlapped.
            let whole = read_cycle(&path, &ingest)
                .map(|_| ())
                .unwrap_err()
                .to_string();
            let batch = error_of(read_and_compute(&path, &ingest, &config, &|_, _| {}));
            assert_eq!(batch, whole, "{relative}");
            let served = error_of(LoadedCycle::read(&path, &ingest, &config));
            assert_eq!(served, whole, "{relative}");
            continue;
        };
        let heights = compute_heights(&cycle, &config, &|_| {}).expect(relative);
        let (cycle2, heights2) =
            read_and_compute(&path, &ingest, &config, &|_, _| {}).expect(relative);
        same_cycle(relative, &cycle, &cycle2);
        same_heights(relative, &heights, &heights2);
        // Served: heights on every level (no layers), step by step as the batch's.
        let served = compute_heights(&cycle, &ComputeConfig::default(), &|_| {}).expect(relative);
        let lc = LoadedCycle::read(&path, &ingest, &config).expect(relative);
        same_cycle(relative, &cycle, &lc.cycle);
        lc.finish_heights();
        let (z, below) = lc.heights.to_arrays().expect(relative);
        same_bits(
            &format!("{relative}: served heights"),
            &z,
            &served.geopotential_height,
        );
        assert_eq!(below, served.below_ground, "{relative}: served flags");
        seen += 1;
    }
    println!("{seen} real files compared");
}
