"""Closed-form checks of leeward's diagnostics on inputs encoded by ecCodes (gribgen.py).

Flow: solid-body zonal wind u = u0 cos(lat), v = 0 (Williamson et al. 1992, J. Comput.
Phys. 102, 211-224, test case 2; docs/references.md "Check values"), whose relative vorticity is
exactly 2 u0 sin(lat) / a, on every grid type leeward reads; on projected and rotated grids
the winds are rotated into grid axes by an angle computed with pyproj, or left earth-relative
as the file's flag table 3.3 bit 5 says.

Column: horizontally uniform constant-lapse-rate atmosphere, T = T0 (p/p0)^(R gamma/g)
(docs/references.md "Check values"), so potential temperature, -dtheta/dp and N^2 are known in
closed form.
"""

from __future__ import annotations

import math

import pyproj  # noqa: F401  (before ecCodes)
import numpy as np
import pytest

import gribgen
from conftest import FIGURES, single_product
from ncproducts import align_to_product, interior_mask, level_index, read_product

CASES = gribgen.closed_form_cases()
GRIDS = gribgen.closed_form_grids()
GEOMETRY_CASES = [n for n in CASES if not n.startswith("packing_")]
PACKING_CASES = [n for n in CASES if n.startswith("packing_")]

#: Relative tolerance on zeta and eta away from the equator (0.5%: the truncation of
#: second-order centred differences on these grids is 0.1-0.2%; common practice).
REL_TOL = 5e-3
#: Below this |latitude| (degrees) 2 u0 sin(lat)/a is tiny: compare with an absolute
#: tolerance equal to REL_TOL of the value at this latitude instead.
LOW_LAT = 5.0


def _product_and_reference(case, closed_form_runs, closed_form_inputs):
    run = closed_form_runs.get(case)
    assert run.returncode == 0, f"exit code {run.returncode}, contract says 0\n{run.describe()}"
    prod = read_product(single_product(run))
    # Reference geography: ecCodes' own decoding of the grid (an independent decoder).
    lat, lon, _, _ = gribgen.read_grid_latlons(closed_form_inputs[case])
    lat, lon = align_to_product(prod, lat, lon)
    return run, prod, lat, lon


def _edge(case):
    grid = GRIDS[CASES[case]["grid"]]
    return grid, grid.global_


def _compare(name, got, want, lat, mask, scale_at_low_lat):
    """Assert |got - want| <= REL_TOL |want| where |lat| >= LOW_LAT, and
    <= REL_TOL * scale_at_low_lat below it; every compared point must be present."""
    g, w, la = got[mask], want[mask], lat[mask]
    missing = int(np.count_nonzero(~np.isfinite(g)))
    assert missing == 0, f"{name}: {missing} of {g.size} points missing away from poles and edges"
    hi = np.abs(la) >= LOW_LAT
    rel = np.abs(g[hi] - w[hi]) / np.abs(w[hi]) if hi.any() else np.zeros(0)
    ab = np.abs(g[~hi] - w[~hi])
    worst_rel = float(rel.max()) if rel.size else 0.0
    worst_abs = float(ab.max()) if ab.size else 0.0
    abs_tol = REL_TOL * scale_at_low_lat
    if rel.size:
        i = int(np.argmax(rel))
        where = f"worst at lat {la[hi][i]:.2f}: got {g[hi][i]:.6e}, want {w[hi][i]:.6e}"
    else:
        where = ""
    assert worst_rel <= REL_TOL, f"{name}: max relative error {worst_rel:.3e} > {REL_TOL} ({where})"
    assert worst_abs <= abs_tol, f"{name}: max |error| {worst_abs:.3e} > {abs_tol:.3e} where |lat| < {LOW_LAT}"
    return worst_rel, worst_abs


