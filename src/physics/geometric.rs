//! Normal gravity and the conversion between geopotential and geometric height.
//!
//! Heights in geopotential metres are the trade's currency; geometric height is for
//! terrain-relative uses. The conversion takes gravity at sea level from Somigliana's formula
//! with the WGS-84 constants and lets it fall off with height as the inverse square of the
//! distance from an effective Earth radius.

use super::constants::STANDARD_GRAVITY;

/// WGS-84 semi-major axis, m (NIMA TR8350.2, 3rd ed., 2000, Table 3.1).
const WGS84_A: f64 = 6_378_137.0;
/// WGS-84 flattening (NIMA TR8350.2, Table 3.1).
const WGS84_F: f64 = 1.0 / 298.257_223_563;
/// WGS-84 normal gravity at the equator, m s⁻² (NIMA TR8350.2, Table 3.4).
const WGS84_GAMMA_E: f64 = 9.780_325_335_9;
/// WGS-84 Somigliana constant k = (b γ_p − a γ_e)/(a γ_e) (NIMA TR8350.2, Table 3.4).
const WGS84_K: f64 = 0.001_931_852_652_41;
/// WGS-84 first eccentricity squared (NIMA TR8350.2, Table 3.3).
const WGS84_E2: f64 = 0.006_694_379_990_13;
/// WGS-84 m = ω² a² b / GM (NIMA TR8350.2, Table 3.4).
const WGS84_M: f64 = 0.003_449_786_506_84;

/// Normal gravity on the WGS-84 ellipsoid, by Somigliana's closed formula.
///
/// # Units
/// - `latitude_deg`: geodetic latitude, degrees (−90…90; `NaN` outside)
/// - returns: m s⁻²
///
/// # Method
/// `γ(φ) = γ_e (1 + k sin²φ) / √(1 − e² sin²φ)`.
///
/// # References
/// NIMA (2000), *Department of Defense World Geodetic System 1984*, Technical Report
/// TR8350.2, 3rd ed., eq. 4-1.
pub fn normal_gravity_somigliana(latitude_deg: f64) -> f64 {
    if latitude_deg.is_nan() || latitude_deg.abs() > 90.0 {
        return f64::NAN;
    }
    let s2 = latitude_deg.to_radians().sin().powi(2);
    WGS84_GAMMA_E * (1.0 + WGS84_K * s2) / (1.0 - WGS84_E2 * s2).sqrt()
}

/// Effective Earth radius for the inverse-square fall-off of normal gravity, m.
///
/// `R(φ) = a / (1 + f + m − 2 f sin²φ)`: the radius that gives the ellipsoid's free-air
/// gradient of normal gravity at that latitude (List 1968, from memory).
fn effective_radius(latitude_deg: f64) -> f64 {
    let s2 = latitude_deg.to_radians().sin().powi(2);
    WGS84_A / (1.0 + WGS84_F + WGS84_M - 2.0 * WGS84_F * s2)
}

/// Geometric height above the ellipsoid from geopotential height.
///
/// # Units
/// - `z_gpm`: geopotential height, geopotential metres (of g0 = 9.80665 m s⁻²)
/// - `latitude_deg`: degrees (−90…90; `NaN` outside)
/// - returns: m; `NaN` beyond the model's reach (`z` of the order of the Earth's radius)
///
/// # Method
/// With gravity `γ(φ) (R/(R + h))²`, the geopotential is `Φ = γ(φ) R h / (R + h)`, so with
/// `Z' = g0 Z / γ(φ)`, `h = R Z' / (R − Z')`. `R` is the effective radius
/// `a / (1 + f + m − 2 f sin²φ)` and `γ` is [`normal_gravity_somigliana`].
///
/// # References
/// List, R. J. (1968), *Smithsonian Meteorological Tables*, 6th rev. ed., Smithsonian
/// Institution, the geopotential tables (from memory); WGS-84 constants from NIMA TR8350.2.
pub fn geometric_height_from_geopotential_height(z_gpm: f64, latitude_deg: f64) -> f64 {
    let gamma = normal_gravity_somigliana(latitude_deg);
    let r = effective_radius(latitude_deg);
    let z = STANDARD_GRAVITY * z_gpm / gamma;
    if z.is_nan() || z >= r {
        return f64::NAN;
    }
    r * z / (r - z)
}

