//! Isolines by marching squares, and their RFC 7946 GeoJSON.
//!
//! The fields here are analytic constructions whose exact isolines are known by mathematics
//! (a plane has straight isolines, a paraboloid circles); the GeoJSON is checked against the
//! rules of RFC 7946 (IETF, 2016), §3.1 (geometry and positions) and §3.1.9 (antimeridian).

use hypsogrid::products::geojson::{
    feature_collection, to_geojson_string, IsolineMetadata, IsolineQuantity,
};
use hypsogrid::products::isolines::{
    interval_levels, isolines, Isoline, IsolineError, IsolineOptions,
};
use ndarray::Array2;
use serde_json::Value;

fn axis(start: f64, step: f64, n: usize) -> Vec<f64> {
    (0..n).map(|k| start + step * k as f64).collect()
}

fn field(lats: &[f64], lons: &[f64], f: impl Fn(f64, f64) -> f64) -> Array2<f32> {
    Array2::from_shape_fn((lats.len(), lons.len()), |(i, j)| {
        f(lons[j], lats[i]) as f32
    })
}

fn field64(lats: &[f64], lons: &[f64], f: impl Fn(f64, f64) -> f64) -> Array2<f64> {
    Array2::from_shape_fn((lats.len(), lons.len()), |(i, j)| f(lons[j], lats[i]))
}

/// Consecutive points within one cell diagonal, and never equal; rings end where they began.
fn assert_well_formed(lines: &[Isoline], dlon: f64, dlat: f64) {
    let diagonal = (dlon * dlon + dlat * dlat).sqrt() * (1.0 + 1e-9);
    for l in lines {
        assert!(l.points.len() >= 2, "line of {} points", l.points.len());
        for w in l.points.windows(2) {
            assert_ne!(w[0], w[1], "duplicate consecutive point in {l:?}");
            let d = ((w[0][0] - w[1][0]).powi(2) + (w[0][1] - w[1][1]).powi(2)).sqrt();
            assert!(
                d <= diagonal,
                "jump of {d}° between {:?} and {:?}",
                w[0],
                w[1]
            );
        }
        if l.closed {
            assert!(l.points.len() >= 4);
            assert_eq!(l.points.first(), l.points.last());
        }
    }
}

#[test]
fn a_plane_has_straight_isolines_through_exact_vertices() {
    // Analytic: f = a·lon + b·lat + c is linear, so interpolation along an edge is exact and
    // every vertex lies on the line a·lon + b·lat + c = level.
    let (a, b, c) = (3.0, -2.0, 100.0);
    let lats = axis(40.0, 0.5, 31);
    let lons = axis(10.0, 0.5, 41);
    // Every node value is a multiple of 0.5 below 300, which f32 holds exactly.
    let f = field(&lats, &lons, |x, y| a * x + b * y + c);
    let levels = interval_levels(f.view(), 7.0, 0.0).expect("levels");
    assert!(levels.len() > 10, "{} levels", levels.len());
    let lines =
        isolines(f.view(), &lats, &lons, &levels, &IsolineOptions::default()).expect("isolines");
    assert_eq!(lines.len(), levels.len(), "one straight line per level");
    for l in &lines {
        assert!(!l.closed);
        for p in &l.points {
            let r = a * p[0] + b * p[1] + c - l.value;
            assert!(
                r.abs() < 1e-9,
                "vertex {p:?} off the line {} by {r}",
                l.value
            );
        }
        // Higher values on the left of travel: the left normal (−dlat, dlon) points up the
        // gradient (a, b).
        for w in l.points.windows(2) {
            let (dx, dy) = (w[1][0] - w[0][0], w[1][1] - w[0][1]);
            assert!(-dy * a + dx * b > 0.0, "segment {w:?} runs the wrong way");
        }
    }
    assert_well_formed(&lines, 0.5, 0.5);
}

