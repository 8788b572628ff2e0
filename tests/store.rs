//! The cycles being served (`hypsogrid::store`) and the data folder that feeds them
//! (`hypsogrid::watch`).
//!
//! Store: snapshot isolation, eviction order and reasons, failures listed and cleared.
//! Watch: new files, corrupt files, files written slowly, the write-then-rename convention,
//! deleted files, files that keep growing, and the watch loop's shutdown. The cycles used are
//! the invented fixtures of `tests/common` and tiny in-memory cycles; the timings are short
//! so that the tests stay quick.

mod common;

use std::io::Write;
use std::path::{Path, PathBuf};
use std::sync::Arc;
use std::time::{Duration, Instant, SystemTime};

use ndarray::Array5;

use common::fixtures::FixtureSpec;
use hypsogrid::compute::ComputeConfig;
use hypsogrid::ingest::IngestConfig;
use hypsogrid::model::{Cycle, Grid, Vertical};
use hypsogrid::physics::Constants;
use hypsogrid::query::LoadedCycle;
use hypsogrid::store::{CycleStore, StoreConfig};
use hypsogrid::watch::{is_candidate, scan_once, watch, ScanReport, WatchConfig, WatchState};

// ----- store -----

/// A tiny invented cycle (two isothermal levels on a 2 x 2 grid) that claims `bytes` bytes.
fn tiny(id: &str, reference: Option<&str>, bytes: usize) -> LoadedCycle {
    let cycle = Cycle {
        source: PathBuf::from(format!("/data/{id}")),
        reference_time: reference.map(str::to_string),
        lead_times_s: vec![0],
        members: 1,
        grid: Grid {
            latitudes: vec![0.0, 1.0],
            longitudes: vec![0.0, 1.0],
        },
        vertical: Vertical::Isobaric {
            pressure_pa: vec![100_000.0, 50_000.0],
        },
        levels_top_down_in_file: false,
        temperature: Array5::from_elem((1, 1, 2, 2, 2), 250.0),
        humidity: None,
        surface: None,
        file_heights: None,
        constants: Constants::default(),
        variables: Vec::new(),
        notes: Vec::new(),
    };
    let mut lc = LoadedCycle::computed(id, cycle, &ComputeConfig::default()).unwrap();
    lc.bytes = bytes;
    lc
}

fn day(d: u32) -> String {
    format!("2030-01-{d:02}T00:00:00Z")
}

fn ids(store: &CycleStore) -> Vec<String> {
    store
        .snapshot()
        .cycles
        .iter()
        .map(|c| c.id.clone())
        .collect()
}

#[test]
fn a_held_snapshot_is_unchanged_by_later_inserts() {
    let store = CycleStore::new(StoreConfig::default());
    store.insert(tiny("a.nc", Some(&day(1)), 10));
    let held = store.snapshot();
    store.insert(tiny("b.nc", Some(&day(2)), 10));
    store.record_failure(Path::new("/data/c.nc"), "cannot open".into());
    store.remove_path(Path::new("/data/a.nc"));
    assert_eq!(held.cycles.len(), 1);
    assert_eq!(held.cycles[0].id, "a.nc");
    assert!(held.failures.is_empty() && held.evictions.is_empty());
    assert_eq!(held.generation, 1);
    let now = store.snapshot();
    assert_eq!(ids(&store), ["b.nc"]);
    assert_eq!(now.failures.len(), 1);
    assert_eq!(now.generation, 4);
}

#[test]
fn readers_never_see_a_half_updated_state() {
    let store = Arc::new(CycleStore::new(StoreConfig {
        keep_newest: 3,
        ..StoreConfig::default()
    }));
    let writer = {
        let store = Arc::clone(&store);
        std::thread::spawn(move || {
            for d in 1..=28 {
                store.insert(tiny(&format!("{d:02}.nc"), Some(&day(d)), 10));
            }
        })
    };
    let mut last_generation = 0;
    while !writer.is_finished() {
        let s = store.snapshot();
        assert!(s.cycles.len() <= 3);
        assert!(s.generation >= last_generation);
        last_generation = s.generation;
        let refs: Vec<i64> = s
            .cycles
            .iter()
            .map(|c| c.reference_time_unix_s().unwrap())
            .collect();
        assert!(refs.windows(2).all(|w| w[0] > w[1]), "{refs:?}");
    }
    writer.join().unwrap();
    assert_eq!(ids(&store), ["28.nc", "27.nc", "26.nc"]);
}

