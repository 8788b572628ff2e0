//! Keeps HDF5's automatic error printing off on every thread that reads a file, and tells
//! where a dataset's chunks lie ([`chunk_layout`]).
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

/// `H5F_ACC_RDONLY`.
const H5F_ACC_RDONLY: std::ffi::c_uint = 0;
/// `H5P_DEFAULT`.
const H5P_DEFAULT: Hid = 0;
/// `HADDR_UNDEF`: no address (storage not allocated).
const HADDR_UNDEF: u64 = u64::MAX;

extern "C" {
    /// `hid_t H5Fopen(const char *name, unsigned flags, hid_t fapl_id)`.
    fn H5Fopen(name: *const std::ffi::c_char, flags: std::ffi::c_uint, fapl: Hid) -> Hid;
    /// `herr_t H5Fclose(hid_t file_id)`.
    fn H5Fclose(file: Hid) -> i32;
    /// `hid_t H5Dopen2(hid_t loc_id, const char *name, hid_t dapl_id)`.
    fn H5Dopen2(loc: Hid, name: *const std::ffi::c_char, dapl: Hid) -> Hid;
    /// `herr_t H5Dclose(hid_t dset_id)`.
    fn H5Dclose(dset: Hid) -> i32;
    /// `hid_t H5Dget_create_plist(hid_t dset_id)`.
    fn H5Dget_create_plist(dset: Hid) -> Hid;
    /// `hid_t H5Dget_space(hid_t dset_id)`.
    fn H5Dget_space(dset: Hid) -> Hid;
    /// `herr_t H5Sclose(hid_t space_id)`.
    fn H5Sclose(space: Hid) -> i32;
    /// `int H5Sget_simple_extent_ndims(hid_t space_id)`.
    fn H5Sget_simple_extent_ndims(space: Hid) -> std::ffi::c_int;
    /// `herr_t H5Pclose(hid_t plist_id)`.
    fn H5Pclose(plist: Hid) -> i32;
    /// `int H5Pget_nfilters(hid_t plist_id)`.
    fn H5Pget_nfilters(plist: Hid) -> std::ffi::c_int;
    /// `H5Z_filter_t H5Pget_filter2(hid_t plist_id, unsigned idx, unsigned *flags,
    /// size_t *cd_nelmts, unsigned cd_values[], size_t namelen, char name[],
    /// unsigned *filter_config)`.
    fn H5Pget_filter2(
        plist: Hid,
        idx: std::ffi::c_uint,
        flags: *mut std::ffi::c_uint,
        cd_nelmts: *mut usize,
        cd_values: *mut std::ffi::c_uint,
        namelen: usize,
        name: *mut std::ffi::c_char,
        filter_config: *mut std::ffi::c_uint,
    ) -> std::ffi::c_int;
    /// `herr_t H5Dget_num_chunks(hid_t dset_id, hid_t fspace_id, hsize_t *nchunks)`
    /// (HDF5 1.10.5 and later).
    fn H5Dget_num_chunks(dset: Hid, space: Hid, count: *mut u64) -> i32;
    /// `herr_t H5Dget_chunk_info(hid_t dset_id, hid_t fspace_id, hsize_t chk_idx,
    /// hsize_t *offset, unsigned *filter_mask, haddr_t *addr, hsize_t *size)`.
    fn H5Dget_chunk_info(
        dset: Hid,
        space: Hid,
        index: u64,
        offset: *mut u64,
        filter_mask: *mut std::ffi::c_uint,
        addr: *mut u64,
        size: *mut u64,
    ) -> i32;
}

/// One stored chunk of a dataset ([`chunk_layout`]).
#[derive(Clone, Debug)]
pub(crate) struct StoredChunk {
    /// Index of its first value along each dimension.
    pub(crate) start: Vec<u64>,
    /// Bit `i` set: filter `i` of the pipeline was not applied to this chunk.
    pub(crate) filter_mask: u32,
    /// Byte offset in the file.
    pub(crate) addr: u64,
    /// Bytes stored.
    pub(crate) size: u64,
}

