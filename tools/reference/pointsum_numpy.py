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
  fresnel  the paraxial sum as one complex64 GEMM over separable factors (the strongest numpy form):
           V[y, j] = c_j exp(i a_j (y - y_j)^2), U[x, j] = exp(i a_j (x - x_j)^2), plate = V U^T,
           a_j = k / (2 z_j), c_j = (amp_j / z_j) exp(i (k z_j + phi_j)). The factors are built in
           blocks of rows that stay in cache: phase a_j (x - x_j)^2 (+ arg c_j for V) in float64,
           reduced to [-pi, pi] by subtracting 2 pi rint(phase / 2 pi), cast to float32, float32
           np.cos / np.sin written into the .real / .imag of preallocated complex64 arrays (|c_j| folded
           into V); then one complex64 GEMM np.matmul(V, U.T, out=plate) (OpenBLAS, threads as
           shown). Timed with the factors built inside the loop, on the bench band, on larger shapes
           and on the whole-job shape: a 4096 x 4096 plate and 1000 points, the plate at once
           (RESULT fresnel_gemm_4096x4096_p1000, G updates/s and seconds per job).
  fresnel_cexp  the earlier, weaker GEMM form kept for comparison (factors from complex128 np.exp,
           then cast to complex64; band only). Its RESULT name does not start with fresnel_gemm_, so
           summarize.py never takes it for the GEMM figure.

A small case checks every form against a float64 plain sum (exact, or Fresnel for the GEMM forms);
the whole-job plate is also checked on three full rows (top, middle, bottom) against float64.

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


def fresnel_cexp(xs, ys, pts):
    """Weaker variant (kept for comparison): factors from complex128 exp, cast to complex64."""
    x, y, z, amp, ph = pts
    a = (K / (2.0 * z))  # per point
    cj = (amp / z) * np.exp(1j * np.fmod(K * z + ph, 2.0 * np.pi))
    V = (cj[None, :] * np.exp(1j * (a[None, :] * (ys[:, None] - y[None, :]) ** 2))).astype(np.complex64)
    U = np.exp(1j * (a[None, :] * (xs[:, None] - x[None, :]) ** 2).astype(np.float32)).astype(np.complex64)
    return V @ U.T


class FresnelGemm:
    """Strongest numpy form of the paraxial sum: float32 cos/sin factors, one complex64 GEMM.

    All arrays (factors, plate, per-block work) are allocated once here; run() builds both factors
    and does the GEMM, so timing run() times the whole job.
    """

    def __init__(self, xs, ys, pts, block_rows=32):
        x, y, z, amp, ph = pts
        n = len(x)
        self.xs, self.ys = np.asarray(xs, np.float64), np.asarray(ys, np.float64)
        self.x, self.y = np.asarray(x, np.float64), np.asarray(y, np.float64)
        self.a = K / (2.0 * np.asarray(z, np.float64))
        self.theta = np.fmod(K * z + ph, 2.0 * np.pi)  # arg c_j, folded into V's phase
        self.w = (amp / z).astype(np.float32)            # |c_j|, folded into V's magnitude
        self.V = np.empty((len(ys), n), np.complex64)
        self.U = np.empty((len(xs), n), np.complex64)
        self.plate = np.empty((len(ys), len(xs)), np.complex64)
        b = block_rows
        self.ph, self.rq = np.empty((b, n)), np.empty((b, n))
        self.p32, self.c32 = np.empty((b, n), np.float32), np.empty((b, n), np.float32)
        self.block = b

    def _factor(self, out, coords, c0, theta, w):
        """out[i, j] = w_j exp(i (a_j (coords_i - c0_j)^2 + theta_j)), block by block of rows."""
        two_pi = 2.0 * np.pi
        for i in range(0, len(coords), self.block):
            k = min(self.block, len(coords) - i)
            p, r, q, c = self.ph[:k], self.rq[:k], self.p32[:k], self.c32[:k]
            np.subtract(coords[i:i + k, None], c0[None, :], out=p)
            np.square(p, out=p)
            np.multiply(p, self.a, out=p)
            if theta is not None:
                np.add(p, theta, out=p)
            # reduce to [-pi, pi] in float64, so float32 holds the argument to ~2e-7 rad
            np.multiply(p, 1.0 / two_pi, out=r)
            np.rint(r, out=r)
            np.multiply(r, two_pi, out=r)
            np.subtract(p, r, out=q, casting="same_kind")
            np.cos(q, out=c)
            if w is not None:
                np.multiply(c, w, out=c)
            out.real[i:i + k] = c
            np.sin(q, out=c)
            if w is not None:
                np.multiply(c, w, out=c)
            out.imag[i:i + k] = c

    def run(self):
        self._factor(self.V, self.ys, self.y, self.theta, self.w)
        self._factor(self.U, self.xs, self.x, None, None)
        np.matmul(self.V, self.U.T, out=self.plate)
        return self.plate