#[test]
fn eviction_drops_the_oldest_reference_time_and_says_why() {
    let store = CycleStore::new(StoreConfig {
        keep_newest: 2,
        memory_budget_bytes: usize::MAX,
    });
    store.insert(tiny("d1.nc", Some(&day(1)), 10));
    store.insert(tiny("d3.nc", Some(&day(3)), 10));
    store.insert(tiny("d2.nc", Some(&day(2)), 10));
    assert_eq!(ids(&store), ["d3.nc", "d2.nc"]);
    store.insert(tiny("d4.nc", Some(&day(4)), 10));
    assert_eq!(ids(&store), ["d4.nc", "d3.nc"]);
    // A cycle older than every kept one is evicted as it arrives.
    store.insert(tiny("d0.nc", Some(&day(0)), 10));
    assert_eq!(ids(&store), ["d4.nc", "d3.nc"]);
    let s = store.snapshot();
    let evicted: Vec<&str> = s.evictions.iter().map(|e| e.id.as_str()).collect();
    assert_eq!(evicted, ["d0.nc", "d2.nc", "d1.nc"]);
    for e in &s.evictions {
        assert!(e.reason.contains("newest 2"), "{}", e.reason);
        assert!(e.reason.contains(&e.id), "{}", e.reason);
    }
    // Replacing a cycle of the same name is not an eviction.
    store.insert(tiny("d4.nc", Some(&day(4)), 10));
    assert_eq!(ids(&store), ["d4.nc", "d3.nc"]);
    assert_eq!(store.snapshot().evictions.len(), 3);
}

#[test]
fn the_memory_budget_evicts_oldest_first_but_keeps_the_newest() {
    let store = CycleStore::new(StoreConfig {
        keep_newest: 10,
        memory_budget_bytes: 2500,
    });
    store.insert(tiny("old.nc", Some(&day(1)), 1000));
    store.insert(tiny("new.nc", Some(&day(3)), 1000));
    store.insert(tiny("mid.nc", Some(&day(2)), 1000));
    assert_eq!(ids(&store), ["new.nc", "mid.nc"]);
    let s = store.snapshot();
    assert_eq!(s.evictions[0].id, "old.nc");
    assert!(
        s.evictions[0]
            .reason
            .contains("memory budget of 2500 bytes"),
        "{}",
        s.evictions[0].reason
    );
    assert_eq!(s.bytes(), 2000);
    // One cycle larger than the whole budget is still served.
    let small = CycleStore::new(StoreConfig {
        keep_newest: 10,
        memory_budget_bytes: 500,
    });
    small.insert(tiny("big.nc", Some(&day(1)), 1000));
    assert_eq!(ids(&small), ["big.nc"]);
}

