//! The fast batch kernel for isobaric cycles: heights tied to the surface, or for a cycle
//! without surface fields started at its lowest level; humidity as specific humidity, mixing
//! ratio, relative humidity, dewpoint or none.
//!
//! [`crate::compute::compute_heights`] dispatches here when
//! [`IsobaricKernel::with_saturation`] (or, without surface fields,
//! [`IsobaricKernel::from_lowest_level`]) accepts the cycle; everything else (hybrid levels,
//! cycles without surface fields whose columns start above the lowest level) stays on the
//! column path of [`crate::physics::column::ColumnNodes`]. Relative humidity and dewpoint
//! are made specific humidity a level's row at a time, in SIMD lanes of their own, with the
//! column path's formulas, before the level step.
//!
//! # Why it is fast
//! The column path gathers one column at a time across 37 level planes that lie megabytes
//! apart. Here a latitude row is walked level by level instead: for each level the inner
//! loop runs over the row's contiguous columns, reading temperature and humidity once and
//! writing each height once, with no branch in the loop (the per-column surface level is a
//! select), so that the compiler turns it into SIMD lanes. Each column's running height,
//! virtual temperature and surface values live in small per-thread row buffers (a few
//! kilobytes per row, in L1/L2). The logarithms of the level pressures and of their ratios are
//! taken once per cycle, and the logarithmic mean of each layer needs no logarithm at all
//! ([`logarithmic_mean_by_series`]). Rows run in parallel with rayon. The next level's row
//! lies a whole level's field away, where the processor's own prefetchers do not look: the
//! level step asks for it, a block of columns at a time, while it computes this level.
//!
//! # Where the time goes
//! At 0.25° (721 x 1440 x 37) the outputs are 154 MB of heights and 38 MB of flags in fresh
//! allocations, offered for transparent huge pages (`src/buffers.rs`); the system still
//! zeroes and maps them, which is most of the memory floor that `benches/kernel.rs` times
//! (a pass that only reads temperature and humidity and writes one value per point-level).
//! With the output paged in, the arithmetic dominates: one division, a seven-term polynomial
//! and the virtual temperature per point-level, in `f64`, with fused multiply-adds.
//!
//! # Same answers as the column path
//! The arithmetic is that of [`crate::physics::column::ColumnNodes::isobaric`] step for step
//! (accumulation in `f64`, storage in `f32`): the surface virtual temperature is that of the
//! lowest level above ground extrapolated to the surface pressure at 6.5 K/km; levels below
//! ground follow that 6.5 K/km polytrope from the surface and are flagged; a level exactly at
//! the surface pressure has the surface height and is not below ground; a missing (or not
//! finite and positive) virtual temperature above ground masks that level and every level
//! above it; a missing surface value, or a surface above the top level, masks the column.
//! A cycle without surface fields started at its lowest level is computed with a surface
//! lying exactly on that level, which is the column path's anchor at a level's height
//! ([`crate::physics::column::ColumnAnchor::LevelHeight`] at level 0). The two paths differ
//! only by rounding in the last bits of `f64`, far below a millimetre; `tests/kernel.rs`
//! checks them against each other column by column.

use ndarray::{
    s, Array4, Array5, ArrayView1, ArrayView2, ArrayView3, ArrayViewMut1, ArrayViewMut2,
    ArrayViewMut3, Axis, ShapeBuilder,
};
use rayon::prelude::*;

use crate::buffers::zeroed_field_array;
use crate::lanes::{lane_builds, Lanes};
use crate::model::{Cycle, HumidityKind, Layer, LayerThickness, Surface, Vertical};
use crate::physics::column::{height_below_surface_with, height_between_nodes};
use crate::physics::constants::STANDARD_LAPSE_RATE;
use crate::physics::humidity::{MagnusTerms, RelativeHumidityPhase, SaturationFormula};
use crate::physics::hypsometric::logarithmic_mean_temperature;

/// Largest `|u| = |Tv1 − Tv2| / (Tv1 + Tv2)` for which the kernel trusts
/// [`logarithmic_mean_by_series`]; layers beyond it (a 10.5 % jump in virtual temperature
/// between adjacent levels, 25 K near 240 K: only the strongest surface inversions come
/// near it) are recomputed with [`logarithmic_mean_temperature`], row by row where they
/// occur.
pub const SERIES_LIMIT: f64 = 0.05;

/// Largest `w = (p_s − p_k0)/(p_s + p_k0)` for which the surface set-up takes its series
/// (of `artanh` and of `exp`): a surface pressure up to 11/9 of its lowest level
/// above ground. Surfaces beyond it (only high in a column) take the exact forms.
pub const SURFACE_SERIES_LIMIT: f64 = 0.1;

/// `1 / (2j + 1)` for `j = 1..=7`: the coefficients of `artanh(u)/u` in powers of `u²`.
const ATANH_COEFFS: [f64; 7] = [
    1.0 / 3.0,
    1.0 / 5.0,
    1.0 / 7.0,
    1.0 / 9.0,
    1.0 / 11.0,
    1.0 / 13.0,
    1.0 / 15.0,
];

/// `u/artanh(u)` in powers of `s = u²`: `r_0..r_6` of `R(s) = 1/S(s)`, where
/// `S(s) = artanh(u)/u = Σ s^j/(2j + 1)`. Exact rationals from `R·S = 1`
/// (`r_n = −Σ_{k=1..n} r_{n−k}/(2k + 1)`), rounded to `f64`.
const INV_ATANH_COEFFS: [f64; 7] = [
    1.0,
    -1.0 / 3.0,
    -4.0 / 45.0,
    -44.0 / 945.0,
    -428.0 / 14175.0,
    -10196.0 / 467775.0,
    -10719068.0 / 638512875.0,
];

/// Logarithmic mean of two virtual temperatures without a logarithm, by the series of
/// `u/artanh(u)`, with one division.
///
/// # Units
/// - `t1`, `t2`: K, finite and positive
/// - returns: K
///
/// # Method
/// With `u = (t1 − t2)/(t1 + t2)`, `ln(t1/t2) = 2 artanh u`, so the logarithmic mean is
/// `(t1 − t2)/ln(t1/t2) = ((t1 + t2)/2) · R(u²)` with `R(s) = u/artanh(u)`, the reciprocal of
/// `S(s) = artanh(u)/u = Σ_{j≥0} s^j/(2j + 1)`. `R` is kept to `s⁶` (`INV_ATANH_COEFFS`),
/// evaluated by Estrin's scheme with fused multiply-adds (the same bits in every SIMD build
/// and in scalar code: see [`crate::lanes`]). Taking the reciprocal series instead of
/// dividing by `S` saves the second of two divisions per point-level, the slowest
/// instruction of the loop.
///
/// Truncation bound: `S(s) = ∫₀¹ dt/(1 − s t²)`, and for `|s| ≤ ρ < 1` each `1/(1 − s t²)`
/// has real part at least `1/(1 + ρ)`, so `S` has no zero in the disc and `|R| ≤ 1 + ρ` on
/// `|s| = ρ`. Cauchy's estimate gives `|r_j| ≤ (1 + ρ)/ρ^j`, and the omitted terms sum to at
/// most `(1 + ρ)(s/ρ)⁷ / (1 − s/ρ)`. With `ρ = 0.9` and `|u| ≤ SERIES_LIMIT = 0.05`
/// (`s ≤ 0.0025`) that is below `2.5e-18`; since `R ≥ 0.999` there, it is also the relative
/// error of the mean, below half an ulp of `f64` (1.1e-16). The actual coefficients are
/// far smaller than the estimate (`|r_7| ≈ 0.0135`). Adjacent isobaric levels of real
/// atmospheres have `|u|` below 0.05 but in the strongest inversions (the GFS 2.5° file of
/// `tests/kernel.rs` peaks at 0.06, in 2 of every 10,000 pairs of adjacent levels, those
/// below ground counted); the kernel recomputes those layers exactly. Kept to `s⁸` with a
/// limit of 0.1, as before, the series cost 7–11 % more of the kernel's time. Outside the
/// limit the function still answers, less accurately, and `t1 = t2` gives `t1` exactly.
/// Inputs that are not finite and positive give meaningless values: the kernel turns such
/// virtual temperatures into `NaN` first.
///
/// # References
/// Wallace, J. M. and Hobbs, P. V. (2006), *Atmospheric Science*, 2nd ed., §3.2 (the mean
/// virtual temperature of a layer); the series of artanh, Abramowitz, M. and Stegun, I. A.
/// (1964), *Handbook of Mathematical Functions*, 4.6.33 (from memory); Cauchy's estimate for
/// the coefficients of a function analytic in a disc (any complex analysis text).
#[inline(always)]
pub fn logarithmic_mean_by_series(t1: f64, t2: f64) -> f64 {
    let sum = t1 + t2;
    let u = (t1 - t2) / sum;
    0.5 * sum * inv_atanh_over_u(u * u)
}

/// `u/artanh(u)` as the series `Σ_{j=0}^{6} r_j s^j` in `s = u²` (bound in
/// [`logarithmic_mean_by_series`]), by Estrin's scheme with fused multiply-adds (six of
/// its eight operations; with separate products and sums it took fourteen).
#[inline(always)]
fn inv_atanh_over_u(s: f64) -> f64 {
    let r = &INV_ATANH_COEFFS;
    let s2 = s * s;
    let s4 = s2 * s2;
    let low = s2.mul_add(r[3].mul_add(s, r[2]), r[1].mul_add(s, r[0]));
    let high = s2.mul_add(r[6], r[5].mul_add(s, r[4]));
    s4.mul_add(high, low)
}

/// `artanh(u)/u` as the series `Σ_{j=0}^{7} s^j/(2j + 1)` in `s = u²`, for the logarithm
/// of the surface set-up (`ln ρ = 2 w artanh(w)/w`).
///
/// Truncation bound: every omitted coefficient is at most 1/17, so the remainder is
/// `Σ_{j≥8} s^j/(2j + 1) ≤ s⁸ / (17 (1 − s))`; for `s ≤ 0.01` that is below `6.0e-18`, and
/// since the sum is at least 1 it is also the relative error, below half an ulp of `f64`.
///
/// Evaluated by Estrin's scheme (pairs of terms combined with `s²` and `s⁴`) rather than
/// Horner's rule: the same polynomial with a dependency chain of three multiply-add steps
/// instead of seven, which lets the processor overlap more columns (the rounding differs
/// from Horner's by an ulp or so).
#[inline(always)]
fn atanh_over_u(s: f64) -> f64 {
    let c = &ATANH_COEFFS;
    let s2 = s * s;
    let s4 = s2 * s2;
    let low = (1.0 + c[0] * s) + s2 * (c[1] + c[2] * s);
    let high = (c[3] + c[4] * s) + s2 * (c[5] + c[6] * s);
    low + s4 * high
}

