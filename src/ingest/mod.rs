//! NetCDF ingest: one file (NetCDF-3 classic or NetCDF-4, CF conventions) to one
//! [`Cycle`] in SI units, bottom-up, `[member, time, level, lat, lon]`.
//!
//! The only module that opens data files. Variables are found by CF `standard_name` first,
//! then through the [`NameMap`] (built-in: `config/names.toml`); every decision is written to
//! [`Cycle::notes`]. Nothing a file contains can make this module panic: every shape, index
//! and attribute is checked and refused with an [`IngestError`] that names the file and the
//! variable.

/// Whole steps of compressed variables read chunk by chunk, in parallel, without the library.
mod chunks;
/// The data extent of a NetCDF-3 header, to refuse truncated files.
pub mod classic;
/// Reading one variable: masking, unpacking, conversion, axis order.
mod field;
/// The name map and the dataset config file.
pub mod names;
/// Finding variables and reading them into a cycle.
mod reader;
/// CF time units and RFC 3339 formatting.
pub mod time;
/// Units strings to linear conversions.
pub mod units;
/// Vertical axes: formula terms, level order, half levels, matching by pressure.
pub mod vertical;

use std::io::Read;
use std::path::Path;
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::mpsc;

use ndarray::ArrayView3;

pub use names::{load_config, NameMap, Role};
pub use reader::PassOverTest;

use crate::model::{Cycle, Field5};

/// Settings for reading one cycle.
#[derive(Clone, Debug, Default)]
pub struct IngestConfig {
    /// Name map for files that lack CF standard names (built-in default: config/names.toml).
    pub names: NameMap,
    /// Phase convention of relative humidity in the file (WMO default: water).
    pub rh_phase: crate::physics::humidity::RelativeHumidityPhase,
    /// Constants to compute with: the dataset's own (from the config file's \[constants\]) or the default.
    pub constants: crate::physics::Constants,
}

