//! The batch ([`compute_file`], [`compute_file_in_bands`]) writes, band by band of latitude
//! rows, the same file as reading and computing the whole cycle ([`read_and_compute`]) and
//! writing it ([`write_heights`]): every variable's stored values bit for bit (fill values
//! included), the same dimensions, variables, storage chunks and attributes, for every
//! encoding of the fixture atmosphere and any band size; where the cycle cannot go band by
//! band, it falls back to exactly that pair. Errors name the file and leave nothing behind.
//!
//! The reference here is the project's own whole-cycle path (`read_and_compute` then
//! `write_heights`), itself checked against published values in `tests/compute.rs`,
//! `tests/kernel.rs` and `tests/real_cycles.rs` and against the two-pass path in
//! `tests/overlapped.rs`: these tests check that going band by band changes nothing in the
//! file. The fixture values are invented (tests/common/fixtures.rs).

mod common;

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};
use std::sync::Mutex;

use common::fixtures::{
    hybrid_variants, isobaric_variants, two_layer_config, FileHeights, FixtureSpec,
    HumidityEncoding, SurfaceSpec,
};
use common::hdf5::quiet_hdf5_on_this_thread;
use hypsogrid::batch::{compute_file, compute_file_in_bands, BatchError, BatchReport};
use hypsogrid::compute::{heights_method, read_and_compute, ComputeConfig, ComputeError};
use hypsogrid::ingest::{read_cycle, read_cycle_overlapped, IngestConfig, IngestError};
use hypsogrid::model::{Cycle, Layer};
use hypsogrid::output::{write_heights, OutputOptions};
use netcdf::types::{FloatType, IntType, NcVariableType};

/// Latitude rows of every fixture grid (20, 35, 50, 65 °N).
const FIXTURE_ROWS: usize = 4;

/// Band sizes asked for: one row, three rows (which do not divide the four rows of the
/// fixture grid, so the last band is shorter), and the batch's own choice.
const BAND_ROWS: [Option<usize>; 3] = [Some(1), Some(3), None];

/// The fixture's two layers (see [`two_layer_config`]).
fn config() -> ComputeConfig {
    two_layer_config()
}

/// The same `history` on both sides (it records the command line).
fn options(deflate_level: Option<i32>) -> OutputOptions {
    OutputOptions {
        history: "tests/batch.rs".into(),
        deflate_level,
    }
}

fn write(dir: &Path, label: &str, spec: &FixtureSpec) -> PathBuf {
    spec.write(&dir.join(format!("{label}.nc")))
}

/// The whole-cycle path: read and compute, then write to `output`.
fn reference(
    input: &Path,
    output: &Path,
    config: &ComputeConfig,
    options: &OutputOptions,
) -> Cycle {
    let label = input.display().to_string();
    let (cycle, heights) = read_and_compute(input, &IngestConfig::default(), config, &|_, _| {})
        .unwrap_or_else(|e| panic!("{label}: reference read: {e}"));
    write_heights(&cycle, &heights, output, options)
        .unwrap_or_else(|e| panic!("{label}: reference write: {e}"));
    cycle
}

/// The batch with bands of `band_rows` rows; `None` goes through [`compute_file`].
fn batch(
    input: &Path,
    output: &Path,
    config: &ComputeConfig,
    options: &OutputOptions,
    band_rows: Option<usize>,
) -> BatchReport {
    let ingest = IngestConfig::default();
    let result = match band_rows {
        Some(_) => compute_file_in_bands(
            input,
            output,
            &ingest,
            config,
            options,
            band_rows,
            &|_, _| {},
        ),
        None => compute_file(input, output, &ingest, config, options, &|_, _| {}),
    };
    result.unwrap_or_else(|e| panic!("{}: batch, bands {band_rows:?}: {e}", input.display()))
}

// ----- comparing two files -----

/// Opens a file for reading, quietly; the caller holds the NetCDF session lock.
fn open(path: &Path) -> netcdf::Result<netcdf::File> {
    quiet_hdf5_on_this_thread();
    netcdf::open(path)
}

/// Every stored value of a variable as bits (floats by their bit patterns, so that NaN and
/// the fill value compare exactly; integers sign-extended).
fn raw_bits(var: &netcdf::Variable<'_>) -> Vec<u64> {
    let name = var.name();
    let fail = |e: netcdf::Error| -> Vec<u64> { panic!("reading '{name}': {e}") };
    match var.vartype() {
        NcVariableType::Float(FloatType::F32) => var
            .get_values::<f32, _>(..)
            .map(|v| v.into_iter().map(|x| u64::from(x.to_bits())).collect())
            .unwrap_or_else(fail),
        NcVariableType::Float(FloatType::F64) => var
            .get_values::<f64, _>(..)
            .map(|v| v.into_iter().map(f64::to_bits).collect())
            .unwrap_or_else(fail),
        NcVariableType::Int(IntType::I8) => ints(var.get_values::<i8, _>(..), &name),
        NcVariableType::Int(IntType::U8) => ints(var.get_values::<u8, _>(..), &name),
        NcVariableType::Int(IntType::I16) => ints(var.get_values::<i16, _>(..), &name),
        NcVariableType::Int(IntType::U16) => ints(var.get_values::<u16, _>(..), &name),
        NcVariableType::Int(IntType::I32) => ints(var.get_values::<i32, _>(..), &name),
        NcVariableType::Int(IntType::U32) => ints(var.get_values::<u32, _>(..), &name),
        NcVariableType::Int(IntType::I64) => ints(var.get_values::<i64, _>(..), &name),
        other => panic!("variable '{name}' has type {other:?}, which the writer never makes"),
    }
}

fn ints<T: Into<i64>>(values: netcdf::Result<Vec<T>>, name: &str) -> Vec<u64> {
    match values {
        Ok(v) => v
            .into_iter()
            .map(|x| u64::from_ne_bytes(x.into().to_ne_bytes()))
            .collect(),
        Err(e) => panic!("reading '{name}': {e}"),
    }
}

/// Attributes by name, each value in its debug form (type and bits: `Float(9.96921e36)`,
/// `Str("m")`).
fn attributes<'a>(list: impl Iterator<Item = netcdf::Attribute<'a>>) -> BTreeMap<String, String> {
    list.map(|a| {
        let value = a
            .value()
            .unwrap_or_else(|e| panic!("attribute '{}': {e}", a.name()));
        (a.name().to_string(), format!("{value:?}"))
    })
    .collect()
}