/// `e^x` without a branch on `x`, so that a loop of it compiles to SIMD lanes: the
/// argument is reduced to `x = n ln 2 + r`, `|r| ≤ ln 2 / 2`, with `n` rounded to nearest by
/// adding and subtracting `1.5·2⁵²` and `ln 2` split in two (Cody and Waite; the split of
/// fdlibm's `e_exp.c`, `ln2_hi = 0x3fe62e42fee00000`, whose low bits are zero so that
/// `n·ln2_hi` is exact); `e^r` by its Taylor series to `r¹³/13!`, by Horner's rule; and
/// `2ⁿ` put straight into the exponent bits. `x` is first clamped to `[−708, 709]` (the
/// range where `2ⁿ` is a normal number), so larger arguments give `e^709` and smaller ones
/// `e^−708`; `NaN` gives `NaN`.
///
/// Truncation: the remainder is at most `|r|¹⁴/14! · e^{|r|} ≤ 0.347¹⁴ / 14! · 1.42 < 6e-18`,
/// and `e^r ≥ 0.70`: a relative error below `9e-18`, a tenth of an ulp; what remains is the
/// rounding of the reduction and of Horner's rule, about an ulp (`tests/kernel.rs` holds it
/// to 2·2⁻⁵² of the standard library's `exp` over the whole range). References: Cody, W. J.
/// and Waite, W. (1980), *Software Manual for the Elementary Functions*, ch. 6; the series
/// and its remainder, Abramowitz and Stegun (1964), 4.2.1 (from memory).
#[inline(always)]
pub fn exp_by_reduction(x: f64) -> f64 {
    // fdlibm's split of ln 2 (6.93147180369123816490e-01 and 1.90821492927058770002e-10).
    const LN2_HI: f64 = f64::from_bits(0x3fe6_2e42_fee0_0000);
    const LN2_LO: f64 = f64::from_bits(0x3dea_39ef_3579_3c76);
    const INV_LN2: f64 = std::f64::consts::LOG2_E;
    const ROUND: f64 = 6_755_399_441_055_744.0;
    const C: [f64; 13] = [
        1.0,
        1.0 / 2.0,
        1.0 / 6.0,
        1.0 / 24.0,
        1.0 / 120.0,
        1.0 / 720.0,
        1.0 / 5_040.0,
        1.0 / 40_320.0,
        1.0 / 362_880.0,
        1.0 / 3_628_800.0,
        1.0 / 39_916_800.0,
        1.0 / 479_001_600.0,
        1.0 / 6_227_020_800.0,
    ];
    let x = x.clamp(-708.0, 709.0);
    let k = x * INV_LN2 + ROUND;
    let n = k - ROUND;
    let r = (x - n * LN2_HI) - n * LN2_LO;
    let mut p = C[12];
    for &c in C[..12].iter().rev() {
        p = p * r + c;
    }
    let e_r = p * r + 1.0;
    // `k`'s low mantissa bits hold `n` (two's complement): `n + 1023` is 2ⁿ's exponent.
    let two_n = f64::from_bits(k.to_bits().wrapping_add(1023) << 52);
    e_r * two_n
}

/// How a level's relative humidity or dewpoint becomes specific humidity: the Magnus form
/// of the saturation formula the settings choose
/// ([`crate::physics::humidity::saturation_vapour_pressure`]), then
/// [`crate::physics::humidity::specific_humidity_from_vapour_pressure`].
#[derive(Clone, Copy, Debug, PartialEq)]
struct ToSpecific {
    /// Relative humidity (a fraction); otherwise dewpoint (K).
    relative: bool,
    /// Whether saturation is over ice below 0 °C (relative humidity with
    /// [`RelativeHumidityPhase::IceBelowFreezing`]; a dewpoint is over water).
    ice_below_freezing: bool,
    magnus: MagnusTerms,
    /// `ε`.
    eps: f64,
}

/// Specific humidity (kg kg⁻¹, as `f32`) at pressure `p` (Pa) from temperature `t` (K) and
/// relative humidity or dewpoint `h`, as the column path forms it on its way to the virtual
/// temperature, operation for operation, but with [`exp_by_reduction`] for `exp` and
/// selects for its branches, so that a loop of it compiles to SIMD lanes; `NaN` where the
/// column path gives `NaN`.
#[inline(always)]
fn specific_from(c: &ToSpecific, p: f64, t: f32, h: f32) -> f32 {
    let (t, h) = (f64::from(t), f64::from(h));
    let m = &c.magnus;
    // The temperature the saturation pressure is taken at: the air's, or the dewpoint.
    let ts = if c.relative { t } else { h };
    let ice = c.ice_below_freezing & (ts < m.zero_celsius_k);
    let a = if ice { m.ice.0 } else { m.water.0 };
    let b = if ice { m.ice.1 } else { m.water.1 };
    let tc = ts - m.zero_celsius_k;
    let denom = b + tc;
    let es = m.e0_pa * exp_by_reduction(a * tc / denom);
    let es = if denom <= 0.0 { f64::NAN } else { es };
    let e = if c.relative { h * es } else { es };
    let q = c.eps * e / (p - (1.0 - c.eps) * e);
    (if p - e <= 0.0 { f64::NAN } else { q }) as f32
}

/// [`specific_from`] over a level's row: `out[i]` from `t[i]` and `h[i]`.
#[inline(always)]
fn specific_lanes(c: &ToSpecific, p: f64, t: &[f32], h: &[f32], out: &mut [f32]) {
    let n = out.len();
    let (t, h) = (&t[..n], &h[..n]);
    // A copy, so that the loop chooses between the water and ice terms as values: through
    // the reference, the choice in `specific_from` compiled to a load from a chosen address,
    // a gather per vector in the SIMD builds (a quarter of a relative-humidity batch's time
    // on an Intel Xeon).
    let c = *c;
    for i in 0..n {
        out[i] = specific_from(&c, p, t[i], h[i]);
    }
}

lane_builds! {
    /// A row's specific humidity ([`specific_lanes`]) in the build `lanes` names.
    fn specific_step(c: &ToSpecific, p: f64, t: &[f32], h: &[f32], out: &mut [f32]) -> ()
        = specific_lanes;
}

/// Largest `|x|` for which [`exp_by_series`] is used in the surface set-up.
///
/// `x = κ ln(p_s/p_k0)` with `κ = R_d Γ/g0 ≈ 0.190` and `p_s/p_k0 ≤ 11/9` (the range of
/// [`SURFACE_SERIES_LIMIT`] for the ratio), so `|x| ≤ 0.0382` for the usual constants.
const EXP_LIMIT: f64 = 0.04;

/// `e^x` by its Taylor series to `x⁸/8!`, for `|x| ≤ EXP_LIMIT`.
///
/// Truncation: the remainder is at most `|x|⁹/9! · e^{|x|}`, which for `|x| ≤ 0.04` is
/// below `0.04⁹ / 362880 · 1.05 < 8e-19`, and `e^x ≥ 0.96` there: relative error below
/// 1e-18, under half an ulp of `f64` (Abramowitz and Stegun 1964, 4.2.1 and 4.2.3, the
/// series and its remainder, from memory).
#[inline(always)]
fn exp_by_series(x: f64) -> f64 {
    const C: [f64; 8] = [
        1.0 / 2.0,
        1.0 / 6.0,
        1.0 / 24.0,
        1.0 / 120.0,
        1.0 / 720.0,
        1.0 / 5040.0,
        1.0 / 40320.0,
        1.0,
    ];
    1.0 + x
        * (C[7]
            + x * (C[0]
                + x * (C[1] + x * (C[2] + x * (C[3] + x * (C[4] + x * (C[5] + x * C[6])))))))
}

/// Why a cycle goes to the column path instead of this kernel.
#[derive(Clone, Debug, PartialEq, thiserror::Error)]
pub enum NotApplicable {
    /// Hybrid sigma-pressure levels.
    #[error("the cycle is on hybrid levels")]
    HybridLevels,
    /// No surface pressure and height to tie the columns to.
    #[error("the cycle has no surface pressure and surface height")]
    NoSurface,
    /// No surface fields, and the columns' start at the lowest level cannot be put as a
    /// surface there: its pressure is not exact in single precision, a layer reaches below
    /// it, or the file's heights at that level are missing.
    #[error("the cycle has no surface fields, and its columns cannot start at its lowest level here: {why}")]
    LowestLevel {
        /// Why not.
        why: String,
    },
    /// Humidity that needs a saturation formula per point, where none was given
    /// ([`IsobaricKernel::new`]; [`IsobaricKernel::with_saturation`] takes it).
    #[error(
        "humidity is given as {kind}: without a saturation formula only specific humidity and mixing ratio are converted"
    )]
    Humidity {
        /// The CF standard name of the humidity the cycle carries.
        kind: &'static str,
    },
    /// Level pressures the column path masks (not finite, positive and strictly decreasing),
    /// or more levels than the kernel's per-column level index holds.
    #[error("the {levels} isobaric levels are not finite, positive and strictly decreasing, or more than 255")]
    Levels {
        /// Number of levels.
        levels: usize,
    },
    /// Field shapes that do not agree with the temperature's.
    #[error("field '{field}' has shape {found:?} where {expected:?} was expected")]
    Shape {
        /// Which field.
        field: &'static str,
        /// Its shape.
        found: Vec<usize>,
        /// The shape the temperature implies.
        expected: Vec<usize>,
    },
    /// [`IsobaricKernel::run`] was given a cycle whose levels or humidity differ from those
    /// of the cycle the kernel was prepared for.
    #[error("'{file}' has other levels or humidity than the cycle the kernel was prepared for")]
    OtherCycle {
        /// The source file of the cycle given.
        file: String,
    },
    /// [`IsobaricKernel::run_step`] was given a step outside the outputs.
    #[error("step (member {member}, time {time}) is outside the {members} members and {times} time steps of the outputs")]
    StepIndex {
        /// Member index asked for.
        member: usize,
        /// Time index asked for.
        time: usize,
        /// Members of the outputs.
        members: usize,
        /// Time steps of the outputs.
        times: usize,
    },
    /// A layer bound that is not a finite positive pressure.
    #[error(
        "layer {bottom_pa} Pa to {top_pa} Pa has a bound that is not a finite positive pressure"
    )]
    LayerBound {
        /// Bottom pressure, Pa.
        bottom_pa: f64,
        /// Top pressure, Pa.
        top_pa: f64,
    },
}

