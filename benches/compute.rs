//! Batch benchmarks on a synthetic 0.5° global cycle (361 x 720, 37 isobaric levels, float32):
//! the whole `hypsogrid compute` process, and its read / compute / write parts in-process,
//! so that the parts can be compared as ratios measured in one run.
//!
//! Run with `cargo bench --bench compute`. The synthetic file is generated once into
//! `target/bench-data/`. The peak resident memory of the child processes is printed at the
//! end (getrusage, RUSAGE_CHILDREN), with the bytes of input fields and output for scale.
//!
//! `cargo test --benches` (no `--bench` argument: criterion's test mode, CI's smoke run)
//! runs every bench once on a 2° grid of the same layout instead, so that the smoke run
//! writes a few megabytes rather than the 0.5° files' 600 MB. `cargo bench -- --test` keeps
//! the 0.5° grid (`compare.sh` uses it to write its input).

use std::path::{Path, PathBuf};
use std::process::Command;
use std::time::Duration;

use criterion::measurement::WallTime;
use criterion::{criterion_group, criterion_main, BatchSize, BenchmarkGroup, Criterion};

use hypsogrid::batch::compute_file;
use hypsogrid::compute::{compute_heights, read_and_compute, ComputeConfig};
use hypsogrid::demo::{write_synthetic_global, SyntheticGlobal};
use hypsogrid::ingest::{read_cycle, read_cycle_in_bands, IngestConfig};
use hypsogrid::model::Layer;
use hypsogrid::output::{write_heights, OutputOptions};
use hypsogrid::query::LoadedCycle;

const LEVELS: usize = 37;

/// The grid the benches run on: 0.5° when run by `cargo bench`, 2° in the smoke run.
struct Grid {
    rows: usize,
    cols: usize,
    /// Where the synthetic files and outputs go, under `target/`.
    dir: &'static str,
}

fn grid() -> Grid {
    // `cargo bench` passes `--bench`; `cargo test --benches` does not.
    if std::env::args().any(|a| a == "--bench") {
        Grid {
            rows: 361,
            cols: 720,
            dir: "target/bench-data",
        }
    } else {
        Grid {
            rows: 91,
            cols: 180,
            dir: "target/bench-data/smoke",
        }
    }
}

fn bench_dir() -> PathBuf {
    let dir = Path::new(env!("CARGO_MANIFEST_DIR")).join(grid().dir);
    std::fs::create_dir_all(&dir).expect("creating the bench data folder");
    dir
}

fn input(name: &str, deflate_level: Option<i32>) -> PathBuf {
    input_with_steps(name, deflate_level, 1)
}

fn input_with_steps(name: &str, deflate_level: Option<i32>, times: usize) -> PathBuf {
    let path = bench_dir().join(name);
    if !path.exists() {
        let grid = grid();
        let spec = SyntheticGlobal {
            rows: grid.rows,
            cols: grid.cols,
            levels: LEVELS,
            times,
            deflate_level,
        };
        // Written aside and renamed once complete: a write that fails (a full disk, say)
        // leaves no partial file for the next run to take as the input.
        let partial = path.with_extension("nc.partial");
        fresh(&partial);
        if let Err(e) = write_synthetic_global(&partial, &spec) {
            fresh(&partial);
            panic!("writing the synthetic global cycle {}: {e}", path.display());
        }
        std::fs::rename(&partial, &path).expect("renaming the synthetic cycle into place");
    }
    path
}

fn layers() -> Vec<Layer> {
    vec![
        Layer {
            bottom_pa: 100000.0,
            top_pa: 50000.0,
        },
        Layer {
            bottom_pa: 100000.0,
            top_pa: 85000.0,
        },
        Layer {
            bottom_pa: 85000.0,
            top_pa: 70000.0,
        },
    ]
}

/// Removes `path` if it exists, so that the next write makes a new file.
fn fresh(path: &Path) {
    match std::fs::remove_file(path) {
        Ok(()) => {}
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => {}
        Err(e) => panic!("removing {}: {e}", path.display()),
    }
}

