//! The grid kernel: heights and layer thickness for every column of a cycle, in parallel.
//!
//! [`compute_heights`] sends the common case (isobaric levels, surface fields, specific
//! humidity, mixing ratio or none) to the row-wise [`crate::kernel::IsobaricKernel`], and
//! everything else to the column path here, [`compute_heights_by_columns`]: work split by
//! latitude row (rayon), each row walking its columns with one reused [`ColumnNodes`]
//! scratch buffer, so the inner loop allocates nothing. Fields are `f32`; every column is
//! gathered into `f64`, integrated in `f64`, and scattered back as `f32`. On both paths a
//! missing input masks what depends on it in that column only: nothing crosses columns.

use std::path::Path;

use ndarray::{s, Array5, ArrayView2, ArrayView3, ArrayViewMut2, Axis};
use rayon::prelude::*;

use crate::buffers::touch_pages;
use crate::ingest::{read_cycle_overlapped, IngestConfig, IngestError};
use crate::kernel::{IsobaricKernel, KernelOutput, StepFields};
use crate::model::{Cycle, Heights, HumidityKind, Layer, LayerThickness, Vertical};
use crate::physics::column::{thickness_between, ColumnAnchor, ColumnNodes};
use crate::physics::humidity::{
    saturation_vapour_pressure, specific_humidity_from_vapour_pressure,
    vapour_pressure_from_dewpoint, virtual_temperature_from_mixing_ratio,
    virtual_temperature_from_specific_humidity, RelativeHumidityPhase, SaturationFormula,
};
use crate::physics::standard_atmosphere::us_standard_atmosphere_height_at_pressure;
use crate::physics::Constants;

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
/// Isobaric cycles with surface fields and specific humidity, mixing ratio or no humidity
/// (the common case) run the row-wise [`crate::kernel::IsobaricKernel`], which gives the
/// same answers as the column path to well within a millimetre and several times faster;
/// everything else runs [`compute_heights_by_columns`].
pub fn compute_heights(
    cycle: &Cycle,
    config: &ComputeConfig,
    progress: &(dyn Fn(usize) + Sync),
) -> Result<Heights, ComputeError> {
    check_layers(config)?;
    let kernel = match IsobaricKernel::new(cycle, &config.layers) {
        Ok(kernel) => kernel,
        Err(_) => return compute_heights_by_columns(cycle, config, progress),
    };
    // Same validation as the column path (a cycle with surface fields always resolves).
    let reference = StepColumns::new(cycle, config, 0, 0)?.reference;
    match kernel.run(cycle, progress) {
        Ok(out) => Ok(kernel_heights(cycle, out, reference)),
        // Not reached: the kernel was prepared for this very cycle.
        Err(_) => compute_heights_by_columns(cycle, config, progress),
    }
}

/// Output bytes faulted in per piece of idle work in [`read_and_compute`]: a huge page.
const TOUCH_BYTES: usize = 2 << 20;

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

/// Reads the cycle in `path` and computes it as [`compute_heights`] does, the kernel
/// working on each (member, time) step as soon as that step has been read
/// ([`read_cycle_overlapped`]), so that on a cycle of many lead times or members most of
/// the computing hides behind the reading. The answers are those of [`read_cycle`]
/// followed by [`compute_heights`], bit for bit.
///
/// Cycles the row kernel does not take, and files whose layout needs whole-variable
/// reads, are read first and computed after, as before. `progress` is called once per
/// finished (member, time) step with the number finished and the total.
///
/// [`read_cycle`]: crate::ingest::read_cycle
pub fn read_and_compute(
    path: &Path,
    ingest: &IngestConfig,
    config: &ComputeConfig,
    progress: &(dyn Fn(usize, usize) + Sync),
) -> Result<(Cycle, Heights), LoadError> {
    check_layers(config)?;
    let prepare = |cycle: &Cycle| {
        let kernel = IsobaricKernel::new(cycle, &config.layers).ok()?;
        let reference = StepColumns::new(cycle, config, 0, 0).ok()?.reference;
        let out = kernel.outputs(cycle.temperature.dim());
        Some((kernel, reference, out))
    };
    let total_of = |out: &KernelOutput| {
        let (members, times, ..) = out.geopotential_height.dim();
        members * times
    };
    let work = |(kernel, reference, mut out): (IsobaricKernel, Reference, KernelOutput),
                shell: &Cycle,
                mut steps: crate::ingest::StepFeed<'_>|
     -> Option<(Reference, KernelOutput, usize)> {
        let surface = shell.surface.as_ref()?;
        let pool = (total_of(&out) > 1).then(background_pool).flatten();
        let (_, times, levels, rows, cols) = out.geopotential_height.dim();
        let step_len = levels * rows * cols;
        // While no step is ready (above all while the first is read), fault in the output
        // pages of the steps not yet computed: work the kernel would otherwise do at its
        // first write, moved into idle time.
        let (mut z_at, mut b_at) = (0usize, 0usize);
        let mut done = 0;
        loop {
            let next_start = done * step_len;
            let step = steps.next_or_idle(|| {
                let (z, b) = (&mut out.geopotential_height, &mut out.below_ground);
                let (Some(z), Some(b)) = (z.as_slice_mut(), b.as_slice_mut()) else {
                    return false;
                };
                z_at = z_at.max(next_start);
                b_at = b_at.max(next_start);
                if z_at < z.len() {
                    z_at = touch_pages(z, z_at, TOUCH_BYTES);
                } else if b_at < b.len() {
                    b_at = touch_pages(b, b_at, TOUCH_BYTES);
                } else {
                    return false;
                }
                true
            });
            let Some(step) = step else {
                break;
            };
            let (m, t) = (step.member, step.time);
            if m * times + t != done {
                return None;
            }
            let fields = StepFields {
                t: step.temperature,
                q: step.humidity,
                ps: surface.pressure_pa.slice(s![m, t, .., ..]),
                zs: surface.height_m.slice(s![m, t, .., ..]),
            };
            // Every step but the last is computed while later ones are still being read.
            let reading = done + 1 < total_of(&out);
            match pool.as_ref().filter(|_| reading) {
                Some(pool) => pool.install(|| kernel.run_step(fields, (m, t), &mut out)),
                None => kernel.run_step(fields, (m, t), &mut out),
            }
            .ok()?;
            done += 1;
            progress(done, total_of(&out));
        }
        Some((reference, out, done))
    };
    let (cycle, computed) = read_cycle_overlapped(path, ingest, prepare, work)?;
    let (members, times, ..) = cycle.temperature.dim();
    let total = members * times;
    let heights = match computed.flatten() {
        // Every step went through the kernel.
        Some((reference, out, done)) if done == total => kernel_heights(&cycle, out, reference),
        _ => compute_heights(&cycle, config, &|done| progress(done, total))?,
    };
    Ok((cycle, heights))
}

