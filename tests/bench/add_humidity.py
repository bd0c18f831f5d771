#!/usr/bin/env python3
"""Write the benchmark step again with relative humidity on every isobaric level and mean
sea-level pressure, as operational model output has them:

    python3 tests/bench/add_humidity.py IN.grib2 OUT.grib2

Every field of IN is copied; for each temperature field (0/0/0) on an isobaric level a
relative humidity field (0/1/1, %) on the same level is added, invented but smooth:
80 % near the ground falling to 20 % at 200 hPa with travelling waves of zonal wavenumber 6;
and one field of pressure reduced to mean sea level (0/3/1, code table 4.5 type 101) from the
1000 hPa height z and temperature T with the hypsometric equation,
p = 1000 hPa exp(g0 z / (R T)) (docs/references.md "Methods"). Encoded by ecCodes (cloning the
temperature message, same grid and packing). Written to a temporary name and renamed.
"""

from __future__ import annotations

import os
import sys

import numpy as np
import eccodes

G0 = 9.80665  # standard gravity (CGPM 1901)
R_DRY = 287.05  # dry-air gas constant (docs/references.md)


def main(src: str, dst: str) -> None:
    tmp = f"{dst}.partial-{os.getpid()}"
    z1000 = t1000 = None
    t_handle = None
    with open(src, "rb") as f, open(tmp, "wb") as out:
        while True:
            h = eccodes.codes_grib_new_from_file(f)
            if h is None:
                break
            out.write(eccodes.codes_get_message(h))
            cat, num = eccodes.codes_get(h, "parameterCategory"), eccodes.codes_get(h, "parameterNumber")
            lev_type = eccodes.codes_get_long(h, "typeOfFirstFixedSurface")
            lev = eccodes.codes_get(h, "level")
            if (cat, num, lev_type) == (0, 0, 100):
                lat = eccodes.codes_get_array(h, "latitudes")
                lon = eccodes.codes_get_array(h, "longitudes")
                p = float(lev)
                base = 20.0 + 60.0 * np.clip((p - 200.0) / 800.0, 0.0, 1.0)
                wave = 15.0 * np.sin(np.radians(6.0 * lon)) * np.cos(np.radians(lat))
                rh = np.clip(base + wave, 1.0, 100.0)
                g = eccodes.codes_clone(h)
                eccodes.codes_set(g, "parameterCategory", 1)
                eccodes.codes_set(g, "parameterNumber", 1)
                eccodes.codes_set_values(g, rh)
                out.write(eccodes.codes_get_message(g))
                eccodes.codes_release(g)
                if lev == 1000:
                    t1000 = eccodes.codes_get_values(h)
                    t_handle = eccodes.codes_clone(h)
            if (cat, num, lev_type, lev) == (3, 5, 100, 1000):
                z1000 = eccodes.codes_get_values(h)
            eccodes.codes_release(h)
        if z1000 is None or t1000 is None:
            sys.exit(f"{src}: no 1000 hPa height and temperature")
        mslp = 1.0e5 * np.exp(G0 * z1000 / (R_DRY * t1000))
        eccodes.codes_set(t_handle, "parameterCategory", 3)
        eccodes.codes_set(t_handle, "parameterNumber", 1)
        eccodes.codes_set(t_handle, "typeOfFirstFixedSurface", 101)
        eccodes.codes_set(t_handle, "scaledValueOfFirstFixedSurface", 0)
        eccodes.codes_set_values(t_handle, mslp)
        out.write(eccodes.codes_get_message(t_handle))
        eccodes.codes_release(t_handle)
    os.replace(tmp, dst)


if __name__ == "__main__":
    if len(sys.argv) != 3:
        sys.exit("usage: add_humidity.py IN.grib2 OUT.grib2")
    main(sys.argv[1], sys.argv[2])
