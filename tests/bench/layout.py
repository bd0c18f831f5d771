#!/usr/bin/env python3
"""The code's layout as a newcomer meets it: import circles between modules,
functions over a length, the longest files.

    python3 tests/bench/layout.py [--max-fn 150] [--top 10]

A module is a file under src/ (src/a/b.rs and src/a/b/mod.rs are crate::a::b).
It depends on another where its code outside `#[cfg(test)]` and outside
comments names it by a `crate::` or `super::` path (in a `use` or inline).
Circles are the strongly connected components of that graph with more than one
module (Tarjan's algorithm). A function's length runs from its `fn` line to
its closing brace, tests excluded. Prints the circles, the functions over
--max-fn lines and the --top longest files, and exits 1 when there is a circle
or such a function, 0 otherwise. Not part of the suite: a measure.
"""

from __future__ import annotations

import argparse
import re
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]


def modules(src: Path) -> dict[str, Path]:
    out = {}
    for p in src.rglob("*.rs"):
        parts = list(p.relative_to(src).with_suffix("").parts)
        if parts[-1] in ("mod", "lib", "main"):
            parts = parts[:-1]
        out["::".join(["crate"] + parts)] = p
    return out


def code_of(p: Path) -> str:
    text = p.read_text().split("#[cfg(test)]")[0]
    return re.sub(r"//.*", "", text)


def resolve(path: str, mods: dict[str, Path]) -> str | None:
    segs = path.split("::")
    for k in range(len(segs), 0, -1):
        m = "::".join(segs[:k])
        if m in mods:
            return m
    return None


def graph(mods: dict[str, Path]) -> dict[str, set[str]]:
    edges: dict[str, set[str]] = {m: set() for m in mods}
    for m, p in mods.items():
        base = m.split("::")
        # `super` in a/b.rs and in a/b/mod.rs both mean crate::a.
        for x in re.findall(r"\b((?:crate|super)(?:::\w+)+)", code_of(p)):
            segs = x.split("::")
            here = list(base)
            if segs[0] == "super":
                while segs and segs[0] == "super":
                    here, segs = here[:-1], segs[1:]
                x = "::".join(here + segs)
            t = resolve(x, mods)
            if t and t != m and not m.startswith(t + "::"):
                edges[m].add(t)
    return edges


def circles(edges: dict[str, set[str]]) -> list[list[str]]:
    index, low, stack, on, out = {}, {}, [], set(), []
    sys.setrecursionlimit(10_000)

    def visit(v: str):
        index[v] = low[v] = len(index)
        stack.append(v)
        on.add(v)
        for w in edges[v]:
            if w not in index:
                visit(w)
                low[v] = min(low[v], low[w])
            elif w in on:
                low[v] = min(low[v], index[w])
        if low[v] == index[v]:
            comp = []
            while True:
                w = stack.pop()
                on.discard(w)
                comp.append(w)
                if w == v:
                    break
            if len(comp) > 1:
                out.append(sorted(comp))

    for v in edges:
        if v not in index:
            visit(v)
    return out


def long_functions(mods: dict[str, Path], limit: int) -> list[tuple[int, str]]:
    found = []
    for m, p in mods.items():
        lines = p.read_text().split("#[cfg(test)]")[0].splitlines()
        k = 0
        while k < len(lines):
            g = re.match(r"\s*(?:pub(?:\([^)]*\))?\s+)?(?:const\s+|async\s+|unsafe\s+)*fn\s+(\w+)", lines[k])
            if not g:
                k += 1
                continue
            depth, started, j = 0, False, k
            while j < len(lines):
                code = re.sub(r"//.*|'.'|\"(?:\\.|[^\"\\])*\"", "", lines[j])
                depth += code.count("{") - code.count("}")
                started = started or "{" in code
                if started and depth <= 0 or (not started and code.rstrip().endswith(";")):
                    break
                j += 1
            n = j - k + 1
            if n > limit:
                found.append((n, f"{p.relative_to(ROOT)}:{k + 1} {g.group(1)}"))
            k = j + 1 if started else k + 1
    return sorted(found, reverse=True)


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--max-fn", type=int, default=150)
    ap.add_argument("--top", type=int, default=10)
    a = ap.parse_args()
    mods = modules(ROOT / "src")
    circ = circles(graph(mods))
    for c in circ:
        print(f"import circle of {len(c)}: {' '.join(c)}")
    longs = long_functions(mods, a.max_fn)
    for n, where in longs:
        print(f"function of {n} lines: {where}")
    sizes = sorted(((len(p.read_text().splitlines()), p.relative_to(ROOT)) for p in mods.values()),
                   reverse=True)
    for n, p in sizes[:a.top]:
        print(f"file of {n} lines: {p}")
    print(f"{len(mods)} modules, {len(circ)} import circles, {len(longs)} functions over {a.max_fn} lines")
    return 1 if circ or longs else 0


if __name__ == "__main__":
    sys.exit(main())
