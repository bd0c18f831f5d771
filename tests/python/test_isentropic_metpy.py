"""leeward's isentropic and isobaric PV against an independent computation with MetPy.

MetPy (PyPI `metpy`, pinned in requirements.txt; docs/references.md "Outside references") is a
general-purpose meteorology library, used here only as a reference computation on the same
input: the GFS sample's temperature and winds on its isobaric levels (read with ecCodes),
interpolated by MetPy to isentropic surfaces (`isentropic_interpolation_as_dataset`, which
assumes T linear in ln p between levels) and its `potential_vorticity_baroclinic` on them and
on the isobaric levels. MetPy's horizontal differences are one-sided at the first and last
longitude (it does not wrap a global grid), undefined on the pole rows, where its grid
spacing is zero, and spoilt on the rows next to them (87.5 degrees), whose differences
reach the pole row: the comparisons stay between 20 and 85 degrees of latitude.

pyproj is imported before ecCodes (conftest.py does so for the whole session); MetPy imports
pyproj itself.
"""

from __future__ import annotations

import os
import warnings

import pyproj  # noqa: F401  (before ecCodes)
import numpy as np
import pytest

import gribgen
from conftest import FIGURES, GFS_SAMPLE, single_product
from ncproducts import align_to_product, level_index, read_isentropic, read_product, vertical_index

OK_CODES = (0, 3)  # exit codes of `leeward process` (all done / some input unusable)
#: Surfaces handed to MetPy: 320 K with neighbours on each side, so that its vertical
#: derivative of theta in pressure at 320 K is centred.
SURFACES_K = [310.0, 315.0, 320.0, 325.0, 330.0]
#: Isobaric levels compared (where the 2 PVU surface lies in the extratropics).
ISOBARIC_HPA = [400, 300, 250, 200]
#: Latitude band compared (see the module note).
MIN_ABS_LAT, MAX_ABS_LAT = 20.0, 85.0
#: 1 PVU = 1e-6 K m2 kg-1 s-1 (Hoskins et al. 1985; docs/references.md "Constants").
SI_PV = "K m^2 / kg / s"
PVU = 1e-6


def _metpy():
    try:
        import metpy.calc as mpcalc
        from metpy.units import units
    except ImportError as e:  # pragma: no cover - a missing reference library
        msg = f"MetPy not installed ({e}): pip install -r tests/python/requirements.txt"
        if os.environ.get("CI"):
            pytest.fail(msg)
        pytest.skip(msg)
    return mpcalc, units


def _magnitude(x, unit):
    """Values of a MetPy result (xarray or pint quantity) in `unit`, as a numpy array."""
    q = x.metpy.unit_array if hasattr(x, "metpy") else x
    return np.asarray(q.to(unit).magnitude)


