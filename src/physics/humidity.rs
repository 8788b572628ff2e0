//! Saturation vapour pressure, humidity conversions and virtual temperature.
//!
//! Units throughout: temperatures in K, pressures in Pa, specific humidity `q` and mixing
//! ratio `r` in kg kg⁻¹, relative humidity as a fraction (1.0 = saturated).
//!
//! Relative humidity is taken with respect to water by default, as WMO-No. 8 defines it;
//! [`RelativeHumidityPhase::IceBelowFreezing`] is there for producers that report it with
//! respect to ice below 0 °C.
//!
//! Vapour pressure at or above the air pressure: where a dewpoint or relative humidity gives
//! `e >= p` (warm air at very low pressure, or a bad value), no mixing ratio or specific
//! humidity exists, and [`mixing_ratio_from_vapour_pressure`] and
//! [`specific_humidity_from_vapour_pressure`] return `NaN` rather than capping `e` at an
//! arbitrary fraction of `p`: a capped value would look like data. The column code then
//! masks the level, which is the honest answer.
//!
//! [`RelativeHumidityPhase::IceBelowFreezing`]: crate::physics::humidity::RelativeHumidityPhase::IceBelowFreezing
//! [`mixing_ratio_from_vapour_pressure`]: crate::physics::humidity::mixing_ratio_from_vapour_pressure
//! [`specific_humidity_from_vapour_pressure`]: crate::physics::humidity::specific_humidity_from_vapour_pressure

/// 0 °C in kelvin (the ice point; ITS-90).
const ZERO_CELSIUS_K: f64 = 273.15;

/// Coefficient of every Magnus form used here, Pa: 6.112 hPa (WMO-No. 8 Annex 4.B; Bolton 1980).
const MAGNUS_E0_PA: f64 = 611.2;

/// WMO-No. 8 (2018), Annex 4.B, over water: 17.62 and 243.12 °C (valid −45 to 60 °C).
const WMO_WATER_A: f64 = 17.62;
const WMO_WATER_B: f64 = 243.12;

/// WMO-No. 8 (2018), Annex 4.B, over ice: 22.46 and 272.62 °C (valid −65 to 0 °C).
const WMO_ICE_A: f64 = 22.46;
const WMO_ICE_B: f64 = 272.62;

/// Bolton (1980) eq. 10: 17.67 and 243.5 °C (0.1 % from −30 to 35 °C).
const BOLTON_A: f64 = 17.67;
const BOLTON_B: f64 = 243.5;

/// The terms of the Magnus form `e0 exp(a t / (b + t))` ([`saturation_vapour_pressure`]) for
/// one formula, for code that evaluates it in its own way (the row kernel's lanes).
#[derive(Clone, Copy, Debug, PartialEq)]
pub(crate) struct MagnusTerms {
    /// 0 °C in kelvin.
    pub(crate) zero_celsius_k: f64,
    /// `e0`, Pa.
    pub(crate) e0_pa: f64,
    /// `(a, b)` over water (`b` in °C).
    pub(crate) water: (f64, f64),
    /// `(a, b)` over ice, which [`RelativeHumidityPhase::IceBelowFreezing`] takes below 0 °C.
    pub(crate) ice: (f64, f64),
}

impl MagnusTerms {
    /// The terms [`saturation_vapour_pressure`] uses with `formula`.
    pub(crate) fn of(formula: SaturationFormula) -> Self {
        Self {
            zero_celsius_k: ZERO_CELSIUS_K,
            e0_pa: MAGNUS_E0_PA,
            water: match formula {
                SaturationFormula::WmoMagnus => (WMO_WATER_A, WMO_WATER_B),
                SaturationFormula::Bolton => (BOLTON_A, BOLTON_B),
            },
            ice: (WMO_ICE_A, WMO_ICE_B),
        }
    }
}

