#!/usr/bin/env python3
"""Bitwise real information content of each product, and the mantissa bits that keep it.

    python3 tests/bench/information.py FILE.nc [FILE.nc ...] [--fraction 0.99] [--json]

The files must hold exact float32 values (written with `output.significant_bits = 23`), so
that the trailing bits are what the computation left there, not zeros of an earlier rounding.

Method: Kloewer, Razinger, Dominguez, Dueben and Palmer (2021), "Compressing atmospheric
data into its real information content", Nature Computational Science 1, 713-724
(docs/references.md). Every float32 is read as 32 bits (sign, exponent, mantissa), with the
exponent made signed (sign of the exponent, then its magnitude) as the paper does, so that
values either side of 1 do not look informative. For each bit position, the mutual
information between that bit at a grid point and the same bit at its neighbour is counted
over every pair of neighbouring points with values (all levels pooled). Information below
what a fair coin gives by chance on that many pairs is set to zero (the paper's threshold:
binomial, confidence 0.99, `1 - H(1/2 + z / (2 sqrt(n)))`). The kept mantissa bits are the
fewest for which the bits up to and including them hold `--fraction` of the summed
information. Neighbours are taken along rows (longitude, the paper's choice) and along
columns; per bit the larger of the two counts, so the choice is the more cautious one.

The largest error that rounding to those bits introduces is measured on the same values
(round to nearest, ties to even, as leeward's writer).
"""

from __future__ import annotations

import argparse
import json
import math
import re
import sys
from collections import OrderedDict
from statistics import NormalDist

import numpy as np

#: Sign bit and 8 exponent bits come before the 23 mantissa bits of a float32.
HEAD_BITS = 9
#: Information (bits) from which a mantissa bit counts as the start of a field's real
#: information; bits that pass the significance threshold by chance hold about 1e-4.
LEAD_INFORMATION = 0.01


def signed_exponent(a: np.ndarray) -> np.ndarray:
    """The bits of float32 `a` with the biased exponent replaced by a sign and a magnitude
    (Kloewer et al. 2021; zero keeps exponent 0)."""
    u = a.astype(np.float32).view(np.uint32).astype(np.int64)
    sf = u & 0x807F_FFFF
    e = ((u >> 23) & 0xFF) - 127
    eabs = np.where(e == -127, 0, np.abs(e))
    esign = np.where(e < 0, 0x4000_0000, 0)
    return (sf | esign | (eabs << 23)).astype(np.uint32)


def pair_counts(a: np.ndarray, axis: int) -> tuple[np.ndarray, np.ndarray, np.ndarray, int]:
    """Per bit: how often it is 1 at the first point, at the second, at both, and the number
    of neighbouring pairs along `axis` of the 2-D field `a` where both have values."""
    n0 = np.zeros(32)
    n1 = np.zeros(32)
    n11 = np.zeros(32)
    lo = np.take(a, range(0, a.shape[axis] - 1), axis=axis).ravel()
    hi = np.take(a, range(1, a.shape[axis]), axis=axis).ravel()
    ok = np.isfinite(lo) & np.isfinite(hi)
    lo, hi = lo[ok], hi[ok]
    u0 = signed_exponent(lo)
    u1 = signed_exponent(hi)
    both = u0 & u1
    for b in range(32):
        m = np.uint32(1 << (31 - b))
        n0[b] = np.count_nonzero(u0 & m)
        n1[b] = np.count_nonzero(u1 & m)
        n11[b] = np.count_nonzero(both & m)
    return n0, n1, n11, int(lo.size)


def mutual_information(n0, n1, n11, n: int) -> np.ndarray:
    """Per bit, the mutual information (bits) of the joint counts of a pair."""
    out = np.zeros(len(n0))
    if n == 0:
        return out
    for i in range(len(n0)):
        p11 = n11[i] / n
        p10 = (n0[i] - n11[i]) / n
        p01 = (n1[i] - n11[i]) / n
        p00 = 1.0 - p11 - p10 - p01
        pa = (p10 + p11, p00 + p01)  # first point: 1, 0
        pb = (p01 + p11, p00 + p10)  # second point: 1, 0
        mi = 0.0
        for p, x, y in ((p11, 0, 0), (p10, 0, 1), (p01, 1, 0), (p00, 1, 1)):
            if p > 0.0:
                mi += p * math.log2(p / (pa[x] * pb[y]))
        out[i] = max(mi, 0.0)
    return out


def free_entropy(n: int, confidence: float = 0.99) -> float:
    """Information a pair of independent fair bits shows by chance on `n` pairs at this
    confidence (the paper's significance threshold): 1 - H(p), p = 1/2 + z/(2 sqrt n)."""
    if n == 0:
        return 1.0
    z = NormalDist().inv_cdf(1.0 - (1.0 - confidence) / 2.0)
    p = min(0.5 + z / (2.0 * math.sqrt(n)), 1.0)
    h = -sum(q * math.log2(q) for q in (p, 1.0 - p) if q > 0.0)
    return 1.0 - h


def bit_information(levels, confidence: float = 0.99) -> np.ndarray:
    """Per bit, the real information of the 2-D fields in `levels` (pooled counts), the
    larger of the row and column neighbours', insignificant values set to zero."""
    best = np.zeros(32)
    for axis in (1, 0):
        tot = [np.zeros(32), np.zeros(32), np.zeros(32), 0]
        for a in levels:
            c = pair_counts(np.asarray(a, dtype=np.float32), axis)
            for j in range(3):
                tot[j] += c[j]
            tot[3] += c[3]
        mi = mutual_information(*tot)
        mi[mi <= free_entropy(tot[3], confidence)] = 0.0
        best = np.maximum(best, mi)
    return best


