#!/usr/bin/env python3
"""NumPy baseline for the hypsogrid batch: the same heights by the same method, in plain
vectorised NumPy, so that the Rust batch can be timed against it on the same file.

The method follows src/physics/column.rs (ColumnNodes::isobaric, integration from the
surface) and src/physics/hypsometric.rs:

- virtual temperature from specific humidity, Tv = T (1 + (1/eps - 1) q), eps = 0.62198
  (18.01528 / 28.9645, GUIDE section 2); a file with relative humidity instead has it made
  specific humidity first, as the crate's default settings do (src/physics/humidity.rs):
  e = RH e_s(T) with the WMO-No. 8 Magnus form over water, e_s = 611.2 Pa exp(17.62 t /
  (243.12 + t)), t in deg C, then q = eps e / (p - (1 - eps) e), missing where e >= p;
- the levels above the ground are integrated upward from the surface, layer by layer, with the
  logarithmic-mean virtual temperature of each layer (Wallace and Hobbs 2006, section 3.2);
- the surface virtual temperature is the one of the lowest level above the ground,
  extrapolated down to the surface pressure at 6.5 K/km (Tv_s = Tv_k0 (p_s / p_k0)^kappa with
  kappa = R_d * 0.0065 / g0), and the first layer runs from the surface to that level;
- levels below the ground (p > p_s) follow the 6.5 K/km polytrope from the surface:
  Tv = Tv_s (p / p_s)^kappa, Z = Z_s - (Tv - Tv_s) / 0.0065 (common practice, as in sea-level
  pressure reduction); their own temperatures are not used;
- a missing or non-positive virtual temperature above the ground masks that level and every
  level above it; no usable lowest level, or no surface, masks the column;
- R_d = 287.04 J kg-1 K-1 and g0 = 9.80665 m s-2, the crate's defaults
  (src/physics/constants.rs); g0 also turns surface geopotential into geopotential metres;
- thickness of a layer: the difference of the heights at its two pressures, interpolated
  between the column's nodes with the same constant-lapse-rate assumption
  (ColumnNodes::height_at_pressure).

Accumulation is in float64, storage in float32, as in the crate.

Stages are timed separately (read with netCDF4, compute, write with netCDF4, and the whole),
and each timing is printed as one JSON line. Examples:

    python benches/numpy_baseline.py --input target/bench-data/global_0p5deg.nc --repeat 3
    python benches/numpy_baseline.py --input IN.nc --output OUT.nc --check RUST_HEIGHTS.nc
    python benches/numpy_baseline.py --grid 0.25 --repeat 3    # compute only, in memory
    python benches/numpy_baseline.py --grid 0.25 --save-grid G.nc   # ... and keep it as a file
    python benches/numpy_baseline.py --smoke                   # tiny run with self-checks
    python benches/numpy_baseline.py --relative-humidity-copy IN.nc --output RH.nc
        # IN.nc with its specific humidity turned into relative humidity, for timing both
        # programs on the humidity GFS files carry

The synthetic input of --grid and --smoke is invented data (for timing and for analytic
checks only).
"""

import argparse
import json
import math
import os
import sys
import tempfile
import time

import numpy as np
import netCDF4

# Constants of the crate's defaults (src/physics/constants.rs), with their sources there.
# Dry-air gas constant, J kg-1 K-1: the value most forecast models use (GUIDE section 2).
RD = 287.04
# Standard gravity, m s-2: the WMO definition of the geopotential metre.
G0 = 9.80665
# Ratio of the molar masses of water and dry air, 18.01528 / 28.9645 (GUIDE section 2).
EPS = 18.01528 / 28.9645
# Standard lapse rate below the ground, K per geopotential metre (U.S. Standard Atmosphere
# 1976 troposphere; common practice below ground).
GAMMA = 0.0065
# The default fill value of netCDF for float32 (netCDF-C NC_FILL_FLOAT).
NC_FILL_FLOAT = np.float32(9.9692099683868690e36)
# The crate's default layers for `hypsogrid compute` (src/cli/mod.rs), hPa.
DEFAULT_LAYERS = "1000:500,1000:850,850:700"


def emit(record):
    """Print one JSON line and flush, so that a pipe sees it at once."""
    print(json.dumps(record, sort_keys=True), flush=True)


# -------------------------------------------------------------------------------------------
# Physics, vectorised over whole grids.
# -------------------------------------------------------------------------------------------


def logarithmic_mean_temperature(t1, t2):
    """Logarithmic mean (t1 - t2) / ln(t1 / t2), as src/physics/hypsometric.rs computes it.

    Written as (t1 + t2)/2 * u / artanh(u) with u = (t1 - t2)/(t1 + t2); for |u| < 0.05 the
    Taylor series of u / artanh(u) (the crate's five terms), else the closed form. NaN where
    either temperature is missing or not positive.
    """
    with np.errstate(invalid="ignore", divide="ignore"):
        total = t1 + t2
        u = (t1 - t2) / total
        s = u * u
        ratio = 1.0 - s * (1.0 / 3.0 + s * (4.0 / 45.0 + s * (44.0 / 945.0 + s * (428.0 / 14175.0))))
        series = 0.5 * total * ratio
        small = np.abs(u) < 0.05
        if not np.all(small | ~np.isfinite(u)):
            closed = (t1 - t2) / np.log(t1 / t2)
            series = np.where(small, series, closed)
        return np.where((t1 > 0.0) & (t2 > 0.0), series, np.nan)


def one_minus_exp_neg_over(y):
    """(1 - exp(-y)) / y, equal to 1 at y = 0 (src/physics/hypsometric.rs)."""
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(y == 0.0, 1.0, -np.expm1(-y) / y)


