#!/usr/bin/env python3
"""Copy a GRIB2 file with every field's forecast time moved by N hours (values untouched):
a second step of the benchmark input, for the changes and PV-budget benchmark.

    python3 tests/bench/shift_step.py IN OUT --hours 6
"""
import argparse
import os
import sys

import eccodes


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("src")
    ap.add_argument("dst")
    ap.add_argument("--hours", type=int, default=6)
    a = ap.parse_args(argv)
    if os.path.exists(a.dst) and os.path.getmtime(a.dst) >= os.path.getmtime(a.src):
        return 0
    eccodes.codes_grib_multi_support_on()
    tmp = a.dst + ".tmp"
    with open(a.src, "rb") as f, open(tmp, "wb") as out:
        while True:
            h = eccodes.codes_grib_new_from_file(f)
            if h is None:
                break
            try:
                eccodes.codes_set_long(h, "forecastTime", eccodes.codes_get_long(h, "forecastTime") + a.hours)
                eccodes.codes_write(h, out)
            finally:
                eccodes.codes_release(h)
    os.replace(tmp, a.dst)
    return 0


if __name__ == "__main__":
    sys.exit(main())
