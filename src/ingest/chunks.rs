//! Whole (member, time) steps of a compressed `f32` variable read chunk by chunk without the
//! NetCDF library: the stored chunks are read at their file offsets and inflated on every
//! core at once.
//!
//! The library inflates the chunks of a read one after the other on the one thread that may
//! call it, and a compressed cycle's read is mostly that: 0.23 s for temperature and humidity
//! of the 0.5° zlib-1 bench cycle, of which inflating took 0.12 s on one core in this
//! crate's own pass. For a variable whose chunks hold one (member, time) step each (whole
//! latitude-longitude planes, the usual layout of NWP output and the one `hypsogrid compute`
//! writes, or tiles of them, as netCDF-C's default chunking makes), stored as little-endian
//! `f32` behind the HDF5 deflate filter, the byte-shuffle filter, both or neither,
//! [`StepChunks`] reads a step's chunks at the offsets HDF5 reports
//! ([`crate::hdf5::chunk_layout`]), inflates them (zlib format, as the deflate filter writes
//! it: RFC 1950/1951) and undoes the shuffle (HDF5's byte shuffle: byte `j` of every value
//! in turn, then byte `j + 1`), each block of levels on its own thread. Any other layout or
//! filter (Fletcher-32, szip, chunks across steps, chunks never written) goes through the
//! library. The plan is checked against the library's read of the first chunk of the first
//! step read, while that step is read the planned way.

use std::fs::File;
use std::os::unix::fs::{FileExt, MetadataExt};
use std::path::Path;
use std::sync::Arc;

use rayon::prelude::*;

use super::IngestError;
use crate::hdf5::{chunk_layout, unshuffle_f32, Pipeline, StoredChunk};

/// Where each stored chunk of a variable's steps lies, for [`StepChunks::read_step`].
#[derive(Debug)]
pub(crate) struct StepChunks {
    file: Arc<File>,
    label: String,
    variable: String,
    /// `[member, time, level, lat, lon]`, file order (absent axes 1).
    shape: [usize; 5],
    /// Levels, latitude rows and longitude columns a chunk holds.
    tile: [usize; 3],
    /// Chunks along the level, latitude and longitude axes.
    across: [usize; 3],
    /// Where the shuffle and deflate filters stand in the pipeline.
    pipeline: Pipeline,
    /// The chunks of every step in order: index `((step * across[0] + k) * across[1] + y)
    /// * across[2] + x` for the chunk starting at level `k * tile[0]`, row `y * tile[1]`,
    /// column `x * tile[2]`.
    chunks: Vec<StoredChunk>,
}

/// What a stepwise field tells [`StepChunks::plan`] about itself.
pub(crate) struct ChunkedVariable<'a> {
    /// The file's label, for errors.
    pub(crate) label: &'a str,
    /// The variable's (and dataset's) name.
    pub(crate) name: String,
    /// `[member, time, level, lat, lon]`, file order (absent axes 1).
    pub(crate) shape: [usize; 5],
    /// Which canonical axes the file has (member, time, level, lat, lon).
    pub(crate) present: [bool; 5],
    /// The variable's chunk lengths, file order.
    pub(crate) chunk_dims: &'a [usize],
}

/// Scratch of one thread: a chunk as stored, inflated, and as values, and the inflater.
struct Scratch {
    packed: Vec<u8>,
    inflated: Vec<u8>,
    values: Vec<f32>,
    inflater: libdeflater::Decompressor,
}

impl Scratch {
    fn new() -> Self {
        Self {
            packed: Vec::new(),
            inflated: Vec::new(),
            values: Vec::new(),
            inflater: libdeflater::Decompressor::new(),
        }
    }
}

