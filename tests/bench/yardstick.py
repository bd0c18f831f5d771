#!/usr/bin/env python3
"""Yardstick for leeward's step benchmark: the same products from general-purpose libraries.

    python3 tests/bench/yardstick.py INPUT.grib2 OUT_DIR --leeward-file LEEWARD.nc [--json]

What a centre would otherwise write by hand: decode the isobaric step with ecCodes
(codes_grib_new_from_file, codes_get_values), compute the products with MetPy (pint units,
MetPy's own function wherever it has one), write them to one NetCDF-4 file with netCDF4
(float32, deflate at leeward's level, fsynced). Each stage and each product family is
timed; the products are then compared with leeward's file of the same step over 20-80
degrees of latitude in both hemispheres, with a pass/fail per family (exit code 1 if any
family disagrees). It is a measuring stick for leeward, not part of it.

The isentropic surfaces, PV surfaces, isobaric and isentropic layers are read from the
leeward file's coordinates, so that both compute the same list.

Products, by family (MetPy 1.7 functions; "numpy" where MetPy has none):
- vorticity: absolute_vorticity (eta), minus coriolis_parameter (zeta); grid spacing and
  map scale factors derived by MetPy from the 1-D latitude and longitude and the earth's
  sphere of the GRIB2 file (its nominal_lat_lon_grid_deltas and pyproj's factors);
- stability: potential_temperature (theta), static_stability (sigma = -(R T/p) dln(theta)/dp,
  turned into leeward's -dtheta/dp = sigma p theta/(R T)), brunt_vaisala_frequency_squared
  from the isobaric geopotential height (n2);
- pv: potential_vorticity_baroclinic on the isobaric levels (full baroclinic form);
- isentropic: isentropic_interpolation (pressure, temperature, u, v, height), then
  montgomery_streamfunction;
- isen_pv: potential_vorticity_baroclinic on the isentropic surfaces;
- tropopause: numpy, top-down search for the first crossing of +2 PVU (north) / -2 PVU
  (south) below a stratospheric top level, linear in PV, applied in ln p;
- thickness: numpy, differences of the isobaric geopotential height (MetPy's
  thickness_hydrostatic works on one profile at a time);
- layer: numpy trapezoidal mass-weighted layer-mean wind between two isentropic surfaces,
  then absolute_vorticity of it over the layer's pressure depth.

Longitudes of a global grid are padded by one column on each side before MetPy's
horizontal derivatives (MetPy does not wrap a periodic grid), and the padding removed.
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import sys
import time
import warnings
from pathlib import Path

import pyproj  # before ecCodes
import numpy as np
import eccodes
import netCDF4

import metpy
import metpy.calc as mpcalc
import metpy.constants as mpconsts
from metpy.units import units

#: GRIB2 short names read from the step (temperature, geopotential height, wind).
FIELDS = ("t", "gh", "u", "v")
#: Earth radius by GRIB2 code table 3.2 where the file gives none (shapes 0 and 6).
RADIUS_BY_SHAPE = {0: 6367470.0, 6: 6371229.0}
#: 1 PVU in SI units.
PVU = 1e-6
SI_PV = "K m^2 / kg / s"
#: Latitude band of the comparison, both hemispheres (degrees).
BAND = (20.0, 80.0)
FILL = netCDF4.default_fillvals["f4"]


def peak_rss_mib() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0


# --------------------------------------------------------------------------- stage 1


def decode(path):
    """Isobaric T, gh, u, v as (levels, lat, lon) float64 arrays, pressure increasing,
    latitude increasing; with the grid and the earth radius."""
    cubes = {name: {} for name in FIELDS}
    grid = None
    with open(path, "rb") as f:
        while True:
            h = eccodes.codes_grib_new_from_file(f)
            if h is None:
                break
            try:
                if eccodes.codes_get(h, "typeOfLevel") != "isobaricInhPa":
                    continue
                name = eccodes.codes_get(h, "shortName")
                if name not in cubes:
                    continue
                level = float(eccodes.codes_get(h, "level"))
                if grid is None:
                    if eccodes.codes_get(h, "gridType") != "regular_ll":
                        raise SystemExit(f"{path}: only regular lat/lon grids are handled")
                    ni = eccodes.codes_get(h, "Ni")
                    nj = eccodes.codes_get(h, "Nj")
                    lat0 = eccodes.codes_get_double(h, "latitudeOfFirstGridPointInDegrees")
                    lat1 = eccodes.codes_get_double(h, "latitudeOfLastGridPointInDegrees")
                    lon0 = eccodes.codes_get_double(h, "longitudeOfFirstGridPointInDegrees")
                    dlon = eccodes.codes_get_double(h, "iDirectionIncrementInDegrees")
                    if eccodes.codes_get(h, "iScansNegatively"):
                        dlon = -dlon
                    if eccodes.codes_get(h, "jPointsAreConsecutive"):
                        raise SystemExit(f"{path}: column-major scanning is not handled")
                    shape = eccodes.codes_get(h, "shapeOfTheEarth")
                    try:
                        radius = float(eccodes.codes_get_double(h, "radius"))
                    except eccodes.CodesInternalError:
                        radius = RADIUS_BY_SHAPE.get(shape, 6371229.0)
                    grid = dict(ni=ni, nj=nj, lat=np.linspace(lat0, lat1, nj),
                                lon=lon0 + dlon * np.arange(ni), radius=radius)
                vals = eccodes.codes_get_values(h)
                if eccodes.codes_get(h, "bitmapPresent"):
                    vals[vals == eccodes.codes_get_double(h, "missingValue")] = np.nan
                cubes[name][level] = vals.reshape(grid["nj"], grid["ni"])
            finally:
                eccodes.codes_release(h)
    if grid is None:
        raise SystemExit(f"{path}: no isobaric fields")
    levels = sorted(set.intersection(*(set(c) for c in cubes.values())))  # hPa, increasing
    if len(levels) < 3:
        raise SystemExit(f"{path}: only {len(levels)} isobaric levels carry {', '.join(FIELDS)}")
    flip = grid["lat"][0] > grid["lat"][-1]
    out = {}
    for name in FIELDS:
        a = np.stack([cubes[name].pop(lv) for lv in levels])
        out[name] = a[:, ::-1, :].copy() if flip else a
        cubes[name].clear()
    if flip:
        grid["lat"] = grid["lat"][::-1].copy()
    grid["lon"] = np.mod(grid["lon"], 360.0)
    grid["periodic"] = abs(abs(grid["lon"][1] - grid["lon"][0]) * grid["ni"] - 360.0) < 1e-6
    return np.array(levels), out, grid


# --------------------------------------------------------------------------- stage 2


class Grid:
    """What MetPy's horizontal derivatives need: latitude (as a column, so that it
    broadcasts against (levels, lat, lon)), longitude and the earth's sphere."""

    def __init__(self, grid):
        self.periodic = grid["periodic"]
        lon = grid["lon"]
        if self.periodic:
            d = lon[1] - lon[0]
            lon = np.concatenate([[lon[0] - d], lon, [lon[-1] + d]])
        self.lat = units.Quantity(grid["lat"][:, None], "degrees")
        self.kwargs = dict(latitude=self.lat, longitude=units.Quantity(lon, "degrees"),
                           crs=pyproj.CRS.from_proj4(f"+proj=longlat +R={grid['radius']} +no_defs"))

    def pad(self, q):
        """Wrap one column of a periodic grid on each side."""
        if not self.periodic:
            return q
        m = q.magnitude if hasattr(q, "magnitude") else q
        m = np.concatenate([m[..., -1:], m, m[..., :1]], axis=-1)
        return units.Quantity(m, q.units) if hasattr(q, "units") else m

    def trim(self, a):
        return a[..., 1:-1] if self.periodic else a


