//! A stopping process stops the reads of cycle files at their next step, or a variable
//! read whole at its next slab (`hypsogrid::netcdf_session::stop_reads`), so that
//! `hypsogrid serve` waits, before it exits, for one step of a file being read rather than
//! the whole file.
//!
//! In a test binary of its own: the request is process-wide and cannot be undone.

mod common;

use common::fixtures::FixtureSpec;
use hypsogrid::compute::{ComputeConfig, LoadError};
use hypsogrid::demo::write_demo_cycle;
use hypsogrid::ingest::{read_cycle, IngestConfig, IngestError};
use hypsogrid::query::LoadedCycle;
use hypsogrid::store::{CycleStore, StoreConfig};
use hypsogrid::watch::{scan_once, WatchConfig, WatchState};
use std::path::Path;
use std::time::{Duration, SystemTime};

#[test]
fn a_stopped_process_reads_no_step_of_a_cycle_file() {
    let dir = tempfile::tempdir().unwrap();
    let path = write_demo_cycle(dir.path()).expect("demo cycle");
    let read = || LoadedCycle::read(&path, &IngestConfig::default(), &ComputeConfig::default());
    // Before: the demo cycle reads, several steps of it.
    let loaded = read().expect("the demo cycle reads before the stop");
    assert!(loaded.heights.steps() > 1);
    drop(loaded);
    // Chunks of one level holding every time step: temperature and humidity are read whole
    // (a step at a time would decompress each chunk once a step), one level's slab at a time.
    let across = FixtureSpec {
        time_steps: Some(3),
        chunks_across_steps: true,
        ..FixtureSpec::default()
    };
    let across = across.write(&dir.path().join("across.nc"));
    let ingest = IngestConfig::default();
    read_cycle(&across, &ingest).expect("the chunked fixture reads before the stop");

    hypsogrid::netcdf_session::stop_reads();
    assert!(hypsogrid::netcdf_session::reads_stopped());
    match read() {
        Err(LoadError::Ingest(IngestError::Stopped { file, member, time })) => {
            assert_eq!(file, path.display().to_string());
            assert_eq!((member, time), (0, 0));
        }
        Err(other) => panic!("another error than a stop: {other}"),
        Ok(_) => panic!("the read went on after the stop"),
    }
    let message = match read() {
        Err(e) => e.to_string(),
        Ok(_) => panic!("the second read went on after the stop"),
    };
    assert!(
        message.contains(&path.display().to_string())
            && message.contains("the process is stopping"),
        "{message}"
    );
    // A variable read whole stops after its first slab, naming itself.
    match read_cycle(&across, &ingest) {
        Err(IngestError::StoppedInVariable { file, variable }) => {
            assert_eq!(file, across.display().to_string());
            assert!(!variable.is_empty());
        }
        Err(other) => panic!("another error than a stop in a variable: {other}"),
        Ok(_) => panic!("the whole-variable read went on after the stop"),
    }
    a_stopped_scan_reads_no_file(dir.path());
}

/// After the stop, a scan of the data folder reads no file at all: a good cycle and a file
/// that is not NetCDF, both ready, are left waiting for the next start, and neither is
/// opened. (A read begun after the stop ends at its first step too, with the same report,
/// but only after opening the file and reading its metadata and surface fields, file after
/// file of a backlog: the log line such a read leaves, "not loaded: stopping", must not
/// appear.) Part of the test above, run after its stop (the stop is process-wide).
fn a_stopped_scan_reads_no_file(scratch: &Path) {
    let folder = scratch.join("folder");
    std::fs::create_dir(&folder).unwrap();
    let good = FixtureSpec::default().write(&scratch.join("good.nc"));
    let an_hour_ago = SystemTime::now() - Duration::from_secs(3600);
    for (name, bytes) in [
        ("cycle.nc", std::fs::read(good).unwrap()),
        ("bad.nc", b"not netcdf".to_vec()),
    ] {
        let path = folder.join(name);
        std::fs::write(&path, bytes).unwrap();
        let file = std::fs::File::options().write(true).open(&path).unwrap();
        file.set_modified(an_hour_ago).unwrap();
    }
    let config = WatchConfig {
        dir: folder.clone(),
        poll_interval: Duration::from_millis(40),
        settle: Duration::from_millis(300),
        max_wait_for_growth: Duration::from_secs(60),
    };
    let store = CycleStore::new(StoreConfig::default());
    let mut state = WatchState::new();
    let runtime = tokio::runtime::Builder::new_current_thread()
        .enable_all()
        .build()
        .unwrap();
    let log = Log::default();
    let subscriber = tracing_subscriber::fmt()
        .with_writer(log.clone())
        .with_ansi(false)
        .with_max_level(tracing::Level::INFO)
        .finish();
    let report = tracing::subscriber::with_default(subscriber, || {
        tracing::info!("scan after the stop");
        runtime.block_on(scan_once(
            &store,
            &mut state,
            &config,
            &IngestConfig::default(),
            &ComputeConfig::default(),
        ))
    });
    let log = log.text();
    assert!(
        log.contains("scan after the stop") && !log.contains("not loaded"),
        "{log}"
    );
    assert!(
        report.loaded.is_empty() && report.failed.is_empty(),
        "{report:?}"
    );
    assert_eq!(
        report.waiting,
        [folder.join("bad.nc"), folder.join("cycle.nc")],
        "{report:?}"
    );
    let served = store.snapshot();
    assert!(served.cycles.is_empty() && served.failures.is_empty());
}

/// What a test's log subscriber wrote.
#[derive(Clone, Default)]
struct Log(std::sync::Arc<std::sync::Mutex<Vec<u8>>>);

impl Log {
    fn text(&self) -> String {
        String::from_utf8_lossy(&self.0.lock().unwrap()).into_owned()
    }
}

impl std::io::Write for Log {
    fn write(&mut self, bytes: &[u8]) -> std::io::Result<usize> {
        self.0.lock().unwrap().extend_from_slice(bytes);
        Ok(bytes.len())
    }
    fn flush(&mut self) -> std::io::Result<()> {
        Ok(())
    }
}

impl<'a> tracing_subscriber::fmt::MakeWriter<'a> for Log {
    type Writer = Log;
    fn make_writer(&'a self) -> Log {
        self.clone()
    }
}
