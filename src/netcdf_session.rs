//! One NetCDF file session at a time in this process.
//!
//! The NetCDF-C library and the HDF5 library under it, as Debian builds them, are not
//! thread-safe. The `netcdf` crate serialises each call, but two files written from two
//! threads at once still interleave inside HDF5 and can come out damaged (seen here as
//! `netcdf: hdf error` on reading a demo file that two test threads wrote together). Every
//! code path that opens or creates a file therefore holds this lock for the whole life of the
//! file handle: take the guard *before* opening, so that it is dropped after the file.

use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::{Mutex, MutexGuard};

static SESSION: Mutex<()> = Mutex::new(());

/// Set once the process is stopping: see [`stop_reads`].
static STOPPING: AtomicBool = AtomicBool::new(false);

/// Asks every read of a cycle's fields in progress to stop before its next (member, time)
/// step, and every later read to stop before its first, with
/// [`crate::ingest::IngestError::Stopped`]. For a process that is stopping: a server that
/// waits, before it exits, for the read holding this session (see `hypsogrid serve`) then
/// waits for one step of a file rather than all of it. It cannot be undone.
pub fn stop_reads() {
    STOPPING.store(true, Ordering::Release);
}

/// Whether [`stop_reads`] was called.
pub fn reads_stopped() -> bool {
    STOPPING.load(Ordering::Acquire)
}

/// Waits for, and holds, the process-wide NetCDF session lock.
///
/// A panic while the lock was held leaves nothing to repair (the file handle is closed on
/// unwinding), so a poisoned lock is simply taken over.
pub fn lock() -> MutexGuard<'static, ()> {
    SESSION
        .lock()
        .unwrap_or_else(|poisoned| poisoned.into_inner())
}

extern "C" {
    /// The NetCDF-C library's one-time set-up (`netcdf.h`, 4.6.2 and later).
    fn nc_initialize() -> std::os::raw::c_int;
}

/// Runs the NetCDF-C library's one-time set-up now, on the calling thread: call it from the
/// main thread before any other thread starts.
///
/// The set-up runs at the library's first call, and Debian's build of it then initialises
/// libcurl and through it OpenSSL, which keeps state for the thread that did it. When that
/// thread was a worker (a file read on a blocking thread of the server) and exited while the
/// process was exiting, OpenSSL's per-thread clean-up ran at the same time as its
/// process-wide clean-up on the main thread, and the server, already stopped, died of heap
/// corruption (SIGABRT or SIGSEGV after SIGTERM: one run in 25, then one in 72, of
/// `tests/serve_cli.rs`, which stops five servers a run; the core showed the main thread in
/// `OPENSSL_cleanup` under `exit` and an exiting worker in OpenSSL's thread-local
/// destructor). Set up from the main thread, whose thread-local
/// destructors do not run at exit, no worker holds such state.
///
/// # Errors
/// The library's status code when the set-up fails (the first file operation would then
/// report the same failure).
pub fn initialize() -> Result<(), i32> {
    let _session = lock();
    // SAFETY: a plain call without arguments, under the session lock like every other
    // call into the library; it is idempotent.
    let status = unsafe { nc_initialize() };
    if status == 0 {
        Ok(())
    } else {
        Err(status)
    }
}