def products(levels_hpa, fields, grid, theta_levels, pv_values, p_layers, theta_layers):
    """All products as float64 numpy arrays in leeward's units; per-family seconds."""
    g = Grid(grid)
    out, fam = {}, {}
    nlev = levels_hpa.size
    p1 = units.Quantity(levels_hpa, "hPa")
    p3 = units.Quantity(np.broadcast_to(levels_hpa[:, None, None], fields["t"].shape), "hPa")
    T = units.Quantity(fields["t"], "K")
    U = units.Quantity(fields["u"], "m/s")
    V = units.Quantity(fields["v"], "m/s")
    Z = units.Quantity(fields["gh"], "m")

    t0 = time.perf_counter()
    Uw, Vw = g.pad(U), g.pad(V)
    eta = g.trim(mpcalc.absolute_vorticity(Uw, Vw, **g.kwargs).m_as("1/s"))
    f = mpcalc.coriolis_parameter(g.lat).m_as("1/s")
    out["eta"], out["zeta"] = eta, eta - f
    fam["vorticity"] = time.perf_counter() - t0

    t0 = time.perf_counter()
    theta = mpcalc.potential_temperature(p3, T)
    sigma = mpcalc.static_stability(p3, T, vertical_dim=0)
    # leeward's stab is -dtheta/dp; MetPy's sigma = -(Rd T/p) dln(theta)/dp.
    out["stab"] = (sigma * p3 * theta / (mpconsts.Rd * T)).m_as("K/Pa")
    del sigma
    out["n2"] = mpcalc.brunt_vaisala_frequency_squared(Z, theta, vertical_dim=0).m_as("1/s^2")
    out["theta"] = theta.m_as("K")
    fam["stability"] = time.perf_counter() - t0

    t0 = time.perf_counter()
    thw = g.pad(theta)
    pv = mpcalc.potential_vorticity_baroclinic(thw, g.pad(p3), Uw, Vw, **g.kwargs)
    out["pv"] = g.trim(pv.m_as(SI_PV)) / PVU
    del pv, thw, Uw, Vw
    fam["pv"] = time.perf_counter() - t0

    t0 = time.perf_counter()
    # MetPy: pressure by Newton iteration with T linear in ln p; the other fields linear in
    # theta. Searched from the top down, as leeward does.
    surf = np.array(sorted(set(theta_levels) | set(np.ravel(theta_layers).tolist())))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        ip, it, iu, iv, iz = mpcalc.isentropic_interpolation(
            units.Quantity(surf, "K"), p1, T, U, V, Z, vertical_dim=0, temperature_out=True,
            bottom_up_search=False)
    isen_m = mpcalc.montgomery_streamfunction(iz, it)
    sel = np.searchsorted(surf, theta_levels)
    out["isen_p"] = ip.m_as("Pa")[sel]
    out["isen_t"] = it.m_as("K")[sel]
    out["isen_u"] = iu.m_as("m/s")[sel]
    out["isen_v"] = iv.m_as("m/s")[sel]
    out["isen_z"] = iz.m_as("m")[sel]
    out["isen_m"] = isen_m.m_as("m^2/s^2")[sel]
    del isen_m, it, iz
    fam["isentropic"] = time.perf_counter() - t0

    t0 = time.perf_counter()
    th_s = units.Quantity(np.broadcast_to(surf[:, None, None], ip.shape), "K")
    ipv = mpcalc.potential_vorticity_baroclinic(g.pad(th_s), g.pad(ip), g.pad(iu), g.pad(iv),
                                                **g.kwargs)
    out["isen_pv"] = g.trim(ipv.m_as(SI_PV))[sel] / PVU
    del ipv
    fam["isen_pv"] = time.perf_counter() - t0

    t0 = time.perf_counter()
    trop = tropopause(out["pv"], np.log(levels_hpa * 100.0), grid["lat"], pv_values,
                      {"theta": out["theta"], "z": fields["gh"], "u": fields["u"],
                       "v": fields["v"]})
    out.update(trop)
    fam["tropopause"] = time.perf_counter() - t0

    t0 = time.perf_counter()
    idx = {lv: k for k, lv in enumerate(levels_hpa * 100.0)}
    thick = np.full((len(p_layers),) + fields["gh"].shape[1:], np.nan)
    for n, (pb, pt) in enumerate(p_layers):
        if pb in idx and pt in idx:
            thick[n] = fields["gh"][idx[pt]] - fields["gh"][idx[pb]]
    out["thick"] = thick
    fam["thickness"] = time.perf_counter() - t0

    t0 = time.perf_counter()
    p_pa = levels_hpa * 100.0
    ip_pa, iu_m, iv_m = ip.m_as("Pa"), iu.m_as("m/s"), iv.m_as("m/s")
    shape = (len(theta_layers),) + fields["u"].shape[1:]
    um, vm, dp = np.full(shape, np.nan), np.full(shape, np.nan), np.full(shape, np.nan)
    for n, (tb, tt) in enumerate(theta_layers):
        kb, kt = int(np.searchsorted(surf, tb)), int(np.searchsorted(surf, tt))
        pb, pt = ip_pa[kb], ip_pa[kt]
        um[n] = layer_mean(fields["u"], p_pa, pt, iu_m[kt], pb, iu_m[kb])
        vm[n] = layer_mean(fields["v"], p_pa, pt, iv_m[kt], pb, iv_m[kb])
        dp[n] = np.where(pb > pt, pb - pt, np.nan)
    leta = g.trim(mpcalc.absolute_vorticity(g.pad(units.Quantity(um, "m/s")),
                                            g.pad(units.Quantity(vm, "m/s")),
                                            **g.kwargs).m_as("1/s"))
    out["layer_dp"], out["layer_pv"], out["layer_u"], out["layer_v"] = dp, leta / dp, um, vm
    del ip, iu, iv
    fam["layer"] = time.perf_counter() - t0
    return out, fam


