//! Units strings as files write them, parsed into linear conversions to the SI units that
//! [`crate::model`] holds.
//!
//! Every parser is a pure function over `&str` (no file access), so that it can be tested and
//! fuzzed on its own. A parser returns `None` for a string it does not accept; the caller turns
//! that into an error that names the variable and lists [`Quantity::accepted`].
//!
//! Spellings follow UDUNITS-2 and the CF conventions (`K`, `degC`, `Pa`, `hPa`, `kg kg-1`,
//! `m2 s-2`, `1`), plus the spellings real producers write (`Celsius`, `mbar`, `millibar`,
//! `g/kg`, `%`, `gpm`, `m^2/s^2`).
//!
//! [`Quantity::accepted`]: crate::ingest::units::Quantity::accepted

/// A linear conversion `si = value * scale + offset`.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Linear {
    /// Multiplier.
    pub scale: f64,
    /// Added after the multiplication.
    pub offset: f64,
}

impl Linear {
    /// The identity conversion.
    pub const IDENTITY: Linear = Linear {
        scale: 1.0,
        offset: 0.0,
    };

    /// Multiply only.
    pub const fn factor(scale: f64) -> Linear {
        Linear { scale, offset: 0.0 }
    }

    /// Apply to one value.
    pub fn apply(self, value: f64) -> f64 {
        value * self.scale + self.offset
    }

    /// This conversion followed by `then`.
    pub fn then(self, then: Linear) -> Linear {
        Linear {
            scale: self.scale * then.scale,
            offset: self.offset * then.scale + then.offset,
        }
    }
}

/// 0 °C in kelvin (definition of the Celsius scale, SI Brochure, 9th ed., 2019, §2.3.1).
pub const ZERO_CELSIUS_K: f64 = 273.15;

/// The physical quantities whose units ingest understands; each knows its accepted spellings.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Quantity {
    /// Air or dewpoint temperature, to K.
    Temperature,
    /// Pressure (levels, surface pressure, hybrid `ap` and `p0`), to Pa.
    Pressure,
    /// Specific humidity or mixing ratio, to kg kg⁻¹.
    MassRatio,
    /// Relative humidity, to a fraction.
    RelativeHumidity,
    /// Geopotential height or altitude, to geopotential metres; geopotential (m² s⁻²) is
    /// divided by g0, which the caller supplies.
    Height,
}

impl Quantity {
    /// The accepted spellings, for error messages.
    pub fn accepted(self) -> &'static str {
        match self {
            Quantity::Temperature => "K or degC (also 'C', 'Celsius', 'degree_Celsius')",
            Quantity::Pressure => "Pa, hPa or mbar (also 'millibar', 'hectopascal', 'mb')",
            Quantity::MassRatio => "kg kg-1, kg/kg, g kg-1, g/kg, 1 or ''",
            Quantity::RelativeHumidity => "% or 1 (fraction)",
            Quantity::Height => "m, gpm, or m2 s-2 for geopotential",
        }
    }

    /// Parse `units` for this quantity. `standard_gravity` (m s⁻²) divides geopotential.
    pub fn parse(self, units: &str, standard_gravity: f64) -> Option<Linear> {
        match self {
            Quantity::Temperature => parse_temperature_units(units),
            Quantity::Pressure => parse_pressure_units(units),
            Quantity::MassRatio => parse_mass_ratio_units(units),
            Quantity::RelativeHumidity => parse_relative_humidity_units(units),
            Quantity::Height => parse_height_units(units).map(|h| h.to_gpm(standard_gravity)),
        }
    }
}

/// Collapse a units string to a canonical token: trimmed, inner whitespace runs to one
/// space, `**` and `^` exponent markers removed, `.` between factors taken as a space.
///
/// `"kg  kg**-1"`, `"kg kg^-1"` and `"kg.kg-1"` all become `"kg kg-1"`.
pub fn normalise_units(units: &str) -> String {
    // Carets first: removing one can join two stars into a `**` marker (`m*^*2`), which the
    // second replacement then removes, so that normalising twice changes nothing.
    let replaced = units.trim().replace('^', "").replace("**", "");
    // A '.' between two letters or a letter and a digit is the UDUNITS product operator.
    let mut chars: Vec<char> = Vec::with_capacity(replaced.len());
    let raw: Vec<char> = replaced.chars().collect();
    for (i, &c) in raw.iter().enumerate() {
        let prev_alpha = i > 0 && raw.get(i - 1).is_some_and(|p| p.is_alphabetic());
        let next_alnum = raw.get(i + 1).is_some_and(|n| n.is_alphanumeric());
        if c == '.' && prev_alpha && next_alnum {
            chars.push(' ');
        } else {
            chars.push(c);
        }
    }
    let joined: String = chars.into_iter().collect();
    joined.split_whitespace().collect::<Vec<_>>().join(" ")
}

