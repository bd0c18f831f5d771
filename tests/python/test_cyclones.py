"""Cyclone centres and tracks, and the fields they draw on, against closed forms and an
independent search, on inputs encoded by ecCodes (gribgen.py).

- An analytic depression: mean sea-level pressure p = p_env - D(t) exp(-(d/R)^2), d the
  great-circle distance from a centre moving east along 50 N at a known speed, D growing at a
  known rate, on a latitude/longitude grid and on a Lambert conformal grid (winds relative to
  the grid there). Its centre, its track and its deepening rate are known exactly; the
  deepening rate scaled to 60 degrees is D's rate times sin(60)/sin(latitude) (Sanders and
  Gyakum 1980, Mon. Wea. Rev. 108, 1589-1606; from memory), 1 bergeron being 24 hPa in 24 h.
- Two such lows passing each other in opposite directions: two tracks, never swapped.
- A uniform-shear, constant-N atmosphere: the Eady growth rate is 0.31 |f| Lambda / N exactly
  (Lindzen and Farrell 1980, J. Atmos. Sci. 37, 1648-1654; from memory); its relative
  humidity is uniform, so the isentropic relative humidity is that value, and its theta-e is
  checked against MetPy's equivalent_potential_temperature (Bolton 1980).
- Real model output (GFS and Eta samples): the centres leeward finds on the model's own mean
  sea-level pressure are those of an independent closed-contour search written here with
  scipy.ndimage on ecCodes' decoding of the same field, for every closed low deeper than
  2 hPa; theta-e against MetPy from ecCodes' temperature and relative humidity.
"""

from __future__ import annotations

import json
import math
import random
from pathlib import Path

import pyproj  # noqa: F401  (before ecCodes)
import netCDF4
import numpy as np
import pytest
from scipy import ndimage

import gribgen
from conftest import FIGURES, run_leeward
from ncproducts import align_to_product, read_product

A = gribgen.RADIUS_SHAPE_6  # sphere of GRIB2 code table 3.2 value 6 (WMO-No. 306)
OMEGA = gribgen.OMEGA  # IERS (docs/references.md)
G = gribgen.G0
R_DRY = gribgen.R_DRY
#: cp of dry air, J kg-1 K-1 (docs/references.md: 1004 to 1005.7, common practice).
CP = 1004.6
#: Levels of the cyclone inputs, hPa.
LEVELS = (1000, 950, 900, 850, 800, 750, 700, 600, 500, 400, 300)
#: The leads of a cycle, hours.
LEADS = tuple(range(0, 49, 6))
#: leeward's default isobar interval, hPa (docs/configuration.md, cyclones.contour_interval_hpa).
INTERVAL_HPA = 0.5
#: ... and the farthest reach of a closed isobar, km (cyclones.max_contour_radius_km).
MAX_CONTOUR_KM = 2500.0


def bolton_vapour_pressure(t_k, rh_pct):
    """e = RH e_s(T), e_s = 611.2 exp(17.67 (T - 273.15) / (T - 29.65)) Pa (Bolton 1980,
    equation 10; from memory): the vapour pressure leeward takes from a relative humidity."""
    return rh_pct / 100.0 * 611.2 * np.exp(17.67 * (t_k - 273.15) / (t_k - 29.65))


def metpy_theta_e(p_pa, t_k, e_pa):
    """MetPy's equivalent_potential_temperature (Bolton 1980, equation 39) for the vapour
    pressure e. MetPy takes the vapour pressure as the saturation vapour pressure at the
    dewpoint, from its own saturation_vapor_pressure (Ambaum 2020 in MetPy 1.7, not Bolton's
    equation 10, and not the inverse its `dewpoint` uses): the dewpoint given to it here is
    the root of that function at e (bisection to 1e-7 K), so that both sides start from the
    same p, T and e and only the theta-e formula is compared."""
    import metpy.calc as mpcalc
    from metpy.units import units

    e = np.asarray(e_pa, dtype=float)
    lo, hi = np.full(e.shape, 150.0), np.full(e.shape, 330.0)
    for _ in range(40):
        mid = 0.5 * (lo + hi)
        es = mpcalc.saturation_vapor_pressure(mid * units.K).m_as("Pa")
        lo, hi = np.where(es < e, mid, lo), np.where(es < e, hi, mid)
    td = 0.5 * (lo + hi) * units.K
    return mpcalc.equivalent_potential_temperature(np.asarray(p_pa) * units.Pa, np.asarray(t_k) * units.K, td).m_as("K")


