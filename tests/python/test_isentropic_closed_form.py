"""Closed-form checks of leeward's isentropic family on inputs encoded by ecCodes (gribgen.py).

Column: the horizontally uniform constant-lapse-rate atmosphere of docs/references.md "Check
values", T = T0 (p/p0)^c and z = (T0/gamma)(1 - (p/p0)^c) with c = R gamma/g. With Poisson's
equation theta = T (1e5/p)^kappa this is theta = theta_c (p/p0)^(c - kappa),
theta_c = T0 (1e5/p0)^kappa, so

    p(theta)      = p0 (theta/theta_c)^(1/(c - kappa)),
    dtheta/dp     = (c - kappa) theta / p,

and ln theta is linear in ln p: interpolation linear in ln p with ln theta as the
interpolating variable is exact here.

Flow: solid-body zonal wind u = u0 cos(lat), v = 0, the same on every level (Williamson et
al. 1992 test case 2; docs/references.md), absolute vorticity eta = 2 u0 sin(lat)/a + f on every
isobaric and isentropic surface. Ertel PV is then P = -g eta dtheta/dp (Hoskins et al. 1985;
docs/references.md "Methods"), on isobaric surfaces too since the baroclinic terms vanish for a
horizontally uniform theta (Bluestein 1992; docs/references.md), and |P| = g |eta| (kappa - c)
theta/p falls monotonically with pressure, so the 2 PVU crossing of each column is known
in closed form (or known not to exist below the top level).

kappa: leeward documents R = 287.05 and cp = 1004.6 J kg-1 K-1 (docs/output.md); the checks
use the same kappa = 287.05/1004.6 = 0.28574, within the common-practice 0.2857 of
docs/references.md "Constants" (using the program's own constants is common practice).
"""

from __future__ import annotations

import pyproj  # noqa: F401  (before ecCodes)
import netCDF4
import numpy as np
import pytest

import gribgen
from conftest import FIGURES, run_leeward, single_product
from ncproducts import align_to_product, interior_mask, read_isentropic, vertical_index

CASES = gribgen.closed_form_cases()
GRIDS = gribgen.closed_form_grids()

#: Cases whose columns span the 300-340 K surfaces (1000-100 hPa every 50 hPa) on a lat/lon,
#: a Gaussian and a Lambert grid, plus the closely spaced 1000-200 hPa column.
ISEN_CASES = ["tall_latlon_global_2p5", "tall_gaussian_n48", "tall_lambert_tangent_25",
              "column_dense_levels"]

#: Gas constant (docs/references.md) and the cp leeward documents (docs/output.md), in range
#: 1004 to 1005.7 of docs/references.md "Constants".
R_DRY = gribgen.R_DRY
CP = 1004.6
KAPPA = R_DRY / CP
G = gribgen.G0
PVU = 1e-6  # K m2 kg-1 s-1 (Hoskins et al. 1985; docs/references.md "Constants")

#: Output contract defaults of the isentropic family.
DEFAULT_SURFACES = np.arange(280.0, 360.0 + 1e-9, 5.0)
DEFAULT_LAYERS = np.array([[290.0, 300.0], [300.0, 310.0], [310.0, 330.0]])
DEFAULT_PVU = np.array([2.0])

#: Tolerances. Pressure on isentropic surfaces: 1 hPa (interpolation is exact for this
#: column; the margin covers float32 and packing; common practice). PV: 2% (the truncation
#: of three-point differences on these levels is below 0.1%; common practice). Tropopause
#: pressure: 5% (a crossing found between levels 50 hPa apart; common practice).
P_TOL_PA = 100.0
PV_REL_TOL = 0.02
TROP_REL_TOL = 0.05
#: PV checks away from the equator, where eta is small (common practice).
MIN_ABS_LAT = 20.0
#: Wind components: 24-bit packing of |u| <= 40 m s-1 quantises to 2.4e-6 m s-1 and bit
#: rounding to 16 mantissa bits adds 7.6e-6 relative; the bound leaves a wide margin
#: (common practice).
WIND_ABS_TOL = 1e-3
WIND_REL_TOL = 1e-4


# ---------------------------------------------------------------------------------------
# Helpers
# ---------------------------------------------------------------------------------------
def _levels_pa(case):
    return np.array(sorted(l * 100.0 for l in CASES[case]["levels"]))