/// Which published fit of the saturation vapour pressure to use.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Default)]
pub enum SaturationFormula {
    /// The Magnus form of WMO-No. 8, Annex 4.B (over water −45…60 °C, over ice −65…0 °C).
    #[default]
    WmoMagnus,
    /// Bolton (1980) eq. 10 (over water only; over ice the WMO form is used).
    Bolton,
}

/// With respect to which phase relative humidity is expressed.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Default)]
pub enum RelativeHumidityPhase {
    /// With respect to water at all temperatures (the WMO definition).
    #[default]
    Water,
    /// With respect to ice below 0 °C, water above.
    IceBelowFreezing,
}

/// The Magnus form `e0 exp(a t / (b + t))` with `t` in °C.
#[inline]
fn magnus(t_k: f64, a: f64, b: f64) -> f64 {
    let t = t_k - ZERO_CELSIUS_K;
    let denom = b + t;
    if denom <= 0.0 {
        // At or below the pole of the fit (about −243 °C): no meaningful value.
        return f64::NAN;
    }
    MAGNUS_E0_PA * (a * t / denom).exp()
}

/// Inverse of [`magnus`]: the temperature (K) whose saturation pressure is `e_pa`.
#[inline]
fn magnus_inverse(e_pa: f64, a: f64, b: f64) -> f64 {
    if e_pa.is_nan() || e_pa <= 0.0 {
        return f64::NAN;
    }
    let x = (e_pa / MAGNUS_E0_PA).ln();
    let denom = a - x;
    if denom <= 0.0 {
        // e beyond the asymptote e0 exp(a) of the fit.
        return f64::NAN;
    }
    b * x / denom + ZERO_CELSIUS_K
}

/// Saturation vapour pressure over a plane surface of pure water, WMO Magnus form.
///
/// # Units
/// - `t_k`: temperature, K
/// - returns: Pa
///
/// # Method
/// `e_w = 6.112 hPa · exp(17.62 t / (243.12 + t))`, `t` in °C. Stated range −45…60 °C, where
/// it agrees with IAPWS-95 to a few tenths of a percent; outside the range it is an
/// extrapolation (still finite and smooth).
///
/// # References
/// WMO (2018), *Guide to Instruments and Methods of Observation* (WMO-No. 8), Vol. I,
/// Annex 4.B.
pub fn saturation_vapour_pressure_water(t_k: f64) -> f64 {
    magnus(t_k, WMO_WATER_A, WMO_WATER_B)
}

/// Saturation vapour pressure over a plane surface of ice, WMO Magnus form.
///
/// # Units
/// - `t_k`: temperature, K
/// - returns: Pa
///
/// # Method
/// `e_i = 6.112 hPa · exp(22.46 t / (272.62 + t))`, `t` in °C. Stated range −65…0 °C.
///
/// # References
/// WMO (2018), *Guide to Instruments and Methods of Observation* (WMO-No. 8), Vol. I,
/// Annex 4.B.
pub fn saturation_vapour_pressure_ice(t_k: f64) -> f64 {
    magnus(t_k, WMO_ICE_A, WMO_ICE_B)
}

/// Saturation vapour pressure over water, Bolton's fit.
///
/// # Units
/// - `t_k`: temperature, K
/// - returns: Pa
///
/// # Method
/// `e_s = 6.112 hPa · exp(17.67 t / (t + 243.5))`, `t` in °C; Bolton states 0.1 % accuracy
/// from −30 to 35 °C.
///
/// # References
/// Bolton, D. (1980), The computation of equivalent potential temperature, *Mon. Wea. Rev.*
/// 108, 1046–1053, eq. 10.
pub fn saturation_vapour_pressure_bolton(t_k: f64) -> f64 {
    magnus(t_k, BOLTON_A, BOLTON_B)
}

