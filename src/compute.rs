//! The grid kernel: heights and layer thickness for every column of a cycle, in parallel.
//!
//! [`compute_heights`] sends isobaric cycles (with surface fields, or without them where every
//! column starts at the lowest level; whatever the humidity) to the row-wise
//! [`crate::kernel::IsobaricKernel`], and everything else (hybrid levels, columns started
//! higher up) to the column path here,
//! [`compute_heights_by_columns`]: work split by
//! latitude row (rayon), each row walking its columns with one reused [`ColumnNodes`]
//! scratch buffer, so the inner loop allocates nothing. Fields are `f32`; every column is
//! gathered into `f64`, integrated in `f64`, and scattered back as `f32`. On both paths a
//! missing input masks what depends on it in that column only: nothing crosses columns.

use std::path::Path;
use std::sync::atomic::Ordering;

use ndarray::{s, Array3, Array5, ArrayView2, ArrayView3, ArrayViewMut2, ArrayViewMut3, Axis};
use rayon::prelude::*;

use crate::buffers::touch_pages;
use crate::ingest::{read_cycle_overlapped_unless, IngestConfig, IngestError, PassOverTest};
use crate::kernel::{
    IsobaricKernel, KernelOutput, LowestLevelHeight, NotApplicable, StepFields, StepOutputs,
};
use crate::model::{Cycle, Heights, HumidityKind, Layer, LayerThickness, Vertical};
use crate::physics::column::{
    height_below_surface, height_between_nodes, thickness_between, usable_tv, ColumnAnchor,
    ColumnNodes,
};
use crate::physics::humidity::{
    saturation_vapour_pressure, specific_humidity_from_vapour_pressure,
    vapour_pressure_from_dewpoint, virtual_temperature_from_mixing_ratio,
    virtual_temperature_from_specific_humidity, RelativeHumidityPhase, SaturationFormula,
};
use crate::physics::hybrid::full_level;
use crate::physics::hypsometric::standard_lapse_extrapolated_temperature;
use crate::physics::standard_atmosphere::us_standard_atmosphere_height_at_pressure;
use crate::physics::Constants;
use crate::served::{ServedHeights, StepHeights};

/// How heights are tied to the ground when a cycle has no surface pressure and height.
#[derive(Clone, Copy, Debug, Default, PartialEq)]
pub enum NoSurfaceReference {
    /// The file's own geopotential height at the lowest level where that column has one;
    /// falls back to [`NoSurfaceReference::StandardAtmosphere`] when the file carries none.
    #[default]
    FileHeightAtLowestLevel,
    /// The file's own geopotential height at the level nearest this pressure, Pa.
    FileHeightAt {
        /// Pressure of the reference level, Pa.
        pressure_pa: f64,
    },
    /// The U.S. Standard Atmosphere 1976 height of the lowest level, the same at every
    /// column: thicknesses are right, absolute heights are only indicative.
    StandardAtmosphere,
}

/// Settings of one computation.
#[derive(Clone, Debug, Default)]
pub struct ComputeConfig {
    /// Layers whose thickness is wanted.
    pub layers: Vec<Layer>,
    /// Reference for cycles without surface fields.
    pub no_surface_reference: NoSurfaceReference,
    /// Saturation vapour pressure formula for relative humidity and dewpoint.
    pub saturation_formula: SaturationFormula,
    /// Phase that relative humidity refers to.
    pub rh_phase: RelativeHumidityPhase,
}

/// Why a computation could not start.
#[derive(Debug, thiserror::Error)]
pub enum ComputeError {
    /// A layer whose bottom is not below its top.
    #[error("layer {bottom_hpa} hPa to {top_hpa} hPa: the bottom pressure must be greater than the top pressure")]
    InvertedLayer {
        /// Bottom pressure, hPa.
        bottom_hpa: f64,
        /// Top pressure, hPa.
        top_hpa: f64,
    },
    /// Hybrid levels need the ground.
    #[error("'{file}' is on hybrid levels but has no surface pressure and surface geopotential: both are needed to place the levels")]
    HybridWithoutSurface {
        /// The source file.
        file: String,
    },
    /// The reference level asked for does not exist in the file's heights.
    #[error("'{file}' carries no geopotential height to anchor the columns at {pressure_hpa} hPa: give surface fields or use the standard-atmosphere reference")]
    NoFileHeights {
        /// The source file.
        file: String,
        /// The requested reference level, hPa.
        pressure_hpa: f64,
    },
}

/// Computes geopotential height on every level and the thickness of every requested layer.
///
/// `progress` is called once per finished (member, time) step with the number finished so
/// far; the total is `members * times`.
///
/// # Method
/// Virtual temperature from whatever humidity the cycle carries (dry where a humidity level is
/// missing from the file), then per column [`ColumnNodes::isobaric`] or
/// [`ColumnNodes::hybrid`] (constant-lapse-rate layers; Simmons & Burridge 1981 on hybrid
/// levels), and thickness by [`thickness_between`] on the same column.
///
/// Isobaric cycles (whatever their humidity) run the row-wise
/// [`crate::kernel::IsobaricKernel`], which gives the same answers as the column path to
/// well within a millimetre and several times faster: with surface fields, and without them
/// where every column starts at the lowest level (the standard atmosphere's height there,
/// or the file's own; the kernel takes that level as a surface lying on it). Everything else
/// (hybrid levels, a column started above the lowest level) runs
/// [`compute_heights_by_columns`].
pub fn compute_heights(
    cycle: &Cycle,
    config: &ComputeConfig,
    progress: &(dyn Fn(usize) + Sync),
) -> Result<Heights, ComputeError> {
    check_layers(config)?;
    let kernel = match row_kernel(cycle, config) {
        Ok(kernel) => kernel,
        Err(_) => return compute_heights_by_columns(cycle, config, progress),
    };
    // Same validation as the column path (a cycle the kernel takes always resolves).
    let reference = StepColumns::new(cycle, config, 0, 0)?.reference;
    match kernel.run(cycle, progress) {
        Ok(out) => Ok(kernel_heights(cycle, out, reference)),
        // Not reached: the kernel was prepared for this very cycle.
        Err(_) => compute_heights_by_columns(cycle, config, progress),
    }
}

/// The row kernel for `cycle` with the layers and saturation settings of `config`, or why
/// the cycle takes the column path.
pub(crate) fn row_kernel(
    cycle: &Cycle,
    config: &ComputeConfig,
) -> Result<IsobaricKernel, crate::kernel::NotApplicable> {
    let (formula, phase) = (config.saturation_formula, config.rh_phase);
    if cycle.surface.is_some() || matches!(cycle.vertical, Vertical::Hybrid { .. }) {
        return IsobaricKernel::with_saturation(cycle, &config.layers, formula, phase);
    }
    let start = lowest_level_start(cycle, config).ok_or(NotApplicable::NoSurface)?;
    IsobaricKernel::from_lowest_level(cycle, &config.layers, formula, phase, start)
}

/// Where the columns of an isobaric cycle without surface fields start, when every one of
/// them starts at the lowest level (the kernel then takes the cycle): the standard
/// atmosphere's height there, the file's own height at that level asked for by pressure, or
/// the file's lowest height column by column where that is the lowest level everywhere.
/// `None` where some column starts higher, or the reference does not resolve.
fn lowest_level_start(cycle: &Cycle, config: &ComputeConfig) -> Option<LowestLevelHeight> {
    match resolve_reference(cycle, config.no_surface_reference).ok()? {
        Reference::StandardAtmosphere(z) => Some(LowestLevelHeight::Everywhere(z)),
        Reference::FileHeight(Some(0)) => Some(LowestLevelHeight::FromFile),
        Reference::FileHeight(None) => {
            let lowest = cycle.file_heights.as_ref()?.slice(s![.., .., 0, .., ..]);
            lowest
                .iter()
                .all(|z| z.is_finite())
                .then_some(LowestLevelHeight::FromFile)
        }
        Reference::FileHeight(Some(_)) | Reference::Surface => None,
    }
}

/// The row kernel for `cycle` and the method sentence its heights carry, when the kernel
/// takes the cycle (as [`compute_heights`] decides); `None` otherwise.
pub(crate) fn kernel_for(
    cycle: &Cycle,
    config: &ComputeConfig,
) -> Option<(IsobaricKernel, String)> {
    let kernel = row_kernel(cycle, config).ok()?;
    let reference = StepColumns::new(cycle, config, 0, 0).ok()?.reference;
    Some((kernel, method_sentence(cycle, reference)))
}

/// Output bytes faulted in per piece of idle work in [`read_for_serving`]: a huge page.
const TOUCH_BYTES: usize = 2 << 20;

/// Pieces of latitude rows a step is computed in while the file is read
/// ([`read_for_serving`]): between two pieces the kernel checks whether the read has
/// ended, and if so leaves the rest of the step for after the cycle is listed. Where the
/// kernel is slower than the read (a fast disk or page cache, a slow processor), waiting
/// for whole steps held the listing up: a four-step 0.5° cycle became servable at 1.41
/// times its read.
const PIECES_PER_STEP: usize = 8;

