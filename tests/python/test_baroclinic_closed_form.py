"""Isobaric Ertel PV with both tilting terms active, in a closed-form baroclinic atmosphere.

Full form on isobaric levels (Bluestein 1992; docs/references.md "Methods"; from memory):

    P = -g [ (zeta_p + f) dtheta/dp - (dv/dp)(dtheta/dx) + (du/dp)(dtheta/dy) ]

The atmosphere, encoded with ecCodes on a 1-degree latitude/longitude grid from 70 S to
70 N and 30 W to 30 E (limited area, crossing the equator and the prime meridian):

- theta = theta0 + A lambda + B phi - S ln(p/p0): linear in longitude and latitude
  (radians), so that the centred differences in lambda and phi leeward takes are exact,
  dtheta/dx = A / (a cos phi), dtheta/dy = B / a; and linear in ln p, the coordinate in
  which leeward differences vertically (docs/references.md "Methods": three-point differences
  in ln p), so that dtheta/dp = -S/p exactly;
- u = U0 - Su ln(p/p0), v = V0 + Sv ln(p/p0), the same at every point of a level: linear in
  ln p, du/dp = -Su/p and dv/dp = Sv/p exactly; their relative vorticity on the sphere is
  zeta = u tan(phi) / a (docs/references.md "Methods": zeta = -(1/(a cos phi)) d(u cos phi)/dphi
  for a wind with no longitude dependence), f = 2 Omega sin(phi).

The two tilting parts, Tv = g (dv/dp)(dtheta/dx), proportional to 1/(p cos phi), and
Tu = -g (du/dp)(dtheta/dy), proportional to 1/p, have different shapes, so a least-squares
fit of leeward's PV less the closed-form (zeta + f) part onto them gives each term's own
factor; each must be 1 within 0.5 %. Dropping either term, flipping its sign, or swapping
the two gradients moves its factor to 0, -1 or far off.

Temperature is written as T = theta (p/1000 hPa)^kappa with the constants leeward
documents (docs/output.md; kappa = R/cp = 287.05/1004.6, docs/references.md "Constants"; using
the program's own constants is common practice).
"""

from __future__ import annotations

import pyproj  # noqa: F401  (before ecCodes)
import numpy as np
import pytest

import gribgen
from conftest import FIGURES, run_leeward, single_product
from ncproducts import align_to_product, level_index, read_isentropic

KAPPA = gribgen.R_DRY / 1004.6
G = gribgen.G0
A_EARTH = gribgen.RADIUS_SHAPE_6  # the grid's shape of the earth is code 6
LEVELS_HPA = gribgen.DEFAULT_LEVELS_HPA

THETA0 = 320.0  # K at 1000 hPa, lambda = phi = 0
A = -60.0  # K per radian of longitude
B = -30.0  # K per radian of latitude
S = 12.0  # K per e-folding of pressure: dtheta/dp = -S/p
U0, SU = 10.0, 40.0  # m s-1: u = U0 - SU ln(p/p0)
V0, SV = 5.0, 25.0  # m s-1: v = V0 + SV ln(p/p0)
P_REF = 1e5  # Pa

GRID = gribgen.regular_ll("baroclinic_band", 70.0, -70.0, -30.0, 61, 1.0, 1.0,
                          north_to_south=True)


def theta_of(lat, lon, p):
    return THETA0 + A * np.radians(lon) + B * np.radians(lat) - S * np.log(p / P_REF)


def winds_of(p):
    return U0 - SU * np.log(p / P_REF), V0 + SV * np.log(p / P_REF)


