//! Rain–snow guidance (`products::guidance`): 0 °C levels against the U.S. Standard
//! Atmosphere 1976 and real radiosonde ascents, every row of the decision table, thresholds
//! read from TOML, the elevation tiers, and whole grids of the demo cycle and a real GFS
//! forecast.
//!
//! Real data come from `../shared/data/` (see the PROVENANCE.md files there); a test that
//! needs them says it is skipped and returns when the folder is absent.

use std::path::{Path, PathBuf};

use hypsogrid::compute::ComputeConfig;
use hypsogrid::ingest::IngestConfig;
use hypsogrid::model::Layer;
use hypsogrid::physics::column::{ColumnAnchor, ColumnNodes};
use hypsogrid::physics::humidity::{
    saturation_vapour_pressure_water, specific_humidity_from_vapour_pressure,
    vapour_pressure_from_dewpoint, virtual_temperature_from_specific_humidity, SaturationFormula,
};
use hypsogrid::physics::standard_atmosphere::{
    us_standard_atmosphere_height_at_pressure, us_standard_atmosphere_temperature,
};
use hypsogrid::physics::Constants;
use hypsogrid::products::guidance::{
    classify, column_guidance, guidance_at_point, guidance_grid, guidance_on, ColumnInput,
    GuidanceError, GuidanceInputs, GuidanceSettings, LayerValue, PrecipitationType, Rule,
    ZeroLevel, ZeroLevelKind, CAUTION, LEVEL_AT_SURFACE, LEVEL_MULTIPLE, LEVEL_NO_HUMIDITY,
};
use hypsogrid::query::{grid_field, LoadedCycle, Quantity, FLAG_BELOW_GROUND, FLAG_MISSING};

const ZERO_C: f64 = 273.15;

fn data_dir(test: &str) -> Option<PathBuf> {
    let dir = PathBuf::from(concat!(env!("CARGO_MANIFEST_DIR"), "/../shared/data"));
    if dir.is_dir() {
        Some(dir)
    } else {
        eprintln!(
            "{test}: skipped, the shared data folder {} is absent",
            dir.display()
        );
        None
    }
}

/// A column built from levels (Pa, bottom-up), temperatures and vapour pressures, anchored at
/// the surface; returns the nodes for [`ColumnInput`].
fn build_nodes(p: &[f64], t: &[f64], e: Option<&[f64]>, surface: (f64, f64)) -> ColumnNodes {
    let c = Constants::default();
    let tv: Vec<f64> = (0..p.len())
        .map(|k| match e {
            Some(e) if e[k].is_finite() => {
                let q = specific_humidity_from_vapour_pressure(e[k], p[k], c.molar_mass_ratio);
                virtual_temperature_from_specific_humidity(t[k], q, c.molar_mass_ratio)
            }
            _ => t[k],
        })
        .collect();
    let mut nodes = ColumnNodes::with_capacity(p.len());
    let mut z = vec![0.0; p.len()];
    let mut below = vec![false; p.len()];
    let anchor = ColumnAnchor::Surface {
        pressure_pa: surface.0,
        height_m: surface.1,
    };
    nodes.isobaric(p, &tv, anchor, &c, &mut z, &mut below);
    nodes
}

// ---------------------------------------------------------------------------------------------
// 0 °C levels on known profiles.
// ---------------------------------------------------------------------------------------------

/// Mandatory levels from 1000 to 100 hPa, Pa (WMO-No. 306, TEMP code).
const MANDATORY_PA: [f64; 11] = [
    100_000.0, 92_500.0, 85_000.0, 70_000.0, 50_000.0, 40_000.0, 30_000.0, 25_000.0, 20_000.0,
    15_000.0, 10_000.0,
];

