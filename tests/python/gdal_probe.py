"""GDAL's view of one leeward product, printed as JSON: run with the Python that has GDAL's
own bindings (Debian's python3-gdal under /usr/bin/python3, GDAL 3.6), since the bindings
must match the system library; the test suite's own environment calls it as a subprocess.

For every data variable (four dimensions): whether GDAL gives it a CRS, the units GDAL
reports for it, and its vertical coordinate as GDAL reads it (value, bounds). For one
data variable (the first named on the command line, else the first in the file): GDAL's
geolocation of sampled pixel centres (its geotransform and CRS, through osr to geographic
WGS 84 order lon/lat) against the file's own latitudes and longitudes, in units of the
local grid spacing; and a gdal.Warp of its first level to EPSG:4326
(nearest neighbour), read back at the file's own coordinates of the sampled points, against
the source values there.

Usage: python3 gdal_probe.py FILE [VARIABLE]
"""

import json
import math
import sys

from osgeo import gdal, osr

gdal.UseExceptions()


def data_variables(path):
    """(name, GDAL subdataset name) of every array with four dimensions, as GDAL's
    multidimensional API lists them."""
    root = gdal.OpenEx(path, gdal.OF_MULTIDIM_RASTER).GetRootGroup()
    out = []
    for var in root.GetMDArrayNames():
        a = root.OpenMDArray(var)
        if len(a.GetDimensions()) == 4:
            out.append((var, f'NETCDF:"{path}":{var}'))
    return out


def vertical_of(root, var, name):
    """GDAL's view of a variable's vertical coordinate: its dimension, the value the classic
    raster driver gives the first band (metadata NETCDF_DIM_<dimension>), and through the
    multidimensional API the coordinate's values and the bounds variable its `bounds`
    attribute names (None when it names none)."""
    dim = root.OpenMDArray(var).GetDimensions()[1]
    coord = dim.GetIndexingVariable()
    ds = gdal.Open(name)  # kept: a band does not keep its dataset alive
    band = ds.GetRasterBand(1).GetMetadata()
    out = dict(dim=dim.GetName(), band_value=band.get(f"NETCDF_DIM_{dim.GetName()}"), values=None, bounds=None)
    if coord is not None:
        out["values"] = [float(x) for x in coord.ReadAsArray().ravel()]
        names = [a.GetName() for a in coord.GetAttributes()]
        attr = coord.GetAttribute("bounds") if "bounds" in names else None
        if attr is not None:
            b = root.OpenMDArray(attr.Read())
            out["bounds"] = None if b is None else b.ReadAsArray().tolist()
    if out["band_value"] is not None:
        out["band_value"] = float(out["band_value"])
    return out


def great_circle_deg(lat1, lon1, lat2, lon2):
    p1, p2 = math.radians(lat1), math.radians(lat2)
    dl = math.radians(lon2 - lon1)
    c = math.sin(p1) * math.sin(p2) + math.cos(p1) * math.cos(p2) * math.cos(dl)
    return math.degrees(math.acos(max(-1.0, min(1.0, c))))


