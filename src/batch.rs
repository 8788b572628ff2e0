//! The batch: one cycle file in, heights and thicknesses out ([`compute_file`]).
//!
//! Where the file holds temperature and humidity step by step (the common case), the cycle
//! is never held whole: each (member, time) step is read, computed and written a band of
//! latitude rows at a time, every column on its own as always. One thread reads and writes
//! (the NetCDF library is serialised) while the band before is decoded (fill values,
//! scaling, plausibility) and computed on the other cores, and a few band buffers go round,
//! so the process touches a few tens of megabytes of memory instead of the whole cycle and
//! its heights (fresh memory, whose first touch cost about a third of the whole batch on
//! these virtual machines). Bands go to the row kernel where it takes the cycle, at a lower
//! priority since reading and writing pace the run (on every core where it makes relative
//! humidity or dewpoint specific humidity first, which costs more than the rest of its
//! step); every other cycle the settings can compute (hybrid levels, no surface fields)
//! goes column by column ([`StepColumns`], each band's columns from its own rows) on every
//! core, since there computing paces it. Chunked (compressed) input is read a whole step at
//! a time, the chunks inflated on every core, then computed and written in bands the same
//! way; compressed output takes whole steps. The file written is the one
//! [`read_and_compute`] and [`write_heights`] give, value for value (`tests/batch.rs`). A
//! file whose layout needs whole-variable reads is read whole, once
//! ([`read_cycle_in_bands`] goes on to the whole cycle), computed by [`compute_heights`]
//! and written by [`write_heights`].
//!
//! [`read_and_compute`]: crate::compute::read_and_compute

use std::ops::Range;
use std::path::Path;
use std::sync::mpsc;

use ndarray::{s, Array3, ArrayView3, ArrayViewMut2, ArrayViewMut3};

use crate::buffers::HugeField;
use crate::compute::{
    background_pool, check_layers, compute_heights, heights_method, kernel_for, ComputeConfig,
    ComputeError, StepColumns,
};
use crate::ingest::{
    read_cycle_in_bands, BadValue, BandDecode, BandReader, InBands, IngestConfig, IngestError,
};
use crate::kernel::{IsobaricKernel, NotApplicable, StepFields, StepOutputs};
use crate::model::Cycle;
use crate::output::{
    rows_past_sieve, write_heights, FileRows, HeightsAbout, HeightsWriter, OutputError,
    OutputOptions,
};

/// Bytes of one field's band (temperature, humidity, heights: `[level, row, lon]` `f32`):
/// 4 MiB, 39 rows of a 0.5° grid on 37 levels (cut into even bands: nine of 40–41 rows, see
/// [`even_bands`]). The 0.5° batch took 98.5, 83.5 and 88.2 ms
/// with bands of 2, 4 and 8 MiB (medians of 11 alternate runs of the process); a C program
/// that only read and wrote the same bands through the library took 96 ms with bands of 8
/// rows (the library's cost per call), 42, 40 and 39 ms with 24, 45 and 91 rows, 52 ms with
/// whole steps (fresh memory).
const BAND_BYTES: usize = 4 << 20;

/// Band buffers going round with the row kernel: one being read, one computed, one written.
/// The column path takes two (see [`BandJob::buffers`]).
const BUFFERS: usize = 3;

