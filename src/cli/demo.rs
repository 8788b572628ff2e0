//! `hypsogrid demo`: the invented scenario through the real service path. It writes the
//! scenario as a NetCDF cycle into a folder, loads that folder into a cycle store the way
//! `serve` does, starts the gRPC server in-process on a free loopback port, asks it over gRPC
//! with the generated client (catalogue, profiles, a position time series, area fields), prints
//! a summary a forecaster reads, and shuts the server down.

use std::fmt::Write as _;
use std::net::SocketAddr;
use std::path::PathBuf;
use std::sync::Arc;
use std::time::Duration;

use anyhow::{bail, Context, Result};

use hypsogrid::compute::ComputeConfig;
use hypsogrid::demo::{demo_sites, write_demo_cycle, write_demo_ensemble, Site, DEMO_FILE_NAME};
use hypsogrid::ingest::IngestConfig;
use hypsogrid::model::Layer;
use hypsogrid::pb;
use hypsogrid::service::{serve_on, ServiceConfig};
use hypsogrid::store::{CycleStore, StoreConfig};
use hypsogrid::watch::{scan_once, WatchConfig, WatchState};

use super::client::{
    client_on, fetch_area, lead, status_error, thickness, AreaResult, BearerToken, Client,
};
use super::format::lead_label;
use super::DemoArgs;

mod products;

/// Common-practice rain–snow line for 1000–500 hPa thickness in North American practice
/// (GUIDE §3); many European offices use about 5280 m. Guidance only.
const CRITICAL_1000_500_M: f64 = 5400.0;
/// Common-practice rain–snow line for 1000–850 hPa thickness (GUIDE §3). Guidance only.
const CRITICAL_1000_850_M: f64 = 1300.0;
/// Common-practice rain–snow line for 850–700 hPa thickness (GUIDE §3). Guidance only.
const CRITICAL_850_700_M: f64 = 1540.0;

const LAYER_1000_500: Layer = Layer {
    bottom_pa: 100000.0,
    top_pa: 50000.0,
};
const LAYER_1000_850: Layer = Layer {
    bottom_pa: 100000.0,
    top_pa: 85000.0,
};
const LAYER_850_700: Layer = Layer {
    bottom_pa: 85000.0,
    top_pa: 70000.0,
};

const FLAG_BELOW_GROUND: u8 = pb::PointFlag::BelowGround as u8;

pub(super) fn run(args: DemoArgs) -> Result<()> {
    let dir: PathBuf = args.keep.clone();
    std::fs::create_dir_all(&dir)
        .with_context(|| format!("creating folder '{}'", dir.display()))?;
    let input = write_demo_cycle(&dir)?;
    let ensemble = write_demo_ensemble(&dir)?;
    let runtime = tokio::runtime::Builder::new_multi_thread()
        .enable_all()
        .build()
        .context("starting the async runtime")?;
    let text = runtime.block_on(serve_and_query(dir.clone()))?;
    print!("{text}");
    println!("inputs: {} and {}", input.display(), ensemble.display());
    Ok(())
}

/// Loads the folder, serves it on 127.0.0.1:0, queries it, and stops the server whatever
/// the queries gave.
async fn serve_and_query(dir: PathBuf) -> Result<String> {
    let store = Arc::new(CycleStore::new(StoreConfig::default()));
    // The demo file was written a moment ago and is complete: no need to wait for it to
    // settle.
    let watch = WatchConfig {
        settle: Duration::ZERO,
        ..WatchConfig::new(&dir)
    };
    let mut state = WatchState::new();
    let report = scan_once(
        &store,
        &mut state,
        &watch,
        &IngestConfig::default(),
        &ComputeConfig::default(),
    )
    .await;
    if let Some((path, error)) = report
        .failed
        .iter()
        .find(|(p, _)| p.file_name().is_some_and(|n| n == DEMO_FILE_NAME))
    {
        bail!("the demo cycle '{}' did not load: {error}", path.display());
    }

    let listener = tokio::net::TcpListener::bind("127.0.0.1:0")
        .await
        .context("binding a loopback port for the demo server")?;
    let address = listener
        .local_addr()
        .context("reading the demo server's port")?;
    let (stop_tx, stop_rx) = tokio::sync::oneshot::channel::<()>();
    let server = tokio::spawn(serve_on(
        listener,
        Arc::clone(&store),
        ServiceConfig::default(),
        async {
            // A dropped sender stops the server as well.
            let _ = stop_rx.await;
        },
    ));
    let answer = match query(address).await {
        Ok(heights) => products::query(address, &dir)
            .await
            .map(|products| format!("{heights}\n{products}")),
        Err(e) => Err(e),
    };
    let _ = stop_tx.send(());
    server
        .await
        .context("the demo server stopped abnormally")?
        .context("demo server")?;
    answer
}

