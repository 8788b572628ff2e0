//! Large field buffers, allocated so that their first touch is cheap.
//!
//! A 0.5° global cycle reads about 77 MB of temperature and humidity and writes 48 MB of
//! heights and 12 MB of below-ground flags into fresh allocations. With 4 KiB pages, the
//! first touch of those pages cost about as much as decoding or computing them on the
//! virtual machines this runs on (a fault per page in the guest, and often one in the host
//! behind it). Offering such buffers to the system for transparent huge pages
//! ([`advise_huge_pages`]) turns 512 faults into one where the system allows it: reading the
//! 0.5° cycle went from about 93 to 50 ms with this alone (`benches/compute.rs`, `read`).

use ndarray::Array5;

/// A zeroed vector of `len` elements for a large field, advised for huge pages.
pub(crate) fn zeroed_field<T: Clone + Default>(len: usize) -> Vec<T> {
    // `vec![zero; n]` of a type whose zero is all-zero bytes goes to `calloc`, which hands
    // out fresh, untouched pages for large sizes: no fill pass runs here.
    let mut v = vec![T::default(); len];
    advise_huge_pages(&mut v);
    v
}

/// A zeroed 5-D array of `dim` (standard layout) for a large field, advised for huge pages.
pub(crate) fn zeroed_field_array<T: Clone + Default>(
    dim: (usize, usize, usize, usize, usize),
) -> Array5<T> {
    let (m, t, k, r, c) = dim;
    let len = m * t * k * r * c;
    // The vector has exactly the shape's length, so the conversion cannot fail; should it,
    // a plain default-filled array of the same shape is as good.
    Array5::from_shape_vec(dim, zeroed_field(len)).unwrap_or_else(|_| Array5::default(dim))
}

/// A zeroed field buffer of `len` elements backed by huge pages from its first element
/// (to its last, unless the last huge page would be less than half used: see
/// [`advised_len`]), where the system gives them ([`advise_huge_pages`] covers only the
/// 2 MiB-aligned interior of an allocation, and the allocator's large blocks start just past
/// a page boundary, not a 2 MiB one: of a 4 MiB band buffer about half was left to 4 KiB
/// pages, faulted in one by one on first touch). The allocation is one huge page longer than the
/// whole huge pages the field needs, and the field starts at the first 2 MiB boundary in
/// it; the spare memory around it is never touched, so it costs address space only.
#[derive(Debug, Default)]
pub(crate) struct HugeField<T> {
    buffer: Vec<T>,
    start: usize,
    len: usize,
}

impl<T: Clone + Default> HugeField<T> {
    /// A zeroed field of `len` elements (see [`zeroed_field`] for why zeroing costs nothing
    /// here).
    pub(crate) fn zeroed(len: usize) -> Self {
        const HUGE_PAGE: usize = 2 << 20;
        let size = std::mem::size_of::<T>().max(1);
        let per_page = HUGE_PAGE / size;
        let whole = len.div_ceil(per_page.max(1)) * per_page;
        let mut buffer = vec![T::default(); whole + per_page];
        let addr = buffer.as_ptr() as usize;
        let gap = addr.next_multiple_of(HUGE_PAGE) - addr;
        // A gap that is not a whole number of elements (a type whose size does not divide
        // the allocator's alignment) leaves the field at the start, advised as before.
        let start = if gap % size == 0 { gap / size } else { 0 };
        let end = (start + advised_len(len, per_page)).min(buffer.len());
        advise_huge_pages(&mut buffer[start..end]);
        Self { buffer, start, len }
    }
}

/// How many of a field's `len` elements [`HugeField`] offers for huge pages, `per_page` to a
/// huge page: every whole huge page, and the last, partly used one only when at least half
/// of it is used. A huge page is zeroed whole at its first touch; below about half a page
/// the 4 KiB pages of the part used cost less. The 0.5° batch's bands of 40–41 rows are
/// 4.26–4.37 MB a field, two huge pages and 0.07–0.18 MB: a third huge page each, zeroed for
/// a few dozen 4 KiB pages' worth of values, took peak memory from 79 to 95 MiB (and the
/// zeroing a few per cent of the process's time).
fn advised_len(len: usize, per_page: usize) -> usize {
    let per_page = per_page.max(1);
    let whole_pages = len / per_page * per_page;
    if (len - whole_pages) * 2 >= per_page {
        len.div_ceil(per_page) * per_page
    } else {
        whole_pages
    }
}

impl<T> std::ops::Deref for HugeField<T> {
    type Target = [T];
    fn deref(&self) -> &[T] {
        &self.buffer[self.start..self.start + self.len]
    }
}

impl<T> std::ops::DerefMut for HugeField<T> {
    fn deref_mut(&mut self) -> &mut [T] {
        &mut self.buffer[self.start..self.start + self.len]
    }
}