@pytest.mark.parametrize("case", GEOMETRY_CASES)
def test_relative_vorticity_solid_body(case, closed_form_runs, closed_form_inputs):
    # zeta = 2 u0 sin(lat) / a exactly (Williamson et al. 1992, test case 2; docs/references.md),
    # a from GRIB2 code table 3.2 of the file (WMO-No. 306).
    run, prod, lat, _ = _product_and_reference(case, closed_form_runs, closed_form_inputs)
    grid, glob = _edge(case)
    a = grid.earth_radius
    want = gribgen.solid_body_zeta(lat, gribgen.U0, a)
    mask = interior_mask(prod, lat.shape, edge=2, global_grid=glob)
    low = abs(gribgen.solid_body_zeta(LOW_LAT, gribgen.U0, a))
    assert "zeta" in prod.fields, f"{prod.path.name}: no zeta"
    worst = [_compare(f"{case} zeta at {p / 100:g} hPa", prod.fields["zeta"][k], want, lat, mask, low)
             for k, p in enumerate(prod.pressure)]
    FIGURES.append(f"closed form {case}: zeta max relative error {max(w[0] for w in worst):.2e}"
                   + (f", max |error| below {LOW_LAT:g} deg {max(w[1] for w in worst):.1e} s-1"
                      if any(w[1] for w in worst) else ""))


@pytest.mark.parametrize("case", GEOMETRY_CASES)
def test_absolute_vorticity_solid_body(case, closed_form_runs, closed_form_inputs):
    # eta = zeta + f, f = 2 Omega sin(lat), Omega = 7.292115e-5 s-1 (docs/references.md).
    run, prod, lat, _ = _product_and_reference(case, closed_form_runs, closed_form_inputs)
    grid, glob = _edge(case)
    a = grid.earth_radius
    f = gribgen.coriolis(lat)
    want = gribgen.solid_body_zeta(lat, gribgen.U0, a) + f
    mask = interior_mask(prod, lat.shape, edge=2, global_grid=glob)
    low = abs(gribgen.solid_body_zeta(LOW_LAT, gribgen.U0, a) + gribgen.coriolis(LOW_LAT))
    assert "eta" in prod.fields, f"{prod.path.name}: no eta"
    for k, p in enumerate(prod.pressure):
        eta = prod.fields["eta"][k]
        _compare(f"{case} eta at {p / 100:g} hPa", eta, want, lat, mask, low)
        # eta - zeta is f itself wherever both exist: Omega 7.292115e-5 (IERS) or the WMO
        # 7.292e-5 both pass a 1e-4 relative bound, a float32 rounding margin is added.
        both = mask & np.isfinite(eta) & np.isfinite(prod.fields["zeta"][k])
        diff = (eta - prod.fields["zeta"][k])[both]
        err = np.abs(diff - f[both])
        bound = 1e-4 * np.abs(f[both]) + 2.5e-7 * np.abs(eta[both]) + 1e-12
        assert np.all(err <= bound), (
            f"{case} at {p / 100:g} hPa: eta - zeta differs from 2 Omega sin(lat) by up to {err.max():.3e}")


@pytest.mark.parametrize("case", ["latlon_global_2p5", "gaussian_n48", "lambert_tangent_25"])
def test_orientation_and_levels(case, closed_form_runs, closed_form_inputs):
    # Output contract: rows south to north, columns west to east, whatever the GRIB
    # scanning mode (the global inputs are stored north to south); pressure levels are
    # exactly the input's isobaric levels, in Pa.
    run, prod, lat, lon = _product_and_reference(case, closed_form_runs, closed_form_inputs)
    if prod.kind == "latlon":
        assert np.all(np.diff(prod.lat[:, 0]) > 0), f"{case}: latitude does not increase along rows"
        dlon = (np.diff(prod.lon[0, :]) + 360.0) % 360.0
        assert np.all((dlon > 0) & (dlon < 180)), f"{case}: longitude does not increase eastward"
    else:
        col = prod.lat.shape[1] // 2
        assert np.all(np.diff(prod.lat[:, col]) > 0), f"{case}: latitude does not increase with y"
    levels = sorted(float(v) for v in prod.pressure)
    assert levels == sorted(l * 100.0 for l in gribgen.DEFAULT_LEVELS_HPA), (
        f"{case}: pressure levels {levels} differ from the input's")