/// Why a cycle could not be read and computed; both messages name the file.
#[derive(Debug, thiserror::Error)]
pub enum LoadError {
    /// The file could not be read as a cycle.
    #[error("{0}")]
    Ingest(#[from] IngestError),
    /// The heights could not be computed.
    #[error("{0}")]
    Compute(#[from] ComputeError),
}

/// Reads the whole cycle in `path` ([`read_cycle`]) and then computes it
/// ([`compute_heights`]). `progress` is called once per finished (member, time) step with
/// the number finished and the total.
///
/// The batch ([`crate::batch::compute_file`]) goes band by band wherever it can and reads
/// the other cycles once, whole; this is the reference it is tested against.
///
/// [`read_cycle`]: crate::ingest::read_cycle
pub fn read_and_compute(
    path: &Path,
    ingest: &IngestConfig,
    config: &ComputeConfig,
    progress: &(dyn Fn(usize, usize) + Sync),
) -> Result<(Cycle, Heights), LoadError> {
    check_layers(config)?;
    let cycle = crate::ingest::read_cycle(path, ingest)?;
    let (members, times, ..) = cycle.temperature.dim();
    let total = members * times;
    let heights = compute_heights(&cycle, config, &|done| progress(done, total))?;
    Ok((cycle, heights))
}

/// Reads the cycle in `path` for serving: each step is computed while later ones are read
/// ([`crate::ingest::read_cycle_overlapped`]), by the row kernel where it takes the cycle
/// and column by column otherwise, but the last step is left to compute, and so is whatever
/// is not done when the read ends (from the next piece of rows of the step it is on; the
/// column path also stops early where a step could not finish before the read does, see
/// `columns_while_reading`), so that the cycle can be served the moment its file has been
/// read. [`PendingSteps::finish`] computes the rest.
///
/// Where the read keeps every core busy by itself (fields stored in chunks, read and, where
/// compressed, inflated on every core, [`crate::ingest::StepFeed::read_uses_every_core`]),
/// nothing is computed while it runs: the kernel, even at its lowered priority, only took
/// time from it. On a four-step 0.5° cycle stored zlib-1, computing meanwhile made it
/// servable at 1.14-1.20 times the read without computing (it 1.03-1.08), and every step's
/// heights were done no sooner (202-209 against 208-210 ms, criterion, `benches/compute.rs`);
/// stored in uncompressed chunks of one level plane, at 1.73-1.86 times against 1.07-1.08
/// (heights 85-89 ms either way).
///
/// The heights are those of [`compute_heights`], step for step, bit for bit.
///
/// With `pass_over`, the file's reference time and size are put to it before any field is
/// read ([`crate::ingest::read_cycle_overlapped_unless`]).
///
/// # Errors
/// The file cannot be read as a cycle ([`crate::ingest::read_cycle`]), or the cycle cannot be
/// computed with `config` (checked here, before anything is served);
/// [`IngestError::PassedOver`] when `pass_over` gives a reason not to read it.
pub fn read_for_serving(
    path: &Path,
    ingest: &IngestConfig,
    config: &ComputeConfig,
    pass_over: Option<&PassOverTest<'_>>,
) -> Result<(Cycle, ServedHeights, PendingSteps), LoadError> {
    check_layers(config)?;
    let prepare = |cycle: &Cycle| {
        StepColumns::new(cycle, config, 0, 0).ok()?;
        let (members, times, levels, rows, cols) = cycle.temperature.dim();
        let total = members * times;
        let Ok(kernel) = row_kernel(cycle, config) else {
            // Nothing to do while a one-step cycle is read.
            return (total > 1).then_some(WhileReading {
                steps: (members, times),
                kernel: None,
            });
        };
        // No buffer is prepared (and faulted in while reading) for the last step, which is
        // computed after the read: faulting its pages in competes with the read for memory
        // and made a one-step 0.5° cycle servable later (1.09-1.17 times its read against
        // 1.05-1.06 without, alternate criterion runs), for about 4 ms saved afterwards.
        let out = EachStep {
            outs: (0..total)
                .map(|i| (i + 1 < total).then(|| kernel.outputs((1, 1, levels, rows, cols))))
                .collect(),
            finished: (0..total).map(|_| None).collect(),
            at: (0, 0),
            partial: None,
        };
        Some(WhileReading {
            steps: (members, times),
            kernel: Some((kernel, out)),
        })
    };
    let work =
        |prepared: WhileReading, shell: &Cycle, steps: crate::ingest::StepFeed<'_>| match prepared
            .kernel
        {
            Some((kernel, mut out)) => {
                compute_while_reading(&kernel, shell, steps, &mut out, prepared.steps);
                let done = StepsRead {
                    finished: out.finished,
                    partial: None,
                };
                (Some(kernel), out.outs, done, out.partial)
            }
            None => {
                let out =
                    columns_while_reading(shell, config, steps, prepared.steps, Pace::Measured);
                (None, Vec::new(), out, None)
            }
        };
    let (cycle, overlapped) = read_cycle_overlapped_unless(path, ingest, pass_over, prepare, work)?;
    // The same validation as compute_heights, before the cycle is served.
    let method = heights_method(&cycle, config)?;
    let (members, times, ..) = cycle.temperature.dim();
    let heights = ServedHeights::pending(members, times, method);
    let pending = match overlapped {
        Some((kernel, buffers, columns, resume)) => {
            for (i, step) in columns.finished.into_iter().enumerate() {
                if let Some(step) = step {
                    heights.set(i / times, i % times, step);
                }
            }
            PendingSteps {
                kernel,
                buffers,
                resume,
                columns_partial: columns.partial,
            }
        }
        None => PendingSteps::for_cycle(&cycle, config),
    };
    Ok((cycle, heights, pending))
}

/// What computes the steps of a cycle while it is read for serving.
struct WhileReading {
    /// The cycle's `(members, times)`.
    steps: (usize, usize),
    /// The row kernel, with an output per step, where it takes the cycle; the column path
    /// otherwise.
    kernel: Option<(IsobaricKernel, EachStep)>,
}

/// The steps of a cycle read by [`read_for_serving`] whose heights are still to compute.
#[derive(Debug)]
pub struct PendingSteps {
    /// The row kernel, when it takes the cycle (else the column path computes).
    kernel: Option<IsobaricKernel>,
    /// Output buffers of the steps, by step index, where the kernel has not used them.
    buffers: Vec<Option<KernelOutput>>,
    /// A step the kernel left part-way when the read ended (step index, rows done): its
    /// buffer holds those rows, and only the rest are computed.
    resume: Option<(usize, usize)>,
    /// A step the column path left part-way while the file was read.
    columns_partial: Option<PartialColumns>,
}

impl PendingSteps {
    /// No buffers prepared: every pending step of `cycle` is computed from scratch.
    pub fn for_cycle(cycle: &Cycle, config: &ComputeConfig) -> Self {
        Self {
            kernel: row_kernel(cycle, config).ok(),
            buffers: Vec::new(),
            resume: None,
            columns_partial: None,
        }
    }

    /// Computes every step of `heights` still pending (rows in parallel on a pool of its
    /// own, see `heights_pool`) and sets it, the steps queries are waiting for first, then
    /// in file order, so that a waiting query is released as soon as its step is in.
    ///
    /// Should a step fail (it cannot once [`read_for_serving`] has accepted the cycle) or
    /// this thread panic, every step still pending is marked failed, so that nobody waits
    /// for ever.
    pub fn finish(mut self, cycle: &Cycle, config: &ComputeConfig, heights: &ServedHeights) {
        struct Unblock<'a>(&'a ServedHeights);
        impl Drop for Unblock<'_> {
            fn drop(&mut self) {
                self.0
                    .fail_pending("the computation of the heights stopped");
            }
        }
        let _unblock = Unblock(heights);
        match heights_pool() {
            Some(pool) => pool.install(|| self.compute_pending(cycle, config, heights)),
            None => self.compute_pending(cycle, config, heights),
        }
    }

    fn compute_pending(&mut self, cycle: &Cycle, config: &ComputeConfig, heights: &ServedHeights) {
        let (_, times, ..) = cycle.temperature.dim();
        // The steps queries wait for first, then file order (`ServedHeights::next_pending`).
        while let Some((m, t)) = heights.next_pending() {
            let index = m * times + t;
            let buffer = self.buffers.get_mut(index).and_then(Option::take);
            // Rows already in this step's buffer, when the kernel left it part-way (without
            // the buffer, `run_one_step` starts from row 0).
            let from = match self.resume {
                Some((i, rows)) if i == index => rows,
                _ => 0,
            };
            // The rows the column path computed while the file was read, when it left this
            // step part-way.
            let partial = self
                .columns_partial
                .take_if(|p| p.index == index)
                .map(|p| (p.z, p.b, p.rows));
            let step = match &self.kernel {
                Some(kernel) => kernel_step(kernel, cycle, (m, t), buffer, from)
                    .map_or_else(|| columns_step(cycle, config, (m, t), None), Ok),
                None => columns_step(cycle, config, (m, t), partial),
            };
            match step {
                Ok(step) => heights.set(m, t, step),
                Err(e) => {
                    heights.fail_pending(&e.to_string());
                    return;
                }
            }
        }
    }
}

/// Threads that compute the heights of a served cycle's pending steps, apart from rayon's
/// global pool: queries on the global pool may be waiting for those very heights (the rows
/// of a whole-grid field wait in parallel, and verification asks its items in parallel), and
/// on the global pool they could hold every thread the computation needs, for ever
/// (`tests/query.rs` reproduces that). As many threads as the global pool, built once;
/// `None` (the global pool is used) where the pool cannot be built.
fn heights_pool() -> Option<&'static rayon::ThreadPool> {
    static POOL: std::sync::OnceLock<Option<rayon::ThreadPool>> = std::sync::OnceLock::new();
    POOL.get_or_init(|| {
        rayon::ThreadPoolBuilder::new()
            .num_threads(rayon::current_num_threads())
            .thread_name(|i| format!("hypsogrid-heights-{i}"))
            .build()
            .ok()
    })
    .as_ref()
}

/// One step of `cycle` through the row kernel from row `from` on (see [`run_one_step`]);
/// `None` where the kernel refuses the step.
fn kernel_step(
    kernel: &IsobaricKernel,
    cycle: &Cycle,
    (m, t): (usize, usize),
    buffer: Option<KernelOutput>,
    from: usize,
) -> Option<StepHeights> {
    run_one_step(kernel, kernel.step_fields(cycle, (m, t))?, buffer, from).ok()
}