#[test]
fn standard_atmosphere_freezing_level_is_at_its_analytic_height() {
    // U.S. Standard Atmosphere 1976: T = 288.15 K − 6.5 K/km′ × Z, so 273.15 K lies at
    // Z = 15 K / 6.5 K/km′ = 2307.7 geopotential metres (between 850 and 700 hPa). The column
    // is the standard's temperatures on the mandatory levels, dry, anchored at the sea-level
    // surface (101325 Pa, 0 m) with the standard's own constants. The crossing is found with
    // a constant lapse rate between levels (ln T linear in ln p), exact for this polytrope, so
    // the tolerance is 0.5 m (T linear in ln p would put it 7.1 m higher, at 2314.8 m).
    let p = MANDATORY_PA.to_vec();
    let t: Vec<f64> = p
        .iter()
        .map(|&p| us_standard_atmosphere_temperature(us_standard_atmosphere_height_at_pressure(p)))
        .collect();
    let c = Constants::us_standard_atmosphere_1976();
    let mut nodes = ColumnNodes::with_capacity(p.len());
    let (mut z, mut below) = (vec![0.0; p.len()], vec![false; p.len()]);
    let anchor = ColumnAnchor::Surface {
        pressure_pa: 101_325.0,
        height_m: 0.0,
    };
    nodes.isobaric(&p, &t, anchor, &c, &mut z, &mut below);
    // Saturated air has T_w = T, so its wet-bulb 0 °C level is the same level.
    let e: Vec<f64> = t
        .iter()
        .map(|&t| saturation_vapour_pressure_water(t))
        .collect();
    let input = ColumnInput {
        pressure_pa: &p,
        temperature_k: &t,
        vapour_pressure_pa: Some(&e),
        nodes: &nodes,
        constants: &c,
        surface: Some((101_325.0, 0.0)),
        saturation_formula: SaturationFormula::WmoMagnus,
    };
    let g = column_guidance(&input, &GuidanceSettings::default());
    let fz = g.inputs.freezing_level;
    assert_eq!(fz.kind, ZeroLevelKind::Crossing);
    assert_eq!(fz.count, 1);
    assert!((fz.height_m - 2307.7).abs() < 0.5, "{}", fz.height_m);
    assert!((fz.height_agl_m - fz.height_m).abs() < 1e-9);
    let wb = g.inputs.wet_bulb_zero;
    assert!(
        (wb.height_m - fz.height_m).abs() < 0.5,
        "{} vs {}",
        wb.height_m,
        fz.height_m
    );
    // The standard 1000–500 hPa thickness, 5574.4 − 110.9 = 5463.5 m (GUIDE §2), is warm of
    // 5400 m, and 1000–850 (1346.4 m) warm of 1300 m: rain at sea level.
    let th = g.inputs.thickness_1000_500.value_m;
    assert!((th - 5463.5).abs() < 0.5, "{th}");
    assert_eq!(g.category, PrecipitationType::Rain);
    assert_eq!(g.rule, Rule::LowGroundBothWarm);
}

#[test]
fn drier_air_lowers_the_wet_bulb_zero_below_the_freezing_level() {
    // T_w ≤ T in unsaturated air (Wallace and Hobbs 2006, §3.5; from memory), so the wet-bulb
    // 0 °C level lies below the 0 °C level, by more the drier the air. Same standard column.
    let p = MANDATORY_PA.to_vec();
    let t: Vec<f64> = p
        .iter()
        .map(|&p| us_standard_atmosphere_temperature(us_standard_atmosphere_height_at_pressure(p)))
        .collect();
    let mut last = f64::INFINITY;
    for rh in [1.0, 0.8, 0.5, 0.2] {
        let e: Vec<f64> = t
            .iter()
            .map(|&t| rh * saturation_vapour_pressure_water(t))
            .collect();
        let nodes = build_nodes(&p, &t, Some(&e), (101_325.0, 0.0));
        let c = Constants::default();
        let input = ColumnInput {
            pressure_pa: &p,
            temperature_k: &t,
            vapour_pressure_pa: Some(&e),
            nodes: &nodes,
            constants: &c,
            surface: Some((101_325.0, 0.0)),
            saturation_formula: SaturationFormula::WmoMagnus,
        };
        let g = column_guidance(&input, &GuidanceSettings::default());
        let wb = g.inputs.wet_bulb_zero.height_m;
        assert!(wb <= g.inputs.freezing_level.height_m + 0.5, "{rh}: {wb}");
        assert!(wb < last + 1e-9, "{rh}: {wb} not below {last}");
        last = wb;
    }
}

/// One level of a University of Wyoming TEXT:LIST sounding: p (Pa), z (m), T (K), Td (K).
type UwyoLevel = (f64, f64, Option<f64>, Option<f64>);

/// Reads the 7-character columns PRES, HGHT, TEMP, DWPT (PROVENANCE.md of
/// soundings-uwyo-text-metpy); a blank field is missing.
fn read_uwyo(path: &Path) -> Vec<UwyoLevel> {
    let text = std::fs::read_to_string(path)
        .unwrap_or_else(|e| panic!("cannot read {}: {e}", path.display()));
    let field = |line: &str, i: usize| -> Option<f64> {
        line.get(i * 7..(i + 1) * 7)
            .and_then(|s| s.trim().parse::<f64>().ok())
    };
    let mut dashes = 0;
    let mut out = Vec::new();
    for line in text.lines() {
        if line.starts_with("-----") {
            dashes += 1;
            continue;
        }
        if dashes < 2 {
            continue;
        }
        if let (Some(p), Some(z)) = (field(line, 0), field(line, 1)) {
            out.push((
                p * 100.0,
                z,
                field(line, 2).map(|t| t + ZERO_C),
                field(line, 3).map(|t| t + ZERO_C),
            ));
        }
    }
    out
}

/// Guidance of a sounding from its levels with temperature, anchored at its first such level
/// (the surface of the listing). Levels without a dewpoint have no vapour pressure.
fn sounding_guidance(levels: &[UwyoLevel]) -> (hypsogrid::products::guidance::ColumnGuidance, f64) {
    let used: Vec<&UwyoLevel> = levels.iter().filter(|l| l.2.is_some()).collect();
    let p: Vec<f64> = used.iter().map(|l| l.0).collect();
    let t: Vec<f64> = used.iter().map(|l| l.2.unwrap_or(f64::NAN)).collect();
    let e: Vec<f64> = used
        .iter()
        .map(|l| {
            l.3.map_or(f64::NAN, |td| {
                vapour_pressure_from_dewpoint(td, SaturationFormula::WmoMagnus)
            })
        })
        .collect();
    let surface = (p[0], used[0].1);
    let nodes = build_nodes(&p, &t, Some(&e), surface);
    let c = Constants::default();
    let input = ColumnInput {
        pressure_pa: &p,
        temperature_k: &t,
        vapour_pressure_pa: Some(&e),
        nodes: &nodes,
        constants: &c,
        surface: Some(surface),
        saturation_formula: SaturationFormula::WmoMagnus,
    };
    (
        column_guidance(&input, &GuidanceSettings::default()),
        surface.1,
    )
}