def specific_from_relative_humidity(p, t, rh, eps=EPS):
    """Specific humidity (float64) from relative humidity (a fraction) at pressures `p` (Pa,
    broadcast over the levels' axis 0 of `t`), by the WMO-No. 8 Magnus form over water and
    q = eps e / (p - (1 - eps) e); NaN where e >= p (the crate's
    saturation_vapour_pressure_water and specific_humidity_from_vapour_pressure)."""
    tc = t.astype(np.float64) - 273.15
    p = np.asarray(p, dtype=np.float64).reshape((-1,) + (1,) * (t.ndim - 1))
    with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
        denom = 243.12 + tc
        es = np.where(denom > 0.0, 611.2 * np.exp(17.62 * tc / denom), np.nan)
        e = rh.astype(np.float64) * es
        q = eps * e / (p - (1.0 - eps) * e)
    return np.where(p - e > 0.0, q, np.nan)


def relative_humidity_copy(src, dst):
    """`src` with its specific humidity turned into relative humidity (percent, float32,
    standard_name relative_humidity): the inverse of specific_from_relative_humidity on the
    same invented fields, so that both programs can be timed on relative humidity input."""
    with netCDF4.Dataset(src) as ds_in, netCDF4.Dataset(dst, "w", format="NETCDF4") as ds:
        ds.setncatts({k: ds_in.getncattr(k) for k in ds_in.ncattrs()})
        for name, dim in ds_in.dimensions.items():
            ds.createDimension(name, None if dim.isunlimited() else len(dim))
        level_var = find_by_standard_name(ds_in, "air_pressure", ndim=1)
        scale = 100.0 if getattr(level_var, "units", "Pa") in ("hPa", "mbar", "millibar") else 1.0
        # The levels in the file's own order, on the level axis of [time, level, lat, lon].
        p = (np.asarray(level_var[:], dtype=np.float64) * scale).reshape((1, -1, 1, 1))
        t = read_field(find_by_standard_name(ds_in, "air_temperature", ndim=4)).astype(np.float64)
        for name, var in ds_in.variables.items():
            is_q = getattr(var, "standard_name", None) == "specific_humidity"
            fill = getattr(var, "_FillValue", None)
            out = ds.createVariable("relative_humidity" if is_q else name, var.dtype,
                                    var.dimensions, fill_value=fill)
            out.setncatts({k: var.getncattr(k) for k in var.ncattrs() if k != "_FillValue"})
            if not is_q:
                out[...] = var[...]
                continue
            out.standard_name, out.units = "relative_humidity", "%"
            q = read_field(var).astype(np.float64)
            e = q * p / (EPS + (1.0 - EPS) * q)
            tc = t - 273.15
            es = 611.2 * np.exp(17.62 * tc / (243.12 + tc))
            missing = np.isnan(q) | np.isnan(t)
            rh = np.where(missing, fill if fill is not None else NC_FILL_FLOAT, 100.0 * e / es)
            out[...] = rh.astype(np.float32)


def virtual_temperature(t, q, eps=EPS):
    """Tv = T (1 + (1/eps - 1) q), float64 (GUIDE section 2)."""
    tv = t.astype(np.float64)
    tv *= 1.0 + (1.0 / eps - 1.0) * q.astype(np.float64)
    return tv


class Columns:
    """Heights of every column of one time step, and what thickness needs to interpolate.

    Arrays are [level, lat, lon] with the levels bottom-up (p[0] the highest pressure).
    """

    def __init__(self, p, tv, ps, zs, rd=RD, g0=G0):
        n = p.shape[0]
        rd_g0 = rd / g0
        kappa = rd_g0 * GAMMA
        ln_p = np.log(p)
        pow_kappa = np.exp(kappa * ln_p)
        ln_ratio = np.zeros(n)
        ln_ratio[1:] = np.log(p[:-1] / p[1:])
        shape3 = (n,) + (1,) * ps.ndim

        with np.errstate(invalid="ignore", divide="ignore"):
            # The first k0 levels are below the ground (levels strictly decreasing).
            k0 = np.count_nonzero(p.reshape(shape3) > ps, axis=0)
            k0c = np.minimum(k0, n - 1)
            tv0 = np.take_along_axis(tv, k0c[np.newaxis], axis=0)[0]
            p0 = p[k0c]
            at_surface = p0 == ps
            ln_ps = np.log(ps)
            ps_pow = np.exp(kappa * ln_ps)
            tv_s = np.where(at_surface, tv0, tv0 * (ps_pow / pow_kappa[k0c]))
            usable0 = np.isfinite(tv0) & (tv0 > 0.0)
            ok = (k0 < n) & usable0 & np.isfinite(ps) & (ps > 0.0) & np.isfinite(zs)
            z0 = np.where(
                at_surface,
                zs,
                zs + rd_g0 * logarithmic_mean_temperature(tv_s, tv0) * (ln_ps - ln_p[k0c]),
            )

            # Above the ground: z[k] = z0 + the thicknesses of layers k0+1..k. Layers at or
            # below k0 contribute nothing (their temperatures may be fill values); a missing
            # Tv makes its layer NaN, and the cumulative sum carries the NaN to every level
            # above, which masks them as the column code does.
            levels = np.arange(n).reshape(shape3)
            dz = np.empty_like(tv)
            dz[0] = 0.0
            dz[1:] = logarithmic_mean_temperature(tv[:-1], tv[1:])
            dz[1:] *= rd_g0 * ln_ratio[1:].reshape((n - 1,) + (1,) * ps.ndim)
            np.copyto(dz, 0.0, where=levels <= k0)
            np.cumsum(dz, axis=0, out=dz)
            z = dz
            z += z0

            # Below the ground: the 6.5 K/km polytrope from the surface.
            below = levels < k0
            tv_below = (tv_s / ps_pow) * pow_kappa.reshape(shape3)
            z_below = zs - (tv_below - tv_s) / GAMMA
            np.copyto(z, z_below, where=below)
            z[:, ~ok] = np.nan
            below &= ok

        self.p, self.ln_p, self.tv, self.z, self.below = p, ln_p, tv, z, below
        self.ps, self.zs, self.tv_s, self.k0, self.ok = ps, zs, tv_s, k0, ok
        self.kappa = kappa

    def height_at_pressure(self, p_star):
        """Height (gpm) at pressure p_star on every column, as ColumnNodes::height_at_pressure.

        Below the lowest node, and between below-ground nodes (which lie on the same 6.5 K/km
        polytrope), the polytrope from the surface; between nodes above the ground, the
        constant-lapse-rate interpolation Z = Z1 + (Z2 - Z1) h(p)/h(p2); NaN above the top
        level or where masked.
        """
        p, n = self.p, self.p.shape[0]
        with np.errstate(invalid="ignore", divide="ignore"):
            tv_ext = self.tv_s * np.exp(self.kappa * np.log(p_star / self.ps))
            extrapolated = self.zs - (tv_ext - self.tv_s) / GAMMA
            if p_star < p[-1]:
                return np.full(self.ps.shape, np.nan)
            # The last level with p[j] >= p_star (the same for every column).
            j = int(np.searchsorted(-p, -p_star, side="right")) - 1
            if j >= 0 and p[j] == p_star:
                on_level = self.z[j]
                return np.where(self.ok, on_level, np.nan)
            if j == n - 1:
                return np.full(self.ps.shape, np.nan)
            # Lower node: level j where it is above the ground, else the surface.
            lower_is_level = j >= self.k0 if j >= 0 else np.zeros(self.ps.shape, bool)
            if j >= 0:
                p1 = np.where(lower_is_level, p[j], self.ps)
                t1 = np.where(lower_is_level, self.tv[j], self.tv_s)
                z1 = np.where(lower_is_level, self.z[j], self.zs)
            else:
                p1, t1, z1 = self.ps, self.tv_s, self.zs
            p2, t2, z2 = p[j + 1], self.tv[j + 1], self.z[j + 1]
            big_x = np.log(p1 / p2)
            x = np.log(p1 / p_star)
            kap = np.log(t1 / t2) / big_x
            frac = x * one_minus_exp_neg_over(kap * x) / (big_x * one_minus_exp_neg_over(kap * big_x))
            interpolated = z1 + (z2 - z1) * frac
            # Below the surface the nodes all lie on the surface's polytrope, so interpolating
            # between them and extrapolating from the surface are the same curve.
            out = np.where(p_star > self.ps, extrapolated, interpolated)
            return np.where(self.ok, out, np.nan)