def _column_theta_range(case):
    p = _levels_pa(case)
    th = gribgen.lapse_rate_theta(p, KAPPA)
    return float(th.min()), float(th.max())


def _lin_ln_p(levels_pa, values, p):
    """values (on levels_pa, increasing pressure) interpolated linearly in ln p at p."""
    return float(np.interp(np.log(p), np.log(levels_pa), values))


def _decoded_winds(path):
    """u and v of one level as ecCodes decodes them (the same on every level here), with
    ecCodes' latitudes and longitudes, file order."""
    u = v = lat = lon = None
    for f in gribgen.read_fields(path):
        if f["level"] == 500 and (f["category"], f["number"]) == gribgen.PARAM_U:
            u, lat, lon = f["values"], f["lat"], f["lon"]
        if f["level"] == 500 and (f["category"], f["number"]) == gribgen.PARAM_V:
            v = f["values"]
    assert u is not None and v is not None, f"{path}: no 500 hPa winds"
    return lat, lon, u, v


class Setup:
    """One product of a closed-form case with its reference geography and winds."""

    def __init__(self, case, run, path):
        assert run.returncode == 0, f"exit code {run.returncode}, contract says 0\n{run.describe()}"
        self.case = case
        self.grid = GRIDS[CASES[case]["grid"]]
        self.prod = read_isentropic(single_product(run))
        lat, lon, u, v = _decoded_winds(path)
        # Reference geography and winds in the product's order, matched by ecCodes'
        # latitudes and longitudes (an independent decoder).
        self.lat, self.lon, self.u, self.v = align_to_product(self.prod, lat, lon, u, v)
        self.interior = interior_mask(self.prod, self.lat.shape, edge=2,
                                      global_grid=self.grid.global_)
        self.eta = (gribgen.solid_body_zeta(self.lat, gribgen.U0, self.grid.earth_radius)
                    + gribgen.coriolis(self.lat))


def _setup(case, closed_form_runs, closed_form_inputs) -> Setup:
    return Setup(case, closed_form_runs.get(case), closed_form_inputs[case])


def _where(s: Setup, mask, err):
    i = np.unravel_index(np.nanargmax(np.where(mask, err, -np.inf)), err.shape)
    return f"worst at lat {s.lat[i]:.2f} lon {s.lon[i]:.2f}"


# ---------------------------------------------------------------------------------------
# Coordinates
# ---------------------------------------------------------------------------------------
@pytest.mark.parametrize("case", ISEN_CASES)
def test_default_vertical_coordinates(case, closed_form_runs, closed_form_inputs):
    # Output contract defaults: surfaces 280, 285, ..., 360 K; one PV surface of 2 PVU;
    # layers 290-300, 300-310, 310-330 K with mid values as the layer coordinate.
    s = _setup(case, closed_form_runs, closed_form_inputs)
    np.testing.assert_allclose(s.prod.theta_level, DEFAULT_SURFACES, rtol=0, atol=1e-9)
    np.testing.assert_allclose(s.prod.pv_level, DEFAULT_PVU, rtol=0, atol=1e-9)
    np.testing.assert_allclose(s.prod.theta_layer_bounds, DEFAULT_LAYERS, rtol=0, atol=1e-9)
    np.testing.assert_allclose(s.prod.theta_layer, DEFAULT_LAYERS.mean(axis=1), rtol=0, atol=1e-9)


# ---------------------------------------------------------------------------------------
# Interpolation to isentropic surfaces
# ---------------------------------------------------------------------------------------
ON_SURFACES = ("isen_p", "isen_z", "isen_t", "isen_u", "isen_v", "isen_m", "isen_pv")


