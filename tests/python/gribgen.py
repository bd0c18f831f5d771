"""GRIB2 test inputs for leeward, encoded with ecCodes.

ecCodes (ECMWF, PyPI ``eccodes`` + ``eccodeslib``) is an encoder independent of leeward:
every file written here starts from one of ecCodes' bundled GRIB2 samples, has its grid,
level, parameter, time and packing keys set by WMO code-table numbers (WMO-No. 306,
Manual on Codes, FM 92 GRIB edition 2), and is read back with ecCodes for the checks.

Geography that leeward must reproduce (projected coordinates, latitudes of grid points,
the angle between grid axes and east) is computed here with pyproj (PROJ), never with
leeward's formulas.

Import order matters: pyproj must be imported before eccodes in one process, otherwise
two PROJ libraries can clash (see the practical notes in the project's references).
"""

from __future__ import annotations

import dataclasses
from pathlib import Path
from typing import Sequence

import pyproj  # noqa: F401  (must precede eccodes)
import numpy as np
import eccodes

# --------------------------------------------------------------------------------------
# Constants (sources beside each one)
# --------------------------------------------------------------------------------------
#: GRIB2 code table 3.2, value 6: sphere of radius 6,371,229 m (WMO-No. 306).
RADIUS_SHAPE_6 = 6371229.0
#: GRIB2 code table 3.2, value 0: sphere of radius 6,367,470 m (WMO-No. 306).
RADIUS_SHAPE_0 = 6367470.0
#: Earth's angular velocity (IERS value, docs/references.md "Constants").
OMEGA = 7.292115e-5
#: Standard gravity (CGPM 1901, docs/references.md).
G0 = 9.80665
#: Dry-air gas constant (docs/references.md).
R_DRY = 287.05
#: Constant-lapse-rate atmosphere of docs/references.md "Check values" (US Standard Atmosphere
#: 1976 troposphere constants: T0 288.15 K, 6.5 K/km, p0 1013.25 hPa).
T0 = 288.15
GAMMA = 0.0065
P0 = 101325.0

#: Amplitude of the solid-body zonal flow, m s-1 (Williamson et al. 1992 use about 38.6,
#: one revolution in 12 days; from memory).
U0 = 40.0

#: Default isobaric levels (hPa): unevenly spaced on purpose, so that the vertical
#: differences are the non-uniform kind; 850, 500 and 300 hPa carry standard-atmosphere checks.
DEFAULT_LEVELS_HPA = (1000, 925, 850, 700, 600, 500, 400, 300, 250, 200)

#: Closely spaced levels (hPa) for the column checks.
DENSE_LEVELS_HPA = tuple(range(1000, 499, -25)) + tuple(range(480, 299, -20)) + tuple(range(290, 199, -10))

#: Levels every 50 hPa from 1000 to 100 hPa for the isentropic checks: in the
#: constant-lapse-rate column they span theta 287.4 K (1000 hPa) to 358.3 K (100 hPa), so
#: the 290-355 K surfaces are inside the column and 280, 285 and 360 K are outside it.
TALL_LEVELS_HPA = tuple(range(1000, 99, -50))

#: WMO code table 4.2, discipline 0 (meteorological): (parameterCategory, parameterNumber).
PARAM_T = (0, 0)  # temperature, K
PARAM_MSLP = (3, 1)  # pressure reduced to mean sea level, Pa
PARAM_RH = (1, 1)  # relative humidity, %
#: WMO code table 4.5: mean sea level.
LEVEL_MSL = 101
PARAM_GH = (3, 5)  # geopotential height, gpm
PARAM_GP = (3, 4)  # geopotential, m2 s-2
PARAM_U = (2, 2)  # u-component of wind, m s-1
PARAM_V = (2, 3)  # v-component of wind, m s-1
PARAM_ABSV = (2, 10)  # absolute vorticity, s-1

#: ecCodes packingType values for GRIB2 data representation templates 5.0, 5.2, 5.3, 5.40,
#: 5.41, 5.42.
PACKINGS = (
    "grid_simple",
    "grid_complex",
    "grid_complex_spatial_differencing",
    "grid_png",
    "grid_jpeg",
    "grid_ccsds",
)


