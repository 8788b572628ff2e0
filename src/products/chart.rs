//! PNG charts of one field with its isolines, drawn pixel by pixel with the embedded bitmap
//! font ([`super::font`]): no system fonts, no display, no plotting library.
//!
//! # What a chart shows, top to bottom
//! - A **title block**: the quantity and layer, then the cycle, reference time, lead time and
//!   valid time ([`TitleBlock`]).
//! - The **map**: plain equirectangular (longitude → x, latitude → y, one scale for both) over
//!   the field's own extent, north up and east right whichever way the axes run. Optional fill:
//!   colour bands between isoline values on a ramp of this module's own design ([`ramp_colour`],
//!   from slate violet through teal and sage to sand, lightness rising monotonically with the
//!   value so that the order reads without the legend), or categories from a class grid
//!   ([`ChartFill::Categories`]). Missing data is hatched grey. Isolines every `interval`,
//!   anti-aliased, labelled with their value a few times along each line where labels do not
//!   collide; the critical values (for example 5400 m) in a heavier crimson line on a white
//!   casing, labelled first. A graticule at a round spacing with degree labels round the frame.
//! - A **legend**: the colour bar with its level values, or the category swatches, and the
//!   line key.
//! - An optional **caution** block, wrapped to the width, on a pale amber ground with an amber
//!   bar: the guidance products put their caution here.
//!
//! [`super::font`]: crate::products::font
//! [`TitleBlock`]: crate::products::chart::TitleBlock
//! [`ramp_colour`]: crate::products::chart::ramp_colour
//! [`ChartFill::Categories`]: crate::products::chart::ChartFill::Categories

use ndarray::ArrayView2;

use super::font;
use super::isolines::{interval_levels, isolines, IsolineError, IsolineOptions};

/// Smallest width or height accepted, pixels.
pub const MIN_SIZE: u32 = 200;
/// Largest width or height accepted, pixels (a 4000 × 4000 chart is 48 MB of pixels).
pub const MAX_SIZE: u32 = 4000;
/// Most categories a legend may hold.
pub const MAX_CATEGORIES: usize = 32;
/// Class value meaning "no class here" in [`ChartFill::Categories`].
pub const NO_CLASS: u8 = 255;

/// Colour of the ordinary isolines and of text.
pub const INK: [u8; 3] = [24, 26, 34];
/// Colour of the critical isolines and their labels.
pub const CRITICAL_COLOUR: [u8; 3] = [196, 16, 88];
/// Background of the page outside the map.
pub const PAPER: [u8; 3] = [252, 251, 248];
/// Colour of missing data (hatched with a darker grey).
pub const MISSING_COLOUR: [u8; 3] = [224, 224, 224];

/// Eight distinguishable colours for categories, in the order a legend usually needs them:
/// green, blue, violet, orange, rose, cyan, gold, grey (this module's own choice, mid
/// lightness so that isolines and labels read on all of them).
pub const CATEGORY_COLOURS: [[u8; 3]; 8] = [
    [118, 186, 112],
    [104, 156, 226],
    [178, 134, 212],
    [236, 156, 92],
    [224, 118, 138],
    [110, 200, 204],
    [214, 194, 84],
    [160, 160, 160],
];

/// Anchors of the band ramp, low to high values, sRGB. Their CIE L* rises from about 45 to
/// about 90 (checked in the unit tests), so the ramp is ordered by lightness.
const RAMP: [[u8; 3]; 7] = [
    [96, 98, 164],
    [82, 132, 176],
    [80, 164, 168],
    [138, 190, 148],
    [198, 208, 146],
    [236, 214, 156],
    [250, 228, 196],
];

/// One category of a categorical fill.
#[derive(Debug, Clone, PartialEq)]
pub struct Category {
    /// Name shown in the legend.
    pub name: String,
    /// Fill colour, sRGB ([`CATEGORY_COLOURS`] has a set).
    pub colour: [u8; 3],
}

/// How the map is filled under the isolines.
#[derive(Debug, Clone)]
pub enum ChartFill<'a> {
    /// No fill: isolines on paper.
    None,
    /// Colour bands between successive isoline values.
    Bands,
    /// A class per grid point, `[row, col]` on the field's grid; class `k` is drawn in
    /// `legend[k].colour`, [`NO_CLASS`] (255) is left as paper.
    Categories {
        /// Class of each grid point.
        classes: ArrayView2<'a, u8>,
        /// Name and colour of each class, by class value.
        legend: Vec<Category>,
    },
}

/// The text of the title block. Times are shown as given (RFC 3339 recommended).
#[derive(Debug, Clone, PartialEq, Default)]
pub struct TitleBlock {
    /// The quantity and its layer, with units: `1000–500 hPa thickness (m)`.
    pub quantity: String,
    /// Identifier of the forecast cycle.
    pub cycle: Option<String>,
    /// Reference (analysis) time of the cycle.
    pub reference_time: Option<String>,
    /// Lead time, hours.
    pub lead_hours: Option<f64>,
    /// Valid time.
    pub valid_time: Option<String>,
}

/// Everything a chart is drawn from.
#[derive(Debug, Clone)]
pub struct ChartSpec<'a> {
    /// The field, `[row, col]`, `NaN` = missing.
    pub values: ArrayView2<'a, f32>,
    /// Latitude of each row, degrees (either direction).
    pub latitudes: &'a [f64],
    /// Longitude of each column, degrees (0–360 or −180–180).
    pub longitudes: &'a [f64],
    /// The grid is global in longitude: draw the seam cell and join lines across it.
    pub wrap_longitude: bool,
    /// Spacing of the isolines, in the field's units (60 for thickness in metres).
    pub interval: f64,
    /// Isolines are drawn at `base + k · interval`.
    pub base: f64,
    /// Values drawn as critical lines (for example 5400); they need not be multiples of the
    /// interval.
    pub critical: Vec<f64>,
    /// Fill under the lines.
    pub fill: ChartFill<'a>,
    /// Title block.
    pub title: TitleBlock,
    /// Caution text for the bottom of the chart, wrapped to the width.
    pub caution: Option<String>,
    /// Width of the image, pixels, [`MIN_SIZE`]..=[`MAX_SIZE`].
    pub width: u32,
    /// Height of the image, pixels, [`MIN_SIZE`]..=[`MAX_SIZE`].
    pub height: u32,
}

