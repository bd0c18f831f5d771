"""CF conformance of every NetCDF file leeward writes in the closed-form and real-data runs.

Outside references: the IOOS compliance checker (PyPI compliance-checker, CF 1.11 suite with
its bundled standard name table), netCDF4-python and xarray as a downstream reader opens the
files, pyproj's CRS.from_cf for the grid mapping (CF 1.10 section 5.6 and appendix F), and
ecCodes for the geography of the GRIB input.
"""

from __future__ import annotations

import datetime as dt
import functools
import json
import re
import shutil
from pathlib import Path
import sys
import subprocess

import pyproj  # first: PROJ before ecCodes in this process
import eccodes
import netCDF4
import numpy as np
import pytest
import xarray as xr

import gribgen
from conftest import FIGURES, REAL_SAMPLES, single_product
from ncproducts import NC_FILL_FLOAT, align_to_product, read_product

CASES = gribgen.closed_form_cases()
PRODUCTS = [("closed", n) for n in CASES] + [("real", n) for n in REAL_SAMPLES]
IDS = [f"{k}-{n}" for k, n in PRODUCTS]

#: CF grid_mapping_name for each ecCodes gridType (CF 1.10 appendix F).
GRID_MAPPING = {
    "regular_ll": "latitude_longitude",
    "regular_gg": "latitude_longitude",
    "rotated_ll": "rotated_latitude_longitude",
    "mercator": "mercator",
    "polar_stereographic": "polar_stereographic",
    "lambert": "lambert_conformal_conic",
}
#: Centre short names in file names (output contract); WMO common code table C-11 numbers.
#: leeward's short centre names (docs/output.md); numbers from WMO common code table C-11.
CENTRE_NAMES = {7: "ncep", 54: "cmc", 98: "ecmwf", 74: "ukmo", 78: "dwd", 34: "jma", 85: "mfr"}

#: Data variables: (units, standard_name or None) from the output contract; the standard
#: names are those of the CF Standard Name Table (docs/references.md).
DATA_VARS = {
    "zeta": ("s-1", "atmosphere_upward_relative_vorticity"),
    "eta": ("s-1", "atmosphere_upward_absolute_vorticity"),
    "theta": ("K", "air_potential_temperature"),
    "stab": ("K Pa-1", None),
    "n2": ("s-2", "square_of_brunt_vaisala_frequency_in_air"),
}

#: The isentropic family: name -> (units, standard_name or None, vertical dimension), from the
#: output contract; standard names and canonical units from the CF Standard Name Table
#: (docs/references.md: ertel_potential_vorticity, potential_vorticity_of_atmosphere_layer,
#: dynamic_tropopause_potential_temperature, air_pressure, geopotential_height, ...). "U"
#: and "V" stand for the wind names, which follow the input's flag table 3.3 bit 5.
#: PV in the CF canonical units of ertel_potential_vorticity (CF Standard Name Table); a
#: PVU is 1e-6 of them (Hoskins et al. 1985; docs/references.md "Constants").
PVU_UNITS = "K m2 kg-1 s-1"
ISEN_VARS = {
    "isen_p": ("Pa", "air_pressure", "theta_level"),
    "isen_z": ("m", "geopotential_height", "theta_level"),
    "isen_t": ("K", "air_temperature", "theta_level"),
    "isen_u": ("m s-1", "U", "theta_level"),
    "isen_v": ("m s-1", "V", "theta_level"),
    "isen_m": ("m2 s-2", None, "theta_level"),
    "isen_pv": (PVU_UNITS, "ertel_potential_vorticity", "theta_level"),
    "pv": (PVU_UNITS, "ertel_potential_vorticity", "pressure"),
    "trop_p": ("Pa", "air_pressure", "pv_level"),
    "trop_theta": ("K", "dynamic_tropopause_potential_temperature", "pv_level"),
    "trop_z": ("m", "geopotential_height", "pv_level"),
    "trop_u": ("m s-1", "U", "pv_level"),
    "trop_v": ("m s-1", "V", "pv_level"),
    "layer_pv": ("Pa-1 s-1", "potential_vorticity_of_atmosphere_layer", "theta_layer"),
    "layer_dp": ("Pa", None, "theta_layer"),
}
#: CF standard names of wind components (CF Standard Name Table): along east/north, or
#: along the grid's x/y axes when GRIB2 flag table 3.3 bit 5 says the input's are.
WIND_NAMES = {False: {"U": "eastward_wind", "V": "northward_wind"},
              True: {"U": "x_wind", "V": "y_wind"}}


