//! The U.S. Standard Atmosphere 1976 below 84.852 geopotential kilometres: seven polytropic
//! layers defined by their base heights and lapse rates (identical to ISO 2533:1975 and the
//! ICAO standard atmosphere below 32 km′).
//!
//! Heights are geopotential metres (the standard's m′), temperatures are the molecular-scale
//! temperature, equal to the kinetic temperature below 80 km′.

use std::sync::OnceLock;

use super::constants::{Constants, STANDARD_GRAVITY};

/// Lowest geopotential height of the standard's tables, m′ (−5 km′; USSA76 Table I).
const LOWEST_GPM: f64 = -5000.0;
/// Top of the seven polytropic layers, m′ (USSA76 Table 4).
const TOP_GPM: f64 = 84_852.0;
/// Sea-level pressure, Pa (USSA76 Table 2).
const SEA_LEVEL_PRESSURE: f64 = 101_325.0;
/// Sea-level temperature, K (USSA76 Table 2).
const SEA_LEVEL_TEMPERATURE: f64 = 288.15;

/// Base heights (m′) and lapse rates dT/dH (K per m′) of the seven layers (USSA76 Table 4).
const LAYERS: [(f64, f64); 7] = [
    (0.0, -0.0065),
    (11_000.0, 0.0),
    (20_000.0, 0.001),
    (32_000.0, 0.0028),
    (47_000.0, 0.0),
    (51_000.0, -0.0028),
    (71_000.0, -0.002),
];

/// Base temperature and pressure of each layer, derived from the definitions.
#[derive(Clone, Copy, Debug)]
struct LayerBase {
    height: f64,
    lapse: f64,
    temperature: f64,
    pressure: f64,
}

/// `g0 M0 / R*` (K per m′): the hydrostatic constant of the standard, 34.1632 K/km′.
fn hydrostatic_constant() -> f64 {
    STANDARD_GRAVITY / Constants::us_standard_atmosphere_1976().dry_air_gas_constant
}

/// Pressure at `dh` above a base of temperature `tb` and pressure `pb` with lapse `lapse`
/// (USSA76 eqs. 33a and 33b).
fn layer_pressure(pb: f64, tb: f64, lapse: f64, dh: f64) -> f64 {
    let g = hydrostatic_constant();
    if lapse == 0.0 {
        pb * (-g * dh / tb).exp()
    } else {
        pb * ((tb + lapse * dh) / tb).powf(-g / lapse)
    }
}

fn bases() -> &'static [LayerBase; 7] {
    static BASES: OnceLock<[LayerBase; 7]> = OnceLock::new();
    BASES.get_or_init(|| {
        let mut out = [LayerBase {
            height: 0.0,
            lapse: 0.0,
            temperature: SEA_LEVEL_TEMPERATURE,
            pressure: SEA_LEVEL_PRESSURE,
        }; 7];
        let mut t = SEA_LEVEL_TEMPERATURE;
        let mut p = SEA_LEVEL_PRESSURE;
        for (i, &(h, lapse)) in LAYERS.iter().enumerate() {
            if i > 0 {
                let prev = out[i - 1];
                let dh = h - prev.height;
                p = layer_pressure(prev.pressure, prev.temperature, prev.lapse, dh);
                t = prev.temperature + prev.lapse * dh;
            }
            out[i] = LayerBase {
                height: h,
                lapse,
                temperature: t,
                pressure: p,
            };
        }
        out
    })
}

/// The layer that holds height `z` (the first layer also serves −5 km′…0).
fn layer_at_height(z: f64) -> &'static LayerBase {
    let b = bases();
    let i = b.partition_point(|l| l.height <= z).saturating_sub(1);
    &b[i]
}

/// Temperature of the U.S. Standard Atmosphere 1976 at a geopotential height.
///
/// # Units
/// - `z_gpm`: geopotential height, m′ (−5000…84852; `NaN` outside)
/// - returns: K
///
/// # Method
/// `T = T_b + L_b (H − H_b)` in the layer holding `H` (base values of USSA76 Table 4).
///
/// # References
/// NOAA, NASA and USAF (1976), *U.S. Standard Atmosphere, 1976*, NOAA-S/T 76-1562, eq. 23
/// and Table 4.
pub fn us_standard_atmosphere_temperature(z_gpm: f64) -> f64 {
    if !(LOWEST_GPM..=TOP_GPM).contains(&z_gpm) {
        return f64::NAN;
    }
    let l = layer_at_height(z_gpm);
    l.temperature + l.lapse * (z_gpm - l.height)
}

/// Pressure of the U.S. Standard Atmosphere 1976 at a geopotential height.
///
/// # Units
/// - `z_gpm`: geopotential height, m′ (−5000…84852; `NaN` outside)
/// - returns: Pa
///
/// # Method
/// Hydrostatic integration of each polytropic layer from its base, with
/// `g0 M0 / R* = 34.1632 K/km′`: `P = P_b (T_b/(T_b + L_b ΔH))^{g0 M0/(R* L_b)}`, or
/// `P = P_b exp(−g0 M0 ΔH/(R* T_b))` where `L_b = 0`. The base pressures are derived from
/// 101325 Pa by the same equations (they reproduce Table 4's `P_b`).
///
/// # References
/// NOAA, NASA and USAF (1976), *U.S. Standard Atmosphere, 1976*, eqs. 33a and 33b, Table 4.
pub fn us_standard_atmosphere_pressure(z_gpm: f64) -> f64 {
    if !(LOWEST_GPM..=TOP_GPM).contains(&z_gpm) {
        return f64::NAN;
    }
    let l = layer_at_height(z_gpm);
    layer_pressure(l.pressure, l.temperature, l.lapse, z_gpm - l.height)
}