/// What the kernel produced for one cycle (the parts of [`crate::model::Heights`] that
/// depend on the data).
#[derive(Clone, Debug)]
pub struct KernelOutput {
    /// Geopotential height on every level, geopotential metres, `[member, time, level, lat,
    /// lon]`; `NaN` where masked.
    pub geopotential_height: Array5<f32>,
    /// 1 where the level lies below the ground, else 0.
    pub below_ground: Array5<u8>,
    /// One entry per layer, in the order asked for.
    pub thickness: Vec<LayerThickness>,
}

/// How a level's virtual temperature is formed.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
enum Moisture {
    /// No humidity (none in the file, or this level missing from the file's humidity axis).
    Dry,
    /// Specific humidity, kg kg⁻¹.
    Specific,
    /// Mixing ratio, kg kg⁻¹.
    Mixing,
    /// Relative humidity (a fraction), made specific humidity row by row before the level
    /// step ([`IsobaricKernel::specific_humidity`]).
    Relative,
    /// Dewpoint, K, made specific humidity the same way.
    DewPoint,
}

impl Moisture {
    /// The moisture the level step sees: relative humidity and dewpoint arrive there as
    /// specific humidity.
    fn in_step(self) -> Moisture {
        match self {
            Moisture::Relative | Moisture::DewPoint => Moisture::Specific,
            other => other,
        }
    }
}

/// Where one layer bound sits on the levels (fixed for the whole grid).
#[derive(Clone, Copy, Debug, PartialEq)]
enum Bound {
    /// Exactly on level `level`, whose heights are captured in `slot`.
    OnLevel { slot: usize },
    /// Strictly between levels `upper - 1` and `upper`, captured in `lower_slot` and
    /// `upper_slot`.
    Between {
        p_pa: f64,
        upper: usize,
        upper_slot: usize,
        lower_slot: usize,
    },
    /// Below every level: only reachable by extrapolation below the ground, or between the
    /// surface and level 0 when the surface pressure is higher still.
    BelowLowest { p_pa: f64, level0_slot: usize },
    /// Above the top level: never computed (the column path answers `None` there too).
    AboveTop,
}

/// Constants of one level step.
#[derive(Clone, Copy, Debug)]
struct StepParams {
    /// Whether some column of the row is below or at the ground at this level.
    full: bool,
    /// The level index as `f64`, compared with each column's surface level.
    k_f: f64,
    /// `(R_d/g0) ln(p_{k−1}/p_k)`: the factor of the layer's mean virtual temperature.
    c1: f64,
    /// `p_k^κ` for the 6.5 K/km polytrope below ground.
    pow_k: f64,
    /// `1/ε − 1`, for specific humidity.
    kq: f64,
    /// `1/ε`, for mixing ratio.
    inv_eps: f64,
}

/// The per-column state of one row, read by a level step.
struct StepIn<'s> {
    t: &'s [f32],
    q: &'s [f32],
    /// The next level's temperature and humidity rows, asked for ahead ([`prefetch_next`]);
    /// empty where there is none (the last level, or a field not in standard layout).
    t_next: &'s [f32],
    q_next: &'s [f32],
    zp: &'s [f64],
    tvp: &'s [f64],
    k0f: &'s [f64],
    zs: &'s [f64],
    tvs: &'s [f64],
    tvsop: &'s [f64],
}

/// What a level step writes per column: the running state for the next level, and the
/// level's stored values themselves (no `f64` copy of the heights is kept per level, and no
/// second pass turns one into `f32`).
struct StepOut<'s> {
    zp: &'s mut [f64],
    tvp: &'s mut [f64],
    /// The level's heights, as stored.
    z: &'s mut [f32],
    /// The level's below-ground flags; written only by the `FULL` step (on the other levels
    /// no column is below ground and the caller zeroes the flags).
    below: &'s mut [u8],
}

/// Height of a level below the ground on the 6.5 K/km polytrope from the surface:
/// `Z_s − (T_v,s (p/p_s)^κ − T_v,s)/Γ`, with `tvsop = T_v,s/p_s^κ` and `pow_k = p^κ`. One
/// expression for the level step and the captured layer bounds, so that both give the same
/// bits.
#[inline(always)]
fn below_ground_height(zs: f64, tvs: f64, tvsop: f64, pow_k: f64) -> f64 {
    zs - (tvsop * pow_k - tvs) * INV_STANDARD_LAPSE_RATE
}

/// `1/Γ` for the 6.5 K/km polytrope, m K⁻¹ (multiplying by it instead of dividing by Γ
/// changes the last bit only).
const INV_STANDARD_LAPSE_RATE: f64 = 1.0 / STANDARD_LAPSE_RATE;

/// Virtual temperature from temperature and humidity, as the column path forms it
/// ([`crate::physics::humidity::virtual_temperature_from_specific_humidity`] and
/// [`crate::physics::humidity::virtual_temperature_from_mixing_ratio`]) but with the
/// multiply-add fused (a last-bit difference at most), with anything not finite and positive
/// turned into `NaN` (the column path's "usable" test).
#[inline(always)]
fn virtual_temperature<const M: u8>(t: f32, q: f32, kq: f64, inv_eps: f64) -> f64 {
    let t = f64::from(t);
    let tv = match M {
        MOIST_SPECIFIC => t * kq.mul_add(f64::from(q), 1.0),
        MOIST_MIXING => {
            let r = f64::from(q);
            t * r.mul_add(inv_eps, 1.0) / (1.0 + r)
        }
        _ => t,
    };
    if (tv > 0.0) & (tv <= f64::MAX) {
        tv
    } else {
        f64::NAN
    }
}

const MOIST_DRY: u8 = 0;
const MOIST_SPECIFIC: u8 = 1;
const MOIST_MIXING: u8 = 2;

/// One level of one row: the inner loop, with no branch on the data (selects only), so that
/// it compiles to SIMD lanes. Returns how many columns had a layer beyond [`SERIES_LIMIT`].
///
/// `FULL` handles columns for which this level is below or at the ground; without it every
/// column of the row must be above ground at this level (`k > k0` everywhere), which holds for
/// most levels and saves the selects.
#[inline(always)]
fn level_lanes<const M: u8, const FULL: bool>(
    p: &StepParams,
    i: &StepIn<'_>,
    o: &mut StepOut<'_>,
) -> u64 {
    let n = o.z.len();
    // Equal lengths up front let the compiler drop every bounds check in the loop.
    let (t, q, zp, tvp) = (&i.t[..n], &i.q[..n], &i.zp[..n], &i.tvp[..n]);
    let (zp_out, tvp_out, z_out) = (&mut o.zp[..n], &mut o.tvp[..n], &mut o.z[..n]);
    let (k0f, zs, tvs, tvsop) = (&i.k0f[..n], &i.zs[..n], &i.tvs[..n], &i.tvsop[..n]);
    let below_out = &mut o.below[..n];
    let mut large = 0u64;
    // Blocks of columns, each starting with a request for the next level's rows at the same
    // columns. The next level's row lies a whole level's field away, and the processor's
    // own prefetchers do not cross 4 KiB pages: without the requests the loads of each
    // level's temperature waited on memory (about a quarter of the step's samples).
    let mut c0 = 0;
    while c0 < n {
        let c1 = (c0 + PREFETCH_BLOCK).min(n);
        prefetch_next(i, c0, c1);
        if FULL {
            for c in c0..c1 {
                let tv = virtual_temperature::<M>(t[c], q[c], p.kq, p.inv_eps);
                let a = tvp[c];
                let u = (a - tv) / (a + tv);
                let z_up = p.c1.mul_add(logarithmic_mean_by_series(a, tv), zp[c]);
                let above = p.k_f > k0f[c];
                let below = p.k_f < k0f[c];
                large += u64::from(above & (u.abs() > SERIES_LIMIT));
                let z_next = if above { z_up } else { zp[c] };
                tvp_out[c] = if above { tv } else { a };
                zp_out[c] = z_next;
                let z_below = below_ground_height(zs[c], tvs[c], tvsop[c], p.pow_k);
                z_out[c] = (if below { z_below } else { z_next }) as f32;
                below_out[c] = u8::from(below);
            }
        } else {
            for c in c0..c1 {
                let tv = virtual_temperature::<M>(t[c], q[c], p.kq, p.inv_eps);
                let a = tvp[c];
                let u = (a - tv) / (a + tv);
                let z_up = p.c1.mul_add(logarithmic_mean_by_series(a, tv), zp[c]);
                large += u64::from(u.abs() > SERIES_LIMIT);
                tvp_out[c] = tv;
                zp_out[c] = z_up;
                z_out[c] = z_up as f32;
            }
        }
        c0 = c1;
    }
    large
}

/// The level step for the moisture of this level as the step sees it ([`Moisture::in_step`]:
/// relative humidity and dewpoint arrive as specific humidity).
#[inline(always)]
fn level_step_body(m: Moisture, p: &StepParams, i: &StepIn<'_>, o: &mut StepOut<'_>) -> u64 {
    match (m, p.full) {
        (Moisture::Dry, true) => level_lanes::<MOIST_DRY, true>(p, i, o),
        (Moisture::Mixing, true) => level_lanes::<MOIST_MIXING, true>(p, i, o),
        (_, true) => level_lanes::<MOIST_SPECIFIC, true>(p, i, o),
        (Moisture::Dry, false) => level_lanes::<MOIST_DRY, false>(p, i, o),
        (Moisture::Mixing, false) => level_lanes::<MOIST_MIXING, false>(p, i, o),
        (_, false) => level_lanes::<MOIST_SPECIFIC, false>(p, i, o),
    }
}

