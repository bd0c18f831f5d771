"""Every kind of file leeward writes, opened by the clients an office or a scientist uses.

Outside references, each run once per file kind in this one module:

- the IOOS compliance checker (PyPI compliance-checker) at CF 1.11: no high and no medium
  finding;
- the NCAS CF checker (PyPI cfchecker, UDUNITS through cfunits) at CF 1.8, the newest
  version it knows: no error; the file's CF 1.9-1.11 features it cannot judge are listed;
- GDAL 3.6 (Debian gdal-bin and python3-gdal, run as a subprocess with the system Python
  that its bindings are built for, gdal_probe.py): a CRS on every data variable, pixel
  centres placed at the file's own coordinates within half a grid cell, and a warp to
  EPSG:4326 that returns the source value at the file's own coordinates;
- Iris (PyPI scitools-iris, units through cf-units and UDUNITS): loads without a warning,
  every data cube with a coordinate system, known units and a vertical coordinate;
- xarray with cf_xarray: the axes X, Y, Z and T on every data variable;
- MetPy (PyPI metpy, units through pint): parse_cf() gives a CRS, and .metpy.units and
  .metpy.vertical work on every data variable.

File kinds: regular latitude/longitude in both longitude ranges (a grid from 0 E, one from
180 E = 180 W as GRIB2 writes it, the same grid with its first longitude written as -180
with a sign bit, a grid from 0 E rolled into [-180, 180) by the configuration) and a
limited area over the date line; Gaussian; Lambert; polar stereographic; rotated; Mercator;
and a step with changes in time and the PV budget added by the next step. The inputs are
written by ecCodes (gribgen.py) with fields that vary with longitude, so that a column in
the wrong place shows. Longitudes are checked by selecting known points with xarray .sel and
an Iris constraint against ecCodes' own values there.
"""

from __future__ import annotations

import dataclasses
import json
import shutil
import subprocess
import sys
import warnings
from pathlib import Path

import pyproj  # noqa: F401  (PROJ before ecCodes in this process)
import eccodes
import netCDF4
import numpy as np
import pytest
import xarray as xr

import gribgen
from conftest import FIGURES, REPO_ROOT, run_leeward
from test_information import _documented_kept_bits, table_name

HERE = Path(__file__).resolve().parent
#: Levels of the inputs: 1000 to 100 hPa every 50 hPa, so that isentropic surfaces,
#: the tropopause and every thickness layer have values.
LEVELS = gribgen.TALL_LEVELS_HPA
#: Mantissa bits kept by the heights (16, docs/output.md "Precision"): relative rounding
#: error at most 2^-17 (Kloewer et al. 2021; docs/configuration.md).
ROUNDING = 2.0 ** -17
#: Mantissa bits each product keeps by default (docs/output.md, "Precision").
KEPT = _documented_kept_bits()


@dataclasses.dataclass(frozen=True)
class Kind:
    """One kind of file: its grid, how it is made and which file of the run is checked."""

    grid: gribgen.Grid
    config: str = ""
    leads: tuple = (36,)
    patch_negative_lon: bool = False
    member: int | None = None


def _kinds() -> dict[str, Kind]:
    g = gribgen.closed_form_grids()
    ll = lambda name, lon1: gribgen.regular_ll(name, 90.0, -90.0, lon1, 144, 2.5, 2.5,  # noqa: E731
                                               north_to_south=True, global_=True)
    return {
        # Horizontal divergence is off by default: on here, so every reader sees it.
        "latlon_from_0": Kind(ll("ll0", 0.0), config="[products]\ndivergence = true\n"),
        "latlon_from_180": Kind(ll("ll180", 180.0)),
        "latlon_from_minus_180": Kind(ll("llm180", 180.0), patch_negative_lon=True),
        "latlon_rolled": Kind(ll("ll0", 0.0), config='[output]\nlongitudes = "-180..180"\n'
                                                     '[products]\ndivergence = true\n'),
        "latlon_dateline": Kind(gribgen.regular_ll("dateline", 20.0, 60.0, 170.0, 41, 1.0, 1.0,
                                                   north_to_south=False)),
        "gaussian": Kind(g["gaussian_n48"]),
        "lambert": Kind(g["lambert_tangent_25"], config="[products]\ndivergence = true\n"),
        "polar_stereographic": Kind(g["polar_north_60"]),
        "rotated": Kind(g["rotated_europe_0p5"]),
        "mercator": Kind(g["mercator_pacific"]),
        "changes_and_budget": Kind(ll("ll0", 0.0), leads=(30, 36)),
        "ensemble_member": Kind(g["lambert_secant_30_60"], member=7),
    }


KINDS = _kinds()
#: The kinds the five clients open: each layout once (the sign-bit and rolled variants of
#: the latitude/longitude grid differ from latlon_from_180 in their input or values only,
#: and take part in the longitude checks).
CLIENT_KINDS = [k for k in KINDS if k not in ("latlon_from_minus_180", "latlon_rolled")]


