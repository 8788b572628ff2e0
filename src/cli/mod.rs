//! Command-line layer: argument parsing, progress, and readable reports. `anyhow` lives here
//! and in `main` only; the library returns typed errors.
//!
//! Batch: `compute`, `demo`. Service: `serve` runs the gRPC server on a data folder; the
//! client commands (`catalogue`, `area`, `position`, `profile`, `trajectory`, `health`) call a
//! running server and print tables, JSON or CSV.

mod client;
mod compute;
mod demo;
pub(crate) mod format;
mod products;
mod serve;

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
    /// Generate the invented demo scenario, serve it on a loopback port, query it over gRPC,
    /// and print a summary.
    Demo(DemoArgs),
    /// Serve the cycles of a data folder over gRPC, loading new files as they arrive.
    Serve(ServeArgs),
    /// List the cycles a server holds, the files that failed to load, and recent evictions.
    Catalogue(CatalogueArgs),
    /// Heights and thicknesses over a latitude/longitude box at one time step.
    Area(AreaArgs),
    /// Heights and thicknesses at points: a time series per point.
    Position(PositionArgs),
    /// The column at one point: pressure, temperature, virtual temperature, height.
    Profile(ProfileArgs),
    /// Heights and thicknesses along a path of points with times.
    Trajectory(TrajectoryArgs),
    /// Ask a server whether it is serving; exit 0 only when it is (for container probes).
    Health(HealthArgs),
    /// Contour lines of a thickness or height field from a file, as RFC 7946 GeoJSON.
    Isolines(products::IsolinesArgs),
    /// A PNG chart from a file: thickness or height isolines, or precipitation-type guidance.
    Chart(products::ChartArgs),
    /// Rain-snow guidance from a file: partial thicknesses, freezing levels, categories.
    Guidance(products::GuidanceArgs),
    /// Ensemble mean, spread and threshold probabilities from a file with members.
    Ensemble(products::EnsembleArgs),
    /// Scores of a forecast file against an analysis file, or of a file against its own
    /// heights: bias, RMSE, MAE, SD, correlation per level and region.
    Verify(products::VerifyArgs),
}

/// Settings of `compute`: how to read the cycle and which layers to write.
#[derive(Debug, Args)]
pub(crate) struct ReadArgs {
    #[command(flatten)]
    dataset: DatasetArgs,
    /// Layers for thickness, as BOTTOM:TOP in hPa, comma separated.
    #[arg(long, value_delimiter = ',', default_value = "1000:500,1000:850,850:700", value_parser = parse_layer)]
    layers: Vec<Layer>,
    /// Geopotential height on every level and its below-ground flag only, no thickness (for
    /// verification against analyses, which needs none; a little faster on hybrid levels).
    #[arg(long, conflicts_with = "layers")]
    heights_only: bool,
}

/// How to read a cycle from a file and compute its heights; shared by every command that
/// reads a file itself.
#[derive(Debug, Args)]
pub(crate) struct DatasetArgs {
    /// Dataset config (TOML): variable names for files without CF standard names, the
    /// producer's constants, the relative-humidity phase convention.
    #[arg(long, value_name = "FILE")]
    config: Option<PathBuf>,
    /// Without surface fields: anchor columns to the file's height at the lowest level
    /// (`lowest`), at a given level in hPa (`500`), or to the standard atmosphere (`standard`).
    #[arg(long, default_value = "lowest", value_parser = parse_reference)]
    reference: NoSurfaceReference,
    /// Saturation vapour pressure for relative humidity and dewpoint.
    #[arg(long, value_enum, default_value_t = Saturation::Wmo)]
    saturation: Saturation,
}

#[derive(Clone, Copy, Debug, ValueEnum, serde::Deserialize)]
#[serde(rename_all = "lowercase")]
enum Saturation {
    /// WMO-No. 8 (CIMO Guide) Annex 4.B Magnus forms.
    Wmo,
    /// Bolton (1980).
    Bolton,
}

impl ReadArgs {
    fn ingest_config(&self) -> Result<IngestConfig> {
        self.dataset.ingest_config()
    }

    fn compute_config(&self, ingest: &IngestConfig) -> ComputeConfig {
        ComputeConfig {
            layers: if self.heights_only {
                Vec::new()
            } else {
                self.layers.clone()
            },
            ..self.dataset.compute_config(ingest)
        }
    }
}

impl DatasetArgs {
    fn ingest_config(&self) -> Result<IngestConfig> {
        Ok(match &self.config {
            Some(path) => load_config(path)?,
            None => IngestConfig::default(),
        })
    }