# --------------------------------------------------------------------------------------
# Grid descriptions
# --------------------------------------------------------------------------------------
@dataclasses.dataclass(frozen=True)
class Grid:
    """One horizontal grid, described by the numbers that go into GRIB2 section 3.

    ``kind`` is the ecCodes gridType: regular_ll, rotated_ll, regular_gg, mercator,
    polar_stereographic or lambert. ``params`` holds the kind's own numbers (see the
    constructors below). ``shape_of_earth`` is the GRIB2 code table 3.2 value; for value 1
    ``radius`` gives the sphere's radius in metres.
    """

    name: str
    kind: str
    params: dict
    shape_of_earth: int = 6
    radius: float | None = None

    @property
    def earth_radius(self) -> float:
        """Sphere radius in metres, as GRIB2 code table 3.2 says for this grid."""
        if self.shape_of_earth == 6:
            return RADIUS_SHAPE_6
        if self.shape_of_earth == 0:
            return RADIUS_SHAPE_0
        if self.shape_of_earth == 1:
            assert self.radius is not None
            return float(self.radius)
        raise ValueError(f"shape of earth {self.shape_of_earth} not used in these tests")

    @property
    def projected(self) -> bool:
        return self.kind in ("mercator", "polar_stereographic", "lambert")

    @property
    def global_(self) -> bool:
        return bool(self.params.get("global", False))

    # ---- pyproj description of the projection (projected grids only) ----------------
    def proj_crs(self) -> pyproj.CRS:
        """The grid's projection as a PROJ string, built from the GRIB2 numbers.

        Conformal projections on a sphere (Snyder 1987, USGS PP 1395; PROJ's own
        implementation): Mercator true at LaD, polar stereographic true at LaD, Lambert
        conformal conic with standard parallels Latin1/Latin2.
        """
        p = self.params
        r = self.earth_radius
        if self.kind == "mercator":
            s = f"+proj=merc +lat_ts={p['lad']} +lon_0=0 +R={r} +x_0=0 +y_0=0 +units=m +no_defs"
        elif self.kind == "polar_stereographic":
            lat0 = 90 if p.get("north", True) else -90
            s = (
                f"+proj=stere +lat_0={lat0} +lat_ts={p['lad']} +lon_0={p['lov']} +R={r} "
                "+x_0=0 +y_0=0 +units=m +no_defs"
            )
        elif self.kind == "lambert":
            s = (
                f"+proj=lcc +lat_1={p['latin1']} +lat_2={p['latin2']} +lat_0={p['lad']} "
                f"+lon_0={p['lov']} +R={r} +x_0=0 +y_0=0 +units=m +no_defs"
            )
        else:
            raise ValueError(f"{self.kind} is not a projected grid")
        return pyproj.CRS.from_proj4(s)

    def sphere_crs(self) -> pyproj.CRS:
        """Geographic longitude/latitude on this grid's sphere."""
        return pyproj.CRS.from_proj4(f"+proj=longlat +R={self.earth_radius} +no_defs")

    def rotated_crs(self) -> pyproj.CRS:
        """Rotated-pole grid as CF describes it (CF 1.10 appendix F,
        rotated_latitude_longitude), turned into a CRS by pyproj. The GRIB2 southern pole
        (latSP, lonSP) is the antipode of CF's grid north pole (-latSP, lonSP + 180)."""
        p = self.params
        return pyproj.CRS.from_cf(
            {
                "grid_mapping_name": "rotated_latitude_longitude",
                "grid_north_pole_latitude": -p["lat_sp"],
                "grid_north_pole_longitude": _wrap180(p["lon_sp"] + 180.0),
                "north_pole_grid_longitude": 0.0,
                "earth_radius": self.earth_radius,
            }
        )


def _wrap180(lon):
    return (np.asarray(lon) + 180.0) % 360.0 - 180.0


def _wrap360(lon):
    return np.asarray(lon) % 360.0


def regular_ll(name, lat1, lat2, lon1, nlon, dlon, dlat, north_to_south=True, global_=False, **kw):
    """Regular latitude/longitude grid (template 3.0). lat1 is the first row as stored."""
    nlat = int(round(abs(lat2 - lat1) / dlat)) + 1
    return Grid(
        name,
        "regular_ll",
        dict(lat1=lat1, lat2=lat2, lon1=lon1, nlon=nlon, nlat=nlat, dlon=dlon, dlat=dlat,
             north_to_south=north_to_south, **{"global": global_}),
        **kw,
    )


def rotated_ll(name, lat_sp, lon_sp, rlat1, rlat2, rlon1, nlon, dlon, dlat, **kw):
    nlat = int(round(abs(rlat2 - rlat1) / dlat)) + 1
    return Grid(
        name,
        "rotated_ll",
        dict(lat_sp=lat_sp, lon_sp=lon_sp, lat1=rlat1, lat2=rlat2, lon1=rlon1, nlon=nlon,
             nlat=nlat, dlon=dlon, dlat=dlat, north_to_south=rlat1 > rlat2),
        **kw,
    )


def regular_gg(name, n, **kw):
    """Global regular Gaussian grid with N latitudes between pole and equator (template 3.40)."""
    return Grid(name, "regular_gg", dict(n=n, nlon=4 * n, nlat=2 * n, **{"global": True}), **kw)


def projected(name, kind, nx, ny, dx, dy, centre_lat, centre_lon, j_positive=True, **proj):
    """A projected grid of nx by ny points spaced dx, dy metres (true at LaD), centred on
    (centre_lat, centre_lon)."""
    g = Grid(name, kind, dict(nx=nx, ny=ny, dx=dx, dy=dy, clat=centre_lat, clon=centre_lon,
                              j_positive=j_positive, **proj))
    return g


def gaussian_latitudes(n: int) -> np.ndarray:
    """Gaussian latitudes (degrees, north to south) of a grid with N latitudes per
    hemisphere: arcsin of the roots of the Legendre polynomial of degree 2N
    (Gauss-Legendre quadrature nodes, computed by numpy)."""
    x, _ = np.polynomial.legendre.leggauss(2 * n)
    return np.degrees(np.arcsin(x))[::-1].copy()


# --------------------------------------------------------------------------------------
# Geometry in file order (computed here, independently of leeward)
# --------------------------------------------------------------------------------------
@dataclasses.dataclass
class Geometry:
    """Latitude, longitude (degrees) of every point, shape (rows, cols) in file order, and
    the GRIB2 section 3 keys that describe the grid to ecCodes."""

    lat: np.ndarray
    lon: np.ndarray
    keys: list  # ordered (key, value) pairs for ecCodes
    sample: str
    x: np.ndarray | None = None  # projection coordinates of columns / rows, file order
    y: np.ndarray | None = None
    rlat: np.ndarray | None = None
    rlon: np.ndarray | None = None


