"""The PV budget along isentropic trajectories, end to end on ecCodes-encoded steps.

Every case is a global 2.5-degree grid (north to south, GRIB2 shape of the earth 6, radius
6,371,229 m) with isobaric levels every 50 hPa from 1000 to 100 hPa, two steps 6 hours apart
of one cycle, run through `leeward process`; the budget is read from the later step's file.

Column: temperature T = T0 (p/p0)^c (1 + eps g), c = R gamma / g0 with gamma = 6.5 K/km
(docs/references.md "Check values": the constant-lapse-rate atmosphere), scaled by (1 + eps g) in
each column. theta is then A (1 + eps g) p^(c - kappa), ln theta is linear in ln p and the
isentropic interpolation is exact, so the pressure of a surface is known in closed form,
p(theta) = p0 (theta / (theta_c (1 + eps g)))^m, m = 1/(c - kappa), and so is the depth of
a layer, which scales as (1 + eps g)^(-m) (m is about -10.5: a 1% warmer column is 11%
deeper between two isentropes).

Flow: solid-body rotation about the earth's axis, u = u0 cos(lat), v = 0 (Williamson et al.
1992 test cases 1 and 2; docs/references.md): zeta = 2 u0 sin(lat)/a, and in dt every column
moves east by the angle u0 dt / a along its latitude circle.
"""

from __future__ import annotations

import pyproj  # noqa: F401  (before ecCodes)
import netCDF4
import numpy as np
import pytest

import gribgen
from conftest import FIGURES, run_leeward
from ncproducts import align_to_product

LEVELS_HPA = tuple(range(1000, 99, -50))
T0 = 275.0
P0 = gribgen.P0
C = gribgen.lapse_rate_exponent()
KAPPA = gribgen.R_DRY / 1004.6  # the constants leeward documents (docs/output.md)
M = 1.0 / (C - KAPPA)
A = gribgen.RADIUS_SHAPE_6
U0 = 40.0
DT_H = 6
#: The default isentropic layers (docs/output.md).
LAYERS = ((290.0, 300.0), (300.0, 310.0), (310.0, 330.0))
GRID = gribgen.regular_ll("budget_global_2p5", 90.0, -90.0, 0.0, 144, 2.5, 2.5,
                          north_to_south=True, global_=True)
DLON = np.radians(2.5)
EPS = 0.01


def pattern(lon_deg, lat_deg):
    """A smooth, non-zonal pattern (wavenumbers 2 and 3), zero at the poles."""
    lam, phi = np.radians(lon_deg), np.radians(lat_deg)
    return np.cos(phi) ** 2 * (np.cos(3 * lam - 0.5) + 0.5 * np.sin(2 * lam + 0.3) * np.sin(phi))


def layer_depth(scale, bottom, top):
    """Pressure depth (Pa) between two isentropes of a column whose temperature is the
    constant-lapse-rate one times `scale`: p(theta) = p0 (theta / (theta_c scale))^m."""
    theta_c = T0 * (1e5 / P0) ** KAPPA
    p = lambda th: P0 * (th / (theta_c * scale)) ** M  # noqa: E731
    return p(bottom) - p(top)


def write_step(path, lead, scale, u=None, v=None, t0=T0):
    """One step: T = t0 (p/p0)^c scale, winds u, v (default solid body), in file order."""
    geo = gribgen.geometry(GRID)
    if u is None:
        u = U0 * np.cos(np.radians(geo.lat))
    if v is None:
        v = np.zeros(geo.lat.shape)
    fields = []
    for lev in LEVELS_HPA:
        p = lev * 100.0
        t = np.broadcast_to(t0 * (p / P0) ** C * scale, geo.lat.shape)
        uu = u(p) if callable(u) else u
        fields += [(gribgen.PARAM_T, lev, t), (gribgen.PARAM_U, lev, uu), (gribgen.PARAM_V, lev, v)]
    return gribgen.write_fields(path, GRID, fields, times=gribgen.Times(20240115, 0, lead))


def run_pair(leeward_bin, d, step0, step6, config=None):
    run = run_leeward(leeward_bin, [step0, step6], d / "out", d.name, config=config)
    assert run.returncode == 0, run.describe()
    later = [p for p in run.nc_files if p.name.endswith("_006h.nc")]
    assert len(later) == 1, run.describe()
    return run, later[0]