#: Concurrent compliance-checker processes (the machines running this suite have 2 cores).
COMPLIANCE_PROCESSES = 2


def _run_for(request, kind, name):
    runs = request.getfixturevalue("closed_form_runs" if kind == "closed" else "real_runs")
    return runs.get(name)


def _input_for(request, kind, name):
    if kind == "closed":
        return request.getfixturevalue("closed_form_inputs")[name]
    return request.getfixturevalue("samples_dir") / REAL_SAMPLES[name]


def _is_isobaric_u(h):
    return (eccodes.codes_get_long(h, "discipline") == 0
            and eccodes.codes_get_long(h, "typeOfFirstFixedSurface") == 100
            and (eccodes.codes_get_long(h, "parameterCategory"),
                 eccodes.codes_get_long(h, "parameterNumber")) == gribgen.PARAM_U)


@functools.lru_cache(maxsize=None)
def _first_field(path):
    """The first isobaric u field of an input: its grid and times describe the product
    (read once per input)."""
    f = gribgen.first_field(path, _is_isobaric_u)
    assert f is not None, f"{path}: no isobaric u field"
    return f


def _products(request, kind, name):
    run = _run_for(request, kind, name)
    ok = (0,) if kind == "closed" else (0, 3)  # exit codes of the contract
    assert run.returncode in ok, run.describe()
    assert run.nc_files, f"no .nc written\n{run.describe()}"
    return run, run.nc_files


# ---------------------------------------------------------------------------------------
# Structure as the contract states it, read with netCDF4-python
# ---------------------------------------------------------------------------------------
def _attrs(var):
    return {k: var.getncattr(k) for k in var.ncattrs()}


def _expected_radius(f):
    """Sphere radius from GRIB2 code table 3.2 of the input (WMO-No. 306)."""
    soe = f["shape_of_earth"]
    if soe == 6:
        return gribgen.RADIUS_SHAPE_6
    if soe == 0:
        return gribgen.RADIUS_SHAPE_0
    if soe == 1:
        grid = gribgen.closed_form_grids()["latlon_given_radius"]
        return grid.radius
    raise AssertionError(f"shape of earth {soe} not expected in these inputs")


