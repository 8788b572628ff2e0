//! Reading one NetCDF variable into an `f32` buffer in SI units: raw values, masking of
//! `_FillValue` / `missing_value` / `valid_range`, unpacking (`scale_factor`, `add_offset`),
//! unit conversion, a plausibility scan, then the canonical axis order.
//!
//! # Memory
//! A float variable (or an integer one of 16 bits or fewer) is read straight into the buffer
//! that becomes the final array, a megabyte at a time when it is stored contiguously (so that
//! masking, unpacking and conversion run in place on values still in the cache) and in one
//! call when it is chunked; the reversal of a top-down level axis also happens in place.
//! Wider types (double, 32- and 64-bit integers) are read as `f64` a slab at a time, so the
//! transient copy is one slab. Only a file whose dimensions are not in member, time, level,
//! latitude, longitude order costs one transient copy of the field (the permutation).

use netcdf::types::{FloatType, IntType, NcVariableType};
use netcdf::{AttributeValue, Extent, Variable};
use rayon::prelude::*;

use super::units::Linear;
use super::IngestError;
use crate::lanes::{lane_builds, Lanes};

/// Position of each canonical axis (member, time, level, latitude, longitude) among the
/// variable's dimensions, `None` where the variable lacks that axis.
pub(crate) type AxisPositions = [Option<usize>; 5];

/// A plausibility range applied after conversion to SI units.
#[derive(Clone, Copy, Debug)]
pub(crate) struct Plausible {
    /// Lowest plausible value.
    pub(crate) lo: f64,
    /// Highest plausible value.
    pub(crate) hi: f64,
    /// Values in `[lo - clamp, lo)` are set to `lo` (packing noise below zero humidity).
    pub(crate) clamp_below: f64,
    /// Units of `lo`/`hi` for the message.
    pub(crate) units: &'static str,
    /// What to say when the range is broken.
    pub(crate) hint: &'static str,
}

/// [`Plausible`] in `f32`, for the decoding loop.
#[derive(Clone, Copy, Debug)]
pub(crate) struct Limits {
    lo: f32,
    hi: f32,
    floor: f32,
}

impl Limits {
    /// No limits: nothing is implausible, nothing is clamped.
    const NONE: Limits = Limits {
        lo: f32::NEG_INFINITY,
        hi: f32::INFINITY,
        floor: f32::NEG_INFINITY,
    };

    fn of(p: &Plausible) -> Limits {
        Limits {
            lo: p.lo as f32,
            hi: p.hi as f32,
            floor: (p.lo - p.clamp_below) as f32,
        }
    }

    /// Clamp a value a little below `lo` up to `lo`; false when the value is implausible.
    /// `NaN` (missing) passes.
    #[inline]
    fn admit(self, v: &mut f32) -> bool {
        if *v < self.lo {
            if *v >= self.floor {
                *v = self.lo;
                return true;
            }
            return false;
        }
        v.is_nan() || *v <= self.hi
    }
}

/// What to read and how to convert it.
pub(crate) struct FieldRequest<'a, 'v> {
    /// The file, for error messages.
    pub(crate) file: &'a str,
    /// The variable.
    pub(crate) var: &'a Variable<'v>,
    /// Where each canonical axis sits among the variable's dimensions.
    pub(crate) axes: AxisPositions,
    /// Reverse the level axis (top-down in the file).
    pub(crate) reverse_levels: bool,
    /// Conversion from the unpacked file units to SI.
    pub(crate) to_si: Linear,
    /// Plausibility range, if any.
    pub(crate) check: Option<Plausible>,
}

/// A field in canonical order `[member, time, level, lat, lon]` (absent axes have length 1).
pub(crate) struct Canonical {
    pub(crate) shape: [usize; 5],
    pub(crate) data: Vec<f32>,
}

/// Numeric attribute values as `f64`, `None` for a missing or non-numeric attribute.
pub(crate) fn attr_numbers(var: &Variable<'_>, name: &str) -> Option<Vec<f64>> {
    let value = var.attribute_value(name)?.ok()?;
    numbers_of(value)
}

fn numbers_of(value: AttributeValue) -> Option<Vec<f64>> {
    use AttributeValue as A;
    Some(match value {
        A::Uchar(x) => vec![f64::from(x)],
        A::Uchars(x) => x.into_iter().map(f64::from).collect(),
        A::Schar(x) => vec![f64::from(x)],
        A::Schars(x) => x.into_iter().map(f64::from).collect(),
        A::Ushort(x) => vec![f64::from(x)],
        A::Ushorts(x) => x.into_iter().map(f64::from).collect(),
        A::Short(x) => vec![f64::from(x)],
        A::Shorts(x) => x.into_iter().map(f64::from).collect(),
        A::Uint(x) => vec![f64::from(x)],
        A::Uints(x) => x.into_iter().map(f64::from).collect(),
        A::Int(x) => vec![f64::from(x)],
        A::Ints(x) => x.into_iter().map(f64::from).collect(),
        A::Ulonglong(x) => vec![x as f64],
        A::Ulonglongs(x) => x.into_iter().map(|v| v as f64).collect(),
        A::Longlong(x) => vec![x as f64],
        A::Longlongs(x) => x.into_iter().map(|v| v as f64).collect(),
        A::Float(x) => vec![f64::from(x)],
        A::Floats(x) => x.into_iter().map(f64::from).collect(),
        A::Double(x) => vec![x],
        A::Doubles(x) => x,
        A::Str(_) | A::Strs(_) => return None,
    })
}

/// Whether an attribute is stored as a floating-point type.
fn attr_is_float(var: &Variable<'_>, name: &str) -> bool {
    matches!(
        var.attribute_value(name).and_then(Result::ok),
        Some(
            AttributeValue::Float(_)
                | AttributeValue::Floats(_)
                | AttributeValue::Double(_)
                | AttributeValue::Doubles(_)
        )
    )
}

/// A text attribute (a list of strings is joined with blanks).
pub(crate) fn attr_text(var: &Variable<'_>, name: &str) -> Option<String> {
    match var.attribute_value(name)?.ok()? {
        AttributeValue::Str(s) => Some(s),
        AttributeValue::Strs(v) => Some(v.join(" ")),
        _ => None,
    }
}

/// How the raw values of a variable are stored.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub(crate) enum Storage {
    /// Read directly as `f32` without loss (f32, and integers of 16 bits or fewer).
    Narrow { is_f32: bool, is_integer: bool },
    /// Read as `f64` a slab at a time (f64, 32- and 64-bit integers).
    Wide { is_integer: bool },
}

pub(crate) fn storage_of(
    file: &str,
    var: &Variable<'_>,
) -> Result<(Storage, Option<f64>), IngestError> {
    // The netCDF default fill value of each type applies when `_FillValue` is absent
    // (NetCDF User Guide, "Attribute Conventions"; values from netcdf.h). Byte types have no
    // default fill by that convention.
    let t = var.vartype();
    Ok(match t {
        NcVariableType::Float(FloatType::F32) => (
            Storage::Narrow {
                is_f32: true,
                is_integer: false,
            },
            Some(f64::from(9.969_21e36_f32)),
        ),
        NcVariableType::Float(FloatType::F64) => (
            Storage::Wide { is_integer: false },
            Some(9.969_209_968_386_869e36),
        ),
        NcVariableType::Int(i) => {
            let (narrow, fill) = match i {
                IntType::I8 | IntType::U8 => (true, None),
                IntType::I16 => (true, Some(-32767.0)),
                IntType::U16 => (true, Some(65535.0)),
                IntType::I32 => (false, Some(-2_147_483_647.0)),
                IntType::U32 => (false, Some(4_294_967_295.0)),
                IntType::I64 => (false, Some(-9_223_372_036_854_775_806.0)),
                IntType::U64 => (false, Some(18_446_744_073_709_551_614.0)),
            };
            if narrow {
                (
                    Storage::Narrow {
                        is_f32: false,
                        is_integer: true,
                    },
                    fill,
                )
            } else {
                (Storage::Wide { is_integer: true }, fill)
            }
        }
        _ => {
            return Err(IngestError::Layout {
                file: file.to_string(),
                variable: var.name(),
                detail: "has a non-numeric type: expected a float or integer variable".into(),
            })
        }
    })
}

/// Masking and unpacking rules of one variable, all in raw (packed) units.
#[derive(Clone, Debug)]
pub(crate) struct Decoder {
    fills: Vec<f64>,
    raw_min: Option<f64>,
    raw_max: Option<f64>,
    compare_as_f32: bool,
    linear: Linear,
}

