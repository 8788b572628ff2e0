//! Client subcommands: call a running `hypsogrid serve` over gRPC and print the answer as a
//! table, JSON or CSV. The demo reuses the connection and area reassembly from here.

use std::fmt::Write as _;
use std::time::Duration;

use anyhow::{bail, Context, Result};
use serde_json::{json, Value};
use tonic::metadata::{Ascii, MetadataValue};
use tonic::service::interceptor::InterceptedService;
use tonic::transport::{Certificate, Channel, ClientTlsConfig, Endpoint, Identity};
use tonic::{Request, Status};

use hypsogrid::model::Layer;
use hypsogrid::pb;
use hypsogrid::pb::height_service_client::HeightServiceClient;

use super::format::{
    bytes_label, csv_number, json_number, lead_label, number, Csv, OutputFormat, Table,
};
use super::{
    AreaArgs, CatalogueArgs, ConnectArgs, HealthArgs, OneTimeArgs, PositionArgs, ProfileArgs,
    QuantityArgs, TrajectoryArgs,
};

/// Bit of a value's flags: the value involves a pressure below the ground (proto PointFlag).
const FLAG_BELOW_GROUND: u8 = pb::PointFlag::BelowGround as u8;
/// Bit of a value's flags: no value (proto PointFlag).
const FLAG_MISSING: u8 = pb::PointFlag::Missing as u8;

/// Largest message the client accepts: well above any server's chunk size.
const MAX_DECODING_BYTES: usize = 256 * 1024 * 1024;

/// Widest area matrix printed as a table; wider ones print a summary and a hint.
const MAX_TABLE_COLUMNS: usize = 24;

/// The generated client with the bearer token (if any) added to every call.
pub(crate) type Client = HeightServiceClient<InterceptedService<Channel, BearerToken>>;

/// Adds `authorization: Bearer <token>` to every request when a token is configured.
#[derive(Clone, Debug)]
pub(crate) struct BearerToken(Option<MetadataValue<Ascii>>);

impl BearerToken {
    pub(crate) fn new(token: Option<&str>) -> Result<Self> {
        token
            .map(|t| {
                format!("Bearer {}", t.trim())
                    .parse::<MetadataValue<Ascii>>()
                    .context("--token: the token must be printable ASCII")
            })
            .transpose()
            .map(Self)
    }
}

impl tonic::service::Interceptor for BearerToken {
    fn call(&mut self, mut request: Request<()>) -> Result<Request<()>, Status> {
        if let Some(value) = &self.0 {
            request
                .metadata_mut()
                .insert("authorization", value.clone());
        }
        Ok(request)
    }
}

/// Opens a channel to the server (TLS for `https://` URLs).
pub(crate) async fn channel(args: &ConnectArgs) -> Result<Channel> {
    let mut endpoint = Endpoint::from_shared(args.server.clone())
        .with_context(|| format!("--server '{}': not a URL", args.server))?
        .connect_timeout(Duration::from_secs(5))
        .timeout(args.timeout)
        .initial_stream_window_size(hypsogrid::service::STREAM_WINDOW_BYTES)
        .initial_connection_window_size(hypsogrid::service::CONNECTION_WINDOW_BYTES)
        .max_frame_size(hypsogrid::service::MAX_FRAME_BYTES);
    let read = |flag: &str, path: &std::path::Path| {
        std::fs::read(path).with_context(|| format!("{flag}: cannot read '{}'", path.display()))
    };
    let identity = match (&args.client_cert, &args.client_key) {
        (Some(cert), Some(key)) => Some(Identity::from_pem(
            read("--client-cert", cert)?,
            read("--client-key", key)?,
        )),
        (None, None) => None,
        (Some(_), None) => {
            bail!("--client-cert needs --client-key (the certificate's private key)")
        }
        (None, Some(_)) => {
            bail!("--client-key needs --client-cert (the certificate it belongs to)")
        }
    };
    if args.server.starts_with("https://") {
        let mut tls = ClientTlsConfig::new();
        if let Some(ca) = &args.ca_cert {
            tls = tls.ca_certificate(Certificate::from_pem(read("--ca-cert", ca)?));
        }
        if let Some(identity) = identity {
            tls = tls.identity(identity);
        }
        endpoint = endpoint
            .tls_config(tls)
            .with_context(|| format!("--server '{}': tls setup", args.server))?;
    } else if args.ca_cert.is_some() || identity.is_some() {
        let flag = if args.ca_cert.is_some() {
            "--ca-cert"
        } else {
            "--client-cert"
        };
        bail!(
            "{flag} is for https:// servers; --server is '{}'",
            args.server
        );
    }
    let tls_hint = if args.server.starts_with("https://") {
        " (over https: check --ca-cert, and --client-cert where the server requires client \
         certificates)"
    } else {
        ""
    };
    endpoint
        .connect()
        .await
        .with_context(|| format!("cannot connect to '{}'{tls_hint}", args.server))
}

/// Connects the query client.
pub(crate) async fn connect(args: &ConnectArgs) -> Result<Client> {
    let channel = channel(args).await?;
    Ok(client_on(channel, BearerToken::new(args.token.as_deref())?))
}

/// The query client on an open channel.
pub(crate) fn client_on(channel: Channel, token: BearerToken) -> Client {
    HeightServiceClient::with_interceptor(channel, token)
        .max_decoding_message_size(MAX_DECODING_BYTES)
}

/// A gRPC error as one line: what was asked, the code in its canonical name, the message,
/// and for a failure below gRPC (a transport error) its causes, such as the TLS alert of a
/// server that wants a client certificate.
pub(crate) fn status_error(what: &str, status: Status) -> anyhow::Error {
    let detail = super::format::one_line(
        status.message().to_string(),
        std::error::Error::source(&status),
    );
    // Timing decides which code a broken connection comes back as (UNKNOWN, CANCELLED).
    let hint = if detail.contains("transport error") {
        " (the connection broke below gRPC; a server started with --tls-client-ca does this to \
         a client without a certificate it accepts: see --client-cert)"
    } else {
        ""
    };
    anyhow::anyhow!(
        "{what}: server answered {}: {}{hint}",
        code_name(status.code()),
        detail
    )
}

