//! The extent of the data a NetCDF-3 (classic, 64-bit offset, CDF-5) header describes, so that
//! a truncated file is refused instead of read as zeros: the NetCDF library opens such a file
//! and returns zeros for the missing bytes.
//!
//! A pure parser over bytes (fuzzable): it never panics and never allocates more than the
//! header it is given.
//!
//! # References
//! Unidata, "The NetCDF Classic Format Specification" and "The NetCDF 64-bit Offset Format"
//! / "CDF-5" notes in the NetCDF User Guide (header grammar, `vsize`, `begin`, record layout).

/// What the header says about the file's data.
#[derive(Clone, Debug, PartialEq, Eq)]
pub enum Extent {
    /// The data end at this byte offset; a shorter file is truncated. The name is that of
    /// the variable whose data end last (none when the file has no variables).
    EndsAt(u64, Option<String>),
    /// The header is longer than the bytes given; read more and try again.
    NeedMore,
    /// The record count is "streaming" (unknown): no size can be checked.
    Unknown,
}

struct Cursor<'a> {
    bytes: &'a [u8],
    pos: usize,
}

/// `None` means "ran out of bytes"; `Err` means a malformed header.
type Step<T> = Result<Option<T>, String>;

impl Cursor<'_> {
    fn take(&mut self, n: usize) -> Option<&[u8]> {
        let end = self.pos.checked_add(n)?;
        let s = self.bytes.get(self.pos..end)?;
        self.pos = end;
        Some(s)
    }
    fn u32(&mut self) -> Option<u32> {
        let b = self.take(4)?;
        Some(u32::from_be_bytes([
            *b.first()?,
            *b.get(1)?,
            *b.get(2)?,
            *b.get(3)?,
        ]))
    }
    fn u64(&mut self) -> Option<u64> {
        let b = self.take(8)?;
        let mut a = [0u8; 8];
        a.copy_from_slice(b);
        Some(u64::from_be_bytes(a))
    }
    /// A count: 4 bytes, or 8 in CDF-5.
    fn count(&mut self, wide: bool) -> Option<u64> {
        if wide {
            self.u64()
        } else {
            self.u32().map(u64::from)
        }
    }
    fn name(&mut self, n: u64) -> Option<String> {
        let padded = n.checked_add(3)? / 4 * 4;
        let bytes = self.take(usize::try_from(padded).ok()?)?;
        let name = bytes.get(..usize::try_from(n).ok()?)?;
        Some(String::from_utf8_lossy(name).into_owned())
    }
    fn skip_padded(&mut self, n: u64) -> Option<()> {
        let padded = n.checked_add(3)? / 4 * 4;
        self.take(usize::try_from(padded).ok()?).map(|_| ())
    }
}

const NC_DIMENSION: u32 = 0x0A;
const NC_VARIABLE: u32 = 0x0B;
const NC_ATTRIBUTE: u32 = 0x0C;

fn type_size(t: u32) -> Option<u64> {
    Some(match t {
        1 | 2 | 7 => 1,
        3 | 8 => 2,
        4 | 5 | 9 => 4,
        6 | 10 | 11 => 8,
        _ => return None,
    })
}

/// Guard against absurd element counts in a damaged header before looping over them.
const MAX_ELEMENTS: u64 = 1 << 24;

macro_rules! need {
    ($e:expr) => {
        match $e {
            Some(v) => v,
            None => return Ok(None),
        }
    };
}

fn skip_attributes(c: &mut Cursor<'_>, wide: bool) -> Step<()> {
    let tag = need!(c.u32());
    let n = need!(c.count(wide));
    if tag == 0 && n == 0 {
        return Ok(Some(()));
    }
    if tag != NC_ATTRIBUTE || n > MAX_ELEMENTS {
        return Err("malformed attribute list".into());
    }
    for _ in 0..n {
        let name_len = need!(c.count(wide));
        need!(c.skip_padded(name_len));
        let t = need!(c.u32());
        let size = type_size(t).ok_or("unknown attribute type")?;
        let len = need!(c.count(wide));
        let bytes = len.checked_mul(size).ok_or("attribute too large")?;
        need!(c.skip_padded(bytes));
    }
    Ok(Some(()))
}

/// Parse a classic header and give the end of its data.
pub fn data_extent(bytes: &[u8]) -> Result<Extent, String> {
    match parse(bytes)? {
        Some(e) => Ok(e),
        None => Ok(Extent::NeedMore),
    }
}

