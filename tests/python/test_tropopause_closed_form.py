"""The dynamic tropopause and its folds on columns whose PV is known, encoded with ecCodes.

A global 2.5-degree grid at rest (u = v = 0), so that absolute vorticity is the Coriolis
parameter f = 2 Omega sin(lat) exactly (docs/references.md "Methods", Omega 7.292115e-5 s-1), and
Ertel PV on isobaric levels is P = -g f dtheta/dp with no tilting terms (Bluestein 1992;
docs/references.md "Methods": they vanish without vertical wind shear). Temperature depends on
latitude and pressure only, one profile per latitude band, both hemispheres alike:

- |lat| < 20: a tropical column, troposphere at 6.5 K/km up to 100 hPa and warming above;
  within about 8 degrees of the equator PV reaches 2 PVU only above the 380 K isentrope,
  so the tropopause is the isentrope (the lower of the two; common practice, Hoskins,
  McIntyre and Robertson 1985 for the 380 K bound);
- 25-35: a column with a stable layer at 600-700 hPa whose PV exceeds 2 PVU: two crossings
  within the fold search (it reaches down to 700 hPa), not a fold;
- 40-65: a folded column: stratosphere above 275 hPa, tropospheric air at 350-400 hPa, a
  stable layer of stratospheric PV at 450-500 hPa, troposphere below: three crossings
  (Sprenger, Croci Maspoli and Wernli 2003: a profile crossing the tropopause more than
  once; fold depth between the uppermost and lowest crossing);
- elsewhere: one crossing.

The reference follows the method as docs/output.md states it, computed here with numpy:
dtheta/dp from numpy's second-order differences in ln p (numpy.gradient, edge_order=2, the
three-point non-uniform difference), PV linear between levels, the 380 K isentrope linear
in ln theta, both placed in ln p, the lower of the two, crossings below 700 hPa or within
100 hPa of the lowest level left out after the first.
"""

from __future__ import annotations

import pyproj  # noqa: F401  (before ecCodes)
import numpy as np
import pytest

import gribgen
from conftest import FIGURES, run_leeward, single_product
from ncproducts import align_to_product, read_isentropic, vertical_index

LEVELS_HPA = (10, 20, 30, 50, 70, 100, 150, 200, 250, 300, 350, 400, 450, 500, 550, 600, 650,
              700, 750, 800, 850, 900, 950, 1000)
#: Constants leeward documents (docs/output.md): R, cp, g0; docs/references.md "Constants".
KAPPA = gribgen.R_DRY / 1004.6
G = gribgen.G0
C = gribgen.lapse_rate_exponent()  # R gamma / g for 6.5 K/km
THRESHOLD = 2.0  # PVU
BOUND = 380.0  # K, the default bound isentrope
FOLD_BOTTOM = 70000.0  # Pa, the default fold search bottom
BOUNDARY_LAYER = 10000.0  # Pa above the lowest level with data


def _tropical(p_hpa):
    t_trop = 300.0 * (100.0 / 1000.0) ** C
    return np.where(p_hpa >= 100.0, 300.0 * (p_hpa / 1000.0) ** C, t_trop * (100.0 / p_hpa) ** 0.06)


def _polytrope_from(p_hpa, t_ref, p_ref):
    return t_ref * (p_hpa / p_ref) ** C


def _folded(p_hpa):
    """285 K at 1000 hPa, 6.5 K/km up to 550 hPa; warming by 14 K from 550 to 450 hPa (the
    stable sheet); 6.5 K/km above it up to 275 hPa; isothermal stratosphere."""
    t550 = 285.0 * (550.0 / 1000.0) ** C
    t450 = t550 + 14.0
    t275 = t450 * (275.0 / 450.0) ** C
    t = np.where(p_hpa >= 550.0, 285.0 * (p_hpa / 1000.0) ** C,
                 np.where(p_hpa >= 450.0, t550 + 14.0 * (550.0 - p_hpa) / 100.0,
                          np.where(p_hpa >= 275.0, t450 * (p_hpa / 450.0) ** C, t275)))
    return t


def _two_crossings(p_hpa):
    """290 K at 1000 hPa, 6.5 K/km up to 750 hPa; warming by 24 K from 750 to 650 hPa (a
    stable layer reaching the fold search's bottom); 6.5 K/km above up to 250 hPa;
    isothermal stratosphere."""
    t750 = 290.0 * (750.0 / 1000.0) ** C
    t650 = t750 + 24.0
    t250 = t650 * (250.0 / 650.0) ** C
    return np.where(p_hpa >= 750.0, 290.0 * (p_hpa / 1000.0) ** C,
                    np.where(p_hpa >= 650.0, t750 + 24.0 * (750.0 - p_hpa) / 100.0,
                             np.where(p_hpa >= 250.0, t650 * (p_hpa / 650.0) ** C, t250)))


