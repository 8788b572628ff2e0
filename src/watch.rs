//! The data folder: finds cycle files, loads them once they are complete, and keeps the
//! [`CycleStore`] in step with the folder.
//!
//! # Naming convention
//! - Files whose names end in `.nc`, `.nc4` or `.netcdf` (any case) are cycles.
//! - Names starting with `.` or ending in `.partial` or `.tmp` are ignored, so a producer can
//!   write `cycle.nc.partial` (or `.cycle.nc`) and rename it to `cycle.nc` when it is
//!   complete: a rename is atomic, so the cycle is never seen half-written.
//! - Any other cycle file is read only once it is stable: its size and modification time
//!   unchanged for [`WatchConfig::settle`] (either observed across scans, or a modification
//!   time at least that old when the file is first seen, as for a file renamed into place
//!   or present at start-up). A file that is still changing after
//!   [`WatchConfig::max_wait_for_growth`] is reported as a failure, and loaded if it settles
//!   later.
//! - A file that changes after it was loaded is loaded again once it settles, replacing the
//!   cycle of the same name; a file deleted from the folder stops being served.
//!
//! # Order
//! Stable files are read one at a time, the newest modification time first, and the folder
//! is listed again after each: a cycle delivered while a backlog is read (at start-up, after
//! an outage) is served before the older files. A file whose cycle is older than all those
//! served is not read where loading it would evict it at once, beyond `keep_newest` cycles
//! or the memory budget ([`crate::store::PassOver::passes`]): its read stops after the
//! metadata.
//!
//! A file that fails to load is recorded in the store with its error and not retried until it
//! changes; the cycles already served are untouched, and nothing here ends the process.

use std::collections::{HashMap, HashSet};
use std::path::{Path, PathBuf};
use std::sync::Arc;
use std::time::{Duration, Instant, SystemTime};

use crate::compute::ComputeConfig;
use crate::ingest::{IngestConfig, IngestError};
use crate::query::{LoadError, LoadedCycle};
use crate::store::CycleStore;

/// Settings of the folder watcher.
#[derive(Clone, Debug)]
pub struct WatchConfig {
    /// The data folder.
    pub dir: PathBuf,
    /// Time between two scans.
    pub poll_interval: Duration,
    /// How long a file's size and modification time must stay unchanged before it is read.
    pub settle: Duration,
    /// A file still changing after this long is reported as a failure (and loaded later if
    /// it settles).
    pub max_wait_for_growth: Duration,
}

impl WatchConfig {
    /// Watches `dir` with the default timings: a scan every second, files read once stable
    /// for 2 s, a failure reported for a file still growing after 10 minutes.
    pub fn new(dir: impl Into<PathBuf>) -> Self {
        Self {
            dir: dir.into(),
            poll_interval: Duration::from_secs(1),
            settle: Duration::from_secs(2),
            max_wait_for_growth: Duration::from_secs(600),
        }
    }
}

/// True when a path names a cycle file by the folder's naming convention (see the module
/// documentation): `.nc`, `.nc4` or `.netcdf`, not hidden, not `.partial` or `.tmp`.
pub fn is_candidate(path: &Path) -> bool {
    let Some(name) = path.file_name().and_then(|n| n.to_str()) else {
        return false;
    };
    let lower = name.to_ascii_lowercase();
    if lower.starts_with('.') || lower.ends_with(".partial") || lower.ends_with(".tmp") {
        return false;
    }
    [".nc", ".nc4", ".netcdf"]
        .iter()
        .any(|ext| lower.len() > ext.len() && lower.ends_with(ext))
}

/// Where a tracked file stands.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
enum Status {
    /// Seen, not yet stable (or changed since it was loaded).
    Waiting,
    /// Loaded into the store with this fingerprint.
    Loaded,
    /// Failed to load with this fingerprint; not retried until the file changes.
    Failed,
}

/// Size and modification time: what must stay unchanged for a file to count as complete.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
struct Fingerprint {
    size: u64,
    modified: Option<SystemTime>,
}

