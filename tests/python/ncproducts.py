"""Reading leeward's NetCDF products for the checks, with netCDF4-python (Unidata).

Nothing here knows leeward's internals: it reads what the output contract promises
(dimensions, coordinate and data variable names, units) and returns plain numpy arrays
with missing values (the fill value) as NaN.
"""

from __future__ import annotations

import dataclasses
from pathlib import Path

import pyproj  # noqa: F401  (keep PROJ first in any process that also loads ecCodes)
import netCDF4
import numpy as np

#: netCDF default fill value for float (NC_FILL_FLOAT, netCDF User's Guide), the
#: contract's _FillValue for every data variable.
NC_FILL_FLOAT = 9.969209968386869e36

DATA_VARIABLES = ("zeta", "eta", "div", "theta", "stab", "n2")


@dataclasses.dataclass
class Product:
    path: Path
    kind: str  # "latlon", "projected" or "rotated" (from the horizontal dimensions)
    dims: tuple  # horizontal dimension names, (y, x)
    pressure: np.ndarray  # Pa, in file order
    lat: np.ndarray  # 2-D (y, x) in file order
    lon: np.ndarray
    fields: dict  # name -> array (npressure, ny, nx), NaN where missing
    attrs: dict  # global attributes


def _filled(var) -> np.ndarray:
    var.set_auto_mask(True)
    a = var[:]
    return np.ma.filled(np.ma.asarray(a).astype(np.float64), np.nan)


def read_product(path) -> Product:
    path = Path(path)
    with netCDF4.Dataset(path) as ds:
        dims = set(ds.dimensions)
        if {"lat", "lon"} <= dims:
            kind, hdims = "latlon", ("lat", "lon")
        elif {"y", "x"} <= dims:
            kind, hdims = "projected", ("y", "x")
        elif {"rlat", "rlon"} <= dims:
            kind, hdims = "rotated", ("rlat", "rlon")
        else:
            raise AssertionError(f"{path.name}: no horizontal dimensions of the contract in {sorted(dims)}")
        lat = _filled(ds["lat"])
        lon = _filled(ds["lon"])
        if lat.ndim == 1:
            lon, lat = np.meshgrid(lon, lat)
        fields = {}
        for name in DATA_VARIABLES:
            if name in ds.variables:
                v = ds[name]
                assert v.dimensions == ("time", "pressure", *hdims), (
                    f"{path.name}:{name} dims {v.dimensions}, contract says (time, pressure, {hdims})")
                fields[name] = _filled(v)[0]
        return Product(path, kind, hdims, _filled(ds["pressure"]), lat, lon, fields,
                       {k: ds.getncattr(k) for k in ds.ncattrs()})


def level_index(prod: Product, level_hpa: float) -> int:
    idx = np.flatnonzero(np.isclose(prod.pressure, level_hpa * 100.0, rtol=0, atol=1e-3))
    assert idx.size == 1, f"{prod.path.name}: pressure {level_hpa} hPa not (once) in {prod.pressure}"
    return int(idx[0])


def _lon_diff(a, b):
    return np.abs((np.asarray(a) - np.asarray(b) + 180.0) % 360.0 - 180.0)


def align_to_product(prod: Product, ref_lat, ref_lon, *arrays, tol_deg=1e-3):
    """Re-order reference arrays (file order of a GRIB field, shape (Nj, Ni)) onto the
    product's (y, x) order by matching latitude and longitude coordinate values: the four
    row/column flips are tried and the one whose coordinates agree within tol_deg is used.
    Returns (lat, lon, *arrays) in the product's order; AssertionError if none agrees."""
    ref_lat = np.asarray(ref_lat)
    ref_lon = np.asarray(ref_lon)
    tried = []
    for fr in (False, True):
        for fc in (False, True):
            def f(a, fr=fr, fc=fc):
                a = np.asarray(a)
                if fr:
                    a = a[::-1, :]
                if fc:
                    a = a[:, ::-1]
                return a

            la, lo = f(ref_lat), f(ref_lon)
            if la.shape != prod.lat.shape:
                tried.append(f"shape {la.shape} vs {prod.lat.shape}")
                continue
            dlat = np.nanmax(np.abs(la - prod.lat))
            away = np.abs(la) < 89.99  # longitude is arbitrary at a pole
            dlon = np.nanmax(_lon_diff(lo, prod.lon)[away]) if away.any() else 0.0
            tried.append(f"flip rows={fr} cols={fc}: max |dlat|={dlat:.3g}, |dlon|={dlon:.3g}")
            if dlat <= tol_deg and dlon <= tol_deg:
                return (la, lo, *[f(a) for a in arrays])
    raise AssertionError(f"{prod.path.name}: grid coordinates do not match the GRIB grid: " + "; ".join(tried))