impl Decoder {
    /// Build from the variable's attributes.
    ///
    /// # Method
    /// CF conventions §2.5.1 and §8.1: values equal to `_FillValue` or `missing_value`, or
    /// outside `valid_range` / `valid_min` / `valid_max`, are missing; the rest are unpacked
    /// as `raw * scale_factor + add_offset`. The valid limits are compared with the raw values
    /// when they have the variable's own (packed) type; when a packed integer variable gives
    /// them as floats they are taken as unpacked values (NetCDF User Guide convention) and
    /// packed before comparing.
    pub(crate) fn new(
        file: &str,
        var: &Variable<'_>,
        storage: Storage,
        default_fill: Option<f64>,
        to_si: Linear,
    ) -> Result<Decoder, IngestError> {
        let single = |name: &str| -> Result<Option<f64>, IngestError> {
            match attr_numbers(var, name) {
                None => Ok(None),
                Some(v) => match v.as_slice() {
                    [x] if x.is_finite() => Ok(Some(*x)),
                    _ => Err(IngestError::Attribute {
                        file: file.to_string(),
                        variable: var.name(),
                        attribute: name.to_string(),
                        detail: "expected one finite number".into(),
                    }),
                },
            }
        };
        let scale = single("scale_factor")?.unwrap_or(1.0);
        let offset = single("add_offset")?.unwrap_or(0.0);
        if scale == 0.0 {
            return Err(IngestError::Attribute {
                file: file.to_string(),
                variable: var.name(),
                attribute: "scale_factor".into(),
                detail: "is zero".into(),
            });
        }
        let mut fills = Vec::new();
        match attr_numbers(var, "_FillValue") {
            Some(v) => fills.extend(v),
            None => fills.extend(default_fill),
        }
        if let Some(v) = attr_numbers(var, "missing_value") {
            fills.extend(v);
        }
        let is_integer = match storage {
            Storage::Narrow { is_integer, .. } | Storage::Wide { is_integer } => is_integer,
        };
        let to_raw = |x: f64, name: &str| -> f64 {
            if is_integer && attr_is_float(var, name) && (scale != 1.0 || offset != 0.0) {
                (x - offset) / scale
            } else {
                x
            }
        };
        let (mut raw_min, mut raw_max) = (None, None);
        if let Some(r) = attr_numbers(var, "valid_range") {
            match r.as_slice() {
                [lo, hi] if lo <= hi => {
                    let (a, b) = (to_raw(*lo, "valid_range"), to_raw(*hi, "valid_range"));
                    raw_min = Some(a.min(b));
                    raw_max = Some(a.max(b));
                }
                _ => {
                    return Err(IngestError::Attribute {
                        file: file.to_string(),
                        variable: var.name(),
                        attribute: "valid_range".into(),
                        detail: "expected two numbers, low then high".into(),
                    })
                }
            }
        }
        if let Some(lo) = single("valid_min")? {
            raw_min = Some(to_raw(lo, "valid_min"));
        }
        if let Some(hi) = single("valid_max")? {
            raw_max = Some(to_raw(hi, "valid_max"));
        }
        let compare_as_f32 = matches!(storage, Storage::Narrow { is_f32: true, .. });
        Ok(Decoder {
            fills,
            raw_min,
            raw_max,
            compare_as_f32,
            linear: Linear { scale, offset }.then(to_si),
        })
    }

    /// Decode raw values read as `f32` (f32 variables and integers of 16 bits or fewer, all
    /// exact in `f32`) in place: one tight pass, no allocation.
    /// With `limits`, also checks plausibility in the same pass and returns the first
    /// implausible index (the pass still decodes every value).
    pub(crate) fn decode_narrow_in_place(
        &self,
        data: &mut [f32],
        limits: Option<Limits>,
    ) -> Option<usize> {
        let fills: Vec<f32> = self.fills.iter().map(|&f| f as f32).collect();
        // A third or later fill value is rare: those become NaN first (missing either way),
        // so that the main pass compares with two.
        if let Some(more) = fills.get(2..).filter(|m| !m.is_empty()) {
            for v in data.iter_mut() {
                if more.contains(v) {
                    *v = f32::NAN;
                }
            }
        }
        let (fill0, fill1) = match fills.as_slice() {
            [] => (f32::NAN, f32::NAN),
            [a] => (*a, f32::NAN),
            [a, b, ..] => (*a, *b),
        };
        let pass = DecodePass {
            fill0,
            fill1,
            min: f32_at_least(self.raw_min.unwrap_or(f64::NEG_INFINITY)),
            max: f32_at_most(self.raw_max.unwrap_or(f64::INFINITY)),
            scale: self.linear.scale,
            offset: self.linear.offset,
            limits: limits.unwrap_or(Limits::NONE),
        };
        let implausible = decode_pass(self.linear == Linear::IDENTITY, &pass, data);
        if !implausible {
            return None;
        }
        // `admit` leaves an implausible value as it is, so the same test finds the first.
        let l = limits?;
        data.iter().position(|&v| {
            let mut x = v;
            !l.admit(&mut x)
        })
    }

    /// [`Decoder::decode_narrow_in_place`] in pieces on the caller's rayon pool, for data
    /// far larger than the cache (a whole step read chunk by chunk: 77 MB of the 0.5° cycle,
    /// 10 ms on one core); the same values and the same first implausible index.
    pub(crate) fn decode_narrow_in_pieces(
        &self,
        data: &mut [f32],
        limits: Option<Limits>,
    ) -> Option<usize> {
        const PIECE: usize = 1 << 18;
        data.par_chunks_mut(PIECE)
            .enumerate()
            .filter_map(|(n, piece)| {
                let i = self.decode_narrow_in_place(piece, limits)?;
                Some(n * PIECE + i)
            })
            .min()
    }

    /// One raw value to SI, `NaN` when missing.
    #[inline]
    pub(crate) fn decode(&self, raw: f64) -> f32 {
        if !raw.is_finite() {
            return f32::NAN;
        }
        if self.compare_as_f32 {
            let r = raw as f32;
            if self.fills.iter().any(|&f| r == f as f32) {
                return f32::NAN;
            }
        } else if self.fills.contains(&raw) {
            return f32::NAN;
        }
        if self.raw_min.is_some_and(|m| raw < m) || self.raw_max.is_some_and(|m| raw > m) {
            return f32::NAN;
        }
        self.linear.apply(raw) as f32
    }
}

/// The constants of one decoding pass over raw `f32` values.
struct DecodePass {
    /// Fill values (`NaN` when absent: nothing equals it).
    fill0: f32,
    fill1: f32,
    /// Valid range of the raw values (infinite when absent), as the nearest `f32` inside
    /// it ([`f32_at_least`], [`f32_at_most`]): for `f32` raw values the same test as with
    /// the `f64` bounds, without widening every value.
    min: f32,
    max: f32,
    /// Unpacking and conversion to SI: `raw * scale + offset`.
    scale: f64,
    offset: f64,
    /// Plausibility limits ([`Limits::NONE`] when none).
    limits: Limits,
}

/// The smallest `f32` at least `x`: for any `f32` value `r`, `r < x` exactly when
/// `r < f32_at_least(x)` (`NaN` stays `NaN`, so that nothing compares below it).
fn f32_at_least(x: f64) -> f32 {
    let r = x as f32;
    if f64::from(r) >= x || r.is_nan() {
        return r;
    }
    // `r < x`, so `r` is finite or −∞: the next `f32` up.
    if r == 0.0 {
        f32::from_bits(1)
    } else if r > 0.0 {
        f32::from_bits(r.to_bits() + 1)
    } else {
        f32::from_bits(r.to_bits() - 1)
    }
}

/// The largest `f32` at most `x`: `r > x` exactly when `r > f32_at_most(x)`.
fn f32_at_most(x: f64) -> f32 {
    -f32_at_least(-x)
}

/// One decoding pass without a branch on the data (selects only), so that it compiles to
/// SIMD lanes: missing values to `NaN`, the rest unpacked (unless `IDENTITY`), then the
/// plausibility test of [`Limits::admit`] (values a little below the lower limit clamped up
/// to it). Returns whether some value was implausible; those are left as they are.
#[inline(always)]
fn decode_lanes<const IDENTITY: bool>(p: &DecodePass, data: &mut [f32]) -> bool {
    let mut bad = false;
    for v in data.iter_mut() {
        let r = *v;
        let rd = f64::from(r);
        let missing = !r.is_finite() | (r == p.fill0) | (r == p.fill1) | (r < p.min) | (r > p.max);
        let x = if IDENTITY {
            r
        } else {
            (rd * p.scale + p.offset) as f32
        };
        let x = if missing { f32::NAN } else { x };
        let l = p.limits;
        let below = x < l.lo;
        let clamp = below & (x >= l.floor);
        bad |= (below & !clamp) | (x > l.hi);
        *v = if clamp { l.lo } else { x };
    }
    bad
}

