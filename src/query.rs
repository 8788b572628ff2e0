//! Answers on one loaded cycle: area, position, profile and trajectory queries.
//!
//! The query shapes take their names from the open OGC API – Environmental Data Retrieval
//! standard (position, area, trajectory) and from the trade (profile, lead time, valid time,
//! member). Nothing here knows of protobuf: the service layer converts requests into these
//! structs and [`QueryError`] into a status.
//!
//! # How values are found
//! - A geopotential height at a pressure on one of the cycle's isobaric levels (within 1e-6
//!   relative) is read straight from the batch output ([`LoadedCycle::heights`]): no column is
//!   rebuilt, so these answers are identical to `compute_heights` and cost a memory read.
//!   While the step's heights are still being computed (a cycle is served as soon as it is
//!   read), point queries read the level from the rebuilt column instead (within 1 mm, or
//!   one `f32` step above 8 km, of the stored value; same flags) and areas wait for the step.
//! - Any other pressure (and every pressure on hybrid levels) rebuilds the column exactly as
//!   the batch does ([`StepColumns`]) and interpolates it with
//!   [`ColumnNodes::height_at_pressure`]; one [`ColumnScratch`] is reused per call.
//! - Thickness is height(top) − height(bottom), each found as above, so it equals the batch
//!   `thickness_between` output to `f32` rounding.
//! - Bilinear values interpolate the quantity computed at the four surrounding columns; a
//!   masked corner with a non-zero weight masks the value, and the below-ground flag is set
//!   when any such corner is below ground.
//!
//! # Validation
//! Every request is checked before any work, and every error names the request field by its
//! dotted path (`bbox.south`, `points[3].latitude`, `quantities[1].thickness.top_pa`). The
//! number of point-values an answer would hold is checked against [`Limits`] before anything
//! is allocated for it.

use std::path::{Path, PathBuf};
use std::sync::Mutex;
use std::time::{Instant, SystemTime};

use ndarray::{s, ArrayView1, ArrayView3, Axis};
use rayon::prelude::*;

use crate::compute::{
    heights_method, read_for_serving, ColumnScratch, ComputeConfig, ComputeError, PendingSteps,
    StepColumns,
};
use crate::grid::{locate, SampleError, Stencil};
use crate::ingest::time::{format_rfc3339_utc, parse_date_time};
use crate::ingest::IngestConfig;
use crate::lanes::{lane_builds, Lanes};
use crate::model::{Cycle, Layer, Vertical};
use crate::physics::column::{ColumnNodes, HeightAtPressure};
use crate::physics::hypsometric::{isothermal_height, scale_height};
use crate::physics::Constants;
use crate::served::{ServedHeights, StepHeights};

/// Relative tolerance within which a requested pressure counts as lying on a level.
const ON_LEVEL_RELATIVE: f64 = 1e-6;

/// Tolerance, degrees, for a grid coordinate on the edge of a box.
const EDGE_DEGREES: f64 = 1e-9;

/// Flag bit: the value lies below the ground (its height is an extrapolation by convention).
pub const FLAG_BELOW_GROUND: u8 = 1;
/// Flag bit: the value is missing (masked input, or an extrapolation that was impossible);
/// the value itself is `NaN`.
pub const FLAG_MISSING: u8 = 2;

/// One cycle as served: the fields read from the file and the heights on every level.
///
/// A cycle is served as soon as its file has been read ([`LoadedCycle::read`]); the heights
/// of steps still pending then ([`LoadedCycle::finish_heights`]) are computed after. Until a
/// step's heights are in, queries on it that need few columns rebuild them exactly as the
/// batch does, and the others wait for the step (see [`ServedHeights`]).
#[derive(Debug)]
pub struct LoadedCycle {
    /// The file name, unique within the data folder; clients name cycles by it.
    pub id: String,
    /// The file it was read from.
    pub path: PathBuf,
    /// The fields as read.
    pub cycle: Cycle,
    /// Heights on every level (computed with no layers: thickness is answered per query),
    /// step by step.
    pub heights: ServedHeights,
    /// The settings the heights were computed with; columns are rebuilt with the same.
    pub config: ComputeConfig,
    /// When the cycle became servable.
    pub loaded_at: SystemTime,
    /// Seconds spent reading (and computing what was computed during the read) until the
    /// cycle was servable.
    pub load_seconds: f64,
    /// Bytes held by the fields and the heights, once all computed (for the store's
    /// memory budget).
    pub bytes: usize,
    /// The steps still to compute, until [`LoadedCycle::finish_heights`] takes them.
    pending: Mutex<Option<PendingSteps>>,
}

pub use crate::compute::LoadError;

impl LoadedCycle {
    /// Reads a cycle and computes its heights on every level: [`LoadedCycle::read`] then
    /// [`LoadedCycle::finish_heights`].
    ///
    /// The thickness layers of `compute` are ignored: thickness is answered per query from
    /// the heights and the rebuilt columns, so the stored config has no layers.
    pub fn load(
        path: &Path,
        ingest: &IngestConfig,
        compute: &ComputeConfig,
    ) -> Result<Self, LoadError> {
        let lc = Self::read(path, ingest, compute)?;
        lc.finish_heights();
        Ok(lc)
    }

    /// Reads a cycle, ready to serve: the heights of the steps computed while later steps
    /// were read are in, the rest (at least the last step) pending until
    /// [`LoadedCycle::finish_heights`].
    ///
    /// # Errors
    /// The file cannot be read as a cycle, or its heights cannot be computed with
    /// `compute` (both found before anything is served).
    pub fn read(
        path: &Path,
        ingest: &IngestConfig,
        compute: &ComputeConfig,
    ) -> Result<Self, LoadError> {
        Self::read_unless_passed_over(path, ingest, compute, None)
    }

    /// [`LoadedCycle::read`], unless the store's `pass_over` (where given) passes the file
    /// over ([`crate::store::PassOver::passes`]) once its reference time and size are known:
    /// in the same open of the file, before any field is read (metadata and coordinates
    /// only, milliseconds for a file of any size).
    ///
    /// # Errors
    /// As [`LoadedCycle::read`]; [`crate::ingest::IngestError::PassedOver`] with the store's
    /// reason when the file is passed over.
    pub fn read_unless_passed_over(
        path: &Path,
        ingest: &IngestConfig,
        compute: &ComputeConfig,
        pass_over: Option<&crate::store::PassOver>,
    ) -> Result<Self, LoadError> {
        let started = Instant::now();
        let config = served_config(compute);
        let test = |reference_time: Option<&str>, point_levels: usize| {
            pass_over?.passes(reference_time, least_held_bytes(point_levels))
        };
        // Asked only where the store could pass a file over at all.
        let test = pass_over.map(|_| &test as &crate::ingest::PassOverTest<'_>);
        let (cycle, heights, pending) = read_for_serving(path, ingest, &config, test)?;
        let id = crate::store::cycle_id(path);
        let bytes = held_bytes(&cycle);
        Ok(Self {
            id,
            path: path.to_path_buf(),
            cycle,
            heights,
            config,
            loaded_at: SystemTime::now(),
            load_seconds: started.elapsed().as_secs_f64(),
            bytes,
            pending: Mutex::new(Some(pending)),
        })
    }

    /// A cycle held in memory (`cycle.source` is its path), its heights all pending until
    /// [`LoadedCycle::finish_heights`].
    ///
    /// # Errors
    /// The heights cannot be computed with `compute`.
    pub fn from_cycle(
        id: &str,
        cycle: Cycle,
        compute: &ComputeConfig,
    ) -> Result<Self, ComputeError> {
        let config = served_config(compute);
        let method = heights_method(&cycle, &config)?;
        let (members, times, ..) = cycle.temperature.dim();
        let pending = PendingSteps::for_cycle(&cycle, &config);
        Ok(Self {
            id: id.to_string(),
            path: cycle.source.clone(),
            bytes: held_bytes(&cycle),
            heights: ServedHeights::pending(members, times, method),
            cycle,
            config,
            loaded_at: SystemTime::now(),
            load_seconds: 0.0,
            pending: Mutex::new(Some(pending)),
        })
    }

    /// A cycle held in memory with its heights all computed.
    ///
    /// # Errors
    /// The heights cannot be computed with `compute`.
    pub fn computed(id: &str, cycle: Cycle, compute: &ComputeConfig) -> Result<Self, ComputeError> {
        let lc = Self::from_cycle(id, cycle, compute)?;
        lc.finish_heights();
        Ok(lc)
    }

    /// Computes the heights of the steps still pending (rows in parallel on threads kept
    /// for this, so that queries waiting on rayon's threads cannot hold it up), releasing
    /// waiting queries step by step. Returns the seconds it took; a second call (or one on
    /// a cycle whose heights are all in) returns at once.
    pub fn finish_heights(&self) -> f64 {
        let started = Instant::now();
        let pending = self
            .pending
            .lock()
            .unwrap_or_else(std::sync::PoisonError::into_inner)
            .take();
        if let Some(pending) = pending {
            pending.finish(&self.cycle, &self.config, &self.heights);
        }
        started.elapsed().as_secs_f64()
    }

    /// The heights of step (`member`, `time`), waiting while they are computed.
    ///
    /// # Errors
    /// As [`ServedHeights::wait`], with the cycle named.
    pub fn step_heights(&self, member: usize, time: usize) -> Result<&StepHeights, QueryError> {
        self.heights
            .wait(member, time)
            .map_err(|e| QueryError::HeightsUnavailable {
                detail: format!("cycle '{}': {e}", self.id),
            })
    }

    /// Reference time, seconds since the Unix epoch, when the file gives one.
    pub fn reference_time_unix_s(&self) -> Option<i64> {
        self.cycle
            .reference_time
            .as_deref()
            .and_then(parse_date_time)
    }

    /// Valid time of time step `time_index`, seconds since the Unix epoch (reference time
    /// plus lead time); `None` without a reference time or for an index out of range.
    pub fn valid_time_unix_s(&self, time_index: usize) -> Option<i64> {
        let lead = *self.cycle.lead_times_s.get(time_index)?;
        self.reference_time_unix_s()?.checked_add(lead)
    }
}

/// The settings a cycle is served with: those given, without thickness layers (thickness
/// is answered per query from the heights and the rebuilt columns).
fn served_config(compute: &ComputeConfig) -> ComputeConfig {
    ComputeConfig {
        layers: Vec::new(),
        ..compute.clone()
    }
}

/// The least [`held_bytes`] of a cycle whose temperature holds `point_levels` values: the
/// temperature, and a height and a flag per point-level (humidity, surface fields and the
/// file's heights only add to it).
pub(crate) fn least_held_bytes(point_levels: usize) -> usize {
    point_levels.saturating_mul(2 * std::mem::size_of::<f32>() + 1)
}

/// Bytes held by the fields of a cycle and its heights on every level (an `f32` height and
/// a `u8` flag per point-level), once all computed.
pub(crate) fn held_bytes(cycle: &Cycle) -> usize {
    // Beyond temperature, heights and flags ([`least_held_bytes`]): the other fields.
    let other_f32s = cycle.humidity.as_ref().map_or(0, |h| h.values.len())
        + cycle
            .surface
            .as_ref()
            .map_or(0, |s| s.pressure_pa.len() + s.height_m.len())
        + cycle.file_heights.as_ref().map_or(0, |z| z.len());
    least_held_bytes(cycle.temperature.len()) + other_f32s * std::mem::size_of::<f32>()
}

/// What to compute.
#[derive(Clone, Copy, Debug, PartialEq)]
pub enum Quantity {
    /// Geopotential height at a pressure, geopotential metres.
    GeopotentialHeight {
        /// Pressure, Pa.
        pressure_pa: f64,
    },
    /// Thickness of a layer, geopotential metres (CF
    /// `atmosphere_layer_thickness_expressed_as_geopotential_height_difference`).
    Thickness(Layer),
}

/// Which time step.
#[derive(Clone, Copy, Debug, PartialEq)]
pub enum TimeSelector {
    /// A lead time of the cycle.
    LeadTime {
        /// Seconds after the reference time.
        seconds: i64,
    },
    /// A valid time of the cycle (reference time plus a lead time).
    ValidTime {
        /// Seconds since the Unix epoch.
        unix_seconds: i64,
    },
}

/// Horizontal sampling between grid points.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Default)]
pub enum Interpolation {
    /// Bilinear in latitude and longitude from the four surrounding grid points.
    #[default]
    Bilinear,
    /// The nearest grid point (in index space).
    Nearest,
}

/// A latitude/longitude box, degrees.
///
/// Longitudes may be given in -180..180 or 0..360; `west > east` means the box crosses the
/// antimeridian (or, in 0..360 terms, the Greenwich meridian). Longitudes are answered in the
/// box's frame: 0..360 when either bound exceeds 180, else -180..180.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct BoundingBox {
    /// Southern edge, degrees north.
    pub south: f64,
    /// Northern edge, degrees north.
    pub north: f64,
    /// Western edge, degrees east.
    pub west: f64,
    /// Eastern edge, degrees east.
    pub east: f64,
}