def wavy_step(path: Path, grid: gribgen.Grid, lead: int) -> Path:
    """One step on `grid`: the constant-lapse-rate column (docs/references.md "Check values") with
    waves in longitude: T + 3 K cos(lat) cos(lon), z + 80 m cos(lat) sin(lon) + 0.05 m per
    degree east of 0 E (so that no two columns of a parallel agree), u = 30 cos(lat) +
    3 sin(2 lon) m/s, v = 4 cos(lat) sin(lon) m/s, toward east and north, relative humidity
    60 + 20 cos(lat) sin(lon) %, mean sea-level pressure 1010 + 15 cos(lat) cos(lon) hPa;
    the waves move east 10 degrees per 6 h, so that a later step differs."""
    geo = gribgen.geometry(grid)
    lat = np.radians(geo.lat)
    east = np.mod(geo.lon + 10.0 * lead / 6.0, 360.0)
    lon = np.radians(east)
    msgs = []
    for lev in LEVELS:
        p = lev * 100.0
        t = gribgen.lapse_rate_temperature(p) + 3.0 * np.cos(lat) * np.cos(lon)
        z = (gribgen.lapse_rate_height(p) + 80.0 * np.cos(lat) * np.sin(lon)
             + 0.05 * np.mod(geo.lon, 360.0))
        u = 30.0 * np.cos(lat) + 3.0 * np.sin(2 * lon)
        v = 4.0 * np.cos(lat) * np.sin(lon)
        kw = dict(times=gribgen.Times(step=lead), centre=98, grid_relative=False,
                  packing="grid_simple", bits=24)
        rh = 60.0 + 20.0 * np.cos(lat) * np.sin(lon)
        for values, param in ((t, gribgen.PARAM_T), (z, gribgen.PARAM_GH), (u, gribgen.PARAM_U),
                              (v, gribgen.PARAM_V), (rh, gribgen.PARAM_RH)):
            msgs.append(gribgen.encode_field(grid, geo, values, param, lev, **kw))
    mslp = 101_000.0 + 1500.0 * np.cos(lat) * np.cos(lon)
    msgs.append(gribgen.encode_field(grid, geo, mslp, gribgen.PARAM_MSLP, 0, level_type=gribgen.LEVEL_MSL, **kw))
    path.write_bytes(b"".join(msgs))
    return path


def as_member(path: Path, number: int) -> None:
    """Make every message a forecast of ensemble member `number`: product definition
    template 4.1 (individual ensemble forecast), perturbation number `number` of 51
    (WMO-No. 306 code table 4.6 type 3, positively perturbed), set by ecCodes."""
    out = []
    for msg in _messages(path.read_bytes()):
        h = eccodes.codes_new_from_message(msg)
        try:
            eccodes.codes_set_long(h, "productDefinitionTemplateNumber", 1)
            eccodes.codes_set_long(h, "typeOfEnsembleForecast", 3)
            eccodes.codes_set_long(h, "perturbationNumber", number)
            eccodes.codes_set_long(h, "numberOfForecastsInEnsemble", 51)
            out.append(eccodes.codes_get_message(h))
        finally:
            eccodes.codes_release(h)
    path.write_bytes(b"".join(out))


def _messages(data: bytes):
    at = 0
    while (at := data.find(b"GRIB", at)) >= 0:
        total = int.from_bytes(data[at + 8:at + 16], "big")
        yield data[at:at + total]
        at += total


def negative_first_longitude(path: Path) -> None:
    """Rewrite section 3's first longitude (template 3.0, octets 51-54) of every message as
    -180 degrees in GRIB2's sign-and-magnitude form (WMO-No. 306, regulation 92.1.5): what
    some producers write, and what ecCodes cannot (it stores 180)."""
    data = bytearray(path.read_bytes())
    at = 0
    while True:
        at = data.find(b"GRIB", at)
        if at < 0:
            break
        total = int.from_bytes(data[at + 8:at + 16], "big")
        k = at + 16
        while k < at + total - 4:
            n = int.from_bytes(data[k:k + 4], "big")
            if data[k + 4] == 3:
                assert int.from_bytes(data[k + 12:k + 14], "big") == 0, "template 3.0 expected"
                assert int.from_bytes(data[k + 50:k + 54], "big") == 180_000_000
                data[k + 50:k + 54] = (0x8000_0000 | 180_000_000).to_bytes(4, "big")
            k += n
        at += total
    path.write_bytes(bytes(data))


@dataclasses.dataclass
class Made:
    name: str
    inputs: list
    file: Path  # the product checked
    stdout: str


@pytest.fixture(scope="module")
def made(leeward_bin, tmp_path_factory) -> dict[str, Made]:
    root = tmp_path_factory.mktemp("readers")
    out = {}
    for name, k in KINDS.items():
        d = root / name
        d.mkdir()
        inputs = [wavy_step(d / f"in_{lead:03d}.grib2", k.grid, lead) for lead in k.leads]
        for p in inputs:
            if k.patch_negative_lon:
                negative_first_longitude(p)
            if k.member is not None:
                as_member(p, k.member)
        cfg = None
        if k.config:
            cfg = d / "leeward.toml"
            cfg.write_text(k.config)
        run = run_leeward(leeward_bin, inputs, d / "out", name, config=cfg)
        assert run.returncode == 0, run.describe()
        files = run.nc_files
        assert len(files) == len(k.leads), run.describe()
        out[name] = Made(name, inputs, files[-1], run.stdout)
    return out


def _data_variables(ds) -> list[str]:
    """Names of the data variables: four dimensions (time, vertical, y, x), or three for a
    single-level field (time, y, x) (output contract, docs/output.md). Not chosen by their
    grid_mapping, so that one without it is checked."""
    return [n for n, v in ds.variables.items() if v.ndim in (3, 4)]


#: The single-level fields (time, y, x) the inputs below give (docs/output.md "Single-level
#: fields"): mean sea-level pressure from the input; mslp_chg_06h in the step with changes.
SINGLE_LEVEL = {"mslp"}
#: The fields of one isobaric layer (docs/output.md "Fields of a layer"), with their layer
#: (bottom, top; Pa) by the defaults of docs/configuration.md (cyclones.steering_layer_hpa,
#: eady_layer_hpa, low_pv_layer_hpa): each on the length-1 coordinate p_layer_<b>_<t>, its
#: middle as the value and the layer as its bounds (CF 1.11 section 7.1), as the thickness.
LAYER_FIELDS = {"steer_u": (85000.0, 50000.0), "steer_v": (85000.0, 50000.0),
                "eady": (85000.0, 50000.0), "low_pv": (90000.0, 70000.0)}
#: ... of which the means over the layer, said by cell_methods "<coordinate>: mean" (CF 1.11
#: section 7.3: a mean over a pressure cell weighs by mass).
LAYER_MEANS = {"steer_u", "steer_v", "low_pv"}