#[test]
fn failures_are_listed_and_cleared_by_a_good_reload_or_removal() {
    let store = CycleStore::new(StoreConfig::default());
    let mut changes = store.on_change();
    store.insert(tiny("a.nc", Some(&day(1)), 10));
    assert!(changes.has_changed().unwrap());
    assert_eq!(*changes.borrow_and_update(), 1);
    store.record_failure(Path::new("/data/a.nc"), "truncated".into());
    store.record_failure(Path::new("/data/b.nc"), "not netcdf".into());
    let s = store.snapshot();
    let listed: Vec<(&Path, &str)> = s
        .failures
        .iter()
        .map(|f| (f.path.as_path(), f.error.as_str()))
        .collect();
    assert_eq!(
        listed,
        [
            (Path::new("/data/a.nc"), "truncated"),
            (Path::new("/data/b.nc"), "not netcdf")
        ]
    );
    // A failure of a file already served leaves the served cycle alone.
    assert_eq!(ids(&store), ["a.nc"]);
    store.insert(tiny("a.nc", Some(&day(1)), 10));
    let s = store.snapshot();
    assert_eq!(s.failures.len(), 1);
    assert_eq!(s.failures[0].path, Path::new("/data/b.nc"));
    store.remove_path(Path::new("/data/b.nc"));
    assert!(store.snapshot().failures.is_empty());
    store.remove_path(Path::new("/data/a.nc"));
    let s = store.snapshot();
    assert!(s.cycles.is_empty());
    assert!(s.evictions[0]
        .reason
        .contains("removed from the data folder"));
    assert_eq!(*changes.borrow_and_update(), s.generation);
}

// ----- watch -----

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

/// The bytes of a good cycle file (an invented fixture).
fn fixture_bytes() -> Vec<u8> {
    let tmp = tempfile::tempdir().unwrap();
    let path = FixtureSpec::default().write(&tmp.path().join("fixture.nc"));
    std::fs::read(path).unwrap()
}

/// An empty data folder watched with quick timings, and a store keeping `keep_newest` cycles.
fn watched_folder(keep_newest: usize) -> (tempfile::TempDir, WatchConfig, CycleStore, WatchState) {
    let tmp = tempfile::tempdir().unwrap();
    let config = quick(tmp.path());
    let store = CycleStore::new(StoreConfig {
        keep_newest,
        ..StoreConfig::default()
    });
    (tmp, config, store, WatchState::new())
}

/// The file names of `paths`, in order.
fn file_names<'a>(paths: impl IntoIterator<Item = &'a PathBuf>) -> Vec<String> {
    paths
        .into_iter()
        .map(|p| p.file_name().unwrap().to_string_lossy().into_owned())
        .collect()
}

fn set_old_mtime(path: &Path) {
    let f = std::fs::File::options().write(true).open(path).unwrap();
    f.set_modified(SystemTime::now() - Duration::from_secs(30))
        .unwrap();
}

#[test]
fn the_naming_convention_is_public() {
    assert!(is_candidate(Path::new("/data/2030010100.nc")));
    assert!(!is_candidate(Path::new("/data/2030010100.nc.partial")));
}

/// A backlog (a folder full at start-up, or files that arrived during an outage) is read
/// newest modification time first, so that the cycle forecasters want is served before the
/// older ones; files of the same time in reverse name order.
#[tokio::test]
async fn a_backlog_is_loaded_newest_first() {
    let (tmp, config, store, mut state) = watched_folder(8);
    let bytes = fixture_bytes();
    let now = SystemTime::now();
    let hours_ago = |h: u64| now - Duration::from_secs(3600 * h);
    // Name order is the opposite of age order for the first three.
    let files = [
        ("a.nc", hours_ago(1)),
        ("b.nc", hours_ago(2)),
        ("c.nc", hours_ago(3)),
        ("e.nc", hours_ago(4)),
        ("d.nc", hours_ago(4)),
    ];
    for (name, modified) in files {
        let path = tmp.path().join(name);
        if name == "b.nc" {
            std::fs::write(&path, b"not netcdf").unwrap();
        } else {
            std::fs::write(&path, &bytes).unwrap();
        }
        let f = std::fs::File::options().write(true).open(&path).unwrap();
        f.set_modified(modified).unwrap();
    }
    let r = scan(&store, &mut state, &config).await;
    assert_eq!(
        file_names(&r.loaded),
        ["a.nc", "c.nc", "e.nc", "d.nc"],
        "{r:?}"
    );
    assert_eq!(file_names(r.failed.iter().map(|(p, _)| p)), ["b.nc"]);
    assert!(r.waiting.is_empty(), "{r:?}");
    assert_eq!(store.snapshot().cycles.len(), 4);
}