/// The kernel on one step's fields from row `from` on, into `buffer` (a one-step output of
/// the kernel, from [`IsobaricKernel::outputs`], whose rows before `from` are already
/// computed and the others not yet, see [`run_rows`]) or a fresh one sized from the fields.
fn run_one_step(
    kernel: &IsobaricKernel,
    fields: StepFields<'_>,
    buffer: Option<KernelOutput>,
    from: usize,
) -> Result<StepHeights, crate::kernel::NotApplicable> {
    let (levels, rows, cols) = fields.t.dim();
    let (mut out, from) = match buffer {
        Some(out) => (out, from),
        None => (kernel.outputs((1, 1, levels, rows, cols)), 0),
    };
    run_rows(kernel, &fields, &mut out, from..rows)?;
    Ok(step_heights(out))
}

/// The kernel on the latitude rows `rows` of one step, into the same rows of `out` (a
/// one-step output of the kernel, from [`IsobaricKernel::outputs`], whose rows `rows` are
/// not computed yet: their flags are still zero): each column is computed on its own, so a
/// step computed in pieces of rows is the step computed whole, bit for bit.
fn run_rows(
    kernel: &IsobaricKernel,
    fields: &StepFields<'_>,
    out: &mut KernelOutput,
    rows: std::ops::Range<usize>,
) -> Result<(), crate::kernel::NotApplicable> {
    let band = StepFields {
        t: fields.t.slice(s![.., rows.clone(), ..]),
        q: fields.q.map(|q| q.slice_move(s![.., rows.clone(), ..])),
        ps: fields.ps.slice(s![rows.clone(), ..]),
        zs: fields.zs.slice(s![rows.clone(), ..]),
    };
    let outputs = StepOutputs {
        geopotential_height: out
            .geopotential_height
            .slice_mut(s![0, 0, .., rows.clone(), ..]),
        below_ground: out.below_ground.slice_mut(s![0, 0, .., rows.clone(), ..]),
        thickness: out
            .thickness
            .iter_mut()
            .map(|th| {
                (
                    th.values.slice_mut(s![0, 0, rows.clone(), ..]),
                    th.below_ground.slice_mut(s![0, 0, rows.clone(), ..]),
                )
            })
            .collect(),
    };
    kernel.run_into_zeroed(band, outputs)
}

/// The heights of a one-step output of the kernel, as a served cycle holds them.
fn step_heights(out: KernelOutput) -> StepHeights {
    StepHeights {
        geopotential_height: only_step(out.geopotential_height),
        below_ground: only_step(out.below_ground),
    }
}

/// The `[level, lat, lon]` field of a one-step `[member, time, level, lat, lon]` array.
fn only_step<T>(a: Array5<T>) -> Array3<T> {
    a.index_axis_move(Axis(0), 0).index_axis_move(Axis(0), 0)
}

/// One step on the column path, from the rows `partial` already holds on (its heights,
/// flags and rows done), or from the first.
fn columns_step(
    cycle: &Cycle,
    config: &ComputeConfig,
    (m, t): (usize, usize),
    partial: Option<(Array3<f32>, Array3<u8>, usize)>,
) -> Result<StepHeights, ComputeError> {
    let fields = (
        cycle.temperature.slice(s![m, t, .., .., ..]),
        cycle
            .humidity
            .as_ref()
            .map(|h| h.values.slice(s![m, t, .., .., ..])),
    );
    let mut step = ColumnsStep::start(config, fields.0.dim());
    if let Some((z, b, rows)) = partial.filter(|(z, ..)| z.dim() == fields.0.dim()) {
        step.z = z;
        step.b = b;
        step.done = rows;
    }
    step.run(cycle, config, (m, t), fields, &|| false)?;
    Ok(step.finish())
}

/// A step on the column path, computed in [`PIECES_PER_STEP`] pieces of rows.
struct ColumnsStep {
    z: Array3<f32>,
    b: Array3<u8>,
    /// Thickness and its flags, `[layer, lat, lon]`: computed with the heights, not kept.
    th: Array3<f32>,
    tb: Array3<u8>,
    /// Rows computed so far.
    done: usize,
}

impl ColumnsStep {
    /// Nothing computed yet, for a step of `[level, lat, lon]` `dim`.
    fn start(config: &ComputeConfig, (levels, rows, cols): (usize, usize, usize)) -> Self {
        let layers = config.layers.len();
        let dim = (levels, rows, cols);
        // Fresh zeroed pages (`calloc`), untouched until their rows are computed: `fill`
        // writes every value of every row it is given, so no fill pass runs here (a `NaN`
        // fill was a whole extra write of the step's heights). Small pages: a piece of rows
        // computed while the file is read touches its own rows of every level only, where
        // huge pages would clear the whole step's memory at once (and held the listing of
        // a 137-level cycle up).
        Self {
            z: Array3::<f32>::zeros(dim),
            b: Array3::<u8>::zeros(dim),
            th: Array3::<f32>::from_elem((layers, rows, cols), f32::NAN),
            tb: Array3::<u8>::zeros((layers, rows, cols)),
            done: 0,
        }
    }

    /// Computes the rows not yet done from temperature and humidity `(t, q)` of step
    /// (`m`, `t`) of `shell` (`[level, lat, lon]`, as the cycle holds them at that step), a
    /// piece at a time, asking `stop` before each. Returns whether every row is done. Each
    /// column is computed on its own, so the pieces give the step computed whole, bit for
    /// bit.
    fn run(
        &mut self,
        shell: &Cycle,
        config: &ComputeConfig,
        (m, t): (usize, usize),
        (t_step, q_step): (ArrayView3<'_, f32>, Option<ArrayView3<'_, f32>>),
        stop: &dyn Fn() -> bool,
    ) -> Result<bool, ComputeError> {
        let rows = t_step.dim().1;
        let piece = rows.div_ceil(PIECES_PER_STEP).max(1);
        while self.done < rows {
            if stop() {
                return Ok(false);
            }
            let r = self.done..(self.done + piece).min(rows);
            StepColumns::for_rows(
                shell,
                config,
                (m, t),
                r.clone(),
                t_step.slice_move(s![.., r.clone(), ..]),
                q_step.map(|q| q.slice_move(s![.., r.clone(), ..])),
            )?
            .fill(
                self.z.slice_mut(s![.., r.clone(), ..]),
                self.b.slice_mut(s![.., r.clone(), ..]),
                self.th.slice_mut(s![.., r.clone(), ..]),
                self.tb.slice_mut(s![.., r.clone(), ..]),
            );
            self.done = r.end;
        }
        Ok(true)
    }

    /// The heights as a served cycle holds them.
    fn finish(self) -> StepHeights {
        StepHeights {
            geopotential_height: self.z,
            below_ground: self.b,
        }
    }
}

/// A step the column path left part-way while the file was read ([`columns_while_reading`]).
#[derive(Debug)]
struct PartialColumns {
    /// The step's index in file order.
    index: usize,
    /// Rows computed.
    rows: usize,
    z: Array3<f32>,
    b: Array3<u8>,
}

/// What the computing side of the serving read leaves: the heights of the steps computed,
/// by step index, and the column path's step left part-way.
struct StepsRead {
    finished: Vec<Option<StepHeights>>,
    partial: Option<PartialColumns>,
}

/// Whether the column path's side of the serving read measures the read against its own
/// pace ([`columns_while_reading`]).
#[derive(Clone, Copy, Debug, PartialEq)]
enum Pace {
    /// Measured: compute only what can finish before the read ends.
    Measured,
    /// Compute every step but the last until the read ends (for tests).
    #[cfg(test)]
    Always,
}

/// The column path's side of the serving read: computes each step of `steps` as it arrives
/// (on threads of lower priority than the reading one, see [`background_pool`]), leaving
/// the last step of the file to the caller, and from where it is once the read has ended
/// ([`StepsRead::partial`]: the caller resumes it). Steps must come in file order; the feed
/// breaking the order stops the work (the steps not computed are computed after the read).
///
/// Computing contends with reading: on the 4-step 1° hybrid cycle in the page cache it held
/// the listing up by 15–20 % for nothing, a 137-level step taking longer than the whole
/// read. With [`Pace::Measured`] the worker first waits for the second step, so that the
/// time a step takes to read is known, computes one piece of the first step to learn its
/// own pace, and goes on only if a whole step can be computed before the steps left to read
/// are read; otherwise it keeps the piece and computes nothing more while the file is read.
fn columns_while_reading(
    shell: &Cycle,
    config: &ComputeConfig,
    mut steps: crate::ingest::StepFeed<'_>,
    (members, times): (usize, usize),
    pace: Pace,
) -> StepsRead {
    let total = members * times;
    let mut out = StepsRead {
        finished: (0..total).map(|_| None).collect(),
        partial: None,
    };
    if steps.read_uses_every_core() {
        // See `read_for_serving`: everything is computed after the listing.
        return out;
    }
    let pool = background_pool(rayon::current_num_threads());
    let read_done = steps.read_done();
    let ended = || read_done.load(Ordering::Acquire);
    // The first two steps, and how long the second took to read.
    let mut queue = std::collections::VecDeque::new();
    queue.extend(steps.next());
    let arrived = std::time::Instant::now();
    queue.extend(steps.next());
    let step_read = arrived.elapsed();
    let mut worth_it = None::<bool>;
    let mut done = 0usize;
    while let Some(step) = queue.pop_front().or_else(|| steps.next()) {
        if step.member * times + step.time != done || done + 1 >= total {
            break;
        }
        let fields = (step.temperature, step.humidity);
        let mut columns = ColumnsStep::start(config, fields.0.dim());
        let mut run = || -> Result<bool, ComputeError> {
            if pace == Pace::Measured && worth_it.is_none() {
                // One piece, timed, then the verdict.
                let started = std::time::Instant::now();
                let pieces = std::cell::Cell::new(0);
                let one = || {
                    pieces.set(pieces.get() + 1);
                    pieces.get() > 1 || ended()
                };
                columns.run(shell, config, (step.member, step.time), fields, &one)?;
                let per_step = started.elapsed().as_secs_f64() * PIECES_PER_STEP as f64;
                let to_read = step_read.as_secs_f64() * total.saturating_sub(2) as f64;
                worth_it = Some(per_step < to_read);
            }
            if worth_it == Some(false) {
                return Ok(false);
            }
            columns.run(shell, config, (step.member, step.time), fields, &ended)
        };
        let computed = match pool.as_ref() {
            Some(pool) => pool.install(&mut run),
            None => run(),
        };
        match computed {
            Ok(true) => out.finished[done] = Some(columns.finish()),
            Ok(false) => {
                if columns.done > 0 {
                    out.partial = Some(PartialColumns {
                        index: done,
                        rows: columns.done,
                        z: columns.z,
                        b: columns.b,
                    });
                }
                break;
            }
            Err(_) => break,
        }
        done += 1;
    }
    // The steps not taken stay in the feed; the reading thread does not wait for them.
    out
}

