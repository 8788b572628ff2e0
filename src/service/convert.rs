//! Conversions at the edge: wire types (`pb`) to the domain's queries and back.
//!
//! Wire to domain is `TryFrom`, refusing what the wire format allows but the domain cannot
//! mean (an unset `oneof`, a valid time that is not RFC 3339, an unknown enum value) with a
//! [`FieldError`] that names the request field as a dotted path. Range checks (latitudes,
//! pressures, layer order, stride, member) are the query module's: it validates every
//! request the same way whichever door it came in by. Domain to wire is `From`.
//!
//! [`FieldError`]: crate::service::convert::FieldError

use std::time::{SystemTime, UNIX_EPOCH};

use crate::ingest::time::{format_rfc3339_utc, parse_date_time};
use crate::model::{Cycle, Layer, Vertical};
use crate::pb;
use crate::query::{
    AreaAnswer, AreaQuery, BoundingBox, Interpolation, LoadedCycle, PointSeries, PositionQuery,
    Profile, ProfileQuery, Quantity, TimeSelector, TrajectoryQuery, TrajectorySample, Waypoint,
};
use crate::store::{Eviction, LoadFailure, Snapshot};

/// A request field the domain cannot take, named as a dotted path into the request
/// (`quantities[2]`, `time.valid_time`, `waypoints[0].valid_time`).
#[derive(Clone, Debug, PartialEq, Eq, thiserror::Error)]
#[error("{field}: {message}")]
pub struct FieldError {
    /// Dotted path of the field in the request.
    pub field: String,
    /// What is wrong, lowercase.
    pub message: String,
}

impl FieldError {
    /// A new error on `field`.
    pub fn new(field: impl Into<String>, message: impl Into<String>) -> Self {
        Self {
            field: field.into(),
            message: message.into(),
        }
    }

    /// The same error seen from the enclosing message: `prefix.field`.
    pub fn within(self, prefix: &str) -> Self {
        let field = if self.field.is_empty() {
            prefix.to_string()
        } else {
            format!("{prefix}.{}", self.field)
        };
        Self { field, ..self }
    }
}

/// A required message field that was not set.
pub fn missing(field: &str) -> FieldError {
    FieldError::new(field, "required but not set")
}

/// Seconds since the Unix epoch as RFC 3339 UTC; empty for `None` (no reference time).
pub fn rfc3339(unix_s: Option<i64>) -> String {
    unix_s.map(format_rfc3339_utc).unwrap_or_default()
}

/// A system time as RFC 3339 UTC, whole seconds.
pub fn system_time_rfc3339(t: SystemTime) -> String {
    let s = match t.duration_since(UNIX_EPOCH) {
        Ok(d) => i64::try_from(d.as_secs()).unwrap_or(i64::MAX),
        // Before 1970 (a badly set clock): count backwards.
        Err(e) => -i64::try_from(e.duration().as_secs()).unwrap_or(i64::MAX),
    };
    format_rfc3339_utc(s)
}

/// Parses an RFC 3339 valid time (a date alone means midnight UTC) to Unix seconds.
pub fn parse_valid_time(field: &str, text: &str) -> Result<i64, FieldError> {
    if text.trim().is_empty() {
        return Err(missing(field));
    }
    parse_date_time(text).ok_or_else(|| {
        FieldError::new(
            field,
            format!("'{text}' is not an RFC 3339 time such as 2031-01-14T06:00:00Z"),
        )
    })
}

impl TryFrom<&pb::TimeSelection> for TimeSelector {
    type Error = FieldError;
    fn try_from(t: &pb::TimeSelection) -> Result<Self, FieldError> {
        use pb::time_selection::Kind;
        match &t.kind {
            Some(Kind::LeadTimeS(s)) => Ok(TimeSelector::LeadTime { seconds: *s }),
            Some(Kind::ValidTime(text)) => Ok(TimeSelector::ValidTime {
                unix_seconds: parse_valid_time("valid_time", text)?,
            }),
            None => Err(FieldError::new("", "set lead_time_s or valid_time")),
        }
    }
}

/// A required time selection, named `field` in the request.
fn time(field: &str, t: Option<&pb::TimeSelection>) -> Result<TimeSelector, FieldError> {
    let t = t.ok_or_else(|| missing(field))?;
    TimeSelector::try_from(t).map_err(|e| e.within(field))
}