/// [`decode_lanes`] with its constant chosen at run time.
#[inline(always)]
fn decode_body(identity: bool, p: &DecodePass, data: &mut [f32]) -> bool {
    if identity {
        decode_lanes::<true>(p, data)
    } else {
        decode_lanes::<false>(p, data)
    }
}

lane_builds! {
    /// The decoding pass in the build `lanes` names.
    fn decode_in(identity: bool, p: &DecodePass, data: &mut [f32]) -> bool = decode_body;
}

/// The decoding pass, in the widest SIMD build the processor has.
fn decode_pass(identity: bool, p: &DecodePass, data: &mut [f32]) -> bool {
    decode_in(Lanes::widest(), identity, p, data)
}

fn read_error(file: &str, var: &Variable<'_>, e: netcdf::Error) -> IngestError {
    IngestError::Read {
        file: file.to_string(),
        variable: var.name(),
        detail: e.to_string().to_lowercase(),
    }
}

/// What [`StepwiseField::read_planned`] did with a step.
enum Planned {
    /// Read it by the chunk plan.
    Read,
    /// Read nothing: the library reads the step. `failed` is the planned read's own error
    /// where it failed (a damaged chunk there names its step, levels and byte offset, which
    /// the library's message does not), told with the library's should that fail too.
    ToLibrary { failed: Option<IngestError> },
}

/// The library's read error `library`, with the planned read's `planned` of the same step
/// before it where that failed as well.
fn with_planned_error(library: IngestError, planned: Option<IngestError>) -> IngestError {
    match (library, planned) {
        (
            IngestError::Read {
                file,
                variable,
                detail,
            },
            Some(IngestError::Read { detail: ours, .. }),
        ) => IngestError::Read {
            file,
            variable,
            detail: format!("{ours}; the NetCDF library: {detail}"),
        },
        (library, _) => library,
    }
}

/// A variable read and decoded in file order.
struct Decoded {
    /// The variable's shape in the file.
    shape: Vec<usize>,
    /// SI values, file order.
    data: Vec<f32>,
    /// The first implausible flat index, if any (decoding stopped there).
    bad: Option<usize>,
}

/// Read and decode.
fn read_decoded(req: &FieldRequest<'_, '_>) -> Result<Decoded, IngestError> {
    let var = req.var;
    let shape: Vec<usize> = var.dimensions().iter().map(|d| d.len()).collect();
    let total = value_count(req.file, var, &shape)?;
    let (storage, default_fill) = storage_of(req.file, var)?;
    let decoder = Decoder::new(req.file, var, storage, default_fill, req.to_si)?;
    let mut data: Vec<f32> = crate::buffers::zeroed_field(total);
    let limits = req.check.as_ref().map(Limits::of);
    let mut bad: Option<usize> = None;
    match storage {
        Storage::Narrow { .. } => {
            bad = read_narrow_in_bands(
                (req.file, var, &shape),
                &[],
                (&decoder, limits),
                BAND_VALUES,
                &mut data,
            )?;
        }
        Storage::Wide { .. } => {
            // Leading dimensions are iterated one index at a time until the slab is at most
            // a quarter of the field (or only the last two dimensions are left).
            let mut lead = 0usize;
            let mut slabs = 1usize;
            while lead + 2 < shape.len() && slabs < 4 {
                slabs *= shape.get(lead).copied().unwrap_or(1);
                lead += 1;
            }
            let slab_len: usize = shape.iter().skip(lead).product();
            let mut slab = vec![0f64; slab_len];
            let lead_shape: Vec<usize> = shape.iter().take(lead).copied().collect();
            for (s, chunk) in data.chunks_mut(slab_len.max(1)).enumerate() {
                if s > 0 {
                    stop_point(req.file, var)?;
                }
                let mut rem = s;
                let mut idx = vec![0usize; lead];
                for (k, n) in lead_shape.iter().enumerate().rev() {
                    if let Some(slot) = idx.get_mut(k) {
                        *slot = rem % n.max(&1);
                    }
                    rem /= n.max(&1);
                }
                let mut extents: Vec<Extent> =
                    idx.iter().map(|&i| Extent::from(i..i + 1)).collect();
                extents.extend(std::iter::repeat_n(Extent::from(..), shape.len() - lead));
                var.get_values_into::<f64, _>(&mut slab, extents)
                    .map_err(|e| read_error(req.file, var, e))?;
                for (j, (out, raw)) in chunk.iter_mut().zip(slab.iter()).enumerate() {
                    *out = decoder.decode(*raw);
                    if let Some(l) = limits {
                        if !l.admit(out) {
                            bad = Some(s * slab_len + j);
                            break;
                        }
                    }
                }
                if bad.is_some() {
                    break;
                }
            }
        }
    }
    Ok(Decoded { shape, data, bad })
}

/// Values per read of [`read_narrow_in_bands`]: a megabyte of `f32`, so that the decoding
/// pass finds each band still in the core's cache (a level of a 0.5° grid; a quarter of a
/// level at 0.25°).
const BAND_VALUES: usize = 1 << 18;