/// A file that arrives while a backlog is being read takes its place in the newest-first
/// order within the same scan, rather than after the whole backlog (minutes with big
/// cycles): the folder is listed again after each file. The new file is renamed into place
/// once the first file of the backlog is served (the store's change), with a modification
/// time older than the settle time so that it is stable at first sight; it must come before
/// the oldest files of the backlog.
#[tokio::test]
async fn a_file_arriving_during_a_backlog_is_read_before_the_older_files() {
    let (tmp, config, store, mut state) = watched_folder(8);
    let bytes = fixture_bytes();
    let now = SystemTime::now();
    let put = move |dir: &Path, name: &str, minutes_old: u64, bytes: &[u8]| {
        let partial = dir.join(format!("{name}.partial"));
        std::fs::write(&partial, bytes).unwrap();
        let f = std::fs::File::options().write(true).open(&partial).unwrap();
        f.set_modified(now - Duration::from_secs(60 * minutes_old))
            .unwrap();
        std::fs::rename(&partial, dir.join(name)).unwrap();
    };
    for (name, minutes_old) in [
        ("b1.nc", 60),
        ("b2.nc", 120),
        ("b3.nc", 180),
        ("b4.nc", 240),
    ] {
        put(tmp.path(), name, minutes_old, &bytes);
    }
    let mut changes = store.on_change();
    let dir = tmp.path().to_path_buf();
    let arrival = tokio::spawn(async move {
        changes.changed().await.expect("the first cycle is served");
        put(&dir, "new.nc", 30, &bytes);
    });
    let r = scan(&store, &mut state, &config).await;
    arrival.await.unwrap();
    let names = file_names(&r.loaded);
    assert_eq!(names.len(), 5, "{names:?}");
    assert_eq!(names[0], "b1.nc", "{names:?}");
    let new_at = names
        .iter()
        .position(|n| n == "new.nc")
        .expect("read in this scan");
    assert!(new_at < 4, "after the whole backlog: {names:?}");
}

/// A good cycle file whose reference time is `reference` (`YYYY-MM-DD hh:mm:ss`, from the
/// units of its time coordinate) and whose modification time is `hours_old` hours ago.
fn cycle_file(dir: &Path, name: &str, reference: &str, hours_old: u64) -> PathBuf {
    let path = FixtureSpec::default().write(&dir.join(name));
    {
        let mut f = netcdf::append(&path).unwrap();
        let mut time = f.variable_mut("time").unwrap();
        time.put_attribute("units", format!("hours since {reference}"))
            .unwrap();
    }
    let f = std::fs::File::options().write(true).open(&path).unwrap();
    f.set_modified(SystemTime::now() - Duration::from_secs(3600 * hours_old))
        .unwrap();
    path
}

/// With the store full of newer cycles, a file of an older reference time is not read at all
/// (its metadata is, to learn that time): it would be evicted the moment it was loaded. The
/// catalogue says why; a file of a newer time is read whatever its modification time says,
/// and evicts the oldest.
#[tokio::test]
async fn a_file_older_than_the_cycles_kept_is_passed_over_unread() {
    let (tmp, config, store, mut state) = watched_folder(2);
    let files = archive_and_a_late_delivery(tmp.path());
    let r = scan(&store, &mut state, &config).await;
    the_old_file_was_passed_over(&r, &store, &files, "2030-01-10T00:00:00Z");
    // Not looked at again until it changes.
    let r = scan(&store, &mut state, &config).await;
    assert_eq!(r, ScanReport::default());
}