/// The surface set-up of a row, in lanes: from each column's surface pressure and height,
/// the pressure, virtual temperature and `1/p^κ` of its lowest level above ground, the
/// surface virtual temperature (6.5 K/km from that level), the height of that level, and
/// `T_v,s / p_s^κ` for the levels below ground. Returns how many columns are outside the
/// series' range (the caller recomputes them with the exact forms).
#[inline(always)]
fn surface_lanes(kappa: f64, rd_g0: f64, i: &SurfaceIn<'_>, o: &mut SurfaceOut<'_>) -> u64 {
    let n = o.z0.len();
    let (ps, zs, pk0, tv0, ipk0) = (
        &i.ps[..n],
        &i.zs[..n],
        &i.pk0[..n],
        &i.tv0[..n],
        &i.ipk0[..n],
    );
    let (tvs_out, tvsop_out, z0_out) = (&mut o.tvs[..n], &mut o.tvsop[..n], &mut o.z0[..n]);
    let mut large = 0u64;
    for c in 0..n {
        // ln(p_s/p_k0) = 2 artanh(w): the ratio is at least 1 and small, as in a layer.
        let rho = ps[c] / pk0[c];
        let w = (rho - 1.0) / (rho + 1.0);
        let ln_rho = 2.0 * w * atanh_over_u(w * w);
        let x = kappa * ln_rho;
        large += u64::from((w > SURFACE_SERIES_LIMIT) | (x.abs() > EXP_LIMIT));
        let tvs = tv0[c] * exp_by_series(x);
        tvs_out[c] = tvs;
        tvsop_out[c] = tv0[c] * ipk0[c];
        // `tvs/tv0 = e^x` with `|x| ≤ EXP_LIMIT`: `|u| ≤ tanh(0.02)`, inside `SERIES_LIMIT`.
        z0_out[c] = zs[c] + rd_g0 * logarithmic_mean_by_series(tvs, tv0[c]) * ln_rho;
    }
    large
}

/// Inputs of [`surface_lanes`], per column.
struct SurfaceIn<'s> {
    ps: &'s [f64],
    zs: &'s [f64],
    pk0: &'s [f64],
    tv0: &'s [f64],
    ipk0: &'s [f64],
}

/// Outputs of [`surface_lanes`], per column.
struct SurfaceOut<'s> {
    tvs: &'s mut [f64],
    tvsop: &'s mut [f64],
    z0: &'s mut [f64],
}

lane_builds! {
    /// The surface set-up of a row ([`surface_lanes`]) in the build `lanes` names.
    fn surface_step(kappa: f64, rd_g0: f64, i: &SurfaceIn<'_>, o: &mut SurfaceOut<'_>) -> u64
        = surface_lanes;
}

lane_builds! {
    /// A level step ([`level_step_body`]) in the build `lanes` names.
    fn level_step(m: Moisture, p: &StepParams, i: &StepIn<'_>, o: &mut StepOut<'_>) -> u64
        = level_step_body;
}

/// The fast kernel prepared for one cycle and one list of layers: per-level logarithms and
/// powers, the moisture of each level, and where each layer bound falls on the levels.
#[derive(Clone, Debug)]
pub struct IsobaricKernel {
    /// Level pressures, Pa, bottom-up.
    levels: Vec<f64>,
    /// `ln p` of each level.
    ln_p: Vec<f64>,
    /// `(R_d/g0) ln(p_{k−1}/p_k)` of each level (0 at level 0).
    c1: Vec<f64>,
    /// `p^κ` of each level, `κ = R_d Γ / g0`.
    pow_kappa: Vec<f64>,
    /// `1/p^κ` of each level.
    inv_pow_kappa: Vec<f64>,
    /// `κ = R_d Γ / g0` for Γ = 6.5 K/km.
    kappa: f64,
    /// `R_d / g0`, m K⁻¹.
    rd_g0: f64,
    /// `1/ε − 1` and `1/ε`.
    kq: f64,
    inv_eps: f64,
    /// The saturation formula and phase relative humidity and dewpoint are converted with,
    /// where the kernel takes them ([`IsobaricKernel::with_saturation`]).
    saturation: Option<(SaturationFormula, RelativeHumidityPhase)>,
    /// How the cycle's relative humidity or dewpoint becomes specific humidity, where it
    /// carries one of them.
    to_specific: Option<ToSpecific>,
    /// How each level's virtual temperature is formed.
    moisture: Vec<Moisture>,
    /// The layers, with their bounds placed on the levels.
    layers: Vec<(Layer, Bound, Bound)>,
    /// Levels whose heights and virtual temperatures are kept per row for the thickness.
    captures: Vec<usize>,
    /// Which build of the level and surface steps runs.
    lanes: Lanes,
    /// What the columns start from.
    ground: Ground,
}

/// The height the columns of a cycle without surface fields start from, at its lowest
/// level ([`IsobaricKernel::from_lowest_level`]).
#[derive(Clone, Copy, Debug, PartialEq)]
pub enum LowestLevelHeight {
    /// The same height at every column, geopotential metres.
    Everywhere(f64),
    /// The file's own geopotential height at the lowest level, column by column.
    FromFile,
}

/// What the kernel's columns start from.
#[derive(Clone, Debug)]
enum Ground {
    /// The cycle's surface pressure and height.
    Surface,
    /// The lowest level, as a surface lying exactly on it: its pressure, and the height the
    /// same at every column (`Everywhere`, as the kernel reads it) or `None` for the file's
    /// own at that level (`FromFile`).
    LowestLevel { pressure: f32, height: Option<f32> },
}

/// `value` at every point of a `rows x cols` grid, without copies (both strides zero).
fn everywhere(value: &f32, (rows, cols): (usize, usize)) -> Option<ArrayView2<'_, f32>> {
    ArrayView2::from_shape((rows, cols).strides((0, 0)), std::slice::from_ref(value)).ok()
}

/// Surface of one column as the kernel sees it.
#[derive(Clone, Copy, Debug)]
struct ColumnSurface {
    alive: bool,
    ps: f64,
    zs: f64,
    tvs: f64,
    k0: usize,
}

/// Per-thread buffers for one row, reused from row to row (a few kilobytes per array).
struct RowScratch {
    ps: Vec<f64>,
    zs: Vec<f64>,
    tvs: Vec<f64>,
    tvsop: Vec<f64>,
    pk0: Vec<f64>,
    ipk0: Vec<f64>,
    k0f: Vec<f64>,
    k0: Vec<u8>,
    alive: Vec<bool>,
    zp_in: Vec<f64>,
    tvp_in: Vec<f64>,
    zp_out: Vec<f64>,
    tvp_out: Vec<f64>,
    /// A level's heights and flags where the output row is not one contiguous slice, or
    /// where only layers are wanted.
    z32: Vec<f32>,
    below8: Vec<u8>,
    cap_z: Vec<Vec<f64>>,
    cap_tv: Vec<Vec<f64>>,
    tbuf: Vec<f32>,
    qbuf: Vec<f32>,
    /// A level's relative humidity or dewpoint made specific humidity.
    qconv: Vec<f32>,
}

impl RowScratch {
    fn new(cols: usize, captures: usize) -> Self {
        let v = || vec![f64::NAN; cols];
        Self {
            ps: v(),
            zs: v(),
            tvs: v(),
            tvsop: v(),
            pk0: v(),
            ipk0: v(),
            k0f: v(),
            k0: vec![0; cols],
            alive: vec![false; cols],
            zp_in: v(),
            tvp_in: v(),
            zp_out: v(),
            tvp_out: v(),
            z32: vec![f32::NAN; cols],
            below8: vec![0; cols],
            cap_z: (0..captures).map(|_| v()).collect(),
            cap_tv: (0..captures).map(|_| v()).collect(),
            tbuf: Vec::with_capacity(cols),
            qbuf: Vec::with_capacity(cols),
            qconv: Vec::with_capacity(cols),
        }
    }
}

/// The outputs of one row: heights and flags `[level, col]`, and per layer `[col]`.
struct RowOut<'o> {
    /// Heights and flags on every level, or `None` when only layers are wanted.
    z: Option<ArrayViewMut2<'o, f32>>,
    below: Option<ArrayViewMut2<'o, u8>>,
    thick: Vec<ArrayViewMut1<'o, f32>>,
    thick_below: Vec<ArrayViewMut1<'o, u8>>,
}

/// The inputs of one (member, time) step, wherever they are held.
#[derive(Clone, Copy, Debug)]
pub struct StepFields<'a> {
    /// Air temperature, K, `[level, lat, lon]` bottom-up.
    pub t: ArrayView3<'a, f32>,
    /// Humidity of the kind the kernel was prepared for, `[level, lat, lon]`; `None` for a
    /// cycle without humidity.
    pub q: Option<ArrayView3<'a, f32>>,
    /// Surface pressure, Pa, `[lat, lon]`.
    pub ps: ArrayView2<'a, f32>,
    /// Surface height, m, `[lat, lon]`.
    pub zs: ArrayView2<'a, f32>,
}

impl<'a> StepFields<'a> {
    /// Member `m`, time step `t` of a cycle held in memory with its `surface` fields.
    pub fn of(cycle: &'a Cycle, surface: &'a Surface, (m, t): (usize, usize)) -> Self {
        let ps = surface.pressure_pa.slice(s![m, t, .., ..]);
        Self::on(
            cycle,
            (m, t),
            (ps, surface.height_m.slice(s![m, t, .., ..])),
        )
    }

    /// Member `m`, time step `t` of a cycle held in memory, on the surface pressure and
    /// height `ps`, `zs` (`[lat, lon]`).
    fn on(
        cycle: &'a Cycle,
        (m, t): (usize, usize),
        (ps, zs): (ArrayView2<'a, f32>, ArrayView2<'a, f32>),
    ) -> Self {
        Self {
            t: cycle.temperature.slice(s![m, t, .., .., ..]),
            q: cycle
                .humidity
                .as_ref()
                .map(|h| h.values.slice(s![m, t, .., .., ..])),
            ps,
            zs,
        }
    }
}