def read(path, names):
    """Variables (first time) with NaN for fill, lat/lon as 2-D, and attributes."""
    out, attrs = {}, {}
    with netCDF4.Dataset(path) as ds:
        lat, lon = ds["lat"][:], ds["lon"][:]
        for n in names:
            assert n in ds.variables, f"{path.name}: no {n}; has {sorted(ds.variables)}"
            v = ds[n]
            v.set_auto_mask(True)
            out[n] = np.ma.filled(np.ma.asarray(v[:]).astype(float), np.nan)[0]
            attrs[n] = {k: v.getncattr(k) for k in v.ncattrs()}
        layers = ds["theta_layer_bounds"][:]
    lon2, lat2 = np.meshgrid(lon, lat)
    return lat2, lon2, out, attrs, np.asarray(layers)


def _layer_index(layers, bottom, top):
    k = np.flatnonzero(np.isclose(layers[:, 0], bottom) & np.isclose(layers[:, 1], top))
    assert k.size == 1, f"layer {bottom}-{top} K not in {layers.tolist()}"
    return int(k[0])


def _bilinear(field, fj, fi):
    """Bilinear in grid indices, periodic in i (the documented interpolation)."""
    ny, nx = field.shape
    j0 = np.clip(np.floor(fj).astype(int), 0, ny - 2)
    i0 = np.floor(fi).astype(int) % nx
    i1 = (i0 + 1) % nx
    wj, wi = fj - j0, fi - np.floor(fi)
    return ((1 - wj) * ((1 - wi) * field[j0, i0] + wi * field[j0, i1])
            + wj * ((1 - wi) * field[j0 + 1, i0] + wi * field[j0 + 1, i1]))


NAMES = ("bud_stretch", "bud_zeta_diff", "bud_zeta_pred", "bud_zeta_dep", "bud_zeta_stretch",
         "bud_zeta_beta", "bud_zeta", "bud_unconverged", "layer_dp", "bud_dpvdt",
         "bud_dpvdt_unconverged")


@pytest.fixture(scope="module")
def rotated(leeward_bin, tmp_path_factory):
    """Case 1: the non-zonal pattern carried by the solid-body rotation between the steps."""
    d = tmp_path_factory.mktemp("budget_rotation")
    geo = gribgen.geometry(GRID)
    shift = np.degrees(U0 * DT_H * 3600.0 / A)  # degrees of longitude in 6 h
    s0 = write_step(d / "s000.grib2", 0, 1 + EPS * pattern(geo.lon, geo.lat))
    s6 = write_step(d / "s006.grib2", DT_H, 1 + EPS * pattern(geo.lon - shift, geo.lat))
    _, later = run_pair(leeward_bin, d, s0, s6)
    return read(later, NAMES), shift


