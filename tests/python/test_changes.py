"""Thickness, its change in time and the run-to-run difference, on inputs encoded by ecCodes.

Column: a horizontally uniform US Standard Atmosphere 1976 troposphere (NOAA/NASA/USAF 1976;
docs/references.md "Check values": T0 288.15 K, 6.5 K/km, p0 1013.25 hPa),
T = T0 (p/p0)^(R gamma/g), on 1000, 925, 850, 700 and 500 hPa of a small regular
latitude/longitude grid, temperature only unless a check adds geopotential height or
specific humidity. Thickness from the hypsometric equation (docs/references.md "Methods"):

    z2 - z1 = (R Tv_mean / g0) ln(p1/p2),

so a column warmed by dT everywhere thickens by (R dT / g0) ln(p1/p2) exactly: 40.58 m for
1000-500 hPa and dT = 2 K, 20.29 m for dT = 1 K. A uniform specific humidity q multiplies
Tv, hence the thickness, by (1 + 0.608 q) (common practice; docs/references.md "Methods").

Changes are read back from published files, so they must not depend on the order in which
steps and cycles reach leeward, nor on a restart between them (leeward's output contract,
docs/output.md "Changes in time"): every order is run as separate `leeward process` runs
into one output folder, and the values compared bit for bit.
"""

from __future__ import annotations

import dataclasses
import json
import math
import shutil
import sys
import subprocess
from pathlib import Path

import pyproj  # noqa: F401  (before ecCodes)
import netCDF4
import numpy as np
import pytest

import gribgen
from conftest import FIGURES, run_leeward

# --------------------------------------------------------------------------------------
# Constants and check values (sources beside each one)
# --------------------------------------------------------------------------------------
R = gribgen.R_DRY  # 287.05 J kg-1 K-1 (docs/references.md "Constants")
G = gribgen.G0  # 9.80665 m s-2 (CGPM 1901; docs/references.md)

#: Isobaric levels (hPa) of the inputs.
LEVELS_HPA = (1000, 925, 850, 700, 500)
#: Layers (bottom, top) in hPa: leeward's default list (docs/configuration.md
#: `thickness.layers_hpa`, the output contract).
LAYERS = ((1000, 500), (1000, 850), (850, 700), (700, 500))
#: US Standard Atmosphere 1976 thicknesses, m (docs/references.md "Check values").
STD_THICKNESS = {(1000, 500): 5463.6, (1000, 850): 1346.4, (850, 700): 1554.9, (700, 500): 2562.3}
#: US Standard Atmosphere 1976 geopotential heights, m (docs/references.md "Check values").
STD_HEIGHT = {1000: 110.9, 925: 762.0, 850: 1457.3, 700: 3012.2, 500: 5574.4}

#: WMO code table 4.2, discipline 0, category 1 (moisture), number 0: specific humidity, kg kg-1.
PARAM_Q = (1, 0)
#: Virtual temperature Tv = T (1 + 0.608 q) (common practice; docs/references.md "Methods").
EPS_TV = 0.608
Q_UNIFORM = 0.01

#: Tolerances, fixed before the first run (never widened to pass).
TOL_CHANGE_M = 1.0  # change in time and run-to-run difference, m
TOL_STD_M = 2.0  # standard-atmosphere thickness, m
TOL_HUMID_M = 0.5  # humidity increment, m

#: A small regular lat/lon grid, 1 degree, 7 x 7 points, stored north to south.
GRID = gribgen.regular_ll("thick_small_1p0", 50.0, 44.0, 5.0, 7, 1.0, 1.0, north_to_south=True)
GEO = gribgen.geometry(GRID)
#: WMO common code table C-11: 98 = ECMWF (any centre would do; the file name carries it).
CENTRE = 98


def hypsometric_change(dT, bottom_hpa, top_hpa):
    """(R dT / g0) ln(p_bottom/p_top): thickness change of a uniform warming dT
    (hypsometric equation, docs/references.md "Methods")."""
    return R * dT / G * math.log(bottom_hpa / top_hpa)


def std_temperature(level_hpa):
    """US Standard Atmosphere 1976 troposphere, T = T0 (p/p0)^(R gamma/g) (docs/references.md)."""
    return float(gribgen.lapse_rate_temperature(level_hpa * 100.0))