def tropopause(pv, lnp, lat, pv_values, others):
    """First crossing of |PV| = value from the top down (+ north, - south; levels in
    order of increasing pressure), below a top valid level that is stratospheric; linear
    in PV, applied in ln p. Returns trop_p (Pa), trop_theta, trop_z, trop_u, trop_v."""
    nlev, ny, nx = pv.shape
    sign = np.where(lat >= 0.0, 1.0, -1.0)[None, :, None]
    q = pv * sign
    valid = np.isfinite(q)
    kk = np.arange(nlev)[:, None, None]
    first = np.argmax(valid, axis=0)
    res = {f"trop_{n}": np.full((len(pv_values), ny, nx), np.nan) for n in ("p", *others)}
    for m, thr in enumerate(pv_values):
        q_first = np.take_along_axis(q, first[None], 0)[0]
        top_ok = valid.any(axis=0) & (q_first >= thr)
        # first level below the top valid one that is missing or under the threshold
        stop = (kk > first) & ~(valid & (q >= thr))
        k = np.argmax(stop, axis=0)
        ok = top_ok & stop.any(axis=0)
        k = np.where(ok, k, 1)
        ql = np.take_along_axis(q, k[None], 0)[0]
        qu = np.take_along_axis(q, (k - 1)[None], 0)[0]
        ok &= np.isfinite(ql)  # a missing level below ends the search: no surface
        w = (thr - qu) / (ql - qu)  # toward the lower level
        lp = lnp[k - 1] + w * (lnp[k] - lnp[k - 1])
        res["trop_p"][m] = np.where(ok, np.exp(lp), np.nan)
        for n, a in others.items():
            au = np.take_along_axis(a, (k - 1)[None], 0)[0]
            al = np.take_along_axis(a, k[None], 0)[0]
            res[f"trop_{n}"][m] = np.where(ok, au + w * (al - au), np.nan)
    return res