/// The outputs of one (member, time) step, or of a band of its latitude rows, wherever they
/// are held: what [`IsobaricKernel::run_into`] writes.
#[derive(Debug)]
pub struct StepOutputs<'a> {
    /// Geopotential height on every level, `[level, lat, lon]` bottom-up; `NaN` where masked.
    pub geopotential_height: ArrayViewMut3<'a, f32>,
    /// 1 where the level lies below the ground, else 0, `[level, lat, lon]`.
    pub below_ground: ArrayViewMut3<'a, u8>,
    /// Per layer, in the kernel's order: thickness and its below-ground flag, `[lat, lon]`.
    pub thickness: Vec<(ArrayViewMut2<'a, f32>, ArrayViewMut2<'a, u8>)>,
}

/// Each layer's thickness and flag at member `m`, time step `t`, `[lat, lon]`.
fn step_thickness(
    thickness: &mut [LayerThickness],
    (m, t): (usize, usize),
) -> Vec<(ArrayViewMut2<'_, f32>, ArrayViewMut2<'_, u8>)> {
    thickness
        .iter_mut()
        .map(|th| {
            (
                th.values.slice_mut(s![m, t, .., ..]),
                th.below_ground.slice_mut(s![m, t, .., ..]),
            )
        })
        .collect()
}

/// Row `r` of level `k` of `field` (`[level, lat, lon]`) as a contiguous lane: a sub-slice
/// of `all`, the field's memory when it is in standard layout (as the reader makes fields;
/// slicing the view for every level of every row took 3 % of the kernel's samples), else as
/// [`lane`] gives it.
fn level_lane<'b>(
    field: &'b ArrayView3<'_, f32>,
    all: Option<&'b [f32]>,
    (k, r): (usize, usize),
    buf: &'b mut Vec<f32>,
) -> &'b [f32] {
    match level_row(field, all, (k, r)) {
        Some(row) => row,
        None => lane(field.slice(s![k, r, ..]), buf),
    }
}

/// Row `r` of level `k` of `field` as a slice of `all`, the field's memory in standard
/// layout; `None` without it, or past the last level.
fn level_row<'b>(
    field: &ArrayView3<'_, f32>,
    all: Option<&'b [f32]>,
    (k, r): (usize, usize),
) -> Option<&'b [f32]> {
    let (_, rows, cols) = field.dim();
    let start = (k * rows + r) * cols;
    all.and_then(|all| all.get(start..start + cols))
}

/// Columns computed between two requests for the next level's rows (128 to 512 measured
/// alike on the 0.25° grid; 32 and 64 less well).
const PREFETCH_BLOCK: usize = 256;

/// Asks the processor for the cache lines of columns `c0..c1` of the next level's
/// temperature and humidity rows.
#[inline(always)]
fn prefetch_next(i: &StepIn<'_>, c0: usize, c1: usize) {
    // Elsewhere a hint only: nothing is asked.
    #[cfg(not(target_arch = "x86_64"))]
    let _ = (i, c0, c1);
    #[cfg(target_arch = "x86_64")]
    for next in [i.t_next, i.q_next] {
        for v in next.get(c0..c1).unwrap_or(&[]).iter().step_by(16) {
            // SAFETY: a prefetch is a hint that never faults; the address is in the slice.
            unsafe {
                std::arch::x86_64::_mm_prefetch::<{ std::arch::x86_64::_MM_HINT_T0 }>(
                    std::ptr::from_ref(v).cast(),
                )
            };
        }
    }
}

/// Whether any flag of `row` is set. A fold without an early exit over a contiguous row,
/// which compiles to SIMD lanes: the early exit of `any` kept it to a byte at a time, 9 % of
/// the 0.25° kernel's time, on rows that are almost all clear.
fn any_set(row: ArrayView1<'_, u8>) -> bool {
    match row.to_slice() {
        Some(flags) => flags.iter().fold(0u8, |acc, &b| acc | b) != 0,
        None => row.iter().any(|&b| b != 0),
    }
}

/// A contiguous `f32` lane: the array's own memory when contiguous, else a copy in `buf`.
fn lane<'b>(v: ArrayView1<'b, f32>, buf: &'b mut Vec<f32>) -> &'b [f32] {
    match v.to_slice() {
        Some(sl) => sl,
        None => {
            buf.clear();
            buf.extend(v.iter().copied());
            buf
        }
    }
}

fn place_bound(levels: &[f64], p: f64, captures: &mut Vec<usize>) -> Bound {
    let mut slot = |k: usize| match captures.iter().position(|&c| c == k) {
        Some(s) => s,
        None => {
            captures.push(k);
            captures.len() - 1
        }
    };
    let n = levels.len();
    if let Some(k) = levels.iter().position(|&l| l == p) {
        return Bound::OnLevel { slot: slot(k) };
    }
    if p < levels[n - 1] {
        return Bound::AboveTop;
    }
    if p > levels[0] {
        return Bound::BelowLowest {
            p_pa: p,
            level0_slot: slot(0),
        };
    }
    // Strictly inside: the first level above p, and the one below it.
    let upper = levels.partition_point(|&l| l > p);
    Bound::Between {
        p_pa: p,
        upper,
        upper_slot: slot(upper),
        lower_slot: slot(upper - 1),
    }
}

impl IsobaricKernel {
    /// Prepares the kernel for `cycle` and `layers`, or says why the cycle must take the
    /// column path. Layer bounds may be anywhere (on a level or between levels); their
    /// order is checked by the caller. Relative humidity and dewpoint need a saturation
    /// formula, and are refused here: see [`IsobaricKernel::with_saturation`].
    pub fn new(cycle: &Cycle, layers: &[Layer]) -> Result<Self, NotApplicable> {
        Self::prepare(cycle, layers, None, None)
    }

    /// [`IsobaricKernel::new`], also for relative humidity and dewpoint: each level's row is
    /// made specific humidity with `formula` and `phase` before the level step, by the
    /// column path's formulas operation for operation
    /// ([`crate::physics::humidity::saturation_vapour_pressure`],
    /// [`crate::physics::humidity::vapour_pressure_from_dewpoint`],
    /// [`crate::physics::humidity::specific_humidity_from_vapour_pressure`]) with `exp` by
    /// [`exp_by_reduction`] (within an ulp or two of libm's), stored as `f32` (a relative
    /// difference of at most 6·10⁻⁸ in the specific humidity, some 10⁻⁵ m in a height at
    /// 30 km).
    pub fn with_saturation(
        cycle: &Cycle,
        layers: &[Layer],
        formula: SaturationFormula,
        phase: RelativeHumidityPhase,
    ) -> Result<Self, NotApplicable> {
        Self::prepare(cycle, layers, Some((formula, phase)), None)
    }

    /// [`IsobaricKernel::with_saturation`] for a cycle without surface fields whose columns
    /// start at the lowest level with the height `start` says: the lowest level is taken as
    /// a surface lying exactly on it (nothing below ground, its height the start's), which
    /// gives the column path's answers for a column anchored at that level
    /// ([`crate::physics::column::ColumnAnchor::LevelHeight`]: upward from it with the same
    /// layers; a level whose virtual temperature is missing masks itself and every level
    /// above, a missing one at the lowest level or a missing start height the whole column).
    ///
    /// Refused ([`NotApplicable::LowestLevel`]) when the lowest level's pressure is not
    /// exact in `f32` (the surface pressure the kernel reads), a layer's bottom lies below
    /// the lowest level (the column path does not extrapolate there without a surface), or
    /// `FromFile` finds no file heights of the temperature's shape.
    pub fn from_lowest_level(
        cycle: &Cycle,
        layers: &[Layer],
        formula: SaturationFormula,
        phase: RelativeHumidityPhase,
        start: LowestLevelHeight,
    ) -> Result<Self, NotApplicable> {
        Self::prepare(cycle, layers, Some((formula, phase)), Some(start))
    }

    fn prepare(
        cycle: &Cycle,
        layers: &[Layer],
        saturation: Option<(SaturationFormula, RelativeHumidityPhase)>,
        lowest: Option<LowestLevelHeight>,
    ) -> Result<Self, NotApplicable> {
        let levels = match &cycle.vertical {
            Vertical::Isobaric { pressure_pa } => pressure_pa.clone(),
            Vertical::Hybrid { .. } => return Err(NotApplicable::HybridLevels),
        };
        let n = levels.len();
        let ordered = levels.iter().all(|p| p.is_finite() && *p > 0.0)
            && levels.windows(2).all(|w| w[1] < w[0]);
        if n == 0 || n > usize::from(u8::MAX) || !ordered {
            return Err(NotApplicable::Levels { levels: n });
        }
        let (members, times, nz, rows, cols) = cycle.temperature.dim();
        let expected3 = vec![members, times, nz, rows, cols];
        if nz != n {
            return Err(NotApplicable::Shape {
                field: "air_temperature",
                found: expected3.clone(),
                expected: vec![members, times, n, rows, cols],
            });
        }
        let ground = match (&cycle.surface, lowest) {
            (Some(surface), _) => {
                let expected2 = vec![members, times, rows, cols];
                for (field, a) in [
                    ("surface_air_pressure", &surface.pressure_pa),
                    ("surface_height", &surface.height_m),
                ] {
                    if a.shape() != expected2.as_slice() {
                        return Err(NotApplicable::Shape {
                            field,
                            found: a.shape().to_vec(),
                            expected: expected2.clone(),
                        });
                    }
                }
                Ground::Surface
            }
            (None, None) => return Err(NotApplicable::NoSurface),
            (None, Some(start)) => Self::lowest_level_ground(cycle, &levels, layers, start)?,
        };
        let mut moisture = vec![Moisture::Dry; n];
        if let Some(h) = &cycle.humidity {
            let kind = match (h.kind, saturation) {
                (HumidityKind::SpecificHumidity, _) => Moisture::Specific,
                (HumidityKind::MixingRatio, _) => Moisture::Mixing,
                (HumidityKind::RelativeHumidity, Some(_)) => Moisture::Relative,
                (HumidityKind::DewPoint, Some(_)) => Moisture::DewPoint,
                (other, None) => {
                    return Err(NotApplicable::Humidity {
                        kind: other.standard_name(),
                    })
                }
            };
            if h.values.shape() != expected3.as_slice() {
                return Err(NotApplicable::Shape {
                    field: "humidity",
                    found: h.values.shape().to_vec(),
                    expected: expected3,
                });
            }
            moisture.fill(kind);
            for &k in &h.missing_levels {
                if let Some(m) = moisture.get_mut(k) {
                    *m = Moisture::Dry;
                }
            }
        }
        let mut captures = Vec::new();
        let mut placed = Vec::with_capacity(layers.len());
        for layer in layers {
            let good = |p: f64| p.is_finite() && p > 0.0;
            if !(good(layer.bottom_pa) && good(layer.top_pa)) {
                return Err(NotApplicable::LayerBound {
                    bottom_pa: layer.bottom_pa,
                    top_pa: layer.top_pa,
                });
            }
            let bottom = place_bound(&levels, layer.bottom_pa, &mut captures);
            let top = place_bound(&levels, layer.top_pa, &mut captures);
            placed.push((*layer, bottom, top));
        }
        // The same expressions as the column path's cached logarithms and powers.
        let c = &cycle.constants;
        let rd_g0 = c.rd_over_g0();
        let kappa = rd_g0 * STANDARD_LAPSE_RATE;
        let ln_p: Vec<f64> = levels.iter().map(|p| p.ln()).collect();
        let c1 = (0..n)
            .map(|k| {
                if k == 0 {
                    0.0
                } else {
                    rd_g0 * (levels[k - 1] / levels[k]).ln()
                }
            })
            .collect();
        let pow_kappa: Vec<f64> = ln_p.iter().map(|&l| (kappa * l).exp()).collect();
        let inv_pow_kappa = pow_kappa.iter().map(|&x| 1.0 / x).collect();
        let eps = c.molar_mass_ratio;
        let converted = moisture
            .iter()
            .find(|m| matches!(m, Moisture::Relative | Moisture::DewPoint));
        let to_specific = match (converted, saturation) {
            (Some(&m), Some((formula, phase))) => Some(ToSpecific {
                relative: m == Moisture::Relative,
                ice_below_freezing: m == Moisture::Relative
                    && phase == RelativeHumidityPhase::IceBelowFreezing,
                magnus: MagnusTerms::of(formula),
                eps,
            }),
            _ => None,
        };
        Ok(Self {
            levels,
            ln_p,
            c1,
            pow_kappa,
            inv_pow_kappa,
            kappa,
            rd_g0,
            kq: 1.0 / eps - 1.0,
            inv_eps: 1.0 / eps,
            saturation,
            to_specific,
            moisture,
            layers: placed,
            captures,
            lanes: Lanes::widest(),
            ground,
        })
    }

