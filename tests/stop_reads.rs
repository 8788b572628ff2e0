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
}
