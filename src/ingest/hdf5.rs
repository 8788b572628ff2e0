//! Keeps HDF5's automatic error printing off on every thread that reads a file.
//!
//! netCDF-C turns HDF5's error-stack printing off once, on the thread that first initialises
//! the library. With the thread-safe HDF5 that Debian ships the setting is per thread, so a
//! NetCDF-4 file opened on any other thread (rayon, tokio's blocking pool) prints
//! `HDF5-DIAG` traces to stderr for every attribute probe that is expected to miss, which
//! floods logs and breaks JSON log lines. The library is linked through the `netcdf` crate's
//! `hdf5-sys` dependency.

use std::cell::Cell;

/// `hid_t` of HDF5 1.10 and later.
type Hid = i64;
/// `H5E_DEFAULT`: the calling thread's default error stack.
const H5E_DEFAULT: Hid = 0;
/// `H5E_auto2_t`.
type AutoFn = Option<unsafe extern "C" fn(Hid, *mut std::ffi::c_void) -> i32>;

extern "C" {
    /// `herr_t H5Eset_auto2(hid_t estack_id, H5E_auto2_t func, void *client_data)`.
    fn H5Eset_auto2(estack: Hid, func: AutoFn, data: *mut std::ffi::c_void) -> i32;
}

thread_local! {
    static QUIET: Cell<bool> = const { Cell::new(false) };
}

/// Turns HDF5's automatic error printing off on the calling thread (once per thread).
pub(crate) fn quiet_on_this_thread() {
    QUIET.with(|quiet| {
        if !quiet.get() {
            // SAFETY: H5Eset_auto2 with the default stack and a null handler only changes
            // the calling thread's error-reporting setting; it reads no pointer.
            unsafe {
                H5Eset_auto2(H5E_DEFAULT, None, std::ptr::null_mut());
            }
            quiet.set(true);
        }
    });
}