/// Limits on the size of one answer.
#[derive(Clone, Copy, Debug)]
pub struct Limits {
    /// Most point-values one answer may hold (points × quantities × times).
    pub max_points: usize,
}

impl Default for Limits {
    fn default() -> Self {
        Self {
            max_points: 4_000_000,
        }
    }
}

/// A field over a box.
#[derive(Clone, Debug, PartialEq)]
pub struct AreaQuery {
    /// What to compute (at least one).
    pub quantities: Vec<Quantity>,
    /// Which time step.
    pub time: TimeSelector,
    /// Ensemble member index (0 for a deterministic cycle).
    pub member: usize,
    /// The box.
    pub bbox: BoundingBox,
    /// Keep every `stride`-th row and column (1 = all).
    pub stride: usize,
    /// Extrapolate pressures outside the data instead of refusing them.
    pub allow_extrapolation: bool,
}

/// One quantity over an area.
#[derive(Clone, Debug, PartialEq)]
pub struct QuantityField {
    /// The quantity.
    pub quantity: Quantity,
    /// Values, geopotential metres, row-major over (latitudes × longitudes); `NaN` where
    /// masked.
    pub values: Vec<f32>,
    /// [`FLAG_BELOW_GROUND`] and [`FLAG_MISSING`] bits, same layout as `values`.
    pub flags: Vec<u8>,
}

/// The answer to an [`AreaQuery`] (or to some of its rows, from [`area_rows`]).
#[derive(Clone, Debug, PartialEq)]
pub struct AreaAnswer {
    /// Index of the time step in the cycle.
    pub time_index: usize,
    /// Lead time, seconds.
    pub lead_time_s: i64,
    /// Valid time, seconds since the Unix epoch, when the cycle has a reference time.
    pub valid_time_unix_s: Option<i64>,
    /// Latitudes of the rows, degrees north, north to south.
    pub latitudes: Vec<f64>,
    /// Longitudes of the columns, degrees east, west to east in the box's frame.
    pub longitudes: Vec<f64>,
    /// One field per requested quantity, in request order.
    pub fields: Vec<QuantityField>,
}

/// Values at points, for one or many times.
#[derive(Clone, Debug, PartialEq)]
pub struct PositionQuery {
    /// (latitude, longitude) pairs, degrees.
    pub points: Vec<(f64, f64)>,
    /// What to compute (at least one).
    pub quantities: Vec<Quantity>,
    /// Which time steps; empty means every lead time of the cycle, in the cycle's order.
    pub times: Vec<TimeSelector>,
    /// Ensemble member index.
    pub member: usize,
    /// Horizontal sampling.
    pub interpolation: Interpolation,
    /// Extrapolate pressures outside the data instead of refusing them.
    pub allow_extrapolation: bool,
}

/// Values of every quantity at one point and time.
#[derive(Clone, Debug, PartialEq)]
pub struct Sample {
    /// Lead time, seconds.
    pub lead_time_s: i64,
    /// Valid time, seconds since the Unix epoch, when the cycle has a reference time.
    pub valid_time_unix_s: Option<i64>,
    /// One value per quantity, geopotential metres; `NaN` where masked.
    pub values: Vec<f64>,
    /// One flag byte per quantity.
    pub flags: Vec<u8>,
}

/// A time series at one point.
#[derive(Clone, Debug, PartialEq)]
pub struct PointSeries {
    /// Latitude asked for, degrees north.
    pub latitude: f64,
    /// Longitude asked for, degrees east.
    pub longitude: f64,
    /// One sample per requested time, in request order.
    pub samples: Vec<Sample>,
}

/// The column at a point.
#[derive(Clone, Debug, PartialEq)]
pub struct ProfileQuery {
    /// Degrees north.
    pub latitude: f64,
    /// Degrees east.
    pub longitude: f64,
    /// Which time step.
    pub time: TimeSelector,
    /// Ensemble member index.
    pub member: usize,
    /// Horizontal sampling.
    pub interpolation: Interpolation,
}

/// One level of a profile. Values are `NaN` where masked.
#[derive(Clone, Debug, PartialEq)]
pub struct ProfileLevel {
    /// Pressure, Pa (full-level pressure for hybrid levels).
    pub pressure_pa: f64,
    /// Air temperature as the file gives it, K (`NaN` where the file has none, e.g. a fill
    /// value below the ground).
    pub temperature_k: f64,
    /// Virtual temperature the heights were integrated with, K (below the ground: the
    /// 6.5 K/km extrapolation from the surface).
    pub virtual_temperature_k: f64,
    /// Geopotential height, geopotential metres.
    pub geopotential_height_m: f64,
    /// True where the level lies below the ground.
    pub below_ground: bool,
}

/// The answer to a [`ProfileQuery`].
#[derive(Clone, Debug, PartialEq)]
pub struct Profile {
    /// Latitude asked for, degrees north.
    pub latitude: f64,
    /// Longitude asked for, degrees east.
    pub longitude: f64,
    /// Lead time, seconds.
    pub lead_time_s: i64,
    /// Valid time, seconds since the Unix epoch, when the cycle has a reference time.
    pub valid_time_unix_s: Option<i64>,
    /// Surface pressure, Pa, when the cycle has surface fields.
    pub surface_pressure_pa: Option<f64>,
    /// Surface geopotential height, geopotential metres, when the cycle has surface fields.
    pub surface_height_m: Option<f64>,
    /// The cycle's levels, bottom-up.
    pub levels: Vec<ProfileLevel>,
}

/// A point of a route with its time.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Waypoint {
    /// Degrees north.
    pub latitude: f64,
    /// Degrees east.
    pub longitude: f64,
    /// Seconds since the Unix epoch.
    pub valid_time_unix_s: i64,
}

/// Values along a route.
#[derive(Clone, Debug, PartialEq)]
pub struct TrajectoryQuery {
    /// The route, times non-decreasing (at least one waypoint).
    pub waypoints: Vec<Waypoint>,
    /// What to compute (at least one).
    pub quantities: Vec<Quantity>,
    /// Ensemble member index.
    pub member: usize,
    /// Horizontal sampling.
    pub interpolation: Interpolation,
    /// Extrapolate pressures outside the data instead of refusing them.
    pub allow_extrapolation: bool,
}

/// Values at one waypoint.
#[derive(Clone, Debug, PartialEq)]
pub struct TrajectorySample {
    /// The waypoint.
    pub waypoint: Waypoint,
    /// One value per quantity, geopotential metres; `NaN` where masked.
    pub values: Vec<f64>,
    /// One flag byte per quantity.
    pub flags: Vec<u8>,
}

/// Why a query cannot be answered. Every error names the request field (dotted path, e.g.
/// `bbox.south`, `points[3].latitude`, `quantities[1].thickness.top_pa`).
#[derive(Clone, Debug, PartialEq, thiserror::Error)]
pub enum QueryError {
    /// The request is malformed.
    #[error("{field}: {message}")]
    InvalidArgument {
        /// The request field.
        field: String,
        /// What is wrong, with a hint.
        message: String,
    },
    /// The member, lead time or valid time does not exist in the cycle.
    #[error("{field}: {message}")]
    NotFound {
        /// The request field.
        field: String,
        /// What is missing, with what is available.
        message: String,
    },
    /// The request lies outside the data (a pressure, a position, a time).
    #[error("{field}: {message}")]
    OutOfRange {
        /// The request field.
        field: String,
        /// What is outside and what the data covers.
        message: String,
    },
    /// The answer would exceed the configured limits.
    #[error("{field}: {message}")]
    ResourceExhausted {
        /// The request field.
        field: String,
        /// How large the answer would be, and the limit.
        message: String,
    },
    /// The heights of the step asked for could not be computed (the computation after the
    /// read failed or stopped); the cycle's other steps may still answer.
    #[error("{detail}")]
    HeightsUnavailable {
        /// Which cycle and step, and why.
        detail: String,
    },
}

fn invalid(field: impl Into<String>, message: impl Into<String>) -> QueryError {
    QueryError::InvalidArgument {
        field: field.into(),
        message: message.into(),
    }
}

fn not_found(field: impl Into<String>, message: impl Into<String>) -> QueryError {
    QueryError::NotFound {
        field: field.into(),
        message: message.into(),
    }
}

fn out_of_range(field: impl Into<String>, message: impl Into<String>) -> QueryError {
    QueryError::OutOfRange {
        field: field.into(),
        message: message.into(),
    }
}

