//! Isobaric wet-bulb temperature by the psychrometric equation of WMO-No. 8.
//!
//! The wet-bulb temperature `T_w` of air at temperature `T`, pressure `p` and vapour pressure
//! `e` is the root of the psychrometric equation (WMO-No. 8, Annex 4.B, for an aspirated
//! psychrometer of the Assmann type):
//!
//! - wet bulb not iced: `e = e_w(T_w) − 6.53·10⁻⁴ K⁻¹ · (1 + 0.000944 t_w) · p · (T − T_w)`
//! - ice bulb (`t_i ≤ 0 °C`): `e = e_i(T_i) − 5.75·10⁻⁴ K⁻¹ · p · (T − T_i)`
//!
//! with `t_w` in °C, `e_w` / `e_i` the saturation vapour pressures over water / ice
//! ([`crate::physics::humidity`]). The coefficients are quoted from memory of WMO-No. 8
//! (2008 and 2018 editions, Part I, chapter 4, Annex 4.B); the water form,
//! `6.53·10⁻⁴ (1 + 9.44·10⁻⁴ t_w)`, is also how a public calculator quotes the 2012 (seventh)
//! edition (rechneronline.de, "Psychrometrische Luftfeuchte"), while the ice coefficient
//! `5.75·10⁻⁴` rests on memory. The AMS *Glossary of Meteorology* ("psychrometric formula")
//! gives the older Smithsonian values 6.60·10⁻⁴ (1 + 0.00115 t_w) and, for an iced bulb,
//! about 5.82·10⁻⁴; `tests/wetbulb.rs` checks the ice value against the ratio of the latent
//! heats of vaporization and sublimation (the coefficient goes as `1 / L`) and against the
//! glossary's pair.
//!
//! # Conventions
//! - The enhancement factor `f(p)` of Annex 4.B (about 1.004 near 1000 hPa) multiplies both
//!   sides of the equation when the vapour pressure itself came from a saturation pressure (a
//!   dewpoint or a relative humidity); dividing it out changes the coefficient by under 0.5 %,
//!   a few thousandths of a kelvin in `T_w`. The crate's humidity conversions use pure-phase
//!   saturation pressures throughout, so it is left out here too, and saturated air then has
//!   `T_w = T` exactly.
//! - Which bulb: [`WetBulbPhase::Water`] (the default) keeps the wet bulb liquid at every
//!   temperature (a supercooled bulb), which makes `T_w` continuous through 0 °C.
//!   [`WetBulbPhase::IceBelowFreezing`] uses the ice-bulb form whenever the liquid-bulb root
//!   lies below 0 °C. Both conventions agree on the sign of `T_w − 0 °C` (see
//!   [`wet_bulb_exceeds_freezing`]), so a wet-bulb 0 °C level does not depend on the choice.
//! - Numeric failure is a value: `NaN` in any input, or an input outside the domain below,
//!   gives `NaN`; nothing here panics.
//!
//! # Domain
//! `T` from 173.15 K to 333.15 K (−100 °C to 60 °C; the WMO water form is stated for −45 °C to
//! 60 °C and is an extrapolation below), `p` from 100 Pa to 110 000 Pa, `e` from 0 to below `p`.
//!
//! # Solver
//! Newton's method on `F(x) = e_s(x) − A(x) p (T − x) − e`, which increases strictly with `x`
//! (its derivative is `e_s'(x) + p (A(x) − A'(x)(T − x)) > 0` for any depression below several
//! hundred kelvin), inside a bracket `[T − 120 K, T + 20 K]` that each step narrows; a step
//! that would leave the bracket is replaced by bisection. Iteration stops when the step is
//! below [`WET_BULB_TOLERANCE_K`].
//!
//! [`WetBulbPhase::Water`]: crate::physics::wetbulb::WetBulbPhase::Water
//! [`WetBulbPhase::IceBelowFreezing`]: crate::physics::wetbulb::WetBulbPhase::IceBelowFreezing
//! [`wet_bulb_exceeds_freezing`]: crate::physics::wetbulb::wet_bulb_exceeds_freezing
//! [`WET_BULB_TOLERANCE_K`]: crate::physics::wetbulb::WET_BULB_TOLERANCE_K