def main():
    path = sys.argv[1]
    want = sys.argv[2] if len(sys.argv) > 2 else None
    messages = []
    gdal.PushErrorHandler(lambda cls, no, msg: messages.append(msg))
    variables = data_variables(path)
    crs, units = {}, {}
    for var, name in variables:
        s = gdal.Open(name)
        srs = s.GetSpatialRef()
        crs[var] = srs.ExportToWkt() if srs is not None else None
        units[var] = s.GetRasterBand(1).GetUnitType()
    multidim = gdal.OpenEx(path, gdal.OF_MULTIDIM_RASTER).GetRootGroup()
    vertical = {var: vertical_of(multidim, var, name) for var, name in variables}
    var, name = next(((v, n) for v, n in variables if v == want), variables[0])
    src = gdal.Open(name)
    nx, ny = src.RasterXSize, src.RasterYSize
    gt = src.GetGeoTransform()
    srs = src.GetSpatialRef()
    geo = osr.SpatialReference()
    geo.ImportFromEPSG(4326)
    geo.SetAxisMappingStrategy(osr.OAMS_TRADITIONAL_GIS_ORDER)
    srs.SetAxisMappingStrategy(osr.OAMS_TRADITIONAL_GIS_ORDER)
    to_geo = osr.CoordinateTransformation(srs, geo)
    root = gdal.OpenEx(path, gdal.OF_MULTIDIM_RASTER).GetRootGroup()
    lat = root.OpenMDArray("lat").ReadAsArray()
    lon = root.OpenMDArray("lon").ReadAsArray()
    band = src.GetRasterBand(1).ReadAsArray()
    # Sampled pixels, away from the outermost row and column.
    rows = sorted({max(1, min(ny - 2, int(round(f * (ny - 1))))) for f in (0.1, 0.3, 0.5, 0.7, 0.9)})
    cols = sorted({max(1, min(nx - 2, int(round(f * (nx - 1))))) for f in (0.05, 0.25, 0.5, 0.75, 0.95)})
    points = []
    for r in rows:
        for c in cols:
            x = gt[0] + (c + 0.5) * gt[1] + (r + 0.5) * gt[2]
            y = gt[3] + (c + 0.5) * gt[4] + (r + 0.5) * gt[5]
            glon, glat, _ = to_geo.TransformPoint(x, y)
            points.append(dict(row=r, col=c, gdal_lat=glat, gdal_lon=glon, value=float(band[r, c])))
    # The file's own coordinates of those pixels: GDAL's rows run north to south, the
    # file's rows south to north (leeward's orientation), so row r is file row ny-1-r.
    for p in points:
        j, i = ny - 1 - p["row"], p["col"]
        if lat.ndim == 2:
            flat, flon = float(lat[j, i]), float(lon[j, i])
            nb = (float(lat[j, i + 1]), float(lon[j, i + 1])), (float(lat[j + 1, i]), float(lon[j + 1, i]))
        else:
            flat, flon = float(lat[j]), float(lon[i])
            nb = (float(lat[j]), float(lon[i + 1])), (float(lat[j + 1]), float(lon[i]))
        spacing = min(great_circle_deg(flat, flon, *nb[0]), great_circle_deg(flat, flon, *nb[1]))
        p.update(file_lat=flat, file_lon=flon, spacing_deg=spacing,
                 off_cells=great_circle_deg(flat, flon, p["gdal_lat"], p["gdal_lon"]) / spacing)
    # A warp to geographic coordinates, read back at the file's own coordinates.
    level = gdal.Translate("/vsimem/level.vrt", src, bandList=[1], format="VRT")
    # Target pixels a quarter of the finest sampled grid spacing: the target pixel holding
    # a file point then has its centre within an eighth of a cell of it, so nearest
    # neighbour takes that point's own value when GDAL places the grid right.
    res = min(p["spacing_deg"] for p in points) / 4.0
    warped = gdal.Warp("/vsimem/warped.tif", level, dstSRS="EPSG:4326", resampleAlg="near",
                       xRes=res, yRes=res, format="GTiff")
    wgt = warped.GetGeoTransform()
    wband = warped.GetRasterBand(1).ReadAsArray()
    for p in points:
        lo = p["file_lon"]
        # The warped raster's own longitude range (it may run past 180).
        while lo < wgt[0]:
            lo += 360.0
        while lo >= wgt[0] + 360.0:
            lo -= 360.0
        wc = int((lo - wgt[0]) / wgt[1])
        wr = int((p["file_lat"] - wgt[3]) / wgt[5])
        inside = 0 <= wr < warped.RasterYSize and 0 <= wc < warped.RasterXSize
        p["warped_value"] = float(wband[wr, wc]) if inside else None
    gdal.Unlink("/vsimem/warped.tif")
    gdal.Unlink("/vsimem/level.vrt")
    print(json.dumps(dict(variable=var, crs=crs, units=units, points=points, messages=messages,
                          vertical=vertical, gdal_version=gdal.__version__)))


if __name__ == "__main__":
    main()
