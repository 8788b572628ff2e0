//! Helpers shared by the integration tests.
//!
//! - [`fixtures`]: synthetic CF NetCDF files with one knob per encoding variant.
//! - [`hdf5`]: HDF5's error printing off on a test thread.
//! - [`serve_child`]: `hypsogrid serve` as a child process on a loopback port.
//! - [`scratch`]: temporary folders for fixtures kept in a `static`, removed at exit.
//! - [`writer_lock`]: a file held locked as its producer holds it while writing.

pub mod fixtures;
pub mod hdf5;
pub mod scratch;
pub mod serve_child;
pub mod writer_lock;