/// Why a file could not be read. Each message is one lowercase line that names the file and,
/// where it applies, the variable and the first offending index, with a hint where one exists.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum IngestError {
    /// The file (or a config file) could not be read from disk.
    #[error("cannot read '{file}': {source}")]
    Io {
        /// The file.
        file: String,
        /// The operating system's error.
        #[source]
        source: std::io::Error,
    },
    /// A path the NetCDF library cannot open (see [`crate::netcdf_session::usable_path`]).
    #[error("cannot open '{file}': the NetCDF library cannot open a path that contains a backslash ('\\'): rename the file (or its folder) without one")]
    Backslash {
        /// The file.
        file: String,
    },
    /// The file does not start with a NetCDF-3 or HDF5 signature.
    #[error("'{file}' is not a netcdf file: {detail}")]
    NotNetcdf {
        /// The file.
        file: String,
        /// What was found instead.
        detail: String,
    },
    /// The NetCDF library refused to open the file.
    #[error("cannot open '{file}' as netcdf ({detail}): the file may be truncated or damaged")]
    Damaged {
        /// The file.
        file: String,
        /// The library's message.
        detail: String,
    },
    /// The file is locked by a process that has it open for writing: HDF5 locks a NetCDF-4
    /// file while it is written. Asked before every read (where HDF5's own locking is on, the
    /// library would refuse the file; where it is off, as in the `hypsogrid` binary, it would
    /// read a part-written file).
    #[error("'{file}' is locked by another process that has it open for writing (HDF5 file locking): it can be read once that process closes it")]
    Locked {
        /// The file.
        file: String,
    },
    /// Reading a variable's values failed.
    #[error("cannot read variable '{variable}' in '{file}' ({detail}): the file may be truncated or damaged")]
    Read {
        /// The file.
        file: String,
        /// The variable.
        variable: String,
        /// The library's message.
        detail: String,
    },
    /// No air temperature anywhere in the file.
    #[error("no air temperature in '{file}': looked for {looked_for}")]
    NoTemperature {
        /// The file.
        file: String,
        /// What was looked for.
        looked_for: String,
    },
    /// A temperature was found, but not on a vertical axis this reader understands.
    #[error("variable '{variable}' in '{file}' has no vertical axis this reader understands: looked for {looked_for}")]
    NoVerticalAxis {
        /// The file.
        file: String,
        /// The variable.
        variable: String,
        /// What was looked for.
        looked_for: String,
    },
    /// Units that ingest does not know for this quantity.
    #[error("variable '{variable}' in '{file}' has units '{units}': expected {expected}")]
    Units {
        /// The file.
        file: String,
        /// The variable.
        variable: String,
        /// The units as written.
        units: String,
        /// The accepted units.
        expected: String,
    },
    /// A coordinate that must be strictly monotonic is not.
    #[error("variable '{variable}' in '{file}' is not strictly monotonic at index {index} ({detail}): levels must strictly increase or decrease")]
    NonMonotonic {
        /// The file.
        file: String,
        /// The coordinate variable.
        variable: String,
        /// First index that breaks the order.
        index: usize,
        /// The values around it.
        detail: String,
    },
    /// A value outside the plausible range after conversion to SI units.
    #[error("variable '{variable}' in '{file}' has {found}")]
    Implausible {
        /// The file.
        file: String,
        /// The variable.
        variable: String,
        /// The value, where it is, and what probably went wrong.
        found: Box<Implausibility>,
    },
    /// The process is stopping ([`crate::netcdf_session::stop_reads`]): the read stopped
    /// before a step of the file.
    #[error(
        "reading '{file}' stopped at member {member}, time step {time}: the process is stopping"
    )]
    Stopped {
        /// The file.
        file: String,
        /// The member about to be read.
        member: usize,
        /// The time step about to be read.
        time: usize,
    },
    /// The process is stopping ([`crate::netcdf_session::stop_reads`]): the read of a
    /// variable read whole stopped between two of its slabs.
    #[error("reading variable '{variable}' in '{file}' stopped: the process is stopping")]
    StoppedInVariable {
        /// The file.
        file: String,
        /// The variable.
        variable: String,
    },
    /// The caller's test ([`PassOverTest`]) gave a reason not to read the file, once its
    /// reference time and size were known: no field was read. Not a fault of the file.
    #[error("{reason}")]
    PassedOver {
        /// The file.
        file: String,
        /// Why it was not read.
        reason: String,
    },
    /// A field in which no value is present: every point is a fill value, a `missing_value`
    /// or outside the valid range. Served, it would be a cycle of missing heights that
    /// displaces a good one as the newest.
    #[error("variable '{variable}' in '{file}' holds no valid value: every point is a fill value, a missing_value or outside the valid range")]
    NoValidData {
        /// The file.
        file: String,
        /// The variable.
        variable: String,
    },
    /// Dimensions or shapes that do not fit together.
    #[error("variable '{variable}' in '{file}' {detail}")]
    Layout {
        /// The file.
        file: String,
        /// The variable.
        variable: String,
        /// What does not fit (a phrase that follows the variable's name).
        detail: String,
    },
    /// An attribute that cannot be used.
    #[error("attribute '{attribute}' of variable '{variable}' in '{file}' {detail}")]
    Attribute {
        /// The file.
        file: String,
        /// The variable.
        variable: String,
        /// The attribute.
        attribute: String,
        /// What is wrong (a phrase that follows the attribute's name).
        detail: String,
    },
    /// A hybrid coordinate without half-level coefficients.
    #[error("variable '{variable}' in '{file}' is a hybrid sigma-pressure coordinate without half-level coefficients: {hint}")]
    MissingHalfLevels {
        /// The file.
        file: String,
        /// The coordinate variable.
        variable: String,
        /// How to supply them.
        hint: String,
    },
    /// A variable that another one refers to, or that the vertical coordinate needs, is absent.
    #[error("variable '{variable}' needed by {needed_by} is missing from '{file}'")]
    MissingVariable {
        /// The file.
        file: String,
        /// The missing variable (or role).
        variable: String,
        /// Who needs it.
        needed_by: String,
    },
    /// A quantity that another part of the file needs is absent.
    #[error("no {what} in '{file}': needed by {needed_by}")]
    MissingField {
        /// The file.
        file: String,
        /// What is missing, in CF terms.
        what: String,
        /// Who needs it.
        needed_by: String,
    },
    /// A config file that cannot be used.
    #[error("config '{file}': {detail}")]
    Config {
        /// The config file.
        file: String,
        /// What is wrong.
        detail: String,
    },
}

/// An implausible value found by the plausibility scan (boxed in [`IngestError`] to keep the
/// error small).
#[derive(Debug, Clone, PartialEq)]
pub struct Implausibility {
    /// The offending value, SI units.
    pub value: f64,
    /// Its units.
    pub units: &'static str,
    /// The first offending index, in the file's own dimension order, `[dim=i, ...]`.
    pub index: String,
    /// The plausible range.
    pub range: String,
    /// What probably went wrong.
    pub hint: &'static str,
}

impl std::fmt::Display for Implausibility {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        write!(
            f,
            "value {} {} at {}, outside the plausible range {}: {}",
            // f32 is the precision the value was stored in; its shortest form reads best.
            self.value as f32,
            self.units,
            self.index,
            self.range,
            self.hint
        )
    }
}

