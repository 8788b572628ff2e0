//! Contour lines (isolines) of a field on a regular latitude/longitude grid, by marching
//! squares with linear interpolation along cell edges.
//!
//! # Method
//! Every grid node is classed *above* a level when `value >= level` and *below* otherwise
//! (one rule everywhere, so a node exactly on the level is above and a line through it passes
//! through the node itself). A cell whose four corners are not all on one side carries one or
//! two segments between the crossing points of its edges; a crossing point lies on the edge at
//! the linear interpolation of the level between the two corner values (the point is the
//! above corner itself when that corner equals the level exactly).
//!
//! **Saddles.** A cell whose diagonal corners alternate (two above, two below, opposite each
//! other) is resolved by the cell-centre average, the mean of the four corners: when the mean is
//! above the level the two above corners are joined through the centre (the segments cut off
//! the below corners); otherwise the below corners are joined (the segments cut off the above
//! corners). Neighbouring cells never disagree, because each cell decides alone and only its
//! own interior is affected.
//!
//! **Masking.** A cell with any `NaN` corner carries no segment, so missing data splits lines.
//!
//! **Joining.** Every segment runs from one cell edge to another, oriented so that the above
//! side lies to its left in grid-index space. A crossing edge is shared by at most two cells,
//! one of which starts a segment on it and the other ends one there, so segments are joined by
//! the identity of the edge (an index), never by comparing coordinates, in time linear in the
//! number of segments. Chains that come back to their first edge are rings (`closed`).
//! Afterwards the lines are oriented geographically: the higher values lie to the left of the
//! direction of travel, on a north-up, east-right map, whichever way the axes run.
//!
//! **Degenerate pieces.** Where a node equals the level, neighbouring crossing points coincide
//! with that node; consecutive equal points are merged, and lines left with fewer than two
//! points (open) or four points (closed, that is three distinct) are dropped: they enclose no
//! area and cross nothing.
//!
//! **Global grids.** With [`IsolineOptions::wrap_longitude`] the first column is appended
//! again at +360° (−360° when longitudes descend), so that lines continue across the seam;
//! the seam's edges are the same edges as those of the first column, so lines join there.
//! Longitudes along a line are kept continuous (consecutive points within 180°), so a line
//! crossing the seam runs past the grid's last longitude, and a ring round the pole ends at its
//! first point shifted by ±360°.
//!
//! [`IsolineOptions::wrap_longitude`]: crate::products::isolines::IsolineOptions::wrap_longitude

use ndarray::ArrayView2;

/// The largest number of levels one call may ask for (a guard against an interval far too
/// small for the field, which would otherwise run for minutes and answer megabytes).
pub const MAX_LEVELS: usize = 10_000;

/// One contour line.
#[derive(Debug, Clone, PartialEq)]
pub struct Isoline {
    /// The level the line follows, in the units of the field.
    pub value: f64,
    /// Positions along the line, `[longitude, latitude]` in degrees. Longitudes are in the
    /// grid's own convention and continuous along the line (see the module documentation).
    pub points: Vec<[f64; 2]>,
    /// Whether the line is a ring: the last point repeats the first (for a ring round the pole
    /// on a wrapped global grid, the first shifted by ±360° of longitude).
    pub closed: bool,
}

/// Options for [`isolines`].
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub struct IsolineOptions {
    /// The grid covers the whole circle of longitude: join the last column to the first so
    /// that lines cross the seam and rings round the pole close. The grid must be global (see
    /// [`is_global_in_longitude`]).
    pub wrap_longitude: bool,
}