impl StepChunks {
    /// The chunk reads of `var` in the file at `path`, read through `own`, or `None` where
    /// its layout or filters are not ones this reader takes, or HDF5 does not describe its
    /// chunks. The caller holds the NetCDF session and has checked that the variable is
    /// stored as little-endian `f32` with its dimensions in canonical order.
    ///
    /// `own` must have been opened before the library opened `path`, and is used only while
    /// `path` still names the same file: a file renamed over `path` in between (a producer
    /// replacing a cycle) would otherwise be read at the offsets of another file's chunks.
    /// Then the library opened either the file `own` holds or a later one, and a later one
    /// shows as `path` naming another file now.
    pub(crate) fn plan(path: &Path, own: &File, var: &ChunkedVariable<'_>) -> Option<Self> {
        let [members, times, levels, rows, cols] = var.shape;
        // The chunk length along each canonical axis (1 where the file lacks the axis).
        let mut chunk = [1usize; 5];
        let mut dims = var.chunk_dims.iter();
        for (axis, present) in var.present.iter().enumerate() {
            if *present {
                chunk[axis] = *dims.next()?;
            }
        }
        let tile = [chunk[2], chunk[3], chunk[4]];
        let one_step = chunk[0] == 1 && chunk[1] == 1;
        if dims.next().is_some() || !one_step || tile.contains(&0) {
            return None;
        }
        if levels == 0 || rows == 0 || cols == 0 {
            return None;
        }
        let across = [
            levels.div_ceil(tile[0]),
            rows.div_ceil(tile[1]),
            cols.div_ceil(tile[2]),
        ];
        let rank = var.present.iter().filter(|p| **p).count();
        let (filters, stored) = chunk_layout(path, &var.name, rank)?;
        let pipeline = Pipeline::of(&filters)?;
        let per_step = across.iter().product::<usize>();
        let mut chunks: Vec<Option<StoredChunk>> = vec![None; members * times * per_step];
        for c in stored {
            // File-order start indices back to canonical positions.
            let mut at = [0u64; 5];
            let mut starts = c.start.iter();
            for (axis, present) in var.present.iter().enumerate() {
                if *present {
                    at[axis] = *starts.next()?;
                }
            }
            let [m, t, k, y, x] = at.map(|v| usize::try_from(v).unwrap_or(usize::MAX));
            let aligned = k % tile[0] == 0 && y % tile[1] == 0 && x % tile[2] == 0;
            if m >= members || t >= times || k >= levels || y >= rows || x >= cols || !aligned {
                return None;
            }
            let (k, y, x) = (k / tile[0], y / tile[1], x / tile[2]);
            let index = (((m * times + t) * across[0] + k) * across[1] + y) * across[2] + x;
            *chunks.get_mut(index)? = Some(c);
        }
        // A chunk never written reads as fill values through the library: left to it.
        let chunks: Vec<StoredChunk> = chunks.into_iter().collect::<Option<_>>()?;
        let (ours, now) = (own.metadata().ok()?, std::fs::metadata(path).ok()?);
        if (ours.dev(), ours.ino()) != (now.dev(), now.ino()) {
            return None;
        }
        Some(Self {
            file: Arc::new(own.try_clone().ok()?),
            label: var.label.to_string(),
            variable: var.name.clone(),
            shape: var.shape,
            tile,
            across,
            pipeline,
            chunks,
        })
    }

    /// Levels, rows and columns of the first chunk that lie inside the variable.
    pub(crate) fn first_chunk_extent(&self) -> [usize; 3] {
        let [_, _, levels, rows, cols] = self.shape;
        [
            self.tile[0].min(levels),
            self.tile[1].min(rows),
            self.tile[2].min(cols),
        ]
    }

    /// Values of one chunk as stored (edge chunks are stored whole).
    fn chunk_values(&self) -> usize {
        self.tile.iter().product()
    }

    /// Reads step (`member`, `time`) into `out` (`[level, lat, lon]`, the file's level order,
    /// as stored): the values the library's read of the step gives, bit for bit. The blocks
    /// of levels the chunks make are read and inflated in parallel, on rayon's pool (the
    /// caller's, or the global one) while the caller holds the NetCDF session: no task on
    /// those pools may wait for the session, or this would wait for it in turn.
    pub(crate) fn read_step(
        &self,
        (member, time): (usize, usize),
        out: &mut [f32],
    ) -> Result<(), IngestError> {
        let [members, times, levels, rows, cols] = self.shape;
        if member >= members || time >= times || out.len() != levels * rows * cols {
            return Err(self.error(format!(
                "cannot read step ({member}, {time}) into {} values",
                out.len()
            )));
        }
        let step = member * times + time;
        let per_block = self.tile[0] * rows * cols;
        out.par_chunks_mut(per_block.max(1))
            .enumerate()
            .try_for_each_init(Scratch::new, |scratch, (block, region)| {
                self.read_block(step, block, region, scratch)
            })
    }