# --------------------------------------------------------------------------------------
# Inputs (ecCodes) and runs
# --------------------------------------------------------------------------------------
def write_column(path, *, date=20240115, hhmm=0, step=0, warming=0.0, heights=None, q=None):
    """One complete step of the uniform column, T on every level of LEVELS_HPA plus
    `warming` kelvin; optional geopotential height (dict level -> gpm; levels left out get
    none) and uniform specific humidity q (kg kg-1). 24-bit simple packing; each field is
    constant, so ecCodes stores it exactly in the reference value (WMO-No. 306, template 5.0)."""
    kw = dict(times=gribgen.Times(date, hhmm, step), centre=CENTRE, bits=24)
    shape = GEO.lat.shape
    msgs = []
    for lev in LEVELS_HPA:
        msgs.append(gribgen.encode_field(GRID, GEO, np.full(shape, std_temperature(lev) + warming),
                                         gribgen.PARAM_T, lev, **kw))
        if heights is not None and lev in heights:
            msgs.append(gribgen.encode_field(GRID, GEO, np.full(shape, float(heights[lev])),
                                             gribgen.PARAM_GH, lev, **kw))
        if q is not None:
            msgs.append(gribgen.encode_field(GRID, GEO, np.full(shape, float(q)), PARAM_Q, lev, **kw))
    Path(path).write_bytes(b"".join(msgs))
    return Path(path)


#: name -> keyword arguments of write_column.
INPUTS = {
    # Same cycle (2024-01-15 00 UTC), 6 h apart, the later one 2 K warmer.
    "c00_f000": dict(hhmm=0, step=0),
    "c00_f006_warm2": dict(hhmm=0, step=6, warming=2.0),
    # Two cycles valid at 12 UTC: 00 UTC + 12 h, and 06 UTC + 6 h 1 K warmer.
    "c00_f012": dict(hhmm=0, step=12),
    "c06_f006_warm1": dict(hhmm=600, step=6, warming=1.0),
    # Heights of docs/references.md on every level.
    "c00_f000_gh": dict(hhmm=0, step=0, heights=STD_HEIGHT),
    # Heights on 1000, 925, 850 and 500 hPa only, 500 hPa raised by 25 m: inconsistent with
    # T on purpose, so that the geopotential and hypsometric paths give different numbers.
    "c00_f000_gh_mixed": dict(hhmm=0, step=0,
                              heights={k: v + (25.0 if k == 500 else 0.0)
                                       for k, v in STD_HEIGHT.items() if k != 700}),
    # Specific humidity 0.01 kg/kg everywhere.
    "c00_f000_q": dict(hhmm=0, step=0, q=Q_UNIFORM),
    # Cycle bookkeeping: 00 UTC + 6 h (3 K warmer) and 06 UTC + 0 h are valid at the same
    # time; 06 UTC + 6 h (2 K) and + 12 h (5 K) follow in the 06 UTC cycle.
    "b00_f006_warm3": dict(hhmm=0, step=6, warming=3.0),
    "b06_f000": dict(hhmm=600, step=0),
    "b06_f006_warm2": dict(hhmm=600, step=6, warming=2.0),
    "b06_f012_warm5": dict(hhmm=600, step=12, warming=5.0),
}

#: Product file names (output contract, docs/output.md: {centre}_{YYYYMMDD}T{HHMM}Z_{HHH}h.nc).
F_C00_000 = "ecmwf_20240115T0000Z_000h.nc"
F_C00_006 = "ecmwf_20240115T0000Z_006h.nc"
F_C00_012 = "ecmwf_20240115T0000Z_012h.nc"
F_C06_000 = "ecmwf_20240115T0600Z_000h.nc"
F_C06_006 = "ecmwf_20240115T0600Z_006h.nc"
F_C06_012 = "ecmwf_20240115T0600Z_012h.nc"

