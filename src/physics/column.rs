//! Heights of an isobaric column, and interpolation on any built column of nodes.
//!
//! A column is built into a [`ColumnNodes`], a scratch buffer the caller keeps and reuses:
//! once its vectors have grown to the number of levels, building another column allocates
//! nothing. The nodes are the points where pressure, virtual temperature and height are all
//! known; between two nodes the virtual temperature is taken to vary linearly with height
//! (a polytropic layer), which is the assumption of the layer integration itself, so that
//! interpolating a column and integrating it are one and the same model.
//!
//! [`ColumnNodes`]: crate::physics::column::ColumnNodes

use std::ops::Range;

use super::constants::{Constants, STANDARD_LAPSE_RATE};
use super::hypsometric::{
    logarithmic_mean_temperature, neg_ln_one_minus_over, one_minus_exp_neg_over,
    polytropic_pressure_at_height,
};

/// How the heights of a column are tied to the ground.
#[derive(Clone, Copy, Debug, PartialEq)]
pub enum ColumnAnchor {
    /// Integrate from the surface: surface pressure (Pa) and surface geopotential height (m).
    Surface {
        /// Surface pressure, Pa.
        pressure_pa: f64,
        /// Surface geopotential height, geopotential metres.
        height_m: f64,
    },
    /// No surface fields: the height of one level (index into the bottom-up levels) is known,
    /// e.g. the file's own height there; integrate up and down from it. Nothing is below ground.
    LevelHeight {
        /// Index of the level, bottom-up.
        level: usize,
        /// Its geopotential height, geopotential metres.
        height_m: f64,
    },
}

/// A height found on a column, and whether it lies below the ground.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct HeightAtPressure {
    /// Geopotential height, geopotential metres.
    pub height_m: f64,
    /// True where the pressure exceeds the surface pressure (a below-ground convention).
    pub below_ground: bool,
}

/// Nodes of a column in a caller-provided scratch buffer: pressures (Pa, strictly decreasing),
/// virtual temperatures (K) and heights (gpm) of every node, and for each node whether it lies
/// below ground. For a Surface anchor the surface is one of the nodes (inserted in pressure order).
///
/// Masked nodes (above a missing temperature, or below one for a
/// [`ColumnAnchor::LevelHeight`] anchor) stay in the vectors with `NaN` virtual temperature
/// and height, so that node `i` keeps its place; queries that need them answer `None`.
#[derive(Clone, Debug, Default)]
pub struct ColumnNodes {
    /// Pressure of each node, Pa, strictly decreasing (bottom-up).
    pub pressure_pa: Vec<f64>,
    /// Virtual temperature of each node, K (`NaN` where masked).
    pub tv_k: Vec<f64>,
    /// Geopotential height of each node, geopotential metres (`NaN` where masked).
    pub height_m: Vec<f64>,
    /// Whether each node lies below ground (pressure above the surface pressure).
    pub below_ground: Vec<bool>,
    /// Node indices whose heights are valid (masking leaves one contiguous run).
    pub(super) valid: Range<usize>,
    /// Index of the surface node, when the column was built from the surface.
    pub(super) surface_node: Option<usize>,
    /// Level pressures the cached logarithms belong to.
    cached_levels: Vec<f64>,
    /// `ln p` of each cached level.
    cached_ln_p: Vec<f64>,
    /// `ln(p[i-1] / p[i])` for each cached level (0 at index 0).
    cached_ln_ratio: Vec<f64>,
    /// Whether the cached levels are finite, positive and strictly decreasing.
    cached_ok: bool,
    /// The exponent `κ` of `cached_pow_kappa`.
    cached_kappa: f64,
    /// `p^κ` of each cached level, for the 6.5 K/km extrapolation.
    cached_pow_kappa: Vec<f64>,
    /// Scratch for half-level pressures of a hybrid column.
    pub(super) scratch_half_pa: Vec<f64>,
}

/// `R_d Γ / g0` for the standard lapse rate: the exponent of `T ∝ p^κ` below ground.
#[inline]
fn standard_kappa(c: &Constants) -> f64 {
    c.rd_over_g0() * STANDARD_LAPSE_RATE
}

/// A virtual temperature that can be used: finite and positive.
#[inline]
pub(crate) fn usable_tv(tv: f64) -> bool {
    tv.is_finite() && tv > 0.0
}

/// Fill per-level outputs with the masked values.
fn mask_outputs(z_out: &mut [f64], below_out: &mut [bool]) {
    z_out.fill(f64::NAN);
    below_out.fill(false);
}

/// Height (gpm) at `p_pa` above the surface pressure, on the 6.5 K/km polytrope through
/// the surface node `(p_s, T_v,s, Z_s)`: what [`ColumnNodes::height_at_pressure`] gives below
/// the ground.
#[inline]
pub(crate) fn height_below_surface(
    p_pa: f64,
    (ps, tv_s, zs): (f64, f64, f64),
    c: &Constants,
) -> f64 {
    height_below_surface_with(p_pa, (ps, tv_s, zs), standard_kappa(c))
}

/// [`height_below_surface`] with `κ = R_d Γ / g0` already formed (as the row kernel holds
/// it): the same operations, the same bits.
#[inline]
pub(crate) fn height_below_surface_with(
    p_pa: f64,
    (ps, tv_s, zs): (f64, f64, f64),
    kappa: f64,
) -> f64 {
    let tv = tv_s * (kappa * (p_pa / ps).ln()).exp();
    zs - (tv - tv_s) / STANDARD_LAPSE_RATE
}

/// Height (gpm) at `p_pa` strictly between the nodes `(p1, T_v1, Z1)` below and
/// `(p2, T_v2, Z2)` above: what [`ColumnNodes::height_at_pressure`] gives there (its method).
#[inline]
pub(crate) fn height_between_nodes(
    p_pa: f64,
    (p1, t1, z1): (f64, f64, f64),
    (p2, t2, z2): (f64, f64, f64),
) -> f64 {
    let big_x = (p1 / p2).ln();
    let x = (p1 / p_pa).ln();
    // Tv(x) = t1 e^{-κx}: κ > 0 where Tv falls with height.
    let kappa = (t1 / t2).ln() / big_x;
    let frac =
        x * one_minus_exp_neg_over(kappa * x) / (big_x * one_minus_exp_neg_over(kappa * big_x));
    z1 + (z2 - z1) * frac
}