fn code_name(code: tonic::Code) -> &'static str {
    use tonic::Code::*;
    match code {
        Ok => "OK",
        Cancelled => "CANCELLED",
        Unknown => "UNKNOWN",
        InvalidArgument => "INVALID_ARGUMENT",
        DeadlineExceeded => "DEADLINE_EXCEEDED",
        NotFound => "NOT_FOUND",
        AlreadyExists => "ALREADY_EXISTS",
        PermissionDenied => "PERMISSION_DENIED",
        ResourceExhausted => "RESOURCE_EXHAUSTED",
        FailedPrecondition => "FAILED_PRECONDITION",
        Aborted => "ABORTED",
        OutOfRange => "OUT_OF_RANGE",
        Unimplemented => "UNIMPLEMENTED",
        Internal => "INTERNAL",
        Unavailable => "UNAVAILABLE",
        DataLoss => "DATA_LOSS",
        Unauthenticated => "UNAUTHENTICATED",
    }
}

/// A runtime for one client command.
/// Connects, makes one unary call with the client (`what` names it in errors) and returns
/// the answer.
fn unary<T, F, Fut>(args: &ConnectArgs, what: &str, call: F) -> Result<T>
where
    F: FnOnce(Client) -> Fut,
    Fut: std::future::Future<Output = std::result::Result<tonic::Response<T>, Status>>,
{
    runtime()?.block_on(async {
        let client = connect(args).await?;
        call(client)
            .await
            .map(tonic::Response::into_inner)
            .map_err(|s| status_error(what, s))
    })
}

fn runtime() -> Result<tokio::runtime::Runtime> {
    tokio::runtime::Builder::new_current_thread()
        .enable_all()
        .build()
        .context("starting the async runtime")
}

// ---------------------------------------------------------------------------------------
// Argument parsing
// ---------------------------------------------------------------------------------------

/// A latitude/longitude box as typed: south, north, west, east (degrees).
#[derive(Clone, Copy, Debug, PartialEq)]
pub(crate) struct BoxArg {
    pub(crate) south: f64,
    pub(crate) north: f64,
    pub(crate) west: f64,
    pub(crate) east: f64,
}

impl From<BoxArg> for hypsogrid::query::BoundingBox {
    fn from(b: BoxArg) -> Self {
        Self {
            south: b.south,
            north: b.north,
            west: b.west,
            east: b.east,
        }
    }
}

fn parse_numbers(text: &str, n: usize, what: &str) -> Result<Vec<f64>, String> {
    let parts: Vec<&str> = text.split(',').map(str::trim).collect();
    if parts.len() != n {
        return Err(format!("'{text}': expected {what}"));
    }
    parts
        .iter()
        .map(|p| {
            p.parse::<f64>()
                .ok()
                .filter(|v| v.is_finite())
                .ok_or_else(|| format!("'{text}': '{p}' is not a number of degrees"))
        })
        .collect()
}

/// Parses `S,N,W,E` in degrees. The server checks the ranges and names the field.
pub(crate) fn parse_bbox(text: &str) -> Result<BoxArg, String> {
    let v = parse_numbers(
        text,
        4,
        "SOUTH,NORTH,WEST,EAST in degrees, e.g. 50,62,-45,-25",
    )?;
    Ok(BoxArg {
        south: v[0],
        north: v[1],
        west: v[2],
        east: v[3],
    })
}

/// Parses `LAT,LON` in degrees.
pub(crate) fn parse_point(text: &str) -> Result<(f64, f64), String> {
    let v = parse_numbers(text, 2, "LAT,LON in degrees, e.g. 55.4,-42.9")?;
    Ok((v[0], v[1]))
}

/// Parses `LAT,LON,TIME` (TIME in RFC 3339).
pub(crate) fn parse_waypoint(text: &str) -> Result<(f64, f64, String), String> {
    let mut parts = text.splitn(3, ',');
    let (Some(lat), Some(lon), Some(time)) = (parts.next(), parts.next(), parts.next()) else {
        return Err(format!(
            "'{text}': expected LAT,LON,TIME, e.g. 55.4,-42.9,2031-01-14T06:00:00Z"
        ));
    };
    let (lat, lon) = parse_point(&format!("{lat},{lon}"))?;
    Ok((lat, lon, time.trim().to_string()))
}

/// Parses a pressure in hPa into Pa.
pub(crate) fn parse_hpa(text: &str) -> Result<f64, String> {
    text.trim()
        .parse::<f64>()
        .ok()
        .filter(|v| v.is_finite() && *v > 0.0)
        .map(|hpa| hpa * 100.0)
        .ok_or_else(|| format!("'{text}': expected a positive pressure in hPa, e.g. 500"))
}

/// Parses a lead time: `12h`, `90m`, `3600s`, `2d`, `+6h`; a bare number is hours, the way
/// forecasters write `T+12`.
pub(crate) fn parse_lead_time(text: &str) -> Result<i64, String> {
    let t = text.trim();
    let t = t.strip_prefix('+').unwrap_or(t);
    let (number, scale) = match t.char_indices().find(|(_, c)| c.is_ascii_alphabetic()) {
        None => (t, 3600),
        Some((i, _)) => {
            let scale = match &t[i..] {
                "s" => 1,
                "m" | "min" => 60,
                "h" => 3600,
                "d" => 86400,
                _ => 0,
            };
            (&t[..i], scale)
        }
    };
    let value: i64 = number
        .parse()
        .map_err(|_| ())
        .and_then(|v| if scale == 0 { Err(()) } else { Ok(v) })
        .map_err(|()| {
            format!("lead time '{text}': expected e.g. 12h, 90m, 3600s, 2d or a number of hours")
        })?;
    value
        .checked_mul(scale)
        .ok_or_else(|| format!("lead time '{text}' is too large"))
}

// ---------------------------------------------------------------------------------------
// Request building
// ---------------------------------------------------------------------------------------

/// The quantities asked for: thicknesses first, then heights; 1000–500 hPa thickness when
/// nothing is asked (the trade's most used layer).
pub(crate) fn quantities(args: &QuantityArgs) -> Vec<pb::Quantity> {
    let mut out: Vec<pb::Quantity> = args.layers.iter().map(|l| thickness(*l)).collect();
    out.extend(args.heights_pa.iter().map(|&p| height(p)));
    if out.is_empty() {
        out.push(thickness(Layer {
            bottom_pa: 100000.0,
            top_pa: 50000.0,
        }));
    }
    out
}

