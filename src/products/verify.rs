//! Verification scores of forecast heights and thickness against an analysis, and a file's
//! self-consistency check (heights computed here against the heights the file carries).
//!
//! # Scores
//! Every score is of the error `forecast − truth` over the grid points of a region, each
//! point weighted by cos(latitude) (the area it stands for on a regular latitude/longitude
//! grid, as WMO-No. 485 weights its standard scores; GUIDE §3). With weights `w`, errors
//! `e = f − t` and `W = Σ w`:
//! - bias `ē = Σ w e / W`; RMSE `√(Σ w e² / W)`; MAE `Σ w |e| / W`;
//! - error standard deviation `√(Σ w (e − ē)² / W)` (about the weighted mean error, divided
//!   by the weight sum as `numpy.average` does, so that `sd² = rmse² − bias²`);
//! - correlation: the weighted Pearson coefficient of forecast and truth,
//!   `Σ w (f − f̄)(t − t̄) / √(Σ w (f − f̄)² Σ w (t − t̄)²)`.
//!
//! Points where either value is `NaN` are skipped. Sums are accumulated in `f64` in two
//! passes (means first, then deviations about them), each with Neumaier's compensated
//! summation, so that a quarter of a million points of 5500 m heights keep their
//! centimetres.
//!
//! # Regions
//! The whole domain, the three WMO-No. 485 standard regions (northern extratropics 20–90° N,
//! tropics 20° S–20° N, southern extratropics 20–90° S; GUIDE §3) and any latitude/longitude
//! box. The boundary latitudes ±20° are inclusive on both sides: a grid row at exactly 20° N
//! counts in both the northern extratropics and the tropics (WMO practice, from memory).
//! A region that does not intersect the grid gives a row with count 0 and a note; it is not
//! an error.
//!
//! # Truth
//! For [`verify`], truth is the analysis file's own geopotential height where it carries one
//! on the item's levels (thickness: the difference of its heights at the two levels), else
//! heights computed here from its temperature and humidity. Each row and the report say which
//! ([`TruthSource`]). Forecast values are [`crate::query::grid_field`] answers; a forecast on
//! another grid is interpolated bilinearly to the analysis grid ([`RegridPlan`]), and
//! analysis points outside it are skipped.
//!
//! # Below ground
//! Values at levels below the model surface are a convention (an extrapolation), not physics.
//! By default a point is left out when either side is flagged below ground there; the count
//! left out is in each row, and [`VerifyRequest::include_below_ground`] keeps them.
//!
//! [`verify`]: crate::products::verify::verify
//! [`TruthSource`]: crate::products::verify::TruthSource
//! [`RegridPlan`]: crate::products::field::RegridPlan
//! [`VerifyRequest::include_below_ground`]: crate::products::verify::VerifyRequest::include_below_ground

use ndarray::{s, Array2, ArrayView2, Axis};
use rayon::prelude::*;
use serde::Serialize;

use crate::ingest::time::format_rfc3339_utc;
use crate::model::Vertical;
use crate::products::field::{latitude_weights, same_grid, RegridPlan};
use crate::query::{
    grid_field, BoundingBox, LoadedCycle, Quantity, QueryError, TimeSelector, FLAG_BELOW_GROUND,
};
use crate::served::StepHeights;

/// Relative tolerance within which a pressure counts as one of a cycle's levels (as the query
/// module uses).
const ON_LEVEL_RELATIVE: f64 = 1e-6;

/// Tolerance, degrees, for a grid coordinate on the edge of a region.
const EDGE_DEGREES: f64 = 1e-9;

/// Latitude bounding the WMO-No. 485 extratropics and tropics, degrees (GUIDE §3).
const WMO_TROPICS_EDGE_DEGREES: f64 = 20.0;

// ---------------------------------------------------------------------------------------------
// Scores.
// ---------------------------------------------------------------------------------------------

/// Latitude-weighted scores of `forecast − truth` over a set of points.
///
/// Every score is `NaN` when no point (or only points of zero weight) remains; `corr` is
/// also `NaN` when either side has no variance.
#[derive(Clone, Copy, Debug, PartialEq, Serialize)]
pub struct Scores {
    /// Number of points used (both values finite, weight finite and not negative).
    pub count: usize,
    /// Sum of the weights of the points used.
    pub weight_sum: f64,
    /// Weighted mean error, forecast − truth, geopotential metres.
    pub bias_m: f64,
    /// Weighted root-mean-square error, geopotential metres.
    pub rmse_m: f64,
    /// Weighted mean absolute error, geopotential metres.
    pub mae_m: f64,
    /// Weighted standard deviation of the error about the weighted bias, geopotential metres.
    pub sd_m: f64,
    /// Weighted Pearson correlation of forecast and truth, dimensionless.
    pub corr: f64,
}

/// Neumaier's compensated sum (an improvement of Kahan's that also survives terms larger than
/// the running sum).
///
/// # References
/// Neumaier, A. (1974), *Z. Angew. Math. Mech.* 54, 39–51.
#[derive(Clone, Copy, Debug, Default)]
struct CompensatedSum {
    sum: f64,
    compensation: f64,
}

impl CompensatedSum {
    fn add(&mut self, x: f64) {
        let t = self.sum + x;
        if self.sum.abs() >= x.abs() {
            self.compensation += (self.sum - t) + x;
        } else {
            self.compensation += (x - t) + self.sum;
        }
        self.sum = t;
    }

    fn value(&self) -> f64 {
        self.sum + self.compensation
    }
}

/// Points per block when a flat slice is scored (each block's partial sums are plain `f64`;
/// the block totals are added with compensation).
const BLOCK: usize = 512;