/// Writes the zero of `T` into the first element of every 4 KiB page of `buf[from..]` that
/// starts within the next `bytes` bytes, so that those pages are faulted in now rather than
/// at their first real write; returns the index reached (at most `buf.len()`).
///
/// For a fresh zeroed buffer that nothing has written yet (the values stay zero), touched
/// in time that would otherwise be idle: see [`crate::compute::read_for_serving`].
pub(crate) fn touch_pages<T: Copy + Default>(buf: &mut [T], from: usize, bytes: usize) -> usize {
    const PAGE: usize = 4096;
    let size = std::mem::size_of::<T>().max(1);
    let end = from.saturating_add(bytes / size).min(buf.len());
    let stride = (PAGE / size).max(1);
    if let Some(part) = buf.get_mut(from..end) {
        for v in part.iter_mut().step_by(stride) {
            *v = T::default();
        }
    }
    end.max(from.min(buf.len()))
}

/// Asks the kernel to back a large, not yet touched allocation with transparent huge pages
/// (`madvise(MADV_HUGEPAGE)` on its 2 MiB-aligned interior), so that the first write faults
/// in 2 MiB at a time instead of 4 KiB. Linux only; elsewhere, or when the system refuses
/// (THP disabled), nothing changes but the speed.
pub(crate) fn advise_huge_pages<T>(buffer: &mut [T]) {
    #[cfg(target_os = "linux")]
    {
        const HUGE_PAGE: usize = 2 << 20;
        let start = buffer.as_mut_ptr() as usize;
        let end = start + std::mem::size_of_val(buffer);
        let aligned_start = start.div_ceil(HUGE_PAGE) * HUGE_PAGE;
        let aligned_end = end / HUGE_PAGE * HUGE_PAGE;
        if aligned_end > aligned_start {
            // SAFETY: the range lies inside `buffer`, which this function borrows mutably, and
            // MADV_HUGEPAGE changes only how the kernel backs the pages, never their contents
            // or their mapping: no Rust-visible memory changes.
            let _ = unsafe {
                libc::madvise(
                    aligned_start as *mut libc::c_void,
                    aligned_end - aligned_start,
                    libc::MADV_HUGEPAGE,
                )
            };
        }
    }
    #[cfg(not(target_os = "linux"))]
    let _ = buffer;
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn whole_huge_pages_are_offered_and_a_tail_only_from_half_a_page() {
        let per_page = (2 << 20) / 4; // f32 values in a huge page
        assert_eq!(advised_len(0, per_page), 0);
        assert_eq!(advised_len(per_page, per_page), per_page);
        assert_eq!(advised_len(2 * per_page + 1, per_page), 2 * per_page);
        assert_eq!(
            advised_len(2 * per_page + per_page / 2 - 1, per_page),
            2 * per_page
        );
        assert_eq!(
            advised_len(2 * per_page + per_page / 2, per_page),
            3 * per_page
        );
        assert_eq!(advised_len(per_page / 2, per_page), per_page);
        assert_eq!(advised_len(per_page / 2 - 1, per_page), 0);
        // A 40-row band of the 0.5° grid on 37 levels: two huge pages and a small tail.
        assert_eq!(advised_len(37 * 40 * 720, per_page), 2 * per_page);
    }

    #[test]
    fn field_buffers_are_zero_and_shaped() {
        let z: Vec<u8> = zeroed_field(3 << 20);
        assert_eq!(z.len(), 3 << 20);
        assert!(z.iter().all(|&x| x == 0));
        let a: ndarray::Array5<f32> = zeroed_field_array((2, 1, 3, 50, 70));
        assert_eq!(a.dim(), (2, 1, 3, 50, 70));
        assert!(a.iter().all(|&x| x == 0.0));
        let empty: Vec<f32> = zeroed_field(0);
        assert!(empty.is_empty());
    }

    #[test]
    fn huge_fields_start_on_a_huge_page_and_hold_zeros_of_their_length() {
        for len in [0usize, 1, 1000, (2 << 20) / 4, (5 << 20) / 4 + 3] {
            let mut f: HugeField<f32> = HugeField::zeroed(len);
            assert_eq!(f.len(), len);
            assert!(f.iter().all(|&x| x == 0.0));
            assert_eq!(f.as_ptr() as usize % (2 << 20), 0, "{len} values");
            if let Some(last) = f.last_mut() {
                *last = 1.5;
            }
            assert_eq!(f.iter().filter(|&&x| x == 1.5).count(), len.min(1));
        }
        let bytes: HugeField<u8> = HugeField::zeroed(3 << 20);
        assert_eq!(
            (bytes.len(), bytes.as_ptr() as usize % (2 << 20)),
            (3 << 20, 0)
        );
    }

    #[test]
    fn touching_pages_keeps_zeros_and_walks_to_the_end() {
        let mut z: Vec<f32> = zeroed_field(3 << 20);
        let mut at = 0;
        let mut calls = 0;
        while at < z.len() {
            at = touch_pages(&mut z, at, 2 << 20);
            calls += 1;
        }
        // 12 MiB of f32 in 2 MiB pieces.
        assert_eq!((at, calls), (z.len(), 6));
        assert!(z.iter().all(|&x| x == 0.0));
        let len = z.len();
        assert_eq!(touch_pages(&mut z, len + 5, 4096), len);
    }
}