impl TryFrom<&pb::Quantity> for Quantity {
    type Error = FieldError;
    fn try_from(q: &pb::Quantity) -> Result<Self, FieldError> {
        use pb::quantity::Kind;
        match &q.kind {
            Some(Kind::GeopotentialHeight(h)) => Ok(Quantity::GeopotentialHeight {
                pressure_pa: h.pressure_pa,
            }),
            Some(Kind::Thickness(l)) => Ok(Quantity::Thickness(Layer {
                bottom_pa: l.bottom_pa,
                top_pa: l.top_pa,
            })),
            None => Err(FieldError::new("", "set geopotential_height or thickness")),
        }
    }
}

impl From<&Quantity> for pb::Quantity {
    fn from(q: &Quantity) -> Self {
        use pb::quantity::Kind;
        let kind = match *q {
            Quantity::GeopotentialHeight { pressure_pa } => {
                Kind::GeopotentialHeight(pb::HeightAtPressure { pressure_pa })
            }
            Quantity::Thickness(layer) => Kind::Thickness(pb::LayerBounds {
                bottom_pa: layer.bottom_pa,
                top_pa: layer.top_pa,
            }),
        };
        pb::Quantity { kind: Some(kind) }
    }
}

/// The quantities of a request, named `quantities[i]`. Emptiness is the query module's check.
fn quantities(qs: &[pb::Quantity]) -> Result<Vec<Quantity>, FieldError> {
    qs.iter()
        .enumerate()
        .map(|(i, q)| Quantity::try_from(q).map_err(|e| e.within(&format!("quantities[{i}]"))))
        .collect()
}

impl pb::BoundingBox {
    /// The whole globe: every grid point of a cycle's domain, global or not.
    pub fn whole_globe() -> Self {
        pb::BoundingBox {
            south_deg: -90.0,
            north_deg: 90.0,
            west_deg: -180.0,
            east_deg: 180.0,
        }
    }
}

impl From<&pb::BoundingBox> for BoundingBox {
    fn from(b: &pb::BoundingBox) -> Self {
        BoundingBox {
            south: b.south_deg,
            north: b.north_deg,
            west: b.west_deg,
            east: b.east_deg,
        }
    }
}

impl From<pb::Interpolation> for Interpolation {
    fn from(i: pb::Interpolation) -> Self {
        match i {
            pb::Interpolation::Bilinear => Interpolation::Bilinear,
            pb::Interpolation::Nearest => Interpolation::Nearest,
        }
    }
}

/// An interpolation enum from its wire number, refusing numbers this version does not know
/// (rather than silently answering with the default).
fn interpolation(value: i32) -> Result<Interpolation, FieldError> {
    pb::Interpolation::try_from(value)
        .map(Interpolation::from)
        .map_err(|_| {
            FieldError::new(
                "interpolation",
                format!("unknown value {value}: expected INTERPOLATION_BILINEAR (0) or INTERPOLATION_NEAREST (1)"),
            )
        })
}

/// A member index from the wire.
fn member(m: u32) -> usize {
    usize::try_from(m).unwrap_or(usize::MAX)
}

impl TryFrom<&pb::AreaRequest> for AreaQuery {
    type Error = FieldError;
    fn try_from(r: &pb::AreaRequest) -> Result<Self, FieldError> {
        let bbox = r.bbox.as_ref().ok_or_else(|| missing("bbox"))?;
        Ok(AreaQuery {
            quantities: quantities(&r.quantities)?,
            time: time("time", r.time.as_ref())?,
            member: member(r.member),
            bbox: BoundingBox::from(bbox),
            // Absent means every row and column; an explicit 0 goes on to be refused.
            stride: r
                .stride
                .map_or(1, |s| usize::try_from(s).unwrap_or(usize::MAX)),
            allow_extrapolation: r.allow_extrapolation,
        })
    }
}

impl TryFrom<&pb::PositionRequest> for PositionQuery {
    type Error = FieldError;
    fn try_from(r: &pb::PositionRequest) -> Result<Self, FieldError> {
        let times = r
            .times
            .iter()
            .enumerate()
            .map(|(i, t)| TimeSelector::try_from(t).map_err(|e| e.within(&format!("times[{i}]"))))
            .collect::<Result<Vec<_>, _>>()?;
        Ok(PositionQuery {
            points: r
                .points
                .iter()
                .map(|p| (p.latitude_deg, p.longitude_deg))
                .collect(),
            quantities: quantities(&r.quantities)?,
            times,
            member: member(r.member),
            interpolation: interpolation(r.interpolation)?,
            allow_extrapolation: r.allow_extrapolation,
        })
    }
}