/// First-pass sums of one block.
#[derive(Clone, Copy)]
struct FirstPass {
    count: usize,
    w: f64,
    wf: f64,
    wt: f64,
    we: f64,
    f_lo: f64,
    f_hi: f64,
    t_lo: f64,
    t_hi: f64,
}

/// Scores from a source of blocks of (forecast, truth, weight) triples that can be walked
/// twice.
///
/// # Method
/// Two passes: weighted means first, then the sums of squared deviations about them, so that
/// no large mean is ever subtracted from a large mean square. Within a block (a grid row or
/// [`BLOCK`] points) sums are plain `f64`; block totals are added with Neumaier's
/// compensated summation: a blocked (two-level pairwise) scheme whose rounding error grows
/// with the block length, not with the number of points.
fn scores_of<B, I, F>(blocks: F) -> Scores
where
    B: Iterator<Item = I>,
    I: Iterator<Item = (f64, f64, f64)>,
    F: Fn() -> B,
{
    let usable = |&(f, t, w): &(f64, f64, f64)| f.is_finite() && t.is_finite() && w >= 0.0;
    let mut count = 0usize;
    let mut totals = [CompensatedSum::default(); 4];
    // Ranges, so that a constant field has exactly zero variance (its weighted mean may differ
    // from the constant in the last bit, which would otherwise correlate rounding noise).
    let (mut f_lo, mut f_hi, mut t_lo, mut t_hi) = (
        f64::INFINITY,
        f64::NEG_INFINITY,
        f64::INFINITY,
        f64::NEG_INFINITY,
    );
    for block in blocks() {
        let mut b = FirstPass {
            count: 0,
            w: 0.0,
            wf: 0.0,
            wt: 0.0,
            we: 0.0,
            f_lo: f64::INFINITY,
            f_hi: f64::NEG_INFINITY,
            t_lo: f64::INFINITY,
            t_hi: f64::NEG_INFINITY,
        };
        for (f, t, w) in block.filter(usable) {
            b.count += 1;
            b.w += w;
            b.wf += w * f;
            b.wt += w * t;
            b.we += w * (f - t);
            b.f_lo = b.f_lo.min(f);
            b.f_hi = b.f_hi.max(f);
            b.t_lo = b.t_lo.min(t);
            b.t_hi = b.t_hi.max(t);
        }
        count += b.count;
        for (total, x) in totals.iter_mut().zip([b.w, b.wf, b.wt, b.we]) {
            total.add(x);
        }
        (f_lo, f_hi, t_lo, t_hi) = (
            f_lo.min(b.f_lo),
            f_hi.max(b.f_hi),
            t_lo.min(b.t_lo),
            t_hi.max(b.t_hi),
        );
    }
    let [weight_sum, swf, swt, swe] = totals.map(|s| s.value());
    if !(weight_sum > 0.0 && weight_sum.is_finite()) {
        return Scores {
            count,
            weight_sum,
            bias_m: f64::NAN,
            rmse_m: f64::NAN,
            mae_m: f64::NAN,
            sd_m: f64::NAN,
            corr: f64::NAN,
        };
    }
    let (mean_f, mean_t, bias) = (swf / weight_sum, swt / weight_sum, swe / weight_sum);
    let mut sums = [CompensatedSum::default(); 6];
    for block in blocks() {
        let mut b = [0.0f64; 6];
        for (f, t, w) in block.filter(usable) {
            let e = f - t;
            let (df, dt, de) = (f - mean_f, t - mean_t, e - bias);
            b[0] += w * e * e;
            b[1] += w * e.abs();
            b[2] += w * de * de;
            b[3] += w * df * df;
            b[4] += w * dt * dt;
            b[5] += w * df * dt;
        }
        for (total, x) in sums.iter_mut().zip(b) {
            total.add(x);
        }
    }
    let [se2, sae, sde2, sdf2, sdt2, sdfdt] = sums.map(|s| s.value());
    let varies = f_hi > f_lo && t_hi > t_lo;
    let corr = if varies && sdf2 > 0.0 && sdt2 > 0.0 {
        (sdfdt / (sdf2 * sdt2).sqrt()).clamp(-1.0, 1.0)
    } else {
        f64::NAN
    };
    Scores {
        count,
        weight_sum,
        bias_m: bias,
        rmse_m: (se2 / weight_sum).sqrt(),
        mae_m: sae / weight_sum,
        sd_m: (sde2.max(0.0) / weight_sum).sqrt(),
        corr,
    }
}

/// Weighted scores of `forecast − truth` (see the module documentation for the formulas).
///
/// Points where either value is `NaN` (or the weight is `NaN` or negative) are skipped. The
/// three slices are walked together; pairs beyond the shortest are ignored.
pub fn weighted_scores(forecast: &[f32], truth: &[f32], weights: &[f64]) -> Scores {
    let n = forecast.len().min(truth.len()).min(weights.len());
    scores_of(|| {
        (0..n).step_by(BLOCK).map(move |start| {
            let end = (start + BLOCK).min(n);
            forecast[start..end]
                .iter()
                .zip(&truth[start..end])
                .zip(&weights[start..end])
                .map(|((&f, &t), &w)| (f64::from(f), f64::from(t), w))
        })
    })
}

// ---------------------------------------------------------------------------------------------
// Regions.
// ---------------------------------------------------------------------------------------------

/// Where scores are taken.
#[derive(Clone, Copy, Debug, PartialEq)]
pub enum Region {
    /// Every point of the grid.
    Global,
    /// WMO-No. 485 northern extratropics, 20° N to 90° N inclusive.
    NorthernExtratropics,
    /// WMO-No. 485 tropics, 20° S to 20° N inclusive.
    Tropics,
    /// WMO-No. 485 southern extratropics, 90° S to 20° S inclusive.
    SouthernExtratropics,
    /// A latitude/longitude box, edges inclusive; `west > east` crosses the antimeridian (as
    /// in [`BoundingBox`]: longitudes in -180..360).
    Box(BoundingBox),
}

