#!/usr/bin/env python3
"""Write leeward's table of WMO GRIB2 names (src/ingest/wmo_tables.rs).

Reads the machine-readable GRIB edition 2 code tables of the WMO Manual on Codes
(WMO-No. 306, Vol. I.2, Part B; the CSV working documents, MIT licence) from a
folder, by default ../shared/data/wmo-grib2-tables beside the checkout, and
writes one Rust source file holding what leeward names fields with:

- code table 0.0: disciplines;
- code table 4.1: parameter categories of each discipline;
- every code table 4.2: parameters (name, units, whether deprecated) of each
  discipline and category;
- code table 4.5: types of fixed surface, with their units;
- for each of these tables, the ranges the standard reserves for local use.

The program uses only the generated file and never reads the CSV folder. Run
again when the WMO publishes new tables:

    python3 tools/wmo_tables.py [CSV_DIR] > src/ingest/wmo_tables.rs

Standard library only. The output is sorted, so that the program can search
it by binary search, and the same input gives the same bytes.
"""

import csv
import os
import re
import sys

HERE = os.path.dirname(os.path.abspath(__file__))
DEFAULT_DIR = os.path.join(HERE, "..", "..", "shared", "data", "wmo-grib2-tables")


def rows(path):
    with open(path, encoding="utf-8-sig", newline="") as f:
        for r in csv.DictReader(f):
            yield {k: (v or "").strip() for k, v in r.items()}


def clean(text):
    """One line, single spaces."""
    return " ".join(text.split())


def code_range(code):
    """(lo, hi) of a CodeFlag cell: "7" or "192-254"; None if neither."""
    m = re.fullmatch(r"(\d+)(?:\s*-\s*(\d+))?", code)
    if not m:
        return None
    lo = int(m.group(1))
    hi = int(m.group(2) or lo)
    return lo, hi


def is_local(meaning):
    return meaning.lower().startswith("reserved for local use")


def is_placeholder(meaning):
    m = meaning.lower()
    return m.startswith("reserved") or m == "missing" or m == "future version"


def deprecated(status):
    return status.lower().startswith("deprecated")


def units_of(text):
    """Units as the table writes them; a reference to a code table is kept."""
    t = clean(text)
    return "" if t in ("-", "") else t


def rust_str(s):
    return '"' + s.replace("\\", "\\\\").replace('"', '\\"') + '"'


def discipline_of(subtitle):
    m = re.match(r"Product discipline (\d+)", subtitle)
    if not m:
        raise SystemExit(f"no discipline in subtitle {subtitle!r}")
    return int(m.group(1))


def read_tables(d):
    disciplines, d_local = {}, []
    for r in rows(os.path.join(d, "GRIB2_CodeFlag_0_0_CodeTable_en.csv")):
        rg = code_range(r["CodeFlag"])
        if rg is None:
            continue
        meaning = clean(r["MeaningParameterDescription_en"])
        if is_local(meaning):
            d_local.append(rg)
        elif rg[0] == rg[1] and not is_placeholder(meaning):
            disciplines[rg[0]] = meaning

    categories, c_local = {}, []
    for r in rows(os.path.join(d, "GRIB2_CodeFlag_4_1_CodeTable_en.csv")):
        rg = code_range(r["CodeFlag"])
        if rg is None:
            continue
        disc = discipline_of(r["SubTitle_en"])
        meaning = clean(r["MeaningParameterDescription_en"])
        if is_local(meaning):
            c_local.append((disc, rg))
        elif rg[0] == rg[1] and not is_placeholder(meaning):
            categories[(disc, rg[0])] = meaning

    params, p_local = {}, []
    pattern = re.compile(r"GRIB2_CodeFlag_4_2_(\d+)_(\d+)_CodeTable_en\.csv")
    for name in sorted(os.listdir(d)):
        m = pattern.fullmatch(name)
        if not m:
            continue
        disc, cat = int(m.group(1)), int(m.group(2))
        for r in rows(os.path.join(d, name)):
            rg = code_range(r["CodeFlag"])
            if rg is None:
                continue
            meaning = clean(r["MeaningParameterDescription_en"])
            if is_local(meaning):
                p_local.append((disc, cat, rg))
            elif rg[0] == rg[1] and not is_placeholder(meaning):
                key = (disc, cat, rg[0])
                if key in params:
                    raise SystemExit(f"{name}: number {rg[0]} twice")
                params[key] = (meaning, units_of(r["UnitComments_en"]), deprecated(r["Status"]))

    surfaces, s_local = {}, []
    for r in rows(os.path.join(d, "GRIB2_CodeFlag_4_5_CodeTable_en.csv")):
        rg = code_range(r["CodeFlag"])
        if rg is None:
            continue
        meaning = clean(r["MeaningParameterDescription_en"])
        if is_local(meaning):
            s_local.append(rg)
        elif rg[0] == rg[1] and not is_placeholder(meaning):
            surfaces[rg[0]] = (meaning, units_of(r["UnitComments_en"]))
    return disciplines, d_local, categories, c_local, params, p_local, surfaces, s_local