/// Temperature units to kelvin.
///
/// # Units
/// Accepts `K`, `kelvin`, `degK`, `degrees_K`, `degree_K` (kelvin) and `degC`, `C`, `°C`,
/// `Celsius`, `degree_Celsius`, `degrees_Celsius`, `degree_C`, `degrees_C`, `deg_C`
/// (Celsius, offset by 273.15 K). Fahrenheit and anything else return `None`.
///
/// # References
/// UDUNITS-2 unit database (Unidata); CF conventions §3.1 (units).
pub fn parse_temperature_units(units: &str) -> Option<Linear> {
    let u = normalise_units(units);
    let lower = u.to_ascii_lowercase();
    match u.as_str() {
        "K" | "degK" | "deg_K" | "degree_K" | "degrees_K" | "degreeK" | "degreesK" => {
            return Some(Linear::IDENTITY)
        }
        "degC" | "C" | "°C" | "deg_C" | "degree_C" | "degrees_C" | "degreeC" | "degreesC" => {
            return Some(Linear {
                scale: 1.0,
                offset: ZERO_CELSIUS_K,
            })
        }
        _ => {}
    }
    match lower.as_str() {
        "kelvin" | "kelvins" | "degree_kelvin" | "degrees_kelvin" => Some(Linear::IDENTITY),
        "celsius" | "degree_celsius" | "degrees_celsius" | "degree celsius" | "degrees celsius" => {
            Some(Linear {
                scale: 1.0,
                offset: ZERO_CELSIUS_K,
            })
        }
        _ => None,
    }
}

/// Pressure units to pascals.
///
/// # Units
/// Accepts `Pa`, `pascal(s)`; `hPa`, `hectopascal(s)`, `mbar`, `millibar(s)`, `mb` (×100).
/// `kPa` and anything else return `None` (no producer of these fields writes them).
///
/// # References
/// UDUNITS-2 unit database; WMO-No. 306, Manual on Codes (hPa for isobaric levels).
pub fn parse_pressure_units(units: &str) -> Option<Linear> {
    let u = normalise_units(units);
    match u.as_str() {
        "Pa" => return Some(Linear::IDENTITY),
        "hPa" | "mbar" | "mb" | "mBar" => return Some(Linear::factor(100.0)),
        _ => {}
    }
    match u.to_ascii_lowercase().as_str() {
        "pascal" | "pascals" => Some(Linear::IDENTITY),
        "hectopascal" | "hectopascals" | "millibar" | "millibars" => Some(Linear::factor(100.0)),
        _ => None,
    }
}

/// Specific humidity or mixing-ratio units to kg kg⁻¹.
///
/// # Units
/// Accepts `kg kg-1`, `kg/kg`, `1`, `""` (dimensionless, CF default) as they are, and
/// `g kg-1`, `g/kg` (×0.001). Case-insensitive (`Kg/kg` is seen in the wild).
///
/// # References
/// CF standard name table (`specific_humidity`, `humidity_mixing_ratio`: canonical units 1).
pub fn parse_mass_ratio_units(units: &str) -> Option<Linear> {
    let u = normalise_units(units).to_ascii_lowercase();
    match u.as_str() {
        "" | "1" | "kg kg-1" | "kg/kg" | "kg kg -1" | "kg/kg-1" | "kg kg1" => {
            Some(Linear::IDENTITY)
        }
        "g kg-1" | "g/kg" | "g kg -1" => Some(Linear::factor(1e-3)),
        _ => None,
    }
}

/// Relative-humidity units to a fraction.
///
/// # Units
/// Accepts `%`, `percent` (×0.01) and `1`, `""`, `fraction` (as they are). Whether a
/// dimensionless field is really a fraction is checked afterwards by the plausibility range
/// (values above 1.2 mean percent labelled as a fraction).
///
/// # References
/// CF standard name table (`relative_humidity`: canonical units 1); WMO-No. 8, Annex 4.B.
pub fn parse_relative_humidity_units(units: &str) -> Option<Linear> {
    let u = normalise_units(units).to_ascii_lowercase();
    match u.as_str() {
        "%" | "percent" | "pct" => Some(Linear::factor(0.01)),
        "" | "1" | "fraction" | "0-1" => Some(Linear::IDENTITY),
        _ => None,
    }
}

/// What a height-like units string means.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum HeightUnits {
    /// Metres or geopotential metres.
    Metres,
    /// Geopotential, m² s⁻².
    Geopotential,
}