impl Region {
    /// The whole domain and the three WMO-No. 485 standard regions: the default set.
    pub fn standard() -> Vec<Region> {
        vec![
            Region::Global,
            Region::NorthernExtratropics,
            Region::Tropics,
            Region::SouthernExtratropics,
        ]
    }

    /// The name used in reports: `global`, `northern_extratropics`, `tropics`,
    /// `southern_extratropics`, or `box(south,north,west,east)` in degrees.
    pub fn label(&self) -> String {
        match self {
            Region::Global => "global".to_string(),
            Region::NorthernExtratropics => "northern_extratropics".to_string(),
            Region::Tropics => "tropics".to_string(),
            Region::SouthernExtratropics => "southern_extratropics".to_string(),
            Region::Box(b) => format!("box({},{},{},{})", b.south, b.north, b.west, b.east),
        }
    }

    /// True when a latitude (degrees north) lies in the region.
    pub fn contains_latitude(&self, lat: f64) -> bool {
        let edge = WMO_TROPICS_EDGE_DEGREES;
        match self {
            Region::Global => true,
            Region::NorthernExtratropics => lat >= edge - EDGE_DEGREES,
            Region::Tropics => lat.abs() <= edge + EDGE_DEGREES,
            Region::SouthernExtratropics => lat <= -edge + EDGE_DEGREES,
            Region::Box(b) => lat >= b.south - EDGE_DEGREES && lat <= b.north + EDGE_DEGREES,
        }
    }

    /// True when a longitude (degrees east, any frame) lies in the region.
    pub fn contains_longitude(&self, lon: f64) -> bool {
        let Region::Box(b) = self else {
            return true;
        };
        let span = if b.east >= b.west {
            b.east - b.west
        } else {
            b.east + 360.0 - b.west
        };
        let mut d = (lon - b.west).rem_euclid(360.0);
        if d > 360.0 - EDGE_DEGREES {
            d = 0.0;
        }
        span >= 360.0 - EDGE_DEGREES || d <= span + EDGE_DEGREES
    }

    /// Checks a box's edges; `index` names the region in the error.
    fn validate(&self, index: usize) -> Result<(), VerifyError> {
        let Region::Box(b) = self else {
            return Ok(());
        };
        let bad = |message: String| VerifyError::BadRegion { index, message };
        for (name, lat) in [("south", b.south), ("north", b.north)] {
            if !(-90.0..=90.0).contains(&lat) {
                return Err(bad(format!(
                    "{name} edge {lat} is not a latitude: expected -90 to 90 degrees"
                )));
            }
        }
        for (name, lon) in [("west", b.west), ("east", b.east)] {
            if !(lon.is_finite() && (-180.0..=360.0).contains(&lon)) {
                return Err(bad(format!(
                    "{name} edge {lon} must be a finite number of degrees within -180 to 360"
                )));
            }
        }
        if b.south > b.north {
            return Err(bad(format!(
                "the southern edge ({}) lies north of the northern edge ({}): swap them",
                b.south, b.north
            )));
        }
        Ok(())
    }
}

/// A region's rows and columns on one grid.
struct RegionMask {
    label: String,
    rows: Vec<usize>,
    cols: Vec<usize>,
}

fn region_masks(
    regions: &[Region],
    grid: &crate::model::Grid,
) -> Result<Vec<RegionMask>, VerifyError> {
    let regions = if regions.is_empty() {
        Region::standard()
    } else {
        regions.to_vec()
    };
    regions
        .iter()
        .enumerate()
        .map(|(i, r)| {
            r.validate(i)?;
            Ok(RegionMask {
                label: r.label(),
                rows: (0..grid.rows())
                    .filter(|&k| r.contains_latitude(grid.latitudes[k]))
                    .collect(),
                cols: (0..grid.cols())
                    .filter(|&k| r.contains_longitude(grid.longitudes[k]))
                    .collect(),
            })
        })
        .collect()
}

// ---------------------------------------------------------------------------------------------
// Requests, reports, errors.
// ---------------------------------------------------------------------------------------------

/// What [`verify`] compares.
#[derive(Clone, Debug, Default, PartialEq)]
pub struct VerifyRequest {
    /// Heights and thicknesses to score; empty means the geopotential height on every
    /// isobaric level the two cycles share (or of the isobaric one, when the other is on
    /// hybrid levels).
    pub items: Vec<Quantity>,
    /// Regions; empty means [`Region::standard`].
    pub regions: Vec<Region>,
    /// Forecast member (0 for a deterministic forecast).
    pub member: usize,
    /// Analysis member (0 for a deterministic analysis).
    pub analysis_member: usize,
    /// Forecast lead time to verify, seconds; `None` takes the forecast step valid at the
    /// analysis time.
    pub lead_time_s: Option<i64>,
    /// Analysis time step (by its lead or valid time); `None` takes the first analysis step
    /// at whose valid time the forecast has a step.
    pub analysis_time: Option<TimeSelector>,
    /// Keep points where either side is below ground (extrapolated); left out by default.
    pub include_below_ground: bool,
    /// Allow pressures outside a cycle's levels (extrapolated, as in the queries).
    pub allow_extrapolation: bool,
}

