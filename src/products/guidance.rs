//! Rain–snow guidance: partial thicknesses, the 0 °C and wet-bulb 0 °C levels, and a
//! precipitation-type category per grid point, each with the rule that decided it.
//!
//! **Caution.** Everything here is guidance derived from model fields ([`CAUTION`]): it is
//! not a forecast or a warning, its thresholds must be set for the local climate and terrain,
//! and official services, local practice and licensed forecasters decide. Every answer that
//! carries guidance carries the caution text.
//!
//! # Quantities, per column of one (member, time) step
//! - **Thickness** of 1000–500, 1000–850 and 850–700 hPa, geopotential metres, by
//!   [`thickness_between`] on the column rebuilt exactly as the batch builds it
//!   ([`StepColumns`]), so the values equal those of [`crate::query::grid_field`] with
//!   [`crate::query::Quantity::Thickness`]. [`FLAG_BELOW_GROUND`] when the layer's bottom
//!   lies below the ground (the value is then an extrapolation), [`FLAG_MISSING`] when masked.
//! - **0 °C level** (freezing level) and **wet-bulb 0 °C level**, geopotential metres above
//!   mean sea level and above the ground. Conventions:
//!   - The search starts at the lowest level above the ground (`p ≤ p_s`; without surface
//!     fields, the lowest level with data) and goes upward, no higher than
//!     [`GuidanceSettings::search_top_hpa`]. The ground itself is not a level (the cycle
//!     carries no screen temperature): the lowest level above it stands for it.
//!   - A level is *warm* when its value exceeds 273.15 K, *cold* otherwise. The 0 °C level
//!     is the lowest warm-to-cold change going up, at the pressure found by interpolating
//!     in `ln p` between the two levels with a constant lapse rate, as the column's own
//!     layers do (`ln T`, resp. `ln T_w`, linear in `ln p`: exact for a polytropic layer,
//!     and within a few metres of `T` linear in `ln p` over a 25 hPa layer); its height is
//!     the column's own height at that pressure ([`ColumnNodes::height_at_pressure`], the
//!     model of the batch integration), not a straight line between the level heights.
//!   - When the lowest level above the ground is cold, the level is *at the surface*: the
//!     surface height is reported with [`LEVEL_AT_SURFACE`] (the lowest level's height when
//!     the cycle has no surface fields).
//!   - No warm-to-cold change below the search top: `NaN` with [`LEVEL_NOT_FOUND`].
//!   - [`LEVEL_MULTIPLE`] when there is more than one 0 °C level (the surface counts as one
//!     when the level is at the surface): a warm layer aloft, which matters for freezing rain
//!     and ice pellets.
//!   - [`LEVEL_INCOMPLETE`] when a missing value stopped the search before the top;
//!     [`LEVEL_MISSING`] when nothing usable was found; [`LEVEL_NO_HUMIDITY`] for the wet-bulb
//!     level of a cycle without humidity (the grid's notes say so).
//!   - Wet-bulb temperature is the psychrometric one with a liquid bulb
//!     ([`crate::physics::wetbulb`]); warm or cold is decided by the closed-form test
//!     [`wet_bulb_exceeds_freezing`], and the equation is solved only at the two levels
//!     around a change. Humidity comes from whatever the cycle carries (specific humidity,
//!     mixing ratio, relative humidity or dewpoint) through the cycle's own saturation
//!     formula and relative-humidity phase; a level the file had no humidity for is missing
//!     (not dry) here.
//!
//! # Decision table
//! Rules are tried in order; the first that applies decides, and its [`Rule`] is reported
//! with the category. `z_s` is the surface height; the critical thicknesses are raised by
//! [`GuidanceSettings::critical_gain_m_per_km`] per kilometre of `z_s` (0 by default). A
//! thickness *votes* cold below `critical − margin`, warm above `critical + margin`, marginal
//! in between; the wet-bulb 0 °C height above the ground votes cold at or below
//! `wet_bulb_zero_snow_max_agl_m`, warm at or above `wet_bulb_zero_rain_min_agl_m`, marginal in
//! between (at the surface counts as 0 m).
//!
//! | # | rule | applies when | category |
//! |---|------|--------------|----------|
//! | 1 | [`Rule::MissingTemperature`] | no usable temperature above the ground | indeterminate |
//! | 2 | [`Rule::WarmLayerAloft`] | lowest level above the ground at or below 0 °C, and a level above it warmer than 0 °C by at least `warm_layer_min_excess_k` | freezing rain or ice pellets |
//! | 3 | [`Rule::ColumnBelowFreezing`] | every level above the ground, up to the search top, at or below 0 °C | snow |
//! | 4 | [`Rule::LowGroundMissingThickness`] | low ground (`z_s < low_ground_max_m`, or no surface fields) and 1000–500 or 1000–850 missing | indeterminate |
//! | 5 | [`Rule::LowGroundBothCold`] | low ground, 1000–500 and 1000–850 both vote cold | snow |
//! | 6 | [`Rule::LowGroundBothWarm`] | low ground, both vote warm | rain |
//! | 7 | [`Rule::LowGroundMarginal`] | low ground, any other pair of votes | mixed rain and snow |
//! | 8 | [`Rule::NoWetBulbZero`] | not low ground and no wet-bulb 0 °C level (no humidity, or missing) | indeterminate |
//! | 9 | [`Rule::RaisedGroundBothCold`] | raised ground (850 hPa above the ground, 850–700 usable): 850–700 and the wet-bulb 0 °C height both vote cold | snow |
//! | 10 | [`Rule::RaisedGroundBothWarm`] | raised ground, both vote warm | rain |
//! | 11 | [`Rule::RaisedGroundMarginal`] | raised ground, any other pair of votes | mixed rain and snow |
//! | 12 | [`Rule::HighGroundCold`] | high ground (850 hPa below the ground): the wet-bulb 0 °C height votes cold | snow |
//! | 13 | [`Rule::HighGroundWarm`] | high ground, it votes warm | rain |
//! | 14 | [`Rule::HighGroundMarginal`] | high ground, it votes marginal | mixed rain and snow |
//!
//! Why the elevation tiers: where the ground is high, 1000 hPa (and then 850 hPa) lies below
//! it and the thickness of a layer that starts there is an extrapolation by convention, not
//! air the precipitation falls through; offices then use the layer above the ground and the
//! height of the wet-bulb 0 °C level above the ground (common practice). The category says
//! which kind of precipitation the fields favour *if* precipitation falls; it does not say
//! whether any will.
//!
//! [`CAUTION`]: crate::products::guidance::CAUTION
//! [`thickness_between`]: crate::physics::column::thickness_between
//! [`StepColumns`]: crate::compute::StepColumns
//! [`FLAG_BELOW_GROUND`]: crate::query::FLAG_BELOW_GROUND
//! [`FLAG_MISSING`]: crate::query::FLAG_MISSING
//! [`GuidanceSettings::search_top_hpa`]: crate::products::guidance::GuidanceSettings::search_top_hpa
//! [`ColumnNodes::height_at_pressure`]: crate::physics::column::ColumnNodes::height_at_pressure
//! [`LEVEL_AT_SURFACE`]: crate::products::guidance::LEVEL_AT_SURFACE
//! [`LEVEL_NOT_FOUND`]: crate::products::guidance::LEVEL_NOT_FOUND
//! [`LEVEL_MULTIPLE`]: crate::products::guidance::LEVEL_MULTIPLE
//! [`LEVEL_INCOMPLETE`]: crate::products::guidance::LEVEL_INCOMPLETE
//! [`LEVEL_MISSING`]: crate::products::guidance::LEVEL_MISSING
//! [`LEVEL_NO_HUMIDITY`]: crate::products::guidance::LEVEL_NO_HUMIDITY
//! [`wet_bulb_exceeds_freezing`]: crate::physics::wetbulb::wet_bulb_exceeds_freezing
//! [`Rule`]: crate::products::guidance::Rule
//! [`GuidanceSettings::critical_gain_m_per_km`]: crate::products::guidance::GuidanceSettings::critical_gain_m_per_km
//! [`Rule::MissingTemperature`]: crate::products::guidance::Rule::MissingTemperature
//! [`Rule::WarmLayerAloft`]: crate::products::guidance::Rule::WarmLayerAloft
//! [`Rule::ColumnBelowFreezing`]: crate::products::guidance::Rule::ColumnBelowFreezing
//! [`Rule::LowGroundMissingThickness`]: crate::products::guidance::Rule::LowGroundMissingThickness
//! [`Rule::LowGroundBothCold`]: crate::products::guidance::Rule::LowGroundBothCold
//! [`Rule::LowGroundBothWarm`]: crate::products::guidance::Rule::LowGroundBothWarm
//! [`Rule::LowGroundMarginal`]: crate::products::guidance::Rule::LowGroundMarginal
//! [`Rule::NoWetBulbZero`]: crate::products::guidance::Rule::NoWetBulbZero
//! [`Rule::RaisedGroundBothCold`]: crate::products::guidance::Rule::RaisedGroundBothCold
//! [`Rule::RaisedGroundBothWarm`]: crate::products::guidance::Rule::RaisedGroundBothWarm
//! [`Rule::RaisedGroundMarginal`]: crate::products::guidance::Rule::RaisedGroundMarginal
//! [`Rule::HighGroundCold`]: crate::products::guidance::Rule::HighGroundCold
//! [`Rule::HighGroundWarm`]: crate::products::guidance::Rule::HighGroundWarm
//! [`Rule::HighGroundMarginal`]: crate::products::guidance::Rule::HighGroundMarginal