    /// The chunks of level block `block` of step `step` into `region` (its levels, whole
    /// planes).
    fn read_block(
        &self,
        step: usize,
        block: usize,
        region: &mut [f32],
        scratch: &mut Scratch,
    ) -> Result<(), IngestError> {
        let [_, _, _, rows, cols] = self.shape;
        let [_, ty, tx] = self.tile;
        let [kb, yb, xb] = self.across;
        let plane = rows * cols;
        let levels_here = region.len() / plane.max(1);
        if yb == 1 && xb == 1 && region.len() == self.chunk_values() {
            // A chunk of whole planes, all of them in the variable: straight into place.
            let index = (step * kb + block) * yb * xb;
            return self.read_chunk(index, scratch, Some(region));
        }
        for y in 0..yb {
            for x in 0..xb {
                let index = ((step * kb + block) * yb + y) * xb + x;
                self.read_chunk(index, scratch, None)?;
                let (r0, c0) = (y * ty, x * tx);
                let (height, width) = (ty.min(rows - r0), tx.min(cols - c0));
                for l in 0..levels_here {
                    for r in 0..height {
                        let from = (l * ty + r) * tx;
                        let to = l * plane + (r0 + r) * cols + c0;
                        region[to..to + width].copy_from_slice(&scratch.values[from..from + width]);
                    }
                }
            }
        }
        Ok(())
    }

    /// Chunk `index` as values into `into` when given (of the chunk's length), else into
    /// `scratch.values` (the whole chunk as stored).
    fn read_chunk(
        &self,
        index: usize,
        scratch: &mut Scratch,
        into: Option<&mut [f32]>,
    ) -> Result<(), IngestError> {
        let Scratch {
            packed,
            inflated,
            values,
            inflater,
        } = scratch;
        let chunk = self
            .chunks
            .get(index)
            .ok_or_else(|| self.error(format!("no chunk {index}")))?;
        let chunk_error = |what: String| {
            self.error(format!(
                "the chunk at byte {} ({}) {what}",
                chunk.addr,
                self.place(index)
            ))
        };
        let size = usize::try_from(chunk.size)
            .map_err(|_| chunk_error(format!("is too large ({} bytes)", chunk.size)))?;
        packed.resize(size, 0);
        self.file
            .read_exact_at(packed, chunk.addr)
            .map_err(|e| chunk_error(format!("cannot be read ({size} bytes): {e}")))?;
        let applied = |filter: Option<usize>| {
            filter.is_some_and(|i| i >= 32 || chunk.filter_mask & (1 << i) == 0)
        };
        let bytes = 4 * self.chunk_values();
        let data: &[u8] = if applied(self.pipeline.deflate) {
            inflated.resize(bytes, 0);
            let n = inflater
                .zlib_decompress(packed, inflated)
                .map_err(|status| {
                    chunk_error(match status {
                        libdeflater::DecompressionError::BadData => {
                            "does not inflate: its compressed bytes are damaged".to_string()
                        }
                        libdeflater::DecompressionError::InsufficientSpace => {
                            format!(
                                "inflates to more than the chunk's {bytes} bytes: its \
                                 compressed bytes are damaged"
                            )
                        }
                    })
                })?;
            &inflated[..n]
        } else {
            packed
        };
        if data.len() != bytes {
            return Err(chunk_error(format!(
                "holds {} bytes, not {bytes}",
                data.len()
            )));
        }
        let values = match into {
            Some(into) => into,
            None => {
                values.resize(self.chunk_values(), 0.0);
                values.as_mut_slice()
            }
        };
        // HDF5 leaves a chunk of a single value unshuffled.
        if applied(self.pipeline.shuffle) && self.chunk_values() > 1 {
            unshuffle_f32(data, values);
        } else {
            for (v, b) in values.iter_mut().zip(data.chunks_exact(4)) {
                *v = f32::from_le_bytes([b[0], b[1], b[2], b[3]]);
            }
        }
        Ok(())
    }

