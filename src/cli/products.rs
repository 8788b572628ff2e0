//! The product commands that work on a NetCDF file without a server: `isolines`, `chart`,
//! `guidance`, `ensemble` and `verify`. Each reads the file, computes its heights exactly as
//! the server does on load, and calls the same library functions as the service's
//! `ProductService`.

use std::io::Write;
use std::path::{Path, PathBuf};

use anyhow::{bail, Context, Result};
use clap::Args;

use hypsogrid::ingest::time::format_rfc3339_utc;
use hypsogrid::model::Layer;
use hypsogrid::products::ensemble::{ensemble_at_points, ensemble_grids, EnsembleStatistic};
use hypsogrid::products::guidance::{
    guidance_at_point, guidance_grid, guidance_on, GuidanceGrid, GuidanceSettings, PointGuidance,
    CAUTION,
};
use hypsogrid::products::orders::{
    field_chart, field_isolines, guidance_chart, isolines_geojson, quantity_title, resolve,
    ChartOptions, FieldChoice, LevelChoice, Resolved, LAYER_1000_500,
};
use hypsogrid::products::verify::{
    consistency, verify as verify_cycles, ConsistencyRequest, Region, ReportKind, ScoreRow,
    TruthSource, VerifyReport, VerifyRequest,
};
use hypsogrid::query::{select_area, BoundingBox, Quantity, TimeSelector};

use super::format::{csv_number, json_number, lead_label, number, Csv, OutputFormat, Table};
use super::{client, parse_layer, DatasetArgs};

/// Which field of the file: one quantity at one time step of one member.
#[derive(Debug, Args)]
pub(crate) struct FieldArgs {
    /// Thickness of the layer BOTTOM:TOP in hPa, e.g. 1000:500
    #[arg(long, value_name = "BOTTOM:TOP", value_parser = parse_layer, conflicts_with = "height")]
    layer: Option<Layer>,
    /// Geopotential height at a pressure in hPa, e.g. 500
    #[arg(long, value_name = "HPA", value_parser = client::parse_hpa)]
    height: Option<f64>,
    #[command(flatten)]
    when: WhenArgs,
    /// Extrapolate pressures below the ground or above the model top instead of refusing them
    #[arg(long)]
    extrapolate: bool,
}

/// One time step and one member.
#[derive(Debug, Args)]
pub(crate) struct WhenArgs {
    /// Time step: a lead time (12h, 90m, 1d, or hours) or a valid time in RFC 3339
    /// (2031-01-14T12:00:00Z) [default: the first]
    #[arg(long, value_name = "LEAD|TIME", value_parser = parse_time)]
    time: Option<TimeSelector>,
    /// Ensemble member, 0-based
    #[arg(long, value_name = "N", default_value_t = 0)]
    member: usize,
}

impl FieldArgs {
    /// The field, with `default` when neither --layer nor --height is given.
    fn choice(&self, default: Option<Quantity>) -> Result<FieldChoice> {
        let quantity = match (self.layer, self.height) {
            (Some(layer), _) => Quantity::Thickness(layer),
            (None, Some(p)) => Quantity::GeopotentialHeight { pressure_pa: p },
            (None, None) => match default {
                Some(q) => q,
                None => bail!("give the field: --layer BOTTOM:TOP or --height HPA"),
            },
        };
        Ok(FieldChoice {
            quantity,
            time: self.when.time,
            member: self.when.member,
            allow_extrapolation: self.extrapolate,
        })
    }
}

/// Parses a lead time (`12h`) or an RFC 3339 valid time (`2031-01-14T12:00:00Z`).
pub(crate) fn parse_time(text: &str) -> Result<TimeSelector, String> {
    let t = text.trim();
    if t.contains('T') || t.matches('-').count() >= 2 {
        let unix_seconds = hypsogrid::ingest::time::parse_date_time(t).ok_or_else(|| {
            format!("'{text}': not an RFC 3339 valid time such as 2031-01-14T12:00:00Z")
        })?;
        return Ok(TimeSelector::ValidTime { unix_seconds });
    }
    client::parse_lead_time(t).map(|seconds| TimeSelector::LeadTime { seconds })
}