/// A rendered chart, 8-bit sRGB, rows top to bottom, with where its parts lie.
#[derive(Debug, Clone, PartialEq)]
pub struct Image {
    /// Width, pixels.
    pub width: u32,
    /// Height, pixels.
    pub height: u32,
    /// `width · height · 3` bytes, RGB.
    pub pixels: Vec<u8>,
    /// The map's place on the image and its projection.
    pub map: MapPlacement,
    /// First pixel row below the title block.
    pub title_bottom: u32,
    /// First pixel row of the caution block, when there is one.
    pub caution_top: Option<u32>,
}

/// Where the map lies on the image (pixels `x0 <= x < x1`, `y0 <= y < y1`) and the extent it
/// shows: equirectangular, one scale for both axes, north up.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct MapPlacement {
    /// Left edge, pixels.
    pub x0: u32,
    /// Top edge, pixels.
    pub y0: u32,
    /// Right edge (exclusive), pixels.
    pub x1: u32,
    /// Bottom edge (exclusive), pixels.
    pub y1: u32,
    /// Western edge, degrees, in the field's longitude convention.
    pub lon_min: f64,
    /// Eastern edge, degrees.
    pub lon_max: f64,
    /// Southern edge, degrees.
    pub lat_min: f64,
    /// Northern edge, degrees.
    pub lat_max: f64,
    /// Pixels per degree, both axes.
    pub pixels_per_degree: f64,
}

impl MapPlacement {
    /// Pixel coordinates (continuous: pixel `(x, y)` spans `x..x+1`) of a position.
    pub fn pixel(&self, lon: f64, lat: f64) -> [f64; 2] {
        [
            f64::from(self.x0) + (lon - self.lon_min) * self.pixels_per_degree,
            f64::from(self.y0) + (self.lat_max - lat) * self.pixels_per_degree,
        ]
    }

    /// The position `[lon, lat]` at continuous pixel coordinates `(x, y)`.
    pub fn position(&self, x: f64, y: f64) -> [f64; 2] {
        [
            self.lon_min + (x - f64::from(self.x0)) / self.pixels_per_degree,
            self.lat_max - (y - f64::from(self.y0)) / self.pixels_per_degree,
        ]
    }
}

/// Why a chart could not be drawn.
#[derive(Debug, thiserror::Error)]
pub enum ChartError {
    /// Width or height outside [`MIN_SIZE`]..=[`MAX_SIZE`].
    #[error("chart size {width}×{height} is outside {MIN_SIZE}..={MAX_SIZE} pixels per side")]
    Size {
        /// Width asked for.
        width: u32,
        /// Height asked for.
        height: u32,
    },
    /// The isolines could not be traced (shape, axes, interval).
    #[error(transparent)]
    Isolines(#[from] IsolineError),
    /// A critical value is not finite.
    #[error("critical value {value} is not finite")]
    BadCritical {
        /// The value.
        value: f64,
    },
    /// The class grid does not have the field's shape.
    #[error("class grid has shape {rows}×{cols} but the field is {field_rows}×{field_cols}")]
    ClassShape {
        /// Rows of the class grid.
        rows: usize,
        /// Columns of the class grid.
        cols: usize,
        /// Rows of the field.
        field_rows: usize,
        /// Columns of the field.
        field_cols: usize,
    },
    /// A class value has no legend entry.
    #[error(
        "class {class} at row {row}, column {col} has no legend entry (legend has {classes}; 255 means no class)"
    )]
    UnknownClass {
        /// The class value.
        class: u8,
        /// Row of the grid point.
        row: usize,
        /// Column of the grid point.
        col: usize,
        /// Entries in the legend.
        classes: usize,
    },
    /// More categories than [`MAX_CATEGORIES`].
    #[error("{count} categories, more than the limit of {MAX_CATEGORIES}")]
    TooManyCategories {
        /// Categories given.
        count: usize,
    },
    /// The text leaves too little room for the map.
    #[error(
        "chart of {width}×{height} pixels leaves a map only {map_height} pixels high after its text: make it taller or the caution shorter"
    )]
    NoRoomForMap {
        /// Width of the chart.
        width: u32,
        /// Height of the chart.
        height: u32,
        /// Height left for the map.
        map_height: i64,
    },
    /// The PNG encoder failed.
    #[error("png encoding failed: {0}")]
    Encode(String),
}

/// Colour of position `t` (0 = lowest band, 1 = highest) on the band ramp; `t` is clamped.
pub fn ramp_colour(t: f64) -> [u8; 3] {
    let t = if t.is_finite() {
        t.clamp(0.0, 1.0)
    } else {
        0.5
    };
    let x = t * (RAMP.len() - 1) as f64;
    let k = (x.floor() as usize).min(RAMP.len() - 2);
    let f = x - k as f64;
    let mut out = [0u8; 3];
    for (c, o) in out.iter_mut().enumerate() {
        let a = f64::from(RAMP[k][c]);
        let b = f64::from(RAMP[k + 1][c]);
        *o = (a + f * (b - a)).round() as u8;
    }
    out
}

/// The colour of band `band` of `bands` (band 0 lies below the lowest level).
pub fn band_colour(band: usize, bands: usize) -> [u8; 3] {
    if bands <= 1 {
        ramp_colour(0.5)
    } else {
        ramp_colour(band as f64 / (bands - 1) as f64)
    }
}

/// Draws the chart and encodes it as PNG (8-bit RGB).
///
/// # Errors
/// See [`render_image`]; [`ChartError::Encode`] if the encoder fails.
pub fn render_png(spec: &ChartSpec<'_>) -> Result<Vec<u8>, ChartError> {
    let image = render_image(spec)?;
    encode_png(&image)
}

/// Encodes an image as PNG, 8-bit RGB.
///
/// # Errors
/// [`ChartError::Encode`] if the encoder fails.
pub fn encode_png(image: &Image) -> Result<Vec<u8>, ChartError> {
    let mut out = Vec::new();
    {
        let mut enc = png::Encoder::new(&mut out, image.width, image.height);
        enc.set_color(png::ColorType::Rgb);
        enc.set_depth(png::BitDepth::Eight);
        let mut writer = enc
            .write_header()
            .map_err(|e| ChartError::Encode(e.to_string()))?;
        writer
            .write_image_data(&image.pixels)
            .map_err(|e| ChartError::Encode(e.to_string()))?;
        writer
            .finish()
            .map_err(|e| ChartError::Encode(e.to_string()))?;
    }
    Ok(out)
}