/// Geopotential height of a pressure in the U.S. Standard Atmosphere 1976.
///
/// # Units
/// - `p_pa`: Pa (from the pressure at 84.852 km′, about 0.373 Pa, to that at −5 km′;
///   `NaN` outside)
/// - returns: m′
///
/// # Method
/// The inverse of eqs. 33a/33b in the layer holding `p`:
/// `ΔH = (T_b/L_b) ((P/P_b)^{−R* L_b/(g0 M0)} − 1)`, or `ΔH = (R* T_b/(g0 M0)) ln(P_b/P)`.
///
/// # References
/// NOAA, NASA and USAF (1976), *U.S. Standard Atmosphere, 1976*, eqs. 33a and 33b, Table 4.
pub fn us_standard_atmosphere_height_at_pressure(p_pa: f64) -> f64 {
    let p_low = us_standard_atmosphere_pressure(LOWEST_GPM);
    let p_top = us_standard_atmosphere_pressure(TOP_GPM);
    if !(p_pa >= p_top && p_pa <= p_low) {
        return f64::NAN;
    }
    let b = bases();
    // Pressures fall with height: the layer is the last whose base pressure is >= p.
    let i = b.partition_point(|l| l.pressure >= p_pa).saturating_sub(1);
    let l = &b[i];
    let g = hydrostatic_constant();
    let dh = if l.lapse == 0.0 {
        l.temperature / g * (l.pressure / p_pa).ln()
    } else {
        l.temperature / l.lapse * ((p_pa / l.pressure).powf(-l.lapse / g) - 1.0)
    };
    l.height + dh
}

#[cfg(test)]
mod tests {
    use super::*;
    use proptest::prelude::*;

    /// Mandatory levels and their geopotential heights (m′), U.S. Standard Atmosphere 1976 as
    /// derived in GUIDE §2.
    const MANDATORY: [(f64, f64); 16] = [
        (100_000.0, 110.9),
        (92_500.0, 762.0),
        (85_000.0, 1457.3),
        (70_000.0, 3012.2),
        (50_000.0, 5574.4),
        (40_000.0, 7185.4),
        (30_000.0, 9164.0),
        (25_000.0, 10_362.9),
        (20_000.0, 11_784.0),
        (15_000.0, 13_608.4),
        (10_000.0, 16_179.7),
        (7_000.0, 18_441.6),
        (5_000.0, 20_576.2),
        (3_000.0, 23_848.6),
        (2_000.0, 26_481.2),
        (1_000.0, 31_054.6),
    ];

    #[test]
    fn mandatory_level_heights_match_the_table() {
        for (p, z) in MANDATORY {
            let got = us_standard_atmosphere_height_at_pressure(p);
            assert!((got - z).abs() <= 0.1, "{p} Pa: {got} vs {z}");
            let back = us_standard_atmosphere_pressure(z);
            // 0.1 m of height is about 1.2 Pa at 1000 hPa and 0.05 Pa at 10 hPa.
            assert!((back - p).abs() < 1.3e-5 * p, "{z} m: {back} vs {p}");
        }
    }

    #[test]
    fn layer_bases_match_table_4() {
        // Base pressures of USSA76 Table 4 (from memory): 22632.06, 5474.889, 868.0187,
        // 110.9063, 66.93887, 3.956420 Pa; top (84.852 km′) 0.3733836 Pa.
        let expected = [
            22_632.06, 5_474.889, 868.0187, 110.9063, 66.938_87, 3.956_420,
        ];
        for (l, p) in bases()[1..].iter().zip(expected) {
            assert!(
                ((l.pressure - p) / p).abs() < 1e-5,
                "{} m: {} vs {p}",
                l.height,
                l.pressure
            );
        }
        let top = us_standard_atmosphere_pressure(84_852.0);
        assert!(((top - 0.373_383_6) / 0.373_383_6).abs() < 1e-5, "{top}");
        // Base temperatures, USSA76 Table 4: 216.65, 228.65, 270.65, 214.65; 186.946 at the top.
        assert!((us_standard_atmosphere_temperature(11_000.0) - 216.65).abs() < 1e-9);
        assert!((us_standard_atmosphere_temperature(32_000.0) - 228.65).abs() < 1e-9);
        assert!((us_standard_atmosphere_temperature(47_000.0) - 270.65).abs() < 1e-9);
        assert!((us_standard_atmosphere_temperature(71_000.0) - 214.65).abs() < 1e-9);
        assert!((us_standard_atmosphere_temperature(84_852.0) - 186.946).abs() < 1e-9);
        assert_eq!(us_standard_atmosphere_pressure(0.0), 101_325.0);
        assert_eq!(us_standard_atmosphere_temperature(0.0), 288.15);
    }

    #[test]
    fn out_of_range_is_nan() {
        assert!(us_standard_atmosphere_temperature(90_000.0).is_nan());
        assert!(us_standard_atmosphere_pressure(-6000.0).is_nan());
        assert!(us_standard_atmosphere_height_at_pressure(0.1).is_nan());
        assert!(us_standard_atmosphere_height_at_pressure(200_000.0).is_nan());
        assert!(us_standard_atmosphere_height_at_pressure(f64::NAN).is_nan());
    }

    proptest! {
        #[test]
        fn height_and_pressure_round_trip(z in -5000.0f64..84_852.0) {
            let p = us_standard_atmosphere_pressure(z);
            let back = us_standard_atmosphere_height_at_pressure(p);
            prop_assert!((back - z).abs() < 1e-6, "{} -> {} -> {}", z, p, back);
        }
    }
}