def _plain(p_hpa):
    t300 = 280.0 * (300.0 / 1000.0) ** C
    return np.where(p_hpa >= 300.0, 280.0 * (p_hpa / 1000.0) ** C, t300)


def temperature(lat, p_hpa):
    a = abs(lat)
    if a < 20.0:
        return _tropical(p_hpa)
    if 25.0 <= a < 35.0:
        return _two_crossings(p_hpa)
    if 40.0 <= a < 65.0:
        return _folded(p_hpa)
    return _plain(p_hpa)


# ---------------------------------------------------------------------------------------
# The reference: the documented method, column by column
# ---------------------------------------------------------------------------------------
def reference_column(lat, p_pa):
    """(trop_p, trop_theta, crossings, trop_p_low, trop_fold_dp) of one column, or None."""
    lnp = np.log(p_pa)
    th = temperature(lat, p_pa / 100.0) * (1e5 / p_pa) ** KAPPA
    dth_dp = np.gradient(th, lnp, edge_order=2) / p_pa
    f = 2.0 * gribgen.OMEGA * np.sin(np.radians(lat))
    q = (1.0 if lat >= 0 else -1.0) * (-G * f * dth_dp) / 1e-6  # sign-adjusted PV, PVU
    strat = (q >= THRESHOLD) | (th >= BOUND)
    if not strat[0]:
        return None
    bottom = np.log(min(FOLD_BOTTOM, p_pa[-1] - BOUNDARY_LAYER))
    xs, downs = [], []
    for k in range(len(p_pa) - 1):
        if strat[k] == strat[k + 1]:
            continue
        cand = []
        if (q[k] >= THRESHOLD) != (q[k + 1] >= THRESHOLD):
            w = (THRESHOLD - q[k + 1]) / (q[k] - q[k + 1])
            cand.append(lnp[k + 1] + w * (lnp[k] - lnp[k + 1]))
        if (th[k] >= BOUND) != (th[k + 1] >= BOUND):
            w = (np.log(BOUND) - np.log(th[k + 1])) / (np.log(th[k]) - np.log(th[k + 1]))
            cand.append(lnp[k + 1] + w * (lnp[k] - lnp[k + 1]))
        x = max(cand) if strat[k] else min(cand)
        if xs and x > bottom:
            break
        xs.append(x)
        if strat[k]:
            downs.append(x)
    top = xs[0]
    # theta at the tropopause: ln theta linear in ln p.
    k = np.searchsorted(lnp, top)
    k = min(max(k, 1), len(lnp) - 1)
    w = (top - lnp[k]) / (lnp[k - 1] - lnp[k])
    theta_top = np.exp(np.log(th[k]) + w * (np.log(th[k - 1]) - np.log(th[k])))
    low = downs[-1]
    depth = np.exp(low) - np.exp(top) if len(xs) >= 3 else 0.0
    return np.exp(top), theta_top, len(xs), np.exp(low), depth


GRID = gribgen.regular_ll("bands_global_2p5", 90.0, -90.0, 0.0, 144, 2.5, 2.5,
                          north_to_south=True, global_=True)


@pytest.fixture(scope="module")
def banded(leeward_bin, tmp_path_factory):
    d = tmp_path_factory.mktemp("tropopause_bands")
    geo = gribgen.geometry(GRID)
    fields = []
    zeros = np.zeros(geo.lat.shape)
    for lev in LEVELS_HPA:
        t = np.vectorize(lambda la: float(temperature(la, np.array(float(lev)))))(geo.lat)
        fields += [(gribgen.PARAM_T, lev, t), (gribgen.PARAM_U, lev, zeros),
                   (gribgen.PARAM_V, lev, zeros)]
    path = gribgen.write_fields(d / "bands.grib2", GRID, fields)
    run = run_leeward(leeward_bin, [path], d / "out", "tropopause_bands")
    assert run.returncode == 0, run.describe()
    prod = read_isentropic(single_product(run), names=("trop_p", "trop_theta", "trop_crossings",
                                                       "trop_p_low", "trop_fold_dp"))
    lat, _ = align_to_product(prod, geo.lat, geo.lon)[:2]
    k = vertical_index(prod.pv_level, 2.0, what="pv_level")
    ours = {n: prod.fields[n][k] for n in prod.fields}
    p_pa = np.array(sorted(l * 100.0 for l in LEVELS_HPA))
    rows = np.unique(lat[:, 0])
    ref = {}
    for la in rows:
        ref[la] = reference_column(la, p_pa)
    return lat, ours, ref, prod