/// Threads for the kernel while later steps of a cycle are still being read: as many as
/// rayon's own, each at a lower scheduling priority (nice +10 on Linux) than the thread that
/// reads.
///
/// The file is read by one thread at a time (the NetCDF library is serialised), so the read
/// is the critical path of [`read_and_compute`]; with the kernel's threads at the same
/// priority, the reading thread got about two thirds of a core on two cores. Lowered, they
/// take what the reader leaves: in alternate runs of `benches/compute.rs` a four-step 0.5°
/// cycle became servable in 1.19-1.34 times its read against 1.41-1.55 without (a second
/// set of runs, noisier, gave 1.21-1.42 against 1.30-1.40). In the service the
/// same holds for requests: a cycle loading in the background yields to the answers being
/// computed. The last step, with nothing left to read, runs on the global pool (a one-step
/// cycle never builds this one). `None` (the global pool is used) where the pool cannot be
/// built.
fn background_pool() -> Option<rayon::ThreadPool> {
    rayon::ThreadPoolBuilder::new()
        .num_threads(rayon::current_num_threads())
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

fn check_layers(config: &ComputeConfig) -> Result<(), ComputeError> {
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
/// reference the fast kernel is tested against, and the path for hybrid levels, relative
/// humidity, dewpoint and cycles without surface fields.
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
            let step = StepColumns::new(cycle, config, m, t)?;
            let mut z_mt = height.slice_mut(s![m, t, .., .., ..]);
            let mut b_mt = below.slice_mut(s![m, t, .., .., ..]);
            let mut th_mt = thick.slice_mut(s![m, t, .., .., ..]);
            let mut tb_mt = thick_below.slice_mut(s![m, t, .., .., ..]);
            z_mt.axis_iter_mut(Axis(1))
                .into_par_iter()
                .zip(b_mt.axis_iter_mut(Axis(1)).into_par_iter())
                .zip(th_mt.axis_iter_mut(Axis(1)).into_par_iter())
                .zip(tb_mt.axis_iter_mut(Axis(1)).into_par_iter())
                .enumerate()
                .for_each_init(
                    || ColumnScratch::new(levels),
                    |scratch, (row, (((z_row, b_row), th_row), tb_row))| {
                        step.row(row, scratch, z_row, b_row, th_row, tb_row);
                    },
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
        let (m, t) = (member, time);
        Ok(Self {
            cycle,
            config,
            reference,
            temperature: cycle.temperature.slice(s![m, t, .., .., ..]),
            humidity: cycle
                .humidity
                .as_ref()
                .map(|h| (h.kind, h.values.slice(s![m, t, .., .., ..]))),
            dry_levels,
            surface: cycle.surface.as_ref().map(|sf| {
                (
                    sf.pressure_pa.slice(s![m, t, .., ..]),
                    sf.height_m.slice(s![m, t, .., ..]),
                )
            }),
            file_heights: cycle
                .file_heights
                .as_ref()
                .map(|z| z.slice(s![m, t, .., .., ..])),
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
        let c = &self.constants;
        let levels = s.tv.len();
        let surface = self.surface(row, col);
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
        match &self.cycle.vertical {
            Vertical::Isobaric { pressure_pa } => {
                let anchor = self.anchor(surface, row, col, pressure_pa);
                s.nodes
                    .isobaric(pressure_pa, &s.tv, anchor, c, &mut s.height, &mut s.below);
            }
            Vertical::Hybrid { a_half_pa, b_half } => {
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
        }
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
        for col in 0..cols {
            self.build(row, col, s);
            for (k, (&z, &b)) in s.height.iter().zip(&s.below).enumerate() {
                z_row[[k, col]] = z as f32;
                b_row[[k, col]] = u8::from(b);
            }
            let surface = self.surface(row, col);
            for (l, layer) in self.config.layers.iter().enumerate() {
                th_row[[l, col]] = thickness_between(&s.nodes, layer.bottom_pa, layer.top_pa, &c)
                    .map_or(f32::NAN, |v| v as f32);
                tb_row[[l, col]] = u8::from(surface.is_some_and(|(ps, _)| layer.bottom_pa > ps));
            }
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
