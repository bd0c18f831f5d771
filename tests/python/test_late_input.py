"""No step lost to a producer that writes its files in pieces.

A close is not proof that a file is finished: many sites join per-field files
into a step file by appending to it, closing after each piece, and others
rewrite the whole file under a temporary name and rename it into place each
time it grows. Under each completeness rule ("fields", "files", "marker")
the service here is led to make each step after its first piece (the "files"
rule counts the one file at once, the marker comes after the first piece,
the "fields" rule's step timeout is short), then gets the rest piece by
piece, each piece only once the step was made from the last. The promise:

- late input is never thrown away while the cycle is within catch-up: the
  step is made again from all of it, and the last products are the very data
  and attributes `leeward process` makes from the whole files;
- each make publishes one new revision of each manifest it touches: the
  renames the ledger records for a manifest are revisions 1, 2, ... N, each
  once, and a reader watching the tree never sees one revision with two
  contents nor a revision go back;
- nothing is reported "not used".

The steps are the invented demo scenario's (`leeward demo --inputs-only`):
+6 h delivered by appending, +12 h by renaming.
"""

from __future__ import annotations

import hashlib
import json
import os
import threading
import time
from pathlib import Path

import pytest

from test_arrival_order import compare_trees
from test_service import (
    Service,
    demo_inputs,
    messages,
    reference_products,
    step_key,
    visible_files,
    wait_for,
)

CYCLE = "2026031400"
PIECES = 3
MARKER = r"^lwdemo_(?P<cycle>\d{10})_(?P<step>\d{3})\.ready$"