/// The filter pipeline (HDF5 filter identifiers, in the order they were applied on writing)
/// and every stored chunk of the root-group dataset `name` of `rank` dimensions in the
/// NetCDF-4 file at `path`. `None` when the file or dataset does not open, or a query fails.
///
/// The caller holds the NetCDF session ([`crate::netcdf_session::lock`]).
pub(crate) fn chunk_layout(
    path: &std::path::Path,
    name: &str,
    rank: usize,
) -> Option<(Vec<i32>, Vec<StoredChunk>)> {
    use std::os::unix::ffi::OsStrExt;
    let c_path = std::ffi::CString::new(path.as_os_str().as_bytes()).ok()?;
    let c_name = std::ffi::CString::new(name).ok()?;
    quiet_on_this_thread();
    // SAFETY: NUL-terminated strings and default property lists; every identifier opened
    // here is closed before returning, and every out-pointer points at memory sized as the
    // call documents (`start` has `rank` elements, the dataset's rank, checked below).
    unsafe {
        let file = H5Fopen(c_path.as_ptr(), H5F_ACC_RDONLY, H5P_DEFAULT);
        if file < 0 {
            return None;
        }
        let dset = H5Dopen2(file, c_name.as_ptr(), H5P_DEFAULT);
        let found = if dset < 0 {
            None
        } else {
            let found = dataset_chunks(dset, rank);
            H5Dclose(dset);
            found
        };
        H5Fclose(file);
        found
    }
}

/// [`chunk_layout`] of an open dataset.
///
/// # Safety
/// `dset` is an open dataset identifier of `rank` dimensions, and the caller holds the
/// NetCDF session.
unsafe fn dataset_chunks(dset: Hid, rank: usize) -> Option<(Vec<i32>, Vec<StoredChunk>)> {
    let filters = pipeline(dset)?;
    let space = H5Dget_space(dset);
    if space < 0 {
        return None;
    }
    let mut chunks = Vec::new();
    let mut n = 0u64;
    let mut ok = dataset_rank(dset) == Some(rank) && H5Dget_num_chunks(dset, space, &mut n) >= 0;
    let mut i = 0;
    while ok && i < n {
        let mut start = vec![0u64; rank];
        let (mut filter_mask, mut addr, mut size) = (0u32, 0u64, 0u64);
        ok = H5Dget_chunk_info(
            dset,
            space,
            i,
            start.as_mut_ptr(),
            &mut filter_mask,
            &mut addr,
            &mut size,
        ) >= 0
            && addr != HADDR_UNDEF;
        chunks.push(StoredChunk {
            start,
            filter_mask,
            addr,
            size,
        });
        i += 1;
    }
    H5Sclose(space);
    ok.then_some((filters, chunks))
}

/// `H5F_ACC_RDWR`.
const H5F_ACC_RDWR: std::ffi::c_uint = 1;

extern "C" {
    /// `herr_t H5Dwrite_chunk(hid_t dset_id, hid_t dxpl_id, uint32_t filters,
    /// const hsize_t *offset, size_t data_size, const void *buf)` (HDF5 1.10.3 and later).
    fn H5Dwrite_chunk(
        dset: Hid,
        dxpl: Hid,
        filters: u32,
        offset: *const u64,
        data_size: usize,
        buf: *const std::ffi::c_void,
    ) -> i32;
}

/// Datasets of a NetCDF-4 file that the NetCDF library has defined and closed, open in HDF5
/// to take chunks already passed through their filter pipeline
/// ([`ChunkWriter::write`]). Closed on drop.
pub(crate) struct ChunkWriter {
    file: Hid,
    /// Each dataset's identifier, its rank and its filter pipeline.
    datasets: Vec<(Hid, usize, Vec<i32>)>,
}