def geometry(grid: Grid) -> Geometry:
    p = grid.params
    if grid.kind == "regular_ll":
        lats = p["lat1"] + np.arange(p["nlat"]) * (p["dlat"] if p["lat2"] > p["lat1"] else -p["dlat"])
        lons = p["lon1"] + np.arange(p["nlon"]) * p["dlon"]
        lon2d, lat2d = np.meshgrid(lons, lats)
        keys = [
            ("gridDefinitionTemplateNumber", 0),
            ("Ni", p["nlon"]), ("Nj", p["nlat"]),
            ("iScansNegatively", 0), ("jScansPositively", 0 if p["north_to_south"] else 1),
            ("latitudeOfFirstGridPointInDegrees", float(lats[0])),
            ("longitudeOfFirstGridPointInDegrees", float(_wrap360(lons[0]))),
            ("latitudeOfLastGridPointInDegrees", float(lats[-1])),
            ("longitudeOfLastGridPointInDegrees", float(_wrap360(lons[-1]))),
            ("iDirectionIncrementInDegrees", p["dlon"]),
            ("jDirectionIncrementInDegrees", p["dlat"]),
        ]
        return Geometry(lat2d, _wrap180(lon2d), keys, "GRIB2")
    if grid.kind == "rotated_ll":
        rl = p["lat1"] + np.arange(p["nlat"]) * (-p["dlat"] if p["north_to_south"] else p["dlat"])
        rlo = p["lon1"] + np.arange(p["nlon"]) * p["dlon"]
        rlon2d, rlat2d = np.meshgrid(rlo, rl)
        tr = pyproj.Transformer.from_crs(grid.rotated_crs(), grid.sphere_crs(), always_xy=True)
        lon2d, lat2d = tr.transform(rlon2d, rlat2d)
        keys = [
            ("gridDefinitionTemplateNumber", 1),
            ("Ni", p["nlon"]), ("Nj", p["nlat"]),
            ("iScansNegatively", 0), ("jScansPositively", 0 if p["north_to_south"] else 1),
            ("latitudeOfFirstGridPointInDegrees", float(rl[0])),
            ("longitudeOfFirstGridPointInDegrees", float(_wrap360(rlo[0]))),
            ("latitudeOfLastGridPointInDegrees", float(rl[-1])),
            ("longitudeOfLastGridPointInDegrees", float(_wrap360(rlo[-1]))),
            ("iDirectionIncrementInDegrees", p["dlon"]),
            ("jDirectionIncrementInDegrees", p["dlat"]),
            ("latitudeOfSouthernPoleInDegrees", float(p["lat_sp"])),
            ("longitudeOfSouthernPoleInDegrees", float(_wrap360(p["lon_sp"]))),
            ("angleOfRotationInDegrees", 0.0),
        ]
        return Geometry(np.asarray(lat2d), _wrap180(lon2d), keys, "GRIB2", rlat=rlat2d, rlon=rlon2d)
    if grid.kind == "regular_gg":
        lats = gaussian_latitudes(p["n"])
        dlon = 360.0 / p["nlon"]
        lons = np.arange(p["nlon"]) * dlon
        lon2d, lat2d = np.meshgrid(lons, lats)
        keys = [
            ("gridDefinitionTemplateNumber", 40),
            ("N", p["n"]), ("Ni", p["nlon"]), ("Nj", p["nlat"]),
            ("iScansNegatively", 0), ("jScansPositively", 0),
            ("latitudeOfFirstGridPointInDegrees", float(lats[0])),
            ("longitudeOfFirstGridPointInDegrees", 0.0),
            ("latitudeOfLastGridPointInDegrees", float(lats[-1])),
            ("longitudeOfLastGridPointInDegrees", float(lons[-1])),
            ("iDirectionIncrementInDegrees", dlon),
        ]
        return Geometry(lat2d, _wrap180(lon2d), keys, "regular_gg_pl_grib2")
    if grid.projected:
        crs = grid.proj_crs()
        fwd = pyproj.Transformer.from_crs(grid.sphere_crs(), crs, always_xy=True)
        inv = pyproj.Transformer.from_crs(crs, grid.sphere_crs(), always_xy=True)
        xc, yc = fwd.transform(p["clon"], p["clat"])
        xs = xc + (np.arange(p["nx"]) - (p["nx"] - 1) / 2.0) * p["dx"]
        ys = yc + (np.arange(p["ny"]) - (p["ny"] - 1) / 2.0) * p["dy"]
        if not p["j_positive"]:
            ys = ys[::-1]
        x2d, y2d = np.meshgrid(xs, ys)
        lon2d, lat2d = inv.transform(x2d, y2d)
        lon2d, lat2d = np.asarray(lon2d), np.asarray(lat2d)
        # GRIB2 stores the first point to 1e-6 degree: rebuild the grid from the stored
        # first point so the file and this geometry agree to that precision.
        la1 = round(float(lat2d[0, 0]), 6)
        lo1 = round(float(_wrap360(lon2d[0, 0])), 6)
        x0, y0 = fwd.transform(lo1, la1)
        xs = x0 + np.arange(p["nx"]) * p["dx"]
        ys = y0 + np.arange(p["ny"]) * (p["dy"] if p["j_positive"] else -p["dy"])
        x2d, y2d = np.meshgrid(xs, ys)
        lon2d, lat2d = inv.transform(x2d, y2d)
        lon2d, lat2d = np.asarray(lon2d), np.asarray(lat2d)
        if grid.kind == "mercator":
            keys = [
                ("gridDefinitionTemplateNumber", 10),
                ("Ni", p["nx"]), ("Nj", p["ny"]),
                ("latitudeOfFirstGridPointInDegrees", la1),
                ("longitudeOfFirstGridPointInDegrees", lo1),
                ("LaDInDegrees", float(p["lad"])),
                ("latitudeOfLastGridPointInDegrees", round(float(lat2d[-1, -1]), 6)),
                ("longitudeOfLastGridPointInDegrees", round(float(_wrap360(lon2d[-1, -1])), 6)),
                ("iScansNegatively", 0), ("jScansPositively", 1 if p["j_positive"] else 0),
                ("orientationOfTheGridInDegrees", 0.0),
                ("DiInMetres", float(p["dx"])), ("DjInMetres", float(p["dy"])),
            ]
        elif grid.kind == "polar_stereographic":
            keys = [
                ("gridDefinitionTemplateNumber", 20),
                ("Nx", p["nx"]), ("Ny", p["ny"]),
                ("latitudeOfFirstGridPointInDegrees", la1),
                ("longitudeOfFirstGridPointInDegrees", lo1),
                ("LaDInDegrees", float(p["lad"])),
                ("orientationOfTheGridInDegrees", float(_wrap360(p["lov"]))),
                ("DxInMetres", float(p["dx"])), ("DyInMetres", float(p["dy"])),
                ("projectionCentreFlag", 0 if p.get("north", True) else 128),
                ("iScansNegatively", 0), ("jScansPositively", 1 if p["j_positive"] else 0),
            ]
        else:
            keys = [
                ("gridDefinitionTemplateNumber", 30),
                ("Nx", p["nx"]), ("Ny", p["ny"]),
                ("latitudeOfFirstGridPointInDegrees", la1),
                ("longitudeOfFirstGridPointInDegrees", lo1),
                ("LaDInDegrees", float(p["lad"])),
                ("LoVInDegrees", float(_wrap360(p["lov"]))),
                ("DxInMetres", float(p["dx"])), ("DyInMetres", float(p["dy"])),
                ("projectionCentreFlag", 0),
                ("iScansNegatively", 0), ("jScansPositively", 1 if p["j_positive"] else 0),
                ("Latin1InDegrees", float(p["latin1"])),
                ("Latin2InDegrees", float(p["latin2"])),
                ("latitudeOfSouthernPoleInDegrees", -90.0),
                ("longitudeOfSouthernPoleInDegrees", 0.0),
            ]
        return Geometry(lat2d, _wrap180(lon2d), keys, "GRIB2", x=x2d, y=y2d)
    raise ValueError(grid.kind)