/// Draws the chart into an RGB image.
///
/// # Errors
/// [`ChartError::Size`], the isoline errors of [`isolines`] and [`interval_levels`],
/// [`ChartError::BadCritical`], class grid problems ([`ChartError::ClassShape`],
/// [`ChartError::UnknownClass`], [`ChartError::TooManyCategories`]) and
/// [`ChartError::NoRoomForMap`].
pub fn render_image(spec: &ChartSpec<'_>) -> Result<Image, ChartError> {
    let (w, h) = (spec.width, spec.height);
    if !(MIN_SIZE..=MAX_SIZE).contains(&w) || !(MIN_SIZE..=MAX_SIZE).contains(&h) {
        return Err(ChartError::Size {
            width: w,
            height: h,
        });
    }
    if let Some(&value) = spec.critical.iter().find(|c| !c.is_finite()) {
        return Err(ChartError::BadCritical { value });
    }
    let (rows, cols) = spec.values.dim();
    if let ChartFill::Categories { classes, legend } = &spec.fill {
        if legend.len() > MAX_CATEGORIES {
            return Err(ChartError::TooManyCategories {
                count: legend.len(),
            });
        }
        if classes.dim() != (rows, cols) {
            return Err(ChartError::ClassShape {
                rows: classes.nrows(),
                cols: classes.ncols(),
                field_rows: rows,
                field_cols: cols,
            });
        }
        if let Some(((row, col), &class)) = classes
            .indexed_iter()
            .find(|(_, &c)| c != NO_CLASS && usize::from(c) >= legend.len())
        {
            return Err(ChartError::UnknownClass {
                class,
                row,
                col,
                classes: legend.len(),
            });
        }
    }
    let levels = interval_levels(spec.values, spec.interval, spec.base)?;
    let options = IsolineOptions {
        wrap_longitude: spec.wrap_longitude,
    };
    let lines = isolines(
        spec.values,
        spec.latitudes,
        spec.longitudes,
        &levels,
        &options,
    )?;
    let critical_lines = isolines(
        spec.values,
        spec.latitudes,
        spec.longitudes,
        &spec.critical,
        &options,
    )?;

    let mut canvas = Canvas::new(w, h);
    let layout = Layout::new(spec, &levels)?;
    let map = MapFrame::new(spec, &layout);

    draw_title(&mut canvas, &layout);
    draw_fill(&mut canvas, spec, &map, &levels);
    draw_graticule(&mut canvas, &map);

    // Isolines in pixel space, split where a line leaves the drawn extent across the seam.
    let ordinary: Vec<(f64, Vec<[f64; 2]>)> = lines
        .iter()
        .filter(|l| !spec.critical.contains(&l.value))
        .flat_map(|l| map.pixel_lines(&l.points).into_iter().map(|p| (l.value, p)))
        .collect();
    let critical: Vec<(f64, Vec<[f64; 2]>)> = critical_lines
        .iter()
        .flat_map(|l| map.pixel_lines(&l.points).into_iter().map(|p| (l.value, p)))
        .collect();

    let s = f64::from(layout.scale);
    let mut labels = Labels::new(map.rect, layout.scale);
    for (value, pts) in &critical {
        labels.place(pts, *value, true, 220.0 * s);
    }
    for (value, pts) in &ordinary {
        labels.place(pts, *value, false, 170.0 * s);
    }

    let mut cov = Coverage::new(w, h);
    for (_, pts) in &ordinary {
        cov.stroke(pts, 0.35 + 0.45 * s, map.rect);
    }
    cov.clear_rects(&labels.rects());
    canvas.composite(&cov, INK, 0.85);

    let mut casing = Coverage::new(w, h);
    let mut core = Coverage::new(w, h);
    for (_, pts) in &critical {
        casing.stroke(pts, 1.2 + 1.6 * s, map.rect);
        core.stroke(pts, 0.5 + 1.0 * s, map.rect);
    }
    casing.clear_rects(&labels.rects());
    core.clear_rects(&labels.rects());
    canvas.composite(&casing, [255, 255, 255], 0.9);
    canvas.composite(&core, CRITICAL_COLOUR, 1.0);

    labels.draw(&mut canvas);
    canvas.frame(map.rect, INK);
    draw_graticule_labels(&mut canvas, &map, layout.scale);
    draw_legend(&mut canvas, spec, &layout, &levels);
    draw_caution(&mut canvas, &layout);

    let r = map.rect;
    Ok(Image {
        width: w,
        height: h,
        pixels: canvas.px,
        map: MapPlacement {
            x0: r.x0 as u32,
            y0: r.y0 as u32,
            x1: r.x1 as u32,
            y1: r.y1 as u32,
            lon_min: map.lon_min,
            lon_max: map.lon_max,
            lat_min: map.lat_min,
            lat_max: map.lat_max,
            pixels_per_degree: map.ppd,
        },
        title_bottom: layout.title_rect.y1 as u32,
        caution_top: (!layout.caution_lines.is_empty()).then_some(layout.caution_rect.y0 as u32),
    })
}

/// A rectangle in pixels: `x0 <= x < x1`, `y0 <= y < y1`.
#[derive(Debug, Clone, Copy, PartialEq)]
struct Rect {
    x0: i64,
    y0: i64,
    x1: i64,
    y1: i64,
}

impl Rect {
    fn overlaps(&self, o: &Rect) -> bool {
        self.x0 < o.x1 && o.x0 < self.x1 && self.y0 < o.y1 && o.y0 < self.y1
    }
    fn contains(&self, o: &Rect) -> bool {
        o.x0 >= self.x0 && o.x1 <= self.x1 && o.y0 >= self.y0 && o.y1 <= self.y1
    }
    fn grow(&self, d: i64) -> Rect {
        Rect {
            x0: self.x0 - d,
            y0: self.y0 - d,
            x1: self.x1 + d,
            y1: self.y1 + d,
        }
    }
}

struct Canvas {
    w: u32,
    h: u32,
    px: Vec<u8>,
}

impl Canvas {
    fn new(w: u32, h: u32) -> Self {
        let mut px = Vec::with_capacity((w * h * 3) as usize);
        for _ in 0..w * h {
            px.extend_from_slice(&PAPER);
        }
        Canvas { w, h, px }
    }

    fn blend(&mut self, x: i64, y: i64, c: [u8; 3], alpha: f64) {
        if x < 0 || y < 0 || x >= i64::from(self.w) || y >= i64::from(self.h) || alpha <= 0.0 {
            return;
        }
        let i = ((y as usize) * self.w as usize + x as usize) * 3;
        let a = alpha.min(1.0);
        for (p, &target) in self.px[i..i + 3].iter_mut().zip(&c) {
            let old = f64::from(*p);
            *p = (old + a * (f64::from(target) - old)).round() as u8;
        }
    }

    fn set(&mut self, x: i64, y: i64, c: [u8; 3]) {
        self.blend(x, y, c, 1.0);
    }

    fn fill_rect(&mut self, r: Rect, c: [u8; 3], alpha: f64) {
        for y in r.y0..r.y1 {
            for x in r.x0..r.x1 {
                self.blend(x, y, c, alpha);
            }
        }
    }

