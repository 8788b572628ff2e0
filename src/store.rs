//! The cycles being served. Readers take a [`Snapshot`] and keep it for the whole request;
//! writers build a new snapshot and swap it in, so a reader never sees a half-updated state.
//!
//! Cycles are ordered newest reference time first; beyond [`StoreConfig::keep_newest`] cycles
//! or [`StoreConfig::memory_budget_bytes`], the oldest reference times are evicted first and
//! every eviction is recorded with its reason. Files that failed to load are listed with
//! their error until a good load of the same file (or its removal) clears them.

use std::cmp::Ordering;
use std::path::{Path, PathBuf};
use std::sync::{Arc, Mutex, PoisonError, RwLock};
use std::time::SystemTime;

use crate::ingest::time::parse_date_time;
use crate::query::LoadedCycle;

/// How many evictions a snapshot remembers.
const EVICTIONS_KEPT: usize = 32;

/// Limits of the store.
#[derive(Clone, Copy, Debug)]
pub struct StoreConfig {
    /// Most cycles kept (the newest reference times win).
    pub keep_newest: usize,
    /// Most bytes the cycles' fields may hold together. The newest cycle is always kept, even
    /// when it alone exceeds the budget, so that the service has something to serve.
    pub memory_budget_bytes: usize,
}

impl Default for StoreConfig {
    fn default() -> Self {
        Self {
            keep_newest: 8,
            memory_budget_bytes: 8 * 1024 * 1024 * 1024,
        }
    }
}

/// A file that could not be loaded.
#[derive(Clone, Debug, PartialEq)]
pub struct LoadFailure {
    /// The file (or the data folder, when the folder itself cannot be read).
    pub path: PathBuf,
    /// The error, one line.
    pub error: String,
    /// When it was recorded.
    pub at: SystemTime,
}

/// A cycle that stopped being served.
#[derive(Clone, Debug, PartialEq)]
pub struct Eviction {
    /// The cycle's id (its file name).
    pub id: String,
    /// Why, in one sentence.
    pub reason: String,
    /// When.
    pub at: SystemTime,
}

/// One consistent state of the store.
#[derive(Debug, Default)]
pub struct Snapshot {
    /// Cycles served, newest reference time first (cycles without one last, newest load first
    /// among equals).
    pub cycles: Vec<Arc<LoadedCycle>>,
    /// Files that failed to load, in path order.
    pub failures: Vec<LoadFailure>,
    /// The most recent evictions (at most 32), most recent first.
    pub evictions: Vec<Eviction>,
    /// Incremented by every change.
    pub generation: u64,
}

impl Snapshot {
    /// The cycle with this id; `""` means the newest.
    pub fn find(&self, id: &str) -> Option<Arc<LoadedCycle>> {
        if id.is_empty() {
            self.cycles.first().cloned()
        } else {
            self.cycles.iter().find(|c| c.id == id).cloned()
        }
    }

    /// Bytes held by the cycles served.
    pub fn bytes(&self) -> usize {
        self.cycles.iter().map(|c| c.bytes).sum()
    }
}

/// What the store held when a file's read began, for deciding whether the file need not be
/// read once its reference time and size are known ([`CycleStore::pass_over_test`]). The
/// folder watcher, the store's writer, reads one file at a time, so the store does not
/// change under it; [`CycleStore::insert`] decides again whatever this lets through.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct PassOver {
    id: String,
    oldest_held: i64,
    cycles_held: usize,
    bytes_held: usize,
    keep_newest: usize,
    budget: usize,
}

impl PassOver {
    /// Why a file whose cycle has this reference time need not be read, when
    /// [`CycleStore::insert`] would evict it at once: its reference time is earlier than
    /// every cycle held, and either the store holds `keep_newest` cycles or the cycles held
    /// and the new one's `least_bytes` (a lower bound of its [`LoadedCycle::bytes`]) exceed
    /// the memory budget. `None` (read it) otherwise, and for a cycle without a reference
    /// time.
    pub fn passes(&self, reference_time: Option<&str>, least_bytes: usize) -> Option<String> {
        let reference = reference_time.and_then(parse_date_time)?;
        if reference >= self.oldest_held {
            return None;
        }
        let file = format!(
            "'{}' ({}) was not read",
            self.id,
            reference_time.unwrap_or_default()
        );
        let keep = self.keep_newest;
        if self.cycles_held >= keep {
            return Some(format!(
                "{file}: only the newest {keep} cycles are kept and it is older than those"
            ));
        }
        let (held, budget) = (self.bytes_held, self.budget);
        (held.saturating_add(least_bytes) > budget).then(|| {
            format!(
                "{file}: the cycles held {held} bytes and it needs at least {least_bytes} more, \
                 over the memory budget of {budget} bytes, and it is older than those"
            )
        })
    }
}