#[test]
fn dodge_city_sounding_freezing_level_matches_the_listed_crossing() {
    // DDC 2016-05-22 00Z (may22_sounding.txt, UWyo listing via MetPy's sample data). The
    // listing crosses 0 °C between 657.3 hPa (+5.5 °C, 3658 m) and 609.8 hPa (−0.1 °C,
    // 4267 m): linear in ln p, 98 % of the way up, about 610.6 hPa and, reading the listed
    // heights the same way, about 4256 m. Our heights are integrated from the first level
    // (923 hPa, 790 m); the listing's own heights differ from a hydrostatic integration by a
    // few metres per layer (PROVENANCE.md), so 30 m.
    let Some(dir) = data_dir("dodge_city_sounding_freezing_level_matches_the_listed_crossing")
    else {
        return;
    };
    let levels = read_uwyo(&dir.join("soundings-uwyo-text-metpy/may22_sounding.txt"));
    let (g, zs) = sounding_guidance(&levels);
    let fz = g.inputs.freezing_level;
    assert_eq!(fz.kind, ZeroLevelKind::Crossing);
    assert_eq!(fz.count, 1, "one 0 °C level");
    assert!(
        (fz.pressure_pa / 100.0 - 610.6).abs() < 0.5,
        "{}",
        fz.pressure_pa
    );
    assert!((fz.height_m - 4256.0).abs() < 30.0, "{}", fz.height_m);
    assert!((fz.height_agl_m - (fz.height_m - zs)).abs() < 1e-9);
    // The wet-bulb 0 °C level lies lower (dewpoints 10–15 K below the temperature there).
    let wb = g.inputs.wet_bulb_zero;
    assert_eq!(wb.kind, ZeroLevelKind::Crossing);
    assert!(
        wb.height_m < fz.height_m - 300.0,
        "{} vs {}",
        wb.height_m,
        fz.height_m
    );
    // A late-spring humid column on the plains (790 m: raised ground) is rain.
    assert_eq!(g.category, PrecipitationType::Rain, "{:?}", g.rule);
}

#[test]
fn boise_sounding_with_a_warm_layer_aloft_is_freezing_rain_or_ice_pellets() {
    // BOI 2010-12-09 12Z (dec9_sounding.txt): −0.1 °C at the surface (919 hPa, 874 m), +1.2 °C
    // at 909 hPa, up to +5.4 °C at 890 hPa, back below 0 °C between 803 hPa (+0.4 °C) and
    // 786.6 hPa (−0.8 °C). So the 0 °C level is at the surface with two more 0 °C levels
    // aloft (three in all) and a warm layer 5.4 K above freezing: the classic freezing-rain
    // profile read straight from the listing.
    let Some(dir) =
        data_dir("boise_sounding_with_a_warm_layer_aloft_is_freezing_rain_or_ice_pellets")
    else {
        return;
    };
    let levels = read_uwyo(&dir.join("soundings-uwyo-text-metpy/dec9_sounding.txt"));
    let (g, zs) = sounding_guidance(&levels);
    let fz = g.inputs.freezing_level;
    assert_eq!(fz.kind, ZeroLevelKind::AtSurface);
    assert_eq!(fz.height_m, zs);
    assert_eq!(fz.count, 3);
    assert_ne!(fz.flags() & LEVEL_MULTIPLE, 0);
    assert_ne!(fz.flags() & LEVEL_AT_SURFACE, 0);
    assert!(
        (fz.warm_aloft_excess_k - 5.4).abs() < 1e-6,
        "{}",
        fz.warm_aloft_excess_k
    );
    // −0.1 °C over a −0.2 °C dewpoint at the surface: the wet bulb is below 0 °C there too.
    assert_eq!(g.inputs.wet_bulb_zero.kind, ZeroLevelKind::AtSurface);
    assert_eq!(g.category, PrecipitationType::FreezingRainOrIcePellets);
    assert_eq!(g.rule, Rule::WarmLayerAloft);
}

// ---------------------------------------------------------------------------------------------
// The decision table on constructed inputs.
// ---------------------------------------------------------------------------------------------

fn crossing(height_m: f64, agl_m: f64) -> ZeroLevel {
    ZeroLevel {
        kind: ZeroLevelKind::Crossing,
        height_m,
        height_agl_m: agl_m,
        pressure_pa: 80_000.0,
        count: 1,
        warm_aloft_excess_k: f64::NAN,
        incomplete: false,
    }
}