#: Scenarios: name -> list of runs, each a list of inputs given to one `leeward process`.
SCENARIOS = {
    "chg_earlier_first": [["c00_f000"], ["c00_f006_warm2"]],
    "chg_later_first": [["c00_f006_warm2"], ["c00_f000"]],
    "r2r_older_first": [["c00_f012"], ["c06_f006_warm1"]],
    "r2r_newer_first": [["c06_f006_warm1"], ["c00_f012"]],
    "r2r_one_run": [["c00_f012", "c06_f006_warm1"]],
    "t_only": [["c00_f000"]],
    "gh": [["c00_f000_gh"]],
    "gh_mixed": [["c00_f000_gh_mixed"]],
    "q": [["c00_f000_q"]],
    "bookkeeping": [["b06_f012_warm5"], ["b06_f006_warm2"], ["b00_f006_warm3"], ["b06_f000"]],
}


@dataclasses.dataclass
class Scenario:
    """The runs of one scenario into one output folder, with a copy of every product taken
    straight after each run (snapshots[i][file name]), to compare a file before and after a
    later run."""

    name: str
    out_dir: Path
    runs: list
    snapshots: list

    def file(self, fname) -> Path:
        p = self.out_dir / fname
        assert p.is_file(), f"{self.name}: {fname} not written; files {sorted(x.name for x in self.out_dir.glob('*.nc'))}"
        return p


@pytest.fixture(scope="module")
def inputs(tmp_path_factory):
    d = tmp_path_factory.mktemp("changes_inputs")
    return {n: write_column(d / f"{n}.grib2", **kw) for n, kw in INPUTS.items()}


@pytest.fixture(scope="module")
def scenarios(leeward_bin, inputs, tmp_path_factory):
    """Every scenario, run once for the module (a few tenths of a second each)."""
    out_root = tmp_path_factory.mktemp("changes_out")
    snap_root = tmp_path_factory.mktemp("changes_snapshots")
    cache = {}

    def get(name):
        if name not in cache:
            out = out_root / name
            runs, snaps = [], []
            for i, names in enumerate(SCENARIOS[name]):
                run = run_leeward(leeward_bin, [inputs[n] for n in names], out, f"{name}-{i}")
                runs.append(run)
                assert run.returncode == 0, (
                    f"{name} run {i}: exit {run.returncode}, contract says 0\n{run.describe()}")
                d = snap_root / f"{name}_{i}"
                d.mkdir(parents=True, exist_ok=True)
                snaps.append({f.name: Path(shutil.copy2(f, d / f.name)) for f in out.glob("*.nc")})
            cache[name] = Scenario(name, out, runs, snaps)
        return cache[name]

    return get


# --------------------------------------------------------------------------------------
# Reading the products (netCDF4-python)
# --------------------------------------------------------------------------------------
def _layer_name(bottom_hpa, top_hpa):
    """Suffix of the variables and coordinate of one isobaric layer (output contract,
    docs/output.md "Thickness": `<name>_<bottom>_<top>` in hPa on `p_layer_<bottom>_<top>`)."""
    fmt = lambda x: f"{x:g}".replace(".", "p")  # noqa: E731
    return f"{fmt(bottom_hpa)}_{fmt(top_hpa)}"


def read_layer_var(path, name):
    """{(bottom, top): 2-D float64 array, NaN where missing} of a variable on isobaric
    layers (one file variable per layer), the attributes of its first layer and its raw
    float32 data per layer (for bit-for-bit comparisons)."""
    out, raws, attrs = {}, {}, None
    with netCDF4.Dataset(path) as ds:
        for lay in LAYERS:
            vname = f"{name}_{_layer_name(*lay)}"
            coord = f"p_layer_{_layer_name(*lay)}"
            assert vname in ds.variables, f"{Path(path).name}: no variable {vname}; has {sorted(ds.variables)}"
            v = ds[vname]
            # Output contract: (time, p_layer_<b>_<t>, y, x), the layer as the bounds of its coordinate.
            assert v.dimensions == ("time", coord, "lat", "lon"), f"{vname} dims {v.dimensions}"
            bnd = np.asarray(ds[f"{coord}_bounds"][:], dtype=float)
            assert np.allclose(bnd, [[lay[0] * 100.0, lay[1] * 100.0]], rtol=0, atol=1e-3), (vname, bnd)
            v.set_auto_mask(False)
            raw = np.array(v[:])
            a = {k: v.getncattr(k) for k in v.ncattrs()}
            attrs = attrs or a
            x = raw.astype(np.float64)
            if a.get("_FillValue") is not None:
                x[raw == a["_FillValue"]] = np.nan
            out[lay] = x[0, 0]
            raws[lay] = raw
    return out, attrs, np.stack([raws[lay] for lay in LAYERS])


