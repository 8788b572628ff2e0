//! The demo's second half: the forecaster products, asked of the same in-process server over
//! gRPC (`hypsogrid.v1.ProductService`): a thickness chart and an isoline file for +24 h, the
//! precipitation-type guidance chart and a guidance table for the sites, and the invented
//! ensemble's probability of the 1000–500 hPa thickness being below 5400 m.

use std::fmt::Write as _;
use std::net::SocketAddr;
use std::path::Path;
use std::time::Duration;

use anyhow::{Context, Result};

use hypsogrid::demo::{demo_sites, DEMO_ENSEMBLE_FILE_NAME, DEMO_FILE_NAME};
use hypsogrid::pb;
use hypsogrid::pb::product_service_client::ProductServiceClient;

use super::super::client::{lead, status_error, thickness};
use super::super::format::lead_label;
use super::{geo, CRITICAL_1000_500_M, LAYER_1000_500};

/// The lead time the charts and the guidance are drawn for.
const PRODUCT_LEAD_S: i64 = 24 * 3600;
/// The ensemble's lead time for probabilities: its last, where the spread is largest.
const ENSEMBLE_LEAD_S: i64 = 48 * 3600;

/// Largest answer the demo accepts (a chart is a few hundred kilobytes).
const MAX_DECODING_BYTES: usize = 64 * 1024 * 1024;

fn field(cycle_id: &str, lead_s: i64) -> pb::FieldSelection {
    pb::FieldSelection {
        cycle_id: cycle_id.to_string(),
        time: Some(lead(lead_s)),
        member: 0,
        quantity: Some(thickness(LAYER_1000_500)),
        allow_extrapolation: false,
    }
}

fn write_file(dir: &Path, name: &str, bytes: &[u8]) -> Result<String> {
    let path = dir.join(name);
    std::fs::write(&path, bytes).with_context(|| format!("writing '{}'", path.display()))?;
    Ok(path.display().to_string())
}