/// One output per step, as a served cycle holds them.
struct EachStep {
    /// Buffers of the steps not yet computed.
    outs: Vec<Option<KernelOutput>>,
    /// Heights of the steps computed.
    finished: Vec<Option<StepHeights>>,
    /// The step being faulted in, and how far its heights are.
    at: (usize, usize),
    /// The step left part-way when the read ended: its index and the rows computed.
    partial: Option<(usize, usize)>,
}

impl EachStep {
    /// Faults in about [`TOUCH_BYTES`] of height pages not yet touched, of step `next` or a
    /// later one; false when none are left. The below-ground flags are left alone: the
    /// kernel writes only the levels where some column of a row is below ground, and the
    /// pages of the other levels are never needed.
    fn touch_ahead(&mut self, next: usize) -> bool {
        if self.at.0 < next {
            self.at = (next, 0);
        }
        while let Some(slot) = self.outs.get_mut(self.at.0) {
            let from = self.at.1;
            let heights = slot
                .as_mut()
                .and_then(|out| out.geopotential_height.as_slice_mut())
                .filter(|z| from < z.len());
            if let Some(z) = heights {
                self.at.1 = touch_pages(z, from, TOUCH_BYTES);
                return true;
            }
            self.at = (self.at.0 + 1, 0);
        }
        false
    }

    /// Runs `kernel` on step number `index` of the file, in pieces of rows, asking `stop`
    /// before each piece: true when the step is done; false when `stop` said so first (the
    /// step is then [`EachStep::partial`], its buffer holding the rows done).
    fn run(
        &mut self,
        kernel: &IsobaricKernel,
        fields: StepFields<'_>,
        index: usize,
        stop: &(dyn Fn() -> bool + Sync),
    ) -> Result<bool, crate::kernel::NotApplicable> {
        let (levels, rows, cols) = fields.t.dim();
        let Some(slot) = self.outs.get_mut(index) else {
            return Ok(false);
        };
        let out = slot.get_or_insert_with(|| kernel.outputs((1, 1, levels, rows, cols)));
        let piece = rows.div_ceil(PIECES_PER_STEP).max(1);
        let mut from = 0;
        while from < rows {
            if stop() {
                self.partial = Some((index, from));
                return Ok(false);
            }
            let to = (from + piece).min(rows);
            run_rows(kernel, &fields, out, from..to)?;
            from = to;
        }
        self.finished[index] = slot.take().map(step_heights);
        Ok(true)
    }
}

/// The kernel's side of the serving read: runs `kernel` on each step of `steps` as it
/// arrives, into `out`, faulting in output pages while no step is ready, and leaves the
/// last step of the file to the caller, and everything from the next piece of rows on once
/// the read has ended. Steps must come in file order (member-major); the
/// feed breaking the order, or the kernel refusing a step, stops the work (the steps not
/// computed are computed another way after the read).
fn compute_while_reading(
    kernel: &IsobaricKernel,
    shell: &Cycle,
    mut steps: crate::ingest::StepFeed<'_>,
    out: &mut EachStep,
    (members, times): (usize, usize),
) {
    if steps.read_uses_every_core() {
        // See `read_for_serving`: everything is computed after the listing.
        return;
    }
    let total = members * times;
    let pool = (total > 1)
        .then(|| background_pool(rayon::current_num_threads()))
        .flatten();
    let mut done = 0;
    // Once the file is read, the steps left are computed after the cycle is listed
    // (`PendingSteps`): stop at the next piece rather than hold the listing up.
    let read_done = steps.read_done();
    let stop = || read_done.load(Ordering::Acquire);
    // While no step is ready (above all while the first is read), fault in the output
    // pages of the steps not yet computed: work the kernel would otherwise do at its first
    // write, moved into idle time.
    while let Some(step) = steps.next_or_idle(|| out.touch_ahead(done)) {
        let (m, t) = (step.member, step.time);
        // Every step but the last is computed while later ones are still being read.
        if m * times + t != done || done + 1 >= total {
            return;
        }
        let Some((ps, zs)) = kernel.ground(shell, (m, t)) else {
            return;
        };
        let fields = StepFields {
            t: step.temperature,
            q: step.humidity,
            ps,
            zs,
        };
        let computed = match pool.as_ref() {
            Some(pool) => pool.install(|| out.run(kernel, fields, done, &stop)),
            None => out.run(kernel, fields, done, &stop),
        };
        if !matches!(computed, Ok(true)) {
            return;
        }
        done += 1;
    }
}

/// `threads` threads (at least one) for the kernel while later steps of a cycle are still
/// being read, each at a lower scheduling priority (nice +10 on Linux) than the thread that
/// reads: as many as rayon's own for the serving read, one fewer for the batch (see
/// [`crate::batch::compute_file`]).
///
/// The file is read by one thread at a time (the NetCDF library is serialised), so the read
/// is the critical path of [`read_for_serving`] (and the reading and writing thread that of
/// the batch, [`crate::batch`]); with the kernel's threads at the same
/// priority, the reading thread got about two thirds of a core on two cores. Lowered, they
/// take what the reader leaves: in alternate runs of `benches/compute.rs` a four-step 0.5°
/// cycle became servable in 1.19-1.34 times its read against 1.41-1.55 without (a second
/// set of runs, noisier, gave 1.21-1.42 against 1.30-1.40). In the service the
/// same holds for requests: a cycle loading in the background yields to the answers being
/// computed. The last step, with nothing left to read, runs on the global pool (a one-step
/// cycle never builds this one). `None` (the global pool is used) where the pool cannot be
/// built.
pub(crate) fn background_pool(threads: usize) -> Option<rayon::ThreadPool> {
    rayon::ThreadPoolBuilder::new()
        .num_threads(threads.max(1))
        .thread_name(|i| format!("hypsogrid-load-{i}"))
        .start_handler(|_| lower_this_threads_priority())
        .build()
        .ok()
}

/// Raises the nice value of the calling thread by 10 (Linux keeps one per thread); elsewhere
/// nothing.
fn lower_this_threads_priority() {
    #[cfg(target_os = "linux")]
    {
        // SAFETY: plain system calls on the calling thread's own id; a refusal only leaves
        // the priority as it was, which is harmless.
        unsafe {
            let tid = libc::gettid();
            let now = libc::getpriority(libc::PRIO_PROCESS, tid as libc::id_t);
            libc::setpriority(libc::PRIO_PROCESS, tid as libc::id_t, (now + 10).min(19));
        }
    }
}

/// The heights of `cycle` from the row kernel's outputs.
fn kernel_heights(cycle: &Cycle, out: KernelOutput, reference: Reference) -> Heights {
    Heights {
        geopotential_height: out.geopotential_height,
        below_ground: out.below_ground,
        thickness: out.thickness,
        constants: cycle.constants,
        method: method_sentence(cycle, reference),
    }
}

pub(crate) fn check_layers(config: &ComputeConfig) -> Result<(), ComputeError> {
    for layer in &config.layers {
        let ordered =
            layer.bottom_pa.partial_cmp(&layer.top_pa) == Some(std::cmp::Ordering::Greater);
        if !ordered {
            return Err(ComputeError::InvertedLayer {
                bottom_hpa: layer.bottom_pa / 100.0,
                top_hpa: layer.top_pa / 100.0,
            });
        }
    }
    Ok(())
}

/// [`compute_heights`] on the column path for every cycle: each column is gathered, built
/// with [`StepColumns::build`] and interpolated with [`thickness_between`]. It is the
/// reference the fast kernel is tested against, and the path for hybrid levels and cycles
/// without surface fields.
pub fn compute_heights_by_columns(
    cycle: &Cycle,
    config: &ComputeConfig,
    progress: &(dyn Fn(usize) + Sync),
) -> Result<Heights, ComputeError> {
    check_layers(config)?;
    let (members, times, levels, rows, cols) = cycle.temperature.dim();
    // Validates the cycle against the settings once, before any allocation.
    let reference = StepColumns::new(cycle, config, 0, 0)?.reference;

    let mut height = Array5::<f32>::from_elem((members, times, levels, rows, cols), f32::NAN);
    let mut below = Array5::<u8>::zeros((members, times, levels, rows, cols));
    let nlayers = config.layers.len();
    let mut thick = Array5::<f32>::from_elem((members, times, nlayers, rows, cols), f32::NAN);
    let mut thick_below = Array5::<u8>::zeros((members, times, nlayers, rows, cols));
    let mut done = 0usize;

    for m in 0..members {
        for t in 0..times {
            StepColumns::new(cycle, config, m, t)?.fill(
                height.slice_mut(s![m, t, .., .., ..]),
                below.slice_mut(s![m, t, .., .., ..]),
                thick.slice_mut(s![m, t, .., .., ..]),
                thick_below.slice_mut(s![m, t, .., .., ..]),
            );
            done += 1;
            progress(done);
        }
    }

    let thickness = config
        .layers
        .iter()
        .enumerate()
        .map(|(l, layer)| LayerThickness {
            layer: *layer,
            values: thick.slice(s![.., .., l, .., ..]).to_owned(),
            below_ground: thick_below.slice(s![.., .., l, .., ..]).to_owned(),
        })
        .collect();
    Ok(Heights {
        geopotential_height: height,
        below_ground: below,
        thickness,
        constants: cycle.constants,
        method: method_sentence(cycle, reference),
    })
}

