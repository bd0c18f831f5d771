#!/usr/bin/env python3
"""Write leeward's coastlines and country borders (src/output/coastlines.bin).

Source: Natural Earth 1:50 million physical (land) and cultural (admin-0
countries) vector data, version 4.1.0, public domain (naturalearthdata.com),
as redistributed in TopoJSON by the npm package world-atlas 2.0.2 (ISC
licence). Fetch it with the ordinary npm client, anywhere:

    npm install --no-save --prefix /tmp/ne world-atlas@2.0.2
    python3 tools/coastlines.py /tmp/ne/node_modules/world-atlas > src/output/coastlines.bin

The program reads only the file this writes (compiled into the binary); it
never needs the package or a network at run time.

What is kept:
- coastlines: every arc of the land polygons (islands and lake shores of the
  land layer included);
- borders: the arcs that two different countries share (land boundaries;
  coasts, which belong to one country only, are not repeated).

Format (all integers little-endian), then compressed with zlib (level 9):

    b"LWCOAST1"
    u32 number of lines
    per line: u8 kind (0 coastline, 1 border), u32 number of points n,
              n x (i16 longitude, i16 latitude) in hundredths of a degree,
              the first point absolute and each next one as the difference
              from the one before (they are small: arcs are densely sampled).

Points closer than SIMPLIFY_DEG to the line through their neighbours are
dropped first (Douglas-Peucker), which keeps the file compact while staying
well under a pixel on a 0.25-degree map. Standard library only; the same
input gives the same bytes.
"""

import json
import os
import struct
import sys
import zlib

SIMPLIFY_DEG = 0.02
QUANTUM = 100  # hundredths of a degree


def decode_arcs(topo):
    """Absolute (lon, lat) points of every arc of a quantised TopoJSON topology."""
    tr = topo.get("transform")
    arcs = []
    for arc in topo["arcs"]:
        pts = []
        x = y = 0
        for p in arc:
            if tr:
                x += p[0]
                y += p[1]
                lon = x * tr["scale"][0] + tr["translate"][0]
                lat = y * tr["scale"][1] + tr["translate"][1]
            else:
                lon, lat = p[0], p[1]
            pts.append((lon, lat))
        arcs.append(pts)
    return arcs


def arc_indices(geometry):
    """Every arc index (non-negative) a geometry's rings use."""
    t = geometry.get("type")
    arcs = geometry.get("arcs", [])
    if t == "Polygon":
        rings = arcs
    elif t == "MultiPolygon":
        rings = [r for poly in arcs for r in poly]
    elif t == "GeometryCollection":
        return [i for g in geometry["geometries"] for i in arc_indices(g)]
    else:
        return []
    return [i if i >= 0 else ~i for ring in rings for i in ring]


def simplify(points, tol):
    """Douglas-Peucker, iterative; keeps both ends."""
    if len(points) < 3:
        return points
    keep = [False] * len(points)
    keep[0] = keep[-1] = True
    stack = [(0, len(points) - 1)]
    while stack:
        a, b = stack.pop()
        (x1, y1), (x2, y2) = points[a], points[b]
        dx, dy = x2 - x1, y2 - y1
        norm = (dx * dx + dy * dy) ** 0.5
        best, far = -1.0, None
        for k in range(a + 1, b):
            x, y = points[k]
            if norm == 0.0:
                d = ((x - x1) ** 2 + (y - y1) ** 2) ** 0.5
            else:
                d = abs(dy * (x - x1) - dx * (y - y1)) / norm
            if d > best:
                best, far = d, k
        if far is not None and best > tol:
            keep[far] = True
            stack.append((a, far))
            stack.append((far, b))
    return [p for p, k in zip(points, keep) if k]


def quantise(points):
    out = []
    for lon, lat in points:
        q = (round(lon * QUANTUM), round(lat * QUANTUM))
        if not out or out[-1] != q:
            out.append(q)
    return out


def encode(lines):
    body = bytearray(b"LWCOAST1")
    body += struct.pack("<I", len(lines))
    for kind, pts in lines:
        body += struct.pack("<BI", kind, len(pts))
        px = py = 0
        for i, (x, y) in enumerate(pts):
            dx, dy = (x, y) if i == 0 else (x - px, y - py)
            body += struct.pack("<hh", dx, dy)
            px, py = x, y
    return zlib.compress(bytes(body), 9)


def on_cut(a, b):
    """A step along the edges Natural Earth cuts its polygons at: the 180th
    meridian and the South Pole (Antarctica's ring closes there). Not a coast."""
    along_seam = abs(a[0]) >= 179.99 and abs(b[0]) >= 179.99
    along_pole = a[1] <= -89.99 and b[1] <= -89.99
    return along_seam or along_pole


def split_at_cuts(pts):
    parts, cur = [], [pts[0]]
    for a, b in zip(pts, pts[1:]):
        if on_cut(a, b):
            if len(cur) >= 2:
                parts.append(cur)
            cur = [b]
        else:
            cur.append(b)
    if len(cur) >= 2:
        parts.append(cur)
    return parts


def split_long_steps(pts, limit=32000):
    """Cut a line where one step would not fit in an i16 (never in practice)."""
    parts, cur = [], [pts[0]]
    for p in pts[1:]:
        if abs(p[0] - cur[-1][0]) > limit or abs(p[1] - cur[-1][1]) > limit:
            parts.append(cur)
            cur = [p]
        else:
            cur.append(p)
    parts.append(cur)
    return parts


def main():
    src = sys.argv[1] if len(sys.argv) > 1 else "node_modules/world-atlas"
    land = json.load(open(os.path.join(src, "land-50m.json"), encoding="utf-8"))
    countries = json.load(open(os.path.join(src, "countries-50m.json"), encoding="utf-8"))

    lines = []
    land_arcs = decode_arcs(land)
    for i in sorted(set(arc_indices(land["objects"]["land"]))):
        lines.append((0, land_arcs[i]))

    c_arcs = decode_arcs(countries)
    owners = {}
    for n, g in enumerate(countries["objects"]["countries"]["geometries"]):
        for i in set(arc_indices(g)):
            owners.setdefault(i, set()).add(n)
    for i in sorted(owners):
        if len(owners[i]) >= 2:
            lines.append((1, c_arcs[i]))

    out = []
    for kind, whole in lines:
        for pts in split_at_cuts(whole):
            q = quantise(simplify(pts, SIMPLIFY_DEG))
            if len(q) >= 2:
                out.extend((kind, part) for part in split_long_steps(q) if len(part) >= 2)
    sys.stdout.buffer.write(encode(out))
    n = sum(len(p) for _, p in out)
    print(f"{len(out)} lines, {n} points", file=sys.stderr)


if __name__ == "__main__":
    main()
