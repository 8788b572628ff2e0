//! A cycle file held as its producer holds it while writing: HDF5 1.10 and later take an
//! exclusive `flock` on a NetCDF-4 file for as long as they have it open for writing.
#![allow(dead_code)]

use std::os::fd::AsRawFd;
use std::path::Path;

/// Opens `path` and takes an exclusive, non-blocking `flock` on it through this descriptor
/// of its own; the lock is released when the returned file is dropped.
pub fn held_as_a_writer(path: &Path) -> std::fs::File {
    let file = std::fs::File::options()
        .write(true)
        .open(path)
        .unwrap_or_else(|e| panic!("opening {} to lock it: {e}", path.display()));
    // SAFETY: flock on a descriptor this function owns (and hands over); the lock goes
    // with it when the file is dropped.
    let status = unsafe { libc::flock(file.as_raw_fd(), libc::LOCK_EX | libc::LOCK_NB) };
    assert_eq!(status, 0, "locking {}", path.display());
    file
}