# ---------------------------------------------------------------------------------------
# Potential temperature and static stability of the constant-lapse-rate atmosphere
# ---------------------------------------------------------------------------------------
#: kappa = R/cp: 0.2857 is common practice (docs/references.md), and R = 287.05 with
#: cp = 1004 to 1005.7 J kg-1 K-1 gives 0.28542 to 0.28590.
KAPPA = 0.2857
KAPPA_SPREAD = 4e-4
P_REF = 1e5  # reference pressure of theta, 1000 hPa (docs/references.md)


def _theta_tolerance(p_pa):
    # Relative change of (1e5/p)^kappa over the allowed kappa spread, plus float32 margin.
    return KAPPA_SPREAD * abs(math.log(P_REF / p_pa)) + 2e-5


def _uniform_column(prod, name):
    """The horizontally uniform value of field `name` on each level (asserting uniformity:
    the input is uniform, so the output must be, to float32 precision)."""
    a = prod.fields[name]
    out = []
    for k in range(a.shape[0]):
        v = a[k][np.isfinite(a[k])]
        assert v.size > 0, f"{prod.path.name}:{name} level {prod.pressure[k]} Pa is all missing"
        med = float(np.median(v))
        spread = float(np.max(np.abs(v - med)))
        assert spread <= 1e-5 * abs(med) + 1e-30, (
            f"{name} at {prod.pressure[k] / 100:g} hPa not horizontally uniform: spread {spread:.3e}, value {med:.6e}")
        out.append(med)
    return np.array(out)


#: Realistic, unevenly spaced levels on two grids (tolerance follows the truncation of a
#: three-point difference on those levels), and closely spaced levels (tolerance 0.5%
#: interior, 2% at the end levels).
STABILITY_CASES = ["latlon_europe_1p0", "lambert_tangent_25", "column_dense_levels"]


@pytest.mark.parametrize("case", STABILITY_CASES)
def test_potential_temperature_closed_form(case, closed_form_runs, closed_form_inputs):
    # theta = T (1e5/p)^kappa (Poisson's equation, docs/references.md), T of the encoded
    # constant-lapse-rate atmosphere.
    run, prod, _, _ = _product_and_reference(case, closed_form_runs, closed_form_inputs)
    theta = _uniform_column(prod, "theta")
    for k, p in enumerate(prod.pressure):
        want = float(gribgen.lapse_rate_temperature(p)) * (P_REF / p) ** KAPPA
        tol = _theta_tolerance(p)
        assert abs(theta[k] / want - 1) <= tol, (
            f"{case} theta at {p / 100:g} hPa: {theta[k]:.4f} K, want {want:.4f} K (rel tol {tol:.1e})")


# US Standard Atmosphere 1976 (NOAA/NASA/USAF), computed from its defining constants:
# T0 = 288.15 K, lapse rate 6.5 K/km below 11 km, p0 = 1013.25 hPa, g0 = 9.80665 m s-2,
# R* = 8.31432 J mol-1 K-1, M0 = 28.9644 g mol-1 (docs/references.md "Constants", "Check values").
def _ussa1976_temperature(p_hpa):
    r = 8.31432 / 28.9644e-3
    return 288.15 * (p_hpa / 1013.25) ** (r * 0.0065 / 9.80665)


@pytest.mark.parametrize("level_hpa", [850, 500, 300])
def test_potential_temperature_standard_atmosphere(level_hpa, closed_form_runs, closed_form_inputs):
    # All three levels lie below 11 km in the 1976 standard atmosphere (300 hPa is at
    # 9164 m, docs/references.md), i.e. in its constant-lapse-rate troposphere.
    run, prod, _, _ = _product_and_reference("latlon_europe_1p0", closed_form_runs, closed_form_inputs)
    theta = _uniform_column(prod, "theta")[level_index(prod, level_hpa)]
    want = _ussa1976_temperature(level_hpa) * (1000.0 / level_hpa) ** KAPPA
    tol = _theta_tolerance(level_hpa * 100.0)
    assert abs(theta / want - 1) <= tol, (
        f"theta at {level_hpa} hPa {theta:.4f} K vs US Standard Atmosphere 1976 {want:.4f} K")