def has_var(path, name):
    """The file has `name`, or `name` on any isobaric layer (`name_<bottom>_<top>`)."""
    with netCDF4.Dataset(path) as ds:
        return name in ds.variables or any(
            f"{name}_{_layer_name(*lay)}" in ds.variables for lay in LAYERS)


def methods_by_layer(attrs):
    """leeward_method ("1000-500 hPa: ...; 1000-850 hPa: ...") as {(bottom, top): text}."""
    text = attrs.get("leeward_method")
    assert isinstance(text, str) and text.strip(), "thick has no leeward_method (output contract)"
    out = {}
    for part in text.split(";"):
        head, sep, what = part.strip().partition(":")
        assert sep, f"leeward_method part without a layer: {part!r}"
        b, _, t = head.replace("hPa", "").strip().partition("-")
        out[(int(b), int(t))] = what.strip().lower()
    assert set(out) == set(LAYERS), f"leeward_method names layers {sorted(out)}, want {LAYERS}"
    return out


def rounding_tol(value, attrs):
    """Largest error of bit rounding to `quantization_nsb` mantissa bits (CF quantization,
    algorithm bitround): relative 2^-(n+1) (Kloewer et al. 2021 round to nearest;
    docs/configuration.md), plus float32's own half ulp."""
    n = int(attrs.get("quantization_nsb", 23))
    return abs(value) * (2.0 ** -(n + 1) + 2.0 ** -24)


def _uniform(a, what):
    """The one value of a horizontally uniform field; AssertionError if points are missing
    or differ."""
    assert np.all(np.isfinite(a)), f"{what}: {int(np.count_nonzero(~np.isfinite(a)))} points missing"
    assert np.ptp(a) == 0.0, f"{what}: not uniform ({a.min()} .. {a.max()}) on a uniform input"
    return float(a.flat[0])


def _figure(line):
    if line not in FIGURES:
        FIGURES.append(line)


# --------------------------------------------------------------------------------------
# 1. Change in time of a uniformly warmed column, both arrival orders
# --------------------------------------------------------------------------------------
CHG_ORDERS = ("chg_earlier_first", "chg_later_first")


@pytest.mark.parametrize("scenario", CHG_ORDERS)
def test_thickness_change_of_uniform_warming(scenario, scenarios):
    # Hypsometric equation (docs/references.md "Methods"): a uniform +2 K changes each layer's
    # thickness by (R 2 / g0) ln(p_bottom/p_top); 40.58 m for 1000-500 hPa.
    sc = scenarios(scenario)
    later, earlier = sc.file(F_C00_006), sc.file(F_C00_000)
    chg, attrs, _ = read_layer_var(later, "thick_chg_06h")
    assert attrs.get("units") == "m", attrs.get("units")  # output contract
    for lay in LAYERS:
        got = _uniform(chg[lay], f"{scenario} thick_chg_06h {lay}")
        want = hypsometric_change(2.0, *lay)
        _figure(f"thick_chg_06h {lay[0]}-{lay[1]} hPa ({scenario}): {got:.4f} m, closed form {want:.4f} m")
        assert abs(got - want) <= TOL_CHANGE_M, f"{scenario} {lay}: {got} m, closed form {want} m"
    # Output contract: this step's thickness minus that of the earlier step, both as published.
    t6, a6, _ = read_layer_var(later, "thick")
    t0, _, _ = read_layer_var(earlier, "thick")
    for lay in LAYERS:
        d = float(t6[lay].flat[0] - t0[lay].flat[0])
        got = float(chg[lay].flat[0])
        assert abs(got - d) <= rounding_tol(d, attrs), (
            f"{scenario} {lay}: thick_chg_06h {got} != thick(6h) - thick(0h) = {d} of the published files")
    # Output contract: no change where no step of the cycle was published that much earlier
    # (nothing precedes the 0 h step; nothing 12 or 24 h before the 6 h step).
    for name in ("thick_chg_06h", "thick_chg_12h", "thick_chg_24h"):
        assert not has_var(earlier, name), f"{scenario}: {earlier.name} has {name}, no earlier step exists"
    for name in ("thick_chg_12h", "thick_chg_24h"):
        assert not has_var(later, name), f"{scenario}: {later.name} has {name}, no step 12/24 h earlier exists"