def _row(lat, la):
    return int(np.flatnonzero(np.isclose(lat[:, 0], la))[0])


def test_every_column_follows_the_documented_method(banded):
    # Every row of the grid (all columns of a row are alike) against the reference: the
    # number of crossings exactly; pressures within 0.1% (float32 output, 16 significant
    # bits; common practice); theta within 0.05 K; fold depth within 0.2 hPa.
    lat, ours, ref, _ = banded
    bad = []
    for la, r in ref.items():
        if abs(la) == 90.0:
            # Pole rows: isobaric PV is missing there (the gradient of theta has no east and
            # north components on the pole; docs/output.md), so is the tropopause.
            continue
        j = _row(lat, la)
        got = {n: ours[n][j] for n in ours}
        if r is None:
            if np.isfinite(got["trop_p"]).any():
                bad.append(f"lat {la}: a tropopause where the reference has none")
            continue
        p, th, n, low, depth = r
        if not np.all(got["trop_crossings"] == n):
            bad.append(f"lat {la}: crossings {np.unique(got['trop_crossings'])}, reference {n}")
        for name, want, tol in (("trop_p", p, 1e-3 * p), ("trop_p_low", low, 1e-3 * low),
                                ("trop_theta", th, 0.05), ("trop_fold_dp", depth, 20.0)):
            err = np.nanmax(np.abs(got[name] - want))
            if not err <= tol:
                bad.append(f"lat {la}: {name} off by {err:.4g} (reference {want:.6g})")
    assert not bad, "\n".join(bad)


def test_deep_tropics_take_the_380K_isentrope(banded):
    # Within 8 degrees of the equator the PV surface lies above 380 K in this column, so
    # the tropopause is the isentrope: trop_theta 380 K to 0.05 K, below the 80 hPa level,
    # one crossing, no fold; and the tropical PV surface alone would lie higher.
    lat, ours, ref, _ = banded
    sel = np.abs(lat[:, 0]) <= 8.0
    assert sel.sum() >= 7
    th = ours["trop_theta"][sel]
    assert np.all(np.abs(th - BOUND) < 0.05), f"trop_theta {np.unique(np.round(th, 2))}"
    assert np.all(ours["trop_p"][sel] > 8000.0)
    assert np.all(ours["trop_crossings"][sel] == 1) and np.all(ours["trop_fold_dp"][sel] == 0.0)
    FIGURES.append(f"closed-form tropics: trop_theta {np.nanmin(th):.3f}-{np.nanmax(th):.3f} K, "
                   f"trop_p {np.nanmin(ours['trop_p'][sel]) / 100:.1f}-"
                   f"{np.nanmax(ours['trop_p'][sel]) / 100:.1f} hPa within 8 degrees of the equator")


def test_fold_and_two_crossings_in_both_hemispheres(banded):
    # 40-65 degrees: three crossings, the lowest below the sheet at 450-500 hPa and the fold
    # depth more than 200 hPa; 25-35 degrees: two crossings, no fold, trop_p_low = trop_p.
    lat, ours, ref, _ = banded
    a = np.abs(lat[:, 0])
    for hemi in (1, -1):
        fold = (a >= 40.0) & (a < 65.0) & (np.sign(lat[:, 0]) == hemi)
        two = (a >= 25.0) & (a < 35.0) & (np.sign(lat[:, 0]) == hemi)
        assert np.all(ours["trop_crossings"][fold] == 3), np.unique(ours["trop_crossings"][fold])
        assert np.all(ours["trop_p_low"][fold] > 50000.0)
        assert np.all(ours["trop_fold_dp"][fold] > 20000.0)
        assert np.all(ours["trop_crossings"][two] == 2)
        assert np.all(ours["trop_fold_dp"][two] == 0.0)
        np.testing.assert_array_equal(ours["trop_p_low"][two], ours["trop_p"][two])
    FIGURES.append(f"closed-form fold at 40-65 N/S: depth {np.nanmin(ours['trop_fold_dp'][(a >= 40) & (a < 65)]) / 100:.1f}"
                   f"-{np.nanmax(ours['trop_fold_dp'][(a >= 40) & (a < 65)]) / 100:.1f} hPa")


def test_bound_and_fold_bottom_are_said_in_the_attributes(banded):
    *_, prod = banded
    assert prod.var_attrs["trop_p"]["leeward_theta_bound"] == "380 K"
    assert prod.var_attrs["trop_fold_dp"]["leeward_fold_search_bottom"] == "700 hPa"
