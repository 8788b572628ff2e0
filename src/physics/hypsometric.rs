//! The hypsometric equation: layer thickness, scale height and polytropic layers.
//!
//! Between pressures `p1 > p2`, hydrostatic balance and the ideal gas law give
//! `Z2 − Z1 = (R_d / g0) ∫ T_v d ln p` (Wallace and Hobbs 2006, §3.2). Within a layer the
//! virtual temperature is taken to vary linearly with height (a polytropic layer), so that
//! `ln T_v` is linear in `ln p` and the layer mean is the logarithmic mean of the end values.

use super::constants::{Constants, STANDARD_LAPSE_RATE};

/// `(1 − e^{−y}) / y`, continuous through `y = 0` (where it is 1).
#[inline]
pub(crate) fn one_minus_exp_neg_over(y: f64) -> f64 {
    if y == 0.0 {
        1.0
    } else {
        -(-y).exp_m1() / y
    }
}

/// `−ln(1 − y) / y`, continuous through `y = 0` (where it is 1); `NaN` for `y >= 1`.
#[inline]
pub(crate) fn neg_ln_one_minus_over(y: f64) -> f64 {
    if y == 0.0 {
        1.0
    } else if y >= 1.0 {
        f64::NAN
    } else {
        -(-y).ln_1p() / y
    }
}

/// Logarithmic mean of two temperatures: the mean virtual temperature of a polytropic layer.
///
/// # Units
/// - `t1`, `t2`: K, both positive
/// - returns: K; `NaN` if either is `NaN` or not positive
///
/// # Method
/// `(t1 − t2) / ln(t1 / t2)`, equal to `t1` when `t1 = t2`. Written as
/// `(t1 + t2)/2 · u / artanh(u)` with `u = (t1 − t2)/(t1 + t2)`, which is symmetric by
/// construction. For `|u| < 0.05` (every realistic layer) the Taylor series
/// `u/artanh u = 1 − u²/3 − 4u⁴/45 − 44u⁶/945 − 428u⁸/14175 − …` is used: it needs no
/// logarithm and has no cancellation near equality; the first omitted term is below 3e-15
/// relative there. Beyond that, the closed form.
///
/// # References
/// Wallace, J. M. and Hobbs, P. V. (2006), *Atmospheric Science*, 2nd ed., §3.2 (the
/// hypsometric equation); the series is that of `artanh` (Abramowitz and Stegun 1964, §4.6, from memory).
#[inline]
pub fn logarithmic_mean_temperature(t1: f64, t2: f64) -> f64 {
    // `!(x > 0)` is also true for NaN.
    if !(t1 > 0.0 && t2 > 0.0) {
        return f64::NAN;
    }
    let sum = t1 + t2;
    let u = (t1 - t2) / sum;
    if u.abs() < 0.05 {
        let s = u * u;
        let ratio =
            1.0 - s * (1.0 / 3.0 + s * (4.0 / 45.0 + s * (44.0 / 945.0 + s * (428.0 / 14175.0))));
        0.5 * sum * ratio
    } else {
        (t1 - t2) / (t1 / t2).ln()
    }
}

/// Thickness of the layer between two pressures, by the hypsometric equation.
///
/// # Units
/// - `p_bottom`, `p_top`: Pa, with `p_bottom > p_top` (the result is negative otherwise)
/// - `tv_bottom`, `tv_top`: virtual temperature, K
/// - returns: geopotential metres
///
/// # Method
/// `(R_d / g0) · T̄_v · ln(p_bottom / p_top)` with `T̄_v` the
/// [`logarithmic_mean_temperature`] of the end values: exact for a polytropic layer and equal
/// to `tv_bottom` when isothermal.
///
/// # References
/// Wallace, J. M. and Hobbs, P. V. (2006), *Atmospheric Science*, 2nd ed., §3.2.
pub fn layer_thickness(
    p_bottom: f64,
    p_top: f64,
    tv_bottom: f64,
    tv_top: f64,
    c: &Constants,
) -> f64 {
    c.rd_over_g0() * logarithmic_mean_temperature(tv_bottom, tv_top) * (p_bottom / p_top).ln()
}