/// `hypsogrid isolines`.
#[derive(Debug, Args)]
pub(crate) struct IsolinesArgs {
    /// Input cycle (NetCDF)
    input: PathBuf,
    #[command(flatten)]
    field: FieldArgs,
    /// Values to draw, gpm, comma separated (e.g. 5400 or 5280,5400)
    #[arg(
        long,
        value_name = "GPM",
        value_delimiter = ',',
        required_unless_present = "interval",
        conflicts_with = "interval"
    )]
    values: Vec<f64>,
    /// Draw every multiple of this interval, gpm, over the field's range (e.g. 60)
    #[arg(long, value_name = "GPM")]
    interval: Option<f64>,
    /// Offset of the interval's multiples, gpm
    #[arg(long, value_name = "GPM", default_value_t = 0.0, requires = "interval")]
    base: f64,
    /// Output GeoJSON file (RFC 7946); standard output when absent or `-`
    #[arg(long, short)]
    output: Option<PathBuf>,
    #[command(flatten)]
    dataset: DatasetArgs,
}

pub(super) fn isolines(args: IsolinesArgs) -> Result<()> {
    let lc = args.dataset.load(&args.input)?;
    let choice = args.field.choice(None)?;
    let levels = match args.interval {
        Some(interval) => LevelChoice::Interval {
            interval,
            base: args.base,
        },
        None => LevelChoice::Values(args.values.clone()),
    };
    let lines = field_isolines(&lc, &choice, &levels)
        .with_context(|| format!("isolines of '{}'", args.input.display()))?;
    let text = isolines_geojson(&lines);
    write_output(args.output.as_deref(), text.as_bytes())?;
    let rings = lines.lines.iter().filter(|l| l.closed).count();
    eprintln!(
        "{} line(s), {rings} closed, for {} at lead {}",
        lines.lines.len(),
        hypsogrid::products::orders::quantity_title(&lines.quantity),
        super::format::lead_label(lines.resolved.lead_time_s)
    );
    Ok(())
}

/// Writes bytes to a file atomically (a temporary file beside it, then a rename), or to
/// standard output for `None` or `-`.
fn write_output(path: Option<&Path>, bytes: &[u8]) -> Result<()> {
    match path {
        None => std::io::stdout().write_all(bytes)?,
        Some(p) if p.as_os_str() == "-" => std::io::stdout().write_all(bytes)?,
        Some(p) => {
            let dir = match p.parent() {
                Some(d) if !d.as_os_str().is_empty() => d,
                _ => Path::new("."),
            };
            let mut tmp = tempfile::NamedTempFile::new_in(dir)
                .with_context(|| format!("creating a temporary file beside '{}'", p.display()))?;
            tmp.write_all(bytes)
                .with_context(|| format!("writing '{}'", p.display()))?;
            tmp.persist(p)
                .with_context(|| format!("renaming into '{}'", p.display()))?;
        }
    }
    Ok(())
}

/// Which chart.
#[derive(Clone, Copy, Debug, PartialEq, Eq, clap::ValueEnum)]
pub(crate) enum ChartKind {
    /// Isolines of the chosen field (1000-500 hPa thickness when none is chosen).
    Field,
    /// Precipitation-type guidance categories with the 1000-500 hPa thickness lines.
    PrecipitationType,
}

/// `hypsogrid chart`.
#[derive(Debug, Args)]
pub(crate) struct ChartArgs {
    /// Input cycle (NetCDF)
    input: PathBuf,
    /// What to draw
    #[arg(long, value_enum, default_value_t = ChartKind::Field)]
    kind: ChartKind,
    #[command(flatten)]
    field: FieldArgs,
    /// Isoline interval, gpm
    #[arg(long, value_name = "GPM", default_value_t = 60.0)]
    interval: f64,
    /// Offset of the interval's multiples, gpm
    #[arg(long, value_name = "GPM", default_value_t = 0.0)]
    base: f64,
    /// Critical values drawn to stand out, gpm, comma separated [default: 5400 on
    /// 1000-500 hPa thickness, the guidance setting on guidance charts, else none]
    #[arg(long, value_name = "GPM", value_delimiter = ',')]
    critical: Option<Vec<f64>>,
    /// Fill between isolines with colour bands (field charts)
    #[arg(long)]
    fill: bool,
    /// Image size WIDTHxHEIGHT in pixels (200 to 4000 each)
    #[arg(long, value_name = "WxH", default_value = "1200x800", value_parser = parse_size)]
    size: (u32, u32),
    /// Guidance thresholds (TOML), for guidance charts
    #[arg(long, value_name = "FILE")]
    settings: Option<PathBuf>,
    /// Output PNG file
    #[arg(long, short)]
    output: PathBuf,
    #[command(flatten)]
    dataset: DatasetArgs,
}

