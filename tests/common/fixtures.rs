//! Synthetic CF NetCDF files for ingest and end-to-end tests.
//!
//! One [`FixtureSpec`] describes how a file encodes a fixed, smooth atmosphere: the same
//! underlying column values in every variant (format, level units and order, temperature
//! and humidity units and kind, packing, fill values, latitude direction, longitude
//! convention, time and member axes, surface fields, file heights, hybrid levels), so that a
//! test can read every variant and compare the canonical [`hypsogrid::model::Cycle`] fields
//! with the truth functions of this module (to packing precision).
//!
//! The values are invented for testing (they are smooth functions chosen to lie inside the
//! plausibility ranges, not observations). Humidity kinds are derived from one vapour
//! pressure field with the WMO-No. 8 (2018), Annex 4.B saturation formula over water, so a
//! file in dewpoint and a file in specific humidity describe the same air:
//! `e_w = 611.2 exp(17.62 t / (243.12 + t))` Pa, t in °C;
//! `q = ε e / (p − (1 − ε) e)`, `r = ε e / (p − e)` (GUIDE §2), ε = 18.01528 / 28.9645.
//!
//! ```ignore
//! let spec = FixtureSpec { levels_top_down: true, packed: true, ..FixtureSpec::default() };
//! let path = spec.write(&dir.path().join("cycle.nc"));
//! ```
#![allow(dead_code)]

use std::path::{Path, PathBuf};

use netcdf::{AttributeValue, Options};

use hypsogrid::compute::ComputeConfig;
use hypsogrid::model::Layer;

/// Standard gravity g0, m s⁻² (WMO definition of the geopotential metre).
pub const G0: f64 = 9.80665;
/// ε = M_w / M_d (GUIDE §2).
pub const EPSILON: f64 = 18.01528 / 28.9645;

/// File format.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Format {
    /// NetCDF-3 classic (CDF-1).
    Classic,
    /// NetCDF-3 64-bit offset (CDF-2).
    Offset64,
    /// NetCDF-4 (HDF5).
    Netcdf4,
    /// NetCDF-4 restricted to the classic model.
    Netcdf4Classic,
}

/// Units of the pressure levels (and of the surface pressure).
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum PressureUnits {
    /// Pascals.
    Pa,
    /// Hectopascals, written `hPa`.
    HPa,
    /// Millibars, written `mbar`.
    Mbar,
}

/// Units of temperature and dewpoint.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum TemperatureUnits {
    /// `K`.
    Kelvin,
    /// `degC`.
    Celsius,
}

/// Which humidity variable the file carries, in which units.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum HumidityEncoding {
    /// No humidity.
    None,
    /// Specific humidity, `kg kg-1`.
    SpecificKgPerKg,
    /// Specific humidity, `g kg-1`.
    SpecificGPerKg,
    /// Mixing ratio, `kg/kg`.
    MixingRatio,
    /// Relative humidity, `%`.
    RelativePercent,
    /// Relative humidity, `1`.
    RelativeFraction,
    /// Dewpoint, in the temperature units.
    DewPoint,
}

/// Which humidity quantity the cycle should hold for this spec.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum HumidityTruth {
    /// kg/kg.
    Specific,
    /// kg/kg.
    Mixing,
    /// fraction.
    Relative,
    /// K.
    DewPoint,
}

/// Surface height encoding.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum SurfaceHeight {
    /// `surface_geopotential`, m2 s-2 (variable `phis`).
    Geopotential,
    /// `surface_altitude`, m (variable `orog`).
    Altitude,
}

/// Surface fields.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct SurfaceSpec {
    /// Give the surface fields the time axis (else they are 2-D in time).
    pub time_axis: bool,
    /// Give the surface fields the member axis.
    pub member_axis: bool,
    /// How the surface height is written.
    pub height: SurfaceHeight,
    /// Write the surface height (a hybrid file without it is an error case).
    pub with_height: bool,
}

impl Default for SurfaceSpec {
    fn default() -> Self {
        SurfaceSpec {
            time_axis: true,
            member_axis: false,
            height: SurfaceHeight::Altitude,
            with_height: true,
        }
    }
}

/// Geopotential height on the levels, as the file itself carries it.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum FileHeights {
    /// None.
    None,
    /// `geopotential_height`, `gpm` (variable `gh`).
    GeopotentialHeight,
    /// `geopotential`, `m2 s-2` (variable `z`).
    Geopotential,
}

/// How the masked points are marked.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum MaskEncoding {
    /// `_FillValue`.
    FillValue,
    /// `missing_value` (no `_FillValue`).
    MissingValue,
    /// A value outside `valid_min`/`valid_max`.
    ValidRange,
}

/// CF form of the hybrid formula terms.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum HybridForm {
    /// `ap: ap b: b ps: ps`.
    Ap,
    /// `a: a b: b p0: p0 ps: ps`.
    AP0,
}

/// Where the hybrid half-level coefficients come from.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum HalfLevels {
    /// A `bounds` variable `lev_bnds` with its own formula terms (`ap_bnds`/`a_bnds`, `b_bnds`).
    Bounds,
    /// Explicit half-level variables (`ap_half`/`b_half`, or `hyai`/`hybi` with p0).
    Explicit,
    /// None (an error case).
    Absent,
}

/// The vertical coordinate.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum VerticalSpec {
    /// Isobaric levels.
    Isobaric,
    /// Hybrid sigma-pressure levels.
    Hybrid {
        /// Formula-terms form.
        form: HybridForm,
        /// Half-level source.
        half_levels: HalfLevels,
    },
}

/// Deliberate faults for error tests.
#[derive(Clone, Debug, Default, PartialEq, Eq)]
pub struct Faults {
    /// Write this units string on the temperature (values unchanged).
    pub temperature_units: Option<String>,
    /// Write this units string on the humidity (values unchanged).
    pub humidity_units: Option<String>,
    /// Swap the third and fourth levels of the level coordinate (data follows the
    /// coordinate), making it non-monotonic.
    pub non_monotonic_levels: bool,
    /// Leave the temperature out.
    pub omit_temperature: bool,
}