    /// The ground of [`IsobaricKernel::from_lowest_level`], or why not.
    fn lowest_level_ground(
        cycle: &Cycle,
        levels: &[f64],
        layers: &[Layer],
        start: LowestLevelHeight,
    ) -> Result<Ground, NotApplicable> {
        let why = |why: String| NotApplicable::LowestLevel { why };
        let p0 = levels[0];
        // Read back as the surface pressure, it must be the level itself, or the level
        // would lie below ground (or the column start above it).
        let p0_f32 = p0 as f32;
        if f64::from(p0_f32) != p0 {
            return Err(why(format!(
                "its pressure {p0} Pa is not exact in single precision"
            )));
        }
        if let Some(layer) = layers.iter().find(|l| l.bottom_pa > p0 || l.top_pa > p0) {
            return Err(why(format!(
                "a layer from {} Pa reaches below it",
                layer.bottom_pa.max(layer.top_pa)
            )));
        }
        let height = match start {
            LowestLevelHeight::Everywhere(z) => Some(z as f32),
            LowestLevelHeight::FromFile => {
                let shape_ok = cycle
                    .file_heights
                    .as_ref()
                    .is_some_and(|z| z.dim() == cycle.temperature.dim());
                if !shape_ok {
                    return Err(why("the file carries no heights on its levels".into()));
                }
                None
            }
        };
        Ok(Ground::LowestLevel {
            pressure: p0_f32,
            height,
        })
    }