fn join(prefix: &str, name: &str) -> String {
    if prefix.is_empty() {
        name.to_string()
    } else {
        format!("{prefix}.{name}")
    }
}

fn hpa(p_pa: f64) -> f64 {
    p_pa / 100.0
}

// ---------------------------------------------------------------------------------------------
// Validation shared by every query.
// ---------------------------------------------------------------------------------------------

/// Refuses a member the cycle does not have (NOT_FOUND on `member`, naming the range).
pub(crate) fn check_member(lc: &LoadedCycle, member: usize) -> Result<(), QueryError> {
    let members = lc.cycle.members;
    if member >= members {
        return Err(not_found(
            "member",
            format!(
                "member {member} is not in cycle '{}', which has {members} member{} (0 to {})",
                lc.id,
                if members == 1 { "" } else { "s" },
                members.saturating_sub(1)
            ),
        ));
    }
    Ok(())
}

fn check_latitude(field: String, lat: f64) -> Result<(), QueryError> {
    if !(-90.0..=90.0).contains(&lat) {
        return Err(invalid(
            field,
            format!("latitude {lat} is not a latitude: expected -90 to 90 degrees"),
        ));
    }
    Ok(())
}

fn check_longitude(field: String, lon: f64) -> Result<(), QueryError> {
    if !lon.is_finite() {
        return Err(invalid(
            field,
            format!("longitude {lon} is not a finite number of degrees"),
        ));
    }
    Ok(())
}

/// Resolves a time selector to a time index; `prefix` is the selector's path ("" or
/// "times[2]").
fn resolve_time(lc: &LoadedCycle, time: &TimeSelector, prefix: &str) -> Result<usize, QueryError> {
    let leads = &lc.cycle.lead_times_s;
    match *time {
        TimeSelector::LeadTime { seconds } => {
            leads.iter().position(|&l| l == seconds).ok_or_else(|| {
                let available: Vec<String> = leads.iter().map(|l| l.to_string()).collect();
                not_found(
                    join(prefix, "lead_time"),
                    format!(
                        "lead time {seconds} s is not in cycle '{}': available lead times are {} s",
                        lc.id,
                        available.join(", ")
                    ),
                )
            })
        }
        TimeSelector::ValidTime { unix_seconds } => {
            let field = join(prefix, "valid_time");
            let Some(reference) = lc.reference_time_unix_s() else {
                return Err(not_found(
                    field,
                    format!(
                        "cycle '{}' has no reference time, so its valid times are unknown: ask by lead time",
                        lc.id
                    ),
                ));
            };
            leads
                .iter()
                .position(|&l| reference.checked_add(l) == Some(unix_seconds))
                .ok_or_else(|| {
                    let available: Vec<String> = leads
                        .iter()
                        .filter_map(|&l| reference.checked_add(l))
                        .map(format_rfc3339_utc)
                        .collect();
                    not_found(
                        field,
                        format!(
                            "valid time {} is not in cycle '{}': available valid times are {}",
                            format_rfc3339_utc(unix_seconds),
                            lc.id,
                            available.join(", ")
                        ),
                    )
                })
        }
    }
}

/// How one quantity is answered.
#[derive(Clone, Copy, Debug, PartialEq)]
enum Plan {
    /// Height on isobaric level `k`: read from the batch output.
    Level(usize),
    /// Thickness between two isobaric levels: difference of batch heights.
    LevelThickness { bottom: usize, top: usize },
    /// Height at a pressure on the rebuilt column.
    ColumnHeight { p_pa: f64 },
    /// Thickness on the rebuilt column.
    ColumnThickness { bottom_pa: f64, top_pa: f64 },
}

impl Plan {
    /// Whether the quantity is found on a rebuilt column (a pressure between levels).
    fn rebuilds_column(&self) -> bool {
        matches!(
            self,
            Plan::ColumnHeight { .. } | Plan::ColumnThickness { .. }
        )
    }
}

/// How many of the lowest levels a rebuilt column needs to answer every plan (all of them
/// on hybrid levels, whose columns are built whole): up to the level at or just above each
/// pressure asked, every level when one lies above the top level.
fn wanted_levels(plans: &[Plan], vertical: &Vertical) -> usize {
    let Vertical::Isobaric { pressure_pa } = vertical else {
        return vertical.levels();
    };
    let at = |p: f64| ColumnNodes::levels_for_pressure(pressure_pa, p);
    plans
        .iter()
        .map(|plan| match *plan {
            Plan::Level(k) => k + 1,
            Plan::LevelThickness { bottom, top } => bottom.max(top) + 1,
            Plan::ColumnHeight { p_pa } => at(p_pa),
            Plan::ColumnThickness { bottom_pa, top_pa } => at(bottom_pa).max(at(top_pa)),
        })
        .max()
        .unwrap_or(pressure_pa.len())
}

fn level_index(levels: &[f64], p: f64) -> Option<usize> {
    levels
        .iter()
        .position(|&l| (p - l).abs() <= ON_LEVEL_RELATIVE * l.abs())
}

/// Checks one pressure of a quantity; `field` names it.
fn check_pressure(
    lc: &LoadedCycle,
    field: &str,
    p: f64,
    allow_extrapolation: bool,
) -> Result<(), QueryError> {
    if !(p.is_finite() && p > 0.0) {
        return Err(invalid(
            field,
            format!("pressure {p} Pa is not a positive finite number of pascals"),
        ));
    }
    if let Vertical::Isobaric { pressure_pa } = &lc.cycle.vertical {
        let (Some(&bottom), Some(&top)) = (pressure_pa.first(), pressure_pa.last()) else {
            return Err(out_of_range(
                field,
                format!("cycle '{}' has no levels", lc.id),
            ));
        };
        let inside =
            p <= bottom * (1.0 + ON_LEVEL_RELATIVE) && p >= top * (1.0 - ON_LEVEL_RELATIVE);
        if !inside && !allow_extrapolation {
            return Err(out_of_range(
                field,
                format!(
                    "{} hPa lies outside the levels of cycle '{}' ({} to {} hPa): set allow_extrapolation to extrapolate",
                    hpa(p),
                    lc.id,
                    hpa(bottom),
                    hpa(top)
                ),
            ));
        }
    }
    Ok(())
}

/// Validates the quantities and decides how each is answered.
fn plan_quantities(
    lc: &LoadedCycle,
    quantities: &[Quantity],
    allow_extrapolation: bool,
) -> Result<Vec<Plan>, QueryError> {
    if quantities.is_empty() {
        return Err(invalid(
            "quantities",
            "no quantity asked for: give at least one geopotential height or thickness",
        ));
    }
    let levels: &[f64] = match &lc.cycle.vertical {
        Vertical::Isobaric { pressure_pa } => pressure_pa,
        Vertical::Hybrid { .. } => &[],
    };
    let mut plans = Vec::with_capacity(quantities.len());
    for (i, q) in quantities.iter().enumerate() {
        let plan = match *q {
            Quantity::GeopotentialHeight { pressure_pa } => {
                let field = format!("quantities[{i}].geopotential_height.pressure_pa");
                check_pressure(lc, &field, pressure_pa, allow_extrapolation)?;
                match level_index(levels, pressure_pa) {
                    Some(k) => Plan::Level(k),
                    None => Plan::ColumnHeight { p_pa: pressure_pa },
                }
            }
            Quantity::Thickness(layer) => {
                let bottom_field = format!("quantities[{i}].thickness.bottom_pa");
                let top_field = format!("quantities[{i}].thickness.top_pa");
                check_pressure(lc, &bottom_field, layer.bottom_pa, allow_extrapolation)?;
                check_pressure(lc, &top_field, layer.top_pa, allow_extrapolation)?;
                // Both are finite by now, so `<=` is the whole of "not greater".
                if layer.bottom_pa <= layer.top_pa {
                    return Err(invalid(
                        top_field,
                        format!(
                            "the top of the layer ({} hPa) must be at a lower pressure than its bottom ({} hPa)",
                            hpa(layer.top_pa),
                            hpa(layer.bottom_pa)
                        ),
                    ));
                }
                match (
                    level_index(levels, layer.bottom_pa),
                    level_index(levels, layer.top_pa),
                ) {
                    (Some(bottom), Some(top)) => Plan::LevelThickness { bottom, top },
                    _ => Plan::ColumnThickness {
                        bottom_pa: layer.bottom_pa,
                        top_pa: layer.top_pa,
                    },
                }
            }
        };
        plans.push(plan);
    }
    Ok(plans)
}

/// On hybrid levels the range of pressures depends on the surface pressure: checks every
/// pressure of `plans` against the columns that will be used, before any is built. Pressures
/// above the model top's full level, or below the ground, are out of range unless
/// extrapolation is allowed.
fn check_hybrid_range(
    lc: &LoadedCycle,
    plans: &[Plan],
    member: usize,
    time: usize,
    columns: impl IntoIterator<Item = (usize, usize)>,
    allow_extrapolation: bool,
) -> Result<(), QueryError> {
    let Vertical::Hybrid { a_half_pa, b_half } = &lc.cycle.vertical else {
        return Ok(());
    };
    if allow_extrapolation {
        return Ok(());
    }
    let Some(surface) = &lc.cycle.surface else {
        return Ok(());
    };
    let ps = surface.pressure_pa.slice(s![member, time, .., ..]);
    let (mut ps_min, mut ps_max) = (f64::INFINITY, f64::NEG_INFINITY);
    for (r, c) in columns {
        if let Some(&v) = ps.get([r, c]) {
            let v = f64::from(v);
            if v.is_finite() {
                ps_min = ps_min.min(v);
                ps_max = ps_max.max(v);
            }
        }
    }
    if !ps_min.is_finite() {
        // Every column is masked: nothing will be computed, nothing is out of range.
        return Ok(());
    }
    let n = a_half_pa.len().saturating_sub(1);
    if n == 0 || b_half.len() != n + 1 {
        return Ok(());
    }
    let top_full = 0.5 * ((a_half_pa[n - 1] + a_half_pa[n]) + (b_half[n - 1] + b_half[n]) * ps_max);
    for (i, plan) in plans.iter().enumerate() {
        let pressures: [(f64, String); 2] = match *plan {
            Plan::ColumnHeight { p_pa } => [
                (
                    p_pa,
                    format!("quantities[{i}].geopotential_height.pressure_pa"),
                ),
                (f64::NAN, String::new()),
            ],
            Plan::ColumnThickness { bottom_pa, top_pa } => [
                (bottom_pa, format!("quantities[{i}].thickness.bottom_pa")),
                (top_pa, format!("quantities[{i}].thickness.top_pa")),
            ],
            Plan::Level(_) | Plan::LevelThickness { .. } => continue,
        };
        for (p, field) in pressures {
            if p.is_nan() {
                continue;
            }
            if p > ps_min {
                return Err(out_of_range(
                    field,
                    format!(
                        "{} hPa lies below the ground in part of the request (surface pressure down to {:.1} hPa) on the hybrid levels of cycle '{}': set allow_extrapolation to extrapolate below the surface",
                        hpa(p),
                        hpa(ps_min),
                        lc.id
                    ),
                ));
            }
            if p < top_full {
                return Err(out_of_range(
                    field,
                    format!(
                        "{} hPa lies above the top level of cycle '{}' ({:.2} hPa here): set allow_extrapolation to extrapolate",
                        hpa(p),
                        lc.id,
                        hpa(top_full)
                    ),
                ));
            }
        }
    }
    Ok(())
}