/// The same below `keep_newest`, by the memory budget: with room for two cycles, a file
/// older than both is not read (its load would evict it at once), while a late delivery of
/// a newer cycle is read and evicts the oldest held.
#[tokio::test]
async fn a_file_older_than_the_cycles_held_is_passed_over_beyond_the_memory_budget() {
    let tmp = tempfile::tempdir().unwrap();
    let config = quick(tmp.path());
    let files = archive_and_a_late_delivery(tmp.path());
    let one = LoadedCycle::read(
        &files[0],
        &IngestConfig::default(),
        &ComputeConfig::default(),
    )
    .unwrap()
    .bytes;
    let store = CycleStore::new(StoreConfig {
        keep_newest: 8,
        memory_budget_bytes: 2 * one + one / 2,
    });
    let mut state = WatchState::new();
    let r = scan(&store, &mut state, &config).await;
    the_old_file_was_passed_over(&r, &store, &files, "memory budget");
}

/// Cycle files n1 (newest), n2, old and late, newest modification time first; late was
/// delivered late: the oldest file by modification time, but newer than n2 by its cycle.
fn archive_and_a_late_delivery(dir: &Path) -> [PathBuf; 4] {
    [
        cycle_file(dir, "n1.nc", "2030-01-12 00:00:00", 1),
        cycle_file(dir, "n2.nc", "2030-01-11 00:00:00", 2),
        cycle_file(dir, "old.nc", "2030-01-10 00:00:00", 3),
        cycle_file(dir, "late.nc", "2030-01-11 12:00:00", 4),
    ]
}

/// After a scan of [`archive_and_a_late_delivery`] with room for two cycles: n1, n2 and
/// late were read (n2 evicted by late), old was passed over with a reason naming `why`.
fn the_old_file_was_passed_over(
    r: &ScanReport,
    store: &CycleStore,
    files: &[PathBuf; 4],
    why: &str,
) {
    let [newest, second, old, late] = files.clone();
    assert_eq!(r.loaded, [newest, second, late], "{r:?}");
    assert_eq!(r.passed_over, [old], "{r:?}");
    assert!(r.failed.is_empty() && r.waiting.is_empty(), "{r:?}");
    assert_eq!(ids(store), ["n1.nc", "late.nc"]);
    let s = store.snapshot();
    let evicted: Vec<&str> = s.evictions.iter().map(|e| e.id.as_str()).collect();
    assert_eq!(evicted, ["n2.nc", "old.nc"]);
    assert!(
        s.evictions[1].reason.contains("was not read") && s.evictions[1].reason.contains(why),
        "{}",
        s.evictions[1].reason
    );
}

#[tokio::test]
async fn a_new_file_is_loaded_once_it_has_settled_and_a_deleted_one_is_dropped() {
    let tmp = tempfile::tempdir().unwrap();
    let config = quick(tmp.path());
    let store = CycleStore::new(StoreConfig::default());
    let mut state = WatchState::new();
    assert_eq!(
        scan(&store, &mut state, &config).await,
        ScanReport::default()
    );

    let a = FixtureSpec::default().write(&tmp.path().join("a.nc"));
    std::fs::write(tmp.path().join("notes.txt"), "not a cycle").unwrap();
    let first = scan(&store, &mut state, &config).await;
    // Just written: not read until its size and time have been stable for `settle`.
    assert_eq!(first.waiting, std::slice::from_ref(&a));
    assert!(first.loaded.is_empty() && store.snapshot().cycles.is_empty());
    let r = scan_until(&store, &mut state, &config, Duration::from_secs(5), |r| {
        !r.loaded.is_empty()
    })
    .await;
    assert_eq!(r.loaded, std::slice::from_ref(&a));
    let served = store.find("a.nc").unwrap();
    assert_eq!(served.path, a);
    assert_eq!(
        served.cycle.grid.latitudes,
        FixtureSpec::default().latitudes()
    );
    // Served once read; the scan also waits for the heights of the steps left pending, so
    // that cycles are computed one at a time: by its end every step is in.
    assert!(served.heights.pending_steps().is_empty());
    assert_eq!(served.heights.ready_steps(), served.heights.steps());
    // Nothing new: the next scan does nothing.
    let generation = store.snapshot().generation;
    assert_eq!(
        scan(&store, &mut state, &config).await,
        ScanReport::default()
    );
    assert_eq!(store.snapshot().generation, generation);

    std::fs::remove_file(&a).unwrap();
    let r = scan(&store, &mut state, &config).await;
    assert_eq!(r.removed, [a]);
    assert!(store.find("a.nc").is_none());
    assert_eq!(store.snapshot().evictions[0].id, "a.nc");
}