/// What the demo asks the server for.
struct Answers {
    address: SocketAddr,
    entry: pb::CycleEntry,
    /// Surface height at each site (from a profile at the first lead time), gpm.
    elevations: Vec<Option<f64>>,
    position: pb::PositionResponse,
    /// One area field of 1000–500 hPa thickness per lead time.
    areas: Vec<AreaResult>,
    calls: usize,
}

async fn query(address: SocketAddr) -> Result<String> {
    let channel = tonic::transport::Endpoint::from_shared(format!("http://{address}"))
        .context("demo server url")?
        .connect_timeout(Duration::from_secs(5))
        .timeout(Duration::from_secs(60))
        .connect()
        .await
        .with_context(|| format!("connecting to the demo server on {address}"))?;
    let mut client = client_on(channel, BearerToken::new(None)?);
    let mut calls = 0;

    let catalogue = client
        .get_catalogue(pb::CatalogueRequest {})
        .await
        .map_err(|s| status_error("catalogue", s))?
        .into_inner();
    calls += 1;
    let entry = catalogue
        .cycles
        .iter()
        .find(|c| c.id == DEMO_FILE_NAME)
        .cloned()
        .with_context(|| {
            format!(
                "the demo cycle is not in the server's catalogue ({} cycle(s), {} failure(s))",
                catalogue.cycles.len(),
                catalogue.failures.len()
            )
        })?;
    let description = entry.description.clone().unwrap_or_default();
    let first_lead = *description
        .lead_times_s
        .first()
        .context("the demo cycle has no lead times")?;

    let sites = demo_sites();
    let mut elevations = Vec::with_capacity(sites.len());
    for site in &sites {
        let profile = client
            .query_profile(pb::ProfileRequest {
                cycle_id: entry.id.clone(),
                point: Some(geo(site)),
                time: Some(lead(first_lead)),
                member: 0,
                interpolation: pb::Interpolation::Bilinear as i32,
            })
            .await
            .map_err(|s| status_error(&format!("profile at {}", site.name), s))?
            .into_inner();
        calls += 1;
        elevations.push(profile.surface_height_m);
    }

    let position = client
        .query_position(pb::PositionRequest {
            cycle_id: entry.id.clone(),
            points: sites.iter().map(geo).collect(),
            quantities: vec![
                thickness(LAYER_1000_500),
                thickness(LAYER_1000_850),
                thickness(LAYER_850_700),
            ],
            // Every lead time: a time series per site.
            times: Vec::new(),
            member: 0,
            interpolation: pb::Interpolation::Bilinear as i32,
            allow_extrapolation: false,
        })
        .await
        .map_err(|s| status_error("position", s))?
        .into_inner();
    calls += 1;

    let bbox = grid_box(description.grid.as_ref())?;
    let mut areas = Vec::with_capacity(description.lead_times_s.len());
    for &lead_s in &description.lead_times_s {
        areas.push(area_at(&mut client, &entry.id, lead_s, bbox).await?);
        calls += 1;
    }

    let answers = Answers {
        address,
        entry,
        elevations,
        position,
        areas,
        calls,
    };
    summary(&answers, &sites)
}

fn geo(site: &Site) -> pb::GeoPoint {
    pb::GeoPoint {
        latitude_deg: site.latitude,
        longitude_deg: site.longitude,
    }
}

/// The box that covers the whole grid of the catalogue entry.
fn grid_box(grid: Option<&pb::LatLonGrid>) -> Result<pb::BoundingBox> {
    let grid = grid.context("the catalogue entry has no grid")?;
    let span = |v: &[f64]| {
        v.iter()
            .fold((f64::INFINITY, f64::NEG_INFINITY), |(a, b), &x| {
                (a.min(x), b.max(x))
            })
    };
    let (south, north) = span(&grid.latitudes_deg);
    let (west, east) = span(&grid.longitudes_deg);
    if !(south.is_finite() && west.is_finite()) {
        bail!("the catalogue entry's grid is empty");
    }
    Ok(pb::BoundingBox {
        south_deg: south,
        north_deg: north,
        west_deg: west,
        east_deg: east,
    })
}

