#!/usr/bin/env python3
"""Are two builds' products the same, bit for bit? For changes that must not change a value.

    python tests/bench/same_products.py make --leeward BIN --work DIR --out OUT
    python tests/bench/same_products.py compare OUT_BEFORE OUT_AFTER

`make` writes a fixed set of inputs once into DIR (the invented demo cycle 2026031400 at
every lead and the next cycle's first steps, for the changes in time and between runs; the
0.5-degree benchmark step with humidity and mean sea-level pressure and the same step 6 h
and 12 h later, for theta-e, humidity on isentropes, the PV budget and the cyclone tracks)
and runs `leeward process` of that build on them into OUT: the demo together, the bench
steps together, and each shared GRIB2 sample on its own (`$LEEWARD_SAMPLES` or
../shared/data/grib2), each into a directory of its own, with the exit code kept.

`compare` reads every NetCDF file of both trees with netCDF4 and checks that the same
files hold the same variables, dimensions, attributes (those that say when or how fast a
file was made excepted) and values, bit for bit (NaN where NaN); the GeoJSON and the
exit codes must match too. Prints each difference and exits 1 on any.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
REPO = HERE.parent.parent
# Attributes that say when or how long, not what.
TIMELY = {"history", "date_created", "date_modified", "date_issued", "date_metadata_modified",
          "leeward_published_at", "leeward_seconds"}


def inputs(py: str, work: Path, leeward: str) -> dict[str, list[Path]]:
    work.mkdir(parents=True, exist_ok=True)
    demo = work / "demo"
    if not (demo / "done").exists():
        for cycle, leads in (("2026031400", "0,6,12,18,24,30,36,42,48"), ("2026031406", "0,6,12")):
            subprocess.run([leeward, "demo", "--inputs-only", "--dir", str(demo / cycle),
                            "--cycle", cycle, "--leads", leads], check=True,
                           stdout=subprocess.DEVNULL)
        (demo / "done").write_text("")
    bench = work / "bench"
    bench.mkdir(exist_ok=True)
    base = bench / "step-0.5deg.grib2"
    moist = bench / "step-0.5deg-moist.grib2"
    if not moist.exists():
        subprocess.run([py, str(HERE / "make_input.py"), str(base), "--res", "0.5"], check=True,
                       stdout=subprocess.DEVNULL)
        subprocess.run([py, str(HERE / "add_humidity.py"), str(base), str(moist)], check=True)
    steps = [moist]
    for h in (6, 12):
        later = bench / f"step-0.5deg-moist-{h:02d}h.grib2"
        if not later.exists():
            subprocess.run([py, str(HERE / "shift_step.py"), str(moist), str(later),
                            "--hours", str(h)], check=True)
        steps.append(later)
    sets = {"demo": sorted(demo.glob("*/incoming/*.grib2")), "bench": steps}
    samples = Path(os.environ.get("LEEWARD_SAMPLES", REPO.parent / "shared" / "data" / "grib2"))
    if not samples.is_dir():
        samples = Path("/work/shared/data/grib2")
    for s in sorted(samples.glob("*.grib2")):
        sets[f"sample-{s.stem}"] = [s]
    return sets


def make(a) -> int:
    sets = inputs(sys.executable, Path(a.work), a.leeward)
    out = Path(a.out)
    out.mkdir(parents=True, exist_ok=False)
    codes = {}
    for name, files in sets.items():
        d = out / name
        d.mkdir()
        r = subprocess.run([a.leeward, "process", "--out", str(d), *map(str, files)],
                           capture_output=True, text=True)
        codes[name] = r.returncode
        print(f"{name}: {len(files)} input(s), exit {r.returncode}, "
              f"{len(list(d.rglob('*.nc')))} NetCDF file(s)", flush=True)
    (out / "exit-codes.json").write_text(json.dumps(codes, indent=1, sort_keys=True))
    return 0


def attrs(obj) -> dict:
    return {k: obj.getncattr(k) for k in obj.ncattrs() if k not in TIMELY}


def same_value(x, y) -> bool:
    if isinstance(x, np.ndarray) or isinstance(y, np.ndarray):
        return np.array_equal(np.asarray(x), np.asarray(y), equal_nan=True)
    if isinstance(x, float) and isinstance(y, float) and np.isnan(x) and np.isnan(y):
        return True
    return x == y


def compare_nc(a: Path, b: Path) -> list[str]:
    import netCDF4
    out = []
    with netCDF4.Dataset(a) as da, netCDF4.Dataset(b) as db:
        ga, gb = attrs(da), attrs(db)
        for k in sorted(set(ga) | set(gb)):
            if k not in ga or k not in gb or not same_value(ga[k], gb[k]):
                out.append(f"global attribute {k}: {ga.get(k)!r} vs {gb.get(k)!r}")
        dims_a = {k: len(v) for k, v in da.dimensions.items()}
        dims_b = {k: len(v) for k, v in db.dimensions.items()}
        if dims_a != dims_b:
            out.append(f"dimensions {dims_a} vs {dims_b}")
        va, vb = set(da.variables), set(db.variables)
        for v in sorted(va ^ vb):
            out.append(f"variable {v} only in {'the first' if v in va else 'the second'}")
        for v in sorted(va & vb):
            xa, xb = da.variables[v], db.variables[v]
            if xa.dimensions != xb.dimensions or xa.dtype != xb.dtype:
                out.append(f"{v}: {xa.dimensions} {xa.dtype} vs {xb.dimensions} {xb.dtype}")
                continue
            aa, ab = attrs(xa), attrs(xb)
            for k in sorted(set(aa) | set(ab)):
                if k not in aa or k not in ab or not same_value(aa[k], ab[k]):
                    out.append(f"{v} attribute {k}: {aa.get(k)!r} vs {ab.get(k)!r}")
            xa.set_auto_mask(False)
            xb.set_auto_mask(False)
            pa, pb = np.asarray(xa[...]), np.asarray(xb[...])
            if pa.dtype.kind == "f":
                # Bit for bit: compare the stored words, so a changed NaN or -0 shows too.
                pa = pa.view(f"u{pa.dtype.itemsize}")
                pb = pb.view(f"u{pb.dtype.itemsize}")
            if pa.shape != pb.shape or not np.array_equal(pa, pb):
                n = int(np.sum(pa != pb)) if pa.shape == pb.shape else -1
                out.append(f"{v}: values differ ({n} of {pa.size} words)")
    return out


def geojson(p: Path) -> dict:
    g = json.loads(p.read_text())
    for k in ("generated_at", "published_at"):
        g.pop(k, None)
    return g


def compare(a) -> int:
    ra, rb = Path(a.before), Path(a.after)
    bad = []
    ca = json.loads((ra / "exit-codes.json").read_text())
    cb = json.loads((rb / "exit-codes.json").read_text())
    if ca != cb:
        bad.append(f"exit codes {ca} vs {cb}")
    fa = {p.relative_to(ra) for p in ra.rglob("*") if p.suffix in (".nc", ".geojson")}
    fb = {p.relative_to(rb) for p in rb.rglob("*") if p.suffix in (".nc", ".geojson")}
    for p in sorted(fa ^ fb):
        bad.append(f"{p}: only in {'the first' if p in fa else 'the second'}")
    nvars = 0
    for p in sorted(fa & fb):
        if p.suffix == ".nc":
            diffs = compare_nc(ra / p, rb / p)
            import netCDF4
            with netCDF4.Dataset(ra / p) as d:
                nvars += len(d.variables)
        else:
            diffs = [] if geojson(ra / p) == geojson(rb / p) else ["GeoJSON differs"]
        bad += [f"{p}: {d}" for d in diffs]
    for line in bad:
        print(line)
    print(f"{len(fa & fb)} files, {nvars} variables compared: "
          f"{'the same, bit for bit' if not bad else f'{len(bad)} difference(s)'}")
    return 1 if bad else 0


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    sub = ap.add_subparsers(dest="what", required=True)
    m = sub.add_parser("make")
    m.add_argument("--leeward", default=str(REPO / "target" / "release" / "leeward"))
    m.add_argument("--work", default=str(REPO / "target" / "bench" / "same"))
    m.add_argument("--out", required=True)
    c = sub.add_parser("compare")
    c.add_argument("before")
    c.add_argument("after")
    a = ap.parse_args()
    return make(a) if a.what == "make" else compare(a)


if __name__ == "__main__":
    sys.exit(main())