/// Saturation vapour pressure by the chosen formula and phase convention.
///
/// # Units
/// - `t_k`: temperature, K
/// - returns: Pa
///
/// # Method
/// Over water by `formula` ([`saturation_vapour_pressure_water`] or
/// [`saturation_vapour_pressure_bolton`]); with [`RelativeHumidityPhase::IceBelowFreezing`]
/// and `t_k` below 273.15 K, over ice by [`saturation_vapour_pressure_ice`] (Bolton gives no
/// ice form, so the WMO one serves both).
///
/// # References
/// WMO-No. 8 (2018), Annex 4.B; Bolton (1980) eq. 10.
pub fn saturation_vapour_pressure(
    t_k: f64,
    formula: SaturationFormula,
    phase: RelativeHumidityPhase,
) -> f64 {
    if phase == RelativeHumidityPhase::IceBelowFreezing && t_k < ZERO_CELSIUS_K {
        return saturation_vapour_pressure_ice(t_k);
    }
    match formula {
        SaturationFormula::WmoMagnus => saturation_vapour_pressure_water(t_k),
        SaturationFormula::Bolton => saturation_vapour_pressure_bolton(t_k),
    }
}

/// Vapour pressure from specific humidity.
///
/// # Units
/// - `q`: specific humidity, kg kg⁻¹
/// - `p_pa`: air pressure, Pa
/// - `eps`: ε = M_w / M_d, dimensionless
/// - returns: Pa
///
/// # Method
/// Inverse of `q = ε e / (p − (1 − ε) e)`: `e = q p / (ε + (1 − ε) q)`.
///
/// # References
/// Wallace, J. M. and Hobbs, P. V. (2006), *Atmospheric Science*, 2nd ed., §3.1.
pub fn vapour_pressure_from_specific_humidity(q: f64, p_pa: f64, eps: f64) -> f64 {
    q * p_pa / (eps + (1.0 - eps) * q)
}

/// Vapour pressure from mixing ratio.
///
/// # Units
/// - `r`: mixing ratio, kg kg⁻¹
/// - `p_pa`: air pressure, Pa
/// - `eps`: ε = M_w / M_d, dimensionless
/// - returns: Pa
///
/// # Method
/// Inverse of `r = ε e / (p − e)`: `e = r p / (ε + r)`.
///
/// # References
/// Wallace, J. M. and Hobbs, P. V. (2006), *Atmospheric Science*, 2nd ed., §3.1.
pub fn vapour_pressure_from_mixing_ratio(r: f64, p_pa: f64, eps: f64) -> f64 {
    r * p_pa / (eps + r)
}

/// Mixing ratio from vapour pressure.
///
/// # Units
/// - `e_pa`: vapour pressure, Pa
/// - `p_pa`: air pressure, Pa
/// - `eps`: ε = M_w / M_d, dimensionless
/// - returns: kg kg⁻¹; `NaN` when `e_pa >= p_pa` (no dry air left: see the module docs)
///
/// # Method
/// `r = ε e / (p − e)`.
///
/// # References
/// Wallace, J. M. and Hobbs, P. V. (2006), *Atmospheric Science*, 2nd ed., §3.1.
pub fn mixing_ratio_from_vapour_pressure(e_pa: f64, p_pa: f64, eps: f64) -> f64 {
    let dry = p_pa - e_pa;
    if dry <= 0.0 {
        return f64::NAN;
    }
    eps * e_pa / dry
}

/// Specific humidity from vapour pressure.
///
/// # Units
/// - `e_pa`: vapour pressure, Pa
/// - `p_pa`: air pressure, Pa
/// - `eps`: ε = M_w / M_d, dimensionless
/// - returns: kg kg⁻¹; `NaN` when `e_pa >= p_pa` (see the module docs)
///
/// # Method
/// `q = ε e / (p − (1 − ε) e)`.
///
/// # References
/// Wallace, J. M. and Hobbs, P. V. (2006), *Atmospheric Science*, 2nd ed., §3.1.
pub fn specific_humidity_from_vapour_pressure(e_pa: f64, p_pa: f64, eps: f64) -> f64 {
    if p_pa - e_pa <= 0.0 {
        return f64::NAN;
    }
    eps * e_pa / (p_pa - (1.0 - eps) * e_pa)
}