impl ChunkWriter {
    /// Opens the file at `path` for writing and the root-group datasets `names`; `None`
    /// when any does not open or its layout cannot be read. The caller holds the NetCDF
    /// session.
    pub(crate) fn open(path: &std::path::Path, names: &[&str]) -> Option<Self> {
        use std::os::unix::ffi::OsStrExt;
        let c_path = std::ffi::CString::new(path.as_os_str().as_bytes()).ok()?;
        quiet_on_this_thread();
        // SAFETY: a NUL-terminated path and default property lists; the identifier is
        // closed by `Drop` from here on.
        let file = unsafe { H5Fopen(c_path.as_ptr(), H5F_ACC_RDWR, H5P_DEFAULT) };
        if file < 0 {
            return None;
        }
        let mut writer = Self {
            file,
            datasets: Vec::with_capacity(names.len()),
        };
        for name in names {
            let c_name = std::ffi::CString::new(*name).ok()?;
            // SAFETY: an open file and a NUL-terminated name; the dataset is closed by
            // `Drop` once pushed below.
            let dset = unsafe { H5Dopen2(file, c_name.as_ptr(), H5P_DEFAULT) };
            if dset < 0 {
                return None;
            }
            // Pushed first, so that `Drop` closes it whatever follows.
            writer.datasets.push((dset, 0, Vec::new()));
            // SAFETY: `dset` is open; it is queried, not changed.
            let (rank, filters) = unsafe { (dataset_rank(dset), pipeline(dset)) };
            let (Some(rank), Some(filters)) = (rank, filters) else {
                return None;
            };
            if let Some(last) = writer.datasets.last_mut() {
                *last = (dset, rank, filters);
            }
        }
        Some(writer)
    }

    /// The filter pipeline of dataset `index` (HDF5 filter identifiers in the order they
    /// apply on writing).
    pub(crate) fn filters(&self, index: usize) -> Option<&[i32]> {
        self.datasets.get(index).map(|(_, _, f)| f.as_slice())
    }

    /// Writes `bytes`, a chunk already through every filter of the pipeline, as the chunk of
    /// dataset `index` that starts at `start` (one index a dimension). False when HDF5
    /// refuses it.
    pub(crate) fn write(&self, index: usize, start: &[u64], bytes: &[u8]) -> bool {
        let Some(&(dset, rank, _)) = self.datasets.get(index) else {
            return false;
        };
        if start.len() != rank {
            return false;
        }
        // SAFETY: an open dataset, `start` of the dataset's rank and `bytes` valid for its
        // length; HDF5 copies what it writes before returning.
        unsafe {
            H5Dwrite_chunk(
                dset,
                H5P_DEFAULT,
                0,
                start.as_ptr(),
                bytes.len(),
                bytes.as_ptr().cast(),
            ) >= 0
        }
    }

    /// Closes the datasets and the file; false when HDF5 reports a failure (the data may not
    /// all be on disk).
    pub(crate) fn close(mut self) -> bool {
        self.close_all()
    }

    fn close_all(&mut self) -> bool {
        let mut ok = true;
        for (dset, _, _) in self.datasets.drain(..) {
            // SAFETY: each dataset identifier was opened once and is closed once.
            ok &= unsafe { H5Dclose(dset) } >= 0;
        }
        if self.file >= 0 {
            // SAFETY: the file identifier was opened once and is closed once.
            ok &= unsafe { H5Fclose(self.file) } >= 0;
            self.file = -1;
        }
        ok
    }
}

impl Drop for ChunkWriter {
    fn drop(&mut self) {
        self.close_all();
    }
}

/// The rank of an open dataset, `None` when it cannot be read.
///
/// # Safety
/// `dset` is an open dataset identifier and the caller holds the NetCDF session.
unsafe fn dataset_rank(dset: Hid) -> Option<usize> {
    let space = H5Dget_space(dset);
    if space < 0 {
        return None;
    }
    let rank = H5Sget_simple_extent_ndims(space);
    H5Sclose(space);
    usize::try_from(rank).ok()
}

/// The filter pipeline of an open dataset, `None` when it cannot be read.
///
/// # Safety
/// `dset` is an open dataset identifier and the caller holds the NetCDF session.
unsafe fn pipeline(dset: Hid) -> Option<Vec<i32>> {
    let plist = H5Dget_create_plist(dset);
    if plist < 0 {
        return None;
    }
    let count = H5Pget_nfilters(plist);
    let mut filters = Vec::new();
    for i in 0..u32::try_from(count).unwrap_or(0) {
        let (mut flags, mut nelmts, mut config) = (0u32, 0usize, 0u32);
        filters.push(H5Pget_filter2(
            plist,
            i,
            &mut flags,
            &mut nelmts,
            std::ptr::null_mut(),
            0,
            std::ptr::null_mut(),
            &mut config,
        ));
    }
    H5Pclose(plist);
    (count >= 0 && filters.iter().all(|&id| id >= 0)).then_some(filters)
}

/// HDF5's deflate (zlib) filter (`H5Z_FILTER_DEFLATE`).
const FILTER_DEFLATE: i32 = 1;
/// HDF5's byte-shuffle filter (`H5Z_FILTER_SHUFFLE`).
const FILTER_SHUFFLE: i32 = 2;

