//! The one place where errors become `tonic::Status`: every code the service answers with,
//! and the rule that a message starts with the request field at fault, spelled as the wire
//! names it.
//!
//! Client mistakes never map to `UNKNOWN` or `INTERNAL`; `INTERNAL` is kept for a failure of
//! the server itself (a computation that panicked).

use std::time::Duration;

use tonic::{Code, Status};

use super::auth::AuthFailure;
use super::convert::FieldError;
use crate::products::ProductError;
use crate::query::QueryError;

/// Which request a domain error came from, to spell its field names as that request's wire
/// message does.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Rpc {
    /// `QueryArea`.
    Area,
    /// `QueryPosition`.
    Position,
    /// `QueryProfile`.
    Profile,
    /// `QueryTrajectory`.
    Trajectory,
}

/// A query error as a status, its field renamed to the wire's spelling.
pub fn query_error(e: QueryError, rpc: Rpc) -> Status {
    let (code, field, message) = match e {
        QueryError::InvalidArgument { field, message } => (Code::InvalidArgument, field, message),
        QueryError::NotFound { field, message } => (Code::NotFound, field, message),
        QueryError::OutOfRange { field, message } => (Code::OutOfRange, field, message),
        QueryError::ResourceExhausted { field, message } => {
            (Code::ResourceExhausted, field, message)
        }
        QueryError::HeightsUnavailable { detail } => return Status::internal(detail),
    };
    Status::new(code, format!("{}: {message}", wire_field(&field, rpc)))
}

/// Spells a domain field path (`bbox.south`, `points[3].latitude`) as the wire request
/// spells it (`bbox.south_deg`, `points[3].latitude_deg`): the wire puts units in names and
/// nests positions in `GeoPoint` and times in `TimeSelection`.
pub fn wire_field(domain: &str, rpc: Rpc) -> String {
    if domain.is_empty() {
        // The query's own position (a profile's point outside the grid).
        return match rpc {
            Rpc::Profile => "point".to_string(),
            _ => "request".to_string(),
        };
    }
    let segments: Vec<&str> = domain.split('.').collect();
    let mut out: Vec<String> = Vec::with_capacity(segments.len() + 1);
    for (i, seg) in segments.iter().enumerate() {
        let (name, index) = match seg.find('[') {
            Some(k) => (&seg[..k], &seg[k..]),
            None => (*seg, ""),
        };
        let parent = if i == 0 { None } else { Some(segments[i - 1]) };
        let top = i == 0;
        let renamed: String = match name {
            "south" | "north" | "west" | "east" if parent == Some("bbox") => {
                format!("{name}_deg")
            }
            "latitude" | "longitude" => {
                // Profile positions and waypoints are nested in a GeoPoint on the wire.
                let nested = (top && rpc == Rpc::Profile)
                    || parent.is_some_and(|p| p.starts_with("waypoints["));
                if nested {
                    format!("point.{name}_deg")
                } else {
                    format!("{name}_deg")
                }
            }
            "valid_time_unix_s" | "valid_time_s" | "valid_time" => {
                if top && rpc != Rpc::Trajectory {
                    "time.valid_time".to_string()
                } else {
                    "valid_time".to_string()
                }
            }
            "lead_time" | "lead_time_s" => {
                if top && matches!(rpc, Rpc::Area | Rpc::Profile) {
                    "time.lead_time_s".to_string()
                } else {
                    "lead_time_s".to_string()
                }
            }
            "seconds" => "lead_time_s".to_string(),
            "unix_seconds" => "valid_time".to_string(),
            other => other.to_string(),
        };
        out.push(format!("{renamed}{index}"));
    }
    out.join(".")
}

impl From<FieldError> for Status {
    fn from(e: FieldError) -> Self {
        Status::invalid_argument(e.to_string())
    }
}

impl From<AuthFailure> for Status {
    fn from(e: AuthFailure) -> Self {
        Status::unauthenticated(e.to_string())
    }
}

/// The request named a cycle the server does not hold (or holds none yet).
pub fn cycle_not_found(requested: &str, available: &[&str]) -> Status {
    let message = if available.is_empty() {
        "cycle_id: no cycle is loaded yet: retry once the health check reports SERVING".to_string()
    } else {
        format!(
            "cycle_id: no cycle '{requested}' is loaded: available are {}",
            available
                .iter()
                .map(|s| format!("'{s}'"))
                .collect::<Vec<_>>()
                .join(", ")
        )
    };
    Status::not_found(message)
}

/// The answer would exceed a server limit before any work is done.
pub fn resource_exhausted(field: &str, message: &str) -> Status {
    Status::resource_exhausted(format!("{field}: {message}"))
}