use ndarray::{s, Array2, ArrayView3};
use rayon::prelude::*;
use serde::{Deserialize, Serialize};

use crate::compute::{ColumnScratch, ComputeError, StepColumns};
use crate::grid::{locate, SampleError, Stencil};
use crate::model::{HumidityKind, Vertical};
use crate::physics::column::{thickness_between, ColumnNodes};
use crate::physics::humidity::{
    vapour_pressure_from_dewpoint, vapour_pressure_from_mixing_ratio,
    vapour_pressure_from_relative_humidity, vapour_pressure_from_specific_humidity,
    RelativeHumidityPhase, SaturationFormula,
};
use crate::physics::wetbulb::{
    psychrometric_wet_bulb_temperature, wet_bulb_exceeds_freezing, WetBulbPhase,
};
use crate::physics::Constants;
use crate::query::{LoadedCycle, FLAG_BELOW_GROUND, FLAG_MISSING};

/// The caution that every response, file and chart carrying this guidance includes.
pub const CAUTION: &str = "Guidance only: these precipitation-type and freezing-level values are \
derived automatically from model fields. They are not a forecast or a warning and do not replace \
those of official meteorological services. The thresholds must be set for the local climate and \
terrain; local practice and licensed forecasters decide.";

/// 0 °C in kelvin (the ice point; ITS-90).
const ZERO_CELSIUS_K: f64 = 273.15;

/// Layers of the guidance, Pa: (bottom, top).
const LAYER_1000_500: (f64, f64) = (100_000.0, 50_000.0);
const LAYER_1000_850: (f64, f64) = (100_000.0, 85_000.0);
const LAYER_850_700: (f64, f64) = (85_000.0, 70_000.0);

/// Zero-level flag: the lowest level above the ground is at or below 0 °C, so the level is
/// reported at the surface.
pub const LEVEL_AT_SURFACE: u8 = 1;
/// Zero-level flag: no warm-to-cold change up to the search top (value `NaN`).
pub const LEVEL_NOT_FOUND: u8 = 2;
/// Zero-level flag: more than one 0 °C level (the surface counting as one): a warm layer
/// aloft.
pub const LEVEL_MULTIPLE: u8 = 4;
/// Zero-level flag: the cycle has no humidity, so there is no wet-bulb level (value `NaN`).
pub const LEVEL_NO_HUMIDITY: u8 = 8;
/// Zero-level flag: a missing value stopped the search below the search top.
pub const LEVEL_INCOMPLETE: u8 = 16;
/// Zero-level flag: no usable level above the ground (value `NaN`).
pub const LEVEL_MISSING: u8 = 32;

/// Precipitation type the fields favour, if precipitation falls. Codes are stable (they go on
/// the wire and into files).
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash, PartialOrd, Ord, Serialize, Deserialize)]
#[repr(u8)]
pub enum PrecipitationType {
    /// Inputs missing: no category.
    Indeterminate = 0,
    /// Rain.
    Rain = 1,
    /// Mixed rain and snow (the fields are near the rain–snow threshold).
    RainSnowMix = 2,
    /// Snow.
    Snow = 3,
    /// Freezing rain or ice pellets: a warm layer aloft over a sub-freezing lowest layer.
    FreezingRainOrIcePellets = 4,
}

impl PrecipitationType {
    /// Every category, in code order.
    pub const ALL: [PrecipitationType; 5] = [
        PrecipitationType::Indeterminate,
        PrecipitationType::Rain,
        PrecipitationType::RainSnowMix,
        PrecipitationType::Snow,
        PrecipitationType::FreezingRainOrIcePellets,
    ];

    /// The category in plain trade words.
    pub fn name(self) -> &'static str {
        match self {
            PrecipitationType::Indeterminate => "indeterminate",
            PrecipitationType::Rain => "rain",
            PrecipitationType::RainSnowMix => "mixed rain and snow",
            PrecipitationType::Snow => "snow",
            PrecipitationType::FreezingRainOrIcePellets => "freezing rain or ice pellets",
        }
    }

    /// The stable code.
    pub fn code(self) -> u8 {
        self as u8
    }

    /// The category of a code, `None` for an unknown code.
    pub fn from_code(code: u8) -> Option<Self> {
        Self::ALL.get(usize::from(code)).copied()
    }
}

/// The rule of the decision table (module docs) that decided a category. Codes are stable.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash, PartialOrd, Ord, Serialize, Deserialize)]
#[repr(u8)]
pub enum Rule {
    /// 1: no usable temperature above the ground.
    MissingTemperature = 0,
    /// 2: warm layer aloft over a sub-freezing lowest level.
    WarmLayerAloft = 1,
    /// 3: the whole column above the ground at or below 0 °C.
    ColumnBelowFreezing = 2,
    /// 4: low ground, a thickness missing.
    LowGroundMissingThickness = 3,
    /// 5: low ground, 1000–500 and 1000–850 both below their critical values.
    LowGroundBothCold = 4,
    /// 6: low ground, both above.
    LowGroundBothWarm = 5,
    /// 7: low ground, near the critical values or disagreeing.
    LowGroundMarginal = 6,
    /// 8: raised or high ground without a wet-bulb 0 °C level.
    NoWetBulbZero = 7,
    /// 9: raised ground, 850–700 and the wet-bulb 0 °C height both cold.
    RaisedGroundBothCold = 8,
    /// 10: raised ground, both warm.
    RaisedGroundBothWarm = 9,
    /// 11: raised ground, marginal or disagreeing.
    RaisedGroundMarginal = 10,
    /// 12: high ground, the wet-bulb 0 °C level close above the ground.
    HighGroundCold = 11,
    /// 13: high ground, the wet-bulb 0 °C level well above the ground.
    HighGroundWarm = 12,
    /// 14: high ground, in between.
    HighGroundMarginal = 13,
}

impl Rule {
    /// Every rule, in code order.
    pub const ALL: [Rule; 14] = [
        Rule::MissingTemperature,
        Rule::WarmLayerAloft,
        Rule::ColumnBelowFreezing,
        Rule::LowGroundMissingThickness,
        Rule::LowGroundBothCold,
        Rule::LowGroundBothWarm,
        Rule::LowGroundMarginal,
        Rule::NoWetBulbZero,
        Rule::RaisedGroundBothCold,
        Rule::RaisedGroundBothWarm,
        Rule::RaisedGroundMarginal,
        Rule::HighGroundCold,
        Rule::HighGroundWarm,
        Rule::HighGroundMarginal,
    ];

    /// A short machine-friendly name.
    pub fn name(self) -> &'static str {
        match self {
            Rule::MissingTemperature => "missing-temperature",
            Rule::WarmLayerAloft => "warm-layer-aloft",
            Rule::ColumnBelowFreezing => "column-below-freezing",
            Rule::LowGroundMissingThickness => "low-ground-missing-thickness",
            Rule::LowGroundBothCold => "low-ground-both-cold",
            Rule::LowGroundBothWarm => "low-ground-both-warm",
            Rule::LowGroundMarginal => "low-ground-marginal",
            Rule::NoWetBulbZero => "no-wet-bulb-zero",
            Rule::RaisedGroundBothCold => "raised-ground-both-cold",
            Rule::RaisedGroundBothWarm => "raised-ground-both-warm",
            Rule::RaisedGroundMarginal => "raised-ground-marginal",
            Rule::HighGroundCold => "high-ground-cold",
            Rule::HighGroundWarm => "high-ground-warm",
            Rule::HighGroundMarginal => "high-ground-marginal",
        }
    }

    /// What the rule means, in one sentence.
    pub fn description(self) -> &'static str {
        match self {
            Rule::MissingTemperature => "no usable temperature above the ground",
            Rule::WarmLayerAloft => {
                "a layer warmer than 0 °C aloft over a lowest layer at or below 0 °C"
            }
            Rule::ColumnBelowFreezing => "the whole column above the ground is at or below 0 °C",
            Rule::LowGroundMissingThickness => {
                "low ground, but the 1000-500 or 1000-850 hPa thickness is missing"
            }
            Rule::LowGroundBothCold => {
                "low ground: 1000-500 and 1000-850 hPa thickness both below their critical values"
            }
            Rule::LowGroundBothWarm => {
                "low ground: 1000-500 and 1000-850 hPa thickness both above their critical values"
            }
            Rule::LowGroundMarginal => {
                "low ground: thicknesses near their critical values or disagreeing"
            }
            Rule::NoWetBulbZero => "raised or high ground, but no wet-bulb 0 °C level",
            Rule::RaisedGroundBothCold => {
                "raised ground: 850-700 hPa thickness below critical and the wet-bulb 0 °C level close above the ground"
            }
            Rule::RaisedGroundBothWarm => {
                "raised ground: 850-700 hPa thickness above critical and the wet-bulb 0 °C level well above the ground"
            }
            Rule::RaisedGroundMarginal => {
                "raised ground: 850-700 hPa thickness and wet-bulb 0 °C height near their thresholds or disagreeing"
            }
            Rule::HighGroundCold => {
                "high ground (850 hPa below it): the wet-bulb 0 °C level close above the ground"
            }
            Rule::HighGroundWarm => {
                "high ground (850 hPa below it): the wet-bulb 0 °C level well above the ground"
            }
            Rule::HighGroundMarginal => {
                "high ground (850 hPa below it): the wet-bulb 0 °C level between the snow and rain heights"
            }
        }
    }

    /// The stable code.
    pub fn code(self) -> u8 {
        self as u8
    }

    /// The rule of a code, `None` for an unknown code.
    pub fn from_code(code: u8) -> Option<Self> {
        Self::ALL.get(usize::from(code)).copied()
    }
}

