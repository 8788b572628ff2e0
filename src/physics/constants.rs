//! Physical constants, each with its source, grouped so that a dataset can name its own.

/// Standard gravity, m s⁻²: the value that defines the geopotential metre (WMO; CGPM 1901).
pub const STANDARD_GRAVITY: f64 = 9.80665;

/// Gas constant of dry air used by most operational models, J kg⁻¹ K⁻¹.
///
/// 287.04 sits inside the 287.04–287.06 range that producers use; the 1976 standard atmosphere
/// uses 287.0531 (see [`Constants::us_standard_atmosphere_1976`]).
pub const DRY_AIR_GAS_CONSTANT: f64 = 287.04;

/// Ratio of the molar masses of water and dry air, ε = 18.01528 / 28.9645 (dimensionless).
pub const MOLAR_MASS_RATIO: f64 = 18.01528 / 28.9645;

/// Standard tropospheric lapse rate, K m⁻¹ (U.S. Standard Atmosphere 1976, 0–11 km′), used
/// to extrapolate temperature below ground (common practice, as in sea-level pressure reduction).
pub const STANDARD_LAPSE_RATE: f64 = 0.0065;

/// The constants one computation uses. A dataset may override any of them, because producers
/// differ and verification wants the producer's own values.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Constants {
    /// Gas constant of dry air R_d, J kg⁻¹ K⁻¹.
    pub dry_air_gas_constant: f64,
    /// Standard gravity g0, m s⁻²: heights come out in geopotential metres of this g0.
    pub standard_gravity: f64,
    /// ε = M_w / M_d, dimensionless.
    pub molar_mass_ratio: f64,
}

impl Constants {
    /// The constants of the U.S. Standard Atmosphere 1976: R* = 8.31432 J mol⁻¹ K⁻¹ and
    /// M0 = 0.0289644 kg mol⁻¹ give R_d = 287.0531 J kg⁻¹ K⁻¹ (NOAA/NASA/USAF 1976, Table 2).
    pub fn us_standard_atmosphere_1976() -> Self {
        Self {
            dry_air_gas_constant: 8.31432 / 0.0289644,
            standard_gravity: STANDARD_GRAVITY,
            molar_mass_ratio: MOLAR_MASS_RATIO,
        }
    }

    /// R_d / g0, m K⁻¹: the factor in every hypsometric step.
    pub fn rd_over_g0(&self) -> f64 {
        self.dry_air_gas_constant / self.standard_gravity
    }
}

impl Default for Constants {
    fn default() -> Self {
        Self {
            dry_air_gas_constant: DRY_AIR_GAS_CONSTANT,
            standard_gravity: STANDARD_GRAVITY,
            molar_mass_ratio: MOLAR_MASS_RATIO,
        }
    }
}