def compute_step(p, t, q, ps, zs, layers, rd=RD, g0=G0, relative=False):
    """Heights (float32), below-ground flags (int8) and layer thicknesses (float32) of one
    time step; t and q are [level, lat, lon] float32 with NaN where missing (q relative
    humidity, a fraction, with `relative`)."""
    if relative:
        q = specific_from_relative_humidity(p, t, q)
    cols = Columns(p, virtual_temperature(t, q), ps, zs, rd, g0)
    thick = []
    for bottom_pa, top_pa in layers:
        bottom = cols.height_at_pressure(bottom_pa)
        top = cols.height_at_pressure(top_pa)
        flags = bottom_pa > ps
        thick.append(((top - bottom).astype(np.float32), flags.astype(np.int8)))
    return cols.z.astype(np.float32), cols.below.astype(np.int8), thick


# -------------------------------------------------------------------------------------------
# Reading and writing with netCDF4.
# -------------------------------------------------------------------------------------------


def find_by_standard_name(ds, name, ndim=None):
    for var in ds.variables.values():
        if getattr(var, "standard_name", None) == name and (ndim is None or var.ndim == ndim):
            return var
    raise SystemExit(f"'{ds.filepath()}' has no variable with standard_name '{name}'")


def read_field(var):
    """A float32 array with _FillValue / missing_value as NaN and packing applied."""
    var.set_auto_maskandscale(False)
    raw = var[...]
    values = np.asarray(raw, dtype=np.float32)
    for attr in ("_FillValue", "missing_value"):
        fill = getattr(var, attr, None)
        if fill is not None:
            values = np.where(values == np.float32(fill), np.float32(np.nan), values)
    if var.dtype != np.float32 and "_FillValue" not in var.ncattrs():
        values = np.where(values == NC_FILL_FLOAT, np.float32(np.nan), values)
    scale = getattr(var, "scale_factor", None)
    offset = getattr(var, "add_offset", None)
    if scale is not None or offset is not None:
        values = (values * np.float32(scale if scale is not None else 1.0)
                  + np.float32(offset if offset is not None else 0.0)).astype(np.float32)
    return values