/// Why isolines could not be traced.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum IsolineError {
    /// The field's shape does not match the coordinate axes.
    #[error(
        "field has shape {rows}×{cols} but there are {latitudes} latitudes and {longitudes} longitudes"
    )]
    ShapeMismatch {
        /// Rows of the field.
        rows: usize,
        /// Columns of the field.
        cols: usize,
        /// Number of latitudes given.
        latitudes: usize,
        /// Number of longitudes given.
        longitudes: usize,
    },
    /// Too few rows or columns to hold a single cell.
    #[error("field has shape {rows}×{cols}: isolines need at least 2 rows and 2 columns")]
    TooSmall {
        /// Rows of the field.
        rows: usize,
        /// Columns of the field.
        cols: usize,
    },
    /// A coordinate is not finite, out of range, or the axis is not strictly monotonic.
    #[error("{axis} axis is unusable at index {index} (value {value}): {reason}")]
    BadAxis {
        /// `"latitude"` or `"longitude"`.
        axis: &'static str,
        /// Index of the offending coordinate.
        index: usize,
        /// The offending coordinate, degrees.
        value: f64,
        /// What is wrong with it.
        reason: &'static str,
    },
    /// Wrapping was asked for on a grid that does not go round the Earth.
    #[error(
        "longitudes {first}..{last} do not cover the globe with an even seam: wrap_longitude needs a global grid"
    )]
    NotGlobal {
        /// First longitude of the grid.
        first: f64,
        /// Last longitude of the grid.
        last: f64,
    },
    /// A requested level is not a finite number.
    #[error("isoline level {value} at index {index} is not finite")]
    BadLevel {
        /// Index in the list of levels.
        index: usize,
        /// The level.
        value: f64,
    },
    /// The interval between levels is zero, negative or not finite.
    #[error("isoline interval {interval} must be finite and greater than zero")]
    BadInterval {
        /// The interval given.
        interval: f64,
    },
    /// The base of the levels is not finite.
    #[error("isoline base {base} must be finite")]
    BadBase {
        /// The base given.
        base: f64,
    },
    /// More levels than [`MAX_LEVELS`].
    #[error(
        "{count} isoline levels asked for, more than the limit of {max}: use a larger interval"
    )]
    TooManyLevels {
        /// Levels the request implies.
        count: usize,
        /// The limit, [`MAX_LEVELS`].
        max: usize,
    },
}

/// Levels `base + k · interval` (integer `k`) covering the finite range of `values`, lowest
/// first. A field with no finite value gives no levels.
///
/// # Errors
/// [`IsolineError::BadInterval`] when `interval` is not finite and positive,
/// [`IsolineError::BadBase`] when `base` is not finite, [`IsolineError::TooManyLevels`]
/// beyond [`MAX_LEVELS`].
pub fn interval_levels(
    values: ArrayView2<'_, f32>,
    interval: f64,
    base: f64,
) -> Result<Vec<f64>, IsolineError> {
    if !(interval.is_finite() && interval > 0.0) {
        return Err(IsolineError::BadInterval { interval });
    }
    if !base.is_finite() {
        return Err(IsolineError::BadBase { base });
    }
    let (mut lo, mut hi) = (f64::INFINITY, f64::NEG_INFINITY);
    for &v in values.iter() {
        if v.is_finite() {
            lo = lo.min(f64::from(v));
            hi = hi.max(f64::from(v));
        }
    }
    if lo > hi {
        return Ok(Vec::new());
    }
    let k_lo = ((lo - base) / interval).ceil();
    let k_hi = ((hi - base) / interval).floor();
    if k_hi < k_lo {
        return Ok(Vec::new());
    }
    let span = k_hi - k_lo + 1.0;
    if !span.is_finite() || span > MAX_LEVELS as f64 {
        return Err(IsolineError::TooManyLevels {
            count: if span.is_finite() {
                span as usize
            } else {
                usize::MAX
            },
            max: MAX_LEVELS,
        });
    }
    // Computed from the integer multiple each time rather than accumulated, so that 5400 is
    // exactly 5400 however many levels precede it.
    Ok((0..span as usize)
        .map(|n| base + (k_lo + n as f64) * interval)
        .collect())
}

/// Whether `longitudes` go once round the Earth with a regular seam: strictly monotonic,
/// spanning less than 360°, and the gap from the last longitude back to the first (across the
/// seam) positive and no more than twice the largest spacing between neighbours.
pub fn is_global_in_longitude(longitudes: &[f64]) -> bool {
    if longitudes.len() < 2 || longitudes.iter().any(|l| !l.is_finite()) {
        return false;
    }
    let ascending = longitudes[1] > longitudes[0];
    let mut largest = 0.0f64;
    for w in longitudes.windows(2) {
        let step = if ascending { w[1] - w[0] } else { w[0] - w[1] };
        if step <= 0.0 {
            return false;
        }
        largest = largest.max(step);
    }
    let span = (longitudes[longitudes.len() - 1] - longitudes[0]).abs();
    let gap = 360.0 - span;
    gap > 0.0 && gap <= 2.0 * largest + 1e-9
}