def _layer_coordinate(layer) -> str:
    """p_layer_<bottom>_<top> in hPa (docs/output.md)."""
    return "p_layer_{:g}_{:g}".format(layer[0] / 100.0, layer[1] / 100.0)


def test_cf_1_11_attributes(made):
    # CF 1.11 (and leeward's output contract, docs/output.md): bit rounding said by the CF
    # quantization container (section 8.4: algorithm bitround, quantization_nsb) and not by
    # an attribute of leeward's own; units_metadata on temperatures (3.1.3) and time (4.4.3);
    # axis Z on every vertical coordinate; the member as a realization coordinate (section
    # 5.7 scalar coordinate, standard name realization); angles written without a minus zero.
    for kind in CLIENT_KINDS:
        with netCDF4.Dataset(made[kind].file) as ds:
            q = ds["quantization_info"]
            assert (q.getncattr("algorithm"), q.ncattrs().count("implementation")) == ("bitround", 1)
            assert ds["time"].getncattr("units_metadata") == "leap_seconds: none"
            for n in _data_variables(ds):
                a = {k: ds[n].getncattr(k) for k in ds[n].ncattrs()}
                assert a.get("grid_mapping") == "crs", (kind, n, a.get("grid_mapping"))
                assert (a.get("quantization"), a.get("quantization_nsb")) == ("quantization_info", KEPT[table_name(n)]), (kind, n)
                assert not any(k.startswith("leeward_significant") for k in a), (kind, n)
                if a.get("units") == "K":
                    assert a.get("units_metadata") == "temperature: on_scale", (kind, n)
                if ds[n].ndim == 4:
                    vdim = ds[n].dimensions[1]
                    assert ds[vdim].getncattr("axis") == "Z", (kind, n, vdim)
                coords = a["coordinates"].split()
                assert ("realization" in coords) == (kind == "ensemble_member"), (kind, n, coords)
            assert "leeward_member" not in ds.ncattrs()
            # The single-level fields: (time, y, x), no vertical dimension.
            flat = {n for n in _data_variables(ds) if ds[n].ndim == 3}
            assert SINGLE_LEVEL <= flat, (kind, sorted(flat))
            for n in flat:
                assert ds[n].dimensions[0] == "time" and ds[n].dimensions[1:] == ds["z"].dimensions[2:], (kind, n)
            # The fields of a layer: on the layer's own coordinate, the layer also said in
            # leeward_layer_hpa.
            for n, layer in LAYER_FIELDS.items():
                coord = _layer_coordinate(layer)
                assert ds[n].dimensions == ("time", coord) + ds["z"].dimensions[2:], (kind, n, ds[n].dimensions)
                assert ds[n].getncattr("leeward_layer_hpa") == "{:g}-{:g}".format(layer[0] / 100, layer[1] / 100)
            # Humidity in the input gives theta-e and humidity on isentropes.
            assert {"theta_e", "isen_rh", "isen_q"} <= set(_data_variables(ds)), kind
            if kind == "ensemble_member":
                r = ds["realization"]
                assert (r.getncattr("standard_name"), int(r[...])) == ("realization", 7)
            for name, value in {k: ds["crs"].getncattr(k) for k in ds["crs"].ncattrs()}.items():
                if isinstance(value, (float, np.floating)):
                    assert not (value == 0 and np.signbit(value)), f"{kind}: crs {name} is -0"


def test_the_budget_and_changes_are_in_the_file_checked(made):
    # The later step holds what the earlier one added to it (docs/output.md "Changes in
    # time", "PV budget"): the checks below then cover those variables too.
    with netCDF4.Dataset(made["changes_and_budget"].file) as ds:
        names = set(ds.variables)
        assert {"bud_dpvdt", "bud_zeta", "bud_stretch", "mslp_chg_06h"} <= names, sorted(names)
        assert any(n.startswith("thick_chg_06h_") for n in names), sorted(names)
        assert isinstance(ds["bud_dpvdt"].getncattr("leeward_budget_interval_h"), (float, np.floating))


# ---------------------------------------------------------------------------------------
# IOOS compliance checker, CF 1.11
# ---------------------------------------------------------------------------------------
def _exe(name):
    beside = Path(sys.executable).parent / name
    return str(beside) if beside.is_file() else shutil.which(name)


@pytest.fixture(scope="module")
def ioos_report(made, tmp_path_factory) -> dict:
    exe = _exe("compliance-checker")
    assert exe, "compliance-checker not installed (tests/python/requirements.txt)"
    files = [str(made[k].file) for k in CLIENT_KINDS]
    folder = tmp_path_factory.mktemp("ioos")
    procs = []
    for i in range(2):  # two cores
        out = folder / f"r{i}.json"
        procs.append((out, subprocess.Popen([exe, "--test=cf:1.11", "--format=json_new", "-o", str(out),
                                             *files[i::2]], stdout=subprocess.DEVNULL,
                                            stderr=subprocess.PIPE, text=True)))
    merged = {}
    for out, p in procs:
        _, err = p.communicate(timeout=600)
        assert out.is_file(), f"compliance-checker wrote no report (exit {p.returncode}): {err[-2000:]}"
        merged.update(json.loads(out.read_text()))
    return merged


@pytest.mark.parametrize("kind", CLIENT_KINDS)
def test_ioos_cf_1_11_no_high_or_medium(kind, made, ioos_report):
    import test_cf_output as cfo
    path = made[kind].file
    rep = ioos_report[str(path)]["cf:1.11"]
    failed = {pr: [(c["name"], c["msgs"]) for c in rep[pr] if c["value"][0] < c["value"][1]]
              for pr in ("high_priorities", "medium_priorities")}
    # compliance-checker 6.1.0's own table defect for mercator (one attribute asked per
    # character), recognised and checked in the file by test_cf_output._real_failures.
    failed = {pr: cfo._real_failures(path, f) for pr, f in failed.items()}
    assert failed == {"high_priorities": [], "medium_priorities": []}, f"{kind}: {failed}"