/// Everything of one variable but its values: type, dimensions, storage, attributes.
fn variable_header(var: &netcdf::Variable<'_>) -> String {
    let dims: Vec<(String, usize)> = var
        .dimensions()
        .iter()
        .map(|d| (d.name(), d.len()))
        .collect();
    let chunks = var
        .chunking()
        .unwrap_or_else(|e| panic!("chunking of '{}': {e}", var.name()));
    format!(
        "type {:?}, dimensions {dims:?}, chunks {chunks:?}, attributes {:?}",
        var.vartype(),
        attributes(var.attributes())
    )
}

/// Asserts that the NetCDF files `a` and `b` hold the same dimensions, the same variables
/// in the same order with the same types, storage, attributes and stored values (bit for
/// bit), and the same global attributes but `history`; names the first thing that differs.
fn assert_same_file(what: &str, a: &Path, b: &Path) {
    let _session = hypsogrid::netcdf_session::lock();
    let fa = open(a).unwrap_or_else(|e| panic!("{what}: opening {}: {e}", a.display()));
    let fb = open(b).unwrap_or_else(|e| panic!("{what}: opening {}: {e}", b.display()));

    let dims = |f: &netcdf::File| -> Vec<(String, usize, bool)> {
        f.dimensions()
            .map(|d| (d.name(), d.len(), d.is_unlimited()))
            .collect()
    };
    assert_eq!(dims(&fa), dims(&fb), "{what}: dimensions differ");

    let groups = |f: &netcdf::File| f.groups().map(|g| g.count()).unwrap_or(0);
    assert_eq!(groups(&fa), groups(&fb), "{what}: groups differ");

    let global = |f: &netcdf::File| {
        let mut map = attributes(f.attributes());
        assert!(
            map.remove("history").is_some(),
            "{what}: no global 'history' attribute"
        );
        map
    };
    let (ga, gb) = (global(&fa), global(&fb));
    for key in ga.keys().chain(gb.keys()) {
        assert_eq!(
            ga.get(key),
            gb.get(key),
            "{what}: global attribute '{key}' differs"
        );
    }

    let names = |f: &netcdf::File| f.variables().map(|v| v.name()).collect::<Vec<_>>();
    let (na, nb) = (names(&fa), names(&fb));
    assert_eq!(na, nb, "{what}: variables differ");
    assert!(
        na.iter().any(|n| n == "geopotential_height"),
        "{what}: no heights in the file: {na:?}"
    );
    for name in &na {
        let (va, vb) = match (fa.variable(name), fb.variable(name)) {
            (Some(va), Some(vb)) => (va, vb),
            _ => panic!("{what}: variable '{name}' not found on opening"),
        };
        assert_eq!(
            variable_header(&va),
            variable_header(&vb),
            "{what}: variable '{name}' is defined differently"
        );
        let (xa, xb) = (raw_bits(&va), raw_bits(&vb));
        assert_eq!(xa.len(), xb.len(), "{what}: '{name}' lengths differ");
        if let Some(i) = xa.iter().zip(&xb).position(|(x, y)| x != y) {
            panic!(
                "{what}: '{name}' first differs at flat index {i} of {}: bits {:#x} vs {:#x} \
                 (as f32: {} vs {})",
                xa.len(),
                xa[i],
                xb[i],
                f32::from_bits(xa[i] as u32),
                f32::from_bits(xb[i] as u32)
            );
        }
    }
}

/// How many values of variable `name` of an output file are the fill value.
fn count_fill_values(path: &Path, name: &str) -> usize {
    let _session = hypsogrid::netcdf_session::lock();
    let file = open(path).expect("opening the output");
    let var = file.variable(name).expect("variable");
    var.get_values::<f32, _>(..)
        .expect("values")
        .iter()
        .filter(|&&v| v == hypsogrid::output::FLOAT_FILL_VALUE)
        .count()
}

// ----- what the report should say -----

/// What the report should say of the bands.
#[derive(Clone, Copy, Debug, PartialEq)]
enum Bands {
    /// The whole cycle read, computed and written (`band_rows` `None`).
    Whole,
    /// Bands of exactly this many rows.
    Exactly(usize),
    /// The batch's own choice: bands of about 4 MiB a field (at most the grid's rows).
    OwnChoice,
}

impl Bands {
    /// Whether `got` (a report's `band_rows`) is this, on a grid of `levels`, `rows`,
    /// `cols`. The batch's own choice is a band of about 4 MiB a field: at most twice that,
    /// the whole step where that is at most half of it, fewer rows than the grid where it is
    /// more than twice.
    fn matches(self, got: Option<usize>, (levels, rows, cols): (usize, usize, usize)) -> bool {
        const ABOUT: usize = 4 << 20;
        let row_bytes = 4 * levels * cols;
        match (self, got) {
            (Bands::Whole, None) => true,
            (Bands::Exactly(n), Some(got)) => got == n,
            (Bands::OwnChoice, Some(got)) => {
                let step = rows * row_bytes;
                (1..=rows).contains(&got)
                    && (got == 1 || got * row_bytes <= 2 * ABOUT)
                    && (step > ABOUT / 2 || got == rows)
                    && (step <= 2 * ABOUT || got < rows)
            }
            _ => false,
        }
    }
}

/// What the report should say for `input` when `asked` rows are asked for, derived from the
/// promises of the library's public parts, not from the variant's label: the whole cycle
/// unless the file is read step by step (as [`read_cycle_overlapped`] reports) and the
/// settings can compute the cycle ([`heights_method`]: on the row kernel or column by
/// column); whole steps where the output is
/// compressed; else the rows asked for (at least one, at most the grid's), or without a
/// request the batch's own choice (whatever the input's storage: input stored in chunks is
/// read a whole step at a time, then computed and written in bands).
fn expected_bands(
    input: &Path,
    config: &ComputeConfig,
    deflate: bool,
    asked: Option<usize>,
) -> Bands {
    let ingest = IngestConfig::default();
    let (cycle, fed) =
        read_cycle_overlapped(input, &ingest, |_| Some(()), |(), _, steps| steps.count())
            .unwrap_or_else(|e| panic!("{}: {e}", input.display()));
    if fed.is_none() || heights_method(&cycle, config).is_err() {
        return Bands::Whole;
    }
    let rows = cycle.grid.rows();
    match asked {
        _ if deflate => Bands::Exactly(rows),
        Some(n) => Bands::Exactly(n.clamp(1, rows)),
        None => Bands::OwnChoice,
    }
}