    fn frame(&mut self, r: Rect, c: [u8; 3]) {
        for x in r.x0 - 1..=r.x1 {
            self.set(x, r.y0 - 1, c);
            self.set(x, r.y1, c);
        }
        for y in r.y0 - 1..=r.y1 {
            self.set(r.x0 - 1, y, c);
            self.set(r.x1, y, c);
        }
    }

    /// Text with its grid's top-left corner at `(x, y)`.
    fn text(&mut self, x: i64, y: i64, text: &str, scale: u32, c: [u8; 3]) {
        font::for_each_pixel(text, scale, |dx, dy| {
            self.set(x + i64::from(dx), y + i64::from(dy), c)
        });
    }

    fn composite(&mut self, cov: &Coverage, c: [u8; 3], alpha: f64) {
        for (i, &v) in cov.v.iter().enumerate() {
            if v > 0 {
                let (x, y) = (i % cov.w as usize, i / cov.w as usize);
                self.blend(x as i64, y as i64, c, alpha * f64::from(v) / 255.0);
            }
        }
    }
}

/// Anti-aliased line coverage, 0–255 per pixel, combined by maximum so that joints and
/// crossings of one layer are not darkened twice.
struct Coverage {
    w: u32,
    h: u32,
    v: Vec<u8>,
}

impl Coverage {
    fn new(w: u32, h: u32) -> Self {
        Coverage {
            w,
            h,
            v: vec![0; (w * h) as usize],
        }
    }

    /// A polyline of half-width `hw` pixels, clipped to `clip`. Coverage of a pixel is the
    /// overlap of a one-pixel box filter with the stroke, approximated by the distance from
    /// the pixel centre to the segment: `clamp(hw + 0.5 − d, 0, 1)`.
    fn stroke(&mut self, pts: &[[f64; 2]], hw: f64, clip: Rect) {
        let r = hw + 1.0;
        for s in pts.windows(2) {
            let (a, b) = (s[0], s[1]);
            let x0 = ((a[0].min(b[0]) - r).floor() as i64).max(clip.x0);
            let x1 = ((a[0].max(b[0]) + r).ceil() as i64).min(clip.x1 - 1);
            let y0 = ((a[1].min(b[1]) - r).floor() as i64).max(clip.y0);
            let y1 = ((a[1].max(b[1]) + r).ceil() as i64).min(clip.y1 - 1);
            let (dx, dy) = (b[0] - a[0], b[1] - a[1]);
            let len2 = dx * dx + dy * dy;
            for y in y0..=y1 {
                for x in x0..=x1 {
                    let (px, py) = (x as f64 + 0.5, y as f64 + 0.5);
                    let t = if len2 > 0.0 {
                        (((px - a[0]) * dx + (py - a[1]) * dy) / len2).clamp(0.0, 1.0)
                    } else {
                        0.0
                    };
                    let d = (px - a[0] - t * dx).hypot(py - a[1] - t * dy);
                    let c = (hw + 0.5 - d).clamp(0.0, 1.0);
                    if c > 0.0 {
                        let i = y as usize * self.w as usize + x as usize;
                        let v = (c * 255.0).round() as u8;
                        if v > self.v[i] {
                            self.v[i] = v;
                        }
                    }
                }
            }
        }
    }

    fn clear_rects(&mut self, rects: &[Rect]) {
        for r in rects {
            for y in r.y0.max(0)..r.y1.min(i64::from(self.h)) {
                for x in r.x0.max(0)..r.x1.min(i64::from(self.w)) {
                    self.v[y as usize * self.w as usize + x as usize] = 0;
                }
            }
        }
    }
}

/// Where everything goes.
struct Layout {
    /// Integer font scale of ordinary text.
    scale: u32,
    margin: i64,
    title_lines: Vec<(String, u32)>,
    title_rect: Rect,
    /// The region the map (with its degree labels) may use.
    map_area: Rect,
    legend_rect: Rect,
    caution_lines: Vec<String>,
    caution_rect: Rect,
}

impl Layout {
    fn new(spec: &ChartSpec<'_>, levels: &[f64]) -> Result<Self, ChartError> {
        let (w, h) = (i64::from(spec.width), i64::from(spec.height));
        let scale: u32 = if spec.width >= 640 && spec.height >= 480 {
            2
        } else {
            1
        };
        let s = i64::from(scale);
        let lh = i64::from(font::LINE_HEIGHT) * s;
        let margin = 6 * s;
        let text_w = (w - 2 * margin - 4 * s).max(1) as u32;

        let mut title_lines: Vec<(String, u32)> = Vec::new();
        let heading = if spec.title.quantity.is_empty() {
            "field".to_string()
        } else {
            spec.title.quantity.clone()
        };
        let big = if scale >= 2 && font::text_width(&heading, scale + 1) <= text_w {
            scale + 1
        } else {
            scale
        };
        for l in font::wrap_text(&heading, text_w, big) {
            title_lines.push((l, big));
        }
        let mut details: Vec<String> = Vec::new();
        if let Some(c) = &spec.title.cycle {
            details.push(format!("cycle {c}"));
        }
        if let Some(t) = &spec.title.reference_time {
            details.push(format!("reference {t}"));
        }
        if let Some(l) = spec.title.lead_hours {
            details.push(format!("lead +{} h", format_number(l)));
        }
        if let Some(t) = &spec.title.valid_time {
            details.push(format!("valid {t}"));
        }
        details.push(format!(
            "isolines every {}{}",
            format_number(spec.interval),
            if spec.critical.is_empty() {
                String::new()
            } else {
                format!(
                    ", critical {}",
                    spec.critical
                        .iter()
                        .map(|c| format_number(*c))
                        .collect::<Vec<_>>()
                        .join(", ")
                )
            }
        ));
        // Fit as many details on a line as the width allows.
        let mut cur = String::new();
        let sep = "   ";
        for d in details {
            let candidate = if cur.is_empty() {
                d.clone()
            } else {
                format!("{cur}{sep}{d}")
            };
            if font::text_width(&candidate, scale) <= text_w || cur.is_empty() {
                cur = candidate;
            } else {
                title_lines.push((std::mem::take(&mut cur), scale));
                cur = d;
            }
        }
        if !cur.is_empty() {
            for l in font::wrap_text(&cur, text_w, scale) {
                title_lines.push((l, scale));
            }
        }
        let title_h: i64 = title_lines
            .iter()
            .map(|(_, sc)| i64::from(font::LINE_HEIGHT * sc))
            .sum::<i64>()
            + 2 * margin;
        let title_rect = Rect {
            x0: 0,
            y0: 0,
            x1: w,
            y1: title_h,
        };

        let caution_lines = match &spec.caution {
            Some(c) if !c.trim().is_empty() => font::wrap_text(c, text_w - 6 * s as u32, scale),
            _ => Vec::new(),
        };
        let caution_h = if caution_lines.is_empty() {
            0
        } else {
            caution_lines.len() as i64 * lh + 2 * margin
        };
        let caution_rect = Rect {
            x0: 0,
            y0: h - caution_h,
            x1: w,
            y1: h,
        };

        let legend_rows = match &spec.fill {
            ChartFill::Categories { legend, .. } => {
                legend_category_rows(legend, text_w, scale).len() as i64
            }
            _ => 1,
        };
        let bar = if matches!(spec.fill, ChartFill::Bands) && !levels.is_empty() {
            legend_bar_height(scale)
        } else {
            0
        };
        let legend_h = bar + legend_rows * (lh + 2 * s) + 2 * margin;
        let legend_rect = Rect {
            x0: 0,
            y0: caution_rect.y0 - legend_h,
            x1: w,
            y1: caution_rect.y0,
        };
        let map_area = Rect {
            x0: margin,
            y0: title_rect.y1 + margin,
            x1: w - margin,
            y1: legend_rect.y0,
        };
        let map_height = map_area.y1 - map_area.y0 - lh - 2 * margin;
        if map_height < 60 {
            return Err(ChartError::NoRoomForMap {
                width: spec.width,
                height: spec.height,
                map_height,
            });
        }
        Ok(Layout {
            scale,
            margin,
            title_lines,
            title_rect,
            map_area,
            legend_rect,
            caution_lines,
            caution_rect,
        })
    }
}

