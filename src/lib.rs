//! hypsogrid: geopotential heights and layer thickness on forecast grids, column by column,
//! by the hypsometric equation.
//!
//! Start with [`ingest::read_cycle`] (a NetCDF file to a [`model::Cycle`]), then
//! [`compute::compute_heights`] (a cycle to heights and thicknesses), then
//! [`output::write_heights`] (back to CF NetCDF). DEVELOPERS.md has the architecture.
#![warn(missing_docs, rust_2018_idioms, unreachable_pub)]

pub mod batch;
mod buffers;
pub mod compute;
pub mod demo;
pub mod grid;
/// HDF5 below the NetCDF library: error printing kept off on every thread, where a
/// dataset's chunks lie, chunks written as they are stored.
mod hdf5;
pub mod ingest;
pub mod kernel;
pub mod lanes;
pub mod metrics;
pub mod model;
pub mod netcdf_session;
pub mod output;
pub mod physics;
pub mod products;
pub mod query;
pub mod served;
pub mod service;
pub mod store;
pub mod watch;

/// Generated protobuf types of the `hypsogrid.v1` package (wire types only).
#[allow(missing_docs, unreachable_pub, clippy::all)]
pub mod pb {
    include!(concat!(env!("OUT_DIR"), "/hypsogrid.v1.rs"));
    pub use crate::wire::QuantityValues;
}

/// `hypsogrid.v1.QuantityValues`, whose packed values go over the wire as one block.
mod wire;