/// The cycles being served, shared between the folder watcher (writer) and requests (readers).
#[derive(Debug)]
pub struct CycleStore {
    config: StoreConfig,
    current: RwLock<Arc<Snapshot>>,
    /// Serialises writers, so that two updates never start from the same snapshot.
    writer: Mutex<()>,
    changes: tokio::sync::watch::Sender<u64>,
}

/// The id of the cycle a file holds: its file name (the whole path where it has none).
pub fn cycle_id(path: &Path) -> String {
    path.file_name()
        .map(|n| n.to_string_lossy().into_owned())
        .unwrap_or_else(|| path.display().to_string())
}

/// Newest reference time first; no reference time last; then the newest load first.
fn newest_first(a: &LoadedCycle, b: &LoadedCycle) -> Ordering {
    match (a.reference_time_unix_s(), b.reference_time_unix_s()) {
        (Some(x), Some(y)) => y.cmp(&x),
        (Some(_), None) => Ordering::Less,
        (None, Some(_)) => Ordering::Greater,
        (None, None) => Ordering::Equal,
    }
    .then_with(|| b.loaded_at.cmp(&a.loaded_at))
    .then_with(|| a.id.cmp(&b.id))
}

/// The reference time (Unix seconds) of the oldest cycle `s` holds, when it holds one with a
/// reference time and none came from `path`.
fn oldest_held(s: &Snapshot, path: &Path) -> Option<i64> {
    if s.cycles.iter().any(|c| c.path == path) {
        return None;
    }
    s.cycles.last()?.reference_time_unix_s()
}

fn reference_label(c: &LoadedCycle) -> String {
    c.cycle
        .reference_time
        .clone()
        .unwrap_or_else(|| "no reference time".to_string())
}

impl CycleStore {
    /// An empty store.
    pub fn new(config: StoreConfig) -> Self {
        let (changes, _) = tokio::sync::watch::channel(0);
        Self {
            config,
            current: RwLock::new(Arc::new(Snapshot::default())),
            writer: Mutex::new(()),
            changes,
        }
    }

    /// The limits the store keeps to.
    pub fn config(&self) -> &StoreConfig {
        &self.config
    }

    /// The current state; cheap. A request holds one snapshot for its whole life, so it
    /// never sees a half-updated state.
    pub fn snapshot(&self) -> Arc<Snapshot> {
        Arc::clone(&self.current.read().unwrap_or_else(PoisonError::into_inner))
    }

    /// Applies `change` to a copy of the current snapshot and swaps it in when `change`
    /// reports that it changed something.
    fn update(&self, change: impl FnOnce(&mut Snapshot) -> bool) {
        let _writer = self.writer.lock().unwrap_or_else(PoisonError::into_inner);
        let old = self.snapshot();
        let mut next = Snapshot {
            cycles: old.cycles.clone(),
            failures: old.failures.clone(),
            evictions: old.evictions.clone(),
            generation: old.generation,
        };
        if !change(&mut next) {
            return;
        }
        next.generation = old.generation + 1;
        next.evictions.truncate(EVICTIONS_KEPT);
        let generation = next.generation;
        *self.current.write().unwrap_or_else(PoisonError::into_inner) = Arc::new(next);
        self.changes.send_replace(generation);
    }