/// What [`consistency`] compares.
#[derive(Clone, Debug, Default, PartialEq)]
pub struct ConsistencyRequest {
    /// Heights and thicknesses to score, on the file's isobaric levels; empty means the
    /// height on every level (every model level of a hybrid file).
    pub items: Vec<Quantity>,
    /// Regions; empty means [`Region::standard`].
    pub regions: Vec<Region>,
    /// Member.
    pub member: usize,
    /// Time step (by lead or valid time); `None` takes the first.
    pub time: Option<TimeSelector>,
    /// Keep points where the level is below ground (extrapolated); left out by default.
    pub include_below_ground: bool,
}

/// Where the truth of a row comes from.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum TruthSource {
    /// The geopotential height the analysis file itself carries.
    FileHeights,
    /// Heights computed here from the analysis' temperature and humidity.
    Computed,
    /// Report level only: some rows use file heights, others computed heights.
    Mixed,
}

/// Which comparison a report holds.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum ReportKind {
    /// A forecast against an analysis valid at the same time ([`verify`]).
    ForecastVsAnalysis,
    /// A file's computed heights against its own heights ([`consistency`]).
    Consistency,
}

/// Scores of one item over one region.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct ScoreRow {
    /// Pressure of a height item, hPa.
    pub level_hpa: Option<f64>,
    /// Bottom of a thickness item, hPa.
    pub layer_bottom_hpa: Option<f64>,
    /// Top of a thickness item, hPa.
    pub layer_top_hpa: Option<f64>,
    /// Model level (bottom-up index) of a hybrid file's consistency row.
    pub model_level: Option<usize>,
    /// Region label ([`Region::label`]).
    pub region: String,
    /// Where the truth comes from.
    pub truth_source: TruthSource,
    /// The scores (flattened into the row when serialised).
    #[serde(flatten)]
    pub scores: Scores,
    /// Points of the region left out because either side is below ground there.
    pub below_ground_excluded: usize,
}

/// The outcome of [`verify`] or [`consistency`].
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct VerifyReport {
    /// Which comparison this is.
    pub kind: ReportKind,
    /// Forecast cycle id (the file's own id for a consistency check).
    pub forecast_id: String,
    /// Analysis cycle id (the same file for a consistency check).
    pub analysis_id: String,
    /// Forecast member.
    pub member: usize,
    /// Analysis member.
    pub analysis_member: usize,
    /// Forecast reference time, RFC 3339, when the file gives one.
    pub reference_time: Option<String>,
    /// Lead time of the forecast step, seconds.
    pub lead_time_s: i64,
    /// Valid time, RFC 3339, when known.
    pub valid_time: Option<String>,
    /// Where the truth comes from (`mixed` when rows differ).
    pub truth_source: TruthSource,
    /// True when the forecast was interpolated to the analysis grid.
    pub regridded: bool,
    /// True when below-ground points were kept.
    pub included_below_ground: bool,
    /// What was decided along the way, in sentences.
    pub notes: Vec<String>,
    /// One row per item and region, items in request order, regions in request order.
    pub rows: Vec<ScoreRow>,
}

/// Why a verification cannot be done. Every message names the file(s) or request field.
#[derive(Debug, thiserror::Error)]
pub enum VerifyError {
    /// No forecast step is valid at the analysis time asked for.
    #[error("forecast '{forecast}' and analysis '{analysis}' share no valid time: {message}")]
    TimeMismatch {
        /// Forecast id.
        forecast: String,
        /// Analysis id.
        analysis: String,
        /// The valid times each offers, or why they are unknown.
        message: String,
    },
    /// A requested lead or valid time is not in a file.
    #[error("'{file}': {message}")]
    TimeNotFound {
        /// Cycle id.
        file: String,
        /// What was asked for and what is available.
        message: String,
    },
    /// A member that the file does not have.
    #[error("member {member} is not in '{file}', which has {members} member(s)")]
    MemberNotFound {
        /// Cycle id.
        file: String,
        /// The member asked for.
        member: usize,
        /// Members in the file.
        members: usize,
    },
    /// The consistency check needs the file's own heights.
    #[error("'{file}' carries no geopotential height of its own: the consistency check compares the heights computed here with the file's")]
    NoFileHeights {
        /// Cycle id.
        file: String,
    },
    /// A consistency item that is not on the file's levels (its own heights exist only there).
    #[error("items[{index}] ({item}) is not on the isobaric levels of '{file}': the file's own heights exist only on its levels")]
    ItemNotOnLevels {
        /// Cycle id.
        file: String,
        /// Index of the item in the request.
        index: usize,
        /// The item, in hPa.
        item: String,
    },
    /// No items were given and none can be chosen.
    #[error("no items given, and '{forecast}' and '{analysis}' share no isobaric levels to default to: name the heights or layers to verify")]
    NoDefaultItems {
        /// Forecast id.
        forecast: String,
        /// Analysis id.
        analysis: String,
    },
    /// A malformed region.
    #[error("regions[{index}]: {message}")]
    BadRegion {
        /// Index of the region in the request.
        index: usize,
        /// What is wrong.
        message: String,
    },
    /// A quantity could not be answered on a cycle.
    #[error("'{file}': {source}")]
    Query {
        /// Cycle id.
        file: String,
        /// The query's own error (naming the request field).
        #[source]
        source: QueryError,
    },
}

// ---------------------------------------------------------------------------------------------
// Shared helpers.
// ---------------------------------------------------------------------------------------------

fn hpa(p_pa: f64) -> f64 {
    p_pa / 100.0
}

fn isobaric_levels(lc: &LoadedCycle) -> Option<&[f64]> {
    match &lc.cycle.vertical {
        Vertical::Isobaric { pressure_pa } => Some(pressure_pa),
        Vertical::Hybrid { .. } => None,
    }
}

fn level_index(levels: &[f64], p: f64) -> Option<usize> {
    levels
        .iter()
        .position(|&l| (p - l).abs() <= ON_LEVEL_RELATIVE * l.abs())
}