/// Traces the isolines of `values` (`[row, col]`, `NaN` = missing) at each of `levels`.
///
/// `latitudes` holds one latitude per row (north→south or south→north) and `longitudes` one
/// longitude per column (0–360 or −180–180, ascending or descending), in degrees. Lines come
/// out level by level in the order of `levels`; within a level, open lines first (in the order
/// their first cell is met scanning the grid), then rings. See the module documentation for the
/// method, the saddle rule, masking and the longitude convention.
///
/// # Errors
/// Shape and axis problems ([`IsolineError::ShapeMismatch`], [`IsolineError::TooSmall`],
/// [`IsolineError::BadAxis`], [`IsolineError::NotGlobal`]), a non-finite level
/// ([`IsolineError::BadLevel`]) or more than [`MAX_LEVELS`] levels.
pub fn isolines(
    values: ArrayView2<'_, f32>,
    latitudes: &[f64],
    longitudes: &[f64],
    levels: &[f64],
    options: &IsolineOptions,
) -> Result<Vec<Isoline>, IsolineError> {
    let (rows, cols) = values.dim();
    if rows != latitudes.len() || cols != longitudes.len() {
        return Err(IsolineError::ShapeMismatch {
            rows,
            cols,
            latitudes: latitudes.len(),
            longitudes: longitudes.len(),
        });
    }
    if rows < 2 || cols < 2 {
        return Err(IsolineError::TooSmall { rows, cols });
    }
    check_axis("latitude", latitudes, 90.0)?;
    check_axis("longitude", longitudes, 720.0)?;
    if options.wrap_longitude && !is_global_in_longitude(longitudes) {
        return Err(IsolineError::NotGlobal {
            first: longitudes[0],
            last: longitudes[cols - 1],
        });
    }
    if levels.len() > MAX_LEVELS {
        return Err(IsolineError::TooManyLevels {
            count: levels.len(),
            max: MAX_LEVELS,
        });
    }
    if let Some((index, &value)) = levels.iter().enumerate().find(|(_, l)| !l.is_finite()) {
        return Err(IsolineError::BadLevel { index, value });
    }
    let data = values.as_standard_layout();
    let Some(slice) = data.as_slice() else {
        // A standard-layout array always has a slice; this is only reached if ndarray changes.
        return Ok(Vec::new());
    };
    let mut tracer = Tracer::new(slice, latitudes, longitudes, options.wrap_longitude);
    let mut out = Vec::new();
    for &level in levels {
        tracer.trace(level, &mut out);
    }
    Ok(out)
}

fn check_axis(axis: &'static str, coords: &[f64], limit: f64) -> Result<(), IsolineError> {
    for (index, &value) in coords.iter().enumerate() {
        if !value.is_finite() {
            return Err(IsolineError::BadAxis {
                axis,
                index,
                value,
                reason: "not a finite number",
            });
        }
        if value.abs() > limit {
            return Err(IsolineError::BadAxis {
                axis,
                index,
                value,
                reason: "out of range",
            });
        }
    }
    let ascending = coords[1] > coords[0];
    for (index, w) in coords.windows(2).enumerate() {
        let ok = if ascending { w[1] > w[0] } else { w[1] < w[0] };
        if !ok {
            return Err(IsolineError::BadAxis {
                axis,
                index: index + 1,
                value: w[1],
                reason: "the axis is not strictly monotonic",
            });
        }
    }
    Ok(())
}

/// No segment starts (or ends) on this edge.
const NONE: u32 = u32::MAX;

/// Segments of each of the 16 corner cases, as (from edge, to edge), oriented with the above
/// side on the left. Corners in counter-clockwise order in index space (column = x, row = y):
/// c0 = (i, j), c1 = (i, j+1), c2 = (i+1, j+1), c3 = (i+1, j); bit k of the case is set when
/// corner ck is above. Edges: e0 = c0–c1, e1 = c1–c2, e2 = c3–c2, e3 = c0–c3. A segment starts
/// where the counter-clockwise walk round the cell passes from above to below and ends where it
/// passes from below to above. Cases 5 and 10 (saddles) are handled apart.
const CASES: [[(u8, u8); 2]; 16] = {
    const X: (u8, u8) = (u8::MAX, u8::MAX);
    [
        [X, X],
        [(0, 3), X],
        [(1, 0), X],
        [(1, 3), X],
        [(2, 1), X],
        [X, X],
        [(2, 0), X],
        [(2, 3), X],
        [(3, 2), X],
        [(0, 2), X],
        [X, X],
        [(1, 2), X],
        [(3, 1), X],
        [(0, 1), X],
        [(3, 0), X],
        [X, X],
    ]
};