/// Thresholds of the decision table. Loads from TOML (every field optional, unknown fields
/// refused); the defaults are rules of thumb, not verified local values.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct GuidanceSettings {
    /// Critical 1000–500 hPa thickness, m. Default 5400 m: rain and snow about equally likely
    /// at low elevations in North American practice (common practice, GUIDE §3; many European
    /// offices use about 5280 m).
    pub critical_1000_500_m: f64,
    /// Critical 1000–850 hPa thickness, m. Default 1300 m (common practice, GUIDE §3).
    pub critical_1000_850_m: f64,
    /// Critical 850–700 hPa thickness, m. Default 1540 m (common practice, GUIDE §3).
    pub critical_850_700_m: f64,
    /// Half-width of the marginal band about the 1000–500 critical value, m. Default 30 m:
    /// half the 60 m isoline spacing of thickness charts (GUIDE §1); a choice of this crate.
    pub margin_1000_500_m: f64,
    /// Half-width of the marginal band about the 1000–850 critical value, m. Default 7 m: the
    /// same 1.5 K of layer-mean virtual temperature as 30 m is for 1000–500, converted with
    /// the hypsometric equation (29.27 m K⁻¹ × ln(1000/850) × 1.5 K).
    pub margin_1000_850_m: f64,
    /// Half-width of the marginal band about the 850–700 critical value, m. Default 8 m (1.5 K
    /// of layer-mean virtual temperature, 29.27 m K⁻¹ × ln(850/700) × 1.5 K).
    pub margin_850_700_m: f64,
    /// Surface height below which a point is "low ground" and the 1000 hPa-based layers
    /// decide, m. Default 300 m (common practice, from memory: above a few hundred metres
    /// much of the 1000–850 hPa layer is below the ground and offices turn to 850–700 hPa and
    /// the wet-bulb 0 °C height).
    pub low_ground_max_m: f64,
    /// Rise of every critical thickness per kilometre of surface height, m km⁻¹. Default 0
    /// (no adjustment): offices that verify a rise for their terrain set it here (an
    /// elevation adjustment of the critical thickness is common practice; no single published
    /// value is relied on).
    pub critical_gain_m_per_km: f64,
    /// Wet-bulb 0 °C height above the ground at or below which snow is favoured, m. Default
    /// 300 m (common practice, from memory: falling snow melts over a few hundred metres below
    /// the wet-bulb 0 °C level).
    pub wet_bulb_zero_snow_max_agl_m: f64,
    /// Wet-bulb 0 °C height above the ground at or above which rain is favoured, m. Default
    /// 600 m (common practice, from memory; twice the snow height).
    pub wet_bulb_zero_rain_min_agl_m: f64,
    /// Least excess over 0 °C of the warmest level of a layer aloft for the freezing rain or
    /// ice pellets rule, K. Default 0.5 K: smaller excesses are within the temperature
    /// uncertainty of a model or a radiosonde (a choice of this crate).
    pub warm_layer_min_excess_k: f64,
    /// Highest level searched for 0 °C levels, hPa. Default 200 hPa: above any tropospheric
    /// freezing level and below the warm upper stratosphere, which must not count as a warm
    /// layer aloft.
    pub search_top_hpa: f64,
}

impl Default for GuidanceSettings {
    fn default() -> Self {
        Self {
            critical_1000_500_m: 5400.0,
            critical_1000_850_m: 1300.0,
            critical_850_700_m: 1540.0,
            margin_1000_500_m: 30.0,
            margin_1000_850_m: 7.0,
            margin_850_700_m: 8.0,
            low_ground_max_m: 300.0,
            critical_gain_m_per_km: 0.0,
            wet_bulb_zero_snow_max_agl_m: 300.0,
            wet_bulb_zero_rain_min_agl_m: 600.0,
            warm_layer_min_excess_k: 0.5,
            search_top_hpa: 200.0,
        }
    }
}

impl GuidanceSettings {
    /// Every setting on one line as `name=value` pairs, names in alphabetical order (for
    /// logs: an office must be able to see every threshold, margin and tier in force).
    pub fn one_line(&self) -> String {
        match serde_json::to_value(self) {
            Ok(serde_json::Value::Object(fields)) => fields
                .iter()
                .map(|(k, v)| format!("{k}={v}"))
                .collect::<Vec<_>>()
                .join(" "),
            _ => format!("{self:?}"),
        }
    }

    /// Reads settings from TOML text (missing fields take their defaults) and validates them.
    pub fn from_toml_str(text: &str) -> Result<Self, GuidanceError> {
        let settings: Self = toml::from_str(text).map_err(|e| GuidanceError::SettingsToml {
            message: e.to_string().trim_end().to_string(),
        })?;
        settings.validate()?;
        Ok(settings)
    }

    /// Reads settings from the TOML file at `path`, as [`GuidanceSettings::from_toml_str`];
    /// every error names the file.
    pub fn from_toml_file(path: &std::path::Path) -> Result<Self, GuidanceError> {
        let file = path.display().to_string();
        let text = std::fs::read_to_string(path).map_err(|e| GuidanceError::SettingsFile {
            file: file.clone(),
            message: format!("cannot read it: {e}"),
        })?;
        Self::from_toml_str(&text).map_err(|e| GuidanceError::SettingsFile {
            file,
            message: e.to_string(),
        })
    }

    /// Checks that every threshold is a finite number in its range.
    pub fn validate(&self) -> Result<(), GuidanceError> {
        let bad = |field: &'static str, value: f64, expected: &'static str| {
            Err(GuidanceError::Setting {
                field,
                value,
                expected,
            })
        };
        for (field, value) in [
            ("critical_1000_500_m", self.critical_1000_500_m),
            ("critical_1000_850_m", self.critical_1000_850_m),
            ("critical_850_700_m", self.critical_850_700_m),
        ] {
            if !(value.is_finite() && value > 0.0) {
                return bad(field, value, "a positive number of metres");
            }
        }
        for (field, value) in [
            ("margin_1000_500_m", self.margin_1000_500_m),
            ("margin_1000_850_m", self.margin_1000_850_m),
            ("margin_850_700_m", self.margin_850_700_m),
            (
                "wet_bulb_zero_snow_max_agl_m",
                self.wet_bulb_zero_snow_max_agl_m,
            ),
            ("warm_layer_min_excess_k", self.warm_layer_min_excess_k),
        ] {
            if !(value.is_finite() && value >= 0.0) {
                return bad(field, value, "a finite number, zero or more");
            }
        }
        if !self.low_ground_max_m.is_finite() {
            return bad(
                "low_ground_max_m",
                self.low_ground_max_m,
                "a finite height in metres",
            );
        }
        if !self.critical_gain_m_per_km.is_finite() {
            return bad(
                "critical_gain_m_per_km",
                self.critical_gain_m_per_km,
                "a finite number of metres per kilometre",
            );
        }
        if !(self.wet_bulb_zero_rain_min_agl_m.is_finite()
            && self.wet_bulb_zero_rain_min_agl_m >= self.wet_bulb_zero_snow_max_agl_m)
        {
            return bad(
                "wet_bulb_zero_rain_min_agl_m",
                self.wet_bulb_zero_rain_min_agl_m,
                "a height at or above wet_bulb_zero_snow_max_agl_m",
            );
        }
        if !(self.search_top_hpa.is_finite()
            && self.search_top_hpa > 0.0
            && self.search_top_hpa < 1100.0)
        {
            return bad(
                "search_top_hpa",
                self.search_top_hpa,
                "a pressure between 0 and 1100 hPa",
            );
        }
        Ok(())
    }
}