#[tokio::test]
async fn a_corrupt_file_is_a_failure_that_changes_nothing_else() {
    let tmp = tempfile::tempdir().unwrap();
    let config = quick(tmp.path());
    let store = CycleStore::new(StoreConfig::default());
    let mut state = WatchState::new();
    let good = tmp.path().join("good.nc");
    std::fs::write(&good, fixture_bytes()).unwrap();
    set_old_mtime(&good);
    // A file older than `settle` when first seen (present at start-up) is read at once.
    assert_eq!(
        scan(&store, &mut state, &config).await.loaded,
        std::slice::from_ref(&good)
    );
    let before = store.snapshot();

    let bad = tmp.path().join("bad.nc");
    std::fs::write(&bad, b"CDF\x01 this is not really a netcdf file").unwrap();
    set_old_mtime(&bad);
    let r = scan(&store, &mut state, &config).await;
    assert_eq!(r.failed.len(), 1);
    assert_eq!(r.failed[0].0, bad);
    let after = store.snapshot();
    assert_eq!(after.failures.len(), 1);
    assert_eq!(after.failures[0].path, bad);
    assert!(
        after.failures[0].error.contains("bad.nc"),
        "{}",
        after.failures[0].error
    );
    // The cycle served before is the very same one.
    assert_eq!(after.cycles.len(), 1);
    assert!(Arc::ptr_eq(&before.cycles[0], &after.cycles[0]));
    // Not retried while unchanged.
    assert_eq!(
        scan(&store, &mut state, &config).await,
        ScanReport::default()
    );

    // Replaced by a good file: loaded, and the failure is cleared.
    std::fs::write(&bad, fixture_bytes()).unwrap();
    let r = scan_until(&store, &mut state, &config, Duration::from_secs(5), |r| {
        !r.loaded.is_empty()
    })
    .await;
    assert_eq!(r.loaded, [bad]);
    let s = store.snapshot();
    assert!(s.failures.is_empty());
    assert_eq!(s.cycles.len(), 2);
}

/// Appends `bytes` to `path` in `pieces` writes, `gap` apart, on a thread.
fn write_slowly(
    path: PathBuf,
    bytes: Vec<u8>,
    pieces: usize,
    gap: Duration,
) -> std::thread::JoinHandle<()> {
    std::thread::spawn(move || {
        let mut f = std::fs::File::create(&path).unwrap();
        let chunk = bytes.len().div_ceil(pieces);
        for part in bytes.chunks(chunk) {
            f.write_all(part).unwrap();
            f.flush().unwrap();
            std::thread::sleep(gap);
        }
    })
}

#[tokio::test]
async fn a_file_written_slowly_is_not_read_before_it_settles() {
    let tmp = tempfile::tempdir().unwrap();
    let config = quick(tmp.path());
    let store = CycleStore::new(StoreConfig::default());
    let mut state = WatchState::new();
    let slow = tmp.path().join("slow.nc");
    let writer = write_slowly(slow.clone(), fixture_bytes(), 8, Duration::from_millis(120));
    let mut scans = 0;
    while !writer.is_finished() {
        let r = scan(&store, &mut state, &config).await;
        scans += 1;
        assert!(r.loaded.is_empty() && r.failed.is_empty(), "{r:?}");
        let s = store.snapshot();
        assert!(s.cycles.is_empty() && s.failures.is_empty());
        tokio::time::sleep(config.poll_interval).await;
    }
    writer.join().unwrap();
    assert!(scans >= 10, "only {scans} scans while writing");
    let r = scan_until(&store, &mut state, &config, Duration::from_secs(5), |r| {
        !r.loaded.is_empty()
    })
    .await;
    assert_eq!(r.loaded, [slow]);
    assert!(store.snapshot().failures.is_empty());
}

