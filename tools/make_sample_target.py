#!/usr/bin/env python3
"""Builds samples/tern_target.png: the target intensity of the shipped iterative-synthesis sample.

Invented scenario: the (fictional) Tern Reach optics teaching lab shapes a laser spot into its
logo-like test pattern for a phase modulator demonstration: a ring, a five-pointed star inside it and
a short bar under it, with soft edges, on black. Python 3 standard library only; deterministic.
"""
import math
import os
import struct
import zlib

W = H = 192


def star_inside(x, y, r_out, r_in, n=5):
    a = math.atan2(y, x)
    r = math.hypot(x, y)
    # Radius of the star outline at angle a (linear between tips and notches).
    seg = 2 * math.pi / n
    t = ((a + math.pi / 2) % seg) / seg
    t = abs(t - 0.5) * 2  # 1 at tips, 0 at notches
    edge = r_in + (r_out - r_in) * t
    return edge - r


def smooth(d, w=1.2):
    return min(1.0, max(0.0, 0.5 + d / (2 * w)))


def pixel(i, j):
    x = j - (W - 1) / 2
    y = (H - 1) / 2 - i
    r = math.hypot(x, y - 10)
    ring = smooth(6 - abs(r - 62))
    star = smooth(star_inside(x, y - 10, 46, 20))
    bar = smooth(min(40 - abs(x), 7 - abs(y + 72)))
    return max(ring, 0.8 * star, bar)


def png(path, rows):
    raw = b"".join(b"\x00" + bytes(r) for r in rows)

    def chunk(t, d):
        return struct.pack(">I", len(d)) + t + d + struct.pack(">I", zlib.crc32(t + d) & 0xFFFFFFFF)

    data = b"\x89PNG\r\n\x1a\n" + chunk(b"IHDR", struct.pack(">IIBBBBB", W, H, 8, 0, 0, 0, 0))
    data += chunk(b"IDAT", zlib.compress(raw, 9)) + chunk(b"IEND", b"")
    with open(path, "wb") as f:
        f.write(data)


def main():
    here = os.path.dirname(os.path.abspath(__file__))
    out = os.path.join(here, "..", "samples", "tern_target.png")
    rows = [[round(255 * pixel(i, j)) for j in range(W)] for i in range(H)]
    png(out, rows)
    print(out)


if __name__ == "__main__":
    main()
