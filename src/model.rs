//! Domain types shared by ingest, compute and output: one cycle's fields in SI units.
//!
//! Storage is `f32` (fields are large; see DEVELOPERS.md), missing values are `NaN`, and the
//! vertical axis is always held bottom-up (index 0 is the level nearest the ground, the
//! highest pressure). Latitude and longitude keep the file's order: every kernel works column
//! by column, so their order cannot change an answer.

use std::path::PathBuf;

use ndarray::{Array4, Array5};

use crate::physics::Constants;

/// Dimension order of every 3-D field: member, time, level, latitude, longitude.
pub type Field5 = Array5<f32>;
/// Dimension order of every 2-D field: member, time, latitude, longitude.
pub type Field4 = Array4<f32>;

/// A regular latitude/longitude grid in the file's order.
#[derive(Clone, Debug, PartialEq)]
pub struct Grid {
    /// Latitudes of the rows, degrees north.
    pub latitudes: Vec<f64>,
    /// Longitudes of the columns, degrees east, in the file's convention.
    pub longitudes: Vec<f64>,
}

impl Grid {
    /// Number of rows.
    pub fn rows(&self) -> usize {
        self.latitudes.len()
    }
    /// Number of columns.
    pub fn cols(&self) -> usize {
        self.longitudes.len()
    }
}

/// The vertical coordinate, bottom-up.
#[derive(Clone, Debug, PartialEq)]
pub enum Vertical {
    /// Isobaric levels, Pa, strictly decreasing (bottom-up).
    Isobaric {
        /// Pressure of each level, Pa.
        pressure_pa: Vec<f64>,
    },
    /// Hybrid sigma-pressure levels, half-level pressure `a + b * p_s`, bottom-up: index 0 is
    /// the surface half level (a = 0, b = 1), index `n` the model top. Full level k lies
    /// between half levels k and k + 1.
    Hybrid {
        /// a at the half levels, Pa (`ap`, or `a * p0` in CF terms), `levels + 1` values.
        a_half_pa: Vec<f64>,
        /// b at the half levels, dimensionless, `levels + 1` values.
        b_half: Vec<f64>,
    },
}

impl Vertical {
    /// Number of levels the 3-D fields have (full levels for hybrid coordinates).
    pub fn levels(&self) -> usize {
        match self {
            Vertical::Isobaric { pressure_pa } => pressure_pa.len(),
            Vertical::Hybrid { a_half_pa, .. } => a_half_pa.len().saturating_sub(1),
        }
    }
}

/// Which humidity variable the file carried; values are converted to these units on ingest.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum HumidityKind {
    /// Specific humidity q, kg kg⁻¹.
    SpecificHumidity,
    /// Mixing ratio r, kg kg⁻¹.
    MixingRatio,
    /// Relative humidity as a fraction (0–1), with respect to the phase in [`crate::physics::humidity::RelativeHumidityPhase`].
    RelativeHumidity,
    /// Dewpoint temperature, K.
    DewPoint,
}

impl HumidityKind {
    /// The CF standard name of the quantity.
    pub fn standard_name(self) -> &'static str {
        match self {
            HumidityKind::SpecificHumidity => "specific_humidity",
            HumidityKind::MixingRatio => "humidity_mixing_ratio",
            HumidityKind::RelativeHumidity => "relative_humidity",
            HumidityKind::DewPoint => "dew_point_temperature",
        }
    }
}

/// A humidity field aligned onto the temperature levels.
#[derive(Clone, Debug)]
pub struct Humidity {
    /// What the values are.
    pub kind: HumidityKind,
    /// Values in the units of `kind`, same shape as the temperature. A level the file's
    /// humidity axis lacks holds `NaN` and is listed in `missing_levels`.
    pub values: Field5,
    /// Indices (bottom-up) of temperature levels for which the file had no humidity level;
    /// the compute treats them as dry air.
    pub missing_levels: Vec<usize>,
}

/// Surface fields, when the file has them; both broadcast to every member and time.
#[derive(Clone, Debug)]
pub struct Surface {
    /// Surface pressure, Pa.
    pub pressure_pa: Field4,
    /// Surface geopotential height, geopotential metres (from `surface_geopotential` / g0,
    /// or `surface_altitude` taken as geopotential height: the difference is below 0.1 %).
    pub height_m: Field4,
}