    /// The compute settings, with no layers (products ask for their own).
    fn compute_config(&self, ingest: &IngestConfig) -> ComputeConfig {
        ComputeConfig {
            layers: Vec::new(),
            no_surface_reference: self.reference,
            saturation_formula: self.saturation.formula(),
            rh_phase: ingest.rh_phase,
        }
    }

    /// Reads a cycle and computes its heights on every level, as the server does on load.
    fn load(&self, path: &std::path::Path) -> Result<hypsogrid::query::LoadedCycle> {
        let ingest = self.ingest_config()?;
        let compute = self.compute_config(&ingest);
        let lc = hypsogrid::query::LoadedCycle::load(path, &ingest, &compute)?;
        for note in &lc.cycle.notes {
            tracing::info!("{}: {note}", path.display());
        }
        Ok(lc)
    }
}

impl Saturation {
    fn formula(self) -> SaturationFormula {
        match self {
            Saturation::Wmo => SaturationFormula::WmoMagnus,
            Saturation::Bolton => SaturationFormula::Bolton,
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
    /// Folder for the generated cycles and the products (charts, isoline GeoJSON)
    #[arg(long, value_name = "DIR", default_value = "hypsogrid-demo")]
    keep: PathBuf,
}

/// Settings of `hypsogrid serve`. Each setting can also come from an environment variable
/// (named beside it) or from the TOML file given with `--config`; flags win over the
/// environment, the environment over the file, the file over the defaults.
#[derive(Debug, Args)]
pub(crate) struct ServeArgs {
    /// Server config file (TOML; tables [server], [store], [limits], [watch], [security],
    /// [dataset]; see docs/API.md).
    #[arg(long, value_name = "FILE", env = "HYPSOGRID_CONFIG")]
    config: Option<PathBuf>,
    /// Data folder: every *.nc, *.nc4 or *.netcdf file in it is a cycle [default: .]
    #[arg(long, value_name = "DIR", env = "HYPSOGRID_DATA")]
    data: Option<PathBuf>,
    /// Address to listen on; port 0 picks a free one [default: 127.0.0.1:50951]
    #[arg(long, value_name = "ADDR", env = "HYPSOGRID_LISTEN")]
    listen: Option<std::net::SocketAddr>,
    /// How many cycles to keep, newest reference time first [default: 8]
    #[arg(long, value_name = "N", env = "HYPSOGRID_KEEP_NEWEST")]
    keep_newest: Option<usize>,
    /// Memory the loaded cycles may hold, e.g. 8GiB, 512MiB, or bytes [default: 8GiB]
    #[arg(long, value_name = "SIZE", env = "HYPSOGRID_MEMORY_BUDGET", value_parser = serve::parse_bytes)]
    memory_budget: Option<u64>,
    /// Largest answer, in point-values (points x quantities x times) [default: 4000000]
    #[arg(long, value_name = "N", env = "HYPSOGRID_MAX_POINTS")]
    max_points: Option<usize>,
    /// Largest gRPC message sent or received, e.g. 4MiB [default: 4MiB]
    #[arg(long, value_name = "SIZE", env = "HYPSOGRID_MAX_MESSAGE_BYTES", value_parser = serve::parse_bytes)]
    max_message_bytes: Option<u64>,
    /// Time limit of one request, e.g. 30s [default: 30s]
    #[arg(long, value_name = "DURATION", env = "HYPSOGRID_REQUEST_TIMEOUT", value_parser = serve::parse_duration)]
    request_timeout: Option<std::time::Duration>,
    /// Requests answered at once per connection; more wait [default: 64]
    #[arg(long, value_name = "N", env = "HYPSOGRID_MAX_CONCURRENT_REQUESTS")]
    max_concurrent_requests: Option<usize>,
    /// How often the data folder is listed, e.g. 1s [default: 1s]
    #[arg(long, value_name = "DURATION", env = "HYPSOGRID_POLL_INTERVAL", value_parser = serve::parse_duration)]
    poll_interval: Option<std::time::Duration>,
    /// A file is read once its size and modification time have not changed for this long
    /// [default: 2s]
    #[arg(long, value_name = "DURATION", env = "HYPSOGRID_SETTLE", value_parser = serve::parse_duration)]
    settle: Option<std::time::Duration>,
    /// A file still growing after this long is reported as a failure (and retried once it
    /// settles) [default: 10m]
    #[arg(long, value_name = "DURATION", env = "HYPSOGRID_MAX_WAIT_FOR_GROWTH", value_parser = serve::parse_duration)]
    max_wait_for_growth: Option<std::time::Duration>,
    /// File of bearer tokens, one per line; when given, every query needs
    /// `authorization: Bearer <token>` (health and reflection stay open)
    #[arg(long, value_name = "FILE", env = "HYPSOGRID_AUTH_TOKENS")]
    auth_tokens: Option<PathBuf>,
    /// TLS certificate chain (PEM); with --tls-key, the server speaks TLS only
    #[arg(long, value_name = "FILE", env = "HYPSOGRID_TLS_CERT")]
    tls_cert: Option<PathBuf>,
    /// TLS private key (PEM)
    #[arg(long, value_name = "FILE", env = "HYPSOGRID_TLS_KEY")]
    tls_key: Option<PathBuf>,
    /// Log format on stderr; the RUST_LOG variable filters [default: human]
    #[arg(long, value_enum, value_name = "FORMAT", env = "HYPSOGRID_LOG_FORMAT")]
    log_format: Option<serve::LogFormat>,
    /// Dataset config (TOML) used for every file: variable names, the producer's constants,
    /// the relative-humidity phase (the format `compute --config` reads)
    #[arg(long, value_name = "FILE", env = "HYPSOGRID_DATASET")]
    dataset: Option<PathBuf>,
    /// Anchor for files without surface fields: `lowest`, `standard` or a level in hPa
    /// [default: lowest]
    #[arg(long, value_name = "REF", env = "HYPSOGRID_REFERENCE", value_parser = parse_reference)]
    reference: Option<NoSurfaceReference>,
    /// Saturation vapour pressure for relative humidity and dewpoint [default: wmo]
    #[arg(long, value_enum, env = "HYPSOGRID_SATURATION")]
    saturation: Option<Saturation>,
    #[command(flatten)]
    ops: serve::OpsArgs,
}

/// How a client reaches the server; shared by every client command.
#[derive(Debug, Args)]
pub(crate) struct ConnectArgs {
    /// Server URL (http:// or https://)
    #[arg(
        long,
        value_name = "URL",
        env = "HYPSOGRID_SERVER",
        default_value = "http://127.0.0.1:50951"
    )]
    server: String,
    /// Bearer token for a server started with --auth-tokens
    #[arg(
        long,
        value_name = "TOKEN",
        env = "HYPSOGRID_TOKEN",
        hide_env_values = true
    )]
    token: Option<String>,
    /// CA certificate (PEM) to trust for an https:// server with its own certificate
    #[arg(long, value_name = "FILE", env = "HYPSOGRID_CA_CERT")]
    ca_cert: Option<PathBuf>,
    /// Client certificate (PEM) for an https:// server that requires one (started with
    /// --tls-client-ca); needs --client-key
    #[arg(long, value_name = "FILE", env = "HYPSOGRID_CLIENT_CERT")]
    client_cert: Option<PathBuf>,
    /// Private key (PEM) of --client-cert
    #[arg(long, value_name = "FILE", env = "HYPSOGRID_CLIENT_KEY")]
    client_key: Option<PathBuf>,
    /// Give up on the call after this long, e.g. 30s
    #[arg(long, value_name = "DURATION", default_value = "30s", value_parser = serve::parse_duration)]
    timeout: std::time::Duration,
    /// How to print the answer
    #[arg(long, value_enum, default_value_t = format::OutputFormat::Table)]
    format: format::OutputFormat,
}