/// The legend's categories arranged in rows that fit the width: indices per row.
fn legend_category_rows(legend: &[Category], width: u32, scale: u32) -> Vec<Vec<usize>> {
    let mut rows: Vec<Vec<usize>> = vec![Vec::new()];
    let mut used = 0u32;
    for (k, c) in legend.iter().enumerate() {
        let item = category_item_width(c, scale);
        if used + item > width && !rows[rows.len() - 1].is_empty() {
            rows.push(Vec::new());
            used = 0;
        }
        let last = rows.len() - 1;
        rows[last].push(k);
        used += item;
    }
    rows
}

fn category_item_width(c: &Category, scale: u32) -> u32 {
    // Swatch, gap, name, spacing.
    (14 + 6 + 18) * scale + font::text_width(&c.name, scale)
}

/// The map's place on the page and the projection.
struct MapFrame {
    rect: Rect,
    lon_min: f64,
    lon_max: f64,
    lat_min: f64,
    lat_max: f64,
    /// Pixels per degree, both axes.
    ppd: f64,
    /// Longitudes including the seam column when wrapping, ascending or as given.
    lons: Vec<f64>,
    lats: Vec<f64>,
    cols: usize,
}

impl MapFrame {
    fn new(spec: &ChartSpec<'_>, layout: &Layout) -> Self {
        let s = i64::from(layout.scale);
        let mut lons = spec.longitudes.to_vec();
        let ascending = lons.len() < 2 || lons[1] > lons[0];
        if spec.wrap_longitude && !lons.is_empty() {
            lons.push(if ascending {
                lons[0] + 360.0
            } else {
                lons[0] - 360.0
            });
        }
        let lats = spec.latitudes.to_vec();
        let fold = |v: &[f64]| {
            v.iter()
                .fold((f64::INFINITY, f64::NEG_INFINITY), |(a, b), &x| {
                    (a.min(x), b.max(x))
                })
        };
        let (lon_min, lon_max) = fold(&lons);
        let (lat_min, lat_max) = fold(&lats);
        let label_w = i64::from(font::text_width("90°N", layout.scale)) + 4 * s;
        let lh = i64::from(font::LINE_HEIGHT) * s;
        let area = layout.map_area;
        let avail_w = (area.x1 - area.x0 - label_w - 2 * s).max(1) as f64;
        let avail_h = (area.y1 - area.y0 - lh - 2 * layout.margin).max(1) as f64;
        let span_lon = (lon_max - lon_min).max(1e-6);
        let span_lat = (lat_max - lat_min).max(1e-6);
        let ppd = (avail_w / span_lon).min(avail_h / span_lat);
        let mw = (span_lon * ppd).floor() as i64;
        let mh = (span_lat * ppd).floor() as i64;
        let x0 = area.x0 + label_w + ((avail_w as i64 - mw) / 2).max(0);
        let y0 = area.y0 + ((avail_h as i64 - mh) / 2).max(0);
        MapFrame {
            rect: Rect {
                x0,
                y0,
                x1: x0 + mw.max(1),
                y1: y0 + mh.max(1),
            },
            lon_min,
            lon_max,
            lat_min,
            lat_max,
            ppd,
            cols: spec.longitudes.len(),
            lons,
            lats,
        }
    }

    fn x(&self, lon: f64) -> f64 {
        self.rect.x0 as f64 + (lon - self.lon_min) * self.ppd
    }

    fn y(&self, lat: f64) -> f64 {
        self.rect.y0 as f64 + (self.lat_max - lat) * self.ppd
    }

    /// Pixel polylines of a line in degrees: each segment is shifted by a multiple of 360°
    /// so that its midpoint lies in the drawn extent, and the line is cut where the shift
    /// changes (the seam of a wrapped grid).
    fn pixel_lines(&self, points: &[[f64; 2]]) -> Vec<Vec<[f64; 2]>> {
        let mut out: Vec<Vec<[f64; 2]>> = Vec::new();
        let mut cur: Vec<[f64; 2]> = Vec::new();
        let mut shift = f64::NAN;
        for w in points.windows(2) {
            let mid = 0.5 * (w[0][0] + w[1][0]);
            let mut sh = 0.0;
            while mid + sh > self.lon_max + 1e-9 {
                sh -= 360.0;
            }
            while mid + sh < self.lon_min - 1e-9 {
                sh += 360.0;
            }
            if sh != shift {
                if cur.len() >= 2 {
                    out.push(std::mem::take(&mut cur));
                }
                cur.clear();
                cur.push([self.x(w[0][0] + sh), self.y(w[0][1])]);
                shift = sh;
            }
            cur.push([self.x(w[1][0] + sh), self.y(w[1][1])]);
        }
        if cur.len() >= 2 {
            out.push(cur);
        }
        out
    }
}