@pytest.fixture(scope="module")
def reference(samples_dir):
    """MetPy's isentropic pressure and PV at 320 K and isobaric PV, on the GFS grid with
    latitudes increasing (2-D lat, lon; pressures in Pa, PV in PVU)."""
    mpcalc, units = _metpy()
    import xarray as xr

    g0 = gribgen.G0 * units("m/s^2")  # standard gravity (docs/references.md "Constants")

    path = samples_dir / GFS_SAMPLE
    if not path.is_file():
        pytest.skip(f"sample {path.name} absent from {samples_dir}")
    cubes = {}
    lat = lon = None
    for f in gribgen.read_fields(path):
        key = (f["discipline"], f["category"], f["number"])
        if f["level_type"] != 100 or key not in ((0, *gribgen.PARAM_T), (0, *gribgen.PARAM_U),
                                                 (0, *gribgen.PARAM_V)):
            continue
        cubes.setdefault(key[1:], {})[f["level"]] = f["values"]
        lat, lon = f["lat"][:, 0], f["lon"][0, :]
    levels = sorted(set.intersection(*(set(c) for c in cubes.values())), reverse=True)
    assert len(levels) >= 20, f"{path.name}: only {len(levels)} isobaric levels with T, u and v"
    order = np.argsort(lat)  # MetPy works on whatever order; keep latitudes increasing
    crs = {"grid_mapping_name": "latitude_longitude", "earth_radius": gribgen.RADIUS_SHAPE_6}

    def cube(param, name, unit):
        a = np.stack([cubes[param][lv] for lv in levels])[:, order, :]
        da = xr.DataArray(a, dims=("pressure", "lat", "lon"), name=name, attrs={"units": unit},
                          coords={"pressure": ("pressure", np.array(levels, float), {"units": "hPa"}),
                                  "lat": ("lat", lat[order], {"units": "degrees_north"}),
                                  "lon": ("lon", lon, {"units": "degrees_east"})})
        return da.metpy.assign_crs(crs)

    t = cube(gribgen.PARAM_T, "temperature", "K")
    u = cube(gribgen.PARAM_U, "u", "m/s")
    v = cube(gribgen.PARAM_V, "v", "m/s")
    with warnings.catch_warnings():
        # MetPy's notes on points outside the data and on guessed dimension order.
        warnings.simplefilter("ignore")
        isen = mpcalc.isentropic_interpolation_as_dataset(np.array(SURFACES_K) * units.K, t, u, v)
        theta_isen = xr.broadcast(isen["isentropic_level"], isen["pressure"].metpy.dequantify())[0]
        pv_isen = mpcalc.potential_vorticity_baroclinic(theta_isen.assign_attrs(units="K"),
                                                        isen["pressure"], isen["u"], isen["v"])
        theta = mpcalc.potential_temperature(t["pressure"], t)
        pres = xr.broadcast(t["pressure"], t)[0].assign_attrs(units="hPa")
        pv_iso = mpcalc.potential_vorticity_baroclinic(theta, pres, u, v)
        # MetPy's own barotropic part, -g (zeta + f) dtheta/dp, from its absolute_vorticity
        # and first_derivative along pressure (what potential_vorticity_baroclinic
        # combines): the rest of its PV is the tilting part.
        dthdp = mpcalc.first_derivative(theta, axis=0, x=pres)
        barotropic = -g0 * mpcalc.absolute_vorticity(u, v) * dthdp
    out = {
        "isen_p": isen["pressure"].sel(isentropic_level=320.0).metpy.convert_units("Pa").metpy.dequantify().values,
        "isen_pv": pv_isen.sel(isentropic_level=320.0).metpy.convert_units(SI_PV).metpy.dequantify().values / PVU,
    }
    tilt = _magnitude(pv_iso - barotropic, SI_PV) / PVU
    pv_iso = pv_iso.metpy.convert_units(SI_PV).metpy.dequantify()
    for lv in ISOBARIC_HPA:
        out[f"pv{lv}"] = pv_iso.sel(pressure=float(lv)).values / PVU
        out[f"tilt{lv}"] = tilt[levels.index(lv)]
    lon2, lat2 = np.meshgrid(lon, lat[order])
    return lat2, lon2, out


@pytest.fixture(scope="module")
def compared(real_runs, reference):
    run = real_runs.get("gfs_2p5")
    assert run.returncode in OK_CODES, run.describe()
    prod = read_isentropic(single_product(run), names=("isen_p", "isen_pv", "pv"))
    # eta and stab of the same file: leeward's own barotropic part g eta stab, so that its
    # tilting part is pv minus that.
    base = read_product(single_product(run))
    prod.fields["tilt"] = prod.fields["pv"] - gribgen.G0 * base.fields["eta"] * base.fields["stab"] / PVU
    lat, lon, ref = reference
    names = list(ref)
    lat2, _, *arrays = align_to_product(prod, lat, lon, *[ref[n] for n in names])
    band = (np.abs(lat2) >= MIN_ABS_LAT) & (np.abs(lat2) <= MAX_ABS_LAT)
    return prod, band, dict(zip(names, arrays))


#: Share of the band where both computations must give a value (judgement: the 320 K
#: surface and isobaric PV exist nearly everywhere poleward of 20 degrees).
MIN_SHARE = 0.9


def _agreement(ours, theirs):
    both = np.isfinite(ours) & np.isfinite(theirs)
    a, b = ours[both], theirs[both]
    return (float(np.corrcoef(a, b)[0, 1]), float(np.median(np.abs(a - b))),
            float(np.percentile(np.abs(a - b), 90)), int(both.sum()))


#: PV magnitude (PVU) above which relative differences are taken: below it a difference
#: of a few hundredths of a PVU would read as a large fraction (judgement).
REL_FLOOR_PVU = 0.5


