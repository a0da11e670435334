#!/usr/bin/env python3
"""Writes the invented benchmark scenes into a folder (standard library only, fixed seeds).

  cloud.ply        1024 points spread over 3 x 3 x 4 mm (PLY, mm); the jobs place them 30 mm in
                   front of the badge plate (supports cover it whole: the numpy GEMM's shape) or
                   3 mm (supports a few hundred pixels across: the band-limited case).
  cloud9.ply       9216 points over the same volume: placed 3 mm away, their band-limited
                   supports add up to about the updates of cloud.ply at 30 mm.
  cloud1000.ply    1000 points over the same volume: the 4096^2 x 1000-point Fresnel job (the shape
                   of pointsum_numpy.py's whole-job GEMM).
  dense.csv        5000 points 2.0-2.5 mm in front of a 2 x 2 mm plate: the recording-plane scene.

Usage: make_scenes.py DIR
"""
import os
import random
import sys


def write_cloud(path, n, seed):
    """n points spread over 3 x 3 x 4 mm, amplitudes 0.5-1, random phases (PLY, mm)."""
    rng = random.Random(seed)
    with open(path, "w", encoding="ascii") as f:
        f.write("ply\nformat ascii 1.0\ncomment benchmark cloud (invented), lengths in mm\n")
        f.write("element vertex %d\nproperty double x\nproperty double y\nproperty double z\n" % n)
        f.write("property double amplitude\nproperty double phase\nend_header\n")
        for _ in range(n):
            f.write("%.6f %.6f %.6f %.6f %.6f\n" % (rng.uniform(-1.5, 1.5), rng.uniform(-1.5, 1.5),
                                                  rng.uniform(0.0, 4.0), rng.uniform(0.5, 1.0),
                                                  rng.uniform(0.0, 6.28)))


def main():
    out = sys.argv[1]
    os.makedirs(out, exist_ok=True)
    write_cloud(os.path.join(out, "cloud.ply"), 1024, 7)
    write_cloud(os.path.join(out, "cloud9.ply"), 9216, 9)
    write_cloud(os.path.join(out, "cloud1000.ply"), 1000, 13)
    rng = random.Random(11)
    with open(os.path.join(out, "dense.csv"), "w", encoding="ascii") as f:
        f.write("x_mm,y_mm,z_mm,amplitude\n")
        for _ in range(5000):
            f.write("%f,%f,%f,%f\n" % (rng.uniform(-1, 1), rng.uniform(-1, 1), rng.uniform(2.0, 2.5),
                                       rng.uniform(0.3, 1.0)))


if __name__ == "__main__":
    main()
