#!/usr/bin/env python3
"""Writes an invented global cycle on hybrid sigma-pressure levels, for timing
`hypsogrid compute` on hybrid input (docs/SPEED.md, session (J)). Invented data: smooth
analytic fields, not model output, and not a forecast.

The file follows the CF conventions for `atmosphere_hybrid_sigma_pressure_coordinate`
(formula terms `ap: ap b: b ps: ps`, half levels in `ap_half` and `b_half`): one time step
(or `--times` lead times six hours apart, each step 0.5 K warmer than the one before),
levels listed top-down, latitudes north to south. The coefficients put the model top at
p = 0, make the upper levels pure pressure (b = 0) and the lowest ones terrain-following,
and bring the lowest half level to the surface (a = 0, b = 1). The terrain is a few invented
ridges up to 1500 m; the temperature is a 0.19-power profile of pressure with a cosine of
latitude, floored at 210 K; the specific humidity falls with the cube of pressure.

    target/python-venv/bin/python benches/hybrid_cycle.py OUT.nc [--levels 137]
        [--rows 181] [--cols 360] [--times 1]
    target/release/hypsogrid compute OUT.nc --output heights.nc            # three layers
    target/release/hypsogrid compute OUT.nc --output heights.nc --heights-only
"""

import argparse

import netCDF4
import numpy as np


def coefficients(levels):
    """Half-level a (Pa) and b, top-down (index 0 is the model top, the last the surface)."""
    eta = np.linspace(0.0, 1.0, levels + 1) ** 1.6
    p0 = 100_000.0
    b = np.clip((eta - 0.15) / 0.85, 0.0, 1.0) ** 1.3
    a = (eta - b) * p0
    a[0], a[-1], b[-1] = 0.0, 0.0, 1.0
    return a, b


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("output")
    parser.add_argument("--levels", type=int, default=137)
    parser.add_argument("--rows", type=int, default=181)
    parser.add_argument("--cols", type=int, default=360)
    parser.add_argument("--times", type=int, default=1)
    args = parser.parse_args()
    nlev, ny, nx = args.levels, args.rows, args.cols
    a, b = coefficients(nlev)
    am, bm = 0.5 * (a[:-1] + a[1:]), 0.5 * (b[:-1] + b[1:])

    f = netCDF4.Dataset(args.output, "w")
    f.Conventions = "CF-1.8"
    f.title = "invented global cycle on hybrid levels (hypsogrid benches, not model output)"
    f.createDimension("time", args.times)
    f.createDimension("lev", nlev)
    f.createDimension("ilev", nlev + 1)
    f.createDimension("lat", ny)
    f.createDimension("lon", nx)
    lat_deg = np.linspace(90.0, -90.0, ny)
    lon_deg = np.arange(nx) * 360.0 / nx
    for name, units, std, values in [
        ("lat", "degrees_north", "latitude", lat_deg),
        ("lon", "degrees_east", "longitude", lon_deg),
    ]:
        v = f.createVariable(name, "f8", (name,))
        v.units, v.standard_name = units, std
        v[:] = values
    t = f.createVariable("time", "f8", ("time",))
    t.units, t.standard_name = "hours since 2031-01-01 00:00:00", "time"
    t[:] = 6.0 * np.arange(args.times)
    lev = f.createVariable("lev", "f8", ("lev",))
    lev.standard_name = "atmosphere_hybrid_sigma_pressure_coordinate"
    lev.units, lev.positive = "1", "down"
    lev.formula_terms = "ap: ap b: b ps: ps"
    lev[:] = am / 100_000.0 + bm
    for name, units, values, dim in [
        ("ap", "Pa", am, "lev"),
        ("b", "1", bm, "lev"),
        ("ap_half", "Pa", a, "ilev"),
        ("b_half", "1", b, "ilev"),
    ]:
        v = f.createVariable(name, "f8", (dim,))
        v.units = units
        v[:] = values

    la = np.radians(lat_deg)[:, None]
    lo = np.radians(lon_deg)[None, :]
    zs = np.maximum(0.0, 1500.0 * np.sin(3.0 * lo) * np.cos(2.0 * la))
    ps = 101_325.0 * np.exp(-zs / 8000.0)
    p = am[:, None, None] + bm[:, None, None] * ps[None]
    temperature = np.maximum(288.0 * (p / 101_325.0) ** 0.19 + 5.0 * np.cos(la), 210.0)
    humidity = 0.01 * (p / 101_325.0) ** 3 * np.cos(la) ** 2
    for name, units, std, dims, values in [
        ("ps", "Pa", "surface_air_pressure", ("time", "lat", "lon"), ps),
        ("orog", "m", "surface_altitude", ("time", "lat", "lon"), zs),
        ("t", "K", "air_temperature", ("time", "lev", "lat", "lon"), temperature),
        ("q", "kg kg-1", "specific_humidity", ("time", "lev", "lat", "lon"), humidity),
    ]:
        v = f.createVariable(name, "f4", dims)
        v.units, v.standard_name = units, std
        for step in range(args.times):
            v[step] = values + 0.5 * step if name == "t" else values
    f.close()


if __name__ == "__main__":
    main()