def test_thickness_change_same_bits_in_both_orders(scenarios):
    # Output contract (docs/output.md "Changes in time"): both ends taken as published, so
    # every arrival order gives the same bits.
    a = read_layer_var(scenarios("chg_earlier_first").file(F_C00_006), "thick_chg_06h")[2]
    b = read_layer_var(scenarios("chg_later_first").file(F_C00_006), "thick_chg_06h")[2]
    assert a.shape == b.shape
    diff = int(np.count_nonzero(a.view(np.uint32) != b.view(np.uint32)))
    assert diff == 0, f"thick_chg_06h differs in {diff} of {a.size} values between the two orders"


def test_late_change_keeps_published_values(scenarios):
    # Output contract: when the earlier step arrives second, the change is *added* to the later
    # step's file; everything that file held before must come back unchanged, bit for bit.
    sc = scenarios("chg_later_first")
    before = sc.snapshots[0][F_C00_006]
    after = sc.file(F_C00_006)
    with netCDF4.Dataset(before) as b, netCDF4.Dataset(after) as a:
        assert not has_var(before, "thick_chg_06h")  # nothing to take it against at first
        missing = sorted(set(b.variables) - set(a.variables))
        assert not missing, f"{after.name}: variables lost in the update: {missing}"
        changed = []
        for name in b.variables:
            vb, va = b[name], a[name]
            vb.set_auto_mask(False)
            va.set_auto_mask(False)
            xb, xa = np.array(vb[:]), np.array(va[:])
            if xb.shape != xa.shape or xb.tobytes() != xa.tobytes():
                changed.append(name)
            ab = {k: vb.getncattr(k) for k in vb.ncattrs()}
            aa = {k: va.getncattr(k) for k in va.ncattrs()}
            if {k: str(v) for k, v in ab.items()} != {k: str(v) for k, v in aa.items()}:
                changed.append(f"{name} (attributes)")
        assert not changed, f"{after.name}: published values changed by the update: {changed}"
        assert set(a.variables) - set(b.variables) == {
            f"thick_chg_06h_{_layer_name(*lay)}" for lay in LAYERS}, (
            f"update added {sorted(set(a.variables) - set(b.variables))}")


# --------------------------------------------------------------------------------------
# 2. US Standard Atmosphere thicknesses, from temperature and from geopotential height
# --------------------------------------------------------------------------------------
def test_standard_atmosphere_thickness_from_temperature(scenarios):
    # US Standard Atmosphere 1976 thicknesses (docs/references.md "Check values"), from T alone
    # through the hypsometric equation; no humidity in the input, so dry.
    path = scenarios("t_only").file(F_C00_000)
    thick, attrs, _ = read_layer_var(path, "thick")
    meth = methods_by_layer(attrs)
    for lay in LAYERS:
        got = _uniform(thick[lay], f"thick {lay}")
        exact = float(gribgen.lapse_rate_height(lay[1] * 100.0) - gribgen.lapse_rate_height(lay[0] * 100.0))
        _figure(f"thick {lay[0]}-{lay[1]} hPa from T only: {got:.3f} m "
                f"(docs/references.md {STD_THICKNESS[lay]} m, closed form {exact:.3f} m; method: {meth[lay]})")
        assert abs(got - STD_THICKNESS[lay]) <= TOL_STD_M, f"{lay}: {got} m, docs/references.md {STD_THICKNESS[lay]} m"
        assert "hypsometric" in meth[lay] and "geopotential" not in meth[lay], f"{lay}: method {meth[lay]!r}"
        assert "dry" in meth[lay], f"{lay}: method {meth[lay]!r}, no humidity in the input"
        assert "humidity" not in meth[lay] or "no humidity" in meth[lay], f"{lay}: method {meth[lay]!r}"
    # Output contract (docs/output.md "Thickness"): each layer's coordinate p_layer_<b>_<t>
    # is its middle pressure in Pa, air_pressure, axis Z, with the layer (bottom, top) in Pa
    # as its bounds (CF 1.11 section 7.1).
    with netCDF4.Dataset(path) as ds:
        for lay in LAYERS:
            c = ds[f"p_layer_{_layer_name(*lay)}"]
            bnd = np.asarray(ds[c.getncattr("bounds")][:], dtype=float)
            assert (c.getncattr("standard_name"), c.getncattr("units"), c.getncattr("axis")) == (
                "air_pressure", "Pa", "Z")
            assert np.allclose(bnd, [[lay[0] * 100.0, lay[1] * 100.0]], rtol=0, atol=1e-3), bnd
            assert abs(float(c[0]) - bnd.mean()) < 1e-3, f"{c.name} {c[:]} is not the middle of {bnd}"