/// A thickness quantity.
pub(crate) fn thickness(layer: Layer) -> pb::Quantity {
    pb::Quantity {
        kind: Some(pb::quantity::Kind::Thickness(pb::LayerBounds {
            bottom_pa: layer.bottom_pa,
            top_pa: layer.top_pa,
        })),
    }
}

/// A geopotential-height quantity.
pub(crate) fn height(pressure_pa: f64) -> pb::Quantity {
    pb::Quantity {
        kind: Some(pb::quantity::Kind::GeopotentialHeight(
            pb::HeightAtPressure { pressure_pa },
        )),
    }
}

/// A lead-time selection.
pub(crate) fn lead(seconds: i64) -> pb::TimeSelection {
    pb::TimeSelection {
        kind: Some(pb::time_selection::Kind::LeadTimeS(seconds)),
    }
}

fn one_time(args: &OneTimeArgs) -> pb::TimeSelection {
    match &args.valid_time {
        Some(t) => pb::TimeSelection {
            kind: Some(pb::time_selection::Kind::ValidTime(t.clone())),
        },
        None => lead(args.lead_time.unwrap_or(0)),
    }
}

fn interpolation(nearest: bool) -> i32 {
    if nearest {
        pb::Interpolation::Nearest as i32
    } else {
        pb::Interpolation::Bilinear as i32
    }
}

fn point(lat: f64, lon: f64) -> pb::GeoPoint {
    pb::GeoPoint {
        latitude_deg: lat,
        longitude_deg: lon,
    }
}

/// A quantity for people: `thickness 1000-500 hPa`, `height 500 hPa`.
pub(crate) fn quantity_label(q: &pb::Quantity) -> String {
    match &q.kind {
        Some(pb::quantity::Kind::Thickness(l)) => format!(
            "thickness {} hPa",
            Layer {
                bottom_pa: l.bottom_pa,
                top_pa: l.top_pa
            }
            .label_hpa()
        ),
        Some(pb::quantity::Kind::GeopotentialHeight(h)) => {
            format!("height {} hPa", hpa_text(h.pressure_pa))
        }
        None => "unspecified".to_string(),
    }
}

/// A quantity as a machine-friendly key, in the batch output's variable style:
/// `thickness_1000_500`, `geopotential_height_500`, `thickness_925_712p5`.
pub(crate) fn quantity_key(q: &pb::Quantity) -> String {
    let clean = |s: String| s.replace('.', "p");
    match &q.kind {
        Some(pb::quantity::Kind::Thickness(l)) => format!(
            "thickness_{}_{}",
            clean(hpa_text(l.bottom_pa)),
            clean(hpa_text(l.top_pa))
        ),
        Some(pb::quantity::Kind::GeopotentialHeight(h)) => {
            format!("geopotential_height_{}", clean(hpa_text(h.pressure_pa)))
        }
        None => "unspecified".to_string(),
    }
}

fn quantity_json(q: &pb::Quantity) -> Value {
    match &q.kind {
        Some(pb::quantity::Kind::Thickness(l)) => {
            json!({"thickness": {"bottom_pa": l.bottom_pa, "top_pa": l.top_pa}})
        }
        Some(pb::quantity::Kind::GeopotentialHeight(h)) => {
            json!({"geopotential_height": {"pressure_pa": h.pressure_pa}})
        }
        None => Value::Null,
    }
}

fn hpa_text(pa: f64) -> String {
    let hpa = pa / 100.0;
    if (hpa - hpa.round()).abs() < 1e-9 {
        format!("{}", hpa.round() as i64)
    } else {
        format!("{hpa}")
    }
}

/// A value with its marks: `*`-free, `~` below ground, `NaN` missing.
fn marked(v: f64, flags: u8, decimals: usize) -> String {
    if flags & FLAG_MISSING != 0 || !v.is_finite() {
        return "NaN".to_string();
    }
    let mut s = number(v, decimals);
    if flags & FLAG_BELOW_GROUND != 0 {
        s.push('~');
    }
    s
}

fn flag_of(flags: &[u8], i: usize) -> u8 {
    flags.get(i).copied().unwrap_or(0)
}

/// The table cells of one sample's values (one per quantity), marked by their flags.
fn marked_cells(values: &[f64], flags: &[u8], quantities: usize) -> Vec<String> {
    (0..quantities)
        .map(|i| {
            let v = values.get(i).copied().unwrap_or(f64::NAN);
            marked(v, flag_of(flags, i), 1)
        })
        .collect()
}

const MARKS_NOTE: &str = "values in gpm; '~' below ground (extrapolated), NaN missing";

// ---------------------------------------------------------------------------------------
// Catalogue
// ---------------------------------------------------------------------------------------

pub(super) fn catalogue(args: CatalogueArgs) -> Result<()> {
    let response = unary(&args.connect, "catalogue", |mut client| async move {
        client.get_catalogue(pb::CatalogueRequest {}).await
    })?;
    print!("{}", render_catalogue(&response, args.connect.format)?);
    Ok(())
}

fn lead_span(leads: &[i64]) -> String {
    match (leads.first(), leads.last()) {
        (Some(a), Some(b)) if leads.len() > 1 => {
            format!("{}..{} ({})", lead_label(*a), lead_label(*b), leads.len())
        }
        (Some(a), _) => lead_label(*a),
        _ => "none".to_string(),
    }
}

fn vertical_label(v: Option<&pb::VerticalAxis>) -> String {
    match v.and_then(|v| v.kind.as_ref()) {
        Some(pb::vertical_axis::Kind::Isobaric(iso)) => {
            match (iso.pressure_pa.first(), iso.pressure_pa.last()) {
                (Some(b), Some(t)) => format!(
                    "{} isobaric {}..{} hPa",
                    iso.pressure_pa.len(),
                    hpa_text(*b),
                    hpa_text(*t)
                ),
                _ => "isobaric, no levels".to_string(),
            }
        }
        Some(pb::vertical_axis::Kind::Hybrid(h)) => format!("{} hybrid", h.full_levels),
        None => "unknown".to_string(),
    }
}

fn grid_label(g: Option<&pb::LatLonGrid>) -> String {
    let Some(g) = g else {
        return "unknown".to_string();
    };
    let span = |v: &[f64]| match (v.first(), v.last()) {
        (Some(a), Some(b)) => format!("{a}..{b}"),
        _ => "-".to_string(),
    };
    format!(
        "{}x{} lat {} lon {}",
        g.latitudes_deg.len(),
        g.longitudes_deg.len(),
        span(&g.latitudes_deg),
        span(&g.longitudes_deg)
    )
}