@pytest.mark.parametrize("kind,name", PRODUCTS, ids=IDS)
def test_netcdf_structure(kind, name, request):
    run, files = _products(request, kind, name)
    path = single_product(run)
    field = _first_field(_input_for(request, kind, name))
    with netCDF4.Dataset(path) as ds:
        # Global attributes: CF 1.10 section 2.6 (Conventions, title, institution, source,
        # history, references); the masking note is leeward's output contract.
        g = {k: ds.getncattr(k) for k in ds.ncattrs()}
        assert g.get("Conventions") == "CF-1.11"
        for key in ("title", "institution", "source", "history", "references",
                    "leeward_below_ground_masking"):
            assert isinstance(g.get(key), str) and g[key].strip(), f"global attribute {key} missing or empty"
        if kind == "closed":  # no surface pressure or orography in these inputs
            assert g["leeward_below_ground_masking"].startswith("none"), g["leeward_below_ground_masking"]

        # Time: CF 1.10 section 4.4 (units "hours since", calendar), standard names time,
        # forecast_reference_time, forecast_period (CF Standard Name Table).
        assert ds.dimensions["time"].size == 1
        t = ds["time"]
        ta = _attrs(t)
        assert t.dtype == np.float64 and t.dimensions == ("time",)
        assert ta.get("units", "").startswith("hours since ")
        assert ta.get("standard_name") == "time" and ta.get("axis") == "T"
        assert ta.get("calendar") == "proleptic_gregorian"
        rt, lt = ds["reference_time"], ds["lead_time"]
        assert rt.dimensions == () and lt.dimensions == ()
        assert _attrs(rt).get("standard_name") == "forecast_reference_time"
        assert _attrs(rt).get("units", "").startswith("hours since ")
        assert _attrs(lt).get("standard_name") == "forecast_period"
        assert _attrs(lt).get("units") == "hours"

        # Vertical: CF 1.10 section 4.3, air_pressure in Pa, positive down.
        pr = ds["pressure"]
        pa = _attrs(pr)
        assert pr.dtype == np.float64 and pr.dimensions == ("pressure",)
        assert (pa.get("units"), pa.get("standard_name"), pa.get("positive"), pa.get("axis")) == (
            "Pa", "air_pressure", "down", "Z")

        # Storage: every data variable is declared as leeward packs its chunks (one
        # level per chunk, shuffle then deflate at the configured level 1), and libnetcdf
        # reads every level back (the chunks are written directly, not by libnetcdf).
        data_vars = [v for v in ds.variables.values() if v.ndim == 4]
        assert data_vars
        for v in data_vars:
            f = v.filters()
            assert f["zlib"] and f["shuffle"] and f["complevel"] == 1, (v.name, f)
            assert v.chunking() == [1, 1, *v.shape[2:]], (v.name, v.chunking())
            vals = v[:]
            assert vals.shape == v.shape
            assert np.isfinite(np.ma.compressed(vals)).all(), v.name

        # Horizontal: CF 1.10 sections 4.1, 4.2 (latitude/longitude), 5.2 (2-D auxiliary
        # coordinates), 5.6 and appendix F (projection and rotated-pole coordinates).
        gt = field["grid_type"]
        if gt in ("regular_ll", "regular_gg"):
            hdims = ("lat", "lon")
            assert ds["lat"].dimensions == ("lat",) and ds["lon"].dimensions == ("lon",)
            assert (_attrs(ds["lat"]).get("units"), _attrs(ds["lat"]).get("standard_name")) == (
                "degrees_north", "latitude")
            assert (_attrs(ds["lon"]).get("units"), _attrs(ds["lon"]).get("standard_name")) == (
                "degrees_east", "longitude")
            aux = ()
        elif gt == "rotated_ll":
            hdims = ("rlat", "rlon")
            assert (_attrs(ds["rlat"]).get("standard_name"), _attrs(ds["rlat"]).get("units")) == (
                "grid_latitude", "degrees")
            assert (_attrs(ds["rlon"]).get("standard_name"), _attrs(ds["rlon"]).get("units")) == (
                "grid_longitude", "degrees")
            aux = ("lat", "lon")
        else:
            hdims = ("y", "x")
            assert (_attrs(ds["x"]).get("standard_name"), _attrs(ds["x"]).get("units")) == (
                "projection_x_coordinate", "m")
            assert (_attrs(ds["y"]).get("standard_name"), _attrs(ds["y"]).get("units")) == (
                "projection_y_coordinate", "m")
            aux = ("lat", "lon")
        for a in aux:
            assert ds[a].dimensions == hdims, f"{a} dims {ds[a].dimensions}"
        assert (ds.dimensions[hdims[0]].size, ds.dimensions[hdims[1]].size) == (field["nj"], field["ni"])

        # Grid mapping: CF 1.10 appendix F; the sphere from GRIB2 code table 3.2 of the input.
        crs = ds["crs"]
        assert crs.dimensions == () and np.issubdtype(crs.dtype, np.integer)
        ca = _attrs(crs)
        assert ca.get("grid_mapping_name") == GRID_MAPPING[gt]
        radius = _expected_radius(field)
        got_r = ca.get("earth_radius", ca.get("semi_major_axis"))
        assert got_r is not None, f"crs has no earth shape: {ca}"
        assert abs(float(got_r) - radius) < 0.5, f"earth radius {got_r}, GRIB code table 3.2 says {radius}"
        if "semi_minor_axis" in ca:
            assert abs(float(ca["semi_minor_axis"]) - radius) < 0.5

        # Data variables: float32, units and CF standard names (docs/references.md), netCDF
        # default float fill as _FillValue, grid_mapping and coordinates (CF 1.10 5.6, 5).
        for v, (units, sn) in DATA_VARS.items():
            assert v in ds.variables, f"data variable {v} missing"
            var = ds[v]
            va = _attrs(var)
            assert var.dtype == np.float32
            assert var.dimensions == ("time", "pressure", *hdims)
            assert np.float32(va.get("_FillValue")) == np.float32(NC_FILL_FLOAT), va.get("_FillValue")
            assert va.get("units") == units, f"{v} units {va.get('units')}"
            if sn:
                assert va.get("standard_name") == sn
            else:
                assert "standard_name" not in va and va.get("long_name"), f"{v}: {va}"
            assert va.get("grid_mapping") == "crs"
            coords = str(va.get("coordinates", "")).split()
            for c in ("reference_time", "lead_time", *aux):
                assert c in coords, f"{v}: coordinates {coords} lack {c}"
            var.set_auto_mask(False)
            raw = var[:]
            assert not np.isnan(raw).any(), f"{v}: NaN in the file (missing must be the fill value)"

        _check_isentropic_structure(ds, hdims, aux, field, left_out(run))