def gc_distance(lat1, lon1, lat2, lon2, a=A):
    """Great-circle distance (haversine formula; common practice), m."""
    p1, p2 = np.radians(lat1), np.radians(lat2)
    dl = np.radians(np.asarray(lon2) - np.asarray(lon1))
    h = np.sin((p2 - p1) / 2) ** 2 + np.cos(p1) * np.cos(p2) * np.sin(dl / 2) ** 2
    return 2 * a * np.arcsin(np.minimum(np.sqrt(h), 1.0))


# ---------------------------------------------------------------------------------------
# Inputs
# ---------------------------------------------------------------------------------------
class Low:
    """A Gaussian low moving along a latitude circle at `speed` m/s (east positive), its
    depth below the environment growing by `rate` Pa per hour."""

    def __init__(self, lat, lon0, speed, depth0, rate, radius):
        self.lat, self.lon0, self.speed = lat, lon0, speed
        self.depth0, self.rate, self.radius = depth0, rate, radius

    def centre(self, t_h):
        return self.lat, self.lon0 + math.degrees(self.speed * t_h * 3600.0 / (A * math.cos(math.radians(self.lat))))

    def depression(self, lat, lon, t_h):
        la, lo = self.centre(t_h)
        d = gc_distance(la, lo, lat, lon)
        return (self.depth0 + self.rate * t_h) * np.exp(-((d / self.radius) ** 2))


P_ENV = 101_200.0  # Pa


def write_cycle(folder: Path, grid, lows, wind, name, centre=98):
    """One GRIB2 file per lead: T and Z of a constant-lapse-rate column (docs/references.md "Check
    values"), winds `wind(lat, lon)` -> (east, north) on every level, and mean sea-level
    pressure P_ENV minus the lows' depressions (code table 4.5 type 101)."""
    geo = gribgen.geometry(grid)
    grid_rel = grid.projected
    ue, ve = wind(geo.lat, geo.lon)
    if grid_rel:
        ex, ey, nx, ny = gribgen.east_north_in_grid_axes(grid, geo)
        ug, vg = ue * ex + ve * nx, ue * ey + ve * ny
    else:
        ug, vg = ue, ve
    files = []
    for lead in LEADS:
        times = gribgen.Times(20240115, 0, lead)
        kw = dict(times=times, centre=centre, grid_relative=grid_rel, bits=24)
        msgs = []
        for lev in LEVELS:
            p = lev * 100.0
            msgs.append(gribgen.encode_field(grid, geo, np.full(geo.lat.shape, float(gribgen.lapse_rate_temperature(p))), gribgen.PARAM_T, lev, **kw))
            msgs.append(gribgen.encode_field(grid, geo, np.full(geo.lat.shape, float(gribgen.lapse_rate_height(p))), gribgen.PARAM_GH, lev, **kw))
            msgs.append(gribgen.encode_field(grid, geo, ug, gribgen.PARAM_U, lev, **kw))
            msgs.append(gribgen.encode_field(grid, geo, vg, gribgen.PARAM_V, lev, **kw))
        mslp = P_ENV - sum(low.depression(geo.lat, geo.lon, lead) for low in lows)
        msgs.append(gribgen.encode_field(grid, geo, mslp, gribgen.PARAM_MSLP, 0, level_type=gribgen.LEVEL_MSL, **kw))
        f = folder / f"{name}_{lead:03d}.grib2"
        f.write_bytes(b"".join(msgs))
        files.append(f)
    return files


def read_tracks(out: Path):
    """The tracks file of the one cycle in `out`: per track a dict of arrays (CF contiguous
    ragged array: row_size points per track, in order; CF 1.10 section 9.3.3)."""
    files = sorted(out.glob("*_cyclones.nc"))
    assert len(files) == 1, f"expected one tracks file in {out}: {[p.name for p in out.iterdir()]}"
    with netCDF4.Dataset(files[0]) as ds:
        assert ds.getncattr("featureType") == "trajectory"
        assert ds["row_size"].getncattr("sample_dimension") == "obs"
        assert ds["track"].getncattr("cf_role") == "trajectory_id"
        sizes = ds["row_size"][:].astype(int)
        data = {}
        for name, v in ds.variables.items():
            if v.dimensions == ("obs",):
                v.set_auto_mask(True)
                data[name] = np.ma.filled(np.ma.asarray(v[:]).astype(float), np.nan)
    tracks, start = [], 0
    for n in sizes:
        tracks.append({k: a[start:start + n] for k, a in data.items()})
        start += n
    return files[0], tracks