fn render_catalogue(c: &pb::CatalogueResponse, format: OutputFormat) -> Result<String> {
    let mut out = String::new();
    match format {
        OutputFormat::Json => {
            let cycles: Vec<Value> = c
                .cycles
                .iter()
                .map(|e| {
                    let d = e.description.clone().unwrap_or_default();
                    let vertical = match d.vertical.as_ref().and_then(|v| v.kind.as_ref()) {
                        Some(pb::vertical_axis::Kind::Isobaric(iso)) => {
                            json!({"isobaric": {"pressure_pa": iso.pressure_pa}})
                        }
                        Some(pb::vertical_axis::Kind::Hybrid(h)) => json!({"hybrid": {
                            "full_levels": h.full_levels,
                            "a_half_pa": h.a_half_pa,
                            "b_half": h.b_half,
                        }}),
                        None => Value::Null,
                    };
                    let grid = d.grid.clone().unwrap_or_default();
                    let constants = d.constants.unwrap_or_default();
                    json!({
                        "id": e.id,
                        "source": d.source,
                        "reference_time": d.reference_time,
                        "lead_times_s": d.lead_times_s,
                        "valid_times": d.valid_times,
                        "members": d.members,
                        "grid": {"latitudes_deg": grid.latitudes_deg, "longitudes_deg": grid.longitudes_deg},
                        "vertical": vertical,
                        "variables": d.variables,
                        "humidity": d.humidity,
                        "from_surface": d.from_surface,
                        "constants": {
                            "dry_air_gas_constant": constants.dry_air_gas_constant,
                            "standard_gravity": constants.standard_gravity,
                            "molar_mass_ratio": constants.molar_mass_ratio,
                        },
                        "notes": d.notes,
                        "loaded_at": e.loaded_at,
                        "load_s": e.load_s,
                        "memory_bytes": e.memory_bytes,
                        "heights_ready": e.heights_ready,
                    })
                })
                .collect();
            let failures: Vec<Value> = c
                .failures
                .iter()
                .map(|f| json!({"source": f.source, "error": f.error, "failed_at": f.failed_at}))
                .collect();
            let evictions: Vec<Value> = c
                .evictions
                .iter()
                .map(|e| json!({"id": e.id, "reason": e.reason, "evicted_at": e.evicted_at}))
                .collect();
            let doc = json!({
                "generation": c.generation,
                "cycles": cycles,
                "failures": failures,
                "evictions": evictions,
            });
            writeln!(out, "{}", serde_json::to_string_pretty(&doc)?)?;
        }
        OutputFormat::Csv => {
            let mut csv = Csv::new([
                "id",
                "reference_time",
                "lead_times_s",
                "members",
                "levels",
                "rows",
                "columns",
                "loaded_at",
                "load_s",
                "memory_bytes",
                "heights_ready",
                "source",
            ]);
            for e in &c.cycles {
                let d = e.description.clone().unwrap_or_default();
                let grid = d.grid.clone().unwrap_or_default();
                let leads: Vec<String> = d.lead_times_s.iter().map(|l| l.to_string()).collect();
                csv.record([
                    e.id.clone(),
                    d.reference_time.clone(),
                    leads.join(" "),
                    d.members.to_string(),
                    vertical_label(d.vertical.as_ref()),
                    grid.latitudes_deg.len().to_string(),
                    grid.longitudes_deg.len().to_string(),
                    e.loaded_at.clone(),
                    format!("{:.3}", e.load_s),
                    e.memory_bytes.to_string(),
                    e.heights_ready.to_string(),
                    d.source.clone(),
                ]);
            }
            out.push_str(&csv.finish());
        }
        OutputFormat::Table => {
            writeln!(
                out,
                "{} cycle(s) loaded, {} failure(s), generation {}",
                c.cycles.len(),
                c.failures.len(),
                c.generation
            )?;
            if !c.cycles.is_empty() {
                let mut t = Table::new([
                    "id",
                    "reference time",
                    "lead times",
                    "members",
                    "levels",
                    "grid",
                    "loaded at",
                    "load s",
                    "memory",
                    "heights",
                ]);
                for e in &c.cycles {
                    let d = e.description.clone().unwrap_or_default();
                    t.row([
                        e.id.clone(),
                        if d.reference_time.is_empty() {
                            "unknown".to_string()
                        } else {
                            d.reference_time.clone()
                        },
                        lead_span(&d.lead_times_s),
                        d.members.to_string(),
                        vertical_label(d.vertical.as_ref()),
                        grid_label(d.grid.as_ref()),
                        e.loaded_at.clone(),
                        format!("{:.2}", e.load_s),
                        bytes_label(e.memory_bytes),
                        if e.heights_ready {
                            "ready"
                        } else {
                            "computing"
                        }
                        .to_string(),
                    ]);
                }
                writeln!(out)?;
                out.push_str(&t.render());
            }
            if !c.failures.is_empty() {
                writeln!(out, "\nfiles that failed to load:")?;
                let mut t = Table::new(["source", "failed at", "error"]);
                for f in &c.failures {
                    t.row([f.source.clone(), f.failed_at.clone(), f.error.clone()]);
                }
                out.push_str(&t.render());
            }
            if !c.evictions.is_empty() {
                writeln!(out, "\nrecent evictions:")?;
                let mut t = Table::new(["id", "evicted at", "reason"]);
                for e in &c.evictions {
                    t.row([e.id.clone(), e.evicted_at.clone(), e.reason.clone()]);
                }
                out.push_str(&t.render());
            }
        }
    }
    Ok(out)
}

// ---------------------------------------------------------------------------------------
// Area
// ---------------------------------------------------------------------------------------

/// One quantity of a reassembled area answer.
#[derive(Clone, Debug)]
pub(crate) struct AreaField {
    pub(crate) quantity: pb::Quantity,
    /// Row-major over latitudes x longitudes, north to south, west to east.
    pub(crate) values: Vec<f32>,
    /// One byte per value, PointFlag bits.
    pub(crate) flags: Vec<u8>,
}

/// An area answer with its chunks put back together.
#[derive(Clone, Debug)]
pub(crate) struct AreaResult {
    pub(crate) cycle_id: String,
    pub(crate) lead_time_s: i64,
    pub(crate) valid_time: String,
    pub(crate) latitudes: Vec<f64>,
    pub(crate) longitudes: Vec<f64>,
    pub(crate) fields: Vec<AreaField>,
    /// How many messages the answer came in.
    pub(crate) chunks: usize,
}