fn check_limit(
    field: &str,
    count: Option<usize>,
    limits: &Limits,
    hint: &str,
) -> Result<(), QueryError> {
    match count {
        Some(n) if n <= limits.max_points => Ok(()),
        _ => Err(QueryError::ResourceExhausted {
            field: field.to_string(),
            message: format!(
                "the answer would hold {} point-values, more than the limit of {}: {hint}",
                count.map_or_else(|| "too many".to_string(), |n| n.to_string()),
                limits.max_points
            ),
        }),
    }
}

// ---------------------------------------------------------------------------------------------
// Evaluation at grid columns.
// ---------------------------------------------------------------------------------------------

/// Height at a pressure on a built column, extrapolating above the top when allowed.
fn height_on_column(
    nodes: &ColumnNodes,
    p_pa: f64,
    c: &Constants,
    allow_extrapolation: bool,
) -> Option<HeightAtPressure> {
    if let Some(h) = nodes.height_at_pressure(p_pa, c) {
        return Some(h);
    }
    if !allow_extrapolation {
        return None;
    }
    isothermal_height_above_top(nodes, p_pa, c).map(|height_m| HeightAtPressure {
        height_m,
        below_ground: false,
    })
}

/// Height of a pressure above the top node of a column, by an isothermal extrapolation of
/// the top layer's virtual temperature.
///
/// # Units
/// - `p_pa`: Pa, lower than the top node's pressure
/// - returns: geopotential metres; `None` when the column's top is masked or `p_pa` is not
///   above it
///
/// # Method
/// `Z = Z_top + (R_d T_v,top / g0) ln(p_top / p)`: the hypsometric equation for an isothermal
/// layer at the top node's virtual temperature. A convention for requests just above the
/// data (the lower stratosphere is close to isothermal), not a forecast of the layer.
///
/// # References
/// Wallace, J. M. and Hobbs, P. V. (2006), *Atmospheric Science*, 2nd ed., §3.2.2.
fn isothermal_height_above_top(nodes: &ColumnNodes, p_pa: f64, c: &Constants) -> Option<f64> {
    let valid = nodes.valid_nodes();
    if valid.is_empty() || valid.end != nodes.len() {
        return None;
    }
    let top = valid.end - 1;
    let (p_top, tv_top, z_top) = (nodes.pressure_pa[top], nodes.tv_k[top], nodes.height_m[top]);
    if !(p_pa > 0.0 && p_pa < p_top && tv_top.is_finite() && z_top.is_finite()) {
        return None;
    }
    let z = z_top + isothermal_height(p_top, p_pa, scale_height(tv_top, c));
    z.is_finite().then_some(z)
}

/// What a query does about a step whose heights are still being computed (see
/// [`ServedHeights`]).
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
enum WhilePending {
    /// Wait for the step: for queries over many columns (areas), where rebuilding every
    /// column costs a good part of the wait and takes the cores from the step being
    /// computed (200 × 200 at 0.5°: 3 ms on two cores near the ground, 7 ms up to the top;
    /// the computation of a whole step about 23 ms on one).
    Wait,
    /// Rebuild the columns asked for, as the batch does: for queries at a few points.
    Rebuild,
}

/// Answers the planned quantities at grid columns of one (member, time) step.
struct Evaluator<'a> {
    plans: &'a [Plan],
    allow_extrapolation: bool,
    constants: Constants,
    /// Heights and below-ground flags `[level, lat, lon]` of the step; `None` while they
    /// are being computed: levels are then read from rebuilt columns.
    stored: Option<(ArrayView3<'a, f32>, ArrayView3<'a, u8>)>,
    /// Column builder and its scratch, when some quantity needs a rebuilt column.
    columns: Option<(StepColumns<'a>, ColumnScratch)>,
    /// How many of the lowest levels a rebuilt column needs for every quantity asked
    /// ([`StepColumns::build_lowest`]).
    wanted_levels: usize,
    /// The column held in the scratch.
    built: Option<(usize, usize)>,
}

impl<'a> Evaluator<'a> {
    fn new(
        lc: &'a LoadedCycle,
        plans: &'a [Plan],
        (member, time): (usize, usize),
        allow_extrapolation: bool,
        pending: WhilePending,
    ) -> Result<Self, QueryError> {
        let stored = match pending {
            WhilePending::Wait => Some(lc.step_heights(member, time)?),
            WhilePending::Rebuild => lc.heights.ready(member, time),
        }
        .map(|h| (h.geopotential_height.view(), h.below_ground.view()));
        let needs_columns = stored.is_none() || plans.iter().any(Plan::rebuilds_column);
        let columns = if needs_columns {
            let step = StepColumns::new(&lc.cycle, &lc.config, member, time)
                .map_err(|e| out_of_range("quantities", format!("cycle '{}': {e}", lc.id)))?;
            Some((step, ColumnScratch::new(lc.cycle.vertical.levels())))
        } else {
            None
        };
        Ok(Self {
            plans,
            allow_extrapolation,
            constants: lc.cycle.constants,
            stored,
            columns,
            wanted_levels: wanted_levels(plans, &lc.cycle.vertical),
            built: None,
        })
    }

    /// For queries at a few points: a step still being computed is not waited for.
    fn at_points(
        lc: &'a LoadedCycle,
        plans: &'a [Plan],
        step: (usize, usize),
        allow_extrapolation: bool,
    ) -> Result<Self, QueryError> {
        Self::new(lc, plans, step, allow_extrapolation, WhilePending::Rebuild)
    }

    /// The column at (`row`, `col`), built once for all the quantities asked there.
    fn column(&mut self, row: usize, col: usize) -> Option<&ColumnScratch> {
        let (step, scratch) = self.columns.as_mut()?;
        if self.built != Some((row, col)) {
            step.build_lowest(row, col, scratch, self.wanted_levels);
            self.built = Some((row, col));
        }
        Some(scratch)
    }

    fn nodes(&mut self, row: usize, col: usize) -> Option<&ColumnNodes> {
        self.column(row, col).map(|s| &s.nodes)
    }

    /// Height (as stored: `f32`) and below-ground flag of level `k` at (`row`, `col`): the
    /// step's stored heights, or while they are computed the rebuilt column, which the
    /// batch stores as it is.
    fn level(&mut self, k: usize, row: usize, col: usize) -> (f64, bool) {
        if let Some((z, below)) = &self.stored {
            return (f64::from(z[[k, row, col]]), below[[k, row, col]] != 0);
        }
        match self.column(row, col) {
            Some(s) => (f64::from(s.height[k] as f32), s.below[k]),
            None => (f64::NAN, false),
        }
    }

    /// Value (geopotential metres) and flags of quantity `q` at grid column (`row`, `col`).
    fn value(&mut self, q: usize, row: usize, col: usize) -> (f64, u8) {
        const MISSING: (f64, u8) = (f64::NAN, FLAG_MISSING);
        match self.plans[q] {
            Plan::Level(k) => {
                let (z, below) = self.level(k, row, col);
                if z.is_finite() {
                    (z, flag(below))
                } else {
                    MISSING
                }
            }
            Plan::LevelThickness { bottom, top } => {
                let (zb, below) = self.level(bottom, row, col);
                let (zt, _) = self.level(top, row, col);
                if zb.is_finite() && zt.is_finite() {
                    (zt - zb, flag(below))
                } else {
                    MISSING
                }
            }
            Plan::ColumnHeight { p_pa } => {
                let (c, allow) = (self.constants, self.allow_extrapolation);
                match self
                    .nodes(row, col)
                    .and_then(|n| height_on_column(n, p_pa, &c, allow))
                {
                    Some(h) if h.height_m.is_finite() => (h.height_m, flag(h.below_ground)),
                    _ => MISSING,
                }
            }
            Plan::ColumnThickness { bottom_pa, top_pa } => {
                let (c, allow) = (self.constants, self.allow_extrapolation);
                let Some(nodes) = self.nodes(row, col) else {
                    return MISSING;
                };
                let bottom = height_on_column(nodes, bottom_pa, &c, allow);
                let top = height_on_column(nodes, top_pa, &c, allow);
                match (bottom, top) {
                    (Some(b), Some(t)) if b.height_m.is_finite() && t.height_m.is_finite() => {
                        (t.height_m - b.height_m, flag(b.below_ground))
                    }
                    _ => MISSING,
                }
            }
        }
    }

    /// Values of every quantity at a point from its weighted grid columns, into `values` and
    /// `flags` (one per quantity).
    fn sample(&mut self, corners: &Corners, values: &mut [f64], flags: &mut [u8]) {
        values.fill(0.0);
        flags.fill(0);
        for &(row, col, w) in corners.used() {
            for q in 0..self.plans.len() {
                let (v, f) = self.value(q, row, col);
                if f & FLAG_MISSING != 0 {
                    flags[q] |= FLAG_MISSING;
                } else {
                    values[q] += w * v;
                    flags[q] |= f;
                }
            }
        }
        for (v, f) in values.iter_mut().zip(flags.iter_mut()) {
            if *f & FLAG_MISSING != 0 {
                *v = f64::NAN;
                *f = FLAG_MISSING;
            }
        }
    }
}

/// The selected columns as one ascending run of grid columns, when they are one.
fn contiguous_run(cols: &[usize]) -> Option<std::ops::Range<usize>> {
    let first = *cols.first()?;
    let contiguous = cols.iter().enumerate().all(|(i, &c)| c == first + i);
    contiguous.then(|| first..first + cols.len())
}

/// Scratch for the selected columns of one stored row, where they are not contiguous.
#[derive(Default)]
struct RowGather {
    bottom: Vec<f32>,
    top: Vec<f32>,
    below: Vec<u8>,
}

