//! Heights on hybrid sigma-pressure model levels, by the vertical discretisation of
//! Simmons and Burridge (1981) as written in the IFS documentation, Part III.
//!
//! Half-level pressure `p_{k+½} = A_{k+½} + B_{k+½} p_s` (CF
//! `atmosphere_hybrid_sigma_pressure_coordinate`). Indexing here is bottom-up: half level 0 is
//! the surface (`A = 0`, `B = 1`), half level `n` the model top, and full level `k` lies
//! between half levels `k` and `k + 1`.

use super::column::{usable_tv, ColumnNodes};
use super::constants::Constants;
use super::hypsometric::standard_lapse_extrapolated_temperature;

/// Half-level pressures of one column.
///
/// # Units
/// - `a_half_pa`: A at the half levels, Pa; `b_half`: B, dimensionless
/// - `surface_pressure_pa`: Pa
/// - `out`: Pa; filled for the first `min(len)` entries of the three slices
///
/// # Method
/// `p_{k+½} = A_{k+½} + B_{k+½} p_s`.
///
/// # References
/// CF Conventions 1.11, Appendix D, `atmosphere_hybrid_sigma_pressure_coordinate`;
/// Simmons, A. J. and Burridge, D. M. (1981), *Mon. Wea. Rev.* 109, 758–766.
pub fn hybrid_half_level_pressures(
    a_half_pa: &[f64],
    b_half: &[f64],
    surface_pressure_pa: f64,
    out: &mut [f64],
) {
    for ((o, &a), &b) in out.iter_mut().zip(a_half_pa).zip(b_half) {
        *o = a + b * surface_pressure_pa;
    }
}

/// One full level of the sums of [`ColumnNodes::hybrid`]: from the pressures of its lower
/// and upper half levels (Pa), its virtual temperature (K), the height of its lower half
/// level and R_d/g0, the height of the full level and of its upper half level (`NaN` for
/// the model top at p = 0, where α = ln 2 as in the IFS).
#[inline]
pub(crate) fn full_level(lower: f64, upper: f64, tv: f64, z_lower: f64, rd_g0: f64) -> (f64, f64) {
    let (alpha, z_upper) = if upper == 0.0 {
        // The model top at p = 0: α = ln 2 (IFS Part III), no finite half-level height.
        (std::f64::consts::LN_2, f64::NAN)
    } else {
        let ln_ratio = (lower / upper).ln();
        let alpha = 1.0 - upper / (lower - upper) * ln_ratio;
        (alpha, z_lower + rd_g0 * tv * ln_ratio)
    };
    (z_lower + alpha * rd_g0 * tv, z_upper)
}

impl ColumnNodes {
    /// Hybrid column. `a_half_pa`, `b_half` bottom-up (len n+1, index 0 = surface half level),
    /// `tv_full` (len n, bottom-up), surface pressure and surface geopotential height.
    /// Writes full-level heights into `z_full_out` (len n) and half-level heights into
    /// `z_half_out` (len n+1); nodes = surface + full levels (full-level pressure
    /// 0.5*(p_{k-1/2}+p_{k+1/2}) as node pressure) so height_at_pressure works on it.
    /// Missing Tv masks that level and above. Top level: alpha = ln 2 (p_top_half may be 0).
    ///
    /// Details of this implementation:
    /// - α = ln 2 is used where the top half-level pressure is 0, as in the IFS; a model top
    ///   at a positive pressure gets the general α of its layer, which is then well defined.
    /// - The half level at `p = 0` has no finite height: `NaN` in `z_half_out`.
    /// - The surface node's virtual temperature (used only to interpolate between the surface
    ///   and the lowest full level, and to extrapolate below ground) is the lowest full level's
    ///   extrapolated to `p_s` at 6.5 K/km, as for isobaric columns.
    /// - Slices of the wrong lengths, a non-finite `p_s` or `z_s`, or half-level pressures that
    ///   do not strictly decrease upward mask everything and leave no nodes.
    ///
    /// # Units
    /// - pressures Pa, `tv_full` K, heights geopotential metres
    ///
    /// # Method
    /// `Z_{k+½} = Z_s + (R_d/g0) Σ_{j≤k} T_v,j ln(p_{j−½}/p_{j+½})` over the layers below, and
    /// `Z_k = Z_{k−½} + α_k (R_d/g0) T_v,k` with
    /// `α_k = 1 − p_{k+½}/Δp_k · ln(p_{k−½}/p_{k+½})` (here `k−½` is the lower half level).
    ///
    /// # References
    /// Simmons, A. J. and Burridge, D. M. (1981), An energy and angular-momentum conserving
    /// vertical finite-difference scheme and hybrid vertical coordinates, *Mon. Wea. Rev.* 109,
    /// 758–766; ECMWF, *IFS Documentation, Part III: Dynamics and numerical procedures*,
    /// §2 (the vertical discretisation; equation numbers differ between cycles).
    #[allow(clippy::too_many_arguments)]
    pub fn hybrid(
        &mut self,
        a_half_pa: &[f64],
        b_half: &[f64],
        tv_full: &[f64],
        surface_pressure_pa: f64,
        surface_height_m: f64,
        c: &Constants,
        z_full_out: &mut [f64],
        z_half_out: &mut [f64],
    ) {
        self.clear();
        z_full_out.fill(f64::NAN);
        z_half_out.fill(f64::NAN);
        let n = tv_full.len();
        let ps = surface_pressure_pa;
        let zs = surface_height_m;
        if n == 0
            || a_half_pa.len() != n + 1
            || b_half.len() != n + 1
            || z_full_out.len() != n
            || z_half_out.len() != n + 1
            || !(ps.is_finite() && ps > 0.0 && zs.is_finite())
        {
            return;
        }
        let mut half = std::mem::take(&mut self.scratch_half_pa);
        half.clear();
        half.extend(a_half_pa.iter().zip(b_half).map(|(&a, &b)| a + b * ps));
        let ordered = half[0] > 0.0
            && half[n] >= 0.0
            && half.iter().all(|p| p.is_finite())
            && half.windows(2).all(|w| w[0] > w[1]);
        if ordered {
            self.hybrid_layers(&half, tv_full, ps, zs, c, z_full_out, z_half_out);
        }
        self.scratch_half_pa = half;
    }