#[test]
fn a_paraboloid_has_circles_within_the_interpolation_bound() {
    // Analytic: f = (x − x0)² + (y − y0)² has circles of radius √level. Along an edge f is
    // (s − s0)² + const, whose linear interpolant between nodes s_a, s_b errs by
    // f − L = (s − s_a)(s − s_b) ∈ [−h²/4, 0]. At a vertex L = level, so the true value there
    // is ρ² ∈ [level − h²/4, level]: that is the bound checked, on ρ² directly.
    let (x0, y0) = (15.3, 45.7);
    let h = 0.25;
    let lats = axis(40.0, h, 49);
    let lons = axis(9.0, h, 53);
    let f = field(&lats, &lons, |x, y| (x - x0).powi(2) + (y - y0).powi(2));
    let levels = [1.0, 4.0, 9.0];
    let lines =
        isolines(f.view(), &lats, &lons, &levels, &IsolineOptions::default()).expect("lines");
    assert_eq!(lines.len(), 3, "one ring per level");
    // The f32 storage of values near 10 adds at most a few 1e-6 to the bound.
    let eps = 1e-5;
    for (l, &level) in lines.iter().zip(&levels) {
        assert_eq!(l.value, level);
        assert!(l.closed);
        assert_eq!(l.points.first(), l.points.last());
        for p in &l.points {
            let rho2 = (p[0] - x0).powi(2) + (p[1] - y0).powi(2);
            assert!(
                rho2 <= level + eps && rho2 >= level - h * h / 4.0 - eps,
                "vertex {p:?}: ρ² = {rho2} for level {level}"
            );
            // Every vertex lies on a cell edge: on a grid latitude or a grid longitude.
            let on_lat = ((p[1] - 40.0) / h - ((p[1] - 40.0) / h).round()).abs() < 1e-9;
            let on_lon = ((p[0] - 9.0) / h - ((p[0] - 9.0) / h).round()).abs() < 1e-9;
            assert!(on_lat || on_lon, "vertex {p:?} is not on an edge");
        }
        // Higher values (outside) lie on the left of travel, so the ring runs clockwise round
        // the minimum: its signed area (shoelace formula) is about −π r², short by the
        // polygon's chords and the bound above (under 5 % at r = 1°, h = 0.25°).
        let area: f64 = l
            .points
            .windows(2)
            .map(|w| (w[0][0] - x0) * (w[1][1] - y0) - (w[1][0] - x0) * (w[0][1] - y0))
            .sum::<f64>()
            / 2.0;
        let exact = -std::f64::consts::PI * level;
        assert!(
            area < 0.0 && (area - exact).abs() / exact.abs() < 0.05,
            "area {area}, circle {exact}"
        );
    }
    assert_well_formed(&lines, h, h);
}

#[test]
fn values_equal_to_the_level_give_no_duplicates_or_degenerate_lines() {
    // Integer values with integer levels: many nodes lie exactly on a level, and plateaus.
    let lats = axis(0.0, 1.0, 25);
    let lons = axis(0.0, 1.0, 30);
    let f = field(&lats, &lons, |x, y| {
        (3.0 * (x / 4.0).sin() + 3.0 * (y / 5.0).cos()).round()
    });
    let levels = interval_levels(f.view(), 1.0, 0.0).expect("levels");
    let lines =
        isolines(f.view(), &lats, &lons, &levels, &IsolineOptions::default()).expect("lines");
    assert!(!lines.is_empty());
    assert_well_formed(&lines, 1.0, 1.0);
    // Every vertex is a node equal to the level or a proper interpolation on an edge.
    for l in &lines {
        for p in &l.points {
            assert!(p[0] >= 0.0 && p[0] <= 29.0 && p[1] >= 0.0 && p[1] <= 24.0);
        }
    }
}

