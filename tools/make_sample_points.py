#!/usr/bin/env python3
"""Writes the sample point cloud samples/badge_points.ply and samples/badge_points.csv.

Scenario (invented for this sample): the Lantern Hill Star Hall, a small fictional town
planetarium, gives every visitor an entrance badge carrying a tiny hologram of the hall's
emblem, the "Lantern Orbit". The emblem is a wireframe, about 4 mm across:

  * an orbit ring of radius 1.7 mm, tilted 50 degrees about the horizontal axis so that its
    upper half leans away from the viewer and its lower half towards the viewer;
  * inside the ring, a small two-armed spiral (a toy galaxy) with a bright core, slightly
    warped so the arm tips sit at different depths;
  * eight "guide stars", each a tiny five-point cross, placed at clearly different depths
    (from 0.2 mm to 3.8 mm) so that parallax shows when the badge is tilted.

Coordinates are millimetres in the object's own frame: x to the right, y up, z the distance
from the plate (0 to 4 mm here; the job file adds an offset to place the plate in front).
Amplitudes lie between 0.5 and 1; phases are random with a fixed seed, which gives the diffuse
look of a rough surface. The output is deterministic: run the script again and the files are
byte-identical.

Usage: python3 tools/make_sample_points.py [output directory, default: samples/ next to tools/]
Only the Python 3 standard library is used.
"""

import math
import os
import random
import sys

SEED = 20240917
RING_POINTS = 180
RING_RADIUS_MM = 1.7
RING_TILT_DEG = 50.0
RING_CENTRE_Z_MM = 2.0
SPIRAL_ARMS = 2
SPIRAL_POINTS_PER_ARM = 110
SPIRAL_TURNS = 1.6
SPIRAL_OUTER_RADIUS_MM = 1.05
# (x, y, z) centres of the guide stars, mm; each becomes a five-point cross.
GUIDE_STARS = [
    (-1.85, 1.70, 0.20),
    (1.55, 1.80, 3.80),
    (1.90, -0.40, 0.90),
    (-1.60, -1.75, 3.20),
    (0.10, 1.95, 1.40),
    (-1.95, 0.15, 2.60),
    (1.20, -1.90, 0.50),
    (0.45, -1.30, 3.55),
]
STAR_ARM_MM = 0.04
DECIMALS = 6


def ring(rng):
    """Tilted orbit ring: a circle in the x-y plane rotated about the x axis."""
    tilt = math.radians(RING_TILT_DEG)
    points = []
    for i in range(RING_POINTS):
        t = 2.0 * math.pi * i / RING_POINTS
        x = RING_RADIUS_MM * math.cos(t)
        v = RING_RADIUS_MM * math.sin(t)
        y = v * math.cos(tilt)
        z = RING_CENTRE_Z_MM + v * math.sin(tilt)
        amplitude = rng.uniform(0.75, 0.9)
        points.append((x, y, z, amplitude))
    return points


def spiral(rng):
    """Two-armed spiral with a bright core; depth rises gently towards the arm tips."""
    points = [(0.0, 0.0, RING_CENTRE_Z_MM, 1.0)]
    for arm in range(SPIRAL_ARMS):
        start = 2.0 * math.pi * arm / SPIRAL_ARMS
        for i in range(1, SPIRAL_POINTS_PER_ARM + 1):
            s = i / SPIRAL_POINTS_PER_ARM
            angle = start + 2.0 * math.pi * SPIRAL_TURNS * s
            r = SPIRAL_OUTER_RADIUS_MM * s
            x = r * math.cos(angle)
            y = r * math.sin(angle)
            # Warp: one arm curls towards the viewer, the other away from it.
            warp = 0.35 * s * s * (1.0 if arm == 0 else -1.0)
            z = RING_CENTRE_Z_MM + warp
            amplitude = 1.0 - 0.45 * s + rng.uniform(-0.03, 0.0)
            points.append((x, y, z, amplitude))
    return points


def guide_stars(rng):
    points = []
    offsets = [(0.0, 0.0), (STAR_ARM_MM, 0.0), (-STAR_ARM_MM, 0.0), (0.0, STAR_ARM_MM), (0.0, -STAR_ARM_MM)]
    for cx, cy, cz in GUIDE_STARS:
        for k, (dx, dy) in enumerate(offsets):
            amplitude = 1.0 if k == 0 else rng.uniform(0.6, 0.7)
            points.append((cx + dx, cy + dy, cz, amplitude))
    return points


def build():
    rng = random.Random(SEED)
    shapes = ring(rng) + spiral(rng) + guide_stars(rng)
    points = []
    for x, y, z, amplitude in shapes:
        phase = rng.uniform(0.0, 2.0 * math.pi)
        row = tuple(round(v, DECIMALS) for v in (x, y, z, amplitude, phase))
        # round() can leave -0.0; write it as 0.
        points.append(tuple(0.0 if v == 0.0 else v for v in row))
    return points


def fmt(v):
    return f"{v:.{DECIMALS}f}"


def check(points):
    for x, y, z, amplitude, phase in points:
        assert -2.0 <= x <= 2.0 and -2.0 <= y <= 2.0, (x, y)
        assert 0.0 <= z <= 4.0, z
        assert 0.5 <= amplitude <= 1.0, amplitude
        assert 0.0 <= phase < 2.0 * math.pi + 1e-6, phase


def write_ply(path, points):
    with open(path, "w", encoding="ascii", newline="\n") as f:
        f.write("ply\n")
        f.write("format ascii 1.0\n")
        f.write("comment Lantern Hill Star Hall entrance badge: the Lantern Orbit emblem\n")
        f.write("comment lengths in mm (z = distance from the plate before the job's offset), phase in radians\n")
        f.write(f"element vertex {len(points)}\n")
        for name in ("x", "y", "z", "amplitude", "phase"):
            f.write(f"property double {name}\n")
        f.write("end_header\n")
        for p in points:
            f.write(" ".join(fmt(v) for v in p) + "\n")


def write_csv(path, points):
    with open(path, "w", encoding="ascii", newline="\n") as f:
        f.write("# Lantern Hill Star Hall entrance badge: the Lantern Orbit emblem (same points as badge_points.ply)\n")
        f.write("x_mm,y_mm,z_mm,amplitude,phase_rad\n")
        for p in points:
            f.write(",".join(fmt(v) for v in p) + "\n")


def main():
    if len(sys.argv) > 2:
        sys.exit("usage: make_sample_points.py [output directory]")
    here = os.path.dirname(os.path.abspath(__file__))
    out_dir = sys.argv[1] if len(sys.argv) == 2 else os.path.join(here, os.pardir, "samples")
    os.makedirs(out_dir, exist_ok=True)
    points = build()
    check(points)
    write_ply(os.path.join(out_dir, "badge_points.ply"), points)
    write_csv(os.path.join(out_dir, "badge_points.csv"), points)
    print(f"wrote {len(points)} points to {os.path.normpath(out_dir)}/badge_points.ply and .csv")


if __name__ == "__main__":
    main()