/// Sends an area request and reassembles the streamed chunks, checking that they join up.
pub(crate) async fn fetch_area(
    client: &mut Client,
    request: pb::AreaRequest,
) -> Result<AreaResult> {
    let mut stream = client
        .query_area(request)
        .await
        .map_err(|s| status_error("area", s))?
        .into_inner();
    let mut result: Option<AreaResult> = None;
    let mut total_rows = 0usize;
    while let Some(chunk) = stream
        .message()
        .await
        .map_err(|s| status_error("area (while streaming)", s))?
    {
        let r = result.get_or_insert_with(|| AreaResult {
            cycle_id: chunk.cycle_id.clone(),
            lead_time_s: chunk.lead_time_s,
            valid_time: chunk.valid_time.clone(),
            latitudes: Vec::new(),
            longitudes: chunk.longitudes_deg.clone(),
            fields: chunk
                .fields
                .iter()
                .map(|f| AreaField {
                    quantity: f.quantity.unwrap_or_default(),
                    values: Vec::new(),
                    flags: Vec::new(),
                })
                .collect(),
            chunks: 0,
        });
        if r.chunks == 0 {
            total_rows = chunk.total_rows as usize;
        }
        if chunk.row_offset as usize != r.latitudes.len() {
            bail!(
                "area: chunk {} starts at row {}, expected row {}",
                r.chunks,
                chunk.row_offset,
                r.latitudes.len()
            );
        }
        if chunk.fields.len() != r.fields.len() {
            bail!(
                "area: chunk {} has {} fields, the first had {}",
                r.chunks,
                chunk.fields.len(),
                r.fields.len()
            );
        }
        let expected = chunk.latitudes_deg.len() * r.longitudes.len();
        for (i, (field, into)) in chunk.fields.iter().zip(r.fields.iter_mut()).enumerate() {
            if field.values.len() != expected || field.flags.len() != expected {
                bail!(
                    "area: chunk {} field {i} has {} values and {} flags, expected {expected}",
                    r.chunks,
                    field.values.len(),
                    field.flags.len()
                );
            }
            into.values.extend_from_slice(&field.values);
            into.flags.extend_from_slice(&field.flags);
        }
        r.latitudes.extend_from_slice(&chunk.latitudes_deg);
        r.chunks += 1;
    }
    let r = result.context("area: the server sent no chunk")?;
    if r.latitudes.len() != total_rows {
        bail!(
            "area: received {} rows of the {total_rows} announced",
            r.latitudes.len()
        );
    }
    Ok(r)
}

pub(super) fn area(args: AreaArgs) -> Result<()> {
    let request = pb::AreaRequest {
        cycle_id: args.cycle.cycle_id.clone(),
        time: Some(one_time(&args.time)),
        member: args.cycle.member,
        quantities: quantities(&args.quantities),
        bbox: Some(pb::BoundingBox {
            south_deg: args.bbox.south,
            north_deg: args.bbox.north,
            west_deg: args.bbox.west,
            east_deg: args.bbox.east,
        }),
        stride: Some(args.stride),
        allow_extrapolation: args.quantities.extrapolate,
    };
    let result = runtime()?.block_on(async {
        let mut client = connect(&args.connect).await?;
        fetch_area(&mut client, request).await
    })?;
    print!("{}", render_area(&result, args.connect.format)?);
    Ok(())
}

fn render_area(a: &AreaResult, format: OutputFormat) -> Result<String> {
    let ncols = a.longitudes.len();
    let mut out = String::new();
    match format {
        OutputFormat::Json => {
            let rows = |v: &[f32]| -> Vec<Value> {
                v.chunks(ncols.max(1))
                    .map(|r| Value::Array(r.iter().map(|&x| json_number(f64::from(x))).collect()))
                    .collect()
            };
            let fields: Vec<Value> = a
                .fields
                .iter()
                .map(|f| {
                    let flag_rows: Vec<Value> =
                        f.flags.chunks(ncols.max(1)).map(|r| json!(r)).collect();
                    json!({
                        "quantity": quantity_json(&f.quantity),
                        "name": quantity_key(&f.quantity),
                        "units": "gpm",
                        "values": rows(&f.values),
                        "flags": flag_rows,
                    })
                })
                .collect();
            let doc = json!({
                "cycle_id": a.cycle_id,
                "lead_time_s": a.lead_time_s,
                "valid_time": a.valid_time,
                "latitudes_deg": a.latitudes,
                "longitudes_deg": a.longitudes,
                "flag_bits": {"below_ground": FLAG_BELOW_GROUND, "missing": FLAG_MISSING},
                "fields": fields,
            });
            writeln!(out, "{}", serde_json::to_string_pretty(&doc)?)?;
        }
        OutputFormat::Csv => {
            let mut csv = Csv::new([
                "quantity",
                "latitude_deg",
                "longitude_deg",
                "value_gpm",
                "below_ground",
                "missing",
            ]);
            for f in &a.fields {
                let key = quantity_key(&f.quantity);
                for (i, &v) in f.values.iter().enumerate() {
                    let (r, c) = (i / ncols.max(1), i % ncols.max(1));
                    let fl = flag_of(&f.flags, i);
                    csv.record([
                        key.clone(),
                        a.latitudes[r].to_string(),
                        a.longitudes[c].to_string(),
                        csv_number(f64::from(v)),
                        u8::from(fl & FLAG_BELOW_GROUND != 0).to_string(),
                        u8::from(fl & FLAG_MISSING != 0 || !v.is_finite()).to_string(),
                    ]);
                }
            }
            out.push_str(&csv.finish());
        }
        OutputFormat::Table => {
            writeln!(
                out,
                "cycle {}, lead time {}{}, {} rows x {} columns ({} chunk(s))",
                a.cycle_id,
                lead_label(a.lead_time_s),
                if a.valid_time.is_empty() {
                    String::new()
                } else {
                    format!(", valid {}", a.valid_time)
                },
                a.latitudes.len(),
                ncols,
                a.chunks
            )?;
            for f in &a.fields {
                let finite: Vec<f64> = f
                    .values
                    .iter()
                    .map(|&v| f64::from(v))
                    .filter(|v| v.is_finite())
                    .collect();
                let below = f
                    .flags
                    .iter()
                    .filter(|&&b| b & FLAG_BELOW_GROUND != 0)
                    .count();
                let missing = f.values.len() - finite.len();
                writeln!(out, "\n{} (gpm)", quantity_label(&f.quantity))?;
                if finite.is_empty() {
                    writeln!(out, "  no values ({missing} missing)")?;
                } else {
                    let (lo, hi) = finite
                        .iter()
                        .fold((f64::INFINITY, f64::NEG_INFINITY), |(a, b), &v| {
                            (a.min(v), b.max(v))
                        });
                    let mean = finite.iter().sum::<f64>() / finite.len() as f64;
                    writeln!(
                        out,
                        "  min {lo:.1}  mean {mean:.1}  max {hi:.1}  ({below} below ground, {missing} missing)"
                    )?;
                }
                if ncols <= MAX_TABLE_COLUMNS {
                    let mut headers = vec!["lat \\ lon".to_string()];
                    headers.extend(a.longitudes.iter().map(|l| format!("{l}")));
                    let mut t = Table::new(headers);
                    for (r, lat) in a.latitudes.iter().enumerate() {
                        let mut row = vec![format!("{lat}")];
                        for c in 0..ncols {
                            let i = r * ncols + c;
                            row.push(marked(f64::from(f.values[i]), flag_of(&f.flags, i), 0));
                        }
                        t.row(row);
                    }
                    out.push_str(&t.render());
                } else {
                    writeln!(
                        out,
                        "  ({ncols} columns are too wide for a table: use --stride, or --format csv or json for every value)"
                    )?;
                }
            }
            writeln!(out, "\n{MARKS_NOTE}")?;
        }
    }
    Ok(out)
}