# ---------------------------------------------------------------------------------------
# The moving, deepening depression
# ---------------------------------------------------------------------------------------
#: 15 m/s east along 50 N from 25 W; 5 hPa deep at hour 0, deepening by 1 hPa per hour
#: (24 hPa in 24 h: 27.1 hPa scaled to 60 degrees, 1.13 bergeron); e-folding radius 800 km.
MOVING = Low(50.0, -25.0, 15.0, 500.0, 100.0, 800e3)

GRIDS = {
    # 1 degree latitude/longitude, 25-75 N, 50 W - 40 E, stored north to south.
    "latlon": gribgen.regular_ll("cyc_latlon_1p0", 75.0, 25.0, -50.0, 91, 1.0, 1.0, north_to_south=True),
    # Lambert conformal, secant at 40 and 60 N, 50 km true at 40 N (LaD, where gribgen's
    # plane spacing and the grid length agree), centred on 50 N 7 W, winds along the grid.
    "lambert": gribgen.projected("cyc_lambert_50km", "lambert", 111, 71, 50000.0, 50000.0, 50.0, -7.0,
                                 lad=40.0, lov=-7.0, latin1=40.0, latin2=60.0),
}
#: Shortest distance between neighbouring points along 50 N, m: 1 degree of longitude at
#: 50 N on the sphere; on the Lambert grid 50 km over the scale factor at 50 N, which is below 1
#: between the standard parallels (at least 48 km; Snyder 1987, from memory): 48 km is taken.
GRID_LENGTH = {"latlon": A * math.radians(1.0) * math.cos(math.radians(50.0)), "lambert": 48e3}


@pytest.fixture(scope="module")
def moving_runs(leeward_bin, tmp_path_factory):
    """Per grid: the cycle processed in one run, and step by step in a shuffled order."""
    out = {}
    for name, grid in GRIDS.items():
        d = tmp_path_factory.mktemp(f"cyc_{name}")
        files = write_cycle(d, grid, [MOVING],
                            lambda la, lo: (np.full(la.shape, MOVING.speed), np.zeros(la.shape)), name)
        together = run_leeward(leeward_bin, files, d / "together", name)
        assert together.returncode == 0, together.describe()
        order = list(files)
        random.Random(7).shuffle(order)
        for f in order:
            r = run_leeward(leeward_bin, [f], d / "shuffled", name)
            assert r.returncode == 0, r.describe()
        out[name] = (d / "together", d / "shuffled", [f.name for f in order])
    return out


@pytest.mark.parametrize("grid", list(GRIDS))
def test_a_moving_deepening_low_is_one_track_at_its_centres(grid, moving_runs):
    together, _, _ = moving_runs[grid]
    _, tracks = read_tracks(together)
    assert len(tracks) == 1, f"{grid}: {len(tracks)} tracks, the analytic field has one low"
    tr = tracks[0]
    # No break: a point at every lead, in order.
    assert list(tr["time"]) == list(LEADS), f"{grid}: track times {tr['time']}"
    worst = 0.0
    for t, la, lo in zip(tr["time"], tr["lat"], tr["lon"]):
        cla, clo = MOVING.centre(t)
        d = float(gc_distance(cla, clo, la, lo))
        worst = max(worst, d)
        assert d <= GRID_LENGTH[grid], f"{grid} +{t:g} h: centre {d / 1e3:.1f} km from the analytic one"
        assert -180.0 <= lo <= 180.0
    # The central pressure is the analytic one (the fit of the 3 x 3 points), within 0.2 hPa.
    want_p = P_ENV - (MOVING.depth0 + MOVING.rate * tr["time"])
    assert np.nanmax(np.abs(tr["central_pressure"] - want_p)) < 20.0, tr["central_pressure"] - want_p
    # Deepening: 24 hPa per 24 h; scaled to 60 degrees from 50 N, 24 sin 60 / sin 50 hPa.
    rate = MOVING.rate * 24.0 / 100.0
    rel = np.abs(tr["deepening_rate"] / rate - 1.0)
    assert np.all(rel <= 0.05), f"{grid}: deepening rate {tr['deepening_rate']} hPa/24 h, analytic {rate}"
    want60 = rate * math.sin(math.radians(60.0)) / np.sin(np.radians(np.abs(tr["lat"])))
    rel60 = np.abs(tr["deepening_rate_60"] / want60 - 1.0)
    assert np.all(rel60 <= 0.05), f"{grid}: scaled rate {tr['deepening_rate_60']}, analytic {want60}"
    assert np.all(tr["bergeron_reached"] == 1), f"{grid}: 1.13 bergeron is flagged at every point"
    FIGURES.append(f"analytic low on {grid}: 1 track of {len(tr['time'])} points, centres within "
                   f"{worst / 1e3:.1f} km (grid length {GRID_LENGTH[grid] / 1e3:.1f} km), deepening rate "
                   f"error at most {100 * rel.max():.2f} % ({100 * rel60.max():.2f} % scaled to 60 degrees)")