fn parse(bytes: &[u8]) -> Step<Extent> {
    let mut c = Cursor { bytes, pos: 0 };
    let magic = need!(c.take(4));
    let version = match magic {
        [b'C', b'D', b'F', v @ (1 | 2 | 5)] => *v,
        _ => return Err("not a netcdf-3 header".into()),
    };
    let wide = version == 5;
    let wide_offsets = version != 1;
    let numrecs = need!(c.count(wide));
    let streaming = if wide {
        numrecs == u64::MAX
    } else {
        numrecs == u64::from(u32::MAX)
    };
    // Dimensions.
    let tag = need!(c.u32());
    let ndims = need!(c.count(wide));
    if !(tag == 0 && ndims == 0) && (tag != NC_DIMENSION || ndims > MAX_ELEMENTS) {
        return Err("malformed dimension list".into());
    }
    let mut dims: Vec<u64> = Vec::new();
    if tag == NC_DIMENSION {
        for _ in 0..ndims {
            let name_len = need!(c.count(wide));
            need!(c.skip_padded(name_len));
            dims.push(need!(c.count(wide)));
        }
    }
    need!(skip_attributes(&mut c, wide)?);
    // Variables.
    let tag = need!(c.u32());
    let nvars = need!(c.count(wide));
    if tag == 0 && nvars == 0 {
        return Ok(Some(Extent::EndsAt(c.pos as u64, None)));
    }
    if tag != NC_VARIABLE || nvars > MAX_ELEMENTS {
        return Err("malformed variable list".into());
    }
    // (begin, bytes of one record or of the whole variable, is record variable)
    let mut vars: Vec<(u64, u64, bool, u64)> = Vec::new();
    let mut names: Vec<String> = Vec::new();
    for _ in 0..nvars {
        let name_len = need!(c.count(wide));
        names.push(need!(c.name(name_len)));
        let nd = need!(c.count(wide));
        if nd > 1024 {
            return Err("variable with too many dimensions".into());
        }
        let mut is_record = false;
        let mut elems: u64 = 1;
        for i in 0..nd {
            let id = need!(c.count(wide));
            let len = *dims
                .get(usize::try_from(id).map_err(|_| "bad dimension id")?)
                .ok_or("variable refers to an undefined dimension")?;
            if len == 0 && i == 0 {
                is_record = true;
            } else {
                elems = elems.checked_mul(len).ok_or("variable too large")?;
            }
        }
        need!(skip_attributes(&mut c, wide)?);
        let t = need!(c.u32());
        let size = type_size(t).ok_or("unknown variable type")?;
        let vsize = need!(c.count(wide));
        let begin = if wide_offsets {
            need!(c.u64())
        } else {
            u64::from(need!(c.u32()))
        };
        let raw = elems.checked_mul(size).ok_or("variable too large")?;
        vars.push((begin, raw, is_record, vsize));
    }
    let header_end = c.pos as u64;
    let record_vars: Vec<&(u64, u64, bool, u64)> = vars.iter().filter(|v| v.2).collect();
    if streaming && !record_vars.is_empty() {
        return Ok(Some(Extent::Unknown));
    }
    // One record holds every record variable, each padded to 4 bytes, except that a file
    // with a single record variable stores its records unpadded.
    let recsize: u64 = if record_vars.len() == 1 {
        record_vars.first().map(|v| v.1).unwrap_or(0)
    } else {
        record_vars
            .iter()
            .try_fold(0u64, |acc, v| acc.checked_add(v.3))
            .ok_or("record too large")?
    };
    let mut end = header_end;
    let mut last: Option<String> = None;
    for (&(begin, raw, is_record, _), name) in vars.iter().zip(&names) {
        let this_end = if is_record {
            if numrecs == 0 {
                continue;
            }
            let before = (numrecs - 1)
                .checked_mul(recsize)
                .and_then(|x| x.checked_add(begin))
                .ok_or("file too large")?;
            before.checked_add(raw).ok_or("file too large")?
        } else {
            begin.checked_add(raw).ok_or("file too large")?
        };
        if this_end >= end {
            end = this_end;
            last = Some(name.clone());
        }
    }
    Ok(Some(Extent::EndsAt(end, last)))
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A hand-assembled CDF-1 header: one dimension x = 3, one float variable v(x) at offset
    /// `begin` (the grammar of the classic format specification).
    fn tiny(begin: u32) -> Vec<u8> {
        let mut b = Vec::new();
        b.extend(b"CDF\x01");
        b.extend(0u32.to_be_bytes()); // numrecs
        b.extend(NC_DIMENSION.to_be_bytes());
        b.extend(1u32.to_be_bytes());
        b.extend(1u32.to_be_bytes());
        b.extend(b"x\0\0\0");
        b.extend(3u32.to_be_bytes());
        b.extend([0u8; 8]); // no global attributes
        b.extend(NC_VARIABLE.to_be_bytes());
        b.extend(1u32.to_be_bytes());
        b.extend(1u32.to_be_bytes());
        b.extend(b"v\0\0\0");
        b.extend(1u32.to_be_bytes());
        b.extend(0u32.to_be_bytes()); // dimid 0
        b.extend([0u8; 8]); // no attributes
        b.extend(5u32.to_be_bytes()); // NC_FLOAT
        b.extend(12u32.to_be_bytes()); // vsize
        b.extend(begin.to_be_bytes());
        b
    }

    #[test]
    fn tiny_header_extent() {
        let h = tiny(80);
        assert_eq!(h.len(), 80);
        assert_eq!(data_extent(&h), Ok(Extent::EndsAt(92, Some("v".into()))));
        // Every shorter prefix asks for more bytes, never panics.
        for n in 0..h.len() {
            assert_eq!(data_extent(&h[..n]), Ok(Extent::NeedMore), "{n}");
        }
    }

    #[test]
    fn garbage_is_refused_without_panicking() {
        assert!(data_extent(b"HDF5....").is_err());
        let mut h = tiny(80);
        h[12] = 0xFF; // dimension count becomes huge
        assert!(data_extent(&h).is_err() || data_extent(&h) == Ok(Extent::NeedMore));
        for seed in 0u32..2000 {
            let mut h = tiny(80);
            let i = (seed as usize * 7) % h.len();
            h[i] = h[i].wrapping_add((seed % 251) as u8 + 1);
            let _ = data_extent(&h);
        }
    }

    proptest::proptest! {
        #[test]
        fn arbitrary_bytes_never_panic(bytes in proptest::collection::vec(proptest::num::u8::ANY, 0..400)) {
            let _ = data_extent(&bytes);
            let mut with_magic = b"CDF\x02".to_vec();
            with_magic.extend(&bytes);
            let _ = data_extent(&with_magic);
        }
    }
}