async fn area_at(
    client: &mut Client,
    cycle_id: &str,
    lead_s: i64,
    bbox: pb::BoundingBox,
) -> Result<AreaResult> {
    fetch_area(
        client,
        pb::AreaRequest {
            cycle_id: cycle_id.to_string(),
            time: Some(lead(lead_s)),
            member: 0,
            quantities: vec![thickness(LAYER_1000_500)],
            bbox: Some(bbox),
            stride: Some(1),
            allow_extrapolation: false,
        },
    )
    .await
}

/// A cell of a site table: the value, `*` on the cold side of the line, `~` when the layer's
/// bottom is below the ground (extrapolated).
fn cell(value: Option<&f64>, flags: u8, critical: f64) -> String {
    match value {
        Some(&v) if v.is_finite() => format!(
            "{v:.0}{}{}",
            if v < critical { "*" } else { "" },
            if flags & FLAG_BELOW_GROUND != 0 {
                "~"
            } else {
                ""
            }
        ),
        _ => "masked".to_string(),
    }
}

/// Share of the area below the line, its range, and the points extrapolated below ground.
struct RegionLine {
    cold_percent: f64,
    low: f64,
    high: f64,
    below_ground: usize,
}

fn region_line(area: &AreaResult) -> Option<RegionLine> {
    let field = area.fields.first()?;
    let valid: Vec<f64> = field
        .values
        .iter()
        .map(|&v| f64::from(v))
        .filter(|v| v.is_finite())
        .collect();
    let cold = valid.iter().filter(|&&v| v < CRITICAL_1000_500_M).count();
    let (low, high) = valid
        .iter()
        .fold((f64::INFINITY, f64::NEG_INFINITY), |(a, b), &v| {
            (a.min(v), b.max(v))
        });
    let below_ground = field
        .flags
        .iter()
        .filter(|&&f| f & FLAG_BELOW_GROUND != 0)
        .count();
    Some(RegionLine {
        cold_percent: 100.0 * cold as f64 / valid.len().max(1) as f64,
        low,
        high,
        below_ground,
    })
}

/// The method in one line, from what the catalogue says about the cycle.
fn method_line(d: &pb::CycleDescription) -> String {
    let vertical = match d.vertical.as_ref().and_then(|v| v.kind.as_ref()) {
        Some(pb::vertical_axis::Kind::Hybrid(_)) => {
            "hydrostatic integration on hybrid sigma-pressure levels (Simmons and Burridge 1981)"
        }
        _ => "hypsometric equation with a constant lapse rate in each layer (logarithmic-mean virtual temperature)",
    };
    let humidity = if d.humidity.is_empty() || d.humidity == "none" {
        "no humidity in the file: temperature used as virtual temperature".to_string()
    } else {
        format!("virtual temperature from {}", d.humidity)
    };
    let anchor = if d.from_surface {
        "integrated from surface pressure and surface height; below ground, temperature extrapolated at 6.5 K/km from the surface"
    } else {
        "anchored without surface fields (see the catalogue's notes)"
    };
    let constants = d
        .constants
        .map(|c| {
            format!(
                "; R_d = {} J kg-1 K-1, g0 = {} m s-2",
                c.dry_air_gas_constant, c.standard_gravity
            )
        })
        .unwrap_or_default();
    format!("{vertical}; {humidity}; {anchor}{constants}")
}

fn site_table(
    out: &mut String,
    answers: &Answers,
    sites: &[Site],
    quantity: usize,
    critical: f64,
    with_elevation: bool,
) -> Result<()> {
    let name_width = sites.iter().map(|s| s.name.len()).max().unwrap_or(4).max(4);
    let leads: Vec<i64> = answers
        .position
        .series
        .first()
        .map(|s| s.samples.iter().map(|x| x.lead_time_s).collect())
        .unwrap_or_default();
    write!(out, "{:name_width$}", "site")?;
    if with_elevation {
        write!(out, "  {:>6}", "elev m")?;
    }
    for l in &leads {
        write!(out, " {:>8}", lead_label(*l))?;
    }
    writeln!(out)?;
    for (i, site) in sites.iter().enumerate() {
        write!(out, "{:name_width$}", site.name)?;
        if with_elevation {
            let elevation = answers.elevations.get(i).copied().flatten();
            match elevation {
                Some(z) => write!(out, "  {z:>6.0}")?,
                None => write!(out, "  {:>6}", "-")?,
            }
        }
        let series = answers
            .position
            .series
            .get(i)
            .with_context(|| format!("no series for site {}", site.name))?;
        for sample in &series.samples {
            let flags = sample.flags.get(quantity).copied().unwrap_or(0);
            let text = cell(sample.values.get(quantity), flags, critical);
            write!(out, " {text:>8}")?;
        }
        writeln!(out)?;
    }
    Ok(())
}

