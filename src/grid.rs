//! Horizontal sampling on a latitude/longitude grid: where a point falls, and bilinear or
//! nearest values there. Handles latitudes in either order, longitudes in 0..360 or
//! -180..180, and the seam of a global grid (the antimeridian or the Greenwich meridian).

use ndarray::ArrayView2;

use crate::model::Grid;

/// The four grid points around a position and their bilinear weights.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Stencil {
    /// Row indices below and above (in index order).
    pub rows: [usize; 2],
    /// Column indices left and right (in index order; the right one may wrap to 0).
    pub cols: [usize; 2],
    /// Fraction of the way from `rows[0]` to `rows[1]`, 0..=1.
    pub row_fraction: f64,
    /// Fraction of the way from `cols[0]` to `cols[1]`, 0..=1.
    pub col_fraction: f64,
}

impl Stencil {
    /// Index of the grid point nearest the position (in index space).
    pub fn nearest(&self) -> (usize, usize) {
        let r = if self.row_fraction < 0.5 {
            self.rows[0]
        } else {
            self.rows[1]
        };
        let c = if self.col_fraction < 0.5 {
            self.cols[0]
        } else {
            self.cols[1]
        };
        (r, c)
    }

    /// Bilinear value of a `[lat, lon]` field; `None` if any of the four points is missing,
    /// so that a masked point never leaks into its neighbours' interpolated values.
    pub fn bilinear(&self, field: ArrayView2<'_, f32>) -> Option<f64> {
        let mut sum = 0.0;
        for (a, wr) in [(0, 1.0 - self.row_fraction), (1, self.row_fraction)] {
            for (b, wc) in [(0, 1.0 - self.col_fraction), (1, self.col_fraction)] {
                let v = f64::from(*field.get([self.rows[a], self.cols[b]])?);
                if !v.is_finite() {
                    return None;
                }
                sum += wr * wc * v;
            }
        }
        Some(sum)
    }
}

/// Why a position cannot be sampled.
#[derive(Clone, Debug, PartialEq, thiserror::Error)]
pub enum SampleError {
    /// Latitude outside -90..90 or not a number.
    #[error("latitude {0} is not a latitude: expected -90 to 90 degrees")]
    BadLatitude(f64),
    /// Longitude not finite.
    #[error("longitude {0} is not a finite number of degrees")]
    BadLongitude(f64),
    /// The position lies outside a regional grid.
    #[error("position {lat}, {lon} lies outside the grid (latitude {lat_min}..{lat_max}, longitude {lon_min}..{lon_max})")]
    OutsideGrid {
        /// Latitude asked for.
        lat: f64,
        /// Longitude asked for.
        lon: f64,
        /// Grid's southern edge.
        lat_min: f64,
        /// Grid's northern edge.
        lat_max: f64,
        /// Grid's western edge.
        lon_min: f64,
        /// Grid's eastern edge.
        lon_max: f64,
    },
}

/// True when the columns go all the way round, so the last column neighbours the first.
pub fn is_global_in_longitude(grid: &Grid) -> bool {
    let n = grid.cols();
    if n < 2 {
        return false;
    }
    let step = (grid.longitudes[n - 1] - grid.longitudes[0]) / (n - 1) as f64;
    ((n as f64) * step - 360.0).abs() < 1e-6 * 360.0 + step.abs() * 1e-3
}

/// Finds the stencil around a position.
pub fn locate(grid: &Grid, lat: f64, lon: f64) -> Result<Stencil, SampleError> {
    if !(-90.0..=90.0).contains(&lat) {
        return Err(SampleError::BadLatitude(lat));
    }
    if !lon.is_finite() {
        return Err(SampleError::BadLongitude(lon));
    }
    let outside = || {
        let (lat_min, lat_max) = min_max(&grid.latitudes);
        let (lon_min, lon_max) = min_max(&grid.longitudes);
        SampleError::OutsideGrid {
            lat,
            lon,
            lat_min,
            lat_max,
            lon_min,
            lon_max,
        }
    };
    let (rows, row_fraction) = bracket(&grid.latitudes, lat).ok_or_else(outside)?;
    let n = grid.cols();
    let first = *grid.longitudes.first().ok_or_else(outside)?;
    // Bring the longitude into [first, first + 360).
    let lon_n = first + (lon - first).rem_euclid(360.0);
    let (cols, col_fraction) = match bracket(&grid.longitudes, lon_n) {
        Some(found) => found,
        None if is_global_in_longitude(grid) => {
            let last = grid.longitudes[n - 1];
            let f = (lon_n - last) / (first + 360.0 - last);
            ([n - 1, 0], f.clamp(0.0, 1.0))
        }
        None => return Err(outside()),
    };
    Ok(Stencil {
        rows,
        cols,
        row_fraction,
        col_fraction,
    })
}