impl TryFrom<&pb::ProfileRequest> for ProfileQuery {
    type Error = FieldError;
    fn try_from(r: &pb::ProfileRequest) -> Result<Self, FieldError> {
        let point = r.point.as_ref().ok_or_else(|| missing("point"))?;
        Ok(ProfileQuery {
            latitude: point.latitude_deg,
            longitude: point.longitude_deg,
            time: time("time", r.time.as_ref())?,
            member: member(r.member),
            interpolation: interpolation(r.interpolation)?,
        })
    }
}

impl TryFrom<&pb::TrajectoryRequest> for TrajectoryQuery {
    type Error = FieldError;
    fn try_from(r: &pb::TrajectoryRequest) -> Result<Self, FieldError> {
        let waypoints = r
            .waypoints
            .iter()
            .enumerate()
            .map(|(i, w)| {
                let at = format!("waypoints[{i}]");
                let point = w
                    .point
                    .as_ref()
                    .ok_or_else(|| missing("point").within(&at))?;
                Ok(Waypoint {
                    latitude: point.latitude_deg,
                    longitude: point.longitude_deg,
                    valid_time_unix_s: parse_valid_time("valid_time", &w.valid_time)
                        .map_err(|e| e.within(&at))?,
                })
            })
            .collect::<Result<Vec<_>, FieldError>>()?;
        Ok(TrajectoryQuery {
            waypoints,
            quantities: quantities(&r.quantities)?,
            member: member(r.member),
            interpolation: interpolation(r.interpolation)?,
            allow_extrapolation: r.allow_extrapolation,
        })
    }
}

/// Values and flags of one sample as wire fields.
fn values_and_flags(values: &[f64], flags: &[u8]) -> (Vec<f64>, Vec<u8>) {
    (values.to_vec(), flags.to_vec())
}

/// Rows of an area answer as one wire chunk. `row_offset` is the index of the answer's first
/// row within the whole area; longitudes are included only when `with_longitudes` (the
/// first chunk).
pub fn area_chunk(
    cycle_id: &str,
    answer: AreaAnswer,
    row_offset: usize,
    total_rows: usize,
    with_longitudes: bool,
) -> pb::AreaChunk {
    pb::AreaChunk {
        cycle_id: cycle_id.to_string(),
        lead_time_s: answer.lead_time_s,
        valid_time: rfc3339(answer.valid_time_unix_s),
        row_offset: u32::try_from(row_offset).unwrap_or(u32::MAX),
        total_rows: u32::try_from(total_rows).unwrap_or(u32::MAX),
        latitudes_deg: answer.latitudes,
        longitudes_deg: if with_longitudes {
            answer.longitudes
        } else {
            Vec::new()
        },
        // The values move into the message: no copy of the (often 200 kB) fields.
        fields: answer
            .fields
            .into_iter()
            .map(|f| pb::QuantityValues {
                quantity: Some(pb::Quantity::from(&f.quantity)),
                values: f.values,
                flags: f.flags,
            })
            .collect(),
    }
}

/// A position answer on the wire.
pub fn position_response(
    cycle_id: &str,
    quantities: &[Quantity],
    series: &[PointSeries],
) -> pb::PositionResponse {
    pb::PositionResponse {
        cycle_id: cycle_id.to_string(),
        quantities: quantities.iter().map(pb::Quantity::from).collect(),
        series: series
            .iter()
            .map(|s| pb::PointSeries {
                point: Some(pb::GeoPoint {
                    latitude_deg: s.latitude,
                    longitude_deg: s.longitude,
                }),
                samples: s
                    .samples
                    .iter()
                    .map(|x| {
                        let (values, flags) = values_and_flags(&x.values, &x.flags);
                        pb::PointSample {
                            lead_time_s: x.lead_time_s,
                            valid_time: rfc3339(x.valid_time_unix_s),
                            values,
                            flags,
                        }
                    })
                    .collect(),
            })
            .collect(),
    }
}

/// A profile on the wire.
pub fn profile_response(cycle_id: &str, p: &Profile) -> pb::ProfileResponse {
    pb::ProfileResponse {
        cycle_id: cycle_id.to_string(),
        lead_time_s: p.lead_time_s,
        valid_time: rfc3339(p.valid_time_unix_s),
        point: Some(pb::GeoPoint {
            latitude_deg: p.latitude,
            longitude_deg: p.longitude,
        }),
        surface_pressure_pa: p.surface_pressure_pa,
        surface_height_m: p.surface_height_m,
        levels: p
            .levels
            .iter()
            .map(|l| pb::ProfileLevel {
                pressure_pa: l.pressure_pa,
                temperature_k: l.temperature_k,
                virtual_temperature_k: l.virtual_temperature_k,
                geopotential_height_m: l.geopotential_height_m,
                below_ground: l.below_ground,
            })
            .collect(),
    }
}