/// The blocks the file system holds for `path` end with the file: the writer reserves an
/// uncompressed output's data blocks ahead of its writes (`fallocate`, keeping the size), and
/// a reservation past the finished file would stay allocated, unseen, as long as the file.
/// 64 KiB of slack covers the file system's own extent blocks on a fragmented disk. Checked
/// on ext4 and tmpfs (CI's), which keep no blocks past a closed file's end of their own
/// accord; XFS, for one, may keep its speculative preallocation there for a while whatever
/// the writer did, so elsewhere the check is skipped with a message.
fn assert_no_blocks_past_the_end(what: &str, path: &Path) {
    use std::os::unix::fs::MetadataExt;
    if !blocks_end_with_the_file(path) {
        eprintln!("{what}: blocks past the end not checked on this file system");
        return;
    }
    let meta = std::fs::metadata(path).unwrap_or_else(|e| panic!("{what}: {e}"));
    let held = meta.blocks() * 512;
    let limit = meta.len().div_ceil(4096) * 4096 + (64 << 10);
    assert!(
        held <= limit,
        "{what}: {held} bytes of blocks held for a file of {} bytes",
        meta.len()
    );
}

/// Whether `path` lies on ext4 or tmpfs (`statfs`'s file system magic numbers, from
/// linux/magic.h).
fn blocks_end_with_the_file(path: &Path) -> bool {
    use std::os::unix::ffi::OsStrExt;
    const EXT4_SUPER_MAGIC: u64 = 0xEF53;
    const TMPFS_MAGIC: u64 = 0x0102_1994;
    let Ok(c_path) = std::ffi::CString::new(path.as_os_str().as_bytes()) else {
        return false;
    };
    // SAFETY: `c_path` is a valid C string and `st` a properly sized, writable statfs for
    // the duration of the call.
    let mut st: libc::statfs = unsafe { std::mem::zeroed() };
    if unsafe { libc::statfs(c_path.as_ptr(), &mut st) } != 0 {
        return false;
    }
    let magic = u64::try_from(st.f_type).unwrap_or(0);
    magic == EXT4_SUPER_MAGIC || magic == TMPFS_MAGIC
}

/// Runs the batch on `input` with each of `band_rows` and compares each output with the
/// reference file; returns the reports.
fn compare_variant(
    dir: &Path,
    label: &str,
    input: &Path,
    config: &ComputeConfig,
    options: &OutputOptions,
    band_rows: &[Option<usize>],
) -> Vec<BatchReport> {
    let want = dir.join(format!("{label}-reference.out.nc"));
    let cycle = reference(input, &want, config, options);
    assert_no_blocks_past_the_end(&format!("{label}, whole cycle"), &want);
    let steps = cycle.members * cycle.lead_times_s.len();
    let deflate = options.deflate_level.is_some();
    band_rows
        .iter()
        .map(|&asked| {
            let what = format!("{label}, bands {asked:?}");
            let got = dir.join(format!("{label}-bands-{asked:?}.out.nc"));
            let report = batch(input, &got, config, options, asked);
            assert_same_file(&what, &got, &want);
            assert_no_blocks_past_the_end(&what, &got);
            let want = expected_bands(input, config, deflate, asked);
            let (_, _, levels, rows, cols) = cycle.temperature.dim();
            assert!(
                want.matches(report.band_rows, (levels, rows, cols)),
                "{what}: report {report:?}, expected {want:?}"
            );
            assert_eq!(report.steps, steps, "{what}");
            assert_eq!(report.notes, cycle.notes, "{what}: notes");
            report
        })
        .collect()
}

// ----- the tests -----

/// The panic message of `assert_same_file(a, b)`, or `None` when it passes.
fn comparison_failure(a: &Path, b: &Path) -> Option<String> {
    let outcome = std::panic::catch_unwind(|| assert_same_file("self-check", a, b));
    outcome.err().map(|panic| {
        panic
            .downcast_ref::<String>()
            .cloned()
            .or_else(|| panic.downcast_ref::<&str>().map(|s| s.to_string()))
            .unwrap_or_default()
    })
}

/// The comparison itself: blind to `history` only, and it names what differs (a height
/// changed by a warmer column, a storage layout).
#[test]
fn the_comparison_sees_and_names_differences() {
    let dir = tempfile::tempdir().expect("tempdir");
    let config = config();
    let input = write(dir.path(), "cycle", &FixtureSpec::default());
    let base = dir.path().join("base.out.nc");
    reference(&input, &base, &config, &options(None));

    let other_history = dir.path().join("history.out.nc");
    let mut relabelled = options(None);
    relabelled.history = "another command line".into();
    reference(&input, &other_history, &config, &relabelled);
    assert_eq!(comparison_failure(&base, &other_history), None);

    let deflated = dir.path().join("deflated.out.nc");
    reference(&input, &deflated, &config, &options(Some(1)));
    let message = comparison_failure(&base, &deflated).expect("another storage passed");
    assert!(message.contains("defined differently"), "{message}");

    // The same input, 0.5 K warmer at 850 hPa in the last row ([time, level, row, column]).
    let at = [0, 2, 3, 1];
    let t = {
        let _session = hypsogrid::netcdf_session::lock();
        let file = open(&input).expect("opening the fixture");
        let var = file.variable("t").expect("temperature");
        let extents: Vec<std::ops::Range<usize>> = at.iter().map(|&i| i..i + 1).collect();
        var.get_values::<f32, _>(extents).expect("one value")[0]
    };
    overwrite(&input, "t", &at, t + 0.5);
    let warmer = dir.path().join("warmer.out.nc");
    reference(&input, &warmer, &config, &options(None));
    let message = comparison_failure(&base, &warmer).expect("a changed height passed");
    assert!(
        message.contains("'geopotential_height' first differs"),
        "{message}"
    );
}

/// Every isobaric encoding, with bands of one row, of three rows (not dividing the grid)
/// and of the batch's own size: the reference file, bit for bit. Plain float files with
/// specific humidity go band by band; files that need whole-variable reads (dimensions out
/// of order) fall back.
#[test]
fn every_isobaric_variant_writes_the_reference_file() {
    let dir = tempfile::tempdir().expect("tempdir");
    let config = config();
    let options = options(None);
    let mut banded = Vec::new();
    let mut whole = Vec::new();
    for (label, spec) in isobaric_variants() {
        let input = write(dir.path(), &label, &spec);
        let reports = compare_variant(dir.path(), &label, &input, &config, &options, &BAND_ROWS);
        match reports[0].band_rows {
            Some(_) => banded.push(label),
            None => whole.push(label),
        }
    }
    assert!(
        banded.iter().any(|l| l == "default"),
        "the plain float file with specific humidity went whole: {whole:?}"
    );
    assert!(
        !banded.is_empty() && !whole.is_empty(),
        "both outcomes occur over the variants: banded {banded:?}, whole {whole:?}"
    );
    assert!(
        whole.iter().any(|l| l.contains("transposed")),
        "transposed dimensions need whole-variable reads: banded {banded:?}"
    );
}