/// Geopotential height from geometric height above the ellipsoid.
///
/// # Units
/// - `h_m`: geometric height, m
/// - `latitude_deg`: degrees (−90…90; `NaN` outside)
/// - returns: geopotential metres; `NaN` for `h ≤ −R`
///
/// # Method
/// `Z = (γ(φ)/g0) R h / (R + h)`, the inverse of
/// [`geometric_height_from_geopotential_height`].
///
/// # References
/// List, R. J. (1968), *Smithsonian Meteorological Tables*, 6th rev. ed. (from memory);
/// WGS-84 constants from NIMA TR8350.2.
pub fn geopotential_height_from_geometric_height(h_m: f64, latitude_deg: f64) -> f64 {
    let gamma = normal_gravity_somigliana(latitude_deg);
    let r = effective_radius(latitude_deg);
    if h_m.is_nan() || r + h_m <= 0.0 {
        return f64::NAN;
    }
    gamma / STANDARD_GRAVITY * r * h_m / (r + h_m)
}

#[cfg(test)]
mod tests {
    use super::*;
    use proptest::prelude::*;

    #[test]
    fn somigliana_at_equator_and_poles() {
        // WGS-84 normal gravity: equator 9.7803253359, poles 9.8321849378 m s⁻² (NIMA
        // TR8350.2, Table 3.4; from memory).
        assert!((normal_gravity_somigliana(0.0) - 9.780_325_335_9).abs() < 1e-10);
        assert!((normal_gravity_somigliana(90.0) - 9.832_184_937_8).abs() < 1e-9);
        assert!((normal_gravity_somigliana(-90.0) - 9.832_184_937_8).abs() < 1e-9);
        // Standard gravity 9.80665 is reached near 45.5° (common practice: "g0 is gravity at
        // about 45° latitude").
        let g45 = normal_gravity_somigliana(45.0);
        assert!(g45 < STANDARD_GRAVITY && normal_gravity_somigliana(46.0) > STANDARD_GRAVITY);
        assert!(normal_gravity_somigliana(91.0).is_nan());
        assert!(normal_gravity_somigliana(f64::NAN).is_nan());
    }

    #[test]
    fn geometric_exceeds_geopotential_aloft_at_mid_latitudes() {
        // At 45° and 10 km, geometric height exceeds geopotential height by roughly 15–20 m
        // (from memory; the USSA76 table of geopotential against geometric altitude, which uses
        // r0 = 6356.766 km and g0, gives 10 000 m geometric = 9984.3 gpm').
        let h = geometric_height_from_geopotential_height(10_000.0, 45.0);
        assert!(h > 10_010.0 && h < 10_025.0, "{h}");
        assert_eq!(geometric_height_from_geopotential_height(0.0, 30.0), 0.0);
        assert!(geometric_height_from_geopotential_height(1e3, f64::NAN).is_nan());
        assert!(geopotential_height_from_geometric_height(-7.0e6, 0.0).is_nan());
    }

    proptest! {
        #[test]
        fn round_trip(z in -500.0f64..80_000.0, lat in -90.0f64..=90.0) {
            let h = geometric_height_from_geopotential_height(z, lat);
            let back = geopotential_height_from_geometric_height(h, lat);
            prop_assert!((back - z).abs() < 1e-7, "{} -> {} -> {}", z, h, back);
        }

        #[test]
        fn gravity_increases_poleward(lat in 0.0f64..89.0) {
            prop_assert!(normal_gravity_somigliana(lat + 1.0) > normal_gravity_somigliana(lat));
            prop_assert_eq!(normal_gravity_somigliana(lat), normal_gravity_somigliana(-lat));
        }
    }
}