fn parse_size(text: &str) -> Result<(u32, u32), String> {
    let (w, h) = text
        .split_once(['x', 'X'])
        .ok_or_else(|| format!("'{text}': expected WIDTHxHEIGHT, e.g. 1200x800"))?;
    let n = |s: &str| {
        s.trim()
            .parse::<u32>()
            .map_err(|_| format!("'{text}': '{s}' is not a whole number of pixels"))
    };
    Ok((n(w)?, n(h)?))
}

/// The guidance settings of the TOML file at `path` (validated), or the defaults (common
/// practice); errors name the file.
pub(super) fn guidance_settings(path: Option<&Path>) -> Result<GuidanceSettings> {
    match path {
        None => Ok(GuidanceSettings::default()),
        Some(p) => Ok(GuidanceSettings::from_toml_file(p)?),
    }
}

pub(super) fn chart(args: ChartArgs) -> Result<()> {
    let lc = args.dataset.load(&args.input)?;
    let options = ChartOptions {
        interval: args.interval,
        base: args.base,
        critical: args.critical.clone(),
        fill: args.fill,
        width: args.size.0,
        height: args.size.1,
    };
    let chart = match args.kind {
        ChartKind::Field => {
            let choice = args
                .field
                .choice(Some(Quantity::Thickness(LAYER_1000_500)))?;
            field_chart(&lc, &choice, &options)
        }
        ChartKind::PrecipitationType => {
            let settings = guidance_settings(args.settings.as_deref())?;
            guidance_chart(
                &lc,
                args.field.when.time.as_ref(),
                args.field.when.member,
                &settings,
                &options,
            )
        }
    }
    .with_context(|| format!("chart of '{}'", args.input.display()))?;
    write_output(Some(&args.output), &chart.png)?;
    eprintln!(
        "wrote {} ({} bytes), lead {}",
        args.output.display(),
        chart.png.len(),
        super::format::lead_label(chart.resolved.lead_time_s)
    );
    if let Some(caution) = chart.caution {
        eprintln!("Caution: {caution}");
    }
    Ok(())
}

/// `hypsogrid guidance`.
#[derive(Debug, Args)]
pub(crate) struct GuidanceArgs {
    /// Input cycle (NetCDF)
    input: PathBuf,
    #[command(flatten)]
    when: WhenArgs,
    /// A point LAT,LON in degrees (repeat for several); without points, a summary of the grid
    #[arg(long = "point", value_name = "LAT,LON", allow_hyphen_values = true, value_parser = client::parse_point)]
    points: Vec<(f64, f64)>,
    /// Summarise only the grid points in a box SOUTH,NORTH,WEST,EAST in degrees (an office's
    /// region), computing nothing outside it
    #[arg(long = "box", value_name = "S,N,W,E", allow_hyphen_values = true, value_parser = client::parse_bbox, conflicts_with = "points")]
    area: Option<client::BoxArg>,
    /// Guidance thresholds (TOML; every key optional, the defaults are common practice)
    #[arg(long, value_name = "FILE")]
    settings: Option<PathBuf>,
    /// How to print the answer
    #[arg(long, value_enum, default_value_t = OutputFormat::Table)]
    format: OutputFormat,
    #[command(flatten)]
    dataset: DatasetArgs,
}