@pytest.mark.parametrize("grid", list(GRIDS))
def test_the_tracks_do_not_depend_on_the_order_of_the_steps(grid, moving_runs):
    together, shuffled, order = moving_runs[grid]
    fa, a = read_tracks(together)
    fb, b = read_tracks(shuffled)
    assert len(a) == len(b)
    for ta, tb in zip(a, b):
        for k in ta:
            assert np.array_equal(ta[k], tb[k], equal_nan=True), f"{grid}: {k} differs after steps in order {order}"
    ga = json.loads(fa.with_suffix(".geojson").read_text())
    gb = json.loads(fb.with_suffix(".geojson").read_text())
    assert ga == gb, f"{grid}: GeoJSON differs after steps in order {order}"


@pytest.mark.parametrize("grid", list(GRIDS))
def test_geojson_follows_rfc_7946(grid, moving_runs):
    together, _, _ = moving_runs[grid]
    path = next(together.glob("*_cyclones.geojson"))
    g = json.loads(path.read_text())
    # RFC 7946: a FeatureCollection of Features; positions longitude first, then latitude,
    # longitudes within -180..180 (section 4 and 3.1.1).
    assert g["type"] == "FeatureCollection"
    kinds = [f["properties"]["kind"] for f in g["features"]]
    assert kinds == ["track", "latest"], kinds
    line = g["features"][0]["geometry"]
    assert line["type"] == "LineString" and len(line["coordinates"]) == len(LEADS)
    for (lo, la), t in zip(line["coordinates"], LEADS):
        cla, clo = MOVING.centre(t)
        assert -180 <= lo <= 180 and -90 <= la <= 90
        assert gc_distance(cla, clo, la, lo) <= GRID_LENGTH[grid], "positions are (longitude, latitude)"
    latest = g["features"][1]
    assert latest["geometry"]["type"] == "Point"
    assert latest["properties"]["lead_hours"] == 48
    # The facts are stated as facts, with their figures.
    facts = " | ".join(latest["properties"]["facts"])
    assert "hPa per 24 h" in facts and "bergeron" in facts, facts


# ---------------------------------------------------------------------------------------
# Two lows passing each other
# ---------------------------------------------------------------------------------------
#: One low east along 53 N, one west along 47 N, 20 m/s each, 15 hPa deep, 400 km radius:
#: they pass 667 km apart near hour 24 (their longitudes cross at 5.8 E). Two equal Gaussians
#: keep two minima only while they are more than sqrt(2) times the radius apart (566 km here;
#: the second derivative of their sum midway between them changes sign there, by hand).
EASTBOUND = Low(53.0, -20.0, 20.0, 1500.0, 0.0, 400e3)
WESTBOUND = Low(47.0, 28.6, -20.0, 1500.0, 0.0, 400e3)


def _passing_wind(lat, lon):
    # Westerly north of 50 N, easterly south of it: each low is steered by its own flow.
    return 20.0 * np.tanh((lat - 50.0) / 1.5), np.zeros(lat.shape)