def read_cycle(path):
    """The synthetic global cycle's fields: T and q [time, level, lat, lon] bottom-up, surface
    pressure [time, lat, lon] (Pa), surface height [lat, lon] (gpm), levels (Pa)."""
    with netCDF4.Dataset(path) as ds:
        level_var = find_by_standard_name(ds, "air_pressure", ndim=1)
        p = np.asarray(level_var[:], dtype=np.float64)
        units = getattr(level_var, "units", "Pa")
        if units in ("hPa", "mbar", "millibar"):
            p = p * 100.0
        elif units != "Pa":
            raise SystemExit(f"levels '{level_var.name}' in '{path}' have units '{units}': expected Pa or hPa")
        t = read_field(find_by_standard_name(ds, "air_temperature", ndim=4))
        relative = not any(getattr(v, "standard_name", None) == "specific_humidity" for v in ds.variables.values())
        if relative:
            rh_var = find_by_standard_name(ds, "relative_humidity", ndim=4)
            # Percent or a fraction, as the crate reads it.
            q = read_field(rh_var) / np.float32(100.0 if getattr(rh_var, "units", "1") == "%" else 1.0)
        else:
            q = read_field(find_by_standard_name(ds, "specific_humidity", ndim=4))
        ps = read_field(find_by_standard_name(ds, "surface_air_pressure"))
        phi_var = find_by_standard_name(ds, "surface_geopotential")
        phi = read_field(phi_var)
        dims = find_by_standard_name(ds, "air_temperature", ndim=4).dimensions
        lat = np.asarray(find_coord(ds, dims[2]))
        lon = np.asarray(find_coord(ds, dims[3]))
        time_values = np.asarray(find_coord(ds, dims[0]))
    if getattr(phi_var, "units", "m2 s-2") not in ("m2 s-2", "m2/s2", "m**2 s**-2"):
        raise SystemExit(f"surface_geopotential in '{path}' has units '{phi_var.units}': expected m2 s-2")
    # The crate stores the surface height in float32 after dividing by g0.
    zs = (phi.astype(np.float64) / G0).astype(np.float32)
    if ps.ndim == 2:
        ps = ps[np.newaxis]
    if zs.ndim == 3:
        zs = zs[0]
    if p.shape[0] > 1 and p[0] < p[-1]:
        p = p[::-1].copy()
        t = t[:, ::-1]
        q = q[:, ::-1]
    return {"p": p, "t": t, "q": q, "ps": ps, "zs": zs, "lat": lat, "lon": lon, "time": time_values,
            "relative": relative}


def find_coord(ds, dim):
    if dim in ds.variables:
        return ds.variables[dim][:]
    return np.arange(len(ds.dimensions[dim]), dtype=np.float64)


def parse_layers(text):
    layers = []
    if not text.strip():
        return layers
    for part in text.split(","):
        try:
            bottom, top = (float(x) for x in part.split(":"))
        except ValueError:
            raise SystemExit(f"layer '{part}': expected BOTTOM:TOP in hPa, such as 1000:500")
        if not bottom > top > 0.0:
            raise SystemExit(f"layer '{part}': the bottom pressure must be greater than the top pressure")
        layers.append((bottom * 100.0, top * 100.0))
    return layers


def layer_name(bottom_pa, top_pa):
    def hpa(x):
        v = x / 100.0
        return f"{v:g}".replace(".", "p")
    return f"thickness_{hpa(bottom_pa)}_{hpa(top_pa)}"