/// Read one cycle from a NetCDF file.
///
/// Fills [`Cycle`] as documented in [`crate::model`]: SI units, `f32`, `NaN` for missing,
/// bottom-up levels, `[member, time, level, lat, lon]`, humidity aligned onto the temperature
/// levels by pressure value, surface fields broadcast to every member and time step.
pub fn read_cycle(path: &Path, config: &IngestConfig) -> Result<Cycle, IngestError> {
    let label = checked_label(path)?;
    let _session = crate::netcdf_session::lock();
    let file = open_quietly(path, &label)?;
    reader::Reader::new(&file, label, config).read(path)
}

/// The file's label for messages, after the checks that must pass before the NetCDF library
/// opens it.
fn checked_label(path: &Path) -> Result<String, IngestError> {
    let label = path.display().to_string();
    if !crate::netcdf_session::usable_path(path) {
        return Err(IngestError::Backslash { file: label });
    }
    if check_signature(path, &label)? {
        check_classic_length(path, &label)?;
    }
    Ok(label)
}

/// Opens the file with HDF5's error printing off on this thread (the caller holds the
/// session lock), unless another process holds it locked for writing.
///
/// The writer's lock is asked for before the open, not left to the library: the `hypsogrid`
/// binary turns HDF5's own locking off (`src/main.rs`: so that its reads never make a
/// producer's write fail), and the library then opens a file whose writer still holds it and
/// reads whatever part of it is written. Where HDF5's locking is on, a file locked between
/// this question and the open is refused by the library; that refusal is reported as the
/// lock too, not as damage (the library says only `hdf error`).
fn open_quietly(path: &Path, label: &str) -> Result<netcdf::File, IngestError> {
    let locked = || IngestError::Locked {
        file: label.to_string(),
    };
    if crate::netcdf_session::locked_for_writing(path) {
        return Err(locked());
    }
    crate::hdf5::quiet_on_this_thread();
    netcdf::open(path).map_err(|e| {
        if crate::netcdf_session::locked_for_writing(path) {
            locked()
        } else {
            IngestError::Damaged {
                file: label.to_string(),
                detail: e.to_string().to_lowercase(),
            }
        }
    })
}

/// One (member, time) step of temperature and humidity as [`read_cycle_overlapped`] hands
/// it over: `[level, lat, lon]`, bottom-up, SI units, exactly the values that
/// [`read_cycle`] puts in the cycle at this step.
pub struct FilledStep<'a> {
    /// Member index.
    pub member: usize,
    /// Time step index.
    pub time: usize,
    /// Air temperature, K.
    pub temperature: ArrayView3<'a, f32>,
    /// The humidity of the cycle (its kind is [`crate::model::Humidity::kind`]), when it
    /// has one.
    pub humidity: Option<ArrayView3<'a, f32>>,
}

/// The steps of a cycle in file order, each as soon as it has been read.
pub struct StepFeed<'a> {
    steps: mpsc::Receiver<FilledStep<'a>>,
    read_done: &'a AtomicBool,
    every_core: bool,
}

impl<'a> StepFeed<'a> {
    /// The feed of the steps sent into `steps`, the reading thread setting `read_done` once
    /// it has read them all; `every_core`: see [`StepFeed::read_uses_every_core`].
    pub(crate) fn new(
        steps: mpsc::Receiver<FilledStep<'a>>,
        read_done: &'a AtomicBool,
        every_core: bool,
    ) -> Self {
        Self {
            steps,
            read_done,
            every_core,
        }
    }

    /// Whether reading the steps keeps every core busy by itself: temperature or humidity
    /// stored in chunks, read (and inflated, where compressed) on every core. Work done
    /// meanwhile then only takes time from the read.
    pub fn read_uses_every_core(&self) -> bool {
        self.every_core
    }

    /// A flag that turns true once the reading thread has read every step (or stopped
    /// reading): the steps not yet taken are then all waiting in the feed. Work that only
    /// pays while the file is still being read can check it and stop.
    pub fn read_done(&self) -> &'a AtomicBool {
        self.read_done
    }

    /// The next step, doing `idle` work meanwhile: while no step is ready, `idle` is
    /// called again and again (each call a small piece of work) until it returns false,
    /// after which this waits. `None` once the feed has ended.
    pub fn next_or_idle(&mut self, mut idle: impl FnMut() -> bool) -> Option<FilledStep<'a>> {
        loop {
            match self.steps.try_recv() {
                Ok(step) => return Some(step),
                Err(mpsc::TryRecvError::Disconnected) => return None,
                Err(mpsc::TryRecvError::Empty) => {
                    if !idle() {
                        return self.steps.recv().ok();
                    }
                }
            }
        }
    }
}

impl<'a> Iterator for StepFeed<'a> {
    type Item = FilledStep<'a>;

    fn next(&mut self) -> Option<FilledStep<'a>> {
        self.steps.recv().ok()
    }
}