def left_out(run) -> set:
    """Variables the step line says were left out for want of any valid point (output
    contract, docs/output.md "Variables left out")."""
    out = set()
    for ln in run.stdout.splitlines():
        if ln.strip().startswith("left out:"):
            for part in ln.strip()[len("left out:"):].split(";"):
                name, sep, why = part.strip().partition(": ")
                assert sep and why.startswith("every point is missing"), part
                out.add(name)
    return out


def _check_isentropic_structure(ds, hdims, aux, field, left=frozenset()):
    """Coordinates and data variables of the isentropic family (output contract; CF 1.10
    sections 4.3 vertical coordinates and 7.1 cell boundaries; CF Standard Name Table)."""
    # Isentropic surfaces: air_potential_temperature in K, positive up, axis Z (CF 4.3;
    # docs/references.md "CF output shape").
    tl = ds["theta_level"]
    ta = _attrs(tl)
    assert tl.dtype == np.float64 and tl.dimensions == ("theta_level",)
    assert (ta.get("units"), ta.get("standard_name"), ta.get("positive"), ta.get("axis")) == (
        "K", "air_potential_temperature", "up", "Z"), ta
    assert np.all(np.diff(tl[:]) > 0), f"theta_level not increasing: {tl[:]}"
    # PV surfaces: ertel_potential_vorticity in SI units, axis Z, with a comment on the
    # hemispheric sign. (Where no column crosses the surface, as over the tropical
    # Pacific, every trop_* variable is left out, and so is the coordinate.)
    on_pv = [v for v, (_, _, d) in ISEN_VARS.items() if d == "pv_level"]
    if all(v in left for v in on_pv):
        assert "pv_level" not in ds.variables
        return _check_isentropic_variables(ds, hdims, aux, field, left)
    pl = ds["pv_level"]
    pla = _attrs(pl)
    assert pl.dtype == np.float64 and pl.dimensions == ("pv_level",)
    assert (pla.get("units"), pla.get("standard_name"), pla.get("axis")) == (
        PVU_UNITS, "ertel_potential_vorticity", "Z"), pla
    assert isinstance(pla.get("comment"), str) and pla["comment"].strip(), f"pv_level has no comment: {pla}"
    # Isentropic layers: mid values with bounds (CF 7.1), bounds (theta_layer, nv), nv = 2,
    # bottom below top.
    ly = ds["theta_layer"]
    la = _attrs(ly)
    assert ly.dtype == np.float64 and ly.dimensions == ("theta_layer",)
    assert la.get("units") == "K", la
    if "standard_name" in la:
        assert la["standard_name"] == "air_potential_temperature", la
    assert la.get("bounds") == "theta_layer_bounds", la
    b = ds["theta_layer_bounds"]
    assert b.dimensions == ("theta_layer", "nv") and ds.dimensions["nv"].size == 2, b.dimensions
    assert np.issubdtype(b.dtype, np.floating)
    bv = np.asarray(b[:], dtype=float)
    assert np.all(bv[:, 0] < bv[:, 1]), f"layer bounds not bottom < top: {bv}"
    np.testing.assert_allclose(np.asarray(ly[:], dtype=float), bv.mean(axis=1), rtol=0, atol=1e-9)
    _check_isentropic_variables(ds, hdims, aux, field, left)