/// Fractional index of `x` on a strictly monotonic axis, or `None` outside it.
fn fractional_index(axis: &[f64], x: f64) -> Option<f64> {
    let n = axis.len();
    if n == 0 {
        return None;
    }
    if n == 1 {
        return (x == axis[0]).then_some(0.0);
    }
    let asc = axis[1] > axis[0];
    let (first, last) = (axis[0], axis[n - 1]);
    let inside = if asc {
        x >= first && x <= last
    } else {
        x <= first && x >= last
    };
    if !inside {
        return None;
    }
    // Index of the first coordinate beyond x.
    let k = axis.partition_point(|&a| if asc { a <= x } else { a >= x });
    let k = k.clamp(1, n - 1);
    let (a, b) = (axis[k - 1], axis[k]);
    Some((k - 1) as f64 + (x - a) / (b - a))
}

fn draw_title(canvas: &mut Canvas, layout: &Layout) {
    let s = i64::from(layout.scale);
    canvas.fill_rect(layout.title_rect, [238, 240, 244], 1.0);
    // A slate rule under the block.
    canvas.fill_rect(
        Rect {
            x0: 0,
            y0: layout.title_rect.y1 - s,
            x1: layout.title_rect.x1,
            y1: layout.title_rect.y1,
        },
        [92, 100, 124],
        1.0,
    );
    let mut y = layout.margin;
    for (n, (line, sc)) in layout.title_lines.iter().enumerate() {
        let colour = if n == 0 { INK } else { [60, 66, 84] };
        canvas.text(layout.margin + 2 * s, y, line, *sc, colour);
        y += i64::from(font::LINE_HEIGHT * sc);
    }
}

fn draw_fill(canvas: &mut Canvas, spec: &ChartSpec<'_>, map: &MapFrame, levels: &[f64]) {
    let r = map.rect;
    // Fractional grid index of every pixel column and row.
    let cols_f: Vec<Option<f64>> = (r.x0..r.x1)
        .map(|x| {
            let lon = map.lon_min + ((x - r.x0) as f64 + 0.5) / map.ppd;
            fractional_index(&map.lons, lon)
        })
        .collect();
    let rows_f: Vec<Option<f64>> = (r.y0..r.y1)
        .map(|y| {
            let lat = map.lat_max - ((y - r.y0) as f64 + 0.5) / map.ppd;
            fractional_index(&map.lats, lat)
        })
        .collect();
    let (rows, cols) = (map.lats.len(), map.cols);
    let value = |i: usize, j: usize| -> f32 { spec.values[[i.min(rows - 1), j % cols]] };
    let bands = levels.len() + 1;
    for (py, rf) in rows_f.iter().enumerate() {
        for (px, cf) in cols_f.iter().enumerate() {
            let (x, y) = (r.x0 + px as i64, r.y0 + py as i64);
            let (Some(rf), Some(cf)) = (*rf, *cf) else {
                continue;
            };
            let colour = match &spec.fill {
                ChartFill::None => None,
                ChartFill::Bands => {
                    let i = (rf.floor() as usize).min(rows.saturating_sub(2));
                    let j = (cf.floor() as usize).min(map.lons.len().saturating_sub(2));
                    let (fi, fj) = (rf - i as f64, cf - j as f64);
                    let c = [
                        value(i, j),
                        value(i, j + 1),
                        value(i + 1, j),
                        value(i + 1, j + 1),
                    ];
                    let v = if c.iter().any(|v| v.is_nan()) {
                        f64::from(value(rf.round() as usize, cf.round() as usize))
                    } else {
                        let top = f64::from(c[0]) * (1.0 - fj) + f64::from(c[1]) * fj;
                        let bot = f64::from(c[2]) * (1.0 - fj) + f64::from(c[3]) * fj;
                        top * (1.0 - fi) + bot * fi
                    };
                    if v.is_nan() {
                        Some(hatch(x, y))
                    } else {
                        let band = levels.partition_point(|&l| l <= v);
                        Some(band_colour(band, bands))
                    }
                }
                ChartFill::Categories { classes, legend } => {
                    let i = (rf.round() as usize).min(rows - 1);
                    let j = (cf.round() as usize) % cols;
                    let k = classes[[i, j]];
                    if k == NO_CLASS {
                        None
                    } else {
                        legend.get(usize::from(k)).map(|c| c.colour)
                    }
                }
            };
            if let Some(c) = colour {
                canvas.set(x, y, c);
            } else if !matches!(spec.fill, ChartFill::None) {
                canvas.set(x, y, [255, 255, 255]);
            } else {
                let v = value(
                    (rf.round() as usize).min(rows - 1),
                    (cf.round() as usize) % cols,
                );
                canvas.set(
                    x,
                    y,
                    if v.is_nan() {
                        hatch(x, y)
                    } else {
                        [255, 255, 255]
                    },
                );
            }
        }
    }
}

fn hatch(x: i64, y: i64) -> [u8; 3] {
    if (x + y).rem_euclid(7) == 0 {
        [184, 184, 184]
    } else {
        MISSING_COLOUR
    }
}

/// A round graticule spacing giving about four to eight lines across `span` degrees.
fn graticule_step(span: f64) -> f64 {
    for step in [1.0, 2.0, 5.0, 10.0, 15.0, 20.0, 30.0, 45.0, 60.0, 90.0] {
        if span / step <= 8.0 {
            return step;
        }
    }
    90.0
}

fn graticule(lo: f64, hi: f64) -> Vec<f64> {
    let step = graticule_step(hi - lo);
    let mut out = Vec::new();
    let mut k = (lo / step).ceil();
    while k * step <= hi + 1e-9 {
        out.push(k * step);
        k += 1.0;
    }
    out
}

fn draw_graticule(canvas: &mut Canvas, map: &MapFrame) {
    let r = map.rect;
    let c = [70, 76, 96];
    for lon in graticule(map.lon_min, map.lon_max) {
        let x = map.x(lon).floor() as i64;
        for y in r.y0..r.y1 {
            // Dotted: two on, two off, so that the graticule never reads as an isoline.
            if (y - r.y0) % 4 < 2 {
                canvas.blend(x, y, c, 0.45);
            }
        }
    }
    for lat in graticule(map.lat_min, map.lat_max) {
        let y = map.y(lat).floor() as i64;
        for x in r.x0..r.x1 {
            if (x - r.x0) % 4 < 2 {
                canvas.blend(x, y, c, 0.45);
            }
        }
    }
}

fn lat_label(lat: f64) -> String {
    let v = format_number(lat.abs());
    if lat > 0.0 {
        format!("{v}°N")
    } else if lat < 0.0 {
        format!("{v}°S")
    } else {
        "0°".into()
    }
}