# ---------------------------------------------------------------------------------------
# NCAS CF checker, CF 1.8
# ---------------------------------------------------------------------------------------
#: What a CF 1.8 checker cannot judge in leeward's files (CF 1.9-1.11 features), said in
#: the summary: it passes them over as attributes or variables it does not know.
NOT_JUDGED_BY_CF_1_8 = (
    "units_metadata on temperatures and time (CF 1.11 sections 3.1.3 and 4.4.3)",
    "the quantization container and quantization_nsb (CF section 8.4, later than 1.8)",
    "the realization coordinate of ensemble members (standard name realization) as such",
)


def _tables(folder: Path):
    """The standard name table bundled with compliance-checker (the NCAS checker would
    fetch it from the web), and empty area-type and region tables: leeward's files use
    neither area_type nor region, which is all the checker reads those tables for."""
    import compliance_checker
    names = Path(compliance_checker.__file__).parent / "data" / "cf-standard-name-table.xml"
    empty = "<?xml version='1.0'?>\n<table><version_number>0</version_number><date>none</date></table>\n"
    (folder / "area.xml").write_text(empty)
    (folder / "region.xml").write_text(empty)
    return names, folder / "area.xml", folder / "region.xml"


@pytest.fixture(scope="module")
def ncas(made, tmp_path_factory):
    exe = _exe("cfchecks")
    if exe is None:
        pytest.skip("the NCAS CF checker (PyPI cfchecker) is not installed")
    folder = tmp_path_factory.mktemp("ncas")
    names, area, region = _tables(folder)
    copies = {}
    for kind in CLIENT_KINDS:
        m = made[kind]
        # The checker knows CF up to 1.8 and refuses a file that says CF-1.11: a copy
        # says CF-1.8.
        copy = folder / f"{kind}.nc"
        shutil.copy(m.file, copy)
        with netCDF4.Dataset(copy, "a") as ds:
            ds.Conventions = "CF-1.8"
        copies[kind] = copy
    # One run over every file: the checker reads its tables once.
    cp = subprocess.run([exe, "-v", "1.8", "-s", str(names), "-a", str(area), "-r", str(region),
                         *map(str, copies.values())], capture_output=True, text=True, timeout=900)
    text = cp.stdout + cp.stderr
    parts = text.split("CHECKING NetCDF FILE:")
    out = {}
    for kind, copy in copies.items():
        mine = [p for p in parts if p.strip().startswith(str(copy))]
        assert len(mine) == 1, f"no report for {copy.name} in the checker's output:\n{text[-3000:]}"
        out[kind] = mine[0]
    for note in NOT_JUDGED_BY_CF_1_8:
        FIGURES.append(f"NCAS cfchecks -v 1.8 cannot judge: {note}")
    return out


@pytest.mark.parametrize("kind", CLIENT_KINDS)
def test_ncas_cfchecks_1_8_no_error(kind, ncas):
    text = ncas[kind]
    assert "ERRORS detected: 0" in text, f"{kind}:\n" + "\n".join(
        ln for ln in text.splitlines() if "ERROR" in ln or "Checking variable" in ln)[-4000:]
    warns = sorted({ln.strip() for ln in text.splitlines() if ln.startswith("WARN")})
    for w in warns:
        FIGURES.append(f"NCAS cfchecks warning ({kind}): {w}")


# ---------------------------------------------------------------------------------------
# GDAL
# ---------------------------------------------------------------------------------------
SYSTEM_PYTHON = "/usr/bin/python3"


@pytest.fixture(scope="module")
def gdal_views(made):
    probe = subprocess.run([SYSTEM_PYTHON, "-c", "from osgeo import gdal; print(gdal.__version__)"],
                           capture_output=True, text=True) if Path(SYSTEM_PYTHON).exists() else None
    if probe is None or probe.returncode != 0:
        pytest.skip("GDAL's Python bindings (Debian python3-gdal) are not installed: "
                    "run tests/setup-system.sh as root")
    out = {}
    for kind in CLIENT_KINDS:
        m = made[kind]
        cp = subprocess.run([SYSTEM_PYTHON, str(HERE / "gdal_probe.py"), str(m.file), "z"],
                            capture_output=True, text=True, timeout=300)
        assert cp.returncode == 0, f"{kind}: gdal_probe failed:\n{cp.stderr[-3000:]}"
        out[kind] = json.loads(cp.stdout)
    FIGURES.append(f"GDAL {next(iter(out.values()))['gdal_version']} (Debian python3-gdal)")
    return out


@pytest.mark.parametrize("kind", CLIENT_KINDS)
def test_gdal_crs_and_placement(kind, gdal_views, made):
    v = gdal_views[kind]
    without = [n for n, wkt in v["crs"].items() if not wkt]
    assert v["crs"] and not without, f"{kind}: GDAL gives no CRS to {without}"
    worst = max(p["off_cells"] for p in v["points"])
    FIGURES.append(f"GDAL {kind}: pixel centres within {worst:.2e} grid cells of the file's coordinates")
    assert worst < 0.5, f"{kind}: GDAL places a pixel {worst:.2f} grid cells from the file's coordinates"
    wrong = [(p["file_lat"], p["file_lon"], p["value"], p["warped_value"]) for p in v["points"]
             if p["warped_value"] != p["value"]]
    assert not wrong, f"{kind}: warp to EPSG:4326 at the file's coordinates (lat, lon, source, warped): {wrong}"
    bad = [m for m in v["messages"] if "angle" in m.lower() or "longitude" in m.lower()]
    assert not bad, f"{kind}: GDAL says {bad}"
    # GDAL takes the units attribute as the band's unit type: the PV units among them.
    with netCDF4.Dataset(made[kind].file) as ds:
        differ = {n: (u, ds[n].getncattr("units")) for n, u in v["units"].items() if u != ds[n].getncattr("units")}
    assert not differ, f"{kind}: GDAL's units (GDAL, file) {differ}"