/// Why guidance could not be made.
#[derive(Debug, thiserror::Error)]
pub enum GuidanceError {
    /// A threshold out of its range.
    #[error("guidance setting '{field}' is {value}: expected {expected}")]
    Setting {
        /// The setting's name (its TOML key).
        field: &'static str,
        /// The value given.
        value: f64,
        /// What is accepted.
        expected: &'static str,
    },
    /// The settings text is not valid TOML for [`GuidanceSettings`].
    #[error("guidance settings: {message}")]
    SettingsToml {
        /// The parser's message, naming the line and key.
        message: String,
    },
    /// A settings file that cannot be read or used.
    #[error("'{file}': {message}")]
    SettingsFile {
        /// The file.
        file: String,
        /// What is wrong with it: the reading or the settings error.
        message: String,
    },
    /// The member is not in the cycle.
    #[error("member {member} is not in cycle '{cycle}', which has {members} member(s)")]
    Member {
        /// The cycle's id.
        cycle: String,
        /// The member asked for.
        member: usize,
        /// How many the cycle has.
        members: usize,
    },
    /// The time step is not in the cycle.
    #[error("time step {time_index} is not in cycle '{cycle}', which has {times} time step(s)")]
    TimeIndex {
        /// The cycle's id.
        cycle: String,
        /// The time index asked for.
        time_index: usize,
        /// How many the cycle has.
        times: usize,
    },
    /// The columns could not be rebuilt.
    #[error("{0}")]
    Compute(#[from] ComputeError),
    /// The position is not on the grid.
    #[error("position: {0}")]
    Position(#[from] SampleError),
    /// A grid row or column index beyond the grid.
    #[error("{axis} {index} is outside the grid, which has {len}")]
    GridIndex {
        /// `row` or `column`.
        axis: &'static str,
        /// The index asked for.
        index: usize,
        /// How many rows or columns the grid has.
        len: usize,
    },
}

/// A thickness with its flags.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct LayerValue {
    /// Geopotential metres; `NaN` where masked.
    pub value_m: f64,
    /// [`FLAG_BELOW_GROUND`] and [`FLAG_MISSING`] bits.
    pub flags: u8,
}

impl LayerValue {
    /// A thickness known to lie wholly above the ground.
    pub fn above_ground(value_m: f64) -> Self {
        Self {
            value_m,
            flags: if value_m.is_finite() { 0 } else { FLAG_MISSING },
        }
    }
}

/// What kind of 0 °C level a column has.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
pub enum ZeroLevelKind {
    /// A warm-to-cold change above the lowest level above the ground.
    Crossing,
    /// The lowest level above the ground is at or below 0 °C.
    AtSurface,
    /// Warm up to the search top.
    NotFound,
    /// No usable level above the ground.
    Missing,
    /// No humidity in the cycle (wet-bulb level only).
    NoHumidity,
}

/// One 0 °C level (of temperature or of wet-bulb temperature) of a column.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct ZeroLevel {
    /// What was found.
    pub kind: ZeroLevelKind,
    /// Geopotential height above mean sea level, m; `NaN` unless `Crossing` or `AtSurface`.
    pub height_m: f64,
    /// Height above the ground, m; `NaN` without surface fields.
    pub height_agl_m: f64,
    /// Pressure of the level, Pa.
    pub pressure_pa: f64,
    /// Number of 0 °C levels up to the search top (the surface counting as one when the
    /// level is at the surface).
    pub count: u8,
    /// When the level is at the surface: how much the warmest level above exceeds 0 °C, K
    /// (0 when none does). `NaN` otherwise, and for wet-bulb levels (not computed).
    pub warm_aloft_excess_k: f64,
    /// A missing value stopped the search before the search top.
    pub incomplete: bool,
}

impl ZeroLevel {
    fn empty(kind: ZeroLevelKind) -> Self {
        Self {
            kind,
            height_m: f64::NAN,
            height_agl_m: f64::NAN,
            pressure_pa: f64::NAN,
            count: 0,
            warm_aloft_excess_k: f64::NAN,
            incomplete: false,
        }
    }

    /// The level of a cycle without humidity (wet-bulb only).
    pub fn no_humidity() -> Self {
        Self::empty(ZeroLevelKind::NoHumidity)
    }

    /// The `LEVEL_*` flag bits of this level.
    pub fn flags(&self) -> u8 {
        let mut f = match self.kind {
            ZeroLevelKind::Crossing => 0,
            ZeroLevelKind::AtSurface => LEVEL_AT_SURFACE,
            ZeroLevelKind::NotFound => LEVEL_NOT_FOUND,
            ZeroLevelKind::Missing => LEVEL_MISSING,
            ZeroLevelKind::NoHumidity => LEVEL_NO_HUMIDITY,
        };
        if self.count > 1 {
            f |= LEVEL_MULTIPLE;
        }
        if self.incomplete {
            f |= LEVEL_INCOMPLETE;
        }
        f
    }
}

/// What the decision table reads for one column.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct GuidanceInputs {
    /// 1000–500 hPa thickness.
    pub thickness_1000_500: LayerValue,
    /// 1000–850 hPa thickness.
    pub thickness_1000_850: LayerValue,
    /// 850–700 hPa thickness.
    pub thickness_850_700: LayerValue,
    /// Surface geopotential height, m; `NaN` without surface fields (then: low ground).
    pub surface_height_m: f64,
    /// The 0 °C level.
    pub freezing_level: ZeroLevel,
    /// The wet-bulb 0 °C level.
    pub wet_bulb_zero: ZeroLevel,
}

/// Guidance for one column: the inputs of the table, the category and the deciding rule.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct ColumnGuidance {
    /// The quantities the table read.
    pub inputs: GuidanceInputs,
    /// The category.
    pub category: PrecipitationType,
    /// The rule that decided it.
    pub rule: Rule,
}

/// One column's data for [`column_guidance`]. The levels are bottom-up and `nodes` must be
/// the same column built by [`ColumnNodes::isobaric`] or [`ColumnNodes::hybrid`] (or
/// [`StepColumns::build`]).
#[derive(Clone, Copy, Debug)]
pub struct ColumnInput<'a> {
    /// Pressure of each level, Pa, strictly decreasing.
    pub pressure_pa: &'a [f64],
    /// Air temperature of each level, K (`NaN` = missing).
    pub temperature_k: &'a [f64],
    /// Vapour pressure of each level, Pa (`NaN` = missing); `None` when there is no humidity.
    pub vapour_pressure_pa: Option<&'a [f64]>,
    /// The built column, for heights at any pressure.
    pub nodes: &'a ColumnNodes,
    /// The constants the column was built with.
    pub constants: &'a Constants,
    /// Surface pressure (Pa) and surface geopotential height (m), when known.
    pub surface: Option<(f64, f64)>,
    /// Saturation formula that the humidity was converted with, for the wet-bulb equation.
    pub saturation_formula: SaturationFormula,
}

/// Warm or cold at one level, and the value whose 0 °C crossing is sought.
trait LevelSign {
    /// `Some(true)` warm, `Some(false)` cold, `None` missing.
    fn warm(&self, k: usize) -> Option<bool>;
    /// The value at level `k`, K (only asked at levels where `warm` was `Some`).
    fn value(&self, k: usize) -> f64;
    /// Whether the warm excess aloft is tracked.
    fn tracks_excess(&self) -> bool;
}

struct TemperatureSign<'a>(&'a [f64]);

impl LevelSign for TemperatureSign<'_> {
    fn warm(&self, k: usize) -> Option<bool> {
        let t = self.0[k];
        t.is_finite().then_some(t > ZERO_CELSIUS_K)
    }
    fn value(&self, k: usize) -> f64 {
        self.0[k]
    }
    fn tracks_excess(&self) -> bool {
        true
    }
}

struct WetBulbSign<'a> {
    t: &'a [f64],
    p: &'a [f64],
    e: &'a [f64],
    formula: SaturationFormula,
}

impl LevelSign for WetBulbSign<'_> {
    fn warm(&self, k: usize) -> Option<bool> {
        wet_bulb_exceeds_freezing(self.t[k], self.p[k], self.e[k])
    }
    fn value(&self, k: usize) -> f64 {
        psychrometric_wet_bulb_temperature(
            self.t[k],
            self.p[k],
            self.e[k],
            self.formula,
            WetBulbPhase::Water,
        )
    }
    fn tracks_excess(&self) -> bool {
        false
    }
}