/// Asks for the products and writes the files into `dir`; returns the summary text.
pub(super) async fn query(address: SocketAddr, dir: &Path) -> Result<String> {
    let channel = tonic::transport::Endpoint::from_shared(format!("http://{address}"))
        .context("demo server url")?
        .connect_timeout(Duration::from_secs(5))
        .timeout(Duration::from_secs(120))
        .connect()
        .await
        .with_context(|| format!("connecting to the demo server on {address}"))?;
    let mut client =
        ProductServiceClient::new(channel).max_decoding_message_size(MAX_DECODING_BYTES);
    let mut out = String::new();
    let label = lead_label(PRODUCT_LEAD_S);

    let isolines = client
        .get_isolines(pb::IsolinesRequest {
            field: Some(field(DEMO_FILE_NAME, PRODUCT_LEAD_S)),
            values: Vec::new(),
            interval: Some(60.0),
            base: 0.0,
            include_geojson: true,
        })
        .await
        .map_err(|s| status_error("isolines", s))?
        .into_inner();
    let iso_path = write_file(
        dir,
        "thickness_1000_500_24h.geojson",
        isolines.geojson.as_bytes(),
    )?;
    let critical_lines = isolines
        .isolines
        .iter()
        .filter(|l| (l.value - CRITICAL_1000_500_M).abs() < 1e-6)
        .count();

    let chart = client
        .render_chart(pb::ChartRequest {
            field: Some(field(DEMO_FILE_NAME, PRODUCT_LEAD_S)),
            kind: pb::ChartKind::Field as i32,
            interval: Some(60.0),
            critical: vec![CRITICAL_1000_500_M],
            fill: true,
            width: Some(1200),
            height: Some(800),
            thresholds: None,
        })
        .await
        .map_err(|s| status_error("thickness chart", s))?
        .into_inner();
    let chart_path = write_file(dir, "thickness_1000_500_24h.png", &chart.png)?;

    let ptype = client
        .render_chart(pb::ChartRequest {
            field: Some(field(DEMO_FILE_NAME, PRODUCT_LEAD_S)),
            kind: pb::ChartKind::PrecipitationType as i32,
            interval: Some(60.0),
            critical: Vec::new(),
            fill: false,
            width: Some(1200),
            height: Some(800),
            thresholds: None,
        })
        .await
        .map_err(|s| status_error("guidance chart", s))?
        .into_inner();
    let ptype_path = write_file(dir, "precipitation_type_24h.png", &ptype.png)?;

    writeln!(
        out,
        "Products for {label} (asked over gRPC, ProductService):"
    )?;
    writeln!(
        out,
        "  1000-500 hPa isolines every 60 m: {} lines ({critical_lines} at {CRITICAL_1000_500_M:.0} m) -> {iso_path}",
        isolines.isolines.len()
    )?;
    writeln!(
        out,
        "  thickness chart ({} bytes)          -> {chart_path}",
        chart.png.len()
    )?;
    writeln!(
        out,
        "  precipitation-type chart ({} bytes) -> {ptype_path}",
        ptype.png.len()
    )?;
    writeln!(out)?;

    let sites = demo_sites();
    let area = client
        .get_guidance_area(pb::GuidanceAreaRequest {
            field: Some(field(DEMO_FILE_NAME, PRODUCT_LEAD_S)),
            bbox: Some(pb::BoundingBox::whole_globe()),
            stride: None,
            thresholds: None,
        })
        .await
        .map_err(|s| status_error("guidance area", s))?
        .into_inner();
    let total: u64 = area.category_counts.iter().sum();
    writeln!(
        out,
        "Precipitation-type guidance at {label} over the region ({total} points):"
    )?;
    for (code, n) in area.category_counts.iter().enumerate() {
        if *n > 0 {
            let name = pb::PrecipitationType::try_from(code as i32)
                .map(|p| category_name(p).to_string())
                .unwrap_or_else(|_| format!("category {code}"));
            writeln!(
                out,
                "  {name:<30} {:>5.1} %",
                100.0 * *n as f64 / total.max(1) as f64
            )?;
        }
    }
    let points = client
        .get_guidance_points(pb::GuidancePointsRequest {
            field: Some(field(DEMO_FILE_NAME, PRODUCT_LEAD_S)),
            points: sites.iter().map(geo).collect(),
            thresholds: None,
        })
        .await
        .map_err(|s| status_error("guidance points", s))?
        .into_inner();
    writeln!(out)?;
    writeln!(
        out,
        "  {:<16} {:<30} {:>10} {:>12} {:>12}",
        "site", "guidance", "1000-500", "0 °C agl", "Tw 0 °C agl"
    )?;
    for (site, p) in sites.iter().zip(&points.points) {
        let name = pb::PrecipitationType::try_from(p.category)
            .map(category_name)
            .unwrap_or("unknown");
        writeln!(
            out,
            "  {:<16} {:<30} {:>10.0} {:>12.0} {:>12.0}",
            site.name,
            name,
            p.thickness_1000_500_m,
            p.freezing_level_above_ground_m,
            p.wet_bulb_zero_above_ground_m
        )?;
    }
    writeln!(out)?;

    let ensemble = client
        .get_ensemble_points(pb::EnsemblePointsRequest {
            field: Some(field(DEMO_ENSEMBLE_FILE_NAME, ENSEMBLE_LEAD_S)),
            points: sites.iter().map(geo).collect(),
            statistics: vec![
                pb::EnsembleStatistic {
                    kind: Some(pb::ensemble_statistic::Kind::Mean(true)),
                },
                pb::EnsembleStatistic {
                    kind: Some(pb::ensemble_statistic::Kind::Spread(true)),
                },
                pb::EnsembleStatistic {
                    kind: Some(pb::ensemble_statistic::Kind::ProbabilityBelow(
                        CRITICAL_1000_500_M,
                    )),
                },
            ],
        })
        .await
        .map_err(|s| status_error("ensemble points", s))?
        .into_inner();
    writeln!(
        out,
        "Invented ensemble ({} members), 1000-500 hPa thickness at {}:",
        ensemble.members,
        lead_label(ENSEMBLE_LEAD_S)
    )?;
    writeln!(
        out,
        "  {:<16} {:>8} {:>8} {:>16}",
        "site", "mean", "spread", "P(< 5400 m)"
    )?;
    for (site, p) in sites.iter().zip(&ensemble.points) {
        let v = |i: usize| p.values.get(i).copied().unwrap_or(f64::NAN);
        writeln!(
            out,
            "  {:<16} {:>8.0} {:>8.1} {:>15.0} %",
            site.name,
            v(0),
            v(1),
            100.0 * v(2)
        )?;
    }
    writeln!(out)?;
    writeln!(out, "Caution: {}", points.caution)?;
    Ok(out)
}

fn category_name(p: pb::PrecipitationType) -> &'static str {
    match p {
        pb::PrecipitationType::Indeterminate => "indeterminate",
        pb::PrecipitationType::Rain => "rain",
        pb::PrecipitationType::RainSnowMix => "mixed rain and snow",
        pb::PrecipitationType::Snow => "snow",
        pb::PrecipitationType::FreezingRainOrIcePellets => "freezing rain or ice pellets",
    }
}