// ---------------------------------------------------------------------------------------
// Position
// ---------------------------------------------------------------------------------------

pub(super) fn position(args: PositionArgs) -> Result<()> {
    let times = position_times(&args.lead_times, &args.valid_times)?;
    let request = pb::PositionRequest {
        cycle_id: args.cycle.cycle_id.clone(),
        points: args
            .points
            .iter()
            .map(|&(lat, lon)| point(lat, lon))
            .collect(),
        quantities: quantities(&args.quantities),
        times,
        member: args.cycle.member,
        interpolation: interpolation(args.nearest),
        allow_extrapolation: args.quantities.extrapolate,
    };
    let response = unary(&args.connect, "position", |mut client| async move {
        client.query_position(request).await
    })?;
    print!("{}", render_position(&response, args.connect.format)?);
    Ok(())
}

/// `--lead-time` values (or `all`) and `--valid-time` values to time selections; empty
/// means every lead time.
fn position_times(leads: &[String], valid: &[String]) -> Result<Vec<pb::TimeSelection>> {
    if leads.iter().any(|l| l.trim() == "all") {
        if leads.len() > 1 {
            bail!("--lead-time: 'all' cannot be combined with other lead times");
        }
        return Ok(Vec::new());
    }
    let mut out = Vec::new();
    for l in leads {
        out.push(lead(parse_lead_time(l).map_err(anyhow::Error::msg)?));
    }
    for v in valid {
        out.push(pb::TimeSelection {
            kind: Some(pb::time_selection::Kind::ValidTime(v.clone())),
        });
    }
    Ok(out)
}

fn render_position(p: &pb::PositionResponse, format: OutputFormat) -> Result<String> {
    let mut out = String::new();
    match format {
        OutputFormat::Json => {
            let series: Vec<Value> = p
                .series
                .iter()
                .map(|s| {
                    let pt = s.point.unwrap_or_default();
                    let samples: Vec<Value> = s
                        .samples
                        .iter()
                        .map(|x| {
                            json!({
                                "lead_time_s": x.lead_time_s,
                                "valid_time": x.valid_time,
                                "values": x.values.iter().map(|&v| json_number(v)).collect::<Vec<_>>(),
                                "flags": x.flags,
                            })
                        })
                        .collect();
                    json!({"latitude_deg": pt.latitude_deg, "longitude_deg": pt.longitude_deg, "samples": samples})
                })
                .collect();
            let doc = json!({
                "cycle_id": p.cycle_id,
                "quantities": p.quantities.iter().map(quantity_json).collect::<Vec<_>>(),
                "names": p.quantities.iter().map(quantity_key).collect::<Vec<_>>(),
                "units": "gpm",
                "flag_bits": {"below_ground": FLAG_BELOW_GROUND, "missing": FLAG_MISSING},
                "series": series,
            });
            writeln!(out, "{}", serde_json::to_string_pretty(&doc)?)?;
        }
        OutputFormat::Csv => {
            let mut csv = Csv::new([
                "latitude_deg",
                "longitude_deg",
                "lead_time_s",
                "valid_time",
                "quantity",
                "value_gpm",
                "below_ground",
                "missing",
            ]);
            for s in &p.series {
                let pt = s.point.unwrap_or_default();
                for x in &s.samples {
                    for (i, q) in p.quantities.iter().enumerate() {
                        let v = x.values.get(i).copied().unwrap_or(f64::NAN);
                        let fl = flag_of(&x.flags, i);
                        csv.record([
                            pt.latitude_deg.to_string(),
                            pt.longitude_deg.to_string(),
                            x.lead_time_s.to_string(),
                            x.valid_time.clone(),
                            quantity_key(q),
                            csv_number(v),
                            u8::from(fl & FLAG_BELOW_GROUND != 0).to_string(),
                            u8::from(fl & FLAG_MISSING != 0 || !v.is_finite()).to_string(),
                        ]);
                    }
                }
            }
            out.push_str(&csv.finish());
        }
        OutputFormat::Table => {
            writeln!(out, "cycle {}", p.cycle_id)?;
            for s in &p.series {
                let pt = s.point.unwrap_or_default();
                writeln!(out, "\npoint {}, {}", pt.latitude_deg, pt.longitude_deg)?;
                let mut headers = vec!["lead".to_string(), "valid time".to_string()];
                headers.extend(p.quantities.iter().map(quantity_label));
                let mut t = Table::new(headers);
                for x in &s.samples {
                    let mut row = vec![lead_label(x.lead_time_s), x.valid_time.clone()];
                    row.extend(marked_cells(&x.values, &x.flags, p.quantities.len()));
                    t.row(row);
                }
                out.push_str(&t.render());
            }
            writeln!(out, "\n{MARKS_NOTE}")?;
        }
    }
    Ok(out)
}

