"""Equivalent potential temperature against the pseudo-adiabat integrated numerically.

leeward's theta_e is Bolton's (1980, Mon. Wea. Rev. 108, 1046-1053) equation 39, a fit to
pseudo-adiabats. The MetPy checks (test_cyclones.py) compare it with another implementation
of the same formula; this one compares it with the physics the formula stands for: each
parcel lifted dry to its condensation level, then along the water-saturation pseudo-adiabat
until its vapour is gone, then brought down dry to 1000 hPa (pseudoadiabat.py, equations and
sources there, integrated with scipy).

Columns (inputs encoded by ecCodes with specific humidity, so that the vapour pressure does
not depend on any saturation formula): tropical moist at the equator (303 K, 90 % at
1000 hPa: r = 24 g/kg), hot and half dry in the subtropics (310 K, 40 %), mid-latitude
(285 K, 70 %) and cold dry (255 K, 40 %) toward the poles, each in both hemispheres (the
southern a little colder, so that the two differ), 1000 to 300 hPa, humidity falling with
height.

The constants. Bolton fitted his formula to pseudo-adiabats computed with c_pd =
1005.7 J kg-1 K-1 and R_d = 287.04 J kg-1 K-1 (kappa = 0.2854; from memory), and the
reference here is integrated with those. leeward writes the formula with its own kappa,
287.05 / 1004.6 = 0.2857 (src/diagnostics/moisture.rs, so that theta_e equals leeward's
theta in dry air): its value is brought to Bolton's kappa by the exact factor
(p0 / (p - e))^(0.2854 - 0.2857) before the comparison (up to 0.13 K at 300 hPa), so
that what is compared is the formula's moist part and leeward's use of it.

The bound, 0.08 K at every point: Bolton gives equation 39 as his most accurate
formula, within a few hundredths of a kelvin of his pseudo-adiabats (from memory;
Davies-Jones 2009, Mon. Wea. Rev. 137, 3137-3148, calls it very accurate and checks it
on a dense grid). Against the reference here the formula alone (evaluated in Python below,
without leeward) is within 0.055 K for these columns, its worst at the equator's 26 g/kg
(the fit is worse the moister the air: 0.01 K at 14 g/kg); 0.015 K more covers the
file's rounding of theta_e to 16 significant bits (2^-17 relative: 0.003 K) and the
reference's own choices (Murphy and Koop's saturation vapour pressure where Bolton used
another, the latent heat's temperature dependence), whose effect on theta_e is below
0.01 K (the condensation level moves by less than 0.02 K); rounded up to 0.08 K.
Dropping either moisture term of the formula, (1 + 0.448e-3 r) or (T/T_L)^(0.28e-3 r),
moves theta_e by up to 1.0 K and 0.12 K here.
"""

from __future__ import annotations

import math

import pyproj  # noqa: F401  (before ecCodes)
import netCDF4
import numpy as np
import pytest

import gribgen
import pseudoadiabat
from conftest import FIGURES, run_leeward

LEVELS = (1000, 925, 850, 700, 500, 400, 300)
#: leeward's kappa (docs/references.md: R_d = 287.05, c_pd = 1004.6) and Bolton's.
KAPPA_LEEWARD = 287.05 / 1004.6
KAPPA_BOLTON = 0.2854
#: The bound, K (module docstring).
BOUND_K = 0.08
#: leeward's epsilon = R_d / R_v (src/diagnostics/thickness.rs).
EPSILON = 0.622
#: Sampled longitudes, degrees east.
SAMPLED_LON = (0.0, 180.0)

#: |latitude| nodes, and temperature (K) and relative humidity (%) at 1000 hPa there:
#: tropical moist, subtropical hot and half dry, mid-latitude, cold dry.
NODES = (0.0, 20.0, 45.0, 75.0, 90.0)
T_1000 = (303.0, 310.0, 285.0, 255.0, 250.0)
RH_1000 = (90.0, 40.0, 70.0, 40.0, 40.0)


def column(lat, lon, p_pa):
    """Temperature (K) and relative humidity (%) at p: the 1000 hPa values of the latitude
    (2 K colder south of the equator), 6.5 K/km above, 1 K waves in longitude; humidity
    falling to 45 % of its 1000 hPa value at 300 hPa."""
    t0 = np.interp(np.abs(lat), NODES, T_1000) - 2.0 * (lat < 0) + np.cos(np.radians(lon))
    t = t0 * (p_pa / 1e5) ** (gribgen.R_DRY * 0.0065 / gribgen.G0)
    rh = np.interp(np.abs(lat), NODES, RH_1000) * (0.45 + 0.55 * ((p_pa - 3e4) / 7e4) ** 2)
    return t, rh