use super::humidity::{
    saturation_vapour_pressure_ice, saturation_vapour_pressure_water,
    vapour_pressure_from_dewpoint, vapour_pressure_from_relative_humidity, RelativeHumidityPhase,
    SaturationFormula,
};

/// 0 °C in kelvin (the ice point; ITS-90).
const ZERO_CELSIUS_K: f64 = 273.15;

/// Saturation vapour pressure at 0 °C of every Magnus form the crate uses, Pa (6.112 hPa:
/// WMO-No. 8 Annex 4.B and Bolton 1980 share the coefficient, and `exp(0) = 1`).
const SATURATION_AT_ZERO_CELSIUS_PA: f64 = 611.2;

/// Psychrometer coefficient of an aspirated (Assmann) psychrometer with a wet bulb not iced,
/// K⁻¹ (WMO-No. 8, Annex 4.B; from memory, and as a public calculator quotes the 2012
/// edition: see the module notes).
pub const PSYCHROMETER_COEFFICIENT_WATER: f64 = 6.53e-4;

/// Temperature dependence of [`PSYCHROMETER_COEFFICIENT_WATER`], per °C of the wet bulb:
/// `A = 6.53·10⁻⁴ (1 + 0.000944 t_w)` (WMO-No. 8, Annex 4.B; from memory, and as quoted for
/// the 2012 edition: see the module notes).
pub const PSYCHROMETER_TEMPERATURE_FACTOR: f64 = 0.000944;

/// Psychrometer coefficient with the bulb iced, K⁻¹ (WMO-No. 8, Annex 4.B; from memory).
pub const PSYCHROMETER_COEFFICIENT_ICE: f64 = 5.75e-4;

/// Convergence tolerance of the wet-bulb solver, K (the last Newton or bisection step).
pub const WET_BULB_TOLERANCE_K: f64 = 1e-4;

/// Most solver iterations before giving up with `NaN` (bisection alone halves the 140 K
/// bracket to the tolerance in 21 steps).
const MAX_ITERATIONS: usize = 80;

/// Lowest and highest air temperature accepted, K.
const T_MIN_K: f64 = 173.15;
const T_MAX_K: f64 = 333.15;
/// Lowest and highest pressure accepted, Pa.
const P_MIN_PA: f64 = 100.0;
const P_MAX_PA: f64 = 110_000.0;

/// Magnus coefficients over water (WMO-No. 8 Annex 4.B, Bolton 1980 eq. 10) and ice
/// (WMO-No. 8), used here only for the derivative of the saturation pressure; the values
/// themselves come from [`crate::physics::humidity`].
const WMO_WATER: (f64, f64) = (17.62, 243.12);
const BOLTON_WATER: (f64, f64) = (17.67, 243.5);
const WMO_ICE: (f64, f64) = (22.46, 272.62);

/// Which bulb the psychrometric equation describes.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Default)]
pub enum WetBulbPhase {
    /// A liquid (possibly supercooled) wet bulb at every temperature: continuous through 0 °C.
    #[default]
    Water,
    /// The ice-bulb form of Annex 4.B whenever the liquid-bulb root lies below 0 °C.
    IceBelowFreezing,
}

/// One branch of the psychrometric equation.
#[derive(Clone, Copy, Debug)]
struct Branch {
    /// Saturation formula over the bulb's surface.
    saturation: fn(f64) -> f64,
    /// Magnus `a`, `b` of that formula, for its derivative.
    magnus: (f64, f64),
    /// Coefficient `A0` of `A(x) = A0 (1 + k t_x)`, K⁻¹.
    a0: f64,
    /// Temperature factor `k`, per °C.
    k: f64,
}

impl Branch {
    fn water(formula: SaturationFormula) -> Self {
        let (saturation, magnus): (fn(f64) -> f64, _) = match formula {
            SaturationFormula::WmoMagnus => (saturation_vapour_pressure_water, WMO_WATER),
            SaturationFormula::Bolton => (
                super::humidity::saturation_vapour_pressure_bolton,
                BOLTON_WATER,
            ),
        };
        Self {
            saturation,
            magnus,
            a0: PSYCHROMETER_COEFFICIENT_WATER,
            k: PSYCHROMETER_TEMPERATURE_FACTOR,
        }
    }

