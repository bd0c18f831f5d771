"""Checks of the test-input encoders themselves (gribgen.py), with ecCodes and pyproj only.

These run without leeward: they make sure the closed-form inputs say what the closed-form
tests assume, so that a failure there points at leeward and not at the inputs.
"""

from __future__ import annotations

import math

import pyproj  # noqa: F401  (before ecCodes)
import numpy as np
import pytest

import gribgen

CASES = gribgen.closed_form_cases()
GRIDS = gribgen.closed_form_grids()


@pytest.fixture(scope="module")
def decoded(closed_form_inputs):
    return {n: gribgen.read_fields(p) for n, p in closed_form_inputs.items()}


@pytest.mark.parametrize("case", list(CASES))
def test_geometry_agrees_with_ecCodes(case, decoded):
    # ecCodes' own geometry (its grid iterators) against the pyproj/numpy geometry the
    # encoder used to place the winds: within 1e-5 degree (GRIB2 stores 1e-6 degree).
    grid = GRIDS[CASES[case]["grid"]]
    geo = gribgen.geometry(grid)
    f = decoded[case][0]
    assert f["grid_type"] == grid.kind
    assert np.abs(f["lat"] - geo.lat).max() < 1e-5
    dlon = np.abs((f["lon"] - geo.lon + 180.0) % 360.0 - 180.0)
    assert dlon[np.abs(geo.lat) < 89.99].max() < 1e-5


@pytest.mark.parametrize("case", list(CASES))
def test_fields_levels_and_flags(case, decoded):
    # Every level has T (0/0/0), gh (0/3/5), u (0/2/2), v (0/2/3) on isobaric surfaces
    # (code table 4.5 type 100), with the flag table 3.3 bit 5 as the case asks and the
    # shape of the earth of code table 3.2.
    c = CASES[case]
    fields = decoded[case]
    have = {(f["category"], f["number"], f["level"]) for f in fields}
    for lev in c["levels"]:
        for p in (gribgen.PARAM_T, gribgen.PARAM_GH, gribgen.PARAM_U, gribgen.PARAM_V):
            assert (*p, lev) in have
    grid = GRIDS[c["grid"]]
    for f in fields:
        assert f["level_type"] == 100 and f["discipline"] == 0
        assert f["uv_relative"] == c["grid_relative"]
        assert f["shape_of_earth"] == grid.shape_of_earth
        want = c.get("packing", "grid_simple")
        if want == "grid_png" and np.ptp(f["values"]) == 0.0:
            want = "grid_simple"  # constant fields: see gribgen.encode_field
        assert f["packing"] == want
        assert (f["date"], f["time"], f["step"], f["centre"]) == (
            c["times"].date, c["times"].time, c["times"].step, c["centre"])


@pytest.mark.parametrize("level_hpa,z_ref", [(1000, 110.9), (850, 1457.3), (700, 3012.2),
                                             (500, 5574.4), (300, 9164.0), (250, 10362.9)])
def test_heights_are_the_standard_atmosphere(level_hpa, z_ref, decoded):
    # US Standard Atmosphere 1976 geopotential heights (docs/references.md "Check values",
    # computed from its defining constants): the encoded constant-lapse-rate Z.
    z = [f["values"] for f in decoded["latlon_europe_1p0"]
         if (f["category"], f["number"]) == gribgen.PARAM_GH and f["level"] == level_hpa][0]
    assert np.abs(z - z_ref).max() < 0.5


@pytest.mark.parametrize("case", [c for c in CASES if CASES[c]["grid_relative"]])
def test_grid_relative_winds_keep_speed(case, decoded):
    # A rotation into grid axes keeps the wind speed u0 cos(lat) (common practice).
    grid = GRIDS[CASES[case]["grid"]]
    geo = gribgen.geometry(grid)
    for lev in (850, 300):
        u, v = ([f["values"] for f in decoded[case]
                 if (f["category"], f["number"]) == p and f["level"] == lev][0]
                for p in (gribgen.PARAM_U, gribgen.PARAM_V))
        speed = np.hypot(u, v)
        want = gribgen.U0 * np.cos(np.radians(geo.lat))
        assert np.abs(speed - want).max() < 1e-3


@pytest.mark.parametrize("grid_name", ["lambert_tangent_25", "lambert_secant_30_60", "polar_north_60"])
def test_rotation_angle_is_cone_constant_times_longitude(grid_name):
    # The pyproj-derived angle between east and the grid x axis against the closed form
    # n (lambda - LoV) (docs/references.md "Methods"; Snyder 1987, USGS PP 1395, from memory:
    # n = sin(phi1) for a tangent cone, n = ln(cos phi1 / cos phi2) /
    # ln(tan(pi/4 + phi2/2) / tan(pi/4 + phi1/2)) for a secant one, n = 1 at a pole).
    grid = GRIDS[grid_name]
    geo = gribgen.geometry(grid)
    ex, ey, nx, ny = gribgen.east_north_in_grid_axes(grid, geo)
    p = grid.params
    if grid.kind == "polar_stereographic":
        n = 1.0
    elif p["latin1"] == p["latin2"]:
        n = math.sin(math.radians(p["latin1"]))
    else:
        f1, f2 = math.radians(p["latin1"]), math.radians(p["latin2"])
        n = math.log(math.cos(f1) / math.cos(f2)) / math.log(
            math.tan(math.pi / 4 + f2 / 2) / math.tan(math.pi / 4 + f1 / 2))
    want = n * np.radians((geo.lon - p["lov"] + 180.0) % 360.0 - 180.0)
    got = np.arctan2(ey, ex)
    away = geo.lat < 89.9
    err = np.abs(np.angle(np.exp(1j * (got - want))))[away]
    assert err.max() < 1e-6
    # and north is east turned a quarter turn anticlockwise (a conformal map)
    assert np.abs(nx + ey)[away].max() < 1e-6 and np.abs(ny - ex)[away].max() < 1e-6


def test_gaussian_latitudes_agree_with_ecCodes(decoded):
    # numpy's Gauss-Legendre nodes against ecCodes' Gaussian latitudes for N48.
    lat = decoded["gaussian_n48"][0]["lat"][:, 0]
    assert np.abs(lat - gribgen.gaussian_latitudes(48)).max() < 1e-6