/// Why a batch run failed; every message names the file.
#[derive(Debug, thiserror::Error)]
pub enum BatchError {
    /// The input could not be read as a cycle.
    #[error("{0}")]
    Ingest(#[from] IngestError),
    /// The heights could not be computed.
    #[error("computing '{file}': {source}")]
    Compute {
        /// The input file.
        file: String,
        /// What went wrong.
        #[source]
        source: ComputeError,
    },
    /// The output could not be written.
    #[error("{0}")]
    Output(#[from] OutputError),
    /// A band could not be computed (the kernel refused it, or its thread stopped).
    #[error("computing '{file}': {detail}")]
    Band {
        /// The input file.
        file: String,
        /// What went wrong.
        detail: String,
    },
}

/// What a batch run did.
#[derive(Clone, Debug)]
pub struct BatchReport {
    /// Notes the reader made on the input (assumed units, levels without humidity, ...).
    pub notes: Vec<String>,
    /// (member, time) steps written.
    pub steps: usize,
    /// Latitude rows of the widest band where the cycle went through band by band (the
    /// bands of a step are as even as can be; asked for a number of rows, every band but the
    /// last has that many); `None` where it was read whole, computed and written.
    pub band_rows: Option<usize>,
}

/// Reads the cycle in `input`, computes heights on every level and the thickness of every
/// layer of `config`, and writes them to `output` (atomically: see [`write_heights`]).
/// `progress` is called after each (member, time) step with the number done and the total.
/// It is called while this function holds the NetCDF session ([`crate::netcdf_session`]):
/// it must not open a NetCDF file itself (it would wait for itself).
///
/// The output is the same, value for value, as [`crate::compute::read_and_compute`]
/// followed by [`write_heights`]; see the module documentation for how it is made.
///
/// # Errors
/// The input cannot be read as a cycle (a bad value in any band names the file, variable
/// and index), the layers are inverted, or the output cannot be written. Nothing is left at
/// `output` on error.
pub fn compute_file(
    input: &Path,
    output: &Path,
    ingest: &IngestConfig,
    config: &ComputeConfig,
    options: &OutputOptions,
    progress: &(dyn Fn(usize, usize) + Sync),
) -> Result<BatchReport, BatchError> {
    compute_file_in_bands(input, output, ingest, config, options, None, progress)
}

/// [`compute_file`] with bands of `band_rows` latitude rows (at least one; `None`: about
/// 4 MiB a field), for tests and measurements. Where the cycle must go through whole
/// steps (compressed output) or whole (see the module documentation), it does, whatever
/// `band_rows` says; chunked input is read a whole step at a time and computed and written
/// in bands. The report says what was done.
pub fn compute_file_in_bands(
    input: &Path,
    output: &Path,
    ingest: &IngestConfig,
    config: &ComputeConfig,
    options: &OutputOptions,
    band_rows: Option<usize>,
    progress: &(dyn Fn(usize, usize) + Sync),
) -> Result<BatchReport, BatchError> {
    let compute_error = |source| BatchError::Compute {
        file: input.display().to_string(),
        source,
    };
    check_layers(config).map_err(compute_error)?;
    let streamed = read_cycle_in_bands(input, ingest, |shell, bands| {
        let kernel = kernel_for(shell, config);
        let (how, method) = match &kernel {
            Some((kernel, method)) => (How::Kernel { kernel }, method.clone()),
            // A cycle the settings cannot compute is declined: the whole read then gives
            // the error `compute_heights` gives.
            None => (How::Columns, heights_method(shell, config).ok()?),
        };
        let job = BandJob {
            shell,
            how,
            method: &method,
            config,
            band_rows,
        };
        Some(job.run(bands, output, options, progress))
    })?;
    let cycle = match streamed {
        InBands::Done(report) => return report,
        InBands::Whole(cycle) => *cycle,
    };
    // What `read_and_compute` then `write_heights` do, on the cycle already read.
    let (members, times, ..) = cycle.temperature.dim();
    let total = members * times;
    let heights =
        compute_heights(&cycle, config, &|done| progress(done, total)).map_err(compute_error)?;
    write_heights(&cycle, &heights, output, options)?;
    Ok(BatchReport {
        notes: cycle.notes,
        steps: total,
        band_rows: None,
    })
}

/// Rows per band for a grid of `levels` levels and `cols` longitudes: about [`BAND_BYTES`] of
/// `f32` per field, at least one row, at most `rows`.
fn rows_per_band(levels: usize, rows: usize, cols: usize) -> usize {
    (BAND_BYTES / (4 * levels * cols).max(1)).clamp(1, rows.max(1))
}

/// `rows` rows in bands of about `band_rows` rows each and at least `least` (all of them if
/// fewer), as even as can be: a short last band would fall below the size that keeps a
/// level's rows past the HDF5 sieve buffer (361 rows in bands of 39 left 10 rows, read back
/// and written again level by level).
fn even_bands(rows: usize, band_rows: usize, least: usize) -> Vec<Range<usize>> {
    let about = (rows + band_rows.max(1) / 2) / band_rows.max(1);
    let count = about.min(rows / least.max(1)).max(1);
    (0..count)
        .map(|i| i * rows / count..(i + 1) * rows / count)
        .collect()
}

/// How a band is computed.
#[derive(Clone, Copy)]
enum How<'a> {
    /// The row kernel ([`IsobaricKernel`]), for the cycles it takes.
    Kernel { kernel: &'a IsobaricKernel },
    /// Column by column ([`StepColumns`]): hybrid levels and the cycles without surface
    /// fields the kernel does not take, as [`compute_heights`] does them.
    Columns,
}

/// One cycle going through band by band.
struct BandJob<'a> {
    shell: &'a Cycle,
    how: How<'a>,
    method: &'a str,
    config: &'a ComputeConfig,
    /// Rows per band asked for; `None`: [`rows_per_band`].
    band_rows: Option<usize>,
}

/// A band's place: step (member, time) and latitude rows.
#[derive(Clone, Debug)]
struct Place {
    step: (usize, usize),
    rows: Range<usize>,
}

/// The buffers of one band, sized for the widest band: the inputs as read, the kernel's
/// outputs, and those as the file holds them.
struct Band {
    place: Place,
    /// Whether the temperature and the humidity of the band hold a valid value.
    valid: [bool; 2],
    /// Whether nothing is read while it is computed (see [`BandJob::run`]): then it takes
    /// every core.
    last_read: bool,
    t: HugeField<f32>,
    q: Option<HugeField<f32>>,
    /// The kernel's outputs, turned into the file's form in place.
    out: FileRows,
}

impl Band {
    /// Buffers for bands of up to `dim` (`[level, row, lon]`).
    fn new(dim: (usize, usize, usize), humidity: bool, layers: usize) -> Self {
        let values = dim.0 * dim.1 * dim.2;
        Self {
            place: Place {
                step: (0, 0),
                rows: 0..0,
            },
            valid: [false; 2],
            last_read: false,
            t: HugeField::zeroed(values),
            q: humidity.then(|| HugeField::zeroed(values)),
            out: FileRows::new(dim, layers),
        }
    }
}

impl BandJob<'_> {
    /// Reads, computes and writes every band of every step, then commits the output.
    fn run(
        &self,
        bands: &mut BandReader<'_, '_>,
        output: &Path,
        options: &OutputOptions,
        progress: &(dyn Fn(usize, usize) + Sync),
    ) -> Result<BatchReport, BatchError> {
        let (members, times, levels, rows, cols) = bands.dim();
        // Compressed output is chunked by whole latitude-longitude planes, which a band
        // would leave half-written in the library's chunk cache: whole steps then. Chunked
        // input is read a whole step at a time, then computed and written in bands
        // ([`BandJob::stream_steps`]).
        let bounds: Vec<Range<usize>> = if options.deflate_level.is_none() {
            match self.band_rows {
                Some(n) => {
                    let n = n.clamp(1, rows.max(1));
                    (0..rows).step_by(n).map(|r| r..(r + n).min(rows)).collect()
                }
                None => even_bands(
                    rows,
                    rows_per_band(levels, rows, cols),
                    // A level's rows of `f32` are one write per level and variable (bands
                    // of `rows_per_band` are past the sieve buffer up to 64 levels).
                    rows_past_sieve(cols, 4),
                ),
            }
        } else {
            std::iter::once(0..rows).collect()
        };
        let band_rows = bounds.iter().map(Range::len).max().unwrap_or(0).max(1);
        let about = HeightsAbout {
            method: self.method,
            constants: &self.shell.constants,
            layers: &self.config.layers,
        };
        let mut writer =
            HeightsWriter::create(self.shell, &about, output, options, bands.session())?;
        let reverse = writer.levels_reversed();
        // Chunked input is read a whole step at a time (a band would inflate its chunks
        // again), then computed and written in bands.
        let valid = if !bands.reads_bands() && bounds.len() > 1 {
            self.stream_steps(bands, &mut writer, &bounds, reverse, progress)?
        } else {
            self.run_bands(bands, &mut writer, &bounds, reverse, progress)?
        };
        bands.finish(valid)?;
        writer.commit()?;
        Ok(BatchReport {
            notes: self.shell.notes.clone(),
            steps: members * times,
            band_rows: Some(band_rows),
        })
    }

