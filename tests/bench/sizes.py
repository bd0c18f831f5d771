#!/usr/bin/env python3
"""Stored size of each product before (16 bits everywhere) and after (the kept bits of
docs/output.md, "Precision"), from a file written exactly (`output.significant_bits = 23`).

    python3 tests/bench/sizes.py EXACT.nc [--json]

Each level is packed as leeward stores it (bit rounding to nearest, ties to even; the HDF5
shuffle of 4-byte elements; deflate at level 1), with Python's zlib in place of libdeflate,
so the bytes are zlib's (libdeflate's are about a quarter smaller, docs/performance.md); the
ratio between before and after is what this measures. The files' own sizes come from
`leeward process` itself (tests/bench/run.sh).
"""

from __future__ import annotations

import argparse
import json
import re
import sys
import zlib
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
import information  # noqa: E402

REPO = Path(__file__).resolve().parents[2]


def documented_bits() -> dict[str, int]:
    """product -> kept bits, from the table of docs/output.md "Precision"."""
    text = (REPO / "docs" / "output.md").read_text()
    sec = text.split("### Precision", 1)[1].split("\n### ", 1)[0].split("\n## ", 1)[0]
    return {m.group(1): int(m.group(2)) for m in re.finditer(r"^\| `([a-z_0-9]+)` \| (\d+) \|", sec, re.M)}


def packed_bytes(level: np.ndarray, nsb: int) -> int:
    """Bytes of one level as stored: rounded, fill value where missing, shuffled, deflated."""
    a = information.bit_round(np.asarray(level, dtype=np.float32), nsb)
    a = np.where(np.isfinite(a), a, np.float32(9.96921e36)).astype("<f4")
    shuffled = a.view(np.uint8).reshape(-1, 4).T.copy()
    return len(zlib.compress(shuffled.tobytes(), 1))


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("file")
    ap.add_argument("--json", action="store_true")
    a = ap.parse_args(argv)
    table = documented_bits()
    tot_b = tot_a = 0
    print("| product | levels | kept bits | before (16 bits), MB | after, MB | ratio |")
    print("| --- | --- | --- | --- | --- | --- |")
    for prod, levels in information.file_levels(a.file).items():
        nsb = table.get(prod, 16)
        before = sum(packed_bytes(l, 16) for l in levels)
        after = sum(packed_bytes(l, nsb) for l in levels)
        tot_b += before
        tot_a += after
        print(f"| {prod} | {len(levels)} | {nsb} | {before / 1e6:.1f} | {after / 1e6:.1f} | {before / after:.2f} |", flush=True)
        if a.json:
            print(json.dumps({"product": prod, "kept_bits": nsb, "before": before, "after": after}), flush=True)
    print(f"| all | | | {tot_b / 1e6:.1f} | {tot_a / 1e6:.1f} | {tot_b / tot_a:.2f} |")
    if a.json:
        print(json.dumps({"product": "all", "before": tot_b, "after": tot_a, "ratio": tot_b / tot_a}))
    return 0


if __name__ == "__main__":
    sys.exit(main())