/// The reference actually used for a cycle without surface fields.
#[derive(Clone, Copy, Debug, PartialEq)]
enum Reference {
    Surface,
    /// The file's height at this level index, or the lowest finite one when `None`.
    FileHeight(Option<usize>),
    StandardAtmosphere(f64),
}

fn resolve_reference(cycle: &Cycle, wanted: NoSurfaceReference) -> Result<Reference, ComputeError> {
    if cycle.surface.is_some() {
        return Ok(Reference::Surface);
    }
    let lowest_pressure = match &cycle.vertical {
        Vertical::Isobaric { pressure_pa } => pressure_pa.first().copied().unwrap_or(f64::NAN),
        Vertical::Hybrid { .. } => f64::NAN,
    };
    let standard =
        Reference::StandardAtmosphere(us_standard_atmosphere_height_at_pressure(lowest_pressure));
    match (wanted, &cycle.file_heights, &cycle.vertical) {
        (NoSurfaceReference::StandardAtmosphere, _, _) => Ok(standard),
        (NoSurfaceReference::FileHeightAtLowestLevel, None, _) => Ok(standard),
        (NoSurfaceReference::FileHeightAtLowestLevel, Some(_), _) => {
            Ok(Reference::FileHeight(None))
        }
        (
            NoSurfaceReference::FileHeightAt { pressure_pa },
            Some(_),
            Vertical::Isobaric {
                pressure_pa: levels,
            },
        ) => {
            let nearest = levels
                .iter()
                .enumerate()
                .min_by(|a, b| {
                    (a.1 - pressure_pa)
                        .abs()
                        .total_cmp(&(b.1 - pressure_pa).abs())
                })
                .map(|(k, _)| k);
            Ok(Reference::FileHeight(nearest))
        }
        (NoSurfaceReference::FileHeightAt { pressure_pa }, _, _) => {
            Err(ComputeError::NoFileHeights {
                file: cycle.source.display().to_string(),
                pressure_hpa: pressure_pa / 100.0,
            })
        }
    }
}

/// The method sentence of the heights of `cycle` computed with `config` (as in
/// [`Heights::method`]), after the same validation as [`compute_heights`].
///
/// # Errors
/// As [`compute_heights`]: the cycle cannot be computed with these settings.
pub fn heights_method(cycle: &Cycle, config: &ComputeConfig) -> Result<String, ComputeError> {
    check_layers(config)?;
    let reference = StepColumns::new(cycle, config, 0, 0)?.reference;
    Ok(method_sentence(cycle, reference))
}

fn method_sentence(cycle: &Cycle, reference: Reference) -> String {
    let humidity = match &cycle.humidity {
        Some(h) => format!("virtual temperature from {}", h.kind.standard_name()),
        None => "no humidity in the file: temperature used as virtual temperature".to_string(),
    };
    let vertical = match cycle.vertical {
        Vertical::Isobaric { .. } => {
            "hypsometric equation with a constant lapse rate in each layer (logarithmic-mean virtual temperature)"
        }
        Vertical::Hybrid { .. } => {
            "hydrostatic integration on hybrid sigma-pressure levels (Simmons and Burridge 1981)"
        }
    };
    let anchor = match reference {
        Reference::Surface => "integrated from surface pressure and surface height; below ground, temperature extrapolated at 6.5 K/km from the surface".to_string(),
        Reference::FileHeight(Some(k)) => format!("anchored to the file's own geopotential height at level index {k} (no surface fields)"),
        Reference::FileHeight(None) => "anchored to the file's own geopotential height at the lowest level that has one (no surface fields)".to_string(),
        Reference::StandardAtmosphere(z) => format!("anchored at the lowest level to its U.S. Standard Atmosphere 1976 height, {z:.1} m (no surface fields, no file heights): absolute heights indicative only"),
    };
    format!("{vertical}; {humidity}; {anchor}")
}

/// Scratch for building one column, reused from column to column (one per thread).
#[derive(Clone, Debug)]
pub struct ColumnScratch {
    /// The column's nodes, for interpolation at any pressure.
    pub nodes: ColumnNodes,
    /// Virtual temperature on each level, K (bottom-up).
    pub tv: Vec<f64>,
    /// Pressure of each level, Pa (full levels for hybrid coordinates).
    pub pressure: Vec<f64>,
    /// Geopotential height of each level, m (`NaN` where masked).
    pub height: Vec<f64>,
    /// Half-level heights of a hybrid column, m.
    pub height_half: Vec<f64>,
    /// Whether each level lies below the ground.
    pub below: Vec<bool>,
    /// Scratch of a whole row (hybrid heights alone).
    row: Vec<f64>,
    /// Heights at the layers' bounds along a hybrid row.
    bounds: RowBounds,
}

/// Heights at chosen pressures along one row of a hybrid cycle, found while
/// [`StepColumns::hybrid_heights_row`] goes up the levels: for every pressure and column what
/// [`ColumnNodes::height_at_pressure`] gives on the column's nodes (surface node, then the
/// full levels), bit for bit, without building them. A pressure is found at the first node
/// at or above it: at that node's own height where the pressures are equal, between it and
/// the node below otherwise, and below the ground from the surface node; one the column's
/// nodes never reach (above its last usable level, or a column with no usable node) is not
/// found, as [`ColumnNodes::height_at_pressure`] gives `None` there.
#[derive(Clone, Debug, Default)]
struct RowBounds {
    /// The pressures, Pa.
    pressures: Vec<f64>,
    /// The pressures' indices, highest pressure first: the order a column finds them in.
    order: Vec<usize>,
    /// Each pressure's place in `order`.
    rank: Vec<usize>,
    /// `[pressure * cols + col]`: the height found (`NaN` until then).
    heights: Vec<f64>,
    /// Per column, how many pressures of `order` it has found.
    next: Vec<usize>,
    /// Per column, the last node passed (pressure, virtual temperature, height).
    below: Vec<(f64, f64, f64)>,
    cols: usize,
}

impl RowBounds {
    /// The bounds of `layers` (bottom then top of each, in turn: pressure `2 l` and
    /// `2 l + 1`), nothing found yet on a row of `cols` columns. The order they are found in
    /// is worked out again only when the layers change.
    fn reset(&mut self, layers: &[Layer], cols: usize) {
        let same = self.pressures.len() == 2 * layers.len()
            && layers
                .iter()
                .zip(self.pressures.chunks_exact(2))
                .all(|(l, p)| p == [l.bottom_pa, l.top_pa]);
        if !same {
            self.pressures.clear();
            self.pressures
                .extend(layers.iter().flat_map(|l| [l.bottom_pa, l.top_pa]));
            let n = self.pressures.len();
            self.order.clear();
            self.order.extend(0..n);
            let pressures = &self.pressures;
            self.order
                .sort_by(|&a, &b| pressures[b].total_cmp(&pressures[a]));
            self.rank.clear();
            self.rank.resize(n, 0);
            for (place, &b) in self.order.iter().enumerate() {
                self.rank[b] = place;
            }
        }
        let n = self.pressures.len();
        self.cols = cols;
        self.heights.clear();
        self.heights.resize(n * cols, f64::NAN);
        self.next.clear();
        self.next.resize(cols, 0);
        self.below.clear();
        self.below.resize(cols, (f64::NAN, f64::NAN, f64::NAN));
    }

    /// Column `col` passes `node` (pressure, virtual temperature, height), the next one up
    /// its column; `surface` for its surface node, the first.
    fn pass(&mut self, col: usize, node: (f64, f64, f64), surface: bool, c: &Constants) {
        let (p_node, _, z_node) = node;
        let mut i = self.next[col];
        while let Some(&b) = self.order.get(i) {
            let p = self.pressures[b];
            if p < p_node {
                break;
            }
            self.heights[b * self.cols + col] = if p == p_node {
                z_node
            } else if surface {
                height_below_surface(p, node, c)
            } else {
                height_between_nodes(p, self.below[col], node)
            };
            i += 1;
        }
        self.next[col] = i;
        self.below[col] = node;
    }

    /// Whether column `col` has a pressure still to find.
    #[inline]
    fn pending(&self, col: usize) -> bool {
        self.next[col] < self.order.len()
    }

    /// The height at pressure `b` in column `col`, where found.
    fn height(&self, b: usize, col: usize) -> Option<f64> {
        let found = self.rank.get(b).is_some_and(|&r| r < self.next[col]);
        found.then(|| self.heights[b * self.cols + col])
    }
}

impl ColumnScratch {
    /// Scratch for columns of `levels` levels.
    pub fn new(levels: usize) -> Self {
        Self {
            nodes: ColumnNodes::with_capacity(levels + 2),
            tv: vec![0.0; levels],
            pressure: vec![0.0; levels],
            height: vec![0.0; levels],
            height_half: vec![0.0; levels + 1],
            below: vec![false; levels],
            row: Vec::new(),
            bounds: RowBounds::default(),
        }
    }
}

/// Builds the columns of one (member, time) step of a cycle exactly as the batch does, so
/// that queries between levels give the same answers as [`compute_heights`].
pub struct StepColumns<'a> {
    cycle: &'a Cycle,
    config: &'a ComputeConfig,
    reference: Reference,
    temperature: ArrayView3<'a, f32>,
    /// Humidity kind and values.
    humidity: Option<(HumidityKind, ArrayView3<'a, f32>)>,
    /// Per level, whether the file lacked that humidity level (treated as dry).
    dry_levels: Vec<bool>,
    surface: Option<(ArrayView2<'a, f32>, ArrayView2<'a, f32>)>,
    file_heights: Option<ArrayView3<'a, f32>>,
    constants: Constants,
}