/// Reads a cycle as [`read_cycle`] does, and lets `work` start on each (member, time) step
/// of temperature and humidity while the later steps are still being read.
///
/// First everything but the values of temperature and humidity is read (coordinates,
/// surface fields, file heights). `prepare` then sees the cycle with the final shapes and
/// metadata, its temperature and humidity still zero, and returns what `work` needs, or
/// `None` to decline. `work` runs on a thread of its own with the cycle (its temperature
/// and humidity arrays empty meanwhile: take the values from the steps) and the feed of
/// steps, while this thread reads the steps one by one, in file order, under the NetCDF
/// session lock.
///
/// Returns the cycle (complete, the same as [`read_cycle`] gives) and what `work` returned;
/// `None` when `prepare` declined or the file's layout needs whole-variable reads (packed
/// as wider types, dimensions out of order, humidity on its own axis or broadcast): then
/// nothing overlaps and the caller does its work on the cycle afterwards.
///
/// # Errors
/// As [`read_cycle`], with the same messages. A bad value in a later step is found only
/// when that step is read: `work` then sees the feed end early, and its result is dropped.
pub fn read_cycle_overlapped<W, R, P, F>(
    path: &Path,
    config: &IngestConfig,
    prepare: P,
    work: F,
) -> Result<(Cycle, Option<R>), IngestError>
where
    W: Send,
    R: Send,
    P: FnOnce(&Cycle) -> Option<W>,
    F: for<'a> FnOnce(W, &'a Cycle, StepFeed<'a>) -> R + Send,
{
    read_cycle_overlapped_unless(path, config, None, prepare, work)
}

/// [`read_cycle_overlapped`], asking `pass_over` whether to go on once the cycle's reference
/// time and size are known, in the same open of the file: a reason given ends the read
/// before any field with [`IngestError::PassedOver`], and neither `prepare` nor `work` runs.
///
/// # Errors
/// As [`read_cycle_overlapped`], and [`IngestError::PassedOver`].
pub fn read_cycle_overlapped_unless<W, R, P, F>(
    path: &Path,
    config: &IngestConfig,
    pass_over: Option<&PassOverTest<'_>>,
    prepare: P,
    work: F,
) -> Result<(Cycle, Option<R>), IngestError>
where
    W: Send,
    R: Send,
    P: FnOnce(&Cycle) -> Option<W>,
    F: for<'a> FnOnce(W, &'a Cycle, StepFeed<'a>) -> R + Send,
{
    let label = checked_label(path)?;
    // Held outside the scope, so that the worker may borrow them while this thread reads:
    // the cycle without its two large fields, and those fields.
    let mut cycle_slot: Option<Cycle> = None;
    let mut t_slot = Field5::zeros((0, 0, 0, 0, 0));
    let mut q_slot: Option<Field5> = None;
    let read_done = AtomicBool::new(false);
    let (cycle_ref, t_ref, q_ref, label_ref) = (&mut cycle_slot, &mut t_slot, &mut q_slot, &label);
    let done_ref = &read_done;
    let outcome = std::thread::scope(move |scope| -> Result<Overlap<R>, IngestError> {
        let session = crate::netcdf_session::lock();
        // Opened before the library opens it: see `chunks::StepChunks::plan`.
        let own = std::fs::File::open(path).ok();
        let file = open_quietly(path, label_ref)?;
        let mut reader = reader::Reader::new(&file, label_ref.clone(), config)
            .stepwise()
            .passing_over(pass_over);
        let mut cycle = reader.read(path)?;
        let planned = reader.take_stepwise(path, own.as_ref());
        let fields = Stepwise::of(label_ref, &planned);
        let names = [fields.temperature, fields.humidity].map(|p| p.map(|f| f.name()));
        let complete = fields.complete(&cycle);
        let state = if complete { prepare(&cycle) } else { None };
        *t_ref = std::mem::take(&mut cycle.temperature);
        *q_ref = cycle
            .humidity
            .as_mut()
            .map(|h| std::mem::take(&mut h.values));
        let shell: &Cycle = cycle_ref.insert(cycle);
        let Some(state) = state else {
            fields.fill(t_ref, q_ref.as_mut(), |_| {})?;
            return Ok(Overlap {
                result: None,
                names,
            });
        };
        let (tx, rx) = mpsc::channel();
        let every_core = fields.reads_chunks_in_parallel();
        let worker =
            scope.spawn(move || work(state, shell, StepFeed::new(rx, done_ref, every_core)));
        let filled = fields.fill(t_ref, q_ref.as_mut(), |step| {
            // A worker that stopped early needs no more steps; reading goes on regardless.
            let _ = tx.send(step);
        });
        done_ref.store(true, Ordering::Release);
        drop(tx);
        // Every value is in memory now: close the file (and free the library's chunk
        // caches) and let other reads in while the worker finishes.
        drop(planned);
        drop(reader);
        drop(file);
        drop(session);
        let result = worker
            .join()
            .unwrap_or_else(|panic| std::panic::resume_unwind(panic));
        filled?;
        Ok(Overlap {
            result: Some(result),
            names,
        })
    });
    let outcome = outcome?;
    let Some(mut cycle) = cycle_slot else {
        return Err(IngestError::Damaged {
            file: label,
            detail: "the read ended without a cycle".into(),
        });
    };
    restore(&mut cycle, t_slot, q_slot);
    check_valid(&label, &outcome.names, &cycle)?;
    Ok((cycle, outcome.result))
}