    /// Where chunk `index` lies, for errors: its step and level indices (file order, from
    /// 0), and its rows and columns where it holds less than whole planes.
    fn place(&self, index: usize) -> String {
        let [members, times, levels, rows, cols] = self.shape;
        let [kb, yb, xb] = self.across;
        let [tk, ty, tx] = self.tile;
        let (x, rest) = (index % xb.max(1), index / xb.max(1));
        let (y, rest) = (rest % yb.max(1), rest / yb.max(1));
        let (k, step) = (rest % kb.max(1), rest / kb.max(1));
        let (member, time) = (step / times.max(1), step % times.max(1));
        let span = |start: usize, len: usize, end: usize| {
            let last = (start + len).min(end) - 1;
            if last == start {
                format!("{start}")
            } else {
                format!("{start} to {last}")
            }
        };
        let mut place = String::new();
        if members > 1 {
            place.push_str(&format!("member {member}, "));
        }
        place.push_str(&format!(
            "time index {time}, level index {} in file order",
            span(k * tk, tk, levels)
        ));
        if yb > 1 || xb > 1 {
            place.push_str(&format!(
                ", rows {}, columns {}",
                span(y * ty, ty, rows),
                span(x * tx, tx, cols)
            ));
        }
        place
    }

    /// The stored chunks, in the order of [`StepChunks::read_step`]'s index.
    #[cfg(test)]
    pub(crate) fn stored(&self) -> &[StoredChunk] {
        &self.chunks
    }

    fn error(&self, detail: String) -> IngestError {
        IngestError::Read {
            file: self.label.clone(),
            variable: self.variable.clone(),
            detail,
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A `[time, level, lat, lon]` (or `[member, time, level, lat, lon]`) variable of
    /// varied values, including NaN and the infinities, chunked as `chunks`, maybe deflated
    /// (and shuffled).
    fn fixture(
        path: &Path,
        shape: &[usize],
        chunks: &[usize],
        deflate: Option<(i32, bool)>,
    ) -> Vec<f32> {
        let names = ["member", "time", "level", "lat", "lon"];
        let names = &names[5 - shape.len()..];
        let n: usize = shape.iter().product();
        let values: Vec<f32> = (0..n)
            .map(|i| match i % 97 {
                13 => f32::NAN,
                29 => f32::INFINITY,
                31 => f32::NEG_INFINITY,
                _ => 250.0 + (i as f32 * 0.37).sin() * 40.0 + (i / 1000) as f32,
            })
            .collect();
        let mut file = netcdf::create_with(path, netcdf::Options::NETCDF4).expect("create");
        for (name, &len) in names.iter().zip(shape) {
            file.add_dimension(name, len).expect("dimension");
        }
        let mut var = file.add_variable::<f32>("t", names).expect("variable");
        var.set_chunking(chunks).expect("chunking");
        if let Some((level, shuffle)) = deflate {
            var.set_compression(level, shuffle).expect("compression");
        }
        var.put_values(&values, ..).expect("values");
        values
    }

    fn variable<'a>(
        shape: [usize; 5],
        present: [bool; 5],
        chunks: &'a [usize],
    ) -> ChunkedVariable<'a> {
        ChunkedVariable {
            label: "f.nc",
            name: "t".into(),
            shape,
            present,
            chunk_dims: chunks,
        }
    }

    /// A `[time, level, lat, lon]` fixture (`shape`, no member axis) written at `path`,
    /// chunked as `chunks`, and its plan.
    fn planned_fixture(
        path: &Path,
        shape: [usize; 4],
        chunks: [usize; 4],
        deflate: Option<(i32, bool)>,
    ) -> StepChunks {
        fixture(path, &shape, &chunks, deflate);
        let [t, k, y, x] = shape;
        let var = variable([1, t, k, y, x], [false, true, true, true, true], &chunks);
        let own = File::open(path).expect("open");
        StepChunks::plan(path, &own, &var).expect("plan")
    }

