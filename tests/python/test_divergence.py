"""Horizontal divergence (`div`, products.divergence = true) against a closed form on every
grid type, and against MetPy on real GFS output.

Closed form (derived for this test from D = (1/(a cos phi)) (du/dlambda + d(v cos phi)/dphi),
the flux form of any dynamics text, e.g. Holton; from memory): the earth-relative flow
u = U0 sin(lambda) cos^2(phi), v = V0 cos(phi) has
D = (U0 cos(lambda) cos(phi) - 2 V0 sin(phi)) / a everywhere, and is smooth at the poles too
(near a pole it is a polynomial flow in the plane). Both terms are active and of different shape (one varies with longitude, the
other with latitude, changing sign at the equator), so a dropped term, a flipped sign, a lost
cos(phi) or a doubled result all show. Inputs are encoded by ecCodes (gribgen.py); on rotated
and projected grids the winds are turned into the grid's axes with pyproj and flagged so
(flag table 3.3 bit 5). The grids cover both hemispheres, the tropics, both poles (as rows of
a global grid and inside a polar stereographic grid), global grids starting at 0 and at 180
degrees, limited areas crossing the prime meridian and the date line, a Gaussian grid, and
Lambert, Mercator and rotated grids. On a pole row leeward gives the mean of the polar cap,
-/+ V0 (1 + |sin phi1|) / a from the flux through the next row phi1 (Gauss's theorem).

Real data: NCEP GFS 2.5 degree (shared samples, see their README), 250, 500 and 850 hPa,
against metpy.calc.divergence (MetPy 1.7, advective form with the spherical correction from
the grid's CRS) within |lat| <= 60 and away from the seam: MetPy's own closed-form error grows
poleward of 60 degrees and its pole rows are not a cap mean, so the comparison stops there.
"""

from __future__ import annotations

import pyproj  # noqa: F401  (before ecCodes)
import numpy as np
import pytest

import gribgen
from conftest import FIGURES, run_leeward, single_product
from ncproducts import align_to_product, level_index, read_product

U0, V0 = 25.0, 8.0
LEVELS = (850.0, 500.0, 250.0)
CONFIG = "[products]\ndivergence = true\n"


def _grids() -> dict[str, gribgen.Grid]:
    g = gribgen.closed_form_grids()
    pick = {k: g[k] for k in ("latlon_global_2p5", "latlon_europe_1p0", "rotated_europe_0p5",
                              "gaussian_n48", "mercator_pacific", "polar_north_60",
                              "lambert_secant_30_60")}
    # Global, first column at 180 E, stored south to north.
    pick["latlon_from_180"] = gribgen.regular_ll("latlon_from_180", -90.0, 90.0, 180.0, 144, 2.5,
                                                 2.5, north_to_south=False, global_=True)
    # Limited area across the date line and the equator, first column at 160 E.
    pick["latlon_dateline"] = gribgen.regular_ll("latlon_dateline", 25.0, -35.0, 160.0, 61, 1.0,
                                                 1.0, north_to_south=True)
    return pick


GRIDS = _grids()


def _flow(grid, geo):
    """The divergent flow in the grid's axes (as the file will say), and its exact D."""
    phi, lam = np.radians(geo.lat), np.radians(geo.lon)
    ue = U0 * np.sin(lam) * np.cos(phi) ** 2
    ve = V0 * np.cos(phi)
    exact = (U0 * np.cos(lam) * np.cos(phi) - 2.0 * V0 * np.sin(phi)) / grid.earth_radius
    rel = grid.projected or grid.kind == "rotated_ll"
    if rel:
        ex, ey, nx, ny = gribgen.east_north_in_grid_axes(grid, geo)
        ue, ve = ue * ex + ve * nx, ue * ey + ve * ny
    return ue, ve, exact, rel


def _encode(path, grid):
    geo = gribgen.geometry(grid)
    ug, vg, exact, rel = _flow(grid, geo)
    msgs = []
    for lev in LEVELS:
        p = lev * 100.0
        t = np.full(geo.lat.shape, float(gribgen.lapse_rate_temperature(p)))
        z = np.full(geo.lat.shape, float(gribgen.lapse_rate_height(p)))
        kw = dict(grid_relative=rel, bits=24)
        msgs.append(gribgen.encode_field(grid, geo, t, gribgen.PARAM_T, lev, **kw))
        msgs.append(gribgen.encode_field(grid, geo, z, gribgen.PARAM_GH, lev, **kw))
        msgs.append(gribgen.encode_field(grid, geo, ug, gribgen.PARAM_U, lev, **kw))
        msgs.append(gribgen.encode_field(grid, geo, vg, gribgen.PARAM_V, lev, **kw))
    path.write_bytes(b"".join(msgs))
    return exact


@pytest.fixture(scope="module")
def divergence_runs(leeward_bin, tmp_path_factory):
    root = tmp_path_factory.mktemp("divergence")
    cfg = root / "divergence.toml"
    cfg.write_text(CONFIG)
    runs = {}
    for name, grid in GRIDS.items():
        path = root / f"{name}.grib2"
        exact = _encode(path, grid)
        runs[name] = (run_leeward(leeward_bin, [path], root / name, name, config=cfg), path, exact)
    return runs


def _slope(x, y):
    return float(np.polyfit(x, y, 1)[0])