@pytest.fixture(scope="module")
def passing_run(leeward_bin, tmp_path_factory):
    d = tmp_path_factory.mktemp("cyc_passing")
    grid = gribgen.regular_ll("cyc_passing_1p0", 75.0, 25.0, -45.0, 111, 1.0, 1.0, north_to_south=True)
    files = write_cycle(d, grid, [EASTBOUND, WESTBOUND], _passing_wind, "passing")
    r = run_leeward(leeward_bin, files, d / "out", "passing")
    assert r.returncode == 0, r.describe()
    return d / "out"


def test_two_lows_passing_are_two_tracks_never_swapped(passing_run):
    _, tracks = read_tracks(passing_run)
    assert len(tracks) == 2, f"{len(tracks)} tracks: {[t['lat'] for t in tracks]}"
    for tr in tracks:
        assert list(tr["time"]) == list(LEADS), tr["time"]
        low = EASTBOUND if tr["lat"][0] > 50 else WESTBOUND
        for t, la, lo in zip(tr["time"], tr["lat"], tr["lon"]):
            cla, clo = low.centre(t)
            d = float(gc_distance(cla, clo, la, lo))
            assert d <= 111e3, f"track of the low at {low.lat} N: +{t:g} h is {d / 1e3:.0f} km from it (swapped?)"
    FIGURES.append("two lows passing 667 km apart in opposite directions: 2 tracks of 9 points, never swapped")


# ---------------------------------------------------------------------------------------
# Uniform shear, constant N: the Eady growth rate, humidity on isentropes, theta-e
# ---------------------------------------------------------------------------------------
N_BV = 0.012  # s-1
LAMBDA = 3.0e-3  # s-1, du/dz
THETA0 = 290.0  # K at z = 0, where p = 1000 hPa
RH = 60.0  # %
#: Highest level of theta_e by default (cyclones.theta_e_top_hpa), Pa.
TOP_THETA_E_PA = 100e2
KAPPA = R_DRY / CP


def constant_n_column(p_pa):
    """theta = theta0 exp(N^2 z / g) with hydrostatic balance: the Exner function
    pi = (p/p0)^kappa falls as d pi/dz = -g / (cp theta), so
    pi = 1 - (g^2 / (cp N^2 theta0)) (1 - exp(-N^2 z / g)) (closed form by integration);
    returns z (gpm), T (K) at pressure p."""
    pi = (np.asarray(p_pa) / 1e5) ** KAPPA
    z = -(G / N_BV**2) * np.log(1.0 - (1.0 - pi) * CP * N_BV**2 * THETA0 / G**2)
    theta = THETA0 * np.exp(N_BV**2 * z / G)
    return z, theta * pi


@pytest.fixture(scope="module")
def shear_run(leeward_bin, tmp_path_factory):
    d = tmp_path_factory.mktemp("eady")
    grid = gribgen.regular_ll("eady_global_2p5", 90.0, -90.0, 0.0, 144, 2.5, 2.5, north_to_south=True, global_=True)
    geo = gribgen.geometry(grid)
    msgs = []
    # Up to 50 hPa: theta_e stops at its top (100 hPa by default).
    for lev in LEVELS + (200, 100, 70, 50):
        z, t = constant_n_column(lev * 100.0)
        kw = dict(times=gribgen.Times(), centre=98, bits=24)
        full = lambda v: np.full(geo.lat.shape, float(v))  # noqa: E731
        msgs.append(gribgen.encode_field(grid, geo, full(t), gribgen.PARAM_T, lev, **kw))
        msgs.append(gribgen.encode_field(grid, geo, full(z), gribgen.PARAM_GH, lev, **kw))
        msgs.append(gribgen.encode_field(grid, geo, full(LAMBDA * z), gribgen.PARAM_U, lev, **kw))
        msgs.append(gribgen.encode_field(grid, geo, full(0.0), gribgen.PARAM_V, lev, **kw))
        msgs.append(gribgen.encode_field(grid, geo, full(RH), gribgen.PARAM_RH, lev, **kw))
    f = d / "shear.grib2"
    f.write_bytes(b"".join(msgs))
    r = run_leeward(leeward_bin, [f], d / "out", "shear")
    assert r.returncode == 0, r.describe()
    nc = [p for p in (d / "out").glob("*.nc") if "_cyclones" not in p.name]
    assert len(nc) == 1
    return nc[0]