    fn bits(v: &[f32]) -> Vec<u32> {
        v.iter().map(|x| x.to_bits()).collect()
    }

    /// Every step read chunk by chunk equals the values written (and the library's read of
    /// them), for plain, deflated and shuffled-and-deflated chunks of one or several levels
    /// (a short last chunk too), whole planes or tiles of them, with and without a member
    /// axis.
    #[test]
    fn steps_read_chunk_by_chunk_equal_the_values_written() {
        let _session = crate::netcdf_session::lock();
        let dir = tempfile::tempdir().expect("tempdir");
        /// Shape, chunk lengths, deflate level and shuffle.
        type Case<'a> = (&'a [usize], &'a [usize], Option<(i32, bool)>);
        let cases: [Case<'_>; 10] = [
            (&[3, 5, 7, 11], &[1, 1, 7, 11], None),
            (&[3, 5, 7, 11], &[1, 1, 7, 11], Some((1, false))),
            (&[3, 5, 7, 11], &[1, 3, 7, 11], Some((4, true))),
            (&[2, 2, 5, 7, 11], &[1, 1, 2, 7, 11], Some((9, true))),
            (&[1, 5, 7, 11], &[1, 5, 7, 11], Some((1, true))),
            (&[2, 1, 1, 1], &[1, 1, 1, 1], Some((1, true))),
            // Tiles of a plane, with short edge tiles along every axis, as netCDF-C's default
            // chunking makes them.
            (&[2, 5, 7, 11], &[1, 3, 4, 5], Some((1, true))),
            (&[2, 5, 7, 11], &[1, 5, 7, 4], None),
            (&[2, 2, 5, 7, 11], &[1, 1, 2, 3, 11], Some((2, false))),
            (&[1, 4, 6, 8], &[1, 4, 3, 4], Some((1, true))),
        ];
        for (i, (shape, chunks, deflate)) in cases.into_iter().enumerate() {
            let path = dir.path().join(format!("c{i}.nc"));
            let values = fixture(&path, shape, chunks, deflate);
            let mut canonical = [1usize; 5];
            let mut present = [false; 5];
            for (axis, &len) in (5 - shape.len()..5).zip(shape) {
                canonical[axis] = len;
                present[axis] = true;
            }
            let var = variable(canonical, present, chunks);
            let own = File::open(&path).expect("open");
            let plan = StepChunks::plan(&path, &own, &var)
                .unwrap_or_else(|| panic!("case {i}: no plan for chunks {chunks:?}"));
            let step_len: usize = canonical[2..].iter().product();
            let file = netcdf::open(&path).expect("open");
            let mut library = vec![0f32; values.len()];
            file.variable("t")
                .expect("t")
                .get_values_into::<f32, _>(&mut library, ..)
                .expect("library read");
            assert_eq!(bits(&library), bits(&values), "case {i}: the library");
            for m in 0..canonical[0] {
                for t in 0..canonical[1] {
                    let mut got = vec![0f32; step_len];
                    plan.read_step((m, t), &mut got).expect("read");
                    let at = (m * canonical[1] + t) * step_len;
                    assert_eq!(
                        bits(&got),
                        bits(&values[at..at + step_len]),
                        "case {i}: step ({m}, {t})"
                    );
                }
            }
        }
    }

    /// Chunks across time steps are left to the library.
    #[test]
    fn chunks_across_steps_are_not_planned() {
        let _session = crate::netcdf_session::lock();
        let dir = tempfile::tempdir().expect("tempdir");
        let shape = [4usize, 3, 6, 8];
        for (i, chunks) in [[2usize, 1, 6, 8], [4, 3, 6, 8], [3, 1, 2, 2]]
            .iter()
            .enumerate()
        {
            let path = dir.path().join(format!("n{i}.nc"));
            fixture(&path, &shape, chunks, Some((1, true)));
            let var = variable([1, 4, 3, 6, 8], [false, true, true, true, true], chunks);
            let own = File::open(&path).expect("open");
            assert!(StepChunks::plan(&path, &own, &var).is_none(), "{chunks:?}");
        }
    }