fn at_surface(zs: f64, count: u8, excess: f64) -> ZeroLevel {
    ZeroLevel {
        kind: ZeroLevelKind::AtSurface,
        height_m: zs,
        height_agl_m: 0.0,
        pressure_pa: 100_000.0,
        count,
        warm_aloft_excess_k: excess,
        incomplete: false,
    }
}

/// Low-ground inputs: thicknesses, a 0 °C crossing and a wet-bulb crossing.
fn low(th500: f64, th850: f64) -> GuidanceInputs {
    GuidanceInputs {
        thickness_1000_500: LayerValue::above_ground(th500),
        thickness_1000_850: LayerValue::above_ground(th850),
        thickness_850_700: LayerValue::above_ground(1540.0),
        surface_height_m: 50.0,
        freezing_level: crossing(1000.0, 950.0),
        wet_bulb_zero: crossing(800.0, 750.0),
    }
}

/// Raised- or high-ground inputs at surface height `zs`.
fn raised(zs: f64, th700: f64, th700_below: bool, wbz_agl: f64) -> GuidanceInputs {
    GuidanceInputs {
        thickness_1000_500: LayerValue {
            value_m: 5350.0,
            flags: FLAG_BELOW_GROUND,
        },
        thickness_1000_850: LayerValue {
            value_m: 1280.0,
            flags: FLAG_BELOW_GROUND,
        },
        thickness_850_700: LayerValue {
            value_m: th700,
            flags: if th700_below { FLAG_BELOW_GROUND } else { 0 },
        },
        surface_height_m: zs,
        freezing_level: crossing(zs + wbz_agl + 200.0, wbz_agl + 200.0),
        wet_bulb_zero: crossing(zs + wbz_agl, wbz_agl),
    }
}

#[test]
fn every_rule_of_the_table_is_reached_by_a_constructed_case() {
    // Thresholds: the defaults, i.e. the common-practice values of GUIDE §3 (5400, 1300,
    // 1540 m) with the bands and heights documented on GuidanceSettings.
    use PrecipitationType as P;
    let s = GuidanceSettings::default();
    let mut missing_t = low(5300.0, 1280.0);
    missing_t.freezing_level = ZeroLevel {
        kind: ZeroLevelKind::Missing,
        ..crossing(f64::NAN, f64::NAN)
    };
    let mut warm_aloft = low(5380.0, 1290.0);
    warm_aloft.freezing_level = at_surface(50.0, 3, 2.5);
    let mut tiny_nose = low(5300.0, 1280.0);
    tiny_nose.freezing_level = at_surface(50.0, 3, 0.2); // below the 0.5 K least excess
    let mut all_cold = low(5300.0, 1280.0);
    all_cold.freezing_level = at_surface(50.0, 1, 0.0);
    let mut no_thickness = low(f64::NAN, 1280.0);
    no_thickness.thickness_1000_500.flags = FLAG_MISSING;
    let mut no_wbz = raised(800.0, 1520.0, false, 100.0);
    no_wbz.wet_bulb_zero = ZeroLevel::no_humidity();
    let cases: Vec<(&str, GuidanceInputs, P, Rule)> = vec![
        (
            "missing temperature",
            missing_t,
            P::Indeterminate,
            Rule::MissingTemperature,
        ),
        (
            "warm layer aloft",
            warm_aloft,
            P::FreezingRainOrIcePellets,
            Rule::WarmLayerAloft,
        ),
        (
            "column below freezing",
            all_cold,
            P::Snow,
            Rule::ColumnBelowFreezing,
        ),
        (
            "tiny warm nose falls through",
            tiny_nose,
            P::Snow,
            Rule::LowGroundBothCold,
        ),
        (
            "low, thickness missing",
            no_thickness,
            P::Indeterminate,
            Rule::LowGroundMissingThickness,
        ),
        (
            "low, both cold",
            low(5300.0, 1280.0),
            P::Snow,
            Rule::LowGroundBothCold,
        ),
        (
            "low, both warm",
            low(5500.0, 1330.0),
            P::Rain,
            Rule::LowGroundBothWarm,
        ),
        (
            "low, 1000-500 marginal",
            low(5420.0, 1330.0),
            P::RainSnowMix,
            Rule::LowGroundMarginal,
        ),
        (
            "low, disagreeing",
            low(5300.0, 1330.0),
            P::RainSnowMix,
            Rule::LowGroundMarginal,
        ),
        (
            "raised, no wet bulb",
            no_wbz,
            P::Indeterminate,
            Rule::NoWetBulbZero,
        ),
        (
            "raised, both cold",
            raised(800.0, 1520.0, false, 100.0),
            P::Snow,
            Rule::RaisedGroundBothCold,
        ),
        (
            "raised, both warm",
            raised(800.0, 1570.0, false, 900.0),
            P::Rain,
            Rule::RaisedGroundBothWarm,
        ),
        (
            "raised, marginal",
            raised(800.0, 1520.0, false, 450.0),
            P::RainSnowMix,
            Rule::RaisedGroundMarginal,
        ),
        (
            "high, cold",
            raised(1800.0, 1560.0, true, 200.0),
            P::Snow,
            Rule::HighGroundCold,
        ),
        (
            "high, warm",
            raised(1800.0, 1520.0, true, 700.0),
            P::Rain,
            Rule::HighGroundWarm,
        ),
        (
            "high, marginal",
            raised(1800.0, 1540.0, true, 400.0),
            P::RainSnowMix,
            Rule::HighGroundMarginal,
        ),
    ];
    let mut reached = std::collections::BTreeSet::new();
    for (name, inputs, category, rule) in cases {
        let got = classify(&inputs, &s);
        assert_eq!(got, (category, rule), "{name}");
        reached.insert(rule);
    }
    assert_eq!(reached.len(), Rule::ALL.len(), "every rule reached");
}

