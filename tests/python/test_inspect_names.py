"""`leeward inspect` names every field of every real sample as the WMO code tables do.

Reference: ecCodes (an independent GRIB library, PyPI ``eccodes``), whose key
``parameterName`` is the name in its own copy of WMO code table 4.2, or the bare
number where the number is not a standard one. For every field (submessage) of
every shared sample:

- a parameter ecCodes names (anything but the bare number) must carry the same
  name in leeward's listing, and the same WMO numbers;
- a number in 192-254 of the parameter table, the category table or the discipline
  table (reserved for local use: WMO-No. 306, code tables 0.0, 4.1, 4.2) must be
  listed as "local use", with no name (ecCodes names some centres' local numbers
  from their own tables; leeward says only that the number is local).

The text listing must keep its columns aligned on every sample, whatever the
names of the quantities and the levels.
"""

from __future__ import annotations

import json
import subprocess

import eccodes
import pytest

LOCAL = range(192, 255)

#: Where ecCodes 2.50's copy of table 4.2 words a name differently from the WMO
#: tables leeward is generated from (the current WMO text; from memory, the
#: order of the codes in the land cover name was corrected in a later edition).
KNOWN_WORDING = {
    (2, 0, 0): ("Land cover (0 = sea, 1 = land)", "Land cover (0=land, 1=sea)"),
}


def same_words(a, b):
    """Equal but for case and a hyphen written as a space ("u-component", "u component")."""
    def norm(s):
        return " ".join(s.lower().replace("-", " ").split())
    return norm(a) == norm(b)


def eccodes_names(path):
    """(discipline, category, number, parameterName) of every field in file order."""
    out = []
    with open(path, "rb") as f:
        while True:
            h = eccodes.codes_grib_new_from_file(f)
            if h is None:
                break
            try:
                # With multi-field support on, a message holding several fields
                # (NCEP writes u and v together) gives one handle per field.
                out.append(tuple(eccodes.codes_get(h, k) for k in
                                 ("discipline", "parameterCategory", "parameterNumber"))
                           + (eccodes.codes_get(h, "parameterName", ktype=str),))
            finally:
                eccodes.codes_release(h)
    return out


def sample_files(samples_dir):
    ref = json.loads((samples_dir / "reference-decode.json").read_text())
    return [samples_dir / name for name in ref["files"]]


def inspect_json(leeward_bin, path):
    r = subprocess.run([str(leeward_bin), "inspect", "--json", "--no-values", str(path)],
                       capture_output=True, text=True, timeout=120)
    assert r.returncode in (0, 3), r.stderr
    return json.loads(r.stdout)[0]["fields"]


def test_inspect_names_every_standard_parameter_as_eccodes_does(leeward_bin, samples_dir):
    eccodes.codes_grib_multi_support_on()
    named = local = exact = 0
    for path in sample_files(samples_dir):
        mine = inspect_json(leeward_bin, path)
        theirs = eccodes_names(path)
        assert len(mine) == len(theirs), f"{path.name}: {len(mine)} fields, ecCodes {len(theirs)}"
        for f, (d, c, n, name) in zip(mine, theirs):
            ctx = f"{path.name} field {f['index']} ({d}/{c}/{n})"
            assert f["wmo"] == [d, c, n], ctx
            is_local = d in LOCAL or c in LOCAL or n in LOCAL
            if is_local:
                assert f["local_use"] is True and f["quantity"] is None, ctx
                # ecCodes may know the centre's own meaning (it ships some
                # centres' local tables); leeward does not guess it.
                local += 1
            else:
                assert name != str(n), f"{ctx}: ecCodes has no name"
                if (d, c, n) in KNOWN_WORDING:
                    assert (f["quantity"], name) == KNOWN_WORDING[(d, c, n)], ctx
                else:
                    assert same_words(f["quantity"], name), (
                        f"{ctx}: leeward {f['quantity']!r}, ecCodes {name!r}")
                exact += f["quantity"] == name
                assert f["local_use"] is False, ctx
                named += 1
    # The samples hold 570 fields of standard parameters and 49 of local use.
    assert named >= 570 and local >= 49, (named, local)
    # All but a handful word it exactly as ecCodes does.
    assert exact >= named - 10, (exact, named)


def test_inspect_text_columns_stay_aligned(leeward_bin, samples_dir):
    for path in sample_files(samples_dir):
        r = subprocess.run([str(leeward_bin), "inspect", "--no-values", str(path)],
                           capture_output=True, text=True, timeout=120)
        lines = [l for l in r.stdout.splitlines()[1:]
                 if l.strip() and not l.strip().startswith(("not usable", "problem"))]
        if len(lines) < 2:
            continue
        header = lines[0]
        # Each column after the first starts where its header word starts.
        starts = [header.index(h) for h in ("quantity", "level", "valid", "grid", "packing")]
        for line in lines[1:]:
            for s in starts:
                assert line[s - 2:s] == "  " and line[s] != " ", (
                    f"{path.name}: column at {s} out of line:\n{header}\n{line}")