fn item_label(q: &Quantity) -> String {
    match q {
        Quantity::GeopotentialHeight { pressure_pa } => {
            format!("geopotential height at {} hPa", hpa(*pressure_pa))
        }
        Quantity::Thickness(layer) => format!("thickness {} hPa", layer.label_hpa()),
    }
}

fn check_member(lc: &LoadedCycle, member: usize) -> Result<(), VerifyError> {
    if member >= lc.cycle.members {
        return Err(VerifyError::MemberNotFound {
            file: lc.id.clone(),
            member,
            members: lc.cycle.members,
        });
    }
    Ok(())
}

fn query_error(lc: &LoadedCycle) -> impl Fn(QueryError) -> VerifyError + '_ {
    move |source| VerifyError::Query {
        file: lc.id.clone(),
        source,
    }
}

fn valid_times_text(lc: &LoadedCycle) -> String {
    let times: Vec<String> = (0..lc.cycle.lead_times_s.len())
        .map(|t| match lc.valid_time_unix_s(t) {
            Some(v) => format_rfc3339_utc(v),
            None => format!("lead {} s", lc.cycle.lead_times_s[t]),
        })
        .collect();
    times.join(", ")
}

/// Index of the time step a selector names.
fn resolve_time(lc: &LoadedCycle, sel: &TimeSelector) -> Result<usize, VerifyError> {
    let leads = &lc.cycle.lead_times_s;
    let not_found = |message: String| VerifyError::TimeNotFound {
        file: lc.id.clone(),
        message,
    };
    match *sel {
        TimeSelector::LeadTime { seconds } => {
            leads.iter().position(|&l| l == seconds).ok_or_else(|| {
                let list: Vec<String> = leads.iter().map(|l| l.to_string()).collect();
                not_found(format!(
                    "lead time {seconds} s is not in the file: available lead times are {} s",
                    list.join(", ")
                ))
            })
        }
        TimeSelector::ValidTime { unix_seconds } => (0..leads.len())
            .position(|t| lc.valid_time_unix_s(t) == Some(unix_seconds))
            .ok_or_else(|| {
                not_found(format!(
                    "valid time {} is not in the file: available are {}",
                    format_rfc3339_utc(unix_seconds),
                    valid_times_text(lc)
                ))
            }),
    }
}

/// The (forecast, analysis) time steps to compare.
fn match_times(
    forecast: &LoadedCycle,
    analysis: &LoadedCycle,
    request: &VerifyRequest,
) -> Result<(usize, usize), VerifyError> {
    let forecast_steps: Vec<usize> = match request.lead_time_s {
        Some(seconds) => vec![resolve_time(forecast, &TimeSelector::LeadTime { seconds })?],
        None => (0..forecast.cycle.lead_times_s.len()).collect(),
    };
    let analysis_steps: Vec<usize> = match &request.analysis_time {
        Some(sel) => vec![resolve_time(analysis, sel)?],
        None => (0..analysis.cycle.lead_times_s.len()).collect(),
    };
    let mismatch = |message: String| VerifyError::TimeMismatch {
        forecast: forecast.id.clone(),
        analysis: analysis.id.clone(),
        message,
    };
    for lc in [forecast, analysis] {
        if lc.reference_time_unix_s().is_none() {
            return Err(mismatch(format!(
                "'{}' has no reference time, so its valid times are unknown",
                lc.id
            )));
        }
    }
    for &a in &analysis_steps {
        let valid = analysis.valid_time_unix_s(a);
        if let Some(&f) = forecast_steps
            .iter()
            .find(|&&f| valid.is_some() && forecast.valid_time_unix_s(f) == valid)
        {
            return Ok((f, a));
        }
    }
    let list = |lc: &LoadedCycle, steps: &[usize]| -> String {
        let v: Vec<String> = steps
            .iter()
            .map(|&t| {
                lc.valid_time_unix_s(t)
                    .map_or_else(|| "unknown".to_string(), format_rfc3339_utc)
            })
            .collect();
        v.join(", ")
    };
    Err(mismatch(format!(
        "the forecast steps asked for are valid at {}; the analysis steps at {}",
        list(forecast, &forecast_steps),
        list(analysis, &analysis_steps)
    )))
}

/// The hPa description of an item in a row.
#[derive(Clone, Copy)]
struct RowKey {
    level_hpa: Option<f64>,
    layer_bottom_hpa: Option<f64>,
    layer_top_hpa: Option<f64>,
    model_level: Option<usize>,
}

impl RowKey {
    fn of(q: &Quantity) -> Self {
        match *q {
            Quantity::GeopotentialHeight { pressure_pa } => Self {
                level_hpa: Some(hpa(pressure_pa)),
                layer_bottom_hpa: None,
                layer_top_hpa: None,
                model_level: None,
            },
            Quantity::Thickness(layer) => Self {
                level_hpa: None,
                layer_bottom_hpa: Some(hpa(layer.bottom_pa)),
                layer_top_hpa: Some(hpa(layer.top_pa)),
                model_level: None,
            },
        }
    }

    fn model_level(k: usize) -> Self {
        Self {
            level_hpa: None,
            layer_bottom_hpa: None,
            layer_top_hpa: None,
            model_level: Some(k),
        }
    }
}

/// Values and below-ground flags of one item on the scoring grid.
struct Paired {
    forecast: Array2<f32>,
    forecast_flags: Array2<u8>,
    truth: Array2<f32>,
    truth_flags: Array2<u8>,
    source: TruthSource,
}