    #[allow(clippy::too_many_arguments)]
    fn hybrid_layers(
        &mut self,
        half: &[f64],
        tv_full: &[f64],
        ps: f64,
        zs: f64,
        c: &Constants,
        z_full_out: &mut [f64],
        z_half_out: &mut [f64],
    ) {
        let n = tv_full.len();
        z_half_out[0] = zs;
        if !usable_tv(tv_full[0]) {
            return;
        }
        let rd_g0 = c.rd_over_g0();
        let p_full0 = 0.5 * (half[0] + half[1]);
        let tv_s = standard_lapse_extrapolated_temperature(tv_full[0], p_full0, ps, c);
        self.surface_node = Some(0);
        self.push(ps, tv_s, zs, false);

        let mut z_lower = zs;
        let mut masked = false;
        for k in 0..n {
            let lower = half[k];
            let upper = half[k + 1];
            let p_full = 0.5 * (lower + upper);
            let tv = tv_full[k];
            if masked || !usable_tv(tv) {
                masked = true;
                self.push(p_full, f64::NAN, f64::NAN, false);
                continue;
            }
            let (z_full, z_upper) = full_level(lower, upper, tv, z_lower, rd_g0);
            self.push(p_full, tv, z_full, false);
            z_full_out[k] = z_full;
            z_half_out[k + 1] = z_upper;
            z_lower = z_upper;
        }
        let valid_end = self
            .height_m
            .iter()
            .position(|z| z.is_nan())
            .unwrap_or(self.len());
        self.valid = 0..valid_end;
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::physics::column::thickness_between;
    use crate::physics::hypsometric::{polytropic_pressure_at_height, scale_height};

    /// Hybrid coefficients for `n` levels with a realistic shape, generated here (test data,
    /// not any model's table): layers thin near the ground and the top and thickest in the
    /// middle (`η = 1 − (0.3 s + 0.7 (3s² − 2s³))`), pure pressure above about 80 hPa
    /// (B = 0), terrain following near the ground, and the model top at p = 0.
    fn hybrid_coefficients(n: usize) -> (Vec<f64>, Vec<f64>) {
        let p_ref = 101_325.0;
        let mut a = Vec::with_capacity(n + 1);
        let mut b = Vec::with_capacity(n + 1);
        for k in 0..=n {
            let s = k as f64 / n as f64;
            let eta = 1.0 - (0.3 * s + 0.7 * (3.0 * s * s - 2.0 * s * s * s));
            let bk = if k == 0 {
                1.0
            } else {
                ((eta - 0.08) / 0.92).max(0.0).powf(1.5)
            };
            let ak = if k == 0 {
                0.0
            } else {
                p_ref * eta - bk * p_ref
            };
            a.push(ak);
            b.push(bk);
        }
        (a, b)
    }

    fn full_pressures(a: &[f64], b: &[f64], ps: f64) -> (Vec<f64>, Vec<f64>) {
        let mut half = vec![0.0; a.len()];
        hybrid_half_level_pressures(a, b, ps, &mut half);
        let full = half.windows(2).map(|w| 0.5 * (w[0] + w[1])).collect();
        (half, full)
    }

    #[test]
    fn half_level_pressures_are_a_plus_b_ps() {
        let mut out = [0.0; 3];
        hybrid_half_level_pressures(&[0.0, 2000.0, 0.0], &[1.0, 0.5, 0.0], 90_000.0, &mut out);
        assert_eq!(out, [90_000.0, 47_000.0, 0.0]);
    }

    #[test]
    fn isothermal_column_half_levels_are_exact() {
        // Isothermal: Z(p) = Z_s + H ln(p_s/p) (Wallace & Hobbs 2006, §3.2.2, closed form).
        let c = Constants::default();
        let n = 60;
        let (a, b) = hybrid_coefficients(n);
        let ps = 96_000.0;
        let zs = 420.0;
        let tv = vec![250.0; n];
        let mut nodes = ColumnNodes::with_capacity(n);
        let mut zf = vec![0.0; n];
        let mut zh = vec![0.0; n + 1];
        nodes.hybrid(&a, &b, &tv, ps, zs, &c, &mut zf, &mut zh);
        let (half, _) = full_pressures(&a, &b, ps);
        let h = scale_height(250.0, &c);
        assert_eq!(zh[0], zs);
        for k in 1..n {
            let exact = zs + h * (ps / half[k]).ln();
            assert!(
                (zh[k] - exact).abs() < 1e-8,
                "half {k}: {} vs {exact}",
                zh[k]
            );
        }
        assert!(zh[n].is_nan()); // p = 0 at the top
                                 // Full levels lie strictly between their half levels; the top one at α = ln 2.
        for k in 0..n - 1 {
            assert!(zf[k] > zh[k] && zf[k] < zh[k + 1]);
        }
        assert!((zf[n - 1] - (zh[n - 1] + std::f64::consts::LN_2 * h)).abs() < 1e-9);
    }

    #[test]
    fn model_top_above_zero_pressure_uses_the_layer_alpha() {
        // A top half level at 10 hPa: the general α of Simmons & Burridge (1981) is defined
        // there, and the top half level has a finite height (isothermal closed form).
        let c = Constants::default();
        let a = [0.0, 20_000.0, 5_000.0, 1_000.0];
        let b = [1.0, 0.6, 0.1, 0.0];
        let ps = 100_000.0;
        let tv = [260.0; 3];
        let mut nodes = ColumnNodes::with_capacity(3);
        let mut zf = [0.0; 3];
        let mut zh = [0.0; 4];
        nodes.hybrid(&a, &b, &tv, ps, 0.0, &c, &mut zf, &mut zh);
        let h = scale_height(260.0, &c);
        assert!((zh[3] - h * (ps / 1_000.0f64).ln()).abs() < 1e-8);
        let (lower, upper) = (15_000.0f64, 1_000.0f64);
        let alpha = 1.0 - upper / (lower - upper) * (lower / upper).ln();
        assert!((zf[2] - (zh[2] + alpha * h)).abs() < 1e-9);
    }

    /// Largest height error of the full and half levels of a 6.5 K/km column on `n` levels,
    /// against the closed form of the polytrope.
    fn polytropic_errors(n: usize) -> (f64, f64) {
        let c = Constants::default();
        let (a, b) = hybrid_coefficients(n);
        let ps = 100_000.0;
        let zs = 0.0;
        let tv_s = 290.0;
        let gamma = 0.0065;
        let kappa = c.rd_over_g0() * gamma;
        // Closed form: Tv(p) = Tv_s (p/p_s)^κ and Z(p) = (Tv_s − Tv(p)) / Γ.
        let tv_at = |p: f64| tv_s * (p / ps).powf(kappa);
        let z_at = |p: f64| (tv_s - tv_at(p)) / gamma;
        let (half, full) = full_pressures(&a, &b, ps);
        // Stop at 100 hPa, where a 6.5 K/km troposphere would be far too cold to be realistic.
        let m = full.iter().position(|&p| p < 10_000.0).unwrap();
        let tv: Vec<f64> = full.iter().map(|&p| tv_at(p)).collect();
        let mut nodes = ColumnNodes::with_capacity(n);
        let mut zf = vec![0.0; n];
        let mut zh = vec![0.0; n + 1];
        nodes.hybrid(&a, &b, &tv, ps, zs, &c, &mut zf, &mut zh);
        let full_err = (0..m)
            .map(|k| (zf[k] - z_at(full[k])).abs())
            .fold(0.0, f64::max);
        let half_err = (1..m)
            .map(|k| (zh[k] - z_at(half[k])).abs())
            .fold(0.0, f64::max);
        // The closed-form pressure at the surface node's height is p_s (sanity of the helper).
        assert!((polytropic_pressure_at_height(ps, tv_s, gamma, 0.0, &c) - ps).abs() < 1e-9);
        (full_err, half_err)
    }

    #[test]
    fn polytropic_column_on_hybrid_levels_converges_to_closed_form() {
        // Simmons–Burridge takes T_v constant across each layer for the half levels and places
        // the full level by α, neither of which is exact for a polytrope (T_v linear in z):
        // the half-level sum uses the full-level T_v instead of the layer's log mean (second
        // order in the layer depth), and the full level is placed for an isothermal layer.
        // At full levels the comparison is with the closed form at the node pressure
        // (p_{k-1/2} + p_{k+1/2})/2, which the α placement matches only to second order in the
        // layer's ln p depth even for an isothermal layer. Measured on the generated levels up to
        // 100 hPa (30 / 60 / 120 levels): full levels 13.6 / 3.7 / 0.96 m, half levels
        // 5.5 / 1.6 / 0.45 m. The errors shrink about fourfold (second order) each time the
        // number of levels doubles; the tolerances below sit a little above what was measured.
        let (f30, h30) = polytropic_errors(30);
        let (f60, h60) = polytropic_errors(60);
        let (f120, h120) = polytropic_errors(120);
        eprintln!("full {f30:.4} {f60:.4} {f120:.4}  half {h30:.4} {h60:.4} {h120:.4}");
        assert!(f60 < 4.0 && h60 < 1.8, "60 levels: full {f60} half {h60}");
        assert!(
            f120 < f60 && f60 < f30,
            "full-level error must shrink: {f30} {f60} {f120}"
        );
        assert!(
            h120 < h60 && h60 < h30,
            "half-level error must shrink: {h30} {h60} {h120}"
        );
        assert!(f120 < 0.3 * f60 && h120 < 0.3 * h60, "not second order");
        assert!(f60 < 0.3 * f30 && h60 < 0.3 * h30, "not second order");
    }

    #[test]
    fn hybrid_column_supports_queries_and_masking() {
        let c = Constants::default();
        let n = 60;
        let (a, b) = hybrid_coefficients(n);
        let ps = 98_000.0;
        let zs = 250.0;
        let mut tv: Vec<f64> = (0..n).map(|k| 288.0 - 1.2 * k as f64).collect();
        let mut nodes = ColumnNodes::with_capacity(n);
        let mut zf = vec![0.0; n];
        let mut zh = vec![0.0; n + 1];
        nodes.hybrid(&a, &b, &tv, ps, zs, &c, &mut zf, &mut zh);
        let (_, full) = full_pressures(&a, &b, ps);
        // Node heights are reproduced by the interpolation.
        for k in [0, 10, 30, 59] {
            let h = nodes.height_at_pressure(full[k], &c).unwrap();
            assert!((h.height_m - zf[k]).abs() < 1e-9);
            assert!(!h.below_ground);
        }
        assert_eq!(nodes.height_at_pressure(ps, &c).unwrap().height_m, zs);
        let below = nodes.height_at_pressure(ps + 2000.0, &c).unwrap();
        assert!(below.below_ground && below.height_m < zs);
        // Heights increase upward and thickness is additive.
        assert!(zf.windows(2).all(|w| w[1] > w[0]));
        let t1 = thickness_between(&nodes, 85_000.0, 70_000.0, &c).unwrap();
        let t2 = thickness_between(&nodes, 70_000.0, 50_000.0, &c).unwrap();
        let t3 = thickness_between(&nodes, 85_000.0, 50_000.0, &c).unwrap();
        assert!((t1 + t2 - t3).abs() < 1e-9);
        // A missing level masks itself and everything above, nothing below.
        tv[20] = f64::NAN;
        nodes.hybrid(&a, &b, &tv, ps, zs, &c, &mut zf, &mut zh);
        assert!(zf[..20].iter().all(|z| z.is_finite()));
        assert!(zf[20..].iter().all(|z| z.is_nan()));
        assert!(zh[..=20].iter().all(|z| z.is_finite()));
        assert!(zh[21..].iter().all(|z| z.is_nan()));
        assert!(nodes.height_at_pressure(full[25], &c).is_none());
        // Bad surface values and wrong lengths mask everything without panicking.
        nodes.hybrid(&a, &b, &tv, f64::NAN, zs, &c, &mut zf, &mut zh);
        assert!(zf.iter().chain(&zh).all(|z| z.is_nan()));
        assert!(nodes.height_at_pressure(90_000.0, &c).is_none());
        nodes.hybrid(&a[..n], &b, &tv, ps, zs, &c, &mut zf, &mut zh);
        assert!(zf.iter().all(|z| z.is_nan()));
    }
}