#[test]
fn saddles_follow_the_cell_centre_average() {
    let lats = [0.0, 1.0];
    let lons = [0.0, 1.0];
    // Corners (lon, lat): (0,0) = 1, (1,0) = 0, (0,1) = 0, (1,1) = 1: a saddle at 0.5.
    let mut f = Array2::<f32>::zeros((2, 2));
    f[[0, 0]] = 1.0;
    f[[1, 1]] = 1.0;
    // Centre mean 0.5 ≥ level 0.5: the high corners join through the centre, so each line
    // cuts off a low corner, (1, 0) or (0, 1).
    let lines =
        isolines(f.view(), &lats, &lons, &[0.5], &IsolineOptions::default()).expect("lines");
    assert_eq!(lines.len(), 2);
    let cut_off = |l: &Isoline| {
        let m = [
            (l.points[0][0] + l.points[1][0]) / 2.0,
            (l.points[0][1] + l.points[1][1]) / 2.0,
        ];
        [[0.0, 0.0], [1.0, 0.0], [0.0, 1.0], [1.0, 1.0]]
            .into_iter()
            .min_by(|a: &[f64; 2], b: &[f64; 2]| {
                let da = (a[0] - m[0]).hypot(a[1] - m[1]);
                let db = (b[0] - m[0]).hypot(b[1] - m[1]);
                da.total_cmp(&db)
            })
            .unwrap_or([f64::NAN; 2])
    };
    let mut corners: Vec<[f64; 2]> = lines.iter().map(cut_off).collect();
    corners.sort_by(|a, b| a[0].total_cmp(&b[0]));
    assert_eq!(corners, vec![[0.0, 1.0], [1.0, 0.0]]);
    // Centre mean (1 + 0.8) / 4 = 0.45 < 0.5: the low corners join, each line cuts off a
    // high corner, (0, 0) or (1, 1).
    f[[1, 1]] = 0.8;
    let lines =
        isolines(f.view(), &lats, &lons, &[0.5], &IsolineOptions::default()).expect("lines");
    assert_eq!(lines.len(), 2);
    let mut corners: Vec<[f64; 2]> = lines.iter().map(cut_off).collect();
    corners.sort_by(|a, b| a[0].total_cmp(&b[0]));
    assert_eq!(corners, vec![[0.0, 0.0], [1.0, 1.0]]);
}

#[test]
fn masked_cells_carry_no_segment_and_split_lines() {
    let lats = axis(0.0, 1.0, 11);
    let lons = axis(0.0, 1.0, 11);
    // Analytic plane f = lon: the level 5.5 is the straight line lon = 5.5.
    let mut f = field(&lats, &lons, |x, _| x);
    let whole =
        isolines(f.view(), &lats, &lons, &[5.5], &IsolineOptions::default()).expect("lines");
    assert_eq!(whole.len(), 1);
    f[[5, 5]] = f32::NAN;
    let split =
        isolines(f.view(), &lats, &lons, &[5.5], &IsolineOptions::default()).expect("lines");
    assert_eq!(split.len(), 2, "the missing node splits the line in two");
    // The four cells round node (5, 5) have a NaN corner: no segment passes inside them.
    for l in &split {
        for w in l.points.windows(2) {
            let m = [(w[0][0] + w[1][0]) / 2.0, (w[0][1] + w[1][1]) / 2.0];
            let inside = m[0] > 4.0 && m[0] < 6.0 && m[1] > 4.0 && m[1] < 6.0;
            assert!(!inside, "segment {w:?} crosses a masked cell");
        }
    }
    let all_nan = Array2::<f32>::from_elem((3, 3), f32::NAN);
    let none = isolines(
        all_nan.view(),
        &[0.0, 1.0, 2.0],
        &[0.0, 1.0, 2.0],
        &[0.0],
        &IsolineOptions::default(),
    )
    .expect("lines");
    assert!(none.is_empty());
}