    /// Every band of every step read, computed and written in turn: this thread reads and
    /// writes, one thread computes the band between. Returns whether temperature and
    /// humidity held a valid value.
    fn run_bands(
        &self,
        bands: &mut BandReader<'_, '_>,
        writer: &mut HeightsWriter,
        bounds: &[Range<usize>],
        reverse: bool,
        progress: &(dyn Fn(usize, usize) + Sync),
    ) -> Result<[bool; 2], BatchError> {
        let (members, times, levels, rows, cols) = bands.dim();
        let band_rows = bounds.iter().map(Range::len).max().unwrap_or(0).max(1);
        let places: Vec<Place> = (0..members)
            .flat_map(|m| (0..times).map(move |t| (m, t)))
            .flat_map(|step| {
                bounds.iter().map(move |rows| Place {
                    step,
                    rows: rows.clone(),
                })
            })
            .collect();
        let total = members * times;
        let humidity = self.shell.humidity.is_some();
        let layers = self.config.layers.len();
        let mut steps_done = 0;
        let mut valid = [false; 2];
        std::thread::scope(|scope| -> Result<(), BatchError> {
            let (work_tx, work_rx) = mpsc::channel::<Band>();
            let (done_tx, done_rx) = mpsc::channel::<Result<Band, Failure>>();
            let decode = bands.decoding();
            // The reading and writing thread is the critical path: the kernel takes what it
            // leaves, on threads of lower priority (see `background_pool`).
            let pool = self.band_pool();
            scope.spawn(move || {
                for mut band in work_rx {
                    let lowered = pool.as_ref().filter(|_| !band.last_read);
                    let mut run = || self.compute(&mut band, &decode, (levels, cols), reverse);
                    let done = match lowered {
                        Some(pool) => pool.install(run),
                        _ => run(),
                    }
                    .map(|()| band);
                    if done_tx.send(done).is_err() {
                        break;
                    }
                }
            });
            let mut free: Vec<Band> = Vec::with_capacity(BUFFERS);
            let mut made = 0;
            let mut in_flight = 0usize;
            let mut write = |done: Result<Band, Failure>,
                             free: &mut Vec<Band>,
                             bands: &BandReader<'_, '_>|
             -> Result<(), BatchError> {
                let band = done.map_err(|failure| self.failure_error(failure, bands))?;
                valid = [valid[0] || band.valid[0], valid[1] || band.valid[1]];
                writer.put_rows(band.place.step, band.place.rows.clone(), &band.out)?;
                if band.place.rows.end == rows {
                    steps_done += 1;
                    progress(steps_done, total);
                }
                free.push(band);
                Ok(())
            };
            let reads = places.len();
            for (i, place) in places.into_iter().enumerate() {
                let mut band = match free.pop() {
                    Some(band) => band,
                    None if made < self.buffers() => {
                        made += 1;
                        Band::new((levels, band_rows, cols), humidity, layers)
                    }
                    None => {
                        let done = done_rx.recv().map_err(|_| worker_gone(self.shell))?;
                        in_flight -= 1;
                        write(done, &mut free, bands)?;
                        free.pop().ok_or_else(|| worker_gone(self.shell))?
                    }
                };
                let len = levels * place.rows.len() * cols;
                let q = band.q.as_mut().map(|q| &mut q[..len]);
                bands.read_raw(place.step, place.rows.clone(), &mut band.t[..len], q)?;
                band.place = place;
                // A whole step (compressed output) read last leaves the reading thread only
                // waiting for it (a band of a step still has the band before it to write):
                // the global pool then. On the zlib-1 0.5° cycle (one step) the kernel took
                // 55 ms on the one thread of the lowered pool while the reading thread
                // waited.
                band.last_read = i + 1 == reads && bounds.len() == 1;
                work_tx.send(band).map_err(|_| worker_gone(self.shell))?;
                in_flight += 1;
                while let Ok(done) = done_rx.try_recv() {
                    in_flight -= 1;
                    write(done, &mut free, bands)?;
                }
            }
            drop(work_tx);
            while in_flight > 0 {
                let done = done_rx.recv().map_err(|_| worker_gone(self.shell))?;
                in_flight -= 1;
                write(done, &mut free, bands)?;
            }
            Ok(())
        })?;
        Ok(valid)
    }

