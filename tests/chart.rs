//! PNG charts: decoded with the `png` crate (an independent PNG reader, implementing the
//! W3C/ISO 15948 PNG specification) and checked against fields whose isolines are known by
//! mathematics (planes). The invented fields here are analytic constructions, not data.

use hypsogrid::products::chart::{
    band_colour, render_image, render_png, Category, ChartError, ChartFill, ChartSpec, Image,
    TitleBlock, CATEGORY_COLOURS, CRITICAL_COLOUR, INK,
};
use hypsogrid::products::font;
use hypsogrid::products::isolines::interval_levels;
use ndarray::Array2;

fn axis(start: f64, step: f64, n: usize) -> Vec<f64> {
    (0..n).map(|k| start + step * k as f64).collect()
}

/// Analytic plane of thickness-like values: f = 5400 + 20 (45 − lat) + 4 (lon − 10), so the
/// 5400 line is the straight line lat = 45 + 0.2 (lon − 10).
fn plane(lon: f64, lat: f64) -> f64 {
    5400.0 + 20.0 * (45.0 - lat) + 4.0 * (lon - 10.0)
}

fn plane_line_lat(lon: f64, value: f64) -> f64 {
    45.0 + 0.2 * (lon - 10.0) - (value - 5400.0) / 20.0
}

struct Fixture {
    lats: Vec<f64>,
    lons: Vec<f64>,
    values: Array2<f32>,
}

fn fixture(north_to_south: bool) -> Fixture {
    let lats = if north_to_south {
        axis(65.0, -0.5, 81)
    } else {
        axis(25.0, 0.5, 81)
    };
    let lons = axis(-20.0, 0.5, 121);
    let values = Array2::from_shape_fn((lats.len(), lons.len()), |(i, j)| {
        plane(lons[j], lats[i]) as f32
    });
    Fixture { lats, lons, values }
}

const CAUTION: &str =
    "Guidance derived from model fields, not a forecast or a warning. Thresholds \
must suit the local climate and terrain; official services, local practice and licensed \
forecasters decide.";

fn spec<'a>(f: &'a Fixture, fill: ChartFill<'a>) -> ChartSpec<'a> {
    ChartSpec {
        values: f.values.view(),
        latitudes: &f.lats,
        longitudes: &f.lons,
        wrap_longitude: false,
        interval: 60.0,
        base: 0.0,
        critical: vec![5400.0],
        fill,
        title: TitleBlock {
            quantity: "1000–500 hPa thickness (m)".into(),
            cycle: Some("demo-2024011500".into()),
            reference_time: Some("2024-01-15T00:00:00Z".into()),
            lead_hours: Some(24.0),
            valid_time: Some("2024-01-16T00:00:00Z".into()),
        },
        caution: Some(CAUTION.into()),
        width: 1200,
        height: 900,
    }
}

fn rgb(img: &Image, x: u32, y: u32) -> [u8; 3] {
    let i = ((y * img.width + x) * 3) as usize;
    [img.pixels[i], img.pixels[i + 1], img.pixels[i + 2]]
}

#[test]
fn the_png_decodes_to_the_drawn_image() {
    let f = fixture(true);
    let s = spec(&f, ChartFill::Bands);
    let image = render_image(&s).expect("image");
    let bytes = render_png(&s).expect("png");
    let dir = tempfile::tempdir().expect("temp dir");
    let path = dir.path().join("thickness.png");
    std::fs::write(&path, &bytes).expect("write sample");
    let file = std::fs::File::open(&path).expect("open sample");
    let decoder = png::Decoder::new(std::io::BufReader::new(file));
    let mut reader = decoder.read_info().expect("png header");
    let size = reader.output_buffer_size().expect("buffer size");
    let mut buf = vec![0; size];
    let info = reader.next_frame(&mut buf).expect("png frame");
    assert_eq!((info.width, info.height), (1200, 900));
    assert_eq!(info.color_type, png::ColorType::Rgb);
    assert_eq!(info.bit_depth, png::BitDepth::Eight);
    assert_eq!(&buf[..info.buffer_size()], &image.pixels[..]);
}