// ---------------------------------------------------------------------------------------
// Profile
// ---------------------------------------------------------------------------------------

pub(super) fn profile(args: ProfileArgs) -> Result<()> {
    let request = pb::ProfileRequest {
        cycle_id: args.cycle.cycle_id.clone(),
        point: Some(point(args.point.0, args.point.1)),
        time: Some(one_time(&args.time)),
        member: args.cycle.member,
        interpolation: interpolation(args.nearest),
    };
    let response = unary(&args.connect, "profile", |mut client| async move {
        client.query_profile(request).await
    })?;
    print!("{}", render_profile(&response, args.connect.format)?);
    Ok(())
}

fn render_profile(p: &pb::ProfileResponse, format: OutputFormat) -> Result<String> {
    let pt = p.point.unwrap_or_default();
    let mut out = String::new();
    match format {
        OutputFormat::Json => {
            let levels: Vec<Value> = p
                .levels
                .iter()
                .map(|l| {
                    json!({
                        "pressure_pa": l.pressure_pa,
                        "temperature_k": json_number(l.temperature_k),
                        "virtual_temperature_k": json_number(l.virtual_temperature_k),
                        "geopotential_height_m": json_number(l.geopotential_height_m),
                        "below_ground": l.below_ground,
                    })
                })
                .collect();
            let doc = json!({
                "cycle_id": p.cycle_id,
                "lead_time_s": p.lead_time_s,
                "valid_time": p.valid_time,
                "latitude_deg": pt.latitude_deg,
                "longitude_deg": pt.longitude_deg,
                "surface_pressure_pa": p.surface_pressure_pa.map(json_number),
                "surface_height_m": p.surface_height_m.map(json_number),
                "levels": levels,
            });
            writeln!(out, "{}", serde_json::to_string_pretty(&doc)?)?;
        }
        OutputFormat::Csv => {
            let mut csv = Csv::new([
                "pressure_pa",
                "temperature_k",
                "virtual_temperature_k",
                "geopotential_height_m",
                "below_ground",
            ]);
            for l in &p.levels {
                csv.record([
                    csv_number(l.pressure_pa),
                    csv_number(l.temperature_k),
                    csv_number(l.virtual_temperature_k),
                    csv_number(l.geopotential_height_m),
                    u8::from(l.below_ground).to_string(),
                ]);
            }
            out.push_str(&csv.finish());
        }
        OutputFormat::Table => {
            writeln!(
                out,
                "profile at {}, {}: cycle {}, lead time {}{}",
                pt.latitude_deg,
                pt.longitude_deg,
                p.cycle_id,
                lead_label(p.lead_time_s),
                if p.valid_time.is_empty() {
                    String::new()
                } else {
                    format!(", valid {}", p.valid_time)
                }
            )?;
            match (p.surface_pressure_pa, p.surface_height_m) {
                (Some(ps), Some(zs)) => writeln!(
                    out,
                    "surface: {} hPa at {} gpm",
                    number(ps / 100.0, 1),
                    number(zs, 0)
                )?,
                _ => writeln!(out, "surface: not in the cycle")?,
            }
            let mut t = Table::new([
                "p hPa",
                "T K",
                "T degC",
                "Tv K",
                "height gpm",
                "below ground",
            ]);
            // Top of the column first, as a sounding is read.
            for l in p.levels.iter().rev() {
                t.row([
                    hpa_text(l.pressure_pa),
                    number(l.temperature_k, 1),
                    number(l.temperature_k - 273.15, 1),
                    number(l.virtual_temperature_k, 1),
                    number(l.geopotential_height_m, 1),
                    if l.below_ground { "yes" } else { "" }.to_string(),
                ]);
            }
            out.push_str(&t.render());
        }
    }
    Ok(out)
}

// ---------------------------------------------------------------------------------------
// Trajectory
// ---------------------------------------------------------------------------------------

pub(super) fn trajectory(args: TrajectoryArgs) -> Result<()> {
    let request = pb::TrajectoryRequest {
        cycle_id: args.cycle.cycle_id.clone(),
        waypoints: args
            .waypoints
            .iter()
            .map(|(lat, lon, time)| pb::Waypoint {
                point: Some(point(*lat, *lon)),
                valid_time: time.clone(),
            })
            .collect(),
        quantities: quantities(&args.quantities),
        member: args.cycle.member,
        interpolation: interpolation(args.nearest),
        allow_extrapolation: args.quantities.extrapolate,
    };
    let response = unary(&args.connect, "trajectory", |mut client| async move {
        client.query_trajectory(request).await
    })?;
    print!("{}", render_trajectory(&response, args.connect.format)?);
    Ok(())
}

fn render_trajectory(p: &pb::TrajectoryResponse, format: OutputFormat) -> Result<String> {
    let mut out = String::new();
    let waypoint = |s: &pb::TrajectorySample| {
        let w = s.waypoint.clone().unwrap_or_default();
        let pt = w.point.unwrap_or_default();
        (pt.latitude_deg, pt.longitude_deg, w.valid_time)
    };
    match format {
        OutputFormat::Json => {
            let samples: Vec<Value> = p
                .samples
                .iter()
                .map(|s| {
                    let (lat, lon, time) = waypoint(s);
                    json!({
                        "latitude_deg": lat,
                        "longitude_deg": lon,
                        "valid_time": time,
                        "values": s.values.iter().map(|&v| json_number(v)).collect::<Vec<_>>(),
                        "flags": s.flags,
                    })
                })
                .collect();
            let doc = json!({
                "cycle_id": p.cycle_id,
                "quantities": p.quantities.iter().map(quantity_json).collect::<Vec<_>>(),
                "names": p.quantities.iter().map(quantity_key).collect::<Vec<_>>(),
                "units": "gpm",
                "samples": samples,
            });
            writeln!(out, "{}", serde_json::to_string_pretty(&doc)?)?;
        }
        OutputFormat::Csv => {
            let mut csv = Csv::new([
                "waypoint",
                "latitude_deg",
                "longitude_deg",
                "valid_time",
                "quantity",
                "value_gpm",
                "below_ground",
                "missing",
            ]);
            for (n, s) in p.samples.iter().enumerate() {
                let (lat, lon, time) = waypoint(s);
                for (i, q) in p.quantities.iter().enumerate() {
                    let v = s.values.get(i).copied().unwrap_or(f64::NAN);
                    let fl = flag_of(&s.flags, i);
                    csv.record([
                        n.to_string(),
                        lat.to_string(),
                        lon.to_string(),
                        time.clone(),
                        quantity_key(q),
                        csv_number(v),
                        u8::from(fl & FLAG_BELOW_GROUND != 0).to_string(),
                        u8::from(fl & FLAG_MISSING != 0 || !v.is_finite()).to_string(),
                    ]);
                }
            }
            out.push_str(&csv.finish());
        }
        OutputFormat::Table => {
            writeln!(out, "cycle {}", p.cycle_id)?;
            let mut headers = vec![
                "#".to_string(),
                "lat".to_string(),
                "lon".to_string(),
                "valid time".to_string(),
            ];
            headers.extend(p.quantities.iter().map(quantity_label));
            let mut t = Table::new(headers);
            for (n, s) in p.samples.iter().enumerate() {
                let (lat, lon, time) = waypoint(s);
                let mut row = vec![n.to_string(), lat.to_string(), lon.to_string(), time];
                row.extend(marked_cells(&s.values, &s.flags, p.quantities.len()));
                t.row(row);
            }
            out.push_str(&t.render());
            writeln!(out, "\n{MARKS_NOTE}")?;
        }
    }
    Ok(out)
}