/// Reverses the order of the `levels` planes of `plane` values each in `data` (`[level, ...]`),
/// in place.
pub fn reverse_levels_in_place<T>(data: &mut [T], levels: usize, plane: usize) {
    field::reverse_axis_in_place(data, 1, levels, plane);
}

/// Temperature and humidity of a cycle read a band of latitude rows of one (member, time) step
/// at a time, for [`read_cycle_in_bands`]: exactly the values [`read_cycle`] puts at those
/// rows, bit for bit.
pub struct BandReader<'p, 'f> {
    fields: Stepwise<'p, 'f>,
    /// `[member, time, level, lat, lon]` of the cycle.
    dim: (usize, usize, usize, usize, usize),
    /// Whether a band narrower than a step can be read (see [`BandReader::reads_bands`]).
    bands: bool,
    session: &'p std::sync::MutexGuard<'static, ()>,
}

impl BandReader<'_, '_> {
    /// The cycle's `[member, time, level, lat, lon]`.
    pub fn dim(&self) -> (usize, usize, usize, usize, usize) {
        self.dim
    }

    /// Whether bands of fewer rows than a step are read on their own. Otherwise (a variable
    /// stored in chunks, maybe compressed) every band must be a whole step: reading a chunk
    /// band by band would decompress it again for every band.
    pub fn reads_bands(&self) -> bool {
        self.bands
    }

    /// The NetCDF session lock this read holds, for opening another file in the same session.
    pub fn session(&self) -> &std::sync::MutexGuard<'static, ()> {
        self.session
    }

    /// Reads rows `rows` of step (`member`, `time`) as stored: temperature into `t` and, for
    /// a cycle with humidity, the humidity into `q`, each `[level, row, lon]`, exactly a
    /// band long. [`BandReader::decoding`] makes them what [`read_cycle`] puts at those rows.
    pub fn read_raw(
        &mut self,
        step: (usize, usize),
        rows: std::ops::Range<usize>,
        t: &mut [f32],
        q: Option<&mut [f32]>,
    ) -> Result<(), IngestError> {
        let file = self.fields.file;
        if !self.bands && rows != (0..self.dim.3) {
            return Err(IngestError::Read {
                file: file.to_string(),
                variable: self
                    .fields
                    .temperature
                    .map(|p| p.name())
                    .unwrap_or_default(),
                detail: format!(
                    "rows {}..{}: stored in chunks, read in whole steps only",
                    rows.start, rows.end
                ),
            });
        }
        if let Some(plan) = self.fields.temperature {
            plan.read_rows_raw(file, step, rows.clone(), t)?;
        }
        if let (Some(plan), Some(q)) = (self.fields.humidity, q) {
            plan.read_rows_raw(file, step, rows, q)?;
        }
        Ok(())
    }

    /// The decoding of the bands [`BandReader::read_raw`] reads, to run on any thread.
    pub fn decoding(&self) -> BandDecode {
        BandDecode {
            t: self.fields.temperature.map(|p| p.band_decoding()),
            q: self.fields.humidity.map(|p| p.band_decoding()),
        }
    }

    /// The error [`read_cycle`] gives for the bad value that [`BandDecode::decode`] found.
    pub fn bad_value(&self, bad: &BadValue) -> IngestError {
        let plan = if bad.humidity {
            self.fields.humidity
        } else {
            self.fields.temperature
        };
        match plan {
            Some(plan) => plan.implausible_in_band(
                self.fields.file,
                bad.step,
                bad.rows.clone(),
                bad.index,
                bad.value,
            ),
            None => IngestError::Damaged {
                file: self.fields.file.to_string(),
                detail: "a bad value in a field that is not read".into(),
            },
        }
    }

    /// After every band has been decoded: the check [`read_cycle`] makes on temperature and
    /// humidity, at least one valid value each. `valid` is what the bands' decoding found,
    /// merged ([`BandDecode::decode`]).
    pub fn finish(&self, valid: [bool; 2]) -> Result<(), IngestError> {
        let planned = [self.fields.temperature, self.fields.humidity];
        for (plan, valid) in planned.iter().zip(valid) {
            if let (Some(plan), false) = (plan, valid) {
                return Err(IngestError::NoValidData {
                    file: self.fields.file.to_string(),
                    variable: plan.name(),
                });
            }
        }
        Ok(())
    }
}