/// Mean virtual temperature of a layer from its thickness (the hypsometric equation solved for
/// the temperature).
///
/// # Units
/// - `dz`: thickness, geopotential metres
/// - `p_bottom`, `p_top`: Pa, `p_bottom > p_top`
/// - returns: K; `NaN` when `p_bottom == p_top`
///
/// # Method
/// `T̄_v = g0 Δz / (R_d ln(p_bottom / p_top))`. GUIDE §3 uses it to read 5400 m over
/// 1000–500 hPa as a mean of about 266 K.
///
/// # References
/// Wallace, J. M. and Hobbs, P. V. (2006), *Atmospheric Science*, 2nd ed., §3.2.
pub fn mean_virtual_temperature_from_thickness(
    dz: f64,
    p_bottom: f64,
    p_top: f64,
    c: &Constants,
) -> f64 {
    let ln_ratio = (p_bottom / p_top).ln();
    if ln_ratio == 0.0 {
        return f64::NAN;
    }
    dz / (c.rd_over_g0() * ln_ratio)
}

/// Scale height of an isothermal atmosphere.
///
/// # Units
/// - `tv_k`: virtual temperature, K
/// - returns: geopotential metres
///
/// # Method
/// `H = R_d T_v / g0`, the height over which pressure falls by a factor e in an isothermal
/// layer (about 8 km at 273 K).
///
/// # References
/// Wallace, J. M. and Hobbs, P. V. (2006), *Atmospheric Science*, 2nd ed., §3.2.2.
pub fn scale_height(tv_k: f64, c: &Constants) -> f64 {
    c.rd_over_g0() * tv_k
}

/// Pressure at a height above a reference in an isothermal layer.
///
/// # Units
/// - `p0_pa`: pressure at the reference, Pa
/// - `dz_m`: height above the reference, geopotential metres
/// - `scale_height_m`: [`scale_height`] of the layer, geopotential metres
/// - returns: Pa
///
/// # Method
/// `p = p0 exp(−Δz / H)`.
///
/// # References
/// Wallace, J. M. and Hobbs, P. V. (2006), *Atmospheric Science*, 2nd ed., §3.2.2.
pub fn isothermal_pressure(p0_pa: f64, dz_m: f64, scale_height_m: f64) -> f64 {
    p0_pa * (-dz_m / scale_height_m).exp()
}

/// Height of a pressure above a reference in an isothermal layer.
///
/// # Units
/// - `p0_pa`: pressure at the reference, Pa
/// - `p_pa`: pressure, Pa
/// - `scale_height_m`: [`scale_height`] of the layer, geopotential metres
/// - returns: geopotential metres above the reference
///
/// # Method
/// `Δz = H ln(p0 / p)`, the inverse of [`isothermal_pressure`].
///
/// # References
/// Wallace, J. M. and Hobbs, P. V. (2006), *Atmospheric Science*, 2nd ed., §3.2.2.
pub fn isothermal_height(p0_pa: f64, p_pa: f64, scale_height_m: f64) -> f64 {
    scale_height_m * (p0_pa / p_pa).ln()
}

/// Temperature at a pressure inside a polytropic layer given by its two end points.
///
/// # Units
/// - `p1`, `p2`: pressures of the end points, Pa (distinct, positive)
/// - `t1`, `t2`: temperatures there, K (positive)
/// - `p`: pressure wanted, Pa
/// - returns: K; `NaN` when `p1 == p2` (unless `p == p1`) or any input is invalid
///
/// # Method
/// Temperature linear in height with hydrostatic balance gives `T ∝ p^κ` with
/// `κ = ln(t2/t1) / ln(p2/p1)`, so `ln T` is linear in `ln p`:
/// `T = t1 (t2/t1)^{ln(p/p1)/ln(p2/p1)}`. Also used outside `[p2, p1]` as an extrapolation.
///
/// # References
/// U.S. Standard Atmosphere 1976 (NOAA/NASA/USAF), eq. 33a (the polytropic layer);
/// Wallace, J. M. and Hobbs, P. V. (2006), *Atmospheric Science*, 2nd ed., §3.2.
pub fn polytropic_temperature_at_pressure(p1: f64, t1: f64, p2: f64, t2: f64, p: f64) -> f64 {
    if p == p1 {
        return t1;
    }
    if p == p2 {
        return t2;
    }
    let ln_span = (p2 / p1).ln();
    if ln_span == 0.0 || !(t1 > 0.0 && t2 > 0.0) {
        return f64::NAN;
    }
    let frac = (p / p1).ln() / ln_span;
    t1 * ((t2 / t1).ln() * frac).exp()
}