@pytest.mark.parametrize("case", ISEN_CASES)
def test_surfaces_outside_the_column_are_missing(case, closed_form_runs, closed_form_inputs):
    # docs/references.md "Methods" (interpolation to isentropic surfaces) and the output
    # contract: a surface below the lowest level or above the top level is missing, every
    # variable on it; every surface inside the column has a pressure at every point (a
    # column operation, no horizontal stencil).
    s = _setup(case, closed_form_runs, closed_form_inputs)
    lo, hi = _column_theta_range(case)
    outside = [th for th in s.prod.theta_level if th < lo - 0.01 or th > hi + 0.01]
    inside = [th for th in s.prod.theta_level if lo + 0.01 < th < hi - 0.01]
    assert outside and inside, f"{case}: column {lo:.2f}-{hi:.2f} K should leave surfaces on both sides"
    for th in outside:
        k = vertical_index(s.prod.theta_level, th, what="theta_level")
        for name in ON_SURFACES:
            n = int(np.count_nonzero(np.isfinite(s.prod.fields[name][k])))
            assert n == 0, f"{case}: {name} at {th:g} K (column spans {lo:.2f}-{hi:.2f} K) has {n} values"
    for th in inside:
        k = vertical_index(s.prod.theta_level, th, what="theta_level")
        for name in ("isen_p", "isen_z", "isen_t", "isen_u", "isen_v", "isen_m"):
            n = int(np.count_nonzero(~np.isfinite(s.prod.fields[name][k])))
            assert n == 0, f"{case}: {name} at {th:g} K missing at {n} points (column spans {lo:.2f}-{hi:.2f} K)"


@pytest.mark.parametrize("case", ISEN_CASES)
def test_isentropic_pressure_temperature_height(case, closed_form_runs, closed_form_inputs):
    # p(theta) = p0 (theta/theta_c)^(1/(c - kappa)) within 1 hPa (closed form above);
    # isen_t = theta (p/1e5)^kappa (Poisson's equation), isen_z = (T0/gamma)(1 - (p/p0)^c)
    # (docs/references.md), isen_m = cp T + g z (Montgomery streamfunction; Bluestein 1992, from
    # memory) at that p. T and z may be interpolated linearly in ln p between the bracketing
    # levels (docs/references.md "Methods"), which is not exact for them: the bound is that
    # method's own error on these levels, computed here, plus a float32/packing margin.
    s = _setup(case, closed_form_runs, closed_form_inputs)
    lev = _levels_pa(case)
    t_lev = gribgen.lapse_rate_temperature(lev)
    z_lev = gribgen.lapse_rate_height(lev)
    lo, hi = _column_theta_range(case)
    worst = {"p": 0.0, "t": 0.0, "z": 0.0, "m": 0.0}
    bad = []
    for k, th in enumerate(s.prod.theta_level):
        if not lo + 0.01 < th < hi - 0.01:
            continue
        p = float(gribgen.lapse_rate_pressure_of_theta(th, KAPPA))
        t = th * (p / gribgen.THETA_REF_P) ** KAPPA
        z = float(gribgen.lapse_rate_height(p))
        m = CP * t + G * z
        et = abs(_lin_ln_p(lev, t_lev, p) - t)
        ez = abs(_lin_ln_p(lev, z_lev, p) - z)
        tol = {"p": P_TOL_PA, "t": 1.1 * et + 1e-5 * t, "z": 1.1 * ez + 0.5,
               "m": 1.1 * (CP * et + G * ez) + 1e-5 * m}
        for key, name, want in (("p", "isen_p", p), ("t", "isen_t", t), ("z", "isen_z", z),
                                ("m", "isen_m", m)):
            err = np.abs(s.prod.fields[name][k] - want)
            e = float(np.nanmax(err))
            worst[key] = max(worst[key], e)
            if not e <= tol[key]:
                bad.append(f"{name} at {th:g} K: max |error| {e:.4g} > {tol[key]:.4g} "
                           f"(want {want:.6g}, {_where(s, np.isfinite(err), err)})")
    FIGURES.append(f"closed form {case}: max |error| isen_p {worst['p']:.3g} Pa, isen_t {worst['t']:.3g} K, "
                   f"isen_z {worst['z']:.3g} m, isen_m {worst['m']:.3g} m2 s-2")
    assert not bad, f"{case}:\n" + "\n".join(bad)


@pytest.mark.parametrize("case", ISEN_CASES)
def test_isentropic_winds(case, closed_form_runs, closed_form_inputs):
    # The winds are the same on every level, so any interpolation gives them back: isen_u,
    # isen_v equal ecCodes' decode of the input's u, v (earth- or grid-relative as the input
    # has them, output contract), within the packing/rounding bound above.
    s = _setup(case, closed_form_runs, closed_form_inputs)
    lo, hi = _column_theta_range(case)
    for k, th in enumerate(s.prod.theta_level):
        if not lo + 0.01 < th < hi - 0.01:
            continue
        for name, want in (("isen_u", s.u), ("isen_v", s.v)):
            err = np.abs(s.prod.fields[name][k] - want)
            tol = WIND_ABS_TOL + WIND_REL_TOL * np.abs(want)
            assert np.all(err <= tol), (
                f"{case} {name} at {th:g} K: max |error| {np.nanmax(err):.3e} m s-1 "
                f"({_where(s, np.isfinite(err), err)})")