def closed_form(lat, p):
    """(barotropic part, Tv, Tu) in PVU at latitude lat (degrees) and pressure p (Pa)."""
    phi = np.radians(lat)
    u, _ = winds_of(p)
    zeta = u * np.tan(phi) / A_EARTH
    f = gribgen.coriolis(lat)
    dth_dp = -S / p
    du_dp, dv_dp = -SU / p, SV / p
    dth_dx = A / (A_EARTH * np.cos(phi))
    dth_dy = B / A_EARTH
    to_pvu = 1e6  # 1 PVU = 1e-6 K m2 kg-1 s-1 (docs/references.md "Constants")
    barotropic = -G * (zeta + f) * dth_dp * to_pvu
    tv = G * dv_dp * dth_dx * to_pvu
    tu = np.broadcast_to(-G * du_dp * dth_dy * to_pvu, np.shape(lat))
    return barotropic, tv, tu


@pytest.fixture(scope="module")
def baroclinic(leeward_bin, tmp_path_factory):
    d = tmp_path_factory.mktemp("baroclinic")
    geo = gribgen.geometry(GRID)
    fields = []
    for lev in LEVELS_HPA:
        p = lev * 100.0
        th = theta_of(geo.lat, geo.lon, p)
        u, v = winds_of(p)
        fields.append((gribgen.PARAM_T, lev, th * (p / gribgen.THETA_REF_P) ** KAPPA))
        fields.append((gribgen.PARAM_U, lev, np.full(geo.lat.shape, u)))
        fields.append((gribgen.PARAM_V, lev, np.full(geo.lat.shape, v)))
    path = gribgen.write_fields(d / "baroclinic.grib2", GRID, fields, bits=24)
    run = run_leeward(leeward_bin, [path], d / "out", "baroclinic")
    assert run.returncode in (0, 3), run.describe()
    prod = read_isentropic(single_product(run), names=("pv",))
    lat, _ = align_to_product(prod, geo.lat, geo.lon)[:2]
    return prod, lat


def test_isobaric_pv_tilting_terms_closed_form(baroclinic):
    prod, lat = baroclinic
    # Interior points: the grid's edge rows and columns have no centred difference.
    inner = np.zeros(lat.shape, dtype=bool)
    inner[1:-1, 1:-1] = True
    ours, base, tv, tu, where = [], [], [], [], []
    for lev in LEVELS_HPA:
        k = level_index(prod, lev)
        b, v, u = closed_form(lat, lev * 100.0)
        ours.append(prod.fields["pv"][k][inner])
        base.append(b[inner])
        tv.append(v[inner])
        tu.append(u[inner])
    ours, base, tv, tu = (np.concatenate(x) for x in (ours, base, tv, tu))
    assert np.all(np.isfinite(ours)), f"{int((~np.isfinite(ours)).sum())} interior points without pv"
    # Each tilting term's own factor, by least squares on the two shapes.
    (cv, cu), *_ = np.linalg.lstsq(np.column_stack([tv, tu]), ours - base, rcond=None)
    full = base + tv + tu
    err = np.abs(ours - full)
    FIGURES.append(f"closed-form baroclinic atmosphere, isobaric PV: factor of the (dv/dp)(dtheta/dx) "
                   f"term {cv:.5f}, of the (du/dp)(dtheta/dy) term {cu:.5f}; max |pv - closed form| "
                   f"{err.max():.2e} PVU; tilting terms' median |part| {np.median(np.abs(tv)):.3f} and "
                   f"{np.median(np.abs(tu)):.3f} PVU, whole PV {np.min(full):.2f} to {np.max(full):.2f} PVU")
    print(FIGURES[-1])
    assert abs(cv - 1.0) <= 0.005, f"(dv/dp)(dtheta/dx) term off by a factor {cv:.4f}"
    assert abs(cu - 1.0) <= 0.005, f"(du/dp)(dtheta/dy) term off by a factor {cu:.4f}"
    # Point by point: within 0.5 % of the smaller tilting term at that point, plus the
    # 16 significant bits the file keeps (relative 2^-17, docs/output.md).
    tol = 0.005 * np.minimum(np.abs(tv), np.abs(tu)) + 2.0 ** -16 * np.abs(full)
    bad = err > tol
    assert not bad.any(), (f"{int(bad.sum())} of {bad.size} points off the closed form by more than 0.5 % of "
                           f"a tilting term; worst {err[bad].max():.2e} PVU")
