//! Writes computed heights and layer thicknesses as a CF NetCDF-4 file.
//!
//! The file keeps the input's grid and the input's level order, carries a `below_ground` flag
//! beside every field, and names the constants and the method that made it. The write is
//! atomic: everything goes into `<path>.partial-<pid>` beside the target and is renamed over
//! `path` only when complete, so a failed run never leaves a half-written output behind.
//!
//! Fields are stored as `f32` (as in [`crate::model`]); non-finite values become the
//! `_FillValue` on the way out, one pass per variable into one reused buffer, and every
//! variable is written with a single call.

use std::path::{Path, PathBuf};

use ndarray::{s, Array4, Array5, ArrayView2};
use rayon::prelude::*;

use crate::model::{Cycle, Heights, Layer, Vertical};
use crate::physics::Constants;

/// `_FillValue` of every float variable: the netCDF default fill for `float` (`NC_FILL_FLOAT`
/// in netcdf.h), so that readers which ignore the attribute still see a recognisable value.
pub const FLOAT_FILL_VALUE: f32 = 9.969_21e36;

/// CF standard name of layer thickness (CF standard name table).
const THICKNESS_STANDARD_NAME: &str =
    "atmosphere_layer_thickness_expressed_as_geopotential_height_difference";

/// Meanings of the flag values 0 and 1 of every below-ground flag (CF §3.5 flags).
const BELOW_GROUND_FLAG_MEANINGS: &str = "above_ground below_ground";

/// How to write.
#[derive(Clone, Debug, Default)]
pub struct OutputOptions {
    /// Line for the global `history` attribute (the command line that made the file).
    pub history: String,
    /// zlib deflate level 1-9 for NetCDF-4 output; None = uncompressed.
    pub deflate_level: Option<i32>,
}

/// Why an output file could not be written. Every variant names the target file.
#[derive(Debug, thiserror::Error)]
pub enum OutputError {
    /// The directory the file should go into does not exist.
    #[error("cannot write '{path}': directory '{dir}' does not exist")]
    MissingDirectory {
        /// The output file.
        path: PathBuf,
        /// Its parent directory.
        dir: PathBuf,
    },
    /// The path ends in `..` or `/` and so names no file.
    #[error("cannot write '{path}': the path names no file")]
    NoFileName {
        /// The output path.
        path: PathBuf,
    },
    /// A path the NetCDF library cannot create (see [`crate::netcdf_session::usable_path`]).
    #[error("cannot write '{path}': the NetCDF library cannot create a path that contains a backslash ('\\'): choose a name without one")]
    Backslash {
        /// The output path.
        path: PathBuf,
    },
    /// A deflate level outside 1–9.
    #[error("cannot write '{path}': deflate level {level} is out of range: expected 1 to 9")]
    DeflateLevel {
        /// The output file.
        path: PathBuf,
        /// The level asked for.
        level: i32,
    },
    /// The cycle has an empty axis, so there is nothing to write.
    #[error("cannot write '{path}': the cycle has no {axis}")]
    EmptyAxis {
        /// The output file.
        path: PathBuf,
        /// Which axis is empty (`times`, `levels`, `latitudes`, ...).
        axis: &'static str,
    },
    /// An array of the heights does not match the cycle's shape.
    #[error(
        "cannot write '{path}': {what} has shape {found:?}, expected {expected:?} from the cycle"
    )]
    Shape {
        /// The output file.
        path: PathBuf,
        /// Which array.
        what: String,
        /// Shape implied by the cycle.
        expected: Vec<usize>,
        /// Shape found.
        found: Vec<usize>,
    },
    /// Two layers would get the same variable name.
    #[error("cannot write '{path}': layer {label} hPa is listed twice (variable '{variable}')")]
    DuplicateLayer {
        /// The output file.
        path: PathBuf,
        /// The layer's label in hPa.
        label: String,
        /// The variable name both layers map to.
        variable: String,
    },
    /// The cycle's reference time is not an RFC 3339 date-time.
    #[error(
        "cannot write '{path}': reference time '{value}' is not rfc 3339: expected e.g. 2030-01-15T00:00:00Z"
    )]
    ReferenceTime {
        /// The output file.
        path: PathBuf,
        /// The text found.
        value: String,
    },
    /// The netCDF library refused an operation.
    #[error("cannot write '{path}': {context}: {source}")]
    Netcdf {
        /// The output file.
        path: PathBuf,
        /// What was being done (names the variable or attribute).
        context: String,
        /// The library's error.
        #[source]
        source: netcdf::Error,
    },
    /// A file-system operation failed.
    #[error("cannot write '{path}': {context}: {source}")]
    Io {
        /// The output file.
        path: PathBuf,
        /// What was being done.
        context: String,
        /// The operating system's error.
        #[source]
        source: std::io::Error,
    },
}

/// Writes `heights` computed from `cycle` to `path` as CF-1.8 NetCDF-4.
///
/// Layout: coordinates `latitude`, `longitude` (file order), the vertical coordinate in the
/// input file's order (`air_pressure` in Pa for isobaric input, `model_level_number` counted
/// from 1 at the model top for hybrid input), `time` (seconds since the reference time, with
/// `forecast_reference_time` and `forecast_period` when the reference time is known) and
/// `realization` when the cycle has more than one member. Data: `geopotential_height` and its
/// `below_ground` flag, and per layer `thickness_<bottom>_<top>` (hPa, `p` for a decimal
/// point) with `<name>_below_ground`.
///
/// The write goes to `<path>.partial-<pid>` and is renamed over `path` when complete; on any
/// error the partial file is removed. An existing file at `path` is replaced.
pub fn write_heights(
    cycle: &Cycle,
    heights: &Heights,
    path: &Path,
    options: &OutputOptions,
) -> Result<(), OutputError> {
    let layers: Vec<Layer> = heights.thickness.iter().map(|th| th.layer).collect();
    let plan = Plan::new(cycle, &layers, path, options)?;
    plan.check_heights(heights)?;
    let partial = PartialFile::new(path)?;
    let session = crate::netcdf_session::lock();
    let about = HeightsAbout {
        method: &heights.method,
        constants: &heights.constants,
        layers: &layers,
    };
    let mut file = create_defined(&plan, cycle, &about, options, partial.path(), &session)?;
    if let Some(level) = options.deflate_level {
        match Sink::for_compressed(file, &plan, partial.path(), level)? {
            Sink::Chunks(chunks) => {
                write_chunks(&chunks, &plan, cycle, heights)?;
                if !chunks.writer.close() {
                    return Err(chunk_error(&plan, "closing the file"));
                }
                drop(session);
                return partial.commit();
            }
            Sink::Library(reopened) => file = reopened,
        }
    }
    write_data(&mut file, &plan, cycle, heights)?;
    file.close()
        .map_err(plan.nc_error(format!("closing '{}'", partial.path().display())))?;
    drop(session);
    partial.commit()
}

/// [`write_data`] for compressed output written as stored chunks ([`ChunkSink`]): each step
/// copied into the file's form, then compressed and written.
fn write_chunks(
    chunks: &ChunkSink,
    plan: &Plan,
    cycle: &Cycle,
    heights: &Heights,
) -> Result<(), OutputError> {
    let dim = (plan.levels, plan.rows, plan.cols);
    let mut band = FileRows::new(dim, heights.thickness.len());
    for m in 0..plan.members {
        for t in 0..plan.times {
            let fields = band.fields_mut(dim).ok_or_else(|| OutputError::Shape {
                path: plan.path.clone(),
                what: "the step buffers".into(),
                expected: vec![dim.0, dim.1, dim.2],
                found: vec![],
            })?;
            let z = &heights.geopotential_height;
            copy_into(fields.heights, z.slice(s![m, t, .., .., ..]));
            copy_into(
                fields.flags,
                heights.below_ground.slice(s![m, t, .., .., ..]),
            );
            for ((values, flags), layer) in fields.thickness.into_iter().zip(&heights.thickness) {
                copy_into(values, layer.values.slice(s![m, t, .., ..]));
                copy_into(flags, layer.below_ground.slice(s![m, t, .., ..]));
            }
            band.to_file_form(cycle.levels_top_down_in_file);
            chunks.put_step(plan, (m, t), 0..plan.rows, &band)?;
        }
    }
    Ok(())
}

/// `from`'s values, in logical order, into `to`.
fn copy_into<'a, T: Copy + 'a>(to: &mut [T], from: impl IntoIterator<Item = &'a T>) {
    to.iter_mut().zip(from).for_each(|(t, f)| *t = *f);
}

/// An output file being written band by band: everything defined (as [`write_heights`]
/// defines it) when it is created, then the values of each band of latitude rows of each
/// (member, time) step ([`HeightsWriter::put_rows`]), then closed and renamed into place
/// ([`HeightsWriter::commit`]). Dropped uncommitted, the partial file is removed.
pub struct HeightsWriter {
    plan: Plan,
    /// Declared before `partial`, so that the file is closed before the partial file is
    /// removed on drop.
    sink: Sink,
    partial: PartialFile,
    reverse: bool,
    /// Rows written so far of each (member, time) step, member-major.
    written: Vec<usize>,
    /// Flags of the rows put but not yet written (see [`StagedFlags`]).
    staged: StagedFlags,
}

/// Bytes of the data sieve buffer of the HDF5 library under NetCDF-4 (its default, which
/// the NetCDF library leaves as it is). A write to a contiguous variable of at most this many
/// bytes at once goes through the buffer: the library reads the 64 KiB around it from the
/// file, changes it and writes it back. A band of 39 rows of the 0.5° grid holds 28,080
/// bytes of flags a level: written band by band, the flags cost 24.6 MB read back and 27 MB
/// written for 9.6 MB of flags (`strace` of `hypsogrid compute`).
const SIEVE_BYTES: usize = 64 * 1024;