def east_north_in_grid_axes(grid: Grid, geo: Geometry):
    """Unit vectors of local east and north expressed in the grid's (x, y) axes.

    Computed numerically with pyproj: two points a few metres apart along the parallel
    (meridian), centred on the grid point, are projected and their difference normalised.
    For rotated grids the "projection" is the rotated sphere (rlon, rlat), whose local
    x axis is cos(rlat) d rlon. Returns (ex, ey, nx, ny), each shaped like geo.lat.
    """
    lat, lon = geo.lat, geo.lon
    a = grid.earth_radius
    step = 2.0  # metres
    half_lam = 0.5 * np.degrees(step / (a * np.maximum(np.cos(np.radians(lat)), 1e-12)))
    half_phi = 0.5 * np.degrees(step / a)
    # Within a step of a pole, use the one-sided pair that stays on the sphere.
    n_hi = np.minimum(lat + half_phi, 90.0)
    n_lo = np.maximum(lat - half_phi, -90.0)
    if grid.kind == "rotated_ll":
        fwd = pyproj.Transformer.from_crs(grid.sphere_crs(), grid.rotated_crs(), always_xy=True)

        def proj(lo, la):
            rlo, rla = fwd.transform(lo, la)
            return np.radians(np.asarray(rlo)), np.radians(np.asarray(rla))

        _, y0 = proj(lon, lat)
        xe1, ye1 = proj(lon - half_lam, lat)
        xe2, ye2 = proj(lon + half_lam, lat)
        xn1, yn1 = proj(lon, n_lo)
        xn2, yn2 = proj(lon, n_hi)
        dxe = np.angle(np.exp(1j * (xe2 - xe1))) * np.cos(y0)
        dye = ye2 - ye1
        dxn = np.angle(np.exp(1j * (xn2 - xn1))) * np.cos(y0)
        dyn = yn2 - yn1
    else:
        fwd = pyproj.Transformer.from_crs(grid.sphere_crs(), grid.proj_crs(), always_xy=True)
        xe1, ye1 = (np.asarray(v) for v in fwd.transform(lon - half_lam, lat))
        xe2, ye2 = (np.asarray(v) for v in fwd.transform(lon + half_lam, lat))
        xn1, yn1 = (np.asarray(v) for v in fwd.transform(lon, n_lo))
        xn2, yn2 = (np.asarray(v) for v in fwd.transform(lon, n_hi))
        dxe, dye = xe2 - xe1, ye2 - ye1
        dxn, dyn = xn2 - xn1, yn2 - yn1
    ne = np.hypot(dxe, dye)
    nn = np.hypot(dxn, dyn)
    return dxe / ne, dye / ne, dxn / nn, dyn / nn


