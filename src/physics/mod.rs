//! Column physics: pure functions on numbers and slices. No I/O, no protobuf, no files.
//!
//! All arithmetic is `f64`. Numeric failure is a value: `NaN` in, `NaN` out, and `None` where
//! a query has no answer; nothing here panics on data.

/// Heights of an isobaric column, and interpolation on any built column.
pub mod column;
/// Physical constants, each with its source, and the set one computation uses.
pub mod constants;
/// Normal gravity and the conversion between geopotential and geometric height.
pub mod geometric;
/// Saturation vapour pressure, humidity conversions and virtual temperature.
pub mod humidity;
/// Heights on hybrid sigma-pressure model levels (Simmons and Burridge 1981).
pub mod hybrid;
/// The hypsometric equation: layer thickness, scale height, polytropic layers.
pub mod hypsometric;
/// The U.S. Standard Atmosphere 1976 below 84.852 geopotential kilometres.
pub mod standard_atmosphere;
/// Wet-bulb temperature (isobaric, by the psychrometric equation).
pub mod wetbulb;

pub use constants::Constants;