fn lon_label(lon: f64) -> String {
    let mut l = lon.rem_euclid(360.0);
    if l > 180.0 {
        l -= 360.0;
    }
    let v = format_number(l.abs());
    if l.abs() < 1e-9 || (l.abs() - 180.0).abs() < 1e-9 {
        format!("{v}°")
    } else if l > 0.0 {
        format!("{v}°E")
    } else {
        format!("{v}°W")
    }
}

fn draw_graticule_labels(canvas: &mut Canvas, map: &MapFrame, scale: u32) {
    let s = i64::from(scale);
    let r = map.rect;
    let cap = i64::from(font::CAP_HEIGHT) * s;
    let mut last_right = i64::MIN;
    for lon in graticule(map.lon_min, map.lon_max) {
        let text = lon_label(lon);
        let tw = i64::from(font::text_width(&text, scale));
        let x = map.x(lon).round() as i64 - tw / 2;
        if x <= last_right + 4 * s {
            continue;
        }
        canvas.text(x, r.y1 + 4 * s, &text, scale, INK);
        last_right = x + tw;
    }
    for lat in graticule(map.lat_min, map.lat_max) {
        let text = lat_label(lat);
        let tw = i64::from(font::text_width(&text, scale));
        let y = map.y(lat).round() as i64 - cap / 2;
        canvas.text(r.x0 - 4 * s - tw, y, &text, scale, INK);
    }
}

/// Value labels along lines, placed so that they never overlap one another.
struct Labels {
    map: Rect,
    scale: u32,
    placed: Vec<(Rect, String, bool)>,
}

impl Labels {
    fn new(map: Rect, scale: u32) -> Self {
        Labels {
            map,
            scale,
            placed: Vec::new(),
        }
    }

    fn rects(&self) -> Vec<Rect> {
        self.placed.iter().map(|(r, _, _)| *r).collect()
    }

    /// Tries positions every `spacing` pixels along the line (the first half a spacing in),
    /// keeping those whose box stays inside the map and clear of every other label; at most
    /// four per line.
    fn place(&mut self, pts: &[[f64; 2]], value: f64, critical: bool, spacing: f64) {
        let s = i64::from(self.scale);
        let text = format_number(value);
        let tw = i64::from(font::text_width(&text, self.scale));
        let th = i64::from(font::CAP_HEIGHT) * s;
        let pad = 2 * s;
        let mut lengths = Vec::with_capacity(pts.len());
        let mut total = 0.0;
        lengths.push(0.0);
        for w in pts.windows(2) {
            total += (w[1][0] - w[0][0]).hypot(w[1][1] - w[0][1]);
            lengths.push(total);
        }
        if total < (tw as f64) * 2.0 {
            return;
        }
        let mut targets: Vec<f64> = Vec::new();
        let mut d = (0.5 * spacing).min(0.5 * total);
        while d < total && targets.len() < 12 {
            targets.push(d);
            d += spacing;
        }
        let mut count = 0;
        for target in targets {
            if count >= 4 {
                break;
            }
            let k = lengths
                .partition_point(|&l| l < target)
                .clamp(1, pts.len() - 1);
            let seg = lengths[k] - lengths[k - 1];
            let f = if seg > 0.0 {
                (target - lengths[k - 1]) / seg
            } else {
                0.0
            };
            let p = [
                pts[k - 1][0] + f * (pts[k][0] - pts[k - 1][0]),
                pts[k - 1][1] + f * (pts[k][1] - pts[k - 1][1]),
            ];
            let x0 = p[0].round() as i64 - tw / 2 - pad;
            let y0 = p[1].round() as i64 - th / 2 - pad;
            let rect = Rect {
                x0,
                y0,
                x1: x0 + tw + 2 * pad,
                y1: y0 + th + 2 * pad,
            };
            if !self.map.grow(-s).contains(&rect) {
                continue;
            }
            let guard = rect.grow(6 * s);
            if self.placed.iter().any(|(r, _, _)| r.overlaps(&guard)) {
                continue;
            }
            self.placed.push((rect, text.clone(), critical));
            count += 1;
        }
    }

    fn draw(&self, canvas: &mut Canvas) {
        let s = i64::from(self.scale);
        for (r, text, critical) in &self.placed {
            let (x, y) = (r.x0 + 2 * s, r.y0 + 2 * s);
            if *critical {
                canvas.fill_rect(*r, [255, 255, 255], 0.92);
                canvas.frame(r.grow(-1), CRITICAL_COLOUR);
                canvas.text(x, y, text, self.scale, CRITICAL_COLOUR);
            } else {
                canvas.fill_rect(*r, [255, 255, 255], 0.55);
                canvas.text(x, y, text, self.scale, INK);
            }
        }
    }
}