@pytest.mark.parametrize("name", list(GRIDS))
def test_divergence_matches_its_closed_form_on_every_grid(name, divergence_runs):
    run, path, exact = divergence_runs[name]
    assert run.returncode == 0, run.describe()
    prod = read_product(single_product(run))
    assert "div" in prod.fields, f"{name}: no div in {sorted(prod.fields)}"
    lat, lon, _, _ = gribgen.read_grid_latlons(path)
    lat, lon, want = align_to_product(prod, lat, lon, exact)
    grid = GRIDS[name]
    pole = np.abs(lat) > 89.99
    inner = np.ones(lat.shape, dtype=bool)
    if grid.global_:
        inner &= ~pole
    else:
        inner[:2, :] = inner[-2:, :] = False
        inner[:, :2] = inner[:, -2:] = False
    scale = float(np.max(np.abs(want[inner])))
    for lev in LEVELS:
        got = prod.fields["div"][level_index(prod, lev)]
        g, w = got[inner], want[inner]
        missing = int(np.count_nonzero(~np.isfinite(g)))
        assert missing == 0, f"{name} {lev:.0f} hPa: {missing} of {g.size} points missing"
        err = np.abs(g - w)
        slope = _slope(w, g)
        # Second-order centred differences: the truncation is 0.07 % of the largest value at
        # 2.5 degrees (computed in src/diagnostics/divergence.rs); bounds leave room for the
        # coarsest grid here.
        assert float(np.median(err)) <= 1e-3 * scale, (
            f"{name} {lev:.0f} hPa: median error {np.median(err):.3e} > 0.1 % of {scale:.3e}")
        assert float(err.max()) <= 5e-3 * scale, (
            f"{name} {lev:.0f} hPa: largest error {err.max():.3e} > 0.5 % of {scale:.3e}")
        assert abs(slope - 1.0) <= 2e-3, f"{name} {lev:.0f} hPa: regression slope {slope:.5f}"
        if grid.global_ and pole.any():
            rows = sorted({int(j) for j in np.argwhere(pole)[:, 0]})
            for j in rows:
                north = lat[j, 0] > 0
                nxt = j - 1 if (j > 0 and abs(lat[j - 1, 0]) < 89.99) else j + 1
                s1 = abs(np.sin(np.radians(lat[nxt, 0])))
                cap = (-1.0 if north else 1.0) * V0 * (1.0 + s1) / grid.earth_radius
                # The file keeps 10 mantissa bits of div (docs/output.md, "Precision"):
                # rounding at most 2^-11 = 4.9e-4 of the value.
                assert np.allclose(got[j], cap, rtol=1e-3, atol=0), (
                    f"{name} {lev:.0f} hPa: pole row {lat[j, 0]:+.1f}: {got[j][:3]} vs cap mean {cap:.4e}")
    FIGURES.append(f"div closed form, {name}: {int(inner.sum())} points x {len(LEVELS)} levels, "
                   f"largest error {float(err.max()) / scale:.2e} of the largest value, "
                   f"slope {slope:.5f}")


def test_divergence_agrees_with_metpy_on_gfs(leeward_bin, samples_dir, tmp_path):
    import metpy.calc as mpcalc
    from metpy.units import units

    path = samples_dir / "gfs-2p5deg-2011100800-f072.grib2"
    if not path.is_file():
        pytest.skip(f"sample {path.name} absent from {samples_dir}")
    cfg = tmp_path / "divergence.toml"
    cfg.write_text(CONFIG)
    run = run_leeward(leeward_bin, [path], tmp_path / "out", "gfs_div", config=cfg)
    assert run.returncode in (0, 3), run.describe()
    prod = read_product(single_product(run))
    fields = gribgen.read_fields(path, multi=True)
    crs = pyproj.CRS.from_proj4("+proj=longlat +R=6371229 +no_defs")  # GRIB2 shape of earth 6
    for lev in (250, 500, 850):
        def wind(number, lev=lev):
            hits = [f for f in fields if (f["discipline"], f["category"], f["number"]) == (0, 2, number)
                    and f["level_type"] == 100 and f["level"] == lev]
            assert len(hits) == 1, f"{len(hits)} wind fields ({number}) at {lev} hPa"
            return hits[0]
        u, v = wind(2), wind(3)
        lat, lon, uu, vv = align_to_product(prod, u["lat"], u["lon"], u["values"], v["values"])
        ref = mpcalc.divergence(uu * units("m/s"), vv * units("m/s"),
                                latitude=lat[:, 0] * units.degree,
                                longitude=lon[0] * units.degree, crs=crs)
        ref = np.asarray(ref.m_as("1/s"))
        got = prod.fields["div"][level_index(prod, lev)]
        sel = np.abs(lat) <= 60.0
        sel[:, 0] = sel[:, -1] = False  # MetPy takes the seam one-sided
        sel &= np.isfinite(got)  # below the ground leeward has no value
        assert sel.sum() > 4000, f"{lev} hPa: only {sel.sum()} points compared"
        g, r = got[sel], ref[sel]
        rms = float(np.sqrt(np.mean(r ** 2)))
        diff = np.abs(g - r)
        slope = _slope(r, g)
        FIGURES.append(f"div vs MetPy, GFS 2.5 deg {lev} hPa, |lat| <= 60: median |diff| "
                       f"{np.median(diff) / rms:.3f} rms, largest {diff.max() / rms:.3f} rms, "
                       f"slope {slope:.4f} ({sel.sum()} points)")
        assert abs(slope - 1.0) <= 0.02, f"{lev} hPa: slope {slope:.4f} on MetPy's divergence"
        assert float(np.median(diff)) <= 0.05 * rms, f"{lev} hPa: median |diff| {np.median(diff):.3e}"
        assert float(diff.max()) <= 0.75 * rms, f"{lev} hPa: largest |diff| {diff.max():.3e}, rms {rms:.3e}"