/// Specific humidity from mixing ratio.
///
/// # Units
/// - `r`: mixing ratio, kg kg⁻¹
/// - returns: kg kg⁻¹
///
/// # Method
/// `q = r / (1 + r)` (mass of vapour over mass of moist air).
///
/// # References
/// Wallace, J. M. and Hobbs, P. V. (2006), *Atmospheric Science*, 2nd ed., §3.1.
pub fn specific_humidity_from_mixing_ratio(r: f64) -> f64 {
    r / (1.0 + r)
}

/// Mixing ratio from specific humidity.
///
/// # Units
/// - `q`: specific humidity, kg kg⁻¹
/// - returns: kg kg⁻¹; `NaN` for `q >= 1`
///
/// # Method
/// `r = q / (1 − q)`.
///
/// # References
/// Wallace, J. M. and Hobbs, P. V. (2006), *Atmospheric Science*, 2nd ed., §3.1.
pub fn mixing_ratio_from_specific_humidity(q: f64) -> f64 {
    if q >= 1.0 {
        return f64::NAN;
    }
    q / (1.0 - q)
}

/// Vapour pressure from dewpoint: the saturation vapour pressure over water at the dewpoint.
///
/// # Units
/// - `td_k`: dewpoint, K
/// - returns: Pa
///
/// # Method
/// `e = e_w(T_d)` by `formula`; the dewpoint is defined with respect to water (WMO-No. 8),
/// so no ice form is used here, whatever the temperature.
///
/// # References
/// WMO-No. 8 (2018), Annex 4.B; Bolton (1980) eq. 10.
pub fn vapour_pressure_from_dewpoint(td_k: f64, formula: SaturationFormula) -> f64 {
    saturation_vapour_pressure(td_k, formula, RelativeHumidityPhase::Water)
}

/// Dewpoint from vapour pressure, by inverting the Magnus form exactly.
///
/// # Units
/// - `e_pa`: vapour pressure, Pa
/// - returns: K; `NaN` for `e_pa <= 0`
///
/// # Method
/// With `x = ln(e / 6.112 hPa)`, `t_d = b x / (a − x)` (°C), where `a`, `b` are the
/// coefficients of `formula` over water. Exact inverse of [`vapour_pressure_from_dewpoint`].
///
/// # References
/// WMO-No. 8 (2018), Annex 4.B; Bolton (1980) eq. 11 (the inverse of his eq. 10).
pub fn dewpoint_from_vapour_pressure(e_pa: f64, formula: SaturationFormula) -> f64 {
    match formula {
        SaturationFormula::WmoMagnus => magnus_inverse(e_pa, WMO_WATER_A, WMO_WATER_B),
        SaturationFormula::Bolton => magnus_inverse(e_pa, BOLTON_A, BOLTON_B),
    }
}

/// Vapour pressure from relative humidity.
///
/// # Units
/// - `rh`: relative humidity, fraction (1.0 = saturated)
/// - `t_k`: temperature, K
/// - returns: Pa
///
/// # Method
/// `e = RH · e_s(T)` with `e_s` from [`saturation_vapour_pressure`] for the given formula
/// and phase convention. Supersaturation (`rh > 1`) is passed through.
///
/// # References
/// WMO-No. 8 (2018), Annex 4.B (definition of relative humidity).
pub fn vapour_pressure_from_relative_humidity(
    rh: f64,
    t_k: f64,
    formula: SaturationFormula,
    phase: RelativeHumidityPhase,
) -> f64 {
    rh * saturation_vapour_pressure(t_k, formula, phase)
}