def write_heights(path, cycle, z, below, thick, layers):
    """Heights (float32, uncompressed, as the Rust batch writes by default), below-ground
    flags and thicknesses, written beside the target and renamed into place."""
    directory = os.path.dirname(os.path.abspath(path))
    fd, tmp = tempfile.mkstemp(prefix=".numpy_baseline_", suffix=".nc", dir=directory)
    os.close(fd)
    try:
        with netCDF4.Dataset(tmp, "w", format="NETCDF4") as ds:
            ds.Conventions = "CF-1.8"
            ds.title = "geopotential heights from the NumPy baseline of the hypsogrid benchmarks"
            nt, nl, ny, nx = z.shape
            ds.createDimension("time", nt)
            ds.createDimension("air_pressure", nl)
            ds.createDimension("latitude", ny)
            ds.createDimension("longitude", nx)
            for name, values, attrs in (
                ("time", cycle["time"], {"standard_name": "time"}),
                ("air_pressure", cycle["p"], {"standard_name": "air_pressure", "units": "Pa"}),
                ("latitude", cycle["lat"], {"standard_name": "latitude", "units": "degrees_north"}),
                ("longitude", cycle["lon"], {"standard_name": "longitude", "units": "degrees_east"}),
            ):
                var = ds.createVariable(name, "f8", (name,))
                var.setncatts(attrs)
                var[:] = values
            dims = ("time", "air_pressure", "latitude", "longitude")
            var = ds.createVariable("geopotential_height", "f4", dims, fill_value=NC_FILL_FLOAT)
            var.setncatts({"standard_name": "geopotential_height", "units": "m"})
            var.set_auto_maskandscale(False)
            var[...] = np.where(np.isnan(z), NC_FILL_FLOAT, z)
            var = ds.createVariable("below_ground", "i1", dims)
            var.set_auto_maskandscale(False)
            var[...] = below
            for (bottom_pa, top_pa), (values, flags) in zip(layers, thick):
                name = layer_name(bottom_pa, top_pa)
                var = ds.createVariable(name, "f4", dims[:1] + dims[2:], fill_value=NC_FILL_FLOAT)
                var.setncatts({
                    "standard_name": "atmosphere_layer_thickness_expressed_as_geopotential_height_difference",
                    "units": "m",
                    "layer_bottom_pressure": bottom_pa,
                    "layer_top_pressure": top_pa,
                })
                var.set_auto_maskandscale(False)
                var[...] = np.where(np.isnan(values), NC_FILL_FLOAT, values)
                var = ds.createVariable(name + "_below_ground", "i1", dims[:1] + dims[2:])
                var.set_auto_maskandscale(False)
                var[...] = flags
        os.replace(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.remove(tmp)
        raise


def compute_cycle(cycle, layers, rd=RD, g0=G0):
    p = cycle["p"]
    nt = cycle["t"].shape[0]
    zs = cycle["zs"].astype(np.float64)
    z_all = np.empty(cycle["t"].shape, dtype=np.float32)
    below_all = np.empty(cycle["t"].shape, dtype=np.int8)
    thick_all = [(np.empty((nt,) + zs.shape, np.float32), np.empty((nt,) + zs.shape, np.int8)) for _ in layers]
    for it in range(nt):
        ps = cycle["ps"][min(it, cycle["ps"].shape[0] - 1)].astype(np.float64)
        z, below, thick = compute_step(p, cycle["t"][it], cycle["q"][it], ps, zs, layers, rd, g0,
                                       cycle.get("relative", False))
        z_all[it], below_all[it] = z, below
        for (tv, tf), (v, f) in zip(thick_all, thick):
            tv[it], tf[it] = v, f
    return z_all, below_all, thick_all


# -------------------------------------------------------------------------------------------
# Comparison with the Rust output.
# -------------------------------------------------------------------------------------------


def compare_with(path, cycle, z, below, thick, layers):
    """Max and RMS differences of heights (and thicknesses) against a file from
    `hypsogrid compute`; levels are matched by pressure."""
    with netCDF4.Dataset(path) as ds:
        var = find_by_standard_name(ds, "geopotential_height", ndim=4)
        other = read_field(var)
        level_var = ds.variables[var.dimensions[1]]
        p_other = np.asarray(level_var[:], dtype=np.float64)
        if getattr(level_var, "units", "Pa") == "hPa":
            p_other = p_other * 100.0
        below_other = None
        if "below_ground" in ds.variables:
            b = ds.variables["below_ground"]
            b.set_auto_maskandscale(False)
            below_other = np.asarray(b[...], dtype=np.int8)
        thick_other = {}
        for v in ds.variables.values():
            if getattr(v, "standard_name", "") == "atmosphere_layer_thickness_expressed_as_geopotential_height_difference":
                key = (float(v.layer_bottom_pressure), float(v.layer_top_pressure))
                thick_other[key] = read_field(v)
    order = []
    for pk in cycle["p"]:
        match = np.nonzero(np.abs(p_other - pk) <= 1e-6 * pk)[0]
        if match.size != 1:
            raise SystemExit(f"level {pk / 100:g} hPa is not in '{path}'")
        order.append(int(match[0]))
    other = other[:, order]
    if other.shape != z.shape:
        raise SystemExit(f"'{path}' has heights of shape {other.shape}, the baseline {z.shape}")

    def stats(a, b):
        both = np.isfinite(a) & np.isfinite(b)
        d = a[both].astype(np.float64) - b[both].astype(np.float64)
        return {
            "compared": int(both.sum()),
            "missing_in_one_only": int((np.isfinite(a) ^ np.isfinite(b)).sum()),
            "max_abs_m": float(np.max(np.abs(d))) if d.size else None,
            "rms_m": float(np.sqrt(np.mean(d * d))) if d.size else None,
        }

    record = {"stage": "check", "against": path, "geopotential_height": stats(z, other)}
    worst = int(np.nanargmax(np.abs(z.astype(np.float64) - other))) if np.isfinite(other).any() else None
    if worst is not None:
        it, k, r, c = np.unravel_index(worst, z.shape)
        record["geopotential_height"]["worst_at"] = {
            "time": int(it), "level_hpa": float(cycle["p"][k] / 100.0), "row": int(r), "col": int(c),
            "baseline_m": float(z[it, k, r, c]), "rust_m": float(other[it, k, r, c]),
        }
    if below_other is not None:
        record["below_ground_flags_differing"] = int((below_other[:, order] != below).sum())
    missing = []
    for (bottom_pa, top_pa), (values, _flags) in zip(layers, thick):
        for key, theirs in thick_other.items():
            if abs(key[0] - bottom_pa) <= 1e-6 * bottom_pa and abs(key[1] - top_pa) <= 1e-6 * top_pa:
                record[layer_name(bottom_pa, top_pa)] = stats(values, theirs)
                break
        else:
            missing.append(layer_name(bottom_pa, top_pa))
    # A layer the baseline computed that the other file lacks is a difference too.
    record["layers_missing_in_other"] = missing
    emit(record)
    return record


# -------------------------------------------------------------------------------------------
# Invented grids: in-memory timing on 0.25 degrees, and the smoke run.
# -------------------------------------------------------------------------------------------


# The 37 isobaric levels many global producers distribute, hPa, bottom-up (the set src/demo.rs
# gives a 37-level synthetic cycle).
STANDARD_37_LEVELS_HPA = (
    1000, 975, 950, 925, 900, 875, 850, 825, 800, 775, 750, 700, 650, 600, 550, 500, 450, 400,
    350, 300, 250, 225, 200, 175, 150, 125, 100, 70, 50, 30, 20, 10, 7, 5, 3, 2, 1,
)


def synthetic_levels(n):
    """Levels of an invented grid, Pa, bottom-up, as src/demo.rs chooses them: the common
    37-level set for 37 levels, else evenly spaced in ln p from 1000 to 1 hPa."""
    if n == 1:
        return np.array([100000.0])
    if n == len(STANDARD_37_LEVELS_HPA):
        return np.array(STANDARD_37_LEVELS_HPA, dtype=np.float64) * 100.0
    return 100000.0 * (1.0e-3 ** (np.arange(n) / (n - 1)))


def invented_grid(rows, cols, levels, seed=20310114):
    """Plausible invented fields on a global grid: a polytropic troposphere whose sea-level
    virtual temperature falls toward the poles, an isothermal stratosphere, invented
    mountains, humidity that falls with height, surface pressure from the polytrope. Levels
    below the ground carry values too (as the synthetic files do): they are not used."""
    rng = np.random.default_rng(seed)
    p = synthetic_levels(levels)
    lat = np.linspace(90.0, -90.0, rows)
    lon = np.arange(cols) * (360.0 / cols)
    phi, lam = np.meshgrid(np.radians(lat), np.radians(lon), indexing="ij")
    s2 = np.sin(phi) ** 2
    tv0 = 301.0 - 42.0 * s2 + 6.0 * np.cos(3.0 * lam) * np.sin(2.0 * phi) ** 2
    p_msl = 101300.0 - 1200.0 * np.sin(2.0 * phi) ** 2 * np.cos(2.0 * lam)
    lapse = 0.0065
    kappa = RD * lapse / G0
    p_trop = 10000.0 + 20000.0 * s2
    ground = np.zeros_like(phi)
    for mlat, mlon, peak, radius in ((35.0, 90.0, 4800.0, 11.0), (45.0, 250.0, 2600.0, 8.0),
                                     (-20.0, 292.0, 3800.0, 5.0), (72.0, 318.0, 2900.0, 9.0)):
        dlon = (np.degrees(lam) - mlon + 540.0) % 360.0 - 180.0
        dx = dlon * max(math.cos(math.radians(mlat)), 0.05)
        ground += peak * np.exp(-((np.degrees(phi) - mlat) ** 2 + dx ** 2) / radius ** 2)
    ps = p_msl * (1.0 - lapse * ground / tv0) ** (1.0 / kappa)
    t = np.empty((levels, rows, cols), np.float32)
    q = np.empty((levels, rows, cols), np.float32)
    tv_trop = tv0 * (p_trop / p_msl) ** kappa
    for k, pk in enumerate(p):
        tv = np.maximum(tv0 * (pk / p_msl) ** kappa, tv_trop)
        qk = 0.012 * (1.0 - 0.7 * s2) * np.clip((pk - 30000.0) / 70000.0, 0.0, 1.0) ** 2 + 3e-6
        qk = qk * (1.0 + 0.05 * rng.standard_normal((rows, cols)))
        # At most 90 % relative humidity (WMO-No. 8 Magnus form over water, at the temperature
        # of the uncapped humidity; capping warms the air, which only lowers it): the cold
        # polar columns would otherwise hold three times the vapour saturation allows, which a
        # reader rightly refuses once the file carries relative humidity (compare.sh RH=1).
        t_first = (tv / (1.0 + (1.0 / EPS - 1.0) * qk))[np.newaxis]
        qk = np.fmin(qk, specific_from_relative_humidity(np.array([pk]), t_first, np.full(t_first.shape, 0.9))[0])
        t[k] = tv / (1.0 + (1.0 / EPS - 1.0) * qk)
        q[k] = qk
    return {
        "p": p, "t": t[np.newaxis], "q": q[np.newaxis],
        "ps": ps.astype(np.float32)[np.newaxis], "zs": ground.astype(np.float32),
        "lat": lat, "lon": lon, "time": np.array([0.0]),
    }


# U.S. Standard Atmosphere 1976 below 84.852 km': base geopotential heights (m') and lapse
# rates (K per m'), GUIDE section 2.
USSA_LAYERS = ((0.0, -0.0065), (11000.0, 0.0), (20000.0, 0.001), (32000.0, 0.0028),
               (47000.0, 0.0), (51000.0, -0.0028), (71000.0, -0.002))


def ussa_bases():
    """(pressure Pa, temperature K, lapse rate) at the base of each layer of the U.S. Standard
    Atmosphere 1976, from its definition (R* = 8.31432 J mol-1 K-1, M0 = 0.0289644 kg mol-1,
    g0 = 9.80665 m s-2, 101325 Pa and 288.15 K at sea level)."""
    r = 8.31432 / 0.0289644
    pb, tb = 101325.0, 288.15
    bases = []
    for i, (hb, lapse) in enumerate(USSA_LAYERS):
        bases.append((pb, tb, lapse))
        h_next = USSA_LAYERS[i + 1][0] if i + 1 < len(USSA_LAYERS) else 84852.0
        t_next = tb + lapse * (h_next - hb)
        if lapse == 0.0:
            pb = pb * math.exp(-G0 * (h_next - hb) / (r * tb))
        else:
            pb = pb * (tb / t_next) ** (G0 / (r * lapse))
        tb = t_next
    return bases, pb


def ussa_temperature_at_pressure(p_pa):
    """Temperature of the U.S. Standard Atmosphere 1976 at a pressure (see ussa_bases)."""
    r = 8.31432 / 0.0289644
    bases, p_top = ussa_bases()
    if p_pa < p_top:
        raise ValueError(f"{p_pa} Pa lies above 84.852 km'")
    for i, (pb, tb, lapse) in enumerate(bases):
        p_next = bases[i + 1][0] if i + 1 < len(bases) else p_top
        if p_pa >= p_next:
            return tb if lapse == 0.0 else tb * (p_pa / pb) ** (-r * lapse / G0)
    raise ValueError(f"{p_pa} Pa lies above 84.852 km'")


def smoke():
    """A tiny run through read, compute, write and check, with analytic self-checks."""
    failures = []

    def expect(condition, message):
        if not condition:
            failures.append(message)

    # 1. The U.S. Standard Atmosphere 1976 on the mandatory levels, dry, from the sea-level
    #    surface, with the standard's own constants: the heights of GUIDE section 2 (derived
    #    from the standard's definitions), within 0.1 m (they are rounded to 0.1 m).
    table = [(1000, 110.9), (925, 762.0), (850, 1457.3), (700, 3012.2), (500, 5574.4),
             (400, 7185.4), (300, 9164.0), (250, 10362.9), (200, 11784.0), (150, 13608.4),
             (100, 16179.7), (70, 18441.6), (50, 20576.2), (30, 23848.6), (20, 26481.2),
             (10, 31054.6)]
    #    The bases of the standard's layers at 11 and 20 km' are levels too: a layer with a
    #    kink in its lapse rate is not polytropic, and the log mean is exact only without one.
    mandatory = [h * 100.0 for h, _ in table]
    kinks = [pb for pb, _, _ in ussa_bases()[0][1:3]]
    p = np.array(sorted(mandatory + kinks, reverse=True))
    rd_ussa = 8.31432 / 0.0289644
    tv = np.array([ussa_temperature_at_pressure(x) for x in p]).reshape(-1, 1, 1)
    cols = Columns(p, tv, np.array([[101325.0]]), np.array([[0.0]]), rd=rd_ussa)
    worst = max(abs(cols.z[list(p).index(pm), 0, 0] - zt) for pm, (_, zt) in zip(mandatory, table))
    expect(worst <= 0.1, f"standard atmosphere: worst difference {worst:.3f} m > 0.1 m")
    # Between levels the same column follows the standard: 600 hPa by the hypsometric
    # equation on the troposphere's polytrope, Z = T0/Gamma (1 - (p/p0)^(R Gamma/g0)).
    z600 = cols.height_at_pressure(60000.0)[0, 0]
    want600 = 288.15 / 0.0065 * (1.0 - (60000.0 / 101325.0) ** (rd_ussa * 0.0065 / G0))
    expect(abs(z600 - want600) < 1e-6, f"600 hPa: {z600} vs {want600}")

    # 2. An isothermal dry column with the surface on the lowest level: Z = Zs + (Rd T/g0)
    #    ln(ps/p) exactly (Wallace and Hobbs 2006, section 3.2.2).
    p = synthetic_levels(37)
    cols = Columns(p, np.full((37, 1, 1), 240.0), np.array([[100000.0]]), np.array([[12.0]]))
    want = 12.0 + RD * 240.0 / G0 * np.log(100000.0 / p)
    err = float(np.max(np.abs(cols.z[:, 0, 0] - want)))
    expect(err < 1e-8, f"isothermal column: {err} m")

    # 3. A column on a mountain: below-ground levels warm by 6.5 K per km downward from the
    #    surface, heights increase upward, and a missing level masks it and everything above.
    tv = np.array([ussa_temperature_at_pressure(x) for x in p]).reshape(-1, 1, 1)
    tv[0] = np.nan  # a fill value below the ground must not matter
    ps, zs = np.array([[69000.0]]), np.array([[3100.0]])
    cols = Columns(p, tv, ps, zs)
    k0 = int(cols.k0[0, 0])
    # A 690 hPa surface: every level from 1000 to 700 hPa lies below it.
    want_k0 = int(np.count_nonzero(p > 69000.0))
    expect(k0 == want_k0, f"levels below the 690 hPa surface: {k0}, expected {want_k0}")
    tv_s = float(cols.tv_s[0, 0])
    for k in range(k0):
        tvk = tv_s * (p[k] / 69000.0) ** (RD * 0.0065 / G0)
        lapse = (tvk - tv_s) / (3100.0 - cols.z[k, 0, 0])
        expect(abs(lapse - 0.0065) < 1e-12, f"below-ground lapse rate at level {k}: {lapse}")
    expect(bool(np.all(np.diff(cols.z[:, 0, 0]) > 0)), "heights do not increase upward")
    # A missing level above the ground masks it and everything above; one below the ground
    # (level 1 here) changes nothing.
    gap_level = k0 + 5
    tv_gap = tv.copy()
    tv_gap[gap_level] = np.nan
    tv_gap[1] = np.nan
    gap = Columns(p, tv_gap, ps, zs).z[:, 0, 0]
    expect(bool(np.all(np.isnan(gap[gap_level:])) and np.all(gap[:gap_level] == cols.z[:gap_level, 0, 0])),
           "a missing level must mask it and the levels above only")

    # 4. Relative humidity to specific humidity: 50 % at 20 deg C and 1000 hPa. By hand, from
    #    the WMO-No. 8 Magnus form: e_s = 611.2 exp(17.62 * 20 / 263.12) = 2332.6 Pa (IAPWS
    #    gives 2339 Pa, from memory: the form's stated accuracy), e = 1166.3 Pa, q = eps e /
    #    (p - (1 - eps) e) = 0.0072862 kg/kg. Saturated air above its own pressure gives NaN.
    q = specific_from_relative_humidity(np.array([100000.0]), np.array([293.15]), np.array([0.5]))[0]
    expect(abs(q - 0.0072862) < 2e-7, f"relative humidity 50 % at 20 C, 1000 hPa: q = {q}")
    q = specific_from_relative_humidity(np.array([1000.0]), np.array([303.15]), np.array([1.0]))[0]
    expect(bool(np.isnan(q)), f"saturated at 30 C and 10 hPa: q = {q}, expected NaN")

    # 5. Read, compute, write and compare on a tiny invented file.
    cycle = invented_grid(9, 16, 37)
    layers = parse_layers(DEFAULT_LAYERS)
    with tempfile.TemporaryDirectory() as tmp:
        src = os.path.join(tmp, "tiny_input.nc")
        write_input_file(src, cycle)
        out = os.path.join(tmp, "tiny_heights.nc")
        timings = run_file(src, out, layers, repeat=1, check=None)
        record = compare_with(out, read_cycle(src), *timings["result"], layers)
        d = record["geopotential_height"]
        expect(d["max_abs_m"] == 0.0 and d["missing_in_one_only"] == 0,
               f"round trip through the output file changed heights: {d}")
    emit({"stage": "smoke", "passed": not failures, "failures": failures})
    return 0 if not failures else 1


def write_input_file(path, cycle):
    """An invented grid as a NetCDF-4 input laid out like the synthetic global cycle of
    src/demo.rs (levels bottom-up in Pa, surface geopotential), uncompressed."""
    with netCDF4.Dataset(path, "w", format="NETCDF4") as ds:
        ds.Conventions = "CF-1.8"
        ds.comment = "INVENTED DATA written by benches/numpy_baseline.py, for timing and tests only"
        nt, nl, ny, nx = cycle["t"].shape
        for name, size in (("time", nt), ("pressure", nl), ("latitude", ny), ("longitude", nx)):
            ds.createDimension(name, size)
        for name, values, attrs in (
            ("time", cycle["time"], {"standard_name": "time", "units": "hours since 2031-01-14 00:00:00"}),
            ("pressure", cycle["p"], {"standard_name": "air_pressure", "units": "Pa"}),
            ("latitude", cycle["lat"], {"standard_name": "latitude", "units": "degrees_north"}),
            ("longitude", cycle["lon"], {"standard_name": "longitude", "units": "degrees_east"}),
        ):
            var = ds.createVariable(name, "f8", (name,))
            var.setncatts(attrs)
            var[:] = values
        dims = ("time", "pressure", "latitude", "longitude")
        for name, std, units, dd, values in (
            ("temperature", "air_temperature", "K", dims, cycle["t"]),
            ("specific_humidity", "specific_humidity", "kg kg-1", dims, cycle["q"]),
            ("surface_pressure", "surface_air_pressure", "Pa", ("time", "latitude", "longitude"), cycle["ps"]),
            ("surface_geopotential", "surface_geopotential", "m2 s-2", ("latitude", "longitude"),
             (cycle["zs"].astype(np.float64) * G0).astype(np.float32)),
        ):
            var = ds.createVariable(name, "f4", dd, fill_value=NC_FILL_FLOAT)
            var.setncatts({"standard_name": std, "units": units})
            var[...] = values


# -------------------------------------------------------------------------------------------
# Runs.
# -------------------------------------------------------------------------------------------


def grid_record(cycle):
    nt, nl, ny, nx = cycle["t"].shape
    return {"times": nt, "levels": nl, "rows": ny, "cols": nx, "columns": nt * ny * nx}


def run_file(src, out, layers, repeat, check):
    """Read, compute and write `repeat` times, one JSON line per stage and repeat."""
    result = None
    for i in range(repeat):
        start = time.perf_counter()
        cycle = read_cycle(src)
        t_read = time.perf_counter()
        result = compute_cycle(cycle, layers)
        t_compute = time.perf_counter()
        write_heights(out, cycle, *result, layers)
        t_write = time.perf_counter()
        grid = grid_record(cycle)
        for stage, seconds in (("read", t_read - start), ("compute", t_compute - t_read),
                               ("write", t_write - t_compute), ("whole", t_write - start)):
            emit({"stage": stage, "seconds": round(seconds, 4), "repeat": i, "input": src,
                  "grid": grid, "layers": len(layers)})
    if check:
        compare_with(check, cycle, *result, layers)
    return {"result": result}


def run_grid(step, repeat, layers, save):
    rows, cols = int(round(180 / step)) + 1, int(round(360 / step))
    start = time.perf_counter()
    cycle = invented_grid(rows, cols, 37)
    emit({"stage": "generate", "seconds": round(time.perf_counter() - start, 4), "grid": grid_record(cycle),
          "note": "invented in-memory fields, not timed as part of the compute"})
    if save:
        write_input_file(save, cycle)
        emit({"stage": "saved", "path": save, "note": "the invented grid as an input file for `hypsogrid compute`"})
    for i in range(repeat):
        start = time.perf_counter()
        compute_cycle(cycle, layers)
        emit({"stage": "compute", "seconds": round(time.perf_counter() - start, 4), "repeat": i,
              "input": f"in-memory {step} degree grid", "grid": grid_record(cycle), "layers": len(layers)})


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--input", help="input cycle (the synthetic global NetCDF-4 cycle of the Rust benches)")
    parser.add_argument("--output", help="heights file to write (default: a temporary file, removed)")
    parser.add_argument("--repeat", type=int, default=3, help="runs of each stage (default 3)")
    parser.add_argument("--check", metavar="RUST_OUTPUT.nc",
                        help="compare heights and thicknesses with this output of `hypsogrid compute`")
    parser.add_argument("--layers", default=DEFAULT_LAYERS,
                        help="layers for thickness, BOTTOM:TOP in hPa, comma separated; '' for none "
                             f"(default {DEFAULT_LAYERS}, as `hypsogrid compute`)")
    parser.add_argument("--grid", type=float, choices=(0.25, 0.5, 5.0),
                        help="time the compute step alone on an invented in-memory grid of this spacing, "
                             "degrees (5 is for smoke runs: 37 x 72 columns)")
    parser.add_argument("--save-grid", metavar="FILE",
                        help="with --grid: also write the invented grid as a NetCDF-4 input file, so that "
                             "`hypsogrid compute` and --input can run on the same data")
    parser.add_argument("--smoke", action="store_true", help="a tiny fast run with self-checks")
    parser.add_argument("--relative-humidity-copy", metavar="IN.nc",
                        help="write IN.nc to --output with its specific humidity as relative humidity, and stop")
    args = parser.parse_args(argv)
    if args.repeat < 1:
        parser.error("--repeat must be at least 1")
    layers = parse_layers(args.layers)
    emit({"stage": "environment", "python": sys.version.split()[0], "numpy": np.__version__,
          "netCDF4": netCDF4.__version__, "netcdf_c": netCDF4.__netcdf4libversion__})
    if args.smoke:
        return smoke()
    if args.relative_humidity_copy:
        if not args.output:
            parser.error("--relative-humidity-copy needs --output")
        relative_humidity_copy(args.relative_humidity_copy, args.output)
        return 0
    if args.save_grid and args.grid is None:
        parser.error("--save-grid needs --grid")
    if args.grid is not None:
        run_grid(args.grid, args.repeat, layers, args.save_grid)
        return 0
    if not args.input:
        parser.error("give --input FILE, --grid 0.25 or --smoke")
    if args.output:
        run_file(args.input, args.output, layers, args.repeat, args.check)
    else:
        with tempfile.TemporaryDirectory() as tmp:
            run_file(args.input, os.path.join(tmp, "numpy_baseline_heights.nc"), layers, args.repeat, args.check)
    return 0


if __name__ == "__main__":
    sys.exit(main())