def real_part(info: np.ndarray) -> np.ndarray:
    """`info` without the artificial tail. From the most informative mantissa bit on, the
    information of a real field (starting at the first mantissa bit with at least
    `LEAD_INFORMATION`, since a field's information sits in its leading bits; what chance lets
    through the threshold is far less) keeps falling; where, once below 60 % of the largest, it stops
    falling (the next three bits all keep at least 80 % of a bit's information) or where it
    reaches zero, the values are on the
    lattice of an earlier quantization (the input's GRIB packing rounds to a fixed step, and
    products computed from it keep that step's pattern in their last bits), so the rest is
    set to zero. This cut is leeward's; the paper notes that earlier rounding leaves
    information in the last bits.
    """
    out = info.copy()
    m = info[HEAD_BITS:]
    start = np.flatnonzero(m >= LEAD_INFORMATION)
    if start.size == 0:
        out[HEAD_BITS:] = 0.0
        return out
    i = int(start[0])
    top = m[i]
    while i + 1 < m.size and m[i] > 0.0 and (m[i] >= 0.6 * top or m[i + 1 : i + 4].min() < 0.8 * m[i]):
        i += 1
        top = max(top, m[i])
    out[HEAD_BITS + i + 1 :] = 0.0
    return out


def kept_bits(info: np.ndarray, fraction: float = 0.99) -> int:
    """Fewest mantissa bits (at least 1) whose leading bits hold `fraction` of the real
    information (the artificial tail left out, see `real_part`)."""
    info = real_part(info)
    total = float(info.sum())
    if total <= 0.0:
        return 1
    cdf = np.cumsum(info) / total
    i = int(np.argmax(cdf >= fraction - 1e-12))
    return int(min(max(i + 1 - HEAD_BITS, 1), 23))


def bit_round(a: np.ndarray, nsb: int) -> np.ndarray:
    """Round float32 `a` to `nsb` mantissa bits, to nearest, ties to even (leeward's writer)."""
    a = np.asarray(a, dtype=np.float32)
    if nsb >= 23:
        return a.copy()
    shift = 23 - nsb
    u = a.view(np.uint32).astype(np.uint64)
    half = (1 << (shift - 1)) - 1
    odd = (u >> shift) & 1
    r = ((u + half + odd) & ~np.uint64((1 << shift) - 1)) & 0xFFFF_FFFF
    out = r.astype(np.uint32).view(np.float32)
    return np.where(np.isfinite(a) & np.isfinite(out), out, a)


def rounding_error(levels, nsb: int) -> tuple[float, float]:
    """Largest absolute and relative error of rounding the values to `nsb` bits."""
    mabs = 0.0
    mrel = 0.0
    for a in levels:
        a = np.asarray(a, dtype=np.float32)
        ok = np.isfinite(a)
        if not ok.any():
            continue
        x = a[ok].astype(np.float64)
        d = np.abs(bit_round(a[ok], nsb).astype(np.float64) - x)
        mabs = max(mabs, float(d.max()))
        nz = x != 0.0
        if nz.any():
            mrel = max(mrel, float((d[nz] / np.abs(x[nz])).max()))
    return mabs, mrel


_LAYER = re.compile(r"^(.*?)_\d+(?:p\d+)?_\d+(?:p\d+)?$")


def product_name(var: str) -> str:
    """The product a file variable belongs to (`thick_1000_500` -> `thick`)."""
    m = _LAYER.match(var)
    return m.group(1) if m else var


def file_levels(path: str):
    """{product: [2-D arrays]} of the data variables of one leeward file."""
    import netCDF4

    out: dict[str, list] = OrderedDict()
    with netCDF4.Dataset(path) as ds:
        for name, v in ds.variables.items():
            # (time, level, y, x), or (time, y, x) for a single field such as mslp.
            if v.ndim not in (3, 4) or "grid_mapping" not in v.ncattrs():
                continue
            nsb = int(v.getncattr("quantization_nsb")) if "quantization_nsb" in v.ncattrs() else 23
            if nsb < 23:
                raise SystemExit(f"{path}: {name} was rounded to {nsb} bits; write the file with output.significant_bits = 23")
            v.set_auto_mask(True)
            data = v[0]
            arr = np.ma.filled(data.astype(np.float32), np.nan)
            if arr.ndim == 2:
                arr = arr[np.newaxis]
            out.setdefault(product_name(name), []).extend(arr[k] for k in range(arr.shape[0]))
    return out


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("files", nargs="+")
    ap.add_argument("--fraction", type=float, default=0.99)
    ap.add_argument("--confidence", type=float, default=0.99)
    ap.add_argument("--json", action="store_true", help="one JSON line per product and file")
    a = ap.parse_args(argv)
    print(f"| file | product | information (bits per value) | kept mantissa bits ({a.fraction:.0%}) | largest error | largest relative error |")
    print("| --- | --- | --- | --- | --- | --- |")
    for path in a.files:
        for prod, levels in file_levels(path).items():
            info = bit_information(levels, a.confidence)
            k = kept_bits(info, a.fraction)
            eabs, erel = rounding_error(levels, k)
            short = path.rsplit("/", 1)[-1]
            print(f"| {short} | {prod} | {info.sum():.2f} | {k} | {eabs:.3g} | {erel:.2g} |", flush=True)
            if a.json:
                print(json.dumps({"file": short, "product": prod, "information": float(info.sum()),
                                  "kept_bits": k, "max_error": eabs, "max_rel_error": erel,
                                  "per_bit": [round(float(x), 5) for x in info]}), flush=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