def test_rigid_rotation_conserves_and_finds_the_departure_point(rotated):
    # The later step is the earlier one turned east by u0 dt / a = 3.1 grid lengths: each
    # column keeps its depth and its absolute vorticity, so the budget closes. The departure
    # point is checked through the depth found there: bud_stretch must equal what bilinear
    # interpolation of the earlier depth at the exact departure point gives (computed here
    # from the closed form, every layer, |lat| <= 60), within what a departure point
    # 0.1 grid length away would change: 0.1 (|d ln dp/di| + |d ln dp/dj|), plus 1e-4 for
    # float32 and bit rounding. bud_zeta_diff within |eta| times the same plus 1e-8 s-1.
    (lat, lon, f, attrs, layers), shift = rotated
    sel = np.abs(lat) <= 60.0
    g_old = pattern(lon, lat)
    worst_ratio, checked = 0.0, 0
    for (bottom, top) in LAYERS:
        k = _layer_index(layers, bottom, top)
        ln_dp = np.log(layer_depth(1 + EPS * g_old, bottom, top))
        # Exact departure point in grid indices: the same row, shift degrees west.
        j = np.arange(lat.shape[0])[:, None] * np.ones(lat.shape)
        i = (np.arange(lat.shape[1])[None, :] - shift / 2.5) % lat.shape[1]
        dp_old = np.exp(ln_dp)
        dp_new = layer_depth(1 + EPS * pattern(lon - shift, lat), bottom, top)
        want = dp_new / _bilinear(dp_old, j, i) - 1.0
        di = np.abs(np.gradient(ln_dp, axis=1))
        dj = np.abs(np.gradient(ln_dp, axis=0))
        allow = 0.1 * (di + dj) + 1e-4
        got = f["bud_stretch"][k]
        ok = sel & np.isfinite(got)
        assert ok.sum() > 0.9 * sel.sum(), f"{bottom}-{top} K: budget at {ok.sum()} of {sel.sum()} points"
        err = np.abs(got - want)
        ratio = float(np.max(err[ok] / allow[ok]))
        worst_ratio = max(worst_ratio, ratio)
        checked += int(ok.sum())
        assert ratio <= 1.0, (f"{bottom}-{top} K: bud_stretch off the exact departure point's by "
                              f"{ratio:.2f} of the 0.1-grid-length allowance")
        eta = 2 * U0 * np.sin(np.radians(lat)) / A + gribgen.coriolis(lat)
        diff = f["bud_zeta_diff"][k]
        bound = np.abs(eta) * (np.abs(want) + allow) + 1e-8
        assert np.all(np.abs(diff[ok]) <= bound[ok]), (
            f"{bottom}-{top} K: bud_zeta_diff up to {np.nanmax(np.abs(diff[ok])):.3g} s-1")
        assert np.all(f["bud_unconverged"][k][ok] == 0.0)
    FIGURES.append(f"budget, rigid rotation of a non-zonal pattern by {shift / 2.5:.2f} grid lengths: "
                   f"bud_stretch within {worst_ratio:.3f} of the 0.1-grid-length allowance over "
                   f"{checked} layer points")
    print(FIGURES[-1])


@pytest.fixture(scope="module")
def deepened(leeward_bin, tmp_path_factory):
    """Case 2: every column 0.5% warmer at the later step, the same flow."""
    d = tmp_path_factory.mktemp("budget_depth")
    s0 = write_step(d / "s000.grib2", 0, 1.0)
    s6 = write_step(d / "s006.grib2", DT_H, 1.005)
    _, later = run_pair(leeward_bin, d, s0, s6)
    return read(later, NAMES)


def test_uniform_depth_change_gives_the_closed_form_stretching_part(deepened):
    # Every layer deepens by r = 1.005^(-m) (about 5.4%) and the columns only move along
    # their latitude circles: bud_stretch = r - 1; the stretching part
    # eta_d (r - 1) with eta_d = 2 u0 sin(lat)/a + f; the Coriolis part 0; the departure
    # vorticity 2 u0 sin(lat)/a; the predicted vorticity their sum; the actual vorticity
    # unchanged, so bud_zeta_diff = -eta (r - 1). Relative tolerance 1% (the vorticity of
    # the 2.5-degree grid is within 0.5% of the closed form; common practice), |lat| 10-80.
    lat, lon, f, attrs, layers = deepened
    r = 1.005 ** (-M)
    eta = 2 * U0 * np.sin(np.radians(lat)) / A + gribgen.coriolis(lat)
    zeta = 2 * U0 * np.sin(np.radians(lat)) / A
    sel = (np.abs(lat) >= 10.0) & (np.abs(lat) <= 80.0)
    for (bottom, top) in LAYERS:
        k = _layer_index(layers, bottom, top)
        np.testing.assert_allclose(layer_depth(1.005, bottom, top) / layer_depth(1.0, bottom, top),
                                   r, rtol=1e-12)
        g = {n: f[n][k][sel] for n in NAMES if f[n].shape[0] == layers.shape[0]}
        assert np.isfinite(g["bud_stretch"]).all()
        np.testing.assert_allclose(g["bud_stretch"], r - 1.0, rtol=2e-3, atol=0)
        np.testing.assert_allclose(g["bud_zeta_stretch"], (eta * (r - 1.0))[sel], rtol=1e-2)
        np.testing.assert_allclose(g["bud_zeta_dep"], zeta[sel], rtol=1e-2, atol=1e-9)
        assert np.all(np.abs(g["bud_zeta_beta"]) <= 1e-9)
        np.testing.assert_allclose(g["bud_zeta_pred"],
                                   g["bud_zeta_dep"] + g["bud_zeta_stretch"] + g["bud_zeta_beta"],
                                   rtol=1e-4, atol=1e-10)
        np.testing.assert_allclose(g["bud_zeta_diff"], (-eta * (r - 1.0))[sel], rtol=1e-2)
    FIGURES.append(f"budget, uniform deepening by {100 * (r - 1):.2f}%: bud_zeta_stretch = eta_d (r - 1) "
                   f"within 1% at 10-80 N/S")
    print(FIGURES[-1])


