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
