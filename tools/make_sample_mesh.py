#!/usr/bin/env python3
"""Builds samples/lantern.glb: a small faceted paper lantern for the mesh examples and tests.

The object (an original design made for this project): a square wooden plinth, a sixteen-sided
paper body that bulges in the middle, a flared pointed roof and a round knob on top. Units are
millimetres, y is up, and the object is centred at the origin: 8 mm wide at the plinth and
11 mm tall. Facets are flat (each triangle has its own three vertices and face normal).

Two primitives: the paper body carries a 32 x 32 generated PNG texture (warm paper with darker
ribs and a band) through TEXCOORD_0; the plinth, roof and knob use vertex colours (COLOR_0)
with a plain material. Output is deterministic: run it twice, get the same bytes.

Only the Python 3 standard library is used.

    python3 tools/make_sample_mesh.py [output.glb]
"""

import json
import math
import os
import struct
import sys
import zlib

SEGMENTS = 16


def sub(a, b):
    return (a[0] - b[0], a[1] - b[1], a[2] - b[2])


def cross(a, b):
    return (a[1] * b[2] - a[2] * b[1], a[2] * b[0] - a[0] * b[2], a[0] * b[1] - a[1] * b[0])


def dot(a, b):
    return a[0] * b[0] + a[1] * b[1] + a[2] * b[2]


def unit(a):
    n = math.sqrt(dot(a, a))
    return (a[0] / n, a[1] / n, a[2] / n) if n > 0 else (0.0, 1.0, 0.0)


class Part:
    """Flat-shaded triangles with per-vertex colour and texture coordinates."""

    def __init__(self):
        self.pos, self.nrm, self.col, self.uv = [], [], [], []

    def tri(self, a, b, c, outward, color=(1.0, 1.0, 1.0), uvs=((0, 0), (0, 0), (0, 0))):
        """Adds triangle a, b, c wound so that its normal points along `outward`."""
        n = cross(sub(b, a), sub(c, a))
        if dot(n, n) < 1e-18:
            return  # degenerate: skip
        if dot(n, outward) < 0:
            b, c = c, b
            uvs = (uvs[0], uvs[2], uvs[1])
            n = (-n[0], -n[1], -n[2])
        n = unit(n)
        for p, t in zip((a, b, c), uvs):
            self.pos.append(p)
            self.nrm.append(n)
            self.col.append(color)
            self.uv.append(t)

    def quad(self, a, b, c, d, outward, color=(1.0, 1.0, 1.0), uvs=None):
        """Adds quad a b c d (in order around it) as two triangles."""
        uvs = uvs or ((0, 0),) * 4
        self.tri(a, b, c, outward, color, (uvs[0], uvs[1], uvs[2]))
        self.tri(a, c, d, outward, color, (uvs[0], uvs[2], uvs[3]))


def ring(r, y, k):
    t = 2 * math.pi * k / SEGMENTS
    return (r * math.cos(t), y, r * math.sin(t))


def revolve(part, profile, color_of, textured=False):
    """Surface of revolution through (radius, y) profile points, faceted in SEGMENTS."""
    for i in range(len(profile) - 1):
        (r0, y0), (r1, y1) = profile[i], profile[i + 1]
        for k in range(SEGMENTS):
            a, b = ring(r0, y0, k), ring(r0, y0, k + 1)
            c, d = ring(r1, y1, k + 1), ring(r1, y1, k)
            mid = ring(1.0, 0.0, k + 0.5)
            # Outward: radial, tilted by the profile's slope.
            dr, dy = r1 - r0, y1 - y0
            outward = (mid[0] * dy, -dr, mid[2] * dy)
            if abs(dy) < 1e-12:
                outward = (0.0, 1.0 if dr < 0 else -1.0, 0.0)
            uvs = None
            if textured:
                u0, u1 = k / SEGMENTS * 2, (k + 1) / SEGMENTS * 2
                v0 = 1 - i / (len(profile) - 1)
                v1 = 1 - (i + 1) / (len(profile) - 1)
                uvs = ((u0, v0), (u1, v0), (u1, v1), (u0, v1))
            part.quad(a, b, c, d, outward, color_of(i, k), uvs)


