//! Forecaster products built on the heights: isolines, charts, rain–snow guidance, ensemble
//! statistics and verification against analyses. Nothing here knows of protobuf; the service
//! layer and the command line convert to and from these types.

/// PNG charts of a field with isolines, drawn without system fonts or a display.
pub mod chart;
/// Ensemble mean, spread and threshold probabilities.
pub mod ensemble;
/// Full-grid fields of a query quantity for one member and time.
pub mod field;
/// A bitmap font embedded in the binary, for chart labels.
pub mod font;
/// RFC 7946 GeoJSON for isolines.
pub mod geojson;
/// Rain–snow guidance: partial thicknesses, freezing levels, precipitation-type categories.
pub mod guidance;
/// Contour lines by marching squares.
pub mod isolines;
/// Products on a loaded cycle as the command line and the service both ask for them.
pub mod orders;
/// Verification scores of forecasts against analyses, and a file's self-consistency check.
pub mod verify;

use crate::query::QueryError;

/// Why a product could not be made; each variant keeps the error of the step that failed,
/// which names the request field or input at fault.
#[derive(Debug, thiserror::Error)]
pub enum ProductError {
    /// The field, time step or member could not be selected.
    #[error(transparent)]
    Query(#[from] QueryError),
    /// The isolines could not be traced.
    #[error(transparent)]
    Isolines(#[from] isolines::IsolineError),
    /// The chart could not be drawn.
    #[error(transparent)]
    Chart(#[from] chart::ChartError),
    /// The guidance could not be made.
    #[error(transparent)]
    Guidance(#[from] guidance::GuidanceError),
    /// The ensemble statistic could not be computed.
    #[error(transparent)]
    Ensemble(#[from] ensemble::EnsembleError),
    /// The verification could not be run.
    #[error(transparent)]
    Verify(#[from] verify::VerifyError),
}
