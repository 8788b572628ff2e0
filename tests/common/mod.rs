//! Helpers shared by the integration tests.
//!
//! - [`fixtures`]: synthetic CF NetCDF files with one knob per encoding variant.

pub mod fixtures;