/// How to encode the synthetic atmosphere. `Default` is a plain CF NetCDF-4 file on eight
/// isobaric levels in Pa, bottom-up, K, specific humidity in kg/kg on the same axis, one
/// time step, no member axis, surface pressure and altitude, no file heights.
#[derive(Clone, Debug, PartialEq)]
pub struct FixtureSpec {
    /// File format.
    pub format: Format,
    /// Vertical coordinate.
    pub vertical: VerticalSpec,
    /// Units of the pressure levels and of the surface pressure (isobaric files).
    pub level_units: PressureUnits,
    /// List levels top-down (lowest pressure first).
    pub levels_top_down: bool,
    /// Temperature (and dewpoint) units.
    pub temperature_units: TemperatureUnits,
    /// Humidity kind and units.
    pub humidity: HumidityEncoding,
    /// Put humidity on its own axis that lacks this temperature level (bottom-up index).
    pub humidity_missing_level: Option<usize>,
    /// Pack temperature, humidity, heights and surface fields as int16 with
    /// `scale_factor`/`add_offset`.
    pub packed: bool,
    /// How masked points are marked.
    pub mask: MaskEncoding,
    /// Points to mask in every 3-D field, as `[member, time, level (bottom-up), lat row,
    /// lon column]` in the file's latitude and longitude order (the cycle's indexing).
    pub masked_points: Vec<[usize; 5]>,
    /// Latitudes north to south.
    pub lat_north_to_south: bool,
    /// Longitudes 0..360 (else -180..180); ascending either way.
    pub lon_0_360: bool,
    /// Number of time steps; `None` writes no time axis (one step).
    pub time_steps: Option<usize>,
    /// Write a `forecast_reference_time` variable (else the time units carry the reference).
    pub reference_time_variable: bool,
    /// Number of members; `None` writes no member axis.
    pub members: Option<usize>,
    /// Surface fields.
    pub surface: Option<SurfaceSpec>,
    /// File heights.
    pub file_heights: FileHeights,
    /// Write CF standard names (else the reader must use the name map).
    pub standard_names: bool,
    /// Add 2-D `t2m` and `q2m` (with standard names air_temperature and specific_humidity)
    /// ahead of the 3-D fields.
    pub near_surface_decoys: bool,
    /// Write 3-D fields as (member, time, lon, lat, level) instead of the CF order.
    pub transpose_dims: bool,
    /// NetCDF-4: store float fields in chunks of one level plane holding every member and
    /// time step (else the library's default layout).
    pub chunks_across_steps: bool,
    /// NetCDF-4: store float fields deflated (level 1, shuffled) in chunks of one member and
    /// one time step, tiled as `[level, lat, lon]` lengths (`None`: not compressed).
    pub deflate_tiles: Option<[usize; 3]>,
    /// With `deflate_tiles`: chunk the fields so but store the chunks uncompressed, as
    /// netCDF-4 writers do by default for a variable with an unlimited time axis.
    pub tiles_stored_plain: bool,
    /// Faults for error tests.
    pub faults: Faults,
}

impl Default for FixtureSpec {
    fn default() -> Self {
        FixtureSpec {
            format: Format::Netcdf4,
            vertical: VerticalSpec::Isobaric,
            level_units: PressureUnits::Pa,
            levels_top_down: false,
            temperature_units: TemperatureUnits::Kelvin,
            humidity: HumidityEncoding::SpecificKgPerKg,
            humidity_missing_level: None,
            packed: false,
            mask: MaskEncoding::FillValue,
            masked_points: Vec::new(),
            lat_north_to_south: false,
            lon_0_360: true,
            time_steps: Some(1),
            reference_time_variable: false,
            members: None,
            surface: Some(SurfaceSpec::default()),
            file_heights: FileHeights::None,
            standard_names: true,
            near_surface_decoys: false,
            transpose_dims: false,
            chunks_across_steps: false,
            deflate_tiles: None,
            tiles_stored_plain: false,
            faults: Faults::default(),
        }
    }
}

/// A computation with two layers, one bounded by levels of the fixture (1000-500 hPa), one
/// by pressures between them (962.5-410 hPa); the 1000 hPa bottom lies below the ground over
/// the fixture's higher terrain.
pub fn two_layer_config() -> ComputeConfig {
    ComputeConfig {
        layers: vec![
            Layer {
                bottom_pa: 100_000.0,
                top_pa: 50_000.0,
            },
            Layer {
                bottom_pa: 96_250.0,
                top_pa: 41_000.0,
            },
        ],
        ..ComputeConfig::default()
    }
}

/// Isobaric levels of the fixture, bottom-up, Pa.
pub const LEVELS_PA: [f64; 8] = [
    100_000.0, 92_500.0, 85_000.0, 70_000.0, 50_000.0, 30_000.0, 20_000.0, 10_000.0,
];

/// Hybrid half-level a (Pa) and b, bottom-up: 6 full levels from the surface to 20 hPa.
pub const HYBRID_A_HALF_PA: [f64; 7] = [0.0, 2000.0, 6000.0, 10_000.0, 9000.0, 5000.0, 2000.0];
/// See [`HYBRID_A_HALF_PA`].
pub const HYBRID_B_HALF: [f64; 7] = [1.0, 0.9, 0.7, 0.45, 0.25, 0.1, 0.0];
/// Reference pressure of the `a ... p0` form, Pa.
pub const HYBRID_P0_PA: f64 = 100_000.0;

/// Reference time of every fixture (RFC 3339).
pub const REFERENCE_TIME: &str = "2011-01-10T12:00:00Z";
/// Time step, hours.
pub const STEP_HOURS: i64 = 6;

// ----- the synthetic atmosphere (truth functions, SI units) -----

/// Saturation vapour pressure over water, Pa (WMO-No. 8, Annex 4.B; t in °C).
pub fn saturation_vapour_pressure_water(t_k: f64) -> f64 {
    let t = t_k - 273.15;
    611.2 * (17.62 * t / (243.12 + t)).exp()
}

/// Air temperature, K.
pub fn temperature_k(member: usize, time: usize, p_pa: f64, lat: f64, lon: f64) -> f64 {
    let base = (288.15 * (p_pa / 101_325.0).powf(0.190_263)).max(216.65);
    base - 0.4 * (lat.abs() - 40.0)
        + 3.0 * lon.to_radians().cos()
        + 0.5 * time as f64
        + 0.25 * member as f64
}

/// Relative humidity over water, fraction.
pub fn relative_humidity(member: usize, time: usize, p_pa: f64, lat: f64, lon: f64) -> f64 {
    (0.35 + 0.5 * (p_pa / 100_000.0).powi(2) + 0.05 * lon.to_radians().sin() - 0.001 * (lat - 40.0)
        + 0.01 * time as f64
        - 0.01 * member as f64)
        .clamp(0.05, 0.98)
}

/// Vapour pressure, Pa.
pub fn vapour_pressure_pa(member: usize, time: usize, p_pa: f64, lat: f64, lon: f64) -> f64 {
    relative_humidity(member, time, p_pa, lat, lon)
        * saturation_vapour_pressure_water(temperature_k(member, time, p_pa, lat, lon))
}

/// Specific humidity, kg/kg.
pub fn specific_humidity(member: usize, time: usize, p_pa: f64, lat: f64, lon: f64) -> f64 {
    let e = vapour_pressure_pa(member, time, p_pa, lat, lon);
    EPSILON * e / (p_pa - (1.0 - EPSILON) * e)
}