#[tokio::test]
async fn a_file_that_keeps_growing_is_reported_then_loaded_when_it_settles() {
    let tmp = tempfile::tempdir().unwrap();
    let config = WatchConfig {
        max_wait_for_growth: Duration::from_millis(250),
        ..quick(tmp.path())
    };
    let store = CycleStore::new(StoreConfig::default());
    let mut state = WatchState::new();
    let path = tmp.path().join("growing.nc");
    let writer = write_slowly(path.clone(), fixture_bytes(), 8, Duration::from_millis(100));
    let mut reported = false;
    while !writer.is_finished() {
        let r = scan(&store, &mut state, &config).await;
        assert!(r.loaded.is_empty(), "{r:?}");
        reported |= r.still_growing == [path.clone()];
        tokio::time::sleep(config.poll_interval).await;
    }
    writer.join().unwrap();
    assert!(reported);
    let s = store.snapshot();
    assert_eq!(s.failures.len(), 1);
    assert!(
        s.failures[0].error.contains("still being written"),
        "{}",
        s.failures[0].error
    );
    scan_until(&store, &mut state, &config, Duration::from_secs(5), |r| {
        !r.loaded.is_empty()
    })
    .await;
    let s = store.snapshot();
    assert!(s.failures.is_empty());
    assert_eq!(s.cycles[0].id, "growing.nc");
}

#[tokio::test]
async fn a_partial_file_renamed_into_place_is_loaded() {
    let tmp = tempfile::tempdir().unwrap();
    let config = quick(tmp.path());
    let store = CycleStore::new(StoreConfig::default());
    let mut state = WatchState::new();
    let partial = tmp.path().join("c.nc.partial");
    // Written in two halves with a pause longer than `settle`: as a `.partial` it is never
    // looked at, however long it sits there.
    let bytes = fixture_bytes();
    std::fs::write(&partial, &bytes[..bytes.len() / 2]).unwrap();
    assert_eq!(
        scan(&store, &mut state, &config).await,
        ScanReport::default()
    );
    tokio::time::sleep(Duration::from_millis(400)).await;
    assert_eq!(
        scan(&store, &mut state, &config).await,
        ScanReport::default()
    );
    assert_eq!(state.tracked(), 0);
    std::fs::OpenOptions::new()
        .append(true)
        .open(&partial)
        .unwrap()
        .write_all(&bytes[bytes.len() / 2..])
        .unwrap();
    let done = tmp.path().join("c.nc");
    std::fs::rename(&partial, &done).unwrap();
    let r = scan_until(&store, &mut state, &config, Duration::from_secs(5), |r| {
        !r.loaded.is_empty()
    })
    .await;
    assert_eq!(r.loaded, [done]);
    assert!(store.find("c.nc").is_some());
    assert!(store.snapshot().failures.is_empty());
}

#[tokio::test]
async fn the_watch_loop_serves_new_files_and_stops_on_shutdown() {
    let tmp = tempfile::tempdir().unwrap();
    let store = Arc::new(CycleStore::new(StoreConfig::default()));
    let mut changes = store.on_change();
    let (stop, shutdown) = tokio::sync::watch::channel(false);
    let task = tokio::spawn(watch(
        Arc::clone(&store),
        quick(tmp.path()),
        IngestConfig::default(),
        ComputeConfig::default(),
        shutdown,
    ));
    FixtureSpec::default().write(&tmp.path().join("live.nc"));
    tokio::time::timeout(Duration::from_secs(10), async {
        while store.snapshot().cycles.is_empty() {
            changes.changed().await.unwrap();
        }
    })
    .await
    .expect("the watch loop loaded the new file");
    assert_eq!(store.find("").unwrap().id, "live.nc");
    stop.send(true).unwrap();
    tokio::time::timeout(Duration::from_secs(2), task)
        .await
        .expect("the watch loop stopped")
        .unwrap();
}
