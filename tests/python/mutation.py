"""Mutated GRIB2 files through `leeward inspect` and `leeward process`.

Seeds are small complete steps encoded by ecCodes (gribgen: several grids and
every packing leeward reads), the demo scenario's messages (our own encoder)
and, when present, the smallest real model samples. Each mutated file is a
seed changed by a seeded random choice of: bit flips, overwritten bytes, a
cut at any octet, lying section or message lengths (0, 4, 5, one more or
less, the largest), octets of the descriptions set to extremes (number of
points, bits per value, template numbers, scanning mode, time unit), a
section zeroed, bytes inserted or deleted, two seeds spliced, messages
repeated with garbage between them.

For every run: no panic (exit 101 or "panicked at" on standard error), no
death by a signal, no time-out, and every non-zero exit names the file on
standard error. The rule that a refusal must name its file is the project's
own; the rest is common practice for fuzzing command-line tools.

    python tests/python/mutation.py --files 2000            # as the suite runs it
    python tests/python/mutation.py --long                  # 100,000 files, for the benchmark

prints the counts (files, runs, exit codes, panics, signal deaths, time-outs,
unnamed refusals) and exits 1 when any of the last four is not zero.
"""

from __future__ import annotations

import argparse
import os
import random
import shutil
import subprocess
import sys
import tempfile
import time
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

TIMEOUT_S = 120.0


def split_messages(data: bytes) -> list[bytes]:
    """GRIB2 messages by section 0's total length (octets 9-16, WMO-No. 306)."""
    out, k = [], 0
    while k + 16 <= len(data) and data[k:k + 4] == b"GRIB":
        n = int.from_bytes(data[k + 8:k + 16], "big")
        if n < 16:
            break
        out.append(data[k:k + n])
        k += n
    return out


def sections(msg: bytes) -> list[tuple[int, int, int]]:
    """(offset, length, number) of each section after section 0."""
    out, p = [], 16
    while p + 5 <= len(msg) and msg[p:p + 4] != b"7777":
        n = int.from_bytes(msg[p:p + 4], "big")
        if n < 5:
            break
        out.append((p, n, msg[p + 4]))
        p += n
    return out


def make_seeds(workdir: Path, binary: Path, samples: Path | None, large: bool = False) -> list[bytes]:
    """Small complete steps: ecCodes-encoded (several grids, every packing), the demo's
    own messages, and the smallest real samples when present; with `large`, also the
    first messages of the real samples on big grids (slower to run)."""
    import gribgen as gg  # ecCodes and pyproj: imported only here

    seeds = []
    grids = [
        gg.regular_ll("ll", 60.0, 40.0, -10.0, 16, 1.0, 1.0, north_to_south=True),
        gg.regular_ll("ll_global", 90.0, -90.0, 0.0, 24, 15.0, 15.0, north_to_south=False,
                      global_=True),
        gg.projected("lcc", "lambert", 12, 10, 50e3, 50e3, 45.0, 10.0, lad=45.0, lov=10.0,
                     latin1=45.0, latin2=45.0),
        gg.rotated_ll("rot", -30.0, 10.0, -5.0, 5.0, -6.0, 13, 1.0, 1.0),
    ]
    packings = list(gg.PACKINGS)
    for k, g in enumerate(grids):
        for j, packing in enumerate(packings):
            if (k + j) % 2:  # every packing on two grids: 12 seeds
                continue
            try:
                p = gg.solid_body(workdir / f"seed_{g.name}_{packing}.grib2", g,
                                  levels_hpa=(850, 500, 300), packing=packing,
                                  grid_relative=g.projected)
            except Exception as e:  # noqa: BLE001 (an encoder's limit, not ours)
                print(f"seed {g.name} {packing} not encoded by ecCodes: {e!r}")
                continue
            seeds.append(p.read_bytes())
    demo = workdir / "demo"
    subprocess.run([str(binary), "demo", "--inputs-only", "--dir", str(demo), "--leads", "0"],
                   check=True, capture_output=True, timeout=120)
    msgs = split_messages((demo / "incoming" / "lwdemo_2026031400_000.grib2").read_bytes())
    # Temperature, height and winds on the first levels, and the surface fields at the end.
    seeds.append(b"".join(msgs[:12] + msgs[-3:]))
    if samples is not None and samples.is_dir():
        for name in ("scanning-mode.grib2", "scanning-mode-with-bitmap.grib2",
                     "no-radius-shapeOfEarth-7.grib2"):
            if (samples / name).exists():
                seeds.append((samples / name).read_bytes())
        big = ("ecmwf-0p4-2024010100-ccsds-10msgs.grib2", "cmc-rotated-latlon-jpeg2000.grib2")
        for name in ("gfs-2p5deg-2011100800-f072.grib2", "polar-stereo-jpeg2000.grib2",
                     "reduced-latlon-bitmap.grib2", *(big if large else ())):
            if (samples / name).exists():
                seeds.append(b"".join(split_messages((samples / name).read_bytes())[:2]))
    return seeds