fn peak_child_rss_bytes() -> u64 {
    // SAFETY: getrusage only writes into the struct we pass.
    let mut usage: libc::rusage = unsafe { std::mem::zeroed() };
    let rc = unsafe { libc::getrusage(libc::RUSAGE_CHILDREN, &mut usage) };
    if rc == 0 {
        usage.ru_maxrss as u64 * 1024
    } else {
        0
    }
}

fn whole_process(c: &mut Criterion) {
    let exe = env!("CARGO_BIN_EXE_hypsogrid");
    let plain = input("global_0p5deg.nc", None);
    let zipped = input("global_0p5deg_zlib.nc", Some(1));
    let out = bench_dir().join("global_0p5deg_heights.nc");
    let mut group = c.benchmark_group("compute_whole_process_0p5deg");
    group
        .sample_size(10)
        .measurement_time(Duration::from_secs(12));
    for (label, file) in [("uncompressed", &plain), ("zlib1", &zipped)] {
        group.bench_function(label, |b| {
            b.iter_batched(
                || fresh(&out),
                |()| {
                    let status = Command::new(exe)
                        .arg("compute")
                        .arg(file)
                        .arg("--output")
                        .arg(&out)
                        .status()
                        .expect("running hypsogrid compute");
                    assert!(status.success(), "hypsogrid compute failed");
                },
                BatchSize::PerIteration,
            )
        });
    }
    group.finish();
    fresh(&out);
    let grid = grid();
    let field_bytes = (grid.rows * grid.cols * LEVELS * 4) as f64;
    eprintln!(
        "peak resident memory of a compute process: {:.0} MB (input T and q: {:.0} MB, output heights: {:.0} MB)",
        peak_child_rss_bytes() as f64 / 1e6,
        2.0 * field_bytes / 1e6,
        field_bytes / 1e6,
    );
}

fn parts(c: &mut Criterion) {
    let plain = input("global_0p5deg.nc", None);
    let out = bench_dir().join("global_0p5deg_heights_inprocess.nc");
    let config = ComputeConfig {
        layers: layers(),
        ..ComputeConfig::default()
    };
    let cycle = read_cycle(&plain, &IngestConfig::default()).expect("reading the cycle");
    let heights = compute_heights(&cycle, &config, &|_| {}).expect("computing");
    let mut group = c.benchmark_group("compute_parts_0p5deg");
    group
        .sample_size(10)
        .measurement_time(Duration::from_secs(8));
    group.bench_function("read", |b| {
        b.iter(|| read_cycle(&plain, &IngestConfig::default()).expect("reading"))
    });
    group.bench_function("kernel", |b| {
        b.iter(|| compute_heights(&cycle, &config, &|_| {}).expect("computing"))
    });
    // Every write makes a new file: the previous iteration's output is removed first,
    // untimed. Replacing a file just written makes the system free its pages within the
    // rename (36 ms for this output here), a cost of rewriting one path, not of writing.
    group.bench_function("write", |b| {
        b.iter_batched(
            || fresh(&out),
            |()| write_heights(&cycle, &heights, &out, &OutputOptions::default()).expect("writing"),
            BatchSize::PerIteration,
        )
    });
    // What the server does when a new cycle lands: read it, ready to answer (steps whose
    // heights are still pending answer from rebuilt columns or wait for them). Compare with
    // `read` above: the target is a cycle servable within 1.2 times the time it takes just
    // to read the file. `load_with_heights` adds computing the heights of every level (no
    // layers: thickness is answered per query), which the server does right after.
    group.bench_function("servable_load", |b| {
        b.iter(|| {
            LoadedCycle::read(&plain, &IngestConfig::default(), &ComputeConfig::default())
                .expect("loading")
        })
    });
    group.bench_function("load_with_heights", |b| {
        b.iter(|| {
            LoadedCycle::load(&plain, &IngestConfig::default(), &ComputeConfig::default())
                .expect("loading")
        })
    });
    // The batch in-process, file to file: as `hypsogrid compute` runs it (read, computed and
    // written a band of rows at a time), and the whole cycle read, then computed, then
    // written, the way it went before the bands (and still goes for cycles the bands do not
    // take). Same output, value for value (`tests/batch.rs`).
    let banded = bench_dir().join("global_0p5deg_heights_banded.nc");
    let options = OutputOptions::default();
    group.bench_function("batch_in_bands", |b| {
        b.iter_batched(
            || fresh(&banded),
            |()| {
                compute_file(
                    &plain,
                    &banded,
                    &IngestConfig::default(),
                    &config,
                    &options,
                    &|_, _| {},
                )
                .expect("batch")
            },
            BatchSize::PerIteration,
        )
    });
    group.bench_function("batch_whole_cycle", |b| {
        b.iter_batched(
            || fresh(&out),
            |()| {
                let (cycle, heights) =
                    read_and_compute(&plain, &IngestConfig::default(), &config, &|_, _| {})
                        .expect("reading and computing");
                write_heights(&cycle, &heights, &out, &options).expect("writing")
            },
            BatchSize::PerIteration,
        )
    });
    group.finish();
    // The outputs are not read again: no need to keep them on disk.
    fresh(&banded);
    fresh(&out);
}

