//! Isolines as an RFC 7946 GeoJSON FeatureCollection.
//!
//! One Feature per [`Isoline`]. Its geometry is a `LineString` (a ring is a `LineString`
//! whose first and last positions are equal), or a `MultiLineString` when the line crosses the
//! antimeridian and is split there (RFC 7946 §3.1.9). Positions are `[longitude, latitude]`
//! (§3.1.1) with longitudes in −180..180 and at most six decimals (about 0.1 m; §11.2 advises
//! against needless precision).
//!
//! Properties of every Feature: `value` (the level), `quantity` (`"thickness"` with
//! `layer_bottom_hpa` and `layer_top_hpa`, or `"geopotential_height"` with `pressure_hpa`),
//! `units` (`"m"`), `closed`, and `valid_time` (RFC 3339) and `cycle` when known. A ring split
//! at the antimeridian keeps `closed: true`: its parts join end to end, across the
//! antimeridian, into the ring.
//!
//! [`Isoline`]: crate::products::isolines::Isoline

use serde_json::{json, Map, Value};

use super::isolines::Isoline;

/// Decimal places kept in positions.
const DECIMALS: i32 = 6;

/// What the isolines are lines of.
#[derive(Debug, Clone, PartialEq)]
pub enum IsolineQuantity {
    /// Thickness of a layer between two pressures, geopotential metres.
    Thickness {
        /// Pressure at the bottom of the layer, hPa.
        layer_bottom_hpa: f64,
        /// Pressure at the top of the layer, hPa.
        layer_top_hpa: f64,
    },
    /// Geopotential height of an isobaric surface, geopotential metres.
    GeopotentialHeight {
        /// Pressure of the surface, hPa.
        pressure_hpa: f64,
    },
}

/// What the caller knows about the lines, copied into every Feature's properties.
#[derive(Debug, Clone, PartialEq)]
pub struct IsolineMetadata {
    /// The quantity and its layer or level.
    pub quantity: IsolineQuantity,
    /// Valid time, RFC 3339 (`2024-01-15T12:00:00Z`), when known.
    pub valid_time: Option<String>,
    /// Identifier of the forecast cycle, when known.
    pub cycle: Option<String>,
}

/// The FeatureCollection of `lines`, as a JSON value. Lines that have fewer than two distinct
/// positions once rounded are left out.
pub fn feature_collection(lines: &[Isoline], meta: &IsolineMetadata) -> Value {
    let features: Vec<Value> = lines
        .iter()
        .filter_map(|line| {
            let parts = split_at_antimeridian(&line.points, line.closed);
            let geometry = match parts.len() {
                0 => return None,
                1 => json!({ "type": "LineString", "coordinates": positions(&parts[0]) }),
                _ => json!({
                    "type": "MultiLineString",
                    "coordinates": parts.iter().map(|p| positions(p)).collect::<Vec<_>>(),
                }),
            };
            Some(json!({
                "type": "Feature",
                "geometry": geometry,
                "properties": properties(line, meta),
            }))
        })
        .collect();
    json!({ "type": "FeatureCollection", "features": features })
}

/// The FeatureCollection of `lines` as compact JSON text.
pub fn to_geojson_string(lines: &[Isoline], meta: &IsolineMetadata) -> String {
    feature_collection(lines, meta).to_string()
}

fn properties(line: &Isoline, meta: &IsolineMetadata) -> Value {
    let mut p = Map::new();
    p.insert("value".into(), json!(line.value));
    match meta.quantity {
        IsolineQuantity::Thickness {
            layer_bottom_hpa,
            layer_top_hpa,
        } => {
            p.insert("quantity".into(), json!("thickness"));
            p.insert("layer_bottom_hpa".into(), json!(layer_bottom_hpa));
            p.insert("layer_top_hpa".into(), json!(layer_top_hpa));
        }
        IsolineQuantity::GeopotentialHeight { pressure_hpa } => {
            p.insert("quantity".into(), json!("geopotential_height"));
            p.insert("pressure_hpa".into(), json!(pressure_hpa));
        }
    }
    p.insert("units".into(), json!("m"));
    if let Some(t) = &meta.valid_time {
        p.insert("valid_time".into(), json!(t));
    }
    if let Some(c) = &meta.cycle {
        p.insert("cycle".into(), json!(c));
    }
    p.insert("closed".into(), json!(line.closed));
    Value::Object(p)
}

fn positions(part: &[[f64; 2]]) -> Vec<Value> {
    part.iter().map(|p| json!([p[0], p[1]])).collect()
}

fn round(x: f64) -> f64 {
    let f = 10f64.powi(DECIMALS);
    let r = (x * f).round() / f;
    // No negative zero in the output.
    if r == 0.0 {
        0.0
    } else {
        r
    }
}

/// Which 360° frame a longitude is in: frame `k` maps to −180..180 by subtracting `360 k`.
fn frame(lon: f64) -> f64 {
    ((lon + 180.0) / 360.0).floor()
}