# --------------------------------------------------------------------------------------
# Closed-form fields
# --------------------------------------------------------------------------------------
def lapse_rate_exponent(gamma: float = GAMMA) -> float:
    """R gamma / g of the constant-lapse-rate atmosphere (docs/references.md "Check values")."""
    return R_DRY * gamma / G0


def lapse_rate_temperature(p_pa, gamma: float = GAMMA):
    """T = T0 (p/p0)^(R gamma/g) (docs/references.md: constant lapse rate atmosphere)."""
    return T0 * (np.asarray(p_pa, dtype=float) / P0) ** lapse_rate_exponent(gamma)


def lapse_rate_height(p_pa, gamma: float = GAMMA):
    """z = (T0/gamma)(1 - (p/p0)^(R gamma/g)) in geopotential metres (docs/references.md)."""
    return (T0 / gamma) * (1.0 - (np.asarray(p_pa, dtype=float) / P0) ** lapse_rate_exponent(gamma))


def solid_body_zeta(lat_deg, u0, radius):
    """Relative vorticity of u = u0 cos(lat), v = 0: 2 u0 sin(lat) / a
    (Williamson et al. 1992, test case 2; docs/references.md)."""
    return 2.0 * u0 * np.sin(np.radians(lat_deg)) / radius


def coriolis(lat_deg):
    """f = 2 Omega sin(lat), Omega = 7.292115e-5 s-1 (docs/references.md)."""
    return 2.0 * OMEGA * np.sin(np.radians(lat_deg))


#: Reference pressure of potential temperature, 1000 hPa (docs/references.md "Constants").
THETA_REF_P = 1e5


def lapse_rate_theta(p_pa, kappa):
    """theta = T (1e5/p)^kappa (Poisson's equation) of the constant-lapse-rate column:
    theta = theta_c (p/p0)^(c - kappa), theta_c = T0 (1e5/p0)^kappa, c = R gamma/g."""
    p = np.asarray(p_pa, dtype=float)
    return lapse_rate_temperature(p) * (THETA_REF_P / p) ** kappa


def lapse_rate_pressure_of_theta(theta, kappa):
    """Inverse of lapse_rate_theta: p(theta) = p0 (theta/theta_c)^(1/(c - kappa))."""
    c = lapse_rate_exponent()
    theta_c = T0 * (THETA_REF_P / P0) ** kappa
    return P0 * (np.asarray(theta, dtype=float) / theta_c) ** (1.0 / (c - kappa))


def lapse_rate_dtheta_dp(p_pa, kappa):
    """d theta/dp = (c - kappa) theta / p of the same column (negative: stable)."""
    p = np.asarray(p_pa, dtype=float)
    return (lapse_rate_exponent() - kappa) * lapse_rate_theta(p, kappa) / p


def lapse_rate_ertel_pv(p_pa, eta, kappa):
    """Ertel PV of a horizontally uniform column with absolute vorticity eta (s-1), in
    K m2 kg-1 s-1: P = -g eta d theta/dp (Hoskins et al. 1985; docs/references.md "Methods"); on
    isobaric surfaces the baroclinic terms vanish because theta is horizontally uniform."""
    return -G0 * np.asarray(eta, dtype=float) * lapse_rate_dtheta_dp(p_pa, kappa)


def lapse_rate_pressure_of_pv(pv_abs, eta, kappa):
    """Pressure where the column's |P| equals pv_abs (K m2 kg-1 s-1) for absolute vorticity
    eta: |P| = g |eta| (kappa - c) theta_c p0^(kappa - c) p^(c - kappa - 1), solved for p."""
    c = lapse_rate_exponent()
    theta_c = T0 * (THETA_REF_P / P0) ** kappa
    k = G0 * np.abs(np.asarray(eta, dtype=float)) * (kappa - c) * theta_c * P0 ** (kappa - c)
    return (pv_abs / k) ** (1.0 / (c - kappa - 1.0))


# --------------------------------------------------------------------------------------
# Encoding
# --------------------------------------------------------------------------------------
@dataclasses.dataclass(frozen=True)
class Times:
    date: int = 20240115  # YYYYMMDD of the reference time
    time: int = 0  # HHMM
    step: int = 36  # hours


def _set_keys(h, pairs):
    for k, v in pairs:
        if isinstance(v, float):
            eccodes.codes_set_double(h, k, v)
        elif isinstance(v, (int, np.integer)):
            eccodes.codes_set_long(h, k, int(v))
        else:
            eccodes.codes_set_string(h, k, str(v))


