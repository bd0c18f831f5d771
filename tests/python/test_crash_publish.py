"""A step that changes several published files survives a kill at every
point of its publication.

The +6 h step of the invented demo scenario, arriving after +0, +12 and +18 h
are published, changes three product files: its own (with its image), the
+12 h file (its 6-hour thickness change and its PV budget against +6 h) and
the +18 h file (its 12-hour thickness change); each has a manifest. leeward
records every rename of such a publication in its ledger before the first
one and finishes a recorded publication when it starts (docs/operations.md,
"Restart and crash behaviour").

The service is made to abort (SIGABRT, as sudden as kill -9 for the files: no
handler runs) at each named point of the sequence in turn, through its
test-only hook `LEEWARD_TEST_CRASH_AT`: before the record, after it, after
each rename, and before the ledger's `published` record. After each crash it
is started again without the hook, and then:

- every manifest describes its file: size and SHA-256 (FIPS 180-4, Python's
  hashlib) and the variables in it (netCDF4);
- every file has the revision and the contents (whole files: attributes,
  chunking, filters, values; see test_arrival_order.py) of a run without a
  crash, and every manifest the same revision: no revision half made, none
  counted twice;
- the ledger has one `published` record for the step and no publication left
  open, and `leeward status` reports no manifest out of step;
- nothing is left in the staging area.
"""

from __future__ import annotations

import hashlib
import json
import shutil
import signal
import subprocess
from pathlib import Path

import pytest

from conftest import leeward_bin_path
from test_arrival_order import describe, differences
from test_service import Service, deliver_renamed, demo_inputs, wait_for

netCDF4 = pytest.importorskip("netCDF4")

CYCLE = "2026031400"
QUICKLOOK = '\n[quicklook]\nenabled = true\nimages = ["eta@500"]\n'


def manifest_problems(out: Path) -> list[str]:
    """Every manifest under `out` against the file it names."""
    problems = []
    for mpath in sorted(out.rglob("*.json")):
        if any(part.startswith(".") for part in mpath.relative_to(out).parts):
            continue
        m = json.loads(mpath.read_text())
        product = mpath.parent / m["product"]
        if not product.exists():
            problems.append(f"{mpath.name}: {m['product']} missing")
            continue
        data = product.read_bytes()
        if len(data) != m["product_bytes"]:
            problems.append(f"{mpath.name}: {len(data)} bytes, manifest {m['product_bytes']}")
        elif hashlib.sha256(data).hexdigest() != m["product_checksum"]:
            problems.append(f"{mpath.name}: SHA-256 differs")
        with netCDF4.Dataset(product) as ds:
            if sorted(ds.variables) != sorted(m["variables"]):
                problems.append(f"{mpath.name}: variables differ")
    return problems


def snapshot(out: Path) -> dict:
    """Files (whole) and manifest revisions of an output tree."""
    files = {p.name: describe(p) for p in sorted(out.rglob("*.nc"))}
    images = {p.name: p.read_bytes() for p in sorted(out.rglob("*.png"))}
    images.update({p.name: p.read_bytes() for p in sorted(out.rglob("*.geojson"))})
    revisions = {p.name: json.loads(p.read_text())["revision"] for p in sorted(out.rglob("*.json"))}
    return {"files": files, "images": images, "revisions": revisions}


def hidden_leftovers(out: Path) -> list[Path]:
    left = [p for p in out.rglob("*") if p.name.startswith(".") and p.name != ".publish"]
    stage = out / "demo" / ".publish"
    return left + (list(stage.iterdir()) if stage.exists() else [])


@pytest.fixture(scope="module")
def prepared(tmp_path_factory):
    """A tree with +0, +12 and +18 h published (the service stopped), and the
    outcome of delivering +6 h to it without a crash."""
    base = tmp_path_factory.mktemp("crash-base")
    files = dict(zip([0, 6, 12, 18], demo_inputs(base / "gen", CYCLE, [0, 6, 12, 18])))
    root = base / "root"
    svc = Service(root, extra_service=QUICKLOOK).start()
    for k, lead in enumerate([0, 12, 18], start=1):
        deliver_renamed(files[lead].read_bytes(), root / "in" / files[lead].name)
        wait_for(lambda: len(svc.published()) == k, 120, f"+{lead} h published")
    assert svc.stop() == 0
    saved = base / "saved"
    shutil.copytree(root, saved)
    svc = Service(root, extra_service=QUICKLOOK).start()
    deliver_renamed(files[6].read_bytes(), root / "in" / files[6].name)
    wait_for(lambda: len(svc.published()) == 4, 120, "+6 h published")
    assert svc.stop() == 0
    intent = [r for r in svc.ledger() if r["event"] == "publishing" and r["step"]["lead"] == 6]
    assert len(intent) == 1
    moves = intent[0]["moves"]
    targets = [Path(m["target"]).name for m in moves]
    # Its own file and image, the cycle's cyclone tracks (NetCDF, GeoJSON and
    # map), the two later files, their manifests, its own manifest last: the
    # tracks are published with the step, so a kill cannot leave them behind.
    tracks = [t for t in targets if "_cyclones." in t]
    assert sorted(Path(t).suffix for t in tracks) == [".geojson", ".nc", ".png"], targets
    assert targets[-1].endswith("_006h.json") and len(moves) == 10, targets
    return dict(root=root, saved=saved, files=files, moves=moves,
                reference=snapshot(root / "out"))