impl ColumnNodes {
    /// An empty buffer with room for a column of `levels` levels (plus the surface node).
    pub fn with_capacity(levels: usize) -> Self {
        let n = levels + 1;
        Self {
            pressure_pa: Vec::with_capacity(n),
            tv_k: Vec::with_capacity(n),
            height_m: Vec::with_capacity(n),
            below_ground: Vec::with_capacity(n),
            valid: 0..0,
            surface_node: None,
            cached_levels: Vec::with_capacity(levels),
            cached_ln_p: Vec::with_capacity(levels),
            cached_ln_ratio: Vec::with_capacity(levels),
            cached_ok: false,
            cached_kappa: f64::NAN,
            cached_pow_kappa: Vec::with_capacity(levels),
            scratch_half_pa: Vec::with_capacity(n),
        }
    }

    /// Number of nodes of the column built last (masked ones included).
    pub fn len(&self) -> usize {
        self.pressure_pa.len()
    }

    /// True when the last build produced no nodes (invalid input).
    pub fn is_empty(&self) -> bool {
        self.pressure_pa.is_empty()
    }

    /// Index of the surface node, when the column was built from the surface.
    pub fn surface_node(&self) -> Option<usize> {
        self.surface_node
    }

    /// Indices of the nodes whose heights are valid (one contiguous run; empty when all are
    /// masked).
    pub fn valid_nodes(&self) -> Range<usize> {
        self.valid.clone()
    }

    /// Forget the last column, keeping the capacity.
    pub(super) fn clear(&mut self) {
        self.pressure_pa.clear();
        self.tv_k.clear();
        self.height_m.clear();
        self.below_ground.clear();
        self.valid = 0..0;
        self.surface_node = None;
    }

    #[inline]
    pub(super) fn push(&mut self, p: f64, tv: f64, z: f64, below: bool) {
        self.pressure_pa.push(p);
        self.tv_k.push(tv);
        self.height_m.push(z);
        self.below_ground.push(below);
    }

    /// Make sure the logarithms of `p_pa` are cached; returns whether the levels are usable
    /// (finite, positive, strictly decreasing). Every column of a grid shares its levels, so
    /// this costs one slice comparison per column after the first.
    fn prepare_levels(&mut self, p_pa: &[f64]) -> bool {
        if self.cached_levels.as_slice() == p_pa && !self.cached_levels.is_empty() {
            return self.cached_ok;
        }
        self.cached_levels.clear();
        self.cached_levels.extend_from_slice(p_pa);
        self.cached_ln_p.clear();
        self.cached_ln_ratio.clear();
        self.cached_pow_kappa.clear();
        let mut ok = !p_pa.is_empty();
        for (i, &p) in p_pa.iter().enumerate() {
            ok &= p.is_finite() && p > 0.0;
            self.cached_ln_p.push(p.ln());
            if i == 0 {
                self.cached_ln_ratio.push(0.0);
            } else {
                ok &= p < p_pa[i - 1];
                self.cached_ln_ratio.push((p_pa[i - 1] / p).ln());
            }
        }
        self.cached_ok = ok;
        ok
    }

    /// Heights of an isobaric column. `p_pa` bottom-up strictly decreasing, `tv_k` per level
    /// (NaN = missing). Fills `self` with the nodes and writes per-level heights into
    /// `z_out` (NaN where masked) and per-level below-ground flags into `below_out`.
    ///
    /// Method (GUIDE §2): above ground, integrate upward with the log-mean Tv per layer.
    /// Surface Tv = Tv of the lowest above-ground level extrapolated down to p_s at 6.5 K/km
    /// (polytropic, so consistent with the layer integration). Levels below ground (p > p_s):
    /// Tv extrapolated downward from the surface at 6.5 K/km, heights by the same polytropic
    /// integration, flagged below ground; their own (often fill) temperatures are NOT used.
    /// Missing Tv at an above-ground level masks that level and every level above it (they
    /// depend on it), never the levels below. A level exactly at p_s is at the surface height
    /// and not below ground. A non-finite p_s or z_s, or no valid above-ground level, masks all.
    /// With LevelHeight: integrate up and down from that level; its missing Tv masks all.
    ///
    /// A virtual temperature that is not finite and positive counts as missing. Levels that
    /// are not finite, positive and strictly decreasing, or slices of unequal lengths, mask
    /// every output (and leave no nodes).
    ///
    /// # Units
    /// - `p_pa`: Pa; `tv_k`: K; anchor pressure Pa and heights geopotential metres
    /// - `z_out`: geopotential metres
    ///
    /// # Method
    /// The hypsometric equation layer by layer with the logarithmic-mean virtual temperature
    /// ([`crate::physics::hypsometric::layer_thickness`]); below ground, a 6.5 K/km polytrope
    /// from the surface, whose thickness is `(T_v − T_v,s) / Γ` in closed form.
    ///
    /// # References
    /// Wallace, J. M. and Hobbs, P. V. (2006), *Atmospheric Science*, 2nd ed., §3.2;
    /// U.S. Standard Atmosphere 1976 for the 6.5 K/km lapse rate (common practice below
    /// ground, as in reduction of pressure to sea level).
    pub fn isobaric(
        &mut self,
        p_pa: &[f64],
        tv_k: &[f64],
        anchor: ColumnAnchor,
        c: &Constants,
        z_out: &mut [f64],
        below_out: &mut [bool],
    ) {
        self.isobaric_lowest(p_pa, tv_k, p_pa.len(), anchor, c, z_out, below_out);
    }