/// Relative humidity from vapour pressure.
///
/// # Units
/// - `e_pa`: vapour pressure, Pa
/// - `t_k`: temperature, K
/// - returns: fraction (1.0 = saturated)
///
/// # Method
/// `RH = e / e_s(T)`, the inverse of [`vapour_pressure_from_relative_humidity`].
///
/// # References
/// WMO-No. 8 (2018), Annex 4.B (definition of relative humidity).
pub fn relative_humidity_from_vapour_pressure(
    e_pa: f64,
    t_k: f64,
    formula: SaturationFormula,
    phase: RelativeHumidityPhase,
) -> f64 {
    e_pa / saturation_vapour_pressure(t_k, formula, phase)
}

/// Virtual temperature from specific humidity.
///
/// # Units
/// - `t_k`: temperature, K
/// - `q`: specific humidity, kg kg⁻¹
/// - `eps`: ε = M_w / M_d, dimensionless
/// - returns: K
///
/// # Method
/// `T_v = T (1 + (1/ε − 1) q)`: the temperature dry air would need to have the density of the
/// moist air at the same pressure. Exact for an ideal-gas mixture.
///
/// # References
/// Wallace, J. M. and Hobbs, P. V. (2006), *Atmospheric Science*, 2nd ed., §3.1.1.
pub fn virtual_temperature_from_specific_humidity(t_k: f64, q: f64, eps: f64) -> f64 {
    t_k * (1.0 + (1.0 / eps - 1.0) * q)
}