pub(super) fn guidance(args: GuidanceArgs) -> Result<()> {
    let lc = args.dataset.load(&args.input)?;
    let settings = guidance_settings(args.settings.as_deref())?;
    let resolved = resolve(&lc, args.when.time.as_ref(), args.when.member)?;
    let context = || format!("guidance on '{}'", args.input.display());
    if let Some(b) = args.area {
        let bbox = BoundingBox::from(b);
        let area = select_area(&lc, &bbox, 1).map_err(|e| anyhow::anyhow!("--box: {e}"))?;
        let grid = guidance_on(
            &lc,
            (resolved.time_index, resolved.member),
            &settings,
            &area.rows,
            &area.cols,
        )
        .with_context(context)?;
        print!(
            "{}",
            render_guidance_summary(&grid, Some(&bbox), args.format)?
        );
    } else if args.points.is_empty() {
        let grid = guidance_grid(&lc, resolved.time_index, resolved.member, &settings)
            .with_context(context)?;
        print!("{}", render_guidance_summary(&grid, None, args.format)?);
    } else {
        let points = args
            .points
            .iter()
            .map(|&(lat, lon)| {
                guidance_at_point(
                    &lc,
                    lat,
                    lon,
                    resolved.time_index,
                    resolved.member,
                    &settings,
                )
            })
            .collect::<Result<Vec<_>, _>>()
            .with_context(context)?;
        print!(
            "{}",
            render_guidance_points(&resolved, &points, args.format)?
        );
    }
    Ok(())
}

/// The category and rule counts of `grid` (over `area` when given, else the whole grid).
fn render_guidance_summary(
    grid: &GuidanceGrid,
    area: Option<&BoundingBox>,
    format: OutputFormat,
) -> Result<String> {
    let over = area.map(|b| format!("{}..{} °N, {}..{} °E", b.south, b.north, b.west, b.east));
    let summary = grid.summary();
    Ok(match format {
        OutputFormat::Json => {
            let categories: serde_json::Map<String, serde_json::Value> = summary
                .categories
                .iter()
                .map(|(c, n)| (c.name().to_string(), serde_json::json!(n)))
                .collect();
            let rules: serde_json::Map<String, serde_json::Value> = summary
                .rules
                .iter()
                .map(|(r, n)| (r.name().to_string(), serde_json::json!(n)))
                .collect();
            let doc = serde_json::json!({
                "lead_time_s": grid.lead_time_s,
                "valid_time": grid.valid_time_unix_s.map(format_rfc3339_utc),
                "member": grid.member,
                "box": area.map(|b| serde_json::json!({
                    "south_deg": b.south, "north_deg": b.north,
                    "west_deg": b.west, "east_deg": b.east,
                })),
                "points": summary.points,
                "categories": categories,
                "rules": rules,
                "settings": grid.settings,
                "notes": grid.notes,
                "caution": grid.caution,
            });
            format!("{}\n", serde_json::to_string_pretty(&doc)?)
        }
        OutputFormat::Csv => {
            let mut csv = Csv::new(["category", "points"]);
            for (c, n) in &summary.categories {
                csv.record([c.name().to_string(), n.to_string()]);
            }
            let area_line = over
                .as_deref()
                .map(|o| format!("# box: {o}\n"))
                .unwrap_or_default();
            format!("# {}\n{area_line}{}", grid.caution, csv.finish())
        }
        OutputFormat::Table => {
            let mut out = format!(
                "Precipitation-type guidance, lead {}{}, member {}: {} points{}\n",
                lead_label(grid.lead_time_s),
                grid.valid_time_unix_s
                    .map(|t| format!(" (valid {})", format_rfc3339_utc(t)))
                    .unwrap_or_default(),
                grid.member,
                summary.points,
                over.as_deref()
                    .map(|o| format!(" in {o}"))
                    .unwrap_or_default()
            );
            let mut table = Table::new(["category", "points", "share"]);
            for (c, n) in &summary.categories {
                table.row([
                    c.name().to_string(),
                    n.to_string(),
                    format!("{:.1} %", 100.0 * *n as f64 / summary.points.max(1) as f64),
                ]);
            }
            out.push_str(&table.render());
            let mut rules = Table::new(["deciding rule", "points"]);
            for (r, n) in summary.rules.iter().filter(|(_, n)| *n > 0) {
                rules.row([r.name().to_string(), n.to_string()]);
            }
            out.push('\n');
            out.push_str(&rules.render());
            for note in &grid.notes {
                out.push_str(&format!("note: {note}\n"));
            }
            out.push_str(&format!("\nCaution: {}\n", grid.caution));
            out
        }
    })
}