/// The plain variant, banded, with exactly the rows asked for (clamped to the grid).
#[test]
fn the_report_gives_the_rows_asked_for() {
    let dir = tempfile::tempdir().expect("tempdir");
    let config = config();
    let input = write(dir.path(), "plain", &FixtureSpec::default());
    let asked = [Some(0), Some(1), Some(2), Some(3), Some(4), Some(99), None];
    let reports = compare_variant(dir.path(), "plain", &input, &config, &options(None), &asked);
    let got: Vec<Option<usize>> = reports.iter().map(|r| r.band_rows).collect();
    let rows = FIXTURE_ROWS;
    assert_eq!(
        got,
        vec![
            Some(1),
            Some(1),
            Some(2),
            Some(3),
            Some(rows),
            Some(rows),
            Some(rows)
        ]
    );
}

/// Humidity kinds, masks and layouts beyond the encoding list: mixing ratio, dry air,
/// relative humidity and dewpoint go band by band on the row kernel; no surface fields go
/// band by band on the column path; humidity on its own level axis falls back (whole-variable
/// reads); a member axis of one member goes band by band;
/// masked points (fill values in the output) in the last rows come out the same; chunks
/// across steps are read whole.
#[test]
fn humidity_kinds_masks_and_layouts_write_the_reference_file() {
    let dir = tempfile::tempdir().expect("tempdir");
    let config = config();
    let options = options(None);
    let base = FixtureSpec {
        time_steps: Some(2),
        ..FixtureSpec::default()
    };
    let masked = vec![
        [0, 1, 3, 3, 2],
        [0, 0, 0, 3, 5],
        [0, 1, 7, 2, 0],
        [0, 0, 4, 0, 1],
    ];
    let variants: Vec<(&str, FixtureSpec)> = vec![
        (
            "mixing-ratio",
            FixtureSpec {
                humidity: HumidityEncoding::MixingRatio,
                ..base.clone()
            },
        ),
        (
            "dry",
            FixtureSpec {
                humidity: HumidityEncoding::None,
                ..base.clone()
            },
        ),
        (
            "relative-percent",
            FixtureSpec {
                humidity: HumidityEncoding::RelativePercent,
                ..base.clone()
            },
        ),
        (
            "dewpoint",
            FixtureSpec {
                humidity: HumidityEncoding::DewPoint,
                ..base.clone()
            },
        ),
        (
            "humidity-missing-level",
            FixtureSpec {
                humidity_missing_level: Some(7),
                ..base.clone()
            },
        ),
        (
            "no-surface",
            FixtureSpec {
                surface: None,
                file_heights: FileHeights::GeopotentialHeight,
                ..base.clone()
            },
        ),
        (
            "file-heights",
            FixtureSpec {
                file_heights: FileHeights::GeopotentialHeight,
                ..base.clone()
            },
        ),
        (
            "masked",
            FixtureSpec {
                masked_points: masked.clone(),
                ..base.clone()
            },
        ),
        (
            "masked-packed-top-down",
            FixtureSpec {
                masked_points: masked.clone(),
                packed: true,
                levels_top_down: true,
                ..base.clone()
            },
        ),
        (
            "one-member-axis",
            FixtureSpec {
                members: Some(1),
                ..base.clone()
            },
        ),
        (
            "chunked-across-steps",
            FixtureSpec {
                chunks_across_steps: true,
                ..base.clone()
            },
        ),
    ];
    let mut outcome = BTreeMap::new();
    for (label, spec) in &variants {
        let input = write(dir.path(), label, spec);
        let reports = compare_variant(dir.path(), label, &input, &config, &options, &BAND_ROWS);
        outcome.insert(*label, reports[0].band_rows);
    }
    // Each outcome derived above is checked against the library's own parts; these are the
    // ones the documentation states outright.
    assert_eq!(outcome["mixing-ratio"], Some(1), "{outcome:?}");
    assert_eq!(outcome["dry"], Some(1), "{outcome:?}");
    assert_eq!(outcome["masked"], Some(1), "{outcome:?}");
    assert_eq!(outcome["one-member-axis"], Some(1), "{outcome:?}");
    assert_eq!(outcome["relative-percent"], Some(1), "{outcome:?}");
    assert_eq!(outcome["dewpoint"], Some(1), "{outcome:?}");
    assert_eq!(outcome["no-surface"], Some(1), "{outcome:?}");
    assert_eq!(outcome["humidity-missing-level"], None, "{outcome:?}");
    // Chunks that hold every step are read whole (see tests/overlapped.rs).
    assert_eq!(outcome["chunked-across-steps"], None, "{outcome:?}");
    // The masks reached the output as fill values.
    for label in ["masked", "masked-packed-top-down"] {
        let out = dir.path().join(format!("{label}-bands-Some(1).out.nc"));
        assert!(
            count_fill_values(&out, "geopotential_height") > 0,
            "{label}: no fill value in the heights"
        );
    }
}

/// The project's demo cycle and ensemble (21 levels listed top-down, latitudes north to
/// south, seven lead times, fill values below the ground), and a synthetic global grid large
/// enough that the batch's own band is smaller than a step: the reference file.
#[test]
fn demo_and_synthetic_global_cycles_write_the_reference_file() {
    let dir = tempfile::tempdir().expect("tempdir");
    let config = config();
    let options = options(None);
    let demo = hypsogrid::demo::write_demo_cycle(dir.path()).expect("demo cycle");
    let reports = compare_variant(dir.path(), "demo", &demo, &config, &options, &BAND_ROWS);
    assert_eq!(
        reports[0].band_rows,
        Some(1),
        "the demo cycle goes band by band"
    );
    let ensemble = hypsogrid::demo::write_demo_ensemble(dir.path()).expect("demo ensemble");
    let reports = compare_variant(
        dir.path(),
        "ensemble",
        &ensemble,
        &config,
        &options,
        &[Some(5)],
    );
    assert_eq!(
        reports[0].band_rows,
        Some(5),
        "the demo ensemble goes band by band"
    );

    // 181 x 360 points on 31 levels: about 8 MiB a field per step, so bands of about half.
    let global = dir.path().join("global.nc");
    let spec = hypsogrid::demo::SyntheticGlobal {
        rows: 181,
        cols: 360,
        levels: 31,
        times: 2,
        deflate_level: None,
    };
    hypsogrid::demo::write_synthetic_global(&global, &spec).expect("synthetic global");
    let reports = compare_variant(
        dir.path(),
        "global",
        &global,
        &config,
        &options,
        &[None, Some(50)],
    );
    let own = reports[0]
        .band_rows
        .expect("the global grid goes band by band");
    assert!(own < spec.rows, "one band for the whole step: {own} rows");
    assert_eq!(reports[1].band_rows, Some(50));
}

