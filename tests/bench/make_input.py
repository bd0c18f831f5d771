#!/usr/bin/env python3
"""Write leeward's benchmark input: one forecast step on a global regular lat/lon grid.

    python3 tests/bench/make_input.py OUT.grib2 [--res 0.25|0.5|1.0] [--bits 16] [--force]

The step holds T, geopotential height, u and v (GRIB2 code table 4.2, discipline 0:
0/0/0, 0/3/5, 0/2/2, 0/2/3) on 26 isobaric levels from 1000 to 10 hPa, encoded with ecCodes
from its bundled GRIB2 sample, packed with complex packing and spatial differencing
(data representation template 5.3). At 0.25 degree that is 1440 x 721 points per field,
104 fields, about 108 M values.

The fields are invented but smooth and shaped like the atmosphere, so that packing and the
derivatives meet realistic data rather than constants:
- temperature: the US Standard Atmosphere 1976 column (6.5 K/km to 11 km, 216.65 K to
  20 km, +1 K/km above; computed from its defining constants) plus an equator-to-pole
  contrast that reverses above the tropopause and travelling waves of zonal wavenumber 5-7;
- geopotential height: integrated upward from 1000 hPa with the hypsometric equation
  (z2 - z1 = (R T_mean / g0) ln(p1/p2), docs/references.md) over that temperature;
- wind: a baroclinic mid-latitude jet in each hemisphere peaking near 250 hPa, weak
  tropical easterlies and wave perturbations in u and v, all vanishing at the poles.

The file is written to a temporary name and renamed; a JSON note beside it
(OUT.grib2.params.json) records the parameters, so a second call with the same parameters
does nothing (use --force to rewrite).
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import time
from pathlib import Path

import numpy as np
import eccodes

GENERATOR_VERSION = 1
LEVELS_HPA = (1000, 975, 950, 925, 900, 850, 800, 750, 700, 650, 600, 550, 500, 450, 400,
              350, 300, 250, 200, 150, 100, 70, 50, 30, 20, 10)

# Constants: standard gravity (CGPM 1901), dry-air gas constant (docs/references.md).
G0 = 9.80665
R_DRY = 287.05
# US Standard Atmosphere 1976 defining constants (docs/references.md "Check values").
USSA_R = 8.31432 / 28.9644e-3
USSA_T0 = 288.15
USSA_P0 = 1013.25


def ussa1976_temperature(p_hpa: float) -> float:
    """US Standard Atmosphere 1976 temperature at pressure p (hPa), 0 to 32 km."""
    # Layers up to 32 km: (lapse rate K/m, top in geopotential metres); each layer's base
    # pressure follows from the layer below with the hydrostatic equation.
    layers = [(-0.0065, 11000.0), (0.0, 20000.0), (0.001, 32000.0)]
    base_p, base_t, base_z = USSA_P0, USSA_T0, 0.0
    for lapse, top in layers:
        dz = top - base_z
        if lapse != 0.0:
            top_t = base_t + lapse * dz
            top_p = base_p * (top_t / base_t) ** (-G0 / (USSA_R * lapse))
        else:
            top_t = base_t
            top_p = base_p * np.exp(-G0 * dz / (USSA_R * base_t))
        if p_hpa >= top_p:
            if lapse != 0.0:
                return base_t * (p_hpa / base_p) ** (-USSA_R * lapse / G0)
            return base_t
        base_p, base_t, base_z = top_p, top_t, top
    return base_t


def fields_for_level(p_hpa, lat, lon, t_below=None, z_below=None, p_below=None):
    """T, Z, u, v on one level (2-D arrays, rows north to south)."""
    phi = np.radians(lat)[:, None]
    lam = np.radians(lon)[None, :]
    s = np.log(p_hpa / 250.0)
    # Temperature: standard column, meridional contrast (positive in the troposphere,
    # reversed weakly in the lower stratosphere), waves tilting westward with height.
    contrast = 22.0 * np.clip((p_hpa - 250.0) / 750.0, -0.25, 1.0)
    t = ussa1976_temperature(p_hpa) + contrast * (np.cos(phi) ** 2 - 0.5)
    tilt = 0.6 * np.log(1000.0 / p_hpa)
    wave_env = np.sin(2 * phi) ** 2
    t = t + 3.0 * wave_env * np.cos(6 * lam - tilt) + 1.5 * wave_env * np.cos(5 * lam + 1.0 - tilt)
    # Geopotential height: hypsometric equation from the level below (or a 1000 hPa
    # surface with a few highs and lows).
    if z_below is None:
        z = 110.0 + 60.0 * np.cos(phi) ** 2 + 80.0 * wave_env * np.cos(5 * lam + 0.4)
    else:
        z = z_below + (R_DRY * 0.5 * (t + t_below) / G0) * np.log(p_below / p_hpa)
    # Wind: jets at 40-45 degrees in each hemisphere, strongest near 250 hPa.
    jet_core = 42.0 + 6.0 * np.cos(5 * lam - tilt)  # a wavy jet axis
    jet = (40.0 * np.exp(-(s / 0.9) ** 2) + 6.0) * np.exp(-((np.abs(lat)[:, None] - jet_core) / 12.0) ** 2)
    easterly = -6.0 * np.cos(phi) ** 8
    u = (jet + easterly) * np.cos(phi) ** 0.5 + 5.0 * wave_env * np.cos(6 * lam - tilt) * np.cos(phi)
    v = 10.0 * np.cos(phi) * np.exp(-((np.abs(lat)[:, None] - 45.0) / 18.0) ** 2) * (
        np.sin(6 * lam - tilt) + 0.5 * np.sin(5 * lam + 1.0 - tilt))
    shape = (lat.size, lon.size)
    return (np.broadcast_to(t, shape).copy(), np.broadcast_to(z, shape).copy(),
            np.broadcast_to(u, shape).copy(), np.broadcast_to(v, shape).copy())


def encode(values, param, level_hpa, res, nlat, nlon, bits):
    h = eccodes.codes_grib_new_from_samples("GRIB2")
    try:
        for k, v in [("tablesVersion", 28), ("centre", 98), ("significanceOfReferenceTime", 1),
                     ("typeOfProcessedData", 1), ("dataDate", 20240115), ("dataTime", 0)]:
            eccodes.codes_set(h, k, v)
        for k, v in [("Ni", nlon), ("Nj", nlat), ("iScansNegatively", 0), ("jScansPositively", 0)]:
            eccodes.codes_set_long(h, k, v)
        for k, v in [("latitudeOfFirstGridPointInDegrees", 90.0),
                     ("longitudeOfFirstGridPointInDegrees", 0.0),
                     ("latitudeOfLastGridPointInDegrees", -90.0),
                     ("longitudeOfLastGridPointInDegrees", 360.0 - res),
                     ("iDirectionIncrementInDegrees", res),
                     ("jDirectionIncrementInDegrees", res)]:
            eccodes.codes_set_double(h, k, v)
        eccodes.codes_set_long(h, "shapeOfTheEarth", 6)  # code table 3.2: sphere 6,371,229 m
        for k, v in [("productDefinitionTemplateNumber", 0), ("discipline", 0),
                     ("parameterCategory", param[0]), ("parameterNumber", param[1]),
                     ("typeOfGeneratingProcess", 2), ("indicatorOfUnitForForecastTime", 1),
                     ("forecastTime", 24), ("typeOfFirstFixedSurface", 100),
                     ("scaleFactorOfFirstFixedSurface", 0),
                     ("scaledValueOfFirstFixedSurface", int(level_hpa * 100)),
                     ("typeOfSecondFixedSurface", 255)]:
            eccodes.codes_set_long(h, k, v)
        eccodes.codes_set_string(h, "packingType", "grid_complex_spatial_differencing")
        eccodes.codes_set_long(h, "bitsPerValue", bits)
        eccodes.codes_set_values(h, np.ascontiguousarray(values, dtype=float).ravel())
        return eccodes.codes_get_message(h)
    finally:
        eccodes.codes_release(h)


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("out", type=Path)
    ap.add_argument("--res", type=float, default=0.25, choices=(0.25, 0.5, 1.0),
                    help="grid spacing in degrees (default 0.25)")
    ap.add_argument("--bits", type=int, default=16, help="bits per packed value (default 16)")
    ap.add_argument("--force", action="store_true", help="rewrite even if an identical file exists")
    args = ap.parse_args(argv)

    nlon = int(round(360.0 / args.res))
    nlat = int(round(180.0 / args.res)) + 1
    params = dict(generator_version=GENERATOR_VERSION, res=args.res, nlon=nlon, nlat=nlat,
                  levels_hpa=list(LEVELS_HPA), bits=args.bits,
                  packing="grid_complex_spatial_differencing", fields=["t", "gh", "u", "v"])
    note = args.out.with_name(args.out.name + ".params.json")
    if not args.force and args.out.is_file() and note.is_file():
        try:
            old = json.loads(note.read_text())
        except ValueError:
            old = {}
        if old.get("params") == params and old.get("bytes") == args.out.stat().st_size:
            print(json.dumps({"file": str(args.out), "cached": True, **params}))
            return 0

    t0 = time.monotonic()
    lat = 90.0 - np.arange(nlat) * args.res
    lon = np.arange(nlon) * args.res
    args.out.parent.mkdir(parents=True, exist_ok=True)
    tmp = args.out.with_name(f".{args.out.name}.tmp{os.getpid()}")
    t_prev = z_prev = p_prev = None
    with open(tmp, "wb") as f:
        for lev in LEVELS_HPA:
            t, z, u, v = fields_for_level(float(lev), lat, lon, t_prev, z_prev, p_prev)
            for values, param in ((t, (0, 0)), (z, (3, 5)), (u, (2, 2)), (v, (2, 3))):
                f.write(encode(values, param, lev, args.res, nlat, nlon, args.bits))
            t_prev, z_prev, p_prev = t, z, float(lev)
        f.flush()
        os.fsync(f.fileno())
    os.replace(tmp, args.out)
    note.write_text(json.dumps({"params": params, "bytes": args.out.stat().st_size}, indent=1))
    print(json.dumps({"file": str(args.out), "cached": False, "seconds": round(time.monotonic() - t0, 1),
                      "bytes": args.out.stat().st_size, **params}))
    return 0


if __name__ == "__main__":
    sys.exit(main())