fn draw_legend(canvas: &mut Canvas, spec: &ChartSpec<'_>, layout: &Layout, levels: &[f64]) {
    let s = i64::from(layout.scale);
    let lh = i64::from(font::LINE_HEIGHT) * s;
    let cap = i64::from(font::CAP_HEIGHT) * s;
    let r = layout.legend_rect;
    let x_start = layout.margin + 2 * s;
    let x_end = r.x1 - layout.margin;
    let mut y = r.y0 + layout.margin;
    if matches!(spec.fill, ChartFill::Bands) && !levels.is_empty() {
        // The colour bar: one box per band, level values under the boundaries.
        let bands = levels.len() + 1;
        let width = (x_end - x_start).max(bands as i64);
        let bw = width as f64 / bands as f64;
        let bar_h = cap + 2 * s;
        for b in 0..bands {
            let bx0 = x_start + (b as f64 * bw).round() as i64;
            let bx1 = x_start + ((b + 1) as f64 * bw).round() as i64;
            canvas.fill_rect(
                Rect {
                    x0: bx0,
                    y0: y,
                    x1: bx1,
                    y1: y + bar_h,
                },
                band_colour(b, bands),
                1.0,
            );
        }
        canvas.frame(
            Rect {
                x0: x_start,
                y0: y,
                x1: x_start + width,
                y1: y + bar_h,
            },
            INK,
        );
        let mut last_right = i64::MIN;
        for (k, l) in levels.iter().enumerate() {
            let bx = x_start + ((k + 1) as f64 * bw).round() as i64;
            let text = format_number(*l);
            let tw = i64::from(font::text_width(&text, layout.scale));
            let critical = spec.critical.contains(l);
            for t in 0..3 * s {
                canvas.set(bx, y + bar_h + t, INK);
            }
            let tx = bx - tw / 2;
            if tx > last_right + 3 * s && tx + tw < x_end {
                let c = if critical { CRITICAL_COLOUR } else { INK };
                canvas.text(tx, y + bar_h + 4 * s, &text, layout.scale, c);
                last_right = tx + tw;
            }
        }
        y += legend_bar_height(layout.scale);
    }
    // The line key, or the category swatches followed by it.
    let mut x = x_start;
    if let ChartFill::Categories { legend, .. } = &spec.fill {
        let width = (x_end - x_start).max(1) as u32;
        for row in legend_category_rows(legend, width, layout.scale) {
            x = x_start;
            for k in row {
                let c = &legend[k];
                let sw = Rect {
                    x0: x,
                    y0: y,
                    x1: x + 14 * s,
                    y1: y + cap,
                };
                canvas.fill_rect(sw, c.colour, 1.0);
                canvas.frame(sw, INK);
                canvas.text(x + 20 * s, y, &c.name, layout.scale, INK);
                x += i64::from(category_item_width(c, layout.scale));
            }
            y += lh + 2 * s;
        }
        y -= lh + 2 * s;
    } else {
        x = x_start;
    }
    let key_y = y;
    let sample = |canvas: &mut Canvas, x: i64, colour: [u8; 3], thick: i64| {
        for t in 0..thick {
            for dx in 0..18 * s {
                canvas.set(x + dx, key_y + cap / 2 - thick / 2 + t, colour);
            }
        }
    };
    let key_space = x_end - x;
    let mut kx = x;
    let line_text = format!("isoline every {}", format_number(spec.interval));
    let need = i64::from(font::text_width(&line_text, layout.scale)) + 24 * s;
    if key_space > need {
        sample(canvas, kx, INK, s);
        canvas.text(kx + 22 * s, key_y, &line_text, layout.scale, INK);
        kx += need + 12 * s;
    }
    if !spec.critical.is_empty() {
        let crit_text = format!(
            "critical {}",
            spec.critical
                .iter()
                .map(|c| format_number(*c))
                .collect::<Vec<_>>()
                .join(", ")
        );
        let need = i64::from(font::text_width(&crit_text, layout.scale)) + 24 * s;
        if x_end - kx > need {
            sample(canvas, kx, CRITICAL_COLOUR, 3 * s);
            canvas.text(
                kx + 22 * s,
                key_y,
                &crit_text,
                layout.scale,
                CRITICAL_COLOUR,
            );
        }
    }
}

/// Height of the colour bar with its value labels and the gap after them, pixels.
fn legend_bar_height(scale: u32) -> i64 {
    let s = i64::from(scale);
    // Bar (cap height + 2 s), tick gap (4 s), a line of labels, a gap (4 s).
    i64::from(font::CAP_HEIGHT) * s + 2 * s + 4 * s + i64::from(font::LINE_HEIGHT) * s + 4 * s
}

fn draw_caution(canvas: &mut Canvas, layout: &Layout) {
    if layout.caution_lines.is_empty() {
        return;
    }
    let s = i64::from(layout.scale);
    let r = layout.caution_rect;
    canvas.fill_rect(r, [253, 244, 222], 1.0);
    canvas.fill_rect(
        Rect {
            x0: layout.margin,
            y0: r.y0 + layout.margin / 2,
            x1: layout.margin + 3 * s,
            y1: r.y1 - layout.margin / 2,
        },
        [214, 140, 20],
        1.0,
    );
    let mut y = r.y0 + layout.margin;
    for line in &layout.caution_lines {
        canvas.text(layout.margin + 8 * s, y, line, layout.scale, [74, 52, 16]);
        y += i64::from(font::LINE_HEIGHT) * s;
    }
}

/// A value as a label: no decimals when whole, otherwise up to two, trailing zeros dropped.
fn format_number(v: f64) -> String {
    if (v - v.round()).abs() < 1e-9 {
        format!("{}", v.round() as i64)
    } else {
        let t = format!("{v:.2}");
        t.trim_end_matches('0').trim_end_matches('.').to_string()
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// CIE 1976 L* of an sRGB colour (IEC 61966-2-1 transfer function, D65 luminance
    /// weights 0.2126, 0.7152, 0.0722; L* = 116 f(Y) − 16 with the CIE cube-root rule).
    fn lightness(c: [u8; 3]) -> f64 {
        let lin = |v: u8| {
            let v = f64::from(v) / 255.0;
            if v <= 0.04045 {
                v / 12.92
            } else {
                ((v + 0.055) / 1.055).powf(2.4)
            }
        };
        let y = 0.2126 * lin(c[0]) + 0.7152 * lin(c[1]) + 0.0722 * lin(c[2]);
        let f = if y > 216.0 / 24389.0 {
            y.cbrt()
        } else {
            (24389.0 / 27.0 * y + 16.0) / 116.0
        };
        116.0 * f - 16.0
    }

    #[test]
    fn the_band_ramp_is_ordered_by_lightness() {
        // Known values of the formula: white is L* 100, black 0, mid grey (119) about 50
        // (from memory: sRGB 119 is the usual mid-grey of L* 50).
        assert!((lightness([255, 255, 255]) - 100.0).abs() < 1e-6);
        assert!(lightness([0, 0, 0]).abs() < 1e-6);
        assert!((lightness([119, 119, 119]) - 50.0).abs() < 0.5);
        let mut last = f64::NEG_INFINITY;
        for k in 0..=200 {
            let l = lightness(ramp_colour(k as f64 / 200.0));
            // Rounding to 8 bits can leave neighbouring samples equal, never lower.
            assert!(l >= last - 1e-9, "lightness falls at {k}: {l} after {last}");
            last = l;
        }
        for w in RAMP.windows(2) {
            assert!(lightness(w[1]) > lightness(w[0]) + 4.0, "{w:?}");
        }
        assert!(lightness(RAMP[0]) > 40.0 && lightness(RAMP[RAMP.len() - 1]) < 95.0);
    }

    #[test]
    fn labels_and_numbers() {
        assert_eq!(format_number(5400.0), "5400");
        assert_eq!(format_number(2.5), "2.5");
        assert_eq!(lat_label(-30.0), "30°S");
        assert_eq!(lon_label(200.0), "160°W");
        assert_eq!(lon_label(180.0), "180°");
        assert_eq!(lon_label(-0.0), "0°");
        assert_eq!(
            graticule(-20.0, 40.0),
            vec![-20.0, -10.0, 0.0, 10.0, 20.0, 30.0, 40.0]
        );
        assert_eq!(fractional_index(&[10.0, 8.0, 6.0], 7.0), Some(1.5));
        assert_eq!(fractional_index(&[0.0, 1.0, 2.0], 2.0), Some(2.0));
        assert_eq!(fractional_index(&[0.0, 1.0, 2.0], 2.5), None);
    }
}