/// Reads the hyperslab of `var` (of file `shape`) that fixes its leading indices to `fixed`
/// and spans the other dimensions whole, into `out` (file order, one value per element),
/// and decodes it; returns the first implausible index in `out`, if any (reading stops at
/// the band that holds it, so later values of `out` are left unread).
///
/// Contiguous variables are read and decoded about `band` values ([`BAND_VALUES`]) at a
/// time: the decoding pass then runs on values the read has just brought into the cache,
/// instead of a second trip through memory over the whole field. Chunked variables are read
/// in one call (a band narrower than a chunk would make the library decompress the chunk
/// again per band).
fn read_narrow_in_bands(
    (file, var, shape): (&str, &Variable<'_>, &[usize]),
    fixed: &[usize],
    (decoder, limits): (&Decoder, Option<Limits>),
    band: usize,
    out: &mut [f32],
) -> Result<Option<usize>, IngestError> {
    let one = |i: usize| Extent::from(i..i + 1);
    let rest = shape.get(fixed.len()..).unwrap_or(&[]);
    let contiguous = var
        .chunking()
        .map_err(|e| read_error(file, var, e))?
        .is_none();
    // The split dimension `d` (of `rest`): the first whose trailing dimensions fit a band.
    let split = (0..rest.len()).find(|&d| rest[d + 1..].iter().product::<usize>() <= band);
    let (Some(d), true) = (split, contiguous) else {
        if fixed.is_empty() {
            read_in_chunk_slabs((file, var, shape), out)?;
        } else {
            let mut extents: Vec<Extent> = fixed.iter().map(|&i| one(i)).collect();
            extents.extend(rest.iter().map(|&n| Extent::from(0..n)));
            var.get_values_into::<f32, _>(out, extents)
                .map_err(|e| read_error(file, var, e))?;
        }
        return Ok(decoder.decode_narrow_in_place(out, limits));
    };
    let inner: usize = rest[d + 1..].iter().product();
    let per = (band / inner.max(1)).clamp(1, rest[d].max(1));
    let outer: usize = rest[..d].iter().product();
    let mut idx = vec![0usize; d];
    let mut at = 0usize;
    for o in 0..outer {
        // The indices of the dimensions before the split, for outer block `o`.
        let mut rem = o;
        for k in (0..d).rev() {
            idx[k] = rem % rest[k];
            rem /= rest[k];
        }
        let mut start = 0usize;
        while start < rest[d] {
            if at > 0 {
                stop_point(file, var)?;
            }
            let end = (start + per).min(rest[d]);
            let len = (end - start) * inner;
            let Some(part) = out.get_mut(at..at + len) else {
                return Err(short_buffer(file, var));
            };
            let mut extents: Vec<Extent> = fixed.iter().chain(&idx).map(|&i| one(i)).collect();
            extents.push(Extent::from(start..end));
            extents.extend(rest[d + 1..].iter().map(|&n| Extent::from(0..n)));
            var.get_values_into::<f32, _>(part, extents)
                .map_err(|e| read_error(file, var, e))?;
            if let Some(i) = decoder.decode_narrow_in_place(part, limits) {
                return Ok(Some(at + i));
            }
            at += len;
            start = end;
        }
    }
    Ok(None)
}

/// Reads the whole of a variable stored in chunks (maybe compressed) into `out` (file
/// order, as stored), a slab of whole chunks at a time, so that a stopping process
/// ([`crate::netcdf_session::stop_reads`]) need not wait for the rest of a large variable.
///
/// The slabs run along the first dimension that is cut into several chunks, one chunk deep
/// and whole along every other dimension: each chunk is read (and decompressed) once, as in
/// a read of the whole variable. Where that dimension is not the first, each slab is read
/// into a buffer of its own and put in place.
fn read_in_chunk_slabs(
    (file, var, shape): (&str, &Variable<'_>, &[usize]),
    out: &mut [f32],
) -> Result<(), IngestError> {
    let chunks = var
        .chunking()
        .map_err(|e| read_error(file, var, e))?
        .unwrap_or_default();
    let cut = (0..shape.len())
        .find(|&d| chunks.get(d).is_some_and(|&c| c > 0 && c < shape[d]))
        .and_then(|d| Some((d, *chunks.get(d)?)));
    let Some((d, depth)) = cut else {
        return var
            .get_values_into::<f32, _>(out, ..)
            .map_err(|e| read_error(file, var, e));
    };
    let outer: usize = shape[..d].iter().product();
    let inner: usize = shape[d + 1..].iter().product();
    let mut slab = Vec::new();
    let mut start = 0usize;
    while start < shape[d] {
        if start > 0 {
            stop_point(file, var)?;
        }
        let end = (start + depth).min(shape[d]);
        let extents: Vec<Extent> = shape
            .iter()
            .enumerate()
            .map(|(i, &n)| Extent::from(if i == d { start..end } else { 0..n }))
            .collect();
        let piece = (end - start) * inner;
        if d == 0 {
            let part = out
                .get_mut(start * inner..end * inner)
                .ok_or_else(|| short_buffer(file, var))?;
            var.get_values_into::<f32, _>(part, extents)
                .map_err(|e| read_error(file, var, e))?;
        } else {
            slab.resize(outer * piece, 0f32);
            var.get_values_into::<f32, _>(&mut slab, extents)
                .map_err(|e| read_error(file, var, e))?;
            for (o, from) in slab.chunks_exact(piece.max(1)).enumerate() {
                let at = (o * shape[d] + start) * inner;
                out.get_mut(at..at + piece)
                    .ok_or_else(|| short_buffer(file, var))?
                    .copy_from_slice(from);
            }
        }
        start = end;
    }
    Ok(())
}

/// Where a read of a whole variable may stop: between two of its slabs, once the process is
/// stopping.
fn stop_point(file: &str, var: &Variable<'_>) -> Result<(), IngestError> {
    if crate::netcdf_session::reads_stopped() {
        return Err(IngestError::StoppedInVariable {
            file: file.to_string(),
            variable: var.name(),
        });
    }
    Ok(())
}

fn short_buffer(file: &str, var: &Variable<'_>) -> IngestError {
    IngestError::Read {
        file: file.to_string(),
        variable: var.name(),
        detail: "the buffer is shorter than the variable".to_string(),
    }
}

/// The error for the implausible `value` at flat index `i` (file order).
fn implausible(req: &FieldRequest<'_, '_>, shape: &[usize], value: f32, i: usize) -> IngestError {
    let names: Vec<String> = req.var.dimensions().iter().map(|d| d.name()).collect();
    let mut rem = i;
    let mut idx = vec![0usize; shape.len()];
    for (k, n) in shape.iter().enumerate().rev() {
        if let Some(slot) = idx.get_mut(k) {
            *slot = rem % (*n).max(1);
        }
        rem /= (*n).max(1);
    }
    let index = names
        .iter()
        .zip(idx.iter())
        .map(|(n, i)| format!("{n}={i}"))
        .collect::<Vec<_>>()
        .join(", ");
    let (lo, hi, units, hint) = match &req.check {
        Some(c) => (c.lo, c.hi, c.units, c.hint),
        None => (f64::NAN, f64::NAN, "", ""),
    };
    IngestError::Implausible {
        file: req.file.to_string(),
        variable: req.var.name(),
        found: Box::new(super::Implausibility {
            value: f64::from(value),
            units,
            index: format!("[{index}]"),
            range: format!("{lo}-{hi} {units}"),
            hint,
        }),
    }
}

/// Reverse axis of length `n` between `outer` leading and `inner` trailing elements, in
/// place.
pub(crate) fn reverse_axis_in_place<T>(data: &mut [T], outer: usize, n: usize, inner: usize) {
    if n < 2 || inner == 0 {
        return;
    }
    for o in 0..outer {
        let Some(block) = data.get_mut(o * n * inner..(o + 1) * n * inner) else {
            return;
        };
        for k in 0..n / 2 {
            let (head, tail) = block.split_at_mut((n - 1 - k) * inner);
            if let (Some(a), Some(b)) = (
                head.get_mut(k * inner..(k + 1) * inner),
                tail.get_mut(..inner),
            ) {
                a.swap_with_slice(b);
            }
        }
    }
}

/// The canonical shape `[member, time, level, lat, lon]` of a variable of `file_shape`.
fn canonical_shape(axes: &AxisPositions, file_shape: &[usize]) -> [usize; 5] {
    let mut shape = [1usize; 5];
    for (c, pos) in axes.iter().enumerate() {
        if let (Some(p), Some(slot)) = (pos, shape.get_mut(c)) {
            *slot = file_shape.get(*p).copied().unwrap_or(1);
        }
    }
    shape
}

/// The canonical axes present, as `(file position, canonical index)` in file order; other
/// dimensions have length 1 and drop out.
fn present_axes(axes: &AxisPositions) -> Vec<(usize, usize)> {
    let mut v: Vec<(usize, usize)> = axes
        .iter()
        .enumerate()
        .filter_map(|(c, p)| p.map(|p| (p, c)))
        .collect();
    v.sort_unstable();
    v
}

/// Whether the file lists the present axes in canonical order (so that file order is
/// canonical order).
fn in_canonical_order(present: &[(usize, usize)]) -> bool {
    present.windows(2).all(|w| match w {
        [(_, a), (_, b)] => a < b,
        _ => true,
    })
}

/// The number of values of a variable of `shape`, refused when it overflows.
fn value_count(file: &str, var: &Variable<'_>, shape: &[usize]) -> Result<usize, IngestError> {
    shape
        .iter()
        .try_fold(1usize, |acc, &n| acc.checked_mul(n))
        .ok_or_else(|| IngestError::Layout {
            file: file.to_string(),
            variable: var.name(),
            detail: "is too large to address".into(),
        })
}

/// A field whose values are read one (member, time) step at a time, after the rest of the
/// cycle, so that work on the first steps can start while later ones are still being read
/// (see [`super::read_cycle_overlapped`]).
///
/// Planned only where a step is one contiguous run of the file: values stored as `f32` (or
/// narrow integers), dimensions in canonical order, and storage contiguous or in chunks of
/// one member and one time step. Each step goes through the same decoding
/// pass, plausibility test and level reversal as a whole-variable read, so the values are
/// the same bit for bit.
pub(crate) struct StepwiseField<'f> {
    var: Variable<'f>,
    file_shape: Vec<usize>,
    axes: AxisPositions,
    reverse_levels: bool,
    to_si: Linear,
    check: Option<Plausible>,
    decoder: Decoder,
    shape: [usize; 5],
    /// Stored as `f32` (not as narrow integers the library widens).
    stored_f32: bool,
    /// Whole steps read chunk by chunk without the library, where planned
    /// ([`StepwiseField::plan_chunk_reads`]).
    chunks: Option<super::chunks::StepChunks>,
    /// Whether the plan in `chunks` agreed with the library on the first step read (unset
    /// until then; see [`StepwiseField::read_planned`]).
    plan_agrees: std::sync::OnceLock<bool>,
}

impl<'f> StepwiseField<'f> {
    /// The plan for `req`, or `None` when its layout needs a whole-variable read.
    pub(crate) fn plan(req: &FieldRequest<'_, 'f>) -> Result<Option<Self>, IngestError> {
        let var = req.var;
        let file_shape: Vec<usize> = var.dimensions().iter().map(|d| d.len()).collect();
        value_count(req.file, var, &file_shape)?;
        let (storage, default_fill) = storage_of(req.file, var)?;
        if !matches!(storage, Storage::Narrow { .. })
            || !in_canonical_order(&present_axes(&req.axes))
        {
            return Ok(None);
        }
        // A chunk that spans several members or time steps would be decompressed once per
        // step read (the library's chunk cache holds far less than a step of them).
        let chunks = var.chunking().map_err(|e| read_error(req.file, var, e))?;
        let spans_steps = |chunks: &[usize]| {
            req.axes[..2]
                .iter()
                .flatten()
                .any(|&d| chunks.get(d).is_some_and(|&n| n > 1))
        };
        if chunks.as_deref().is_some_and(spans_steps) {
            return Ok(None);
        }
        let stored_f32 = matches!(storage, Storage::Narrow { is_f32: true, .. });
        let decoder = Decoder::new(req.file, var, storage, default_fill, req.to_si)?;
        Ok(Some(Self {
            stored_f32,
            chunks: None,
            plan_agrees: std::sync::OnceLock::new(),
            var: var.clone(),
            shape: canonical_shape(&req.axes, &file_shape),
            file_shape,
            axes: req.axes,
            reverse_levels: req.reverse_levels,
            to_si: req.to_si,
            check: req.check,
            decoder,
        }))
    }

    /// The canonical shape `[member, time, level, lat, lon]`.
    pub(crate) fn shape(&self) -> [usize; 5] {
        self.shape
    }

    /// The variable's name in the file.
    pub(crate) fn name(&self) -> String {
        self.var.name()
    }

    /// Reads and decodes step (`member`, `time`) into `out`, `[level, lat, lon]`
    /// bottom-up, SI units; `out` has exactly one step's length.
    pub(crate) fn read_step(
        &self,
        file: &str,
        member: usize,
        time: usize,
        out: &mut [f32],
    ) -> Result<(), IngestError> {
        // Dimensions are in canonical order: the member and time dimensions, where the file
        // has them, lead.
        let fixed: Vec<usize> = [(self.axes[0], member), (self.axes[1], time)]
            .iter()
            .filter_map(|&(axis, i)| axis.map(|_| i))
            .collect();
        let limits = self.check.as_ref().map(Limits::of);
        let bad = match self.read_planned((member, time), out)? {
            Planned::Read => self.decoder.decode_narrow_in_pieces(out, limits),
            Planned::ToLibrary { failed } => read_narrow_in_bands(
                (file, &self.var, &self.file_shape),
                &fixed,
                (&self.decoder, limits),
                BAND_VALUES,
                out,
            )
            .map_err(|e| with_planned_error(e, failed))?,
        };
        if let Some(i) = bad {
            // File order is canonical order here, steps first.
            let step = member * self.shape[1] + time;
            let value = out.get(i).copied().unwrap_or(f32::NAN);
            return Err(self.implausible_at(file, value, step * out.len() + i));
        }
        if self.reverse_levels {
            let [_, _, z, y, x] = self.shape;
            reverse_axis_in_place(out, 1, z, y * x);
        }
        Ok(())
    }

    /// Whether [`StepwiseField::read_rows_raw`] reads a band narrower than a step: the
    /// variable is stored contiguously with latitude and longitude dimensions. Otherwise
    /// (chunked, maybe compressed, storage) a band would cost the decompression of whole
    /// chunks again and again, and only whole steps should be read.
    pub(crate) fn reads_bands(&self, file: &str) -> Result<bool, IngestError> {
        let contiguous = self
            .var
            .chunking()
            .map_err(|e| read_error(file, &self.var, e))?
            .is_none();
        Ok(contiguous && self.axes[3].is_some() && self.axes[4].is_some())
    }

    /// Reads latitude rows `rows` of step (`member`, `time`) into `out`, `[level, row, lon]`
    /// in the file's level order, as stored: [`StepwiseField::band_decoding`] makes them the
    /// values [`StepwiseField::read_step`] gives, on any thread. `out` has exactly the band's
    /// length. Bands narrower than a step only where [`StepwiseField::reads_bands`] (the
    /// caller asks once: it is a library call).
    pub(crate) fn read_rows_raw(
        &self,
        file: &str,
        (member, time): (usize, usize),
        rows: std::ops::Range<usize>,
        out: &mut [f32],
    ) -> Result<(), IngestError> {
        let [_, _, z, y, x] = self.shape;
        if rows.end > y || out.len() != z * rows.len() * x {
            return Err(IngestError::Read {
                file: file.to_string(),
                variable: self.var.name(),
                detail: format!(
                    "cannot read rows {}..{} of {y} into {} values",
                    rows.start,
                    rows.end,
                    out.len()
                ),
            });
        }
        let failed = match rows == (0..y) {
            true => match self.read_planned((member, time), out)? {
                Planned::Read => return Ok(()),
                Planned::ToLibrary { failed } => failed,
            },
            false => None,
        };
        let mut extents: Vec<Extent> = Vec::with_capacity(5);
        for (axis, i) in [(self.axes[0], member), (self.axes[1], time)] {
            if axis.is_some() {
                extents.push(Extent::from(i..i + 1));
            }
        }
        for (axis, range) in [
            (self.axes[2], 0..z),
            (self.axes[3], rows),
            (self.axes[4], 0..x),
        ] {
            if axis.is_some() {
                extents.push(Extent::from(range));
            }
        }
        self.var
            .get_values_into::<f32, _>(out, extents)
            .map_err(|e| with_planned_error(read_error(file, &self.var, e), failed))
    }

    /// Plans whole-step reads chunk by chunk without the library ([`super::chunks`]) for a
    /// field stored as little-endian `f32` in chunks of one step each, behind no filters but
    /// deflate and shuffle, in the file at `path`; checked against the library on the first
    /// step read ([`StepwiseField::read_planned`]). Leaves the field as it is otherwise.
    /// `own` is the file opened before the library opened it (none: no plan). The caller
    /// holds the NetCDF session.
    pub(crate) fn plan_chunk_reads(
        &mut self,
        path: &std::path::Path,
        own: Option<&std::fs::File>,
        label: &str,
    ) {
        let Some(own) = own else {
            return;
        };
        let little = matches!(
            (self.var.endianness(), cfg!(target_endian = "little")),
            (Ok(netcdf::Endianness::Little), _) | (Ok(netcdf::Endianness::Native), true)
        );
        let Ok(Some(chunk_dims)) = self.var.chunking() else {
            return;
        };
        let same_size =
            self.file_shape.iter().product::<usize>() == self.shape.iter().product::<usize>();
        if !(self.stored_f32 && little && same_size && self.file_shape.len() == chunk_dims.len()) {
            return;
        }
        let variable = super::chunks::ChunkedVariable {
            label,
            name: self.var.name(),
            shape: self.shape,
            present: self.axes.map(|a| a.is_some()),
            chunk_dims: &chunk_dims,
        };
        self.chunks = super::chunks::StepChunks::plan(path, own, &variable);
        self.plan_agrees = std::sync::OnceLock::new();
    }

    /// Whether whole steps are planned to be read chunk by chunk without the library
    /// (until the first step read finds that the library disagrees).
    pub(crate) fn has_chunk_plan(&self) -> bool {
        self.chunks.is_some() && self.plan_agrees.get() != Some(&false)
    }

    /// Reads `step` as stored into `out` (`[level, lat, lon]`, file order) by the planned
    /// chunk reads, and says so; [`Planned::ToLibrary`] (nothing read) where there is no plan
    /// or it did not agree with the library. The caller holds the NetCDF session.
    ///
    /// The first step read checks the plan: the library reads that step's first chunk on
    /// this thread while the planned read of the whole step runs on the others, and the two
    /// must agree bit for bit, or the plan is dropped and this step and every later one go
    /// through the library (where the library cannot read that chunk either, the plan is
    /// left unjudged until the next step read). Checked before any read instead, each
    /// field's first chunk read both ways, one field after the other, came before
    /// everything else: 17 ms of the 0.5° zlib-1 batch's 96 ms (medians of 15 alternate
    /// runs).
    fn read_planned(&self, step: (usize, usize), out: &mut [f32]) -> Result<Planned, IngestError> {
        let library_reads = Planned::ToLibrary { failed: None };
        let Some(chunks) = &self.chunks else {
            return Ok(library_reads);
        };
        match self.plan_agrees.get() {
            Some(true) => return chunks.read_step(step, out).map(|()| Planned::Read),
            Some(false) => return Ok(library_reads),
            None => {}
        }
        let [lz, ly, lx] = chunks.first_chunk_extent();
        let mut extents: Vec<Extent> = Vec::with_capacity(5);
        for (axis, range) in [
            (self.axes[0], step.0..step.0 + 1),
            (self.axes[1], step.1..step.1 + 1),
            (self.axes[2], 0..lz),
            (self.axes[3], 0..ly),
            (self.axes[4], 0..lx),
        ] {
            if axis.is_some() {
                extents.push(Extent::from(range));
            }
        }
        let mut by_library = vec![0f32; lz * ly * lx];
        let (library_read, planned_read) = std::thread::scope(|scope| {
            let planned = scope.spawn(|| chunks.read_step(step, out));
            let library = self
                .var
                .get_values_into::<f32, _>(&mut by_library, extents)
                .is_ok();
            (library, planned.join())
        });
        // A planned read that panicked counts as one that failed without saying why: the
        // library reads the step instead.
        let planned_read = match planned_read {
            Ok(Ok(())) => Ok(()),
            Ok(Err(e)) => Err(Some(e)),
            Err(_) => Err(None),
        };
        let [_, _, _, y, x] = self.shape;
        let agrees = library_read
            && planned_read.is_ok()
            && by_library
                .chunks_exact(lx.max(1))
                .enumerate()
                .all(|(i, want)| {
                    let (level, row) = (i / ly.max(1), i % ly.max(1));
                    let at = (level * y + row) * x;
                    let got = &out[at..at + lx];
                    got.iter()
                        .zip(want)
                        .all(|(a, b)| a.to_bits() == b.to_bits())
                });
        if !library_read {
            // The library cannot read the first chunk (the file is damaged there): nothing to
            // judge the plan by. The library reads the step (and says what it finds), and the
            // next step read checks the plan again.
            return Ok(Planned::ToLibrary {
                failed: planned_read.err().flatten(),
            });
        }
        // Only the thread holding the session sets it: the first value stands.
        match *self.plan_agrees.get_or_init(|| agrees) {
            true => Ok(Planned::Read),
            false => Ok(Planned::ToLibrary {
                failed: planned_read.err().flatten(),
            }),
        }
    }

    /// What makes a band read by [`StepwiseField::read_rows_raw`] SI values, bottom-up.
    pub(crate) fn band_decoding(&self) -> BandDecoding {
        BandDecoding {
            decoder: self.decoder.clone(),
            limits: self.check.as_ref().map(Limits::of),
            reverse_levels: self.reverse_levels,
            levels: self.shape[2],
        }
    }

    /// The error for the implausible `value` found by [`BandDecoding::decode`] at index `i`
    /// of the band of rows `rows` of step (`member`, `time`).
    pub(crate) fn implausible_in_band(
        &self,
        file: &str,
        (member, time): (usize, usize),
        rows: std::ops::Range<usize>,
        i: usize,
        value: f32,
    ) -> IngestError {
        let [_, times, z, y, x] = self.shape;
        let plane = (rows.len() * x).max(1);
        let (k, within) = (i / plane, i % plane);
        let step = member * times + time;
        let at = ((step * z + k) * y + rows.start + within / x.max(1)) * x + within % x.max(1);
        self.implausible_at(file, value, at)
    }

    /// The error for the implausible `value` at flat index `i` of the variable (file order).
    fn implausible_at(&self, file: &str, value: f32, i: usize) -> IngestError {
        let req = FieldRequest {
            file,
            var: &self.var,
            axes: self.axes,
            reverse_levels: self.reverse_levels,
            to_si: self.to_si,
            check: self.check,
        };
        implausible(&req, &self.file_shape, value, i)
    }
}

/// How the raw values of a band of one stepwise field become SI values, bottom-up: plain
/// data, so that the decoding runs on whichever thread takes the band.
#[derive(Clone, Debug)]
pub(crate) struct BandDecoding {
    decoder: Decoder,
    limits: Option<Limits>,
    reverse_levels: bool,
    levels: usize,
}

impl BandDecoding {
    /// Decodes `band` (`[level, row, lon]` as read) in place, with the same decoding pass,
    /// plausibility test and level reversal as a whole-variable read. On an implausible value
    /// returns its index in the band as read, before any reversal.
    pub(crate) fn decode(&self, band: &mut [f32]) -> Result<(), usize> {
        if let Some(i) = self.decoder.decode_narrow_in_pieces(band, self.limits) {
            return Err(i);
        }
        if self.reverse_levels && self.levels > 0 {
            reverse_axis_in_place(band, 1, self.levels, band.len() / self.levels);
        }
        Ok(())
    }
}

/// Read a variable into canonical order, SI units, bottom-up.
pub(crate) fn read_canonical(req: &FieldRequest<'_, '_>) -> Result<Canonical, IngestError> {
    let Decoded {
        shape: file_shape,
        mut data,
        bad,
    } = read_decoded(req)?;
    if let Some(i) = bad {
        let value = data.get(i).copied().unwrap_or(f32::NAN);
        return Err(implausible(req, &file_shape, value, i));
    }
    let shape = canonical_shape(&req.axes, &file_shape);
    let present = present_axes(&req.axes);
    if !in_canonical_order(&present) {
        let file_dims: Vec<usize> = present
            .iter()
            .map(|&(_, c)| shape.get(c).copied().unwrap_or(1))
            .collect();
        let arr =
            ndarray::ArrayViewD::from_shape(ndarray::IxDyn(&file_dims), &data).map_err(|e| {
                IngestError::Layout {
                    file: req.file.to_string(),
                    variable: req.var.name(),
                    detail: format!("cannot arrange its dimensions: {e}"),
                }
            })?;
        // Axis order that lists the present canonical axes in canonical order.
        let mut perm: Vec<usize> = (0..present.len()).collect();
        perm.sort_by_key(|&i| present.get(i).map(|&(_, c)| c).unwrap_or(usize::MAX));
        let permuted = arr.permuted_axes(ndarray::IxDyn(&perm));
        data = permuted.iter().copied().collect();
    }
    if req.reverse_levels {
        let [m, t, z, y, x] = shape;
        reverse_axis_in_place(&mut data, m * t, z, y * x);
    }
    Ok(Canonical { shape, data })
}

#[cfg(test)]
mod tests {
    use super::*;
    use proptest::prelude::*;

    /// The one-value decoding and plausibility test, the reference for the SIMD pass.
    fn decode_one(d: &Decoder, raw: f32, limits: Option<Limits>) -> (f32, bool) {
        let mut x = d.decode(f64::from(raw));
        let ok = limits.is_none_or(|l| l.admit(&mut x));
        (x, ok)
    }

    proptest! {
        // The lane pass gives what the one-value path gives (the identity keeps the sign
        // of a zero, which the one-value path's `x * 1 + 0` drops): fill values (one,
        // two or four of them), valid limits, packing and unit conversion, plausibility
        // limits with clamping, NaN and infinities in the raw data.
        #[test]
        fn lane_decoding_equals_the_one_value_path(
            raw in proptest::collection::vec(
                prop_oneof![
                    Just(f32::NAN), Just(f32::INFINITY), Just(-9999.0_f32), Just(1e20_f32),
                    Just(7.0_f32), Just(-0.0_f32), -400.0_f32..400.0_f32,
                ],
                0..300,
            ),
            fill_count in 0usize..5,
            range in proptest::option::of((-300.0_f64..0.0, 0.0_f64..300.0)),
            linear in prop_oneof![Just((1.0, 0.0)), Just((0.5, 273.15)), Just((0.01, -3.0))],
            limits in proptest::option::of((-50.0_f64..50.0, 0.0_f64..5.0, 60.0_f64..500.0)),
        ) {
            let fills: Vec<f64> = [-9999.0, 1e20, 7.0, 123.5].iter().copied().take(fill_count).collect();
            let d = Decoder {
                fills,
                raw_min: range.map(|r| r.0),
                raw_max: range.map(|r| r.1),
                compare_as_f32: true,
                linear: Linear { scale: linear.0, offset: linear.1 },
            };
            let limits = limits.map(|(lo, clamp, hi)| Limits {
                lo: lo as f32,
                hi: hi as f32,
                floor: (lo - clamp) as f32,
            });
            let mut data = raw.clone();
            let first_bad = d.decode_narrow_in_place(&mut data, limits);
            let mut want_bad = None;
            for (i, (&r, &got)) in raw.iter().zip(&data).enumerate() {
                let (want, ok) = decode_one(&d, r, limits);
                prop_assert!(
                    want == got || (want.is_nan() && got.is_nan()),
                    "value {} raw {}: {} vs {}", i, r, got, want
                );
                if !ok && want_bad.is_none() {
                    want_bad = Some(i);
                }
            }
            prop_assert_eq!(first_bad, want_bad);
        }
    }

    /// Bounds that sit on, just beside and far from `f32` values, and the special ones.
    fn bound() -> impl Strategy<Value = f64> {
        prop_oneof![
            -1e3_f64..1e3,
            any::<f32>().prop_map(f64::from),
            (any::<f32>(), -1.0_f64..1.0).prop_map(|(r, t)| f64::from(r) * (1.0 + t * 1e-8)),
            Just(0.0),
            Just(-0.0),
            Just(1e-46),
            Just(-1e-46),
            Just(f64::from(f32::MAX) * 1.000_001),
            Just(f64::INFINITY),
            Just(f64::NEG_INFINITY),
            Just(f64::NAN),
        ]
    }

    proptest! {
        // The `f32` bounds of the valid range test exactly as the `f64` ones do, for every
        // `f32` raw value (NaN included: it is below and above nothing).
        #[test]
        fn f32_bounds_test_as_the_f64_bounds(x in bound(), r in any::<f32>()) {
            let wide = f64::from(r);
            prop_assert_eq!(wide < x, r < f32_at_least(x), "{} < {}", r, x);
            prop_assert_eq!(wide > x, r > f32_at_most(x), "{} > {}", r, x);
        }
    }

    /// A `[time 3, level 5, lat 4, lon 6]` variable of raw values `i` (flat index), with
    /// 5000 at the flat indices `bad_at`, contiguous (classic format) or in chunks.
    fn banded_fixture(
        dir: &std::path::Path,
        chunked: bool,
        bad_at: &[usize],
    ) -> std::path::PathBuf {
        let path = dir.join(format!("bands-{chunked}-{}.nc", bad_at.len()));
        let options = if chunked {
            netcdf::Options::NETCDF4
        } else {
            netcdf::Options::empty()
        };
        let mut file = netcdf::create_with(&path, options).expect("create");
        for (name, n) in [("time", 3), ("plev", 5), ("lat", 4), ("lon", 6)] {
            file.add_dimension(name, n).expect("dimension");
        }
        let mut var = file
            .add_variable::<f32>("t", &["time", "plev", "lat", "lon"])
            .expect("variable");
        if chunked {
            var.set_chunking(&[1, 2, 3, 4]).expect("chunking");
        } else {
            // Classic files take data only outside define mode.
            file.enddef().expect("enddef");
        }
        let mut raw: Vec<f32> = (0..360).map(|i| i as f32).collect();
        for &i in bad_at {
            raw[i] = 5000.0;
        }
        let mut var = file.variable_mut("t").expect("t");
        var.put_values(&raw, ..).expect("values");
        path
    }

    /// A variable read whole a slab of chunks at a time holds the values written, in file
    /// order, whichever dimension its chunks cut first (with a short last slab, with
    /// compression, in one chunk).
    #[test]
    fn reads_in_chunk_slabs_give_the_values_written() {
        let _session = crate::netcdf_session::lock();
        let dir = tempfile::tempdir().expect("tempdir");
        let shape = [3usize, 5, 4, 6];
        let written: Vec<f32> = (0..360).map(|i| i as f32 * 0.25 - 17.0).collect();
        let layouts: [(&[usize], bool); 6] = [
            (&[2, 5, 4, 6], false),
            (&[3, 2, 4, 6], false),
            (&[3, 5, 3, 2], true),
            (&[3, 5, 4, 5], false),
            (&[1, 1, 1, 1], true),
            (&[3, 5, 4, 6], true),
        ];
        for (i, (chunks, deflate)) in layouts.into_iter().enumerate() {
            let path = dir.path().join(format!("slabs-{i}.nc"));
            {
                let mut file =
                    netcdf::create_with(&path, netcdf::Options::NETCDF4).expect("create");
                for (name, n) in ["time", "plev", "lat", "lon"].into_iter().zip(shape) {
                    file.add_dimension(name, n).expect("dimension");
                }
                let mut var = file
                    .add_variable::<f32>("t", &["time", "plev", "lat", "lon"])
                    .expect("variable");
                var.set_chunking(chunks).expect("chunking");
                if deflate {
                    var.set_compression(4, true).expect("compression");
                }
                var.put_values(&written, ..).expect("values");
            }
            let file = netcdf::open(&path).expect("open");
            let var = file.variable("t").expect("t");
            let mut got = vec![f32::NAN; 360];
            read_in_chunk_slabs(("f.nc", &var, &shape), &mut got).expect("read");
            let bits = |v: &[f32]| v.iter().map(|x| x.to_bits()).collect::<Vec<_>>();
            assert_eq!(bits(&got), bits(&written), "chunks {chunks:?}");
        }
    }

    /// Unpacking and conversion (raw × 0.5 + 100), a fill value and plausibility limits of
    /// 100..=2000 after decoding: raw 5000 is implausible, raw 7 is missing.
    fn scaled_decoder() -> (Decoder, Option<Limits>) {
        let decoder = Decoder {
            fills: vec![7.0],
            raw_min: None,
            raw_max: None,
            compare_as_f32: true,
            linear: Linear {
                scale: 0.5,
                offset: 100.0,
            },
        };
        let limits = Some(Limits {
            lo: 100.0,
            hi: 2000.0,
            floor: 100.0,
        });
        (decoder, limits)
    }

    /// A band long enough to be decoded in pieces on several threads decodes as one pass
    /// does (values, the first implausible index over all pieces, the level reversal).
    #[test]
    fn long_bands_decode_in_pieces_as_one_pass() {
        let (decoder, limits) = scaled_decoder();
        let bits = |v: &[f32]| v.iter().map(|x| x.to_bits()).collect::<Vec<_>>();
        // Three levels of 300,001 values: pieces of 2^18 cut across levels.
        let (levels, plane) = (3usize, 300_001usize);
        let raw: Vec<f32> = (0..levels * plane).map(|i| (i % 3000) as f32).collect();
        for bad_at in [
            vec![],
            vec![5],
            vec![(1 << 18) + 9, 2 * (1 << 18) + 1],
            vec![899_000],
        ] {
            for reverse_levels in [false, true] {
                let label = format!("bad at {bad_at:?}, reversed {reverse_levels}");
                let mut band = raw.clone();
                for &i in &bad_at {
                    band[i] = 5000.0;
                }
                let mut want = band.clone();
                let want_bad = decoder.decode_narrow_in_place(&mut want, limits);
                if reverse_levels {
                    reverse_axis_in_place(&mut want, 1, levels, plane);
                }
                let decoding = BandDecoding {
                    decoder: decoder.clone(),
                    limits,
                    reverse_levels,
                    levels,
                };
                match decoding.decode(&mut band) {
                    Ok(()) => {
                        assert_eq!(want_bad, None, "{label}");
                        assert_eq!(bits(&band), bits(&want), "{label}");
                    }
                    Err(i) => assert_eq!(Some(i), want_bad, "{label}"),
                }
                assert_eq!(want_bad, bad_at.first().copied(), "{label}");
            }
        }
    }

    #[test]
    fn reads_in_bands_equal_one_read_of_the_same_values() {
        // The NetCDF library is not thread-safe: hold the session lock, as its readers do.
        let _session = crate::netcdf_session::lock();
        let dir = tempfile::tempdir().expect("tempdir");
        let (decoder, limits) = scaled_decoder();
        // Values compared bit for bit (the missing ones are NaN).
        let bits = |v: &[f32]| v.iter().map(|x| x.to_bits()).collect::<Vec<_>>();
        let bands = [0, 1, 5, 6, 23, 24, 25, 119, 120, 121, 360, 1 << 20];
        for chunked in [false, true] {
            for bad_at in [vec![], vec![0], vec![200, 100], vec![359], vec![143, 144]] {
                let path = banded_fixture(dir.path(), chunked, &bad_at);
                let file = netcdf::open(&path).expect("open");
                let var = file.variable("t").expect("t");
                let shape = [3, 5, 4, 6];
                // The reference: every value in memory, decoded in one pass.
                let mut want: Vec<f32> = (0..360).map(|i| i as f32).collect();
                for &i in &bad_at {
                    want[i] = 5000.0;
                }
                let want_bad = decoder.decode_narrow_in_place(&mut want, limits);
                for band in bands {
                    let label = format!("chunked {chunked}, bad at {bad_at:?}, band {band}");
                    // The whole variable, then each time step on its own.
                    let mut got = vec![0f32; 360];
                    let bad = read_narrow_in_bands(
                        ("f.nc", &var, &shape),
                        &[],
                        (&decoder, limits),
                        band,
                        &mut got,
                    )
                    .expect(&label);
                    assert_eq!(bad, want_bad, "{label}");
                    let upto = bad.unwrap_or(360);
                    assert_eq!(bits(&got[..upto]), bits(&want[..upto]), "{label}");
                    for step in 0..3 {
                        let mut got = vec![0f32; 120];
                        let bad = read_narrow_in_bands(
                            ("f.nc", &var, &shape),
                            &[step],
                            (&decoder, limits),
                            band,
                            &mut got,
                        )
                        .expect(&label);
                        let range = step * 120..(step + 1) * 120;
                        let want_step = bad_at.iter().filter(|i| range.contains(i)).min();
                        assert_eq!(
                            bad,
                            want_step.map(|i| i - step * 120),
                            "{label}, step {step}"
                        );
                        let upto = bad.unwrap_or(120);
                        assert_eq!(
                            bits(&got[..upto]),
                            bits(&want[range][..upto]),
                            "{label}, step {step}"
                        );
                    }
                }
            }
        }
    }

    /// Two compressed `[time 2, level 3, lat 4, lon 5]` variables `t` and `u` of different
    /// values, chunked by whole steps (deflate and shuffle), and their values.
    fn two_compressed_fields(path: &std::path::Path) -> [Vec<f32>; 2] {
        let mut file = netcdf::create_with(path, netcdf::Options::NETCDF4).expect("create");
        for (name, n) in [("time", 2), ("plev", 3), ("lat", 4), ("lon", 5)] {
            file.add_dimension(name, n).expect("dimension");
        }
        let values = [0.25f32, -0.5].map(|k| {
            (0..120)
                .map(|i| 250.0 + k * i as f32 + (i as f32 * 0.37).sin())
                .collect::<Vec<f32>>()
        });
        for (name, v) in ["t", "u"].into_iter().zip(&values) {
            let mut var = file
                .add_variable::<f32>(name, &["time", "plev", "lat", "lon"])
                .expect("variable");
            var.set_chunking(&[1, 3, 4, 5]).expect("chunking");
            var.set_compression(1, true).expect("compression");
            var.put_values(v, ..).expect("values");
        }
        values
    }

    /// Variable `name` of `file` (a `[time, level, lat, lon]` field of
    /// [`two_compressed_fields`], written at `path`) as a stepwise field, its chunk reads
    /// planned through `own`.
    fn planned<'f>(
        file: &'f netcdf::File,
        name: &str,
        path: &std::path::Path,
        own: &std::fs::File,
    ) -> StepwiseField<'f> {
        let var = file.variable(name).expect("variable");
        let req = FieldRequest {
            file: "two.nc",
            var: &var,
            axes: [None, Some(0), Some(1), Some(2), Some(3)],
            reverse_levels: false,
            to_si: Linear {
                scale: 1.0,
                offset: 0.0,
            },
            check: None,
        };
        let mut field = StepwiseField::plan(&req).expect("plan").expect("stepwise");
        field.plan_chunk_reads(path, Some(own), "two.nc");
        field
    }

    /// The planned chunk reads are checked against the library on the first step read: a
    /// plan that agrees is kept, one that does not (here each field given the other's
    /// chunks) is dropped, and that step and every later one come from the library.
    #[test]
    fn a_plan_is_used_only_once_the_library_agrees_with_it() {
        let _session = crate::netcdf_session::lock();
        let dir = tempfile::tempdir().expect("tempdir");
        let path = dir.path().join("two.nc");
        let written = two_compressed_fields(&path);
        let own = std::fs::File::open(&path).expect("own");
        crate::hdf5::quiet_on_this_thread();
        let file = netcdf::open(&path).expect("open");
        let plan = |name| {
            let field = planned(&file, name, &path, &own);
            assert!(field.chunks.is_some(), "{}: no chunk plan", field.name());
            field
        };
        let bits = |v: &[f32]| v.iter().map(|x| x.to_bits()).collect::<Vec<_>>();
        for swapped in [false, true] {
            let [mut t, mut u] = [plan("t"), plan("u")];
            if swapped {
                std::mem::swap(&mut t.chunks, &mut u.chunks);
            }
            for (field, values) in [(&t, &written[0]), (&u, &written[1])] {
                for time in [1, 0] {
                    let want = &values[time * 60..(time + 1) * 60];
                    let mut got = vec![0f32; 60];
                    field
                        .read_rows_raw("two.nc", (0, time), 0..4, &mut got)
                        .expect("raw");
                    assert_eq!(
                        bits(&got),
                        bits(want),
                        "raw, swapped {swapped}, step {time}"
                    );
                    field.read_step("two.nc", 0, time, &mut got).expect("step");
                    assert_eq!(bits(&got), bits(want), "swapped {swapped}, step {time}");
                }
                assert_eq!(field.plan_agrees.get(), Some(&!swapped), "{}", field.name());
            }
        }
    }

    /// A damaged chunk is reported with its step, level and byte offset: in the first step
    /// read (where the library then reads the step, and fails too) beside the library's
    /// message, and in a later step once the plan agreed, alone.
    #[test]
    fn a_damaged_chunk_names_its_place_in_the_first_and_later_steps() {
        let _session = crate::netcdf_session::lock();
        let dir = tempfile::tempdir().expect("tempdir");
        let path = dir.path().join("two.nc");
        two_compressed_fields(&path);
        crate::hdf5::quiet_on_this_thread();
        let own = std::fs::File::open(&path).expect("own");
        // One chunk per step: `t`'s second step and `u`'s first.
        let damaged = {
            let file = netcdf::open(&path).expect("open");
            let [t, u] = [
                planned(&file, "t", &path, &own),
                planned(&file, "u", &path, &own),
            ];
            let at = |field: &StepwiseField<'_>, i: usize| {
                field.chunks.as_ref().expect("planned").stored()[i].clone()
            };
            [at(&t, 1), at(&u, 0)]
        };
        use std::os::unix::fs::FileExt;
        let writer = std::fs::OpenOptions::new()
            .write(true)
            .open(&path)
            .expect("open");
        for chunk in &damaged {
            writer
                .write_all_at(&[0xA5; 64], chunk.addr + chunk.size / 3)
                .expect("damage");
        }
        let file = netcdf::open(&path).expect("open");
        let [t, u] = [
            planned(&file, "t", &path, &own),
            planned(&file, "u", &path, &own),
        ];
        let mut out = vec![0f32; 60];
        t.read_step("two.nc", 0, 0, &mut out)
            .expect("the first step is whole");
        assert_eq!(t.plan_agrees.get(), Some(&true));
        let later = t
            .read_step("two.nc", 0, 1, &mut out)
            .expect_err("damaged")
            .to_string();
        let place = |chunk: &crate::hdf5::StoredChunk, time: usize| {
            format!(
                "chunk at byte {} (time index {time}, level index 0 to 2 in file order)",
                chunk.addr
            )
        };
        assert!(
            later.contains("'t' in 'two.nc'")
                && later.contains(&place(&damaged[0], 1))
                && !later.contains("NetCDF library"),
            "{later}"
        );
        for first in [
            u.read_step("two.nc", 0, 0, &mut out),
            u.read_rows_raw("two.nc", (0, 0), 0..4, &mut out),
        ] {
            let first = first.expect_err("damaged").to_string();
            assert!(
                first.contains("'u' in 'two.nc'")
                    && first.contains(&place(&damaged[1], 0))
                    && first.contains("; the NetCDF library: "),
                "{first}"
            );
        }
    }

    #[test]
    fn reverse_axis_reverses_only_that_axis() {
        // outer 2, axis 3, inner 2
        let mut v: Vec<i32> = (0..12).collect();
        reverse_axis_in_place(&mut v, 2, 3, 2);
        assert_eq!(v, vec![4, 5, 2, 3, 0, 1, 10, 11, 8, 9, 6, 7]);
        let mut w: Vec<i32> = (0..8).collect();
        reverse_axis_in_place(&mut w, 1, 4, 2);
        assert_eq!(w, vec![6, 7, 4, 5, 2, 3, 0, 1]);
        let mut one = vec![1, 2];
        reverse_axis_in_place(&mut one, 2, 1, 1);
        assert_eq!(one, vec![1, 2]);
    }

    #[test]
    fn attribute_numbers_convert_every_numeric_type() {
        assert_eq!(
            numbers_of(AttributeValue::Short(-32767)),
            Some(vec![-32767.0])
        );
        assert_eq!(
            numbers_of(AttributeValue::Floats(vec![0.5, 1.5])),
            Some(vec![0.5, 1.5])
        );
        assert_eq!(numbers_of(AttributeValue::Str("1".into())), None);
    }
}