def test_eady_growth_rate_of_uniform_shear_and_constant_n(shear_run):
    with netCDF4.Dataset(shear_run) as ds:
        # Output contract (docs/output.md "Fields of a layer"): on the layer's own pressure
        # coordinate, its middle as the value and the layer as the bounds.
        assert ds["eady"].dimensions == ("time", "p_layer_850_500", "lat", "lon")
        assert ds["eady"].getncattr("leeward_layer_hpa") == "850-500"
        assert float(ds["p_layer_850_500"][0]) == 67500.0
        assert ds["p_layer_850_500_bounds"][:].tolist() == [[85000.0, 50000.0]]
        eady = np.ma.filled(ds["eady"][0, 0].astype(float), np.nan)
        lat = ds["lat"][:]
    lat2 = np.repeat(lat[:, None], eady.shape[1], axis=1)
    f = 2 * OMEGA * np.sin(np.radians(lat2))
    want = 0.31 * np.abs(f) * LAMBDA / N_BV  # Lindzen and Farrell 1980
    sel = (np.abs(lat2) >= 5.0) & (np.abs(lat2) <= 85.0)
    rel = np.abs(eady[sel] / want[sel] - 1.0)
    assert np.all(np.isfinite(rel)), "Eady growth rate missing away from the equator and poles"
    assert rel.max() <= 0.01, f"Eady growth rate off its closed form by up to {100 * rel.max():.3f} %"
    FIGURES.append(f"Eady growth rate, uniform shear and constant N, 5-85 degrees: max relative error "
                   f"{100 * rel.max():.4f} % ({86400 * want[sel].max():.2f} per day at most)")


def test_humidity_on_isentropes_and_theta_e_of_the_uniform_column(shear_run):
    import metpy.calc as mpcalc
    from metpy.units import units

    with netCDF4.Dataset(shear_run) as ds:
        rh = np.ma.filled(ds["isen_rh"][0].astype(float), np.nan)
        q = np.ma.filled(ds["isen_q"][0].astype(float), np.nan)
        isen_p = np.ma.filled(ds["isen_p"][0].astype(float), np.nan)
        isen_t = np.ma.filled(ds["isen_t"][0].astype(float), np.nan)
        te = np.ma.filled(ds["theta_e"][0].astype(float), np.nan)
        p = ds["pressure"][:].astype(float)
    ok = np.isfinite(rh)
    assert ok.any(), "no isentropic surface inside the column"
    # Uniform relative humidity interpolates to itself.
    assert np.nanmax(np.abs(rh[ok] - RH)) < 0.01
    # q from that RH at the surface's own p and T: MetPy's mixing ratio from RH, q = r/(1+r).
    # Bolton's e_s holds to 0.1 % from -30 to 35 C (Bolton 1980; from memory); MetPy's own
    # e_s (Ambaum 2020) parts from it in colder air, where the column reaches at 50 hPa: there
    # the reference is q = 0.622 e / (p - 0.378 e) by hand with Bolton's e_s, as documented.
    warm = ok & (isen_t >= 243.15)
    cold = ok & ~warm
    assert warm.any() and cold.any(), (warm.sum(), cold.sum())
    r = mpcalc.mixing_ratio_from_relative_humidity(isen_p[warm] * units.Pa, isen_t[warm] * units.K,
                                                   RH * units.percent)
    q_ref = (r / (1 + r)).m_as("dimensionless")
    assert np.max(np.abs(q[warm] / q_ref - 1)) < 0.01, "specific humidity on isentropes off MetPy by more than 1 %"
    e = bolton_vapour_pressure(isen_t[cold], RH)
    q_hand = 0.622 * e / (isen_p[cold] - 0.378 * e)
    assert np.max(np.abs(q[cold] / q_hand - 1)) < 0.01, "specific humidity on cold isentropes off by more than 1 %"
    # theta_e against MetPy (Bolton 1980, equation 39) within 0.1 K at every level up to
    # cyclones.theta_e_top_hpa (100 hPa by default), everywhere; missing above it.
    worst, compared = 0.0, 0
    for k, pk in enumerate(p):
        if pk < TOP_THETA_E_PA:
            assert np.isnan(te[k]).all(), f"theta_e at {pk / 100:.0f} hPa, above its top"
            continue
        _, t = constant_n_column(pk)
        ref = metpy_theta_e(pk, t, bolton_vapour_pressure(t, RH))
        assert np.isfinite(te[k]).all(), f"theta_e missing at {pk / 100:.0f} hPa"
        worst = max(worst, float(np.max(np.abs(te[k] - ref))))
        compared += 1
    assert compared >= 2 and compared < len(p), (compared, list(p))
    with netCDF4.Dataset(shear_run) as ds:
        assert ds["theta_e"].getncattr("leeward_top_hpa") == TOP_THETA_E_PA / 100
    assert worst <= 0.1, f"theta_e differs from MetPy by {worst:.3f} K"
    FIGURES.append(f"theta_e of the uniform column vs MetPy: max |difference| {worst:.3f} K")