def layer_mean(f, p, p_top, f_top, p_bottom, f_bottom):
    """(1/dp) integral f dp between p_top and p_bottom (2-D), trapezoidal over the
    isobaric levels p (increasing) inside the layer and the two end values."""
    total = np.zeros_like(p_top)
    pp, fp = p_top.copy(), f_top.copy()
    for k, pk in enumerate(p):
        inside = (pk > p_top) & (pk < p_bottom)
        total += np.where(inside, 0.5 * (fp + f[k]) * (pk - pp), 0.0)
        pp = np.where(inside, pk, pp)
        fp = np.where(inside, f[k], fp)
    total += 0.5 * (fp + f_bottom) * (p_bottom - pp)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(p_bottom > p_top, total / (p_bottom - p_top), np.nan)


# --------------------------------------------------------------------------- stage 3

#: Output variables: name -> (vertical dimension, units).
VARIABLES = {
    "zeta": ("pressure", "s-1"), "eta": ("pressure", "s-1"), "theta": ("pressure", "K"),
    "stab": ("pressure", "K Pa-1"), "n2": ("pressure", "s-2"),
    "pv": ("pressure", "1e-6 K m2 kg-1 s-1"), "z": ("pressure", "m"),
    "isen_p": ("theta_level", "Pa"), "isen_t": ("theta_level", "K"),
    "isen_z": ("theta_level", "m"), "isen_u": ("theta_level", "m s-1"),
    "isen_v": ("theta_level", "m s-1"), "isen_m": ("theta_level", "m2 s-2"),
    "isen_pv": ("theta_level", "1e-6 K m2 kg-1 s-1"),
    "trop_p": ("pv_level", "Pa"), "trop_theta": ("pv_level", "K"), "trop_z": ("pv_level", "m"),
    "trop_u": ("pv_level", "m s-1"), "trop_v": ("pv_level", "m s-1"),
    "thick": ("p_layer", "m"),
    "layer_dp": ("theta_layer", "Pa"), "layer_pv": ("theta_layer", "Pa-1 s-1"),
    "layer_u": ("theta_layer", "m s-1"), "layer_v": ("theta_layer", "m s-1"),
}