/// A trajectory answer on the wire.
pub fn trajectory_response(
    cycle_id: &str,
    quantities: &[Quantity],
    samples: &[TrajectorySample],
) -> pb::TrajectoryResponse {
    pb::TrajectoryResponse {
        cycle_id: cycle_id.to_string(),
        quantities: quantities.iter().map(pb::Quantity::from).collect(),
        samples: samples
            .iter()
            .map(|s| {
                let (values, flags) = values_and_flags(&s.values, &s.flags);
                pb::TrajectorySample {
                    waypoint: Some(pb::Waypoint {
                        point: Some(pb::GeoPoint {
                            latitude_deg: s.waypoint.latitude,
                            longitude_deg: s.waypoint.longitude,
                        }),
                        valid_time: format_rfc3339_utc(s.waypoint.valid_time_unix_s),
                    }),
                    values,
                    flags,
                }
            })
            .collect(),
    }
}

impl From<&Vertical> for pb::VerticalAxis {
    fn from(v: &Vertical) -> Self {
        use pb::vertical_axis::Kind;
        let kind = match v {
            Vertical::Isobaric { pressure_pa } => Kind::Isobaric(pb::IsobaricLevels {
                pressure_pa: pressure_pa.clone(),
            }),
            Vertical::Hybrid { a_half_pa, b_half } => Kind::Hybrid(pb::HybridLevels {
                full_levels: u32::try_from(v.levels()).unwrap_or(u32::MAX),
                a_half_pa: a_half_pa.clone(),
                b_half: b_half.clone(),
            }),
        };
        pb::VerticalAxis { kind: Some(kind) }
    }
}

/// What a client needs to know about a cycle: everything but the values.
pub fn cycle_description(lc: &LoadedCycle) -> pb::CycleDescription {
    let c: &Cycle = &lc.cycle;
    pb::CycleDescription {
        source: c.source.display().to_string(),
        reference_time: rfc3339(lc.reference_time_unix_s()),
        lead_times_s: c.lead_times_s.clone(),
        members: u32::try_from(c.members).unwrap_or(u32::MAX),
        grid: Some(pb::LatLonGrid {
            latitudes_deg: c.grid.latitudes.clone(),
            longitudes_deg: c.grid.longitudes.clone(),
        }),
        vertical: Some(pb::VerticalAxis::from(&c.vertical)),
        variables: c
            .variables
            .iter()
            .map(|(role, name)| format!("{role}={name}"))
            .collect(),
        humidity: c
            .humidity
            .as_ref()
            .map_or("none", |h| h.kind.standard_name())
            .to_string(),
        from_surface: c.surface.is_some(),
        constants: Some(pb::PhysicalConstants {
            dry_air_gas_constant: c.constants.dry_air_gas_constant,
            standard_gravity: c.constants.standard_gravity,
            molar_mass_ratio: c.constants.molar_mass_ratio,
        }),
        notes: c.notes.clone(),
        valid_times: match lc.reference_time_unix_s() {
            Some(_) => (0..c.lead_times_s.len())
                .map(|t| rfc3339(lc.valid_time_unix_s(t)))
                .collect(),
            None => Vec::new(),
        },
    }
}

impl From<&LoadedCycle> for pb::CycleEntry {
    fn from(lc: &LoadedCycle) -> Self {
        pb::CycleEntry {
            id: lc.id.clone(),
            description: Some(cycle_description(lc)),
            loaded_at: system_time_rfc3339(lc.loaded_at),
            load_s: lc.load_seconds,
            memory_bytes: u64::try_from(lc.bytes).unwrap_or(u64::MAX),
            heights_ready: lc.heights.ready_steps() == lc.heights.steps(),
        }
    }
}

impl From<&LoadFailure> for pb::LoadFailure {
    fn from(f: &LoadFailure) -> Self {
        pb::LoadFailure {
            source: f.path.display().to_string(),
            error: f.error.clone(),
            failed_at: system_time_rfc3339(f.at),
        }
    }
}

impl From<&Eviction> for pb::CycleEviction {
    fn from(e: &Eviction) -> Self {
        pb::CycleEviction {
            id: e.id.clone(),
            reason: e.reason.clone(),
            evicted_at: system_time_rfc3339(e.at),
        }
    }
}