/// Mixing ratio, kg/kg.
pub fn mixing_ratio(member: usize, time: usize, p_pa: f64, lat: f64, lon: f64) -> f64 {
    let e = vapour_pressure_pa(member, time, p_pa, lat, lon);
    EPSILON * e / (p_pa - e)
}

/// Dewpoint, K (inverse of the WMO formula over water).
pub fn dewpoint_k(member: usize, time: usize, p_pa: f64, lat: f64, lon: f64) -> f64 {
    let l = (vapour_pressure_pa(member, time, p_pa, lat, lon) / 611.2).ln();
    243.12 * l / (17.62 - l) + 273.15
}

/// Surface height, m.
pub fn surface_height_m(lat: f64, lon: f64) -> f64 {
    300.0 + 250.0 * lon.to_radians().sin() + 5.0 * (lat - 20.0)
}

/// Surface pressure, Pa: the U.S. Standard Atmosphere 1976 pressure at the surface height,
/// `101325 (1 − 0.0065 z / 288.15)^5.25588`.
pub fn surface_pressure_pa(lat: f64, lon: f64) -> f64 {
    101_325.0 * (1.0 - 0.0065 * surface_height_m(lat, lon) / 288.15).powf(5.255_88)
}

/// Geopotential height the file carries, m (a smooth stand-in, not a hydrostatic result).
pub fn geopotential_height_m(member: usize, time: usize, p_pa: f64, lat: f64, lon: f64) -> f64 {
    44_330.77 * (1.0 - (p_pa / 101_325.0).powf(0.190_263))
        + 20.0 * lat.to_radians().cos()
        + 0.5 * lon.to_radians().sin()
        + 2.0 * time as f64
        + member as f64
}

impl FixtureSpec {
    /// Latitudes in file order, degrees north.
    pub fn latitudes(&self) -> Vec<f64> {
        let mut v = vec![20.0, 35.0, 50.0, 65.0];
        if self.lat_north_to_south {
            v.reverse();
        }
        v
    }

    /// Longitudes in file order, degrees east.
    pub fn longitudes(&self) -> Vec<f64> {
        if self.lon_0_360 {
            vec![0.0, 60.0, 120.0, 180.0, 240.0, 300.0]
        } else {
            vec![-120.0, -60.0, 0.0, 60.0, 120.0, 180.0]
        }
    }

    /// Number of levels (full levels for hybrid files).
    pub fn levels(&self) -> usize {
        match self.vertical {
            VerticalSpec::Isobaric => LEVELS_PA.len(),
            VerticalSpec::Hybrid { .. } => HYBRID_A_HALF_PA.len() - 1,
        }
    }

    /// Members in the cycle.
    pub fn member_count(&self) -> usize {
        self.members.unwrap_or(1)
    }

    /// Time steps in the cycle.
    pub fn time_count(&self) -> usize {
        self.time_steps.unwrap_or(1)
    }

    /// Lead times the cycle should report, seconds.
    pub fn lead_times_s(&self) -> Vec<i64> {
        (0..self.time_count() as i64)
            .map(|t| t * STEP_HOURS * 3600)
            .collect()
    }

    /// Full-level a (Pa) and b, bottom-up (mean of the bounding half levels).
    pub fn hybrid_full(&self) -> (Vec<f64>, Vec<f64>) {
        let a = HYBRID_A_HALF_PA
            .windows(2)
            .map(|w| 0.5 * (w[0] + w[1]))
            .collect();
        let b = HYBRID_B_HALF
            .windows(2)
            .map(|w| 0.5 * (w[0] + w[1]))
            .collect();
        (a, b)
    }

    /// Pressure of level `k` (bottom-up) at a column, Pa.
    pub fn level_pressure_pa(&self, k: usize, lat: f64, lon: f64) -> f64 {
        match self.vertical {
            VerticalSpec::Isobaric => LEVELS_PA[k],
            VerticalSpec::Hybrid { .. } => {
                let (a, b) = self.hybrid_full();
                a[k] + b[k] * surface_pressure_pa(lat, lon)
            }
        }
    }

    /// The humidity quantity the cycle should hold.
    pub fn humidity_truth(&self) -> Option<HumidityTruth> {
        match self.humidity {
            HumidityEncoding::None => None,
            HumidityEncoding::SpecificKgPerKg | HumidityEncoding::SpecificGPerKg => {
                Some(HumidityTruth::Specific)
            }
            HumidityEncoding::MixingRatio => Some(HumidityTruth::Mixing),
            HumidityEncoding::RelativePercent | HumidityEncoding::RelativeFraction => {
                Some(HumidityTruth::Relative)
            }
            HumidityEncoding::DewPoint => Some(HumidityTruth::DewPoint),
        }
    }

    /// The expected humidity value (SI) of the cycle's kind at a point.
    pub fn humidity_value(&self, m: usize, t: usize, p: f64, lat: f64, lon: f64) -> f64 {
        match self.humidity_truth() {
            None => f64::NAN,
            Some(HumidityTruth::Specific) => specific_humidity(m, t, p, lat, lon),
            Some(HumidityTruth::Mixing) => mixing_ratio(m, t, p, lat, lon),
            Some(HumidityTruth::Relative) => relative_humidity(m, t, p, lat, lon),
            Some(HumidityTruth::DewPoint) => dewpoint_k(m, t, p, lat, lon),
        }
    }

    /// Absolute tolerance of a temperature or dewpoint read back, K: half the packing step
    /// when packed, f32 rounding otherwise.
    pub fn temperature_tolerance(&self) -> f64 {
        if self.packed {
            0.5 * T_PACK.0 + 1e-4
        } else {
            1e-4
        }
    }

    /// Absolute tolerance of the humidity read back, in its SI units.
    pub fn humidity_tolerance(&self) -> f64 {
        let (step, f32_tol) = match self.humidity_truth() {
            Some(HumidityTruth::Specific | HumidityTruth::Mixing) => (Q_PACK.0, 1e-8),
            Some(HumidityTruth::Relative) => (RH_PACK.0, 1e-6),
            Some(HumidityTruth::DewPoint) => (T_PACK.0, 1e-4),
            None => (0.0, 0.0),
        };
        if self.packed {
            0.5 * step + f32_tol
        } else {
            f32_tol
        }
    }

    /// Absolute tolerance of surface pressure (Pa) and surface or level heights (m).
    pub fn surface_tolerances(&self) -> (f64, f64, f64) {
        if self.packed {
            (
                0.5 * PS_PACK.0 + 0.02,
                0.5 * ZS_PACK.0 + 1e-3,
                0.5 * GH_PACK.0 + 5e-3,
            )
        } else {
            (0.02, 1e-3, 5e-3)
        }
    }

    /// Write the file and return its path.
    ///
    /// # Panics
    /// On any NetCDF error: this is a test helper.
    pub fn write(&self, path: &Path) -> PathBuf {
        if let Err(e) = self.try_write(path) {
            panic!("writing fixture {}: {e}", path.display());
        }
        path.to_path_buf()
    }