def _pv_bounds(ours, theirs):
    """(median relative difference where |MetPy| >= REL_FLOOR_PVU, least-squares slope of
    ours on MetPy's through the origin, correlation, points)."""
    both = np.isfinite(ours) & np.isfinite(theirs)
    a, b = ours[both], theirs[both]
    big = np.abs(b) >= REL_FLOOR_PVU
    rel = float(np.median(np.abs(a[big] - b[big]) / np.abs(b[big])))
    slope = float(np.sum(a * b) / np.sum(b * b))
    return rel, slope, float(np.corrcoef(a, b)[0, 1]), int(both.sum())


def test_isentropic_pv_320K_vs_metpy(compared):
    # Ertel PV on 320 K (Hoskins et al. 1985; docs/references.md): leeward's isen_pv against
    # MetPy's potential_vorticity_baroclinic on MetPy's own isentropic interpolation;
    # correlation >= 0.95 poleward of 20 degrees (judgement).
    prod, band, ref = compared
    k = vertical_index(prod.theta_level, 320.0, what="theta_level")
    ours = prod.fields["isen_pv"][k][band]
    r, med, p90, n = _agreement(ours, ref["isen_pv"][band])
    rel, slope, _, _ = _pv_bounds(ours, ref["isen_pv"][band])
    FIGURES.append(f"GFS 2.5 deg, isen_pv at 320 K vs MetPy, 20-85 N/S: correlation {r:.4f}, "
                   f"median |diff| {med:.3f} PVU, p90 {p90:.3f} PVU, median relative difference "
                   f"{rel:.3f} (|PV| >= {REL_FLOOR_PVU}), slope {slope:.3f} over {n} points")
    print(FIGURES[-1])
    assert n >= MIN_SHARE * band.sum(), f"only {n} of {int(band.sum())} points have PV from both"
    # Bounds (judgement, from the agreement measured with the stability taken between the
    # isentropes 2.5 K either side: median relative difference 0.036, slope 0.980,
    # correlation 0.997): a PV off by a constant factor or a sign moves the slope, a wrong
    # stability the median relative difference.
    assert r >= 0.99, f"correlation {r:.4f} < 0.99"
    assert rel <= 0.06, f"median relative difference {rel:.3f} > 0.06"
    assert 0.95 <= slope <= 1.05, f"regression slope {slope:.3f} outside 0.95-1.05"


def test_isentropic_pressure_320K_vs_metpy(compared):
    # Pressure of the 320 K surface: MetPy assumes T linear in ln p between levels, leeward
    # ln theta linear in ln p; on levels 25-50 hPa apart the two differ by a fraction of a
    # hPa wherever the column is stable (judgement): median <= 1 hPa, 90th percentile
    # <= 5 hPa, correlation >= 0.999 where both have the surface.
    prod, band, ref = compared
    k = vertical_index(prod.theta_level, 320.0, what="theta_level")
    ours = prod.fields["isen_p"][k][band] / 100.0
    r, med, p90, n = _agreement(ours, ref["isen_p"][band] / 100.0)
    FIGURES.append(f"GFS 2.5 deg, isen_p at 320 K vs MetPy, 20-85 N/S: correlation {r:.5f}, "
                   f"median |diff| {med:.2f} hPa, p90 {p90:.2f} hPa over {n} points")
    print(FIGURES[-1])
    assert n >= MIN_SHARE * band.sum(), f"only {n} of {int(band.sum())} points have the surface in both"
    assert med <= 1.0, f"median |difference| {med:.2f} hPa > 1"
    assert p90 <= 5.0, f"90th percentile |difference| {p90:.2f} hPa > 5"
    assert r >= 0.999, f"correlation {r:.5f} < 0.999"