    /// Surface pressure and height of step (`m`, `t`) of `cycle` (the cycle the kernel was
    /// prepared for) as the kernel reads them, `[lat, lon]`: the cycle's surface fields, or
    /// for a cycle without them the lowest level's pressure and start height
    /// ([`IsobaricKernel::from_lowest_level`]). `None` where `cycle` lacks what the kernel
    /// was prepared with.
    pub fn ground<'s>(
        &'s self,
        cycle: &'s Cycle,
        (m, t): (usize, usize),
    ) -> Option<(ArrayView2<'s, f32>, ArrayView2<'s, f32>)> {
        match &self.ground {
            Ground::Surface => {
                let surface = cycle.surface.as_ref()?;
                Some((
                    surface.pressure_pa.slice(s![m, t, .., ..]),
                    surface.height_m.slice(s![m, t, .., ..]),
                ))
            }
            Ground::LowestLevel { pressure, height } => {
                // The grid, not the temperature: a shell whose fields are still being read
                // has an empty temperature.
                let grid = (cycle.grid.rows(), cycle.grid.cols());
                let zs = match height {
                    Some(z) => everywhere(z, grid)?,
                    None => cycle.file_heights.as_ref()?.slice(s![m, t, 0, .., ..]),
                };
                Some((everywhere(pressure, grid)?, zs))
            }
        }
    }

    /// The fields of step (`m`, `t`) of `cycle` as [`StepFields::of`] gives them, with the
    /// surface [`IsobaricKernel::ground`] gives.
    pub fn step_fields<'s>(
        &'s self,
        cycle: &'s Cycle,
        (m, t): (usize, usize),
    ) -> Option<StepFields<'s>> {
        Some(StepFields::on(cycle, (m, t), self.ground(cycle, (m, t))?))
    }

    /// The same kernel running the build `wanted` of its inner loops, or the widest one
    /// below it that the processor has; kernels start with the widest. For comparing the
    /// builds: all give the same bits.
    pub fn with_lanes(mut self, wanted: Lanes) -> Self {
        self.lanes = Lanes::widest_up_to(wanted);
        self
    }

    /// Whether some level's humidity is made specific humidity before the level step
    /// (relative humidity or dewpoint): a saturation vapour pressure per point-level, which
    /// costs more than the rest of the step.
    pub fn converts_humidity(&self) -> bool {
        self.moisture
            .iter()
            .any(|m| matches!(m, Moisture::Relative | Moisture::DewPoint))
    }

    /// Which build of the inner loops runs.
    pub fn lanes(&self) -> Lanes {
        self.lanes
    }

    /// Heights on every level, below-ground flags and layer thicknesses for every member and
    /// time step of `cycle` (the cycle given to [`IsobaricKernel::new`]). `progress` is
    /// called after each (member, time) step with the number done so far.
    ///
    /// A cycle whose levels, humidity or shapes differ from those the kernel was prepared
    /// for is refused with the reason, before any allocation.
    ///
    /// # Method
    /// As [`crate::physics::column::ColumnNodes::isobaric`] and
    /// [`crate::physics::column::thickness_between`], row by row and level by level (see
    /// the module documentation).
    pub fn run(
        &self,
        cycle: &Cycle,
        progress: &(dyn Fn(usize) + Sync),
    ) -> Result<KernelOutput, NotApplicable> {
        self.check_cycle(cycle)?;
        // Zeroed allocations come from the system as untouched pages, advised for huge
        // pages: the kernel writes every element once, so no separate fill pass runs over
        // these megabytes.
        let mut out = self.outputs(cycle.temperature.dim());
        let heights = Some((&mut out.geopotential_height, &mut out.below_ground));
        self.run_steps(cycle, heights, &mut out.thickness, progress)?;
        Ok(out)
    }

    /// The layer thicknesses alone, the same values as [`IsobaricKernel::run`] gives, without
    /// storing heights: only the levels up to the highest one a layer needs are read, and
    /// nothing three-dimensional is written.
    pub fn run_layers(
        &self,
        cycle: &Cycle,
        progress: &(dyn Fn(usize) + Sync),
    ) -> Result<Vec<LayerThickness>, NotApplicable> {
        self.check_cycle(cycle)?;
        let mut thickness = self.thickness_outputs(cycle.temperature.dim());
        self.run_steps(cycle, None, &mut thickness, progress)?;
        Ok(thickness)
    }

    /// Refuses a cycle other than the one the kernel was prepared for.
    fn check_cycle(&self, cycle: &Cycle) -> Result<(), NotApplicable> {
        // The start this kernel was prepared with (an `f32` height reads back exactly).
        let start = match &self.ground {
            Ground::Surface => None,
            Ground::LowestLevel { height, .. } => {
                Some(height.map_or(LowestLevelHeight::FromFile, |z| {
                    LowestLevelHeight::Everywhere(f64::from(z))
                }))
            }
        };
        let fresh = Self::prepare(cycle, &[], self.saturation, start)?;
        if fresh.levels != self.levels || fresh.moisture != self.moisture {
            return Err(NotApplicable::OtherCycle {
                file: cycle.source.display().to_string(),
            });
        }
        Ok(())
    }

    /// Both runs: every (member, time) step, rows in parallel; heights and flags stored
    /// into `heights` when given (shaped as the temperature), layers into `thickness`.
    fn run_steps(
        &self,
        cycle: &Cycle,
        mut heights: Option<(&mut Array5<f32>, &mut Array5<u8>)>,
        thickness: &mut [LayerThickness],
        progress: &(dyn Fn(usize) + Sync),
    ) -> Result<(), NotApplicable> {
        let (members, times, levels, _, _) = cycle.temperature.dim();
        let n_levels = if heights.is_some() {
            levels
        } else {
            self.captures.iter().max().map_or(0, |&k| k + 1)
        };
        let mut done = 0usize;
        for m in 0..members {
            for t in 0..times {
                let views = self
                    .step_fields(cycle, (m, t))
                    .ok_or(NotApplicable::NoSurface)?;
                let step_heights = heights.as_mut().map(|(z, b)| {
                    (
                        z.slice_mut(s![m, t, .., .., ..]),
                        b.slice_mut(s![m, t, .., .., ..]),
                    )
                });
                let step_layers = step_thickness(thickness, (m, t));
                // Fresh from `outputs` (`run`, `run_layers`): zero until written.
                self.step_into(&views, n_levels, step_heights, step_layers, true);
                done += 1;
                progress(done);
            }
        }
        Ok(())
    }

    /// Zeroed thickness outputs, one per layer, for a cycle of `dim`.
    fn thickness_outputs(
        &self,
        (members, times, _, rows, cols): (usize, usize, usize, usize, usize),
    ) -> Vec<LayerThickness> {
        self.layers
            .iter()
            .map(|&(layer, _, _)| LayerThickness {
                layer,
                values: Array4::zeros((members, times, rows, cols)),
                below_ground: Array4::zeros((members, times, rows, cols)),
            })
            .collect()
    }

    /// Outputs for a cycle of `dim` (`[member, time, level, lat, lon]`), to be filled step by
    /// step with [`IsobaricKernel::run_step`]: heights and flags in fresh allocations
    /// offered for huge pages, and one thickness per layer.
    pub fn outputs(&self, dim: (usize, usize, usize, usize, usize)) -> KernelOutput {
        KernelOutput {
            geopotential_height: zeroed_field_array::<f32>(dim),
            below_ground: zeroed_field_array::<u8>(dim),
            thickness: self.thickness_outputs(dim),
        }
    }

    /// One (member, time) step of [`IsobaricKernel::run`], from fields held anywhere, into
    /// `out` (from [`IsobaricKernel::outputs`]): the same values `run` stores at this step.
    ///
    /// Refuses (before writing anything) a step whose shapes do not match the outputs and
    /// the levels of the kernel, an index out of range, or a missing humidity where the
    /// kernel was prepared with one.
    pub fn run_step(
        &self,
        step: StepFields<'_>,
        (member, time): (usize, usize),
        out: &mut KernelOutput,
    ) -> Result<(), NotApplicable> {
        let (members, times, ..) = out.geopotential_height.dim();
        let in_range = |dim: &[usize]| member < dim[0] && time < dim[1];
        let all_in_range = in_range(out.below_ground.shape())
            && out
                .thickness
                .iter()
                .all(|th| in_range(th.values.shape()) && in_range(th.below_ground.shape()));
        if member >= members || time >= times || !all_in_range {
            return Err(NotApplicable::StepIndex {
                member,
                time,
                members,
                times,
            });
        }
        let (m, t) = (member, time);
        let outputs = StepOutputs {
            geopotential_height: out.geopotential_height.slice_mut(s![m, t, .., .., ..]),
            below_ground: out.below_ground.slice_mut(s![m, t, .., .., ..]),
            thickness: step_thickness(&mut out.thickness, (m, t)),
        };
        self.run_into(step, outputs)
    }

    /// One step of [`IsobaricKernel::run`] over the rows `step` holds (a whole step, or a
    /// band of latitude rows of one: every column is computed on its own), into `out`, shaped
    /// as the fields: the same values `run` stores for those rows.
    ///
    /// Refuses (before writing anything) fields or outputs whose shapes do not match each
    /// other or the levels and layers of the kernel, or a missing humidity where the kernel
    /// was prepared with one.
    pub fn run_into(
        &self,
        step: StepFields<'_>,
        out: StepOutputs<'_>,
    ) -> Result<(), NotApplicable> {
        self.run_into_flags(step, out, false)
    }

    /// [`IsobaricKernel::run_into`] into outputs whose below-ground flags hold zeros only
    /// (from [`IsobaricKernel::outputs`], the rows not computed yet): the flags of a level
    /// where no column of a row is below ground are left as they are, unread (reading them
    /// costs a page fault per page of a fresh allocation, a tenth of the kernel's time).
    /// Flags set beforehand would stay set.
    pub(crate) fn run_into_zeroed(
        &self,
        step: StepFields<'_>,
        out: StepOutputs<'_>,
    ) -> Result<(), NotApplicable> {
        // The promise the callers make, checked where it costs nothing that matters (debug
        // builds, the tests): a set flag left from an earlier use would stay set.
        debug_assert!(
            out.below_ground.iter().all(|&b| b == 0),
            "run_into_zeroed: below-ground flags that are not all zero"
        );
        self.run_into_flags(step, out, true)
    }

    /// [`IsobaricKernel::run_into`], told whether the outputs' flags are known to be zero.
    fn run_into_flags(
        &self,
        step: StepFields<'_>,
        out: StepOutputs<'_>,
        below_zeroed: bool,
    ) -> Result<(), NotApplicable> {
        let (rows, cols) = step.ps.dim();
        let shape = |field: &'static str, found: &[usize], expected: Vec<usize>| {
            if found == expected.as_slice() {
                Ok(())
            } else {
                Err(NotApplicable::Shape {
                    field,
                    found: found.to_vec(),
                    expected,
                })
            }
        };
        let n = self.levels.len();
        let field3 = vec![n, rows, cols];
        shape(
            "geopotential_height",
            out.geopotential_height.shape(),
            field3.clone(),
        )?;
        shape("below_ground", out.below_ground.shape(), field3.clone())?;
        shape("air_temperature", step.t.shape(), field3.clone())?;
        match step.q {
            Some(q) => shape("humidity", q.shape(), field3)?,
            None if self.moisture.iter().any(|m| *m != Moisture::Dry) => {
                shape("humidity", &[], field3)?
            }
            None => {}
        }
        shape("surface_height", step.zs.shape(), vec![rows, cols])?;
        shape("thickness", &[out.thickness.len()], vec![self.layers.len()])?;
        for (values, below) in &out.thickness {
            shape("thickness", values.shape(), vec![rows, cols])?;
            shape("thickness", below.shape(), vec![rows, cols])?;
        }
        let heights = Some((out.geopotential_height, out.below_ground));
        self.step_into(&step, n, heights, out.thickness, below_zeroed);
        Ok(())
    }

    /// One step, rows in parallel (shapes already checked): heights and flags into
    /// `heights` when given, `[level, lat, lon]`, and each layer into its pair of `thickness`.
    fn step_into(
        &self,
        views: &StepFields<'_>,
        n_levels: usize,
        heights: Option<(ArrayViewMut3<'_, f32>, ArrayViewMut3<'_, u8>)>,
        thickness: Vec<(ArrayViewMut2<'_, f32>, ArrayViewMut2<'_, u8>)>,
        below_zeroed: bool,
    ) {
        let (rows, cols) = views.ps.dim();
        let nl = self.layers.len();
        let mut outs: Vec<RowOut<'_>> = (0..rows)
            .map(|_| RowOut {
                z: None,
                below: None,
                thick: Vec::with_capacity(nl),
                thick_below: Vec::with_capacity(nl),
            })
            .collect();
        if let Some((height, below)) = heights {
            let z_rows = height.into_axis_iter_mut(Axis(1));
            let b_rows = below.into_axis_iter_mut(Axis(1));
            for (out, (z, b)) in outs.iter_mut().zip(z_rows.zip(b_rows)) {
                out.z = Some(z);
                out.below = Some(b);
            }
        }
        for (values, below) in thickness {
            let th_rows = values.into_axis_iter_mut(Axis(0));
            let tb_rows = below.into_axis_iter_mut(Axis(0));
            for (out, (a, b)) in outs.iter_mut().zip(th_rows.zip(tb_rows)) {
                out.thick.push(a);
                out.thick_below.push(b);
            }
        }
        outs.into_par_iter().enumerate().for_each_init(
            || RowScratch::new(cols, self.captures.len()),
            |scratch, (row, out)| self.row(views, row, n_levels, scratch, out, below_zeroed),
        );
    }
}

impl IsobaricKernel {
    /// Virtual temperature at level `k` of column (`r`, `c`), `NaN` where not usable.
    fn tv_at(&self, v: &StepFields<'_>, k: usize, r: usize, c: usize) -> f64 {
        let t = v.t[[k, r, c]];
        let h = v.q.as_ref().map_or(0.0, |q| q[[k, r, c]]);
        let m = self.moisture[k];
        let q = match m {
            Moisture::Relative | Moisture::DewPoint => {
                self.specific_humidity(m, t, h, self.levels[k])
            }
            _ => h,
        };
        match m.in_step() {
            Moisture::Mixing => virtual_temperature::<MOIST_MIXING>(t, q, self.kq, self.inv_eps),
            Moisture::Dry => virtual_temperature::<MOIST_DRY>(t, q, self.kq, self.inv_eps),
            _ => virtual_temperature::<MOIST_SPECIFIC>(t, q, self.kq, self.inv_eps),
        }
    }

    /// Specific humidity (kg kg⁻¹, as `f32`) at pressure `p` (Pa) from temperature `t` (K)
    /// and relative humidity (a fraction) or dewpoint (K) `h`, as the column path forms it
    /// on its way to the virtual temperature; `NaN` where it cannot be formed. Dry and
    /// specific levels pass `h` through.
    fn specific_humidity(&self, m: Moisture, t: f32, h: f32, p: f64) -> f32 {
        match (m, &self.to_specific) {
            (Moisture::Relative | Moisture::DewPoint, Some(c)) => specific_from(c, p, t, h),
            // Not reached: these kinds are taken only with a saturation formula.
            (Moisture::Relative | Moisture::DewPoint, None) => f32::NAN,
            _ => h,
        }
    }

