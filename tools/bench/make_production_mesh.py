#!/usr/bin/env python3
"""Writes the production benchmark's mesh: an invented cone-shaped seed pod on a square plinth.

The object (an original design made for this project): an egg-shaped pod of 56 x 28 quads whose
radius swells and dips in a spiral of scales, standing on a low square plinth. Both parts are
closed (every edge shared by two triangles), so the layers path masks their insides. 3036
triangles. Units are millimetres, y up, the object centred on the origin, 10 mm tall before the
job fits it. Deterministic: the same bytes on every run. Standard library only.

    python3 tools/bench/make_production_mesh.py OUT.obj
"""
import math
import sys

RINGS, SEGMENTS = 28, 56


def pod():
    """Vertices and quads of the closed pod (poles as triangle fans)."""
    verts = []
    top = (0.0, 9.0, 0.0)
    bottom = (0.0, 1.0, 0.0)
    for i in range(1, RINGS):
        v = i / RINGS                      # 0 at the top pole, 1 at the bottom
        theta = math.pi * v
        for j in range(SEGMENTS):
            phi = 2 * math.pi * j / SEGMENTS
            scales = 1.0 + 0.08 * math.cos(7 * phi + 11 * theta)  # a spiral of scales
            r = 3.2 * math.sin(theta) * (1.0 + 0.25 * (1 - v)) * scales
            y = 5.0 + 4.0 * math.cos(theta)
            verts.append((r * math.cos(phi), y, r * math.sin(phi)))
    verts.append(top)
    verts.append(bottom)
    t_index, b_index = len(verts) - 2, len(verts) - 1
    tris = []

    def at(i, j):
        return (i - 1) * SEGMENTS + (j % SEGMENTS)
    for j in range(SEGMENTS):
        tris.append((t_index, at(1, j + 1), at(1, j)))
        tris.append((b_index, at(RINGS - 1, j), at(RINGS - 1, j + 1)))
    for i in range(1, RINGS - 1):
        for j in range(SEGMENTS):
            a, b, c, d = at(i, j), at(i, j + 1), at(i + 1, j + 1), at(i + 1, j)
            tris.append((a, b, c))
            tris.append((a, c, d))
    return verts, tris


def plinth(base):
    """A closed box 8 x 1 x 8 mm under the pod, vertices offset by `base`."""
    lo, hi = (-4.0, -0.0, -4.0), (4.0, 1.0, 4.0)
    verts = [(hi[0] if i & 1 else lo[0], hi[1] if i & 2 else lo[1], hi[2] if i & 4 else lo[2])
             for i in range(8)]
    quads = [(0, 2, 3, 1), (4, 5, 7, 6), (0, 1, 5, 4), (2, 6, 7, 3), (0, 4, 6, 2), (1, 3, 7, 5)]
    tris = []
    for q in quads:
        tris.append((q[0] + base, q[1] + base, q[2] + base))
        tris.append((q[0] + base, q[2] + base, q[3] + base))
    return verts, tris


def main():
    out = sys.argv[1]
    v1, t1 = pod()
    v2, t2 = plinth(len(v1))
    with open(out, "w", encoding="ascii") as f:
        f.write("# invented benchmark object: a seed pod on a plinth (mm, y up)\n")
        for v in v1 + v2:
            f.write("v %.6f %.6f %.6f\n" % v)
        for t in t1 + t2:
            f.write("f %d %d %d\n" % (t[0] + 1, t[1] + 1, t[2] + 1))
    print("%s: %d vertices, %d triangles" % (out, len(v1) + len(v2), len(t1) + len(t2)))


if __name__ == "__main__":
    main()