def test_budget_variables_say_what_they_are(deepened):
    *_, attrs, _ = deepened
    assert "stretching part" in attrs["bud_zeta_stretch"]["long_name"]
    assert "eta_d (depth_a/depth_d - 1)" in attrs["bud_zeta_stretch"]["comment"]
    assert "Coriolis part" in attrs["bud_zeta_beta"]["long_name"]
    assert "bud_zeta_dep + bud_zeta_stretch + bud_zeta_beta" in attrs["bud_zeta_pred"]["comment"]
    for n in ("bud_unconverged", "bud_dpvdt_unconverged"):
        assert attrs[n]["leeward_trajectories_not_converged"] == 0
        assert attrs[n]["leeward_trajectory_substep_h"] == 3.0


def test_trajectories_that_cannot_converge_are_flagged_and_counted(leeward_bin, tmp_path):
    # u = 40 sin(8 lon) cos(lat) m/s: |du/dx| = 320 / a = 5.0e-5 s-1 everywhere. Steps 12 h
    # apart traced in one 12-hour sub-step give (h/2)|grad V| = 1.09: the midpoint iteration
    # cannot converge (Staniforth and Cote 1991, from memory). The default 3-hour sub-steps
    # give 0.27 and converge. Flagged points are left out of the budget and counted in the
    # flag variables' attribute and in the log.
    geo = gribgen.geometry(GRID)
    u = 40.0 * np.sin(8 * np.radians(geo.lon)) * np.cos(np.radians(geo.lat))
    s0 = write_step(tmp_path / "s000.grib2", 0, 1.0, u=u)
    s12 = write_step(tmp_path / "s012.grib2", 12, 1.0, u=u)
    counts = {}
    for name, extra in (("one", "budget_max_substep_h = 12.0\n"), ("default", "")):
        cfg = tmp_path / f"{name}.toml"
        cfg.write_text("[changes]\n" + extra)
        run = run_leeward(leeward_bin, [s0, s12], tmp_path / name, name, config=cfg)
        assert run.returncode == 0, run.describe()
        later = [p for p in run.nc_files if p.name.endswith("_012h.nc")][0]
        lat, lon, f, attrs, layers = read(later, ("bud_unconverged", "bud_zeta_diff", "bud_dpvdt",
                                                  "bud_dpvdt_unconverged"))
        flags = f["bud_unconverged"]
        n = int(np.nansum(flags)) + int(np.nansum(f["bud_dpvdt_unconverged"]))
        said = (int(attrs["bud_unconverged"]["leeward_trajectories_not_converged"])
                + int(attrs["bud_dpvdt_unconverged"]["leeward_trajectories_not_converged"]))
        assert said == n, f"{name}: attributes say {said}, flags count {n}"
        assert np.all(np.isnan(f["bud_zeta_diff"][flags == 1.0])), "flagged points left out"
        counts[name] = n
        logged = "did not converge" in run.stderr
        assert logged == (n > 0), f"{name}: {n} not converged, log warning {logged}"
    FIGURES.append(f"budget trajectories, (h/2)|grad V| = 1.09: {counts['one']} points not converged "
                   f"with one 12-hour sub-step, {counts['default']} with 3-hour sub-steps")
    print(FIGURES[-1])
    assert counts["one"] > 1000 and counts["default"] == 0


def _documented_layer_mean(u, pt, pb, levels):
    """The documented layer mean (docs/output.md): the trapezoid rule in p over the levels
    strictly inside the layer and the two ends, the end values linear in ln p between the
    levels around them; divided by the depth."""
    def end(p):
        k = np.searchsorted(levels, p)
        a, b = levels[k - 1], levels[k]
        w = (np.log(p) - np.log(a)) / (np.log(b) - np.log(a))
        return u(a) + w * (u(b) - u(a))
    inside = levels[(levels > pt) & (levels < pb)]
    xs = np.concatenate([[pt], inside, [pb]])
    ys = np.concatenate([[end(pt)], u(inside), [end(pb)]])
    return float(np.sum(0.5 * (ys[1:] + ys[:-1]) * np.diff(xs)) / (pb - pt)), ys