# ---------------------------------------------------------------------------------------
# Iris
# ---------------------------------------------------------------------------------------
@pytest.mark.parametrize("kind", CLIENT_KINDS)
def test_iris_loads_without_warnings(kind, made):
    iris = pytest.importorskip("iris", reason="Iris (PyPI scitools-iris) is not installed")
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        cubes = iris.load(str(made[kind].file))
    said = [f"{w.category.__name__}: {w.message}" for w in caught]
    assert not said, f"{kind}: Iris warns: {said}"
    with netCDF4.Dataset(made[kind].file) as ds:
        names = set(_data_variables(ds))
        single = {n for n in names if ds[n].ndim == 3}
    data = [c for c in cubes if c.var_name in names]
    assert {c.var_name for c in data} == names, f"{kind}: Iris did not load {names - {c.var_name for c in data}}"
    for c in data:
        assert c.coord_system() is not None, f"{kind}:{c.var_name}: no coordinate system"
        assert not c.units.is_unknown(), f"{kind}:{c.var_name}: units {c.units}"
        if c.var_name in single:
            continue  # a single-level field: its level is in its standard name or leeward_layer_hpa
        z = c.coords(axis="Z")
        assert z, f"{kind}:{c.var_name}: no vertical coordinate ({[x.name() for x in c.coords()]})"


# ---------------------------------------------------------------------------------------
# xarray with cf_xarray, and MetPy
# ---------------------------------------------------------------------------------------
@pytest.mark.parametrize("kind", CLIENT_KINDS)
def test_cf_xarray_finds_every_axis(kind, made):
    pytest.importorskip("cf_xarray", reason="cf_xarray (PyPI cf-xarray) is not installed")
    with xr.open_dataset(made[kind].file) as ds:
        # Single-level fields (time, y, x) have no Z.
        want = {4: {"X", "Y", "Z", "T"}, 3: {"X", "Y", "T"}}
        missing = {v: sorted(ds[v].cf.axes) for v in ds.data_vars if ds[v].ndim in want
                   and "grid_mapping" in ds[v].attrs and not want[ds[v].ndim] <= set(ds[v].cf.axes)}
    assert not missing, f"{kind}: axes found by cf_xarray {missing}"


@pytest.mark.parametrize("kind", CLIENT_KINDS)
def test_metpy_crs_units_and_vertical(kind, made):
    import metpy.xarray  # noqa: F401  (the .metpy accessor)
    problems = {}
    with xr.open_dataset(made[kind].file) as ds:
        parsed = ds.metpy.parse_cf()
        names = [v for v in parsed.data_vars if parsed[v].ndim in (3, 4)
                 and "grid_mapping" in ds[v].attrs]
        # Every variable gets the grid mapping as its metpy_crs; PROJ builds it once here
        # (building it costs most of a second and is the same for every variable).
        crs = parsed[names[0]].metpy.pyproj_crs
        for v in names:
            try:
                assert parsed[v].metpy.crs == parsed[names[0]].metpy.crs, "another CRS"
                parsed[v].metpy.units
                if parsed[v].ndim == 4:
                    parsed[v].metpy.vertical
                parsed[v].metpy.quantify()
            except Exception as e:  # noqa: BLE001  (any failure is the finding)
                problems[v] = f"{type(e).__name__}: {e}"
    assert crs is not None
    assert not problems, f"{kind}: MetPy: {problems}"


def test_pv_units_read_by_every_unit_library(made):
    # The PV units of the files (isen_pv, pv, pv_level; bud_dpvdt) read by pint as MetPy
    # reads a units attribute (parse_units), by cf_units (Iris) and by UDUNITS itself (the
    # udunits2 program, Debian udunits-bin); 1 PVU = 1e-6 K m2 kg-1 s-1 and 1 PVU per hour
    # = 1e-6/3600 K m2 kg-1 s-2 (Hoskins et al. 1985; docs/references.md "Constants"). The
    # former "1e-6 K m2 kg-1 s-1" is refused by pint, which the first assertion shows.
    from metpy.units import units as mu
    import cf_units
    with pytest.raises(Exception, match="scaling factor"):
        mu.parse_units("1e-6 K m2 kg-1 s-1")
    with netCDF4.Dataset(made["changes_and_budget"].file) as ds:
        found = {n: ds[n].getncattr("units") for n in ("isen_pv", "pv", "pv_level", "bud_dpvdt")}
    udunits = shutil.which("udunits2")
    for n, u in found.items():
        rate = n == "bud_dpvdt"
        want = 1e-6 / 3600.0 if rate else 1e-6
        one = 1e-6 * mu("K * m**2 / kg / s") / (mu.hour if rate else 1.0)
        assert abs(one.to(mu.parse_units(u)).magnitude / want - 1) < 1e-12, (n, u)
        scaled = "1e-6 K m2 kg-1 s-1" + (" h-1" if rate else "")
        assert abs(cf_units.Unit(scaled).convert(1.0, cf_units.Unit(u)) / want - 1) < 1e-12, (n, u)
        if udunits is None:
            FIGURES.append("UDUNITS program udunits2 not installed (Debian udunits-bin): its PV check skipped")
            continue
        cp = subprocess.run([udunits, "-H", scaled, "-W", u], capture_output=True, text=True, timeout=30)
        got = float(cp.stdout.split("=")[1].split()[0])
        assert abs(got / want - 1) < 1e-5, (n, u, cp.stdout)
    FIGURES.append(f"PV units read by pint, cf_units and UDUNITS: {sorted(set(found.values()))}")


# ---------------------------------------------------------------------------------------
# Thickness: every reader selects exactly one layer by its pressures
# ---------------------------------------------------------------------------------------
#: The configured isobaric layers (thickness.layers_hpa default, docs/configuration.md),
#: bottom and top in Pa: they overlap (1000-500 holds the other three).
LAYERS_PA = ((100000.0, 85000.0), (85000.0, 70000.0), (100000.0, 50000.0), (70000.0, 50000.0))
THICKNESS = "atmosphere_layer_thickness_expressed_as_geopotential_height_difference"