def _pv_mask(s: Setup):
    return s.interior & (np.abs(s.lat) >= MIN_ABS_LAT)


def _compare_rel(s, name, got, want, mask, tol):
    g, w = got[mask], want[mask]
    missing = int(np.count_nonzero(~np.isfinite(g)))
    assert missing == 0, f"{s.case} {name}: {missing} of {g.size} points missing (|lat| >= {MIN_ABS_LAT}, interior)"
    rel = np.abs(g / w - 1.0)
    i = int(np.argmax(rel))
    assert rel[i] <= tol, (f"{s.case} {name}: max relative error {rel[i]:.3e} > {tol} at lat "
                           f"{s.lat[mask][i]:.2f}: got {g[i]:.6g}, want {w[i]:.6g}")
    return float(rel[i])


@pytest.mark.parametrize("case", ISEN_CASES)
def test_isentropic_pv_closed_form(case, closed_form_runs, closed_form_inputs):
    # P = -g (2 u0 sin(lat)/a + f) dtheta/dp, dtheta/dp = (c - kappa) theta/p at p(theta)
    # (Hoskins et al. 1985; Williamson et al. 1992; docs/references.md), in PVU, on the 300-340 K
    # surfaces inside the column, within 2% where |lat| >= 20.
    s = _setup(case, closed_form_runs, closed_form_inputs)
    lo, hi = _column_theta_range(case)
    mask = _pv_mask(s)
    worst = 0.0
    checked = []
    for k, th in enumerate(s.prod.theta_level):
        if not (300.0 <= th <= 340.0 and lo + 0.01 < th < hi - 0.01):
            continue
        p = float(gribgen.lapse_rate_pressure_of_theta(th, KAPPA))
        want = gribgen.lapse_rate_ertel_pv(p, s.eta, KAPPA) / PVU
        worst = max(worst, _compare_rel(s, f"isen_pv at {th:g} K", s.prod.fields["isen_pv"][k], want,
                                        mask, PV_REL_TOL))
        checked.append(th)
    assert checked, f"{case}: no 300-340 K surface inside the column"
    FIGURES.append(f"closed form {case}: isen_pv max relative error {worst:.2e} on {checked[0]:g}-{checked[-1]:g} K")


@pytest.mark.parametrize("case", ISEN_CASES)
def test_isobaric_pv_closed_form(case, closed_form_runs, closed_form_inputs):
    # The same closed form on every isobaric level (the baroclinic terms of the full
    # isobaric form vanish for a horizontally uniform theta; Bluestein 1992, docs/references.md),
    # within 2% where |lat| >= 20, end levels included.
    s = _setup(case, closed_form_runs, closed_form_inputs)
    mask = _pv_mask(s)
    worst = 0.0
    for k, p in enumerate(s.prod.pressure):
        want = gribgen.lapse_rate_ertel_pv(p, s.eta, KAPPA) / PVU
        worst = max(worst, _compare_rel(s, f"pv at {p / 100:g} hPa", s.prod.fields["pv"][k], want,
                                        mask, PV_REL_TOL))
    FIGURES.append(f"closed form {case}: isobaric pv max relative error {worst:.2e}")