impl<'a> StepColumns<'a> {
    /// Prepares member `member` and time step `time` of `cycle` (indices must be in range:
    /// the caller validates them against the cycle's dimensions).
    pub fn new(
        cycle: &'a Cycle,
        config: &'a ComputeConfig,
        member: usize,
        time: usize,
    ) -> Result<Self, ComputeError> {
        let (m, t) = (member, time);
        Self::for_rows(
            cycle,
            config,
            (m, t),
            0..cycle.temperature.dim().3,
            cycle.temperature.slice(s![m, t, .., .., ..]),
            cycle
                .humidity
                .as_ref()
                .map(|h| h.values.slice(s![m, t, .., .., ..])),
        )
    }

    /// The columns of latitude rows `rows` of step (`member`, `time`) of `shell`, from
    /// `temperature` and `humidity` of those rows alone (`[level, row, lon]`, bottom-up, the
    /// values the cycle would hold there) instead of the cycle's own arrays, which may be
    /// left unread: a band of the batch. Everything else (levels, surface fields, file
    /// heights, constants) comes from `shell`. Rows count from `rows.start` in every method,
    /// and each column gives the same bits as in [`StepColumns::new`] on the whole cycle.
    pub(crate) fn for_rows(
        shell: &'a Cycle,
        config: &'a ComputeConfig,
        (member, time): (usize, usize),
        rows: std::ops::Range<usize>,
        temperature: ArrayView3<'a, f32>,
        humidity: Option<ArrayView3<'a, f32>>,
    ) -> Result<Self, ComputeError> {
        let (cycle, (m, t)) = (shell, (member, time));
        if matches!(cycle.vertical, Vertical::Hybrid { .. }) && cycle.surface.is_none() {
            return Err(ComputeError::HybridWithoutSurface {
                file: cycle.source.display().to_string(),
            });
        }
        let reference = resolve_reference(cycle, config.no_surface_reference)?;
        let levels = cycle.vertical.levels();
        let mut dry_levels = vec![false; levels];
        if let Some(h) = &cycle.humidity {
            for &k in &h.missing_levels {
                if let Some(d) = dry_levels.get_mut(k) {
                    *d = true;
                }
            }
        }
        Ok(Self {
            cycle,
            config,
            reference,
            temperature,
            humidity: cycle.humidity.as_ref().map(|h| h.kind).zip(humidity),
            dry_levels,
            surface: cycle.surface.as_ref().map(|sf| {
                (
                    sf.pressure_pa.slice(s![m, t, rows.clone(), ..]),
                    sf.height_m.slice(s![m, t, rows.clone(), ..]),
                )
            }),
            file_heights: cycle
                .file_heights
                .as_ref()
                .map(|z| z.slice(s![m, t, .., rows.clone(), ..])),
            constants: cycle.constants,
        })
    }

    /// Surface pressure (Pa) and surface height (m) of a column, when the cycle has them.
    pub fn surface(&self, row: usize, col: usize) -> Option<(f64, f64)> {
        self.surface
            .map(|(ps, zs)| (f64::from(ps[[row, col]]), f64::from(zs[[row, col]])))
    }

    /// The constants the cycle is computed with.
    pub fn constants(&self) -> &Constants {
        &self.constants
    }

    /// Builds the column at (`row`, `col`) into `s`: level pressures, virtual temperatures,
    /// heights, below-ground flags, and the nodes for interpolation at any pressure.
    pub fn build(&self, row: usize, col: usize, s: &mut ColumnScratch) {
        let _ = self.build_lowest(row, col, s, usize::MAX);
    }

    /// [`StepColumns::build`] for answers at pressures no lower than level `wanted − 1`'s
    /// ([`ColumnNodes::levels_for_pressure`]): an isobaric column is built only as high as
    /// they need ([`ColumnNodes::isobaric_lowest`]), with the same bits, and its levels above
    /// are left masked. A hybrid column is built whole. Returns how many of the lowest levels
    /// were built (their pressures, virtual temperatures and heights are in `s`).
    pub fn build_lowest(
        &self,
        row: usize,
        col: usize,
        s: &mut ColumnScratch,
        wanted: usize,
    ) -> usize {
        let c = &self.constants;
        let all = s.tv.len();
        let surface = self.surface(row, col);
        let isobaric = match &self.cycle.vertical {
            Vertical::Isobaric { pressure_pa } => {
                Some((pressure_pa, self.anchor(surface, row, col, pressure_pa)))
            }
            Vertical::Hybrid { .. } => None,
        };
        // Virtual temperatures are formed only for the levels the build reads.
        let levels = isobaric.map_or(all, |(pressure_pa, anchor)| {
            ColumnNodes::levels_built(pressure_pa, wanted, anchor)
        });
        match &self.cycle.vertical {
            Vertical::Isobaric { pressure_pa } => s.pressure.copy_from_slice(pressure_pa),
            Vertical::Hybrid { a_half_pa, b_half } => {
                let ps = surface.map_or(f64::NAN, |(ps, _)| ps);
                for k in 0..levels {
                    let lower = a_half_pa[k] + b_half[k] * ps;
                    let upper = a_half_pa[k + 1] + b_half[k + 1] * ps;
                    s.pressure[k] = 0.5 * (lower + upper);
                }
            }
        }
        for k in 0..levels {
            let t = f64::from(self.temperature[[k, row, col]]);
            s.tv[k] = match self.humidity {
                None => t,
                Some(_) if self.dry_levels[k] => t,
                Some((kind, values)) => {
                    let h = f64::from(values[[k, row, col]]);
                    self.virtual_temperature(kind, t, h, s.pressure[k])
                }
            };
        }
        if let Some((pressure_pa, anchor)) = isobaric {
            s.nodes.isobaric_lowest(
                pressure_pa,
                &s.tv,
                levels,
                anchor,
                c,
                &mut s.height,
                &mut s.below,
            );
        } else if let Vertical::Hybrid { a_half_pa, b_half } = &self.cycle.vertical {
            let (ps, zs) = surface.unwrap_or((f64::NAN, f64::NAN));
            s.nodes.hybrid(
                a_half_pa,
                b_half,
                &s.tv,
                ps,
                zs,
                c,
                &mut s.height,
                &mut s.height_half,
            );
            s.below.iter_mut().for_each(|b| *b = false);
        }
        levels
    }
    /// The full-level heights of row `row` of a hybrid cycle into `z` (`[level, lon]`,
    /// `NaN` where masked): the values [`ColumnNodes::hybrid`] gives, bit for bit (the same
    /// operations in the same order), without building the nodes for interpolation that
    /// only layers and queries between levels need, and level by level along the row rather
    /// than column by column: the heights a served cycle stores.
    ///
    /// With `bounds`, also the heights at the bounds of the layers of the settings, for every
    /// column ([`RowBounds`]).
    fn hybrid_heights_row(
        &self,
        (a_half, b_half): (&[f64], &[f64]),
        row: usize,
        z: &mut ArrayViewMut2<'_, f32>,
        scratch: &mut Vec<f64>,
        mut bounds: Option<&mut RowBounds>,
    ) {
        let (levels, cols) = z.dim();
        z.fill(f32::NAN);
        if let Some(bounds) = bounds.as_deref_mut() {
            bounds.reset(&self.config.layers, cols);
        }
        if a_half.len() != levels + 1 || b_half.len() != levels + 1 || levels == 0 {
            return;
        }
        let Some((ps_row, zs_row)) = self
            .surface
            .as_ref()
            .map(|(ps, zs)| (ps.row(row), zs.row(row)))
        else {
            return;
        };
        // Per column: the half-level pressures ([half level, lon]), then the lower half
        // level's height, `NaN` once the column is masked (its heights above stay `NaN`).
        scratch.clear();
        scratch.resize((levels + 2) * cols, 0.0);
        let (half, z_lower) = scratch.split_at_mut((levels + 1) * cols);
        for c in 0..cols {
            let ps = f64::from(ps_row[c]);
            let zs = f64::from(zs_row[c]);
            let mut ok = ps.is_finite() && ps > 0.0 && zs.is_finite();
            if ok {
                for k in 0..=levels {
                    half[k * cols + c] = a_half[k] + b_half[k] * ps;
                }
                let at = |k: usize| half[k * cols + c];
                ok = at(0) > 0.0
                    && at(levels) >= 0.0
                    && (0..=levels).all(|k| at(k).is_finite())
                    && (0..levels).all(|k| at(k) > at(k + 1));
            }
            z_lower[c] = if ok { zs } else { f64::NAN };
        }
        let rd_g0 = self.constants.rd_over_g0();
        let humidity = self
            .humidity
            .as_ref()
            .map(|(kind, values)| (*kind, values.slice(s![.., row, ..])));
        for k in 0..levels {
            let t_row = self.temperature.slice(s![k, row, ..]);
            let h_row = humidity
                .as_ref()
                .filter(|_| !self.dry_levels[k])
                .map(|(kind, values)| (*kind, values.row(k)));
            for c in 0..cols {
                if z_lower[c].is_nan() {
                    continue;
                }
                let (lower, upper) = (half[k * cols + c], half[(k + 1) * cols + c]);
                let p_full = 0.5 * (lower + upper);
                let t = f64::from(t_row[c]);
                let tv = match &h_row {
                    None => t,
                    Some((kind, values)) => {
                        self.virtual_temperature(*kind, t, f64::from(values[c]), p_full)
                    }
                };
                if !usable_tv(tv) {
                    // Masks this level and every one above, as the column does.
                    z_lower[c] = f64::NAN;
                    continue;
                }
                let (z_full, z_upper) = full_level(lower, upper, tv, z_lower[c], rd_g0);
                if let Some(bounds) = bounds.as_deref_mut() {
                    if k == 0 {
                        // The surface node, as `ColumnNodes::hybrid` places it (only once
                        // the lowest level's virtual temperature is usable).
                        let ps = f64::from(ps_row[c]);
                        let tv_s = standard_lapse_extrapolated_temperature(
                            tv,
                            p_full,
                            ps,
                            &self.constants,
                        );
                        bounds.pass(c, (ps, tv_s, z_lower[c]), true, &self.constants);
                    }
                    if bounds.pending(c) {
                        bounds.pass(c, (p_full, tv, z_full), false, &self.constants);
                    }
                }
                z[[k, c]] = z_full as f32;
                z_lower[c] = z_upper;
            }
        }
    }

