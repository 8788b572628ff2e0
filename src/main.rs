//! The `hypsogrid` command line: batch computation on NetCDF files and the demo scenario.
#![warn(rust_2018_idioms)]

mod cli;

use std::process::ExitCode;

use clap::Parser;

fn main() -> ExitCode {
    // HDF5 1.10 locks every file it opens (flock). A lock is tied to the open file description,
    // so a process that forks while it has a NetCDF-4 file open hands the lock to the child,
    // and a reader elsewhere then fails to open that file ("netcdf: hdf error"); the same
    // locks fail outright on some network filesystems, and a read holding its shared lock
    // makes a producer's write to that file fail. hypsogrid turns HDF5's locking off unless
    // the caller has set it, and asks for a writer's lock itself before each read of a cycle
    // file (`ingest::open_quietly`: a file its producer still holds locked waits, unread);
    // the data folder's settle rules and the fingerprint check after each read cover
    // producers that take no lock. This runs before any thread exists.
    if std::env::var_os("HDF5_USE_FILE_LOCKING").is_none() {
        std::env::set_var("HDF5_USE_FILE_LOCKING", "FALSE");
    }
    // The NetCDF library's set-up, on a thread of its own that stays (see
    // `netcdf_session::initialize`), now rather than in the first file's time. A failure
    // here would come back, with the file's name, from the first file operation.
    let _ = hypsogrid::netcdf_session::initialize();
    let args = cli::Cli::parse();
    match cli::run(args) {
        Ok(()) => ExitCode::SUCCESS,
        Err(err) => {
            // One line, the whole chain of causes (each once): it names the file and the
            // variable.
            eprintln!(
                "hypsogrid: error: {}",
                cli::format::one_line(err.to_string(), err.source())
            );
            ExitCode::FAILURE
        }
    }
}