def _check_isentropic_variables(ds, hdims, aux, field, left):
    # Data variables: float32, dims (time, vertical, y, x), fill value, units, standard
    # names (wind names as the input's flag table 3.3 bit 5 says), grid mapping, coordinates.
    winds = WIND_NAMES[bool(field["uv_relative"])]
    for v, (units, sn, vdim) in ISEN_VARS.items():
        if v in left:
            assert v not in ds.variables, f"{v} said left out but written"
            continue
        assert v in ds.variables, f"data variable {v} missing (isentropic family)"
        var = ds[v]
        va = _attrs(var)
        assert var.dtype == np.float32, f"{v}: {var.dtype}"
        assert var.dimensions == ("time", vdim, *hdims), f"{v}: dims {var.dimensions}"
        assert np.float32(va.get("_FillValue")) == np.float32(NC_FILL_FLOAT), f"{v}: {va.get('_FillValue')}"
        assert va.get("units") == units, f"{v} units {va.get('units')}, contract says {units}"
        sn = winds.get(sn, sn)
        if sn:
            assert va.get("standard_name") == sn, f"{v} standard_name {va.get('standard_name')}, want {sn}"
        else:
            assert "standard_name" not in va and va.get("long_name"), f"{v}: {va}"
        assert va.get("grid_mapping") == "crs", f"{v}: grid_mapping {va.get('grid_mapping')}"
        coords = str(va.get("coordinates", "")).split()
        for c in ("reference_time", "lead_time", *aux):
            assert c in coords, f"{v}: coordinates {coords} lack {c}"
        var.set_auto_mask(False)
        raw = var[:]
        assert not np.isnan(raw).any(), f"{v}: NaN in the file (missing must be the fill value)"


@pytest.mark.parametrize("kind,name", PRODUCTS, ids=IDS)
def test_file_name(kind, name, request):
    # Output contract: {centre}_{YYYYMMDD}T{HHMM}Z_{HHH}h.nc, centre 7 ncep, 54 cmc,
    # 98 ecmwf, ... (docs/output.md), else c{number}; values from ecCodes' reading of the input.
    run, _ = _products(request, kind, name)
    f = _first_field(_input_for(request, kind, name))
    centre = CENTRE_NAMES.get(f["centre"], f"c{f['centre']}")
    want = f"{centre}_{f['date']:08d}T{f['time']:04d}Z_{f['step']:03d}h.nc"
    assert [p.name for p in run.nc_files] == [want]