# ---------------------------------------------------------------------------------------
# Real model output: centres against an independent search, theta-e against MetPy
# ---------------------------------------------------------------------------------------
def independent_centres(p, lat, lon, periodic, radius, interval=INTERVAL_HPA * 100.0, max_km=MAX_CONTOUR_KM):
    """Closed lows of `p` (Pa, rows south to north) found with scipy.ndimage, written from
    the rule alone: a grid-point minimum of its eight neighbours (equal values: the first in
    row-major order), and for each isobar L = k * interval above it, the connected region
    (eight neighbours) of points below L that holds it must not touch an edge of a
    limited-area grid (a pole row of a global grid is no edge, its seam is crossed), a missing
    point, a deeper minimum, nor reach beyond max_km; the outermost such L is its outermost
    closed isobar. Returns {(row, col): depth in Pa}."""
    ny, nx = p.shape
    mode = ("nearest", "wrap") if periodic else "nearest"
    lowest = ndimage.minimum_filter(p, size=3, mode=mode)
    interior = np.ones(p.shape, bool)
    if not periodic:
        interior[:, [0, -1]] = False
    pole = np.abs(lat[:, 0]) > 89.999 if periodic else np.zeros(ny, bool)
    interior[[0, -1], :] &= pole[[0, -1], None]
    cands = np.argwhere((p == lowest) & interior & np.isfinite(p))
    order = np.argsort(p.ravel(), kind="stable")
    rank = np.empty_like(order)
    rank[order] = np.arange(order.size)  # equal values: lower flat index ranks first
    rank = rank.reshape(p.shape)
    structure = np.ones((3, 3), bool)
    out = {}
    for j, i in cands:
        v0 = p[j, i]
        dist = gc_distance(lat[j, i], lon[j, i], lat, lon, radius) / 1e3
        level = (math.floor(v0 / interval) + 1) * interval
        outer = None
        while True:
            below = p < level
            if periodic:  # the seam: label three copies side by side, map the middle one's region back
                lab, _ = ndimage.label(np.tile(below, (1, 3)), structure)
                region = (lab == lab[j, nx + i]).reshape(ny, 3, nx).any(axis=1)
            else:
                lab, _ = ndimage.label(below, structure)
                region = lab == lab[j, i]
            edge = np.zeros(p.shape, bool)
            if not periodic:
                edge[:, [0, -1]] = True
            edge[[0, -1], :] |= ~pole[[0, -1], None]
            grown = ndimage.binary_dilation(region, structure)
            deeper = region & (rank < rank[j, i])
            if (region & edge).any() or (grown & ~np.isfinite(p)).any() or deeper.any() or dist[region].max() > max_km:
                break
            outer = level
            level += interval
        if outer is not None:
            out[(int(j), int(i))] = outer - v0
    return out


def _model_mslp(path):
    hits = [f for f in gribgen.read_fields(path, multi=True)
            if (f["discipline"], f["category"], f["number"]) == (0, *gribgen.PARAM_MSLP) and f["level_type"] == 101]
    assert len(hits) == 1, f"{path.name}: {len(hits)} mean sea-level pressure fields"
    return hits[0]