#[derive(Clone, Debug)]
struct Tracked {
    fingerprint: Fingerprint,
    /// When the fingerprint was last seen to change (or first seen).
    changed_at: Instant,
    /// When the file started waiting to be loaded.
    waiting_since: Instant,
    status: Status,
    /// Whether the "still growing" failure has been recorded for this wait.
    growth_reported: bool,
    /// Whether this wait has logged the file as locked by its writer (at INFO once; the
    /// retries after it at DEBUG, so that a producer holding a file for an hour does not
    /// fill the log with a line per settle time).
    lock_logged: bool,
    /// Whether this version of the file had a modification time at least the settle time
    /// old when first seen: stable from the start (a file renamed into place, or there at
    /// start-up).
    old_when_seen: bool,
}

impl Tracked {
    /// The file is still being written (changed during its read, or held by its writer):
    /// it waits from now to settle again, as a file seen changing.
    fn settle_again(&mut self) {
        self.changed_at = Instant::now();
        self.old_when_seen = false;
    }
}

/// What the watcher remembers between scans.
#[derive(Debug, Default)]
pub struct WatchState {
    files: HashMap<PathBuf, Tracked>,
    folder_failed: bool,
}

impl WatchState {
    /// Nothing seen yet.
    pub fn new() -> Self {
        Self::default()
    }

    /// Number of cycle files being tracked (waiting, loaded or failed).
    pub fn tracked(&self) -> usize {
        self.files.len()
    }
}

/// What one scan did, for tests and logs. `loaded`, `failed` and `passed_over` are in the
/// order the files were taken (newest modification time first); the other lists in name
/// order.
#[derive(Clone, Debug, Default, PartialEq)]
pub struct ScanReport {
    /// Files loaded (new, or changed since their last load).
    pub loaded: Vec<PathBuf>,
    /// Files that failed to load, with the error.
    pub failed: Vec<(PathBuf, String)>,
    /// Files not read because their cycle is older than every cycle served and would be
    /// evicted at once, beyond `keep_newest` or the memory budget (recorded in the store as
    /// evictions).
    pub passed_over: Vec<PathBuf>,
    /// Files seen but not yet stable.
    pub waiting: Vec<PathBuf>,
    /// Files reported in this scan as still changing after the longest wait.
    pub still_growing: Vec<PathBuf>,
    /// Files gone from the folder since the last scan.
    pub removed: Vec<PathBuf>,
    /// Why the folder could not be listed, when it could not.
    pub folder_error: Option<String>,
}

fn fingerprint(meta: &std::fs::Metadata) -> Fingerprint {
    Fingerprint {
        size: meta.len(),
        modified: meta.modified().ok(),
    }
}

/// Lists the cycle files of the folder with their fingerprints, in name order.
fn list_folder(dir: &Path) -> std::io::Result<Vec<(PathBuf, Fingerprint)>> {
    let mut out = Vec::new();
    for entry in std::fs::read_dir(dir)? {
        let path = entry?.path();
        if !is_candidate(&path) {
            continue;
        }
        // A file deleted between the listing and here is simply not there this time.
        match std::fs::metadata(&path) {
            Ok(meta) if meta.is_file() => out.push((path, fingerprint(&meta))),
            _ => continue,
        }
    }
    out.sort_by(|a, b| a.0.cmp(&b.0));
    Ok(out)
}

