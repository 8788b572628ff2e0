//! The name map (role → candidate variable names) and the dataset config file.
//!
//! The built-in map is `config/names.toml`, compiled in with `include_str!`; its comments
//! document every role. A dataset config file has the same `[names]` table plus optional
//! `[constants]` and `rh_phase`.

use std::collections::BTreeMap;
use std::path::Path;

use serde::Deserialize;

use super::{IngestConfig, IngestError};
use crate::physics::humidity::RelativeHumidityPhase;
use crate::physics::Constants;

/// The built-in name map, as shipped in `config/names.toml`.
pub const BUILT_IN_NAMES_TOML: &str = include_str!("../../config/names.toml");

/// What a variable is for. Most roles are CF standard names; the hybrid half-level roles
/// and the member dimension are this crate's own.
#[derive(Clone, Copy, Debug, PartialEq, Eq, PartialOrd, Ord, Hash)]
pub enum Role {
    /// `air_temperature` on the vertical axis.
    AirTemperature,
    /// `specific_humidity`.
    SpecificHumidity,
    /// `humidity_mixing_ratio`.
    HumidityMixingRatio,
    /// `relative_humidity`.
    RelativeHumidity,
    /// `dew_point_temperature`.
    DewPointTemperature,
    /// `surface_air_pressure`.
    SurfaceAirPressure,
    /// `surface_geopotential`.
    SurfaceGeopotential,
    /// `surface_altitude`.
    SurfaceAltitude,
    /// `geopotential` on the vertical axis.
    Geopotential,
    /// `geopotential_height` on the vertical axis.
    GeopotentialHeight,
    /// Hybrid a (or ap) coefficients at the half levels.
    HybridAHalfLevels,
    /// Hybrid b coefficients at the half levels.
    HybridBHalfLevels,
    /// Names of an ensemble-member dimension.
    Realization,
}

impl Role {
    /// Every role, in the order of `config/names.toml`.
    pub const ALL: [Role; 13] = [
        Role::AirTemperature,
        Role::SpecificHumidity,
        Role::HumidityMixingRatio,
        Role::RelativeHumidity,
        Role::DewPointTemperature,
        Role::SurfaceAirPressure,
        Role::SurfaceGeopotential,
        Role::SurfaceAltitude,
        Role::Geopotential,
        Role::GeopotentialHeight,
        Role::HybridAHalfLevels,
        Role::HybridBHalfLevels,
        Role::Realization,
    ];

    /// The key of the role in a `[names]` table (the CF standard name where there is one).
    pub fn key(self) -> &'static str {
        match self {
            Role::AirTemperature => "air_temperature",
            Role::SpecificHumidity => "specific_humidity",
            Role::HumidityMixingRatio => "humidity_mixing_ratio",
            Role::RelativeHumidity => "relative_humidity",
            Role::DewPointTemperature => "dew_point_temperature",
            Role::SurfaceAirPressure => "surface_air_pressure",
            Role::SurfaceGeopotential => "surface_geopotential",
            Role::SurfaceAltitude => "surface_altitude",
            Role::Geopotential => "geopotential",
            Role::GeopotentialHeight => "geopotential_height",
            Role::HybridAHalfLevels => "hybrid_a_half_levels",
            Role::HybridBHalfLevels => "hybrid_b_half_levels",
            Role::Realization => "realization",
        }
    }

    /// The role for a `[names]` key.
    pub fn from_key(key: &str) -> Option<Role> {
        Role::ALL.into_iter().find(|r| r.key() == key)
    }

    /// The CF standard name that identifies the role's variable, where CF has one.
    pub fn standard_name(self) -> Option<&'static str> {
        match self {
            Role::HybridAHalfLevels | Role::HybridBHalfLevels => None,
            other => Some(other.key()),
        }
    }
}

/// Role → candidate variable names, tried in order.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct NameMap {
    entries: BTreeMap<Role, Vec<String>>,
}