@pytest.mark.parametrize("level_hpa", ISOBARIC_HPA)
def test_isobaric_pv_vs_metpy(level_hpa, compared):
    # Isobaric Ertel PV with its baroclinic terms (Bluestein 1992; docs/references.md "Methods"),
    # which the closed-form column cannot test (they vanish there): leeward's pv against
    # MetPy's potential_vorticity_baroclinic on the isobaric levels; correlation >= 0.95
    # poleward of 20 degrees (judgement, as on 320 K).
    prod, band, ref = compared
    k = level_index(prod, level_hpa)
    ours = prod.fields["pv"][k][band]
    r, med, p90, n = _agreement(ours, ref[f"pv{level_hpa}"][band])
    rel, slope, _, _ = _pv_bounds(ours, ref[f"pv{level_hpa}"][band])
    FIGURES.append(f"GFS 2.5 deg, pv at {level_hpa} hPa vs MetPy, 20-85 N/S: correlation {r:.4f}, "
                   f"median |diff| {med:.3f} PVU, p90 {p90:.3f} PVU, median relative difference "
                   f"{rel:.3f} (|PV| >= {REL_FLOOR_PVU}), slope {slope:.3f} over {n} points")
    print(FIGURES[-1])
    assert n >= MIN_SHARE * band.sum(), f"only {n} of {int(band.sum())} points have PV from both"
    # MetPy differences theta in p, leeward in ln p (docs/references.md "Methods"); around the
    # tropopause, where theta grows nearly exponentially with -ln p, their dtheta/dp differ
    # by 4-5% in the median at 300-200 hPa (measured: leeward's stab / MetPy's -dtheta/dp
    # 0.96, 0.95, 0.96; absolute vorticity agrees to 1e-4), so the full PV is bounded at a
    # median relative difference of 0.08 and a slope within 0.92-1.08 (judgement); the
    # tilting terms are checked on their own below.
    assert r >= 0.99, f"correlation {r:.4f} < 0.99"
    assert rel <= 0.08, f"median relative difference {rel:.3f} > 0.08"
    assert 0.92 <= slope <= 1.08, f"regression slope {slope:.3f} outside 0.92-1.08"


#: |tilting part| (PVU) above which relative differences of it are taken (judgement: its
#: median magnitude is 0.03-0.05 PVU, its 90th percentile 0.15-0.30 PVU at 400-200 hPa).
TILT_FLOOR_PVU = 0.1


@pytest.mark.parametrize("level_hpa", ISOBARIC_HPA)
def test_isobaric_pv_tilting_terms_vs_metpy(level_hpa, compared):
    # The baroclinic (tilting) part of isobaric PV, -g [ -(dv/dp)(dtheta/dx) + (du/dp)(dtheta/dy) ]
    # (Bluestein 1992; docs/references.md "Methods"): leeward's pv minus g eta stab from the same
    # file, against MetPy's potential_vorticity_baroclinic minus -g (zeta + f) dtheta/dp from
    # MetPy's own functions. Dropping the terms gives a slope of 0, flipping their sign -1,
    # dropping one of the two or flipping its sign moves the slope and the median relative
    # difference well outside the bounds (judgement, measured agreement: slope 0.98-1.00,
    # correlation >= 0.995, median relative difference 0.02-0.06 where |part| >= 0.1 PVU).
    prod, band, ref = compared
    k = level_index(prod, level_hpa)
    ours = prod.fields["tilt"][k][band]
    theirs = ref[f"tilt{level_hpa}"][band]
    both = np.isfinite(ours) & np.isfinite(theirs)
    a, b = ours[both], theirs[both]
    big = np.abs(b) >= TILT_FLOOR_PVU
    rel = float(np.median(np.abs(a[big] - b[big]) / np.abs(b[big])))
    slope = float(np.sum(a * b) / np.sum(b * b))
    r = float(np.corrcoef(a, b)[0, 1])
    FIGURES.append(f"GFS 2.5 deg, pv tilting part at {level_hpa} hPa vs MetPy, 20-85 N/S: slope {slope:.3f}, "
                   f"correlation {r:.4f}, median relative difference {rel:.3f} over {int(big.sum())} points "
                   f"with |part| >= {TILT_FLOOR_PVU} PVU")
    print(FIGURES[-1])
    assert big.sum() > 500, f"only {int(big.sum())} points with a tilting part >= {TILT_FLOOR_PVU} PVU"
    assert 0.9 <= slope <= 1.1, f"regression slope {slope:.3f} outside 0.9-1.1"
    assert r >= 0.97, f"correlation {r:.4f} < 0.97"
    assert rel <= 0.10, f"median relative difference {rel:.3f} > 0.10"