    fn try_write(&self, path: &Path) -> Result<(), netcdf::Error> {
        let opts = match self.format {
            Format::Classic => Options::empty(),
            Format::Offset64 => Options::_64BIT_OFFSET,
            Format::Netcdf4 => Options::NETCDF4,
            Format::Netcdf4Classic => Options::NETCDF4 | Options::CLASSIC,
        };
        // The NetCDF and HDF5 libraries are not thread-safe: hold the crate's session lock
        // for the whole file, as the library's own readers and writers do.
        let _session = hypsogrid::netcdf_session::lock();
        let mut f = netcdf::create_with(path, opts)?;
        let mut pend: Vec<(String, Data)> = Vec::new();
        let pend = &mut pend;
        f.add_attribute("Conventions", "CF-1.8")?;
        f.add_attribute(
            "title",
            "hypsogrid synthetic test atmosphere (invented values for tests)",
        )?;
        let n_lev = self.levels();
        let lats = self.latitudes();
        let lons = self.longitudes();

        // ---- dimensions ----
        let member_dim = if self.standard_names {
            "realization"
        } else {
            "member"
        };
        if let Some(m) = self.members {
            f.add_dimension(member_dim, m)?;
        }
        if let Some(t) = self.time_steps {
            f.add_dimension("time", t)?;
        }
        let level_dim = match self.vertical {
            VerticalSpec::Isobaric => "plev",
            VerticalSpec::Hybrid { .. } => "lev",
        };
        f.add_dimension(level_dim, n_lev)?;
        f.add_dimension("lat", lats.len())?;
        f.add_dimension("lon", lons.len())?;

        // ---- bottom-up level index of each file level, with the optional swap ----
        let mut file_levels: Vec<usize> = (0..n_lev).collect();
        if self.levels_top_down {
            file_levels.reverse();
        }
        if self.faults.non_monotonic_levels {
            file_levels.swap(2, 3);
        }

        // ---- coordinates ----
        {
            let mut v = f.add_variable::<f64>("lat", &["lat"])?;
            v.put_attribute("units", "degrees_north")?;
            if self.standard_names {
                v.put_attribute("standard_name", "latitude")?;
            }
            pend.push((v.name(), Data::from(lats.clone())));
        }
        {
            let mut v = f.add_variable::<f64>("lon", &["lon"])?;
            v.put_attribute("units", "degrees_east")?;
            if self.standard_names {
                v.put_attribute("standard_name", "longitude")?;
            }
            pend.push((v.name(), Data::from(lons.clone())));
        }
        if let Some(m) = self.members {
            if self.standard_names {
                let mut v = f.add_variable::<i32>(member_dim, &[member_dim])?;
                v.put_attribute("standard_name", "realization")?;
                let vals: Vec<i32> = (0..m as i32).collect();
                pend.push((v.name(), Data::from(vals.clone())));
            }
        }
        let (time_units, time_offset_h) = if self.reference_time_variable {
            ("hours since 2011-01-10 00:00:00", 12.0)
        } else {
            ("hours since 2011-01-10 12:00:00", 0.0)
        };
        if let Some(t) = self.time_steps {
            let mut v = f.add_variable::<f64>("time", &["time"])?;
            v.put_attribute("units", time_units)?;
            v.put_attribute("calendar", "standard")?;
            if self.standard_names {
                v.put_attribute("standard_name", "time")?;
            }
            let vals: Vec<f64> = (0..t)
                .map(|i| time_offset_h + (i as i64 * STEP_HOURS) as f64)
                .collect();
            pend.push((v.name(), Data::from(vals.clone())));
        }
        if self.reference_time_variable {
            let mut v = f.add_variable::<f64>("reftime", &[])?;
            v.put_attribute("units", time_units)?;
            v.put_attribute("standard_name", "forecast_reference_time")?;
            pend.push((v.name(), Data::Scalar(time_offset_h)));
        }
        let p_scale = match self.level_units {
            PressureUnits::Pa => 1.0,
            PressureUnits::HPa | PressureUnits::Mbar => 0.01,
        };
        let p_units = match self.level_units {
            PressureUnits::Pa => "Pa",
            PressureUnits::HPa => "hPa",
            PressureUnits::Mbar => "mbar",
        };
        match self.vertical {
            VerticalSpec::Isobaric => {
                let vals: Vec<f32> = file_levels
                    .iter()
                    .map(|&k| (LEVELS_PA[k] * p_scale) as f32)
                    .collect();
                let mut v = f.add_variable::<f32>("plev", &["plev"])?;
                v.put_attribute("units", p_units)?;
                v.put_attribute("positive", "down")?;
                if self.standard_names {
                    v.put_attribute("standard_name", "air_pressure")?;
                }
                pend.push((v.name(), Data::from(vals.clone())));
                if let Some(missing) = self.humidity_missing_level {
                    if self.humidity != HumidityEncoding::None {
                        let own: Vec<f32> = file_levels
                            .iter()
                            .filter(|&&k| k != missing)
                            .map(|&k| (LEVELS_PA[k] * p_scale) as f32)
                            .collect();
                        f.add_dimension("plev_q", own.len())?;
                        let mut v = f.add_variable::<f32>("plev_q", &["plev_q"])?;
                        v.put_attribute("units", p_units)?;
                        v.put_attribute("positive", "down")?;
                        if self.standard_names {
                            v.put_attribute("standard_name", "air_pressure")?;
                        }
                        pend.push((v.name(), Data::from(own.clone())));
                    }
                }
            }
            VerticalSpec::Hybrid { form, half_levels } => {
                self.write_hybrid(&mut f, pend, form, half_levels, &file_levels)?;
            }
        }

        // ---- decoys ----
        if self.near_surface_decoys {
            let dims = self.surface_dims(true, false);
            let t2: Vec<f64> = self.surface_values(&dims, |lat, lon| {
                temperature_k(0, 0, surface_pressure_pa(lat, lon), lat, lon) + 1.0
            });
            put_plain(
                &mut f,
                pend,
                "t2m",
                &dims,
                &t2,
                "K",
                Some("air_temperature"),
            )?;
            let q2: Vec<f64> = self.surface_values(&dims, |lat, lon| {
                specific_humidity(0, 0, surface_pressure_pa(lat, lon), lat, lon)
            });
            put_plain(
                &mut f,
                pend,
                "q2m",
                &dims,
                &q2,
                "kg kg-1",
                Some("specific_humidity"),
            )?;
        }

        // ---- 3-D fields ----
        let dims3 = self.field_dims(level_dim, true);
        let (t_conv, t_units) = match self.temperature_units {
            TemperatureUnits::Kelvin => ((1.0, 0.0), "K"),
            TemperatureUnits::Celsius => ((1.0, -273.15), "degC"),
        };
        if !self.faults.omit_temperature {
            let vals = self.field_values(&dims3, &file_levels, temperature_k);
            let units = self.faults.temperature_units.as_deref().unwrap_or(t_units);
            let std = self.standard_names.then_some("air_temperature");
            self.put_field(&mut f, pend, "t", &dims3, vals, t_conv, T_PACK, units, std)?;
        }
        type HumidityRow = (
            &'static str,
            &'static str,
            (f64, f64),
            (f64, f64),
            &'static str,
            fn(usize, usize, f64, f64, f64) -> f64,
        );
        let row: Option<HumidityRow> = match self.humidity {
            HumidityEncoding::None => None,
            HumidityEncoding::SpecificKgPerKg => Some((
                "q",
                "specific_humidity",
                (1.0, 0.0),
                Q_PACK,
                "kg kg-1",
                specific_humidity,
            )),
            HumidityEncoding::SpecificGPerKg => Some((
                "q",
                "specific_humidity",
                (1000.0, 0.0),
                Q_PACK,
                "g kg-1",
                specific_humidity,
            )),
            HumidityEncoding::MixingRatio => Some((
                "mr",
                "humidity_mixing_ratio",
                (1.0, 0.0),
                Q_PACK,
                "kg/kg",
                mixing_ratio,
            )),
            HumidityEncoding::RelativePercent => Some((
                "r",
                "relative_humidity",
                (100.0, 0.0),
                RH_PACK,
                "%",
                relative_humidity,
            )),
            HumidityEncoding::RelativeFraction => Some((
                "r",
                "relative_humidity",
                (1.0, 0.0),
                RH_PACK,
                "1",
                relative_humidity,
            )),
            HumidityEncoding::DewPoint => Some((
                "td",
                "dew_point_temperature",
                t_conv,
                T_PACK,
                t_units,
                dewpoint_k,
            )),
        };
        if let Some((name, std, conv, pack, units, truth)) = row {
            let (hdim, hlevels): (&str, Vec<usize>) = match self.humidity_missing_level {
                Some(missing) if self.vertical == VerticalSpec::Isobaric => (
                    "plev_q",
                    file_levels
                        .iter()
                        .copied()
                        .filter(|&k| k != missing)
                        .collect(),
                ),
                _ => (level_dim, file_levels.clone()),
            };
            let hdims = self.field_dims(hdim, true);
            let vals = self.field_values(&hdims, &hlevels, truth);
            let units = self.faults.humidity_units.as_deref().unwrap_or(units);
            let std = self.standard_names.then_some(std);
            self.put_field(&mut f, pend, name, &hdims, vals, conv, pack, units, std)?;
        }
        match self.file_heights {
            FileHeights::None => {}
            FileHeights::GeopotentialHeight | FileHeights::Geopotential => {
                let geo = self.file_heights == FileHeights::Geopotential;
                let vals = self.field_values(&dims3, &file_levels, geopotential_height_m);
                let (name, std, units, conv) = if geo {
                    ("z", "geopotential", "m2 s-2", (G0, 0.0))
                } else {
                    ("gh", "geopotential_height", "gpm", (1.0, 0.0))
                };
                let std = self.standard_names.then_some(std);
                self.put_field(&mut f, pend, name, &dims3, vals, conv, GH_PACK, units, std)?;
            }
        }

        // ---- surface ----
        let hybrid = matches!(self.vertical, VerticalSpec::Hybrid { .. });
        let surface = self.surface.or(hybrid.then_some(SurfaceSpec {
            with_height: false,
            ..SurfaceSpec::default()
        }));
        if let Some(s) = surface {
            let dims = self.surface_dims(s.time_axis, s.member_axis);
            let ps = self.surface_values(&dims, surface_pressure_pa);
            let (ps_name, ps_conv, ps_units) = if hybrid {
                ("ps", (1.0, 0.0), "Pa")
            } else {
                ("sp", (p_scale, 0.0), p_units)
            };
            let std = self.standard_names.then_some("surface_air_pressure");
            let masked = vec![false; ps.len()];
            self.put_encoded(
                &mut f, pend, ps_name, &dims, ps, &masked, ps_conv, PS_PACK, ps_units, std,
            )?;
            if s.with_height {
                let zs = self.surface_values(&dims, surface_height_m);
                let masked = vec![false; zs.len()];
                match s.height {
                    SurfaceHeight::Altitude => {
                        let std = self.standard_names.then_some("surface_altitude");
                        self.put_encoded(
                            &mut f,
                            pend,
                            "orog",
                            &dims,
                            zs,
                            &masked,
                            (1.0, 0.0),
                            ZS_PACK,
                            "m",
                            std,
                        )?;
                    }
                    SurfaceHeight::Geopotential => {
                        let std = self.standard_names.then_some("surface_geopotential");
                        self.put_encoded(
                            &mut f,
                            pend,
                            "phis",
                            &dims,
                            zs,
                            &masked,
                            (G0, 0.0),
                            ZS_PACK,
                            "m2 s-2",
                            std,
                        )?;
                    }
                }
            }
        }
        // NetCDF-3 files take data only outside define mode; write everything at the end.
        if matches!(
            self.format,
            Format::Classic | Format::Offset64 | Format::Netcdf4Classic
        ) {
            f.enddef()?;
        }
        for (name, data) in pend.drain(..) {
            let Some(mut v) = f.variable_mut(&name) else {
                return Err(netcdf::Error::NotFound(name));
            };
            match data {
                Data::F64(x) => v.put_values(&x, ..)?,
                Data::F32(x) => v.put_values(&x, ..)?,
                Data::I16(x) => v.put_values(&x, ..)?,
                Data::I32(x) => v.put_values(&x, ..)?,
                Data::Scalar(x) => v.put_value(x, ())?,
            }
        }
        f.close()
    }