def encode_field(
    grid: Grid,
    geo: Geometry,
    values2d: np.ndarray,
    param: tuple[int, int],
    level_hpa: float,
    *,
    times: Times = Times(),
    centre: int = 98,
    grid_relative: bool = False,
    packing: str = "grid_simple",
    bits: int = 16,
    level_type: int = 100,
) -> bytes:
    """One GRIB2 message (bytes) holding values2d (file order) on an isobaric level, or on
    the surface of code table 4.5 given by level_type (1 ground, 101 mean sea level), whose
    level value is then 0."""
    h = eccodes.codes_grib_new_from_samples(geo.sample)
    try:
        _set_keys(h, [("tablesVersion", 28), ("centre", centre), ("subCentre", 0)])
        _set_keys(h, [
            ("significanceOfReferenceTime", 1),  # code table 1.2: start of forecast
            ("productionStatusOfProcessedData", 0),
            ("typeOfProcessedData", 1),  # code table 1.4: forecast products
            ("dataDate", times.date),
            ("dataTime", times.time),
        ])
        _set_keys(h, geo.keys)
        # Code table 3.2: shape of the earth.
        eccodes.codes_set_long(h, "shapeOfTheEarth", grid.shape_of_earth)
        if grid.shape_of_earth == 1:
            eccodes.codes_set_long(h, "scaleFactorOfRadiusOfSphericalEarth", 0)
            eccodes.codes_set_long(h, "scaledValueOfRadiusOfSphericalEarth", int(round(grid.radius)))
        # Flag table 3.3, bit 5 (value 8 in the octet, bit 1 being the most significant):
        # u and v relative to the grid's x and y directions. Set on the octet itself,
        # since not every ecCodes grid template exposes the bit as its own key.
        flags = eccodes.codes_get_long(h, "resolutionAndComponentFlags")
        flags = (flags | 0x08) if grid_relative else (flags & ~0x08)
        eccodes.codes_set_long(h, "resolutionAndComponentFlags", flags)
        _set_keys(h, [
            ("productDefinitionTemplateNumber", 0),
            ("discipline", 0),
            ("parameterCategory", param[0]),
            ("parameterNumber", param[1]),
            ("typeOfGeneratingProcess", 2),  # code table 4.3: forecast
            ("indicatorOfUnitForForecastTime", 1),  # code table 4.4: hour
            ("forecastTime", times.step),
            ("typeOfFirstFixedSurface", level_type),  # code table 4.5: 100 isobaric surface (Pa)
            ("scaleFactorOfFirstFixedSurface", 0),
            ("scaledValueOfFirstFixedSurface", int(round(level_hpa * 100)) if level_type == 100 else 0),
            ("typeOfSecondFixedSurface", 255),
        ])
        vals = np.ascontiguousarray(values2d, dtype=float).ravel()
        if packing == "grid_png" and np.ptp(vals) == 0.0:
            # ecCodes 2.50 cannot PNG-pack a constant field (v = 0 here): simple packing
            # for that one field; u, T and Z still go through template 5.41.
            packing = "grid_simple"
        eccodes.codes_set_string(h, "packingType", packing)
        eccodes.codes_set_long(h, "bitsPerValue", bits)
        eccodes.codes_set_values(h, vals)
        return eccodes.codes_get_message(h)
    finally:
        eccodes.codes_release(h)


def solid_body_winds(grid: Grid, geo: Geometry, u0: float, grid_relative: bool):
    """u = u0 cos(lat), v = 0 east/north (Williamson et al. 1992 test case 2), rotated into
    the grid's axes when grid_relative (only meaningful for projected and rotated grids)."""
    ue = u0 * np.cos(np.radians(geo.lat))
    ve = np.zeros_like(ue)
    if grid_relative and (grid.projected or grid.kind == "rotated_ll"):
        ex, ey, nx, ny = east_north_in_grid_axes(grid, geo)
        # wind = ue * east + ve * north, then read off x and y components
        return ue * ex + ve * nx, ue * ey + ve * ny
    return ue, ve


def solid_body(
    path,
    grid: Grid,
    u0: float = U0,
    levels_hpa: Sequence[float] = DEFAULT_LEVELS_HPA,
    grid_relative: bool = False,
    packing: str = "grid_simple",
    *,
    times: Times = Times(),
    centre: int = 98,
    bits: int = 16,
    gamma: float = GAMMA,
) -> Path:
    """Write one complete step: T, Z, u, v on every level of a solid-body zonal flow over a
    horizontally uniform constant-lapse-rate atmosphere (lapse rate gamma, K m-1). Returns
    the path."""
    path = Path(path)
    geo = geometry(grid)
    ug, vg = solid_body_winds(grid, geo, u0, grid_relative)
    msgs = []
    for lev in levels_hpa:
        p = lev * 100.0
        t = np.full(geo.lat.shape, float(lapse_rate_temperature(p, gamma)))
        z = np.full(geo.lat.shape, float(lapse_rate_height(p, gamma)))
        kw = dict(times=times, centre=centre, grid_relative=grid_relative, packing=packing, bits=bits)
        msgs.append(encode_field(grid, geo, t, PARAM_T, lev, **kw))
        msgs.append(encode_field(grid, geo, z, PARAM_GH, lev, **kw))
        msgs.append(encode_field(grid, geo, ug, PARAM_U, lev, **kw))
        msgs.append(encode_field(grid, geo, vg, PARAM_V, lev, **kw))
    path.write_bytes(b"".join(msgs))
    return path


def write_fields(path, grid: Grid, fields, *, times: Times = Times(), centre: int = 98,
                 bits: int = 24, packing: str = "grid_simple") -> Path:
    """Write one step of arbitrary isobaric fields: `fields` yields (param, level_hpa,
    values2d) with values in file order (rows as geometry(grid) gives them). Returns the
    path."""
    path = Path(path)
    geo = geometry(grid)
    msgs = [encode_field(grid, geo, np.asarray(v, dtype=float), param, lev, times=times,
                         centre=centre, packing=packing, bits=bits)
            for param, lev, v in fields]
    path.write_bytes(b"".join(msgs))
    return path