#[test]
fn the_critical_line_is_drawn_where_the_plane_puts_it() {
    let f = fixture(true);
    let img = render_image(&spec(&f, ChartFill::Bands)).expect("image");
    let m = img.map;
    // Along the exact 5400 line, the critical colour within 2 px at most sampled columns
    // (labels break the line in a few places).
    let (mut hits, mut total) = (0, 0);
    for x in (m.x0 + 4..m.x1 - 4).step_by(3) {
        let lon = m.position(f64::from(x) + 0.5, 0.0)[0];
        let y = m.pixel(lon, plane_line_lat(lon, 5400.0))[1];
        if y < f64::from(m.y0) + 4.0 || y > f64::from(m.y1) - 4.0 {
            continue;
        }
        total += 1;
        let yc = y.floor() as i64;
        if (yc - 2..=yc + 2).any(|yy| rgb(&img, x, yy as u32) == CRITICAL_COLOUR) {
            hits += 1;
        }
    }
    assert!(total > 200, "{total} columns");
    assert!(
        hits * 10 >= total * 8,
        "critical colour at {hits} of {total} columns"
    );
    // And nowhere else on the map: every crimson pixel lies within 20 px of the line (its
    // labels sit on it).
    for y in m.y0..m.y1 {
        for x in m.x0..m.x1 {
            if rgb(&img, x, y) == CRITICAL_COLOUR {
                let lon = m.position(f64::from(x) + 0.5, 0.0)[0];
                let line_y = m.pixel(lon, plane_line_lat(lon, 5400.0))[1];
                assert!(
                    (f64::from(y) - line_y).abs() < 20.0,
                    "stray crimson at ({x}, {y})"
                );
            }
        }
    }
}

#[test]
fn fill_bands_follow_the_field_and_change_across_lines() {
    let f = fixture(true);
    let img = render_image(&spec(&f, ChartFill::Bands)).expect("image");
    let m = img.map;
    let levels = interval_levels(f.values.view(), 60.0, 0.0).expect("levels");
    let bands = levels.len() + 1;
    // Pixels well clear of every isoline (more than 6 px) carry exactly the colour of their
    // band; a few are under graticule dots or labels.
    let ppd = m.pixels_per_degree;
    let (mut same, mut total) = (0, 0);
    for y in (m.y0 + 2..m.y1 - 2).step_by(7) {
        for x in (m.x0 + 2..m.x1 - 2).step_by(7) {
            let p = m.position(f64::from(x) + 0.5, f64::from(y) + 0.5);
            let v = plane(p[0], p[1]);
            // Distance to the nearest level in pixels: |f − level| / |∇f| · ppd.
            let grad = (20.0f64.powi(2) + 4.0f64.powi(2)).sqrt();
            let near = levels
                .iter()
                .map(|l| (v - l).abs() / grad * ppd)
                .fold(f64::INFINITY, f64::min);
            if near < 6.0 {
                continue;
            }
            total += 1;
            let band = levels.partition_point(|&l| l <= v);
            if rgb(&img, x, y) == band_colour(band, bands) {
                same += 1;
            }
        }
    }
    assert!(total > 1000);
    assert!(
        same * 100 >= total * 85,
        "{same} of {total} pixels in their band colour"
    );
    // Across the 5460 line at lon 10: 8 px north (lower values) and 8 px south differ.
    let lat = plane_line_lat(10.0, 5460.0);
    let [x, y] = m.pixel(10.3, lat);
    let north = rgb(&img, x as u32, (y - 8.0) as u32);
    let south = rgb(&img, x as u32, (y + 8.0) as u32);
    assert_ne!(north, south);
    let band = levels.partition_point(|&l| l <= 5459.0);
    assert_eq!(
        north,
        band_colour(band, bands),
        "north of 5460 is the band below it"
    );
    assert_eq!(south, band_colour(band + 1, bands));
}

#[test]
fn row_order_does_not_turn_the_chart_over() {
    let (a, b) = (fixture(true), fixture(false));
    let ia = render_image(&spec(&a, ChartFill::Bands)).expect("image");
    let ib = render_image(&spec(&b, ChartFill::Bands)).expect("image");
    assert_eq!(ia.map, ib.map);
    let differ = ia
        .pixels
        .chunks(3)
        .zip(ib.pixels.chunks(3))
        .filter(|(p, q)| p != q)
        .count();
    // Float rounding of interpolation may flip a handful of anti-aliased pixels.
    assert!(
        differ * 1000 < (ia.width * ia.height) as usize,
        "{differ} pixels differ"
    );
}

#[test]
fn title_text_comes_from_the_embedded_font() {
    // The chart has no system font to find: every text pixel is a glyph of `font`. The heading
    // is drawn in INK at scale 3 in a 1200-px chart, so the INK pixels of the title block
    // number exactly the inked pixels of those glyphs.
    let f = fixture(true);
    let s = spec(&f, ChartFill::Bands);
    let img = render_image(&s).expect("image");
    let mut ink = 0;
    for y in 0..img.title_bottom {
        for x in 0..img.width {
            if rgb(&img, x, y) == INK {
                ink += 1;
            }
        }
    }
    let mut expected = 0;
    font::for_each_pixel(&s.title.quantity, 3, |_, _| expected += 1);
    assert!(expected > 500);
    assert_eq!(ink, expected);
    // The detail line (cycle, times, lead) is there too, in its own colour.
    let other = (0..img.title_bottom)
        .flat_map(|y| (0..img.width).map(move |x| (x, y)))
        .filter(|&(x, y)| rgb(&img, x, y) == [60, 66, 84])
        .count();
    assert!(other > 1000, "{other} detail pixels");
}