    /// One latitude row: surface set-up per column, then the levels bottom-up, then the
    /// layers.
    ///
    /// Only levels `0..n` are integrated (all when heights are wanted; up to the highest
    /// level a layer needs otherwise).
    ///
    /// `below_zeroed`: the flags in `out` hold zeros only (fresh from
    /// [`IsobaricKernel::outputs`]), so that the levels no column is below ground at need not
    /// look at them.
    fn row(
        &self,
        v: &StepFields<'_>,
        r: usize,
        n: usize,
        s: &mut RowScratch,
        mut out: RowOut<'_>,
        below_zeroed: bool,
    ) {
        let all = self.levels.len();
        let cols = s.ps.len();
        // The surface of every column and the lowest level above it (`k0`), as the column
        // path: the surface virtual temperature is level k0's extrapolated to p_s at 6.5 K/km.
        // First, per column, what needs a gather; then the arithmetic in lanes.
        let mut k_max = 0usize;
        // The previous column's count of levels below ground, where the next column's
        // search starts.
        let mut near = 0usize;
        for c in 0..cols {
            let ps = f64::from(v.ps[[r, c]]);
            let zs = f64::from(v.zs[[r, c]]);
            s.ps[c] = ps;
            // Levels strictly decrease, so the levels below ground are a prefix. Its length
            // changes little from one column to the next: step from the previous column's.
            // (A surface pressure that is not a number moves neither way; such a column is
            // masked below, whatever the count.)
            while near < all && self.levels[near] > ps {
                near += 1;
            }
            while near > 0 && self.levels[near - 1] <= ps {
                near -= 1;
            }
            let k0 = near;
            let surface_ok = ps.is_finite() && ps > 0.0 && zs.is_finite() && k0 < all;
            let tv0 = if surface_ok {
                self.tv_at(v, k0, r, c)
            } else {
                f64::NAN
            };
            if surface_ok && !tv0.is_nan() {
                s.zs[c] = zs;
                s.tvp_in[c] = tv0;
                s.pk0[c] = self.levels[k0];
                s.ipk0[c] = self.inv_pow_kappa[k0];
                s.k0f[c] = k0 as f64;
                // `k0 < all <= 255` (checked in `new`).
                s.k0[c] = u8::try_from(k0).unwrap_or(u8::MAX);
                s.alive[c] = true;
                k_max = k_max.max(k0);
            } else {
                // A masked column: NaN runs through every level, nothing is below ground.
                s.zs[c] = f64::NAN;
                s.tvp_in[c] = f64::NAN;
                s.pk0[c] = 1.0;
                s.ipk0[c] = 1.0;
                s.k0f[c] = 0.0;
                s.k0[c] = 0;
                s.alive[c] = false;
            }
        }
        let surface_in = SurfaceIn {
            ps: &s.ps,
            zs: &s.zs,
            pk0: &s.pk0,
            tv0: &s.tvp_in,
            ipk0: &s.ipk0,
        };
        let mut surface_out = SurfaceOut {
            tvs: &mut s.tvs,
            tvsop: &mut s.tvsop,
            z0: &mut s.zp_in,
        };
        let large = surface_step(
            self.lanes,
            self.kappa,
            self.rd_g0,
            &surface_in,
            &mut surface_out,
        );
        if large > 0 {
            // Surfaces far from their lowest level above ground (p_s/p_k0 > 11/9, only near
            // the top of a column): the column path's exact forms.
            for c in 0..cols {
                let (ps, pk0) = (s.ps[c], s.pk0[c]);
                let rho = ps / pk0;
                let w = (rho - 1.0) / (rho + 1.0);
                let x = self.kappa * 2.0 * w * atanh_over_u(w * w);
                if s.alive[c] && ((w > SURFACE_SERIES_LIMIT) | (x.abs() > EXP_LIMIT)) {
                    let k0 = usize::from(s.k0[c]);
                    let tv0 = s.tvp_in[c];
                    let ln_ps = ps.ln();
                    let ps_pow = (self.kappa * ln_ps).exp();
                    let tvs = tv0 * (ps_pow / self.pow_kappa[k0]);
                    s.tvs[c] = tvs;
                    s.tvsop[c] = tvs / ps_pow;
                    s.zp_in[c] = s.zs[c]
                        + self.rd_g0
                            * logarithmic_mean_temperature(tvs, tv0)
                            * (ln_ps - self.ln_p[k0]);
                }
            }
        }

        let (t_all, q_all) = (v.t.to_slice(), v.q.as_ref().and_then(|q| q.to_slice()));
        for k in 0..n {
            let m = self.moisture[k];
            let t = level_lane(&v.t, t_all, (k, r), &mut s.tbuf);
            let q = match (&v.q, m) {
                (Some(q3), Moisture::Specific | Moisture::Mixing) => {
                    level_lane(q3, q_all, (k, r), &mut s.qbuf)
                }
                (Some(q3), Moisture::Relative | Moisture::DewPoint) => {
                    let h = level_lane(q3, q_all, (k, r), &mut s.qbuf);
                    s.qconv.resize(cols, f32::NAN);
                    match &self.to_specific {
                        Some(c) => specific_step(self.lanes, c, self.levels[k], t, h, &mut s.qconv),
                        // Not reached: these kinds are taken only with a saturation formula.
                        None => s.qconv.fill(f32::NAN),
                    }
                    &s.qconv
                }
                _ => t,
            };
            let p = StepParams {
                full: k <= k_max,
                k_f: k as f64,
                c1: self.c1[k],
                pow_k: self.pow_kappa[k],
                kq: self.kq,
                inv_eps: self.inv_eps,
            };
            let input = StepIn {
                t,
                q,
                t_next: level_row(&v.t, t_all, (k + 1, r)).unwrap_or(&[]),
                q_next: (v.q.as_ref())
                    .and_then(|q3| level_row(q3, q_all, (k + 1, r)))
                    .unwrap_or(&[]),
                zp: &s.zp_in,
                tvp: &s.tvp_in,
                k0f: &s.k0f,
                zs: &s.zs,
                tvs: &s.tvs,
                tvsop: &s.tvsop,
            };
            // The level's heights go straight into the output row (and its flags, on levels
            // where some column is below ground), or into scratch when there is no
            // contiguous output row to write.
            let mut z_row = out.z.as_mut().map(|z| z.index_axis_mut(Axis(0), k));
            let mut b_row = out.below.as_mut().map(|b| b.index_axis_mut(Axis(0), k));
            let z_direct = z_row.as_ref().is_some_and(|v| v.is_standard_layout());
            let b_direct = b_row.as_ref().is_some_and(|v| v.is_standard_layout());
            let z_lane: &mut [f32] = match z_row.as_mut().and_then(|v| v.as_slice_mut()) {
                Some(sl) => sl,
                None => &mut s.z32,
            };
            let b_lane: &mut [u8] = match b_row.as_mut().and_then(|v| v.as_slice_mut()) {
                Some(sl) if p.full => sl,
                _ => &mut s.below8,
            };
            let mut output = StepOut {
                zp: &mut s.zp_out,
                tvp: &mut s.tvp_out,
                z: z_lane,
                below: b_lane,
            };
            let large = level_step(self.lanes, m.in_step(), &p, &input, &mut output);
            if large > 0 {
                // Layers beyond the series' range (see `SERIES_LIMIT`): the exact form.
                for c in 0..cols {
                    let (a, b) = (s.tvp_in[c], output.tvp[c]);
                    if p.k_f > s.k0f[c] && ((a - b) / (a + b)).abs() > SERIES_LIMIT {
                        let z = s.zp_in[c] + p.c1 * logarithmic_mean_temperature(a, b);
                        output.zp[c] = z;
                        output.z[c] = z as f32;
                    }
                }
            }
            if let Some(row) = z_row.as_mut().filter(|_| !z_direct) {
                row.assign(&ArrayView1::from(&s.z32[..]));
            }
            if let Some(row) = b_row.as_mut() {
                if !p.full {
                    // No column of the row is below ground at this level. Output fresh from
                    // the system is zero already, and is left untouched (writing would fault
                    // in and clear every page; even reading it faults in the zero page): most
                    // levels of a step never touch their flags' pages. A buffer that may have
                    // been used before is cleared where it holds a flag.
                    if !below_zeroed && any_set(row.view()) {
                        row.fill(0);
                    }
                } else if !b_direct {
                    row.assign(&ArrayView1::from(&s.below8[..]));
                }
            }
            if let Some(slot) = self.captures.iter().position(|&l| l == k) {
                // The level's heights in `f64`: the running height above the ground, the
                // polytrope below it (the same expression as the level step's).
                for (c, z) in s.cap_z[slot].iter_mut().enumerate() {
                    *z = if p.k_f < s.k0f[c] {
                        below_ground_height(s.zs[c], s.tvs[c], s.tvsop[c], p.pow_k)
                    } else {
                        s.zp_out[c]
                    };
                }
                s.cap_tv[slot].copy_from_slice(&s.tvp_out);
            }
            std::mem::swap(&mut s.zp_in, &mut s.zp_out);
            std::mem::swap(&mut s.tvp_in, &mut s.tvp_out);
        }

        for (l, &(layer, bottom, top)) in self.layers.iter().enumerate() {
            let (th, tb) = (&mut out.thick[l], &mut out.thick_below[l]);
            if let (Bound::OnLevel { slot: sb }, Bound::OnLevel { slot: st }) = (bottom, top) {
                for ((o, &zt), &zb) in th.iter_mut().zip(&s.cap_z[st]).zip(&s.cap_z[sb]) {
                    *o = (zt - zb) as f32;
                }
            } else {
                for (c, o) in th.iter_mut().enumerate() {
                    let col = ColumnSurface {
                        alive: s.alive[c],
                        ps: s.ps[c],
                        zs: s.zs[c],
                        tvs: s.tvs[c],
                        k0: usize::from(s.k0[c]),
                    };
                    let zt = self.bound_height(top, col, c, s);
                    let zb = self.bound_height(bottom, col, c, s);
                    *o = (zt - zb) as f32;
                }
            }
            for (o, &ps) in tb.iter_mut().zip(&s.ps) {
                *o = u8::from(layer.bottom_pa > ps);
            }
        }
    }

    /// Height at a layer bound on one column, as
    /// [`crate::physics::column::ColumnNodes::height_at_pressure`] gives it: the captured
    /// level height on a level; between nodes (levels, or the surface and a level) the
    /// polytropic interpolation; below the ground the 6.5 K/km polytrope from the surface.
    fn bound_height(&self, b: Bound, col: ColumnSurface, c: usize, s: &RowScratch) -> f64 {
        if !col.alive {
            return f64::NAN;
        }
        let node =
            |level: usize, slot: usize| (self.levels[level], s.cap_tv[slot][c], s.cap_z[slot][c]);
        let (p, lower, upper) = match b {
            Bound::OnLevel { slot } => return s.cap_z[slot][c],
            Bound::AboveTop => return f64::NAN,
            Bound::BelowLowest { p_pa, level0_slot } => (p_pa, None, node(0, level0_slot)),
            Bound::Between {
                p_pa,
                upper,
                upper_slot,
                lower_slot,
            } => {
                let lower = (upper > col.k0).then(|| node(upper - 1, lower_slot));
                (p_pa, lower, node(upper, upper_slot))
            }
        };
        let surface = (col.ps, col.tvs, col.zs);
        if p > col.ps {
            return height_below_surface_with(p, surface, self.kappa);
        }
        if p == col.ps {
            return col.zs;
        }
        height_between_nodes(p, lower.unwrap_or(surface), upper)
    }
}