def bolton_es(t):
    """Bolton's equation 10 (from memory), only to turn the columns' relative humidity into
    the specific humidity written to the input."""
    return 611.2 * np.exp(17.67 * (t - 273.15) / (t - 29.65))


def q_of(t, rh, p):
    e = rh / 100.0 * bolton_es(t)
    return EPSILON * e / (p - (1.0 - EPSILON) * e)


def bolton_39(p, t, q, kappa=KAPPA_BOLTON):
    """Bolton's equation 39 with T_L from his equation 22, written here from the paper's
    form (not from leeward's code): the formula's own error against the reference."""
    e = p * q / (EPSILON + (1.0 - EPSILON) * q)
    r = 1000.0 * EPSILON * e / (p - e)
    tl = 2840.0 / (3.5 * np.log(t) - np.log(e / 100.0) - 4.805) + 55.0
    return t * (1e5 / (p - e)) ** kappa * (t / tl) ** (0.28e-3 * r) * np.exp((3.036 / tl - 0.00178) * r * (1 + 0.448e-3 * r))


@pytest.fixture(scope="module")
def columns_run(leeward_bin, tmp_path_factory):
    d = tmp_path_factory.mktemp("theta_e")
    grid = gribgen.regular_ll("te_global_5", 90.0, -90.0, 0.0, 72, 5.0, 5.0, north_to_south=True, global_=True)
    geo = gribgen.geometry(grid)
    msgs = []
    kw = dict(times=gribgen.Times(), centre=98, bits=24)
    for lev in LEVELS:
        p = lev * 100.0
        t, rh = column(geo.lat, geo.lon, p)
        z = gribgen.lapse_rate_height(p) + 0.0 * geo.lat
        msgs.append(gribgen.encode_field(grid, geo, t, gribgen.PARAM_T, lev, **kw))
        msgs.append(gribgen.encode_field(grid, geo, z, gribgen.PARAM_GH, lev, **kw))
        msgs.append(gribgen.encode_field(grid, geo, 10.0 + 0.0 * geo.lat, gribgen.PARAM_U, lev, **kw))
        msgs.append(gribgen.encode_field(grid, geo, 0.0 * geo.lat, gribgen.PARAM_V, lev, **kw))
        msgs.append(gribgen.encode_field(grid, geo, q_of(t, rh, p), (1, 0), lev, **kw))
    f = d / "columns.grib2"
    f.write_bytes(b"".join(msgs))
    r = run_leeward(leeward_bin, [f], d / "out", "theta_e")
    assert r.returncode == 0, r.describe()
    nc = [p for p in (d / "out").glob("*.nc") if "_cyclones" not in p.name]
    assert len(nc) == 1, r.describe()
    return f, nc[0]


def _decoded(path):
    """(level hPa -> T, q) as ecCodes decodes the input, with its latitudes and longitudes."""
    t, q, lat, lon = {}, {}, None, None
    for fld in gribgen.read_fields(path):
        key = (fld["category"], fld["number"])
        if key == gribgen.PARAM_T:
            t[fld["level"]] = fld["values"]
        elif key == (1, 0):
            q[fld["level"]] = fld["values"]
        lat, lon = fld["lat"], fld["lon"]
    return t, q, lat, lon