impl RowGather {
    /// The selected columns of a bottom row, an optional top row and a flag row: slices of
    /// the rows themselves for a contiguous `run`, else copies gathered here.
    fn row<'s>(
        &'s mut self,
        (bottom, top, below): (
            ArrayView1<'s, f32>,
            Option<ArrayView1<'s, f32>>,
            ArrayView1<'s, u8>,
        ),
        cols: &[usize],
        run: Option<std::ops::Range<usize>>,
    ) -> (&'s [f32], Option<&'s [f32]>, &'s [u8]) {
        if let Some(run) = run {
            let slices = (
                bottom.to_slice().map(|s| &s[run.clone()]),
                top.map(|t| t.to_slice().map(|s| &s[run.clone()])),
                below.to_slice().map(|s| &s[run.clone()]),
            );
            if let (Some(b), Some(t), Some(f)) = slices {
                return (b, t, f);
            }
        }
        let gather = |from: ArrayView1<'_, f32>, to: &mut Vec<f32>| {
            to.clear();
            to.extend(cols.iter().map(|&c| from[c]));
        };
        gather(bottom, &mut self.bottom);
        if let Some(t) = top {
            gather(t, &mut self.top);
        }
        self.below.clear();
        self.below.extend(cols.iter().map(|&c| below[c]));
        let top = top.is_some().then_some(self.top.as_slice());
        (&self.bottom, top, &self.below)
    }
}

/// Stored heights of one row as answered: missing values flagged, the rest flagged where
/// below the ground. Without a branch on the data, so that it compiles to SIMD lanes
/// ([`level_row`] runs the widest build).
#[inline(always)]
fn level_body(z: &[f32], below: &[u8], values: &mut [f32], flags: &mut [u8]) {
    let n = values.len();
    let (z, below, flags) = (&z[..n], &below[..n], &mut flags[..n]);
    for i in 0..n {
        let ok = z[i].is_finite();
        values[i] = if ok { z[i] } else { f32::NAN };
        let under = u8::from(below[i] != 0) * FLAG_BELOW_GROUND;
        flags[i] = if ok { under } else { FLAG_MISSING };
    }
}

/// Thickness between two stored level rows (difference in `f64`, as the batch takes it),
/// flagged as [`level_body`] by the bottom level; branch-free as well.
#[inline(always)]
fn thickness_body(bottom: &[f32], top: &[f32], below: &[u8], values: &mut [f32], flags: &mut [u8]) {
    let n = values.len();
    let (bottom, top, below, flags) = (&bottom[..n], &top[..n], &below[..n], &mut flags[..n]);
    for i in 0..n {
        let (b, t) = (f64::from(bottom[i]), f64::from(top[i]));
        let ok = b.is_finite() & t.is_finite();
        values[i] = if ok { (t - b) as f32 } else { f32::NAN };
        let under = u8::from(below[i] != 0) * FLAG_BELOW_GROUND;
        flags[i] = if ok { under } else { FLAG_MISSING };
    }
}

lane_builds! {
    /// [`level_body`] in the build `lanes` names.
    fn level_in(z: &[f32], below: &[u8], values: &mut [f32], flags: &mut [u8]) -> () = level_body;
}

lane_builds! {
    /// [`thickness_body`] in the build `lanes` names.
    fn thickness_in(
        bottom: &[f32],
        top: &[f32],
        below: &[u8],
        values: &mut [f32],
        flags: &mut [u8],
    ) -> () = thickness_body;
}

/// One row of an on-level quantity, in the widest SIMD build the processor has. The row
/// copies were the largest part of an area answer's time while they ran one value at a time.
fn level_row(z: &[f32], below: &[u8], values: &mut [f32], flags: &mut [u8]) {
    level_in(Lanes::widest(), z, below, values, flags);
}

/// One row of a thickness between levels, in the widest SIMD build the processor has.
fn thickness_row(bottom: &[f32], top: &[f32], below: &[u8], values: &mut [f32], flags: &mut [u8]) {
    thickness_in(Lanes::widest(), bottom, top, below, values, flags);
}

fn flag(below_ground: bool) -> u8 {
    if below_ground {
        FLAG_BELOW_GROUND
    } else {
        0
    }
}

/// The grid columns a point's value is made of, with their weights (zero weights left out,
/// so that a masked neighbour the point does not depend on cannot mask it).
#[derive(Clone, Copy, Debug)]
struct Corners {
    items: [(usize, usize, f64); 4],
    len: usize,
}

impl Corners {
    fn new(stencil: &Stencil, interpolation: Interpolation) -> Self {
        let mut out = Self {
            items: [(0, 0, 0.0); 4],
            len: 0,
        };
        match interpolation {
            Interpolation::Nearest => {
                let (r, c) = stencil.nearest();
                out.items[0] = (r, c, 1.0);
                out.len = 1;
            }
            Interpolation::Bilinear => {
                let fr = stencil.row_fraction;
                let fc = stencil.col_fraction;
                for (a, wr) in [(0, 1.0 - fr), (1, fr)] {
                    for (b, wc) in [(0, 1.0 - fc), (1, fc)] {
                        let w = wr * wc;
                        if w > 0.0 {
                            out.items[out.len] = (stencil.rows[a], stencil.cols[b], w);
                            out.len += 1;
                        }
                    }
                }
            }
        }
        out
    }

    fn used(&self) -> &[(usize, usize, f64)] {
        &self.items[..self.len]
    }

    fn columns(&self) -> impl Iterator<Item = (usize, usize)> + '_ {
        self.used().iter().map(|&(r, c, _)| (r, c))
    }
}

/// Locates a validated point on the grid; `prefix` is the point's path.
fn locate_point(lc: &LoadedCycle, prefix: &str, lat: f64, lon: f64) -> Result<Stencil, QueryError> {
    check_latitude(join(prefix, "latitude"), lat)?;
    check_longitude(join(prefix, "longitude"), lon)?;
    locate(&lc.cycle.grid, lat, lon).map_err(|e| match e {
        SampleError::BadLatitude(_) => invalid(join(prefix, "latitude"), e.to_string()),
        SampleError::BadLongitude(_) => invalid(join(prefix, "longitude"), e.to_string()),
        SampleError::OutsideGrid { .. } => {
            out_of_range(prefix.to_string(), format!("cycle '{}': {e}", lc.id))
        }
    })
}

// ---------------------------------------------------------------------------------------------
// Area.
// ---------------------------------------------------------------------------------------------

/// The grid rows and columns a box selects, in answer order (north to south, west to east
/// in the box's frame), thinned by a stride.
#[derive(Clone, Debug, PartialEq)]
pub struct AreaSelection {
    /// Grid row of each answer row.
    pub rows: Vec<usize>,
    /// Latitude of each answer row, degrees north.
    pub latitudes: Vec<f64>,
    /// Grid column of each answer column.
    pub cols: Vec<usize>,
    /// Longitude of each answer column, degrees east in the box's frame.
    pub longitudes: Vec<f64>,
}

/// A validated area query.
struct AreaPlan {
    plans: Vec<Plan>,
    time: usize,
    selection: AreaSelection,
}

fn check_box_longitude(field: &str, lon: f64) -> Result<(), QueryError> {
    if !(lon.is_finite() && (-180.0..=360.0).contains(&lon)) {
        return Err(invalid(
            field,
            format!("longitude {lon} must be a finite number of degrees within -180 to 360"),
        ));
    }
    Ok(())
}

/// `x.rem_euclid(360.0)`, bit for bit, without its `fmod` for the offsets a box edge and a
/// grid longitude give (within a turn either side of zero): area selection runs it for every
/// longitude of the grid on every request, and `fmod` was a third of that selection's time.
fn within_one_turn(x: f64) -> f64 {
    if (0.0..360.0).contains(&x) {
        x
    } else if x > -360.0 && x < 0.0 {
        x + 360.0
    } else if (360.0..720.0).contains(&x) {
        x - 360.0
    } else {
        x.rem_euclid(360.0)
    }
}

/// Grid columns inside the box's longitudes, west to east, with their longitudes in the
/// box's frame.
fn select_longitudes(grid_lons: &[f64], west: f64, east: f64) -> Vec<(f64, usize, f64)> {
    let span = if east >= west {
        east - west
    } else {
        east + 360.0 - west
    };
    let frame_360 = west > 180.0 || east > 180.0;
    let mut picked: Vec<(f64, usize, f64)> = Vec::new();
    for (c, &lon) in grid_lons.iter().enumerate() {
        if !lon.is_finite() {
            continue;
        }
        let mut d = within_one_turn(lon - west);
        if d > 360.0 - EDGE_DEGREES {
            d = 0.0;
        }
        if span >= 360.0 - EDGE_DEGREES || d <= span + EDGE_DEGREES {
            let mut out = west + d;
            if frame_360 {
                if out >= 360.0 {
                    out -= 360.0;
                }
            } else if out > 180.0 + EDGE_DEGREES {
                out -= 360.0;
            }
            picked.push((d, c, out));
        }
    }
    picked.sort_by(|a, b| a.0.total_cmp(&b.0));
    picked
}

/// Validates a box and a stride against a cycle's grid and selects its rows and columns,
/// exactly as an area query does (the products' area answers use it).
pub fn select_area(
    lc: &LoadedCycle,
    bbox: &BoundingBox,
    stride: usize,
) -> Result<AreaSelection, QueryError> {
    let b = bbox;
    for (field, lat) in [("bbox.south", b.south), ("bbox.north", b.north)] {
        check_latitude(field.to_string(), lat)?;
    }
    check_box_longitude("bbox.west", b.west)?;
    check_box_longitude("bbox.east", b.east)?;
    if b.south > b.north {
        return Err(invalid(
            "bbox.south",
            format!(
                "the southern edge ({}) lies north of the northern edge ({}): swap them",
                b.south, b.north
            ),
        ));
    }
    if stride == 0 {
        return Err(invalid(
            "stride",
            "stride must be at least 1 (1 keeps every grid point)",
        ));
    }

    let grid = &lc.cycle.grid;
    let mut rows: Vec<(f64, usize)> = grid
        .latitudes
        .iter()
        .enumerate()
        .filter(|(_, &lat)| lat >= b.south - EDGE_DEGREES && lat <= b.north + EDGE_DEGREES)
        .map(|(r, &lat)| (lat, r))
        .collect();
    rows.sort_by(|x, y| y.0.total_cmp(&x.0));
    let cols = select_longitudes(&grid.longitudes, b.west, b.east);
    if rows.is_empty() || cols.is_empty() {
        let (lat_min, lat_max) = min_max(&grid.latitudes);
        let (lon_min, lon_max) = min_max(&grid.longitudes);
        return Err(out_of_range(
            "bbox",
            format!(
                "the box holds no grid point of cycle '{}' (latitude {lat_min} to {lat_max}, longitude {lon_min} to {lon_max})",
                lc.id
            ),
        ));
    }
    Ok(AreaSelection {
        latitudes: rows.iter().step_by(stride).map(|r| r.0).collect(),
        rows: rows.iter().step_by(stride).map(|r| r.1).collect(),
        longitudes: cols.iter().step_by(stride).map(|c| c.2).collect(),
        cols: cols.iter().step_by(stride).map(|c| c.1).collect(),
    })
}

