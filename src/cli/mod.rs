//! Command-line layer: argument parsing, progress, and readable reports. `anyhow` lives here
//! and in `main` only; the library returns typed errors.

mod compute;
mod demo;

use std::path::PathBuf;

use anyhow::Result;
use clap::{Args, Parser, Subcommand, ValueEnum};

use hypsogrid::compute::{ComputeConfig, NoSurfaceReference};
use hypsogrid::ingest::{load_config, IngestConfig};
use hypsogrid::model::Layer;
use hypsogrid::physics::humidity::SaturationFormula;

/// Geopotential heights and layer thickness from NetCDF forecast cycles.
#[derive(Debug, Parser)]
#[command(name = "hypsogrid", version, about, long_about = None)]
pub(crate) struct Cli {
    #[command(subcommand)]
    command: Command,
}

#[derive(Debug, Subcommand)]
enum Command {
    /// Compute heights on every level and layer thicknesses; write them as CF NetCDF.
    Compute(ComputeArgs),
    /// Generate the invented demo scenario, compute it, and print a summary.
    Demo(DemoArgs),
}

/// Settings shared by every command that reads a cycle.
#[derive(Debug, Args)]
pub(crate) struct ReadArgs {
    /// Dataset config (TOML): variable names for files without CF standard names, the
    /// producer's constants, the relative-humidity phase convention.
    #[arg(long, value_name = "FILE")]
    config: Option<PathBuf>,
    /// Layers for thickness, as BOTTOM:TOP in hPa, comma separated.
    #[arg(long, value_delimiter = ',', default_value = "1000:500,1000:850,850:700", value_parser = parse_layer)]
    layers: Vec<Layer>,
    /// Without surface fields: anchor columns to the file's height at the lowest level
    /// (`lowest`), at a given level in hPa (`500`), or to the standard atmosphere (`standard`).
    #[arg(long, default_value = "lowest", value_parser = parse_reference)]
    reference: NoSurfaceReference,
    /// Saturation vapour pressure for relative humidity and dewpoint.
    #[arg(long, value_enum, default_value_t = Saturation::Wmo)]
    saturation: Saturation,
}

#[derive(Clone, Copy, Debug, ValueEnum)]
enum Saturation {
    /// WMO-No. 8 (CIMO Guide) Annex 4.B Magnus forms.
    Wmo,
    /// Bolton (1980).
    Bolton,
}

impl ReadArgs {
    fn ingest_config(&self) -> Result<IngestConfig> {
        Ok(match &self.config {
            Some(path) => load_config(path)?,
            None => IngestConfig::default(),
        })
    }

    fn compute_config(&self, ingest: &IngestConfig) -> ComputeConfig {
        ComputeConfig {
            layers: self.layers.clone(),
            no_surface_reference: self.reference,
            saturation_formula: match self.saturation {
                Saturation::Wmo => SaturationFormula::WmoMagnus,
                Saturation::Bolton => SaturationFormula::Bolton,
            },
            rh_phase: ingest.rh_phase,
        }
    }
}

#[derive(Debug, Args)]
struct ComputeArgs {
    /// Input cycle (NetCDF-3 or NetCDF-4, CF conventions).
    input: PathBuf,
    /// Output file (NetCDF-4); written atomically, never left half-written.
    #[arg(long, short)]
    output: PathBuf,
    #[command(flatten)]
    read: ReadArgs,
    /// zlib compression level 1-9 for the output; uncompressed by default.
    #[arg(long, value_parser = clap::value_parser!(i32).range(1..=9))]
    deflate: Option<i32>,
}

#[derive(Debug, Args)]
struct DemoArgs {
    /// Keep the generated input and output files in this folder instead of a temporary one.
    #[arg(long, value_name = "DIR")]
    keep: Option<PathBuf>,
}

/// Runs one command.
pub(crate) fn run(cli: Cli) -> Result<()> {
    match cli.command {
        Command::Compute(args) => compute::run(args),
        Command::Demo(args) => demo::run(args),
    }
}

/// Parses `1000:500` (hPa) into a layer.
fn parse_layer(text: &str) -> Result<Layer, String> {
    let (bottom, top) = text
        .split_once(':')
        .ok_or_else(|| format!("layer '{text}': expected BOTTOM:TOP in hPa, e.g. 1000:500"))?;
    let parse = |s: &str| -> Result<f64, String> {
        let v: f64 = s
            .trim()
            .parse()
            .map_err(|_| format!("layer '{text}': '{s}' is not a pressure in hPa"))?;
        if v.is_finite() && v > 0.0 {
            Ok(v * 100.0)
        } else {
            Err(format!("layer '{text}': pressure '{s}' must be positive"))
        }
    };
    let layer = Layer {
        bottom_pa: parse(bottom)?,
        top_pa: parse(top)?,
    };
    if layer.bottom_pa <= layer.top_pa {
        return Err(format!(
            "layer '{text}': the bottom pressure must be greater than the top pressure"
        ));
    }
    Ok(layer)
}

fn parse_reference(text: &str) -> Result<NoSurfaceReference, String> {
    match text {
        "lowest" => Ok(NoSurfaceReference::FileHeightAtLowestLevel),
        "standard" => Ok(NoSurfaceReference::StandardAtmosphere),
        other => other
            .parse::<f64>()
            .ok()
            .filter(|v| v.is_finite() && *v > 0.0)
            .map(|hpa| NoSurfaceReference::FileHeightAt {
                pressure_pa: hpa * 100.0,
            })
            .ok_or_else(|| {
                format!("reference '{other}': expected 'lowest', 'standard' or a level in hPa")
            }),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn layers_parse_in_hpa_and_reject_inverted_ones() {
        let l = parse_layer("1000:500").unwrap();
        assert_eq!((l.bottom_pa, l.top_pa), (100000.0, 50000.0));
        let l = parse_layer(" 962.5 : 700").unwrap();
        assert_eq!((l.bottom_pa, l.top_pa), (96250.0, 70000.0));
        assert!(parse_layer("500:1000").unwrap_err().contains("greater"));
        assert!(parse_layer("1000-500").unwrap_err().contains("BOTTOM:TOP"));
        assert!(parse_layer("1000:-5").is_err());
        assert!(parse_layer("abc:500").is_err());
    }

    #[test]
    fn references_parse() {
        assert_eq!(parse_reference("standard").unwrap(), NoSurfaceReference::StandardAtmosphere);
        assert_eq!(
            parse_reference("500").unwrap(),
            NoSurfaceReference::FileHeightAt { pressure_pa: 50000.0 }
        );
        assert!(parse_reference("upside").is_err());
    }
}