def _decoded_heights(path):
    """Geopotential height per level (hPa -> gpm) as ecCodes decodes the input."""
    out = {}
    for f in gribgen.read_fields(path):
        if (f["category"], f["number"]) == gribgen.PARAM_GH and f["level_type"] == 100:
            out[int(f["level"])] = float(np.unique(f["values"]).item())
    return out


def test_thickness_from_geopotential_height(scenarios, inputs):
    # Output contract: where both levels carry geopotential height, thick = z(top) - z(bottom)
    # and leeward_method says so. Heights from docs/references.md, read back with ecCodes.
    path = scenarios("gh").file(F_C00_000)
    z = _decoded_heights(inputs["c00_f000_gh"])
    assert set(z) == set(LEVELS_HPA)
    thick, attrs, _ = read_layer_var(path, "thick")
    meth = methods_by_layer(attrs)
    for lay in LAYERS:
        got = _uniform(thick[lay], f"thick {lay}")
        want = z[lay[1]] - z[lay[0]]
        _figure(f"thick {lay[0]}-{lay[1]} hPa from heights: {got:.4f} m, z difference {want:.4f} m")
        assert "geopotential height" in meth[lay], f"{lay}: method {meth[lay]!r}"
        # Packing precision: leeward's bit rounding (rounding_tol) plus 1 mm for float32
        # arithmetic on the decoded heights (ecCodes stores each constant field as a float32
        # reference value, WMO-No. 306 template 5.0).
        assert abs(got - want) <= rounding_tol(want, attrs) + 1e-3, (
            f"{lay}: thick {got} m != z(top) - z(bottom) = {want} m")
        assert abs(got - STD_THICKNESS[lay]) <= TOL_STD_M  # docs/references.md "Check values"
    # Output contract: z written when the input has it, equal to the input's heights.
    with netCDF4.Dataset(path) as ds:
        assert "z" in ds.variables, "no z although the input has geopotential height"
        zv = ds["z"]
        assert zv.dimensions == ("time", "pressure", "lat", "lon"), zv.dimensions
        zattrs = {k: zv.getncattr(k) for k in zv.ncattrs()}
        pr = np.asarray(ds["pressure"][:], dtype=float)
        za = np.ma.filled(zv[:].astype(float), np.nan)[0]
        for lev, want in z.items():
            k = int(np.flatnonzero(np.isclose(pr, lev * 100.0))[0])
            got = _uniform(za[k], f"z {lev} hPa")
            assert abs(got - want) <= rounding_tol(want, zattrs), f"z {lev} hPa: {got} m, input {want} m"


def test_thickness_method_chosen_per_layer(scenarios, inputs):
    # Output contract: geopotential height "where both levels have it", else the hypsometric
    # equation, per layer. 700 hPa has no height and 500 hPa is 25 m above the column's own
    # hypsometric height, so the two paths differ by 25 m on 1000-500.
    path = scenarios("gh_mixed").file(F_C00_000)
    z = _decoded_heights(inputs["c00_f000_gh_mixed"])
    thick, attrs, _ = read_layer_var(path, "thick")
    meth = methods_by_layer(attrs)
    for lay in ((1000, 500), (1000, 850)):
        got = _uniform(thick[lay], f"thick {lay}")
        want = z[lay[1]] - z[lay[0]]
        assert "geopotential height" in meth[lay], f"{lay}: method {meth[lay]!r}"
        assert abs(got - want) <= rounding_tol(want, attrs) + 1e-3, f"{lay}: {got} m, z difference {want} m"
    for lay in ((850, 700), (700, 500)):
        got = _uniform(thick[lay], f"thick {lay}")
        assert "hypsometric" in meth[lay], f"{lay}: method {meth[lay]!r} although 700 hPa has no height"
        # US Standard Atmosphere 1976 from T (docs/references.md "Check values").
        assert abs(got - STD_THICKNESS[lay]) <= TOL_STD_M, f"{lay}: {got} m, docs/references.md {STD_THICKNESS[lay]}"
    _figure(f"mixed heights: thick 1000-500 {float(thick[(1000, 500)].flat[0]):.3f} m (z difference "
            f"{z[500] - z[1000]:.3f}), 700-500 {float(thick[(700, 500)].flat[0]):.3f} m (hypsometric)")


