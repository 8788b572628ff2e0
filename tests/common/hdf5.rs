//! HDF5's error printing, for tests that open NetCDF-4 files on their own threads.

#![allow(dead_code)]

extern "C" {
    /// HDF5's `H5Eset_auto2` (linked through the `netcdf` crate's HDF5): with a null handler,
    /// turns off HDF5's automatic printing of expected attribute misses on the calling
    /// thread, as the ingest module does on its reading threads.
    fn H5Eset_auto2(
        estack: i64,
        func: Option<unsafe extern "C" fn(i64, *mut std::ffi::c_void) -> i32>,
        data: *mut std::ffi::c_void,
    ) -> i32;
}

/// Keeps this thread's stderr free of HDF5's traces of expected attribute misses.
pub fn quiet_hdf5_on_this_thread() {
    // SAFETY: H5E_DEFAULT (0) and a null handler only change this thread's error-printing
    // setting; no pointer is read.
    unsafe {
        H5Eset_auto2(0, None, std::ptr::null_mut());
    }
}