    fn ice() -> Self {
        Self {
            saturation: saturation_vapour_pressure_ice,
            magnus: WMO_ICE,
            a0: PSYCHROMETER_COEFFICIENT_ICE,
            k: 0.0,
        }
    }

    /// `F(x)` and `F'(x)` for air at `t_k`, `p_pa`, `e_pa`.
    #[inline]
    fn residual(&self, x: f64, t_k: f64, p_pa: f64, e_pa: f64) -> (f64, f64) {
        let tc = x - ZERO_CELSIUS_K;
        let es = (self.saturation)(x);
        let (a, b) = self.magnus;
        let des = es * a * b / ((b + tc) * (b + tc));
        let coefficient = self.a0 * (1.0 + self.k * tc);
        let f = es - coefficient * p_pa * (t_k - x) - e_pa;
        let df = des + p_pa * (coefficient - self.a0 * self.k * (t_k - x));
        (f, df)
    }

    /// The root of `F` in `[lo, hi]`, or `NaN` when `F` does not change sign there.
    fn solve(&self, t_k: f64, p_pa: f64, e_pa: f64, mut lo: f64, mut hi: f64) -> f64 {
        let (f_lo, _) = self.residual(lo, t_k, p_pa, e_pa);
        let (f_hi, _) = self.residual(hi, t_k, p_pa, e_pa);
        if !(f_lo.is_finite() && f_hi.is_finite()) || f_lo > 0.0 || f_hi < 0.0 {
            return f64::NAN;
        }
        if f_lo == 0.0 {
            return lo;
        }
        if f_hi == 0.0 {
            return hi;
        }
        // Start at the air temperature (the root for saturated air), kept inside the bracket.
        let mut x = t_k.clamp(lo, hi);
        for _ in 0..MAX_ITERATIONS {
            let (f, df) = self.residual(x, t_k, p_pa, e_pa);
            if !f.is_finite() {
                return f64::NAN;
            }
            if f == 0.0 {
                return x;
            }
            if f < 0.0 {
                lo = x;
            } else {
                hi = x;
            }
            let newton = x - f / df;
            let next = if df > 0.0 && newton > lo && newton < hi {
                newton
            } else {
                0.5 * (lo + hi)
            };
            let step = (next - x).abs();
            x = next;
            if step < WET_BULB_TOLERANCE_K || hi - lo < WET_BULB_TOLERANCE_K {
                return x;
            }
        }
        f64::NAN
    }
}

/// Whether the inputs lie in the domain of the module docs.
#[inline]
fn in_domain(t_k: f64, p_pa: f64, e_pa: f64) -> bool {
    (T_MIN_K..=T_MAX_K).contains(&t_k)
        && (P_MIN_PA..=P_MAX_PA).contains(&p_pa)
        && e_pa >= 0.0
        && e_pa < p_pa
}

/// Vapour pressure from dry- and wet-bulb temperatures: the psychrometric equation forward.
///
/// # Units
/// - `t_k`: air (dry-bulb) temperature, K
/// - `tw_k`: wet-bulb (or ice-bulb) temperature, K
/// - `p_pa`: air pressure, Pa
/// - returns: vapour pressure, Pa
///
/// # Method
/// `e = e_w(T_w) − 6.53·10⁻⁴ (1 + 0.000944 t_w) p (T − T_w)` for a liquid bulb; with
/// [`WetBulbPhase::IceBelowFreezing`] and `T_w` below 0 °C,
/// `e = e_i(T_w) − 5.75·10⁻⁴ p (T − T_w)`. Saturation over water by `formula`, over ice by the
/// WMO Magnus form.
///
/// # References
/// WMO (2018), *Guide to Instruments and Methods of Observation* (WMO-No. 8), Vol. I,
/// Annex 4.B.
pub fn psychrometric_vapour_pressure(
    t_k: f64,
    tw_k: f64,
    p_pa: f64,
    formula: SaturationFormula,
    phase: WetBulbPhase,
) -> f64 {
    let branch = if phase == WetBulbPhase::IceBelowFreezing && tw_k < ZERO_CELSIUS_K {
        Branch::ice()
    } else {
        Branch::water(formula)
    };
    branch.residual(tw_k, t_k, p_pa, 0.0).0
}