/// How raw bands of temperature and humidity become SI values, bottom-up
/// ([`BandReader::decoding`]): plain data, sent to the thread that computes the band.
#[derive(Clone, Debug)]
pub struct BandDecode {
    t: Option<field::BandDecoding>,
    q: Option<field::BandDecoding>,
}

/// A value [`BandDecode::decode`] found implausible; [`BandReader::bad_value`] makes it the
/// error that names file, variable and index.
#[derive(Clone, Debug)]
pub struct BadValue {
    humidity: bool,
    step: (usize, usize),
    rows: std::ops::Range<usize>,
    index: usize,
    value: f32,
}

impl BandDecode {
    /// Decodes the band of rows `rows` of `step` that [`BandReader::read_raw`] read into `t`
    /// and `q`, in place. Returns whether each (temperature, humidity) holds a valid value.
    pub fn decode(
        &self,
        step: (usize, usize),
        rows: std::ops::Range<usize>,
        t: &mut [f32],
        q: Option<&mut [f32]>,
    ) -> Result<[bool; 2], BadValue> {
        let mut valid = [false; 2];
        let fields = [(false, &self.t, Some(t)), (true, &self.q, q)];
        for (humidity, decoding, values) in fields {
            if let (Some(decoding), Some(values)) = (decoding, values) {
                decoding.decode(values).map_err(|index| BadValue {
                    humidity,
                    step,
                    rows: rows.clone(),
                    index,
                    value: values.get(index).copied().unwrap_or(f32::NAN),
                })?;
                valid[usize::from(humidity)] = values.iter().any(|x| !x.is_nan());
            }
        }
        Ok(valid)
    }
}

/// What [`read_cycle_in_bands`] did.
pub enum InBands<R> {
    /// `work` read temperature and humidity band by band, and returned this.
    Done(R),
    /// The whole cycle, exactly as [`read_cycle`] gives it: the file's layout needs
    /// whole-variable reads, or `work` declined.
    Whole(Box<Cycle>),
}

/// Reads everything of the cycle in `path` but the values of temperature and humidity
/// (coordinates, surface fields, file heights) and lets `work` read those a band of latitude
/// rows at a time ([`BandReader`]), holding the NetCDF session for as long as `work` runs.
///
/// `work` sees the cycle with its final shapes and metadata, temperature and humidity left
/// zero (untouched memory), and returns `None` to decline. Where it declines, or where the
/// file's layout needs whole-variable reads (packed as wider types, dimensions out of order,
/// humidity on its own axis or broadcast; `work` is not called then), the read goes on to
/// the whole cycle ([`InBands::Whole`]), without reading again what was read already.
///
/// # Errors
/// As [`read_cycle`] for everything read outside `work`; `work` gets the errors of its own
/// reads.
pub fn read_cycle_in_bands<R>(
    path: &Path,
    config: &IngestConfig,
    work: impl FnOnce(&Cycle, &mut BandReader<'_, '_>) -> Option<R>,
) -> Result<InBands<R>, IngestError> {
    let label = checked_label(path)?;
    let session = crate::netcdf_session::lock();
    // Opened before the library opens it: see `chunks::StepChunks::plan`.
    let own = std::fs::File::open(path).ok();
    let file = open_quietly(path, &label)?;
    let mut reader = reader::Reader::new(&file, label.clone(), config).stepwise();
    let mut cycle = reader.read(path)?;
    let planned = reader.take_stepwise(path, own.as_ref());
    let mut fields = Stepwise::of(&label, &planned);
    if fields.complete(&cycle) {
        let mut bands = true;
        for plan in [fields.temperature, fields.humidity].into_iter().flatten() {
            bands = bands && plan.reads_bands(&label)?;
        }
        let mut band_reader = BandReader {
            fields,
            dim: cycle.temperature.dim(),
            bands,
            session: &session,
        };
        if let Some(done) = work(&cycle, &mut band_reader) {
            return Ok(InBands::Done(done));
        }
        fields = band_reader.fields;
    }
    // The fields planned for stepwise reading, step by step into the cycle: the rest was
    // read whole above.
    let names = [fields.temperature, fields.humidity].map(|p| p.map(|f| f.name()));
    let humidity = cycle.humidity.as_mut().map(|h| &mut h.values);
    fields.fill(&mut cycle.temperature, humidity, |_| {})?;
    check_valid(&label, &names, &cycle)?;
    Ok(InBands::Whole(Box::new(cycle)))
}