    fn write_hybrid(
        &self,
        f: &mut netcdf::FileMut,
        pend: &mut Vec<(String, Data)>,
        form: HybridForm,
        half_levels: HalfLevels,
        file_levels: &[usize],
    ) -> Result<(), netcdf::Error> {
        let (a_full, b_full) = self.hybrid_full();
        let n = a_full.len();
        let ft = match form {
            HybridForm::Ap => "ap: ap b: b ps: ps",
            HybridForm::AP0 => "a: a b: b p0: p0 ps: ps",
        };
        let eta: Vec<f64> = file_levels
            .iter()
            .map(|&k| a_full[k] / HYBRID_P0_PA + b_full[k])
            .collect();
        {
            let mut v = f.add_variable::<f64>("lev", &["lev"])?;
            v.put_attribute(
                "standard_name",
                "atmosphere_hybrid_sigma_pressure_coordinate",
            )?;
            v.put_attribute("units", "1")?;
            v.put_attribute("positive", "down")?;
            v.put_attribute("formula_terms", ft)?;
            if half_levels == HalfLevels::Bounds {
                v.put_attribute("bounds", "lev_bnds")?;
            }
            pend.push((v.name(), Data::from(eta.clone())));
        }
        let a_scale = match form {
            HybridForm::Ap => 1.0,
            HybridForm::AP0 => 1.0 / HYBRID_P0_PA,
        };
        let a_name = match form {
            HybridForm::Ap => "ap",
            HybridForm::AP0 => "a",
        };
        {
            let vals: Vec<f64> = file_levels.iter().map(|&k| a_full[k] * a_scale).collect();
            let mut v = f.add_variable::<f64>(a_name, &["lev"])?;
            v.put_attribute("units", if form == HybridForm::Ap { "Pa" } else { "1" })?;
            pend.push((v.name(), Data::from(vals.clone())));
            let vals: Vec<f64> = file_levels.iter().map(|&k| b_full[k]).collect();
            let mut v = f.add_variable::<f64>("b", &["lev"])?;
            v.put_attribute("units", "1")?;
            pend.push((v.name(), Data::from(vals.clone())));
        }
        if form == HybridForm::AP0 {
            let mut v = f.add_variable::<f64>("p0", &[])?;
            v.put_attribute("units", "Pa")?;
            pend.push((v.name(), Data::Scalar(HYBRID_P0_PA)));
        }
        match half_levels {
            HalfLevels::Absent => {}
            HalfLevels::Bounds => {
                f.add_dimension("nbnd", 2)?;
                // Bounds written (upper, lower) for top-down files and (lower, upper) for
                // bottom-up ones, as producers do; the reader must not care.
                let pair = |k: usize| -> [usize; 2] {
                    if self.levels_top_down {
                        [k + 1, k]
                    } else {
                        [k, k + 1]
                    }
                };
                let bt = match form {
                    HybridForm::Ap => "ap: ap_bnds b: b_bnds ps: ps",
                    HybridForm::AP0 => "a: a_bnds b: b_bnds p0: p0 ps: ps",
                };
                let a_bname = if form == HybridForm::Ap {
                    "ap_bnds"
                } else {
                    "a_bnds"
                };
                let mut eta_b = Vec::new();
                let mut a_b = Vec::new();
                let mut b_b = Vec::new();
                for &k in file_levels {
                    for h in pair(k) {
                        eta_b.push(HYBRID_A_HALF_PA[h] / HYBRID_P0_PA + HYBRID_B_HALF[h]);
                        a_b.push(HYBRID_A_HALF_PA[h] * a_scale);
                        b_b.push(HYBRID_B_HALF[h]);
                    }
                }
                let mut v = f.add_variable::<f64>("lev_bnds", &["lev", "nbnd"])?;
                v.put_attribute("formula_terms", bt)?;
                v.put_attribute("units", "1")?;
                pend.push((v.name(), Data::from(eta_b.clone())));
                let mut v = f.add_variable::<f64>(a_bname, &["lev", "nbnd"])?;
                v.put_attribute("units", if form == HybridForm::Ap { "Pa" } else { "1" })?;
                pend.push((v.name(), Data::from(a_b.clone())));
                let mut v = f.add_variable::<f64>("b_bnds", &["lev", "nbnd"])?;
                v.put_attribute("units", "1")?;
                pend.push((v.name(), Data::from(b_b.clone())));
            }
            HalfLevels::Explicit => {
                f.add_dimension("ilev", n + 1)?;
                let mut halves: Vec<usize> = (0..=n).collect();
                if self.levels_top_down {
                    halves.reverse();
                }
                let (a_hname, a_units) = match form {
                    HybridForm::Ap => ("ap_half", "Pa"),
                    HybridForm::AP0 => ("hyai", "1"),
                };
                let b_hname = if form == HybridForm::Ap {
                    "b_half"
                } else {
                    "hybi"
                };
                let a_h: Vec<f64> = halves
                    .iter()
                    .map(|&h| HYBRID_A_HALF_PA[h] * a_scale)
                    .collect();
                let b_h: Vec<f64> = halves.iter().map(|&h| HYBRID_B_HALF[h]).collect();
                let mut v = f.add_variable::<f64>(a_hname, &["ilev"])?;
                v.put_attribute("units", a_units)?;
                pend.push((v.name(), Data::from(a_h.clone())));
                let mut v = f.add_variable::<f64>(b_hname, &["ilev"])?;
                v.put_attribute("units", "1")?;
                pend.push((v.name(), Data::from(b_h.clone())));
            }
        }
        Ok(())
    }