/// Isobaric wet-bulb temperature from temperature, pressure and vapour pressure.
///
/// # Units
/// - `t_k`: air temperature, K
/// - `p_pa`: air pressure, Pa
/// - `e_pa`: vapour pressure, Pa
/// - returns: K; `NaN` for a `NaN` input, an input outside the domain of the module docs, or
///   no root in the solver's bracket
///
/// # Method
/// The root of the psychrometric equation (see [`psychrometric_vapour_pressure`]) by Newton's
/// method with a bisection fallback, to [`WET_BULB_TOLERANCE_K`]. With
/// [`WetBulbPhase::IceBelowFreezing`], when the liquid-bulb root is below 0 °C the ice-bulb
/// equation is solved below 0 °C instead (and if it has no root there, which needs air
/// supersaturated with respect to ice by more than the equation allows, the liquid-bulb root
/// is returned).
///
/// # References
/// WMO (2018), *Guide to Instruments and Methods of Observation* (WMO-No. 8), Vol. I,
/// Annex 4.B.
pub fn psychrometric_wet_bulb_temperature(
    t_k: f64,
    p_pa: f64,
    e_pa: f64,
    formula: SaturationFormula,
    phase: WetBulbPhase,
) -> f64 {
    if !in_domain(t_k, p_pa, e_pa) {
        return f64::NAN;
    }
    let lo = t_k - 120.0;
    let hi = t_k + 20.0;
    let water = Branch::water(formula).solve(t_k, p_pa, e_pa, lo, hi);
    if phase == WetBulbPhase::Water || water.is_nan() || water >= ZERO_CELSIUS_K {
        return water;
    }
    let ice = Branch::ice().solve(t_k, p_pa, e_pa, lo, ZERO_CELSIUS_K);
    if ice.is_finite() {
        ice
    } else {
        water
    }
}

/// Isobaric wet-bulb temperature from temperature, pressure and dewpoint.
///
/// # Units
/// - `t_k`, `td_k`: air temperature and dewpoint, K
/// - `p_pa`: air pressure, Pa
/// - returns: K (`NaN` as for [`psychrometric_wet_bulb_temperature`])
///
/// # Method
/// `e = e_w(T_d)` ([`vapour_pressure_from_dewpoint`], with respect to water as WMO-No. 8
/// defines the dewpoint), then [`psychrometric_wet_bulb_temperature`].
///
/// # References
/// WMO (2018), WMO-No. 8, Vol. I, Annex 4.B.
pub fn wet_bulb_temperature_from_dewpoint(
    t_k: f64,
    td_k: f64,
    p_pa: f64,
    formula: SaturationFormula,
    phase: WetBulbPhase,
) -> f64 {
    let e = vapour_pressure_from_dewpoint(td_k, formula);
    psychrometric_wet_bulb_temperature(t_k, p_pa, e, formula, phase)
}

/// Isobaric wet-bulb temperature from temperature, pressure and relative humidity.
///
/// # Units
/// - `t_k`: air temperature, K
/// - `rh`: relative humidity, fraction (1.0 = saturated), with respect to `rh_phase`
/// - `p_pa`: air pressure, Pa
/// - returns: K (`NaN` as for [`psychrometric_wet_bulb_temperature`])
///
/// # Method
/// `e = RH · e_s(T)` ([`vapour_pressure_from_relative_humidity`]), then
/// [`psychrometric_wet_bulb_temperature`].
///
/// # References
/// WMO (2018), WMO-No. 8, Vol. I, Annex 4.B.
pub fn wet_bulb_temperature_from_relative_humidity(
    t_k: f64,
    rh: f64,
    p_pa: f64,
    formula: SaturationFormula,
    rh_phase: RelativeHumidityPhase,
    phase: WetBulbPhase,
) -> f64 {
    let e = vapour_pressure_from_relative_humidity(rh, t_k, formula, rh_phase);
    psychrometric_wet_bulb_temperature(t_k, p_pa, e, formula, phase)
}