/// The time step a selector names, validated against the cycle (the error names `time`).
pub fn time_index(lc: &LoadedCycle, time: &TimeSelector) -> Result<usize, QueryError> {
    resolve_time(lc, time, "")
}

fn plan_area(lc: &LoadedCycle, q: &AreaQuery) -> Result<AreaPlan, QueryError> {
    let selection = select_area(lc, &q.bbox, q.stride)?;
    check_member(lc, q.member)?;
    let time = resolve_time(lc, &q.time, "")?;
    let plans = plan_quantities(lc, &q.quantities, q.allow_extrapolation)?;
    if matches!(lc.cycle.vertical, Vertical::Hybrid { .. }) {
        let columns = selection
            .rows
            .iter()
            .flat_map(|&r| selection.cols.iter().map(move |&c| (r, c)));
        check_hybrid_range(lc, &plans, q.member, time, columns, q.allow_extrapolation)?;
    }
    Ok(AreaPlan {
        plans,
        time,
        selection,
    })
}

fn min_max(v: &[f64]) -> (f64, f64) {
    v.iter()
        .fold((f64::INFINITY, f64::NEG_INFINITY), |(lo, hi), &x| {
            (lo.min(x), hi.max(x))
        })
}

/// The size of an area answer, and how its values are found.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct AreaShape {
    /// Latitudes (rows) of the answer.
    pub rows: usize,
    /// Longitudes (columns) of the answer.
    pub cols: usize,
    /// Whether every quantity is copied from the stored heights (heights on levels and
    /// thicknesses between levels) and the step's heights are in: a few nanoseconds a
    /// value, where a quantity between levels rebuilds each column (about a microsecond a
    /// value) and a step still being computed is waited for.
    pub stored: bool,
}

/// Validates an area query and returns the size of its answer without computing any value.
pub fn area_shape(lc: &LoadedCycle, q: &AreaQuery) -> Result<AreaShape, QueryError> {
    let plan = plan_area(lc, q)?;
    Ok(AreaShape {
        rows: plan.selection.rows.len(),
        cols: plan.selection.cols.len(),
        stored: lc.heights.ready(q.member, plan.time).is_some()
            && !plan.plans.iter().any(Plan::rebuilds_column),
    })
}

/// Answers an area query: every quantity at every selected grid point.
///
/// The answer holds the grid's own points (no interpolation): latitudes north to south,
/// longitudes west to east in the box's frame, thinned by the stride. The number of
/// point-values (points × quantities) is checked against `limits` before anything is
/// allocated for the values.
pub fn area(lc: &LoadedCycle, q: &AreaQuery, limits: &Limits) -> Result<AreaAnswer, QueryError> {
    let plan = plan_area(lc, q)?;
    let (nrows, ncols) = (plan.selection.rows.len(), plan.selection.cols.len());
    let count = nrows
        .checked_mul(ncols)
        .and_then(|n| n.checked_mul(plan.plans.len()));
    check_limit(
        "bbox",
        count,
        limits,
        "ask for a smaller box, a larger stride or fewer quantities",
    )?;
    fill_area(lc, q, &plan, 0, nrows)
}

/// One quantity at every grid point of one (member, time) step, in the file's own row and
/// column order (the grid's latitudes and longitudes as [`LoadedCycle::cycle`] holds them).
#[derive(Clone, Debug, PartialEq)]
pub struct GridField {
    /// The quantity.
    pub quantity: Quantity,
    /// Index of the time step.
    pub time_index: usize,
    /// Ensemble member index.
    pub member: usize,
    /// Values, geopotential metres, `[row, col]`; `NaN` where masked.
    pub values: ndarray::Array2<f32>,
    /// [`FLAG_BELOW_GROUND`] and [`FLAG_MISSING`] bits, `[row, col]`.
    pub flags: ndarray::Array2<u8>,
}

/// Answers one quantity at every grid point of member `member`, time step `time_index`, in
/// the file's order, exactly as an area query answers each point (the products, which work
/// on whole grids, start here).
pub fn grid_field(
    lc: &LoadedCycle,
    quantity: &Quantity,
    time_index: usize,
    member: usize,
    allow_extrapolation: bool,
) -> Result<GridField, QueryError> {
    check_member(lc, member)?;
    let times = lc.cycle.lead_times_s.len();
    if time_index >= times {
        return Err(not_found(
            "time_index",
            format!(
                "time step {time_index} is not in cycle '{}', which has {times} time step{}",
                lc.id,
                if times == 1 { "" } else { "s" }
            ),
        ));
    }
    let plans = plan_quantities(lc, std::slice::from_ref(quantity), allow_extrapolation)?;
    let (rows, cols) = (lc.cycle.grid.rows(), lc.cycle.grid.cols());
    let columns = (0..rows).flat_map(|r| (0..cols).map(move |c| (r, c)));
    check_hybrid_range(lc, &plans, member, time_index, columns, allow_extrapolation)?;
    let mut values = ndarray::Array2::<f32>::from_elem((rows, cols), f32::NAN);
    let mut flags = ndarray::Array2::<u8>::zeros((rows, cols));
    let plans = &plans;
    let results: Vec<Result<(), QueryError>> = values
        .axis_iter_mut(Axis(0))
        .into_par_iter()
        .zip(flags.axis_iter_mut(Axis(0)).into_par_iter())
        .enumerate()
        .map(|(row, (mut v_row, mut f_row))| {
            let mut ev = Evaluator::new(
                lc,
                plans,
                (member, time_index),
                allow_extrapolation,
                WhilePending::Wait,
            )?;
            for col in 0..cols {
                let (v, f) = ev.value(0, row, col);
                v_row[col] = v as f32;
                f_row[col] = f;
            }
            Ok(())
        })
        .collect();
    results.into_iter().collect::<Result<(), QueryError>>()?;
    Ok(GridField {
        quantity: *quantity,
        time_index,
        member,
        values,
        flags,
    })
}

/// Answers rows `[row_start, row_end)` of an area query's rows only (after the stride), so
/// that the service can stream a large answer in chunks without building all of it.
///
/// The limit of [`area`] is not applied here: the caller sizes the chunks.
pub fn area_rows(
    lc: &LoadedCycle,
    q: &AreaQuery,
    row_start: usize,
    row_end: usize,
) -> Result<AreaAnswer, QueryError> {
    let plan = plan_area(lc, q)?;
    let nrows = plan.selection.rows.len();
    if row_start > row_end || row_end > nrows {
        return Err(invalid(
            "row_end",
            format!("rows {row_start} to {row_end} are not within the area's {nrows} rows"),
        ));
    }
    fill_area(lc, q, &plan, row_start, row_end)
}

fn fill_area(
    lc: &LoadedCycle,
    q: &AreaQuery,
    plan: &AreaPlan,
    row_start: usize,
    row_end: usize,
) -> Result<AreaAnswer, QueryError> {
    let sel = &plan.selection;
    let rows = &sel.rows[row_start..row_end];
    let n = rows.len() * sel.cols.len();
    // Waits for the step's heights (see `WhilePending::Wait`).
    let step = lc.step_heights(q.member, plan.time)?;
    let mut fields: Vec<QuantityField> = q
        .quantities
        .iter()
        .map(|&quantity| QuantityField {
            quantity,
            values: vec![f32::NAN; n],
            flags: vec![0; n],
        })
        .collect();
    // On-level quantities: a straight copy from the batch output, row by row, with no
    // column rebuilt (the hot path of chart tools). Selected columns that run contiguously
    // (no stride, no seam) are read as slices of the stored rows; others are gathered first.
    let run = contiguous_run(&sel.cols);
    let ncols = sel.cols.len();
    let (z_step, below_step) = (&step.geopotential_height, &step.below_ground);
    let mut gathered = RowGather::default();
    for (qi, field) in fields.iter_mut().enumerate() {
        let (bottom, top) = match plan.plans[qi] {
            Plan::Level(k) => (k, None),
            Plan::LevelThickness { bottom, top } => (bottom, Some(top)),
            Plan::ColumnHeight { .. } | Plan::ColumnThickness { .. } => continue,
        };
        let zb = z_step.index_axis(Axis(0), bottom);
        let zt = top.map(|k| z_step.index_axis(Axis(0), k));
        let below = below_step.index_axis(Axis(0), bottom);
        let out = field
            .values
            .chunks_exact_mut(ncols)
            .zip(field.flags.chunks_exact_mut(ncols));
        for (&r, (values, flags)) in rows.iter().zip(out) {
            let rows_in = (zb.row(r), zt.as_ref().map(|z| z.row(r)), below.row(r));
            let (b, t, f) = gathered.row(rows_in, &sel.cols, run.clone());
            match t {
                Some(t) => thickness_row(b, t, f, values, flags),
                None => level_row(b, f, values, flags),
            }
        }
    }
    let wanted: Vec<usize> = (0..plan.plans.len())
        .filter(|&qi| plan.plans[qi].rebuilds_column())
        .collect();
    if !wanted.is_empty() {
        // Each column is built once for all the quantities that need it, the rows on every
        // core (an evaluator, with its column scratch, for each thread): 200 × 200 columns
        // at 0.5° took 14.9 ms one after the other, 7.4 ms so (criterion, same run).
        let member_time = (q.member, plan.time);
        let per_row: Vec<Vec<(f64, u8)>> = rows
            .par_iter()
            .map_init(
                || {
                    let (plans, allow) = (&plan.plans, q.allow_extrapolation);
                    Evaluator::new(lc, plans, member_time, allow, WhilePending::Wait)
                },
                |ev, &r| -> Result<Vec<(f64, u8)>, QueryError> {
                    let ev = ev.as_mut().map_err(|e| e.clone())?;
                    let mut row = Vec::with_capacity(sel.cols.len() * wanted.len());
                    for &c in &sel.cols {
                        row.extend(wanted.iter().map(|&qi| ev.value(qi, r, c)));
                    }
                    Ok(row)
                },
            )
            .collect::<Result<_, _>>()?;
        for (i, (v, f)) in per_row.iter().flatten().enumerate() {
            let field = &mut fields[wanted[i % wanted.len()]];
            let at = i / wanted.len();
            field.values[at] = *v as f32;
            field.flags[at] = *f;
        }
    }
    Ok(AreaAnswer {
        time_index: plan.time,
        lead_time_s: lc.cycle.lead_times_s[plan.time],
        valid_time_unix_s: lc.valid_time_unix_s(plan.time),
        latitudes: sel.latitudes[row_start..row_end].to_vec(),
        longitudes: sel.longitudes.clone(),
        fields,
    })
}

// ---------------------------------------------------------------------------------------------
// Position.
// ---------------------------------------------------------------------------------------------

