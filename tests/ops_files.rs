//! Bad files at the data folder: what the watcher and the store do with them.
//!
//! Each case ends the same way: the file is reported (in the scan report and in the store's
//! failures, with its reason), the cycles already served are untouched (the very same
//! `Arc`), and nothing panics. `tests/store.rs` already covers a corrupt file, a file written
//! slowly, a file that grows for a while then settles, the `.partial` rename and a deletion
//! between scans; this file covers what happens *during* a load (replaced, deleted), a file
//! that never stops growing, an unreadable folder, and files whose content is wrong (all
//! values missing, no temperature, wrong units, non-monotonic levels).
//!
//! The cycles are the invented fixtures of `tests/common` and the invented demo cycle
//! (`hypsogrid::demo`); the expected reasons are the ingest module's documented errors.

mod common;

use std::io::Write;
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::Arc;
use std::time::{Duration, Instant, SystemTime};

use common::fixtures::{Faults, FixtureSpec};
use hypsogrid::compute::ComputeConfig;
use hypsogrid::demo::write_demo_cycle;
use hypsogrid::ingest::IngestConfig;
use hypsogrid::store::{CycleStore, StoreConfig};
use hypsogrid::watch::{scan_once, ScanReport, WatchConfig, WatchState};

/// Short timings so the tests stay quick: files are read once unchanged for 300 ms.
fn quick(dir: &Path) -> WatchConfig {
    WatchConfig {
        dir: dir.to_path_buf(),
        poll_interval: Duration::from_millis(40),
        settle: Duration::from_millis(300),
        max_wait_for_growth: Duration::from_secs(60),
    }
}

async fn scan(store: &CycleStore, state: &mut WatchState, config: &WatchConfig) -> ScanReport {
    scan_once(
        store,
        state,
        config,
        &IngestConfig::default(),
        &ComputeConfig::default(),
    )
    .await
}

/// Scans until `done` holds for the report, or panics after `limit`.
async fn scan_until(
    store: &CycleStore,
    state: &mut WatchState,
    config: &WatchConfig,
    limit: Duration,
    done: impl Fn(&ScanReport) -> bool,
) -> ScanReport {
    let started = Instant::now();
    loop {
        let r = scan(store, state, config).await;
        if done(&r) {
            return r;
        }
        assert!(
            started.elapsed() < limit,
            "gave up after {limit:?}; last report {r:?}"
        );
        tokio::time::sleep(config.poll_interval).await;
    }
}

/// Makes a file look as if it was written 30 s ago, so the first scan reads it at once.
fn set_old_mtime(path: &Path) {
    let f = std::fs::File::options()
        .write(true)
        .open(path)
        .expect("open for mtime");
    f.set_modified(SystemTime::now() - Duration::from_secs(30))
        .expect("set mtime");
}

/// The bytes of a cycle file written by `spec` (an invented fixture).
fn fixture_bytes(spec: &FixtureSpec) -> Vec<u8> {
    let tmp = tempfile::tempdir().expect("tempdir");
    let path = spec.write(&tmp.path().join("fixture.nc"));
    std::fs::read(path).expect("read fixture")
}

/// The bytes of the invented demo cycle: 49 x 81 points, 21 levels, 7 lead times, large
/// enough that loading it takes a while, so that a change during the load can land.
fn demo_bytes() -> Vec<u8> {
    let tmp = tempfile::tempdir().expect("tempdir");
    let path = write_demo_cycle(tmp.path()).expect("demo cycle");
    std::fs::read(path).expect("read demo")
}

/// A data folder with one good cycle, `good.nc`, loaded and served.
struct Served {
    tmp: tempfile::TempDir,
    config: WatchConfig,
    store: CycleStore,
    state: WatchState,
}

async fn served() -> Served {
    let tmp = tempfile::tempdir().expect("tempdir");
    let config = quick(tmp.path());
    let store = CycleStore::new(StoreConfig::default());
    let mut state = WatchState::new();
    let good = tmp.path().join("good.nc");
    std::fs::write(&good, fixture_bytes(&FixtureSpec::default())).expect("write good");
    set_old_mtime(&good);
    let r = scan(&store, &mut state, &config).await;
    assert_eq!(r.loaded, [good]);
    Served {
        tmp,
        config,
        store,
        state,
    }
}