/// Rows of `cols` values of `value_bytes` bytes each that make one write longer than
/// [`SIEVE_BYTES`], so that the library writes it straight to the file.
pub(crate) fn rows_past_sieve(cols: usize, value_bytes: usize) -> usize {
    SIEVE_BYTES / (value_bytes * cols).max(1) + 1
}

/// The below-ground flags (`below_ground`, then each layer's) of contiguous rows of one step,
/// kept until each level's run of rows is longer than [`SIEVE_BYTES`] (and so are the rows
/// left of the step), the step is complete, or a band that does not continue them comes;
/// then written in one call a variable, each level's run going past the sieve buffer.
#[derive(Debug, Default)]
struct StagedFlags {
    /// The step and rows held; `None` when nothing is held.
    held: Option<((usize, usize), std::ops::Range<usize>)>,
    /// Rows room is made for, a plane.
    room: usize,
    /// `[plane, row, lon]` with `room` rows a plane: the levels of `below_ground`, then one
    /// plane a layer.
    bytes: Vec<u8>,
}

impl HeightsWriter {
    /// Creates the partial file beside `path` and defines everything in it for `cycle`; the
    /// caller holds the NetCDF session lock (`session`) until the writer is committed or
    /// dropped.
    pub fn create(
        cycle: &Cycle,
        about: &HeightsAbout<'_>,
        path: &Path,
        options: &OutputOptions,
        session: &std::sync::MutexGuard<'static, ()>,
    ) -> Result<Self, OutputError> {
        let plan = Plan::new(cycle, about.layers, path, options)?;
        let partial = PartialFile::new(path)?;
        let file = create_defined(&plan, cycle, about, options, partial.path(), session)?;
        let sink = match options.deflate_level {
            Some(level) => Sink::for_compressed(file, &plan, partial.path(), level)?,
            None => Sink::Library(file),
        };
        let steps = plan.members * plan.times;
        Ok(Self {
            plan,
            sink,
            partial,
            reverse: cycle.levels_top_down_in_file,
            written: vec![0; steps],
            staged: StagedFlags::default(),
        })
    }

    /// Whether levels go into the file top-down (as the input had them): what
    /// [`FileRows::to_file_form`] needs to know.
    pub fn levels_reversed(&self) -> bool {
        self.reverse
    }

    /// Writes `band`, rows `rows` of member `m` and time step `t`, into every data variable.
    pub fn put_rows(
        &mut self,
        (m, t): (usize, usize),
        rows: std::ops::Range<usize>,
        band: &FileRows,
    ) -> Result<(), OutputError> {
        let plan = &self.plan;
        let n = rows.len();
        let plane = n * plan.cols;
        let len = plan.levels * plane;
        let expected = (plan.levels, n, plan.cols);
        // A band in the file's form holds `dim` in every buffer (`FileRows::fields_mut`).
        let fits = band.ready
            && band.dim == expected
            && band.thickness.len() == plan.thickness_names.len();
        if m >= plan.members || t >= plan.times || rows.end > plan.rows || !fits {
            return Err(OutputError::Shape {
                path: plan.path.clone(),
                what: format!(
                    "the band of rows {}..{} of step ({m}, {t}){}",
                    rows.start,
                    rows.end,
                    if band.ready {
                        ""
                    } else {
                        " (not in the file's form)"
                    }
                ),
                expected: vec![expected.0, expected.1, expected.2],
                found: vec![band.dim.0, band.dim.1, band.dim.2],
            });
        }
        let file = match &mut self.sink {
            Sink::Library(file) => file,
            Sink::Chunks(chunks) => {
                chunks.put_step(plan, (m, t), rows, band)?;
                if let Some(w) = self.written.get_mut(m * plan.times + t) {
                    *w += n;
                }
                return Ok(());
            }
        };
        let name = "geopotential_height";
        data_variable(file, plan, name)?
            .put_values(
                &band.heights[..len],
                plan.row_extents((m, t), rows.clone(), true),
            )
            .map_err(plan.nc_error(format!("writing variable '{name}'")))?;
        for ((values, _), name) in band.thickness.iter().zip(&plan.thickness_names) {
            data_variable(file, plan, name)?
                .put_values(
                    &values[..plane],
                    plan.row_extents((m, t), rows.clone(), false),
                )
                .map_err(plan.nc_error(format!("writing variable '{name}'")))?;
        }
        let continues = matches!(&self.staged.held,
            Some((step, held)) if *step == (m, t) && held.end == rows.start
                && held.len() + n <= self.staged.room);
        if !continues {
            self.write_staged()?;
        }
        let plan = &self.plan;
        let planes = plan.levels + plan.thickness_names.len();
        let staged = &mut self.staged;
        let past_sieve = rows_past_sieve(plan.cols, 1);
        if staged.held.is_none() {
            // Room for twice the rows past the sieve buffer and one band more, at most the
            // grid (see the flush below).
            staged.room = (2 * past_sieve + n).min(plan.rows.max(n));
            // Fresh zeroed memory rather than a zero fill: every byte used is copied in
            // before it is written (the fill faulted in and cleared 5.6 MB at 0.5°, a
            // seventh of the batch's page faults). Room left over from a larger band is
            // simply not used.
            let bytes = planes * staged.room * plan.cols;
            if staged.bytes.len() < bytes {
                staged.bytes = crate::buffers::zeroed_field(bytes);
            }
        }
        let (_, held) = staged.held.get_or_insert(((m, t), rows.start..rows.start));
        let at = (held.end - held.start) * plan.cols;
        let room = staged.room * plan.cols;
        let sources = band
            .flags
            .chunks_exact(plane)
            .take(plan.levels)
            .chain(band.thickness.iter().map(|(_, flags)| &flags[..plane]));
        for (p, source) in sources.enumerate() {
            staged.bytes[p * room + at..p * room + at + plane].copy_from_slice(source);
        }
        held.end = rows.end;
        // Written once past the sieve buffer, unless the rows left of the step would not be:
        // they are then kept for one write with these.
        let past = |rows: usize| rows >= past_sieve;
        let full = held.end == plan.rows || (past(held.len()) && past(plan.rows - held.end));
        if let Some(w) = self.written.get_mut(m * plan.times + t) {
            *w += n;
        }
        if full {
            self.write_staged()?;
        }
        Ok(())
    }

    /// Writes the flags staged, if any, in one call a variable.
    fn write_staged(&mut self) -> Result<(), OutputError> {
        let plan = &self.plan;
        let staged = &mut self.staged;
        let Some((step, rows)) = staged.held.take() else {
            return Ok(());
        };
        let run = rows.len() * plan.cols;
        let room = staged.room * plan.cols;
        let planes = plan.levels + plan.thickness_names.len();
        // Each plane's run to the front, one after the other.
        for p in 1..planes {
            staged.bytes.copy_within(p * room..p * room + run, p * run);
        }
        let name = "below_ground";
        let Sink::Library(file) = &mut self.sink else {
            return Ok(());
        };
        data_variable(file, plan, name)?
            .put_values(
                flag_bytes(&staged.bytes[..plan.levels * run]),
                plan.row_extents(step, rows.clone(), true),
            )
            .map_err(plan.nc_error(format!("writing variable '{name}'")))?;
        for (i, name) in plan.thickness_names.iter().enumerate() {
            let at = (plan.levels + i) * run;
            let flag_name = format!("{name}_below_ground");
            data_variable(file, plan, &flag_name)?
                .put_values(
                    flag_bytes(&staged.bytes[at..at + run]),
                    plan.row_extents(step, rows.clone(), false),
                )
                .map_err(plan.nc_error(format!("writing variable '{flag_name}'")))?;
        }
        Ok(())
    }

    /// Closes the file and renames it into place. Every row of every step must have been
    /// written, once: the variables have no fill pass (see [`write_heights`]), so a row left
    /// out would read as whatever the file held. A step whose count of rows written is not
    /// the grid's is refused, and nothing is renamed into place.
    pub fn commit(mut self) -> Result<(), OutputError> {
        self.write_staged()?;
        let Self {
            plan,
            sink,
            partial,
            written,
            ..
        } = self;
        if let Some((i, &n)) = written.iter().enumerate().find(|(_, &n)| n != plan.rows) {
            return Err(OutputError::Shape {
                path: plan.path.clone(),
                what: format!(
                    "the rows written of step ({}, {})",
                    i / plan.times.max(1),
                    i % plan.times.max(1)
                ),
                expected: vec![plan.rows],
                found: vec![n],
            });
        }
        match sink {
            Sink::Library(file) => file
                .close()
                .map_err(plan.nc_error(format!("closing '{}'", partial.path().display())))?,
            Sink::Chunks(chunks) => {
                if !chunks.writer.close() {
                    return Err(chunk_error(&plan, "closing the file"));
                }
            }
        }
        partial.commit()
    }
}

/// Where [`HeightsWriter`] puts its values.
enum Sink {
    /// Through the NetCDF library.
    Library(netcdf::FileMut),
    /// Compressed output: whole steps compressed here, a chunk a thread, and written as
    /// stored chunks ([`ChunkSink`]).
    Chunks(ChunkSink),
}

