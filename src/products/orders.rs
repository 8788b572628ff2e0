//! What the command line and the service share: a field chosen on one loaded cycle, resolved
//! to a time step and member, and the runs of each whole-grid product on it (isolines, charts,
//! the guidance chart). Both doors call these functions, so a chart drawn by `hypsogrid chart`
//! on a file and one returned by `RenderChart` from the server are the same bytes.

use crate::model::Layer;
use crate::query::{grid_field, time_index, GridField, LoadedCycle, Quantity, TimeSelector};

use crate::ingest::time::format_rfc3339_utc;

use super::chart::{render_png, Category, ChartFill, ChartSpec, TitleBlock, CATEGORY_COLOURS};
use super::geojson::{to_geojson_string, IsolineMetadata, IsolineQuantity};
use super::guidance::{guidance_grid, GuidanceSettings, PrecipitationType, CAUTION};
use super::isolines::{interval_levels, is_global_in_longitude, isolines, Isoline, IsolineOptions};
use super::ProductError;

/// One field of a cycle: a quantity at one time step of one member.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct FieldChoice {
    /// Height at a pressure, or thickness of a layer.
    pub quantity: Quantity,
    /// Which time step; `None` for the first.
    pub time: Option<TimeSelector>,
    /// Ensemble member index.
    pub member: usize,
    /// Extrapolate pressures outside the data instead of refusing them.
    pub allow_extrapolation: bool,
}

/// What a choice resolved to on a cycle: every product repeats it.
#[derive(Clone, Debug, PartialEq)]
pub struct Resolved {
    /// The cycle id.
    pub cycle_id: String,
    /// Index of the time step.
    pub time_index: usize,
    /// Lead time, seconds.
    pub lead_time_s: i64,
    /// Valid time, seconds since the Unix epoch, when the cycle has a reference time.
    pub valid_time_unix_s: Option<i64>,
    /// Reference time of the cycle, seconds since the Unix epoch, when known.
    pub reference_time_unix_s: Option<i64>,
    /// The member.
    pub member: usize,
}

/// Resolves the time step (the first when none is named) and checks the member.
pub fn resolve(
    lc: &LoadedCycle,
    time: Option<&TimeSelector>,
    member: usize,
) -> Result<Resolved, ProductError> {
    let index = match time {
        Some(t) => time_index(lc, t)?,
        None => 0,
    };
    crate::query::check_member(lc, member)?;
    Ok(Resolved {
        cycle_id: lc.id.clone(),
        time_index: index,
        lead_time_s: lc.cycle.lead_times_s.get(index).copied().unwrap_or(0),
        valid_time_unix_s: lc.valid_time_unix_s(index),
        reference_time_unix_s: lc.reference_time_unix_s(),
        member,
    })
}

/// The field a choice names, on the whole grid, with what it resolved to.
pub fn chosen_field(
    lc: &LoadedCycle,
    choice: &FieldChoice,
) -> Result<(Resolved, GridField), ProductError> {
    let resolved = resolve(lc, choice.time.as_ref(), choice.member)?;
    let field = grid_field(
        lc,
        &choice.quantity,
        resolved.time_index,
        choice.member,
        choice.allow_extrapolation,
    )?;
    Ok((resolved, field))
}

/// Which isoline values to trace.
#[derive(Clone, Debug, PartialEq)]
pub enum LevelChoice {
    /// These values, gpm.
    Values(Vec<f64>),
    /// Every multiple of `interval` offset by `base` within the field's range.
    Interval {
        /// Spacing, gpm.
        interval: f64,
        /// Offset, gpm.
        base: f64,
    },
}

/// Isolines of one field.
#[derive(Clone, Debug, PartialEq)]
pub struct FieldIsolines {
    /// What the choice resolved to.
    pub resolved: Resolved,
    /// The quantity contoured.
    pub quantity: Quantity,
    /// The lines, `[longitude, latitude]` vertices in the grid's longitude frame.
    pub lines: Vec<Isoline>,
}