#[test]
fn thresholds_come_from_the_settings_toml() {
    // 5380 m and 1285 m are snow with the defaults (5400 ± 30 m, 1300 ± 7 m). With the
    // 5280 m that many European offices use (GUIDE §3) the same column is no longer snow.
    let inputs = low(5365.0, 1285.0);
    let defaults = GuidanceSettings::default();
    assert_eq!(classify(&inputs, &defaults).0, PrecipitationType::Snow);
    let european =
        GuidanceSettings::from_toml_str("critical_1000_500_m = 5280.0\n").expect("valid settings");
    assert_eq!(
        european.critical_1000_850_m, 1300.0,
        "other fields keep their defaults"
    );
    assert_eq!(
        classify(&inputs, &european),
        (PrecipitationType::RainSnowMix, Rule::LowGroundMarginal)
    );
    // The wet-bulb heights too.
    let high = raised(1800.0, 1540.0, true, 400.0);
    assert_eq!(classify(&high, &defaults).0, PrecipitationType::RainSnowMix);
    let lenient = GuidanceSettings::from_toml_str("wet_bulb_zero_snow_max_agl_m = 450.0")
        .expect("valid settings");
    assert_eq!(classify(&high, &lenient).0, PrecipitationType::Snow);
}

#[test]
fn bad_settings_are_refused_with_the_key_named() {
    let unknown = GuidanceSettings::from_toml_str("critical_1000_500 = 5300.0");
    let msg = unknown.err().map(|e| e.to_string()).unwrap_or_default();
    assert!(msg.contains("critical_1000_500"), "{msg}");
    let negative = GuidanceSettings::from_toml_str("margin_1000_500_m = -5.0");
    assert!(matches!(
        negative,
        Err(GuidanceError::Setting {
            field: "margin_1000_500_m",
            ..
        })
    ));
    let crossed = GuidanceSettings::from_toml_str(
        "wet_bulb_zero_snow_max_agl_m = 700.0\nwet_bulb_zero_rain_min_agl_m = 600.0",
    );
    let msg = crossed.err().map(|e| e.to_string()).unwrap_or_default();
    assert!(msg.contains("wet_bulb_zero_rain_min_agl_m"), "{msg}");
}

#[test]
fn elevation_changes_a_high_terrain_case() {
    // The same air over ground at 100 m and at 800 m. At 100 m the 1000 hPa-based layers
    // decide (5380 m, 1290 m: both cold, snow). At 800 m they are underground extrapolations;
    // the 850–700 hPa thickness (1545 m, marginal) and the wet-bulb 0 °C level 350 m above the
    // ground (marginal) decide instead: mixed rain and snow.
    use PrecipitationType as P;
    let s = GuidanceSettings::default();
    let mut inputs = low(5365.0, 1290.0);
    inputs.thickness_850_700 = LayerValue::above_ground(1545.0);
    inputs.wet_bulb_zero = crossing(450.0, 350.0);
    assert_eq!(classify(&inputs, &s), (P::Snow, Rule::LowGroundBothCold));
    let mut high = inputs;
    high.surface_height_m = 800.0;
    high.wet_bulb_zero = crossing(1150.0, 350.0);
    assert_eq!(
        classify(&high, &s),
        (P::RainSnowMix, Rule::RaisedGroundMarginal)
    );
    // An elevation adjustment of the critical thickness (a setting; off by default): with a
    // rise of 20 m per km, 850–700 at 800 m must exceed 1540 + 16 + 8 m to vote warm, and
    // 1560 m no longer does, so the case turns from rain to mixed.
    let mut warmish = high;
    warmish.thickness_850_700 = LayerValue::above_ground(1560.0);
    warmish.wet_bulb_zero = crossing(1500.0, 700.0);
    assert_eq!(
        classify(&warmish, &s),
        (P::Rain, Rule::RaisedGroundBothWarm)
    );
    let adjusted =
        GuidanceSettings::from_toml_str("critical_gain_m_per_km = 20.0").expect("valid settings");
    assert_eq!(
        classify(&warmish, &adjusted),
        (P::RainSnowMix, Rule::RaisedGroundMarginal)
    );
}

// ---------------------------------------------------------------------------------------------
// Whole grids.
// ---------------------------------------------------------------------------------------------

fn load(path: &Path) -> LoadedCycle {
    LoadedCycle::load(path, &IngestConfig::default(), &ComputeConfig::default())
        .unwrap_or_else(|e| panic!("loading {}: {e}", path.display()))
}

fn demo_cycle() -> (tempfile::TempDir, LoadedCycle) {
    let dir = tempfile::tempdir().expect("temporary directory");
    let path = hypsogrid::demo::write_demo_cycle(dir.path()).expect("demo cycle");
    let lc = load(&path);
    (dir, lc)
}