def test_theta_e_follows_the_pseudo_adiabat(columns_run):
    grib, nc = columns_run
    t_in, q_in, lat_in, lon_in = _decoded(grib)
    with netCDF4.Dataset(nc) as ds:
        te = np.ma.filled(ds["theta_e"][0].astype(float), np.nan)
        p_file = [float(x) for x in ds["pressure"][:]]
        lat_f, lon_f = ds["lat"][:].astype(float), ds["lon"][:].astype(float)
    rows = []
    for lev in LEVELS:
        k = p_file.index(lev * 100.0)
        for j in range(lat_in.shape[0]):
            for lon0 in SAMPLED_LON:
                i = int(np.argmin(np.abs(np.mod(lon_in[j] - lon0 + 180.0, 360.0) - 180.0)))
                la, lo = float(lat_in[j, i]), float(lon_in[j, i])
                jf = int(np.argmin(np.abs(lat_f - la)))
                i_f = int(np.argmin(np.abs(np.mod(lon_f - lo + 180.0, 360.0) - 180.0)))
                p, t, q = lev * 100.0, float(t_in[lev][j, i]), float(q_in[lev][j, i])
                e = p * q / (EPSILON + (1.0 - EPSILON) * q)
                # leeward's value at Bolton's kappa (module docstring).
                got = te[k, jf, i_f] * (1e5 / (p - e)) ** (KAPPA_BOLTON - KAPPA_LEEWARD)
                r = q / (1.0 - q)
                ref = pseudoadiabat.theta_e(p, t, r)
                rows.append((la, lev, t, 1000.0 * r, got - ref, bolton_39(p, t, q) - ref, ref))
    a = np.array(rows)
    assert np.all(np.isfinite(a)), "theta_e missing at a sampled point"
    diff, formula = a[:, 4], a[:, 5]
    worst = int(np.argmax(np.abs(diff)))
    # The formula alone is within the bound less the allowance for rounding and the
    # reference's choices (module docstring): else the bound itself would be wrong.
    assert np.max(np.abs(formula)) <= BOUND_K - 0.015, f"Bolton 39 itself off by {np.max(np.abs(formula)):.3f} K"
    for name, sel in (("north", a[:, 0] > 0), ("south", a[:, 0] < 0), ("r >= 15 g/kg", a[:, 3] >= 15.0),
                      ("r < 2 g/kg", a[:, 3] < 2.0)):
        assert sel.any(), f"no sampled point {name}"
    FIGURES.append(
        f"theta_e vs the integrated pseudo-adiabat ({len(a)} points, 1000-300 hPa, r {a[:, 3].min():.2f}-"
        f"{a[:, 3].max():.1f} g/kg, both hemispheres): median |d| {np.median(np.abs(diff)):.4f} K, max "
        f"{np.abs(diff).max():.4f} K at {a[worst, 0]:+.0f} deg {a[worst, 1]:.0f} hPa r {a[worst, 3]:.1f} g/kg; "
        f"Bolton 39 alone max {np.abs(formula).max():.4f} K; bound {BOUND_K} K")
    assert np.abs(diff).max() <= BOUND_K, (
        f"theta_e off the pseudo-adiabat by {diff[worst]:+.3f} K at lat {a[worst, 0]:+.1f}, {a[worst, 1]:.0f} hPa, "
        f"T {a[worst, 2]:.2f} K, r {a[worst, 3]:.2f} g/kg (reference {a[worst, 6]:.3f} K)")


def test_the_reference_itself():
    # Closed forms the integration must meet: dry air gives theta = T (p0/p)^(R_d/c_pd)
    # (Poisson's equation); a parcel already saturated starts its moist ascent at once
    # (its lifting condensation level is where it is), and lifting it dry first to any
    # point of its own pseudo-adiabat gives the same theta_e (theta_e is conserved along
    # the pseudo-adiabat by construction).
    k = pseudoadiabat.R_D / pseudoadiabat.CP_D
    assert abs(pseudoadiabat.theta_e(70_000.0, 270.0, 0.0) - 270.0 * (1e5 / 7e4) ** k) < 1e-9
    p0, t0 = 90_000.0, 290.0
    rs = pseudoadiabat.EPS * math.exp(pseudoadiabat.ln_es(t0)) / (p0 - math.exp(pseudoadiabat.ln_es(t0)))
    a = pseudoadiabat.theta_e(p0, t0, rs)
    # The same parcel lifted a little further along its pseudo-adiabat.
    from scipy.integrate import solve_ivp
    pd0 = p0 * pseudoadiabat.EPS / (pseudoadiabat.EPS + rs)
    sol = solve_ivp(pseudoadiabat._saturated_rate, (math.log(pd0), math.log(pd0 - 20_000.0)), [t0],
                    rtol=1e-11, atol=1e-9)
    t1, pd1 = float(sol.y[0, -1]), pd0 - 20_000.0
    r1 = pseudoadiabat.EPS * math.exp(pseudoadiabat.ln_es(t1)) / pd1
    b = pseudoadiabat.theta_e(pd1 + pd1 * r1 / pseudoadiabat.EPS, t1, r1)
    assert abs(a - b) < 1e-3, (a, b)