def _three_point_derivative(x, f, i):
    """First derivative at x[i] of the quadratic through three neighbouring points
    (centred where possible, one-sided at the ends): the three-point non-uniform
    difference of docs/references.md "Methods"."""
    n = len(x)
    j = min(max(i - 1, 0), n - 3)
    xs, fs = x[j:j + 3], f[j:j + 3]
    d = 0.0
    for a in range(3):
        # derivative of the Lagrange basis polynomial l_a at x[i]
        others = [b for b in range(3) if b != a]
        denom = np.prod([xs[a] - xs[b] for b in others])
        num = sum(np.prod([x[i] - xs[c] for c in others if c != b]) for b in others)
        d += fs[a] * num / denom
    return d


def _stability_tolerances(p_sorted, c):
    """Per-level relative tolerance on -dtheta/dp for theta proportional to p^c: the
    larger of 0.5% (interior) / 2% (end levels) and twice the actual truncation error of a
    three-point non-uniform difference on these levels, in p or in ln p, whichever is worse
    (both are allowed by docs/references.md "Methods")."""
    p = np.asarray(p_sorted, dtype=float)
    th = p ** c
    exact = c * p ** (c - 1)
    s = np.log(p)
    tol = []
    for i in range(len(p)):
        e_p = abs(_three_point_derivative(p, th, i) / exact[i] - 1)
        e_s = abs(_three_point_derivative(s, th, i) / p[i] / exact[i] - 1)
        base = 2e-2 if i in (0, len(p) - 1) else 5e-3
        tol.append(max(base, 2 * max(e_p, e_s)))
    return np.array(tol)


@pytest.mark.parametrize("case", STABILITY_CASES)
def test_static_stability_closed_form(case, closed_form_runs, closed_form_inputs):
    # theta = T0 p0^-b 1e5^kappa p^(b - kappa), b = R gamma / g, so
    # -dtheta/dp = (kappa - b) theta / p and N^2 = (g^2 p / (R T theta)) (-dtheta/dp)
    # = g^2 (kappa - b) / (R T) (docs/references.md "Methods": static stability, N^2 with
    # hydrostatic balance). kappa is the one leeward used, read from its own theta (checked
    # against 0.2857 +- 4e-4 above), so that the cp choice does not enter the tolerance.
    run, prod, _, _ = _product_and_reference(case, closed_form_runs, closed_form_inputs)
    theta = _uniform_column(prod, "theta")
    stab = _uniform_column(prod, "stab")
    n2 = _uniform_column(prod, "n2")
    p = prod.pressure
    t = gribgen.lapse_rate_temperature(p)
    away = np.abs(np.log(P_REF / p)) > 0.05
    kappa = float(np.median(np.log(theta[away] / t[away]) / np.log(P_REF / p[away])))
    assert abs(kappa - KAPPA) <= KAPPA_SPREAD, f"kappa implied by theta is {kappa:.5f}"
    b = gribgen.lapse_rate_exponent()
    order = np.argsort(p)
    tol_sorted = _stability_tolerances(p[order], b - kappa)
    tol = np.empty_like(tol_sorted)
    tol[order] = tol_sorted
    theta_exact = t * (P_REF / p) ** kappa
    want_stab = (kappa - b) * theta_exact / p
    want_n2 = gribgen.G0 ** 2 * (kappa - b) / (gribgen.R_DRY * t)
    report = []
    for k in range(len(p)):
        rs = stab[k] / want_stab[k] - 1
        rn = n2[k] / want_n2[k] - 1
        report.append(f"{p[k] / 100:g} hPa: stab {stab[k]:.5e} (want {want_stab[k]:.5e}, rel {rs:+.2e}), "
                      f"n2 {n2[k]:.5e} (want {want_n2[k]:.5e}, rel {rn:+.2e}), tol {tol[k]:.1e}")
    print("\n".join(report))
    FIGURES.append(f"closed form {case}: stab/n2 max relative error "
                   f"{max(max(abs(stab[k] / want_stab[k] - 1), abs(n2[k] / want_n2[k] - 1)) for k in range(len(p))):.2e}"
                   f" (kappa from theta {kappa:.5f})")
    bad = [r for k, r in enumerate(report)
           if abs(stab[k] / want_stab[k] - 1) > tol[k] or abs(n2[k] / want_n2[k] - 1) > tol[k]]
    assert not bad, f"{case}: static stability off the closed form:\n" + "\n".join(bad)


