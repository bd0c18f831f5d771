"""The order in which steps arrive changes nothing in the published files.

Changes in time (thickness change, PV budget) join two steps of a cycle, and
whichever step comes second completes the other's file. leeward's output
contract (docs/output.md "Changes in time") is that every order gives the same
files: not only the same data but the same attributes, dimensions, chunking
and filters. Here the five steps of one cycle of the invented demo scenario
(+0 to +24 h, 6 h apart, written by `leeward demo --inputs-only`) are
delivered in several orders, each order into a directory of its own, and the
files are compared whole:

- dimensions (names and sizes) and every global attribute;
- the set of variables and, for each, its type, dimensions, every attribute
  (names, types and values), chunk sizes, filters, and its stored values bit
  for bit (netCDF4, the Unidata reader, with masking and scaling off).

Two things are left out on purpose, because they record when and in which
order the file was made, not what it holds: the date at the head of the
global `history` attribute (the rest of it is compared), and the position of
a variable in the file (a reader finds a variable by its name; one added to
a published file comes after those written with it).

Orders (lead hours): 0-6-12-18-24 (in order), 24-18-12-6-0 (reversed, every
step completes its successor's file), 0-12-6-24-18 (each step between two
published ones), and 0-6-12-24-18 (the case that left
`leeward_budget_interval_h` at 12 where an in-order run has 6).
"""

from __future__ import annotations

import re
import shutil
import subprocess
from pathlib import Path

import numpy as np
import pytest

from conftest import leeward_bin_path
from test_service import Service, deliver_renamed, demo_inputs, wait_for

netCDF4 = pytest.importorskip("netCDF4")

CYCLE = "2026031400"
LEADS = [0, 6, 12, 18, 24]
ORDERS = {
    "in-order": [0, 6, 12, 18, 24],
    "reversed": [24, 18, 12, 6, 0],
    "between": [0, 12, 6, 24, 18],
    "last-but-one-late": [0, 6, 12, 24, 18],
}


@pytest.fixture(scope="module")
def inputs(tmp_path_factory) -> dict[int, Path]:
    d = tmp_path_factory.mktemp("arrival-inputs")
    files = demo_inputs(d, CYCLE, LEADS)
    return dict(zip(LEADS, files))


def attrs(obj) -> dict:
    """Every attribute with its value and its type (a 6 stored as text and as
    an integer are different attributes)."""
    out = {}
    for k in obj.ncattrs():
        v = obj.getncattr(k)
        if isinstance(v, np.ndarray):
            out[k] = (str(v.dtype), v.tolist())
        else:
            out[k] = (type(v).__name__, v)
    return out


def describe(path: Path) -> dict:
    """Everything a reader can see in a file, but the order of the variables."""
    with netCDF4.Dataset(path) as ds:
        ds.set_auto_maskandscale(False)
        g = attrs(ds)
        if "history" in g:
            kind, text = g["history"]
            # "2026-05-01T12:00:00Z leeward X.Y.Z: ..." -- when it was made.
            g["history"] = (kind, re.sub(r"^\d{4}-\d\d-\d\dT\d\d:\d\d:\d\dZ ", "", text))
        out = {
            "format": ds.data_model,
            "dimensions": {n: (len(d), d.isunlimited()) for n, d in ds.dimensions.items()},
            "global attributes": g,
            "variables": {},
        }
        for name, v in ds.variables.items():
            data = np.asarray(v[...])
            out["variables"][name] = {
                "type": str(v.dtype),
                "dimensions": v.dimensions,
                "attributes": attrs(v),
                "chunking": v.chunking(),
                "filters": v.filters(),
                "values": data.tobytes(),
            }
        return out