/// The client's deadline or the server's request timeout passed first.
pub fn deadline_exceeded(budget: Duration) -> Status {
    Status::deadline_exceeded(format!(
        "deadline: the request did not finish within its time budget of {} ms (the shorter of \
         the client's deadline and the server's request timeout)",
        budget.as_millis()
    ))
}

/// Every request slot is taken: shed the call rather than queue it.
pub fn busy(limit: usize) -> Status {
    Status::resource_exhausted(format!(
        "server: all {limit} request slots are busy: retry with backoff"
    ))
}

/// The server failed on its own account (a computation panicked); not a client mistake.
pub fn internal(what: &str) -> Status {
    Status::internal(format!("server: {what}"))
}

/// A product error as a status. `field` is the wire path of the request's field selection
/// (`field` in most product requests; empty when the request names the cycle at top level),
/// to which query errors about the quantity, time and member are attached.
pub fn product_error(e: ProductError, selection: &str) -> Status {
    use crate::products::chart::ChartError;
    use crate::products::ensemble::EnsembleError;
    use crate::products::guidance::GuidanceError;
    use crate::products::isolines::IsolineError;
    use crate::products::verify::VerifyError;
    let within = |name: &str| {
        if selection.is_empty() {
            name.to_string()
        } else {
            format!("{selection}.{name}")
        }
    };
    let query = |q: QueryError| -> Status {
        let (code, field, message) = match q {
            QueryError::InvalidArgument { field, message } => {
                (Code::InvalidArgument, field, message)
            }
            QueryError::NotFound { field, message } => (Code::NotFound, field, message),
            QueryError::OutOfRange { field, message } => (Code::OutOfRange, field, message),
            QueryError::ResourceExhausted { field, message } => {
                (Code::ResourceExhausted, field, message)
            }
            QueryError::HeightsUnavailable { detail } => return Status::internal(detail),
        };
        // The domain names the single quantity of a product `quantities[0]`; the wire
        // names it `quantity` inside the selection.
        let field = match field.strip_prefix("quantities[0]") {
            Some(rest) => within(&format!("quantity{rest}")),
            None if field.starts_with("bbox") => wire_field(&field, Rpc::Area),
            None if field.starts_with("points") => wire_field(&field, Rpc::Position),
            None if field.is_empty() => within("quantity"),
            None => within(&wire_field(&field, Rpc::Area)),
        };
        Status::new(code, format!("{field}: {message}"))
    };
    let isolines = |e: IsolineError| -> Status {
        let message = e.to_string();
        match e {
            IsolineError::BadLevel { index, .. } => {
                Status::invalid_argument(format!("values[{index}]: {message}"))
            }
            IsolineError::BadInterval { .. } | IsolineError::TooManyLevels { .. } => {
                Status::invalid_argument(format!("interval: {message}"))
            }
            IsolineError::BadBase { .. } => Status::invalid_argument(format!("base: {message}")),
            IsolineError::ShapeMismatch { .. }
            | IsolineError::TooSmall { .. }
            | IsolineError::BadAxis { .. }
            | IsolineError::NotGlobal { .. } => Status::failed_precondition(format!(
                "{}: the cycle's grid cannot be contoured: {message}",
                within("cycle_id")
            )),
        }
    };
    match e {
        ProductError::Query(q) => query(q),
        ProductError::Isolines(i) => isolines(i),
        ProductError::Chart(c) => {
            let message = c.to_string();
            match c {
                ChartError::Isolines(i) => isolines(i),
                ChartError::Size { .. } | ChartError::NoRoomForMap { .. } => {
                    Status::invalid_argument(format!("width: {message}"))
                }
                ChartError::BadCritical { .. } => {
                    Status::invalid_argument(format!("critical: {message}"))
                }
                ChartError::ClassShape { .. }
                | ChartError::UnknownClass { .. }
                | ChartError::TooManyCategories { .. }
                | ChartError::Encode(_) => {
                    tracing::error!(error = %message, "chart drawing failed");
                    internal("the chart could not be drawn; the server log has details")
                }
            }
        }
        ProductError::Guidance(g) => {
            let message = g.to_string();
            match g {
                GuidanceError::Setting { field, .. } => {
                    Status::invalid_argument(format!("thresholds.{field}: {message}"))
                }
                GuidanceError::Member { .. } => {
                    Status::not_found(format!("{}: {message}", within("member")))
                }
                GuidanceError::TimeIndex { .. } => {
                    Status::not_found(format!("{}: {message}", within("time")))
                }
                GuidanceError::Position(_) => Status::out_of_range(format!("points: {message}")),
                GuidanceError::GridIndex { .. } => Status::out_of_range(message),
                GuidanceError::Compute(_) => {
                    Status::failed_precondition(format!("{}: {message}", within("cycle_id")))
                }
                GuidanceError::SettingsToml { .. } | GuidanceError::SettingsFile { .. } => {
                    tracing::error!(error = %message, "guidance settings");
                    internal(
                        "the server's guidance settings are unusable; the server log has details",
                    )
                }
            }
        }
        ProductError::Ensemble(e) => {
            let message = e.to_string();
            match e {
                EnsembleError::Deterministic { .. } => {
                    Status::failed_precondition(format!("{}: {message}", within("cycle_id")))
                }
                EnsembleError::BadThreshold { .. } | EnsembleError::NoStatistic => {
                    Status::invalid_argument(message)
                }
                EnsembleError::Query { source, .. } => query(source),
            }
        }
        ProductError::Verify(v) => {
            let message = v.to_string();
            match v {
                VerifyError::TimeMismatch { .. } => {
                    Status::failed_precondition(format!("analysis_cycle_id: {message}"))
                }
                VerifyError::TimeNotFound { .. } => {
                    Status::not_found(format!("lead_time_s: {message}"))
                }
                VerifyError::MemberNotFound { .. } => {
                    Status::not_found(format!("member: {message}"))
                }
                VerifyError::NoFileHeights { .. } | VerifyError::NoDefaultItems { .. } => {
                    Status::failed_precondition(format!("analysis_cycle_id: {message}"))
                }
                VerifyError::ItemNotOnLevels { index, .. } => {
                    Status::invalid_argument(format!("quantities[{index}]: {message}"))
                }
                VerifyError::BadRegion { .. } => Status::invalid_argument(message),
                VerifyError::Query { source, .. } => query(source),
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn domain_fields_are_spelled_as_on_the_wire() {
        assert_eq!(wire_field("bbox.south", Rpc::Area), "bbox.south_deg");
        assert_eq!(wire_field("stride", Rpc::Area), "stride");
        assert_eq!(
            wire_field("points[3].latitude", Rpc::Position),
            "points[3].latitude_deg"
        );
        assert_eq!(wire_field("latitude", Rpc::Profile), "point.latitude_deg");
        assert_eq!(
            wire_field("waypoints[2].longitude", Rpc::Trajectory),
            "waypoints[2].point.longitude_deg"
        );
        assert_eq!(
            wire_field("waypoints[2].valid_time_unix_s", Rpc::Trajectory),
            "waypoints[2].valid_time"
        );
        assert_eq!(
            wire_field("quantities[1].thickness.top_pa", Rpc::Area),
            "quantities[1].thickness.top_pa"
        );
        assert_eq!(wire_field("lead_time", Rpc::Area), "time.lead_time_s");
        assert_eq!(wire_field("lead_time", Rpc::Position), "lead_time_s");
        assert_eq!(wire_field("times[1]", Rpc::Position), "times[1]");
        assert_eq!(wire_field("member", Rpc::Trajectory), "member");
        assert_eq!(wire_field("", Rpc::Profile), "point");
    }

    #[test]
    fn each_query_error_keeps_its_code() {
        let cases = [
            (
                QueryError::InvalidArgument {
                    field: "stride".into(),
                    message: "must be at least 1".into(),
                },
                Code::InvalidArgument,
            ),
            (
                QueryError::NotFound {
                    field: "member".into(),
                    message: "x".into(),
                },
                Code::NotFound,
            ),
            (
                QueryError::OutOfRange {
                    field: "quantities[0].geopotential_height.pressure_pa".into(),
                    message: "x".into(),
                },
                Code::OutOfRange,
            ),
            (
                QueryError::ResourceExhausted {
                    field: "points".into(),
                    message: "x".into(),
                },
                Code::ResourceExhausted,
            ),
        ];
        for (e, code) in cases {
            let s = query_error(e, Rpc::Area);
            assert_eq!(s.code(), code);
            assert!(!s.message().is_empty());
        }
        let s = query_error(
            QueryError::InvalidArgument {
                field: "bbox.north".into(),
                message: "north is south of south".into(),
            },
            Rpc::Area,
        );
        assert_eq!(s.message(), "bbox.north_deg: north is south of south");
    }

    #[test]
    fn a_missing_cycle_names_the_field_and_the_choices() {
        let s = cycle_not_found("gone.nc", &["a.nc", "b.nc"]);
        assert_eq!(s.code(), Code::NotFound);
        assert!(s.message().starts_with("cycle_id: "));
        assert!(s.message().contains("'a.nc'"));
        assert!(cycle_not_found("", &[]).message().starts_with("cycle_id: "));
    }
}