/// Saddle segments: case 5 (c0, c2 above) and case 10 (c1, c3 above), for a centre above and
/// a centre below.
fn saddle(case: usize, centre_above: bool) -> [(u8, u8); 2] {
    match (case, centre_above) {
        // Centre joins c0 and c2: cut off the below corners c1 (e0, e1) and c3 (e2, e3).
        (5, true) => [(0, 1), (2, 3)],
        // Below corners joined: cut off the above corners c0 (e3, e0) and c2 (e1, e2).
        (5, false) => [(0, 3), (2, 1)],
        // Centre joins c1 and c3: cut off the below corners c0 and c2.
        (10, true) => [(3, 0), (1, 2)],
        // Below corners joined: cut off the above corners c1 and c3.
        _ => [(1, 0), (3, 2)],
    }
}

/// Per-call state: the grid, and the join tables reused from one level to the next.
struct Tracer<'a> {
    data: &'a [f32],
    lats: &'a [f64],
    lons: &'a [f64],
    rows: usize,
    cols: usize,
    /// Cells per row: `cols - 1`, or `cols` when wrapping.
    cells: usize,
    wrap: bool,
    /// Longitude of the appended seam column.
    seam_lon: f64,
    /// Index of the first vertical edge key.
    v_base: usize,
    /// `next[key]`: the edge where the segment starting on `key` ends, or `NONE`.
    next: Vec<u32>,
    /// Whether some segment ends on the edge.
    has_prev: Vec<bool>,
    /// Edges touched at this level, to reset them afterwards and to find the chain starts.
    touched: Vec<u32>,
    /// Whether the index frame is mirrored against north-up, east-right.
    mirrored: bool,
    /// Smallest and largest finite value on each row of cells (its two rows of nodes): a
    /// level outside `(min, max]` crosses no cell of the row, which is then skipped.
    row_range: Vec<(f64, f64)>,
}

impl<'a> Tracer<'a> {
    fn new(data: &'a [f32], lats: &'a [f64], lons: &'a [f64], wrap: bool) -> Self {
        let (rows, cols) = (lats.len(), lons.len());
        let cells = if wrap { cols } else { cols - 1 };
        let v_base = rows * cells;
        let keys = v_base + (rows - 1) * cols;
        let ascending = lons[1] > lons[0];
        let seam_lon = if ascending {
            lons[0] + 360.0
        } else {
            lons[0] - 360.0
        };
        // One reversed axis mirrors the index frame; two cancel.
        let latitudes_descend = lats[1] < lats[0];
        let mirrored = latitudes_descend == ascending;
        let node_range: Vec<(f64, f64)> = data
            .chunks(cols)
            .map(|row| {
                row.iter()
                    .filter(|v| !v.is_nan())
                    .fold((f64::INFINITY, f64::NEG_INFINITY), |(lo, hi), &v| {
                        (lo.min(f64::from(v)), hi.max(f64::from(v)))
                    })
            })
            .collect();
        let row_range = node_range
            .windows(2)
            .map(|w| (w[0].0.min(w[1].0), w[0].1.max(w[1].1)))
            .collect();
        Tracer {
            data,
            lats,
            lons,
            rows,
            cols,
            cells,
            wrap,
            seam_lon,
            v_base,
            next: vec![NONE; keys],
            has_prev: vec![false; keys],
            touched: Vec::new(),
            mirrored,
            row_range,
        }
    }

    #[inline]
    fn value(&self, i: usize, j: usize) -> f32 {
        let j = if j == self.cols { 0 } else { j };
        self.data[i * self.cols + j]
    }

    #[inline]
    fn lon(&self, j: usize) -> f64 {
        if j == self.cols {
            self.seam_lon
        } else {
            self.lons[j]
        }
    }

    #[inline]
    fn h_key(&self, i: usize, j: usize) -> u32 {
        (i * self.cells + j) as u32
    }

    #[inline]
    fn v_key(&self, i: usize, j: usize) -> u32 {
        let j = if j == self.cols { 0 } else { j };
        (self.v_base + i * self.cols + j) as u32
    }

    fn add(&mut self, from: u32, to: u32) {
        let f = from as usize;
        if self.next[f] == NONE && !self.has_prev[f] {
            self.touched.push(from);
        }
        let t = to as usize;
        if self.next[t] == NONE && !self.has_prev[t] {
            self.touched.push(to);
        }
        self.next[f] = to;
        self.has_prev[t] = true;
    }