# ---------------------------------------------------------------------------------------
# Dynamic tropopause
# ---------------------------------------------------------------------------------------
def _check_tropopause(s: Setup, case, pvu_levels):
    """trop_* on each PV surface against the closed-form crossing of the column.

    A column whose closed-form |PV| at the top level exceeds the target by more than the PV
    tolerance crosses it (|PV| falls monotonically with pressure): trop_p within 5% of the
    closed-form crossing, trop_theta and trop_z within what 5% of pressure moves them,
    trop_u/trop_v the column's winds. A column whose |PV| at the top stays below the
    target by more than the PV tolerance never reaches it: every trop_* is missing there.
    Columns within the PV tolerance of the target at the top level could go either way
    and are not checked (counted in the figures)."""
    lev = _levels_pa(case)
    mask = s.interior
    reports, bad = [], []
    for k, pvu in enumerate(pvu_levels):
        target = pvu * PVU
        top = np.abs(gribgen.lapse_rate_ertel_pv(lev[0], s.eta, KAPPA))
        crosses = mask & (top >= target * (1 + PV_REL_TOL))
        never = mask & (top <= target * (1 - PV_REL_TOL))
        p_star = gribgen.lapse_rate_pressure_of_pv(target, np.where(crosses, s.eta, 1.0), KAPPA)
        # The crossing is inside the column: below the top by construction, above the bottom
        # level for these flows (|PV| < 1 PVU at 1000 hPa); assert it so a change shows.
        assert np.all(p_star[crosses] <= lev[-1]), f"{case}: closed-form crossing below the lowest level"
        f = {n: s.prod.fields[n][k] for n in ("trop_p", "trop_theta", "trop_z", "trop_u", "trop_v")}
        for n, a in f.items():
            nmiss = int(np.count_nonzero(~np.isfinite(a[crosses])))
            if nmiss:
                bad.append(f"{n} at {pvu:g} PVU missing at {nmiss} of {int(crosses.sum())} columns that "
                           f"cross it (e.g. {_where(s, crosses & ~np.isfinite(a), np.ones(a.shape))})")
            nval = int(np.count_nonzero(np.isfinite(a[never])))
            if nval:
                bad.append(f"{n} at {pvu:g} PVU present at {nval} of {int(never.sum())} columns whose |PV| "
                           f"stays below it (e.g. {_where(s, never & np.isfinite(a), np.ones(a.shape))})")
        ok = crosses & np.isfinite(f["trop_p"])
        rel = np.abs(f["trop_p"] / p_star - 1.0)
        if ok.any() and np.nanmax(rel[ok]) > TROP_REL_TOL:
            i = np.unravel_index(np.nanargmax(np.where(ok, rel, -1)), rel.shape)
            bad.append(f"trop_p at {pvu:g} PVU: relative error up to {rel[i]:.3e} > {TROP_REL_TOL} "
                       f"(lat {s.lat[i]:.2f}: got {f['trop_p'][i]:.1f} Pa, closed form {p_star[i]:.1f} Pa)")
        lo_p, hi_p = p_star * (1 - TROP_REL_TOL), p_star * (1 + TROP_REL_TOL)
        for n, fn, margin in (("trop_theta", lambda p: gribgen.lapse_rate_theta(p, KAPPA), 1e-3),
                              ("trop_z", gribgen.lapse_rate_height, 0.5)):
            want = fn(p_star)
            tol = np.maximum(np.abs(fn(lo_p) - want), np.abs(fn(hi_p) - want)) + margin
            err = np.abs(f[n] - want)
            sel = crosses & np.isfinite(f[n])
            if sel.any() and np.any(err[sel] > tol[sel]):
                i = np.unravel_index(np.nanargmax(np.where(sel, err - tol, -np.inf)), err.shape)
                bad.append(f"{n} at {pvu:g} PVU: |error| {err[i]:.4g} > {tol[i]:.4g} at lat {s.lat[i]:.2f} "
                           f"(got {f[n][i]:.6g}, closed form {want[i]:.6g})")
        for n, want in (("trop_u", s.u), ("trop_v", s.v)):
            err = np.abs(f[n] - want)
            sel = crosses & np.isfinite(f[n])
            tol = WIND_ABS_TOL + WIND_REL_TOL * np.abs(want)
            if np.any(err[sel] > tol[sel]):
                bad.append(f"{n} at {pvu:g} PVU: max |error| {np.max(err[sel]):.3e} m s-1")
        amb = int(np.count_nonzero(mask & ~crosses & ~never))
        reports.append(f"{pvu:g} PVU: {int(crosses.sum())} crossing columns (trop_p max rel error "
                       f"{(np.nanmax(rel[ok]) if ok.any() else float('nan')):.2e}), {int(never.sum())} "
                       f"without crossing, {amb} within the tolerance band unchecked")
    return reports, bad


@pytest.mark.parametrize("case", ISEN_CASES)
def test_dynamic_tropopause_closed_form(case, closed_form_runs, closed_form_inputs):
    # |PV| = 2 PVU, +2 north and -2 south of the equator (docs/references.md "Methods": dynamic
    # tropopause, common practice), against the closed-form PV profile of each column.
    s = _setup(case, closed_form_runs, closed_form_inputs)
    reports, bad = _check_tropopause(s, case, s.prod.pv_level)
    FIGURES.append(f"closed form {case}: tropopause " + "; ".join(reports))
    assert not bad, f"{case}:\n" + "\n".join(bad)