    /// Adds a cycle, replacing one with the same id; clears a failure recorded for its path;
    /// then evicts beyond `keep_newest` cycles or the memory budget, oldest reference time
    /// first, noting why.
    pub fn insert(&self, cycle: LoadedCycle) -> Arc<LoadedCycle> {
        let config = self.config;
        let cycle = Arc::new(cycle);
        let inserted = Arc::clone(&cycle);
        self.update(|s| {
            s.cycles.retain(|c| c.id != cycle.id);
            s.failures.retain(|f| f.path != cycle.path);
            s.cycles.push(Arc::clone(&cycle));
            s.cycles.sort_by(|a, b| newest_first(a, b));
            let now = SystemTime::now();
            let mut evicted = Vec::new();
            while s.cycles.len() > config.keep_newest.max(1) {
                let Some(old) = s.cycles.pop() else { break };
                evicted.push(Eviction {
                    id: old.id.clone(),
                    reason: format!(
                        "only the newest {} cycles are kept and '{}' ({}) is older than those",
                        config.keep_newest.max(1),
                        old.id,
                        reference_label(&old)
                    ),
                    at: now,
                });
            }
            while s.cycles.len() > 1 && s.bytes() > config.memory_budget_bytes {
                let total = s.bytes();
                let Some(old) = s.cycles.pop() else { break };
                evicted.push(Eviction {
                    id: old.id.clone(),
                    reason: format!(
                        "the cycles held {total} bytes, over the memory budget of {} bytes, and '{}' ({}) is the oldest",
                        config.memory_budget_bytes,
                        old.id,
                        reference_label(&old)
                    ),
                    at: now,
                });
            }
            // Most recent first: the last eviction of this insert leads.
            for e in evicted {
                s.evictions.insert(0, e);
            }
            true
        });
        inserted
    }

    /// What decides whether the file at `path` need not be read ([`PassOver::passes`]), taken
    /// now, to put the file's reference time and size to once its read has learnt them
    /// ([`LoadedCycle::read_unless_passed_over`]); `None` where no file could be passed over
    /// (nothing held, a cycle from that file held, or the oldest held without a reference
    /// time), so that the read need not ask.
    pub fn pass_over_test(&self, path: &Path) -> Option<PassOver> {
        let s = self.snapshot();
        Some(PassOver {
            id: cycle_id(path),
            oldest_held: oldest_held(&s, path)?,
            cycles_held: s.cycles.len(),
            bytes_held: s.bytes(),
            keep_newest: self.config.keep_newest.max(1),
            budget: self.config.memory_budget_bytes,
        })
    }

    /// Records a file passed over unread ([`PassOver::passes`]) as an eviction of its cycle,
    /// so that the catalogue says why it is not served; clears a failure recorded for it.
    pub fn record_passed_over(&self, path: &Path, reason: String) {
        let id = cycle_id(path);
        self.update(|s| {
            s.failures.retain(|f| f.path != path);
            s.evictions.insert(
                0,
                Eviction {
                    id,
                    reason,
                    at: SystemTime::now(),
                },
            );
            true
        });
    }

    /// Records that a file failed to load (replacing an earlier failure of the same path).
    /// The cycles already served are untouched, including one loaded earlier from the same
    /// file.
    pub fn record_failure(&self, path: &Path, error: String) {
        self.update(|s| {
            if let Some(f) = s.failures.iter().find(|f| f.path == path) {
                if f.error == error {
                    return false;
                }
            }
            s.failures.retain(|f| f.path != path);
            s.failures.push(LoadFailure {
                path: path.to_path_buf(),
                error,
                at: SystemTime::now(),
            });
            s.failures.sort_by(|a, b| a.path.cmp(&b.path));
            true
        });
    }

    /// Forgets a file deleted from the data folder: its cycle stops being served (recorded as
    /// an eviction) and its failure is cleared.
    pub fn remove_path(&self, path: &Path) {
        self.update(|s| {
            let before = (s.cycles.len(), s.failures.len());
            let now = SystemTime::now();
            let mut evicted = Vec::new();
            s.cycles.retain(|c| {
                let keep = c.path != path;
                if !keep {
                    evicted.push(Eviction {
                        id: c.id.clone(),
                        reason: format!("'{}' was removed from the data folder", path.display()),
                        at: now,
                    });
                }
                keep
            });
            s.failures.retain(|f| f.path != path);
            for e in evicted {
                s.evictions.insert(0, e);
            }
            before != (s.cycles.len(), s.failures.len())
        });
    }

    /// The cycle with this id in the current snapshot; `""` means the newest.
    pub fn find(&self, id: &str) -> Option<Arc<LoadedCycle>> {
        self.snapshot().find(id)
    }