/// Compressed output written chunk by chunk: the NetCDF library defines the file (chunks
/// of one latitude-longitude plane, the shuffle and deflate filters) and closes it, then
/// each step's planes are shuffled (HDF5's byte shuffle: byte 0 of every value, then byte
/// 1, ...) and deflated (zlib format, as HDF5's deflate filter stores it: RFC 1950/1951) on
/// every core (libdeflate), and handed to HDF5 as stored chunks. The library compresses one
/// chunk at a time on the thread that calls it: 0.55–0.82 s for the 0.5° cycle at level 1,
/// three fifths of it in zlib, against 0.19–0.29 s this way. libdeflate's level 1 took
/// 0.218 s against 0.198 s with `miniz_oxide`'s (medians of 9 alternate runs) and gives the
/// file zlib gives (18.2 MB; `miniz_oxide` 19.7 MB).
struct ChunkSink {
    writer: crate::hdf5::ChunkWriter,
    /// Compression level (zlib's 1–9, which libdeflate takes as its own of the same number).
    level: libdeflater::CompressionLvl,
    /// Per dataset (heights, flags, then per layer thickness and flags), whether the
    /// shuffle filter comes first.
    shuffled: Vec<bool>,
}

/// Data variables in the order [`ChunkSink`] opens them.
fn data_variable_names(plan: &Plan) -> Vec<String> {
    let mut names = vec![
        "geopotential_height".to_string(),
        "below_ground".to_string(),
    ];
    for name in &plan.thickness_names {
        names.push(name.clone());
        names.push(format!("{name}_below_ground"));
    }
    names
}

fn chunk_error(plan: &Plan, what: &str) -> OutputError {
    OutputError::Netcdf {
        path: plan.path.clone(),
        context: format!("writing compressed chunks: {what}"),
        source: netcdf::Error::Str("refused by the HDF5 library".into()),
    }
}

impl Sink {
    /// The sink of a compressed output whose NetCDF definition is `file`: stored chunks
    /// where every data variable's pipeline is deflate after an optional shuffle, else the
    /// library (the file opened again).
    fn for_compressed(
        file: netcdf::FileMut,
        plan: &Plan,
        partial: &Path,
        level: i32,
    ) -> Result<Self, OutputError> {
        file.close()
            .map_err(plan.nc_error(format!("closing '{}'", partial.display())))?;
        let names = data_variable_names(plan);
        let refs: Vec<&str> = names.iter().map(String::as_str).collect();
        let writer = crate::hdf5::ChunkWriter::open(partial, &refs);
        // Deflate, after the shuffle or not: what `create_defined` asks for.
        let shuffled: Option<Vec<bool>> = writer.as_ref().and_then(|w| {
            (0..names.len())
                .map(|i| {
                    let p = crate::hdf5::Pipeline::of(w.filters(i)?)?;
                    p.deflate.map(|_| p.shuffle.is_some())
                })
                .collect()
        });
        match (writer, shuffled, libdeflater::CompressionLvl::new(level)) {
            (Some(writer), Some(shuffled), Ok(level)) => Ok(Sink::Chunks(ChunkSink {
                writer,
                level,
                shuffled,
            })),
            _ => netcdf::append(partial)
                .map(Sink::Library)
                .map_err(plan.nc_error(format!("opening '{}' again", partial.display()))),
        }
    }
}

impl ChunkSink {
    /// Compresses and writes step (`m`, `t`), which `band` holds whole in the file's form.
    fn put_step(
        &self,
        plan: &Plan,
        (m, t): (usize, usize),
        rows: std::ops::Range<usize>,
        band: &FileRows,
    ) -> Result<(), OutputError> {
        if rows != (0..plan.rows) {
            return Err(OutputError::Shape {
                path: plan.path.clone(),
                what: format!(
                    "rows {}..{} of step ({m}, {t}) for compressed output, which takes whole steps",
                    rows.start, rows.end
                ),
                expected: vec![plan.rows],
                found: vec![rows.len()],
            });
        }
        let plane = plan.rows * plan.cols;
        let start = |level: Option<usize>| -> Vec<u64> {
            plan.step_indices((m, t))
                .into_iter()
                .chain(level)
                .chain([0, 0])
                .map(|i| i as u64)
                .collect()
        };
        // (dataset, chunk start, the plane's bytes: f32 values or flags).
        enum Plane<'a> {
            Values(&'a [f32]),
            Flags(&'a [u8]),
        }
        let mut planes: Vec<(usize, Vec<u64>, Plane<'_>)> = Vec::new();
        for k in 0..plan.levels {
            let at = k * plane..(k + 1) * plane;
            planes.push((0, start(Some(k)), Plane::Values(&band.heights[at.clone()])));
            planes.push((1, start(Some(k)), Plane::Flags(&band.flags[at])));
        }
        for (i, (values, flags)) in band.thickness.iter().enumerate() {
            planes.push((2 + 2 * i, start(None), Plane::Values(&values[..plane])));
            planes.push((3 + 2 * i, start(None), Plane::Flags(&flags[..plane])));
        }
        let stored: Vec<Vec<u8>> = planes
            .par_iter()
            .map_init(
                || libdeflater::Compressor::new(self.level),
                |deflater, (dataset, _, data)| {
                    let bytes: Vec<u8> = match data {
                        Plane::Values(v) if self.shuffled[*dataset] => crate::hdf5::shuffle_f32(v),
                        Plane::Values(v) => v.iter().flat_map(|x| x.to_le_bytes()).collect(),
                        // A shuffle of one-byte values leaves them as they are.
                        Plane::Flags(f) => f.to_vec(),
                    };
                    let mut stored = vec![0; deflater.zlib_compress_bound(bytes.len())];
                    // The bound holds any stream: not reached.
                    let n = deflater.zlib_compress(&bytes, &mut stored).ok()?;
                    stored.truncate(n);
                    Some(stored)
                },
            )
            .collect::<Option<_>>()
            .ok_or_else(|| chunk_error(plan, &format!("deflating step ({m}, {t})")))?;
        for ((dataset, start, _), bytes) in planes.iter().zip(&stored) {
            if !self.writer.write(*dataset, start, bytes) {
                return Err(chunk_error(plan, &format!("step ({m}, {t})")));
            }
        }
        Ok(())
    }
}

/// One band of latitude rows of one step, written by [`HeightsWriter::put_rows`]: the
/// buffers the band's heights, flags and layers are computed into
/// ([`FileRows::fields_mut`], `[level, row, lon]` bottom-up and `[row, lon]`), then turned in
/// place into what the file holds ([`FileRows::to_file_form`], on any thread): levels in the
/// file's order, non-finite values as the fill value. No copy is made, and the buffers are
/// reused from band to band.
#[derive(Debug, Default)]
pub struct FileRows {
    heights: crate::buffers::HugeField<f32>,
    flags: crate::buffers::HugeField<u8>,
    thickness: Vec<(Vec<f32>, Vec<u8>)>,
    /// `[level, row, lon]` of the band held.
    dim: (usize, usize, usize),
    /// Whether the values are in the file's form.
    ready: bool,
}

/// The buffers of one band, as [`FileRows::fields_mut`] lends them.
#[derive(Debug)]
pub struct BandFields<'a> {
    /// Heights, `[level, row, lon]` bottom-up.
    pub heights: &'a mut [f32],
    /// Below-ground flags (0 or 1), `[level, row, lon]` bottom-up.
    pub flags: &'a mut [u8],
    /// Per layer, thickness and flag, `[row, lon]`.
    pub thickness: Vec<(&'a mut [f32], &'a mut [u8])>,
}

impl FileRows {
    /// Buffers for bands of up to `rows` rows of `levels` levels and `cols` longitudes, and
    /// `layers` layers. Heights and flags are fresh zeroed memory on huge pages from their
    /// first byte to their last (`buffers::HugeField`), so that their first touch is cheap.
    pub fn new((levels, rows, cols): (usize, usize, usize), layers: usize) -> Self {
        let plane = rows * cols;
        Self {
            heights: crate::buffers::HugeField::zeroed(levels * plane),
            flags: crate::buffers::HugeField::zeroed(levels * plane),
            thickness: (0..layers)
                .map(|_| (vec![0.0; plane], vec![0; plane]))
                .collect(),
            dim: (0, 0, 0),
            ready: false,
        }
    }

    /// The buffers for a band of `dim` (`[level, row, lon]`) to be computed into; `None`
    /// when the band is larger than the buffers.
    pub fn fields_mut(&mut self, dim: (usize, usize, usize)) -> Option<BandFields<'_>> {
        let (levels, rows, cols) = dim;
        let plane = rows * cols;
        self.ready = false;
        let fits = self.heights.len() >= levels * plane
            && self.flags.len() >= levels * plane
            && self
                .thickness
                .iter()
                .all(|(v, f)| v.len() >= plane && f.len() >= plane);
        if !fits {
            return None;
        }
        self.dim = dim;
        Some(BandFields {
            heights: &mut self.heights[..levels * plane],
            flags: &mut self.flags[..levels * plane],
            thickness: self
                .thickness
                .iter_mut()
                .map(|(v, f)| (&mut v[..plane], &mut f[..plane]))
                .collect(),
        })
    }

    /// Turns the band computed into [`FileRows::fields_mut`] into the file's form, in
    /// place: non-finite values become the fill value, flags 0 or 1, and levels go top-down
    /// when `reverse` ([`HeightsWriter::levels_reversed`]).
    pub fn to_file_form(&mut self, reverse: bool) {
        let (levels, rows, cols) = self.dim;
        let plane = rows * cols;
        let len = levels * plane;
        // `fields_mut` made sure every buffer holds `dim`.
        let (heights, flags) = (&mut self.heights[..len], &mut self.flags[..len]);
        heights.iter_mut().for_each(|v| *v = to_file_value(*v));
        flags.iter_mut().for_each(|v| *v = u8::from(*v != 0));
        for (v, f) in &mut self.thickness {
            v[..plane].iter_mut().for_each(|x| *x = to_file_value(*x));
            f[..plane].iter_mut().for_each(|x| *x = u8::from(*x != 0));
        }
        if reverse {
            crate::ingest::reverse_levels_in_place(heights, levels, plane);
            crate::ingest::reverse_levels_in_place(flags, levels, plane);
        }
        self.ready = true;
    }
}