/// Hybrid levels go band by band on the column path (each band's columns built from its
/// own rows) and write the same file whatever band size is asked for, levels listed either
/// way in the file.
#[test]
fn hybrid_variants_go_band_by_band_and_write_the_reference_file() {
    let dir = tempfile::tempdir().expect("tempdir");
    let config = config();
    let options = options(None);
    for (label, spec) in hybrid_variants() {
        let input = write(dir.path(), &label, &spec);
        let reports = compare_variant(dir.path(), &label, &input, &config, &options, &BAND_ROWS);
        for (asked, report) in BAND_ROWS.iter().zip(&reports) {
            let want = asked.map_or(FIXTURE_ROWS, |n| n.min(FIXTURE_ROWS));
            assert_eq!(report.band_rows, Some(want), "{label}, bands {asked:?}");
        }
    }
}

/// Several members and time steps, levels both ways in the file, latitudes both ways, the
/// surface with and without the member axis: every step's bands land in their own place,
/// levels reversed back into the file's order.
#[test]
fn members_and_steps_with_levels_both_ways_write_the_reference_file() {
    let dir = tempfile::tempdir().expect("tempdir");
    let config = config();
    let options = options(None);
    let mut seen_banded = 0;
    for top_down in [false, true] {
        for north_to_south in [false, true] {
            for member_surface in [false, true] {
                let label = format!(
                    "members-top-down-{top_down}-n2s-{north_to_south}-member-surface-{member_surface}"
                );
                let spec = FixtureSpec {
                    members: Some(2),
                    time_steps: Some(3),
                    levels_top_down: top_down,
                    lat_north_to_south: north_to_south,
                    surface: Some(SurfaceSpec {
                        member_axis: member_surface,
                        ..SurfaceSpec::default()
                    }),
                    masked_points: vec![[1, 2, 5, 3, 4], [0, 1, 0, 1, 0]],
                    ..FixtureSpec::default()
                };
                let input = write(dir.path(), &label, &spec);
                let reports =
                    compare_variant(dir.path(), &label, &input, &config, &options, &BAND_ROWS);
                assert_eq!(reports[0].steps, 6, "{label}");
                seen_banded += usize::from(reports[0].band_rows == Some(1));
            }
        }
    }
    assert!(
        seen_banded >= 4,
        "the plain float layouts with members and steps go band by band ({seen_banded} of 8)"
    );
}

/// Compressed output: whole steps per band, whatever is asked, and the reference file
/// (with the same deflate level and the same storage chunks).
#[test]
fn compressed_output_goes_in_whole_steps_and_writes_the_reference_file() {
    let dir = tempfile::tempdir().expect("tempdir");
    let config = config();
    let options = options(Some(1));
    for (label, spec) in [
        ("deflate-default", FixtureSpec::default()),
        (
            "deflate-members-top-down",
            FixtureSpec {
                members: Some(2),
                time_steps: Some(3),
                levels_top_down: true,
                ..FixtureSpec::default()
            },
        ),
        // The column path and the converting kernel in whole steps too.
        (
            "deflate-hybrid",
            FixtureSpec {
                time_steps: Some(2),
                ..hybrid_variants().swap_remove(0).1
            },
        ),
        (
            "deflate-dewpoint",
            FixtureSpec {
                time_steps: Some(2),
                humidity: HumidityEncoding::DewPoint,
                ..FixtureSpec::default()
            },
        ),
    ] {
        let input = write(dir.path(), label, &spec);
        let reports = compare_variant(dir.path(), label, &input, &config, &options, &BAND_ROWS);
        for (asked, report) in BAND_ROWS.iter().zip(&reports) {
            assert_eq!(
                report.band_rows,
                Some(FIXTURE_ROWS),
                "{label}, bands {asked:?}"
            );
        }
        // Compressed output is stored in chunks of latitude-longitude planes.
        let out = dir.path().join(format!("{label}-bands-Some(1).out.nc"));
        let _session = hypsogrid::netcdf_session::lock();
        let file = open(&out).expect("opening the output");
        let var = file.variable("geopotential_height").expect("heights");
        assert!(
            var.chunking().expect("chunking").is_some(),
            "{label}: compressed heights stored contiguously"
        );
    }
}

/// The values of one variable, by type, as copied by [`rechunk_by_step`].
enum Values {
    F32(Vec<f32>),
    F64(Vec<f64>),
    I16(Vec<i16>),
    I32(Vec<i32>),
}

