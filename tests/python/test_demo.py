"""`leeward demo` as a newcomer runs it: the invented cycle played through the
real service, every step published, every product passing the CF compliance
checker (IOOS compliance-checker, CF 1.11 suite), quicklooks beside them.
Shortened to three steps and a short pause so the suite stays quick; the
full demo is the same code with the default leads."""

from __future__ import annotations

import json
import re
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

from conftest import leeward_bin_path

netCDF4 = pytest.importorskip("netCDF4")
png = pytest.importorskip("PIL.Image")


def _steps(cycle: Path) -> list[Path]:
    """The step files of a cycle directory (its cyclone tracks, `*_cyclones.nc`, are not steps)."""
    return sorted(p for p in cycle.glob("*.nc") if "_cyclones" not in p.name)


def test_the_demo_publishes_every_step_through_the_service(tmp_path):
    d = tmp_path / "demo"
    r = subprocess.run([str(leeward_bin_path()), "demo", "--dir", str(d), "--leads", "0,6,12",
                        "--pause", "0.3"], capture_output=True, text=True, timeout=300)
    assert r.returncode == 0, r.stdout + r.stderr
    out = r.stdout
    for feed in ("regional", "global"):
        for lead in ("+000h", "+006h", "+012h"):
            row = [x for x in out.splitlines() if x.startswith(feed) and lead in x]
            assert row and " - " not in row[0].split(lead)[1][:30], f"{feed} {lead} not published:\n{out}"
    assert len(_steps(d / "products" / "global" / "20260314T0000Z")) == 3
    assert "leeward status --state-dir" in out, out
    cycle = d / "products" / "regional" / "20260314T0000Z"
    ncs = _steps(cycle)
    assert len(ncs) == 3
    # The cycle's cyclone tracks beside the steps, with their quicklook, and in the table:
    # the lee low of the scenario (demo-data/README.md) east of the range from hour 0.
    tracks = cycle / "c255_20260314T0000Z_cyclones.nc"
    for f in (tracks, tracks.with_suffix(".geojson"), tracks.with_suffix(".png")):
        assert f.is_file(), f"{f.name} missing: {sorted(p.name for p in cycle.iterdir())}"
    g = json.loads(tracks.with_suffix(".geojson").read_text())
    lee = [f["properties"] for f in g["features"] if f["properties"]["kind"] == "track"
           and 46.0 < f["properties"]["points"][0]["lat"] < 50.0 and 10.0 < f["properties"]["points"][0]["lon"] < 15.0]
    assert len(lee) == 1 and lee[0]["points_count"] == 3, g["features"]
    assert "Cyclone tracks in products/regional/20260314T0000Z/c255_20260314T0000Z_cyclones.geojson" in out, out
    assert "Eady growth rate within 500 km" in out and "terrain within 500 km upstream" in out, out
    # Each step's centres come from its own step process, found from its products while
    # its file was written (centres.made beside the staged file), and the earlier steps'
    # from the memo: the tracks process reads no step file back. (The test build also
    # reads each step file in its step process and stops if the two differ.)
    made = re.findall(r"cyclone tracks made .*steps=(\d+) .*steps_from_memo=(\d+) steps_read=(\d+)",
                      (d / "service.log").read_text())
    assert len(made) == 6, made
    assert all(m == s and r == "0" for s, m, r in made), made
    for nc in ncs:
        m = json.loads(nc.with_suffix(".json").read_text())
        assert m["state"] == "complete"
        # The demo's invented centre (GRIB2 centre 255, "missing" in WMO common code table
        # C-11) is named by the demo's configuration (output.institutions), not a number.
        import netCDF4
        with netCDF4.Dataset(nc) as ds:
            assert ds.getncattr("institution") == "Harrowmere Forecast Centre (invented for the leeward demo)"
        assert m["images"], "quicklooks listed in the manifest"
        # Every configured image of the demo (src/demo/play.rs) is there; the PV
        # budget's, read back from the file, from the second step on.
        want = ["trop_p_2", "isen_pv_320", "eta_500", "thick_1000-500"]
        if m["lead_hours"] > 0:
            want += ["thick_chg_06h_1000-500", "bud_stretch_290-300", "bud_dpvdt_300"]
        for w in want:
            assert f"{nc.stem}_{w}.png" in m["images"], (w, m["images"])
        for name in m["images"]:
            img = png.open(cycle / name)
            assert img.size[0] >= 600 and img.size[1] >= 400
            extrema = img.convert("L").getextrema()
            assert extrema[1] - extrema[0] > 100, f"{name} is flat"
    # The service's own ledger says the same.
    st = subprocess.run([str(leeward_bin_path()), "status", "--state-dir", str(d / "state")],
                        capture_output=True, text=True, timeout=30)
    assert "3 complete" in st.stdout, st.stdout

    # CF compliance of every product (no high-priority failure).
    sys.path.insert(0, str(Path(__file__).parent))
    import test_cf_output as cfo
    beside = Path(sys.executable).parent / "compliance-checker"
    exe = str(beside) if beside.is_file() else shutil.which("compliance-checker")
    assert exe, "compliance-checker not installed (tests/python/requirements.txt)"
    runs = cfo._ComplianceRuns(exe, ncs + [tracks], tmp_path)
    rep = runs.report()
    for nc in ncs + [tracks]:
        cf = rep[str(nc)]["cf:1.11"]
        high = [(c["name"], c["msgs"]) for c in cf["high_priorities"] if c["value"][0] < c["value"][1]]
        assert cfo._real_failures(nc, high) == [], f"{nc.name}: {high}"


def test_a_second_demo_run_in_the_same_directory_starts_afresh_and_a_foreign_one_is_refused(tmp_path):
    d = tmp_path / "again"
    args = [str(leeward_bin_path()), "demo", "--dir", str(d), "--leads", "0", "--pause", "0.2"]
    first = subprocess.run(args, capture_output=True, text=True, timeout=300)
    assert first.returncode == 0, first.stdout + first.stderr
    stamp = (d / "state").stat().st_mtime_ns
    second = subprocess.run(args, capture_output=True, text=True, timeout=300)
    assert second.returncode == 0, second.stdout + second.stderr
    assert "starts afresh" in second.stderr, second.stderr
    # A fresh ledger, and this run's steps in it: each published once.
    assert (d / "state").stat().st_mtime_ns != stamp
    st = subprocess.run([str(leeward_bin_path()), "status", "--state-dir", str(d / "state")],
                        capture_output=True, text=True, timeout=30)
    assert "1 complete" in st.stdout, st.stdout
    assert len(_steps(d / "products" / "regional" / "20260314T0000Z")) == 1
    # A directory that holds someone else's files is refused and left as it was.
    foreign = tmp_path / "mine"
    foreign.mkdir()
    (foreign / "notes.txt").write_text("keep me")
    r = subprocess.run([str(leeward_bin_path()), "demo", "--dir", str(foreign), "--leads", "0"],
                       capture_output=True, text=True, timeout=60)
    assert r.returncode != 0
    assert "not empty" in r.stderr and str(foreign) in r.stderr, r.stderr
    assert sorted(p.name for p in foreign.iterdir()) == ["notes.txt"]