#[test]
fn demo_grid_thickness_equals_the_query_answers_and_categories_are_sensible() {
    // Invented data (the demo scenario): checks of consistency and plausibility only.
    let (_dir, lc) = demo_cycle();
    let s = GuidanceSettings::default();
    let last = lc.cycle.lead_times_s.len() - 1;
    let mut seen = std::collections::BTreeSet::new();
    for time in [0, last] {
        let g = guidance_grid(&lc, time, 0, &s).expect("guidance");
        assert_eq!(g.caution, CAUTION);
        // Thickness equals grid_field's answer for the same layer (same column model).
        for (layer, values, flags) in [
            (
                Layer {
                    bottom_pa: 100_000.0,
                    top_pa: 50_000.0,
                },
                &g.thickness_1000_500,
                &g.thickness_1000_500_flags,
            ),
            (
                Layer {
                    bottom_pa: 85_000.0,
                    top_pa: 70_000.0,
                },
                &g.thickness_850_700,
                &g.thickness_850_700_flags,
            ),
        ] {
            let f = grid_field(&lc, &Quantity::Thickness(layer), time, 0, false).expect("field");
            for ((a, b), (fa, fb)) in values.iter().zip(&f.values).zip(flags.iter().zip(&f.flags)) {
                assert!(
                    (a.is_nan() && b.is_nan()) || (a - b).abs() <= 0.01,
                    "{}: {a} vs {b}",
                    layer.label_hpa()
                );
                assert_eq!(fa & FLAG_BELOW_GROUND, fb & FLAG_BELOW_GROUND);
            }
        }
        let summary = g.summary();
        assert_eq!(summary.points, lc.cycle.grid.rows() * lc.cycle.grid.cols());
        assert_eq!(
            summary.categories.iter().map(|(_, n)| n).sum::<usize>(),
            summary.points
        );
        assert_eq!(
            summary.count(PrecipitationType::Indeterminate),
            0,
            "demo has every input"
        );
        for (c, n) in &summary.categories {
            if *n > 0 {
                seen.insert(*c);
            }
        }
        // Heights above the ground are never negative, and at-surface levels are at 0 m.
        for ((agl, flag), z) in g
            .freezing_level_agl_m
            .iter()
            .zip(&g.freezing_level_flags)
            .zip(&g.freezing_level_m)
        {
            if agl.is_finite() {
                assert!(*agl >= -1e-3, "{agl}");
                assert!(z.is_finite());
            }
            if flag & LEVEL_AT_SURFACE != 0 {
                assert_eq!(*agl, 0.0);
            }
        }
        // The wet-bulb 0 °C level is not above the 0 °C level (T_w ≤ T in unsaturated air).
        for (wb, fz) in g.wet_bulb_zero_m.iter().zip(&g.freezing_level_m) {
            if wb.is_finite() && fz.is_finite() {
                assert!(*wb <= fz + 1.0, "{wb} above {fz}");
            }
        }
        // Every category agrees with its rule.
        for (&c, &r) in g.category.iter().zip(&g.rule) {
            let rule = Rule::from_code(r).expect("known rule");
            let cat = PrecipitationType::from_code(c).expect("known category");
            let expect_snow = matches!(
                rule,
                Rule::ColumnBelowFreezing
                    | Rule::LowGroundBothCold
                    | Rule::RaisedGroundBothCold
                    | Rule::HighGroundCold
            );
            assert_eq!(expect_snow, cat == PrecipitationType::Snow, "{rule:?}");
        }
    }
    // The scenario's cold outbreak over a mild sector gives both rain and snow over 48 h.
    assert!(seen.contains(&PrecipitationType::Rain), "{seen:?}");
    assert!(seen.contains(&PrecipitationType::Snow), "{seen:?}");
}

#[test]
fn point_guidance_takes_the_nearest_column_and_interpolates_heights() {
    let (_dir, lc) = demo_cycle();
    let s = GuidanceSettings::default();
    let g = guidance_grid(&lc, 4, 0, &s).expect("guidance");
    for site in hypsogrid::demo::demo_sites() {
        let p = guidance_at_point(&lc, site.latitude, site.longitude, 4, 0, &s).expect("point");
        let (r, c) = p.nearest;
        assert_eq!(
            p.nearest_column.category.code(),
            g.category[[r, c]],
            "{}",
            site.name
        );
        assert_eq!(
            p.nearest_column.rule.code(),
            g.rule[[r, c]],
            "{}",
            site.name
        );
        assert_eq!(p.caution, CAUTION);
        // A bilinear value lies within the range of its four corners.
        let st = hypsogrid::grid::locate(&lc.cycle.grid, site.latitude, site.longitude)
            .expect("on the grid");
        let corners: Vec<f32> = st
            .rows
            .iter()
            .flat_map(|&r| st.cols.iter().map(move |&c| (r, c)))
            .map(|(r, c)| g.thickness_1000_500[[r, c]])
            .collect();
        let lo = corners.iter().copied().fold(f32::INFINITY, f32::min);
        let hi = corners.iter().copied().fold(f32::NEG_INFINITY, f32::max);
        let v = p.thickness_1000_500.value_m as f32;
        assert!(
            v >= lo - 0.01 && v <= hi + 0.01,
            "{}: {v} not in {lo}..{hi}",
            site.name
        );
    }
    // On a grid point exactly, the point answer is that column's.
    let (lat, lon) = (lc.cycle.grid.latitudes[10], lc.cycle.grid.longitudes[20]);
    let p = guidance_at_point(&lc, lat, lon, 4, 0, &s).expect("point");
    assert_eq!(p.nearest, (10, 20));
    assert!((p.freezing_level_m as f32 - g.freezing_level_m[[10, 20]]).abs() < 0.01);
}