# ---------------------------------------------------------------------------------------
# Layer PV
# ---------------------------------------------------------------------------------------
def _check_layers(s: Setup, case, bounds):
    lo, hi = _column_theta_range(case)
    mask = _pv_mask(s)
    worst_dp, worst_pv = 0.0, 0.0
    checked = 0
    for k, (bot, top) in enumerate(bounds):
        if not (lo + 0.01 < bot and top < hi - 0.01):
            continue
        checked += 1
        # layer_dp = p(bottom theta) - p(top theta), closed form above, within 1 hPa at
        # every point (a column operation).
        dp = float(gribgen.lapse_rate_pressure_of_theta(bot, KAPPA) - gribgen.lapse_rate_pressure_of_theta(top, KAPPA))
        got = s.prod.fields["layer_dp"][k]
        err = np.abs(got - dp)
        assert np.all(err <= P_TOL_PA), (f"{case} layer_dp {bot:g}-{top:g} K: max |error| {np.nanmax(err):.4g} Pa "
                                         f"(closed form {dp:.2f} Pa; {int(np.isnan(err).sum())} missing)")
        worst_dp = max(worst_dp, float(err.max()))
        # layer_pv = (zeta + f)/(p_bottom - p_top) (docs/references.md "Methods": layer PV in
        # pressure depth; potential_vorticity_of_atmosphere_layer, CF standard name table):
        # eta is the same at every level, so its layer mean is eta; within 2% for |lat| >= 20.
        worst_pv = max(worst_pv, _compare_rel(s, f"layer_pv {bot:g}-{top:g} K", s.prod.fields["layer_pv"][k],
                                              s.eta / dp, mask, PV_REL_TOL))
    assert checked, f"{case}: no layer of {bounds.tolist()} inside the column {lo:.2f}-{hi:.2f} K"
    return worst_dp, worst_pv


@pytest.mark.parametrize("case", ISEN_CASES)
def test_layer_pv_closed_form(case, closed_form_runs, closed_form_inputs):
    s = _setup(case, closed_form_runs, closed_form_inputs)
    worst_dp, worst_pv = _check_layers(s, case, s.prod.theta_layer_bounds)
    FIGURES.append(f"closed form {case}: layer_dp max |error| {worst_dp:.3g} Pa, layer_pv max relative error {worst_pv:.2e}")


# ---------------------------------------------------------------------------------------
# Configured surfaces, layers and PV values
# ---------------------------------------------------------------------------------------
CONFIG_CASE = "tall_latlon_global_2p5"
CONFIG_SURFACES = [297.5, 317.5, 342.5]
CONFIG_LAYERS = [[297.5, 342.5], [305.0, 312.5]]
CONFIG_PVU = [1.5, 3.0]


@pytest.fixture(scope="module")
def configured(leeward_bin, closed_form_inputs, tmp_path_factory):
    d = tmp_path_factory.mktemp("isentropic_config")
    cfg = d / "leeward.toml"
    # docs/configuration.md and the output contract: [isentropic] surfaces, layers,
    # tropopause_pvu. Values off the default 5 K grid, so that defaults cannot pass.
    cfg.write_text("[isentropic]\n"
                   f"surfaces = {CONFIG_SURFACES}\n"
                   f"layers = {CONFIG_LAYERS}\n"
                   f"tropopause_pvu = {CONFIG_PVU}\n")
    run = run_leeward(leeward_bin, [closed_form_inputs[CONFIG_CASE]], d / "out", "configured", config=cfg)
    return Setup(CONFIG_CASE, run, closed_form_inputs[CONFIG_CASE])


def test_configured_coordinates(configured):
    # The configured values, in order, as the coordinates (output contract).
    s = configured
    np.testing.assert_allclose(s.prod.theta_level, CONFIG_SURFACES, rtol=0, atol=1e-9)
    np.testing.assert_allclose(s.prod.pv_level, CONFIG_PVU, rtol=0, atol=1e-9)
    # docs/configuration.md: layers are written in order of their middle potential
    # temperature (a CF coordinate variable must be monotonic).
    layers = sorted(CONFIG_LAYERS, key=lambda l: l[0] + l[1])
    np.testing.assert_allclose(s.prod.theta_layer_bounds, layers, rtol=0, atol=1e-9)
    np.testing.assert_allclose(s.prod.theta_layer, np.mean(layers, axis=1), rtol=0, atol=1e-9)