/// Asserts that the store still serves `good.nc`, the very same object.
fn assert_still_served(store: &CycleStore, before: &Arc<hypsogrid::query::LoadedCycle>) {
    let now = store.find("good.nc").expect("good.nc still served");
    assert!(Arc::ptr_eq(before, &now), "good.nc was replaced");
}

/// Asserts that the store still serves `good.nc` as the newest cycle, the very same object
/// (for bad files, which must not displace it).
fn assert_untouched(store: &CycleStore, before: &Arc<hypsogrid::query::LoadedCycle>) {
    assert_still_served(store, before);
    let newest = store.find("").expect("a newest cycle");
    assert_eq!(newest.id, "good.nc", "a bad file became the newest cycle");
}

// ----- files changed during a load -----

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_file_overwritten_while_being_read_gives_old_or_new_content_never_a_crash() {
    let mut s = served().await;
    let good = s.store.find("good.nc").expect("good");
    let old = demo_bytes();
    let new = fixture_bytes(&FixtureSpec {
        lat_north_to_south: true,
        ..FixtureSpec::default()
    });
    let path = s.tmp.path().join("moving.nc");
    std::fs::write(&path, &old).expect("write old");
    set_old_mtime(&path);

    // Overwrite in place (truncate and rewrite, the way a careless producer does) again and
    // again while the scan reads the file, then leave the new content in place.
    let stop = Arc::new(AtomicBool::new(false));
    let writer = {
        let (stop, path, old, new) = (Arc::clone(&stop), path.clone(), old.clone(), new.clone());
        std::thread::spawn(move || {
            let mut rounds = 0;
            std::thread::sleep(Duration::from_millis(20));
            while !stop.load(Ordering::SeqCst) || rounds == 0 {
                let bytes = if rounds % 2 == 0 { &new } else { &old };
                std::fs::write(&path, bytes).expect("overwrite");
                rounds += 1;
                std::thread::sleep(Duration::from_millis(15));
            }
            std::fs::write(&path, &new).expect("final content");
            rounds
        })
    };
    let during = scan(&s.store, &mut s.state, &s.config).await;
    stop.store(true, Ordering::SeqCst);
    let rounds = writer.join().expect("writer");
    println!("overwritten {rounds} times; scan during the writes: {during:?}");

    // Whatever the scan saw, it concerns this file only and is one of the three outcomes.
    let mentioned: Vec<&PathBuf> = during
        .loaded
        .iter()
        .chain(during.waiting.iter())
        .chain(during.failed.iter().map(|(p, _)| p))
        .collect();
    assert!(mentioned.iter().all(|p| **p == path), "{during:?}");
    for (_, error) in &during.failed {
        assert!(error.contains("moving.nc"), "{error}");
    }
    if let Some(lc) = s.store.find("moving.nc") {
        // A cycle was served from it: one whole version, the old (49 rows) or the new (4).
        let rows = lc.cycle.grid.latitudes.len();
        assert!(rows == 49 || rows == 4, "a torn read: {rows} rows");
    }
    assert_still_served(&s.store, &good);

    // Once the writes stop, the new content is what is served.
    scan_until(
        &s.store,
        &mut s.state,
        &s.config,
        Duration::from_secs(10),
        |_| {
            s_latitudes(&s.store, "moving.nc")
                == Some(
                    FixtureSpec {
                        lat_north_to_south: true,
                        ..FixtureSpec::default()
                    }
                    .latitudes(),
                )
        },
    )
    .await;
    let snap = s.store.snapshot();
    assert!(snap.failures.is_empty(), "{:?}", snap.failures);
    assert!(Arc::ptr_eq(
        &good,
        &s.store.find("good.nc").expect("good still served")
    ));
}

