//! The `hypsogrid` command line: batch computation on NetCDF files and the demo scenario.
#![warn(rust_2018_idioms)]

mod cli;

use std::process::ExitCode;

use clap::Parser;

fn main() -> ExitCode {
    let args = cli::Cli::parse();
    match cli::run(args) {
        Ok(()) => ExitCode::SUCCESS,
        Err(err) => {
            // One line, the whole chain of causes: it names the file and the variable.
            eprintln!("hypsogrid: error: {err:#}");
            ExitCode::FAILURE
        }
    }
}