def test_layer_mean_wind_is_mass_weighted_in_sheared_flow(leeward_bin, tmp_path):
    # u = u0 cos(lat) (p/p0)^2: winds grow downward. The layer's mass-weighted mean wind
    # is (1/dp) integral u dp (layer PV in column-depth form; docs/references.md "Methods"),
    # (pb^3 - pt^3) / (3 p0^2 (pb - pt)) u0 cos(lat) with pb, pt the closed-form pressures
    # of the bounding isentropes. leeward integrates it with the trapezoid rule (docs/output.md);
    # the same rule computed here must match layer_u to 2e-4 (float32, bit rounding), and
    # lies within 1.5% of the exact integral on these 50 hPa levels. Weighting the same
    # values by ln p instead of p, or averaging them alike, misses the integral by 1% to
    # 6.5% (at least five times the 2e-4 bound), so this case tells mass weighting apart.
    geo = gribgen.geometry(GRID)
    s0 = write_step(tmp_path / "s000.grib2", 0, 1.0,
                    u=lambda p: U0 * np.cos(np.radians(geo.lat)) * (p / P0) ** 2)
    run = run_leeward(leeward_bin, [s0], tmp_path / "out", "layer_wind")
    assert run.returncode == 0, run.describe()
    lat, lon, f, attrs, layers = read(run.nc_files[0], ("layer_u", "layer_v"))
    theta_c = T0 * (1e5 / P0) ** KAPPA
    rows = np.abs(lat[:, 0]) <= 80.0
    levels = np.array(sorted(l * 100.0 for l in LEVELS_HPA))
    prof = lambda p: (np.asarray(p) / P0) ** 2  # noqa: E731
    for (bottom, top) in LAYERS:
        k = _layer_index(layers, bottom, top)
        pb, pt = (P0 * (th / theta_c) ** M for th in (bottom, top))
        exact = (pb ** 3 - pt ** 3) / (3 * P0 ** 2 * (pb - pt))
        trap, ys = _documented_layer_mean(prof, pt, pb, levels)
        by_lnp = (pb ** 2 - pt ** 2) / (2 * P0 ** 2 * np.log(pb / pt))
        alike = float(np.mean(ys))
        assert abs(trap / exact - 1.0) < 0.015
        for other in (by_lnp, alike):
            assert abs(other / trap - 1.0) > 5 * 2e-4
        got = f["layer_u"][k] / (U0 * np.cos(np.radians(lat)))
        rel = np.abs(got / trap - 1.0)[rows]
        assert np.nanmax(rel) <= 2e-4, f"{bottom}-{top} K: layer_u off the trapezoid by {np.nanmax(rel):.2e}"
        assert np.all(np.abs(f["layer_v"][k][rows]) < 1e-6)
        FIGURES.append(f"layer-mean wind, u ~ p^2, {bottom:g}-{top:g} K ({pt / 100:.0f}-{pb / 100:.0f} hPa): "
                       f"within {np.nanmax(rel):.1e} of the trapezoid rule, which is "
                       f"{trap / exact - 1:+.2e} off the exact integral (ln p weighting "
                       f"{by_lnp / exact - 1:+.2e}, levels alike {alike / exact - 1:+.2e})")
        print(FIGURES[-1])


# ---------------------------------------------------------------------------------------
# Case 3: a rigid rotation about an axis tilted off the pole, carrying the air across
# latitudes and over the poles
# ---------------------------------------------------------------------------------------
#: The rotation axis: a unit vector through 20 N, 30 E. Air on the great circle 90 degrees
#: from it reaches 70 N/S; air 70 degrees from it passes over a pole.
AXIS_LAT, AXIS_LON = 20.0, 30.0


def _unit(lat_deg, lon_deg):
    p, l = np.radians(lat_deg), np.radians(lon_deg)
    return np.stack([np.cos(p) * np.cos(l), np.cos(p) * np.sin(l), np.sin(p)], axis=-1)