def box(part, lo, hi, color):
    x0, y0, z0 = lo
    x1, y1, z1 = hi
    c = [(x, y, z) for x in (x0, x1) for y in (y0, y1) for z in (z0, z1)]
    # Corners indexed by bits (x, y, z).
    faces = [
        ((0, 1, 3, 2), (-1, 0, 0)),
        ((4, 6, 7, 5), (1, 0, 0)),
        ((0, 4, 5, 1), (0, -1, 0)),
        ((2, 3, 7, 6), (0, 1, 0)),
        ((0, 2, 6, 4), (0, 0, -1)),
        ((1, 5, 7, 3), (0, 0, 1)),
    ]
    for (a, b, cc, d), out in faces:
        part.quad(c[a], c[b], c[cc], c[d], out, color)


def build():
    paper = Part()
    solid = Part()
    wood = (0.30, 0.17, 0.08)
    wood_dark = (0.22, 0.12, 0.05)
    lacquer = (0.55, 0.06, 0.04)
    brass = (0.80, 0.60, 0.22)

    # Plinth: a slab with a smaller step on top.
    box(solid, (-4.0, -5.5, -4.0), (4.0, -4.9, 4.0), wood)
    box(solid, (-3.4, -4.9, -3.4), (3.4, -4.5, 3.4), wood_dark)

    # Paper body: bulging sixteen-sided barrel, y from -4.5 to 2.4.
    rows = 14
    body = []
    for i in range(rows + 1):
        t = i / rows
        body.append((2.4 + 0.9 * math.sin(math.pi * t), -4.5 + 6.9 * t))
    revolve(paper, body, lambda i, k: (1.0, 0.93 + 0.07 * math.sin(math.pi * i / rows), 0.85), True)

    # Collars at both ends of the body.
    revolve(solid, [(2.55, -4.5), (2.55, -4.1), (2.4, -4.1)], lambda i, k: lacquer)
    revolve(solid, [(2.4, 2.0), (2.55, 2.0), (2.55, 2.4)], lambda i, k: lacquer)

    # Roof: underside, flared eave, concave sides up to a point.
    roof = [(2.4, 2.4), (3.8, 2.5)]
    for i in range(7):
        t = i / 6
        roof.append((3.8 * (1 - t) ** 1.6 + 0.05, 2.7 + 2.4 * t))
    revolve(solid, roof, lambda i, k: lacquer if i > 0 else wood_dark)

    # Knob: a faceted ball on the roof's tip, top at y = 5.5.
    knob = []
    for i in range(7):
        a = math.pi * i / 6
        knob.append((0.35 * math.sin(a) + 1e-9 * (i in (0, 6)), 5.15 - 0.35 * math.cos(a)))
    revolve(solid, knob, lambda i, k: brass)
    return paper, solid


def paper_png():
    """32 x 32 RGB: warm paper, darker vertical ribs every 8 texels, a band across."""
    w = h = 32
    rows = []
    for y in range(h):
        row = bytearray([0])  # filter type 0 (None)
        for x in range(w):
            r, g, b = 246, 226, 182
            grain = ((x * 7 + y * 13) % 5) * 2
            r, g, b = r - grain, g - grain, b - grain
            if x % 8 == 0:
                r, g, b = 150, 92, 48
            if 14 <= y <= 17:
                r, g, b = 205, 60, 40
            row += bytes((r, g, b))
        rows.append(bytes(row))
    raw = b"".join(rows)

    def chunk(kind, data):
        return (struct.pack(">I", len(data)) + kind + data
                + struct.pack(">I", zlib.crc32(kind + data) & 0xFFFFFFFF))

    ihdr = struct.pack(">IIBBBBB", w, h, 8, 2, 0, 0, 0)
    return (b"\x89PNG\r\n\x1a\n" + chunk(b"IHDR", ihdr)
            + chunk(b"IDAT", zlib.compress(raw, 9)) + chunk(b"IEND", b""))