/// Lines in a canonical form: rings rotated to start at their smallest point, sorted.
fn canonical(lines: &[Isoline]) -> Vec<(f64, bool, Vec<[f64; 2]>)> {
    let mut out: Vec<(f64, bool, Vec<[f64; 2]>)> = lines
        .iter()
        .map(|l| {
            let mut pts = l.points.clone();
            if l.closed {
                pts.pop();
                let start = (0..pts.len())
                    .min_by(|&a, &b| {
                        pts[a][0]
                            .total_cmp(&pts[b][0])
                            .then(pts[a][1].total_cmp(&pts[b][1]))
                    })
                    .unwrap_or(0);
                pts.rotate_left(start);
            }
            (l.value, l.closed, pts)
        })
        .collect();
    out.sort_by(|a, b| {
        a.0.total_cmp(&b.0)
            .then(a.2[0][0].total_cmp(&b.2[0][0]))
            .then(a.2[0][1].total_cmp(&b.2[0][1]))
    });
    out
}

#[test]
fn row_order_does_not_change_the_lines() {
    let lats = axis(30.0, 0.5, 41);
    let lons = axis(-20.0, 0.5, 61);
    let bumps = |x: f64, y: f64| {
        3.0 * (-((x + 5.0).powi(2) + (y - 40.0).powi(2)) / 20.0).exp()
            - 2.0 * (-((x - 6.0).powi(2) + (y - 44.0).powi(2)) / 10.0).exp()
            + 0.05 * y
    };
    let f = field(&lats, &lons, bumps);
    let levels = interval_levels(f.view(), 0.25, 0.1).expect("levels");
    let up = isolines(f.view(), &lats, &lons, &levels, &IsolineOptions::default()).expect("lines");
    let lats_down: Vec<f64> = lats.iter().rev().copied().collect();
    let f_down = field(&lats_down, &lons, bumps);
    let down = isolines(
        f_down.view(),
        &lats_down,
        &lons,
        &levels,
        &IsolineOptions::default(),
    )
    .expect("lines");
    assert!(up.iter().any(|l| l.closed) && up.iter().any(|l| !l.closed));
    let (a, b) = (canonical(&up), canonical(&down));
    assert_eq!(a.len(), b.len());
    for (la, lb) in a.iter().zip(&b) {
        assert_eq!((la.0, la.1, la.2.len()), (lb.0, lb.1, lb.2.len()));
        for (p, q) in la.2.iter().zip(&lb.2) {
            assert!(
                (p[0] - q[0]).abs() < 1e-9 && (p[1] - q[1]).abs() < 1e-9,
                "{p:?} vs {q:?} (same direction of travel expected)"
            );
        }
    }
}

#[test]
fn wrapping_closes_a_latitude_circle_round_the_globe() {
    let lats = axis(-90.0, 2.5, 73);
    for lons in [axis(0.0, 2.5, 144), axis(-180.0, 2.5, 144)] {
        // Analytic: f = lat + 0.5 sin(lon) is monotonic in latitude, so each level is one
        // line round the globe.
        let f = field(&lats, &lons, |x, y| y + 0.5 * x.to_radians().sin());
        let open =
            isolines(f.view(), &lats, &lons, &[45.2], &IsolineOptions::default()).expect("lines");
        assert_eq!(open.len(), 1);
        assert!(!open[0].closed);
        let wrap = IsolineOptions {
            wrap_longitude: true,
        };
        let lines = isolines(f.view(), &lats, &lons, &[45.2], &wrap).expect("lines");
        assert_eq!(lines.len(), 1, "{lines:?}");
        let l = &lines[0];
        assert!(l.closed);
        let (first, last) = (l.points[0], l.points[l.points.len() - 1]);
        assert_eq!(first[1], last[1]);
        assert!(((last[0] - first[0]).abs() - 360.0).abs() < 1e-9);
        assert_well_formed(
            std::slice::from_ref(&Isoline {
                closed: false,
                ..l.clone()
            }),
            2.5,
            2.5,
        );
        // As GeoJSON: one LineString from −180 to 180, split at the antimeridian.
        let gj = feature_collection(&lines, &meta());
        validate_rfc7946(&gj);
        let geometry = &gj["features"][0]["geometry"];
        assert_eq!(geometry["type"], "LineString");
        let coords = geometry["coordinates"]
            .as_array()
            .map(|c| c.len())
            .unwrap_or(0);
        assert!(coords > 144);
    }
}