# --------------------------------------------------------------------------------------
# 3. Specific humidity: virtual temperature
# --------------------------------------------------------------------------------------
def test_specific_humidity_thickens_by_virtual_temperature(scenarios):
    # Tv = T (1 + 0.608 q) (common practice; docs/references.md "Methods"): with q uniform the
    # hypsometric thickness grows by 0.608 q of the dry value.
    dry, _, _ = read_layer_var(scenarios("t_only").file(F_C00_000), "thick")
    moist, attrs, _ = read_layer_var(scenarios("q").file(F_C00_000), "thick")
    meth = methods_by_layer(attrs)
    for lay in LAYERS:
        d = _uniform(dry[lay], f"dry thick {lay}")
        m = _uniform(moist[lay], f"moist thick {lay}")
        want = EPS_TV * Q_UNIFORM * d
        _figure(f"thick {lay[0]}-{lay[1]} hPa with q = 0.01: +{m - d:.4f} m over dry, 0.608 q x dry = {want:.4f} m")
        assert abs((m - d) - want) <= TOL_HUMID_M, f"{lay}: moist - dry = {m - d} m, want {want} m"
        assert "specific humidity" in meth[lay], f"{lay}: method {meth[lay]!r}"


# --------------------------------------------------------------------------------------
# 4. Run-to-run difference with a restart between the cycles
# --------------------------------------------------------------------------------------
R2R_CASES = ("r2r_older_first", "r2r_newer_first", "r2r_one_run")


@pytest.mark.parametrize("scenario", R2R_CASES)
def test_run_to_run_difference(scenario, scenarios):
    # Hypsometric equation (docs/references.md "Methods"): the newer cycle 1 K warmer at the same
    # valid time is (R/g0) ln(p_bottom/p_top) thicker; 20.29 m for 1000-500 hPa.
    sc = scenarios(scenario)
    newer, older = sc.file(F_C06_006), sc.file(F_C00_012)
    r2r, attrs, _ = read_layer_var(newer, "thick_r2r")
    assert attrs.get("units") == "m"
    # Output contract: names the file it was taken against.
    assert attrs.get("leeward_previous_cycle_file") == older.name, attrs.get("leeward_previous_cycle_file")
    for lay in LAYERS:
        got = _uniform(r2r[lay], f"{scenario} thick_r2r {lay}")
        want = hypsometric_change(1.0, *lay)
        _figure(f"thick_r2r {lay[0]}-{lay[1]} hPa ({scenario}): {got:.4f} m, closed form {want:.4f} m")
        assert abs(got - want) <= TOL_CHANGE_M, f"{scenario} {lay}: {got} m, closed form {want} m"
    # Output contract: this cycle minus the previous one; the older has none to take.
    assert not has_var(older, "thick_r2r"), f"{scenario}: the older cycle's file {older.name} has thick_r2r"
    # Output contract: a change in time is taken within one cycle only; these two cycles are
    # valid at the same time and have no other step published.
    for f in (newer, older):
        for name in ("thick_chg_06h", "thick_chg_12h", "thick_chg_24h"):
            assert not has_var(f, name), f"{scenario}: {f.name} has {name} taken across cycles"


def test_run_to_run_same_bits_every_order(scenarios):
    # Output contract: every order, with or without a restart between, gives the same bits.
    vals = {s: read_layer_var(scenarios(s).file(F_C06_006), "thick_r2r")[2] for s in R2R_CASES}
    ref = vals[R2R_CASES[0]]
    for s, v in vals.items():
        assert v.shape == ref.shape
        diff = int(np.count_nonzero(v.view(np.uint32) != ref.view(np.uint32)))
        assert diff == 0, f"thick_r2r of {s} differs from {R2R_CASES[0]} in {diff} of {v.size} values"