fn render_guidance_points(
    resolved: &Resolved,
    points: &[PointGuidance],
    format: OutputFormat,
) -> Result<String> {
    let headers = [
        "latitude",
        "longitude",
        "category",
        "rule",
        "thk_1000_500_m",
        "thk_1000_850_m",
        "thk_850_700_m",
        "freezing_level_m",
        "freezing_level_agl_m",
        "wet_bulb_zero_m",
        "wet_bulb_zero_agl_m",
    ];
    let cells = |p: &PointGuidance, num: &dyn Fn(f64) -> String| -> Vec<String> {
        vec![
            num(p.latitude),
            num(p.longitude),
            p.nearest_column.category.name().to_string(),
            p.nearest_column.rule.name().to_string(),
            num(p.thickness_1000_500.value_m),
            num(p.thickness_1000_850.value_m),
            num(p.thickness_850_700.value_m),
            num(p.freezing_level_m),
            num(p.freezing_level_agl_m),
            num(p.wet_bulb_zero_m),
            num(p.wet_bulb_zero_agl_m),
        ]
    };
    Ok(match format {
        OutputFormat::Json => {
            let rows: Vec<serde_json::Value> = points
                .iter()
                .map(|p| {
                    serde_json::json!({
                        "latitude": p.latitude,
                        "longitude": p.longitude,
                        "category": p.nearest_column.category.name(),
                        "rule": p.nearest_column.rule.name(),
                        "rule_description": p.nearest_column.rule.description(),
                        "thickness_1000_500_m": json_number(p.thickness_1000_500.value_m),
                        "thickness_1000_850_m": json_number(p.thickness_1000_850.value_m),
                        "thickness_850_700_m": json_number(p.thickness_850_700.value_m),
                        "freezing_level_m": json_number(p.freezing_level_m),
                        "freezing_level_agl_m": json_number(p.freezing_level_agl_m),
                        "wet_bulb_zero_m": json_number(p.wet_bulb_zero_m),
                        "wet_bulb_zero_agl_m": json_number(p.wet_bulb_zero_agl_m),
                    })
                })
                .collect();
            let doc = serde_json::json!({
                "cycle": resolved.cycle_id,
                "lead_time_s": resolved.lead_time_s,
                "valid_time": resolved.valid_time_unix_s.map(format_rfc3339_utc),
                "member": resolved.member,
                "points": rows,
                "caution": CAUTION,
            });
            format!("{}\n", serde_json::to_string_pretty(&doc)?)
        }
        OutputFormat::Csv => {
            let mut csv = Csv::new(headers);
            for p in points {
                csv.record(cells(p, &csv_number));
            }
            format!("# {CAUTION}\n{}", csv.finish())
        }
        OutputFormat::Table => {
            let mut table = Table::new(headers);
            for p in points {
                table.row(cells(p, &|v| number(v, 1)));
            }
            format!(
                "Guidance, cycle '{}', lead {}, member {}\n{}\nCaution: {CAUTION}\n",
                resolved.cycle_id,
                lead_label(resolved.lead_time_s),
                resolved.member,
                table.render()
            )
        }
    })
}

/// `hypsogrid ensemble`.
#[derive(Debug, Args)]
pub(crate) struct EnsembleArgs {
    /// Input cycle with an ensemble member axis (NetCDF)
    input: PathBuf,
    #[command(flatten)]
    field: FieldArgs,
    /// Statistics: mean, spread, below:GPM, above:GPM (comma separated)
    #[arg(long = "statistic", value_name = "STAT", value_delimiter = ',', default_value = "mean,spread", value_parser = parse_statistic)]
    statistics: Vec<EnsembleStatistic>,
    /// A point LAT,LON in degrees (repeat for several); without points, the statistics over
    /// the box given by --bbox, or over the whole grid
    #[arg(long = "point", value_name = "LAT,LON", allow_hyphen_values = true, value_parser = client::parse_point)]
    points: Vec<(f64, f64)>,
    /// The box SOUTH,NORTH,WEST,EAST in degrees for grid statistics
    #[arg(long, value_name = "S,N,W,E", allow_hyphen_values = true, value_parser = client::parse_bbox, conflicts_with = "points")]
    bbox: Option<client::BoxArg>,
    /// How to print the answer
    #[arg(long, value_enum, default_value_t = OutputFormat::Table)]
    format: OutputFormat,
    #[command(flatten)]
    dataset: DatasetArgs,
}