// ---------------------------------------------------------------------------------------
// Health
// ---------------------------------------------------------------------------------------

pub(super) fn health(args: HealthArgs) -> Result<()> {
    use tonic_health::pb::health_check_response::ServingStatus;
    use tonic_health::pb::health_client::HealthClient;
    let status = runtime()?.block_on(async {
        let channel = channel(&args.connect).await?;
        let response = HealthClient::new(channel)
            .check(tonic_health::pb::HealthCheckRequest {
                service: args.service.clone(),
            })
            .await
            .map_err(|s| status_error("health", s))?;
        Ok::<_, anyhow::Error>(response.into_inner().status)
    })?;
    let status = ServingStatus::try_from(status).unwrap_or(ServingStatus::Unknown);
    let name = status.as_str_name();
    let what = if args.service.is_empty() {
        "server".to_string()
    } else {
        format!("service '{}'", args.service)
    };
    match args.connect.format {
        OutputFormat::Json => println!(
            "{}",
            json!({"server": args.connect.server, "service": args.service, "status": name})
        ),
        OutputFormat::Csv => print!("{}", {
            let mut csv = Csv::new(["server", "service", "status"]);
            csv.record([args.connect.server.as_str(), args.service.as_str(), name]);
            csv.finish()
        }),
        OutputFormat::Table => println!("{}: {what} is {name}", args.connect.server),
    }
    if status == ServingStatus::Serving {
        Ok(())
    } else {
        bail!("{}: {what} is {name}, not SERVING", args.connect.server)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn lead_times_parse_with_units_and_bare_hours() {
        assert_eq!(parse_lead_time("12h"), Ok(43200));
        assert_eq!(parse_lead_time("+6h"), Ok(21600));
        assert_eq!(parse_lead_time("90m"), Ok(5400));
        assert_eq!(parse_lead_time("3600s"), Ok(3600));
        assert_eq!(parse_lead_time("2d"), Ok(172800));
        assert_eq!(parse_lead_time("24"), Ok(86400));
        assert!(parse_lead_time("12x").is_err());
        assert!(parse_lead_time("h").is_err());
        assert!(parse_lead_time("").is_err());
    }

    #[test]
    fn boxes_points_and_waypoints_parse() {
        let b = parse_bbox("50,62,170,-170").unwrap();
        assert_eq!(
            (b.south, b.north, b.west, b.east),
            (50.0, 62.0, 170.0, -170.0)
        );
        assert!(parse_bbox("50,62,170")
            .unwrap_err()
            .contains("SOUTH,NORTH,WEST,EAST"));
        assert!(parse_bbox("50,62,170,nan").is_err());
        assert_eq!(parse_point(" 55.4 , -42.9 "), Ok((55.4, -42.9)));
        assert!(parse_point("55.4").is_err());
        let w = parse_waypoint("55.4,-42.9,2031-01-14T06:00:00Z").unwrap();
        assert_eq!(w, (55.4, -42.9, "2031-01-14T06:00:00Z".to_string()));
        assert!(parse_waypoint("55.4,-42.9").is_err());
        assert_eq!(parse_hpa("500"), Ok(50000.0));
        assert!(parse_hpa("-5").is_err());
    }

    #[test]
    fn quantities_default_to_the_1000_500_layer_and_keep_their_names() {
        let none = QuantityArgs {
            layers: vec![],
            heights_pa: vec![],
            extrapolate: false,
        };
        let q = quantities(&none);
        assert_eq!(q.len(), 1);
        assert_eq!(quantity_key(&q[0]), "thickness_1000_500");
        assert_eq!(quantity_label(&q[0]), "thickness 1000-500 hPa");
        let some = QuantityArgs {
            layers: vec![Layer {
                bottom_pa: 92500.0,
                top_pa: 71250.0,
            }],
            heights_pa: vec![50000.0],
            extrapolate: true,
        };
        let keys: Vec<String> = quantities(&some).iter().map(quantity_key).collect();
        assert_eq!(keys, ["thickness_925_712p5", "geopotential_height_500"]);
    }

    #[test]
    fn position_times_all_means_every_lead_time() {
        assert!(position_times(&["all".into()], &[]).unwrap().is_empty());
        assert!(position_times(&[], &[]).unwrap().is_empty());
        assert!(position_times(&["all".into(), "6h".into()], &[]).is_err());
        let t = position_times(
            &["6h".into(), "12".into()],
            &["2031-01-14T00:00:00Z".into()],
        )
        .unwrap();
        assert_eq!(t.len(), 3);
        assert_eq!(t[0], lead(21600));
        assert_eq!(t[1], lead(43200));
    }

    #[test]
    fn marks_show_below_ground_and_missing() {
        assert_eq!(marked(5400.4, 0, 0), "5400");
        assert_eq!(marked(5400.4, FLAG_BELOW_GROUND, 0), "5400~");
        assert_eq!(marked(f64::NAN, FLAG_MISSING, 0), "NaN");
        assert_eq!(marked(5400.0, FLAG_MISSING, 0), "NaN");
    }
}