/// Copies the NetCDF-4 file `src` (a fixture) to `dst` with the same dimensions, variables,
/// attributes and values, every field with a step axis (`time`, `realization`) stored in
/// deflated chunks of one (member, time) step, as forecast producers often store them.
fn rechunk_by_step(src: &Path, dst: &Path) {
    let _session = hypsogrid::netcdf_session::lock();
    quiet_hdf5_on_this_thread();
    let from = netcdf::open(src).expect("opening the fixture");
    let mut to = netcdf::create_with(dst, netcdf::Options::NETCDF4).expect("creating the copy");
    for a in from.attributes() {
        let value = a.value().expect("global attribute");
        to.add_attribute(a.name(), value)
            .expect("copying a global attribute");
    }
    for d in from.dimensions() {
        to.add_dimension(&d.name(), d.len())
            .expect("copying a dimension");
    }
    for var in from.variables() {
        let name = var.name();
        let dims: Vec<(String, usize)> = var
            .dimensions()
            .iter()
            .map(|d| (d.name(), d.len()))
            .collect();
        let dim_names: Vec<&str> = dims.iter().map(|(n, _)| n.as_str()).collect();
        let values = match var.vartype() {
            NcVariableType::Float(FloatType::F32) => Values::F32(var.get_values(..).expect("f32")),
            NcVariableType::Float(FloatType::F64) => Values::F64(var.get_values(..).expect("f64")),
            NcVariableType::Int(IntType::I16) => Values::I16(var.get_values(..).expect("i16")),
            NcVariableType::Int(IntType::I32) => Values::I32(var.get_values(..).expect("i32")),
            other => panic!("fixture variable '{name}' of type {other:?}"),
        };
        let mut out = match &values {
            Values::F32(_) => to.add_variable::<f32>(&name, &dim_names),
            Values::F64(_) => to.add_variable::<f64>(&name, &dim_names),
            Values::I16(_) => to.add_variable::<i16>(&name, &dim_names),
            Values::I32(_) => to.add_variable::<i32>(&name, &dim_names),
        }
        .expect("defining the copy of a variable");
        let is_step = |n: &str| n == "time" || n == "realization" || n == "member";
        if dims.len() >= 3 && dims.iter().any(|(n, _)| is_step(n)) {
            let chunks: Vec<usize> = dims
                .iter()
                .map(|(n, len)| if is_step(n) { 1 } else { *len })
                .collect();
            out.set_chunking(&chunks).expect("chunking");
            out.set_compression(1, true).expect("compression");
        }
        for a in var.attributes() {
            let value = a.value().expect("attribute");
            out.put_attribute(a.name(), value)
                .expect("copying an attribute");
        }
        match values {
            Values::F32(v) => out.put_values(&v, ..),
            Values::F64(v) => out.put_values(&v, ..),
            Values::I16(v) => out.put_values(&v, ..),
            Values::I32(v) => out.put_values(&v, ..),
        }
        .expect("copying values");
    }
    to.close().expect("closing the copy");
}

/// Input stored in compressed chunks of one step: read a whole step at a time (a band would
/// decompress the chunk again), computed and written in the bands asked for, and the
/// reference file.
#[test]
fn chunked_input_in_bands_of_whole_steps_writes_the_reference_file() {
    let dir = tempfile::tempdir().expect("tempdir");
    let config = config();
    let options = options(None);
    // Hybrid levels (the column path) with relative humidity, a whole step read at a time.
    let (_, hybrid) = hybrid_variants().swap_remove(0);
    let hybrid = FixtureSpec {
        time_steps: Some(2),
        humidity: HumidityEncoding::RelativePercent,
        ..hybrid
    };
    for (label, spec) in [
        ("chunked-hybrid-relative-humidity", hybrid),
        (
            "chunked-steps",
            FixtureSpec {
                time_steps: Some(3),
                ..FixtureSpec::default()
            },
        ),
        (
            "chunked-members-top-down-packed",
            FixtureSpec {
                members: Some(2),
                time_steps: Some(2),
                levels_top_down: true,
                packed: true,
                masked_points: vec![[1, 1, 2, 3, 5]],
                ..FixtureSpec::default()
            },
        ),
    ] {
        let plain = write(dir.path(), &format!("{label}-contiguous"), &spec);
        let input = dir.path().join(format!("{label}.nc"));
        rechunk_by_step(&plain, &input);
        {
            let _session = hypsogrid::netcdf_session::lock();
            let file = open(&input).expect("opening the copy");
            let t = file.variable("t").expect("temperature");
            assert!(
                t.chunking().expect("chunking").is_some(),
                "{label}: not chunked"
            );
        }
        // Bands as asked (`compare_variant` checks the reports).
        compare_variant(dir.path(), label, &input, &config, &options, &BAND_ROWS);
        // The copy holds the fixture's atmosphere: the same heights as from the original.
        let from_plain = dir.path().join(format!("{label}-contiguous.out.nc"));
        batch(&plain, &from_plain, &config, &options, Some(1));
        let from_copy = dir.path().join(format!("{label}-bands-Some(1).out.nc"));
        assert_same_values(label, &from_plain, &from_copy, "geopotential_height");
    }
}

/// Asserts that variable `name` holds the same stored values in `a` and `b`.
fn assert_same_values(what: &str, a: &Path, b: &Path, name: &str) {
    let _session = hypsogrid::netcdf_session::lock();
    let fa = open(a).expect("opening a");
    let fb = open(b).expect("opening b");
    let (va, vb) = (
        fa.variable(name).expect("variable in a"),
        fb.variable(name).expect("variable in b"),
    );
    assert_eq!(raw_bits(&va), raw_bits(&vb), "{what}: '{name}' differs");
}

/// Entries of `dir` other than those in `keep`, by file name.
fn other_entries(dir: &Path, keep: &[&Path]) -> Vec<String> {
    std::fs::read_dir(dir)
        .expect("listing the directory")
        .map(|e| e.expect("entry").path())
        .filter(|p| !keep.contains(&p.as_path()))
        .map(|p| {
            p.file_name()
                .unwrap_or_default()
                .to_string_lossy()
                .into_owned()
        })
        .collect()
}

/// Writes `value` into variable `name` at `index` of an existing fixture file.
fn overwrite<T: netcdf::NcTypeDescriptor + Copy>(
    path: &Path,
    name: &str,
    index: &[usize],
    value: T,
) {
    let _session = hypsogrid::netcdf_session::lock();
    let mut file = {
        quiet_hdf5_on_this_thread();
        netcdf::append(path)
    }
    .expect("opening the fixture for append");
    let mut var = file.variable_mut(name).expect("variable");
    let extents: Vec<std::ops::Range<usize>> = index.iter().map(|&i| i..i + 1).collect();
    var.put_values(&[value], extents)
        .expect("writing one value");
}