/// Whether the wet-bulb temperature is above 0 °C, without solving for it.
///
/// # Units
/// - `t_k`: air temperature, K; `p_pa`: air pressure, Pa; `e_pa`: vapour pressure, Pa
/// - returns: `Some(true)` when `T_w > 0 °C`, `Some(false)` when `T_w ≤ 0 °C`, `None` for an
///   input outside the domain of the module docs (or `NaN`)
///
/// # Method
/// The liquid-bulb residual `F(x)` increases with `x`, so `T_w > 0 °C` exactly when
/// `F(0 °C) < 0`, that is when `e > 611.2 Pa − 6.53·10⁻⁴ p (T − 273.15 K)`: the saturation
/// pressure at 0 °C is 6.112 hPa in every Magnus form used here, so the test needs no
/// exponential. It agrees with [`psychrometric_wet_bulb_temperature`] under both
/// [`WetBulbPhase`] conventions (an ice-bulb root is sought only below 0 °C).
///
/// # References
/// WMO (2018), WMO-No. 8, Vol. I, Annex 4.B.
pub fn wet_bulb_exceeds_freezing(t_k: f64, p_pa: f64, e_pa: f64) -> Option<bool> {
    if !in_domain(t_k, p_pa, e_pa) {
        return None;
    }
    let f0 = SATURATION_AT_ZERO_CELSIUS_PA
        - PSYCHROMETER_COEFFICIENT_WATER * p_pa * (t_k - ZERO_CELSIUS_K)
        - e_pa;
    Some(f0 < 0.0)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::physics::humidity::saturation_vapour_pressure_bolton;

    const WMO: SaturationFormula = SaturationFormula::WmoMagnus;

    #[test]
    fn the_saturation_pressure_at_zero_celsius_is_the_magnus_coefficient() {
        // 6.112 hPa: WMO-No. 8 Annex 4.B and Bolton (1980) eq. 10, at t = 0 °C.
        for es in [
            saturation_vapour_pressure_water(ZERO_CELSIUS_K),
            saturation_vapour_pressure_ice(ZERO_CELSIUS_K),
            saturation_vapour_pressure_bolton(ZERO_CELSIUS_K),
        ] {
            assert!((es - SATURATION_AT_ZERO_CELSIUS_PA).abs() < 1e-9, "{es}");
        }
    }

    #[test]
    fn the_analytic_derivative_matches_a_central_difference() {
        // Guards the Magnus coefficients restated here for the derivative against the ones in
        // the humidity module (a mathematical identity, no outside value).
        for branch in [
            Branch::water(WMO),
            Branch::water(SaturationFormula::Bolton),
            Branch::ice(),
        ] {
            for x in [250.0, 265.0, 273.15, 290.0, 305.0] {
                let h = 1e-4;
                let (fp, _) = branch.residual(x + h, 300.0, 90_000.0, 500.0);
                let (fm, _) = branch.residual(x - h, 300.0, 90_000.0, 500.0);
                let (_, df) = branch.residual(x, 300.0, 90_000.0, 500.0);
                let numeric = (fp - fm) / (2.0 * h);
                assert!(
                    (df - numeric).abs() < 1e-5 * df.abs(),
                    "{x}: {df} vs {numeric}"
                );
            }
        }
    }

    #[test]
    fn the_root_satisfies_the_forward_equation() {
        // Inverse and forward are one equation: the residual at the root is below the
        // tolerance times the slope (a mathematical check).
        for (t, p, rh) in [
            (293.15, 101_325.0, 0.5),
            (263.15, 70_000.0, 0.8),
            (303.15, 85_000.0, 0.1),
        ] {
            let e = rh * saturation_vapour_pressure_water(t);
            for phase in [WetBulbPhase::Water, WetBulbPhase::IceBelowFreezing] {
                let tw = psychrometric_wet_bulb_temperature(t, p, e, WMO, phase);
                let back = psychrometric_vapour_pressure(t, tw, p, WMO, phase);
                assert!(
                    (back - e).abs() < 0.05,
                    "{t} {p} {rh} {phase:?}: {back} vs {e}"
                );
            }
        }
    }
}