    /// Every step of a cycle whose reads take whole steps (chunked input): each step read
    /// whole on this thread, then decoded, computed and written a band of `bounds` at a
    /// time, so that writing a band overlaps computing the next. Returns whether
    /// temperature and humidity held a valid value.
    ///
    /// A whole step computed at once and then written left the two apart: on the zlib-1
    /// 0.5° cycle the kernel took about 30 ms on both cores, then the write of 52 MB took
    /// 21–108 ms on one (this machine's page cache takes fresh pages at very different
    /// speeds from run to run), with nothing else to do.
    fn stream_steps(
        &self,
        bands: &mut BandReader<'_, '_>,
        writer: &mut HeightsWriter,
        bounds: &[Range<usize>],
        reverse: bool,
        progress: &(dyn Fn(usize, usize) + Sync),
    ) -> Result<[bool; 2], BatchError> {
        let (members, times, levels, rows, cols) = bands.dim();
        let steps: Vec<(usize, usize)> = (0..members)
            .flat_map(|m| (0..times).map(move |t| (m, t)))
            .collect();
        let total = steps.len();
        let humidity = self.shell.humidity.is_some();
        let band_rows = bounds.iter().map(Range::len).max().unwrap_or(0).max(1);
        let out_dim = (levels, band_rows, cols);
        let layers = self.config.layers.len();
        let mut valid = [false; 2];
        let mut steps_done = 0;
        std::thread::scope(|scope| -> Result<(), BatchError> {
            let (work_tx, work_rx) = mpsc::channel::<StepInput>();
            let (done_tx, done_rx) = mpsc::channel::<Streamed>();
            let (free_tx, mut free_rx) = mpsc::channel::<FileRows>();
            let decode = bands.decoding();
            let pool = self.band_pool();
            scope.spawn(move || {
                let mut outs = OutBuffers {
                    free: &mut free_rx,
                    made: 0,
                    most: self.buffers(),
                    dim: out_dim,
                    layers,
                };
                for mut input in work_rx {
                    // As for bands: the lowered pool while the next step is being read.
                    let lowered = pool.as_ref().filter(|_| !input.last_read);
                    let mut run = || {
                        self.compute_step(&mut input, &decode, bounds, reverse, &mut outs, &done_tx)
                    };
                    let went_on = match lowered {
                        Some(pool) => pool.install(run),
                        None => run(),
                    };
                    if !went_on || done_tx.send(Streamed::Input(input)).is_err() {
                        break;
                    }
                }
            });
            let mut handle = |message: Streamed,
                              bands: &BandReader<'_, '_>|
             -> Result<Option<StepInput>, BatchError> {
                match message {
                    Streamed::Rows { place, out } => {
                        writer.put_rows(place.step, place.rows, &out)?;
                        // The computing thread may have stopped; the buffer goes with it.
                        let _ = free_tx.send(out);
                        Ok(None)
                    }
                    Streamed::Input(input) => {
                        valid = [valid[0] || input.valid[0], valid[1] || input.valid[1]];
                        steps_done += 1;
                        progress(steps_done, total);
                        Ok(Some(input))
                    }
                    Streamed::Failed(failure) => Err(self.failure_error(failure, bands)),
                }
            };
            let mut inputs: Vec<StepInput> = Vec::with_capacity(STEP_INPUTS);
            let mut made = 0;
            let mut in_flight = 0usize;
            let values = levels * rows * cols;
            for (i, &step) in steps.iter().enumerate() {
                let mut input = loop {
                    if let Some(input) = inputs.pop() {
                        break input;
                    }
                    if made < STEP_INPUTS {
                        made += 1;
                        break StepInput::new(values, humidity);
                    }
                    let message = done_rx.recv().map_err(|_| worker_gone(self.shell))?;
                    if let Some(input) = handle(message, bands)? {
                        in_flight -= 1;
                        inputs.push(input);
                    }
                };
                bands.read_raw(step, 0..rows, &mut input.t, input.q.as_deref_mut())?;
                input.step = step;
                input.last_read = i + 1 == total;
                work_tx.send(input).map_err(|_| worker_gone(self.shell))?;
                in_flight += 1;
                while let Ok(message) = done_rx.try_recv() {
                    if let Some(input) = handle(message, bands)? {
                        in_flight -= 1;
                        inputs.push(input);
                    }
                }
            }
            drop(work_tx);
            while in_flight > 0 {
                let message = done_rx.recv().map_err(|_| worker_gone(self.shell))?;
                if handle(message, bands)?.is_some() {
                    in_flight -= 1;
                }
            }
            Ok(())
        })?;
        Ok(valid)
    }