/// Flags (0 or 1) as the bytes of the file's `byte` variables, the same values.
fn flag_bytes(flags: &[u8]) -> &[i8] {
    // SAFETY: `u8` and `i8` have the same size and alignment and every bit pattern is valid
    // in both; the slice is only read, for as long as `flags` is borrowed.
    unsafe { std::slice::from_raw_parts(flags.as_ptr().cast::<i8>(), flags.len()) }
}

/// The variable name of a layer's thickness: `thickness_<bottom>_<top>` in hPa, with `p`
/// standing for a decimal point (`thickness_1000_500`, `thickness_1000_512p5`).
pub fn thickness_variable_name(layer: &Layer) -> String {
    let label = layer.label_hpa().replace('-', "_").replace('.', "p");
    format!("thickness_{label}")
}

/// Everything checked and derived before the file is created, so that input errors never
/// touch the file system.
struct Plan {
    path: PathBuf,
    members: usize,
    times: usize,
    levels: usize,
    rows: usize,
    cols: usize,
    /// Time units, `seconds since ...`, when the reference time is known.
    time_units: Option<String>,
    thickness_names: Vec<String>,
}

impl Plan {
    /// Bytes of the data variables when stored uncompressed: per step, `f32` heights and
    /// `i8` flags on every level, and an `f32` thickness and `i8` flag per layer.
    fn data_bytes(&self) -> u64 {
        let plane = (self.rows * self.cols) as u64;
        let steps = (self.members * self.times) as u64;
        let per_point = 5 * (self.levels + self.thickness_names.len()) as u64;
        steps * plane * per_point
    }

    fn new(
        cycle: &Cycle,
        layers: &[Layer],
        path: &Path,
        options: &OutputOptions,
    ) -> Result<Self, OutputError> {
        let path_buf = path.to_path_buf();
        if let Some(level) = options.deflate_level {
            if !(1..=9).contains(&level) {
                return Err(OutputError::DeflateLevel {
                    path: path_buf,
                    level,
                });
            }
        }
        let members = cycle.members;
        let times = cycle.lead_times_s.len();
        let levels = cycle.vertical.levels();
        let rows = cycle.grid.rows();
        let cols = cycle.grid.cols();
        for (n, axis) in [
            (members, "members"),
            (times, "times"),
            (levels, "levels"),
            (rows, "latitudes"),
            (cols, "longitudes"),
        ] {
            if n == 0 {
                return Err(OutputError::EmptyAxis {
                    path: path_buf,
                    axis,
                });
            }
        }
        if let Vertical::Hybrid { a_half_pa, b_half } = &cycle.vertical {
            check_shape(
                path,
                "the hybrid b coefficients",
                &[a_half_pa.len()],
                &[b_half.len()],
            )?;
        }
        let mut thickness_names: Vec<String> = Vec::with_capacity(layers.len());
        for layer in layers {
            let name = thickness_variable_name(layer);
            if thickness_names.contains(&name) {
                return Err(OutputError::DuplicateLayer {
                    path: path_buf,
                    label: layer.label_hpa(),
                    variable: name,
                });
            }
            thickness_names.push(name);
        }
        let time_units = match &cycle.reference_time {
            Some(value) => Some(format!(
                "seconds since {}",
                udunits_time_from_rfc3339(value).ok_or_else(|| OutputError::ReferenceTime {
                    path: path_buf.clone(),
                    value: value.clone(),
                })?
            )),
            None => None,
        };
        Ok(Self {
            path: path_buf,
            members,
            times,
            levels,
            rows,
            cols,
            time_units,
            thickness_names,
        })
    }

    /// Checks that the arrays of `heights` have the shapes of the cycle the plan was made for.
    fn check_heights(&self, heights: &Heights) -> Result<(), OutputError> {
        let path = &self.path;
        let shape5 = [self.members, self.times, self.levels, self.rows, self.cols];
        let shape4 = [self.members, self.times, self.rows, self.cols];
        check_shape(
            path,
            "geopotential_height",
            &shape5,
            heights.geopotential_height.shape(),
        )?;
        check_shape(path, "below_ground", &shape5, heights.below_ground.shape())?;
        for (layer, name) in heights.thickness.iter().zip(&self.thickness_names) {
            check_shape(path, name, &shape4, layer.values.shape())?;
            check_shape(
                path,
                &format!("{name}_below_ground"),
                &shape4,
                layer.below_ground.shape(),
            )?;
        }
        Ok(())
    }

    /// Dimension names of a 3-D field, outermost first.
    fn dims5(&self, level_dim: &'static str) -> Vec<&'static str> {
        let mut dims = Vec::with_capacity(5);
        if self.members > 1 {
            dims.push("realization");
        }
        dims.extend(["time", level_dim, "latitude", "longitude"]);
        dims
    }

    /// Dimension names of a 2-D field, outermost first.
    fn dims4(&self) -> Vec<&'static str> {
        let mut dims = Vec::with_capacity(4);
        if self.members > 1 {
            dims.push("realization");
        }
        dims.extend(["time", "latitude", "longitude"]);
        dims
    }

    /// Chunk shape for compressed variables: one latitude-longitude plane per chunk, the unit
    /// that map tools read.
    fn plane_chunks(&self, ndims: usize) -> Vec<usize> {
        let mut chunks = vec![1; ndims];
        chunks[ndims - 2] = self.rows;
        chunks[ndims - 1] = self.cols;
        chunks
    }

    /// The indices of step `(m, t)` along a data variable's leading dimensions: the member
    /// (only where the file has a `realization` axis) and the time.
    fn step_indices(&self, (m, t): (usize, usize)) -> Vec<usize> {
        if self.members > 1 {
            vec![m, t]
        } else {
            vec![t]
        }
    }

    /// The extents of rows `rows` of step `(m, t)` in a data variable: every level of it
    /// for a variable on levels, else its one plane.
    fn row_extents(
        &self,
        (m, t): (usize, usize),
        rows: std::ops::Range<usize>,
        on_levels: bool,
    ) -> Vec<netcdf::Extent> {
        let mut e: Vec<netcdf::Extent> = Vec::with_capacity(5);
        e.extend(
            self.step_indices((m, t))
                .into_iter()
                .map(|i| netcdf::Extent::from(i..i + 1)),
        );
        if on_levels {
            e.push((0..self.levels).into());
        }
        e.push(rows.into());
        e.push((..).into());
        e
    }

    fn nc_error(&self, context: impl Into<String>) -> impl FnOnce(netcdf::Error) -> OutputError {
        let path = self.path.clone();
        let context = context.into();
        move |source| OutputError::Netcdf {
            path,
            context,
            source,
        }
    }
}

fn check_shape(
    path: &Path,
    what: &str,
    expected: &[usize],
    found: &[usize],
) -> Result<(), OutputError> {
    if expected == found {
        Ok(())
    } else {
        Err(OutputError::Shape {
            path: path.to_path_buf(),
            what: what.to_string(),
            expected: expected.to_vec(),
            found: found.to_vec(),
        })
    }
}

/// Turns an RFC 3339 date-time (`2030-01-15T06:00:00Z`, `2030-01-15 06:00:00+02:00`) into
/// the UDUNITS form CF time units use (`2030-01-15 06:00:00`, `2030-01-15 06:00:00 +02:00`).
/// Returns `None` when the text is not of that shape.
fn udunits_time_from_rfc3339(value: &str) -> Option<String> {
    let value = value.trim();
    let (date, rest) = value.split_at_checked(10)?;
    let d: Vec<&str> = date.split('-').collect();
    let date_ok = d.len() == 3
        && d[0].len() == 4
        && d[1].len() == 2
        && d[2].len() == 2
        && d.iter().all(|p| p.bytes().all(|b| b.is_ascii_digit()))
        && (1..=12).contains(&d[1].parse::<u32>().ok()?)
        && (1..=31).contains(&d[2].parse::<u32>().ok()?);
    if !date_ok {
        return None;
    }
    let rest = rest.strip_prefix(['T', 't', ' '])?;
    // Split the clock from the zone: `Z`, `+hh:mm` or `-hh:mm`.
    let (clock, zone) = if let Some(clock) = rest.strip_suffix(['Z', 'z']) {
        (clock, None)
    } else if rest.len() > 6 && matches!(rest.as_bytes()[rest.len() - 6], b'+' | b'-') {
        let (clock, zone) = rest.split_at(rest.len() - 6);
        (clock, Some(zone))
    } else {
        return None;
    };
    let t: Vec<&str> = clock.split(':').collect();
    let digits = |x: &str| !x.is_empty() && x.bytes().all(|b| b.is_ascii_digit());
    let seconds_ok = t.len() == 3 && {
        let (whole, fraction) = t[2].split_once('.').unwrap_or((t[2], "0"));
        whole.len() == 2 && digits(whole) && digits(fraction)
    };
    if !seconds_ok || t[0].len() != 2 || t[1].len() != 2 || !digits(t[0]) || !digits(t[1]) {
        return None;
    }
    let hour: u32 = t[0].parse().ok()?;
    let minute: u32 = t[1].parse().ok()?;
    let second: f64 = t[2].parse().ok()?;
    if hour > 23 || minute > 59 || !(0.0..61.0).contains(&second) {
        return None;
    }
    match zone {
        None => Some(format!("{date} {clock}")),
        Some(zone) => {
            let z = zone.as_bytes();
            let zone_ok = z[1..3].iter().all(u8::is_ascii_digit)
                && z[3] == b':'
                && z[4..6].iter().all(u8::is_ascii_digit);
            if !zone_ok {
                None
            } else if &zone[1..] == "00:00" {
                Some(format!("{date} {clock}"))
            } else {
                Some(format!("{date} {clock} {zone}"))
            }
        }
    }
}