def write(path, prods, levels_hpa, grid, coords, complevel, shuffle):
    tmp = path.with_name(f".{path.name}.partial-{os.getpid()}")
    ny, nx = grid["nj"], grid["ni"]
    ds = netCDF4.Dataset(tmp, "w", format="NETCDF4")
    try:
        ds.title = "yardstick products (ecCodes + MetPy + netCDF4) for leeward's benchmark"
        ds.createDimension("time", 1)
        dims = {"pressure": levels_hpa * 100.0, "lat": grid["lat"], "lon": grid["lon"],
                **{k: coords[k] for k in ("theta_level", "pv_level", "p_layer", "theta_layer")}}
        for name, vals in dims.items():
            ds.createDimension(name, len(vals))
        ds.createDimension("nv", 2)
        for name, unit in (("pressure", "Pa"), ("lat", "degrees_north"), ("lon", "degrees_east"),
                           ("theta_level", "K"), ("pv_level", "1e-6 K m2 kg-1 s-1"),
                           ("theta_layer", "K")):
            v = ds.createVariable(name, "f8", (name,))
            v.units = unit
            v[:] = dims[name]
        ds.createVariable("p_layer_bounds", "f8", ("p_layer", "nv"))[:] = coords["p_layer_bounds"]
        ds.createVariable("theta_layer_bounds", "f8",
                          ("theta_layer", "nv"))[:] = coords["theta_layer_bounds"]
        for name, (vdim, unit) in VARIABLES.items():
            a = prods[name]
            v = ds.createVariable(name, "f4", ("time", vdim, "lat", "lon"), zlib=complevel > 0,
                                  complevel=complevel, shuffle=shuffle,
                                  chunksizes=(1, 1, ny, nx), fill_value=FILL)
            v.units = unit
            v.set_auto_mask(False)
            for k in range(a.shape[0]):
                v[0, k] = np.where(np.isfinite(a[k]), a[k], FILL).astype(np.float32)
    finally:
        ds.close()
    fd = os.open(tmp, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)
    os.replace(tmp, path)


# --------------------------------------------------------------------------- agreement

#: Per family, per variable: (statistic, limit) checks; all must hold. Judgement:
#: - theta: the same formula; only kappa differs (MetPy 2/7 vs leeward 287.05/1004.6, a
#:   relative 2.2e-5 ln(p0/p): 1.6e-5 at the median level, 500-450 hPa, 1.0e-4 at 10 hPa)
#:   plus leeward's 16-bit rounding (at most 7.6e-6): median relative difference <= 3e-5,
#:   99.9th percentile <= 2e-4.
#: - vorticity, stab, n2, pv, isen_pv, layer_pv: derivatives on the same grid but with
#:   different stencils: MetPy differences in p (stab, pv) or z (n2), leeward in ln p; the
#:   two differ most at the top (10-30 hPa, where the levels are coarse in p: stab and pv
#:   15-20% apart there) and at kinks of the column (tropopause, 250 hPa). The checks are
#:   on the spatial pattern, level by level (lowest correlation >= 0.99), and on the median
#:   relative difference pooled over the levels (vorticity 1%, stab/n2/pv 3%).
#: - isen_pv: MetPy takes dtheta/dp across the neighbouring surfaces (5 K apart, one-sided
#:   at the ends, missing where a neighbour is missing), leeward from the isobaric layer bracketing
#:   the surface; where the surfaces straddle a kink of the column the two differ by
#:   10-15% (325-330 K on the benchmark step, lowest correlation there about 0.98):
#:   lowest correlation >= 0.95 (the bar of the MetPy reference test in tests/python),
#:   pooled median 5%. layer_pv: the same winds and depths, correlation 0.98, median 5%.
#: - isentropic fields: pressure median |diff| <= 2 hPa; temperature 0.5 K; height 20 m;
#:   winds 0.5 m/s (MetPy interpolates them linearly in theta, leeward in ln p); Montgomery
#:   streamfunction relative 1e-3 (cp differs by 7e-5).
#: - tropopause: pressure median |diff| <= 15 hPa, theta 3 K, height 300 m (the crossing
#:   of isobaric PV from either computation, which differ by a few per cent).
#: - thickness: the same height differences: median |diff| <= 0.5 m (bit rounding).
#: - layer depth: median relative 2%.
#: Every compared variable must also exist in both at >= 90% of the band points where
#: leeward has it.
CHECKS = {
    "vorticity": {"zeta": [("corr", 0.99), ("med_rel", 0.01)],
                  "eta": [("corr", 0.99), ("med_rel", 0.01)]},
    "theta": {"theta": [("med_rel", 3e-5), ("p999_rel", 2e-4)]},
    "stab": {"stab": [("corr", 0.99), ("med_rel", 0.03)]},
    "n2": {"n2": [("corr", 0.99), ("med_rel", 0.03)]},
    "pv": {"pv": [("corr", 0.99), ("med_rel", 0.03)]},
    "isentropic": {"isen_p": [("med_abs", 200.0)], "isen_t": [("med_abs", 0.5)],
                   "isen_z": [("med_abs", 20.0)], "isen_u": [("med_abs", 0.5), ("corr", 0.99)],
                   "isen_v": [("med_abs", 0.5), ("corr", 0.99)],
                   "isen_m": [("med_rel", 1e-3)]},
    "isen_pv": {"isen_pv": [("corr", 0.95), ("med_rel", 0.05)]},
    "tropopause": {"trop_p": [("med_abs", 1500.0)], "trop_theta": [("med_abs", 3.0)],
                   "trop_z": [("med_abs", 300.0)]},
    "thickness": {"thick": [("med_abs", 0.5)]},
    "layer": {"layer_dp": [("med_rel", 0.02)], "layer_pv": [("corr", 0.98), ("med_rel", 0.05)]},
}
MIN_SHARE = 0.9