/// One row per region for one item.
fn score_rows(
    key: RowKey,
    paired: Paired,
    masks: &[RegionMask],
    weights: &[f64],
    include_below_ground: bool,
) -> Vec<ScoreRow> {
    let cols = paired.forecast.ncols();
    // Row-major copies, so that the scoring loops index plain slices.
    let below: Vec<bool> = paired
        .forecast_flags
        .iter()
        .zip(paired.truth_flags.iter())
        .map(|(&a, &b)| (a | b) & FLAG_BELOW_GROUND != 0)
        .collect();
    let forecast: Vec<f32> = paired
        .forecast
        .iter()
        .zip(&below)
        .map(|(&v, &b)| {
            if b && !include_below_ground {
                f32::NAN
            } else {
                v
            }
        })
        .collect();
    let truth: Vec<f32> = paired.truth.iter().copied().collect();
    let (forecast, truth, below) = (&forecast, &truth, &below);
    masks
        .iter()
        .map(|m| {
            let blocks = || {
                m.rows.iter().map(move |&r| {
                    let base = r * cols;
                    let w = weights[r];
                    m.cols.iter().map(move |&c| {
                        (f64::from(forecast[base + c]), f64::from(truth[base + c]), w)
                    })
                })
            };
            let excluded = if include_below_ground {
                0
            } else {
                m.rows
                    .iter()
                    .map(|&r| m.cols.iter().filter(|&&c| below[r * cols + c]).count())
                    .sum()
            };
            ScoreRow {
                level_hpa: key.level_hpa,
                layer_bottom_hpa: key.layer_bottom_hpa,
                layer_top_hpa: key.layer_top_hpa,
                model_level: key.model_level,
                region: m.label.clone(),
                truth_source: paired.source,
                scores: scores_of(blocks),
                below_ground_excluded: excluded,
            }
        })
        .collect()
}

fn empty_region_notes(masks: &[RegionMask]) -> Vec<String> {
    masks
        .iter()
        .filter(|m| m.rows.is_empty() || m.cols.is_empty())
        .map(|m| {
            format!(
                "region {} does not intersect the grid: its rows have count 0",
                m.label
            )
        })
        .collect()
}

fn summary_source(rows: &[ScoreRow]) -> TruthSource {
    let mut it = rows.iter().map(|r| r.truth_source);
    match it.next() {
        None => TruthSource::Computed,
        Some(first) if it.all(|s| s == first) => first,
        Some(_) => TruthSource::Mixed,
    }
}

/// Heights the file carries on level `k` of one (member, time) step.
fn file_level(
    lc: &LoadedCycle,
    member: usize,
    time: usize,
    k: usize,
) -> Option<ArrayView2<'_, f32>> {
    lc.cycle
        .file_heights
        .as_ref()
        .map(|z| z.slice(s![member, time, k, .., ..]))
}

fn below_level(step: &StepHeights, k: usize) -> ArrayView2<'_, u8> {
    step.below_ground.index_axis(Axis(0), k)
}

/// The file's own value of an item (height on a level, or thickness between two levels) with
/// the below-ground flags of the item's bottom level; `None` when the item is not on levels
/// or the file carries no heights.
fn file_truth(
    lc: &LoadedCycle,
    step: &StepHeights,
    q: &Quantity,
    member: usize,
    time: usize,
) -> Option<(Array2<f32>, Array2<u8>)> {
    let levels = isobaric_levels(lc)?;
    match *q {
        Quantity::GeopotentialHeight { pressure_pa } => {
            let k = level_index(levels, pressure_pa)?;
            let z = file_level(lc, member, time, k)?;
            let flags = below_level(step, k).mapv(|b| flag(b != 0));
            Some((z.to_owned(), flags))
        }
        Quantity::Thickness(layer) => {
            let kb = level_index(levels, layer.bottom_pa)?;
            let kt = level_index(levels, layer.top_pa)?;
            let zb = file_level(lc, member, time, kb)?;
            let zt = file_level(lc, member, time, kt)?;
            let thickness = &zt - &zb;
            let flags = below_level(step, kb).mapv(|b| flag(b != 0));
            Some((thickness, flags))
        }
    }
}

fn flag(below: bool) -> u8 {
    if below {
        FLAG_BELOW_GROUND
    } else {
        0
    }
}

fn reference_text(lc: &LoadedCycle) -> Option<String> {
    lc.reference_time_unix_s().map(format_rfc3339_utc)
}

// ---------------------------------------------------------------------------------------------
// Forecast against analysis.
// ---------------------------------------------------------------------------------------------