/// Time steps of the multi-step cycle.
const STEPS: usize = 4;

/// The same on a cycle of several lead times, where loading overlaps computing each step
/// with reading the next (`hypsogrid::compute::read_and_compute`): `read` and
/// `servable_load` again, for the ratio, and the two passes one after the other for
/// comparison.
fn steps(c: &mut Criterion) {
    let file = input_with_steps("global_0p5deg_4steps.nc", None, STEPS);
    let mut group = c.benchmark_group("load_0p5deg_4_steps");
    group
        .sample_size(10)
        .measurement_time(Duration::from_secs(10));
    group.bench_function("read", |b| {
        b.iter(|| read_cycle(&file, &IngestConfig::default()).expect("reading"))
    });
    loading(&mut group, &file);
    group.bench_function("read_then_compute", |b| {
        b.iter(|| {
            let cycle = read_cycle(&file, &IngestConfig::default()).expect("reading");
            let heights =
                compute_heights(&cycle, &ComputeConfig::default(), &|_| {}).expect("computing");
            (cycle, heights)
        })
    });
    group.finish();
}

/// Reads `path` as the service does, step by step (compressed fields inflated on every
/// core), computing nothing: what "just reading the file" takes at best.
fn read_stepwise(path: &Path) {
    read_cycle_in_bands(path, &IngestConfig::default(), |_, _| None::<()>).expect("reading");
}

/// `read_stepwise`, `servable_load` (what the service does before it lists the cycle) and
/// `load_with_heights` (and every step's heights) on `file`.
fn loading(group: &mut BenchmarkGroup<'_, WallTime>, file: &Path) {
    group.bench_function("read_stepwise", |b| b.iter(|| read_stepwise(file)));
    group.bench_function("servable_load", |b| {
        b.iter(|| {
            LoadedCycle::read(file, &IngestConfig::default(), &ComputeConfig::default())
                .expect("loading")
        })
    });
    group.bench_function("load_with_heights", |b| {
        b.iter(|| {
            LoadedCycle::load(file, &IngestConfig::default(), &ComputeConfig::default())
                .expect("loading")
        })
    });
}

/// `load_0p5deg_4_steps` on the same four steps stored zlib-1 compressed (shuffled): the
/// read alone is `read_stepwise` here, since `read_cycle` leaves compressed fields to the
/// library, which inflates them on one thread (about four times slower).
fn steps_zlib(c: &mut Criterion) {
    let file = input_with_steps("global_0p5deg_4steps_zlib.nc", Some(1), STEPS);
    let mut group = c.benchmark_group("load_0p5deg_4_steps_zlib");
    group
        .sample_size(10)
        .measurement_time(Duration::from_secs(10));
    loading(&mut group, &file);
    group.finish();
}

// The whole process first: a child's peak resident memory (getrusage) counts the parent's
// pages at the moment of spawning, so the parent must not yet hold the other benches' cycles.
criterion_group!(benches, whole_process, parts, steps, steps_zlib);
criterion_main!(benches);