    /// Decodes `input`'s step, then computes it band by band into buffers from `outs`,
    /// each sent to `done` as it is ready. Returns `false` where it failed (the failure
    /// sent) or the reading thread has gone.
    fn compute_step(
        &self,
        input: &mut StepInput,
        decode: &BandDecode,
        bounds: &[Range<usize>],
        reverse: bool,
        outs: &mut OutBuffers<'_>,
        done: &mpsc::Sender<Streamed>,
    ) -> bool {
        let failed = |failure: Failure| {
            let _ = done.send(Streamed::Failed(failure));
            false
        };
        let (levels, _, cols) = outs.dim;
        let rows = bounds.last().map_or(0, |b| b.end);
        match decode.decode(input.step, 0..rows, &mut input.t, input.q.as_deref_mut()) {
            Ok(valid) => input.valid = valid,
            Err(bad) => return failed(Failure::BadValue(bad)),
        }
        let shape = (levels, rows, cols);
        let t_step = match ArrayView3::from_shape(shape, &input.t[..]) {
            Ok(v) => v,
            Err(e) => return failed(e.into()),
        };
        let q_step = match input.q.as_deref().map(|q| ArrayView3::from_shape(shape, q)) {
            Some(Ok(v)) => Some(v),
            Some(Err(e)) => return failed(e.into()),
            None => None,
        };
        for band in bounds {
            let Some(mut out) = outs.next() else {
                return false;
            };
            let t_band = t_step.slice(s![.., band.clone(), ..]);
            let q_band = q_step.as_ref().map(|q| q.slice(s![.., band.clone(), ..]));
            let place = Place {
                step: input.step,
                rows: band.clone(),
            };
            if let Err(failure) =
                self.compute_rows(input.step, band.clone(), t_band, q_band, &mut out, reverse)
            {
                return failed(failure);
            }
            if done.send(Streamed::Rows { place, out }).is_err() {
                return false;
            }
        }
        true
    }