/// Pressure at a height above a reference, for a layer of constant lapse rate.
///
/// # Units
/// - `p1`: pressure at the reference, Pa
/// - `tv1`: virtual temperature at the reference, K
/// - `lapse_rate_k_per_m`: Γ = −dT_v/dz, K per geopotential metre (positive when T_v falls
///   with height)
/// - `dz_m`: height above the reference, geopotential metres (negative below it)
/// - returns: Pa; `NaN` where the layer would reach `T_v ≤ 0`
///
/// # Method
/// `T_v(z) = tv1 − Γ Δz` and `p = p1 (T_v(z)/tv1)^{g0/(R_d Γ)}`. Written as
/// `ln(p/p1) = −(g0 Δz / (R_d tv1)) · [−ln(1 − y)/y]` with `y = Γ Δz / tv1`, which tends
/// smoothly to the isothermal `p1 exp(−Δz/H)` as Γ → 0 (no division by Γ).
///
/// # References
/// U.S. Standard Atmosphere 1976 (NOAA/NASA/USAF), eq. 33a; Wallace, J. M. and Hobbs, P. V.
/// (2006), *Atmospheric Science*, 2nd ed., §3.2.
pub fn polytropic_pressure_at_height(
    p1: f64,
    tv1: f64,
    lapse_rate_k_per_m: f64,
    dz_m: f64,
    c: &Constants,
) -> f64 {
    if tv1.is_nan() || tv1 <= 0.0 {
        return f64::NAN;
    }
    let y = lapse_rate_k_per_m * dz_m / tv1;
    let ln_ratio = -(dz_m / (c.rd_over_g0() * tv1)) * neg_ln_one_minus_over(y);
    p1 * ln_ratio.exp()
}

/// Virtual temperature extrapolated from a reference pressure at the standard lapse rate.
///
/// # Units
/// - `tv_ref`: virtual temperature at `p_ref`, K
/// - `p_ref`, `p`: Pa
/// - returns: K
///
/// # Method
/// A layer of constant lapse rate Γ = 6.5 K/km has `T_v = T_v,ref (p/p_ref)^{R_d Γ / g0}`.
/// Used for the surface temperature below the lowest level and for levels below ground
/// (common practice, as in reduction of pressure to sea level).
///
/// # References
/// U.S. Standard Atmosphere 1976 (NOAA/NASA/USAF), the 0–11 km′ lapse rate and eq. 33a;
/// WMO-No. 8 (2018), Vol. I, Ch. 3, on reduction of pressure.
pub fn standard_lapse_extrapolated_temperature(
    tv_ref: f64,
    p_ref: f64,
    p: f64,
    c: &Constants,
) -> f64 {
    tv_ref * (p / p_ref).powf(c.rd_over_g0() * STANDARD_LAPSE_RATE)
}

#[cfg(test)]
mod tests {
    use super::*;
    use proptest::prelude::*;

    #[test]
    fn logarithmic_mean_basics() {
        assert_eq!(logarithmic_mean_temperature(250.0, 250.0), 250.0);
        assert!(logarithmic_mean_temperature(f64::NAN, 250.0).is_nan());
        assert!(logarithmic_mean_temperature(250.0, 0.0).is_nan());
        assert!(logarithmic_mean_temperature(-1.0, 250.0).is_nan());
        // Far apart: closed form. ln(2) = 0.693147...: (400 − 200)/ln 2 = 288.539 K.
        let m = logarithmic_mean_temperature(400.0, 200.0);
        assert!((m - 200.0 / std::f64::consts::LN_2).abs() < 1e-12);
    }

    #[test]
    fn logarithmic_mean_series_meets_closed_form_at_the_switch() {
        // Both sides of |u| = 0.05 agree with the closed form to near machine precision, so
        // there is no step where the method changes.
        for (t1, t2) in [
            (300.0f64, 271.4f64),
            (300.0, 271.5),
            (271.45, 300.0),
            (288.0, 287.0),
        ] {
            let exact = (t1 - t2) / (t1 / t2).ln();
            let got = logarithmic_mean_temperature(t1, t2);
            assert!((got - exact).abs() < 1e-11, "{t1} {t2}: {got} vs {exact}");
        }
    }

    #[test]
    fn scale_height_near_8_km_at_273_k() {
        // About 7.99 km at 273 K (common practice, GUIDE §2).
        let h = scale_height(273.0, &Constants::default());
        assert!((h - 7990.0).abs() < 10.0, "{h}");
    }

    #[test]
    fn thickness_5400_m_over_1000_500_hpa_is_about_266_k() {
        // 5400 m for 1000–500 hPa is a mean of about 266 K (common practice, GUIDE §3).
        let c = Constants::default();
        let t = mean_virtual_temperature_from_thickness(5400.0, 100_000.0, 50_000.0, &c);
        assert!((t - 266.0).abs() < 0.5, "{t}");
        assert!(mean_virtual_temperature_from_thickness(1.0, 5e4, 5e4, &c).is_nan());
    }