/// Traces the isolines of a chosen field (wrapping the seam of a global grid).
pub fn field_isolines(
    lc: &LoadedCycle,
    choice: &FieldChoice,
    levels: &LevelChoice,
) -> Result<FieldIsolines, ProductError> {
    let (resolved, field) = chosen_field(lc, choice)?;
    let values = match levels {
        // `isolines` refuses a value that is not finite, naming its index.
        LevelChoice::Values(v) => v.clone(),
        LevelChoice::Interval { interval, base } => {
            interval_levels(field.values.view(), *interval, *base)?
        }
    };
    let grid = &lc.cycle.grid;
    let options = IsolineOptions {
        wrap_longitude: is_global_in_longitude(&grid.longitudes),
    };
    let lines = isolines(
        field.values.view(),
        &grid.latitudes,
        &grid.longitudes,
        &values,
        &options,
    )?;
    Ok(FieldIsolines {
        resolved,
        quantity: choice.quantity,
        lines,
    })
}

/// A short name of a quantity for titles and file properties: `1000–500 hPa thickness` or
/// `500 hPa height`.
pub fn quantity_title(q: &Quantity) -> String {
    match q {
        Quantity::Thickness(layer) => format!("{} hPa thickness", dash_label(layer)),
        Quantity::GeopotentialHeight { pressure_pa } => {
            format!("{} hPa geopotential height", trim(pressure_pa / 100.0))
        }
    }
}

fn dash_label(layer: &Layer) -> String {
    format!(
        "{}\u{2013}{}",
        trim(layer.bottom_pa / 100.0),
        trim(layer.top_pa / 100.0)
    )
}

fn trim(v: f64) -> String {
    if (v - v.round()).abs() < 1e-9 {
        format!("{}", v.round() as i64)
    } else {
        format!("{v}")
    }
}

/// The GeoJSON properties of a field's isolines: quantity, layer or level, valid time, cycle.
pub fn isoline_metadata(lines: &FieldIsolines) -> IsolineMetadata {
    let quantity = match lines.quantity {
        Quantity::Thickness(layer) => IsolineQuantity::Thickness {
            layer_bottom_hpa: layer.bottom_pa / 100.0,
            layer_top_hpa: layer.top_pa / 100.0,
        },
        Quantity::GeopotentialHeight { pressure_pa } => IsolineQuantity::GeopotentialHeight {
            pressure_hpa: pressure_pa / 100.0,
        },
    };
    IsolineMetadata {
        quantity,
        valid_time: lines.resolved.valid_time_unix_s.map(format_rfc3339_utc),
        cycle: Some(lines.resolved.cycle_id.clone()),
    }
}

/// The isolines of a field as RFC 7946 GeoJSON text.
pub fn isolines_geojson(lines: &FieldIsolines) -> String {
    to_geojson_string(&lines.lines, &isoline_metadata(lines))
}

/// Size and style of a chart.
#[derive(Clone, Debug, PartialEq)]
pub struct ChartOptions {
    /// Isoline interval, gpm.
    pub interval: f64,
    /// Offset of the interval's multiples, gpm.
    pub base: f64,
    /// Critical values drawn so that they stand out; `None` for the product's default (5400
    /// m, or the guidance setting, on 1000–500 hPa thickness; none on other fields).
    pub critical: Option<Vec<f64>>,
    /// Fill between isolines with colour bands (field charts).
    pub fill: bool,
    /// Width, pixels.
    pub width: u32,
    /// Height, pixels.
    pub height: u32,
}

impl Default for ChartOptions {
    fn default() -> Self {
        Self {
            interval: 60.0,
            base: 0.0,
            critical: None,
            fill: false,
            width: 1200,
            height: 800,
        }
    }
}

/// A drawn chart.
#[derive(Clone, Debug, PartialEq)]
pub struct Chart {
    /// What the choice resolved to.
    pub resolved: Resolved,
    /// PNG bytes.
    pub png: Vec<u8>,
    /// The caution printed on the chart, for guidance charts.
    pub caution: Option<&'static str>,
}

/// The 1000–500 hPa layer that thickness charts and the rain–snow line are drawn for.
pub const LAYER_1000_500: Layer = Layer {
    bottom_pa: 100_000.0,
    top_pa: 50_000.0,
};

/// The critical 1000–500 hPa thickness drawn when none is given: 5400 m (common practice,
/// GUIDE §3).
const DEFAULT_CRITICAL_1000_500_M: f64 = 5400.0;