/// A value out of the plausible range in the last rows of the last step (temperature
/// 150-350 K, specific humidity 0-0.1 kg/kg): the batch with small bands fails with the
/// whole read's message (file, variable, index), leaves no output and no partial file, and
/// leaves an existing output untouched.
#[test]
fn a_bad_value_in_a_later_band_fails_and_leaves_nothing_behind() {
    let dir = tempfile::tempdir().expect("tempdir");
    let config = config();
    let options = options(None);
    let ingest = IngestConfig::default();
    let members_and_steps = FixtureSpec {
        members: Some(2),
        time_steps: Some(3),
        ..FixtureSpec::default()
    };
    // Index [member, time, level in the file, row, column] of the file's own order.
    let bad = [1, 2, 5, 3, 4];
    let cases: Vec<(&str, FixtureSpec, &str, BadValue)> = vec![
        (
            "hot",
            members_and_steps.clone(),
            "t",
            BadValue::Float(1000.0),
        ),
        (
            "below-zero-kelvin",
            members_and_steps.clone(),
            "t",
            BadValue::Float(-5.0),
        ),
        ("wet", members_and_steps.clone(), "q", BadValue::Float(0.5)),
        (
            "hot-top-down",
            FixtureSpec {
                levels_top_down: true,
                ..members_and_steps.clone()
            },
            "t",
            BadValue::Float(1000.0),
        ),
        (
            // int16 packed at 0.005 K about 250 K: 32000 steps is 410 K.
            "hot-packed",
            FixtureSpec {
                packed: true,
                ..members_and_steps.clone()
            },
            "t",
            BadValue::Packed(32_000),
        ),
        (
            "hot-classic",
            FixtureSpec {
                format: common::fixtures::Format::Classic,
                ..members_and_steps.clone()
            },
            "t",
            BadValue::Float(1000.0),
        ),
        // Bands on every core: relative humidity made specific humidity in the kernel, and
        // hybrid levels on the column path.
        (
            "hot-relative-humidity",
            FixtureSpec {
                humidity: HumidityEncoding::RelativePercent,
                ..members_and_steps.clone()
            },
            "t",
            BadValue::Float(1000.0),
        ),
        (
            "hot-hybrid",
            FixtureSpec {
                members: Some(2),
                time_steps: Some(3),
                ..hybrid_variants().swap_remove(0).1
            },
            "t",
            BadValue::Float(1000.0),
        ),
    ];
    // Each also stored in deflated chunks of one step (read a whole step at a time, then
    // decoded and computed in bands on another thread).
    let cases = cases
        .into_iter()
        .flat_map(|(label, spec, variable, value)| {
            [false, true].map(|chunked| (label, spec.clone(), variable, value, chunked))
        });
    for (label, spec, variable, value, chunked) in cases {
        let label = if chunked {
            format!("{label}-chunked")
        } else {
            label.to_string()
        };
        let case_dir = dir.path().join(&label);
        std::fs::create_dir(&case_dir).expect("case directory");
        let input = if chunked {
            let plain_dir = dir.path().join(format!("{label}-contiguous"));
            std::fs::create_dir(&plain_dir).expect("directory of the contiguous file");
            let input = case_dir.join("cycle.nc");
            rechunk_by_step(&write(&plain_dir, "cycle", &spec), &input);
            input
        } else {
            write(&case_dir, "cycle", &spec)
        };
        assert_eq!(
            expected_bands(&input, &config, false, Some(1)),
            Bands::Exactly(1),
            "{label}: the good file goes band by band"
        );
        match value {
            BadValue::Float(v) => overwrite(&input, variable, &bad, v),
            BadValue::Packed(v) => overwrite(&input, variable, &bad, v),
        }
        let whole = match read_cycle(&input, &ingest) {
            Err(e @ IngestError::Implausible { .. }) => e.to_string(),
            Err(e) => panic!("{label}: unexpected whole-read error: {e}"),
            Ok(_) => panic!("{label}: the whole read took a bad value"),
        };
        for band_rows in [Some(1), Some(3)] {
            let what = format!("{label}, bands {band_rows:?}");
            // No output before.
            let output = case_dir.join("heights.nc");
            let err = compute_file_in_bands(
                &input,
                &output,
                &ingest,
                &config,
                &options,
                band_rows,
                &|_, _| {},
            )
            .expect_err(&what);
            let message = err.to_string();
            assert!(
                matches!(err, BatchError::Ingest(IngestError::Implausible { .. })),
                "{what}: {err:?}"
            );
            assert!(
                message.contains(&input.display().to_string())
                    && message.contains(&format!("'{variable}'")),
                "{what}: the message names neither file nor variable: {message}"
            );
            assert_eq!(message, whole, "{what}: not the whole read's message");
            assert_eq!(
                other_entries(&case_dir, &[&input]),
                Vec::<String>::new(),
                "{what}: left behind"
            );
            // An output already there stays as it was.
            let before = b"an earlier output, not NetCDF".to_vec();
            std::fs::write(&output, &before).expect("writing the earlier output");
            let err = compute_file_in_bands(
                &input,
                &output,
                &ingest,
                &config,
                &options,
                band_rows,
                &|_, _| {},
            )
            .expect_err(&what);
            assert_eq!(err.to_string(), whole, "{what}");
            assert_eq!(
                std::fs::read(&output).expect("the earlier output"),
                before,
                "{what}: the earlier output changed"
            );
            assert_eq!(
                other_entries(&case_dir, &[&input, &output]),
                Vec::<String>::new(),
                "{what}: left behind"
            );
            std::fs::remove_file(&output).expect("removing the earlier output");
        }
    }
}

/// A temperature or humidity without a single valid value (known only once every band has
/// been read and computed) fails as the whole read does, and the output is not committed.
#[test]
fn a_field_with_no_valid_value_fails_as_the_whole_read_and_commits_nothing() {
    let dir = tempfile::tempdir().expect("tempdir");
    let config = config();
    let ingest = IngestConfig::default();
    let spec = FixtureSpec {
        time_steps: Some(2),
        ..FixtureSpec::default()
    };
    for variable in ["t", "q"] {
        let case_dir = dir.path().join(variable);
        std::fs::create_dir(&case_dir).expect("case directory");
        let input = write(&case_dir, "cycle", &spec);
        {
            let _session = hypsogrid::netcdf_session::lock();
            quiet_hdf5_on_this_thread();
            let mut file = netcdf::append(&input).expect("append");
            let mut var = file.variable_mut(variable).expect("variable");
            let n: usize = var.dimensions().iter().map(|d| d.len()).product();
            var.put_values(&vec![f32::NAN; n], ..).expect("writing NaN");
        }
        let whole = match read_and_compute(&input, &ingest, &config, &|_, _| {}) {
            Err(e) => e.to_string(),
            Ok(_) => panic!("{variable}: the whole read took a field of NaN"),
        };
        assert!(whole.contains(&format!("'{variable}'")), "{whole}");
        let output = case_dir.join("heights.nc");
        let before = b"an earlier output".to_vec();
        std::fs::write(&output, &before).expect("writing the earlier output");
        let err = compute_file_in_bands(
            &input,
            &output,
            &ingest,
            &config,
            &options(None),
            Some(1),
            &|_, _| {},
        )
        .expect_err(variable);
        assert_eq!(err.to_string(), whole, "{variable}");
        assert_eq!(
            std::fs::read(&output).expect("the earlier output"),
            before,
            "{variable}: the earlier output changed"
        );
        assert_eq!(
            other_entries(&case_dir, &[&input, &output]),
            Vec::<String>::new(),
            "{variable}: left behind"
        );
    }
}