/// What the reading scope of [`read_cycle_overlapped`] hands back.
struct Overlap<R> {
    /// The worker's result, when it ran.
    result: Option<R>,
    /// The file names of the temperature and humidity read step by step.
    names: [Option<String>; 2],
}

/// The checks [`read_cycle`] makes on temperature and humidity right after reading them, on
/// the fields read step by step (`names`: temperature, humidity): at least one valid value
/// each.
fn check_valid(file: &str, names: &[Option<String>; 2], cycle: &Cycle) -> Result<(), IngestError> {
    let humidity = cycle.humidity.as_ref().map(|h| &h.values);
    for (name, values) in names.iter().zip([Some(&cycle.temperature), humidity]) {
        if let (Some(name), Some(values)) = (name, values) {
            if values.iter().all(|x| x.is_nan()) {
                return Err(IngestError::NoValidData {
                    file: file.to_string(),
                    variable: name.clone(),
                });
            }
        }
    }
    Ok(())
}

/// Puts the temperature and humidity values back into the cycle.
fn restore(cycle: &mut Cycle, t: Field5, q: Option<Field5>) {
    cycle.temperature = t;
    if let (Some(h), Some(q)) = (cycle.humidity.as_mut(), q) {
        h.values = q;
    }
}

/// The planned stepwise fields of one read.
struct Stepwise<'p, 'f> {
    file: &'p str,
    temperature: Option<&'p field::StepwiseField<'f>>,
    humidity: Option<&'p field::StepwiseField<'f>>,
}