/// Asks the file system to allocate the first `bytes` of the file at `path` now, in one
/// call, without changing the file's size (Linux `fallocate` with `FALLOC_FL_KEEP_SIZE`).
///
/// Called with the bytes of an uncompressed file's data variables, which are less than the
/// finished file (its metadata comes on top), so no block is left allocated past its end.
/// Without it, ext4 reserves and maps blocks 4 KiB at a time as the library's writes reach
/// them (delayed allocation): about a tenth of the CPU samples of `hypsogrid compute` on the
/// 0.5° bench cycle, on the thread that reads and writes, which paces the run. The
/// allocation is only a hint: a file system that cannot do it (or an error) leaves the
/// writes to allocate as they go, and the file is the same either way.
fn reserve_blocks(path: &Path, bytes: u64) {
    #[cfg(target_os = "linux")]
    {
        use std::os::fd::AsRawFd;
        let Ok(len) = libc::off_t::try_from(bytes) else {
            return;
        };
        if len == 0 {
            return;
        }
        if let Ok(file) = std::fs::OpenOptions::new().write(true).open(path) {
            // SAFETY: `file` is an open descriptor for the duration of the call; the call
            // reads no memory of ours. Its result is deliberately not used (see above).
            let _ = unsafe { libc::fallocate(file.as_raw_fd(), libc::FALLOC_FL_KEEP_SIZE, 0, len) };
        }
    }
    #[cfg(not(target_os = "linux"))]
    let _ = (path, bytes);
}

/// The partial file beside the target; removed on drop unless committed, so every early
/// return (and a panic) cleans up.
struct PartialFile {
    target: PathBuf,
    partial: PathBuf,
    committed: bool,
}

impl PartialFile {
    fn new(target: &Path) -> Result<Self, OutputError> {
        let file_name = target.file_name().ok_or_else(|| OutputError::NoFileName {
            path: target.to_path_buf(),
        })?;
        let dir = match target.parent() {
            Some(dir) if !dir.as_os_str().is_empty() => dir.to_path_buf(),
            _ => PathBuf::from("."),
        };
        if !crate::netcdf_session::usable_path(target) {
            return Err(OutputError::Backslash {
                path: target.to_path_buf(),
            });
        }
        if !dir.is_dir() {
            return Err(OutputError::MissingDirectory {
                path: target.to_path_buf(),
                dir,
            });
        }
        let mut partial_name = file_name.to_os_string();
        partial_name.push(format!(".partial-{}", std::process::id()));
        Ok(Self {
            target: target.to_path_buf(),
            partial: dir.join(partial_name),
            committed: false,
        })
    }

    fn path(&self) -> &Path {
        &self.partial
    }

    fn commit(mut self) -> Result<(), OutputError> {
        std::fs::rename(&self.partial, &self.target).map_err(|source| OutputError::Io {
            path: self.target.clone(),
            context: format!("renaming '{}' into place", self.partial.display()),
            source,
        })?;
        self.committed = true;
        Ok(())
    }
}

impl Drop for PartialFile {
    fn drop(&mut self) {
        if !self.committed {
            // The partial file may not exist yet (the error came before creation); there is
            // nothing more to do when removal fails.
            let _ = std::fs::remove_file(&self.partial);
        }
    }
}

/// What the file says of how the heights were made, known before any is computed.
pub struct HeightsAbout<'a> {
    /// The method, one sentence (the global `method` attribute).
    pub method: &'a str,
    /// The constants computed with.
    pub constants: &'a Constants,
    /// The layers, in the order of the thickness variables.
    pub layers: &'a [Layer],
}

/// Creates `partial` and defines everything in it: global attributes, dimensions and
/// coordinates (with their values), the data variables with their attributes and storage,
/// no data yet; for uncompressed output, the data's blocks reserved ([`reserve_blocks`]).
/// The caller holds the NetCDF session (`_session`).
fn create_defined(
    plan: &Plan,
    cycle: &Cycle,
    about: &HeightsAbout<'_>,
    options: &OutputOptions,
    partial: &Path,
    _session: &std::sync::MutexGuard<'static, ()>,
) -> Result<netcdf::FileMut, OutputError> {
    let mut file = netcdf::create_with(partial, netcdf::Options::NETCDF4)
        .map_err(plan.nc_error(format!("creating '{}'", partial.display())))?;

    write_global_attributes(&mut file, plan, cycle, about, options)?;
    write_coordinates(&mut file, plan, cycle)?;
    let level_dim = level_dimension_name(&cycle.vertical);

    // Geopotential height and its flag.
    let dims5 = plan.dims5(level_dim);
    {
        let name = "geopotential_height";
        let mut var = file
            .add_variable::<f32>(name, &dims5)
            .map_err(plan.nc_error(format!("defining variable '{name}'")))?;
        prepare_float_variable(&mut var, plan, name, options, dims5.len())?;
        put_text(&mut var, plan, name, "standard_name", "geopotential_height")?;
        put_text(&mut var, plan, name, "long_name", "geopotential height")?;
        put_text(&mut var, plan, name, "units", "m")?;
        put_text(&mut var, plan, name, "ancillary_variables", "below_ground")?;
        put_text(
            &mut var,
            plan,
            name,
            "comment",
            &format!(
                "geopotential metres of g0 = {} m s-2; heights of levels below the ground are \
                 extrapolated (see below_ground)",
                about.constants.standard_gravity
            ),
        )?;
        put_coordinates_attribute(&mut var, plan, name)?;
    }
    {
        let name = "below_ground";
        let mut var = file
            .add_variable::<i8>(name, &dims5)
            .map_err(plan.nc_error(format!("defining variable '{name}'")))?;
        prepare_flag_variable(&mut var, plan, name, options, dims5.len())?;
        put_text(
            &mut var,
            plan,
            name,
            "long_name",
            "pressure level lies below the ground",
        )?;
        put_text(
            &mut var,
            plan,
            name,
            "comment",
            "1 where the level lies below the model surface: there geopotential_height is \
             extrapolated downward from the surface with temperature increasing at 6.5 K/km \
             (common practice, as in sea-level pressure reduction); mask these points where \
             only physical heights are wanted",
        )?;
    }

    // One thickness variable and flag per layer.
    let dims4 = plan.dims4();
    for (layer, name) in about.layers.iter().zip(&plan.thickness_names) {
        let flag_name = format!("{name}_below_ground");
        let label = layer.label_hpa();
        {
            let mut var = file
                .add_variable::<f32>(name, &dims4)
                .map_err(plan.nc_error(format!("defining variable '{name}'")))?;
            prepare_float_variable(&mut var, plan, name, options, dims4.len())?;
            put_text(
                &mut var,
                plan,
                name,
                "standard_name",
                THICKNESS_STANDARD_NAME,
            )?;
            put_text(
                &mut var,
                plan,
                name,
                "long_name",
                &format!("thickness of the {label} hPa layer"),
            )?;
            put_text(&mut var, plan, name, "units", "m")?;
            put_attr(
                &mut var,
                plan,
                name,
                "layer_bottom_pressure",
                layer.bottom_pa,
            )?;
            put_attr(&mut var, plan, name, "layer_top_pressure", layer.top_pa)?;
            put_text(&mut var, plan, name, "layer_pressure_units", "Pa")?;
            put_text(&mut var, plan, name, "ancillary_variables", &flag_name)?;
            put_coordinates_attribute(&mut var, plan, name)?;
        }
        {
            let mut var = file
                .add_variable::<i8>(&flag_name, &dims4)
                .map_err(plan.nc_error(format!("defining variable '{flag_name}'")))?;
            prepare_flag_variable(&mut var, plan, &flag_name, options, dims4.len())?;
            put_text(
                &mut var,
                plan,
                &flag_name,
                "long_name",
                &format!("bottom of the {label} hPa layer lies below the ground"),
            )?;
            put_text(
                &mut var,
                plan,
                &flag_name,
                "comment",
                &format!(
                    "1 where the layer bottom lies below the model surface: there {name} \
                     rests on heights extrapolated downward from the surface at 6.5 K/km \
                     (common practice)"
                ),
            )?;
        }
    }
    if options.deflate_level.is_none() {
        reserve_blocks(partial, plan.data_bytes());
    }
    Ok(file)
}

/// A data variable of the file, defined by [`create_defined`].
fn data_variable<'f>(
    file: &'f mut netcdf::FileMut,
    plan: &Plan,
    name: &str,
) -> Result<netcdf::VariableMut<'f>, OutputError> {
    let missing = || OutputError::Netcdf {
        path: plan.path.clone(),
        context: format!("writing variable '{name}'"),
        source: netcdf::Error::NotFound(name.to_string()),
    };
    file.variable_mut(name).ok_or_else(missing)
}

/// Writes every value of `heights` into the variables [`create_defined`] made: each 3-D field
/// a few planes at a time, each 2-D field in one call.
fn write_data(
    file: &mut netcdf::FileMut,
    plan: &Plan,
    cycle: &Cycle,
    heights: &Heights,
) -> Result<(), OutputError> {
    let reverse = cycle.levels_top_down_in_file;
    let mut floats: Vec<f32> = Vec::new();
    let mut flags: Vec<i8> = Vec::new();
    let name = "geopotential_height";
    put_5d(
        &mut data_variable(file, plan, name)?,
        &heights.geopotential_height,
        reverse,
        WRITE_GROUP_BYTES,
        &mut floats,
        to_file_value,
    )
    .map_err(plan.nc_error(format!("writing variable '{name}'")))?;
    let name = "below_ground";
    put_5d(
        &mut data_variable(file, plan, name)?,
        &heights.below_ground,
        reverse,
        WRITE_GROUP_BYTES,
        &mut flags,
        to_file_flag,
    )
    .map_err(plan.nc_error(format!("writing variable '{name}'")))?;
    for (layer, name) in heights.thickness.iter().zip(&plan.thickness_names) {
        copy_4d(&layer.values, &mut floats, to_file_value);
        data_variable(file, plan, name)?
            .put_values(&floats, ..)
            .map_err(plan.nc_error(format!("writing variable '{name}'")))?;
        let flag_name = format!("{name}_below_ground");
        copy_4d(&layer.below_ground, &mut flags, to_file_flag);
        data_variable(file, plan, &flag_name)?
            .put_values(&flags, ..)
            .map_err(plan.nc_error(format!("writing variable '{flag_name}'")))?;
    }
    Ok(())
}