#[test]
fn a_cycle_without_humidity_has_no_wet_bulb_level_and_says_so() {
    // The demo cycle with its humidity removed (heights recomputed dry).
    let (_dir, mut lc) = demo_cycle();
    lc.cycle.humidity = None;
    lc = LoadedCycle::computed(&lc.id, lc.cycle, &lc.config).expect("heights");
    let g = guidance_grid(&lc, 0, 0, &GuidanceSettings::default()).expect("guidance");
    assert!(g.wet_bulb_zero_m.iter().all(|v| v.is_nan()));
    assert!(g
        .wet_bulb_zero_flags
        .iter()
        .all(|f| f & LEVEL_NO_HUMIDITY != 0));
    assert!(
        g.notes.iter().any(|n| n.contains("no humidity")),
        "{:?}",
        g.notes
    );
    // Raised ground cannot be decided without it; low ground still can.
    let summary = g.summary();
    assert!(summary.rule_count(Rule::NoWetBulbZero) > 0);
    assert!(
        summary.count(PrecipitationType::Indeterminate) == summary.rule_count(Rule::NoWetBulbZero)
    );
}

/// Guidance on chosen rows and columns (an area, in any order) is the whole grid's at those
/// points, bit for bit, for every field: it is computed there alone, by the same columns.
#[test]
fn guidance_on_chosen_points_equals_the_whole_grid_there() {
    let (_dir, lc) = demo_cycle();
    let s = GuidanceSettings::default();
    let whole = guidance_grid(&lc, 4, 0, &s).expect("whole grid");
    let (rows, cols) = (lc.cycle.grid.rows(), lc.cycle.grid.cols());
    // Rows south to north and back, columns out of order and repeated: the answer follows.
    let pick_rows = vec![rows - 1, 0, rows / 2, rows / 3, rows / 2];
    let pick_cols = vec![cols / 4, cols - 1, 0, 3 * cols / 5];
    let part = guidance_on(&lc, (4, 0), &s, &pick_rows, &pick_cols).expect("chosen points");
    assert_eq!(part.category.dim(), (pick_rows.len(), pick_cols.len()));
    for (i, &r) in pick_rows.iter().enumerate() {
        assert_eq!(part.latitudes[i], lc.cycle.grid.latitudes[r]);
        for (j, &c) in pick_cols.iter().enumerate() {
            assert_eq!(part.longitudes[j], lc.cycle.grid.longitudes[c]);
            let (a, b) = ([i, j], [r, c]);
            let floats = [
                (&part.thickness_1000_500, &whole.thickness_1000_500),
                (&part.thickness_1000_850, &whole.thickness_1000_850),
                (&part.thickness_850_700, &whole.thickness_850_700),
                (&part.freezing_level_m, &whole.freezing_level_m),
                (&part.freezing_level_agl_m, &whole.freezing_level_agl_m),
                (&part.wet_bulb_zero_m, &whole.wet_bulb_zero_m),
                (&part.wet_bulb_zero_agl_m, &whole.wet_bulb_zero_agl_m),
            ];
            for (n, (p, w)) in floats.iter().enumerate() {
                assert_eq!(p[a].to_bits(), w[b].to_bits(), "field {n} at {b:?}");
            }
            let codes = [
                (
                    &part.thickness_1000_500_flags,
                    &whole.thickness_1000_500_flags,
                ),
                (
                    &part.thickness_1000_850_flags,
                    &whole.thickness_1000_850_flags,
                ),
                (
                    &part.thickness_850_700_flags,
                    &whole.thickness_850_700_flags,
                ),
                (&part.freezing_level_flags, &whole.freezing_level_flags),
                (&part.wet_bulb_zero_flags, &whole.wet_bulb_zero_flags),
                (&part.category, &whole.category),
                (&part.rule, &whole.rule),
            ];
            for (n, (p, w)) in codes.iter().enumerate() {
                assert_eq!(p[a], w[b], "code {n} at {b:?}");
            }
        }
    }
    // An index beyond the grid is refused by axis, before any column is computed.
    let e = guidance_on(&lc, (4, 0), &s, &[0, rows], &[0]).expect_err("row beyond the grid");
    assert!(
        matches!(e, GuidanceError::GridIndex { axis: "row", .. }),
        "{e}"
    );
    let e = guidance_on(&lc, (4, 0), &s, &[0], &[cols + 5]).expect_err("column beyond");
    assert!(
        e.to_string().contains(&format!("column {}", cols + 5)),
        "{e}"
    );
}

