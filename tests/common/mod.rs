//! Helpers shared by the integration tests.
//!
//! - [`fixtures`]: synthetic CF NetCDF files with one knob per encoding variant.
//! - [`serve_child`]: `hypsogrid serve` as a child process on a loopback port.

pub mod fixtures;
pub mod serve_child;