fn s_latitudes(store: &CycleStore, id: &str) -> Option<Vec<f64>> {
    store.find(id).map(|c| c.cycle.grid.latitudes.clone())
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_file_replaced_by_rename_while_being_read_serves_one_whole_version() {
    let mut s = served().await;
    let good = s.store.find("good.nc").expect("good");
    let path = s.tmp.path().join("swap.nc");
    std::fs::write(&path, demo_bytes()).expect("write old");
    set_old_mtime(&path);
    let staged = s.tmp.path().join("swap.nc.partial");
    let new_spec = FixtureSpec {
        lat_north_to_south: true,
        ..FixtureSpec::default()
    };
    std::fs::write(&staged, fixture_bytes(&new_spec)).expect("write staged");
    // The supported way to replace a cycle: write beside it, rename over it. The rename
    // lands while the scan is (most likely) still reading the old version.
    let renamer = {
        let (staged, path) = (staged.clone(), path.clone());
        std::thread::spawn(move || {
            std::thread::sleep(Duration::from_millis(30));
            std::fs::rename(&staged, &path).expect("rename");
        })
    };
    let during = scan(&s.store, &mut s.state, &s.config).await;
    renamer.join().expect("renamer");
    println!("scan during the rename: {during:?}");
    assert!(during.failed.is_empty(), "{during:?}");
    if let Some(lc) = s.store.find("swap.nc") {
        let rows = lc.cycle.grid.latitudes.len();
        assert!(rows == 49 || rows == 4, "a torn read: {rows} rows");
    }
    scan_until(
        &s.store,
        &mut s.state,
        &s.config,
        Duration::from_secs(10),
        |_| s_latitudes(&s.store, "swap.nc") == Some(new_spec.latitudes()),
    )
    .await;
    assert!(s.store.snapshot().failures.is_empty());
    assert_still_served(&s.store, &good);
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_file_deleted_while_being_read_is_dropped_and_nothing_else_changes() {
    let mut s = served().await;
    let good = s.store.find("good.nc").expect("good");
    let path = s.tmp.path().join("vanishing.nc");
    std::fs::write(&path, demo_bytes()).expect("write");
    set_old_mtime(&path);
    let deleter = {
        let path = path.clone();
        std::thread::spawn(move || {
            std::thread::sleep(Duration::from_millis(30));
            std::fs::remove_file(&path).expect("delete");
        })
    };
    let during = scan(&s.store, &mut s.state, &s.config).await;
    deleter.join().expect("deleter");
    println!("scan during the deletion: {during:?}");
    for (p, error) in &during.failed {
        assert_eq!(p, &path);
        assert!(error.contains("vanishing.nc"), "{error}");
    }
    // The same scan (which lists the folder again after a file it read) or the next one
    // notices the file is gone: no cycle and no failure stay behind for it.
    let after = scan(&s.store, &mut s.state, &s.config).await;
    let tracked_during = !during.loaded.is_empty() || !during.failed.is_empty();
    if tracked_during {
        let removed: Vec<&PathBuf> = during.removed.iter().chain(&after.removed).collect();
        assert_eq!(removed, [&path], "{during:?}\n{after:?}");
    }
    assert!(s.store.find("vanishing.nc").is_none());
    let snap = s.store.snapshot();
    assert!(
        snap.failures.iter().all(|f| f.path != path),
        "{:?}",
        snap.failures
    );
    assert_eq!(snap.cycles.len(), 1);
    assert_still_served(&s.store, &good);
}

// ----- a file that never stops growing -----

/// Scans `s`'s folder for `window` while `path` cannot be loaded yet (still growing, or held
/// locked by its writer): nothing is loaded or failed, and `path` is reported as still being
/// written exactly once, not before `config.max_wait_for_growth`. Returns the failure then
/// recorded for it, the store's only one.
async fn long_wait_report(
    s: &mut Served,
    config: &WatchConfig,
    path: &Path,
    window: Duration,
) -> String {
    let started = Instant::now();
    let mut reports = 0;
    while started.elapsed() < window {
        let r = scan(&s.store, &mut s.state, config).await;
        assert!(r.loaded.is_empty() && r.failed.is_empty(), "{r:?}");
        if r.still_growing == [path.to_path_buf()] {
            reports += 1;
            // Not before the longest wait.
            assert!(started.elapsed() >= config.max_wait_for_growth);
        }
        tokio::time::sleep(config.poll_interval).await;
    }
    assert_eq!(reports, 1, "reported once per wait, not once per scan");
    let snap = s.store.snapshot();
    assert_eq!(snap.failures.len(), 1, "{:?}", snap.failures);
    assert_eq!(snap.failures[0].path, path);
    snap.failures[0].error.clone()
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_file_that_never_stops_growing_is_reported_once_and_never_loaded() {
    let mut s = served().await;
    let good = s.store.find("good.nc").expect("good");
    let config = WatchConfig {
        max_wait_for_growth: Duration::from_millis(600),
        ..s.config.clone()
    };
    let path = s.tmp.path().join("endless.nc");
    let stop = Arc::new(AtomicBool::new(false));
    // A producer stuck in a loop: a valid header, then a few bytes more every 50 ms, for as
    // long as the test runs (well past both `settle` and `max_wait_for_growth`).
    let writer = {
        let (stop, path) = (Arc::clone(&stop), path.clone());
        let start = fixture_bytes(&FixtureSpec::default());
        std::thread::spawn(move || {
            let mut f = std::fs::File::create(&path).expect("create");
            f.write_all(&start).expect("write");
            while !stop.load(Ordering::SeqCst) {
                f.write_all(&[0u8; 64]).expect("append");
                f.flush().expect("flush");
                std::thread::sleep(Duration::from_millis(50));
            }
        })
    };
    let error = long_wait_report(&mut s, &config, &path, Duration::from_millis(2500)).await;
    stop.store(true, Ordering::SeqCst);
    writer.join().expect("writer");
    assert!(error.contains("still being written after 0.6 s"), "{error}");
    assert!(s.store.find("endless.nc").is_none());
    assert_untouched(&s.store, &good);
}

// ----- a file its writer still holds locked -----

/// A good fixture `name` in `s`'s folder, there for a while (read at the first scan), with an
/// exclusive `flock` on it through a descriptor of its own, as HDF5 takes on a NetCDF-4 file
/// while a process writes it; the lock goes when the returned file is dropped.
fn fixture_locked_by_a_writer(s: &Served, name: &str) -> (PathBuf, std::fs::File) {
    let path = s.tmp.path().join(name);
    std::fs::write(&path, fixture_bytes(&FixtureSpec::default())).expect("write");
    set_old_mtime(&path);
    let file = common::writer_lock::held_as_a_writer(&path);
    (path, file)
}

/// Releases `lock` on `path` and scans until a file is loaded: `path`, with no failure left
/// and `good` still served.
async fn loaded_once_released(
    s: &mut Served,
    config: &WatchConfig,
    (path, lock): (PathBuf, std::fs::File),
    good: &Arc<hypsogrid::query::LoadedCycle>,
) {
    drop(lock);
    let r = scan_until(
        &s.store,
        &mut s.state,
        config,
        Duration::from_secs(10),
        |r| !r.loaded.is_empty(),
    )
    .await;
    assert_eq!(r.loaded, [path], "{r:?}");
    assert!(s.store.snapshot().failures.is_empty());
    assert_still_served(&s.store, good);
}

/// A complete file that another process still holds open for writing: HDF5 refuses to
/// open it ("netcdf: hdf error"), which is neither a damaged file nor a failure. The read
/// names the lock, the watcher keeps the file waiting (no failure recorded, nothing served
/// changes) and loads it once the lock is released.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_file_locked_by_its_writer_waits_and_is_loaded_once_released() {
    let mut s = served().await;
    let good = s.store.find("good.nc").expect("good");
    let (path, lock) = fixture_locked_by_a_writer(&s, "locked.nc");

    let err = hypsogrid::ingest::read_cycle(&path, &IngestConfig::default())
        .expect_err("a locked file does not open");
    let text = err.to_string();
    assert!(
        matches!(err, hypsogrid::ingest::IngestError::Locked { .. }),
        "{text}"
    );
    assert!(
        text.contains("locked.nc") && text.contains("open for writing"),
        "{text}"
    );

    for _ in 0..3 {
        let r = scan(&s.store, &mut s.state, &s.config).await;
        assert!(r.loaded.is_empty() && r.failed.is_empty(), "{r:?}");
        assert!(r.waiting.contains(&path), "{r:?}");
        tokio::time::sleep(s.config.poll_interval).await;
    }
    let snap = s.store.snapshot();
    assert!(snap.failures.is_empty(), "{:?}", snap.failures);
    assert_untouched(&s.store, &good);

    let config = s.config.clone();
    loaded_once_released(&mut s, &config, (path, lock), &good).await;
    assert!(s.store.find("locked.nc").is_some());
}

/// A file held locked past `max_wait_for_growth` is reported once, as a file still being
/// written, and loaded (the report cleared) once its writer lets go.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_file_locked_past_the_wait_for_growth_is_reported_once_then_loaded() {
    let mut s = served().await;
    let good = s.store.find("good.nc").expect("good");
    let config = WatchConfig {
        max_wait_for_growth: Duration::from_millis(600),
        ..s.config.clone()
    };
    let (path, lock) = fixture_locked_by_a_writer(&s, "held.nc");
    let error = long_wait_report(&mut s, &config, &path, Duration::from_millis(2000)).await;
    assert!(
        error.contains("held.nc") && error.contains("locked for writing"),
        "{error}"
    );
    assert_untouched(&s.store, &good);
    loaded_once_released(&mut s, &config, (path, lock), &good).await;
}

// ----- an unreadable folder -----

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn an_unreadable_folder_is_reported_and_the_served_cycles_stay() {
    use std::os::unix::fs::PermissionsExt;

    let root = tempfile::tempdir().expect("tempdir");
    let dir = root.path().join("data");
    std::fs::create_dir(&dir).expect("mkdir");
    let config = quick(&dir);
    let store = CycleStore::new(StoreConfig::default());
    let mut state = WatchState::new();
    let good_path = dir.join("good.nc");
    std::fs::write(&good_path, fixture_bytes(&FixtureSpec::default())).expect("write");
    set_old_mtime(&good_path);
    assert_eq!(scan(&store, &mut state, &config).await.loaded, [good_path]);
    let good = store.find("good.nc").expect("good");

    // Make the folder unreadable. chmod 000 does not stop root (CAP_DAC_OVERRIDE), and
    // tests often run as root in containers: when the folder can still be listed after the
    // chmod, put a plain file where the folder was instead, which no user can list.
    std::fs::set_permissions(&dir, std::fs::Permissions::from_mode(0o000)).expect("chmod");
    let chmod_bites = std::fs::read_dir(&dir).is_err();
    let aside = root.path().join("data.aside");
    if !chmod_bites {
        println!("chmod 000 does not stop this user (root?): replacing the folder by a file");
        std::fs::set_permissions(&dir, std::fs::Permissions::from_mode(0o755)).expect("chmod");
        std::fs::rename(&dir, &aside).expect("move the folder aside");
        std::fs::write(&dir, b"not a folder").expect("a file in its place");
    }
    for _ in 0..3 {
        let r = scan(&store, &mut state, &config).await;
        let error = r.folder_error.clone().expect("a folder error");
        assert!(
            error.starts_with("cannot list the data folder")
                && error.contains(&dir.display().to_string()),
            "{error}"
        );
        // The files inside are not "removed" because the folder cannot be listed.
        assert!(r.removed.is_empty() && r.loaded.is_empty(), "{r:?}");
    }
    let snap = store.snapshot();
    assert_eq!(snap.failures.len(), 1, "one failure, not one per scan");
    assert_eq!(snap.failures[0].path, dir);
    assert!(Arc::ptr_eq(&good, &store.find("good.nc").expect("served")));

    // Readable again: the failure clears and the same cycle is still served, not reloaded.
    if chmod_bites {
        std::fs::set_permissions(&dir, std::fs::Permissions::from_mode(0o755)).expect("chmod");
    } else {
        std::fs::remove_file(&dir).expect("remove the file");
        std::fs::rename(&aside, &dir).expect("move the folder back");
    }
    let r = scan(&store, &mut state, &config).await;
    assert_eq!(r, ScanReport::default());
    assert!(store.snapshot().failures.is_empty());
    assert!(Arc::ptr_eq(&good, &store.find("good.nc").expect("served")));
}

// ----- files whose content is wrong -----

/// Drops `name` written by `spec` into a folder that serves `good.nc`, scans once, and
/// returns the recorded failure's reason after checking that nothing else changed.
async fn refused(name: &str, spec: &FixtureSpec) -> String {
    let mut s = served().await;
    let good = s.store.find("good.nc").expect("good");
    let generation = s.store.snapshot().generation;
    let path = s.tmp.path().join(name);
    std::fs::write(&path, fixture_bytes(spec)).expect("write bad file");
    set_old_mtime(&path);
    let r = scan(&s.store, &mut s.state, &s.config).await;
    assert!(r.loaded.is_empty(), "a bad file was loaded: {r:?}");
    assert_eq!(r.failed.len(), 1, "{r:?}");
    assert_eq!(r.failed[0].0, path);
    let snap = s.store.snapshot();
    assert_eq!(snap.generation, generation + 1, "only the failure changed");
    assert_eq!(snap.failures.len(), 1);
    assert_eq!(snap.failures[0].path, path);
    assert_eq!(snap.failures[0].error, r.failed[0].1);
    assert!(snap.evictions.is_empty(), "{:?}", snap.evictions);
    assert_untouched(&s.store, &good);
    // Not retried while unchanged.
    assert_eq!(
        scan(&s.store, &mut s.state, &s.config).await,
        ScanReport::default()
    );
    let error = snap.failures[0].error.clone();
    assert!(error.contains(name), "the reason names the file: {error}");
    error
}

/// Every point of every 3-D field of a fixture: 1 member, 1 time, 8 levels, 4 x 6 points.
fn every_point(spec: &FixtureSpec) -> Vec<[usize; 5]> {
    let mut all = Vec::new();
    for k in 0..spec.levels() {
        for j in 0..spec.latitudes().len() {
            for i in 0..spec.longitudes().len() {
                all.push([0, 0, k, j, i]);
            }
        }
    }
    all
}

/// Regression: a file whose temperature was entirely `_FillValue` loaded as a cycle of
/// missing heights and, as the newest load of the same reference time, displaced the good
/// cycle as the one served by default. It is now refused at ingest.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn regression_an_all_missing_file_was_served_as_the_newest_cycle() {
    let mut spec = FixtureSpec::default();
    spec.masked_points = every_point(&spec);
    let error = refused("all_fill.nc", &spec).await;
    assert!(
        error.contains("holds no valid value") && error.contains("'t'"),
        "{error}"
    );
    // The same with missing_value instead of _FillValue.
    spec.mask = common::fixtures::MaskEncoding::MissingValue;
    let error = refused("all_missing_value.nc", &spec).await;
    assert!(error.contains("holds no valid value"), "{error}");
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_file_without_temperature_is_refused_with_what_was_looked_for() {
    let spec = FixtureSpec {
        faults: Faults {
            omit_temperature: true,
            ..Faults::default()
        },
        ..FixtureSpec::default()
    };
    let error = refused("no_t.nc", &spec).await;
    assert!(
        error.starts_with("no air temperature in") && error.contains("looked for"),
        "{error}"
    );
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_file_with_wrong_units_is_refused_naming_variable_and_units() {
    for (units, label) in [
        ("F", "fahrenheit.nc"),
        ("kg kg-1", "mass_as_temperature.nc"),
    ] {
        let spec = FixtureSpec {
            faults: Faults {
                temperature_units: Some(units.into()),
                ..Faults::default()
            },
            ..FixtureSpec::default()
        };
        let error = refused(label, &spec).await;
        assert!(
            error.contains(&format!("has units '{units}': expected K or degC")),
            "{error}"
        );
    }
    let spec = FixtureSpec {
        faults: Faults {
            humidity_units: Some("furlongs".into()),
            ..Faults::default()
        },
        ..FixtureSpec::default()
    };
    let error = refused("bad_q_units.nc", &spec).await;
    assert!(error.contains("has units 'furlongs'"), "{error}");
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_file_with_non_monotonic_levels_is_refused_naming_the_coordinate() {
    let spec = FixtureSpec {
        faults: Faults {
            non_monotonic_levels: true,
            ..Faults::default()
        },
        ..FixtureSpec::default()
    };
    let error = refused("zigzag.nc", &spec).await;
    assert!(
        error.contains("'plev'") && error.contains("not strictly monotonic at index 3"),
        "{error}"
    );
}