impl Default for NameMap {
    /// The built-in map of `config/names.toml`.
    fn default() -> Self {
        // The built-in file is part of the crate and checked by a unit test; should it ever
        // fail to parse, an empty map (standard names only) is the safe fallback.
        NameMap::from_toml_str(BUILT_IN_NAMES_TOML, "config/names.toml").unwrap_or(NameMap {
            entries: BTreeMap::new(),
        })
    }
}

impl NameMap {
    /// Parse the `[names]` table of a TOML document. `origin` names the document in errors.
    ///
    /// Only the names given are in the map (no built-in names are added: see
    /// [`NameMap::merged_over`] and [`load_config`] for that). Unknown roles and unknown
    /// top-level keys are errors, so that a misspelt key does not pass silently.
    pub fn from_toml_str(text: &str, origin: &str) -> Result<Self, IngestError> {
        let doc = parse_document(text, origin)?;
        NameMap::from_table(&doc.names, origin)
    }

    /// Read a TOML file with a `[names]` table.
    pub fn from_file(path: &Path) -> Result<Self, IngestError> {
        let text = std::fs::read_to_string(path).map_err(|source| IngestError::Io {
            file: path.display().to_string(),
            source,
        })?;
        NameMap::from_toml_str(&text, &path.display().to_string())
    }

    fn from_table(
        table: &BTreeMap<String, Vec<String>>,
        origin: &str,
    ) -> Result<Self, IngestError> {
        let mut entries = BTreeMap::new();
        for (key, names) in table {
            let role = Role::from_key(key).ok_or_else(|| IngestError::Config {
                file: origin.to_string(),
                detail: format!(
                    "unknown role '{key}' in [names]: expected one of {}",
                    Role::ALL.map(Role::key).join(", ")
                ),
            })?;
            if let Some(empty) = names.iter().find(|n| n.trim().is_empty()) {
                return Err(IngestError::Config {
                    file: origin.to_string(),
                    detail: format!("role '{key}' lists an empty variable name '{empty}'"),
                });
            }
            entries.insert(role, names.clone());
        }
        Ok(NameMap { entries })
    }

    /// The candidate names for a role, in order (empty when the map has none).
    pub fn candidates(&self, role: Role) -> &[String] {
        self.entries.get(&role).map(Vec::as_slice).unwrap_or(&[])
    }

    /// This map's names tried first, then `base`'s, role by role, without repeats.
    pub fn merged_over(&self, base: &NameMap) -> NameMap {
        let mut entries = base.entries.clone();
        for (role, names) in &self.entries {
            let mut merged: Vec<String> = names.clone();
            for n in base.candidates(*role) {
                if !merged.contains(n) {
                    merged.push(n.clone());
                }
            }
            entries.insert(*role, merged);
        }
        NameMap { entries }
    }
}

#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
struct ConfigDocument {
    #[serde(default)]
    names: BTreeMap<String, Vec<String>>,
    #[serde(default)]
    constants: Option<ConstantsTable>,
    #[serde(default)]
    rh_phase: Option<String>,
}

#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
struct ConstantsTable {
    dry_air_gas_constant: Option<f64>,
    standard_gravity: Option<f64>,
    molar_mass_ratio: Option<f64>,
}

fn parse_document(text: &str, origin: &str) -> Result<ConfigDocument, IngestError> {
    toml::from_str::<ConfigDocument>(text).map_err(|e| IngestError::Config {
        file: origin.to_string(),
        // The TOML error spans several lines (a source excerpt); keep it to one.
        detail: e
            .to_string()
            .lines()
            .filter(|l| !l.trim().is_empty())
            .collect::<Vec<_>>()
            .join("; ")
            .to_lowercase(),
    })
}

/// Parse an `rh_phase` value: `"water"` (WMO convention) or `"ice_below_freezing"`.
pub fn parse_rh_phase(text: &str) -> Option<RelativeHumidityPhase> {
    match text.trim() {
        "water" => Some(RelativeHumidityPhase::Water),
        "ice_below_freezing" => Some(RelativeHumidityPhase::IceBelowFreezing),
        _ => None,
    }
}