pub(crate) fn parse_statistic(text: &str) -> Result<EnsembleStatistic, String> {
    let t = text.trim();
    let threshold = |v: &str| {
        v.trim()
            .parse::<f64>()
            .ok()
            .filter(|x| x.is_finite())
            .ok_or_else(|| format!("'{text}': '{v}' is not a threshold in gpm"))
    };
    match t.split_once(':') {
        None if t == "mean" => Ok(EnsembleStatistic::Mean),
        None if t == "spread" => Ok(EnsembleStatistic::Spread),
        Some(("below", v)) => Ok(EnsembleStatistic::ProbabilityBelow(threshold(v)?)),
        Some(("above", v)) => Ok(EnsembleStatistic::ProbabilityAbove(threshold(v)?)),
        _ => Err(format!(
            "'{text}': expected mean, spread, below:GPM or above:GPM"
        )),
    }
}

pub(super) fn ensemble(args: EnsembleArgs) -> Result<()> {
    let lc = args.dataset.load(&args.input)?;
    let choice = args
        .field
        .choice(Some(Quantity::Thickness(LAYER_1000_500)))?;
    let resolved = resolve(&lc, choice.time.as_ref(), 0)?;
    let context = || format!("ensemble statistics of '{}'", args.input.display());
    let labels: Vec<String> = args.statistics.iter().map(|s| s.label()).collect();
    let mut headers = vec!["latitude".to_string(), "longitude".to_string()];
    headers.extend(labels.iter().cloned());
    headers.push("members_used".to_string());
    let mut rows: Vec<(f64, f64, Vec<f64>, usize)> = Vec::new();
    if args.points.is_empty() {
        let fields = ensemble_grids(&lc, &choice.quantity, resolved.time_index, &args.statistics)
            .with_context(context)?;
        let bbox = args.bbox.map(BoundingBox::from);
        let selection = select_area(&lc, &bbox.unwrap_or(WHOLE_GLOBE), 1)?;
        for (&r, &lat) in selection.rows.iter().zip(&selection.latitudes) {
            for (&c, &lon) in selection.cols.iter().zip(&selection.longitudes) {
                let values = fields.iter().map(|f| f.values[[r, c]]).collect();
                let used = fields
                    .first()
                    .map_or(0, |f| f.members_used[[r, c]] as usize);
                rows.push((lat, lon, values, used));
            }
        }
    } else {
        let points = ensemble_at_points(
            &lc,
            &args.points,
            &choice.quantity,
            resolved.time_index,
            &args.statistics,
        )
        .with_context(context)?;
        for p in points {
            rows.push((p.latitude, p.longitude, p.values, p.members_used));
        }
    }
    let probability = args.statistics.iter().any(|s| {
        matches!(
            s,
            EnsembleStatistic::ProbabilityBelow(_) | EnsembleStatistic::ProbabilityAbove(_)
        )
    });
    let caution = probability.then_some(CAUTION);
    let title = format!(
        "Ensemble of {} members, {}, cycle '{}', lead {}",
        lc.cycle.members,
        quantity_title(&choice.quantity),
        lc.id,
        lead_label(resolved.lead_time_s)
    );
    match args.format {
        OutputFormat::Json => {
            let doc = serde_json::json!({
                "cycle": lc.id,
                "members": lc.cycle.members,
                "quantity": quantity_title(&choice.quantity),
                "lead_time_s": resolved.lead_time_s,
                "valid_time": resolved.valid_time_unix_s.map(format_rfc3339_utc),
                "statistics": labels,
                "rows": rows.iter().map(|(lat, lon, v, used)| serde_json::json!({
                    "latitude": lat, "longitude": lon,
                    "values": v.iter().map(|x| json_number(*x)).collect::<Vec<_>>(),
                    "members_used": used,
                })).collect::<Vec<_>>(),
                "caution": caution,
            });
            println!("{}", serde_json::to_string_pretty(&doc)?);
        }
        OutputFormat::Csv => {
            let mut csv = Csv::new(&headers);
            for (lat, lon, v, used) in &rows {
                let mut cells = vec![csv_number(*lat), csv_number(*lon)];
                cells.extend(v.iter().map(|x| csv_number(*x)));
                cells.push(used.to_string());
                csv.record(cells);
            }
            if let Some(c) = caution {
                println!("# {c}");
            }
            print!("{}", csv.finish());
        }
        OutputFormat::Table => {
            println!("{title}");
            if args.points.is_empty() {
                // A grid is too long to read as a table: summarise each statistic.
                let mut table = Table::new(["statistic", "points", "min", "mean", "max"]);
                for (i, label) in labels.iter().enumerate() {
                    let finite: Vec<f64> = rows
                        .iter()
                        .map(|r| r.2[i])
                        .filter(|v| v.is_finite())
                        .collect();
                    let (lo, hi) = finite
                        .iter()
                        .fold((f64::INFINITY, f64::NEG_INFINITY), |(a, b), &v| {
                            (a.min(v), b.max(v))
                        });
                    let mean = finite.iter().sum::<f64>() / finite.len().max(1) as f64;
                    table.row([
                        label.clone(),
                        finite.len().to_string(),
                        number(lo, 3),
                        number(mean, 3),
                        number(hi, 3),
                    ]);
                }
                print!("{}", table.render());
            } else {
                let mut table = Table::new(headers.iter().map(String::as_str));
                for (lat, lon, v, used) in &rows {
                    let mut cells = vec![number(*lat, 3), number(*lon, 3)];
                    cells.extend(v.iter().map(|x| number(*x, 3)));
                    cells.push(used.to_string());
                    table.row(cells);
                }
                print!("{}", table.render());
            }
            if let Some(c) = caution {
                println!("\nCaution: {c}");
            }
        }
    }
    Ok(())
}

