//! `hypsogrid demo`: the invented scenario, end to end, with a summary a forecaster reads.

use std::fmt::Write as _;
use std::path::PathBuf;

use anyhow::{Context, Result};
use ndarray::s;

use hypsogrid::compute::{compute_heights, ComputeConfig};
use hypsogrid::demo::{demo_sites, write_demo_cycle};
use hypsogrid::grid::locate;
use hypsogrid::ingest::{read_cycle, IngestConfig};
use hypsogrid::model::{Cycle, Heights, Layer};
use hypsogrid::output::{write_heights, OutputOptions};

use super::DemoArgs;

/// Common-practice rain–snow line for 1000–500 hPa thickness in North American practice
/// (GUIDE §3); many European offices use about 5280 m. Guidance only.
const CRITICAL_1000_500_M: f64 = 5400.0;

pub(super) fn run(args: DemoArgs) -> Result<()> {
    let temp;
    let dir: PathBuf = match &args.keep {
        Some(dir) => {
            std::fs::create_dir_all(dir)
                .with_context(|| format!("creating folder '{}'", dir.display()))?;
            dir.clone()
        }
        None => {
            temp = tempfile::tempdir().context("creating a temporary folder for the demo")?;
            temp.path().to_path_buf()
        }
    };
    let input = write_demo_cycle(&dir)?;
    let cycle = read_cycle(&input, &IngestConfig::default())?;
    let layers = vec![
        Layer { bottom_pa: 100000.0, top_pa: 50000.0 },
        Layer { bottom_pa: 100000.0, top_pa: 85000.0 },
        Layer { bottom_pa: 85000.0, top_pa: 70000.0 },
    ];
    let config = ComputeConfig {
        layers,
        ..ComputeConfig::default()
    };
    let heights = compute_heights(&cycle, &config, &|_| {})?;
    let output = dir.join("demo_heights.nc");
    write_heights(
        &cycle,
        &heights,
        &output,
        &OutputOptions {
            history: "hypsogrid demo".into(),
            deflate_level: None,
        },
    )?;
    print!("{}", summary(&cycle, &heights)?);
    if args.keep.is_some() {
        println!("input:  {}", input.display());
        println!("output: {}", output.display());
    }
    Ok(())
}

/// The readable summary: thickness at the named sites for every lead time, and how much of
/// the region lies on the cold side of the critical line.
fn summary(cycle: &Cycle, heights: &Heights) -> Result<String> {
    let mut out = String::new();
    let reference = cycle.reference_time.as_deref().unwrap_or("unknown reference time");
    writeln!(out, "hypsogrid demo: invented scenario (made-up places and weather), cycle {reference}")?;
    writeln!(out, "{}", heights.method)?;
    writeln!(out)?;
    let thickness = heights
        .thickness
        .first()
        .context("the demo computes the 1000-500 hPa layer first")?;
    writeln!(
        out,
        "1000-500 hPa thickness (m) by lead time; '*' below {CRITICAL_1000_500_M:.0} m, '~' where 1000 hPa is below ground (extrapolated)"
    )?;
    let sites = demo_sites();
    let name_width = sites.iter().map(|s| s.name.len()).max().unwrap_or(4).max(4);
    write!(out, "{:name_width$}  {:>6}", "site", "elev m")?;
    for lead in &cycle.lead_times_s {
        write!(out, " {:>8}", format!("+{}h", lead / 3600))?;
    }
    writeln!(out)?;
    for site in &sites {
        let stencil = locate(&cycle.grid, site.latitude, site.longitude)
            .with_context(|| format!("demo site '{}'", site.name))?;
        let elevation = cycle
            .surface
            .as_ref()
            .and_then(|sf| stencil.bilinear(sf.height_m.slice(s![0, 0, .., ..])))
            .unwrap_or(f64::NAN);
        write!(out, "{:name_width$}  {:>6.0}", site.name, elevation)?;
        for t in 0..cycle.lead_times_s.len() {
            let v = stencil.bilinear(thickness.values.slice(s![0, t, .., ..]));
            let (r, c) = stencil.nearest();
            let extrapolated = thickness.below_ground[[0, t, r, c]] == 1;
            let cell = match v {
                Some(v) => format!(
                    "{v:.0}{}{}",
                    if v < CRITICAL_1000_500_M { "*" } else { "" },
                    if extrapolated { "~" } else { "" }
                ),
                None => "masked".to_string(),
            };
            write!(out, " {cell:>8}")?;
        }
        writeln!(out)?;
    }
    writeln!(out)?;
    writeln!(out, "region: share of grid points below {CRITICAL_1000_500_M:.0} m, and the range (m)")?;
    for (t, lead) in cycle.lead_times_s.iter().enumerate() {
        let field = thickness.values.slice(s![0, t, .., ..]);
        let valid: Vec<f64> = field.iter().map(|&v| f64::from(v)).filter(|v| v.is_finite()).collect();
        let cold = valid.iter().filter(|&&v| v < CRITICAL_1000_500_M).count();
        let (lo, hi) = valid
            .iter()
            .fold((f64::INFINITY, f64::NEG_INFINITY), |(a, b), &v| (a.min(v), b.max(v)));
        let below = heights
            .below_ground
            .slice(s![0, t, .., .., ..])
            .iter()
            .filter(|&&b| b == 1)
            .count();
        writeln!(
            out,
            "  +{:>2}h  {:>5.1} %  {lo:.0}..{hi:.0}  ({below} point-levels below ground)",
            lead / 3600,
            100.0 * cold as f64 / valid.len().max(1) as f64,
        )?;
    }
    writeln!(out)?;
    writeln!(
        out,
        "Caution: thickness lines are guidance derived from model fields, not a forecast or warning. \
         The {CRITICAL_1000_500_M:.0} m line is common practice and must be set for the local climate and terrain; \
         official forecasts and warnings, local practice and licensed forecasters decide."
    )?;
    Ok(out)
}