    fn member_dim(&self) -> &'static str {
        if self.standard_names {
            "realization"
        } else {
            "member"
        }
    }

    /// Dimensions of a 3-D field in file order.
    fn field_dims(&self, level_dim: &'static str, with_level: bool) -> Vec<Dim> {
        let mut d = Vec::new();
        if let Some(m) = self.members {
            d.push(Dim::Member(self.member_dim(), m));
        }
        if let Some(t) = self.time_steps {
            d.push(Dim::Time(t));
        }
        let lat = Dim::Lat(self.latitudes().len());
        let lon = Dim::Lon(self.longitudes().len());
        if self.transpose_dims {
            d.push(lon);
            d.push(lat);
            if with_level {
                d.push(Dim::Level(level_dim));
            }
        } else {
            if with_level {
                d.push(Dim::Level(level_dim));
            }
            d.push(lat);
            d.push(lon);
        }
        d
    }

    fn surface_dims(&self, time_axis: bool, member_axis: bool) -> Vec<Dim> {
        let mut d = Vec::new();
        if member_axis {
            if let Some(m) = self.members {
                d.push(Dim::Member(self.member_dim(), m));
            }
        }
        if time_axis {
            if let Some(t) = self.time_steps {
                d.push(Dim::Time(t));
            }
        }
        d.push(Dim::Lat(self.latitudes().len()));
        d.push(Dim::Lon(self.longitudes().len()));
        d
    }

    /// Values of a field in file order (SI), and for each the mask flag. `levels` maps the
    /// field's own file level index to the bottom-up temperature level index.
    fn field_values(
        &self,
        dims: &[Dim],
        levels: &[usize],
        truth: fn(usize, usize, f64, f64, f64) -> f64,
    ) -> (Vec<f64>, Vec<bool>) {
        let lats = self.latitudes();
        let lons = self.longitudes();
        let shape: Vec<usize> = dims
            .iter()
            .map(|d| match d {
                Dim::Level(_) => levels.len(),
                other => other.len(),
            })
            .collect();
        let total: usize = shape.iter().product();
        let mut vals = Vec::with_capacity(total);
        let mut masked = Vec::with_capacity(total);
        for flat in 0..total {
            let mut rem = flat;
            let mut idx = vec![0usize; shape.len()];
            for k in (0..shape.len()).rev() {
                idx[k] = rem % shape[k];
                rem /= shape[k];
            }
            let (mut m, mut t, mut kb, mut j, mut i) = (0, 0, 0, 0, 0);
            for (d, &x) in dims.iter().zip(&idx) {
                match d {
                    Dim::Member(..) => m = x,
                    Dim::Time(_) => t = x,
                    Dim::Level(_) => kb = levels[x],
                    Dim::Lat(_) => j = x,
                    Dim::Lon(_) => i = x,
                }
            }
            let (lat, lon) = (lats[j], lons[i]);
            let p = self.level_pressure_pa(kb, lat, lon);
            vals.push(truth(m, t, p, lat, lon));
            masked.push(self.masked_points.contains(&[m, t, kb, j, i]));
        }
        (vals, masked)
    }

    fn surface_values(&self, dims: &[Dim], truth: fn(f64, f64) -> f64) -> Vec<f64> {
        let lats = self.latitudes();
        let lons = self.longitudes();
        let shape: Vec<usize> = dims.iter().map(Dim::len).collect();
        let total: usize = shape.iter().product();
        let (ny, nx) = (lats.len(), lons.len());
        (0..total)
            .map(|flat| {
                let i = flat % nx;
                let j = (flat / nx) % ny;
                truth(lats[j], lons[i])
            })
            .collect()
    }

    #[allow(clippy::too_many_arguments)]
    fn put_field(
        &self,
        f: &mut netcdf::FileMut,
        pend: &mut Vec<(String, Data)>,
        name: &str,
        dims: &[Dim],
        (vals, masked): (Vec<f64>, Vec<bool>),
        conv: (f64, f64),
        pack: (f64, f64),
        units: &str,
        std: Option<&str>,
    ) -> Result<(), netcdf::Error> {
        self.put_encoded(f, pend, name, dims, vals, &masked, conv, pack, units, std)
    }

    /// NetCDF-4 chunking and compression of a 3-D or larger field, as `chunks_across_steps`,
    /// `deflate_tiles` and `tiles_stored_plain` say (else the library's default layout).
    fn set_storage(&self, v: &mut netcdf::VariableMut, dims: &[Dim]) -> Result<(), netcdf::Error> {
        if self.format != Format::Netcdf4 {
            return Ok(());
        }
        if self.chunks_across_steps {
            let chunks: Vec<usize> = dims
                .iter()
                .map(|d| match d {
                    Dim::Level(_) => 1,
                    other => other.len().max(1),
                })
                .collect();
            v.set_chunking(&chunks)?;
        }
        if let Some([lz, ly, lx]) = self.deflate_tiles {
            let chunks: Vec<usize> = dims
                .iter()
                .map(|d| match d {
                    Dim::Level(_) => lz,
                    Dim::Lat(_) => ly,
                    Dim::Lon(_) => lx,
                    _ => 1,
                })
                .collect();
            v.set_chunking(&chunks)?;
            if !self.tiles_stored_plain {
                v.set_compression(1, true)?;
            }
        }
        Ok(())
    }

    /// Write SI values converted to file units by `conv` (file = si * conv.0 + conv.1),
    /// packed as int16 with SI packing `pack` (step, centre) when the spec says so.
    #[allow(clippy::too_many_arguments)]
    fn put_encoded(
        &self,
        f: &mut netcdf::FileMut,
        pend: &mut Vec<(String, Data)>,
        name: &str,
        dims: &[Dim],
        vals: Vec<f64>,
        masked: &[bool],
        conv: (f64, f64),
        pack: (f64, f64),
        units: &str,
        std: Option<&str>,
    ) -> Result<(), netcdf::Error> {
        let dim_names: Vec<&str> = dims.iter().map(Dim::name).collect();
        let file_vals: Vec<f64> = vals.iter().map(|v| v * conv.0 + conv.1).collect();
        if self.packed {
            let scale = pack.0 * conv.0.abs();
            let offset = pack.1 * conv.0 + conv.1;
            let mut raw: Vec<i16> = file_vals
                .iter()
                .map(|v| {
                    let r = ((v - offset) / scale).round();
                    assert!(r.abs() < 32000.0, "fixture packing overflow in {name}: {v}");
                    r as i16
                })
                .collect();
            let marker: i16 = match self.mask {
                MaskEncoding::FillValue | MaskEncoding::MissingValue => -32767,
                MaskEncoding::ValidRange => 32700,
            };
            for (r, &m) in raw.iter_mut().zip(masked) {
                if m {
                    *r = marker;
                }
            }
            let mut v = f.add_variable::<i16>(name, &dim_names)?;
            self.set_storage(&mut v, dims)?;
            v.put_attribute("scale_factor", scale)?;
            v.put_attribute("add_offset", offset)?;
            match self.mask {
                MaskEncoding::FillValue => {
                    v.put_attribute("_FillValue", -32767i16)?;
                }
                MaskEncoding::MissingValue => {
                    v.put_attribute("missing_value", -32767i16)?;
                }
                MaskEncoding::ValidRange => {
                    v.put_attribute("valid_range", AttributeValue::Shorts(vec![-32000, 32000]))?;
                }
            }
            put_meta(&mut v, units, std)?;
            pend.push((v.name(), Data::from(raw.clone())));
        } else {
            let marker: f32 = match self.mask {
                MaskEncoding::FillValue | MaskEncoding::MissingValue => 1.0e20,
                MaskEncoding::ValidRange => 9.0e6,
            };
            let out: Vec<f32> = file_vals
                .iter()
                .zip(masked)
                .map(|(v, &m)| if m { marker } else { *v as f32 })
                .collect();
            let mut v = f.add_variable::<f32>(name, &dim_names)?;
            self.set_storage(&mut v, dims)?;
            match self.mask {
                MaskEncoding::FillValue => {
                    v.put_attribute("_FillValue", 1.0e20f32)?;
                }
                MaskEncoding::MissingValue => {
                    v.put_attribute("missing_value", 1.0e20f32)?;
                }
                MaskEncoding::ValidRange => {
                    v.put_attribute("valid_min", -1.0e6f32)?;
                    v.put_attribute("valid_max", 1.0e6f32)?;
                }
            }
            put_meta(&mut v, units, std)?;
            pend.push((v.name(), Data::from(out.clone())));
        }
        Ok(())
    }
}