/// Plausible bounds for a dataset's own constants, so that a typo (287.04 written 28.704,
/// or 9.81 written 981) is caught at load time. R_d: the 287.0–287.1 range of producers
/// (GUIDE §2) widened to 280–295; g0: normal gravity spans 9.780–9.832 m s⁻² from equator
/// to pole (WGS-84), widened to 9.7–9.9; ε: 0.62198 (18.01528 / 28.9645), 0.6–0.65.
const CONSTANT_BOUNDS: [(&str, f64, f64); 3] = [
    ("dry_air_gas_constant", 280.0, 295.0),
    ("standard_gravity", 9.7, 9.9),
    ("molar_mass_ratio", 0.6, 0.65),
];

fn constants_from_table(table: &ConstantsTable, origin: &str) -> Result<Constants, IngestError> {
    let mut c = Constants::default();
    let given = [
        table.dry_air_gas_constant,
        table.standard_gravity,
        table.molar_mass_ratio,
    ];
    for ((name, lo, hi), value) in CONSTANT_BOUNDS.iter().zip(given) {
        if let Some(v) = value {
            if !v.is_finite() || v < *lo || v > *hi {
                return Err(IngestError::Config {
                    file: origin.to_string(),
                    detail: format!(
                        "[constants] {name} = {v} is outside the plausible range {lo}-{hi}"
                    ),
                });
            }
        }
    }
    if let Some(v) = table.dry_air_gas_constant {
        c.dry_air_gas_constant = v;
    }
    if let Some(v) = table.standard_gravity {
        c.standard_gravity = v;
    }
    if let Some(v) = table.molar_mass_ratio {
        c.molar_mass_ratio = v;
    }
    Ok(c)
}

/// Parse a dataset config document (see [`load_config`]); `origin` names it in errors.
pub fn config_from_toml_str(text: &str, origin: &str) -> Result<IngestConfig, IngestError> {
    let doc = parse_document(text, origin)?;
    let own = NameMap::from_table(&doc.names, origin)?;
    let names = own.merged_over(&NameMap::default());
    let constants = match &doc.constants {
        Some(t) => constants_from_table(t, origin)?,
        None => Constants::default(),
    };
    let rh_phase = match doc.rh_phase.as_deref() {
        None => RelativeHumidityPhase::default(),
        Some(p) => parse_rh_phase(p).ok_or_else(|| IngestError::Config {
            file: origin.to_string(),
            detail: format!("rh_phase = '{p}': expected 'water' or 'ice_below_freezing'"),
        })?,
    };
    Ok(IngestConfig {
        names,
        rh_phase,
        constants,
    })
}