/// One pass over the folder: lists it, loads new or changed files that are stable (in
/// `spawn_blocking`, one at a time, the newest modification time first, listing the folder
/// again after each so that a file arriving or settling meanwhile takes its place in that
/// order), records failures, and drops files that were deleted. Once the process is stopping
/// ([`crate::netcdf_session::stop_reads`]) no further file is read: those left are reported
/// as waiting.
///
/// An unreadable folder is recorded in the store as a failure of the folder's path (cleared
/// once it can be read again); the cycles already served stay.
pub async fn scan_once(
    store: &CycleStore,
    state: &mut WatchState,
    config: &WatchConfig,
    ingest: &IngestConfig,
    compute: &ComputeConfig,
) -> ScanReport {
    let mut report = ScanReport::default();
    let mut listing = match list(config).await {
        Ok(l) => l,
        Err(message) => {
            store.record_failure(&config.dir, message.clone());
            state.folder_failed = true;
            report.folder_error = Some(message);
            return report;
        }
    };
    if state.folder_failed {
        store.remove_path(&config.dir);
        state.folder_failed = false;
    }

    // One file at a time, the newest ready one first, so that after an outage or at
    // start-up the cycle forecasters want is served before the backlog behind it. The folder
    // is listed again after each file: one that arrived or settled meanwhile is weighed with
    // the rest, rather than waiting for the whole backlog (minutes, with big cycles).
    let mut taken: HashSet<PathBuf> = HashSet::new();
    loop {
        let (ready, waiting) = survey(store, state, config, &listing, &mut report);
        report.waiting = waiting;
        // A file taken in this scan and still waiting (stopped, or written to while read)
        // waits for the next.
        let (again, mut ready): (Vec<_>, Vec<_>) =
            ready.into_iter().partition(|(p, _)| taken.contains(p));
        report.waiting.extend(again.into_iter().map(|(p, _)| p));
        sort_newest_first(&mut ready);
        let Some((path, _)) = ready.first().cloned() else {
            break;
        };
        if crate::netcdf_session::reads_stopped() {
            // The process is stopping: what is left is read at the next start.
            report.waiting.extend(ready.into_iter().map(|(p, _)| p));
            break;
        }
        taken.insert(path.clone());
        let Some(tracked) = state.files.get_mut(&path) else {
            break;
        };
        if load_one(store, tracked, &path, ingest, compute, &mut report).await == Taken::PassedOver
        {
            // A millisecond's work: no new listing after it (an archive of thousands of files
            // would otherwise be listed once per file).
            continue;
        }
        match list(config).await {
            Ok(l) => listing = l,
            // The next scan reports it; the files not yet read wait for it.
            Err(_) => break,
        }
    }
    report.waiting.sort();
    report.waiting.dedup();

    let present: HashSet<&PathBuf> = listing.iter().map(|(p, _)| p).collect();
    let mut gone: Vec<PathBuf> = state
        .files
        .keys()
        .filter(|p| !present.contains(p))
        .cloned()
        .collect();
    gone.sort();
    for path in gone {
        state.files.remove(&path);
        store.remove_path(&path);
        tracing::info!(file = %path.display(), "cycle file removed from the data folder");
        report.removed.push(path);
    }
    report
}

/// The folder's cycle files with their fingerprints ([`list_folder`], off the runtime), or
/// the sentence that says why it cannot be listed.
async fn list(config: &WatchConfig) -> Result<Vec<(PathBuf, Fingerprint)>, String> {
    let dir = config.dir.clone();
    tokio::task::spawn_blocking(move || list_folder(&dir))
        .await
        .unwrap_or_else(|e| Err(std::io::Error::other(e.to_string())))
        .map_err(|e| {
            format!(
                "cannot list the data folder '{}': {e}",
                config.dir.display()
            )
        })
}

/// Brings the tracked files up to date with `listing` and sorts out those waiting to be
/// loaded: the ones stable now (unchanged for the settle time, or first seen with a
/// modification time at least that old), and the ones still waiting (in name order). A file
/// still changing after the longest wait is reported once, here.
#[allow(clippy::type_complexity)]
fn survey(
    store: &CycleStore,
    state: &mut WatchState,
    config: &WatchConfig,
    listing: &[(PathBuf, Fingerprint)],
    report: &mut ScanReport,
) -> (Vec<(PathBuf, Fingerprint)>, Vec<PathBuf>) {
    let now = Instant::now();
    let wall_now = SystemTime::now();
    let (mut ready, mut waiting) = (Vec::new(), Vec::new());
    for (path, fp) in listing {
        let old = fp
            .modified
            .and_then(|m| wall_now.duration_since(m).ok())
            .is_some_and(|age| age >= config.settle);
        let tracked = state.files.entry(path.clone()).or_insert_with(|| Tracked {
            fingerprint: *fp,
            changed_at: now,
            waiting_since: now,
            status: Status::Waiting,
            growth_reported: false,
            lock_logged: false,
            old_when_seen: old,
        });
        if tracked.fingerprint != *fp {
            tracked.fingerprint = *fp;
            tracked.changed_at = now;
            tracked.old_when_seen = old;
            if tracked.status != Status::Waiting {
                tracked.status = Status::Waiting;
                tracked.waiting_since = now;
                tracked.growth_reported = false;
                tracked.lock_logged = false;
            }
        }
        if tracked.status != Status::Waiting {
            continue;
        }
        let unchanged_for = now.duration_since(tracked.changed_at);
        if unchanged_for >= config.settle || tracked.old_when_seen {
            ready.push((path.clone(), *fp));
        } else if now.duration_since(tracked.waiting_since) >= config.max_wait_for_growth
            && !tracked.growth_reported
        {
            let message = format!(
                "'{}' was still being written after {} s: it will be loaded once its size and modification time stay unchanged for {} s and no process holds it locked for writing",
                path.display(),
                config.max_wait_for_growth.as_secs_f64(),
                config.settle.as_secs_f64()
            );
            store.record_failure(path, message);
            tracked.growth_reported = true;
            report.still_growing.push(path.clone());
        } else {
            waiting.push(path.clone());
        }
    }
    (ready, waiting)
}