/// Answers a position query: every quantity at every point, for every requested time.
///
/// The number of point-values (points × quantities × times) is checked against `limits`
/// before any point is located.
pub fn position(
    lc: &LoadedCycle,
    q: &PositionQuery,
    limits: &Limits,
) -> Result<Vec<PointSeries>, QueryError> {
    if q.points.is_empty() {
        return Err(invalid("points", "no point asked for: give at least one"));
    }
    check_member(lc, q.member)?;
    let plans = plan_quantities(lc, &q.quantities, q.allow_extrapolation)?;
    let ntimes = if q.times.is_empty() {
        lc.cycle.lead_times_s.len()
    } else {
        q.times.len()
    };
    let count = q
        .points
        .len()
        .checked_mul(plans.len())
        .and_then(|n| n.checked_mul(ntimes));
    check_limit(
        "points",
        count,
        limits,
        "ask for fewer points, quantities or times",
    )?;
    let times: Vec<usize> = if q.times.is_empty() {
        (0..ntimes).collect()
    } else {
        q.times
            .iter()
            .enumerate()
            .map(|(i, t)| resolve_time(lc, t, &format!("times[{i}]")))
            .collect::<Result<_, _>>()?
    };
    let corners: Vec<Corners> = q
        .points
        .iter()
        .enumerate()
        .map(|(i, &(lat, lon))| {
            // The field names are built only for an error: thousands of points a call.
            locate(&lc.cycle.grid, lat, lon)
                .or_else(|_| locate_point(lc, &format!("points[{i}]"), lat, lon))
                .map(|st| Corners::new(&st, q.interpolation))
        })
        .collect::<Result<_, _>>()?;
    for &t in &times {
        let columns = corners.iter().flat_map(|c| c.columns());
        check_hybrid_range(lc, &plans, q.member, t, columns, q.allow_extrapolation)?;
    }
    let evaluators = || -> Result<Vec<Evaluator<'_>>, QueryError> {
        times
            .iter()
            .map(|&t| Evaluator::at_points(lc, &plans, (q.member, t), q.allow_extrapolation))
            .collect()
    };
    let nq = plans.len();
    // Parsed once, not once per sample.
    let valid: Vec<Option<i64>> = times.iter().map(|&t| lc.valid_time_unix_s(t)).collect();
    let series = |evaluators: &mut [Evaluator<'_>], points: &[(f64, f64)], corners: &[Corners]| {
        let mut out = Vec::with_capacity(points.len());
        for (&(latitude, longitude), corner) in points.iter().zip(corners) {
            let mut samples = Vec::with_capacity(times.len());
            for ((&t, ev), &valid_time_unix_s) in
                times.iter().zip(evaluators.iter_mut()).zip(&valid)
            {
                let mut values = vec![0.0; nq];
                let mut flags = vec![0u8; nq];
                ev.sample(corner, &mut values, &mut flags);
                samples.push(Sample {
                    lead_time_s: lc.cycle.lead_times_s[t],
                    valid_time_unix_s,
                    values,
                    flags,
                });
            }
            out.push(PointSeries {
                latitude,
                longitude,
                samples,
            });
        }
        out
    };
    // Columns rebuilt: quantities between levels, or steps whose heights are not in yet.
    let rebuilt = || {
        plans.iter().any(Plan::rebuilds_column)
            || times
                .iter()
                .any(|&t| lc.heights.ready(q.member, t).is_none())
    };
    answer_in_runs(
        (&q.points, &corners),
        rebuilt,
        evaluators,
        |e: &mut Vec<_>, p, c| series(e, p, c),
    )
}

/// Answers `points` (each with its `with`) by `answer`, given evaluators from `evaluators`:
/// on the calling thread, unless there are at least twice [`POINTS_A_TASK`] of them and
/// `rebuilt` says their columns are rebuilt (quantities between levels, or steps whose
/// heights are not in yet); then in runs of [`POINTS_A_TASK`] on every core, each thread
/// with its own evaluators (column scratch), the answers in order. Nothing here waits:
/// points rebuild what is not stored yet. Rebuilding takes about 2 µs a point; values
/// copied from the stored heights (0.2 µs a point) stay on the calling thread: in runs they
/// took twice as long (criterion, 1000 points).
fn answer_in_runs<P: Sync, W: Sync, E, R: Send>(
    (points, with): (&[P], &[W]),
    rebuilt: impl FnOnce() -> bool,
    evaluators: impl Fn() -> Result<E, QueryError> + Sync + Send,
    answer: impl Fn(&mut E, &[P], &[W]) -> Vec<R> + Sync + Send,
) -> Result<Vec<R>, QueryError> {
    if points.len() < 2 * POINTS_A_TASK || !rebuilt() {
        return Ok(answer(&mut evaluators()?, points, with));
    }
    let runs: Vec<Vec<R>> = points
        .par_chunks(POINTS_A_TASK)
        .zip(with.par_chunks(POINTS_A_TASK))
        .map_init(evaluators, |evaluators, (points, with)| {
            let evaluators = evaluators.as_mut().map_err(|e| e.clone())?;
            Ok(answer(evaluators, points, with))
        })
        .collect::<Result<_, QueryError>>()?;
    // Moved out in order (`concat` would clone every answer).
    Ok(runs.into_iter().flatten().collect())
}

/// Points a task of a large position query takes; fewer than twice this many are answered
/// on the calling thread (the service's many small queries).
const POINTS_A_TASK: usize = 128;

// ---------------------------------------------------------------------------------------------
// Profile.
// ---------------------------------------------------------------------------------------------

/// Answers a profile query: the column at a point, every level bottom-up.
///
/// With bilinear sampling every value of a level is interpolated from the four surrounding
/// columns (a masked corner masks that value), and a level is below ground when it is at any
/// corner.
pub fn profile(lc: &LoadedCycle, q: &ProfileQuery) -> Result<Profile, QueryError> {
    check_member(lc, q.member)?;
    let time = resolve_time(lc, &q.time, "")?;
    let stencil = locate_point(lc, "", q.latitude, q.longitude)?;
    let corners = Corners::new(&stencil, q.interpolation);
    let step = StepColumns::new(&lc.cycle, &lc.config, q.member, time)
        .map_err(|e| out_of_range("latitude", format!("cycle '{}': {e}", lc.id)))?;
    let nlev = lc.cycle.vertical.levels();
    let mut scratch = ColumnScratch::new(nlev);
    let c = lc.cycle.constants;
    let temperature = lc.cycle.temperature.slice(s![q.member, time, .., .., ..]);
    let mut levels: Vec<ProfileLevel> = (0..nlev)
        .map(|_| ProfileLevel {
            pressure_pa: 0.0,
            temperature_k: 0.0,
            virtual_temperature_k: 0.0,
            geopotential_height_m: 0.0,
            below_ground: false,
        })
        .collect();
    let mut surface = Some((0.0, 0.0));
    for &(row, col, w) in corners.used() {
        step.build(row, col, &mut scratch);
        surface = match (surface, step.surface(row, col)) {
            (Some((ps, zs)), Some((p, z))) if p.is_finite() && z.is_finite() => {
                Some((ps + w * p, zs + w * z))
            }
            _ => None,
        };
        for (k, level) in levels.iter_mut().enumerate() {
            let p = scratch.pressure[k];
            let tv = scratch
                .nodes
                .virtual_temperature_at_pressure(p, &c)
                .unwrap_or(f64::NAN);
            level.pressure_pa += w * p;
            level.temperature_k += w * f64::from(temperature[[k, row, col]]);
            level.virtual_temperature_k += w * tv;
            level.geopotential_height_m += w * scratch.height[k];
            level.below_ground |= scratch.below[k];
        }
    }
    Ok(Profile {
        latitude: q.latitude,
        longitude: q.longitude,
        lead_time_s: lc.cycle.lead_times_s[time],
        valid_time_unix_s: lc.valid_time_unix_s(time),
        surface_pressure_pa: surface.map(|s| s.0),
        surface_height_m: surface.map(|s| s.1),
        levels,
    })
}

// ---------------------------------------------------------------------------------------------
// Trajectory.
// ---------------------------------------------------------------------------------------------

/// The time steps around a valid time and the weight of the later one.
fn bracket_time(valid: &[(i64, usize)], t: i64) -> Option<(usize, usize, f64)> {
    let first = valid.first()?;
    let last = valid.last()?;
    if t < first.0 || t > last.0 {
        return None;
    }
    let past = valid.partition_point(|&(v, _)| v <= t);
    let i = past.saturating_sub(1);
    let (t0, i0) = valid[i];
    if t0 == t || i + 1 >= valid.len() {
        return Some((i0, i0, 0.0));
    }
    let (t1, i1) = valid[i + 1];
    Some((i0, i1, (t - t0) as f64 / (t1 - t0) as f64))
}