    /// The crossing point of `level` on the edge with this key, `[lon, lat]`.
    fn point(&self, key: u32, level: f64) -> [f64; 2] {
        let key = key as usize;
        if key < self.v_base {
            let (i, j) = (key / self.cells, key % self.cells);
            let (v0, v1) = (f64::from(self.value(i, j)), f64::from(self.value(i, j + 1)));
            let lon = interpolate(self.lon(j), self.lon(j + 1), v0, v1, level);
            [lon, self.lats[i]]
        } else {
            let k = key - self.v_base;
            let (i, j) = (k / self.cols, k % self.cols);
            let (v0, v1) = (f64::from(self.value(i, j)), f64::from(self.value(i + 1, j)));
            let lat = interpolate(self.lats[i], self.lats[i + 1], v0, v1, level);
            [self.lons[j], lat]
        }
    }

    fn trace(&mut self, level: f64, out: &mut Vec<Isoline>) {
        self.scan(level);
        let first = out.len();
        // Open chains start where a segment starts and none ends.
        for n in 0..self.touched.len() {
            let k = self.touched[n];
            if self.next[k as usize] != NONE && !self.has_prev[k as usize] {
                let keys = self.walk(k);
                self.emit(&keys, false, level, out);
            }
        }
        // What is left are rings.
        for n in 0..self.touched.len() {
            let k = self.touched[n];
            if self.next[k as usize] != NONE {
                let keys = self.walk(k);
                self.emit(&keys, true, level, out);
            }
        }
        for &k in &self.touched {
            self.next[k as usize] = NONE;
            self.has_prev[k as usize] = false;
        }
        self.touched.clear();
        if self.mirrored {
            for line in &mut out[first..] {
                line.points.reverse();
            }
        }
    }

    /// Follows segments from `start`, consuming them, until a chain ends or comes back.
    fn walk(&mut self, start: u32) -> Vec<u32> {
        let mut keys = vec![start];
        let mut cur = start;
        loop {
            let nxt = self.next[cur as usize];
            if nxt == NONE {
                break;
            }
            self.next[cur as usize] = NONE;
            keys.push(nxt);
            if nxt == start {
                break;
            }
            cur = nxt;
        }
        keys
    }

    fn emit(&self, keys: &[u32], closed: bool, level: f64, out: &mut Vec<Isoline>) {
        let mut points: Vec<[f64; 2]> = Vec::with_capacity(keys.len());
        for &k in keys {
            let mut p = self.point(k, level);
            if self.wrap {
                if let Some(prev) = points.last() {
                    // Keep longitudes continuous across the seam (cells span far less than
                    // 180°, which `is_global_in_longitude` guarantees).
                    while p[0] - prev[0] > 180.0 {
                        p[0] -= 360.0;
                    }
                    while p[0] - prev[0] < -180.0 {
                        p[0] += 360.0;
                    }
                }
            }
            if points.last() != Some(&p) {
                points.push(p);
            }
        }
        let keep = if closed {
            points.len() >= 4
        } else {
            points.len() >= 2
        };
        if keep {
            out.push(Isoline {
                value: level,
                points,
                closed,
            });
        }
    }

    /// One pass over the cells: every segment of `level`, into the join tables.
    fn scan(&mut self, level: f64) {
        for i in 0..self.rows - 1 {
            let (lo, hi) = self.row_range[i];
            if !(level > lo && level <= hi) {
                continue;
            }
            for j in 0..self.cells {
                let c = [
                    self.value(i, j),
                    self.value(i, j + 1),
                    self.value(i + 1, j + 1),
                    self.value(i + 1, j),
                ];
                if c.iter().any(|v| v.is_nan()) {
                    continue;
                }
                let mut case = 0usize;
                for (bit, &v) in c.iter().enumerate() {
                    if f64::from(v) >= level {
                        case |= 1 << bit;
                    }
                }
                if case == 0 || case == 15 {
                    continue;
                }
                let segs = if case == 5 || case == 10 {
                    let centre = c.iter().map(|&v| f64::from(v)).sum::<f64>() / 4.0;
                    saddle(case, centre >= level)
                } else {
                    CASES[case]
                };
                let edges = [
                    self.h_key(i, j),
                    self.v_key(i, j + 1),
                    self.h_key(i + 1, j),
                    self.v_key(i, j),
                ];
                for &(a, b) in &segs {
                    if a == u8::MAX {
                        continue;
                    }
                    self.add(edges[a as usize], edges[b as usize]);
                }
            }
        }
    }
}