def _rotate(r, axis, angle):
    """Rodrigues' rotation formula: r turned by `angle` (radians) about the unit `axis`."""
    k = np.broadcast_to(axis, r.shape)
    c, s = np.cos(angle), np.sin(angle)
    kr = np.sum(k * r, axis=-1, keepdims=True)
    return r * c + np.cross(k, r) * s + k * kr * (1 - c)


def _pattern3(r):
    """A smooth pattern on the sphere (a polynomial in the Cartesian components) that no
    rotation about the axis leaves unchanged."""
    x, y, z = r[..., 0], r[..., 1], r[..., 2]
    return x * y + 0.8 * z * z - 0.5 * y * z + 0.3 * x


def _tilted_winds(geo):
    """East and north components (m/s) of V = a (W x r), W = (u0/a) axis: the solid-body
    rotation about the axis with speed u0 on its great circle (Williamson et al. 1992 test
    case 1 with a tilted axis; docs/references.md)."""
    axis = _unit(AXIS_LAT, AXIS_LON)
    r = _unit(geo.lat, geo.lon)
    vel = U0 * np.cross(np.broadcast_to(axis, r.shape), r)
    p, l = np.radians(geo.lat), np.radians(geo.lon)
    east = np.stack([-np.sin(l), np.cos(l), np.zeros_like(l)], axis=-1)
    north = np.stack([-np.sin(p) * np.cos(l), -np.sin(p) * np.sin(l), np.cos(p)], axis=-1)
    return np.sum(vel * east, axis=-1), np.sum(vel * north, axis=-1)


@pytest.fixture(scope="module")
def tilted(leeward_bin, tmp_path_factory):
    d = tmp_path_factory.mktemp("budget_tilted")
    geo = gribgen.geometry(GRID)
    u, v = _tilted_winds(geo)
    angle = U0 * DT_H * 3600.0 / A  # radians turned in 6 h
    axis = _unit(AXIS_LAT, AXIS_LON)
    r = _unit(geo.lat, geo.lon)
    r_dep = _rotate(r, axis, -angle)  # the exact departure point of each grid point
    s0 = write_step(d / "s000.grib2", 0, 1 + EPS * _pattern3(r), u=u, v=v)
    s6 = write_step(d / "s006.grib2", DT_H, 1 + EPS * _pattern3(r_dep), u=u, v=v)
    _, later = run_pair(leeward_bin, d, s0, s6)
    return read(later, NAMES), angle