def differences(a: dict, b: dict, name: str) -> list[str]:
    out = []
    for key in ("format", "dimensions", "global attributes"):
        if a[key] != b[key]:
            out.append(f"{name}: {key}: {a[key]} != {b[key]}")
    va, vb = a["variables"], b["variables"]
    if set(va) != set(vb):
        out.append(f"{name}: variables only in one: {sorted(set(va) ^ set(vb))}")
    for v in sorted(set(va) & set(vb)):
        for key, x in va[v].items():
            y = vb[v][key]
            if x == y:
                continue
            if key == "values":
                out.append(f"{name}: {v}: values differ")
            elif key == "attributes":
                for k in sorted(set(x) | set(y)):
                    if x.get(k) != y.get(k):
                        out.append(f"{name}: {v}: attribute {k}: {x.get(k)} != {y.get(k)}")
            else:
                out.append(f"{name}: {v}: {key} {x} != {y}")
    return out


def compare_trees(ref: dict[str, Path], got: dict[str, Path], label: str):
    assert sorted(got) == sorted(ref), (label, sorted(got), sorted(ref))
    problems = []
    for name in sorted(ref):
        problems += differences(describe(ref[name]), describe(got[name]), name)
    assert problems == [], f"{label} differs from in-order:\n" + "\n".join(problems[:40])


def process_in_order(inputs: dict[int, Path], order: list[int], out: Path) -> dict[str, Path]:
    """`leeward process` of one step at a time into one directory, as steps
    reach a one-off user; the same code adds changes to published files as the
    service does."""
    out.mkdir(parents=True)
    for lead in order:
        r = subprocess.run([str(leeward_bin_path()), "process", "--out", str(out), str(inputs[lead])],
                           capture_output=True, text=True, timeout=300)
        assert r.returncode == 0, r.stderr[-2000:]
    return {p.name: p for p in sorted(out.glob("*.nc"))}


def test_every_arrival_order_gives_the_same_whole_files(inputs, tmp_path):
    runs = {label: process_in_order(inputs, order, tmp_path / label)
            for label, order in ORDERS.items()}
    ref = runs["in-order"]
    # One file per step, and the cycle's cyclone tracks, made again from every
    # published step, compared whole like them.
    assert sorted(n for n in ref if not n.endswith("_cyclones.nc")) == sorted(
        f"c255_20260314T0000Z_{lead:03d}h.nc" for lead in LEADS), sorted(ref)
    assert "c255_20260314T0000Z_cyclones.nc" in ref, sorted(ref)
    # The budget of every step but the first is in its file, with its interval.
    for lead in LEADS[1:]:
        f = [p for n, p in ref.items() if f"_{lead:03d}h" in n][0]
        with netCDF4.Dataset(f) as ds:
            dt = ds.variables["bud_dpvdt"].getncattr("leeward_budget_interval_h")
            assert isinstance(dt, np.floating) and dt == 6.0, repr(dt)
    for label, got in runs.items():
        if label != "in-order":
            compare_trees(ref, got, label)


def test_the_service_publishes_the_same_whole_files_in_every_order(inputs, tmp_path):
    """The same through `leeward serve`: each step renamed into the incoming
    directory after the one before it is published."""
    # The step files and the cycle's cyclone tracks. The service makes the
    # tracks in a process of its own from a memo of each step file's centres,
    # read again only where a file changed (an earlier step arriving late adds
    # the later step's budget to its file); `process` reads every file each time, so a memo that
    # kept a revised file's old centres differs here.
    ref = process_in_order(inputs, ORDERS["in-order"], tmp_path / "reference")
    for label in ("in-order", "reversed", "between"):
        root = tmp_path / f"serve-{label}"
        svc = Service(root).start()
        for k, lead in enumerate(ORDERS[label], start=1):
            f = inputs[lead]
            deliver_renamed(f.read_bytes(), root / "in" / f.name)
            wait_for(lambda: len(svc.published()) == k, 120, f"{label}: step +{lead} h published")
        assert svc.stop() == 0
        got = {p.name: p for p in sorted((root / "out").rglob("*.nc"))}
        compare_trees(ref, got, f"serve {label}")
        shutil.rmtree(root)
