#!/usr/bin/env python3
"""Time decoding every field of a GRIB2 file with ecCodes alone, for comparison with leeward.

    python3 tests/bench/eccodes_decode.py FILE [--runs 3]

Each run opens the file, makes a handle for every field (multi-field messages split with
codes_grib_multi_support_on), calls codes_get_values and releases the handle. The best of
N runs is reported as one JSON line: fields, points, seconds, M points/s.
"""

from __future__ import annotations

import argparse
import json
import sys
import time

import eccodes


def decode_all(path):
    fields = points = 0
    with open(path, "rb") as f:
        while True:
            h = eccodes.codes_grib_new_from_file(f)
            if h is None:
                break
            try:
                points += eccodes.codes_get_values(h).size
                fields += 1
            finally:
                eccodes.codes_release(h)
    return fields, points


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("file")
    ap.add_argument("--runs", type=int, default=3, help="number of runs, best is reported (default 3)")
    args = ap.parse_args(argv)
    eccodes.codes_grib_multi_support_on()
    best = None
    fields = points = 0
    for _ in range(max(1, args.runs)):
        t0 = time.perf_counter()
        fields, points = decode_all(args.file)
        dt = time.perf_counter() - t0
        best = dt if best is None else min(best, dt)
    print(json.dumps({
        "file": args.file, "decoder": f"ecCodes {eccodes.codes_get_api_version()}",
        "fields": fields, "points": points, "runs": args.runs, "seconds": round(best, 4),
        "mpoints_per_s": round(points / best / 1e6, 2) if best else None,
    }))
    return 0


if __name__ == "__main__":
    sys.exit(main())