@pytest.mark.parametrize("sample", ["gfs_2p5", "eta_lambert"])
def test_real_centres_match_an_independent_search(sample, real_runs, samples_dir):
    from conftest import REAL_SAMPLES

    run = real_runs.get(sample)
    assert run.returncode in (0, 3), run.describe()
    prod = read_product(run.nc_files[0])
    ref = _model_mslp(samples_dir / REAL_SAMPLES[sample])
    lat, lon, mslp = align_to_product(prod, ref["lat"], ref["lon"], ref["values"])
    periodic = prod.kind == "latlon" and abs(((lon[0, 1] - lon[0, 0]) % 360) * lon.shape[1] - 360) < 1e-6
    with netCDF4.Dataset(run.nc_files[0]) as ds:
        radius = float(ds["crs"].getncattr("earth_radius"))  # the file's figure (code table 3.2)
    want = {k: d for k, d in independent_centres(mslp, lat, lon, periodic, radius).items() if d > 200.0}
    _, tracks = read_tracks(run.out_dir)
    got = {}
    for tr in tracks:
        for j, i, d, la, lo, pc in zip(tr["grid_row"], tr["grid_column"], tr["depth"], tr["lat"], tr["lon"], tr["central_pressure"]):
            got[(int(j), int(i))] = (d, la, lo, pc)
    deep = {k for k, v in got.items() if v[0] > 200.0}
    assert deep == set(want), (f"{sample}: leeward's closed lows deeper than 2 hPa {sorted(deep)} "
                              f"differ from the independent search's {sorted(want)}")
    # leeward finds them on its published field, stored with 16 significant bits (docs/output.md:
    # relative error at most 2^-17, 0.8 Pa at 1050 hPa); the search here on ecCodes' own decoding.
    bound = 2 * 105_000.0 * 2.0**-17
    for k in want:
        assert abs(got[k][0] - want[k]) <= bound, f"{sample} {k}: depth {got[k][0]} Pa, independent {want[k]} Pa"
    listing = "; ".join(f"{got[k][1]:.1f} {got[k][2]:.1f} {got[k][3] / 100:.1f} hPa depth {got[k][0] / 100:.1f}"
                        for k in sorted(want, key=lambda k: got[k][3]))
    FIGURES.append(f"{sample}: {len(want)} closed lows deeper than 2 hPa, the same grid points as the "
                   f"independent search (lat lon central pressure depth): {listing}")


def test_real_theta_e_against_metpy(real_runs, samples_dir):
    import metpy.calc as mpcalc
    from metpy.units import units

    run = real_runs.get("gfs_2p5")
    prod = read_product(run.nc_files[0])
    fields = gribgen.read_fields(samples_dir / "gfs-2p5deg-2011100800-f072.grib2", multi=True)
    worst, own_worst, n = 0.0, 0.0, 0
    with netCDF4.Dataset(run.nc_files[0]) as ds:
        pressure = list(ds["pressure"][:])
        te_all = np.ma.filled(ds["theta_e"][0].astype(float), np.nan)
    for lev in (1000, 850, 700, 500, 300):
        pick = lambda num: [f for f in fields if (f["discipline"], f["category"], f["number"]) == (0, *num)  # noqa: E731
                            and f["level_type"] == 100 and f["level"] == lev][0]
        t, rh = pick(gribgen.PARAM_T), pick(gribgen.PARAM_RH)
        _, _, tv, rhv = align_to_product(prod, t["lat"], t["lon"], t["values"], rh["values"])
        te = te_all[pressure.index(lev * 100.0)]
        ok = np.isfinite(te) & (rhv >= 1.0)
        ref = metpy_theta_e(lev * 100.0, tv[ok], bolton_vapour_pressure(tv[ok], np.minimum(rhv[ok], 100.0)))
        worst = max(worst, float(np.max(np.abs(te[ok] - ref))))
        # For the record: MetPy from the relative humidity with its own e_s (Ambaum 2020).
        td = mpcalc.dewpoint_from_relative_humidity(tv[ok] * units.K, np.minimum(rhv[ok], 100.0) * units.percent)
        own = mpcalc.equivalent_potential_temperature(lev * units.hPa, tv[ok] * units.K, td).m_as("K")
        own_worst = max(own_worst, float(np.max(np.abs(te[ok] - own))))
        n += int(ok.sum())
    assert worst <= 0.1, f"GFS theta_e differs from MetPy by up to {worst:.3f} K"
    FIGURES.append(f"GFS theta_e at 1000-300 hPa vs MetPy on ecCodes' T and RH, same vapour pressure: max "
                   f"|difference| {worst:.3f} K over {n} points ({own_worst:.3f} K with MetPy's own e_s)")