#[test]
fn requests_outside_the_cycle_are_refused_with_what_exists() {
    let (_dir, lc) = demo_cycle();
    let s = GuidanceSettings::default();
    let member = guidance_grid(&lc, 0, 3, &s)
        .err()
        .map(|e| e.to_string())
        .unwrap_or_default();
    assert!(
        member.contains("member 3") && member.contains("1 member"),
        "{member}"
    );
    let time = guidance_grid(&lc, 99, 0, &s)
        .err()
        .map(|e| e.to_string())
        .unwrap_or_default();
    assert!(
        time.contains("time step 99") && time.contains("7 time step"),
        "{time}"
    );
    let far = guidance_at_point(&lc, 10.0, 100.0, 0, 0, &s);
    assert!(matches!(far, Err(GuidanceError::Position(_))));
    let bad = GuidanceSettings {
        search_top_hpa: 0.0,
        ..GuidanceSettings::default()
    };
    assert!(matches!(
        guidance_grid(&lc, 0, 0, &bad),
        Err(GuidanceError::Setting {
            field: "search_top_hpa",
            ..
        })
    ));
}

#[test]
fn gfs_january_forecast_is_plausible() {
    // NCEP GFS 2.5°, run 2011-01-10 12Z, +120 h (valid 2011-01-15 12Z): northern-hemisphere
    // winter with very cold continental Arctic air (PROVENANCE.md). Plausibility, common
    // knowledge of January climate (from memory): the 0 °C level is at the surface over
    // interior Siberia; it lies at 4–5.5 km in the deep tropics; the 2 m temperature the same
    // file carries is below freezing where we put the 0 °C level at the surface.
    let Some(dir) = data_dir("gfs_january_forecast_is_plausible") else {
        return;
    };
    let path =
        dir.join("gfs-2p5deg-global-2011011012-f120/gfs_2p5deg_2011011012_f120_isobaric_subset.nc");
    let lc = load(&path);
    let s = GuidanceSettings::default();
    let started = std::time::Instant::now();
    let g = guidance_grid(&lc, 0, 0, &s).expect("guidance");
    eprintln!(
        "gfs 2.5° guidance ({} x {} x {}): {:.3} s",
        lc.cycle.grid.rows(),
        lc.cycle.grid.cols(),
        lc.cycle.vertical.levels(),
        started.elapsed().as_secs_f64()
    );
    let t2m: Vec<f32> = {
        let _session = hypsogrid::netcdf_session::lock();
        let f = netcdf::open(&path).expect("open");
        let v = f.variable("t2m").expect("t2m");
        v.get_values::<f32, _>(..).expect("values")
    };
    let cols = lc.cycle.grid.cols();
    let lats = &lc.cycle.grid.latitudes;
    let lons = &lc.cycle.grid.longitudes;
    let (mut siberia, mut siberia_surface, mut siberia_snow) = (0, 0, 0);
    let (mut tropics, mut tropics_ok) = (0, 0);
    let (mut at_surface, mut at_surface_cold) = (0, 0);
    for (r, &lat) in lats.iter().enumerate() {
        for (c, &lon) in lons.iter().enumerate() {
            let flags = g.freezing_level_flags[[r, c]];
            let z = g.freezing_level_m[[r, c]];
            if (55.0..=70.0).contains(&lat) && (90.0..=130.0).contains(&lon) {
                siberia += 1;
                siberia_surface += usize::from(flags & LEVEL_AT_SURFACE != 0);
                siberia_snow += usize::from(g.category[[r, c]] == PrecipitationType::Snow.code());
            }
            if (-10.0..=10.0).contains(&lat) {
                tropics += 1;
                tropics_ok += usize::from((4000.0..=5500.0).contains(&z));
            }
            if flags & LEVEL_AT_SURFACE != 0 {
                at_surface += 1;
                at_surface_cold += usize::from(f64::from(t2m[r * cols + c]) < ZERO_C + 2.0);
            }
        }
    }
    assert!(
        siberia_surface * 10 >= siberia * 9,
        "{siberia_surface}/{siberia} at the surface"
    );
    assert!(
        tropics_ok * 100 >= tropics * 95,
        "{tropics_ok}/{tropics} at 4-5.5 km"
    );
    assert!(
        at_surface_cold * 100 >= at_surface * 95,
        "{at_surface_cold}/{at_surface}"
    );
    let summary = g.summary();
    eprintln!("gfs categories: {:?}", summary.categories);
    for c in [
        PrecipitationType::Rain,
        PrecipitationType::Snow,
        PrecipitationType::RainSnowMix,
    ] {
        assert!(summary.count(c) > 0, "{c:?}: {:?}", summary.categories);
    }
    // Rain dominates a winter globe overall (the tropics and the summer hemisphere), snow the
    // Siberian box.
    assert!(summary.count(PrecipitationType::Rain) > summary.count(PrecipitationType::Snow));
    assert!(
        siberia_snow * 10 >= siberia * 9,
        "{siberia_snow}/{siberia} snow in Siberia"
    );
    assert!(summary.count(PrecipitationType::Indeterminate) * 100 < summary.points);
}