/// Answers a trajectory query: every quantity along a route, bilinear (or nearest) in space
/// and linear in time between the bracketing lead times.
///
/// A waypoint outside the cycle's valid times is out of range, named by its index.
pub fn trajectory(
    lc: &LoadedCycle,
    q: &TrajectoryQuery,
    limits: &Limits,
) -> Result<Vec<TrajectorySample>, QueryError> {
    if q.waypoints.is_empty() {
        return Err(invalid("waypoints", "no waypoint given: give at least one"));
    }
    check_member(lc, q.member)?;
    let plans = plan_quantities(lc, &q.quantities, q.allow_extrapolation)?;
    check_limit(
        "waypoints",
        q.waypoints.len().checked_mul(plans.len()),
        limits,
        "ask for fewer waypoints or quantities",
    )?;
    let Some(reference) = lc.reference_time_unix_s() else {
        return Err(not_found(
            "waypoints[0].valid_time_unix_s",
            format!(
                "cycle '{}' has no reference time, so its valid times are unknown",
                lc.id
            ),
        ));
    };
    let mut valid: Vec<(i64, usize)> = lc
        .cycle
        .lead_times_s
        .iter()
        .enumerate()
        .filter_map(|(i, &l)| reference.checked_add(l).map(|v| (v, i)))
        .collect();
    valid.sort_unstable();
    let mut steps = Vec::with_capacity(q.waypoints.len());
    for (i, w) in q.waypoints.iter().enumerate() {
        let prefix = format!("waypoints[{i}]");
        if i > 0 && w.valid_time_unix_s < q.waypoints[i - 1].valid_time_unix_s {
            return Err(invalid(
                format!("{prefix}.valid_time_unix_s"),
                "waypoint times must not decrease along the route",
            ));
        }
        let stencil = locate_point(lc, &prefix, w.latitude, w.longitude)?;
        let bracket = bracket_time(&valid, w.valid_time_unix_s).ok_or_else(|| {
            let span = match (valid.first(), valid.last()) {
                (Some(a), Some(b)) => {
                    format!("{} to {}", format_rfc3339_utc(a.0), format_rfc3339_utc(b.0))
                }
                _ => "none".to_string(),
            };
            out_of_range(
                format!("{prefix}.valid_time_unix_s"),
                format!(
                    "{} lies outside the valid times of cycle '{}' ({span})",
                    format_rfc3339_utc(w.valid_time_unix_s),
                    lc.id
                ),
            )
        })?;
        steps.push((Corners::new(&stencil, q.interpolation), bracket));
    }
    let ntimes = lc.cycle.lead_times_s.len();
    let mut used = vec![false; ntimes];
    for (_, (t0, t1, w)) in &steps {
        used[*t0] = true;
        if *w > 0.0 {
            used[*t1] = true;
        }
    }
    for t in (0..ntimes).filter(|&t| used[t]) {
        let columns = steps.iter().flat_map(|(c, _)| c.columns());
        check_hybrid_range(lc, &plans, q.member, t, columns, q.allow_extrapolation)?;
    }
    // One evaluator per lead time a waypoint falls on or between, `None` for the others.
    let evaluators = || -> Result<Vec<Option<Evaluator<'_>>>, QueryError> {
        used.iter()
            .enumerate()
            .map(|(t, &u)| {
                u.then(|| Evaluator::at_points(lc, &plans, (q.member, t), q.allow_extrapolation))
                    .transpose()
            })
            .collect()
    };
    let nq = plans.len();
    let samples = |evaluators: &mut [Option<Evaluator<'_>>],
                   waypoints: &[Waypoint],
                   steps: &[(Corners, (usize, usize, f64))]| {
        let mut later_values = vec![0.0; nq];
        let mut later_flags = vec![0u8; nq];
        let mut out = Vec::with_capacity(steps.len());
        for (waypoint, (corners, (t0, t1, w))) in waypoints.iter().zip(steps) {
            let mut values = vec![0.0; nq];
            let mut flags = vec![0u8; nq];
            if let Some(ev) = evaluators[*t0].as_mut() {
                ev.sample(corners, &mut values, &mut flags);
            }
            if *w > 0.0 {
                if let Some(ev) = evaluators[*t1].as_mut() {
                    ev.sample(corners, &mut later_values, &mut later_flags);
                }
                for qi in 0..nq {
                    let f = flags[qi] | later_flags[qi];
                    if f & FLAG_MISSING != 0 {
                        values[qi] = f64::NAN;
                        flags[qi] = FLAG_MISSING;
                    } else {
                        values[qi] = (1.0 - w) * values[qi] + w * later_values[qi];
                        flags[qi] = f;
                    }
                }
            }
            out.push(TrajectorySample {
                waypoint: *waypoint,
                values,
                flags,
            });
        }
        out
    };
    // As for positions: long routes whose columns are rebuilt go in runs of waypoints.
    let rebuilt = || {
        plans.iter().any(Plan::rebuilds_column)
            || (0..ntimes).any(|t| used[t] && lc.heights.ready(q.member, t).is_none())
    };
    answer_in_runs(
        (&q.waypoints, &steps),
        rebuilt,
        evaluators,
        |e: &mut Vec<_>, w, s| samples(e, w, s),
    )
}

#[cfg(test)]
mod tests {
    use super::*;
    use proptest::prelude::*;

    #[test]
    fn a_box_across_the_antimeridian_runs_west_to_east_in_its_own_frame() {
        let lons: Vec<f64> = (0..36).map(|i| 10.0 * i as f64).collect();
        let picked = select_longitudes(&lons, 160.0, -160.0);
        let out: Vec<f64> = picked.iter().map(|p| p.2).collect();
        assert_eq!(out, vec![160.0, 170.0, 180.0, -170.0, -160.0]);
        let cols: Vec<usize> = picked.iter().map(|p| p.1).collect();
        assert_eq!(cols, vec![16, 17, 18, 19, 20]);
        // The same box in 0..360 terms keeps its longitudes there.
        let same: Vec<f64> = select_longitudes(&lons, 160.0, 200.0)
            .iter()
            .map(|p| p.2)
            .collect();
        assert_eq!(same, vec![160.0, 170.0, 180.0, 190.0, 200.0]);
        // Across Greenwich in 0..360 terms.
        let green: Vec<f64> = select_longitudes(&lons, 340.0, 20.0)
            .iter()
            .map(|p| p.2)
            .collect();
        assert_eq!(green, vec![340.0, 350.0, 0.0, 10.0, 20.0]);
    }

    #[test]
    fn isothermal_extrapolation_matches_the_standard_stratosphere() {
        // U.S. Standard Atmosphere 1976 (NOAA/NASA/USAF): isothermal at 216.65 K from 11 to
        // 20 km'; mandatory-level heights derived from its definitions (GUIDE §2): 200 hPa
        // 11784.0 m, 150 hPa 13608.4 m, 100 hPa 16179.7 m.
        let c = Constants::us_standard_atmosphere_1976();
        let mut nodes = ColumnNodes::with_capacity(2);
        let p = [25_000.0, 20_000.0];
        let tv = [216.65, 216.65];
        let mut z = [0.0; 2];
        let mut below = [false; 2];
        nodes.isobaric(
            &p,
            &tv,
            crate::physics::column::ColumnAnchor::LevelHeight {
                level: 1,
                height_m: 11_784.0,
            },
            &c,
            &mut z,
            &mut below,
        );
        let z150 = isothermal_height_above_top(&nodes, 15_000.0, &c).unwrap();
        let z100 = isothermal_height_above_top(&nodes, 10_000.0, &c).unwrap();
        assert!((z150 - 13_608.4).abs() < 0.15, "{z150}");
        assert!((z100 - 16_179.7).abs() < 0.15, "{z100}");
        // Not above the top: no extrapolation.
        assert_eq!(isothermal_height_above_top(&nodes, 22_000.0, &c), None);
    }

    #[test]
    fn time_brackets_weight_the_later_step() {
        let valid = [(0, 0), (100, 1), (300, 2)];
        assert_eq!(bracket_time(&valid, 0), Some((0, 0, 0.0)));
        assert_eq!(bracket_time(&valid, 50), Some((0, 1, 0.5)));
        assert_eq!(bracket_time(&valid, 200), Some((1, 2, 0.5)));
        assert_eq!(bracket_time(&valid, 300), Some((2, 2, 0.0)));
        assert_eq!(bracket_time(&valid, 301), None);
        assert_eq!(bracket_time(&valid, -1), None);
    }

    /// Heights, NaN and infinities mixed, as raw bits.
    fn stored_row() -> impl Strategy<Value = Vec<f32>> {
        prop::collection::vec(
            prop_oneof![
                4 => -1000.0f32..40_000.0,
                1 => Just(f32::NAN),
                1 => Just(f32::INFINITY),
                1 => Just(f32::NEG_INFINITY),
                1 => any::<u32>().prop_map(f32::from_bits),
            ],
            0..120,
        )
    }

    proptest! {
        /// Every SIMD build of the area row copies gives what the plain per-value rule gives,
        /// bit for bit: value or NaN, the below-ground flag or the missing flag.
        #[test]
        fn area_row_copies_follow_the_per_value_rule_in_every_build(
            bottom in stored_row(),
            top in stored_row(),
            below in prop::collection::vec(0u8..3, 120),
        ) {
            let n = bottom.len().min(top.len());
            let bits = |v: &[f32]| v.iter().map(|x| x.to_bits()).collect::<Vec<_>>();
            let mut want_level = (vec![0f32; n], vec![0u8; n]);
            let mut want_thick = (vec![0f32; n], vec![0u8; n]);
            for i in 0..n {
                let flag_of = |ok: bool| match (ok, below[i] != 0) {
                    (false, _) => FLAG_MISSING,
                    (true, true) => FLAG_BELOW_GROUND,
                    (true, false) => 0,
                };
                let ok = bottom[i].is_finite();
                want_level.0[i] = if ok { bottom[i] } else { f32::NAN };
                want_level.1[i] = flag_of(ok);
                let ok = ok && top[i].is_finite();
                let d = f64::from(top[i]) - f64::from(bottom[i]);
                want_thick.0[i] = if ok { d as f32 } else { f32::NAN };
                want_thick.1[i] = flag_of(ok);
            }
            for lanes in Lanes::ALL {
                let mut got = (vec![1f32; n], vec![9u8; n]);
                level_in(lanes, &bottom, &below, &mut got.0, &mut got.1);
                prop_assert_eq!(bits(&got.0), bits(&want_level.0), "{:?}", lanes);
                prop_assert_eq!(&got.1, &want_level.1, "{:?}", lanes);
                thickness_in(lanes, &bottom, &top, &below, &mut got.0, &mut got.1);
                prop_assert_eq!(bits(&got.0), bits(&want_thick.0), "{:?}", lanes);
                prop_assert_eq!(&got.1, &want_thick.1, "{:?}", lanes);
            }
        }

        #[test]
        fn one_turn_offsets_are_those_of_rem_euclid(x in -1000.0f64..1000.0, k in -3i32..4) {
            // Random offsets, and those at and next to whole turns, where the sign of a zero
            // and rounding would show.
            let edge = f64::from(k) * 360.0;
            let e = f64::EPSILON;
            let near = [edge * (1.0 + e), edge * (1.0 - e), edge + 1e-9, edge - 1e-9];
            for v in [x, edge, -0.0, -1e-300, 1e-300].into_iter().chain(near) {
                let (ours, std) = (within_one_turn(v), v.rem_euclid(360.0));
                prop_assert_eq!(ours.to_bits(), std.to_bits(), "{}", v);
            }
        }

        #[test]
        fn selected_longitudes_lie_in_the_box_and_increase(
            west in -180.0f64..360.0, width in 0.0f64..359.0, step_i in 1usize..6, offset in -180.0f64..0.0,
        ) {
            // A global grid of `step` degrees starting at `offset` (either convention).
            let step: f64 = [0.25, 0.5, 1.0, 2.5, 10.0][step_i - 1];
            let n = (360.0 / step).round() as usize;
            let start = if offset < -90.0 { -180.0 } else { 0.0 };
            let lons: Vec<f64> = (0..n).map(|i| start + step * i as f64).collect();
            let mut east = west + width;
            if east > 360.0 { east -= 360.0; }
            let picked = select_longitudes(&lons, west, east);
            // Every column whose offset from the west edge is within the width, once.
            let expected = lons.iter().filter(|&&l| {
                let d = (l - west).rem_euclid(360.0);
                d <= width + 1e-6 || d >= 360.0 - 1e-9
            }).count();
            prop_assert!((picked.len() as i64 - expected as i64).abs() <= 1);
            for w in picked.windows(2) {
                prop_assert!(w[1].0 > w[0].0);
            }
            for p in &picked {
                prop_assert!(p.0 <= width + 1e-6);
            }
        }
    }
}
