#!/usr/bin/env python3
"""numpy reference for the point-source sum, on the plate and points of `tools/bench/kernels.rs`.

Plate 1024 columns at 0.4 um, 633 nm, on-axis plane reference (R = 1, so F = O); an 8 x 8 grid of
points 2.0-2.1 mm in front of it, every one of them reaching every pixel. The timed band is 32 rows,
as in the criterion bench, so the point-pixel updates are the same: 64 x 32 x 1024.

Forms (each prints G point-pixel updates/s):
  plain    complex128, O += a/r exp(i(k r + phi)), straight from the formula (one core).
  careful  complex64 work: phase k (r - z) = k rho^2 / (r + z) in float32 plus k z + phi reduced in
           float64 once per point, float32 cos/sin, separate real/imag accumulators, no temporaries
           allocated in the loop (one core).
  fresnel  the paraxial sum as one complex64 GEMM over separable factors:
           V[y, j] = c_j exp(i a_j (y - y_j)^2), U[x, j] = exp(i a_j (x - x_j)^2), plate = V U^T,
           a_j = k / (2 z_j), c_j = (amp_j / z_j) exp(i (k z_j + phi_j)); timed with the factors built
           inside the loop, on the bench band and on larger shapes (BLAS threads as shown).

A small case checks every form against a float64 plain sum (exact, or Fresnel for the GEMM form).

Usage: OPENBLAS_NUM_THREADS=2 python3 tools/reference/pointsum_numpy.py [--quick]
"""
import os
import sys
import time

try:
    import numpy as np
except ImportError:
    print("pointsum_numpy: numpy is not installed (pip install numpy); nothing measured")
    sys.exit(0)

WAVELENGTH = 633e-9
PITCH = 0.4e-6
WIDTH = 1024
BAND_ROWS = 32
POINTS_SIDE = 8
K = 2.0 * np.pi / WAVELENGTH


def emitters():
    """Same sequence as bench_emitters() in tools/bench/kernels.rs: (x, y, z, amp, phase) arrays."""
    pts = []
    for a in range(POINTS_SIDE):
        for b in range(POINTS_SIDE):
            n = float(a * POINTS_SIDE + b)
            frac = lambda v: v - np.floor(v)
            pts.append((
                (b - 3.5) * 12.5e-6,
                (a - 3.5) * 12.5e-6,
                2.0e-3 + 0.1e-3 * frac(n * 0.6180339887),
                0.5 + 0.5 * frac(n * 0.754877666),
                6.283185307 * frac(n * 0.569840291),
            ))
    return [np.array(c) for c in zip(*pts)]


def grid(width, rows, row0, height=WIDTH):
    """Pixel centres: x = (j - (W-1)/2) p, y = ((H-1)/2 - i) p, for rows row0 .. row0+rows."""
    xs = (np.arange(width) - (width - 1) / 2.0) * PITCH
    ys = ((height - 1) / 2.0 - np.arange(row0, row0 + rows)) * PITCH
    return xs, ys


def plain(xs, ys, pts):
    x, y, z, amp, ph = pts
    X, Y = np.meshgrid(xs, ys)
    out = np.zeros(X.shape, dtype=np.complex128)
    for j in range(len(x)):
        r = np.sqrt((X - x[j]) ** 2 + (Y - y[j]) ** 2 + z[j] ** 2)
        out += amp[j] / r * np.exp(1j * (K * r + ph[j]))
    return out


def plain_fresnel(xs, ys, pts):
    x, y, z, amp, ph = pts
    X, Y = np.meshgrid(xs, ys)
    out = np.zeros(X.shape, dtype=np.complex128)
    for j in range(len(x)):
        rho2 = (X - x[j]) ** 2 + (Y - y[j]) ** 2
        out += amp[j] / z[j] * np.exp(1j * (K * (z[j] + rho2 / (2 * z[j])) + ph[j]))
    return out


class Careful:
    """float32 / complex64 exact sum with preallocated work arrays."""

    def __init__(self, xs, ys, pts):
        self.xs = xs.astype(np.float32)
        self.ys = ys.astype(np.float32)
        self.pts = pts
        shape = (len(ys), len(xs))
        self.rho2, self.r, self.t, self.c, self.s = (np.empty(shape, np.float32) for _ in range(5))
        self.re = np.empty(shape, np.float32)
        self.im = np.empty(shape, np.float32)

    def run(self):
        x, y, z, amp, ph = self.pts
        rho2, r, t, c, s, re, im = self.rho2, self.r, self.t, self.c, self.s, self.re, self.im
        re.fill(0.0)
        im.fill(0.0)
        for j in range(len(x)):
            dx2 = np.square(self.xs - np.float32(x[j]))
            dy2 = np.square(self.ys - np.float32(y[j]))
            np.add(dy2[:, None], dx2[None, :], out=rho2)
            zj = np.float32(z[j])
            np.add(rho2, zj * zj, out=r)
            np.sqrt(r, out=r)
            # phase = k rho^2 / (r + z) + (k z + phi mod 2 pi)
            np.add(r, zj, out=t)
            np.divide(rho2, t, out=t)
            p0 = np.float32(np.fmod(K * z[j] + ph[j], 2.0 * np.pi))
            np.multiply(t, np.float32(K), out=t)
            np.add(t, p0, out=t)
            np.cos(t, out=c)
            np.sin(t, out=s)
            np.divide(np.float32(amp[j]), r, out=r)  # r now holds the amplitude a / r
            np.multiply(c, r, out=c)
            np.multiply(s, r, out=s)
            re += c
            im += s
        return re, im