/// Virtual temperature from mixing ratio.
///
/// # Units
/// - `t_k`: temperature, K
/// - `r`: mixing ratio, kg kg⁻¹
/// - `eps`: ε = M_w / M_d, dimensionless
/// - returns: K
///
/// # Method
/// `T_v = T (1 + r/ε) / (1 + r)`, identical to the specific-humidity form with
/// `q = r / (1 + r)`.
///
/// # References
/// Wallace, J. M. and Hobbs, P. V. (2006), *Atmospheric Science*, 2nd ed., §3.1.1.
pub fn virtual_temperature_from_mixing_ratio(t_k: f64, r: f64, eps: f64) -> f64 {
    t_k * (1.0 + r / eps) / (1.0 + r)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::physics::constants::MOLAR_MASS_RATIO as EPS;
    use proptest::prelude::*;

    fn rel(a: f64, b: f64) -> f64 {
        ((a - b) / b).abs()
    }

    // Check values: IAPWS-95 saturation pressure over water (from memory, IAPWS-95 /
    // Wagner & Pruß 2002, as listed in GUIDE §2).
    const IAPWS_WATER: [(f64, f64); 4] = [
        (273.16, 611.657), // triple point
        (283.15, 1228.2),  // 10 °C
        (293.15, 2339.2),  // 20 °C
        (303.15, 4247.0),  // 30 °C
    ];

    #[test]
    fn wmo_magnus_water_matches_iapws95_to_a_few_tenths_of_a_percent() {
        // WMO-No. 8 gives the Magnus form without an error bound; it is good to a few tenths of
        // a percent against IAPWS-95 over −45…60 °C (largest here: 0.32 % at 30 °C). 0.4 %.
        for (t, e) in IAPWS_WATER {
            let got = saturation_vapour_pressure_water(t);
            assert!(rel(got, e) < 4e-3, "t={t}: {got} vs {e}");
        }
    }

    #[test]
    fn bolton_matches_iapws95_within_its_stated_accuracy() {
        // Bolton (1980) states 0.1 % from −30 to 35 °C.
        for (t, e) in IAPWS_WATER {
            let got = saturation_vapour_pressure_bolton(t);
            assert!(rel(got, e) < 1e-3, "t={t}: {got} vs {e}");
        }
    }

    #[test]
    fn wmo_magnus_ice_matches_sublimation_pressures() {
        // Saturation pressure over ice (from memory: IAPWS 2011 sublimation-pressure equation,
        // Wagner, Riethmann, Feistel and Harvey 2011, which the Goff-Gratch values in the
        // Smithsonian Meteorological Tables agree with to the digits given).
        let table = [
            (273.16, 611.657), // triple point
            (263.15, 259.9),   // −10 °C
            (253.15, 103.24),  // −20 °C
            (243.15, 38.00),   // −30 °C
            (233.15, 12.84),   // −40 °C
        ];
        for (t, e) in table {
            let got = saturation_vapour_pressure_ice(t);
            // Same claim as over water: a few tenths of a percent over −65…0 °C. 0.4 %.
            assert!(rel(got, e) < 4e-3, "t={t}: {got} vs {e}");
        }
    }

    #[test]
    fn ice_below_water_below_freezing_and_phase_switch() {
        // Supercooled water has the higher saturation pressure (Wallace & Hobbs 2006, §3.7).
        for t in [230.0, 250.0, 270.0] {
            assert!(saturation_vapour_pressure_ice(t) < saturation_vapour_pressure_water(t));
            let f = SaturationFormula::WmoMagnus;
            assert_eq!(
                saturation_vapour_pressure(t, f, RelativeHumidityPhase::IceBelowFreezing),
                saturation_vapour_pressure_ice(t)
            );
            assert_eq!(
                saturation_vapour_pressure(t, f, RelativeHumidityPhase::Water),
                saturation_vapour_pressure_water(t)
            );
        }
        // Above freezing the ice convention uses water.
        let w = saturation_vapour_pressure(
            280.0,
            SaturationFormula::Bolton,
            RelativeHumidityPhase::IceBelowFreezing,
        );
        assert_eq!(w, saturation_vapour_pressure_bolton(280.0));
    }

    #[test]
    fn nan_and_edge_inputs_give_nan_not_panics() {
        assert!(saturation_vapour_pressure_water(f64::NAN).is_nan());
        assert!(saturation_vapour_pressure_ice(f64::NAN).is_nan());
        assert!(saturation_vapour_pressure_water(0.0).is_nan()); // below the fit's pole
        assert!(dewpoint_from_vapour_pressure(0.0, SaturationFormula::WmoMagnus).is_nan());
        assert!(dewpoint_from_vapour_pressure(-1.0, SaturationFormula::Bolton).is_nan());
        assert!(dewpoint_from_vapour_pressure(f64::NAN, SaturationFormula::Bolton).is_nan());
        assert!(mixing_ratio_from_vapour_pressure(100.0, 100.0, EPS).is_nan());
        assert!(mixing_ratio_from_vapour_pressure(200.0, 100.0, EPS).is_nan());
        assert!(specific_humidity_from_vapour_pressure(100.0, 100.0, EPS).is_nan());
        assert!(specific_humidity_from_vapour_pressure(f64::NAN, 1e5, EPS).is_nan());
        assert!(mixing_ratio_from_specific_humidity(1.0).is_nan());
        assert!(virtual_temperature_from_specific_humidity(f64::NAN, 0.01, EPS).is_nan());
        assert!(virtual_temperature_from_mixing_ratio(280.0, f64::NAN, EPS).is_nan());
        // Warm air at 1 hPa: e_s(30 °C) ≈ 42 hPa exceeds p, so there is no mixing ratio.
        let e = vapour_pressure_from_relative_humidity(
            1.0,
            303.15,
            SaturationFormula::WmoMagnus,
            RelativeHumidityPhase::Water,
        );
        assert!(specific_humidity_from_vapour_pressure(e, 100.0, EPS).is_nan());
    }

    #[test]
    fn dry_air_is_its_own_virtual_temperature() {
        for t in [200.0, 273.15, 310.0] {
            assert_eq!(virtual_temperature_from_specific_humidity(t, 0.0, EPS), t);
            assert_eq!(virtual_temperature_from_mixing_ratio(t, 0.0, EPS), t);
        }
        assert_eq!(specific_humidity_from_vapour_pressure(0.0, 1e5, EPS), 0.0);
        assert_eq!(mixing_ratio_from_vapour_pressure(0.0, 1e5, EPS), 0.0);
    }

    #[test]
    fn virtual_temperature_worked_value() {
        // The textbook form T_v ≈ T (1 + 0.61 q) (Wallace & Hobbs 2006, §3.1.1, from memory):
        // 300 K with q = 0.02 kg/kg is about 303.65 K; exactly, with 1/ε − 1 = 0.6078 from
        // GUIDE §2's molar masses, 303.647 K (hand-computed).
        let tv = virtual_temperature_from_specific_humidity(300.0, 0.02, EPS);
        assert!((tv - 300.0 * (1.0 + (28.9645 / 18.01528 - 1.0) * 0.02)).abs() < 1e-12);
        assert!((tv - 303.65).abs() < 0.01, "{tv}");
    }

    proptest! {
        #[test]
        fn q_and_r_round_trip(q in 0.0f64..0.05) {
            let r = mixing_ratio_from_specific_humidity(q);
            prop_assert!((specific_humidity_from_mixing_ratio(r) - q).abs() <= 1e-15);
            prop_assert!(r >= q);
        }

        #[test]
        fn e_and_q_round_trip(p in 100.0f64..110_000.0, frac in 0.0f64..0.9) {
            let e = frac * p;
            let q = specific_humidity_from_vapour_pressure(e, p, EPS);
            let back = vapour_pressure_from_specific_humidity(q, p, EPS);
            prop_assert!((back - e).abs() <= 1e-12 * p);
        }

        #[test]
        fn e_and_r_round_trip(p in 100.0f64..110_000.0, frac in 0.0f64..0.9) {
            let e = frac * p;
            let r = mixing_ratio_from_vapour_pressure(e, p, EPS);
            let back = vapour_pressure_from_mixing_ratio(r, p, EPS);
            prop_assert!((back - e).abs() <= 1e-12 * p);
            // The two routes to q agree.
            let q1 = specific_humidity_from_mixing_ratio(r);
            let q2 = specific_humidity_from_vapour_pressure(e, p, EPS);
            prop_assert!((q1 - q2).abs() <= 1e-14 * (1.0 + q2));
        }

        #[test]
        fn dewpoint_and_e_round_trip(td in 228.15f64..333.15, bolton in any::<bool>()) {
            // Whole stated range of the WMO water form, −45…60 °C.
            let f = if bolton { SaturationFormula::Bolton } else { SaturationFormula::WmoMagnus };
            let e = vapour_pressure_from_dewpoint(td, f);
            prop_assert!((dewpoint_from_vapour_pressure(e, f) - td).abs() < 1e-9);
        }

        #[test]
        fn rh_and_e_round_trip(t in 208.15f64..333.15, rh in 0.0f64..1.2, ice in any::<bool>()) {
            let phase = if ice { RelativeHumidityPhase::IceBelowFreezing } else { RelativeHumidityPhase::Water };
            let f = SaturationFormula::WmoMagnus;
            let e = vapour_pressure_from_relative_humidity(rh, t, f, phase);
            let back = relative_humidity_from_vapour_pressure(e, t, f, phase);
            prop_assert!((back - rh).abs() < 1e-13);
        }

        #[test]
        fn q_and_r_virtual_temperatures_agree(t in 180.0f64..330.0, q in 0.0f64..0.04) {
            let r = mixing_ratio_from_specific_humidity(q);
            let a = virtual_temperature_from_specific_humidity(t, q, EPS);
            let b = virtual_temperature_from_mixing_ratio(t, r, EPS);
            prop_assert!((a - b).abs() < 1e-10);
            prop_assert!(a >= t);
        }

        #[test]
        fn saturation_pressure_increases_with_temperature(t in 200.0f64..330.0) {
            prop_assert!(saturation_vapour_pressure_water(t + 0.5) > saturation_vapour_pressure_water(t));
            prop_assert!(saturation_vapour_pressure_ice(t + 0.5) > saturation_vapour_pressure_ice(t));
            prop_assert!(saturation_vapour_pressure_bolton(t + 0.5) > saturation_vapour_pressure_bolton(t));
        }
    }
}