def statistics(ours, theirs, band, vcoord):
    """Both finite inside the band: n, share of leeward's points, the lowest spatial
    correlation over the vertical levels (and its level), and pooled over all levels the
    median |diff|, median and 99.9th percentile of |diff|/|leeward|; also the largest
    median |diff|/|leeward| of a single level (and its level), shown, not checked. The
    correlation is
    taken level by level because fields such as PV or stab span three decades from
    1000 to 10 hPa: pooled, the largest values and their relative differences would decide
    it rather than the spatial pattern."""
    m = band & np.isfinite(ours) & np.isfinite(theirs)
    n_leeward = int((band & np.isfinite(theirs)).sum())
    a, b = ours[m], theirs[m]
    nan = float("nan")
    st = dict(n=int(a.size), share=a.size / max(n_leeward, 1), corr=nan, corr_level=nan,
              med_abs=nan, med_rel=nan, p999_rel=nan, worst_med_rel=nan, worst_level=nan)
    if a.size < 2:
        return st
    for k in range(ours.shape[0]):
        x, y = ours[k][m[k]], theirs[k][m[k]]
        if x.size >= 100 and np.std(x) > 0 and np.std(y) > 0:
            c = float(np.corrcoef(x, y)[0, 1])
            if not c >= st["corr"]:  # also replaces the initial NaN
                st["corr"], st["corr_level"] = c, float(vcoord[k])
        nz = y != 0
        if nz.any():
            r = float(np.median(np.abs(x[nz] - y[nz]) / np.abs(y[nz])))
            if not r <= st["worst_med_rel"]:
                st["worst_med_rel"], st["worst_level"] = r, float(vcoord[k])
    d = np.abs(a - b)
    nz = b != 0
    rel = d[nz] / np.abs(b[nz])
    st.update(med_abs=float(np.median(d)), med_rel=float(np.median(rel)) if rel.size else 0.0,
              p999_rel=float(np.percentile(rel, 99.9)) if rel.size else 0.0)
    return st


def to_pvu(var):
    """The factor that takes a PV variable of leeward's file to PVU, from its units."""
    units = getattr(var, "units", "")
    if units == "K m2 kg-1 s-1":
        return 1e6
    if units in ("PVU", "1e-6 K m2 kg-1 s-1"):
        return 1.0
    raise SystemExit(f"{var.name}: PV in units {units!r} the yardstick does not know")


def leeward_variable(ds, name):
    """A variable of leeward's file as (levels, lat, lon) float64 with NaN where missing,
    its vertical dimension and coordinate. `thick` stacks the per-layer variables."""
    def read(var):
        var.set_auto_mask(True)
        return np.ma.filled(np.ma.asarray(var[0], dtype=np.float64), np.nan)
    if name == "thick":
        layers = thickness_layers(ds)
        data = np.concatenate([read(ds.variables[n]) for n, _, _ in layers])
        return data, "p_layer", np.array([mid for _, mid, _ in layers])
    var = ds.variables[name]
    vdim = var.dimensions[1]
    data = read(var)
    if VARIABLES[name][1] == "1e-6 K m2 kg-1 s-1":
        data *= to_pvu(var)
    vcoord = np.asarray(ds.variables[vdim][:], dtype=float)
    if vdim == "pv_level":
        vcoord = vcoord * to_pvu(ds.variables[vdim])
    return data, vdim, vcoord