/// What to compute: heights at pressures and thicknesses of layers (hPa).
#[derive(Debug, Args)]
pub(crate) struct QuantityArgs {
    /// Thickness of a layer BOTTOM:TOP in hPa (repeat or comma-separate for several)
    #[arg(long = "layer", value_name = "BOTTOM:TOP", value_delimiter = ',', value_parser = parse_layer)]
    layers: Vec<Layer>,
    /// Geopotential height at a pressure in hPa (repeat or comma-separate for several)
    #[arg(long = "height", value_name = "HPA", value_delimiter = ',', value_parser = client::parse_hpa)]
    heights_pa: Vec<f64>,
    /// Extrapolate pressures below the ground or above the model top instead of refusing
    /// them (such values are flagged)
    #[arg(long)]
    extrapolate: bool,
}

/// Which cycle and member.
#[derive(Debug, Args)]
pub(crate) struct CycleArgs {
    /// Cycle id from the catalogue (the file name); the newest cycle when absent
    #[arg(long = "cycle", value_name = "ID", default_value = "")]
    cycle_id: String,
    /// Ensemble member, 0-based
    #[arg(long, value_name = "N", default_value_t = 0)]
    member: u32,
}

/// One time step: a lead time or a valid time.
#[derive(Debug, Args)]
pub(crate) struct OneTimeArgs {
    /// Lead time, e.g. 12h, 90m, 1d, or seconds [default: 0h]
    #[arg(long, value_name = "LEAD", conflicts_with = "valid_time", value_parser = client::parse_lead_time)]
    lead_time: Option<i64>,
    /// Valid time, RFC 3339, e.g. 2031-01-14T12:00:00Z
    #[arg(long, value_name = "TIME")]
    valid_time: Option<String>,
}