    #[test]
    fn isothermal_layer_matches_closed_form() {
        // p = p0 exp(−z/H) (Wallace & Hobbs 2006, §3.2.2, the isothermal atmosphere).
        let c = Constants::default();
        let h = scale_height(250.0, &c);
        for z in [0.0, 1000.0, 5000.0, 20_000.0] {
            let p = isothermal_pressure(101_325.0, z, h);
            assert!((p - 101_325.0 * (-z / h).exp()).abs() < 1e-9);
            assert!((isothermal_height(101_325.0, p, h) - z).abs() < 1e-8);
            let dz = layer_thickness(101_325.0, p, 250.0, 250.0, &c);
            assert!((dz - z).abs() < 1e-8);
            let p2 = polytropic_pressure_at_height(101_325.0, 250.0, 0.0, z, &c);
            assert!((p2 - p).abs() < 1e-9 * p);
        }
    }

    #[test]
    fn polytropic_layer_agrees_with_its_closed_form() {
        // A 6.5 K/km layer from 288.15 K at 101325 Pa: the U.S. Standard Atmosphere 1976
        // troposphere, whose 500 hPa height is 5574.4 gpm (GUIDE §2 table, derived from the
        // standard's definition).
        let c = Constants::us_standard_atmosphere_1976();
        let p = polytropic_pressure_at_height(101_325.0, 288.15, 0.0065, 5574.4, &c);
        assert!((p - 50_000.0).abs() < 1.0, "{p}");
        let t = polytropic_temperature_at_pressure(
            101_325.0,
            288.15,
            p,
            288.15 - 0.0065 * 5574.4,
            70_000.0,
        );
        let z700 = (288.15 - t) / 0.0065;
        assert!((z700 - 3012.2).abs() < 0.1, "{z700}"); // GUIDE §2 table: 700 hPa 3012.2 gpm
        let t_ext = standard_lapse_extrapolated_temperature(288.15, 101_325.0, p, &c);
        assert!((t_ext - (288.15 - 0.0065 * 5574.4)).abs() < 0.01);
        // Thickness by the log mean equals the polytropic closed form (T1 − T2)/Γ.
        let dz = layer_thickness(101_325.0, 70_000.0, 288.15, t, &c);
        assert!((dz - z700).abs() < 1e-8);
        // Non-positive temperature is refused.
        assert!(polytropic_pressure_at_height(1e5, 200.0, 0.01, 30_000.0, &c).is_nan());
    }

    proptest! {
        #[test]
        fn logarithmic_mean_is_symmetric_and_between(t1 in 150.0f64..350.0, t2 in 150.0f64..350.0) {
            let a = logarithmic_mean_temperature(t1, t2);
            let b = logarithmic_mean_temperature(t2, t1);
            prop_assert!((a - b).abs() <= 1e-12 * a);
            prop_assert!(a >= t1.min(t2) - 1e-9 && a <= t1.max(t2) + 1e-9);
            // Below the arithmetic mean, above the geometric mean (from memory: Carlson, B. C.
            // (1972), The logarithmic mean, Amer. Math. Monthly 79, 615-618).
            prop_assert!(a <= 0.5 * (t1 + t2) + 1e-9);
            prop_assert!(a >= (t1 * t2).sqrt() - 1e-9);
        }

        #[test]
        fn logarithmic_mean_continuous_near_equality(t in 150.0f64..350.0, d in -1e-6f64..1e-6) {
            // Near equality the mean is t + d/2 to second order.
            let m = logarithmic_mean_temperature(t, t + d);
            prop_assert!((m - (t + 0.5 * d)).abs() < 1e-12);
        }

        #[test]
        fn mean_tv_inverts_layer_thickness(pb in 20_000.0f64..105_000.0, f in 0.2f64..0.99,
                                           t1 in 180.0f64..320.0, t2 in 180.0f64..320.0) {
            let c = Constants::default();
            let pt = pb * f;
            let dz = layer_thickness(pb, pt, t1, t2, &c);
            let tm = mean_virtual_temperature_from_thickness(dz, pb, pt, &c);
            prop_assert!((tm - logarithmic_mean_temperature(t1, t2)).abs() < 1e-9);
        }

        #[test]
        fn polytropic_pressure_and_temperature_are_consistent(
            tv1 in 200.0f64..310.0, lapse in -0.01f64..0.01, dz in -2000.0f64..8000.0)
        {
            let c = Constants::default();
            let p = polytropic_pressure_at_height(100_000.0, tv1, lapse, dz, &c);
            let tv2 = tv1 - lapse * dz;
            // The hypsometric thickness of the same layer returns the height difference.
            let back = layer_thickness(100_000.0, p, tv1, tv2, &c);
            prop_assert!((back - dz).abs() < 1e-6, "{} vs {}", back, dz);
        }
    }
}