def restore(prepared) -> Path:
    root = prepared["root"]
    shutil.rmtree(root)
    shutil.copytree(prepared["saved"], root)
    return root


def points(moves) -> list[str]:
    return (["before-intent", "after-intent"]
            + [f"after-move-{k}" for k in range(1, len(moves) + 1)]
            + ["before-record"])


def test_a_kill_at_every_point_of_a_publication_leaves_every_manifest_right(prepared):
    ref = prepared["reference"]
    f6 = prepared["files"][6]
    out_of_step_at_crash = {}
    for point in points(prepared["moves"]):
        root = restore(prepared)
        svc = Service(root, extra_service=QUICKLOOK,
                      env={"LEEWARD_TEST_CRASH_AT": point}).start()
        deliver_renamed(f6.read_bytes(), root / "in" / f6.name)
        wait_for(lambda: svc.proc.poll() is not None, 120, f"the service aborted at {point}")
        assert svc.proc.returncode == -signal.SIGABRT, (point, svc.proc.returncode)
        svc.logf.close()
        out_of_step_at_crash[point] = manifest_problems(root / "out")

        svc = Service(root, extra_service=QUICKLOOK).start()
        wait_for(lambda: any(r["step"]["lead"] == 6 for r in svc.published()), 120,
                 f"+6 h published after the crash at {point}")
        st = subprocess.run([str(leeward_bin_path()), "status", "--state-dir", str(root / "state"),
                             "--json", "--verify"], capture_output=True, text=True, timeout=60)
        assert svc.stop() == 0
        report = json.loads(st.stdout)
        assert report["manifests_not_matching"] == [] and report["publishing"] == [], (point, report)
        assert manifest_problems(root / "out") == [], point
        got = snapshot(root / "out")
        assert got["revisions"] == ref["revisions"], (point, got["revisions"], ref["revisions"])
        assert got["images"] == ref["images"], point
        assert sorted(got["files"]) == sorted(ref["files"]), point
        diffs = [d for n in ref["files"] for d in differences(ref["files"][n], got["files"][n], n)]
        assert diffs == [], (point, diffs[:10])
        published6 = [r for r in svc.published() if r["step"]["lead"] == 6]
        assert len(published6) == 1, (point, published6)
        assert hidden_leftovers(root / "out") == [], (point, hidden_leftovers(root / "out"))
        log = svc.log.read_text()
        if point.startswith("after-") or point == "before-record":
            assert "publication cut short by a stop finished" in log, point
    # The kills fell where the files and their manifests disagree: between
    # the rename of an updated file and that of its manifest.
    torn = [p for p, problems in out_of_step_at_crash.items() if problems]
    assert torn, out_of_step_at_crash
    print(f"points killed: {len(out_of_step_at_crash)}; manifests out of step at the kill: "
          + ", ".join(f"{p}={len(v)}" for p, v in out_of_step_at_crash.items()))


def test_status_reports_a_manifest_that_does_not_match_its_file(prepared, tmp_path):
    root = restore(prepared)
    product = sorted((root / "out").rglob("*_012h.nc"))[0]
    with open(product, "ab") as f:
        f.write(b"\0")  # what a writer outside leeward might do
    st = subprocess.run([str(leeward_bin_path()), "status", "--state-dir", str(root / "state")],
                        capture_output=True, text=True, timeout=60)
    assert "manifests that do not match their files" in st.stdout, st.stdout
    assert product.name in st.stdout and "its manifest says" in st.stdout, st.stdout
    # Same size, other bytes: only --verify (SHA-256) sees it.
    data = bytearray(product.read_bytes()[:-1])
    data[-1] ^= 0xFF
    product.write_bytes(bytes(data))
    plain = subprocess.run([str(leeward_bin_path()), "status", "--state-dir", str(root / "state"),
                            "--json"], capture_output=True, text=True, timeout=60)
    assert json.loads(plain.stdout)["manifests_not_matching"] == []
    verified = subprocess.run([str(leeward_bin_path()), "status", "--state-dir", str(root / "state"),
                               "--json", "--verify"], capture_output=True, text=True, timeout=60)
    bad = json.loads(verified.stdout)["manifests_not_matching"]
    assert [Path(p).name for p, _ in bad] == [product.name] and "SHA-256" in bad[0][1], bad