/// Orders files ready to load newest modification time first; files of the same time (or
/// without one) in reverse name order, which for the usual date-stamped names is newest
/// first too.
fn sort_newest_first(files: &mut [(PathBuf, Fingerprint)]) {
    files.sort_by(|a, b| b.1.modified.cmp(&a.1.modified).then_with(|| b.0.cmp(&a.0)));
}

/// What [`load_one`] did with a file.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
enum Taken {
    /// Read (loaded, failed or left waiting).
    Read,
    /// Passed over after its metadata: its cycle would be evicted at once.
    PassedOver,
}

/// Why [`load_one`]'s read gave no cycle.
enum LoadFailure {
    /// The store's reason for passing the file over.
    PassedOver(String),
    /// Locked by a process that has it open for writing: the error, as reported.
    Locked(String),
    /// The error, as reported.
    Error(String),
}

/// Loads one stable file into the store (or records why not).
///
/// A file whose cycle is older than all those served is passed over where loading it would
/// evict it at once, beyond `keep_newest` cycles or the memory budget
/// ([`CycleStore::pass_over_test`]): the read asks once it knows the cycle's reference time
/// and size, before any field. As if loaded and evicted at once, it is read again only once
/// the file changes. A file whose metadata cannot be read is not passed over: its load
/// reports the error.
async fn load_one(
    store: &CycleStore,
    tracked: &mut Tracked,
    path: &Path,
    ingest: &IngestConfig,
    compute: &ComputeConfig,
    report: &mut ScanReport,
) -> Taken {
    let (p, i, c) = (path.to_path_buf(), ingest.clone(), compute.clone());
    let pass_over = store.pass_over_test(path);
    let loaded = tokio::task::spawn_blocking(move || {
        // Read and checked: servable now; the heights of its last step(s) follow below.
        let result = LoadedCycle::read_unless_passed_over(&p, &i, &c, pass_over.as_ref()).map_err(
            |e| match e {
                LoadError::Ingest(IngestError::PassedOver { reason, .. }) => {
                    LoadFailure::PassedOver(reason)
                }
                LoadError::Ingest(e @ IngestError::Locked { .. }) => {
                    LoadFailure::Locked(e.to_string())
                }
                e => LoadFailure::Error(e.to_string()),
            },
        );
        // The fingerprint after the read: if it moved, the read may have seen a partial file.
        let after = std::fs::metadata(&p).ok().map(|m| fingerprint(&m));
        (result, after)
    })
    .await;
    let (result, after) = match loaded {
        Ok(r) => r,
        Err(e) => (
            Err(LoadFailure::Error(format!(
                "loading '{}' stopped: {e}",
                path.display()
            ))),
            None,
        ),
    };
    if after.is_some() && after != Some(tracked.fingerprint) {
        // Written to while being read: wait for it to settle again.
        if let Some(fp) = after {
            tracked.fingerprint = fp;
        }
        tracked.settle_again();
        report.waiting.push(path.to_path_buf());
        return Taken::Read;
    }
    match result {
        Err(LoadFailure::PassedOver(reason)) => {
            tracing::info!(file = %path.display(), %reason, "cycle file passed over");
            store.record_passed_over(path, reason);
            tracked.status = Status::Loaded;
            report.passed_over.push(path.to_path_buf());
            return Taken::PassedOver;
        }
        Ok(cycle) => {
            tracing::info!(
                file = %path.display(),
                load_seconds = cycle.load_seconds,
                bytes = cycle.bytes,
                "cycle loaded"
            );
            let served = store.insert(cycle);
            // Queries already see the cycle; those that need the heights of steps still
            // pending rebuild their columns or wait for them (crate::served). The watcher
            // waits too, so that two cycles are never computed at once.
            let finished = tokio::task::spawn_blocking(move || {
                let seconds = served.finish_heights();
                (served, seconds)
            })
            .await;
            match finished {
                Ok((served, seconds)) => tracing::info!(
                    file = %path.display(),
                    heights_seconds = seconds,
                    steps = served.heights.steps(),
                    steps_with_heights = served.heights.ready_steps(),
                    "cycle heights computed"
                ),
                Err(e) => tracing::error!(
                    file = %path.display(),
                    error = %e,
                    "computing the cycle's heights stopped; its steps still pending answer with an error"
                ),
            }
            tracked.status = Status::Loaded;
            report.loaded.push(path.to_path_buf());
        }
        Err(LoadFailure::Locked(error)) => {
            // Still being written by a process that holds it open: not at fault. It waits to
            // settle again, as a file that grows; one held longer than the wait for growth is
            // reported then.
            if tracked.lock_logged {
                tracing::debug!(file = %path.display(), "cycle file still locked by its writer");
            } else {
                tracing::info!(file = %path.display(), %error, "cycle file still locked by its writer");
                tracked.lock_logged = true;
            }
            tracked.settle_again();
            report.waiting.push(path.to_path_buf());
        }
        Err(LoadFailure::Error(error)) if crate::netcdf_session::reads_stopped() => {
            // The process is stopping: the file is not at fault, and is read at the next start.
            tracing::info!(file = %path.display(), %error, "cycle file not loaded: stopping");
            report.waiting.push(path.to_path_buf());
        }
        Err(LoadFailure::Error(error)) => {
            tracing::warn!(file = %path.display(), %error, "cycle file failed to load");
            store.record_failure(path, error.clone());
            tracked.status = Status::Failed;
            report.failed.push((path.to_path_buf(), error));
        }
    }
    Taken::Read
}