/// A filter pipeline of at most the byte shuffle, then deflate: where each stands in it (the
/// bit of a chunk's filter mask that says it was skipped).
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq)]
pub(crate) struct Pipeline {
    pub(crate) shuffle: Option<usize>,
    pub(crate) deflate: Option<usize>,
}

impl Pipeline {
    /// The pipeline of these filter identifiers (in the order they apply on writing), `None`
    /// when it holds any other filter, or the shuffle after deflate.
    pub(crate) fn of(filters: &[i32]) -> Option<Self> {
        let mut p = Self::default();
        for (i, id) in filters.iter().enumerate() {
            match *id {
                FILTER_SHUFFLE if p.shuffle.is_none() && p.deflate.is_none() => p.shuffle = Some(i),
                FILTER_DEFLATE if p.deflate.is_none() => p.deflate = Some(i),
                _ => return None,
            }
        }
        Some(p)
    }
}

/// The bytes of little-endian `values` as HDF5's shuffle filter stores them: byte 0 of every
/// value, then byte 1, and so on (a single value stays as it is).
pub(crate) fn shuffle_f32(values: &[f32]) -> Vec<u8> {
    let n = values.len();
    if n <= 1 {
        return values.iter().flat_map(|v| v.to_le_bytes()).collect();
    }
    let mut out = vec![0u8; 4 * n];
    let (b0, rest) = out.split_at_mut(n);
    let (b1, rest) = rest.split_at_mut(n);
    let (b2, b3) = rest.split_at_mut(n);
    for (i, v) in values.iter().enumerate() {
        let [x0, x1, x2, x3] = v.to_le_bytes();
        (b0[i], b1[i], b2[i], b3[i]) = (x0, x1, x2, x3);
    }
    out
}

/// The first `out.len()` values of a chunk of `data.len() / 4` little-endian `f32` that
/// [`shuffle_f32`]'s order holds (the inverse).
pub(crate) fn unshuffle_f32(data: &[u8], out: &mut [f32]) {
    let e = data.len() / 4;
    let (b0, rest) = data.split_at(e);
    let (b1, rest) = rest.split_at(e);
    let (b2, b3) = rest.split_at(e);
    let n = out.len().min(e);
    let (b0, b1, b2, b3) = (&b0[..n], &b1[..n], &b2[..n], &b3[..n]);
    for (i, v) in out[..n].iter_mut().enumerate() {
        *v = f32::from_le_bytes([b0[i], b1[i], b2[i], b3[i]]);
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn pipelines_of_shuffle_and_deflate_only() {
        let p = |shuffle, deflate| Some(Pipeline { shuffle, deflate });
        assert_eq!(Pipeline::of(&[]), p(None, None));
        assert_eq!(Pipeline::of(&[2, 1]), p(Some(0), Some(1)));
        assert_eq!(Pipeline::of(&[1]), p(None, Some(0)));
        assert_eq!(Pipeline::of(&[2]), p(Some(0), None));
        // Shuffle after deflate, Fletcher-32, szip, a filter twice.
        for other in [&[1, 2][..], &[3, 1], &[4], &[1, 1]] {
            assert_eq!(Pipeline::of(other), None, "{other:?}");
        }
    }

    #[test]
    fn shuffling_groups_bytes_by_significance_and_unshuffling_undoes_it() {
        let values = [1.5f32, -2.25, f32::NAN, 3.0e-39];
        let shuffled = shuffle_f32(&values);
        let bytes: Vec<[u8; 4]> = values.iter().map(|v| v.to_le_bytes()).collect();
        for (j, group) in shuffled.chunks_exact(values.len()).enumerate() {
            let want: Vec<u8> = bytes.iter().map(|b| b[j]).collect();
            assert_eq!(group, want.as_slice(), "byte {j}");
        }
        let mut back = [0f32; 4];
        unshuffle_f32(&shuffled, &mut back);
        let bits = |v: &[f32]| v.iter().map(|x| x.to_bits()).collect::<Vec<_>>();
        assert_eq!(bits(&back), bits(&values));
        assert_eq!(shuffle_f32(&[7.0]), 7.0f32.to_le_bytes().to_vec());
    }
}