    /// Every column of the step (of its rows, from [`StepColumns::for_rows`]), rows in
    /// parallel: heights and flags `[level, lat, lon]`, thickness and its flags
    /// `[layer, lat, lon]` (one per layer of the settings). Every value is written.
    pub(crate) fn fill(
        &self,
        mut z: ArrayViewMut3<'_, f32>,
        mut b: ArrayViewMut3<'_, u8>,
        mut th: ArrayViewMut3<'_, f32>,
        mut tb: ArrayViewMut3<'_, u8>,
    ) {
        let levels = z.dim().0;
        z.axis_iter_mut(Axis(1))
            .into_par_iter()
            .zip(b.axis_iter_mut(Axis(1)).into_par_iter())
            .zip(th.axis_iter_mut(Axis(1)).into_par_iter())
            .zip(tb.axis_iter_mut(Axis(1)).into_par_iter())
            .enumerate()
            .for_each_init(
                || ColumnScratch::new(levels),
                |scratch, (row, (((z_row, b_row), th_row), tb_row))| {
                    self.row(row, scratch, z_row, b_row, th_row, tb_row);
                },
            );
    }

    fn row(
        &self,
        row: usize,
        s: &mut ColumnScratch,
        mut z_row: ArrayViewMut2<'_, f32>,
        mut b_row: ArrayViewMut2<'_, u8>,
        mut th_row: ArrayViewMut2<'_, f32>,
        mut tb_row: ArrayViewMut2<'_, u8>,
    ) {
        let c = self.constants;
        let cols = z_row.dim().1;
        let hybrid = match &self.cycle.vertical {
            Vertical::Hybrid { a_half_pa, b_half } => Some((a_half_pa, b_half)),
            Vertical::Isobaric { .. } => None,
        };
        // The layers' bounds are found along the row where the lowest half level is the
        // surface itself (`a = 0`, `b = 1`, as in every model's table): the nodes then go up
        // in pressure order from the surface node, which finding them on the way assumes.
        let from_the_surface =
            |(a, b): (&Vec<f64>, &Vec<f64>)| a.first() == Some(&0.0) && b.first() == Some(&1.0);
        if let Some((a_half_pa, b_half)) =
            hybrid.filter(|&ab| self.config.layers.is_empty() || from_the_surface(ab))
        {
            // Level by level along the row, with no nodes to build (every level of a hybrid
            // column lies above the ground); the layers' bounds are found on the way. A 1°
            // cycle on 137 levels (`benches/hybrid_cycle.py`), whole process: 0.116 s with
            // the three default layers found so, 0.137 s with each column's nodes built for
            // them, 0.101 s for the heights alone (15 alternate runs).
            b_row.fill(0);
            if self.config.layers.is_empty() {
                self.hybrid_heights_row((a_half_pa, b_half), row, &mut z_row, &mut s.row, None);
                return;
            }
            self.hybrid_heights_row(
                (a_half_pa, b_half),
                row,
                &mut z_row,
                &mut s.row,
                Some(&mut s.bounds),
            );
            for col in 0..cols {
                for l in 0..self.config.layers.len() {
                    th_row[[l, col]] =
                        match (s.bounds.height(2 * l, col), s.bounds.height(2 * l + 1, col)) {
                            (Some(bottom), Some(top)) => (top - bottom) as f32,
                            _ => f32::NAN,
                        };
                }
                self.layer_flags(row, col, &mut tb_row);
            }
            return;
        }
        for col in 0..cols {
            self.build(row, col, s);
            for (k, (&z, &b)) in s.height.iter().zip(&s.below).enumerate() {
                z_row[[k, col]] = z as f32;
                b_row[[k, col]] = u8::from(b);
            }
            for (l, layer) in self.config.layers.iter().enumerate() {
                th_row[[l, col]] = thickness_between(&s.nodes, layer.bottom_pa, layer.top_pa, &c)
                    .map_or(f32::NAN, |v| v as f32);
            }
            self.layer_flags(row, col, &mut tb_row);
        }
    }

    /// The below-ground flag of every layer of the settings at (`row`, `col`) into
    /// `tb_row[[layer, col]]`: 1 where the layer's bottom lies below the surface pressure.
    fn layer_flags(&self, row: usize, col: usize, tb_row: &mut ArrayViewMut2<'_, u8>) {
        let surface = self.surface(row, col);
        for (l, layer) in self.config.layers.iter().enumerate() {
            tb_row[[l, col]] = u8::from(surface.is_some_and(|(ps, _)| layer.bottom_pa > ps));
        }
    }

    fn virtual_temperature(&self, kind: HumidityKind, t: f64, h: f64, p: f64) -> f64 {
        let eps = self.constants.molar_mass_ratio;
        match kind {
            HumidityKind::SpecificHumidity => virtual_temperature_from_specific_humidity(t, h, eps),
            HumidityKind::MixingRatio => virtual_temperature_from_mixing_ratio(t, h, eps),
            HumidityKind::RelativeHumidity => {
                let e = h * saturation_vapour_pressure(
                    t,
                    self.config.saturation_formula,
                    self.config.rh_phase,
                );
                let q = specific_humidity_from_vapour_pressure(e, p, eps);
                virtual_temperature_from_specific_humidity(t, q, eps)
            }
            HumidityKind::DewPoint => {
                let e = vapour_pressure_from_dewpoint(h, self.config.saturation_formula);
                let q = specific_humidity_from_vapour_pressure(e, p, eps);
                virtual_temperature_from_specific_humidity(t, q, eps)
            }
        }
    }

    fn anchor(
        &self,
        surface: Option<(f64, f64)>,
        row: usize,
        col: usize,
        pressure_pa: &[f64],
    ) -> ColumnAnchor {
        match (self.reference, surface) {
            (Reference::Surface, Some((ps, zs))) => ColumnAnchor::Surface {
                pressure_pa: ps,
                height_m: zs,
            },
            (Reference::FileHeight(level), _) => {
                let heights = self.file_heights;
                let at = |k: usize| heights.map_or(f64::NAN, |z| f64::from(z[[k, row, col]]));
                let level = level.unwrap_or_else(|| {
                    (0..pressure_pa.len())
                        .find(|&k| at(k).is_finite())
                        .unwrap_or(0)
                });
                ColumnAnchor::LevelHeight {
                    level,
                    height_m: at(level),
                }
            }
            (Reference::StandardAtmosphere(z), _) => ColumnAnchor::LevelHeight {
                level: 0,
                height_m: z,
            },
            // Unreachable by construction (Surface is chosen only when the cycle has surface
            // fields); a masked column is the safe answer.
            (Reference::Surface, None) => ColumnAnchor::LevelHeight {
                level: 0,
                height_m: f64::NAN,
            },
        }
    }
}

#[cfg(test)]
mod tests {
    use std::sync::atomic::{AtomicBool, AtomicUsize};
    use std::sync::mpsc;

    use super::*;
    use crate::demo::{write_synthetic_global, SyntheticGlobal};
    use crate::ingest::{read_cycle, FilledStep, IngestConfig, StepFeed};