#[test]
fn a_ring_across_the_seam_closes_only_when_wrapped() {
    let lats = axis(-30.0, 1.0, 61);
    let lons = axis(0.0, 1.0, 360);
    // A bump centred on longitude 0 (the seam of a 0–360 grid).
    let f = field(&lats, &lons, |x, y| {
        let dx = if x > 180.0 { x - 360.0 } else { x };
        10.0 * (-(dx * dx + y * y) / 50.0).exp()
    });
    let open = isolines(f.view(), &lats, &lons, &[5.0], &IsolineOptions::default()).expect("lines");
    assert_eq!(open.len(), 2, "cut in two by the seam");
    let wrap = IsolineOptions {
        wrap_longitude: true,
    };
    let lines = isolines(f.view(), &lats, &lons, &[5.0], &wrap).expect("lines");
    assert_eq!(lines.len(), 1);
    assert!(lines[0].closed);
    assert_eq!(lines[0].points.first(), lines[0].points.last());
    assert_well_formed(&lines, 1.0, 1.0);
    // Analytic: the ring is the circle dx² + y² = 50 ln 2 (r ≈ 5.887°). Linear interpolation
    // along an edge errs by about f''h²/8 / |f'| ≈ 0.01° there; 0.05° allows for edges that
    // run oblique to the radius.
    let r = (50.0 * 2f64.ln()).sqrt();
    for p in &lines[0].points {
        let dx = if p[0] > 180.0 { p[0] - 360.0 } else { p[0] };
        assert!(((dx * dx + p[1] * p[1]).sqrt() - r).abs() < 0.05, "{p:?}");
    }
}

#[test]
fn bad_inputs_are_named() {
    let f = Array2::<f32>::zeros((3, 4));
    let lats = [0.0, 1.0, 2.0];
    let lons = [0.0, 1.0, 2.0, 3.0];
    let o = IsolineOptions::default();
    assert!(matches!(
        isolines(f.view(), &lats[..2], &lons, &[1.0], &o),
        Err(IsolineError::ShapeMismatch { latitudes: 2, .. })
    ));
    assert!(matches!(
        isolines(f.view(), &[0.0, 1.0, 1.0], &lons, &[1.0], &o),
        Err(IsolineError::BadAxis {
            axis: "latitude",
            index: 2,
            ..
        })
    ));
    assert!(matches!(
        isolines(f.view(), &lats, &lons, &[f64::NAN], &o),
        Err(IsolineError::BadLevel { index: 0, .. })
    ));
    let wrap = IsolineOptions {
        wrap_longitude: true,
    };
    let e = isolines(f.view(), &lats, &lons, &[1.0], &wrap).expect_err("regional grid");
    assert!(matches!(e, IsolineError::NotGlobal { .. }));
    assert!(e.to_string().contains("wrap_longitude"), "{e}");
    assert!(matches!(
        interval_levels(f.view(), f64::INFINITY, 0.0),
        Err(IsolineError::BadInterval { .. })
    ));
}

#[test]
fn a_quarter_degree_global_grid_is_traced_quickly() {
    // Synthetic 0.25° global thickness-like field (analytic construction, not data): 721 ×
    // 1440 at a 60 m interval, wrapped.
    let lats = axis(90.0, -0.25, 721);
    let lons = axis(0.0, 0.25, 1440);
    let f = field(&lats, &lons, |x, y| {
        let c = y.to_radians().cos();
        5400.0 + 300.0 * (c - 0.5) + 60.0 * c * (3.0 * x.to_radians()).sin()
    });
    let levels = interval_levels(f.view(), 60.0, 0.0).expect("levels");
    let wrap = IsolineOptions {
        wrap_longitude: true,
    };
    let start = std::time::Instant::now();
    let lines = isolines(f.view(), &lats, &lons, &levels, &wrap).expect("lines");
    let took = start.elapsed();
    println!(
        "{} levels, {} lines, {} points in {took:?} (dev profile)",
        levels.len(),
        lines.len(),
        lines.iter().map(|l| l.points.len()).sum::<usize>()
    );
    // The field is single-valued at the poles (5250, between levels), so on a wrapped grid
    // no line has an end: every one is a ring.
    assert!(lines.iter().all(|l| l.closed));
    assert_well_formed(
        &lines
            .iter()
            .map(|l| Isoline {
                closed: false,
                ..l.clone()
            })
            .collect::<Vec<_>>(),
        0.25,
        0.25,
    );
}