@pytest.mark.parametrize("kind,name", PRODUCTS, ids=IDS)
def test_xarray_decodes_times(kind, name, request):
    # xarray decodes CF times as a downstream reader would; time = reference_time +
    # lead_time, both as the GRIB input says (ecCodes).
    run, _ = _products(request, kind, name)
    f = _first_field(_input_for(request, kind, name))
    with xr.open_dataset(single_product(run), decode_timedelta=True) as ds:
        t = ds["time"].values
        assert np.issubdtype(t.dtype, np.datetime64), t.dtype
        ref = ds["reference_time"].values
        lead = ds["lead_time"].values
        assert np.issubdtype(lead.dtype, np.timedelta64), lead.dtype
        assert t[0] == ref + lead
        d, hm = f["date"], f["time"]
        want_ref = np.datetime64(dt.datetime(d // 10000, d // 100 % 100, d % 100, hm // 100, hm % 100))
        assert ref == want_ref, f"reference time {ref}, GRIB says {want_ref}"
        assert lead == np.timedelta64(f["step"], "h"), f"lead time {lead}, GRIB says {f['step']} h"
        for v in (*DATA_VARS, *ISEN_VARS):
            if v in ds.variables or v not in left_out(_run_for(request, kind, name)):
                assert ds[v].dtype == np.float32, v  # decoded with the fill value masked as NaN
        # The layer coordinate's bounds as xarray finds them (CF 7.1).
        lay = ds["theta_layer"]
        bname = lay.attrs.get("bounds", lay.encoding.get("bounds"))
        assert bname == "theta_layer_bounds" and bname in ds.variables, (lay.attrs, lay.encoding)
        assert ds[bname].shape == (lay.size, 2)


@pytest.mark.parametrize("kind,name", PRODUCTS, ids=IDS)
def test_geography_matches_ecCodes(kind, name, request):
    # Latitudes and longitudes of the file against ecCodes' own geometry of the input,
    # within 1e-4 degree (after re-ordering rows/columns south to north, west to east).
    run, _ = _products(request, kind, name)
    f = _first_field(_input_for(request, kind, name))
    prod = read_product(single_product(run))
    align_to_product(prod, f["lat"], f["lon"], tol_deg=1e-4)


def _geographic(crs: pyproj.CRS) -> pyproj.CRS:
    e = crs.ellipsoid
    return pyproj.CRS.from_proj4(f"+proj=longlat +a={e.semi_major_metre} +b={e.semi_minor_metre} +no_defs")


@pytest.mark.parametrize("kind,name", PRODUCTS, ids=IDS)
def test_grid_mapping_reproduces_coordinates(kind, name, request):
    # pyproj.CRS.from_cf(attributes of crs) (CF 1.10 appendix F, as PROJ reads it) must
    # give back the file's own 2-D latitudes and longitudes from its x/y (rlon/rlat),
    # within 1e-4 degree; on lat/lon grids the CRS must be geographic with the right sphere.
    run, _ = _products(request, kind, name)
    path = single_product(run)
    with netCDF4.Dataset(path) as ds:
        attrs = _attrs(ds["crs"])
        crs = pyproj.CRS.from_cf(attrs)
        lat = np.ma.filled(ds["lat"][:].astype(float), np.nan)
        lon = np.ma.filled(ds["lon"][:].astype(float), np.nan)
        if "x" in ds.dimensions:
            xs, ys = ds["x"][:].astype(float), ds["y"][:].astype(float)
            fwd_tol = 11.0  # metres, about 1e-4 degree
        elif "rlat" in ds.dimensions:
            xs, ys = ds["rlon"][:].astype(float), ds["rlat"][:].astype(float)
            fwd_tol = 1e-4  # degrees of the rotated sphere
        else:
            assert crs.is_geographic, crs
            field = _first_field(_input_for(request, kind, name))
            assert abs(crs.ellipsoid.semi_major_metre - _expected_radius(field)) < 0.5
            return
    xx, yy = np.meshgrid(xs, ys)
    geo = _geographic(crs)
    inv = pyproj.Transformer.from_crs(crs, geo, always_xy=True)
    lo, la = (np.asarray(v) for v in inv.transform(xx, yy))
    dlat = np.nanmax(np.abs(la - lat))
    away = np.abs(lat) < 89.99
    dlon = np.nanmax(np.abs((lo - lon + 180.0) % 360.0 - 180.0)[away])
    assert dlat <= 1e-4 and dlon <= 1e-4, (
        f"{path.name}: CRS.from_cf({attrs}) maps x/y to lat/lon off by {dlat:.2e} / {dlon:.2e} degree")
    # and forward: the file's lat/lon -> its x/y (rlon/rlat)
    fwd = pyproj.Transformer.from_crs(geo, crs, always_xy=True)
    x2, y2 = (np.asarray(v) for v in fwd.transform(lon, lat))
    dx = np.nanmax(np.abs(x2 - xx)) if fwd_tol > 1 else np.nanmax(np.abs((x2 - xx + 180) % 360 - 180))
    dy = np.nanmax(np.abs(y2 - yy))
    assert dx <= fwd_tol and dy <= fwd_tol, f"{path.name}: lat/lon -> x/y off by {dx:.3g}, {dy:.3g}"


# ---------------------------------------------------------------------------------------
# IOOS compliance checker over every file (started first, checked last)
# ---------------------------------------------------------------------------------------
class _ComplianceRuns:
    """compliance-checker runs started in the background on every product file, so that
    the module's other checks go on meanwhile; report() waits for them and merges their
    JSON reports (path -> results)."""

    def __init__(self, exe, files, folder):
        # --format=json_new: the checker's JSON form for several datasets in one report.
        # Its time grows with the number of variables in a file (about 3 s a file here),
        # so the files are shared between COMPLIANCE_PROCESSES runs at once.
        self.jobs = []
        for i in range(COMPLIANCE_PROCESSES):
            part = files[i::COMPLIANCE_PROCESSES]
            if not part:
                continue
            out = folder / f"report{i}.json"
            proc = subprocess.Popen([exe, "--test=cf:1.11", "--format=json_new", "-o", str(out), *map(str, part)],
                                    stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)
            self.jobs.append((proc, out))
        self._report = None

    def report(self) -> dict:
        if self._report is None:
            merged = {}
            for proc, out in self.jobs:
                try:
                    _, err = proc.communicate(timeout=600)
                except subprocess.TimeoutExpired:
                    proc.kill()
                    _, err = proc.communicate()
                assert out.is_file(), f"compliance-checker wrote no report (exit {proc.returncode}):\n{err[-3000:]}"
                merged.update(json.loads(out.read_text()))
            self._report = merged
        return self._report

    def stop(self):
        for proc, _ in self.jobs:
            if proc.poll() is None:
                proc.kill()
                proc.communicate()


@pytest.fixture(scope="module", autouse=True)
def compliance(request, closed_form_runs, tmp_path_factory):
    """Started before the first check of this module (autouse); the checker's own test
    comes last in the module and waits for it."""
    files = []
    for n in CASES:
        files += closed_form_runs.get(n).nc_files
    try:
        real = request.getfixturevalue("real_runs")
        for n in REAL_SAMPLES:
            files += real.get(n).nc_files
    except pytest.skip.Exception:
        pass  # the real-data products' own tests show the skip
    # The checker installed with this interpreter (the test venv), before any on PATH.
    beside = Path(sys.executable).parent / "compliance-checker"
    exe = str(beside) if beside.is_file() else shutil.which("compliance-checker")
    assert exe, "compliance-checker not installed (tests/python/requirements.txt)"
    runs = _ComplianceRuns(exe, files, tmp_path_factory.mktemp("compliance"))
    yield runs
    runs.stop()


def _checker_table_defects() -> dict:
    """Grid mappings whose required attributes the checker's own Appendix F table holds as
    a bare string instead of a tuple (compliance-checker 6.1.0 has ("longitude_of_projection_origin")
    for mercator): it then asks for one attribute per character. Returns name -> the
    attribute really meant."""
    try:
        from compliance_checker.cf.appendix_f import grid_mapping_dict17
    except ImportError:
        return {}
    return {k: v[0] for k, v in grid_mapping_dict17.items() if isinstance(v[0], str)}


_SPURIOUS = re.compile(r"^(.) is a required attribute for grid mapping (\S+)$")


def _real_failures(path, failed_checks):
    """Drop the checker's one-character messages that come from its table defect, after
    checking in the file that the attribute really meant is present."""
    defects = _checker_table_defects()
    out = []
    for name, msgs in failed_checks:
        keep = []
        for m in msgs:
            hit = _SPURIOUS.match(m)
            if hit and hit.group(2) in defects and hit.group(1) in defects[hit.group(2)]:
                with netCDF4.Dataset(path) as ds:
                    gm = {ds[v].getncattr("grid_mapping") for v in (*DATA_VARS, *ISEN_VARS) if v in ds.variables
                          and "grid_mapping" in ds[v].ncattrs()}
                    for g in gm:
                        assert defects[hit.group(2)] in ds[g].ncattrs(), (
                            f"{path.name}: grid mapping {g} lacks {defects[hit.group(2)]} (CF appendix F)")
                note = (f"compliance-checker defect ignored: its appendix F table asks {hit.group(2)} "
                        f"for one-character attributes; '{defects[hit.group(2)]}' checked present instead")
                if note not in FIGURES:
                    FIGURES.append(note)
                continue
            keep.append(m)
        if keep:
            out.append((name, keep))
    return out


@pytest.mark.parametrize("kind,name", PRODUCTS, ids=IDS)
def test_compliance_checker_cf111(kind, name, request, compliance):
    # IOOS compliance checker, CF 1.11 suite: no failed high-priority check; medium ones
    # are printed in the summary.
    _, files = _products(request, kind, name)
    for path in files:
        rep = compliance.report().get(str(path))
        assert rep is not None, f"no compliance report for {path.name}"
        cf = rep.get("cf:1.11")
        assert cf is not None, f"{path.name}: report has no cf:1.11 section: {list(rep)}"
        high = [(c["name"], c["msgs"]) for c in cf["high_priorities"]
                if c["value"][0] < c["value"][1]]
        medium = sorted({m for c in cf["medium_priorities"] if c["value"][0] < c["value"][1]
                         for m in c["msgs"]})
        for m in medium:
            note = f"compliance-checker medium: {m}"
            if note not in FIGURES:
                FIGURES.append(note)
        high = _real_failures(path, high)
        assert not high, f"{path.name}: high-priority CF failures: {high}"