/// Finds the 0 °C level of one profile (module docs, conventions).
fn zero_level(input: &ColumnInput<'_>, sign: &dyn LevelSign, top_pa: f64) -> ZeroLevel {
    let p = input.pressure_pa;
    let n = p.len().min(input.temperature_k.len());
    let above = |k: usize| {
        p[k].is_finite()
            && input
                .surface
                .is_none_or(|(ps, _)| ps.is_nan() || p[k] <= ps)
            && p[k] >= top_pa
    };
    let first_above = (0..n).find(|&k| above(k));
    let Some(first_above) = first_above else {
        return ZeroLevel::empty(ZeroLevelKind::Missing);
    };
    let Some((start, start_warm)) = (first_above..n)
        .take_while(|&k| above(k))
        .find_map(|k| sign.warm(k).map(|w| (k, w)))
    else {
        return ZeroLevel::empty(ZeroLevelKind::Missing);
    };
    let mut incomplete = start != first_above;
    let mut crossings = 0u8;
    let mut lowest: Option<usize> = None; // index j of the lowest warm(j) → cold(j+1) change
    let mut excess = 0.0_f64;
    let mut prev = start_warm;
    let mut k = start + 1;
    while k < n && above(k) {
        let Some(warm) = sign.warm(k) else {
            incomplete = true;
            break;
        };
        if warm != prev {
            crossings = crossings.saturating_add(1);
            if prev && lowest.is_none() {
                lowest = Some(k - 1);
            }
        }
        if !start_warm && warm && sign.tracks_excess() {
            excess = excess.max(sign.value(k) - ZERO_CELSIUS_K);
        }
        prev = warm;
        k += 1;
    }
    let c = input.constants;
    let mut level = ZeroLevel::empty(ZeroLevelKind::Crossing);
    level.incomplete = incomplete;
    if !start_warm {
        let (pz, z) = match input.surface {
            Some((ps, zs)) => (ps, zs),
            None => {
                let z = input
                    .nodes
                    .height_at_pressure(p[start], c)
                    .map_or(f64::NAN, |h| h.height_m);
                (p[start], z)
            }
        };
        level.kind = ZeroLevelKind::AtSurface;
        level.height_m = z;
        level.pressure_pa = pz;
        level.height_agl_m = if input.surface.is_some() {
            0.0
        } else {
            f64::NAN
        };
        level.count = crossings.saturating_add(1);
        if sign.tracks_excess() {
            level.warm_aloft_excess_k = excess;
        }
        return level;
    }
    let Some(j) = lowest else {
        let kind = if incomplete {
            ZeroLevelKind::Missing
        } else {
            ZeroLevelKind::NotFound
        };
        let mut none = ZeroLevel::empty(kind);
        none.incomplete = incomplete;
        return none;
    };
    let (x1, x2) = (sign.value(j), sign.value(j + 1));
    // Constant lapse rate between the two levels, as in the column's own layers: ln T is
    // linear in ln p (exact for a polytropic layer such as the standard troposphere).
    let frac = if x1 > 0.0 && x2 > 0.0 && x1 != x2 {
        ((ZERO_CELSIUS_K / x1).ln() / (x2 / x1).ln()).clamp(0.0, 1.0)
    } else {
        0.0
    };
    let pz = (p[j].ln() + frac * (p[j + 1].ln() - p[j].ln())).exp();
    let z = input
        .nodes
        .height_at_pressure(pz, c)
        .map_or(f64::NAN, |h| h.height_m);
    if !(frac.is_finite() && z.is_finite()) {
        let mut none = ZeroLevel::empty(ZeroLevelKind::Missing);
        none.incomplete = true;
        return none;
    }
    level.height_m = z;
    level.pressure_pa = pz;
    level.height_agl_m = input.surface.map_or(f64::NAN, |(_, zs)| z - zs);
    level.count = crossings;
    level
}

fn layer_value(input: &ColumnInput<'_>, (bottom, top): (f64, f64)) -> LayerValue {
    let below = input.surface.is_some_and(|(ps, _)| bottom > ps);
    match thickness_between(input.nodes, bottom, top, input.constants) {
        Some(v) if v.is_finite() => LayerValue {
            value_m: v,
            flags: if below { FLAG_BELOW_GROUND } else { 0 },
        },
        _ => LayerValue {
            value_m: f64::NAN,
            flags: FLAG_MISSING | if below { FLAG_BELOW_GROUND } else { 0 },
        },
    }
}

/// Guidance for one column: thicknesses, both 0 °C levels, category and rule.
///
/// # Method
/// See the module docs: thickness by [`thickness_between`] on `input.nodes`; 0 °C levels by
/// the upward search with crossings interpolated in `ln p` with a constant lapse rate and heights from
/// [`ColumnNodes::height_at_pressure`]; then [`classify`].
pub fn column_guidance(input: &ColumnInput<'_>, settings: &GuidanceSettings) -> ColumnGuidance {
    let top_pa = settings.search_top_hpa * 100.0;
    let freezing_level = zero_level(input, &TemperatureSign(input.temperature_k), top_pa);
    let wet_bulb_zero = match input.vapour_pressure_pa {
        Some(e) if e.len() >= input.pressure_pa.len() && input.temperature_k.len() >= e.len() => {
            let sign = WetBulbSign {
                t: input.temperature_k,
                p: input.pressure_pa,
                e,
                formula: input.saturation_formula,
            };
            zero_level(input, &sign, top_pa)
        }
        Some(_) => ZeroLevel::empty(ZeroLevelKind::Missing),
        None => ZeroLevel::no_humidity(),
    };
    let inputs = GuidanceInputs {
        thickness_1000_500: layer_value(input, LAYER_1000_500),
        thickness_1000_850: layer_value(input, LAYER_1000_850),
        thickness_850_700: layer_value(input, LAYER_850_700),
        surface_height_m: input.surface.map_or(f64::NAN, |(_, zs)| zs),
        freezing_level,
        wet_bulb_zero,
    };
    let (category, rule) = classify(&inputs, settings);
    ColumnGuidance {
        inputs,
        category,
        rule,
    }
}

/// A vote of one quantity against its threshold.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
enum Vote {
    Cold,
    Warm,
    Marginal,
}

fn thickness_vote(value: f64, critical: f64, margin: f64) -> Option<Vote> {
    if !value.is_finite() {
        None
    } else if value < critical - margin {
        Some(Vote::Cold)
    } else if value > critical + margin {
        Some(Vote::Warm)
    } else {
        Some(Vote::Marginal)
    }
}

fn wet_bulb_vote(level: &ZeroLevel, s: &GuidanceSettings) -> Option<Vote> {
    let agl = match level.kind {
        ZeroLevelKind::AtSurface => 0.0,
        ZeroLevelKind::Crossing => level.height_agl_m,
        ZeroLevelKind::NotFound => return Some(Vote::Warm),
        ZeroLevelKind::Missing | ZeroLevelKind::NoHumidity => return None,
    };
    if !agl.is_finite() {
        None
    } else if agl <= s.wet_bulb_zero_snow_max_agl_m {
        Some(Vote::Cold)
    } else if agl >= s.wet_bulb_zero_rain_min_agl_m {
        Some(Vote::Warm)
    } else {
        Some(Vote::Marginal)
    }
}

/// Applies the decision table of the module docs to one column's inputs.
pub fn classify(inputs: &GuidanceInputs, s: &GuidanceSettings) -> (PrecipitationType, Rule) {
    use PrecipitationType as P;
    let fz = &inputs.freezing_level;
    match fz.kind {
        ZeroLevelKind::Missing | ZeroLevelKind::NoHumidity => {
            return (P::Indeterminate, Rule::MissingTemperature)
        }
        ZeroLevelKind::AtSurface => {
            if fz.count > 1 && fz.warm_aloft_excess_k >= s.warm_layer_min_excess_k {
                return (P::FreezingRainOrIcePellets, Rule::WarmLayerAloft);
            }
            if fz.count == 1 && !fz.incomplete {
                return (P::Snow, Rule::ColumnBelowFreezing);
            }
        }
        ZeroLevelKind::Crossing | ZeroLevelKind::NotFound => {}
    }
    let zs = inputs.surface_height_m;
    let gain = if zs.is_finite() {
        s.critical_gain_m_per_km * zs.max(0.0) / 1000.0
    } else {
        0.0
    };
    let combine = |a: Vote, b: Vote, cold: Rule, warm: Rule, marginal: Rule| match (a, b) {
        (Vote::Cold, Vote::Cold) => (P::Snow, cold),
        (Vote::Warm, Vote::Warm) => (P::Rain, warm),
        _ => (P::RainSnowMix, marginal),
    };
    let low_ground = !zs.is_finite() || zs < s.low_ground_max_m;
    if low_ground {
        let a = thickness_vote(
            inputs.thickness_1000_500.value_m,
            s.critical_1000_500_m + gain,
            s.margin_1000_500_m,
        );
        let b = thickness_vote(
            inputs.thickness_1000_850.value_m,
            s.critical_1000_850_m + gain,
            s.margin_1000_850_m,
        );
        return match (a, b) {
            (Some(a), Some(b)) => combine(
                a,
                b,
                Rule::LowGroundBothCold,
                Rule::LowGroundBothWarm,
                Rule::LowGroundMarginal,
            ),
            _ => (P::Indeterminate, Rule::LowGroundMissingThickness),
        };
    }
    let Some(w) = wet_bulb_vote(&inputs.wet_bulb_zero, s) else {
        return (P::Indeterminate, Rule::NoWetBulbZero);
    };
    let t850 = &inputs.thickness_850_700;
    let usable_850 = t850.value_m.is_finite() && t850.flags & FLAG_BELOW_GROUND == 0;
    if usable_850 {
        if let Some(t) = thickness_vote(
            t850.value_m,
            s.critical_850_700_m + gain,
            s.margin_850_700_m,
        ) {
            return combine(
                t,
                w,
                Rule::RaisedGroundBothCold,
                Rule::RaisedGroundBothWarm,
                Rule::RaisedGroundMarginal,
            );
        }
    }
    match w {
        Vote::Cold => (P::Snow, Rule::HighGroundCold),
        Vote::Warm => (P::Rain, Rule::HighGroundWarm),
        Vote::Marginal => (P::RainSnowMix, Rule::HighGroundMarginal),
    }
}