// --- GeoJSON --------------------------------------------------------------------------------

fn meta() -> IsolineMetadata {
    IsolineMetadata {
        quantity: IsolineQuantity::Thickness {
            layer_bottom_hpa: 1000.0,
            layer_top_hpa: 500.0,
        },
        valid_time: Some("2024-01-15T12:00:00Z".into()),
        cycle: Some("demo-2024011500".into()),
    }
}

fn position(v: &Value) -> [f64; 2] {
    let a = v
        .as_array()
        .expect("a position is an array (RFC 7946 §3.1.1)");
    assert!(
        a.len() >= 2 && a.len() <= 3,
        "position of {} numbers",
        a.len()
    );
    let lon = a[0].as_f64().expect("longitude is a number");
    let lat = a[1].as_f64().expect("latitude is a number");
    assert!(
        (-180.0..=180.0).contains(&lon),
        "longitude {lon} out of range"
    );
    assert!(
        (-90.0..=90.0).contains(&lat),
        "latitude {lat} out of range (lon first?)"
    );
    for x in [lon, lat] {
        let scaled = x * 1e6;
        assert!(
            (scaled - scaled.round()).abs() < 1e-6,
            "{x} has more than 6 decimals"
        );
    }
    [lon, lat]
}

/// A LineString's coordinates: at least two positions (§3.1.4), and no step across the
/// antimeridian (§3.1.9: such lines are cut into a MultiLineString).
fn line_string(v: &Value) -> Vec<[f64; 2]> {
    let pts: Vec<[f64; 2]> = v
        .as_array()
        .expect("coordinates are an array")
        .iter()
        .map(position)
        .collect();
    assert!(pts.len() >= 2, "a LineString needs two or more positions");
    for w in pts.windows(2) {
        assert!(
            (w[0][0] - w[1][0]).abs() <= 180.0,
            "step across the antimeridian {w:?}"
        );
    }
    pts
}

/// The rules of RFC 7946 this output relies on, and the properties promised.
fn validate_rfc7946(gj: &Value) {
    assert_eq!(gj["type"], "FeatureCollection");
    let features = gj["features"]
        .as_array()
        .expect("features is an array (§3.3)");
    for f in features {
        assert_eq!(f["type"], "Feature");
        let props = f["properties"]
            .as_object()
            .expect("properties object (§3.2)");
        assert!(props["value"].is_number());
        assert_eq!(props["units"], "m");
        let q = props["quantity"].as_str().expect("quantity");
        match q {
            "thickness" => {
                assert!(props["layer_bottom_hpa"].is_number() && props["layer_top_hpa"].is_number())
            }
            "geopotential_height" => assert!(props["pressure_hpa"].is_number()),
            other => panic!("unknown quantity {other}"),
        }
        let closed = props["closed"].as_bool().expect("closed is a boolean");
        let g = &f["geometry"];
        match g["type"].as_str() {
            Some("LineString") => {
                let pts = line_string(&g["coordinates"]);
                if closed {
                    let (a, b) = (pts[0], pts[pts.len() - 1]);
                    // A ring round the pole is cut at the antimeridian: it runs from −180 to
                    // 180 at one latitude, the same place on Earth.
                    assert!(
                        a == b || (a[1] == b[1] && (a[0] - b[0]).abs() == 360.0),
                        "closed LineString from {a:?} to {b:?}"
                    );
                }
            }
            Some("MultiLineString") => {
                let parts: Vec<Vec<[f64; 2]>> = g["coordinates"]
                    .as_array()
                    .expect("coordinates are an array")
                    .iter()
                    .map(line_string)
                    .collect();
                assert!(parts.len() >= 2);
                // Parts meet on the antimeridian, end to start, on opposite sides.
                for w in parts.windows(2) {
                    let (end, start) = (w[0][w[0].len() - 1], w[1][0]);
                    assert_eq!(end[0].abs(), 180.0);
                    assert_eq!(end[0], -start[0]);
                    assert_eq!(end[1], start[1]);
                }
            }
            other => panic!("unexpected geometry type {other:?}"),
        }
    }
}