def agreement(prods, leeward_path, lat):
    """Per family and variable: statistics and checks. leeward's variables are read one
    at a time, so that its file does not add to the yardstick's memory."""
    alat = np.abs(lat)
    band = ((alat >= BAND[0]) & (alat <= BAND[1]))[None, :, None]
    result = {}
    with netCDF4.Dataset(leeward_path) as ds:
        for family, checks in CHECKS.items():
            fam = {"pass": True, "vars": {}}
            for name, tests in checks.items():
                theirs, vdim, vcoord = leeward_variable(ds, name)
                st = statistics(prods[name], theirs, np.broadcast_to(band, theirs.shape), vcoord)
                st["vertical"] = vdim
                del theirs
                ok = st["share"] >= MIN_SHARE and all(
                    np.isfinite(st[s]) and (st[s] >= lim if s == "corr" else st[s] <= lim)
                    for s, lim in tests)
                st["checks"] = {s: lim for s, lim in tests}
                st["pass"] = bool(ok)
                fam["vars"][name] = st
                fam["pass"] &= bool(ok)
            result[family] = fam
    return result


def thickness_layers(ds):
    """leeward's thickness variables in file order: (name, layer mid-pressure, bounds), Pa.
    Each layer is its own variable, `thick_<bottom>_<top>` on the coordinate
    `p_layer_<bottom>_<top>` with its bounds (docs/output.md)."""
    out = []
    for name, var in ds.variables.items():
        if name.startswith("thick_") and not name.startswith("thick_chg") and var.ndim == 4:
            dim = var.dimensions[1]
            out.append((name, float(ds.variables[dim][0]),
                        tuple(float(b) for b in ds.variables[f"{dim}_bounds"][0])))
    if not out:
        raise SystemExit("leeward's file has no thickness variable (thick_<bottom>_<top>)")
    return out


def read_leeward_layout(path):
    """leeward's coordinates (what to compute) and its deflate settings (how to write)."""
    with netCDF4.Dataset(path) as ds:
        coords = {k: np.asarray(ds.variables[k][:], dtype=float)
                  for k in ("pressure", "lat", "lon", "theta_level", "pv_level",
                            "theta_layer", "theta_layer_bounds")}
        layers = thickness_layers(ds)
        # The yardstick works in PVU (1e-6 K m2 kg-1 s-1); leeward's files are in SI.
        coords["pv_level"] = coords["pv_level"] * to_pvu(ds.variables["pv_level"])
        filt = ds.variables["zeta"].filters()
    coords["p_layer"] = np.array([mid for _, mid, _ in layers])
    coords["p_layer_bounds"] = np.array([bounds for _, _, bounds in layers])
    return coords, filt


# --------------------------------------------------------------------------- main