def fresnel_gemm(xs, ys, pts):
    x, y, z, amp, ph = pts
    a = (K / (2.0 * z))  # per point
    cj = (amp / z) * np.exp(1j * np.fmod(K * z + ph, 2.0 * np.pi))
    # Phases a (y - yj)^2 can reach ~ 1e3 rad here: formed in float64, exponentiated in complex64.
    V = (cj[None, :] * np.exp(1j * (a[None, :] * (ys[:, None] - y[None, :]) ** 2))).astype(np.complex64)
    U = np.exp(1j * (a[None, :] * (xs[:, None] - x[None, :]) ** 2).astype(np.float32)).astype(np.complex64)
    return V @ U.T


def best_time(fn, min_total=1.0, min_reps=3, max_reps=200):
    """Median of repeated runs (at least min_reps and about min_total seconds)."""
    fn()
    times = []
    t_start = time.perf_counter()
    while len(times) < max_reps and (len(times) < min_reps or time.perf_counter() - t_start < min_total):
        t0 = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t0)
    times.sort()
    return times[len(times) // 2], len(times)


def rel_err(a, ref):
    return float(np.max(np.abs(a - ref)) / np.max(np.abs(ref)))


def blas_info():
    try:
        from threadpoolctl import threadpool_info
        infos = [f"{i.get('internal_api')} {i.get('version')} arch={i.get('architecture')} threads={i.get('num_threads')}"
                 for i in threadpool_info() if i.get('user_api') == 'blas']
        return "; ".join(infos) or "no BLAS pool seen"
    except ImportError:
        return "threadpoolctl not installed"


def main():
    quick = "--quick" in sys.argv
    print(f"numpy {np.__version__}; BLAS: {blas_info()}")
    print(f"env OPENBLAS_NUM_THREADS={os.environ.get('OPENBLAS_NUM_THREADS', '(unset)')} "
          f"OPENBLAS_CORETYPE={os.environ.get('OPENBLAS_CORETYPE', '(unset)')} "
          f"OPENBLAS_L2_SIZE={os.environ.get('OPENBLAS_L2_SIZE', '(unset)')}")
    pts = emitters()
    npts = len(pts[0])

    # Agreement on a small case: 8 rows x 128 columns of the middle of the plate, all 64 points.
    sx, sy = grid(WIDTH, 8, WIDTH // 2 - 4)
    sx = sx[WIDTH // 2 - 64: WIDTH // 2 + 64]
    ref = plain(sx, sy, pts)
    re, im = Careful(sx, sy, pts).run()
    ref_f = plain_fresnel(sx, sy, pts)
    print(f"check (8 x 128 pixels, {npts} points) max |err| / max |F| vs float64 plain: "
          f"careful {rel_err(re + 1j * im, ref):.2e}, fresnel GEMM {rel_err(fresnel_gemm(sx, sy, pts), ref_f):.2e} "
          f"(plain form is the float64 sum itself)")

    xs, ys = grid(WIDTH, BAND_ROWS, (WIDTH - BAND_ROWS) // 2)
    work = npts * BAND_ROWS * WIDTH
    print(f"band: {BAND_ROWS} rows x {WIDTH} columns, {npts} points = {work} point-pixel updates")
    tmin = 0.3 if quick else 1.5
    t, n = best_time(lambda: plain(xs, ys, pts), tmin)
    print(f"RESULT exact_plain {work / t / 1e9:.4f} G/s  ({t * 1e3:.2f} ms median of {n}; one core)")
    car = Careful(xs, ys, pts)
    t, n = best_time(car.run, tmin)
    print(f"RESULT exact_careful {work / t / 1e9:.4f} G/s  ({t * 1e3:.2f} ms median of {n}; one core)")
    t, n = best_time(lambda: fresnel_gemm(xs, ys, pts), tmin)
    print(f"RESULT fresnel_gemm_band {work / t / 1e9:.3f} G/s  ({t * 1e3:.3f} ms median of {n}; "
          f"{BAND_ROWS}x{WIDTH}, {npts} points)")
    # GEMM rates grow with the matrix sizes: a whole 1024^2 plate, and more points.
    rng = np.random.default_rng(7)
    for rows, npt in [(1024, 64), (1024, 512), (2048, 1024)]:
        w = rows
        gx, gy = grid(w, rows, 0, rows)
        big = [rng.uniform(-40e-6, 40e-6, npt), rng.uniform(-40e-6, 40e-6, npt),
               rng.uniform(2.0e-3, 2.1e-3, npt), rng.uniform(0.5, 1.0, npt), rng.uniform(0, 2 * np.pi, npt)]
        t, n = best_time(lambda: fresnel_gemm(gx, gy, big), tmin)
        wk = npt * rows * w
        print(f"RESULT fresnel_gemm_{rows}x{w}_p{npt} {wk / t / 1e9:.3f} G/s  ({t * 1e3:.2f} ms median of {n})")


if __name__ == "__main__":
    main()