/// A box that holds every grid point of any cycle.
const WHOLE_GLOBE: BoundingBox = BoundingBox {
    south: -90.0,
    north: 90.0,
    west: -180.0,
    east: 180.0,
};

/// `hypsogrid verify`.
#[derive(Debug, Args)]
pub(crate) struct VerifyArgs {
    /// Forecast cycle (NetCDF)
    forecast: PathBuf,
    /// Analysis valid at a forecast time (NetCDF); without it, the forecast file's computed
    /// heights are checked against the heights the file itself carries
    analysis: Option<PathBuf>,
    /// Thickness of a layer BOTTOM:TOP in hPa (repeat or comma-separate)
    #[arg(long = "layer", value_name = "BOTTOM:TOP", value_delimiter = ',', value_parser = parse_layer)]
    layers: Vec<Layer>,
    /// Geopotential height at a pressure in hPa (repeat or comma-separate) [default: every
    /// level, when no layer is given either]
    #[arg(long = "height", value_name = "HPA", value_delimiter = ',', value_parser = client::parse_hpa)]
    heights_pa: Vec<f64>,
    /// Regions: global, northern-extratropics, tropics, southern-extratropics (WMO-No. 485),
    /// comma separated [default: all four]
    #[arg(long = "region", value_name = "NAME", value_delimiter = ',', value_parser = parse_region)]
    regions: Vec<Region>,
    /// A box of your own, SOUTH,NORTH,WEST,EAST in degrees (repeat for several)
    #[arg(long = "box", value_name = "S,N,W,E", allow_hyphen_values = true, value_parser = client::parse_bbox)]
    boxes: Vec<client::BoxArg>,
    /// With an analysis: the forecast lead time to verify, or an RFC 3339 valid time (the
    /// analysis step valid then, against the forecast step valid then) [default: the first
    /// analysis step the forecast has]; for a single-file check, the time step (lead or valid
    /// time) [default: the first]
    #[arg(long, value_name = "LEAD|TIME", value_parser = parse_time)]
    time: Option<TimeSelector>,
    /// Forecast member, 0-based
    #[arg(long, value_name = "N", default_value_t = 0)]
    member: usize,
    /// Keep points whose level lies below the ground (extrapolated); left out by default
    #[arg(long)]
    include_below_ground: bool,
    /// How to print the scores
    #[arg(long, value_enum, default_value_t = OutputFormat::Table)]
    format: OutputFormat,
    #[command(flatten)]
    dataset: DatasetArgs,
}

fn parse_region(text: &str) -> Result<Region, String> {
    match text.trim() {
        "global" | "whole-domain" => Ok(Region::Global),
        "northern-extratropics" | "nh" => Ok(Region::NorthernExtratropics),
        "tropics" | "tr" => Ok(Region::Tropics),
        "southern-extratropics" | "sh" => Ok(Region::SouthernExtratropics),
        other => Err(format!(
            "region '{other}': expected global, northern-extratropics, tropics or southern-extratropics (or give --box)"
        )),
    }
}