EXTREMES32 = [0, 1, 4, 5, 0x7FFFFFFF, 0x80000000, 0xFFFFFFFF]


def mutate(rng: random.Random, seeds: list[bytes]) -> tuple[str, bytes]:
    """One mutated file from the seeds: (what was done, bytes)."""
    b = bytearray(rng.choice(seeds))
    kind = rng.randrange(12)
    n = len(b)
    if kind == 11:
        return fields_taken_out(rng, bytes(b))
    if kind == 0:
        for _ in range(rng.randint(1, 8)):
            i = rng.randrange(n)
            b[i] ^= 1 << rng.randrange(8)
        return "bit flips", bytes(b)
    if kind == 1:
        for _ in range(rng.randint(1, 16)):
            b[rng.randrange(n)] = rng.randrange(256)
        return "bytes overwritten", bytes(b)
    if kind == 2:
        return "cut", bytes(b[:rng.randrange(n)])
    msgs = split_messages(bytes(b)) or [bytes(b)]
    mi = rng.randrange(len(msgs))
    m = bytearray(msgs[mi])
    secs = sections(bytes(m))
    if kind == 3 and secs:
        off, length, _ = rng.choice(secs)
        v = rng.choice(EXTREMES32 + [length + 1, length - 1, rng.randrange(1 << 32)])
        m[off:off + 4] = (v % (1 << 32)).to_bytes(4, "big")
        what = "section length lies"
    elif kind == 4:
        v = rng.choice([0, 16, 20, len(m) - 1, len(m) + 1, 1 << 40, (1 << 64) - 1,
                        rng.randrange(1 << 64)])
        m[8:16] = v.to_bytes(8, "big")
        what = "message length lies"
    elif kind == 5 and secs:
        # Octets of the descriptions set to extremes: template numbers (3.13-14,
        # 4.8-9, 5.10-11), number of points (3.7-10), bits per value (5.20),
        # scanning mode (last octets of 3.x), forecast time unit (4.18).
        off, length, num = rng.choice(secs)
        at = {3: [6, 7, 8, 9, 12, 13, length - 1, 14, 15],
              4: [7, 8, 17, 18, 19, 20, 21, 22, 23],
              5: [5, 6, 7, 8, 9, 10, 19, 20]}.get(num, list(range(5, max(6, min(length, 24)))))
        for _ in range(rng.randint(1, 3)):
            i = off + rng.choice(at)
            if i < len(m):
                m[i] = rng.choice([0, 1, 2, 255, 254, 128, 127, rng.randrange(256)])
        what = f"section {num} octets set to extremes"
    elif kind == 6 and secs:
        off, length, _ = rng.choice(secs)
        end = min(len(m), off + length)
        m[off + 5:end] = bytes(max(0, end - off - 5))
        what = "section zeroed"
    elif kind == 7:
        i = rng.randrange(len(m) + 1)
        m[i:i] = bytes(rng.randrange(256) for _ in range(rng.randint(1, 64)))
        what = "bytes inserted"
    elif kind == 8:
        i = rng.randrange(len(m))
        del m[i:i + rng.randint(1, 64)]
        what = "bytes deleted"
    elif kind == 9:
        other = rng.choice(seeds)
        out = bytes(b[:rng.randrange(n)]) + other[rng.randrange(len(other)):]
        return "two seeds spliced", out
    else:
        junk = bytes(rng.randrange(256) for _ in range(rng.randint(0, 40)))
        msgs = msgs + [msgs[mi]] * rng.randint(1, 3)
        rng.shuffle(msgs)
        return "messages repeated with junk", junk.join(msgs)
    msgs[mi] = bytes(m)
    return what, b"".join(msgs)


def fields_taken_out(rng: random.Random, data: bytes) -> tuple[str, bytes]:
    """Messages left well formed (true lengths, '7777' at the end) but holding no
    complete field: only sections 0, 1 and 7777; a section 7 renumbered 2; every
    section 7 dropped. The long mutation run found such files read as "0 fields"
    and no problem, so a refusal could not name them."""
    how = rng.randrange(3)
    out = []
    for msg in split_messages(data) or [data]:
        secs = sections(msg)
        keep = []
        for off, length, num in secs:
            body = bytearray(msg[off:off + length])
            if how == 0 and num != 1:
                continue
            if how == 2 and num == 7:
                continue
            if how == 1 and num == 7 and rng.random() < 0.7:
                body[4] = 2
            keep.append(bytes(body))
        body = b"".join(keep)
        head = bytearray(msg[:16])
        head[8:16] = (16 + len(body) + 4).to_bytes(8, "big")
        out.append(bytes(head) + body + b"7777")
    what = ("sections 0, 1 and 7777 only", "section 7 renumbered 2", "every section 7 dropped")
    return what[how], b"".join(out)