/// The readable summary.
fn summary(answers: &Answers, sites: &[Site]) -> Result<String> {
    let mut out = String::new();
    let d = answers.entry.description.clone().unwrap_or_default();
    let reference = if d.reference_time.is_empty() {
        "unknown reference time"
    } else {
        d.reference_time.as_str()
    };
    writeln!(
        out,
        "hypsogrid demo: invented scenario (made-up places and weather), cycle {reference}"
    )?;
    writeln!(
        out,
        "served over gRPC by an in-process server on {} ({} calls: catalogue, profiles, a position time series, area fields)",
        answers.address, answers.calls
    )?;
    writeln!(out, "{}", method_line(&d))?;
    writeln!(out)?;
    writeln!(
        out,
        "1000-500 hPa thickness (m) by lead time; '*' below {CRITICAL_1000_500_M:.0} m, '~' where 1000 hPa is below ground (extrapolated)"
    )?;
    site_table(&mut out, answers, sites, 0, CRITICAL_1000_500_M, true)?;
    writeln!(out)?;
    writeln!(
        out,
        "1000-850 hPa thickness (m); '*' below {CRITICAL_1000_850_M:.0} m, '~' extrapolated"
    )?;
    site_table(&mut out, answers, sites, 1, CRITICAL_1000_850_M, false)?;
    writeln!(out)?;
    writeln!(
        out,
        "850-700 hPa thickness (m); '*' below {CRITICAL_850_700_M:.0} m, '~' extrapolated"
    )?;
    site_table(&mut out, answers, sites, 2, CRITICAL_850_700_M, false)?;
    writeln!(out)?;
    writeln!(
        out,
        "region: share of grid points below {CRITICAL_1000_500_M:.0} m, and the range (m)"
    )?;
    for area in &answers.areas {
        match region_line(area) {
            Some(r) => writeln!(
                out,
                "  {:>4}  {:>5.1} %  {:.0}..{:.0}  ({} points where 1000 hPa is below ground)",
                lead_label(area.lead_time_s),
                r.cold_percent,
                r.low,
                r.high,
                r.below_ground
            )?,
            None => writeln!(out, "  {:>4}  no values", lead_label(area.lead_time_s))?,
        }
    }
    writeln!(out)?;
    writeln!(
        out,
        "Caution: thickness lines are guidance derived from model fields, not a forecast or warning. \
         The {CRITICAL_1000_500_M:.0} m, {CRITICAL_1000_850_M:.0} m and {CRITICAL_850_700_M:.0} m lines are common practice and must be set for the local climate and terrain; \
         official forecasts and warnings, local practice and licensed forecasters decide."
    )?;
    Ok(out)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::cli::client::AreaField;

    #[test]
    fn cells_mark_the_cold_side_and_extrapolation() {
        assert_eq!(cell(Some(&5390.4), 0, 5400.0), "5390*");
        assert_eq!(cell(Some(&5410.0), FLAG_BELOW_GROUND, 5400.0), "5410~");
        assert_eq!(cell(Some(&5390.0), FLAG_BELOW_GROUND, 5400.0), "5390*~");
        assert_eq!(cell(Some(&f64::NAN), 2, 5400.0), "masked");
        assert_eq!(cell(None, 0, 5400.0), "masked");
    }

    #[test]
    fn region_share_counts_only_values_and_flags_below_ground() {
        let area = AreaResult {
            cycle_id: "x".into(),
            lead_time_s: 0,
            valid_time: String::new(),
            latitudes: vec![1.0, 0.0],
            longitudes: vec![0.0, 1.0],
            fields: vec![AreaField {
                quantity: thickness(LAYER_1000_500),
                values: vec![5300.0, 5500.0, f32::NAN, 5350.0],
                flags: vec![FLAG_BELOW_GROUND, 0, 2, 0],
            }],
            chunks: 1,
        };
        let r = region_line(&area).unwrap();
        assert!((r.cold_percent - 200.0 / 3.0).abs() < 1e-9);
        assert_eq!((r.low, r.high, r.below_ground), (5300.0, 5500.0, 1));
    }
}