@pytest.mark.parametrize("kind", ["latlon_from_0", "lambert", "changes_and_budget"])
def test_each_thickness_layer_is_selected_by_its_pressures(kind, made):
    # CF 1.11 section 7.1 (cell boundaries): a layer is the cell its coordinate's bounds
    # give. Iris (a constraint on the air_pressure cell) and xarray with cf_xarray (the Z
    # coordinate's bounds) each find exactly one thickness of each layer, on a vertical
    # coordinate of that one layer, and its values are z(top) - z(bottom) of the file's own
    # geopotential height (the inputs have z on every level: the method's first branch,
    # docs/output.md "Thickness"), within the rounding of the three stored values.
    iris = pytest.importorskip("iris", reason="Iris (PyPI scitools-iris) is not installed")
    pytest.importorskip("cf_xarray", reason="cf_xarray (PyPI cf-xarray) is not installed")
    path = made[kind].file
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        cubes = iris.load(str(path), iris.Constraint(cube_func=lambda c: c.standard_name == THICKNESS))
    with xr.open_dataset(path) as ds:
        z = ds["z"].isel(time=0)
        by_xarray = {}
        for n in ds.data_vars:
            if ds[n].attrs.get("standard_name") != THICKNESS:
                continue
            zc = ds[n].cf["Z"]
            assert zc.size == 1, f"{kind}: {n} holds {zc.size} layers"
            b = tuple(float(x) for x in np.ravel(ds[zc.attrs["bounds"]].values))
            by_xarray.setdefault(b, []).append(n)
        worst = 0.0
        for bottom, top in LAYERS_PA:
            lay = (bottom, top)
            found = by_xarray.get(lay, [])
            assert len(found) == 1, f"{kind}: cf_xarray finds {found} for the layer {lay} (all: {by_xarray})"
            one = cubes.extract(iris.Constraint(air_pressure=lambda c, lay=lay: c.bound is not None
                                                and tuple(float(x) for x in c.bound) == lay))
            assert len(one) == 1, f"{kind}: Iris selects {[c.var_name for c in one]} for the layer {lay}"
            cube = one[0]
            assert cube.var_name == found[0], (kind, lay, cube.var_name, found)
            pz = cube.coord(axis="Z")
            assert pz.shape == (1,) and pz.points[0] == 0.5 * (bottom + top), (kind, lay, pz)
            zt, zb = (z.sel(pressure=p).values.astype(np.float64) for p in (top, bottom))
            got = np.asarray(cube.data, dtype=np.float64).reshape(zt.shape)
            want = zt - zb
            tol = (np.abs(want) + np.abs(zt) + np.abs(zb)) * ROUNDING + 1e-3
            assert np.all(np.isfinite(got)) and np.all(np.abs(got - want) <= tol), (
                f"{kind}: {cube.var_name} differs from z({top:g} Pa) - z({bottom:g} Pa) by up to "
                f"{np.nanmax(np.abs(got - want)):.3f} m")
            worst = max(worst, float(np.max(np.abs(got - want))))
    FIGURES.append(f"thickness {kind}: Iris and cf_xarray select each of {len(LAYERS_PA)} layers once by its "
                   f"bounds; largest |thick - (z_top - z_bottom)| {worst:.3f} m")


# ---------------------------------------------------------------------------------------
# Fields of a layer: every reader finds the layer each one describes
# ---------------------------------------------------------------------------------------
def _layer_problems_netcdf4(ds, n, layer) -> list:
    coord = _layer_coordinate(layer)
    c = ds[coord]
    a = {k: c.getncattr(k) for k in c.ncattrs()}
    out = []
    want = {"standard_name": "air_pressure", "units": "Pa", "positive": "down", "axis": "Z",
            "bounds": f"{coord}_bounds"}
    out += [f"netCDF4: {coord}.{k} = {a.get(k)!r}, want {v!r}" for k, v in want.items() if a.get(k) != v]
    if c[:].tolist() != [0.5 * (layer[0] + layer[1])]:
        out.append(f"netCDF4: {coord} = {c[:].tolist()}")
    if a.get("bounds") in ds.variables and ds[a["bounds"]][:].tolist() != [list(layer)]:
        out.append(f"netCDF4: {a['bounds']} = {ds[a['bounds']][:].tolist()}")
    cm = ds[n].getncattr("cell_methods") if "cell_methods" in ds[n].ncattrs() else None
    if (cm == f"{coord}: mean") != (n in LAYER_MEANS):
        out.append(f"netCDF4: cell_methods {cm!r}")
    return out