fn min_max(v: &[f64]) -> (f64, f64) {
    v.iter()
        .fold((f64::INFINITY, f64::NEG_INFINITY), |(lo, hi), &x| {
            (lo.min(x), hi.max(x))
        })
}

/// Indices and fraction of `x` between neighbours of a monotonic axis (either direction).
fn bracket(axis: &[f64], x: f64) -> Option<([usize; 2], f64)> {
    let n = axis.len();
    if n == 1 {
        return ((axis[0] - x).abs() < 1e-9).then_some(([0, 0], 0.0));
    }
    let ascending = axis[n - 1] >= axis[0];
    // Index of the first element past x in the axis direction.
    let past = axis.partition_point(|&a| if ascending { a <= x } else { a >= x });
    let i = match past {
        0 => {
            return ((axis[0] - x).abs() < 1e-9).then_some(([0, 1], 0.0));
        }
        p if p >= n => {
            return ((axis[n - 1] - x).abs() < 1e-9).then_some(([n - 2, n - 1], 1.0));
        }
        p => p - 1,
    };
    let f = (x - axis[i]) / (axis[i + 1] - axis[i]);
    Some(([i, i + 1], f.clamp(0.0, 1.0)))
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::Array2;

    fn grid(lats: Vec<f64>, lons: Vec<f64>) -> Grid {
        Grid {
            latitudes: lats,
            longitudes: lons,
        }
    }

    #[test]
    fn bilinear_reproduces_a_plane_in_either_latitude_order() {
        // A plane in (lat, lon) is reproduced exactly by bilinear interpolation.
        let lats: Vec<f64> = (0..5).map(|i| 40.0 + i as f64).collect();
        let lons: Vec<f64> = (0..6).map(|i| -10.0 + 2.0 * i as f64).collect();
        for flip in [false, true] {
            let mut la = lats.clone();
            if flip {
                la.reverse();
            }
            let g = grid(la.clone(), lons.clone());
            let f = Array2::from_shape_fn((5, 6), |(r, c)| (3.0 * la[r] - 0.5 * lons[c]) as f32);
            let st = locate(&g, 42.3, -3.1).unwrap();
            let v = st.bilinear(f.view()).unwrap();
            assert!((v - (3.0 * 42.3 + 0.5 * 3.1)).abs() < 1e-4, "{v}");
        }
    }

    #[test]
    fn global_grid_wraps_across_its_seam() {
        let lons: Vec<f64> = (0..8).map(|i| 45.0 * i as f64).collect();
        let g = grid(vec![-10.0, 10.0], lons);
        assert!(is_global_in_longitude(&g));
        let st = locate(&g, 0.0, -22.5).unwrap();
        assert_eq!(st.cols, [7, 0]);
        assert!((st.col_fraction - 0.5).abs() < 1e-12);
        let same = locate(&g, 0.0, 337.5).unwrap();
        assert_eq!(st, same);
    }

    #[test]
    fn regional_grid_rejects_outside_points_and_bad_coordinates() {
        let g = grid(vec![50.0, 51.0], vec![10.0, 11.0]);
        assert!(matches!(
            locate(&g, 52.0, 10.5),
            Err(SampleError::OutsideGrid { .. })
        ));
        assert!(matches!(
            locate(&g, f64::NAN, 10.5),
            Err(SampleError::BadLatitude(_))
        ));
        assert!(matches!(
            locate(&g, 50.5, f64::INFINITY),
            Err(SampleError::BadLongitude(_))
        ));
        // -350 degrees east is 10 degrees east.
        assert!(locate(&g, 50.5, -349.5).is_ok());
        // A point on the edge is inside.
        assert!(locate(&g, 51.0, 11.0).is_ok());
    }

    #[test]
    fn a_missing_corner_masks_the_interpolated_value() {
        let g = grid(vec![0.0, 1.0], vec![0.0, 1.0]);
        let mut f = Array2::from_elem((2, 2), 1.0f32);
        f[[1, 1]] = f32::NAN;
        assert_eq!(locate(&g, 0.2, 0.2).unwrap().bilinear(f.view()), None);
        assert_eq!(locate(&g, 0.2, 0.2).unwrap().nearest(), (0, 0));
    }
}