    /// A file renamed over the path after the caller opened its own handle is not planned:
    /// the offsets HDF5 gives would be those of the other file.
    #[test]
    fn a_file_replaced_after_it_was_opened_is_not_planned() {
        let _session = crate::netcdf_session::lock();
        let dir = tempfile::tempdir().expect("tempdir");
        let (path, other) = (dir.path().join("r.nc"), dir.path().join("r2.nc"));
        let shape = [2usize, 3, 6, 8];
        let chunks = [1usize, 1, 6, 8];
        fixture(&path, &shape, &chunks, Some((1, true)));
        fixture(&other, &shape, &chunks, None);
        let var = variable([1, 2, 3, 6, 8], [false, true, true, true, true], &chunks);
        let own = File::open(&path).expect("open");
        assert!(StepChunks::plan(&path, &own, &var).is_some());
        std::fs::rename(&other, &path).expect("replace");
        assert!(StepChunks::plan(&path, &own, &var).is_none());
    }

    /// A chunk whose stored bytes are damaged is an error that names file and variable.
    #[test]
    fn a_damaged_chunk_is_an_error_naming_the_variable() {
        let _session = crate::netcdf_session::lock();
        let dir = tempfile::tempdir().expect("tempdir");
        let path = dir.path().join("d.nc");
        let plan = planned_fixture(&path, [1, 2, 40, 50], [1, 1, 40, 50], Some((1, true)));
        // Overwrite the middle of the second chunk's stored bytes.
        let chunk = &plan.chunks[1];
        let file = std::fs::OpenOptions::new()
            .write(true)
            .open(&path)
            .expect("open");
        file.write_all_at(&[0xA5; 64], chunk.addr + chunk.size / 2)
            .expect("damage");
        let mut out = vec![0f32; 2 * 40 * 50];
        let err = plan
            .read_step((0, 0), &mut out)
            .expect_err("a damaged chunk reads");
        let message = err.to_string();
        assert!(
            message.contains("f.nc") && message.contains("'t'"),
            "{message}"
        );
        // It also says which chunk: its byte offset, step and level.
        let place = format!(
            "chunk at byte {} (time index 0, level index 1 in file order)",
            chunk.addr
        );
        assert!(
            message.contains(&place) && message.contains("damaged"),
            "{message}"
        );
    }

    /// A chunk's place in an error counts member, time, level, row and column from the
    /// chunk's index, and gives rows and columns only for tiles of planes.
    #[test]
    fn a_chunk_is_placed_by_member_time_levels_and_tile() {
        let _session = crate::netcdf_session::lock();
        let dir = tempfile::tempdir().expect("tempdir");
        let path = dir.path().join("p.nc");
        let (shape, chunks) = ([2usize, 3, 5, 6, 8], [1usize, 1, 2, 4, 5]);
        fixture(&path, &shape, &chunks, None);
        let var = variable([2, 3, 5, 6, 8], [true; 5], &chunks);
        let own = File::open(&path).expect("open");
        let plan = StepChunks::plan(&path, &own, &var).expect("plan");
        assert_eq!(plan.across, [3, 2, 2]);
        // Member 1, time 2 (step 5), the short last level block, the second row and column
        // tiles (rows 4-5 of 6, columns 5-7 of 8).
        assert_eq!(
            plan.place(((5 * 3 + 2) * 2 + 1) * 2 + 1),
            "member 1, time index 2, level index 4 in file order, rows 4 to 5, columns 5 to 7"
        );
        assert_eq!(
            plan.place(0),
            "member 0, time index 0, level index 0 to 1 in file order, rows 0 to 3, columns 0 to 4"
        );
        // Whole planes without a member axis: no member, rows or columns.
        let plan = planned_fixture(&dir.path().join("q.nc"), [2, 3, 6, 8], [1, 1, 6, 8], None);
        assert_eq!(plan.place(5), "time index 1, level index 2 in file order");
    }
}
