"""2,000 mutated GRIB2 files through `leeward inspect` and `leeward process`
(tests/python/mutation.py: the seeds, the mutations and the rules). Seeded,
so a failure can be run again; the failing cases are kept in
target/mutation-failures. The benchmark runs the same loop on 100,000 files
(`python tests/python/mutation.py --long`).
"""

from __future__ import annotations

import os

import mutation
from conftest import REPO_ROOT, samples_path

FILES = 2000
SEED = 20260314


def test_mutated_files_never_panic_hang_or_die_and_every_refusal_names_its_file(leeward_bin,
                                                                                 tmp_path):
    seeds = mutation.make_seeds(tmp_path, leeward_bin, samples_path())
    assert len(seeds) >= 10, "too few seeds"
    t = mutation.campaign(leeward_bin, seeds, FILES, SEED, tmp_path, os.cpu_count() or 2,
                          keep=REPO_ROOT / "target" / "mutation-failures")
    print(t.summary())
    assert t.files == FILES and t.runs == 2 * FILES
    # The loop reaches both ends: files refused whole, and files still made into products.
    assert t.exits.get(("process", 4), 0) > 100 and t.exits.get(("process", 0), 0) + \
        t.exits.get(("process", 3), 0) > 100, t.exits
    problems = t.panics + t.signals + t.timeouts + t.unnamed
    assert not problems, t.summary() + "\n" + "\n".join(problems[:10])