@pytest.mark.parametrize("kind", CLIENT_KINDS)
def test_each_layer_field_is_read_on_its_layer(kind, made):
    # CF 1.11 section 7.1 (cell boundaries): the layer a field describes (its bottom and top
    # pressures, docs/output.md "Fields of a layer") is the cell of its vertical coordinate.
    # netCDF4 (the file as written), xarray with cf_xarray (the Z coordinate and its bounds),
    # Iris (the cube's Z coordinate: its point, its bound, its units; the mean as a cell
    # method over it) and MetPy (.metpy.vertical) each find that layer, for each field.
    iris = pytest.importorskip("iris", reason="Iris (PyPI scitools-iris) is not installed")
    import metpy.xarray  # noqa: F401  (the .metpy accessor)
    pytest.importorskip("cf_xarray", reason="cf_xarray (PyPI cf-xarray) is not installed")  # the .cf accessor
    path = made[kind].file
    problems = {}
    with netCDF4.Dataset(path) as ds:
        for n, layer in LAYER_FIELDS.items():
            problems[n] = _layer_problems_netcdf4(ds, n, layer)
    with xr.open_dataset(path) as ds:
        parsed = ds.metpy.parse_cf(list(LAYER_FIELDS))
        for n, layer in LAYER_FIELDS.items():
            mid = 0.5 * (layer[0] + layer[1])
            zc = ds[n].cf["Z"]
            got = (zc.values.tolist(), np.asarray(ds.cf.get_bounds(zc.name)).tolist() if "bounds" in zc.attrs else None)
            if got != ([mid], [list(layer)]):
                problems[n].append(f"cf_xarray: Z {got}")
            mv = parsed[n].metpy.vertical
            if mv.values.tolist() != [mid]:
                problems[n].append(f"MetPy: vertical {mv.name} {mv.values.tolist()}")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        cubes = iris.load(str(path), iris.Constraint(cube_func=lambda c: c.var_name in LAYER_FIELDS))
    assert {c.var_name for c in cubes} == set(LAYER_FIELDS), (kind, [c.var_name for c in cubes])
    for c in cubes:
        layer = LAYER_FIELDS[c.var_name]
        z = c.coords(axis="Z")
        got = (z[0].points.tolist(), z[0].bounds.tolist() if z[0].has_bounds() else None, str(z[0].units)) if len(z) == 1 else z
        if got != ([0.5 * (layer[0] + layer[1])], [list(layer)], "Pa"):
            problems[c.var_name].append(f"Iris: Z {got}")
        means = [(m.method, m.coord_names) for m in c.cell_methods]
        if (means == [("mean", (z[0].name(),))]) != (c.var_name in LAYER_MEANS):
            problems[c.var_name].append(f"Iris: cell methods {means}")
    problems = {n: p for n, p in problems.items() if p}
    assert not problems, f"{kind}: {problems}"


@pytest.mark.parametrize("kind", CLIENT_KINDS)
def test_gdal_reads_each_layer_field_on_its_layer(kind, gdal_views):
    # GDAL's netCDF driver: the band's NETCDF_DIM_<coordinate> value is the layer's middle;
    # its multidimensional API finds the coordinate and, through its bounds attribute, the
    # layer's bottom and top.
    v = gdal_views[kind]["vertical"]
    wrong = {}
    for n, layer in LAYER_FIELDS.items():
        mid = 0.5 * (layer[0] + layer[1])
        want = dict(dim=_layer_coordinate(layer), band_value=mid, values=[mid], bounds=[list(layer)])
        if v.get(n) != want:
            wrong[n] = v.get(n)
    assert not wrong, f"{kind}: GDAL reads {wrong}"
    FIGURES.append(f"GDAL {kind}: {len(LAYER_FIELDS)} layer fields read on their layer with its bounds")


# ---------------------------------------------------------------------------------------
# Longitudes: one range, data where the coordinates say
# ---------------------------------------------------------------------------------------
#: Points (latitude, degrees east) that every global test grid has, on both sides of 0 and
#: of 180; the date-line grid has its own.
GLOBAL_POINTS = ((40.0, 10.0), (-30.0, 200.0), (0.0, 357.5), (60.0, 180.0), (-85.0, 0.0))
DATELINE_POINTS = ((40.0, 175.0), (30.0, 180.0), (50.0, 195.0), (20.0, 210.0))
#: Expected range and first longitude of each latitude/longitude kind.
RANGES = {"latlon_from_0": (0.0, 360.0), "latlon_from_180": (-180.0, 180.0),
          "latlon_from_minus_180": (-180.0, 180.0), "latlon_rolled": (-180.0, 180.0),
          "latlon_dateline": (170.0, 210.0 + 1e-9)}


def _ecCodes_z500(path, lat, east):
    """z at 500 hPa at (lat, degrees east) as ecCodes decodes the input."""
    for f in gribgen.read_fields(path):
        if (f["category"], f["number"]) == gribgen.PARAM_GH and f["level"] == 500:
            hit = np.isclose(f["lat"], lat, atol=1e-6) & np.isclose(np.mod(f["lon"], 360.0), east % 360.0, atol=1e-6)
            assert hit.sum() == 1, f"({lat}, {east}) not once in the input grid"
            return float(f["values"][hit][0])
    raise AssertionError("no z at 500 hPa in the input")


def _in_range(east, lo):
    return (east - lo) % 360.0 + lo


@pytest.mark.parametrize("kind", RANGES)
def test_longitudes_select_the_right_column(kind, made):
    iris = pytest.importorskip("iris", reason="Iris (PyPI scitools-iris) is not installed")
    m = made[kind]
    lo, hi = RANGES[kind]
    points = DATELINE_POINTS if kind == "latlon_dateline" else GLOBAL_POINTS
    with xr.open_dataset(m.file) as ds:
        lon = ds["lon"].values
        assert np.all(np.diff(lon) > 0), f"{kind}: longitudes not ascending"
        assert lon[0] >= lo - 1e-9 and lon[-1] < hi, f"{kind}: longitudes {lon[0]} .. {lon[-1]}, want [{lo}, {hi})"
        if kind != "latlon_dateline":
            assert lon[0] == lo, f"{kind}: first longitude {lon[0]}, want {lo}"
            # The symptom: a slice from 0 to 30 E selects the 13 columns there.
            assert ds["z"].sel(lon=slice(0, 30)).sizes["lon"] == 13
        z = ds["z"].isel(time=0).sel(pressure=50000.0)
        for lat, east in points:
            at = _in_range(east, lo)
            want = _ecCodes_z500(m.inputs[-1], lat, east)
            got = z.sel(lat=lat, lon=at, method="nearest").item()
            got_exact = z.sel(lat=lat, lon=at).item()
            assert got == got_exact
            assert abs(got - want) <= abs(want) * ROUNDING + 1e-3, (
                f"{kind}: z(500 hPa) at ({lat}, {at}) is {got}, ecCodes says {want} there")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        cube = iris.load_cube(str(m.file), iris.Constraint(cube_func=lambda c: c.var_name == "z"))
    for lat, east in points:
        at = _in_range(east, lo)
        one = cube.extract(iris.Constraint(air_pressure=50000.0, latitude=lat, longitude=at))
        assert one is not None and one.data.size == 1, f"{kind}: Iris finds no single point at ({lat}, {at})"
        want = _ecCodes_z500(m.inputs[-1], lat, east)
        assert abs(float(one.data.flat[0]) - want) <= abs(want) * ROUNDING + 1e-3, (kind, lat, at)
    FIGURES.append(f"longitudes {kind}: {lon[0]:g} .. {lon[-1]:g}; {len(points)} points by xarray .sel and "
                   "an Iris constraint equal ecCodes' values there")