// ---------------------------------------------------------------------------------------------
// Whole grids and points of a loaded cycle.
// ---------------------------------------------------------------------------------------------

/// Guidance on the whole grid of one (member, time) step ([`guidance_grid`]), in the file's
/// row and column order, or on chosen rows and columns of it ([`guidance_on`]), in the order
/// chosen.
#[derive(Clone, Debug)]
pub struct GuidanceGrid {
    /// Index of the time step.
    pub time_index: usize,
    /// Ensemble member.
    pub member: usize,
    /// Lead time, seconds after the reference time.
    pub lead_time_s: i64,
    /// Valid time, seconds since the Unix epoch, when the cycle has a reference time.
    pub valid_time_unix_s: Option<i64>,
    /// Latitudes of the rows, degrees north.
    pub latitudes: Vec<f64>,
    /// Longitudes of the columns, degrees east.
    pub longitudes: Vec<f64>,
    /// 1000–500 hPa thickness, m, `[row, col]`; `NaN` where masked.
    pub thickness_1000_500: Array2<f32>,
    /// 1000–850 hPa thickness, m.
    pub thickness_1000_850: Array2<f32>,
    /// 850–700 hPa thickness, m.
    pub thickness_850_700: Array2<f32>,
    /// [`FLAG_BELOW_GROUND`] / [`FLAG_MISSING`] bits of the 1000–500 thickness.
    pub thickness_1000_500_flags: Array2<u8>,
    /// Flags of the 1000–850 thickness.
    pub thickness_1000_850_flags: Array2<u8>,
    /// Flags of the 850–700 thickness.
    pub thickness_850_700_flags: Array2<u8>,
    /// Height of the 0 °C level, geopotential metres above mean sea level.
    pub freezing_level_m: Array2<f32>,
    /// Height of the 0 °C level above the ground, m (`NaN` without surface fields).
    pub freezing_level_agl_m: Array2<f32>,
    /// `LEVEL_*` bits of the 0 °C level.
    pub freezing_level_flags: Array2<u8>,
    /// Height of the wet-bulb 0 °C level, geopotential metres above mean sea level.
    pub wet_bulb_zero_m: Array2<f32>,
    /// Height of the wet-bulb 0 °C level above the ground, m.
    pub wet_bulb_zero_agl_m: Array2<f32>,
    /// `LEVEL_*` bits of the wet-bulb 0 °C level.
    pub wet_bulb_zero_flags: Array2<u8>,
    /// [`PrecipitationType`] codes.
    pub category: Array2<u8>,
    /// [`Rule`] codes.
    pub rule: Array2<u8>,
    /// The settings used.
    pub settings: GuidanceSettings,
    /// What the run noticed (no humidity, no surface fields, levels lacking humidity), and
    /// the method, in sentences.
    pub notes: Vec<String>,
    /// [`CAUTION`], carried with the data.
    pub caution: &'static str,
}

/// Points per category and per rule.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct GuidanceSummary {
    /// Every category with its number of points, in code order.
    pub categories: Vec<(PrecipitationType, usize)>,
    /// Every rule with its number of points, in code order.
    pub rules: Vec<(Rule, usize)>,
    /// Points in the grid.
    pub points: usize,
}

impl GuidanceSummary {
    /// Points of one category.
    pub fn count(&self, category: PrecipitationType) -> usize {
        self.categories
            .iter()
            .find(|(c, _)| *c == category)
            .map_or(0, |(_, n)| *n)
    }

    /// Points decided by one rule.
    pub fn rule_count(&self, rule: Rule) -> usize {
        self.rules
            .iter()
            .find(|(r, _)| *r == rule)
            .map_or(0, |(_, n)| *n)
    }
}

impl GuidanceGrid {
    /// Points per category and per rule.
    pub fn summary(&self) -> GuidanceSummary {
        let mut categories = [0usize; PrecipitationType::ALL.len()];
        let mut rules = [0usize; Rule::ALL.len()];
        for (&c, &r) in self.category.iter().zip(self.rule.iter()) {
            if let Some(n) = categories.get_mut(usize::from(c)) {
                *n += 1;
            }
            if let Some(n) = rules.get_mut(usize::from(r)) {
                *n += 1;
            }
        }
        GuidanceSummary {
            categories: PrecipitationType::ALL
                .iter()
                .zip(categories)
                .map(|(&c, n)| (c, n))
                .collect(),
            rules: Rule::ALL.iter().zip(rules).map(|(&r, n)| (r, n)).collect(),
            points: self.category.len(),
        }
    }
}

/// Guidance at one position.
#[derive(Clone, Debug)]
pub struct PointGuidance {
    /// Latitude asked for, degrees north.
    pub latitude: f64,
    /// Longitude asked for, degrees east.
    pub longitude: f64,
    /// Row and column of the nearest grid point (its column gives the category).
    pub nearest: (usize, usize),
    /// Bilinear 1000–500 hPa thickness, m (flags: OR over the corners with weight).
    pub thickness_1000_500: LayerValue,
    /// Bilinear 1000–850 hPa thickness, m.
    pub thickness_1000_850: LayerValue,
    /// Bilinear 850–700 hPa thickness, m.
    pub thickness_850_700: LayerValue,
    /// Bilinear 0 °C level height, m above mean sea level (`NaN` when a weighted corner has
    /// none).
    pub freezing_level_m: f64,
    /// Bilinear 0 °C level height above the ground, m.
    pub freezing_level_agl_m: f64,
    /// Bilinear wet-bulb 0 °C level height, m above mean sea level.
    pub wet_bulb_zero_m: f64,
    /// Bilinear wet-bulb 0 °C level height above the ground, m.
    pub wet_bulb_zero_agl_m: f64,
    /// The nearest column's guidance: its levels, flags, category and rule.
    pub nearest_column: ColumnGuidance,
    /// [`CAUTION`], carried with the data.
    pub caution: &'static str,
}

/// The columns of one step, with what the guidance needs beside them.
struct StepGuidance<'a> {
    step: StepColumns<'a>,
    temperature: ArrayView3<'a, f32>,
    humidity: Option<(HumidityKind, ArrayView3<'a, f32>)>,
    missing_humidity: Vec<bool>,
    formula: SaturationFormula,
    rh_phase: RelativeHumidityPhase,
    constants: Constants,
    settings: &'a GuidanceSettings,
    /// Levels a column needs, counted from the ground ([`StepColumns::build_lowest`]): up to
    /// the lowest one at or above the highest pressure the guidance reads, the search top
    /// or the 500 hPa of the 1000–500 hPa thickness. Nothing above is read: the 0 °C
    /// searches stop below the search top, and the thicknesses' bounds lie below 500 hPa.
    wanted: usize,
}

/// Per-thread buffers for [`StepGuidance::column`].
struct Buffers {
    scratch: ColumnScratch,
    t: Vec<f64>,
    e: Vec<f64>,
}