    fn bits<'a>(values: impl IntoIterator<Item = &'a f32>) -> Vec<u32> {
        values.into_iter().map(|v| v.to_bits()).collect()
    }

    /// An invented three-step synthetic cycle, read, and the two-pass path's heights of it
    /// with the 1000–500 hPa layer (`compute_heights`, checked against published values in
    /// tests/compute.rs and tests/kernel.rs).
    fn three_steps() -> (Cycle, ComputeConfig, Heights) {
        let dir = tempfile::tempdir().expect("temp dir");
        let path = dir.path().join("three_steps.nc");
        let spec = SyntheticGlobal {
            rows: 37,
            cols: 72,
            levels: 12,
            times: 3,
            deflate_level: None,
        };
        write_synthetic_global(&path, &spec).expect("synthetic cycle");
        let cycle = read_cycle(&path, &IngestConfig::default()).expect("read");
        let config = ComputeConfig {
            layers: vec![Layer {
                bottom_pa: 100_000.0,
                top_pa: 50_000.0,
            }],
            ..ComputeConfig::default()
        };
        let reference = compute_heights(&cycle, &config, &|_| {}).expect("reference");
        (cycle, config, reference)
    }

    /// Asserts that `got` holds step (0, `t`) of `reference`: heights bit for bit, flags.
    fn assert_step(got: &StepHeights, reference: &Heights, t: usize) {
        let want = reference.geopotential_height.slice(s![0, t, .., .., ..]);
        assert_eq!(bits(&got.geopotential_height), bits(want), "step {t}");
        let want = reference.below_ground.slice(s![0, t, .., .., ..]);
        assert!(got.below_ground == want, "below-ground flags, step {t}");
    }

    /// A feed holding every step of member 0 of `cycle` (which has humidity), in file order,
    /// as the reading thread hands them over.
    fn every_step(cycle: &Cycle) -> mpsc::Receiver<FilledStep<'_>> {
        let humidity = cycle.humidity.as_ref().expect("humidity");
        let (tx, rx) = mpsc::channel();
        for t in 0..cycle.temperature.dim().1 {
            tx.send(FilledStep {
                member: 0,
                time: t,
                temperature: cycle.temperature.slice(s![0, t, .., .., ..]),
                humidity: Some(humidity.values.slice(s![0, t, .., .., ..])),
            })
            .expect("feed");
        }
        rx
    }

    /// An output buffer for every step, nothing computed yet.
    fn each_step(kernel: &IsobaricKernel, cycle: &Cycle) -> EachStep {
        let (members, times, levels, rows, cols) = cycle.temperature.dim();
        let total = members * times;
        EachStep {
            outs: (0..total)
                .map(|_| Some(kernel.outputs((1, 1, levels, rows, cols))))
                .collect(),
            finished: (0..total).map(|_| None).collect(),
            at: (0, 0),
            partial: None,
        }
    }

    /// The serving read's kernel side on a feed that holds every step of the cycle: while
    /// the read is still going on, every step but the last is computed, to the two-pass
    /// path's bits; once it has ended, nothing is started (the first step is left at row 0).
    #[test]
    fn the_kernel_computes_while_the_read_goes_on_and_stops_when_it_ends() {
        let (cycle, config, reference) = three_steps();
        let kernel = IsobaricKernel::new(&cycle, &config.layers).expect("kernel");
        let (members, times, ..) = cycle.temperature.dim();
        for read_ended in [false, true] {
            let flag = AtomicBool::new(read_ended);
            let mut out = each_step(&kernel, &cycle);
            let feed = StepFeed::new(every_step(&cycle), &flag, false);
            compute_while_reading(&kernel, &cycle, feed, &mut out, (members, times));
            if read_ended {
                assert!(out.finished.iter().all(Option::is_none));
                assert_eq!(out.partial, Some((0, 0)));
                continue;
            }
            assert_eq!(out.partial, None);
            assert!(out.finished[times - 1].is_none(), "the last step is left");
            for t in 0..times - 1 {
                let got = out.finished[t].as_ref().expect("computed while reading");
                let want = reference.geopotential_height.slice(s![0, t, .., .., ..]);
                assert_eq!(bits(&got.geopotential_height), bits(want), "step {t}");
            }
        }
    }

    /// A cycle without surface fields, its columns started at the standard atmosphere's
    /// height of its lowest level: the kernel takes it, and computes its steps while the read
    /// goes on from the shell the reader hands over (temperature and humidity still empty),
    /// to the bits of the whole cycle's heights.
    #[test]
    fn a_cycle_without_surface_fields_is_computed_while_the_read_goes_on() {
        let (mut cycle, config, _) = three_steps();
        cycle.surface = None;
        assert!(cycle.file_heights.is_none());
        let reference = compute_heights(&cycle, &config, &|_| {}).expect("reference");
        let kernel = row_kernel(&cycle, &config).expect("the kernel takes the cycle");
        let mut shell = cycle.clone();
        shell.temperature = crate::model::Field5::zeros((0, 0, 0, 0, 0));
        if let Some(h) = shell.humidity.as_mut() {
            h.values = crate::model::Field5::zeros((0, 0, 0, 0, 0));
        }
        let (members, times, ..) = cycle.temperature.dim();
        let flag = AtomicBool::new(false);
        let mut out = each_step(&kernel, &cycle);
        let feed = StepFeed::new(every_step(&cycle), &flag, false);
        compute_while_reading(&kernel, &shell, feed, &mut out, (members, times));
        for t in 0..times - 1 {
            let got = out.finished[t].as_ref().expect("computed while reading");
            assert_step(got, &reference, t);
        }
    }

    /// Where the read keeps every core busy by itself, neither the kernel nor the column path
    /// computes anything while it goes on, and nothing is left part-way: every step is for
    /// `PendingSteps::finish`.
    #[test]
    fn nothing_is_computed_while_a_read_uses_every_core() {
        let (cycle, config, _) = three_steps();
        let kernel = IsobaricKernel::new(&cycle, &config.layers).expect("kernel");
        let (members, times, ..) = cycle.temperature.dim();
        let flag = AtomicBool::new(false);
        let mut out = each_step(&kernel, &cycle);
        let feed = StepFeed::new(every_step(&cycle), &flag, true);
        compute_while_reading(&kernel, &cycle, feed, &mut out, (members, times));
        assert!(out.finished.iter().all(Option::is_none));
        assert_eq!(out.partial, None);
        let feed = StepFeed::new(every_step(&cycle), &flag, true);
        let columns = columns_while_reading(&cycle, &config, feed, (members, times), Pace::Always);
        assert!(columns.finished.iter().all(Option::is_none));
        assert!(columns.partial.is_none());
    }

    /// The column path's side of the serving read, on a feed that holds every step: while
    /// the read goes on, every step but the last is computed in pieces of rows, to the bits
    /// of the column path on the whole cycle (`compute_heights_by_columns`, checked against
    /// published values in tests/compute.rs); once the read has ended, nothing is kept.
    #[test]
    fn the_column_path_computes_while_the_read_goes_on_and_stops_when_it_ends() {
        let (cycle, ..) = three_steps();
        let config = ComputeConfig::default();
        let reference = compute_heights_by_columns(&cycle, &config, &|_| {}).expect("columns");
        let (members, times, ..) = cycle.temperature.dim();
        for read_ended in [false, true] {
            let flag = AtomicBool::new(read_ended);
            let feed = StepFeed::new(every_step(&cycle), &flag, false);
            let out = columns_while_reading(&cycle, &config, feed, (members, times), Pace::Always);
            let finished = out.finished;
            assert_eq!(finished.len(), times);
            if read_ended {
                assert!(finished.iter().all(Option::is_none));
                assert!(out.partial.is_none(), "nothing computed, nothing kept");
                continue;
            }
            assert!(finished[times - 1].is_none(), "the last step is left");
            for (t, step) in finished.iter().take(times - 1).enumerate() {
                assert_step(
                    step.as_ref().expect("computed while reading"),
                    &reference,
                    t,
                );
            }
        }
    }

    /// A column-path step stopped part-way (here after three pieces) keeps its rows, and
    /// resumed from them gives the step computed whole, bit for bit. With its pace measured,
    /// the serving read's column side on a feed whose steps all arrived at once (a read far
    /// faster than computing) computes one piece of the first step, keeps it, and leaves the
    /// rest for after the read; [`PendingSteps::finish`] resumes it to the same bits.
    #[test]
    fn a_column_step_left_part_way_is_resumed_to_the_same_bits() {
        let (cycle, ..) = three_steps();
        let config = ComputeConfig::default();
        let reference = compute_heights_by_columns(&cycle, &config, &|_| {}).expect("columns");
        let (members, times, _, rows, _) = cycle.temperature.dim();
        let piece = rows.div_ceil(PIECES_PER_STEP);
        let humidity = cycle.humidity.as_ref().expect("humidity");
        let fields = (
            cycle.temperature.slice(s![0, 1, .., .., ..]),
            Some(humidity.values.slice(s![0, 1, .., .., ..])),
        );
        let asked = AtomicUsize::new(0);
        let stop = || asked.fetch_add(1, Ordering::Relaxed) >= 3;
        let mut step = ColumnsStep::start(&config, fields.0.dim());
        assert_eq!(
            step.run(&cycle, &config, (0, 1), fields, &stop).ok(),
            Some(false)
        );
        assert_eq!(step.done, 3 * piece, "rows done before the stop");
        let resumed = columns_step(&cycle, &config, (0, 1), Some((step.z, step.b, step.done)))
            .expect("resumed");
        let want = reference.geopotential_height.slice(s![0, 1, .., .., ..]);
        assert_eq!(
            bits(&resumed.geopotential_height),
            bits(want),
            "resumed step"
        );

        let flag = AtomicBool::new(false);
        let feed = StepFeed::new(every_step(&cycle), &flag, false);
        let out = columns_while_reading(&cycle, &config, feed, (members, times), Pace::Measured);
        assert!(
            out.finished.iter().all(Option::is_none),
            "no whole step while reading"
        );
        let partial = out.partial.expect("the first piece kept");
        assert_eq!((partial.index, partial.rows), (0, piece));
        let heights = ServedHeights::pending(members, times, String::new());
        let pending = PendingSteps {
            kernel: None,
            buffers: Vec::new(),
            resume: None,
            columns_partial: Some(partial),
        };
        pending.finish(&cycle, &config, &heights);
        for t in 0..times {
            assert_step(
                heights.ready(0, t).expect("every step computed"),
                &reference,
                t,
            );
        }
    }

    /// The serving read stops the kernel between two pieces of rows once the file is read
    /// (here `stop` says so after three pieces of the second step): the step left part-way,
    /// resumed from its buffer after the listing, and the step not started give the heights
    /// of the two-pass path (`compute_heights` on the whole cycle), bit for bit. The file is
    /// an invented synthetic cycle; the two-pass path is checked against published values in
    /// tests/compute.rs and tests/kernel.rs.
    #[test]
    fn a_step_left_part_way_is_resumed_to_the_same_bits() {
        let (cycle, config, reference) = three_steps();
        let kernel = IsobaricKernel::new(&cycle, &config.layers).expect("kernel");
        let surface = cycle.surface.as_ref().expect("surface fields");
        let (members, times, _, rows, _) = cycle.temperature.dim();
        let mut out = each_step(&kernel, &cycle);
        let fields = |t| StepFields::of(&cycle, surface, (0, t));
        assert_eq!(out.run(&kernel, fields(0), 0, &|| false), Ok(true));
        let asked = AtomicUsize::new(0);
        let stop = || asked.fetch_add(1, Ordering::Relaxed) >= 3;
        assert_eq!(out.run(&kernel, fields(1), 1, &stop), Ok(false));
        let piece = rows.div_ceil(PIECES_PER_STEP);
        assert_eq!(
            out.partial,
            Some((1, 3 * piece)),
            "rows done before the stop"
        );

        let heights = ServedHeights::pending(members, times, String::new());
        for (i, step) in out.finished.into_iter().enumerate() {
            if let Some(step) = step {
                heights.set(i / times, i % times, step);
            }
        }
        assert_eq!(heights.pending_steps(), vec![(0, 1), (0, 2)]);
        let pending = PendingSteps {
            kernel: Some(kernel),
            buffers: out.outs,
            resume: out.partial,
            columns_partial: None,
        };
        pending.finish(&cycle, &config, &heights);
        for t in 0..times {
            let got = heights.ready(0, t).expect("every step computed");
            let want = reference.geopotential_height.slice(s![0, t, .., .., ..]);
            assert_eq!(
                bits(&got.geopotential_height),
                bits(want),
                "heights, step {t}"
            );
            let want = reference.below_ground.slice(s![0, t, .., .., ..]);
            assert!(got.below_ground == want, "below-ground flags, step {t}");
        }
    }
}
