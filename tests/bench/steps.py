#!/usr/bin/env python3
"""The first and the later step of a cycle as `leeward process` runs them, with wall time,
peak resident memory and file size, before (16 bits for every product) and after (the kept
bits of docs/output.md, "Precision").

    python3 tests/bench/steps.py --leeward BIN --input STEP.grib2 --next NEXT.grib2 --work DIR [--json]

The later step is processed into the directory that holds the first step's file, so it adds
the changes in time and the PV budget, which read the first file back. Each run is timed by
GNU time (`%e` wall seconds, `%M` peak resident KiB). The bytes each variable takes in each
file, before and after, are read from the files by HDF5 itself (stored.py).
"""

from __future__ import annotations

import argparse
import json
import shutil
import subprocess
import sys
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))
import stored  # noqa: E402


def per_variable(files: list[Path]) -> dict[str, int]:
    """Variable -> bytes stored, summed over `files`."""
    total: dict[str, int] = {}
    for p in files:
        for name, b in stored.stored_bytes(str(p)).items():
            total[name] = total.get(name, 0) + b
    return total


def run(binary: str, config: Path, out: Path, grib: str) -> dict:
    """One `leeward process` run: wall seconds and peak resident MiB."""
    cmd = ["/usr/bin/time", "-f", "LEEWARD_TIME %e %M", binary, "process", "--config", str(config),
           "--out", str(out), grib]
    cp = subprocess.run(cmd, capture_output=True, text=True, check=False)
    line = [l for l in cp.stderr.splitlines() if l.startswith("LEEWARD_TIME")]
    if cp.returncode != 0 or not line:
        raise SystemExit(f"{' '.join(cmd)} failed ({cp.returncode}):\n{cp.stderr[-2000:]}")
    _, wall, kib = line[-1].split()
    return {"wall_s": float(wall), "peak_rss_mib": int(kib) / 1024.0}


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--leeward", required=True)
    ap.add_argument("--input", required=True)
    ap.add_argument("--next", required=True)
    ap.add_argument("--work", required=True)
    ap.add_argument("--json", action="store_true")
    a = ap.parse_args(argv)
    work = Path(a.work)
    shutil.rmtree(work, ignore_errors=True)
    work.mkdir(parents=True)
    result = {}
    for label, text in (("before", "[output]\nsignificant_bits = 16\n"), ("after", "")):
        cfg = work / f"{label}.toml"
        cfg.write_text(text)
        out = work / label
        first = run(a.leeward, cfg, out, a.input)
        files = sorted(out.glob("*.nc"))
        first["bytes"] = sum(p.stat().st_size for p in files)
        first["variables"] = per_variable(files)
        later = run(a.leeward, cfg, out, a.next)
        later["bytes"] = sum(p.stat().st_size for p in sorted(out.glob("*.nc"))) - first["bytes"]
        later["variables"] = per_variable(sorted(set(out.glob("*.nc")) - set(files)))
        result[label] = {"first": first, "later": later}
        for what, r in (("first", first), ("later", later)):
            print(f"{label:6s} {what:5s} step: {r['wall_s']:.2f} s, peak {r['peak_rss_mib']:.0f} MiB, "
                  f"{r['bytes'] / 1e6:.1f} MB written", flush=True)
        shutil.rmtree(out, ignore_errors=True)
    if a.json:
        print(json.dumps({"what": "steps", **result}))
    return 0


if __name__ == "__main__":
    sys.exit(main())