fn level_dimension_name(vertical: &Vertical) -> &'static str {
    match vertical {
        Vertical::Isobaric { .. } => "air_pressure",
        Vertical::Hybrid { .. } => "model_level_number",
    }
}

fn write_global_attributes(
    file: &mut netcdf::FileMut,
    plan: &Plan,
    cycle: &Cycle,
    about: &HeightsAbout<'_>,
    options: &OutputOptions,
) -> Result<(), OutputError> {
    let mut references = String::from(
        "hypsometric equation: Wallace, J. M. and Hobbs, P. V. (2006), Atmospheric Science, \
         2nd ed., section 3.2",
    );
    if matches!(cycle.vertical, Vertical::Hybrid { .. }) {
        references.push_str(
            "; hybrid-level geopotential: Simmons, A. J. and Burridge, D. M. (1981), \
             Mon. Wea. Rev. 109, 758-766",
        );
    }
    let texts: [(&str, String); 6] = [
        ("Conventions", "CF-1.8".to_string()),
        (
            "title",
            "geopotential height and layer thickness by the hypsometric equation".to_string(),
        ),
        ("history", options.history.clone()),
        ("source", cycle.source.display().to_string()),
        ("method", about.method.to_string()),
        ("references", references),
    ];
    for (name, value) in texts {
        file.add_attribute(name, value)
            .map_err(plan.nc_error(format!("writing global attribute '{name}'")))?;
    }
    let numbers = [
        ("dry_air_gas_constant", about.constants.dry_air_gas_constant),
        ("standard_gravity", about.constants.standard_gravity),
        ("molar_mass_ratio", about.constants.molar_mass_ratio),
    ];
    for (name, value) in numbers {
        file.add_attribute(name, value)
            .map_err(plan.nc_error(format!("writing global attribute '{name}'")))?;
    }
    file.add_attribute(
        "constants_units",
        "dry_air_gas_constant: J kg-1 K-1; standard_gravity: m s-2; molar_mass_ratio: 1",
    )
    .map_err(plan.nc_error("writing global attribute 'constants_units'"))?;
    if !cycle.notes.is_empty() {
        file.add_attribute("ingest_notes", cycle.notes.join("\n"))
            .map_err(plan.nc_error("writing global attribute 'ingest_notes'"))?;
    }
    Ok(())
}

fn write_coordinates(
    file: &mut netcdf::FileMut,
    plan: &Plan,
    cycle: &Cycle,
) -> Result<(), OutputError> {
    let level_dim = level_dimension_name(&cycle.vertical);
    let mut dims: Vec<(&str, usize)> = Vec::with_capacity(5);
    if plan.members > 1 {
        dims.push(("realization", plan.members));
    }
    dims.extend([
        ("time", plan.times),
        (level_dim, plan.levels),
        ("latitude", plan.rows),
        ("longitude", plan.cols),
    ]);
    for (name, len) in dims {
        file.add_dimension(name, len)
            .map_err(plan.nc_error(format!("defining dimension '{name}'")))?;
    }

    if plan.members > 1 {
        let name = "realization";
        let mut var = file
            .add_variable::<i32>(name, &[name])
            .map_err(plan.nc_error(format!("defining variable '{name}'")))?;
        put_text(&mut var, plan, name, "standard_name", "realization")?;
        put_text(
            &mut var,
            plan,
            name,
            "long_name",
            "ensemble member, counted from 0 in the order of the input",
        )?;
        let values: Vec<i32> = (0..plan.members)
            .map(|m| i32::try_from(m).unwrap_or(i32::MAX))
            .collect();
        var.put_values(&values, ..)
            .map_err(plan.nc_error(format!("writing variable '{name}'")))?;
    }

    write_time(file, plan, cycle)?;
    write_vertical(file, plan, cycle, level_dim)?;

    for (name, standard_name, units, axis, values) in [
        (
            "latitude",
            "latitude",
            "degrees_north",
            "Y",
            &cycle.grid.latitudes,
        ),
        (
            "longitude",
            "longitude",
            "degrees_east",
            "X",
            &cycle.grid.longitudes,
        ),
    ] {
        let mut var = file
            .add_variable::<f64>(name, &[name])
            .map_err(plan.nc_error(format!("defining variable '{name}'")))?;
        put_text(&mut var, plan, name, "standard_name", standard_name)?;
        put_text(&mut var, plan, name, "long_name", standard_name)?;
        put_text(&mut var, plan, name, "units", units)?;
        put_text(&mut var, plan, name, "axis", axis)?;
        var.put_values(values, ..)
            .map_err(plan.nc_error(format!("writing variable '{name}'")))?;
    }
    Ok(())
}

fn write_time(file: &mut netcdf::FileMut, plan: &Plan, cycle: &Cycle) -> Result<(), OutputError> {
    // Lead times are whole seconds, far inside the range f64 holds exactly.
    let leads: Vec<f64> = cycle.lead_times_s.iter().map(|&s| s as f64).collect();
    match &plan.time_units {
        Some(units) => {
            {
                let name = "time";
                let mut var = file
                    .add_variable::<f64>(name, &[name])
                    .map_err(plan.nc_error(format!("defining variable '{name}'")))?;
                put_text(&mut var, plan, name, "standard_name", "time")?;
                put_text(&mut var, plan, name, "long_name", "validity time")?;
                put_text(&mut var, plan, name, "units", units)?;
                put_text(&mut var, plan, name, "calendar", "standard")?;
                put_text(&mut var, plan, name, "axis", "T")?;
                var.put_values(&leads, ..)
                    .map_err(plan.nc_error(format!("writing variable '{name}'")))?;
            }
            {
                let name = "forecast_reference_time";
                let mut var = file
                    .add_variable::<f64>(name, &[])
                    .map_err(plan.nc_error(format!("defining variable '{name}'")))?;
                put_text(&mut var, plan, name, "standard_name", name)?;
                put_text(&mut var, plan, name, "long_name", "forecast reference time")?;
                put_text(&mut var, plan, name, "units", units)?;
                put_text(&mut var, plan, name, "calendar", "standard")?;
                var.put_value(0.0_f64, ())
                    .map_err(plan.nc_error(format!("writing variable '{name}'")))?;
            }
            {
                let name = "forecast_period";
                let mut var = file
                    .add_variable::<f64>(name, &["time"])
                    .map_err(plan.nc_error(format!("defining variable '{name}'")))?;
                put_text(&mut var, plan, name, "standard_name", name)?;
                put_text(&mut var, plan, name, "long_name", "lead time")?;
                put_text(&mut var, plan, name, "units", "s")?;
                var.put_values(&leads, ..)
                    .map_err(plan.nc_error(format!("writing variable '{name}'")))?;
            }
        }
        None => {
            // Without a reference time the validity times are unknown: the axis can only
            // say how long after the (unknown) start each step is, which CF calls the
            // forecast period.
            let name = "time";
            let mut var = file
                .add_variable::<f64>(name, &[name])
                .map_err(plan.nc_error(format!("defining variable '{name}'")))?;
            put_text(&mut var, plan, name, "standard_name", "forecast_period")?;
            put_text(
                &mut var,
                plan,
                name,
                "long_name",
                "lead time (the input named no forecast reference time)",
            )?;
            put_text(&mut var, plan, name, "units", "s")?;
            put_text(&mut var, plan, name, "axis", "T")?;
            var.put_values(&leads, ..)
                .map_err(plan.nc_error(format!("writing variable '{name}'")))?;
        }
    }
    Ok(())
}