def pieces(data: bytes, n: int = PIECES) -> list[bytes]:
    """The file's GRIB2 messages in `n` runs of whole messages, in file order."""
    msgs = messages(data)
    k = -(-len(msgs) // n)
    return [b"".join(msgs[i:i + k]) for i in range(0, len(msgs), k)]


def append_piece(dest: Path, piece: bytes):
    """In place: opened for appending, written, closed."""
    with open(dest, "ab") as f:
        f.write(piece)


def rename_whole(dest: Path, whole: bytes):
    """The file so far written under a hidden name and renamed over the old one."""
    tmp = dest.parent / f".{dest.name}.tmp"
    tmp.write_bytes(whole)
    os.rename(tmp, dest)


class ManifestWatch(threading.Thread):
    """Reads every manifest of the output tree all the time: the revisions it
    sees of one manifest never go back, and one revision never has two contents."""

    def __init__(self, out: Path):
        super().__init__(daemon=True)
        self.out = out
        self.stop_flag = False
        self.seen: dict[str, dict[int, str]] = {}
        self.last: dict[str, int] = {}
        self.failures: list[str] = []
        self.reads = 0


    def run(self):
        try:
            self.watch()
        except Exception as e:  # noqa: BLE001 - a watcher that dies must fail the test
            self.failures.append(f"the watcher stopped: {e!r}")

    def watch(self):
        while not self.stop_flag:
            for p in (f for f in visible_files(self.out) if f.suffix == ".json"):
                try:
                    raw = p.read_bytes()
                except FileNotFoundError:
                    continue
                try:
                    rev = json.loads(raw).get("revision")
                except json.JSONDecodeError as e:
                    self.failures.append(f"{p.name}: not whole: {e}")
                    continue
                if rev is None:
                    continue  # not a manifest
                self.reads += 1
                h = hashlib.sha256(raw).hexdigest()
                got = self.seen.setdefault(p.name, {}).setdefault(rev, h)
                if got != h:
                    self.failures.append(f"{p.name}: revision {rev} seen with two contents")
                if rev < self.last.get(p.name, 0):
                    self.failures.append(f"{p.name}: revision {rev} after {self.last[p.name]}")
                self.last[p.name] = max(rev, self.last.get(p.name, 0))
            time.sleep(0.02)


def outcomes(svc: Service, lead: int) -> int:
    """The step's makes that ended (published or failed), from the ledger."""
    return sum(1 for r in svc.ledger()
               if r["event"] in ("published", "failed") and r["step"]["lead"] == lead)


RULES = {
    "fields": ("", ""),
    "files": ('complete = "files"\nfiles_per_step = 1', ""),
    "marker": (f"complete = \"marker\"\nmarker_pattern = '{MARKER}'", ""),
}


@pytest.mark.parametrize("rule", list(RULES))
def test_a_step_written_in_pieces_is_made_again_until_it_is_whole(tmp_path, rule):
    whole = dict(zip([6, 12], demo_inputs(tmp_path / "gen", CYCLE, [6, 12])))
    ref = reference_products(tmp_path, list(whole.values()))
    feed_extra, _ = RULES[rule]
    svc = Service(tmp_path, extra=feed_extra)
    if rule == "fields":
        # Made at the timeout with the first piece: the rest is late input.
        svc.cfg.write_text(svc.cfg.read_text().replace("step_timeout_s = 600.0",
                                                       "step_timeout_s = 2.0"))
    svc.start()
    watch = ManifestWatch(tmp_path / "out")
    watch.start()
    parts = {lead: pieces(p.read_bytes()) for lead, p in whole.items()}
    assert all(len(v) == PIECES for v in parts.values())
    dest = {lead: tmp_path / "in" / p.name for lead, p in whole.items()}
    for i in range(PIECES):
        for lead in (6, 12):
            if lead == 6:
                append_piece(dest[6], parts[6][i])
            else:
                rename_whole(dest[12], b"".join(parts[12][:i + 1]))
        if rule == "marker" and i == 0:
            # The producer says "ready" too early: after the first piece.
            for lead in (6, 12):
                (tmp_path / "in" / f"lwdemo_{CYCLE}_{lead:03d}.ready").write_bytes(b"")
        for lead in (6, 12):
            wait_for(lambda lead=lead: outcomes(svc, lead) >= i + 1, 180,
                     f"+{lead} h made after piece {i + 1} of {PIECES} ({rule})")
    log = svc.log.read_text()
    watch.stop_flag = True
    watch.join(timeout=10)
    assert watch.failures == [], watch.failures[:5]
    assert not watch.is_alive() and watch.reads > 0, "the manifests were not watched"
    assert "not used" not in log, [ln for ln in log.splitlines() if "not used" in ln][:3]
    # Each step made once per piece, no more: a late piece re-makes it once.
    assert [outcomes(svc, lead) for lead in (6, 12)] == [PIECES, PIECES]
    assert svc.metric("leeward_steps_remade_total", feed="demo") == 2 * (PIECES - 1)
    # The last products: the whole files' data and attributes.
    got = {p.name: p for p in svc.out_files() if p.suffix == ".nc"}
    compare_trees(ref, got, f"{rule}, pieces appended (+6 h) and renamed (+12 h)")
    # Every manifest: revisions 1..N each published once, the last the file's.
    renames: dict[str, list[str]] = {}
    for r in svc.ledger():
        if r["event"] == "publishing":
            for m in r["moves"]:
                if m["target"].endswith(".json") and Path(m["target"]).with_suffix(".nc").exists():
                    renames.setdefault(m["target"], []).append(m["sha256"])
    assert renames, "no manifest published"
    for target, shas in renames.items():
        man = json.loads(Path(target).read_text())
        assert man["revision"] == len(shas), (target, man["revision"], len(shas))
        assert len(set(shas)) == len(shas), f"{target}: one content published twice"
        assert hashlib.sha256(Path(target).read_bytes()).hexdigest() == shas[-1]
        assert man["state"] == "complete", (target, man["state"])
        prod = Path(target).parent / man["product"]
        assert hashlib.sha256(prod.read_bytes()).hexdigest() == man["product_checksum"], target
    published = {step_key(r) for r in svc.published()}
    assert {k[2] for k in published} == {6, 12}
    assert svc.stop() == 0