impl<'a> StepGuidance<'a> {
    fn new(
        lc: &'a LoadedCycle,
        time_index: usize,
        member: usize,
        settings: &'a GuidanceSettings,
    ) -> Result<Self, GuidanceError> {
        settings.validate()?;
        let cycle = &lc.cycle;
        if member >= cycle.members {
            return Err(GuidanceError::Member {
                cycle: lc.id.clone(),
                member,
                members: cycle.members,
            });
        }
        let times = cycle.lead_times_s.len();
        if time_index >= times {
            return Err(GuidanceError::TimeIndex {
                cycle: lc.id.clone(),
                time_index,
                times,
            });
        }
        let step = StepColumns::new(cycle, &lc.config, member, time_index)?;
        let levels = cycle.vertical.levels();
        let highest_read_pa = [LAYER_1000_500, LAYER_1000_850, LAYER_850_700]
            .iter()
            .map(|&(_, top)| top)
            .fold(settings.search_top_hpa * 100.0, f64::min);
        let wanted = match &cycle.vertical {
            Vertical::Isobaric { pressure_pa } => {
                ColumnNodes::levels_for_pressure(pressure_pa, highest_read_pa)
            }
            Vertical::Hybrid { .. } => levels,
        };
        let mut missing_humidity = vec![false; levels];
        if let Some(h) = &cycle.humidity {
            for &k in &h.missing_levels {
                if let Some(m) = missing_humidity.get_mut(k) {
                    *m = true;
                }
            }
        }
        Ok(Self {
            step,
            temperature: cycle.temperature.slice(s![member, time_index, .., .., ..]),
            humidity: cycle
                .humidity
                .as_ref()
                .map(|h| (h.kind, h.values.slice(s![member, time_index, .., .., ..]))),
            missing_humidity,
            formula: lc.config.saturation_formula,
            rh_phase: lc.config.rh_phase,
            constants: cycle.constants,
            settings,
            wanted,
        })
    }

    fn buffers(&self) -> Buffers {
        let levels = self.missing_humidity.len();
        Buffers {
            scratch: ColumnScratch::new(levels),
            t: vec![f64::NAN; levels],
            e: vec![f64::NAN; levels],
        }
    }

    fn column(&self, row: usize, col: usize, b: &mut Buffers) -> ColumnGuidance {
        let built = self
            .step
            .build_lowest(row, col, &mut b.scratch, self.wanted);
        // Levels above those built are never read (see `wanted`); `NaN` there all the same.
        b.t[built..].fill(f64::NAN);
        b.e[built..].fill(f64::NAN);
        let eps = self.constants.molar_mass_ratio;
        for k in 0..built {
            let t = f64::from(self.temperature[[k, row, col]]);
            b.t[k] = t;
            let p = b.scratch.pressure[k];
            b.e[k] = match self.humidity {
                None => f64::NAN,
                Some(_) if self.missing_humidity[k] => f64::NAN,
                Some((kind, values)) => {
                    let h = f64::from(values[[k, row, col]]);
                    match kind {
                        HumidityKind::SpecificHumidity => {
                            vapour_pressure_from_specific_humidity(h, p, eps)
                        }
                        HumidityKind::MixingRatio => vapour_pressure_from_mixing_ratio(h, p, eps),
                        HumidityKind::RelativeHumidity => vapour_pressure_from_relative_humidity(
                            h,
                            t,
                            self.formula,
                            self.rh_phase,
                        ),
                        HumidityKind::DewPoint => vapour_pressure_from_dewpoint(h, self.formula),
                    }
                }
            };
        }
        let input = ColumnInput {
            pressure_pa: &b.scratch.pressure,
            temperature_k: &b.t,
            vapour_pressure_pa: self.humidity.map(|_| b.e.as_slice()),
            nodes: &b.scratch.nodes,
            constants: &self.constants,
            surface: self.step.surface(row, col),
            saturation_formula: self.formula,
        };
        column_guidance(&input, self.settings)
    }
}

fn notes(lc: &LoadedCycle) -> Vec<String> {
    let cycle = &lc.cycle;
    let mut notes = vec![
        "0 °C and wet-bulb 0 °C levels: searched upward from the lowest level above the ground, \
         crossings interpolated in ln p with a constant lapse rate, heights from the column's \
         constant-lapse-rate layers; wet-bulb temperature by the WMO-No. 8 psychrometric equation (liquid bulb)"
            .to_string(),
    ];
    match &cycle.humidity {
        None => notes.push(
            "the cycle has no humidity: the wet-bulb 0 °C level is not available, and points on \
             raised or high ground are indeterminate"
                .to_string(),
        ),
        Some(h) if !h.missing_levels.is_empty() => {
            let hpa: Vec<String> = match &cycle.vertical {
                Vertical::Isobaric { pressure_pa } => h
                    .missing_levels
                    .iter()
                    .filter_map(|&k| pressure_pa.get(k))
                    .map(|p| format!("{}", p / 100.0))
                    .collect(),
                Vertical::Hybrid { .. } => h
                    .missing_levels
                    .iter()
                    .map(|k| format!("level {k}"))
                    .collect(),
            };
            notes.push(format!(
                "the file has no humidity at {} hPa: the wet-bulb search stops there",
                hpa.join(", ")
            ));
        }
        Some(_) => {}
    }
    if cycle.surface.is_none() {
        notes.push(
            "the cycle has no surface fields: every point is treated as low ground, the lowest \
             level with data stands for the ground, and heights above the ground are not available"
                .to_string(),
        );
    }
    notes
}

/// Guidance on every grid point of member `member`, time step `time_index`.
///
/// Rows are computed in parallel (rayon), each thread reusing one column buffer.
pub fn guidance_grid(
    lc: &LoadedCycle,
    time_index: usize,
    member: usize,
    settings: &GuidanceSettings,
) -> Result<GuidanceGrid, GuidanceError> {
    let all_rows: Vec<usize> = (0..lc.cycle.grid.rows()).collect();
    let all_cols: Vec<usize> = (0..lc.cycle.grid.cols()).collect();
    guidance_on(lc, (time_index, member), settings, &all_rows, &all_cols)
}

/// Guidance at the grid points of the chosen `rows` and `cols` (indices into the cycle's
/// grid, in any order; each answer row and column in the order given) of step
/// (`time_index`, `member`): what [`guidance_grid`] gives at those points, computed only
/// there, so that an area costs its own columns rather than the whole grid's.
///
/// # Errors
/// As [`guidance_grid`]; also [`GuidanceError::GridIndex`] for a row or column outside the
/// grid.
pub fn guidance_on(
    lc: &LoadedCycle,
    (time_index, member): (usize, usize),
    settings: &GuidanceSettings,
    rows: &[usize],
    cols: &[usize],
) -> Result<GuidanceGrid, GuidanceError> {
    let sg = StepGuidance::new(lc, time_index, member, settings)?;
    let grid = &lc.cycle.grid;
    for (axis, indices, len) in [("row", rows, grid.rows()), ("column", cols, grid.cols())] {
        if let Some(&index) = indices.iter().find(|&&i| i >= len) {
            return Err(GuidanceError::GridIndex { axis, index, len });
        }
    }
    let per_row: Vec<Vec<ColumnGuidance>> = rows
        .par_iter()
        .map_init(
            || sg.buffers(),
            |b, &row| cols.iter().map(|&col| sg.column(row, col, b)).collect(),
        )
        .collect();
    let (rows_n, cols_n) = (rows.len(), cols.len());
    let f32_grid = || Array2::<f32>::from_elem((rows_n, cols_n), f32::NAN);
    let u8_grid = || Array2::<u8>::zeros((rows_n, cols_n));
    let mut g = GuidanceGrid {
        time_index,
        member,
        lead_time_s: lc.cycle.lead_times_s[time_index],
        valid_time_unix_s: lc.valid_time_unix_s(time_index),
        latitudes: rows.iter().map(|&r| grid.latitudes[r]).collect(),
        longitudes: cols.iter().map(|&c| grid.longitudes[c]).collect(),
        thickness_1000_500: f32_grid(),
        thickness_1000_850: f32_grid(),
        thickness_850_700: f32_grid(),
        thickness_1000_500_flags: u8_grid(),
        thickness_1000_850_flags: u8_grid(),
        thickness_850_700_flags: u8_grid(),
        freezing_level_m: f32_grid(),
        freezing_level_agl_m: f32_grid(),
        freezing_level_flags: u8_grid(),
        wet_bulb_zero_m: f32_grid(),
        wet_bulb_zero_agl_m: f32_grid(),
        wet_bulb_zero_flags: u8_grid(),
        category: u8_grid(),
        rule: u8_grid(),
        settings: settings.clone(),
        notes: notes(lc),
        caution: CAUTION,
    };
    for (row, columns) in per_row.iter().enumerate() {
        for (col, cg) in columns.iter().enumerate() {
            let i = &cg.inputs;
            let at = [row, col];
            g.thickness_1000_500[at] = i.thickness_1000_500.value_m as f32;
            g.thickness_1000_850[at] = i.thickness_1000_850.value_m as f32;
            g.thickness_850_700[at] = i.thickness_850_700.value_m as f32;
            g.thickness_1000_500_flags[at] = i.thickness_1000_500.flags;
            g.thickness_1000_850_flags[at] = i.thickness_1000_850.flags;
            g.thickness_850_700_flags[at] = i.thickness_850_700.flags;
            g.freezing_level_m[at] = i.freezing_level.height_m as f32;
            g.freezing_level_agl_m[at] = i.freezing_level.height_agl_m as f32;
            g.freezing_level_flags[at] = i.freezing_level.flags();
            g.wet_bulb_zero_m[at] = i.wet_bulb_zero.height_m as f32;
            g.wet_bulb_zero_agl_m[at] = i.wet_bulb_zero.height_agl_m as f32;
            g.wet_bulb_zero_flags[at] = i.wet_bulb_zero.flags();
            g.category[at] = cg.category.code();
            g.rule[at] = cg.rule.code();
        }
    }
    Ok(g)
}