/// Scores a forecast against an analysis valid at the same time, per item and region.
///
/// The forecast step is the one valid at the analysis time (or the lead time asked for; see
/// [`VerifyRequest`]), and an error names both files when none matches. Truth is the
/// analysis file's own heights where it carries them on the item's levels, else heights
/// computed from its temperature and humidity; a forecast on another grid is interpolated
/// bilinearly to the analysis grid, and the report says so. Items run in parallel.
pub fn verify(
    forecast: &LoadedCycle,
    analysis: &LoadedCycle,
    request: &VerifyRequest,
) -> Result<VerifyReport, VerifyError> {
    check_member(forecast, request.member)?;
    check_member(analysis, request.analysis_member)?;
    let masks = region_masks(&request.regions, &analysis.cycle.grid)?;
    let (ft, at) = match_times(forecast, analysis, request)?;
    let items: Vec<Quantity> = if request.items.is_empty() {
        default_items(forecast, analysis)?
    } else {
        request.items.clone()
    };
    let regrid = (!same_grid(&forecast.cycle.grid, &analysis.cycle.grid))
        .then(|| RegridPlan::new(&forecast.cycle.grid, &analysis.cycle.grid));
    let weights = latitude_weights(&analysis.cycle.grid);
    let (fm, am) = (request.member, request.analysis_member);
    let analysis_step = analysis
        .step_heights(am, at)
        .map_err(query_error(analysis))?;

    let per_item: Vec<Vec<ScoreRow>> = items
        .par_iter()
        .map(|q| {
            let f = grid_field(forecast, q, ft, fm, request.allow_extrapolation)
                .map_err(query_error(forecast))?;
            let (fv, ff) = match &regrid {
                Some(plan) => (
                    plan.apply(f.values.view()),
                    plan.apply_flags(f.flags.view()),
                ),
                None => (f.values, f.flags),
            };
            let (truth, truth_flags, source) = match file_truth(analysis, analysis_step, q, am, at)
            {
                Some((z, fl)) => (z, fl, TruthSource::FileHeights),
                None => {
                    let a = grid_field(analysis, q, at, am, request.allow_extrapolation)
                        .map_err(query_error(analysis))?;
                    (a.values, a.flags, TruthSource::Computed)
                }
            };
            let paired = Paired {
                forecast: fv,
                forecast_flags: ff,
                truth,
                truth_flags,
                source,
            };
            Ok(score_rows(
                RowKey::of(q),
                paired,
                &masks,
                &weights,
                request.include_below_ground,
            ))
        })
        .collect::<Result<_, VerifyError>>()?;
    let rows: Vec<ScoreRow> = per_item.into_iter().flatten().collect();

    let mut notes = Vec::new();
    if let Some(plan) = &regrid {
        notes.push(format!(
            "the forecast grid ({} x {}) differs from the analysis grid ({} x {}): forecast values were interpolated bilinearly to the analysis grid; {} analysis points outside the forecast grid are skipped",
            forecast.cycle.grid.rows(),
            forecast.cycle.grid.cols(),
            analysis.cycle.grid.rows(),
            analysis.cycle.grid.cols(),
            plan.outside()
        ));
    }
    let truth_source = summary_source(&rows);
    notes.push(match truth_source {
        TruthSource::FileHeights => {
            format!("truth is the geopotential height that '{}' carries", analysis.id)
        }
        TruthSource::Computed => format!(
            "truth is heights computed here from the temperature and humidity of '{}'",
            analysis.id
        ),
        TruthSource::Mixed => format!(
            "truth is the geopotential height that '{}' carries on its levels, and heights computed from its temperature and humidity elsewhere (see each row)",
            analysis.id
        ),
    });
    notes.extend(empty_region_notes(&masks));
    Ok(VerifyReport {
        kind: ReportKind::ForecastVsAnalysis,
        forecast_id: forecast.id.clone(),
        analysis_id: analysis.id.clone(),
        member: fm,
        analysis_member: am,
        reference_time: reference_text(forecast),
        lead_time_s: forecast.cycle.lead_times_s[ft],
        valid_time: forecast.valid_time_unix_s(ft).map(format_rfc3339_utc),
        truth_source,
        regridded: regrid.is_some(),
        included_below_ground: request.include_below_ground,
        notes,
        rows,
    })
}

/// Heights on the isobaric levels both cycles share (or of the isobaric one).
fn default_items(
    forecast: &LoadedCycle,
    analysis: &LoadedCycle,
) -> Result<Vec<Quantity>, VerifyError> {
    let levels: Vec<f64> = match (isobaric_levels(forecast), isobaric_levels(analysis)) {
        (Some(f), Some(a)) => f
            .iter()
            .copied()
            .filter(|&p| level_index(a, p).is_some())
            .collect(),
        (Some(only), None) | (None, Some(only)) => only.to_vec(),
        (None, None) => Vec::new(),
    };
    if levels.is_empty() {
        return Err(VerifyError::NoDefaultItems {
            forecast: forecast.id.clone(),
            analysis: analysis.id.clone(),
        });
    }
    Ok(levels
        .into_iter()
        .map(|pressure_pa| Quantity::GeopotentialHeight { pressure_pa })
        .collect())
}

// ---------------------------------------------------------------------------------------------
// Consistency of one file.
// ---------------------------------------------------------------------------------------------