/// Splits a line (longitudes continuous, any frame) where it crosses ±180° and maps every
/// part to −180..180, rounded. The crossing point is interpolated linearly in longitude, as
/// the line is straight between its positions on an equirectangular map. A ring that crosses
/// is rotated so that its parts start and end on the antimeridian.
pub fn split_at_antimeridian(points: &[[f64; 2]], closed: bool) -> Vec<Vec<[f64; 2]>> {
    let mut parts: Vec<Vec<[f64; 2]>> = Vec::new();
    let mut cur: Vec<[f64; 2]> = Vec::new();
    let push = |part: &mut Vec<[f64; 2]>, p: [f64; 2]| {
        let p = [round(p[0]), round(p[1])];
        if part.last() != Some(&p) {
            part.push(p);
        }
    };
    let mut k = 0.0;
    for w in points.windows(2) {
        let (p, q) = (w[0], w[1]);
        let (lo, hi) = if p[0] <= q[0] {
            (p[0], q[0])
        } else {
            (q[0], p[0])
        };
        // The first antimeridian (180° + 360° m) above `lo`.
        let boundary = 180.0 + 360.0 * frame(lo);
        if boundary < hi {
            // The segment crosses the antimeridian strictly inside: cut it there.
            let k_lo = frame(lo);
            let (kp, kq) = if p[0] < q[0] {
                (k_lo, k_lo + 1.0)
            } else {
                (k_lo + 1.0, k_lo)
            };
            if cur.is_empty() {
                push(&mut cur, [p[0] - 360.0 * kp, p[1]]);
            }
            let t = (boundary - p[0]) / (q[0] - p[0]);
            let lat = p[1] + t * (q[1] - p[1]);
            push(&mut cur, [boundary - 360.0 * kp, lat]);
            parts.push(std::mem::take(&mut cur));
            push(&mut cur, [boundary - 360.0 * kq, lat]);
            k = kq;
        } else {
            // Within one frame; a point exactly on the antimeridian takes the frame of the
            // segment, so that it is +180 or −180 on the side of its part.
            let seg = frame(0.5 * (lo + hi));
            if cur.is_empty() {
                push(&mut cur, [p[0] - 360.0 * seg, p[1]]);
            } else if seg != k {
                parts.push(std::mem::take(&mut cur));
                push(&mut cur, [p[0] - 360.0 * seg, p[1]]);
            }
            k = seg;
        }
        push(&mut cur, [q[0] - 360.0 * k, q[1]]);
    }
    parts.push(cur);
    if closed && parts.len() > 1 {
        let head = &parts[0];
        let tail = &parts[parts.len() - 1];
        let joins = match (tail.last(), head.first()) {
            (Some(a), Some(b)) => (a[0] - b[0]).abs() < 1e-9 && (a[1] - b[1]).abs() < 1e-9,
            _ => false,
        };
        if joins {
            let head = parts.remove(0);
            if let Some(tail) = parts.last_mut() {
                tail.extend(head.into_iter().skip(1));
            }
        }
    }
    parts.retain(|p| p.len() >= 2);
    parts
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_line_across_the_antimeridian_is_cut_there() {
        // Analytic: the straight line from (170, 10) to (190, 20) meets 180° at latitude 15.
        let parts = split_at_antimeridian(&[[170.0, 10.0], [190.0, 20.0]], false);
        assert_eq!(
            parts,
            vec![
                vec![[170.0, 10.0], [180.0, 15.0]],
                vec![[-180.0, 15.0], [-170.0, 20.0]]
            ]
        );
    }

    #[test]
    fn a_ring_round_the_pole_becomes_one_part() {
        let points: Vec<[f64; 2]> = (0..=36).map(|k| [k as f64 * 10.0 + 5.0, 60.0]).collect();
        let parts = split_at_antimeridian(&points, true);
        assert_eq!(parts.len(), 1);
        let p = &parts[0];
        assert_eq!(p[0], [-180.0, 60.0]);
        assert_eq!(p[p.len() - 1], [180.0, 60.0]);
        assert!(p.iter().all(|q| (-180.0..=180.0).contains(&q[0])));
    }

    #[test]
    fn a_crossing_short_of_the_midpoint_is_still_cut() {
        // Analytic: from (178, 0) to (180.5, 5) the line meets 180° at latitude 4.
        let parts = split_at_antimeridian(&[[178.0, 0.0], [180.5, 5.0]], false);
        assert_eq!(
            parts,
            vec![
                vec![[178.0, 0.0], [180.0, 4.0]],
                vec![[-180.0, 4.0], [-179.5, 5.0]]
            ]
        );
    }

    #[test]
    fn a_point_on_the_antimeridian_takes_its_segment_side() {
        let parts = split_at_antimeridian(&[[178.0, 0.0], [180.0, 1.0], [182.0, 2.0]], false);
        assert_eq!(
            parts,
            vec![
                vec![[178.0, 0.0], [180.0, 1.0]],
                vec![[-180.0, 1.0], [-178.0, 2.0]]
            ]
        );
    }
}