# --------------------------------------------------------------------------------------
# The grids the closed-form tests use (each <= 200 x 200 points)
# --------------------------------------------------------------------------------------
def closed_form_grids() -> dict[str, Grid]:
    g = {}
    # Global 2.5 degree, north to south as most centres write it.
    g["latlon_global_2p5"] = regular_ll("latlon_global_2p5", 90.0, -90.0, 0.0, 144, 2.5, 2.5,
                                        north_to_south=True, global_=True)
    # 1 degree limited area over Europe and the North Atlantic, south to north, crossing
    # the prime meridian (first longitude 330 E, last 40 E).
    g["latlon_europe_1p0"] = regular_ll("latlon_europe_1p0", 30.0, 70.0, -30.0, 71, 1.0, 1.0,
                                        north_to_south=False)
    # Rotated lat/lon regional grid, southern pole of rotation (-35, 15), 0.5 degree.
    g["rotated_europe_0p5"] = rotated_ll("rotated_europe_0p5", -35.0, 15.0, -15.0, 15.0, -20.0, 81,
                                         0.5, 0.5)
    # Regular Gaussian N48 global grid (192 x 96).
    g["gaussian_n48"] = regular_gg("gaussian_n48", 48)
    # Mercator over the western Pacific, true at 20 N, 80 km, crossing the equator.
    # (Projected grids are all stored south to north: decoders disagree on what -j
    # scanning means for the first point of projected templates.)
    g["mercator_pacific"] = projected("mercator_pacific", "mercator", 101, 91, 80000.0, 80000.0,
                                      10.0, 150.0, lad=20.0)
    # Polar stereographic, north pole, true at 60 N, orientation 100 W, 60 km, pole inside.
    g["polar_north_60"] = projected("polar_north_60", "polar_stereographic", 121, 121, 60000.0,
                                    60000.0, 85.0, -100.0, lad=60.0, lov=-100.0, north=True)
    # Lambert conformal, tangent at 25 N, LoV 265 E (95 W), 60 km over North America.
    g["lambert_tangent_25"] = projected("lambert_tangent_25", "lambert", 101, 71, 60000.0, 60000.0,
                                        38.0, -97.0, lad=25.0, lov=265.0, latin1=25.0, latin2=25.0)
    # Lambert conformal, secant at 30 N and 60 N, LoV 10 E, 40 km over Europe.
    g["lambert_secant_30_60"] = projected("lambert_secant_30_60", "lambert", 111, 91, 40000.0,
                                          40000.0, 50.0, 10.0, lad=30.0, lov=10.0, latin1=30.0,
                                          latin2=60.0)
    # A small 1 degree grid for the column checks on closely spaced levels.
    g["latlon_small_1p0"] = regular_ll("latlon_small_1p0", 60.0, 40.0, 0.0, 21, 1.0, 1.0,
                                       north_to_south=True)
    # A global 2.5 degree grid whose shape of the earth is code 1 (radius given by the
    # producer), with a radius far from Earth's, so that a fixed radius would show.
    g["latlon_given_radius"] = Grid("latlon_given_radius", "regular_ll",
                                    dict(g["latlon_global_2p5"].params), shape_of_earth=1,
                                    radius=3389500.0)
    return g


#: Cases: name -> (grid name, grid_relative, packing, centre, times)
def closed_form_cases() -> dict[str, dict]:
    t = Times()
    c = {}
    c["latlon_global_2p5"] = dict(grid="latlon_global_2p5", grid_relative=False, centre=98, times=t)
    c["latlon_europe_1p0"] = dict(grid="latlon_europe_1p0", grid_relative=False, centre=54,
                                  times=Times(20231231, 1200, 6))
    c["rotated_europe_0p5"] = dict(grid="rotated_europe_0p5", grid_relative=True, centre=54, times=t)
    c["rotated_europe_0p5_earth"] = dict(grid="rotated_europe_0p5", grid_relative=False, centre=54,
                                         times=t)
    c["gaussian_n48"] = dict(grid="gaussian_n48", grid_relative=False, centre=98, times=t)
    c["mercator_pacific"] = dict(grid="mercator_pacific", grid_relative=True, centre=85,
                                 times=Times(20240229, 600, 120))
    c["polar_north_60"] = dict(grid="polar_north_60", grid_relative=True, centre=7, times=t)
    c["polar_north_60_earth"] = dict(grid="polar_north_60", grid_relative=False, centre=7, times=t)
    c["lambert_tangent_25"] = dict(grid="lambert_tangent_25", grid_relative=True, centre=7, times=t)
    c["lambert_tangent_25_earth"] = dict(grid="lambert_tangent_25", grid_relative=False, centre=7,
                                         times=t)
    c["lambert_secant_30_60"] = dict(grid="lambert_secant_30_60", grid_relative=True, centre=98,
                                     times=t)
    c["latlon_given_radius"] = dict(grid="latlon_given_radius", grid_relative=False, centre=98,
                                    times=t)
    # Closely spaced levels, 1000 to 200 hPa (25, 20 then 10 hPa apart): a three-point
    # difference in p or in ln p is then within 0.25% of the exact derivative.
    c["column_dense_levels"] = dict(grid="latlon_small_1p0", grid_relative=False, centre=98, times=t,
                                    levels=DENSE_LEVELS_HPA)
    # Isentropic family: 1000 to 100 hPa every 50 hPa on a global lat/lon grid, a global
    # Gaussian grid and a Lambert grid with grid-relative winds.
    c["tall_latlon_global_2p5"] = dict(grid="latlon_global_2p5", grid_relative=False, centre=98,
                                       times=t, levels=TALL_LEVELS_HPA)
    c["tall_gaussian_n48"] = dict(grid="gaussian_n48", grid_relative=False, centre=98, times=t,
                                  levels=TALL_LEVELS_HPA)
    c["tall_lambert_tangent_25"] = dict(grid="lambert_tangent_25", grid_relative=True, centre=7,
                                        times=t, levels=TALL_LEVELS_HPA)
    # Geometry cases carry 24-bit simple packing, so that quantisation stays far below the
    # closed-form tolerances; the packing cases use 16 bits, a common operational choice.
    for v in c.values():
        v.setdefault("bits", 24)
        v.setdefault("levels", DEFAULT_LEVELS_HPA)
    for pk in PACKINGS:
        c[f"packing_{pk}"] = dict(grid="latlon_europe_1p0", grid_relative=False, centre=98, times=t,
                                  packing=pk, bits=16, levels=DEFAULT_LEVELS_HPA)
    return c