/// Outputs the writer refuses (a layer listed twice, a deflate level out of range, a missing
/// directory) are refused by the batch with the writer's own message, banded or not, and
/// nothing is written.
#[test]
fn outputs_the_writer_refuses_are_refused_alike() {
    let dir = tempfile::tempdir().expect("tempdir");
    let ingest = IngestConfig::default();
    let banded = write(dir.path(), "plain", &FixtureSpec::default());
    let column_path = write(
        dir.path(),
        "relative",
        &FixtureSpec {
            humidity: HumidityEncoding::RelativePercent,
            ..FixtureSpec::default()
        },
    );
    let mut twice = config();
    twice.layers.push(twice.layers[0]);
    let output = dir.path().join("heights.nc");
    let cases = [
        ("layer listed twice", twice, options(None), output.clone()),
        (
            "deflate level 12",
            config(),
            options(Some(12)),
            output.clone(),
        ),
        (
            "missing directory",
            config(),
            options(None),
            dir.path().join("absent").join("heights.nc"),
        ),
    ];
    for (label, config, options, output) in cases {
        for input in [&banded, &column_path] {
            let what = format!("{label}, {}", input.display());
            let (cycle, heights) =
                read_and_compute(input, &ingest, &config, &|_, _| {}).expect(&what);
            let want = write_heights(&cycle, &heights, &output, &options)
                .expect_err(&what)
                .to_string();
            for band_rows in [Some(1), None] {
                let err = compute_file_in_bands(
                    input,
                    &output,
                    &ingest,
                    &config,
                    &options,
                    band_rows,
                    &|_, _| {},
                )
                .expect_err(&what);
                assert!(matches!(err, BatchError::Output(_)), "{what}: {err:?}");
                assert_eq!(err.to_string(), want, "{what}, bands {band_rows:?}");
                assert_eq!(
                    other_entries(dir.path(), &[&banded, &column_path]),
                    Vec::<String>::new(),
                    "{what}: something was written"
                );
            }
        }
    }
}

/// A bad value for [`a_bad_value_in_a_later_band_fails_and_leaves_nothing_behind`].
#[derive(Clone, Copy)]
enum BadValue {
    /// Written into a float variable.
    Float(f32),
    /// Written into an int16 packed variable, raw.
    Packed(i16),
}

/// The calls of a progress callback, in order.
fn progress_calls(
    input: &Path,
    output: &Path,
    band_rows: Option<usize>,
) -> (BatchReport, Vec<(usize, usize)>) {
    let calls = Mutex::new(Vec::new());
    let report = compute_file_in_bands(
        input,
        output,
        &IngestConfig::default(),
        &config(),
        &options(None),
        band_rows,
        &|done, total| calls.lock().expect("progress calls").push((done, total)),
    )
    .unwrap_or_else(|e| panic!("{}: {e}", input.display()));
    (report, calls.into_inner().expect("progress calls"))
}

/// Progress comes after each (member, time) step, counting up to the number of steps, with
/// that number as the total, banded or not.
#[test]
fn progress_counts_the_steps_up_to_the_total() {
    let dir = tempfile::tempdir().expect("tempdir");
    let members_and_steps = FixtureSpec {
        members: Some(2),
        time_steps: Some(3),
        ..FixtureSpec::default()
    };
    let cases = [
        ("banded", members_and_steps.clone(), Some(1), true),
        ("banded-uneven", members_and_steps.clone(), Some(3), true),
        (
            "no-surface-fields",
            FixtureSpec {
                surface: None,
                file_heights: FileHeights::GeopotentialHeight,
                ..members_and_steps.clone()
            },
            Some(1),
            true,
        ),
        (
            "relative-humidity",
            FixtureSpec {
                humidity: HumidityEncoding::RelativePercent,
                ..members_and_steps.clone()
            },
            Some(1),
            true,
        ),
        // Humidity on its own level axis is read whole: the whole cycle's progress.
        (
            "whole-cycle",
            FixtureSpec {
                humidity_missing_level: Some(7),
                ..members_and_steps.clone()
            },
            Some(1),
            false,
        ),
    ];
    for (label, spec, band_rows, banded) in cases {
        let input = write(dir.path(), label, &spec);
        let output = dir.path().join(format!("{label}.out.nc"));
        let (report, calls) = progress_calls(&input, &output, band_rows);
        assert_eq!(report.band_rows.is_some(), banded, "{label}: {report:?}");
        let total = 6;
        assert_eq!(report.steps, total, "{label}");
        assert_eq!(calls.last(), Some(&(total, total)), "{label}: {calls:?}");
        assert!(
            calls.iter().all(|&(done, t)| t == total && done <= total),
            "{label}: {calls:?}"
        );
        assert!(
            calls.windows(2).all(|w| w[1].0 > w[0].0),
            "{label}: not increasing: {calls:?}"
        );
        if banded {
            // Banded, exactly once per step, when its last band is written.
            let want: Vec<(usize, usize)> = (1..=total).map(|d| (d, total)).collect();
            assert_eq!(calls, want, "{label}");
        }
    }
}

/// An inverted layer (bottom above top) is refused before anything is read or written,
/// naming the layer and the file.
#[test]
fn an_inverted_layer_is_refused_and_nothing_is_written() {
    let dir = tempfile::tempdir().expect("tempdir");
    let input = write(dir.path(), "cycle", &FixtureSpec::default());
    let output = dir.path().join("heights.nc");
    let inverted = ComputeConfig {
        layers: vec![Layer {
            bottom_pa: 50_000.0,
            top_pa: 100_000.0,
        }],
        ..ComputeConfig::default()
    };
    for band_rows in [Some(1), None] {
        let called = Mutex::new(0usize);
        let err = compute_file_in_bands(
            &input,
            &output,
            &IngestConfig::default(),
            &inverted,
            &options(None),
            band_rows,
            &|_, _| *called.lock().expect("count") += 1,
        )
        .expect_err("an inverted layer was computed");
        assert!(
            matches!(
                err,
                BatchError::Compute {
                    source: ComputeError::InvertedLayer { .. },
                    ..
                }
            ),
            "{err:?}"
        );
        let message = err.to_string();
        assert!(
            message.contains(&input.display().to_string()) && message.contains("500"),
            "{message}"
        );
        assert_eq!(*called.lock().expect("count"), 0, "progress reported");
        assert_eq!(
            other_entries(dir.path(), &[&input]),
            Vec::<String>::new(),
            "something was written"
        );
    }
}