#[derive(Debug, Args)]
pub(crate) struct CatalogueArgs {
    #[command(flatten)]
    connect: ConnectArgs,
}

#[derive(Debug, Args)]
pub(crate) struct AreaArgs {
    #[command(flatten)]
    connect: ConnectArgs,
    /// The box SOUTH,NORTH,WEST,EAST in degrees; WEST > EAST crosses the antimeridian
    #[arg(long, value_name = "S,N,W,E", allow_hyphen_values = true, value_parser = client::parse_bbox)]
    bbox: client::BoxArg,
    #[command(flatten)]
    quantities: QuantityArgs,
    /// Keep every N-th row and column
    #[arg(long, value_name = "N", default_value_t = 1)]
    stride: u32,
    #[command(flatten)]
    time: OneTimeArgs,
    #[command(flatten)]
    cycle: CycleArgs,
}

#[derive(Debug, Args)]
pub(crate) struct PositionArgs {
    #[command(flatten)]
    connect: ConnectArgs,
    /// A point LAT,LON in degrees (repeat for several)
    #[arg(long = "point", value_name = "LAT,LON", required = true, allow_hyphen_values = true, value_parser = client::parse_point)]
    points: Vec<(f64, f64)>,
    #[command(flatten)]
    quantities: QuantityArgs,
    /// Lead times (e.g. 12h, comma-separated or repeated), or `all` for every lead time
    /// [default: all]
    #[arg(
        long = "lead-time",
        value_name = "LEAD|all",
        value_delimiter = ',',
        conflicts_with = "valid_times"
    )]
    lead_times: Vec<String>,
    /// Valid times, RFC 3339 (repeat for several)
    #[arg(long = "valid-time", value_name = "TIME")]
    valid_times: Vec<String>,
    /// The nearest grid column instead of bilinear interpolation
    #[arg(long)]
    nearest: bool,
    #[command(flatten)]
    cycle: CycleArgs,
}

#[derive(Debug, Args)]
pub(crate) struct ProfileArgs {
    #[command(flatten)]
    connect: ConnectArgs,
    /// The point LAT,LON in degrees
    #[arg(long, value_name = "LAT,LON", allow_hyphen_values = true, value_parser = client::parse_point)]
    point: (f64, f64),
    #[command(flatten)]
    time: OneTimeArgs,
    /// The nearest grid column instead of bilinear interpolation
    #[arg(long)]
    nearest: bool,
    #[command(flatten)]
    cycle: CycleArgs,
}

#[derive(Debug, Args)]
pub(crate) struct TrajectoryArgs {
    #[command(flatten)]
    connect: ConnectArgs,
    /// A waypoint LAT,LON,TIME with TIME in RFC 3339 (repeat, in path order)
    #[arg(long = "waypoint", value_name = "LAT,LON,TIME", required = true, allow_hyphen_values = true, value_parser = client::parse_waypoint)]
    waypoints: Vec<(f64, f64, String)>,
    #[command(flatten)]
    quantities: QuantityArgs,
    /// The nearest grid column instead of bilinear interpolation
    #[arg(long)]
    nearest: bool,
    #[command(flatten)]
    cycle: CycleArgs,
}

#[derive(Debug, Args)]
pub(crate) struct HealthArgs {
    #[command(flatten)]
    connect: ConnectArgs,
    /// Service to ask about; empty asks about the server as a whole
    #[arg(long, value_name = "NAME", default_value = "")]
    service: String,
}

/// Runs one command.
pub(crate) fn run(cli: Cli) -> Result<()> {
    match cli.command {
        Command::Compute(args) => compute::run(args),
        Command::Demo(args) => demo::run(args),
        Command::Serve(args) => serve::run(args),
        Command::Catalogue(args) => client::catalogue(args),
        Command::Area(args) => client::area(args),
        Command::Position(args) => client::position(args),
        Command::Profile(args) => client::profile(args),
        Command::Trajectory(args) => client::trajectory(args),
        Command::Health(args) => client::health(args),
        Command::Isolines(args) => products::isolines(args),
        Command::Chart(args) => products::chart(args),
        Command::Guidance(args) => products::guidance(args),
        Command::Ensemble(args) => products::ensemble(args),
        Command::Verify(args) => products::verify(args),
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
        assert_eq!(
            parse_reference("standard").unwrap(),
            NoSurfaceReference::StandardAtmosphere
        );
        assert_eq!(
            parse_reference("500").unwrap(),
            NoSurfaceReference::FileHeightAt {
                pressure_pa: 50000.0
            }
        );
        assert!(parse_reference("upside").is_err());
    }
}
