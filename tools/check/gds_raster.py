#!/usr/bin/env python3
"""Rasterises a GDSII layout back to plate pixels with gdstk (a general-purpose GDSII library)
and compares it with a 1-bit TIFF of the same job, pixel for pixel.

usage: gds_raster.py LAYOUT.gds PLATE.tif|ROWS.bits WIDTH HEIGHT PITCH_NM [DB_NM [MAX_VERTICES]]

Every boundary may be any rectilinear polygon: it is rasterised by its winding number at each
pixel centre (from its vertical edges), which must be 1 inside and 0 outside (counter-clockwise,
not self-overlapping), its vertices distinct and on pixel corners, at most MAX_VERTICES of them
(default 8190), and no two boundaries may cover the same pixel.

A `.bits` file holds the expected rows packed as the TIFF's (1 bit per pixel, MSB first, rows
padded to bytes), no header.

Exit 0 and prints "equal N boundaries" when every pixel agrees; exit 1 and the first differences
otherwise. The TIFF is read by its own strips (uncompressed bilevel, MinIsBlack) so this script
needs gdstk and numpy only. Coordinates follow the sidecar's `output.coordinates`: origin at the
plate's centre, x right, y up, row 0 on top.
"""
import struct
import sys

import gdstk
import numpy as np


def read_bilevel_tiff(path, w, h):
    data = open(path, "rb").read()
    le = data[:2] == b"II"
    e = "<" if le else ">"
    big = struct.unpack(e + "H", data[2:4])[0] == 43
    if big:
        off = struct.unpack(e + "Q", data[8:16])[0]
        n = struct.unpack(e + "Q", data[off:off + 8])[0]
        entries = [data[off + 8 + 20 * i: off + 8 + 20 * (i + 1)] for i in range(n)]
    else:
        off = struct.unpack(e + "I", data[4:8])[0]
        n = struct.unpack(e + "H", data[off:off + 2])[0]
        entries = [data[off + 2 + 12 * i: off + 2 + 12 * (i + 1)] for i in range(n)]
    tags = {}
    for ent in entries:
        if big:
            tag, typ, cnt = struct.unpack(e + "HHQ", ent[:12])
            val = ent[12:20]
        else:
            tag, typ, cnt = struct.unpack(e + "HHI", ent[:8])
            val = ent[8:12]
        size = {3: 2, 4: 4, 16: 8}.get(typ, 1)
        fmt = {3: "H", 4: "I", 16: "Q"}.get(typ, "B")
        if cnt * size <= len(val):
            vals = struct.unpack(e + fmt * cnt, val[: cnt * size])
        else:
            p = struct.unpack(e + ("Q" if big else "I"), val)[0]
            vals = struct.unpack(e + fmt * cnt, data[p: p + cnt * size])
        tags[tag] = vals
    assert tags[258][0] == 1 and tags.get(259, (1,))[0] == 1, "expects uncompressed 1-bit"
    offs, counts = tags[273], tags[279]
    raw = b"".join(data[o:o + c] for o, c in zip(offs, counts))
    rb = (w + 7) // 8
    bits = np.unpackbits(np.frombuffer(raw, dtype=np.uint8).reshape(h, rb), axis=1)[:, :w]
    return bits.astype(bool)


def main():
    gds, tif, w, h, pitch_nm = sys.argv[1], sys.argv[2], int(sys.argv[3]), int(sys.argv[4]), float(sys.argv[5])
    db_nm = float(sys.argv[6]) if len(sys.argv) > 6 else 1.0
    lib = gdstk.read_gds(gds)
    # Database unit in metres as the library read it from UNITS.
    assert abs(lib.precision - db_nm * 1e-9) < 1e-21, (lib.precision, db_nm)
    img = np.zeros((h, w), dtype=bool)
    p = pitch_nm / db_nm  # pitch in database units
    count = 0
    scale = lib.unit / lib.precision  # user units -> database units
    max_vertices = int(sys.argv[7]) if len(sys.argv) > 7 else 8190
    for cell in lib.top_level():
        for poly in cell.get_polygons():
            pts = np.round(poly.points * scale).astype(np.int64)
            assert 4 <= len(pts) <= max_vertices, f"{len(pts)} vertices"
            assert len({tuple(q) for q in pts}) == len(pts), "repeated vertex"
            # Lattice coordinates: column edges and row edges (row 0 on top).
            cx = (pts[:, 0] + w * p / 2) / p
            ry = (h * p / 2 - pts[:, 1]) / p
            for v in np.concatenate([cx, ry]):
                assert abs(v - round(v)) < 1e-9, "vertex not on a pixel corner"
            cx = np.round(cx).astype(np.int64)
            ry = np.round(ry).astype(np.int64)
            c0, c1, r0, r1 = cx.min(), cx.max(), ry.min(), ry.max()
            assert 0 <= c0 and c1 <= w and 0 <= r0 and r1 <= h, "outside the plate"
            # Winding number at pixel centres of the bounding box: a ray to the left crosses
            # the vertical edges; a downward edge (rows increasing) counts +1.
            diff = np.zeros((r1 - r0, c1 - c0 + 1), dtype=np.int64)
            n = len(pts)
            for i in range(n):
                xa, ya, xb, yb = cx[i], ry[i], cx[(i + 1) % n], ry[(i + 1) % n]
                assert xa == xb or ya == yb, "edge not rectilinear"
                if xa == xb and ya != yb:
                    lo, hi, sg = (ya, yb, 1) if ya < yb else (yb, ya, -1)
                    diff[lo - r0:hi - r0, xa - c0] += sg
            wind = np.cumsum(diff, axis=1)[:, : c1 - c0]
            assert set(np.unique(wind)) <= {0, 1}, "winding not 0/1: clockwise or self-overlapping"
            inside = wind == 1
            assert not (img[r0:r1, c0:c1] & inside).any(), "boundaries overlap"
            img[r0:r1, c0:c1] |= inside
            count += 1
    if tif.endswith(".bits"):
        rb = (w + 7) // 8
        raw = np.fromfile(tif, dtype=np.uint8).reshape(h, rb)
        want = np.unpackbits(raw, axis=1)[:, :w].astype(bool)
    else:
        want = read_bilevel_tiff(tif, w, h)
    diff = np.argwhere(img != want)
    if len(diff):
        print("differ at", len(diff), "pixels, first", diff[:5].tolist())
        sys.exit(1)
    print("equal", count, "boundaries", len(lib.cells), "cells")


if __name__ == "__main__":
    main()