pub(super) fn verify(args: VerifyArgs) -> Result<()> {
    let forecast = args.dataset.load(&args.forecast)?;
    let mut items: Vec<Quantity> = args
        .heights_pa
        .iter()
        .map(|&p| Quantity::GeopotentialHeight { pressure_pa: p })
        .collect();
    items.extend(args.layers.iter().map(|&l| Quantity::Thickness(l)));
    let mut regions = args.regions.clone();
    regions.extend(args.boxes.iter().map(|&b| Region::Box(b.into())));
    let report = match &args.analysis {
        Some(path) => {
            let analysis = args.dataset.load(path)?;
            // A lead time picks the forecast step (and the analysis step valid then); a valid
            // time picks the analysis step valid then (and the forecast step valid then).
            let (lead_time_s, analysis_time) = match args.time {
                None => (None, None),
                Some(TimeSelector::LeadTime { seconds }) => (Some(seconds), None),
                Some(valid @ TimeSelector::ValidTime { .. }) => (None, Some(valid)),
            };
            let request = VerifyRequest {
                items,
                regions,
                member: args.member,
                lead_time_s,
                analysis_time,
                include_below_ground: args.include_below_ground,
                ..VerifyRequest::default()
            };
            verify_cycles(&forecast, &analysis, &request).with_context(|| {
                format!(
                    "verifying '{}' against '{}'",
                    args.forecast.display(),
                    path.display()
                )
            })?
        }
        None => {
            let request = ConsistencyRequest {
                items,
                regions,
                member: args.member,
                time: args.time,
                include_below_ground: args.include_below_ground,
            };
            consistency(&forecast, &request)
                .with_context(|| format!("checking '{}'", args.forecast.display()))?
        }
    };
    print!("{}", render_report(&report, args.format)?);
    Ok(())
}

fn render_report(report: &VerifyReport, format: OutputFormat) -> Result<String> {
    let opt = |v: Option<f64>, num: &dyn Fn(f64) -> String| v.map(num).unwrap_or_default();
    let headers = [
        "level_hpa",
        "layer_bottom_hpa",
        "layer_top_hpa",
        "region",
        "count",
        "bias_m",
        "rmse_m",
        "mae_m",
        "sd_m",
        "corr",
    ];
    let cells = |r: &ScoreRow, num: &dyn Fn(f64) -> String| -> Vec<String> {
        vec![
            opt(r.level_hpa, num),
            opt(r.layer_bottom_hpa, num),
            opt(r.layer_top_hpa, num),
            r.region.clone(),
            r.scores.count.to_string(),
            num(r.scores.bias_m),
            num(r.scores.rmse_m),
            num(r.scores.mae_m),
            num(r.scores.sd_m),
            num(r.scores.corr),
        ]
    };
    Ok(match format {
        OutputFormat::Json => format!("{}\n", serde_json::to_string_pretty(&report.rows)?),
        OutputFormat::Csv => {
            let mut csv = Csv::new(headers);
            for r in &report.rows {
                csv.record(cells(r, &csv_number));
            }
            csv.finish()
        }
        OutputFormat::Table => {
            let what = match report.kind {
                ReportKind::ForecastVsAnalysis => format!(
                    "'{}' (lead {}) against analysis '{}'",
                    report.forecast_id,
                    lead_label(report.lead_time_s),
                    report.analysis_id
                ),
                ReportKind::Consistency => format!(
                    "'{}' (lead {}): computed heights against the file's own heights",
                    report.forecast_id,
                    lead_label(report.lead_time_s)
                ),
            };
            let mut out = format!(
                "Verification of {what}\nvalid {}, truth: {}, {}; scores weighted by cos(latitude)\n",
                report.valid_time.as_deref().unwrap_or("unknown"),
                match report.truth_source {
                    TruthSource::FileHeights => "the file's own geopotential height",
                    TruthSource::Computed => "heights computed from temperature and humidity",
                    TruthSource::Mixed => "file heights where present, else computed",
                },
                if report.regridded {
                    "forecast interpolated bilinearly to the analysis grid"
                } else {
                    "same grid"
                }
            );
            let mut table = Table::new(headers);
            for r in &report.rows {
                let mut c = cells(r, &|v| number(v, 2));
                c[9] = number(r.scores.corr, 5);
                table.row(c);
            }
            out.push_str(&table.render());
            for note in &report.notes {
                out.push_str(&format!("note: {note}\n"));
            }
            out
        }
    })
}