    /// [`ColumnNodes::isobaric`] for the lowest `wanted` levels only, for answers at
    /// pressures no lower than level `wanted − 1`'s. The integration runs from the anchor
    /// upward, so every node and output it gives is bit for bit the full build's; it stops
    /// early and leaves the levels above it masked (`NaN`, not below ground) without reading
    /// their `tv_k`.
    ///
    /// More levels are built where the answer depends on them: a surface anchor always
    /// builds up to its lowest level above ground (the surface node's temperature comes from
    /// it), and a level anchor at or above `wanted` builds the whole column.
    ///
    /// # Units
    /// As [`ColumnNodes::isobaric`].
    ///
    /// # Method
    /// As [`ColumnNodes::isobaric`], over levels `0..used`, `used` as above.
    ///
    /// # References
    /// Wallace, J. M. and Hobbs, P. V. (2006), *Atmospheric Science*, 2nd ed., §3.2.
    #[allow(clippy::too_many_arguments)]
    pub fn isobaric_lowest(
        &mut self,
        p_pa: &[f64],
        tv_k: &[f64],
        wanted: usize,
        anchor: ColumnAnchor,
        c: &Constants,
        z_out: &mut [f64],
        below_out: &mut [bool],
    ) {
        self.clear();
        let n = p_pa.len();
        if tv_k.len() != n || z_out.len() != n || below_out.len() != n || !self.prepare_levels(p_pa)
        {
            mask_outputs(z_out, below_out);
            return;
        }
        let used = Self::levels_built(p_pa, wanted, anchor);
        match anchor {
            ColumnAnchor::Surface {
                pressure_pa,
                height_m,
            } => self.isobaric_from_surface(
                p_pa,
                tv_k,
                used,
                (pressure_pa, height_m),
                c,
                z_out,
                below_out,
            ),
            ColumnAnchor::LevelHeight { level, height_m } => {
                self.isobaric_from_level(p_pa, tv_k, used, level, height_m, c, z_out, below_out)
            }
        }
    }

    /// How many of the lowest levels of `p_pa` [`ColumnNodes::isobaric_lowest`] builds, and
    /// reads the virtual temperatures of, for `wanted` levels asked from `anchor`: at least
    /// one, at least up to the lowest level above the ground for a surface anchor, all of
    /// them for a level anchor at or above `wanted`.
    pub fn levels_built(p_pa: &[f64], wanted: usize, anchor: ColumnAnchor) -> usize {
        let n = p_pa.len();
        if n == 0 {
            return 0;
        }
        let wanted = wanted.clamp(1, n);
        match anchor {
            ColumnAnchor::Surface { pressure_pa, .. } => {
                let below_ground = p_pa.partition_point(|&p| p > pressure_pa);
                wanted.max(below_ground + 1).min(n)
            }
            ColumnAnchor::LevelHeight { level, .. } if level < wanted => wanted,
            ColumnAnchor::LevelHeight { .. } => n,
        }
    }

    /// The lowest level an answer at pressure `p_pa` needs, plus one: the number of levels
    /// [`ColumnNodes::isobaric_lowest`] must build for it (all of `p_pa` when `p_pa` lies
    /// above the top level, where only the whole column answers).
    pub fn levels_for_pressure(levels_pa: &[f64], p_pa: f64) -> usize {
        levels_pa
            .iter()
            .position(|&l| l <= p_pa)
            .map_or(levels_pa.len(), |i| i + 1)
    }

    #[allow(clippy::too_many_arguments)]
    fn isobaric_from_surface(
        &mut self,
        p_pa: &[f64],
        tv_k: &[f64],
        used: usize,
        (ps, zs): (f64, f64),
        c: &Constants,
        z_out: &mut [f64],
        below_out: &mut [bool],
    ) {
        let all = p_pa.len();
        if !(ps.is_finite() && ps > 0.0 && zs.is_finite()) {
            mask_outputs(z_out, below_out);
            return;
        }
        // Levels are strictly decreasing: the first `k0` are below ground.
        let k0 = p_pa.partition_point(|&p| p > ps);
        if k0 == all || !usable_tv(tv_k[k0]) {
            mask_outputs(z_out, below_out);
            return;
        }
        // Levels `used..` stay masked: not built (`used > k0`: see `levels_built`).
        let n = used;
        z_out[n..].fill(f64::NAN);
        let (p_pa, tv_k, z_out) = (&p_pa[..n], &tv_k[..n], &mut z_out[..n]);
        let rd_g0 = c.rd_over_g0();
        let kappa = standard_kappa(c);
        self.prepare_powers(kappa);
        let ln_ps = ps.ln();
        let at_surface = p_pa[k0] == ps;
        // p_s^κ: with the cached p_i^κ it gives every 6.5 K/km temperature of the column
        // from this one exponential.
        let ps_pow = (kappa * ln_ps).exp();
        let tv_s = if at_surface {
            tv_k[k0]
        } else {
            tv_k[k0] * (ps_pow / self.cached_pow_kappa[k0])
        };

        // Below ground: the 6.5 K/km polytrope from the surface, whose thickness from the
        // surface is (Tv − Tv_s)/Γ exactly.
        let tv_s_over_pow = tv_s / ps_pow;
        for i in 0..k0 {
            let tv = tv_s_over_pow * self.cached_pow_kappa[i];
            let z = zs - (tv - tv_s) / STANDARD_LAPSE_RATE;
            self.push(p_pa[i], tv, z, true);
            z_out[i] = z;
        }
        below_out[..k0].fill(true);
        below_out[k0..].fill(false);
        if at_surface {
            self.surface_node = Some(k0);
        } else {
            self.surface_node = Some(self.len());
            self.push(ps, tv_s, zs, false);
        }

        // Above ground: layer by layer from the surface. The node vectors are sized first
        // (masked values by default) so that the loop only writes.
        let base = self.len();
        let m = n - k0;
        self.pressure_pa.extend_from_slice(&p_pa[k0..]);
        self.tv_k.resize(base + m, f64::NAN);
        self.height_m.resize(base + m, f64::NAN);
        self.below_ground.resize(base + m, false);
        z_out[k0..].fill(f64::NAN);

        // The first layer runs from the surface to level k0 (zero depth when at the surface).
        let tv0 = tv_k[k0];
        let z0 = if at_surface {
            zs
        } else {
            zs + rd_g0 * logarithmic_mean_temperature(tv_s, tv0) * (ln_ps - self.cached_ln_p[k0])
        };
        self.tv_k[base] = tv0;
        self.height_m[base] = z0;
        z_out[k0] = z0;
        let mut z_prev = z0;
        let mut tv_prev = tv0;
        let mut valid_end = base + 1;
        let nodes = self.tv_k[base + 1..]
            .iter_mut()
            .zip(&mut self.height_m[base + 1..]);
        let levels = tv_k[k0 + 1..]
            .iter()
            .zip(&self.cached_ln_ratio[k0 + 1..])
            .zip(&mut z_out[k0 + 1..]);
        for ((node_tv, node_z), ((&tv, &ln_ratio), out)) in nodes.zip(levels) {
            if !usable_tv(tv) {
                // This level and everything above stay masked.
                break;
            }
            let z = z_prev + rd_g0 * logarithmic_mean_temperature(tv_prev, tv) * ln_ratio;
            *node_tv = tv;
            *node_z = z;
            *out = z;
            z_prev = z;
            tv_prev = tv;
            valid_end += 1;
        }
        self.valid = 0..valid_end;
    }