/// Scores the heights computed here ([`LoadedCycle::heights`]) against the heights the file
/// itself carries, per item and region (the same scores as [`verify`], with the computed
/// heights in the forecast's place).
///
/// Items must lie on the file's isobaric levels (its own heights exist only there); with no
/// items, every level is scored (every model level of a hybrid file). Below-ground points are
/// left out unless [`ConsistencyRequest::include_below_ground`] is set.
pub fn consistency(
    lc: &LoadedCycle,
    request: &ConsistencyRequest,
) -> Result<VerifyReport, VerifyError> {
    let Some(file_z) = lc.cycle.file_heights.as_ref() else {
        return Err(VerifyError::NoFileHeights {
            file: lc.id.clone(),
        });
    };
    check_member(lc, request.member)?;
    let masks = region_masks(&request.regions, &lc.cycle.grid)?;
    let time = match &request.time {
        Some(sel) => resolve_time(lc, sel)?,
        None => 0,
    };
    if time >= lc.cycle.lead_times_s.len() {
        return Err(VerifyError::TimeNotFound {
            file: lc.id.clone(),
            message: "the file has no time step".to_string(),
        });
    }
    let m = request.member;
    let step = lc.step_heights(m, time).map_err(query_error(lc))?;
    let weights = latitude_weights(&lc.cycle.grid);
    let levels = isobaric_levels(lc);

    /// One consistency item.
    enum Item {
        Quantity(Quantity),
        ModelLevel(usize),
    }
    let items: Vec<Item> = if request.items.is_empty() {
        match levels {
            Some(p) => p
                .iter()
                .map(|&pressure_pa| Item::Quantity(Quantity::GeopotentialHeight { pressure_pa }))
                .collect(),
            None => (0..lc.cycle.vertical.levels())
                .map(Item::ModelLevel)
                .collect(),
        }
    } else {
        for (index, q) in request.items.iter().enumerate() {
            let on_levels = levels.is_some_and(|p| match *q {
                Quantity::GeopotentialHeight { pressure_pa } => {
                    level_index(p, pressure_pa).is_some()
                }
                Quantity::Thickness(layer) => {
                    level_index(p, layer.bottom_pa).is_some()
                        && level_index(p, layer.top_pa).is_some()
                }
            });
            if !on_levels {
                return Err(VerifyError::ItemNotOnLevels {
                    file: lc.id.clone(),
                    index,
                    item: item_label(q),
                });
            }
        }
        request.items.iter().copied().map(Item::Quantity).collect()
    };

    let per_item: Vec<Vec<ScoreRow>> = items
        .par_iter()
        .map(|item| {
            let (key, paired) = match *item {
                Item::Quantity(q) => {
                    let g = grid_field(lc, &q, time, m, false).map_err(query_error(lc))?;
                    let (truth, truth_flags) =
                        file_truth(lc, step, &q, m, time).ok_or_else(|| {
                            VerifyError::NoFileHeights {
                                file: lc.id.clone(),
                            }
                        })?;
                    (
                        RowKey::of(&q),
                        Paired {
                            forecast: g.values,
                            forecast_flags: g.flags,
                            truth,
                            truth_flags,
                            source: TruthSource::FileHeights,
                        },
                    )
                }
                Item::ModelLevel(k) => {
                    let flags = below_level(step, k).mapv(|b| flag(b != 0));
                    (
                        RowKey::model_level(k),
                        Paired {
                            forecast: step.geopotential_height.index_axis(Axis(0), k).to_owned(),
                            forecast_flags: flags.clone(),
                            truth: file_z.slice(s![m, time, k, .., ..]).to_owned(),
                            truth_flags: flags,
                            source: TruthSource::FileHeights,
                        },
                    )
                }
            };
            Ok(score_rows(
                key,
                paired,
                &masks,
                &weights,
                request.include_below_ground,
            ))
        })
        .collect::<Result<_, VerifyError>>()?;
    let rows: Vec<ScoreRow> = per_item.into_iter().flatten().collect();

    let mut notes = vec![format!(
        "heights computed here from the temperature and humidity of '{}' against the geopotential height the file carries",
        lc.id
    )];
    if lc.cycle.surface.is_none() {
        notes.push(format!(
            "'{}' has no surface fields: columns are tied to the ground by the {:?} reference, so heights at that level agree by construction; thickness shows the physics",
            lc.id, lc.config.no_surface_reference
        ));
    }
    notes.extend(empty_region_notes(&masks));
    Ok(VerifyReport {
        kind: ReportKind::Consistency,
        forecast_id: lc.id.clone(),
        analysis_id: lc.id.clone(),
        member: m,
        analysis_member: m,
        reference_time: reference_text(lc),
        lead_time_s: lc.cycle.lead_times_s[time],
        valid_time: lc.valid_time_unix_s(time).map(format_rfc3339_utc),
        truth_source: TruthSource::FileHeights,
        regridded: false,
        included_below_ground: request.include_below_ground,
        notes,
        rows,
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn compensated_sum_keeps_small_terms_beside_a_large_one() {
        // 1e16 + 1 - 1e16 = 1 exactly in real arithmetic; a naive f64 sum gives 0.
        let mut s = CompensatedSum::default();
        for x in [1e16, 1.0, -1e16] {
            s.add(x);
        }
        assert_eq!(s.value(), 1.0);
    }

    #[test]
    fn the_twenty_degree_rows_count_in_both_adjacent_regions() {
        // Boundary rule stated in the module documentation (WMO practice, from memory).
        assert!(Region::NorthernExtratropics.contains_latitude(20.0));
        assert!(Region::Tropics.contains_latitude(20.0));
        assert!(Region::Tropics.contains_latitude(-20.0));
        assert!(Region::SouthernExtratropics.contains_latitude(-20.0));
        assert!(!Region::Tropics.contains_latitude(20.5));
        assert!(!Region::NorthernExtratropics.contains_latitude(19.5));
    }

    #[test]
    fn a_box_across_the_antimeridian_holds_both_sides() {
        let b = Region::Box(BoundingBox {
            south: -10.0,
            north: 10.0,
            west: 170.0,
            east: -170.0,
        });
        for lon in [170.0, 180.0, -180.0, 190.0, -170.0] {
            assert!(b.contains_longitude(lon), "{lon}");
        }
        for lon in [0.0, 169.0, -169.0, 200.0] {
            assert!(!b.contains_longitude(lon), "{lon}");
        }
    }

    #[test]
    fn scores_of_a_constant_offset_and_of_nothing() {
        // e = 2 everywhere: bias = rmse = mae = 2 and sd = 0 by the definitions.
        let f = [1.0f32, 2.0, 4.0, f32::NAN];
        let t = [-1.0f32, 0.0, 2.0, 5.0];
        let w = [1.0, 0.5, 0.25, 1.0];
        let s = weighted_scores(&f, &t, &w);
        assert_eq!(s.count, 3);
        assert!((s.weight_sum - 1.75).abs() < 1e-15);
        assert!((s.bias_m - 2.0).abs() < 1e-12 && (s.rmse_m - 2.0).abs() < 1e-12);
        assert!((s.mae_m - 2.0).abs() < 1e-12 && s.sd_m.abs() < 1e-12);
        assert!((s.corr - 1.0).abs() < 1e-12);
        let none = weighted_scores(&[f32::NAN], &[1.0], &[1.0]);
        assert_eq!(none.count, 0);
        assert!(none.bias_m.is_nan() && none.corr.is_nan());
    }
}