def interior_mask(prod: Product, shape, edge: int = 2, global_grid: bool = False, max_abs_lat=88.0):
    """Points away from the edges: on a limited-area grid drop `edge` rows and columns on
    each side; on a global grid drop |lat| > max_abs_lat (pole rows)."""
    m = np.ones(shape, dtype=bool)
    if global_grid:
        m &= np.abs(prod.lat) <= max_abs_lat
    else:
        m[:edge, :] = m[-edge:, :] = False
        m[:, :edge] = m[:, -edge:] = False
    return m


# ---------------------------------------------------------------------------------------
# The isentropic family: variables on isentropic surfaces, isobaric Ertel PV, the dynamic
# tropopause on PV surfaces and isentropic layers (output contract)
# ---------------------------------------------------------------------------------------
#: Variable -> its vertical dimension, as the output contract states.
ISENTROPIC_VARIABLES = {
    "isen_p": "theta_level", "isen_z": "theta_level", "isen_t": "theta_level",
    "isen_u": "theta_level", "isen_v": "theta_level", "isen_m": "theta_level",
    "isen_pv": "theta_level",
    "pv": "pressure",
    "trop_p": "pv_level", "trop_theta": "pv_level", "trop_z": "pv_level",
    "trop_u": "pv_level", "trop_v": "pv_level",
    "trop_crossings": "pv_level", "trop_p_low": "pv_level", "trop_fold_dp": "pv_level",
    "layer_pv": "theta_layer", "layer_dp": "theta_layer",
}


@dataclasses.dataclass
class IsentropicProduct:
    path: Path
    kind: str
    dims: tuple  # horizontal dimension names, (y, x)
    lat: np.ndarray  # 2-D (y, x)
    lon: np.ndarray
    pressure: np.ndarray  # Pa
    theta_level: np.ndarray  # K
    pv_level: np.ndarray  # PVU (the file holds K m2 kg-1 s-1; converted on reading)
    theta_layer: np.ndarray  # K, mid values
    theta_layer_bounds: np.ndarray  # K, (n, 2): bottom, top
    fields: dict  # name -> array (nvertical, ny, nx), NaN where missing
    var_attrs: dict  # name -> attributes


def read_isentropic(path, names=tuple(ISENTROPIC_VARIABLES)) -> IsentropicProduct:
    """The isentropic family of one product file; AssertionError naming the variable if a
    coordinate or data variable the contract promises is absent or shaped otherwise."""
    path = Path(path)
    base = read_product(path)
    with netCDF4.Dataset(path) as ds:
        for c in ("theta_level", "pv_level", "theta_layer", "theta_layer_bounds"):
            assert c in ds.variables, (
                f"{path.name}: no variable {c} (output contract of the isentropic family); "
                f"variables are {sorted(ds.variables)}")
        fields, attrs = {}, {}
        for name in names:
            assert name in ds.variables, f"{path.name}: no data variable {name} (output contract)"
            v = ds[name]
            want = ("time", ISENTROPIC_VARIABLES[name], *base.dims)
            assert v.dimensions == want, f"{path.name}:{name} dims {v.dimensions}, contract says {want}"
            fields[name] = _filled(v)[0] * _to_pvu(v)
            attrs[name] = {k: v.getncattr(k) for k in v.ncattrs()}
        return IsentropicProduct(
            path, base.kind, base.dims, base.lat, base.lon, base.pressure,
            _filled(ds["theta_level"]), _filled(ds["pv_level"]) * _to_pvu(ds["pv_level"]),
            _filled(ds["theta_layer"]), _filled(ds["theta_layer_bounds"]), fields, attrs)


#: Units of potential vorticity in the files (the CF canonical units of
#: ertel_potential_vorticity) and the PVU the checks are written in:
#: 1 PVU = 1e-6 K m2 kg-1 s-1 (Hoskins et al. 1985; docs/references.md "Constants").
PV_UNITS = "K m2 kg-1 s-1"
PVU_IN_SI = 1e-6


def _to_pvu(var) -> float:
    """Factor taking a variable to PVU if it holds potential vorticity, else 1."""
    attrs = {k: var.getncattr(k) for k in var.ncattrs()}
    units = attrs.get("units", "")
    if attrs.get("standard_name") == "ertel_potential_vorticity":
        assert units == PV_UNITS, f"{var.name}: PV units {units!r}, the output contract says {PV_UNITS!r}"
        return 1.0 / PVU_IN_SI
    return 1.0


def vertical_index(values, want, atol=1e-6, what="level") -> int:
    """Index of the one coordinate value equal to want (within atol)."""
    idx = np.flatnonzero(np.isclose(np.asarray(values, dtype=float), want, rtol=0, atol=atol))
    assert idx.size == 1, f"{what} {want} not (once) in {list(values)}"
    return int(idx[0])
