//! `hypsogrid compute`: one NetCDF cycle in, heights and thicknesses out.

use std::io::IsTerminal;
use std::time::{Duration, Instant};

use anyhow::Result;
use indicatif::{ProgressBar, ProgressDrawTarget, ProgressStyle};

use hypsogrid::batch::compute_file;
use hypsogrid::output::OutputOptions;

use super::ComputeArgs;

/// A progress bar on stderr that appears only on a terminal and only once the job has taken
/// more than a moment, so quick runs and pipes stay quiet.
pub(crate) struct Progress {
    bar: ProgressBar,
    started: Instant,
    visible: bool,
}

impl Progress {
    pub(crate) fn new(total: u64) -> Self {
        let bar = ProgressBar::with_draw_target(Some(total), ProgressDrawTarget::hidden());
        if let Ok(style) =
            ProgressStyle::with_template("{msg:>10} [{bar:40}] {pos}/{len} steps, {elapsed}")
        {
            bar.set_style(style.progress_chars("=> "));
        }
        Self {
            bar,
            started: Instant::now(),
            visible: false,
        }
    }

    pub(crate) fn phase(&mut self, message: &'static str) {
        self.bar.set_message(message);
        self.maybe_show();
    }

    pub(crate) fn set(&self, done: u64) {
        self.bar.set_position(done);
    }

    pub(crate) fn maybe_show(&mut self) {
        if !self.visible
            && self.started.elapsed() > Duration::from_millis(300)
            && std::io::stderr().is_terminal()
        {
            self.bar.set_draw_target(ProgressDrawTarget::stderr());
            self.visible = true;
        }
    }

    pub(crate) fn finish(self) {
        self.bar.finish_and_clear();
    }
}

pub(super) fn run(args: ComputeArgs) -> Result<()> {
    let ingest = args.read.ingest_config()?;
    let config = args.read.compute_config(&ingest);
    let mut progress = Progress::new(1);
    progress.phase("reading");
    let show = std::sync::Mutex::new(&mut progress);
    let options = OutputOptions {
        history: history_line(),
        deflate_level: args.deflate,
    };
    // Read, computed and written band by band where the cycle allows (`compute_file`).
    let report = compute_file(
        &args.input,
        &args.output,
        &ingest,
        &config,
        &options,
        &|done, total| {
            if let Ok(mut p) = show.lock() {
                p.bar.set_length(total.max(1) as u64);
                p.phase("computing");
                p.set(done as u64);
            }
        },
    )?;
    for note in &report.notes {
        tracing::info!("{}: {note}", args.input.display());
    }
    progress.finish();
    Ok(())
}

/// The command line as run, for the output's `history` attribute.
fn history_line() -> String {
    let args: Vec<String> = std::env::args().collect();
    format!(
        "hypsogrid {}: {}",
        env!("CARGO_PKG_VERSION"),
        args.join(" ")
    )
}