def test_rolling_changes_nothing_but_the_order(made):
    # The same input written in [0, 360) (as the model writes it) and rolled into
    # [-180, 180) by output.longitudes: every variable, bit for bit, rolled by half the
    # grid; the periodic seam of the derivatives sees the same neighbours either way.
    a, b = made["latlon_from_0"].file, made["latlon_rolled"].file
    with netCDF4.Dataset(a) as da, netCDF4.Dataset(b) as db:
        names = _data_variables(da)
        assert sorted(names) == sorted(_data_variables(db))
        shift = int(np.flatnonzero(np.isclose(np.mod(db["lon"][:], 360.0), da["lon"][0]))[0])
        assert shift == 72
        differ = []
        for n in names:
            va, vb = da[n], db[n]
            va.set_auto_mask(False)
            vb.set_auto_mask(False)
            x, y = np.asarray(va[:]), np.roll(np.asarray(vb[:]), -shift, axis=-1)
            if x.tobytes() != y.tobytes():
                differ.append(f"{n} ({int(np.count_nonzero(x.view(np.uint32) != y.view(np.uint32)))} values)")
    assert not differ, f"rolled file differs beyond the roll in {differ}"
    FIGURES.append(f"longitudes: [0, 360) and rolled [-180, 180) files agree bit for bit in {len(names)} variables")


# ---------------------------------------------------------------------------------------
# Real samples: the ECMWF layout (first column at 180) and an input that fills nothing
# ---------------------------------------------------------------------------------------
ECMWF_SAMPLE = "ecmwf-0p4-2024010100-ccsds-10msgs.grib2"
CMC_1HPA_SAMPLE = "cmc-global-0p24-jpeg2000-t1hpa.grib2"


def test_ecmwf_sample_longitudes_select_correctly(leeward_bin, samples_dir, tmp_path):
    iris = pytest.importorskip("iris", reason="Iris (PyPI scitools-iris) is not installed")
    src = samples_dir / ECMWF_SAMPLE
    if not src.is_file():
        pytest.skip(f"{ECMWF_SAMPLE} absent from {samples_dir}")
    run = run_leeward(leeward_bin, [src], tmp_path / "out", "ecmwf")
    assert run.returncode in (0, 3) and len(run.nc_files) == 1, run.describe()
    fields = [f for f in gribgen.read_fields(src) if (f["category"], f["number"]) == gribgen.PARAM_GH
              and f["level_type"] == 100]
    assert fields, "no geopotential height in the sample"
    f = fields[0]
    with xr.open_dataset(run.nc_files[0]) as ds:
        lon = ds["lon"].values
        assert lon[0] == -180.0 and lon[-1] < 180.0 and np.all(np.diff(lon) > 0), (lon[0], lon[-1])
        z = ds["z"].isel(time=0).sel(pressure=float(f["level"]) * 100.0)
        for lat, east in ((50.0, 10.0), (-33.6, 151.2), (0.0, 180.0), (64.0, 338.0)):
            hit = np.isclose(f["lat"], lat, atol=1e-6) & np.isclose(np.mod(f["lon"], 360.0), east, atol=1e-6)
            assert hit.sum() == 1, (lat, east)
            want = float(f["values"][hit][0])
            got = z.sel(lat=lat, lon=_in_range(east, -180.0), method="nearest").item()
            assert abs(got - want) <= abs(want) * ROUNDING + 1e-3, f"({lat}, {east}): {got}, ecCodes {want}"
        assert ds["z"].sel(lon=slice(0, 30)).sizes["lon"] == 76
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        cube = iris.load_cube(str(run.nc_files[0]), iris.Constraint(cube_func=lambda c: c.var_name == "z"))
    part = cube.extract(iris.Constraint(longitude=lambda c: 0.0 <= c <= 10.0))
    assert part is not None and part.coord("longitude").shape == (26,)
    FIGURES.append("ECMWF sample: longitudes -180 .. 179.6; xarray and Iris select 0-10 E and four points right")


def test_a_variable_without_any_value_is_left_out_and_said(leeward_bin, samples_dir, tmp_path):
    # One isobaric level (1 hPa) cannot bracket an isentropic surface nor give a vertical
    # derivative: isen_p, isen_t, stab and n2 have no valid point and are left out, and the
    # step line and the log say so (docs/output.md "Variables left out").
    src = samples_dir / CMC_1HPA_SAMPLE
    if not src.is_file():
        pytest.skip(f"{CMC_1HPA_SAMPLE} absent from {samples_dir}")
    run = run_leeward(leeward_bin, [src], tmp_path / "out", "cmc1hpa")
    assert run.returncode in (0, 3) and len(run.nc_files) == 1, run.describe()
    with netCDF4.Dataset(run.nc_files[0]) as ds:
        names = set(_data_variables(ds))
        assert "theta" in names, sorted(names)
        for n in names:
            v = ds[n]
            assert np.ma.count(v[:]) > 0, f"{n} is written without a valid point"
    left = [ln for ln in run.stdout.splitlines() if ln.strip().startswith("left out:")]
    assert left, run.stdout
    for n in ("isen_p", "isen_t", "stab", "n2"):
        assert n not in names, f"{n} written though empty"
        assert f"{n}: every point is missing" in left[0], left[0]
        assert f'variable="{n}"' in run.stderr or f"variable={n}" in run.stderr, run.stderr[-2000:]