#[test]
fn geojson_follows_rfc_7946_and_cuts_at_the_antimeridian() {
    // A 0–360 regional grid over the Pacific with a bump centred on 180°: its rings cross the
    // antimeridian and become MultiLineStrings.
    let lats = axis(60.0, -1.0, 41);
    let lons = axis(150.0, 1.0, 61);
    let f = field(&lats, &lons, |x, y| {
        5400.0 + 200.0 * (-((x - 180.0).powi(2) + (y - 40.0).powi(2)) / 60.0).exp() + y
    });
    let levels = interval_levels(f.view(), 60.0, 0.0).expect("levels");
    let lines =
        isolines(f.view(), &lats, &lons, &levels, &IsolineOptions::default()).expect("lines");
    let text = to_geojson_string(&lines, &meta());
    let gj: Value = serde_json::from_str(&text).expect("valid JSON");
    validate_rfc7946(&gj);
    let features = gj["features"].as_array().expect("features");
    assert_eq!(features.len(), lines.len());
    let multi = features
        .iter()
        .filter(|f| f["geometry"]["type"] == "MultiLineString")
        .count();
    assert!(multi >= 1, "some line crosses 180°");
    let ring_multi = features
        .iter()
        .any(|f| f["geometry"]["type"] == "MultiLineString" && f["properties"]["closed"] == true);
    assert!(ring_multi, "a ring crossing 180° stays marked closed");
    let p = &features[0]["properties"];
    assert_eq!(p["quantity"], "thickness");
    assert_eq!(p["layer_bottom_hpa"], 1000.0);
    assert_eq!(p["valid_time"], "2024-01-15T12:00:00Z");
    assert_eq!(p["cycle"], "demo-2024011500");
    // Heights at a pressure carry the pressure instead.
    let heights = IsolineMetadata {
        quantity: IsolineQuantity::GeopotentialHeight {
            pressure_hpa: 500.0,
        },
        valid_time: None,
        cycle: None,
    };
    let gj = feature_collection(&lines, &heights);
    validate_rfc7946(&gj);
    let p = &gj["features"][0]["properties"];
    assert_eq!(p["quantity"], "geopotential_height");
    assert!(p.get("valid_time").is_none() && p.get("cycle").is_none());
}

#[test]
fn geojson_of_a_plane_keeps_exact_lines_within_rounding() {
    // Analytic plane on a −180..180 grid: positions are the isoline vertices rounded to six
    // decimals, so they stay within 5e-7° of the exact lines.
    let lats = axis(-10.0, 2.0, 11);
    let lons = axis(-40.0, 2.0, 21);
    let f64f = field64(&lats, &lons, |x, y| x + 2.0 * y);
    let f = f64f.mapv(|v| v as f32);
    let lines = isolines(
        f.view(),
        &lats,
        &lons,
        &[3.3, 7.7],
        &IsolineOptions::default(),
    )
    .expect("lines");
    let gj = feature_collection(&lines, &meta());
    validate_rfc7946(&gj);
    for feat in gj["features"].as_array().expect("features") {
        let value = feat["properties"]["value"].as_f64().expect("value");
        for p in line_string(&feat["geometry"]["coordinates"]) {
            // f32 storage of 3.3 and 7.7 shifts the line by up to ~1e-6.
            assert!((p[0] + 2.0 * p[1] - value).abs() < 5e-6, "{p:?}");
        }
    }
}