    /// The threads that compute bands while this thread reads and writes: with the row
    /// kernel, fewer threads at a lower priority ([`background_pool`]), since reading and
    /// writing pace the run; `None` where computing paces it, so that it takes rayon's
    /// global pool, every core: the column path (a hybrid 1° cycle on 137 levels computes
    /// in about twice the time its read and write take), and the row kernel where it makes
    /// relative humidity or dewpoint specific humidity first (a saturation vapour pressure
    /// per point-level: the 0.5° cycle with relative humidity took 0.094 s on the lowered
    /// pool against 0.070 s on every core, medians of 7 alternate runs).
    fn band_pool(&self) -> Option<rayon::ThreadPool> {
        match self.how {
            How::Kernel { kernel, .. } if !kernel.converts_humidity() => {
                background_pool(compute_threads(rayon::current_num_threads()))
            }
            How::Kernel { .. } | How::Columns => None,
        }
    }

    /// Band buffers to go round: [`BUFFERS`] with the row kernel, whose reading and writing
    /// pace the run; two on the column path, where the reading thread waits for the
    /// computing one anyway, and a third set is only more fresh memory. The invented 1°
    /// cycle on 137 hybrid levels (`benches/hybrid_cycle.py`, bands of 60 rows, 11.8 MB a
    /// field): peak memory 156 → 118 MB, time 0.119 → 0.106 s for one step and 0.331 →
    /// 0.338 s for four (11 alternate runs).
    fn buffers(&self) -> usize {
        match self.how {
            How::Kernel { .. } => BUFFERS,
            How::Columns => 2,
        }
    }

    /// The error for a band the computing thread gave back unfinished.
    fn failure_error(&self, failure: Failure, bands: &BandReader<'_, '_>) -> BatchError {
        match failure {
            Failure::BadValue(bad) => BatchError::Ingest(bands.bad_value(&bad)),
            Failure::Kernel(detail) => BatchError::Band {
                file: self.shell.source.display().to_string(),
                detail,
            },
        }
    }

    /// The band's values decoded, the kernel on them, then the band as the file holds it.
    fn compute(
        &self,
        band: &mut Band,
        decode: &BandDecode,
        (levels, cols): (usize, usize),
        reverse: bool,
    ) -> Result<(), Failure> {
        let Place { step: (m, t), rows } = band.place.clone();
        let n = rows.len();
        let len = levels * n * cols;
        let q = band.q.as_mut().map(|q| &mut q[..len]);
        band.valid = decode
            .decode((m, t), rows.clone(), &mut band.t[..len], q)
            .map_err(Failure::BadValue)?;
        let shape3 = (levels, n, cols);
        let t_band = ArrayView3::from_shape(shape3, &band.t[..len])?;
        let q_band = match &band.q {
            Some(q) => Some(ArrayView3::from_shape(shape3, &q[..len])?),
            None => None,
        };
        self.compute_rows((m, t), rows, t_band, q_band, &mut band.out, reverse)
    }