def provenance(d):
    readme = os.path.join(d, "README.md")
    try:
        text = open(readme, encoding="utf-8").read()
    except OSError:
        return ""
    m = re.search(r"commit ([0-9a-f]{40})", text)
    return m.group(1) if m else ""


def main():
    d = sys.argv[1] if len(sys.argv) > 1 else DEFAULT_DIR
    (disciplines, d_local, categories, c_local, params, p_local, surfaces, s_local) = read_tables(d)
    commit = provenance(d)
    out = []
    w = out.append
    w("//! WMO GRIB2 code tables 0.0, 4.1, 4.2 and 4.5 as leeward names fields with.")
    w("//!")
    w("//! GENERATED by tools/wmo_tables.py from the machine-readable GRIB2 code tables")
    w("//! of the WMO Manual on Codes (WMO-No. 306, Vol. I.2, Part B; CSV working")
    w("//! documents, MIT licence" + (f", commit {commit}" if commit else "") + ").")
    w("//! Do not edit: run the script again. The names are the standard's own words.")
    w("")
    w("/// Code table 0.0: (discipline, name), by discipline.")
    w("pub static DISCIPLINES: &[(u8, &str)] = &[")
    for k in sorted(disciplines):
        w(f"    ({k}, {rust_str(disciplines[k])}),")
    w("];")
    w("")
    w("/// Code table 0.0: disciplines reserved for local use, (first, last).")
    w("pub static DISCIPLINES_LOCAL: &[(u8, u8)] = &[")
    for lo, hi in sorted(d_local):
        w(f"    ({lo}, {hi}),")
    w("];")
    w("")
    w("/// Code table 4.1: (discipline, category, name), by discipline and category.")
    w("pub static CATEGORIES: &[(u8, u8, &str)] = &[")
    for k in sorted(categories):
        w(f"    ({k[0]}, {k[1]}, {rust_str(categories[k])}),")
    w("];")
    w("")
    w("/// Code table 4.1: categories reserved for local use, (discipline, first, last).")
    w("pub static CATEGORIES_LOCAL: &[(u8, u8, u8)] = &[")
    for disc, (lo, hi) in sorted(c_local):
        w(f"    ({disc}, {lo}, {hi}),")
    w("];")
    w("")
    w("/// One entry of a code table 4.2.")
    w("#[derive(Debug, Clone, Copy, PartialEq, Eq)]")
    w("pub struct Parameter {")
    w("    /// Discipline (code table 0.0).")
    w("    pub discipline: u8,")
    w("    /// Parameter category (code table 4.1).")
    w("    pub category: u8,")
    w("    /// Parameter number (code table 4.2).")
    w("    pub number: u8,")
    w("    /// The standard's name.")
    w("    pub name: &'static str,")
    w("    /// Units as the table gives them (empty: none; a code table reference kept).")
    w("    pub units: &'static str,")
    w("    /// Marked deprecated by the WMO.")
    w("    pub deprecated: bool,")
    w("}")
    w("")
    w("/// Every code table 4.2, by discipline, category and number.")
    w("pub static PARAMETERS: &[Parameter] = &[")
    for k in sorted(params):
        name, units, dep = params[k]
        w(
            f"    Parameter {{ discipline: {k[0]}, category: {k[1]}, number: {k[2]}, "
            f"name: {rust_str(name)}, units: {rust_str(units)}, deprecated: {'true' if dep else 'false'} }},"
        )
    w("];")
    w("")
    w("/// Code tables 4.2: numbers reserved for local use, (discipline, category, first, last).")
    w("pub static PARAMETERS_LOCAL: &[(u8, u8, u8, u8)] = &[")
    for disc, cat, (lo, hi) in sorted(p_local):
        w(f"    ({disc}, {cat}, {lo}, {hi}),")
    w("];")
    w("")
    w("/// Code table 4.5: (type of fixed surface, name, units), by type.")
    w("pub static SURFACES: &[(u8, &str, &str)] = &[")
    for k in sorted(surfaces):
        name, units = surfaces[k]
        w(f"    ({k}, {rust_str(name)}, {rust_str(units)}),")
    w("];")
    w("")
    w("/// Code table 4.5: types reserved for local use, (first, last).")
    w("pub static SURFACES_LOCAL: &[(u8, u8)] = &[")
    for lo, hi in sorted(s_local):
        w(f"    ({lo}, {hi}),")
    w("];")
    sys.stdout.write("\n".join(out) + "\n")


if __name__ == "__main__":
    main()