    /// Cache `p_i^κ` of the cached levels for the standard-lapse exponent `κ`.
    fn prepare_powers(&mut self, kappa: f64) {
        if self.cached_kappa == kappa && self.cached_pow_kappa.len() == self.cached_ln_p.len() {
            return;
        }
        self.cached_kappa = kappa;
        self.cached_pow_kappa.clear();
        self.cached_pow_kappa
            .extend(self.cached_ln_p.iter().map(|&l| (kappa * l).exp()));
    }

    #[allow(clippy::too_many_arguments)]
    fn isobaric_from_level(
        &mut self,
        p_pa: &[f64],
        tv_k: &[f64],
        used: usize,
        level: usize,
        z_level: f64,
        c: &Constants,
        z_out: &mut [f64],
        below_out: &mut [bool],
    ) {
        below_out.fill(false);
        z_out[used..].fill(f64::NAN);
        // Levels `used..` stay masked: not built.
        let (p_pa, tv_k, z_out) = (&p_pa[..used], &tv_k[..used], &mut z_out[..used]);
        let n = used;
        if level >= n || !z_level.is_finite() || !usable_tv(tv_k[level]) {
            z_out.fill(f64::NAN);
            return;
        }
        let rd_g0 = c.rd_over_g0();
        for &p in p_pa {
            self.push(p, f64::NAN, f64::NAN, false);
        }
        self.tv_k[level] = tv_k[level];
        self.height_m[level] = z_level;
        // Upward from the anchor; a missing Tv masks that level and everything above.
        let mut hi = level + 1;
        while hi < n && usable_tv(tv_k[hi]) {
            let z = self.height_m[hi - 1]
                + rd_g0
                    * logarithmic_mean_temperature(tv_k[hi - 1], tv_k[hi])
                    * self.cached_ln_ratio[hi];
            self.tv_k[hi] = tv_k[hi];
            self.height_m[hi] = z;
            hi += 1;
        }
        // Downward; a missing Tv masks that level and everything below.
        let mut lo = level;
        while lo > 0 && usable_tv(tv_k[lo - 1]) {
            let i = lo - 1;
            let z = self.height_m[lo]
                - rd_g0
                    * logarithmic_mean_temperature(tv_k[i], tv_k[lo])
                    * self.cached_ln_ratio[lo];
            self.tv_k[i] = tv_k[i];
            self.height_m[i] = z;
            lo = i;
        }
        z_out.copy_from_slice(&self.height_m);
        self.valid = lo..hi;
    }

    /// Surface node values `(p_s, Tv_s, z_s)`, when the column has a valid one.
    fn surface(&self) -> Option<(f64, f64, f64)> {
        let s = self.surface_node?;
        if !self.valid.contains(&s) {
            return None;
        }
        Some((self.pressure_pa[s], self.tv_k[s], self.height_m[s]))
    }

    /// Find `j` in the valid run with `p_j >= p > p_{j+1}`, for `p` inside the run.
    fn bracket_by_pressure(&self, p: f64) -> usize {
        let run = &self.pressure_pa[self.valid.clone()];
        self.valid.start + run.partition_point(|&x| x >= p) - 1
    }

    /// Height (gpm) at any pressure on the column built last (isobaric or hybrid), consistent
    /// with the constant-lapse-rate layers: between two nodes, Z = Z1 + (Z2 - Z1) * h(p)/h(p2)
    /// where h(p) is the log-mean-Tv thickness from p1 to p with Tv(p) polytropic between the
    /// nodes (this reproduces both nodes exactly and equals the hypsometric result for
    /// isobaric columns). Below the lowest node (Surface anchor): 6.5 K/km extrapolation from
    /// the surface node, flagged. Above the top node or below the bottom without an anchor
    /// that allows it: None (the caller decides whether to extrapolate). Masked nodes: None.
    ///
    /// # Units
    /// - `p_pa`: Pa
    /// - returns: geopotential metres
    ///
    /// # Method
    /// With `x = ln(p1/p)`, `X = ln(p1/p2)` and `κ = ln(Tv2/Tv1)/X`, the polytropic thickness is
    /// `h(x) = (R_d/g0) Tv1 (1 − e^{−κx})/κ`, the log-mean form written without cancellation.
    ///
    /// # References
    /// Wallace, J. M. and Hobbs, P. V. (2006), *Atmospheric Science*, 2nd ed., §3.2.
    pub fn height_at_pressure(&self, p_pa: f64, c: &Constants) -> Option<HeightAtPressure> {
        if p_pa.is_nan() || p_pa <= 0.0 || self.valid.is_empty() {
            return None;
        }
        let below_ground = self.surface().is_some_and(|(ps, _, _)| p_pa > ps);
        let lo = self.valid.start;
        let hi = self.valid.end - 1;
        if p_pa > self.pressure_pa[lo] {
            let surface = self.surface()?;
            return Some(HeightAtPressure {
                height_m: height_below_surface(p_pa, surface, c),
                below_ground,
            });
        }
        if p_pa < self.pressure_pa[hi] {
            return None;
        }
        let j = self.bracket_by_pressure(p_pa);
        if self.pressure_pa[j] == p_pa || j == hi {
            return Some(HeightAtPressure {
                height_m: self.height_m[j],
                below_ground: self.below_ground[j],
            });
        }
        let node = |i: usize| (self.pressure_pa[i], self.tv_k[i], self.height_m[i]);
        Some(HeightAtPressure {
            height_m: height_between_nodes(p_pa, node(j), node(j + 1)),
            below_ground,
        })
    }