/// Scans the folder every `poll_interval` until `shutdown` turns true (or its sender is
/// dropped). Never returns early because of a file or the folder.
pub async fn watch(
    store: Arc<CycleStore>,
    config: WatchConfig,
    ingest: IngestConfig,
    compute: ComputeConfig,
    mut shutdown: tokio::sync::watch::Receiver<bool>,
) {
    let mut state = WatchState::new();
    loop {
        if *shutdown.borrow() {
            break;
        }
        let report = scan_once(&store, &mut state, &config, &ingest, &compute).await;
        if let Some(error) = &report.folder_error {
            tracing::warn!(%error, "data folder scan failed");
        }
        tokio::select! {
            _ = tokio::time::sleep(config.poll_interval) => {}
            changed = shutdown.changed() => {
                if changed.is_err() || *shutdown.borrow() {
                    break;
                }
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_naming_convention_picks_cycles_and_skips_work_in_progress() {
        for yes in [
            "a.nc",
            "B.NC",
            "gfs.t00z.nc4",
            "x.netcdf",
            "/data/run/2030.nc",
        ] {
            assert!(is_candidate(Path::new(yes)), "{yes}");
        }
        for no in [
            ".a.nc",
            "a.nc.partial",
            "a.nc.tmp",
            "a.txt",
            "nc",
            ".nc",
            "a.nc.bak",
            "/data/.hidden.nc",
        ] {
            assert!(!is_candidate(Path::new(no)), "{no}");
        }
    }

    #[tokio::test]
    async fn an_unreadable_folder_is_a_recorded_failure_cleared_when_it_returns() {
        let tmp = tempfile::tempdir().unwrap();
        let dir = tmp.path().join("later");
        let store = CycleStore::new(crate::store::StoreConfig::default());
        let mut state = WatchState::new();
        let config = WatchConfig::new(&dir);
        let (i, c) = (IngestConfig::default(), ComputeConfig::default());
        let report = scan_once(&store, &mut state, &config, &i, &c).await;
        assert!(report.folder_error.as_deref().unwrap().contains("later"));
        assert_eq!(store.snapshot().failures.len(), 1);
        std::fs::create_dir(&dir).unwrap();
        let report = scan_once(&store, &mut state, &config, &i, &c).await;
        assert_eq!(report.folder_error, None);
        assert!(store.snapshot().failures.is_empty());
    }
}