/// One cycle as read from a file.
#[derive(Clone, Debug)]
pub struct Cycle {
    /// The file it came from.
    pub source: PathBuf,
    /// Forecast reference time, RFC 3339 UTC, when the file says.
    pub reference_time: Option<String>,
    /// Lead time of each time step, seconds after the reference time.
    pub lead_times_s: Vec<i64>,
    /// Number of ensemble members (1 when the file has no member axis).
    pub members: usize,
    /// Horizontal grid.
    pub grid: Grid,
    /// Vertical coordinate, bottom-up.
    pub vertical: Vertical,
    /// True when the file listed its levels top-down (lowest pressure first), so that output
    /// can be written in the file's own order.
    pub levels_top_down_in_file: bool,
    /// Air temperature, K, `[member, time, level, lat, lon]`.
    pub temperature: Field5,
    /// Humidity on the temperature levels, if the file has any.
    pub humidity: Option<Humidity>,
    /// Surface pressure and height, if the file has both.
    pub surface: Option<Surface>,
    /// Geopotential height the file itself carries, geopotential metres, same shape as the
    /// temperature.
    pub file_heights: Option<Field5>,
    /// Constants to compute with (the file's own where it names them).
    pub constants: Constants,
    /// The variables read, as (role, variable name), for reports.
    pub variables: Vec<(String, String)>,
    /// What ingest noticed and decided (a missing humidity level, which of two candidates
    /// was chosen, ...), in sentences.
    pub notes: Vec<String>,
}

/// A layer between two pressures, Pa, `bottom_pa > top_pa`; neither need be on a level.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Layer {
    /// Pressure at the bottom of the layer, Pa.
    pub bottom_pa: f64,
    /// Pressure at the top of the layer, Pa.
    pub top_pa: f64,
}

impl Layer {
    /// Short label in hectopascals, `1000-500` style, for names and reports.
    pub fn label_hpa(&self) -> String {
        format!("{}-{}", trim_hpa(self.bottom_pa), trim_hpa(self.top_pa))
    }
}

fn trim_hpa(p_pa: f64) -> String {
    let hpa = p_pa / 100.0;
    if (hpa - hpa.round()).abs() < 1e-9 {
        format!("{}", hpa.round() as i64)
    } else {
        format!("{hpa}")
    }
}

/// Thickness of one layer at every column.
#[derive(Clone, Debug)]
pub struct LayerThickness {
    /// The layer.
    pub layer: Layer,
    /// Thickness, geopotential metres, `[member, time, lat, lon]`; `NaN` where masked.
    pub values: Field4,
    /// 1 where the bottom of the layer lies below the ground (its value is then an
    /// extrapolation), else 0; all 0 when the cycle has no surface fields.
    pub below_ground: Array4<u8>,
}

/// What the compute produced for one cycle.
#[derive(Clone, Debug)]
pub struct Heights {
    /// Geopotential height on the cycle's levels (bottom-up; full levels for hybrid
    /// coordinates), geopotential metres, `[member, time, level, lat, lon]`; `NaN` where masked.
    pub geopotential_height: Field5,
    /// 1 where the level lies below the ground (its height is then an extrapolation), else 0.
    pub below_ground: Array5<u8>,
    /// One entry per requested layer.
    pub thickness: Vec<LayerThickness>,
    /// The constants used.
    pub constants: Constants,
    /// The method, in one or two sentences, for the output's attributes.
    pub method: String,
}

/// A zeroed field of `dim` (`[member, time, level, lat, lon]`, standard layout), allocated
/// as the reader allocates the fields it reads: untouched until written, and offered for
/// transparent huge pages. A cycle built in memory (benchmarks, tests, programs using this
/// crate) then lays its fields out as one read from a file; on fields of 4 KiB pages the
/// kernel ran 3–4 % slower on the 0.25° grid (`benches/kernel.rs`, alternate runs).
///
/// ```
/// let t = hypsogrid::model::zeroed_field((1, 2, 3, 4, 5));
/// assert_eq!(t.dim(), (1, 2, 3, 4, 5));
/// assert!(t.is_standard_layout() && t.iter().all(|&v| v == 0.0));
/// ```
pub fn zeroed_field(dim: (usize, usize, usize, usize, usize)) -> Field5 {
    crate::buffers::zeroed_field_array(dim)
}