fn write_vertical(
    file: &mut netcdf::FileMut,
    plan: &Plan,
    cycle: &Cycle,
    level_dim: &'static str,
) -> Result<(), OutputError> {
    let reverse = cycle.levels_top_down_in_file;
    let in_file_order = |mut v: Vec<f64>| {
        if reverse {
            v.reverse();
        }
        v
    };
    let name = level_dim;
    match &cycle.vertical {
        Vertical::Isobaric { pressure_pa } => {
            let mut var = file
                .add_variable::<f64>(name, &[name])
                .map_err(plan.nc_error(format!("defining variable '{name}'")))?;
            put_text(&mut var, plan, name, "standard_name", "air_pressure")?;
            put_text(&mut var, plan, name, "long_name", "pressure")?;
            put_text(&mut var, plan, name, "units", "Pa")?;
            put_text(&mut var, plan, name, "positive", "down")?;
            put_text(&mut var, plan, name, "axis", "Z")?;
            let values = in_file_order(pressure_pa.clone());
            var.put_values(&values, ..)
                .map_err(plan.nc_error(format!("writing variable '{name}'")))?;
        }
        Vertical::Hybrid { a_half_pa, b_half } => {
            let n = plan.levels;
            // Full-level pressure is the mean of the bounding half-level pressures, so its
            // coefficients are the means of theirs (Simmons and Burridge 1981, as in the IFS
            // documentation, Part III).
            let a_full: Vec<f64> = (0..n)
                .map(|k| 0.5 * (a_half_pa[k] + a_half_pa[k + 1]))
                .collect();
            let b_full: Vec<f64> = (0..n).map(|k| 0.5 * (b_half[k] + b_half[k + 1])).collect();
            // Bottom-up index k is level number n - k counted from 1 at the model top.
            let numbers: Vec<i32> = (0..n)
                .map(|k| i32::try_from(n - k).unwrap_or(i32::MAX))
                .collect();
            let numbers: Vec<i32> = if reverse {
                numbers.into_iter().rev().collect()
            } else {
                numbers
            };
            let mut var = file
                .add_variable::<i32>(name, &[name])
                .map_err(plan.nc_error(format!("defining variable '{name}'")))?;
            put_text(&mut var, plan, name, "standard_name", "model_level_number")?;
            put_text(&mut var, plan, name, "long_name", "model full level number")?;
            put_text(&mut var, plan, name, "units", "1")?;
            put_text(&mut var, plan, name, "positive", "down")?;
            put_text(&mut var, plan, name, "axis", "Z")?;
            put_attr(&mut var, plan, name, "full_level_a", in_file_order(a_full))?;
            put_attr(&mut var, plan, name, "full_level_b", in_file_order(b_full))?;
            put_attr(
                &mut var,
                plan,
                name,
                "half_level_a",
                in_file_order(a_half_pa.clone()),
            )?;
            put_attr(
                &mut var,
                plan,
                name,
                "half_level_b",
                in_file_order(b_half.clone()),
            )?;
            put_text(
                &mut var,
                plan,
                name,
                "comment",
                "hybrid sigma-pressure levels, numbered from 1 at the model top; full-level \
                 pressure = full_level_a + full_level_b * surface_air_pressure (Pa), where \
                 full_level_a (Pa) and full_level_b (1) are the means of the coefficients of \
                 the half levels above and below; half_level_a (Pa) and half_level_b (1) give \
                 the half-level pressures the same way; all listed in the order of this \
                 coordinate",
            )?;
            var.put_values(&numbers, ..)
                .map_err(plan.nc_error(format!("writing variable '{name}'")))?;
        }
    }
    Ok(())
}

fn put_text(
    var: &mut netcdf::VariableMut<'_>,
    plan: &Plan,
    variable: &str,
    name: &str,
    value: &str,
) -> Result<(), OutputError> {
    put_attr(var, plan, variable, name, value)
}

fn put_attr<T: Into<netcdf::AttributeValue>>(
    var: &mut netcdf::VariableMut<'_>,
    plan: &Plan,
    variable: &str,
    name: &str,
    value: T,
) -> Result<(), OutputError> {
    var.put_attribute(name, value)
        .map(|_| ())
        .map_err(plan.nc_error(format!(
            "writing attribute '{name}' of variable '{variable}'"
        )))
}

fn put_coordinates_attribute(
    var: &mut netcdf::VariableMut<'_>,
    plan: &Plan,
    variable: &str,
) -> Result<(), OutputError> {
    if plan.time_units.is_some() {
        put_text(
            var,
            plan,
            variable,
            "coordinates",
            "forecast_period forecast_reference_time",
        )?;
    }
    Ok(())
}

/// Fill value, deflate and chunking of a float data variable; all before any data is written.
fn prepare_float_variable(
    var: &mut netcdf::VariableMut<'_>,
    plan: &Plan,
    name: &str,
    options: &OutputOptions,
    ndims: usize,
) -> Result<(), OutputError> {
    set_storage(var, plan, name, options, ndims)?;
    // After `set_nofill`, which drops the attribute: the value still marks missing data.
    put_attr(var, plan, name, "_FillValue", FLOAT_FILL_VALUE)
}

/// Flag attributes, deflate and chunking of a below-ground flag variable.
fn prepare_flag_variable(
    var: &mut netcdf::VariableMut<'_>,
    plan: &Plan,
    name: &str,
    options: &OutputOptions,
    ndims: usize,
) -> Result<(), OutputError> {
    put_attr(var, plan, name, "flag_values", vec![0_i8, 1_i8])?;
    put_text(var, plan, name, "flag_meanings", BELOW_GROUND_FLAG_MEANINGS)?;
    put_attr(var, plan, name, "valid_range", vec![0_i8, 1_i8])?;
    set_storage(var, plan, name, options, ndims)
}

/// Storage of a data variable: no fill pass, then deflate and chunking when asked for.
///
/// Every value of these variables is written (missing ones as `_FillValue`), so the library's
/// default of writing the fill value over the whole variable when its storage is allocated,
/// before the data, would write every byte twice. Switching it off also removes a
/// `_FillValue` attribute put before it, so float variables put theirs afterwards: CF
/// readers find missing values by that attribute. A file that fails half-way is never seen
/// unwritten: it is the `.partial` file, removed on error.
fn set_storage(
    var: &mut netcdf::VariableMut<'_>,
    plan: &Plan,
    name: &str,
    options: &OutputOptions,
    ndims: usize,
) -> Result<(), OutputError> {
    // SAFETY: the crate marks this unsafe because reading a value never written would read
    // uninitialised file contents; `write_file` writes every element of every variable
    // prepared here before the file is closed and renamed into place.
    unsafe { var.set_nofill() }
        .map_err(plan.nc_error(format!("switching off the fill pass of variable '{name}'")))?;
    if let Some(level) = options.deflate_level {
        var.set_chunking(&plan.plane_chunks(ndims))
            .map_err(plan.nc_error(format!("setting chunking of variable '{name}'")))?;
        var.set_compression(level, true)
            .map_err(plan.nc_error(format!("setting compression of variable '{name}'")))?;
    }
    Ok(())
}

/// The value written for one stored value: non-finite values become the fill value.
#[inline]
fn to_file_value(v: f32) -> f32 {
    if v.is_finite() {
        v
    } else {
        FLOAT_FILL_VALUE
    }
}

/// The byte written for one below-ground flag: any non-zero value becomes 1.
#[inline]
fn to_file_flag(v: u8) -> i8 {
    i8::from(v != 0)
}

/// Copies one latitude-longitude plane into `out` through `convert`.
fn copy_plane<S: Copy, D>(src: ArrayView2<'_, S>, out: &mut [D], convert: impl Fn(S) -> D) {
    match src.as_slice() {
        Some(values) => {
            for (o, &v) in out.iter_mut().zip(values) {
                *o = convert(v);
            }
        }
        None => {
            for (o, &v) in out.iter_mut().zip(src.iter()) {
                *o = convert(v);
            }
        }
    }
}

/// Bytes of one write of a 3-D field: a few latitude-longitude planes at a time, so that the
/// staging buffer is reused from group to group and stays in cache instead of being a fresh
/// copy of the whole field (48 MB of heights on a 0.5° global grid, whose first touch cost
/// about a quarter of the write on a virtual machine).
const WRITE_GROUP_BYTES: usize = 4 << 20;

/// Writes a 3-D field `[member, time, level, lat, lon]` into `var` in the file's order
/// (levels reversed when `reverse`), converting each value: groups of whole planes of one
/// member and time step, at most `group_bytes` a group (at least one plane), one call each.
/// The variable has a member dimension only when the field has more than one member (as
/// [`Plan::dims5`] defines it).
fn put_5d<S, D>(
    var: &mut netcdf::VariableMut<'_>,
    field: &Array5<S>,
    reverse: bool,
    group_bytes: usize,
    buf: &mut Vec<D>,
    convert: impl Fn(S) -> D + Sync,
) -> Result<(), netcdf::Error>
where
    S: Copy + Sync,
    D: netcdf::NcTypeDescriptor + Copy + Default + Send,
{
    let (members, times, levels, rows, cols) = field.dim();
    let plane = rows * cols;
    if field.is_empty() {
        return Ok(());
    }
    let group = (group_bytes / (plane * std::mem::size_of::<D>()).max(1)).clamp(1, levels);
    buf.clear();
    buf.resize(group * plane, D::default());
    for m in 0..members {
        for t in 0..times {
            for k_start in (0..levels).step_by(group) {
                let k_end = (k_start + group).min(levels);
                let out = &mut buf[..(k_end - k_start) * plane];
                copy_levels(field, (m, t), k_start, reverse, out, &convert);
                let mut extents: Vec<netcdf::Extent> = Vec::with_capacity(5);
                if members > 1 {
                    extents.push((m..m + 1).into());
                }
                extents.push((t..t + 1).into());
                extents.push((k_start..k_end).into());
                extents.push((..).into());
                extents.push((..).into());
                var.put_values(out, extents)?;
            }
        }
    }
    Ok(())
}

/// Copies the file levels `k_start..` of member and time `mt` into `out` (as many whole
/// planes as `out` holds), converting each value; file level `k` is the field's level `k`,
/// or `levels − 1 − k` when `reverse`. One latitude-longitude plane per parallel task.
fn copy_levels<S, D>(
    field: &Array5<S>,
    (m, t): (usize, usize),
    k_start: usize,
    reverse: bool,
    out: &mut [D],
    convert: &(impl Fn(S) -> D + Sync),
) where
    S: Copy + Sync,
    D: Copy + Send,
{
    let (_, _, levels, rows, cols) = field.dim();
    let plane = rows * cols;
    if plane == 0 {
        return;
    }
    out.par_chunks_mut(plane).enumerate().for_each(|(j, o)| {
        let k_file = k_start + j;
        let k = if reverse { levels - 1 - k_file } else { k_file };
        copy_plane(field.slice(s![m, t, k, .., ..]), o, convert);
    });
}