    /// Rows `rows` of step (`m`, `t`), whose decoded temperature and humidity are `t_band`
    /// and `q_band` (`[level, row, lon]`), computed into `out`, then `out` as the file holds
    /// it.
    fn compute_rows(
        &self,
        (m, t): (usize, usize),
        rows: Range<usize>,
        t_band: ArrayView3<'_, f32>,
        q_band: Option<ArrayView3<'_, f32>>,
        out: &mut FileRows,
        reverse: bool,
    ) -> Result<(), Failure> {
        let shape3 = t_band.dim();
        let (_, n, cols) = shape3;
        let file_rows = out;
        let out = file_rows.fields_mut(shape3).ok_or_else(|| {
            Failure::Kernel(format!("a band of {shape3:?} does not fit its buffers"))
        })?;
        let heights = ArrayViewMut3::from_shape(shape3, out.heights)?;
        let flags = ArrayViewMut3::from_shape(shape3, out.flags)?;
        match self.how {
            How::Kernel { kernel } => {
                let (ps, zs) = kernel.ground(self.shell, (m, t)).ok_or_else(|| {
                    Failure::Kernel(
                        "the cycle lacks the surface the kernel was prepared with".into(),
                    )
                })?;
                let fields = StepFields {
                    t: t_band,
                    q: q_band,
                    ps: ps.slice_move(s![rows.clone(), ..]),
                    zs: zs.slice_move(s![rows, ..]),
                };
                let mut thickness = Vec::with_capacity(out.thickness.len());
                for (v, f) in out.thickness {
                    thickness.push((
                        ArrayViewMut2::from_shape((n, cols), v)?,
                        ArrayViewMut2::from_shape((n, cols), f)?,
                    ));
                }
                let outputs = StepOutputs {
                    geopotential_height: heights,
                    below_ground: flags,
                    thickness,
                };
                kernel.run_into(fields, outputs)?;
            }
            How::Columns => {
                let columns =
                    StepColumns::for_rows(self.shell, self.config, (m, t), rows, t_band, q_band)
                        .map_err(|e| Failure::Kernel(e.to_string()))?;
                // The column path fills a `[layer, row, lon]` array; the band keeps a plane
                // per layer (a few hundred kilobytes a band at most).
                let layers = out.thickness.len();
                let mut th = Array3::<f32>::zeros((layers, n, cols));
                let mut tb = Array3::<u8>::zeros((layers, n, cols));
                columns.fill(heights, flags, th.view_mut(), tb.view_mut());
                for ((v, f), (th, tb)) in out
                    .thickness
                    .into_iter()
                    .zip(th.outer_iter().zip(tb.outer_iter()))
                {
                    for (to, from) in v.iter_mut().zip(th) {
                        *to = *from;
                    }
                    for (to, from) in f.iter_mut().zip(tb) {
                        *to = *from;
                    }
                }
            }
        }
        file_rows.to_file_form(reverse);
        Ok(())
    }
}

/// Whole steps read and waiting to be computed, or being computed ([`BandJob::stream_steps`]):
/// one being read while the one before is computed.
const STEP_INPUTS: usize = 2;

/// A whole step's temperature and humidity, as read then decoded in place.
struct StepInput {
    step: (usize, usize),
    /// Whether nothing is read while it is computed: then it takes every core.
    last_read: bool,
    /// Whether temperature and humidity hold a valid value, once decoded.
    valid: [bool; 2],
    t: HugeField<f32>,
    q: Option<HugeField<f32>>,
}

impl StepInput {
    fn new(values: usize, humidity: bool) -> Self {
        Self {
            step: (0, 0),
            last_read: false,
            valid: [false; 2],
            t: HugeField::zeroed(values),
            q: humidity.then(|| HugeField::zeroed(values)),
        }
    }
}