/// Packing (step, centre) in SI units. Steps are fine enough that the tests' tolerances are
/// tight, and ranges (±32000 steps) cover every fixture value.
const T_PACK: (f64, f64) = (0.005, 250.0);
const Q_PACK: (f64, f64) = (5e-7, 0.015);
const RH_PACK: (f64, f64) = (2e-5, 0.5);
const PS_PACK: (f64, f64) = (1.0, 80_000.0);
const ZS_PACK: (f64, f64) = (0.1, 2000.0);
const GH_PACK: (f64, f64) = (0.5, 15_000.0);

/// Data waiting for the end of define mode.
enum Data {
    F64(Vec<f64>),
    F32(Vec<f32>),
    I16(Vec<i16>),
    I32(Vec<i32>),
    Scalar(f64),
}

impl From<Vec<f64>> for Data {
    fn from(v: Vec<f64>) -> Self {
        Data::F64(v)
    }
}
impl From<Vec<f32>> for Data {
    fn from(v: Vec<f32>) -> Self {
        Data::F32(v)
    }
}
impl From<Vec<i16>> for Data {
    fn from(v: Vec<i16>) -> Self {
        Data::I16(v)
    }
}
impl From<Vec<i32>> for Data {
    fn from(v: Vec<i32>) -> Self {
        Data::I32(v)
    }
}