    /// Pressure (Pa) at a given height, the inverse of the above (monotone; None outside or masked).
    ///
    /// # Units
    /// - `z_m`: geopotential metres
    /// - returns: Pa
    ///
    /// # Method
    /// Inverts `h(x)` of [`ColumnNodes::height_at_pressure`] in closed form:
    /// `x = −ln(1 − κW)/κ` with `W` the wanted share of the layer's `X (1 − e^{−κX})/(κX)`.
    /// Below the surface (Surface anchor), the 6.5 K/km polytrope from the surface node.
    ///
    /// # References
    /// Wallace, J. M. and Hobbs, P. V. (2006), *Atmospheric Science*, 2nd ed., §3.2;
    /// U.S. Standard Atmosphere 1976, eq. 33a.
    pub fn pressure_at_height(&self, z_m: f64, c: &Constants) -> Option<f64> {
        if !z_m.is_finite() || self.valid.is_empty() {
            return None;
        }
        let lo = self.valid.start;
        let hi = self.valid.end - 1;
        if z_m < self.height_m[lo] {
            let (ps, tv_s, zs) = self.surface()?;
            let p = polytropic_pressure_at_height(ps, tv_s, STANDARD_LAPSE_RATE, z_m - zs, c);
            return p.is_finite().then_some(p);
        }
        if z_m > self.height_m[hi] {
            return None;
        }
        let run = &self.height_m[self.valid.clone()];
        let j = lo + run.partition_point(|&z| z <= z_m) - 1;
        if self.height_m[j] == z_m || j == hi {
            return Some(self.pressure_pa[j]);
        }
        let (p1, p2) = (self.pressure_pa[j], self.pressure_pa[j + 1]);
        let (t1, t2) = (self.tv_k[j], self.tv_k[j + 1]);
        let (z1, z2) = (self.height_m[j], self.height_m[j + 1]);
        let big_x = (p1 / p2).ln();
        // Tv(x) = t1 e^{-κx}: κ > 0 where Tv falls with height.
        let kappa = (t1 / t2).ln() / big_x;
        let w = (z_m - z1) / (z2 - z1) * big_x * one_minus_exp_neg_over(kappa * big_x);
        let x = w * neg_ln_one_minus_over(kappa * w);
        Some(p1 * (-x).exp())
    }

    /// Virtual temperature at any pressure (polytropic between nodes), for profiles.
    ///
    /// # Units
    /// - `p_pa`: Pa
    /// - returns: K
    ///
    /// # Method
    /// `ln T_v` linear in `ln p` between the bracketing nodes; below the lowest node
    /// (Surface anchor), 6.5 K/km from the surface node. `None` where a height would be.
    ///
    /// # References
    /// U.S. Standard Atmosphere 1976, eq. 33a (the polytropic layer).
    pub fn virtual_temperature_at_pressure(&self, p_pa: f64, c: &Constants) -> Option<f64> {
        if p_pa.is_nan() || p_pa <= 0.0 || self.valid.is_empty() {
            return None;
        }
        let lo = self.valid.start;
        let hi = self.valid.end - 1;
        if p_pa > self.pressure_pa[lo] {
            let (ps, tv_s, _) = self.surface()?;
            return Some(tv_s * (standard_kappa(c) * (p_pa / ps).ln()).exp());
        }
        if p_pa < self.pressure_pa[hi] {
            return None;
        }
        let j = self.bracket_by_pressure(p_pa);
        if self.pressure_pa[j] == p_pa || j == hi {
            return Some(self.tv_k[j]);
        }
        let (p1, p2) = (self.pressure_pa[j], self.pressure_pa[j + 1]);
        let (t1, t2) = (self.tv_k[j], self.tv_k[j + 1]);
        let frac = (p_pa / p1).ln() / (p2 / p1).ln();
        Some(t1 * ((t2 / t1).ln() * frac).exp())
    }
}