def test_configured_surfaces_closed_form(configured):
    # p(theta) closed form within 1 hPa and PV within 2% (as above) on configured surfaces.
    s = configured
    mask = _pv_mask(s)
    for k, th in enumerate(s.prod.theta_level):
        p = float(gribgen.lapse_rate_pressure_of_theta(th, KAPPA))
        err = np.abs(s.prod.fields["isen_p"][k] - p)
        assert np.all(err <= P_TOL_PA), f"isen_p at {th:g} K: max |error| {np.nanmax(err):.4g} Pa (want {p:.2f})"
        _compare_rel(s, f"isen_pv at {th:g} K", s.prod.fields["isen_pv"][k],
                     gribgen.lapse_rate_ertel_pv(p, s.eta, KAPPA) / PVU, mask, PV_REL_TOL)


def test_configured_tropopause_closed_form(configured):
    s = configured
    reports, bad = _check_tropopause(s, CONFIG_CASE, s.prod.pv_level)
    FIGURES.append(f"closed form {CONFIG_CASE} configured: tropopause " + "; ".join(reports))
    assert not bad, "\n".join(bad)


def test_configured_layers_closed_form(configured):
    s = configured
    _check_layers(s, CONFIG_CASE, s.prod.theta_layer_bounds)


# ---------------------------------------------------------------------------------------
# A statically unstable column
# ---------------------------------------------------------------------------------------
#: Lapse rate 12 K/km, above the dry adiabatic g/cp = 9.8 K/km: theta falls with height
#: at every level (c = R gamma/g = 0.351 > kappa), so every surface inside the column's
#: theta range is bracketed by unstable layers only (docs/references.md "Methods": stability).
UNSTABLE_GAMMA = 0.012


@pytest.fixture(scope="module")
def unstable(leeward_bin, tmp_path_factory):
    d = tmp_path_factory.mktemp("isentropic_unstable")
    grid = GRIDS["latlon_small_1p0"]
    path = gribgen.solid_body(d / "unstable.grib2", grid, levels_hpa=gribgen.TALL_LEVELS_HPA, bits=24,
                              gamma=UNSTABLE_GAMMA)
    run = run_leeward(leeward_bin, [path], d / "out", "unstable")
    assert run.returncode == 0, f"exit code {run.returncode}, contract says 0\n{run.describe()}"
    return run


def test_unstable_column_surfaces_missing(unstable):
    # Output contract and docs/references.md "Methods": a surface whose bracketing layer is
    # statically unstable is missing. Here theta runs from 286.8 K at 1000 hPa down to
    # 246.7 K at 100 hPa: the 280 and 285 K surfaces lie inside that range, bracketed only
    # by unstable layers; nothing on them may be present.
    lev = np.array(sorted(l * 100.0 for l in gribgen.TALL_LEVELS_HPA))
    th = gribgen.lapse_rate_temperature(lev, UNSTABLE_GAMMA) * (gribgen.THETA_REF_P / lev) ** KAPPA
    assert np.all(np.diff(th) > 0), "the test column should have theta rising with pressure (falling with height)"
    # Every surface of the defaults that lies inside the column is bracketed by unstable
    # layers only, and the others lie outside it: no isentropic variable has a valid point,
    # so none is written (output contract, docs/output.md "Variables left out"), and the step
    # line says why.
    inside = [t for t in (280.0 + 5.0 * k for k in range(17)) if th.min() < t < th.max()]
    assert inside, f"no default surface inside the unstable column's {th.min():.1f}-{th.max():.1f} K"
    path = single_product(unstable)
    with netCDF4.Dataset(path) as ds:
        for name in ON_SURFACES:
            assert name not in ds.variables, f"{name} written with no valid point in a statically unstable column"
    said = [ln for ln in unstable.stdout.splitlines() if ln.strip().startswith("left out:")]
    assert said, unstable.stdout
    for name in ON_SURFACES:
        assert f"{name}: every point is missing: no configured isentropic surface lies between two " \
               f"isobaric levels of a stable layer" in said[0], said[0]