# ---------------------------------------------------------------------------------------
# Packings: simple (5.0), complex with spatial differencing (5.3), JPEG 2000 (5.40),
# CCSDS (5.42) of the same 16-bit solid-body fields
# ---------------------------------------------------------------------------------------
@pytest.mark.parametrize("case", PACKING_CASES)
def test_packing_gives_solid_body_vorticity(case, closed_form_runs, closed_form_inputs):
    # Same closed form as above (Williamson et al. 1992 test case 2), 16-bit packing.
    run, prod, lat, _ = _product_and_reference(case, closed_form_runs, closed_form_inputs)
    grid, _ = _edge(case)
    want = gribgen.solid_body_zeta(lat, gribgen.U0, grid.earth_radius)
    mask = interior_mask(prod, lat.shape, edge=2)
    low = abs(gribgen.solid_body_zeta(LOW_LAT, gribgen.U0, grid.earth_radius))
    for k, p in enumerate(prod.pressure):
        _compare(f"{case} zeta at {p / 100:g} hPa", prod.fields["zeta"][k], want, lat, mask, low)


def _decoded_winds(path):
    """u and v of every level as ecCodes decodes them: {level_hpa: (u, v)}."""
    out = {}
    for f in gribgen.read_fields(path):
        if (f["category"], f["number"]) in (gribgen.PARAM_U, gribgen.PARAM_V):
            out.setdefault(f["level"], {})[f["number"]] = f["values"]
    return {lev: (d[2], d[3]) for lev, d in out.items()}


@pytest.mark.parametrize("case", [c for c in PACKING_CASES if c != "packing_grid_simple"])
def test_packings_agree_within_packing_precision(case, closed_form_runs, closed_form_inputs):
    # zeta from each packing against zeta from simple packing. Bound: error propagation of
    # the decoded-value differences (ecCodes' decode of each file, never the original
    # values: docs/references.md "Outside references used by the tests") through a
    # difference stencil whose weights sum to at most 1.5 in absolute value per direction
    # (covers second- and fourth-order centred stencils; common practice), plus float32
    # decoding and output rounding.
    ref_case = "packing_grid_simple"
    _, ref, lat, _ = _product_and_reference(ref_case, closed_form_runs, closed_form_inputs)
    _, prod, _, _ = _product_and_reference(case, closed_form_runs, closed_form_inputs)
    grid, _ = _edge(case)
    w_ref = _decoded_winds(closed_form_inputs[ref_case])
    w_pk = _decoded_winds(closed_form_inputs[case])
    a = grid.earth_radius
    dlam = dphi = math.radians(grid.params["dlon"])
    mask = interior_mask(prod, lat.shape, edge=2)
    coslat = np.cos(np.radians(lat))
    for k, p in enumerate(prod.pressure):
        lev = int(round(p / 100))
        ku = level_index(ref, lev)
        du = np.max(np.abs(w_ref[lev][0] - w_pk[lev][0]))
        dv = np.max(np.abs(w_ref[lev][1] - w_pk[lev][1]))
        umax = max(np.max(np.abs(w_ref[lev][0])), np.max(np.abs(w_ref[lev][1])))
        dec = 8 * np.finfo(np.float32).eps * umax  # float32 arithmetic in a decoder
        bound = 1.5 * ((dv + dec) / dlam + (du + dec) / dphi) / (a * coslat)
        z_ref = ref.fields["zeta"][ku]
        z = prod.fields["zeta"][k]
        bound = bound + 4 * np.finfo(np.float32).eps * np.abs(z_ref)
        diff = np.abs(z - z_ref)
        ok = diff[mask] <= bound[mask]
        assert np.all(np.isfinite(z[mask])), f"{case}: missing zeta at {lev} hPa"
        assert ok.all(), (
            f"{case} vs simple packing at {lev} hPa: |dzeta| up to {diff[mask].max():.3e}, "
            f"bound {bound[mask][~ok].min():.3e} (decoded |du|={du:.2e}, |dv|={dv:.2e})")