#[derive(Clone, Copy, Debug)]
enum Dim {
    Member(&'static str, usize),
    Time(usize),
    Level(&'static str),
    Lat(usize),
    Lon(usize),
}

impl Dim {
    fn name(&self) -> &'static str {
        match self {
            Dim::Member(n, _) => n,
            Dim::Time(_) => "time",
            Dim::Level(n) => n,
            Dim::Lat(_) => "lat",
            Dim::Lon(_) => "lon",
        }
    }
    fn len(&self) -> usize {
        match self {
            Dim::Member(_, n) | Dim::Time(n) | Dim::Lat(n) | Dim::Lon(n) => *n,
            Dim::Level(_) => 0,
        }
    }
}

fn put_meta(
    v: &mut netcdf::VariableMut<'_>,
    units: &str,
    std: Option<&str>,
) -> Result<(), netcdf::Error> {
    v.put_attribute("units", units)?;
    if let Some(s) = std {
        v.put_attribute("standard_name", s)?;
    }
    Ok(())
}

fn put_plain(
    f: &mut netcdf::FileMut,
    pend: &mut Vec<(String, Data)>,
    name: &str,
    dims: &[Dim],
    vals: &[f64],
    units: &str,
    std: Option<&str>,
) -> Result<(), netcdf::Error> {
    let names: Vec<&str> = dims.iter().map(Dim::name).collect();
    let out: Vec<f32> = vals.iter().map(|&v| v as f32).collect();
    let mut v = f.add_variable::<f32>(name, &names)?;
    put_meta(&mut v, units, std)?;
    pend.push((v.name(), Data::from(out.clone())));
    Ok(())
}

/// Every encoding variant that must read to the same canonical fields, each with a short
/// label. Hybrid variants are listed by [`hybrid_variants`].
pub fn isobaric_variants() -> Vec<(String, FixtureSpec)> {
    let base = FixtureSpec::default();
    let mut v: Vec<(String, FixtureSpec)> = vec![("default".into(), base.clone())];
    let mut add = |label: &str, spec: FixtureSpec| v.push((label.to_string(), spec));
    add(
        "classic",
        FixtureSpec {
            format: Format::Classic,
            ..base.clone()
        },
    );
    add(
        "offset64",
        FixtureSpec {
            format: Format::Offset64,
            ..base.clone()
        },
    );
    add(
        "netcdf4-classic",
        FixtureSpec {
            format: Format::Netcdf4Classic,
            ..base.clone()
        },
    );
    add(
        "hPa",
        FixtureSpec {
            level_units: PressureUnits::HPa,
            ..base.clone()
        },
    );
    add(
        "mbar-top-down",
        FixtureSpec {
            level_units: PressureUnits::Mbar,
            levels_top_down: true,
            ..base.clone()
        },
    );
    add(
        "top-down",
        FixtureSpec {
            levels_top_down: true,
            ..base.clone()
        },
    );
    add(
        "degC",
        FixtureSpec {
            temperature_units: TemperatureUnits::Celsius,
            ..base.clone()
        },
    );
    add(
        "q-g-per-kg",
        FixtureSpec {
            humidity: HumidityEncoding::SpecificGPerKg,
            ..base.clone()
        },
    );
    add(
        "packed",
        FixtureSpec {
            packed: true,
            ..base.clone()
        },
    );
    add(
        "packed-classic-top-down-degC",
        FixtureSpec {
            packed: true,
            format: Format::Classic,
            levels_top_down: true,
            temperature_units: TemperatureUnits::Celsius,
            humidity: HumidityEncoding::SpecificGPerKg,
            ..base.clone()
        },
    );
    add(
        "lat-north-to-south",
        FixtureSpec {
            lat_north_to_south: true,
            ..base.clone()
        },
    );
    add(
        "lon-180",
        FixtureSpec {
            lon_0_360: false,
            ..base.clone()
        },
    );
    add(
        "no-standard-names",
        FixtureSpec {
            standard_names: false,
            ..base.clone()
        },
    );
    add(
        "decoys",
        FixtureSpec {
            near_surface_decoys: true,
            ..base.clone()
        },
    );
    add(
        "transposed",
        FixtureSpec {
            transpose_dims: true,
            levels_top_down: true,
            ..base.clone()
        },
    );
    add(
        "surface-no-time",
        FixtureSpec {
            surface: Some(SurfaceSpec {
                time_axis: false,
                ..SurfaceSpec::default()
            }),
            ..base.clone()
        },
    );
    add(
        "surface-geopotential",
        FixtureSpec {
            surface: Some(SurfaceSpec {
                height: SurfaceHeight::Geopotential,
                ..SurfaceSpec::default()
            }),
            ..base.clone()
        },
    );
    add(
        "surface-hPa-packed",
        FixtureSpec {
            level_units: PressureUnits::HPa,
            packed: true,
            ..base.clone()
        },
    );
    add(
        "reference-time-variable",
        FixtureSpec {
            reference_time_variable: true,
            ..base.clone()
        },
    );
    add(
        "no-time-axis",
        FixtureSpec {
            time_steps: None,
            surface: Some(SurfaceSpec {
                time_axis: false,
                ..SurfaceSpec::default()
            }),
            ..base.clone()
        },
    );
    v
}

/// Hybrid variants that must read to the same canonical fields.
pub fn hybrid_variants() -> Vec<(String, FixtureSpec)> {
    let mut v = Vec::new();
    for form in [HybridForm::Ap, HybridForm::AP0] {
        for half_levels in [HalfLevels::Bounds, HalfLevels::Explicit] {
            for top_down in [false, true] {
                v.push((
                    format!("hybrid-{form:?}-{half_levels:?}-top-down-{top_down}"),
                    FixtureSpec {
                        vertical: VerticalSpec::Hybrid { form, half_levels },
                        levels_top_down: top_down,
                        surface: Some(SurfaceSpec {
                            height: SurfaceHeight::Geopotential,
                            ..SurfaceSpec::default()
                        }),
                        ..FixtureSpec::default()
                    },
                ));
            }
        }
    }
    v
}