#[test]
fn categories_fill_by_class_with_a_legend_and_caution() {
    let f = fixture(true);
    // Class 0 west of 0°, 1 from 0° to 20°E, none (255) east of 20°E.
    let classes = Array2::from_shape_fn(f.values.dim(), |(_, j)| {
        let lon = f.lons[j];
        if lon < 0.0 {
            0u8
        } else if lon < 20.0 {
            1
        } else {
            255
        }
    });
    let legend = vec![
        Category {
            name: "rain".into(),
            colour: CATEGORY_COLOURS[0],
        },
        Category {
            name: "snow".into(),
            colour: CATEGORY_COLOURS[1],
        },
    ];
    let s = spec(
        &f,
        ChartFill::Categories {
            classes: classes.view(),
            legend,
        },
    );
    let img = render_image(&s).expect("image");
    let m = img.map;
    let count_at = |lon: f64, colour: [u8; 3]| {
        let x = m.pixel(lon, 45.0)[0] as u32;
        (m.y0 + 2..m.y1 - 2)
            .filter(|&y| rgb(&img, x, y) == colour)
            .count()
    };
    let h = (m.y1 - m.y0) as usize;
    assert!(count_at(-10.3, CATEGORY_COLOURS[0]) * 10 > h * 7);
    assert!(count_at(10.3, CATEGORY_COLOURS[1]) * 10 > h * 7);
    assert!(count_at(30.3, [255, 255, 255]) * 10 > h * 7);
    // Swatches in the legend, below the map.
    let below = |colour: [u8; 3]| {
        (m.y1 + 1..img.height)
            .flat_map(|y| (0..img.width).map(move |x| (x, y)))
            .filter(|&(x, y)| rgb(&img, x, y) == colour)
            .count()
    };
    assert!(below(CATEGORY_COLOURS[0]) > 100 && below(CATEGORY_COLOURS[1]) > 100);
    // The caution block at the bottom holds text.
    let top = img.caution_top.expect("caution block");
    let text = (top..img.height)
        .flat_map(|y| (0..img.width).map(move |x| (x, y)))
        .filter(|&(x, y)| rgb(&img, x, y) == [74, 52, 16])
        .count();
    assert!(text > 1000, "{text} caution pixels");
}

#[test]
fn bad_requests_get_named_errors() {
    let f = fixture(true);
    let mut s = spec(&f, ChartFill::Bands);
    s.width = 100;
    assert!(matches!(
        render_png(&s),
        Err(ChartError::Size { width: 100, .. })
    ));
    let classes = Array2::<u8>::zeros((3, 3));
    let s = spec(
        &f,
        ChartFill::Categories {
            classes: classes.view(),
            legend: Vec::new(),
        },
    );
    assert!(matches!(
        render_png(&s),
        Err(ChartError::ClassShape { rows: 3, .. })
    ));
    let classes = Array2::<u8>::from_elem(f.values.dim(), 7);
    let s = spec(
        &f,
        ChartFill::Categories {
            classes: classes.view(),
            legend: Vec::new(),
        },
    );
    let e = render_png(&s).expect_err("unknown class");
    assert!(e.to_string().contains("class 7"), "{e}");
    let mut s = spec(&f, ChartFill::None);
    s.interval = 0.0;
    assert!(matches!(render_png(&s), Err(ChartError::Isolines(_))));
    let mut s = spec(&f, ChartFill::None);
    s.height = 200;
    s.caution = Some(CAUTION.repeat(8));
    assert!(matches!(
        render_png(&s),
        Err(ChartError::NoRoomForMap { .. })
    ));
}

#[test]
fn a_wrapped_global_chart_renders_without_fill() {
    // Analytic zonal field f = 5500 − 5 |lat| with a wave, on a 2.5° global grid.
    let lats = axis(90.0, -2.5, 73);
    let lons = axis(0.0, 2.5, 144);
    let values = Array2::from_shape_fn((73, 144), |(i, j)| {
        (5500.0 - 5.0 * lats[i].abs()
            + 40.0 * (2.0 * lons[j].to_radians()).sin() * lats[i].to_radians().cos()) as f32
    });
    let s = ChartSpec {
        values: values.view(),
        latitudes: &lats,
        longitudes: &lons,
        wrap_longitude: true,
        interval: 60.0,
        base: 0.0,
        critical: vec![5400.0, 5280.0],
        fill: ChartFill::None,
        title: TitleBlock {
            quantity: "500 hPa geopotential height (m)".into(),
            ..TitleBlock::default()
        },
        caution: None,
        width: 800,
        height: 500,
    };
    let img = render_image(&s).expect("image");
    assert_eq!(img.map.lon_max - img.map.lon_min, 360.0);
    assert!(img.caution_top.is_none());
    let crimson = img
        .pixels
        .chunks(3)
        .filter(|p| *p == CRITICAL_COLOUR)
        .count();
    assert!(crimson > 2000, "{crimson} critical pixels");
}