# --------------------------------------------------------------------------------------
# Cycle bookkeeping: changes only within a cycle, late steps update several files
# --------------------------------------------------------------------------------------
def test_changes_within_cycle_and_across_cycles(scenarios):
    # Runs, one at a time into one folder: 06 UTC +12 h (5 K), 06 UTC +6 h (2 K),
    # 00 UTC +6 h (3 K), 06 UTC +0 h (0 K). 00 UTC +6 h and 06 UTC +0 h are valid at the same
    # time. Closed forms from the hypsometric equation (docs/references.md "Methods"):
    #  - 06+6 h: thick_chg_06h against 06+0 h (+2 K), never against 00+6 h (-1 K);
    #  - 06+12 h: thick_chg_06h against 06+6 h (+3 K), thick_chg_12h against 06+0 h (+5 K);
    #  - 06+0 h: thick_r2r against 00+6 h (-3 K).
    sc = scenarios("bookkeeping")
    f0, f6, f12, old = (sc.file(F_C06_000), sc.file(F_C06_006), sc.file(F_C06_012), sc.file(F_C00_006))
    expect = [(f6, "thick_chg_06h", 2.0), (f12, "thick_chg_06h", 3.0), (f12, "thick_chg_12h", 5.0),
              (f0, "thick_r2r", -3.0)]
    lay = (1000, 500)
    for path, name, dT in expect:
        a, _, _ = read_layer_var(path, name)
        got = _uniform(a[lay], f"{path.name} {name}")
        want = hypsometric_change(dT, *lay)
        _figure(f"bookkeeping {path.name} {name} 1000-500 hPa: {got:.4f} m, closed form {want:.4f} m")
        assert abs(got - want) <= TOL_CHANGE_M, f"{path.name} {name}: {got} m, closed form {want} m"
    absent = [(f0, "thick_chg_06h"), (f6, "thick_chg_12h"), (f6, "thick_r2r"), (f12, "thick_chg_24h"),
              (f12, "thick_r2r"), (old, "thick_chg_06h"), (old, "thick_r2r")]
    for path, name in absent:
        assert not has_var(path, name), f"{path.name} has {name}: no such step or cycle was published"


# --------------------------------------------------------------------------------------
# 5. CF compliance after a late update
# --------------------------------------------------------------------------------------
def test_cf_compliance_after_late_update(scenarios, tmp_path):
    # IOOS compliance checker (PyPI compliance-checker, CF 1.11 suite, bundled standard name
    # table; docs/references.md): no failed high-priority check in files that leeward updated in
    # place (change added after the file was first published).
    # The checker installed with this interpreter (the test venv), before any on PATH.
    beside = Path(sys.executable).parent / "compliance-checker"
    exe = str(beside) if beside.is_file() else shutil.which("compliance-checker")
    assert exe, "compliance-checker not installed (tests/python/requirements.txt)"
    files = [scenarios("chg_later_first").file(F_C00_006),
             scenarios("r2r_newer_first").file(F_C06_006),
             scenarios("bookkeeping").file(F_C06_012)]
    procs = []
    for i, f in enumerate(files):
        out = tmp_path / f"cf{i}.json"
        procs.append((f, out, subprocess.Popen(
            [exe, "--test=cf:1.11", "--format=json", "-o", str(out), str(f)],
            stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)))
        if len(procs) >= 2:  # two cores: at most two checkers at once
            procs[-2][2].wait(timeout=120)
    failures = {}
    for f, out, p in procs:
        _, err = p.communicate(timeout=120)
        assert out.is_file(), f"compliance-checker wrote no report for {f.name} (exit {p.returncode}):\n{err[-2000:]}"
        cf = json.loads(out.read_text()).get("cf:1.11")
        assert cf is not None, f"{f.name}: report has no cf:1.11 section"
        high = [(c["name"], c["msgs"]) for c in cf["high_priorities"] if c["value"][0] < c["value"][1]]
        medium = sorted({m for c in cf["medium_priorities"] if c["value"][0] < c["value"][1] for m in c["msgs"]})
        for m in medium:
            _figure(f"compliance-checker medium ({f.name}, updated file): {m}")
        if high:
            failures[f.name] = high
    assert not failures, f"high-priority CF failures in updated files: {failures}"