/// Copies a 2-D field into `buf` in memory order, converting each value.
fn copy_4d<S, D>(field: &Array4<S>, buf: &mut Vec<D>, convert: impl Fn(S) -> D + Sync)
where
    S: Copy + Sync,
    D: Copy + Default + Send,
{
    let (_, times, rows, cols) = field.dim();
    let plane = rows * cols;
    buf.clear();
    buf.resize(field.len(), D::default());
    if plane == 0 {
        return;
    }
    buf.par_chunks_mut(plane).enumerate().for_each(|(i, out)| {
        copy_plane(field.slice(s![i / times, i % times, .., ..]), out, &convert);
    });
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::ShapeBuilder;
    use proptest::prelude::*;

    /// The reservation holds the blocks asked for and leaves the file's size alone (the
    /// writes that follow set it). ext4, XFS, Btrfs and tmpfs all allocate for `fallocate`;
    /// this runs in the system's temporary folder.
    #[cfg(target_os = "linux")]
    #[test]
    fn reserved_blocks_are_held_without_growing_the_file() {
        use std::os::unix::fs::MetadataExt;
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("reserved");
        std::fs::write(&path, [7_u8; 10]).unwrap();
        let before = std::fs::metadata(&path).unwrap().blocks() * 512;
        reserve_blocks(&path, 1 << 20);
        let meta = std::fs::metadata(&path).unwrap();
        assert_eq!(meta.len(), 10, "the size is the writes' to set");
        assert!(
            meta.blocks() * 512 >= before + (1 << 20) - 4096,
            "{} bytes of blocks after reserving 1 MiB (before: {before})",
            meta.blocks() * 512
        );
        assert_eq!(std::fs::read(&path).unwrap(), [7_u8; 10]);
        // Nothing to reserve, or a file that is not there: nothing happens, nothing fails.
        reserve_blocks(&path, 0);
        reserve_blocks(&dir.path().join("absent"), 1 << 20);
        assert!(!dir.path().join("absent").exists());
    }

    #[test]
    fn thickness_names_use_hpa_and_p_for_the_point() {
        let layer = |b: f64, t: f64| Layer {
            bottom_pa: b,
            top_pa: t,
        };
        assert_eq!(
            thickness_variable_name(&layer(100_000.0, 50_000.0)),
            "thickness_1000_500"
        );
        assert_eq!(
            thickness_variable_name(&layer(100_000.0, 51_250.0)),
            "thickness_1000_512p5"
        );
        assert_eq!(
            thickness_variable_name(&layer(85_000.0, 70_000.0)),
            "thickness_850_700"
        );
    }

    #[test]
    fn rfc3339_reference_times_become_udunits_times() {
        assert_eq!(
            udunits_time_from_rfc3339("2030-01-15T06:00:00Z").as_deref(),
            Some("2030-01-15 06:00:00")
        );
        assert_eq!(
            udunits_time_from_rfc3339("2030-01-15 06:00:00+00:00").as_deref(),
            Some("2030-01-15 06:00:00")
        );
        assert_eq!(
            udunits_time_from_rfc3339("2030-01-15T06:30:00.5-03:00").as_deref(),
            Some("2030-01-15 06:30:00.5 -03:00")
        );
        for bad in [
            "",
            "2030-01-15",
            "2030-13-15T00:00:00Z",
            "2030-01-15T25:00:00Z",
            "2030-01-15T00:00:00",
            "yesterday at noon",
            "2030-01-15T00:00:00+0100",
            "2030-01-15T00:00:-1Z",
            "2030-01-15T+1:00:00Z",
            "2030-01-15T00:00:1e1Z",
            "2030-01-15T00:00:infZ",
            "2030-01-15T00:00:00.Z",
            "2030-01-15T00:00:00é00:00",
        ] {
            assert_eq!(udunits_time_from_rfc3339(bad), None, "{bad}");
        }
    }

    /// The whole field in file order through [`copy_levels`], as [`put_5d`] copies it.
    fn copy_5d<S: Copy + Sync, D: Copy + Default + Send>(
        field: &Array5<S>,
        reverse: bool,
        buf: &mut Vec<D>,
        convert: impl Fn(S) -> D + Sync,
    ) {
        let (members, times, levels, rows, cols) = field.dim();
        let step = levels * rows * cols;
        buf.clear();
        buf.resize(field.len(), D::default());
        for m in 0..members {
            for t in 0..times {
                let at = (m * times + t) * step;
                copy_levels(field, (m, t), 0, reverse, &mut buf[at..at + step], &convert);
            }
        }
    }

    #[test]
    fn plane_groups_write_the_whole_field_in_file_order() {
        // Two members, two times, five levels of 3 x 4, written one plane and then two
        // planes a group (odd level count: a short last group), levels reversed or not;
        // read back through the NetCDF library and compared value by value.
        let field = Array5::from_shape_fn((2, 2, 5, 3, 4), |(m, t, k, r, c)| {
            if (m + t + k + r + c) % 7 == 0 {
                f32::NAN
            } else {
                (10_000 * m + 1000 * t + 100 * k + 10 * r + c) as f32
            }
        });
        let dir = tempfile::tempdir().unwrap();
        for (group_planes, reverse) in [(1, false), (2, true), (5, false), (9, true)] {
            let path = dir.path().join(format!("g{group_planes}_{reverse}.nc"));
            {
                let _session = crate::netcdf_session::lock();
                let mut file = netcdf::create(&path).unwrap();
                for (name, len) in [
                    ("realization", 2),
                    ("time", 2),
                    ("level", 5),
                    ("y", 3),
                    ("x", 4),
                ] {
                    file.add_dimension(name, len).unwrap();
                }
                let mut var = file
                    .add_variable::<f32>("z", &["realization", "time", "level", "y", "x"])
                    .unwrap();
                let mut buf = Vec::new();
                let group_bytes = group_planes * 3 * 4 * std::mem::size_of::<f32>();
                put_5d(
                    &mut var,
                    &field,
                    reverse,
                    group_bytes,
                    &mut buf,
                    to_file_value,
                )
                .unwrap();
            }
            let _session = crate::netcdf_session::lock();
            let file = netcdf::open(&path).unwrap();
            let back: Vec<f32> = file.variable("z").unwrap().get_values(..).unwrap();
            let back = Array5::from_shape_vec((2, 2, 5, 3, 4), back).unwrap();
            for ((m, t, k, r, c), &v) in field.indexed_iter() {
                let k_file = if reverse { 4 - k } else { k };
                let w = back[[m, t, k_file, r, c]];
                let want = if v.is_finite() { v } else { FLOAT_FILL_VALUE };
                assert_eq!(
                    w, want,
                    "group of {group_planes}, reverse {reverse}, at {m} {t} {k} {r} {c}"
                );
            }
        }
    }

    #[test]
    fn flags_become_bytes_and_reverse_only_the_level_axis() {
        // One member, two times, three levels of one row of two values.
        let flags: Vec<u8> = vec![0, 1, 1, 1, 0, 0, 1, 0, 0, 0, 1, 7];
        let field = Array5::from_shape_vec((1, 2, 3, 1, 2), flags).unwrap();
        let mut buf = Vec::new();
        copy_5d(&field, true, &mut buf, to_file_flag);
        assert_eq!(buf, vec![0, 0, 1, 1, 0, 1, 1, 1, 0, 0, 1, 0]);
        copy_5d(&field, false, &mut buf, to_file_flag);
        assert_eq!(buf, vec![0, 1, 1, 1, 0, 0, 1, 0, 0, 0, 1, 1]);
    }

    #[test]
    fn non_standard_layouts_are_copied_in_logical_order() {
        let field = Array5::from_shape_fn((1, 1, 2, 2, 3), |(_, _, k, r, c)| {
            (100 * k + 10 * r + c) as f32
        });
        // A transposed view: the last two axes swapped, then made owned in Fortran order.
        let swapped = field.view().permuted_axes([0, 1, 2, 4, 3]);
        let fortran = {
            let mut a = Array5::<f32>::zeros(swapped.raw_dim().f());
            a.assign(&swapped);
            a
        };
        let mut buf = Vec::new();
        copy_5d(&fortran, false, &mut buf, to_file_value);
        let expected: Vec<f32> = swapped.iter().copied().collect();
        assert_eq!(buf, expected);
    }

    proptest! {
        #[test]
        fn float_copy_reverses_levels_and_only_replaces_non_finite_values(
            values in proptest::collection::vec(
                prop_oneof![Just(f32::NAN), Just(f32::INFINITY), -1.0e4_f32..1.0e5_f32],
                2 * 2 * 3 * 2 * 3,
            ),
            reverse in any::<bool>(),
        ) {
            let field = Array5::from_shape_vec((2, 2, 3, 2, 3), values).unwrap();
            let mut buf = Vec::new();
            copy_5d(&field, reverse, &mut buf, to_file_value);
            let file = Array5::from_shape_vec((2, 2, 3, 2, 3), buf).unwrap();
            for ((m, t, k, r, c), &v) in field.indexed_iter() {
                let k_file = if reverse { 2 - k } else { k };
                let w = file[[m, t, k_file, r, c]];
                if v.is_finite() {
                    prop_assert_eq!(w, v);
                } else {
                    prop_assert_eq!(w, FLOAT_FILL_VALUE);
                }
            }
        }

        #[test]
        fn flag_copy_matches_the_float_copy_order(
            flags in proptest::collection::vec(0_u8..2, 3 * 4 * 2 * 2),
            reverse in any::<bool>(),
        ) {
            let field = Array5::from_shape_vec((1, 3, 4, 2, 2), flags).unwrap();
            let as_float = field.mapv(f32::from);
            let mut floats = Vec::new();
            copy_5d(&as_float, reverse, &mut floats, to_file_value);
            let mut bytes = Vec::new();
            copy_5d(&field, reverse, &mut bytes, to_file_flag);
            let back: Vec<f32> = bytes.iter().map(|&b| f32::from(b)).collect();
            prop_assert_eq!(back, floats);
        }
    }
}