fn title_block(lc: &LoadedCycle, resolved: &Resolved, quantity: String) -> TitleBlock {
    TitleBlock {
        quantity,
        cycle: Some(lc.id.clone()),
        reference_time: resolved.reference_time_unix_s.map(format_rfc3339_utc),
        lead_hours: Some(resolved.lead_time_s as f64 / 3600.0),
        valid_time: resolved.valid_time_unix_s.map(format_rfc3339_utc),
    }
}

fn is_1000_500(q: &Quantity) -> bool {
    matches!(q, Quantity::Thickness(l) if (l.bottom_pa - 100_000.0).abs() < 1e-6 && (l.top_pa - 50_000.0).abs() < 1e-6)
}

/// A chart of a chosen field: isolines at the interval, the critical lines emphasised,
/// optionally colour bands between lines.
pub fn field_chart(
    lc: &LoadedCycle,
    choice: &FieldChoice,
    options: &ChartOptions,
) -> Result<Chart, ProductError> {
    let (resolved, field) = chosen_field(lc, choice)?;
    let critical = match &options.critical {
        Some(c) => c.clone(),
        None if is_1000_500(&choice.quantity) => vec![DEFAULT_CRITICAL_1000_500_M],
        None => Vec::new(),
    };
    let grid = &lc.cycle.grid;
    let spec = ChartSpec {
        values: field.values.view(),
        latitudes: &grid.latitudes,
        longitudes: &grid.longitudes,
        wrap_longitude: is_global_in_longitude(&grid.longitudes),
        interval: options.interval,
        base: options.base,
        critical,
        fill: if options.fill {
            ChartFill::Bands
        } else {
            ChartFill::None
        },
        title: title_block(
            lc,
            &resolved,
            format!("{} (m)", quantity_title(&choice.quantity)),
        ),
        caution: None,
        width: options.width,
        height: options.height,
    };
    let png = render_png(&spec)?;
    Ok(Chart {
        resolved,
        png,
        caution: None,
    })
}

/// Colour of each precipitation-type category on guidance charts, by category code.
fn category_legend() -> Vec<Category> {
    PrecipitationType::ALL
        .iter()
        .map(|p| Category {
            name: p.name().to_string(),
            colour: match p {
                PrecipitationType::Indeterminate => CATEGORY_COLOURS[7],
                PrecipitationType::Rain => CATEGORY_COLOURS[0],
                PrecipitationType::RainSnowMix => CATEGORY_COLOURS[2],
                PrecipitationType::Snow => CATEGORY_COLOURS[1],
                PrecipitationType::FreezingRainOrIcePellets => CATEGORY_COLOURS[4],
            },
        })
        .collect()
}

/// The precipitation-type guidance chart: the category of every grid point as a fill, the
/// 1000–500 hPa thickness lines over it with the critical line emphasised, and the caution
/// printed under the map.
pub fn guidance_chart(
    lc: &LoadedCycle,
    time: Option<&TimeSelector>,
    member: usize,
    settings: &GuidanceSettings,
    options: &ChartOptions,
) -> Result<Chart, ProductError> {
    let resolved = resolve(lc, time, member)?;
    let g = guidance_grid(lc, resolved.time_index, member, settings)?;
    let critical = options
        .critical
        .clone()
        .unwrap_or_else(|| vec![settings.critical_1000_500_m]);
    let grid = &lc.cycle.grid;
    let spec = ChartSpec {
        values: g.thickness_1000_500.view(),
        latitudes: &grid.latitudes,
        longitudes: &grid.longitudes,
        wrap_longitude: is_global_in_longitude(&grid.longitudes),
        interval: options.interval,
        base: options.base,
        critical,
        fill: ChartFill::Categories {
            classes: g.category.view(),
            legend: category_legend(),
        },
        title: title_block(
            lc,
            &resolved,
            "Precipitation-type guidance, 1000\u{2013}500 hPa thickness (m)".to_string(),
        ),
        caution: Some(CAUTION.to_string()),
        width: options.width,
        height: options.height,
    };
    let png = render_png(&spec)?;
    Ok(Chart {
        resolved,
        png,
        caution: Some(CAUTION),
    })
}