impl From<&Snapshot> for pb::CatalogueResponse {
    fn from(s: &Snapshot) -> Self {
        pb::CatalogueResponse {
            cycles: s
                .cycles
                .iter()
                .map(|c| pb::CycleEntry::from(&**c))
                .collect(),
            failures: s.failures.iter().map(pb::LoadFailure::from).collect(),
            evictions: s.evictions.iter().map(pb::CycleEviction::from).collect(),
            generation: s.generation,
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn time_selection_converts_lead_and_valid_times() {
        let lead = pb::TimeSelection {
            kind: Some(pb::time_selection::Kind::LeadTimeS(21_600)),
        };
        assert_eq!(
            TimeSelector::try_from(&lead),
            Ok(TimeSelector::LeadTime { seconds: 21_600 })
        );
        // 2031-01-14T06:00:00Z: 22293 days after 1970-01-01 (proleptic Gregorian calendar,
        // computed by hand: 61 years with 15 leap days, plus 13 days) times 86400, plus 6 h.
        let valid = pb::TimeSelection {
            kind: Some(pb::time_selection::Kind::ValidTime(
                "2031-01-14T07:00:00+01:00".into(),
            )),
        };
        assert_eq!(
            TimeSelector::try_from(&valid),
            Ok(TimeSelector::ValidTime {
                unix_seconds: 22_293 * 86_400 + 6 * 3600
            })
        );
        let bad = pb::TimeSelection {
            kind: Some(pb::time_selection::Kind::ValidTime("tomorrow".into())),
        };
        let err = time("time", Some(&bad)).unwrap_err();
        assert_eq!(err.field, "time.valid_time");
        let unset = pb::TimeSelection { kind: None };
        assert_eq!(
            time("times[2]", Some(&unset)).unwrap_err().field,
            "times[2]"
        );
        assert_eq!(time("time", None).unwrap_err().field, "time");
    }

    #[test]
    fn quantities_round_trip_and_name_an_unset_entry() {
        let qs = vec![
            Quantity::GeopotentialHeight {
                pressure_pa: 50_000.0,
            },
            Quantity::Thickness(Layer {
                bottom_pa: 100_000.0,
                top_pa: 50_000.0,
            }),
        ];
        let wire: Vec<pb::Quantity> = qs.iter().map(pb::Quantity::from).collect();
        assert_eq!(quantities(&wire), Ok(qs));
        let with_unset = vec![wire[0], pb::Quantity { kind: None }];
        assert_eq!(quantities(&with_unset).unwrap_err().field, "quantities[1]");
    }

    #[test]
    fn area_request_defaults_and_required_fields() {
        let mut r = pb::AreaRequest {
            time: Some(pb::TimeSelection {
                kind: Some(pb::time_selection::Kind::LeadTimeS(0)),
            }),
            bbox: Some(pb::BoundingBox {
                south_deg: 50.0,
                north_deg: 55.0,
                west_deg: 170.0,
                east_deg: -170.0,
            }),
            ..Default::default()
        };
        let q = AreaQuery::try_from(&r).unwrap();
        assert_eq!(q.stride, 1, "an absent stride keeps every point");
        assert_eq!(q.bbox.west, 170.0);
        assert_eq!(q.bbox.east, -170.0);
        r.stride = Some(0);
        assert_eq!(AreaQuery::try_from(&r).unwrap().stride, 0);
        r.bbox = None;
        assert_eq!(AreaQuery::try_from(&r).unwrap_err().field, "bbox");
    }

    #[test]
    fn unknown_interpolation_and_bad_waypoint_times_are_named() {
        assert_eq!(interpolation(1), Ok(Interpolation::Nearest));
        assert_eq!(interpolation(7).unwrap_err().field, "interpolation");
        let r = pb::TrajectoryRequest {
            waypoints: vec![
                pb::Waypoint {
                    point: Some(pb::GeoPoint::default()),
                    valid_time: "2031-01-14T00:00:00Z".into(),
                },
                pb::Waypoint {
                    point: Some(pb::GeoPoint::default()),
                    valid_time: "".into(),
                },
            ],
            ..Default::default()
        };
        let err = TrajectoryQuery::try_from(&r).unwrap_err();
        assert_eq!(err.field, "waypoints[1].valid_time");
    }

    #[test]
    fn system_times_format_as_rfc3339() {
        // 1e9 s after the epoch is 2001-09-09T01:46:40Z (a widely quoted instant, from memory).
        let t = UNIX_EPOCH + std::time::Duration::from_secs(1_000_000_000);
        assert_eq!(system_time_rfc3339(t), "2001-09-09T01:46:40Z");
    }
}