/// What the computing thread of [`BandJob::stream_steps`] sends back.
enum Streamed {
    /// A band computed, in the file's form.
    Rows { place: Place, out: FileRows },
    /// A step done: its buffers, for the next read.
    Input(StepInput),
    /// A band could not be computed.
    Failed(Failure),
}

/// The band output buffers of [`BandJob::stream_steps`]: up to `most` made, then those
/// the reading thread has written and sent back.
struct OutBuffers<'a> {
    free: &'a mut mpsc::Receiver<FileRows>,
    made: usize,
    /// How many to make at most ([`BandJob::buffers`]).
    most: usize,
    /// The widest band's `[level, row, lon]`.
    dim: (usize, usize, usize),
    layers: usize,
}

impl OutBuffers<'_> {
    /// A buffer to compute a band into; `None` where the reading thread has gone.
    fn next(&mut self) -> Option<FileRows> {
        if let Ok(out) = self.free.try_recv() {
            return Some(out);
        }
        if self.made < self.most {
            self.made += 1;
            return Some(FileRows::new(self.dim, self.layers));
        }
        self.free.recv().ok()
    }
}

/// Why the computing thread gave a band back unfinished.
enum Failure {
    /// A value of the band is implausible.
    BadValue(BadValue),
    /// The kernel refused the band, or its arrays did not take their shapes (not reached:
    /// the buffers are made to fit).
    Kernel(String),
}

impl From<NotApplicable> for Failure {
    fn from(e: NotApplicable) -> Self {
        Failure::Kernel(e.to_string())
    }
}

impl From<ndarray::ShapeError> for Failure {
    fn from(e: ndarray::ShapeError) -> Self {
        Failure::Kernel(e.to_string())
    }
}

/// Threads computing bands beside a global pool of `global` threads: one fewer, at least
/// one, so that the reading and writing thread (the critical path: it reads and writes
/// about 64 ms a 0.5° step, the kernel computes one in about 45 ms on one thread) keeps a
/// core of its own. With as many as the global pool, the kernel's threads took turns with
/// it despite their lower priority: `hypsogrid compute` on the 0.5° cycle took a median
/// 0.096 s with two threads on two cores against 0.085 s with one (11 alternate runs; 15
/// more: 0.095 against 0.087 s; 11 more: 0.083 against 0.080 s, slowest 0.163 against
/// 0.095 s). The serving read keeps every thread: there the read alone is critical, and one
/// thread's kernel is slower than reading a step (with one, a four-step 0.5° cycle became
/// servable at 1.16× its read, against 0.99× with two).
fn compute_threads(global: usize) -> usize {
    global.saturating_sub(1).max(1)
}

/// The error when the computing thread has stopped (it panicked: the panic follows).
fn worker_gone(shell: &Cycle) -> BatchError {
    BatchError::Band {
        file: shell.source.display().to_string(),
        detail: "the computing thread stopped".into(),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Bands cover every row once, in order, and none is shorter than `least` where the
    /// grid has that many rows.
    #[test]
    fn even_bands_cover_the_rows_with_none_short() {
        for rows in [1, 2, 10, 91, 181, 361, 721, 1000] {
            for band_rows in [1, 7, 39, 40, 93, 500, 2000] {
                for least in [1, 23, 46, 65] {
                    let bands = even_bands(rows, band_rows, least);
                    let mut next = 0;
                    for band in &bands {
                        assert_eq!(band.start, next, "{rows} {band_rows} {least}");
                        assert!(!band.is_empty());
                        if rows >= least {
                            assert!(band.len() >= least, "{rows} {band_rows} {least}: {band:?}");
                        }
                        next = band.end;
                    }
                    assert_eq!(next, rows);
                    let (short, long) = bands.iter().fold((usize::MAX, 0), |(s, l), b| {
                        (s.min(b.len()), l.max(b.len()))
                    });
                    assert!(long - short <= 1, "{rows} {band_rows} {least}: uneven");
                }
            }
        }
        // The 0.5° grid: 361 rows, bands of about 39 (4 MiB a field on 37 levels), runs past
        // 64 KiB from 23 rows: nine bands of 40 or 41 rows, no short last band.
        let half_degree = even_bands(361, rows_per_band(37, 361, 720), rows_past_sieve(720, 4));
        assert_eq!(half_degree.len(), 9);
        assert!(half_degree.iter().all(|b| (40..=41).contains(&b.len())));
    }
}