def pad4(b, fill=b"\x00"):
    return b + fill * ((4 - len(b) % 4) % 4)


def make_glb(paper, solid, png):
    bin_data = bytearray()
    views, accessors = [], []

    def add_view(data):
        off = len(bin_data)
        bin_data.extend(pad4(data))
        views.append({"buffer": 0, "byteOffset": off, "byteLength": len(data)})
        return len(views) - 1

    def add_accessor(values, kind, with_bounds=False):
        n = len(values[0])
        data = b"".join(struct.pack("<%df" % n, *v) for v in values)
        acc = {"bufferView": add_view(data), "componentType": 5126, "count": len(values),
               "type": kind}
        if with_bounds:
            # Bounds of the stored (f32) values.
            f32 = [struct.unpack("<%df" % n, struct.pack("<%df" % n, *v)) for v in values]
            acc["min"] = [min(v[i] for v in f32) for i in range(n)]
            acc["max"] = [max(v[i] for v in f32) for i in range(n)]
        accessors.append(acc)
        return len(accessors) - 1

    def add_indices(count):
        data = b"".join(struct.pack("<H", i) for i in range(count))
        accessors.append({"bufferView": add_view(data), "componentType": 5123, "count": count,
                          "type": "SCALAR"})
        return len(accessors) - 1

    prims = []
    for part, material, textured in ((paper, 0, True), (solid, 1, False)):
        attrs = {
            "POSITION": add_accessor(part.pos, "VEC3", True),
            "NORMAL": add_accessor(part.nrm, "VEC3"),
            "COLOR_0": add_accessor(part.col, "VEC3"),
        }
        if textured:
            attrs["TEXCOORD_0"] = add_accessor(part.uv, "VEC2")
        prims.append({"attributes": attrs, "indices": add_indices(len(part.pos)),
                      "material": material, "mode": 4})
    image_view = add_view(png)

    doc = {
        "asset": {"version": "2.0", "generator": "fringemill tools/make_sample_mesh.py"},
        "scene": 0,
        "scenes": [{"name": "lantern", "nodes": [0]}],
        "nodes": [{"name": "lantern", "mesh": 0}],
        "meshes": [{"name": "lantern", "primitives": prims}],
        "materials": [
            {"name": "paper", "pbrMetallicRoughness": {
                "baseColorFactor": [1.0, 1.0, 1.0, 1.0],
                "baseColorTexture": {"index": 0}, "metallicFactor": 0.0},
             "doubleSided": False},
            {"name": "lacquer and wood", "pbrMetallicRoughness": {
                "baseColorFactor": [0.9, 0.9, 0.9, 1.0], "metallicFactor": 0.0}},
        ],
        "textures": [{"sampler": 0, "source": 0}],
        "samplers": [{"magFilter": 9729, "minFilter": 9729, "wrapS": 10497, "wrapT": 10497}],
        "images": [{"bufferView": image_view, "mimeType": "image/png"}],
        "buffers": [{"byteLength": len(bin_data)}],
        "bufferViews": views,
        "accessors": accessors,
    }
    js = pad4(json.dumps(doc, separators=(",", ":")).encode("utf-8"), b" ")
    bd = bytes(bin_data)
    total = 12 + 8 + len(js) + 8 + len(bd)
    return (b"glTF" + struct.pack("<II", 2, total)
            + struct.pack("<I", len(js)) + b"JSON" + js
            + struct.pack("<I", len(bd)) + b"BIN\x00" + bd)


def main():
    here = os.path.dirname(os.path.abspath(__file__))
    out = sys.argv[1] if len(sys.argv) > 1 else os.path.join(here, "..", "samples", "lantern.glb")
    paper, solid = build()
    glb = make_glb(paper, solid, paper_png())
    with open(out, "wb") as f:
        f.write(glb)
    n = (len(paper.pos) + len(solid.pos)) // 3
    print("wrote %s: %d triangles, %d bytes" % (os.path.normpath(out), n, len(glb)))


if __name__ == "__main__":
    main()