def level_label(dim, value):
    if not np.isfinite(value):
        return "-"
    if dim in ("pressure", "p_layer"):
        return f"{value / 100.0:g}hPa"
    return f"{value:g}{'PVU' if dim == 'pv_level' else 'K'}"


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("input", type=Path, help="benchmark step (GRIB2)")
    ap.add_argument("out_dir", type=Path, help="directory for the yardstick's NetCDF file")
    ap.add_argument("--leeward-file", type=Path, required=True,
                    help="leeward's output file of the same step")
    ap.add_argument("--json", action="store_true", help="end with one JSON line of the figures")
    args = ap.parse_args(argv)

    coords, filt = read_leeward_layout(args.leeward_file)
    complevel = int(filt.get("complevel", 1)) if filt.get("zlib") else 0
    shuffle = bool(filt.get("shuffle", True))

    t_all = time.perf_counter()
    t0 = time.perf_counter()
    levels_hpa, fields, grid = decode(args.input)
    decode_s = time.perf_counter() - t0

    if not (np.allclose(grid["lat"], coords["lat"]) and np.allclose(grid["lon"], coords["lon"])
            and np.allclose(levels_hpa * 100.0, coords["pressure"])):
        raise SystemExit("the leeward file is not on the input's grid and levels")

    t0 = time.perf_counter()
    with np.errstate(divide="ignore", invalid="ignore"), warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        prods, families = products(levels_hpa, fields, grid, coords["theta_level"].tolist(),
                                   coords["pv_level"].tolist(),
                                   [tuple(b) for b in coords["p_layer_bounds"]],
                                   [tuple(b) for b in coords["theta_layer_bounds"]])
    prods["z"] = fields["gh"]  # leeward's file carries it too
    products_s = time.perf_counter() - t0
    rss_products = peak_rss_mib()

    args.out_dir.mkdir(parents=True, exist_ok=True)
    out_path = args.out_dir / f"yardstick_{args.input.stem}.nc"
    t0 = time.perf_counter()
    write(out_path, prods, levels_hpa, grid, coords, complevel, shuffle)
    write_s = time.perf_counter() - t0
    total_s = time.perf_counter() - t_all

    t0 = time.perf_counter()
    rss_run = peak_rss_mib()
    agree = agreement(prods, args.leeward_file, grid["lat"])
    agree_s = time.perf_counter() - t0
    rss = peak_rss_mib()

    print(f"yardstick on {args.input} ({grid['ni']}x{grid['nj']}, {levels_hpa.size} levels): "
          f"ecCodes {eccodes.codes_get_api_version()}, MetPy {metpy.__version__}, "
          f"netCDF4 {netCDF4.__version__}, numpy {np.__version__}")
    print(f"  decode    {decode_s:8.2f} s")
    print(f"  products  {products_s:8.2f} s")
    for k, v in families.items():
        print(f"    {k:<12} {v:8.2f} s")
    print(f"  write     {write_s:8.2f} s  ({out_path}, deflate {complevel}, shuffle {shuffle}, "
          f"{out_path.stat().st_size / 1e6:.1f} MB)")
    print(f"  total     {total_s:8.2f} s")
    print(f"  peak RSS  {rss_run:8.0f} MiB (decode + products + write; {rss:.0f} MiB with the "
          f"comparison, {agree_s:.1f} s, not in the total)")
    print(f"agreement with {args.leeward_file.name}, {BAND[0]:g}-{BAND[1]:g} degrees N and S, "
          "where both are finite; corr: the lowest of the levels' spatial correlations, at the "
          "level given; median|d| and med rel pooled over levels; worst lvl: the largest "
          "single-level median relative difference (not checked):")
    print(f"  {'family':<11} {'var':<10} {'n':>9} {'share':>6} {'corr':>8} {'at':>7} "
          f"{'median|d|':>10} {'unit':<9} {'med rel':>8} {'p99.9 rel':>9} {'worst lvl':>9} "
          f"{'at':>7}  result  checks")
    ok_all = True
    for family, fam in agree.items():
        for name, st in fam["vars"].items():
            chk = ", ".join(f"{s}{'>=' if s == 'corr' else '<='}{lim:g}"
                            for s, lim in st["checks"].items())
            unit = "PVU" if "PV" in name.upper() and name != "layer_pv" else VARIABLES[name][1]
            print(f"  {family:<11} {name:<10} {st['n']:>9} {st['share']:>6.3f} {st['corr']:>8.5f} "
                  f"{level_label(st['vertical'], st['corr_level']):>7} {st['med_abs']:>10.3g} "
                  f"{unit:<9} {st['med_rel']:>8.2e} {st['p999_rel']:>9.2e} "
                  f"{st['worst_med_rel']:>9.2e} "
                  f"{level_label(st['vertical'], st['worst_level']):>7}  "
                  f"{'pass' if st['pass'] else 'FAIL':<6}  {chk}")
        ok_all &= fam["pass"]
    print("all families agree" if ok_all else
          "DISAGREE: " + ", ".join(f for f, v in agree.items() if not v["pass"]))
    if args.json:
        def sig(x):
            return float(f"{x:.6g}") if isinstance(x, float) and np.isfinite(x) else (
                None if isinstance(x, float) else x)
        print(json.dumps({
            "what": "yardstick", "input": str(args.input), "grid": f"{grid['ni']}x{grid['nj']}",
            "decode_s": round(decode_s, 3), "products_s": round(products_s, 3),
            "write_s": round(write_s, 3), "total_s": round(total_s, 3),
            "families": {k: round(v, 3) for k, v in families.items()},
            "peak_rss_mib": round(rss_run, 1), "peak_rss_with_comparison_mib": round(rss, 1),
            "agreement": {f: {"pass": v["pass"],
                              "vars": {n: {k: sig(x) for k, x in st.items()}
                                       for n, st in v["vars"].items()}}
                          for f, v in agree.items()},
        }))
    return 0 if ok_all else 1


if __name__ == "__main__":
    sys.exit(main())
