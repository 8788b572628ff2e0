//! One NetCDF file session at a time in this process.
//!
//! The NetCDF-C library and the HDF5 library under it, as Debian builds them, are not
//! thread-safe. The `netcdf` crate serialises each call, but two files written from two
//! threads at once still interleave inside HDF5 and can come out damaged (seen here as
//! `netcdf: hdf error` on reading a demo file that two test threads wrote together). Every
//! code path that opens or creates a file therefore holds this lock for the whole life of the
//! file handle: take the guard *before* opening, so that it is dropped after the file.

use std::sync::{Mutex, MutexGuard};

static SESSION: Mutex<()> = Mutex::new(());

/// Waits for, and holds, the process-wide NetCDF session lock.
///
/// A panic while the lock was held leaves nothing to repair (the file handle is closed on
/// unwinding), so a poisoned lock is simply taken over.
pub fn lock() -> MutexGuard<'static, ()> {
    SESSION
        .lock()
        .unwrap_or_else(|poisoned| poisoned.into_inner())
}