    /// Follows the generation, e.g. so that health can report serving once a cycle is loaded.
    pub fn on_change(&self) -> tokio::sync::watch::Receiver<u64> {
        self.changes.subscribe()
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::compute::ComputeConfig;
    use crate::model::{Cycle, Grid, Vertical};
    use crate::physics::Constants;
    use ndarray::Array5;
    use proptest::prelude::*;

    /// Why `store` would pass the file at `path` over, as the watcher asks it.
    fn passes_over(
        store: &CycleStore,
        path: &Path,
        reference_time: Option<&str>,
        least_bytes: usize,
    ) -> Option<String> {
        store
            .pass_over_test(path)?
            .passes(reference_time, least_bytes)
    }

    fn tiny(id: &str, reference: Option<&str>, nlat: usize) -> LoadedCycle {
        // An invented two-level isothermal column on a tiny grid, only to exercise the store.
        let cycle = Cycle {
            source: PathBuf::from(format!("/data/{id}")),
            reference_time: reference.map(str::to_string),
            lead_times_s: vec![0],
            members: 1,
            grid: Grid {
                latitudes: (0..nlat).map(|i| i as f64).collect(),
                longitudes: vec![0.0, 1.0],
            },
            vertical: Vertical::Isobaric {
                pressure_pa: vec![100_000.0, 50_000.0],
            },
            levels_top_down_in_file: false,
            temperature: Array5::from_elem((1, 1, 2, nlat, 2), 250.0),
            humidity: None,
            surface: None,
            file_heights: None,
            constants: Constants::default(),
            variables: Vec::new(),
            notes: Vec::new(),
        };
        LoadedCycle::computed(id, cycle, &ComputeConfig::default()).unwrap()
    }

    #[test]
    fn cycles_are_ordered_newest_first_and_found_by_id() {
        let store = CycleStore::new(StoreConfig::default());
        store.insert(tiny("a.nc", Some("2030-01-01T00:00:00Z"), 2));
        store.insert(tiny("c.nc", None, 2));
        store.insert(tiny("b.nc", Some("2030-01-02T00:00:00Z"), 2));
        let s = store.snapshot();
        let ids: Vec<&str> = s.cycles.iter().map(|c| c.id.as_str()).collect();
        assert_eq!(ids, ["b.nc", "a.nc", "c.nc"]);
        assert_eq!(store.find("").unwrap().id, "b.nc");
        assert_eq!(store.find("a.nc").unwrap().id, "a.nc");
        assert!(store.find("missing.nc").is_none());
        assert_eq!(s.generation, 3);
    }

    #[test]
    fn a_file_older_than_a_full_store_is_passed_over_and_recorded() {
        let store = CycleStore::new(StoreConfig {
            keep_newest: 2,
            ..StoreConfig::default()
        });
        let old = Path::new("/data/old.nc");
        let day = |d: u32| format!("2030-01-{d:02}T00:00:00Z");
        store.insert(tiny("a.nc", Some(&day(3)), 2));
        assert_eq!(
            passes_over(&store, old, Some(&day(1)), 0),
            None,
            "room left"
        );
        store.insert(tiny("b.nc", Some(&day(2)), 2));
        let reason = passes_over(&store, old, Some(&day(1)), 0)
            .expect("full, and older than the oldest kept");
        assert!(
            reason.starts_with("'old.nc' (2030-01-01T00:00:00Z) was not read")
                && reason.contains("newest 2"),
            "{reason}"
        );
        // The oldest kept cycle's own time (the newer load would be kept), a later one, none.
        for read in [Some(day(2)), Some(day(5)), None] {
            assert_eq!(
                passes_over(&store, old, read.as_deref(), 0),
                None,
                "{read:?}"
            );
        }
        // A new version of a served cycle's file is read whatever its time.
        assert_eq!(
            passes_over(&store, Path::new("/data/b.nc"), Some(&day(1)), 0),
            None
        );
        store.record_failure(old, "bad".into());
        store.record_passed_over(old, reason.clone());
        let s = store.snapshot();
        assert!(s.failures.is_empty(), "{:?}", s.failures);
        assert_eq!(
            (s.evictions[0].id.as_str(), &s.evictions[0].reason),
            ("old.nc", &reason)
        );
        let ids: Vec<&str> = s.cycles.iter().map(|c| c.id.as_str()).collect();
        assert_eq!(ids, ["a.nc", "b.nc"]);
        // A full store whose oldest cycle has no reference time: a file with one sorts
        // before it, so it is read.
        let store = CycleStore::new(StoreConfig {
            keep_newest: 1,
            ..StoreConfig::default()
        });
        store.insert(tiny("c.nc", None, 2));
        assert_eq!(passes_over(&store, old, Some(&day(1)), 0), None);
    }

    /// Below `keep_newest`, a file older than every cycle held is passed over when the
    /// cycles held and its least size exceed the memory budget, where [`CycleStore::insert`]
    /// would evict it at once; not when it fits, nor when it is not the oldest.
    #[test]
    fn a_file_older_than_the_cycles_held_is_passed_over_beyond_the_memory_budget() {
        let bytes = tiny("x.nc", None, 2).bytes;
        // The lower bound the watcher gives is exact for a cycle of temperature alone.
        let point_levels = tiny("x.nc", None, 2).cycle.temperature.len();
        assert_eq!(crate::query::least_held_bytes(point_levels), bytes);
        let store = CycleStore::new(StoreConfig {
            keep_newest: 8,
            memory_budget_bytes: 2 * bytes + bytes / 2,
        });
        let old = Path::new("/data/old.nc");
        let day = |d: u32| format!("2030-01-{d:02}T00:00:00Z");
        assert!(store.pass_over_test(old).is_none(), "nothing held");
        store.insert(tiny("a.nc", Some(&day(3)), 2));
        store.insert(tiny("b.nc", Some(&day(2)), 2));
        assert!(store.pass_over_test(old).is_some());
        assert_eq!(
            passes_over(&store, old, Some(&day(1)), bytes / 2),
            None,
            "fits"
        );
        let reason = passes_over(&store, old, Some(&day(1)), bytes)
            .expect("over the budget, and older than the cycles held");
        assert!(
            reason.starts_with("'old.nc' (2030-01-01T00:00:00Z) was not read")
                && reason.contains(&format!("the cycles held {} bytes", 2 * bytes))
                && reason.contains(&format!("memory budget of {} bytes", 2 * bytes + bytes / 2)),
            "{reason}"
        );
        // Not the oldest (the oldest held's own time, a later one), or no reference time.
        for read in [Some(day(2)), Some(day(5)), None] {
            assert_eq!(
                passes_over(&store, old, read.as_deref(), bytes),
                None,
                "{read:?}"
            );
        }
        // What the store does with such a cycle once read: it is evicted at once.
        store.insert(tiny("old.nc", Some(&day(1)), 2));
        let s = store.snapshot();
        let ids: Vec<&str> = s.cycles.iter().map(|c| c.id.as_str()).collect();
        assert_eq!(ids, ["a.nc", "b.nc"]);
        assert!(
            s.evictions[0].reason.contains("memory budget"),
            "{:?}",
            s.evictions
        );
    }

    #[test]
    fn an_unchanged_failure_does_not_bump_the_generation() {
        let store = CycleStore::new(StoreConfig::default());
        store.record_failure(Path::new("/data/x.nc"), "bad".into());
        store.record_failure(Path::new("/data/x.nc"), "bad".into());
        assert_eq!(store.snapshot().generation, 1);
        store.remove_path(Path::new("/data/nothing.nc"));
        assert_eq!(store.snapshot().generation, 1);
    }

    proptest! {
        #![proptest_config(ProptestConfig::with_cases(32))]
        #[test]
        fn whatever_the_arrival_order_the_newest_are_kept_in_order(
            days in proptest::sample::subsequence((1u32..=28).collect::<Vec<_>>(), 1..12)
                .prop_shuffle(),
            keep in 1usize..5,
        ) {
            let store = CycleStore::new(StoreConfig { keep_newest: keep, ..StoreConfig::default() });
            for d in &days {
                store.insert(tiny(&format!("{d:02}.nc"), Some(&format!("2030-02-{d:02}T00:00:00Z")), 2));
            }
            let mut newest = days.clone();
            newest.sort_unstable_by(|a, b| b.cmp(a));
            newest.truncate(keep);
            let kept: Vec<String> = store.snapshot().cycles.iter().map(|c| c.id.clone()).collect();
            let expected: Vec<String> = newest.iter().map(|d| format!("{d:02}.nc")).collect();
            prop_assert_eq!(kept, expected);
            let s = store.snapshot();
            prop_assert_eq!(s.evictions.len(), days.len().saturating_sub(keep).min(32));
        }
    }
}