/// A dataset config file (TOML): a `[names]` table (`role = ["name", ...]`) merged over the
/// built-in map (the file's names are tried first), an optional `[constants]` table
/// (`dry_air_gas_constant`, `standard_gravity`, `molar_mass_ratio`; unnamed ones keep the
/// defaults of [`Constants::default`]), and `rh_phase = "water" | "ice_below_freezing"`.
pub fn load_config(path: &Path) -> Result<IngestConfig, IngestError> {
    let text = std::fs::read_to_string(path).map_err(|source| IngestError::Io {
        file: path.display().to_string(),
        source,
    })?;
    config_from_toml_str(&text, &path.display().to_string())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn built_in_map_parses_and_covers_every_role() {
        let map = NameMap::from_toml_str(BUILT_IN_NAMES_TOML, "config/names.toml");
        let map = match map {
            Ok(m) => m,
            Err(e) => panic!("built-in map: {e}"),
        };
        for role in Role::ALL {
            assert!(!map.candidates(role).is_empty(), "{}", role.key());
        }
        assert_eq!(map, NameMap::default());
        // Names the issue text asks the defaults to cover.
        let t = map.candidates(Role::AirTemperature);
        for n in ["t", "ta", "T", "Temperature_isobaric"] {
            assert!(t.iter().any(|c| c == n), "{n}");
        }
        let r = map.candidates(Role::RelativeHumidity);
        assert!(r.iter().any(|c| c == "Relative_humidity_isobaric"));
        let gh = map.candidates(Role::GeopotentialHeight);
        assert!(gh.iter().any(|c| c == "Geopotential_height_isobaric"));
        assert!(map
            .candidates(Role::SurfaceAirPressure)
            .iter()
            .any(|c| c == "sp"));
        assert!(map
            .candidates(Role::SurfaceAltitude)
            .iter()
            .any(|c| c == "orog"));
    }

    #[test]
    fn unknown_role_and_key_are_errors_naming_the_origin() {
        let e = NameMap::from_toml_str("[names]\nair_temp = [\"x\"]\n", "my.toml");
        let msg = e.map(|_| String::new()).unwrap_or_else(|e| e.to_string());
        assert!(msg.contains("my.toml") && msg.contains("air_temp"), "{msg}");
        let e = NameMap::from_toml_str("colour = 1\n", "my.toml");
        assert!(e.is_err());
        let e = NameMap::from_toml_str("[names]\nair_temperature = [\"\"]\n", "my.toml");
        assert!(e.is_err());
        let e = NameMap::from_toml_str("[names\n", "broken.toml");
        let msg = e.map(|_| String::new()).unwrap_or_else(|e| e.to_string());
        assert!(msg.contains("broken.toml") && !msg.contains('\n'), "{msg}");
    }

    #[test]
    fn dataset_names_are_tried_first() {
        let cfg = config_from_toml_str(
            "[names]\nair_temperature = [\"TT\", \"t\"]\n",
            "dataset.toml",
        );
        let cfg = match cfg {
            Ok(c) => c,
            Err(e) => panic!("{e}"),
        };
        let t = cfg.names.candidates(Role::AirTemperature);
        assert_eq!(t.first().map(String::as_str), Some("TT"));
        assert_eq!(t.get(1).map(String::as_str), Some("t"));
        assert_eq!(t.iter().filter(|n| n.as_str() == "t").count(), 1);
        // Other roles keep the built-in names.
        assert_eq!(
            cfg.names.candidates(Role::SpecificHumidity),
            NameMap::default().candidates(Role::SpecificHumidity)
        );
        assert_eq!(cfg.constants, Constants::default());
        assert_eq!(cfg.rh_phase, RelativeHumidityPhase::Water);
    }

    #[test]
    fn constants_and_phase() {
        // 287.0531: U.S. Standard Atmosphere 1976 (R* / M0), GUIDE §2.
        let cfg = config_from_toml_str(
            "rh_phase = \"ice_below_freezing\"\n[constants]\ndry_air_gas_constant = 287.0531\n",
            "d.toml",
        );
        let cfg = match cfg {
            Ok(c) => c,
            Err(e) => panic!("{e}"),
        };
        assert_eq!(cfg.rh_phase, RelativeHumidityPhase::IceBelowFreezing);
        assert_eq!(cfg.constants.dry_air_gas_constant, 287.0531);
        assert_eq!(cfg.constants.standard_gravity, 9.80665);
        for bad in [
            "[constants]\nstandard_gravity = 981.0\n",
            "[constants]\ndry_air_gas_constant = 28.704\n",
            "[constants]\ngravity = 9.81\n",
            "rh_phase = \"ice\"\n",
        ] {
            let e = config_from_toml_str(bad, "d.toml");
            let msg = e.map(|_| String::new()).unwrap_or_else(|e| e.to_string());
            assert!(msg.contains("d.toml"), "{bad}: {msg}");
        }
    }

    #[test]
    fn missing_config_file_names_the_path() {
        let e = load_config(Path::new("/nonexistent/dataset.toml"));
        let msg = e.map(|_| String::new()).unwrap_or_else(|e| e.to_string());
        assert!(msg.contains("/nonexistent/dataset.toml"), "{msg}");
    }
}