def fresnel_gemm(xs, ys, pts):
    return FresnelGemm(xs, ys, pts).run()


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
          f"careful {rel_err(re + 1j * im, ref):.2e}, fresnel GEMM {rel_err(fresnel_gemm(sx, sy, pts), ref_f):.2e}, "
          f"fresnel_cexp {rel_err(fresnel_cexp(sx, sy, pts), ref_f):.2e} "
          f"(plain form is the float64 sum itself; GEMM forms against the float64 Fresnel sum)")

    xs, ys = grid(WIDTH, BAND_ROWS, (WIDTH - BAND_ROWS) // 2)
    work = npts * BAND_ROWS * WIDTH
    print(f"band: {BAND_ROWS} rows x {WIDTH} columns, {npts} points = {work} point-pixel updates")
    tmin = 0.3 if quick else 1.5
    t, n = best_time(lambda: plain(xs, ys, pts), tmin)
    print(f"RESULT exact_plain {work / t / 1e9:.4f} G/s  ({t * 1e3:.2f} ms median of {n}; one core)")
    car = Careful(xs, ys, pts)
    t, n = best_time(car.run, tmin)
    print(f"RESULT exact_careful {work / t / 1e9:.4f} G/s  ({t * 1e3:.2f} ms median of {n}; one core)")
    t, n = best_time(lambda: fresnel_cexp(xs, ys, pts), tmin)
    print(f"RESULT fresnel_cexp_band {work / t / 1e9:.3f} G/s  ({t * 1e3:.3f} ms median of {n}; "
          f"weaker variant: complex128 exp factors)")
    fg = FresnelGemm(xs, ys, pts)
    t, n = best_time(fg.run, tmin)
    print(f"RESULT fresnel_gemm_band {work / t / 1e9:.3f} G/s  ({t * 1e3:.3f} ms median of {n}; "
          f"{BAND_ROWS}x{WIDTH}, {npts} points)")
    # GEMM rates grow with the matrix sizes: a whole 1024^2 plate, more points, and the whole job.
    rng = np.random.default_rng(7)
    for rows, npt in [(1024, 64), (1024, 512), (2048, 1024), (4096, 1000)]:
        w = rows
        gx, gy = grid(w, rows, 0, rows)
        big = [rng.uniform(-40e-6, 40e-6, npt), rng.uniform(-40e-6, 40e-6, npt),
               rng.uniform(2.0e-3, 2.1e-3, npt), rng.uniform(0.5, 1.0, npt), rng.uniform(0, 2 * np.pi, npt)]
        fg = FresnelGemm(gx, gy, big)
        if rows == 4096:
            # whole-job shape: plate at once (128 MiB complex64), factors built inside the timed loop
            times = []
            fg.run()
            for _ in range(2 if quick else 3):
                t0 = time.perf_counter()
                fg.run()
                times.append(time.perf_counter() - t0)
            times.sort()
            t = times[len(times) // 2]
            wk = npt * rows * w
            print(f"RESULT fresnel_gemm_{rows}x{w}_p{npt} {wk / t / 1e9:.3f} G/s  ({t:.3f} s total per job, median "
                  f"of {len(times)}, best {times[0]:.3f} s; whole job: {rows}x{w} plate, {npt} points, "
                  f"{wk} updates, factors + GEMM)")
            pick = np.array([0, rows // 2, rows - 1])
            chk = rel_err(fg.plate[pick], plain_fresnel(gx, gy[pick], big))
            print(f"check whole job (rows {', '.join(map(str, pick))}, all {w} columns, {npt} points) "
                  f"max |err| / max |F| vs float64 Fresnel sum: {chk:.2e}")
        else:
            t, n = best_time(fg.run, tmin)
            wk = npt * rows * w
            print(f"RESULT fresnel_gemm_{rows}x{w}_p{npt} {wk / t / 1e9:.3f} G/s  ({t * 1e3:.2f} ms median of {n})")


if __name__ == "__main__":
    main()