# --------------------------------------------------------------------------------------
# Reading back with ecCodes
# --------------------------------------------------------------------------------------
def read_fields(path, multi: bool = True):
    """Every field of a GRIB2 file as dicts of WMO numbers, level, grid keys and values
    (file order, reshaped to (Nj, Ni)); multi-field messages are split
    (codes_grib_multi_support_on)."""
    out = []
    if multi:
        eccodes.codes_grib_multi_support_on()
    try:
        with open(path, "rb") as f:
            while True:
                h = eccodes.codes_grib_new_from_file(f)
                if h is None:
                    break
                try:
                    out.append(_describe(h))
                finally:
                    eccodes.codes_release(h)
    finally:
        if multi:
            eccodes.codes_grib_multi_support_off()
    return out


def _describe(h):
    g = lambda k: eccodes.codes_get(h, k)  # noqa: E731
    gt = g("gridType")
    if gt in ("regular_ll", "rotated_ll", "regular_gg", "mercator"):
        ni, nj = g("Ni"), g("Nj")
    else:
        ni, nj = g("Nx"), g("Ny")
    d = dict(
        discipline=g("discipline"), category=g("parameterCategory"), number=g("parameterNumber"),
        level_type=eccodes.codes_get_long(h, "typeOfFirstFixedSurface"), level=g("level"), grid_type=gt, ni=ni, nj=nj,
        i_negative=g("iScansNegatively"), j_positive=g("jScansPositively"),
        shape_of_earth=g("shapeOfTheEarth"),
        uv_relative=bool(g("resolutionAndComponentFlags") & 0x08),
        centre=eccodes.codes_get_long(h, "centre"), date=g("dataDate"), time=g("dataTime"), step=g("forecastTime"),
        packing=g("packingType"),
    )
    d["values"] = eccodes.codes_get_values(h).reshape(nj, ni)
    d["lat"] = eccodes.codes_get_array(h, "latitudes").reshape(nj, ni)
    d["lon"] = eccodes.codes_get_array(h, "longitudes").reshape(nj, ni)
    return d


def first_field(path, wanted):
    """The first field (as read_fields describes it) for which wanted(handle) is true,
    reading no further than that message; None if there is none. Multi-field messages are
    split (codes_grib_multi_support_on)."""
    eccodes.codes_grib_multi_support_on()
    try:
        with open(path, "rb") as f:
            while True:
                h = eccodes.codes_grib_new_from_file(f)
                if h is None:
                    return None
                try:
                    if wanted(h):
                        return _describe(h)
                finally:
                    eccodes.codes_release(h)
    finally:
        eccodes.codes_grib_multi_support_off()


def read_grid_latlons(path):
    """(lat, lon, j_positive, i_negative) of the first field of a file, from ecCodes'
    own geometry (its iterator), file order, shape (Nj, Ni)."""
    with open(path, "rb") as f:
        h = eccodes.codes_grib_new_from_file(f)
    try:
        d = _describe(h)
    finally:
        eccodes.codes_release(h)
    return d["lat"], d["lon"], bool(d["j_positive"]), bool(d["i_negative"])


def normalise(a2d, j_positive: bool, i_negative: bool):
    """File order -> rows south to north (y increasing), columns west to east."""
    a = np.asarray(a2d)
    if not j_positive:
        a = a[::-1, :]
    if i_negative:
        a = a[:, ::-1]
    return a


def build_all(outdir) -> dict[str, Path]:
    """Encode every closed-form case into outdir; returns name -> path."""
    outdir = Path(outdir)
    outdir.mkdir(parents=True, exist_ok=True)
    grids = closed_form_grids()
    paths = {}
    for name, case in closed_form_cases().items():
        grid = grids[case["grid"]]
        paths[name] = solid_body(
            outdir / f"{name}.grib2", grid, grid_relative=case["grid_relative"],
            packing=case.get("packing", "grid_simple"), times=case["times"], centre=case["centre"],
            bits=case["bits"], levels_hpa=case["levels"],
        )
    return paths


if __name__ == "__main__":  # encode every case into a folder, for looking at by hand
    import sys

    for n, pth in build_all(sys.argv[1] if len(sys.argv) > 1 else "gribgen-out").items():
        print(n, pth)