def test_tilted_rotation_across_latitudes_and_over_the_poles(tilted):
    # The pattern and the flow turn together about an axis through 20 N, 30 E by
    # u0 dt / a = 7.8 degrees, so every column keeps its depth and its relative vorticity
    # zeta = 2 W.r (solid body), while f = 2 Omega sin(lat) changes as it moves north or
    # south. In closed form, with r_d the departure point: the Coriolis part
    # bud_zeta_beta = f(r_d) - f(r_a), the departure vorticity bud_zeta_dep = 2 W.r_d
    # (= zeta at arrival), the stretching part 0, and therefore bud_zeta_diff =
    # f(r_a) - f(r_d): this flow is not a solution of the vorticity equation, and the
    # budget must say by how much. A departure point 0.1 grid length (0.25 degrees) off
    # changes f by up to 2 Omega cos(lat) 0.1 dlat: that plus 1e-8 s-1 bounds the Coriolis
    # part at every latitude, poles included; bud_stretch is held to the bilinear value at
    # the exact departure point as in case 1 (|lat| <= 60); the departure vorticity, from
    # 2.5-degree differences, within 1% of max |zeta| plus the same 0.1 grid length of its
    # gradient (|lat| <= 80; common practice for second-order differences on this grid).
    (lat, lon, f, attrs, layers), angle = tilted
    lat, lon = np.asarray(lat, dtype=float), np.asarray(lon, dtype=float)
    axis = _unit(AXIS_LAT, AXIS_LON)
    r = _unit(lat, lon)
    r_dep = _rotate(r, axis, -angle)
    w = U0 / A
    lat_d = np.degrees(np.arcsin(np.clip(r_dep[..., 2], -1, 1)))
    lon_d = np.degrees(np.arctan2(r_dep[..., 1], r_dep[..., 0]))
    f_a, f_d = gribgen.coriolis(lat), gribgen.coriolis(lat_d)
    zeta_d = 2 * w * np.sum(r_dep * axis, axis=-1)
    step = 0.1 * np.radians(2.5)
    # Bilinear interpolation of f between rows 2.5 degrees apart errs by up to
    # max|f''| h^2 / 8 = 2 Omega h^2 / 8 (the linear interpolation error bound), 3.5e-8 s-1.
    interp = 2 * gribgen.OMEGA * np.radians(2.5) ** 2 / 8
    beta_allow = 2 * gribgen.OMEGA * np.cos(np.radians(lat_d)) * step + interp + 1e-9
    zeta_allow = 0.01 * 2 * w + 2 * w * step + 1e-9
    # Exact departure point in the file's grid indices.
    rows = lat[:, 0]
    fj = np.interp(lat_d, rows, np.arange(rows.size)) if rows[0] < rows[-1] else \
        np.interp(-lat_d, -rows, np.arange(rows.size))
    fi = ((lon_d - lon[0, 0]) % 360.0) / 2.5
    moved = float(np.max(np.abs(f_d - f_a)))
    worst = {"beta": 0.0, "stretch": 0.0, "dep": 0.0}
    poles = np.abs(lat) >= 80.0
    for (bottom, top) in LAYERS:
        k = _layer_index(layers, bottom, top)
        beta, dep, diff = f["bud_zeta_beta"][k], f["bud_zeta_dep"][k], f["bud_zeta_diff"][k]
        ok = np.isfinite(beta)
        assert ok.sum() > 0.9 * lat.size, f"{bottom}-{top} K: budget at {ok.sum()} of {lat.size} points"
        assert np.isfinite(beta[poles]).sum() > 0.5 * poles.sum(), "the budget reaches the polar caps"
        err = np.abs(beta - (f_d - f_a))
        worst["beta"] = max(worst["beta"], float(np.nanmax(err / beta_allow)))
        assert np.all(err[ok] <= beta_allow[ok]), (
            f"{bottom}-{top} K: bud_zeta_beta off f(r_d) - f(r_a) by up to {np.nanmax(err):.3g} s-1")
        mid = ok & (np.abs(lat) <= 80.0) & np.isfinite(dep)
        assert mid.sum() > 0.8 * lat.size * 160 / 180
        errz = np.abs(dep - zeta_d)
        worst["dep"] = max(worst["dep"], float(np.max(errz[mid] / zeta_allow)))
        assert np.all(errz[mid] <= zeta_allow), (
            f"{bottom}-{top} K: bud_zeta_dep off 2 W.r_d by up to {np.max(errz[mid]):.3g} s-1")
        diff_allow = zeta_allow + beta_allow + np.abs(f_d) * 0.02
        assert np.all(np.abs(diff - (f_a - f_d))[mid] <= diff_allow[mid]), (
            f"{bottom}-{top} K: bud_zeta_diff off f(r_a) - f(r_d)")
        # Depth at the departure point: bilinear value of the earlier depth there.
        dp_old = layer_depth(1 + EPS * _pattern3(r), bottom, top)
        dp_new = layer_depth(1 + EPS * _pattern3(r_dep), bottom, top)
        want = dp_new / _bilinear(dp_old, fj, fi) - 1.0
        ln_dp = np.log(dp_old)
        allow = 0.1 * (np.abs(np.gradient(ln_dp, axis=1)) + np.abs(np.gradient(ln_dp, axis=0))) + 1e-4
        sel = ok & (np.abs(lat) <= 60.0) & (np.abs(lat_d) <= 60.0)
        got = f["bud_stretch"][k]
        ratio = float(np.max(np.abs(got - want)[sel] / allow[sel]))
        worst["stretch"] = max(worst["stretch"], ratio)
        assert ratio <= 1.0, (f"{bottom}-{top} K: bud_stretch off the exact departure point's by "
                              f"{ratio:.2f} of the 0.1-grid-length allowance")
    FIGURES.append(f"budget, rotation about an axis through 20 N 30 E by 7.8 degrees (f changes by up "
                   f"to {moved:.2e} s-1 along the paths): worst share of the allowance used: Coriolis "
                   f"part {worst['beta']:.3f}, departure vorticity {worst['dep']:.3f}, stretching "
                   f"{worst['stretch']:.3f}")
    print(FIGURES[-1])