impl<'p, 'f> Stepwise<'p, 'f> {
    /// The temperature and humidity among the fields `planned` for stepwise reading.
    fn of(file: &'p str, planned: &'p [(reader::Bulk, field::StepwiseField<'f>)]) -> Self {
        let plan_of = |want: reader::Bulk| planned.iter().find(|(b, _)| *b == want).map(|(_, f)| f);
        Self {
            file,
            temperature: plan_of(reader::Bulk::Temperature),
            humidity: plan_of(reader::Bulk::Humidity),
        }
    }

    /// Whether every large field of `cycle` can be read step by step.
    fn complete(&self, cycle: &Cycle) -> bool {
        self.temperature.is_some() && (cycle.humidity.is_none() || self.humidity.is_some())
    }

    /// Whether a whole step of either field is read chunk by chunk on every core.
    fn reads_chunks_in_parallel(&self) -> bool {
        [self.temperature, self.humidity]
            .into_iter()
            .flatten()
            .any(field::StepwiseField::has_chunk_plan)
    }
}

impl Stepwise<'_, '_> {
    /// Reads every planned field step by step into its array (`t`, `q`: the cycle's
    /// temperature and humidity, zero where planned), handing each step to `sink` once both
    /// of its fields are in.
    fn fill<'s>(
        &self,
        t: &'s mut Field5,
        q: Option<&'s mut Field5>,
        mut sink: impl FnMut(FilledStep<'s>),
    ) -> Result<(), IngestError> {
        let (members, times, levels, rows, cols) = t.dim();
        let step_len = levels * rows * cols;
        if step_len == 0 {
            return Ok(());
        }
        let (Some(t_all), q_all) = (t.as_slice_mut(), q.and_then(|q| q.as_slice_mut())) else {
            return Ok(());
        };
        let mut q_steps = q_all.map(|q| q.chunks_mut(step_len));
        for (i, t_step) in t_all.chunks_mut(step_len).enumerate() {
            let (member, time) = (i / times.max(1), i % times.max(1));
            if member >= members {
                break;
            }
            if crate::netcdf_session::reads_stopped() {
                return Err(IngestError::Stopped {
                    file: self.file.to_string(),
                    member,
                    time,
                });
            }
            if let Some(plan) = self.temperature {
                plan.read_step(self.file, member, time, t_step)?;
            }
            let q_step = q_steps.as_mut().and_then(|chunks| chunks.next());
            let q_step: Option<&'s [f32]> = match (q_step, self.humidity) {
                (Some(chunk), Some(plan)) => {
                    plan.read_step(self.file, member, time, chunk)?;
                    Some(chunk)
                }
                (chunk, _) => chunk.map(|c| &*c),
            };
            let t_step: &'s [f32] = t_step;
            let view = |data: &'s [f32]| ArrayView3::from_shape((levels, rows, cols), data).ok();
            if let Some(temperature) = view(t_step) {
                sink(FilledStep {
                    member,
                    time,
                    temperature,
                    humidity: q_step.and_then(view),
                });
            }
        }
        Ok(())
    }
}

/// The NetCDF library opens a truncated NetCDF-3 file and reads zeros where bytes are
/// missing; compare the length the header describes with the file's.
fn check_classic_length(path: &Path, label: &str) -> Result<(), IngestError> {
    let io = |source| IngestError::Io {
        file: label.to_string(),
        source,
    };
    let len = std::fs::metadata(path).map_err(io)?.len();
    let mut f = std::fs::File::open(path).map_err(io)?;
    let mut buf: Vec<u8> = Vec::new();
    let mut want: u64 = 64 * 1024;
    loop {
        let target = want.min(len);
        let have = buf.len() as u64;
        if target > have {
            (&mut f)
                .take(target - have)
                .read_to_end(&mut buf)
                .map_err(io)?;
        }
        match classic::data_extent(&buf) {
            Ok(classic::Extent::EndsAt(end, last)) if end > len => {
                let whose = last
                    .map(|v| format!("the data of variable '{v}' end at byte {end}"))
                    .unwrap_or_else(|| format!("its header describes {end} bytes"));
                return Err(IngestError::Damaged {
                    file: label.to_string(),
                    detail: format!("{whose} but the file has {len} bytes"),
                });
            }
            Ok(classic::Extent::EndsAt(..)) | Ok(classic::Extent::Unknown) => return Ok(()),
            Ok(classic::Extent::NeedMore) if (buf.len() as u64) < len => {
                want = want.saturating_mul(4)
            }
            Ok(classic::Extent::NeedMore) => {
                return Err(IngestError::Damaged {
                    file: label.to_string(),
                    detail: "the header ends before its declared contents".into(),
                })
            }
            Err(detail) => {
                return Err(IngestError::Damaged {
                    file: label.to_string(),
                    detail: format!("malformed netcdf-3 header: {detail}"),
                })
            }
        }
    }
}

/// NetCDF-3 files start with `CDF` and a version byte (1, 2 or 5); NetCDF-4 files are HDF5,
/// whose signature sits at byte 0, 512, 1024, ... (HDF5 File Format Specification, §2.2).
/// Returns true for NetCDF-3.
fn check_signature(path: &Path, label: &str) -> Result<bool, IngestError> {
    let io = |source| IngestError::Io {
        file: label.to_string(),
        source,
    };
    let mut f = std::fs::File::open(path).map_err(io)?;
    let mut head = [0u8; 8];
    let mut got = 0;
    while got < head.len() {
        let n = f.read(&mut head[got..]).map_err(io)?;
        if n == 0 {
            break;
        }
        got += n;
    }
    const HDF5: [u8; 8] = [0x89, b'H', b'D', b'F', b'\r', b'\n', 0x1a, b'\n'];
    if got >= 4 && &head[..3] == b"CDF" && matches!(head[3], 1 | 2 | 5) {
        return Ok(true);
    }
    if got == 8 && head == HDF5 {
        return Ok(false);
    }
    // An HDF5 signature may follow a user block; look at the usual offsets.
    let len = std::fs::metadata(path).map_err(io)?.len();
    let mut offset = 512u64;
    while offset + 8 <= len && offset <= 1 << 20 {
        use std::io::Seek;
        f.seek(std::io::SeekFrom::Start(offset)).map_err(io)?;
        let mut sig = [0u8; 8];
        if f.read_exact(&mut sig).is_ok() && sig == HDF5 {
            return Ok(false);
        }
        offset *= 2;
    }
    let detail = if got == 0 {
        "the file is empty".to_string()
    } else {
        let shown: String = head[..got]
            .iter()
            .map(|&b| {
                if b.is_ascii_graphic() || b == b' ' {
                    (b as char).to_string()
                } else {
                    format!("\\x{b:02x}")
                }
            })
            .collect();
        format!("it starts with '{shown}', not a netcdf-3 ('CDF') or netcdf-4 (hdf5) signature")
    };
    Err(IngestError::NotNetcdf {
        file: label.to_string(),
        detail,
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn signature_check_refuses_text_and_empty_files() {
        let dir = std::env::temp_dir().join(format!("hypsogrid-sig-{}", std::process::id()));
        let _ = std::fs::create_dir_all(&dir);
        let text = dir.join("notes.txt");
        let empty = dir.join("empty.nc");
        let _ = std::fs::write(&text, "hello, this is text\n");
        let _ = std::fs::write(&empty, "");
        for (p, want) in [(&text, "starts with 'hello, t'"), (&empty, "empty")] {
            let msg = check_signature(p, &p.display().to_string())
                .map(|_| String::new())
                .unwrap_or_else(|e| e.to_string());
            assert!(
                msg.contains(want) && msg.contains("not a netcdf file"),
                "{msg}"
            );
        }
        let classic = dir.join("c.nc");
        let _ = std::fs::write(&classic, b"CDF\x01\0\0\0\0");
        assert!(check_signature(&classic, "c.nc").is_ok());
        let _ = std::fs::remove_dir_all(&dir);
    }
}