/// Thickness between two pressures on a built column: height_at(p_top) - height_at(p_bottom).
///
/// # Units
/// - `p_bottom`, `p_top`: Pa
/// - returns: geopotential metres; `None` where either height is
///
/// # Method
/// Difference of two [`ColumnNodes::height_at_pressure`] results, so it is additive over
/// sub-layers by construction and equals the hypsometric thickness of the polytropic layers.
///
/// # References
/// Wallace, J. M. and Hobbs, P. V. (2006), *Atmospheric Science*, 2nd ed., §3.2.
pub fn thickness_between(
    nodes: &ColumnNodes,
    p_bottom: f64,
    p_top: f64,
    c: &Constants,
) -> Option<f64> {
    let top = nodes.height_at_pressure(p_top, c)?;
    let bottom = nodes.height_at_pressure(p_bottom, c)?;
    Some(top.height_m - bottom.height_m)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::physics::hypsometric::{layer_thickness, scale_height};
    use crate::physics::standard_atmosphere::{
        us_standard_atmosphere_height_at_pressure, us_standard_atmosphere_temperature,
    };
    use proptest::prelude::*;

    /// Mandatory levels, Pa, bottom-up.
    const LEVELS: [f64; 12] = [
        100_000.0, 92_500.0, 85_000.0, 70_000.0, 50_000.0, 40_000.0, 30_000.0, 25_000.0, 20_000.0,
        15_000.0, 10_000.0, 5_000.0,
    ];

    fn build(
        p: &[f64],
        tv: &[f64],
        anchor: ColumnAnchor,
        c: &Constants,
    ) -> (ColumnNodes, Vec<f64>, Vec<bool>) {
        let mut nodes = ColumnNodes::with_capacity(p.len());
        let mut z = vec![0.0; p.len()];
        let mut below = vec![false; p.len()];
        nodes.isobaric(p, tv, anchor, c, &mut z, &mut below);
        (nodes, z, below)
    }

    #[test]
    fn standard_atmosphere_column_reproduces_the_mandatory_heights() {
        // Geopotential heights of the mandatory levels in the U.S. Standard Atmosphere 1976, as
        // derived in GUIDE §2 from the standard's definition.
        let table = [
            (100_000.0, 110.9),
            (92_500.0, 762.0),
            (85_000.0, 1457.3),
            (70_000.0, 3012.2),
            (50_000.0, 5574.4),
            (40_000.0, 7185.4),
            (30_000.0, 9164.0),
            (25_000.0, 10_362.9),
        ];
        let c = Constants::us_standard_atmosphere_1976();
        let p: Vec<f64> = table.iter().map(|t| t.0).collect();
        // Level temperature from the standard's definition at the level's pressure.
        let tv: Vec<f64> = p
            .iter()
            .map(|&p| {
                us_standard_atmosphere_temperature(us_standard_atmosphere_height_at_pressure(p))
            })
            .collect();
        let anchor = ColumnAnchor::Surface {
            pressure_pa: 101_325.0,
            height_m: 0.0,
        };
        let (nodes, z, below) = build(&p, &tv, anchor, &c);
        for (i, (_, zt)) in table.iter().enumerate() {
            assert!((z[i] - zt).abs() <= 0.1, "{} Pa: {} vs {zt}", p[i], z[i]);
            assert!(!below[i]);
        }
        // The surface node has the standard's sea-level temperature, by extrapolation at
        // 6.5 K/km from 1000 hPa.
        let s = nodes.surface_node().unwrap();
        assert!((nodes.tv_k[s] - 288.15).abs() < 1e-6);
        // Between levels the column follows the standard too (GUIDE §2: the log mean is exact
        // for the piecewise-polytropic standard atmosphere).
        for pq in [95_000.0, 60_000.0, 27_000.0] {
            let h = nodes.height_at_pressure(pq, &c).unwrap().height_m;
            let want = us_standard_atmosphere_height_at_pressure(pq);
            assert!((h - want).abs() < 1e-6, "{pq}: {h} vs {want}");
            assert!(
                (nodes.virtual_temperature_at_pressure(pq, &c).unwrap()
                    - us_standard_atmosphere_temperature(want))
                .abs()
                    < 1e-9
            );
        }
    }

    #[test]
    fn isothermal_column_matches_closed_form() {
        // p = p0 exp(−z/H) (Wallace & Hobbs 2006, §3.2.2, the isothermal atmosphere).
        let c = Constants::default();
        let tv = [240.0; LEVELS.len()];
        // The surface at the lowest level, so that the surface Tv (extrapolated at 6.5 K/km
        // from the lowest level above ground) is the same 240 K.
        let anchor = ColumnAnchor::Surface {
            pressure_pa: 100_000.0,
            height_m: 12.0,
        };
        let (nodes, z, _) = build(&LEVELS, &tv, anchor, &c);
        let h = scale_height(240.0, &c);
        for (i, &p) in LEVELS.iter().enumerate() {
            assert!((z[i] - (12.0 + h * (100_000.0 / p).ln())).abs() < 1e-8);
        }
        for zq in [12.0, 800.0, 4321.0, 20_000.0] {
            let p = nodes.pressure_at_height(zq, &c).unwrap();
            assert!(
                (p - 100_000.0 * (-(zq - 12.0) / h).exp()).abs() < 1e-8,
                "{zq}: {p}"
            );
        }
    }

    #[test]
    fn level_exactly_at_surface() {
        let c = Constants::default();
        let tv = [
            280.0, 275.0, 270.0, 262.0, 250.0, 240.0, 230.0, 222.0, 218.0, 216.0, 214.0, 212.0,
        ];
        let anchor = ColumnAnchor::Surface {
            pressure_pa: 92_500.0,
            height_m: 760.0,
        };
        let (nodes, z, below) = build(&LEVELS, &tv, anchor, &c);
        assert_eq!(z[1], 760.0);
        assert!(!below[1]);
        assert!(below[0]);
        assert_eq!(nodes.len(), LEVELS.len()); // no extra surface node
        assert_eq!(nodes.surface_node(), Some(1));
        // The 1000 hPa level lies below ground on the 6.5 K/km polytrope from the surface,
        // with its own temperature ignored.
        let tv_s = 275.0;
        let tv0 = tv_s * (100_000.0f64 / 92_500.0).powf(c.rd_over_g0() * 0.0065);
        assert!((z[0] - (760.0 - (tv0 - tv_s) / 0.0065)).abs() < 1e-9);
        assert!((nodes.tv_k[0] - tv0).abs() < 1e-9);
    }

    #[test]
    fn below_ground_levels_follow_the_standard_lapse_rate() {
        let c = Constants::default();
        // Fill values at the buried levels must not matter.
        let tv = [
            9.9e36, -999.0, 285.0, 275.0, 258.0, 247.0, 233.0, 225.0, 219.0, 217.0, 215.0, 213.0,
        ];
        let ps = 87_000.0;
        let zs = 1250.0;
        let anchor = ColumnAnchor::Surface {
            pressure_pa: ps,
            height_m: zs,
        };
        let (nodes, z, below) = build(&LEVELS, &tv, anchor, &c);
        assert_eq!(&below[..3], &[true, true, false]);
        assert!(below[3..].iter().all(|b| !b));
        let kappa = c.rd_over_g0() * 0.0065;
        let tv_s = 285.0 * (ps / 85_000.0).powf(kappa);
        let s = nodes.surface_node().unwrap();
        assert_eq!(s, 2);
        assert!((nodes.tv_k[s] - tv_s).abs() < 1e-9);
        for i in 0..2 {
            let tvi = tv_s * (LEVELS[i] / ps).powf(kappa);
            // Tv rises 6.5 K per km downward.
            assert!(((tvi - tv_s) / (zs - z[i]) - 0.0065).abs() < 1e-12);
            assert!((z[i] - (zs - layer_thickness(LEVELS[i], ps, tvi, tv_s, &c))).abs() < 1e-8);
        }
        // 850 hPa, above ground, is tied to the surface by the same polytrope.
        assert!((z[2] - (zs + (tv_s - 285.0) / 0.0065)).abs() < 1e-8);
        // Below the lowest node the query extrapolates on the same line and flags it.
        let h = nodes.height_at_pressure(103_000.0, &c).unwrap();
        assert!(h.below_ground);
        let h92 = nodes.height_at_pressure(92_500.0, &c).unwrap();
        assert!((h92.height_m - z[1]).abs() < 1e-9 && h92.below_ground);
        let p = nodes.pressure_at_height(h.height_m, &c).unwrap();
        assert!((p - 103_000.0).abs() < 1e-6);
    }

    #[test]
    fn masked_level_masks_above_only() {
        let c = Constants::default();
        let mut tv = [
            285.0, 280.0, 276.0, 266.0, 252.0, 243.0, 230.0, 223.0, 218.0, 216.0, 214.0, 212.0,
        ];
        tv[5] = f64::NAN;
        let anchor = ColumnAnchor::Surface {
            pressure_pa: 101_000.0,
            height_m: 30.0,
        };
        let (nodes, z, _) = build(&LEVELS, &tv, anchor, &c);
        assert!(z[..5].iter().all(|v| v.is_finite()));
        assert!(z[5..].iter().all(|v| v.is_nan()));
        assert!(nodes.height_at_pressure(45_000.0, &c).is_none());
        assert!(nodes.height_at_pressure(55_000.0, &c).is_some());
        assert!(nodes.pressure_at_height(8000.0, &c).is_none());
        // Same column without the gap gives the same heights below it.
        tv[5] = 243.0;
        let (_, z_full, _) = build(&LEVELS, &tv, anchor, &c);
        assert_eq!(&z[..5], &z_full[..5]);
        // The lowest above-ground level missing: nothing can be computed.
        tv[0] = f64::NAN;
        let (nodes, z, _) = build(&LEVELS, &tv, anchor, &c);
        assert!(z.iter().all(|v| v.is_nan()));
        assert!(nodes.height_at_pressure(50_000.0, &c).is_none());
    }

    #[test]
    fn invalid_inputs_mask_everything_without_panicking() {
        let c = Constants::default();
        let tv = [280.0; LEVELS.len()];
        for anchor in [
            ColumnAnchor::Surface {
                pressure_pa: f64::NAN,
                height_m: 0.0,
            },
            ColumnAnchor::Surface {
                pressure_pa: 100_000.0,
                height_m: f64::INFINITY,
            },
            ColumnAnchor::Surface {
                pressure_pa: 4_000.0,
                height_m: 0.0,
            }, // no level above ground
            ColumnAnchor::LevelHeight {
                level: 99,
                height_m: 0.0,
            },
            ColumnAnchor::LevelHeight {
                level: 2,
                height_m: f64::NAN,
            },
        ] {
            let (nodes, z, below) = build(&LEVELS, &tv, anchor, &c);
            assert!(z.iter().all(|v| v.is_nan()), "{anchor:?}");
            assert!(below.iter().all(|b| !b));
            assert!(nodes.height_at_pressure(50_000.0, &c).is_none());
            assert!(nodes.pressure_at_height(1000.0, &c).is_none());
            assert!(nodes
                .virtual_temperature_at_pressure(50_000.0, &c)
                .is_none());
        }
        // Levels out of order, or lengths that do not match.
        let anchor = ColumnAnchor::Surface {
            pressure_pa: 101_000.0,
            height_m: 0.0,
        };
        let mut bad = LEVELS;
        bad.swap(3, 4);
        let (_, z, _) = build(&bad, &tv, anchor, &c);
        assert!(z.iter().all(|v| v.is_nan()));
        let mut nodes = ColumnNodes::with_capacity(4);
        let mut z = vec![0.0; 3];
        let mut below = vec![true; 3];
        nodes.isobaric(&LEVELS[..3], &tv[..2], anchor, &c, &mut z, &mut below);
        assert!(z.iter().all(|v| v.is_nan()) && below.iter().all(|b| !b));
        // NaN queries.
        let (nodes, _, _) = build(&LEVELS, &tv, anchor, &c);
        assert!(nodes.height_at_pressure(f64::NAN, &c).is_none());
        assert!(nodes.pressure_at_height(f64::NAN, &c).is_none());
        assert!(nodes.height_at_pressure(1_000.0, &c).is_none()); // above the top node
    }

    #[test]
    fn reuse_does_not_reallocate() {
        let c = Constants::default();
        let mut nodes = ColumnNodes::with_capacity(LEVELS.len());
        let mut z = vec![0.0; LEVELS.len()];
        let mut below = vec![false; LEVELS.len()];
        let tv = [280.0; LEVELS.len()];
        let cap = nodes.pressure_pa.capacity();
        let ptr = nodes.height_m.as_ptr();
        for ps in [101_000.0, 70_500.0, 99_000.0, 103_000.0] {
            let anchor = ColumnAnchor::Surface {
                pressure_pa: ps,
                height_m: 0.0,
            };
            nodes.isobaric(&LEVELS, &tv, anchor, &c, &mut z, &mut below);
        }
        assert_eq!(nodes.pressure_pa.capacity(), cap);
        assert_eq!(nodes.height_m.as_ptr(), ptr);
    }

    /// A random but realistic column: Tv per level in 180..320 K, surface pressure and height.
    fn column_strategy() -> impl Strategy<Value = (Vec<f64>, f64, f64)> {
        (
            proptest::collection::vec(180.0f64..320.0, LEVELS.len()),
            60_000.0f64..105_000.0,
            -300.0f64..4000.0,
        )
    }

    proptest! {
        #[test]
        fn thickness_is_additive_and_heights_increase(
            (tv, ps, zs) in column_strategy(),
            pa in 6_000.0f64..104_000.0, pb in 6_000.0f64..104_000.0, pc in 6_000.0f64..104_000.0,
        ) {
            let c = Constants::default();
            let anchor = ColumnAnchor::Surface { pressure_pa: ps, height_m: zs };
            let (nodes, z, _) = build(&LEVELS, &tv, anchor, &c);
            prop_assert!(z.windows(2).all(|w| w[1] > w[0]));
            prop_assert!(nodes.height_m.windows(2).all(|w| w[1] > w[0]));
            let ab = thickness_between(&nodes, pa, pb, &c).unwrap();
            let bc = thickness_between(&nodes, pb, pc, &c).unwrap();
            let ac = thickness_between(&nodes, pa, pc, &c).unwrap();
            prop_assert!((ab + bc - ac).abs() < 1e-7, "{} + {} vs {}", ab, bc, ac);
            // Thickness upward is positive.
            let (lo, hi) = if pa > pb { (pa, pb) } else { (pb, pa) };
            if lo > hi {
                prop_assert!(thickness_between(&nodes, lo, hi, &c).unwrap() > 0.0);
            }
        }

        #[test]
        fn nodes_are_reproduced_and_inverses_agree(
            (tv, ps, zs) in column_strategy(), pq in 5_000.0f64..108_000.0,
        ) {
            let c = Constants::default();
            let anchor = ColumnAnchor::Surface { pressure_pa: ps, height_m: zs };
            let (nodes, _, _) = build(&LEVELS, &tv, anchor, &c);
            for i in 0..nodes.len() {
                let h = nodes.height_at_pressure(nodes.pressure_pa[i], &c).unwrap();
                prop_assert_eq!(h.height_m, nodes.height_m[i]);
                prop_assert_eq!(h.below_ground, nodes.below_ground[i]);
                prop_assert_eq!(nodes.pressure_at_height(nodes.height_m[i], &c).unwrap(), nodes.pressure_pa[i]);
            }
            let h = nodes.height_at_pressure(pq, &c).unwrap();
            prop_assert_eq!(h.below_ground, pq > ps);
            let p = nodes.pressure_at_height(h.height_m, &c).unwrap();
            prop_assert!((p - pq).abs() < 1e-8 * pq, "{} -> {} -> {}", pq, h.height_m, p);
            // Interpolated heights agree with the hypsometric equation from the node below,
            // using the interpolated Tv.
            let j = nodes.pressure_pa.partition_point(|&x| x >= pq);
            if j >= 1 && j < nodes.len() {
                let tvq = nodes.virtual_temperature_at_pressure(pq, &c).unwrap();
                let dz = layer_thickness(nodes.pressure_pa[j - 1], pq, nodes.tv_k[j - 1], tvq, &c);
                prop_assert!((nodes.height_m[j - 1] + dz - h.height_m).abs() < 1e-7);
            }
        }

        #[test]
        fn level_anchor_matches_surface_anchor_thickness(
            (tv, ps, zs) in column_strategy(), level in 0usize..LEVELS.len(),
        ) {
            let c = Constants::default();
            // Use only levels above ground so that both columns see the same temperatures.
            let first = LEVELS.partition_point(|&p| p > ps);
            prop_assume!(level >= first);
            let surf = ColumnAnchor::Surface { pressure_pa: ps, height_m: zs };
            let (_, z_s, _) = build(&LEVELS, &tv, surf, &c);
            let anchor = ColumnAnchor::LevelHeight { level, height_m: z_s[level] };
            let (nodes, z_l, below) = build(&LEVELS, &tv, anchor, &c);
            prop_assert_eq!(z_l[level], z_s[level]);
            prop_assert!(below.iter().all(|b| !b));
            prop_assert!(nodes.surface_node().is_none());
            for i in first..LEVELS.len() {
                prop_assert!((z_l[i] - z_s[i]).abs() < 1e-7, "level {}: {} vs {}", i, z_l[i], z_s[i]);
            }
        }

        #[test]
        fn the_lowest_levels_alone_give_the_whole_columns_bits(
            (mut tv, ps, zs) in column_strategy(),
            wanted in 0usize..14,
            masked in proptest::option::of(0usize..12),
            level_anchor in proptest::option::of(0usize..12),
            share in 0.0f64..1.0,
        ) {
            let c = Constants::default();
            if let Some(k) = masked {
                tv[k] = f64::NAN;
            }
            let anchor = match level_anchor {
                Some(level) => ColumnAnchor::LevelHeight { level, height_m: zs },
                None => ColumnAnchor::Surface { pressure_pa: ps, height_m: zs },
            };
            let (full, z_full, below_full) = build(&LEVELS, &tv, anchor, &c);
            let mut part = ColumnNodes::with_capacity(LEVELS.len());
            let (mut z, mut below) = (vec![0.0; LEVELS.len()], vec![true; LEVELS.len()]);
            // Temperatures above what the build may read are poison: reading them would
            // show in the heights.
            let used = match anchor {
                ColumnAnchor::Surface { .. } => {
                    wanted.clamp(1, 12).max(LEVELS.partition_point(|&p| p > ps) + 1).min(12)
                }
                ColumnAnchor::LevelHeight { level, .. } if level < wanted.clamp(1, 12) => {
                    wanted.clamp(1, 12)
                }
                ColumnAnchor::LevelHeight { .. } => 12,
            };
            let mut poisoned = tv.clone();
            poisoned[used..].fill(-1.0);
            part.isobaric_lowest(&LEVELS, &poisoned, wanted, anchor, &c, &mut z, &mut below);
            for k in 0..used {
                prop_assert_eq!(z[k].to_bits(), z_full[k].to_bits(), "level {}", k);
                prop_assert_eq!(below[k], below_full[k], "level {}", k);
            }
            prop_assert!(z[used..].iter().all(|v| v.is_nan()));
            prop_assert!(below[used..].iter().all(|b| !b));
            // Any pressure from the top built level down, and below the lowest level,
            // interpolates to the same bits.
            let top = LEVELS[used - 1];
            let p = top + share * (LEVELS[0] * 1.05 - top);
            for q in [p, top, LEVELS[0] * 1.05] {
                let (a, b) = (part.height_at_pressure(q, &c), full.height_at_pressure(q, &c));
                prop_assert_eq!(
                    a.map(|h| (h.height_m.to_bits(), h.below_ground)),
                    b.map(|h| (h.height_m.to_bits(), h.below_ground)),
                    "{} Pa", q
                );
            }
            prop_assert_eq!(ColumnNodes::levels_for_pressure(&LEVELS, top), used.max(1));
        }
    }

    #[test]
    fn level_anchor_masks_away_from_the_anchor() {
        let c = Constants::default();
        let mut tv = [
            285.0, 280.0, 276.0, 266.0, 252.0, 243.0, 230.0, 223.0, 218.0, 216.0, 214.0, 212.0,
        ];
        tv[1] = f64::NAN;
        tv[8] = f64::NAN;
        let anchor = ColumnAnchor::LevelHeight {
            level: 4,
            height_m: 5600.0,
        };
        let (nodes, z, _) = build(&LEVELS, &tv, anchor, &c);
        assert!(z[..2].iter().all(|v| v.is_nan()));
        assert!(z[2..8].iter().all(|v| v.is_finite()));
        assert!(z[8..].iter().all(|v| v.is_nan()));
        assert_eq!(z[4], 5600.0);
        assert_eq!(nodes.valid_nodes(), 2..8);
        // Below the lowest valid node there is no surface to extrapolate from.
        assert!(nodes.height_at_pressure(90_000.0, &c).is_none());
        assert!(nodes.height_at_pressure(80_000.0, &c).is_some());
        // The anchor's own Tv missing masks all.
        tv[4] = f64::NAN;
        let (_, z, _) = build(&LEVELS, &tv, anchor, &c);
        assert!(z.iter().all(|v| v.is_nan()));
    }
}