impl HeightUnits {
    /// The conversion to geopotential metres: geopotential is divided by g0 (WMO definition
    /// of the geopotential metre).
    pub fn to_gpm(self, standard_gravity: f64) -> Linear {
        match self {
            HeightUnits::Metres => Linear::IDENTITY,
            HeightUnits::Geopotential => Linear::factor(1.0 / standard_gravity),
        }
    }
}

/// Height or geopotential units.
///
/// # Units
/// Metres: `m`, `gpm`, `meter(s)`, `metre(s)`, `geopotential meters`. Geopotential:
/// `m2 s-2`, `m2/s2`, `m^2/s^2`, `m**2 s**-2`, `J kg-1`, `J/kg`.
///
/// # References
/// UDUNITS-2; CF standard name table (`geopotential`: m2 s-2; `geopotential_height`: m).
pub fn parse_height_units(units: &str) -> Option<HeightUnits> {
    let u = normalise_units(units);
    let lower = u.to_ascii_lowercase();
    match lower.as_str() {
        "m"
        | "gpm"
        | "meter"
        | "meters"
        | "metre"
        | "metres"
        | "geopotential meters"
        | "geopotential metres"
        | "geopotential_meters"
        | "gp m" => Some(HeightUnits::Metres),
        "m2 s-2" | "m2/s2" | "m2 / s2" | "m2/s-2" | "m2 s -2" | "j kg-1" | "j/kg" => {
            Some(HeightUnits::Geopotential)
        }
        _ => None,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn normalise_collapses_exponent_markers_and_products() {
        assert_eq!(normalise_units("  kg  kg**-1 "), "kg kg-1");
        assert_eq!(normalise_units("kg kg^-1"), "kg kg-1");
        assert_eq!(normalise_units("kg.kg-1"), "kg kg-1");
        assert_eq!(normalise_units("m^2/s^2"), "m2/s2");
        assert_eq!(normalise_units("m**2 s**-2"), "m2 s-2");
        // A decimal point inside a number is not a product operator.
        assert_eq!(normalise_units("0.01"), "0.01");
        assert_eq!(normalise_units(""), "");
    }

    #[test]
    fn temperature_spellings() {
        for k in ["K", " K ", "kelvin", "Kelvin", "degK", "degrees_K"] {
            assert_eq!(parse_temperature_units(k), Some(Linear::IDENTITY), "{k}");
        }
        // 0 degC = 273.15 K by the definition of the Celsius scale (SI Brochure §2.3.1).
        for c in [
            "degC",
            "C",
            "Celsius",
            "celsius",
            "degree_Celsius",
            "degrees_C",
            "°C",
        ] {
            let conv = parse_temperature_units(c).unwrap_or(Linear::IDENTITY);
            assert!((conv.apply(0.0) - 273.15).abs() < 1e-12, "{c}");
            assert!((conv.apply(-40.0) - 233.15).abs() < 1e-12, "{c}");
        }
        for bad in ["F", "degF", "Fahrenheit", "", "k", "deg"] {
            assert_eq!(parse_temperature_units(bad), None, "{bad}");
        }
    }

    #[test]
    fn pressure_spellings() {
        for pa in ["Pa", "pascal", "Pascals"] {
            assert_eq!(parse_pressure_units(pa), Some(Linear::IDENTITY), "{pa}");
        }
        // 1 hPa = 1 mbar = 100 Pa (SI Brochure, Table 8, non-SI units).
        for hpa in ["hPa", "mbar", "millibar", "millibars", "hectopascal", "mb"] {
            assert_eq!(
                parse_pressure_units(hpa),
                Some(Linear::factor(100.0)),
                "{hpa}"
            );
        }
        for bad in ["atm", "inHg", "", "kPa", "bar", "psi"] {
            assert_eq!(parse_pressure_units(bad), None, "{bad}");
        }
    }

    #[test]
    fn mass_ratio_spellings() {
        for one in [
            "kg kg-1",
            "kg/kg",
            "kg kg**-1",
            "Kg/kg",
            "1",
            "",
            "kg kg^-1",
        ] {
            assert_eq!(parse_mass_ratio_units(one), Some(Linear::IDENTITY), "{one}");
        }
        for g in ["g kg-1", "g/kg", "g kg**-1"] {
            assert_eq!(parse_mass_ratio_units(g), Some(Linear::factor(1e-3)), "{g}");
        }
        for bad in ["%", "ppm", "g", "kg"] {
            assert_eq!(parse_mass_ratio_units(bad), None, "{bad}");
        }
    }

    #[test]
    fn relative_humidity_spellings() {
        assert_eq!(
            parse_relative_humidity_units("%"),
            Some(Linear::factor(0.01))
        );
        assert_eq!(
            parse_relative_humidity_units("percent"),
            Some(Linear::factor(0.01))
        );
        assert_eq!(parse_relative_humidity_units("1"), Some(Linear::IDENTITY));
        assert_eq!(parse_relative_humidity_units(""), Some(Linear::IDENTITY));
        assert_eq!(
            parse_relative_humidity_units("fraction"),
            Some(Linear::IDENTITY)
        );
        assert_eq!(parse_relative_humidity_units("kg/kg"), None);
    }

    #[test]
    fn height_spellings() {
        for m in ["m", "gpm", "meters", "metre", "geopotential meters"] {
            assert_eq!(parse_height_units(m), Some(HeightUnits::Metres), "{m}");
        }
        for phi in ["m2 s-2", "m^2/s^2", "m**2 s**-2", "m2/s2", "J kg-1"] {
            assert_eq!(
                parse_height_units(phi),
                Some(HeightUnits::Geopotential),
                "{phi}"
            );
        }
        assert_eq!(parse_height_units("km"), None);
        assert_eq!(parse_height_units("ft"), None);
        // 9.80665 m2 s-2 of geopotential is one geopotential metre (WMO definition).
        let c = HeightUnits::Geopotential.to_gpm(9.80665);
        assert!((c.apply(9.80665) - 1.0).abs() < 1e-15);
    }

    #[test]
    fn linear_composition_matches_sequential_application() {
        let a = Linear {
            scale: 0.01,
            offset: 250.0,
        };
        let b = Linear {
            scale: 1.0,
            offset: ZERO_CELSIUS_K,
        };
        let c = a.then(b);
        for raw in [-32767.0, -1.0, 0.0, 1234.0, 32767.0] {
            assert!((c.apply(raw) - b.apply(a.apply(raw))).abs() < 1e-9);
        }
    }

    #[test]
    fn quantity_parse_dispatches_and_lists_accepted() {
        assert!(Quantity::Temperature.parse("F", 9.80665).is_none());
        assert!(Quantity::Temperature.accepted().contains("degC"));
        let g = Quantity::Height
            .parse("m2 s-2", 10.0)
            .map(|l| l.apply(100.0));
        assert_eq!(g, Some(10.0));
    }

    proptest::proptest! {
        // Parsers take any text a file holds: they must never panic, and whatever they
        // accept must be a finite, non-zero linear map.
        #[test]
        fn parsers_never_panic(text in "\\PC{0,24}") {
            let _ = normalise_units(&text);
            for q in [
                Quantity::Temperature,
                Quantity::Pressure,
                Quantity::MassRatio,
                Quantity::RelativeHumidity,
                Quantity::Height,
            ] {
                if let Some(l) = q.parse(&text, 9.80665) {
                    proptest::prop_assert!(l.scale.is_finite() && l.scale != 0.0);
                    proptest::prop_assert!(l.offset.is_finite());
                }
            }
        }

        // Surrounding blanks never change the meaning of a units string.
        #[test]
        fn blanks_do_not_matter(pad in " {0,3}", units in "(K|degC|hPa|Pa|mbar|g/kg|kg kg-1|%|gpm|m2 s-2)") {
            let padded = format!("{pad}{units}{pad}");
            proptest::prop_assert_eq!(parse_temperature_units(&padded), parse_temperature_units(&units));
            proptest::prop_assert_eq!(parse_pressure_units(&padded), parse_pressure_units(&units));
            proptest::prop_assert_eq!(parse_mass_ratio_units(&padded), parse_mass_ratio_units(&units));
            proptest::prop_assert_eq!(parse_height_units(&padded), parse_height_units(&units));
        }
    }

    /// Regression (found by the `units` fuzz target): removing `^` after `**` could form a
    /// new `**`, so `^ddm*^*` normalised to `ddm**` and only a second pass gave `ddm`; a
    /// string and its normal form could then parse differently.
    #[test]
    fn regression_normalising_twice_changed_a_string_whose_caret_joined_two_stars() {
        for text in ["^ddm*^*", "m*^*2 s*^*-2", "kg kg*^*-1"] {
            let once = normalise_units(text);
            assert_eq!(normalise_units(&once), once, "{text}");
        }
        assert_eq!(normalise_units("^ddm*^*"), "ddm");
        assert_eq!(normalise_units("m*^*2 s*^*-2"), "m2 s-2");
        assert_eq!(
            parse_mass_ratio_units("kg kg*^*-1"),
            parse_mass_ratio_units("kg kg-1")
        );
    }
}