/// Bilinear value over the corners with non-zero weight; `NaN` if one of them is `NaN`.
fn bilinear(st: &Stencil, corners: &[[f64; 2]; 2]) -> f64 {
    let mut sum = 0.0;
    for (a, wr) in [(0, 1.0 - st.row_fraction), (1, st.row_fraction)] {
        for (b, wc) in [(0, 1.0 - st.col_fraction), (1, st.col_fraction)] {
            let w = wr * wc;
            if w == 0.0 {
                continue;
            }
            sum += w * corners[a][b];
        }
    }
    sum
}

/// Guidance at one position: bilinear thicknesses and level heights from the four
/// surrounding columns, and the category, rule and level flags of the nearest column.
pub fn guidance_at_point(
    lc: &LoadedCycle,
    lat: f64,
    lon: f64,
    time_index: usize,
    member: usize,
    settings: &GuidanceSettings,
) -> Result<PointGuidance, GuidanceError> {
    let sg = StepGuidance::new(lc, time_index, member, settings)?;
    let st = locate(&lc.cycle.grid, lat, lon)?;
    let mut b = sg.buffers();
    let mut corner = |a: usize, c: usize| sg.column(st.rows[a], st.cols[c], &mut b);
    let columns = [[corner(0, 0), corner(0, 1)], [corner(1, 0), corner(1, 1)]];
    let field = |f: &dyn Fn(&ColumnGuidance) -> f64| {
        let v = [
            [f(&columns[0][0]), f(&columns[0][1])],
            [f(&columns[1][0]), f(&columns[1][1])],
        ];
        bilinear(&st, &v)
    };
    let weighted_flags = |f: &dyn Fn(&ColumnGuidance) -> u8| {
        let mut flags = 0u8;
        for (a, wr) in [(0, 1.0 - st.row_fraction), (1, st.row_fraction)] {
            for (c, wc) in [(0, 1.0 - st.col_fraction), (1, st.col_fraction)] {
                if wr * wc != 0.0 {
                    flags |= f(&columns[a][c]);
                }
            }
        }
        flags
    };
    let layer = |pick: fn(&GuidanceInputs) -> LayerValue| {
        let value_m = field(&|c| pick(&c.inputs).value_m);
        let mut flags = weighted_flags(&|c| pick(&c.inputs).flags);
        if !value_m.is_finite() {
            flags |= FLAG_MISSING;
        }
        LayerValue { value_m, flags }
    };
    let nearest = st.nearest();
    let near_a = usize::from(nearest.0 == st.rows[1] && st.rows[0] != st.rows[1]);
    let near_c = usize::from(nearest.1 == st.cols[1] && st.cols[0] != st.cols[1]);
    Ok(PointGuidance {
        latitude: lat,
        longitude: lon,
        nearest,
        thickness_1000_500: layer(|i| i.thickness_1000_500),
        thickness_1000_850: layer(|i| i.thickness_1000_850),
        thickness_850_700: layer(|i| i.thickness_850_700),
        freezing_level_m: field(&|c| c.inputs.freezing_level.height_m),
        freezing_level_agl_m: field(&|c| c.inputs.freezing_level.height_agl_m),
        wet_bulb_zero_m: field(&|c| c.inputs.wet_bulb_zero.height_m),
        wet_bulb_zero_agl_m: field(&|c| c.inputs.wet_bulb_zero.height_agl_m),
        nearest_column: columns[near_a][near_c],
        caution: CAUTION,
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Columns built only as high as the guidance reads (`StepGuidance::wanted`) give what
    /// whole columns give, bit for bit (compared in their `Debug` form, which spells every
    /// `f64` exactly), over every column of the demo cycle at two lead times, for search
    /// tops from 200 to 700 hPa.
    #[test]
    fn columns_built_as_high_as_read_give_the_whole_columns_guidance() {
        let dir = tempfile::tempdir().unwrap();
        let path = crate::demo::write_demo_cycle(dir.path()).unwrap();
        let lc = LoadedCycle::load(
            &path,
            &crate::ingest::IngestConfig::default(),
            &crate::compute::ComputeConfig::default(),
        )
        .unwrap();
        let (levels, rows, cols) = {
            let (_, _, k, r, c) = lc.cycle.temperature.dim();
            (k, r, c)
        };
        for search_top_hpa in [200.0, 500.0, 700.0] {
            let settings = GuidanceSettings {
                search_top_hpa,
                ..GuidanceSettings::default()
            };
            for time in [0, 4] {
                let built = StepGuidance::new(&lc, time, 0, &settings).unwrap();
                let mut whole = StepGuidance::new(&lc, time, 0, &settings).unwrap();
                whole.wanted = usize::MAX;
                assert!(
                    built.wanted < levels,
                    "{search_top_hpa} hPa: {}",
                    built.wanted
                );
                let (mut a, mut b) = (built.buffers(), whole.buffers());
                let mut found = 0;
                for row in 0..rows {
                    for col in 0..cols {
                        let (x, y) = (
                            built.column(row, col, &mut a),
                            whole.column(row, col, &mut b),
                        );
                        assert_eq!(
                            format!("{x:?}"),
                            format!("{y:?}"),
                            "{search_top_hpa} hPa, time {time}, ({row}, {col})"
                        );
                        found +=
                            usize::from(x.inputs.freezing_level.kind == ZeroLevelKind::Crossing);
                    }
                }
                assert!(found > 0, "some freezing levels are crossings");
            }
        }
    }

    #[test]
    fn the_one_line_form_names_every_setting_once_and_reads_back() {
        let pairs = |g: &GuidanceSettings| -> Vec<(String, f64)> {
            g.one_line()
                .split(' ')
                .map(|p| {
                    let (k, v) = p.split_once('=').expect(p);
                    (k.to_string(), v.parse().expect(p))
                })
                .collect()
        };
        // Every setting moved off its default: each must come back with its own value.
        let defaults = pairs(&GuidanceSettings::default());
        let toml: String = defaults
            .iter()
            .map(|(k, v)| format!("{k} = {:?}\n", v + 1.0))
            .collect();
        let moved = GuidanceSettings::from_toml_str(&toml).expect(&toml);
        assert_ne!(moved, GuidanceSettings::default());
        let back = pairs(&moved);
        assert_eq!(back.len(), defaults.len());
        for ((k, v), (k0, v0)) in back.iter().zip(&defaults) {
            assert_eq!((k, *v), (k0, v0 + 1.0));
        }
        let toml_back: String = back.iter().map(|(k, v)| format!("{k} = {v:?}\n")).collect();
        assert_eq!(GuidanceSettings::from_toml_str(&toml_back).unwrap(), moved);
    }

    #[test]
    fn codes_round_trip_and_names_are_plain_words() {
        for c in PrecipitationType::ALL {
            assert_eq!(PrecipitationType::from_code(c.code()), Some(c));
            assert!(!c.name().is_empty());
        }
        for r in Rule::ALL {
            assert_eq!(Rule::from_code(r.code()), Some(r));
            assert!(!r.description().is_empty());
        }
        assert_eq!(PrecipitationType::from_code(200), None);
        assert_eq!(Rule::from_code(200), None);
    }

    #[test]
    fn default_settings_validate_and_bad_ones_name_the_field() {
        assert!(GuidanceSettings::default().validate().is_ok());
        let bad = GuidanceSettings {
            margin_850_700_m: -1.0,
            ..GuidanceSettings::default()
        };
        let msg = bad
            .validate()
            .err()
            .map(|e| e.to_string())
            .unwrap_or_default();
        assert!(msg.contains("margin_850_700_m"), "{msg}");
    }

    #[test]
    fn the_marginal_band_defaults_are_the_same_mean_temperature() {
        // 1.5 K of layer-mean virtual temperature (the 1000-500 band's 30 m, GUIDE §3's
        // T̄v = g0 Δz / (R_d ln(p1/p2))) gives 7 m and 8 m for the partial layers.
        let c = Constants::default();
        let kelvin = 30.0 / (c.rd_over_g0() * 2.0_f64.ln());
        let m1 = c.rd_over_g0() * (1000.0_f64 / 850.0).ln() * kelvin;
        let m2 = c.rd_over_g0() * (850.0_f64 / 700.0).ln() * kelvin;
        let s = GuidanceSettings::default();
        assert!((m1 - s.margin_1000_850_m).abs() < 0.5, "{m1}");
        assert!((m2 - s.margin_850_700_m).abs() < 0.5, "{m2}");
    }
}