@dataclass
class Tally:
    files: int = 0
    runs: int = 0
    exits: dict = field(default_factory=dict)
    panics: list = field(default_factory=list)
    signals: list = field(default_factory=list)
    timeouts: list = field(default_factory=list)
    unnamed: list = field(default_factory=list)

    def bad(self) -> int:
        return len(self.panics) + len(self.signals) + len(self.timeouts) + len(self.unnamed)

    def summary(self) -> str:
        ex = ", ".join(f"{k}: {v}" for k, v in sorted(self.exits.items(), key=str))
        return (f"{self.files} mutated files, {self.runs} runs (exit codes {ex}); "
                f"panics {len(self.panics)}, signal deaths {len(self.signals)}, "
                f"time-outs {len(self.timeouts)}, unnamed refusals {len(self.unnamed)}")


def run_one(binary: Path, path: Path, out: Path) -> list[tuple[str, int | None, str]]:
    """inspect and process one file: (command, exit code or None on time-out, stderr)."""
    res = []
    for cmd in (["inspect", str(path)], ["process", "--out", str(out), str(path)]):
        try:
            r = subprocess.run([str(binary), *cmd], capture_output=True, timeout=TIMEOUT_S,
                               env=dict(os.environ, RUST_BACKTRACE="0"))
            res.append((cmd[0], r.returncode, r.stderr.decode(errors="replace")))
        except subprocess.TimeoutExpired:
            res.append((cmd[0], None, ""))
    shutil.rmtree(out, ignore_errors=True)
    return res


def campaign(binary: Path, seeds: list[bytes], files: int, seed: int, workdir: Path,
             jobs: int, keep: Path | None = None, progress: bool = False) -> Tally:
    """Run `files` mutated files through both commands, `jobs` at a time."""
    t = Tally()
    t0 = time.monotonic()

    def one(k: int):
        rng = random.Random(seed * 1_000_003 + k)
        what, data = mutate(rng, seeds)
        path = workdir / f"mut{k % (4 * jobs):03d}_{k}.grib2"
        path.write_bytes(data)
        res = run_one(binary, path, workdir / f"out{k}")
        return k, what, data, path, res

    with ThreadPoolExecutor(max_workers=jobs) as pool:
        for k, what, data, path, res in pool.map(one, range(files)):
            t.files += 1
            bad = False
            for cmd, code, err in res:
                t.runs += 1
                t.exits[(cmd, code)] = t.exits.get((cmd, code), 0) + 1
                label = f"#{k} {what}: {cmd} exit {code}"
                if code is None:
                    t.timeouts.append(label)
                    bad = True
                elif code < 0:
                    t.signals.append(label)
                    bad = True
                elif code == 101 or "panicked at" in err:
                    t.panics.append(f"{label}: {err[-500:]}")
                    bad = True
                elif code != 0 and str(path) not in err:
                    t.unnamed.append(f"{label}: {err[-500:]}")
                    bad = True
            if bad and keep is not None:
                keep.mkdir(parents=True, exist_ok=True)
                (keep / f"case{k}.grib2").write_bytes(data)
            path.unlink(missing_ok=True)
            if progress and t.files % 1000 == 0:
                rate = t.files / (time.monotonic() - t0)
                print(f"  {t.files} files ({rate:.1f}/s): {t.summary()}", flush=True)
    return t


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--files", type=int, default=None, help="how many (2,000; 100,000 with --long)")
    ap.add_argument("--long", action="store_true",
                    help="100,000 files, the large samples' first messages among the seeds")
    ap.add_argument("--seed", type=int, default=20260314)
    ap.add_argument("--jobs", type=int, default=os.cpu_count() or 2)
    ap.add_argument("--bin", default=os.environ.get("LEEWARD_BIN", "target/release/leeward"))
    ap.add_argument("--samples", default=os.environ.get("LEEWARD_SAMPLES", "../shared/data/grib2"))
    ap.add_argument("--keep", default="target/mutation-failures",
                    help="where failing cases are kept")
    a = ap.parse_args()
    files = a.files if a.files is not None else (100_000 if a.long else 2000)
    binary = Path(a.bin).resolve()
    with tempfile.TemporaryDirectory(prefix="leeward-mutation-") as d:
        wd = Path(d)
        seeds = make_seeds(wd, binary, Path(a.samples), large=a.long)
        print(f"{len(seeds)} seeds; {files} mutated files, seed {a.seed}, {a.jobs} at a time, "
              f"{binary}", flush=True)
        t0 = time.monotonic()
        t = campaign(binary, seeds, files, a.seed, wd, a.jobs, Path(a.keep), progress=True)
    print(t.summary())
    print(f"{time.monotonic() - t0:.0f} s")
    for kind in ("panics", "signals", "timeouts", "unnamed"):
        for x in getattr(t, kind)[:10]:
            print(f"{kind}: {x}")
    return 1 if t.bad() else 0


if __name__ == "__main__":
    sys.exit(main())