/// Position of `level` between `x0` (value `v0`) and `x1` (value `v1`), for an edge that the
/// level crosses under the rule above = `v >= level`: exactly the above end when it equals the
/// level, so that coinciding points are bit-identical and merge.
#[inline]
fn interpolate(x0: f64, x1: f64, v0: f64, v1: f64, level: f64) -> f64 {
    if v0 == level {
        return x0;
    }
    if v1 == level {
        return x1;
    }
    let t = (level - v0) / (v1 - v0);
    x0 + t * (x1 - x0)
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::array;

    /// Every table segment starts on an above→below edge and ends on a below→above edge of
    /// the counter-clockwise walk (the orientation rule stated at `CASES`).
    #[test]
    fn case_table_follows_the_orientation_rule() {
        // Edge k joins corners (k, k+1 mod 4) in counter-clockwise order.
        let transition = |case: usize, e: u8| {
            let (s, t) = (e as usize, (e as usize + 1) % 4);
            (case >> s & 1, case >> t & 1)
        };
        for (case, table) in CASES.iter().enumerate().take(15).skip(1) {
            let segs: Vec<(u8, u8)> = if case == 5 || case == 10 {
                let mut v = saddle(case, true).to_vec();
                v.extend(saddle(case, false));
                v
            } else {
                table.iter().copied().filter(|s| s.0 != u8::MAX).collect()
            };
            assert!(!segs.is_empty(), "case {case}");
            for (a, b) in segs {
                assert_eq!(transition(case, a), (1, 0), "case {case} start e{a}");
                assert_eq!(transition(case, b), (0, 1), "case {case} end e{b}");
            }
        }
    }

    #[test]
    fn interval_levels_cover_the_range() {
        let v = array![[5391.0f32, 5402.0], [5461.0, f32::NAN]];
        let levels = interval_levels(v.view(), 60.0, 0.0).expect("levels");
        assert_eq!(levels, vec![5400.0, 5460.0]);
        let levels = interval_levels(v.view(), 60.0, 30.0).expect("levels");
        assert_eq!(levels, vec![5430.0]);
        assert!(matches!(
            interval_levels(v.view(), 0.0, 0.0),
            Err(IsolineError::BadInterval { .. })
        ));
        assert!(matches!(
            interval_levels(v.view(), 1e-6, 0.0),
            Err(IsolineError::TooManyLevels { .. })
        ));
        let empty = ndarray::Array2::<f32>::from_elem((2, 2), f32::NAN);
        assert!(interval_levels(empty.view(), 60.0, 0.0)
            .expect("levels")
            .is_empty());
    }

    #[test]
    fn global_longitudes_are_recognised() {
        let global: Vec<f64> = (0..144).map(|k| k as f64 * 2.5).collect();
        assert!(is_global_in_longitude(&global));
        let centred: Vec<f64> = (0..360).map(|k| -180.0 + k as f64).collect();
        assert!(is_global_in_longitude(&centred));
        let regional: Vec<f64> = (0..100).map(|k| 200.0 + k as f64 * 0.5).collect();
        assert!(!is_global_in_longitude(&regional));
    }

    #[test]
    fn a_single_peak_gives_one_small_ring() {
        let v = array![[0.0f32, 0.0, 0.0], [0.0, 2.0, 0.0], [0.0, 0.0, 0.0]];
        let lats = [0.0, 1.0, 2.0];
        let lons = [10.0, 11.0, 12.0];
        let lines =
            isolines(v.view(), &lats, &lons, &[1.0], &IsolineOptions::default()).expect("lines");
        assert_eq!(lines.len(), 1);
        let l = &lines[0];
        assert!(l.closed);
        assert_eq!(l.points.len(), 5);
        assert_eq!(l.points[0], l.points[4]);
        // Higher values on the left: the ring runs counter-clockwise round the peak, so its
        // signed area (shoelace formula) is positive.
        let area: f64 = l
            .points
            .windows(2)
            .map(|w| w[0][0] * w[1][1] - w[1][0] * w[0][1])
            .sum();
        assert!(area > 0.0, "area {area}");
    }
}
