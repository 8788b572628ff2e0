//! A stopping process stops the reads of cycle files at their next step
//! (`hypsogrid::netcdf_session::stop_reads`), so that `hypsogrid serve` waits, before it
//! exits, for one step of a file being read rather than the whole file.
//!
//! In a test binary of its own: the request is process-wide and cannot be undone.

use hypsogrid::compute::{ComputeConfig, LoadError};
use hypsogrid::demo::write_demo_cycle;
use hypsogrid::ingest::{IngestConfig, IngestError};
use hypsogrid::query::LoadedCycle;

#[test]
fn a_stopped_process_reads_no_step_of_a_cycle_file() {
    let dir = tempfile::tempdir().unwrap();
    let path = write_demo_cycle(dir.path()).expect("demo cycle");
    let read = || LoadedCycle::read(&path, &IngestConfig::default(), &ComputeConfig::default());
    // Before: the demo cycle reads, several steps of it.
    let loaded = read().expect("the demo cycle reads before the stop");
    assert!(loaded.heights.steps() > 1);
    drop(loaded);

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
}
