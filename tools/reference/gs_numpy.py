#!/usr/bin/env python3
"""numpy reference for one Gerchberg-Saxton iteration and one 2-D FFT, complex64.

One iteration, as `gs_equiv` in tools/bench/kernels.rs does it with the crate's parts:
  G = FFT2(f); G = A * G / |G|  (target amplitude A, keep the phase)
  f = IFFT2(G); f = f / |f|     (phase-only plate)
at 2048^2 and 4096^2, with numpy.fft (pocketfft, one thread; complex64 kept in numpy >= 2) and, if
pyfftw imports, with FFTW plans (FFTW_MEASURE, --threads, default 2) on preallocated aligned arrays.
Also times a lone forward 2-D FFT at each size, to compare with the `fft2d` bench.

Usage: python3 tools/reference/gs_numpy.py [--threads N] [--sizes 2048,4096] [--quick]
"""
import sys
import time

try:
    import numpy as np
except ImportError:
    print("gs_numpy: numpy is not installed (pip install numpy); nothing measured")
    sys.exit(0)


def arg(name, default):
    if name in sys.argv:
        return sys.argv[sys.argv.index(name) + 1]
    return default


def median_time(fn, min_total, min_reps=3, max_reps=50):
    fn()
    times = []
    t_start = time.perf_counter()
    while len(times) < max_reps and (len(times) < min_reps or time.perf_counter() - t_start < min_total):
        t0 = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t0)
    times.sort()
    return times[len(times) // 2], len(times)


def problem(n):
    i = np.arange(n)
    target = (((i[:, None] // 64) + (i[None, :] // 64)) % 2 == 0).astype(np.float32)
    rng = np.random.default_rng(1)
    field = np.exp(1j * rng.uniform(0, 2 * np.pi, (n, n)).astype(np.float32)).astype(np.complex64)
    return target, field


def impose(g, amp, tmp):
    """g <- amp * g / |g| in place (|g| = 0 gives amp), complex64 throughout."""
    np.abs(g, out=tmp)
    np.maximum(tmp, np.float32(1e-30), out=tmp)
    np.divide(amp, tmp, out=tmp)
    np.multiply(g, tmp, out=g)


def main():
    threads = int(arg("--threads", "2"))
    sizes = [int(s) for s in arg("--sizes", "2048,4096").split(",")]
    tmin = 0.5 if "--quick" in sys.argv else 2.0
    print(f"numpy {np.__version__}")
    try:
        import pyfftw
        have_fftw = True
        print(f"pyfftw {pyfftw.__version__}, FFTW threads {threads}")
    except ImportError:
        have_fftw = False
        print("pyfftw not importable: numpy.fft only")
    for n in sizes:
        target, field0 = problem(n)
        one = np.ones((n, n), np.float32)
        tmp = np.empty((n, n), np.float32)

        f = field0.copy()
        t, k = median_time(lambda: np.fft.fft2(f), tmin)
        kind = np.fft.fft2(f[:8, :8]).dtype
        print(f"RESULT fft2_numpy_{n} {t * 1e3:.1f} ms  (median of {k}; output dtype {kind})")

        def it_numpy():
            g = np.fft.fft2(f)
            impose(g, target, tmp)
            h = np.fft.ifft2(g)
            impose(h, one, tmp)
            f[...] = h
        t, k = median_time(it_numpy, tmin)
        print(f"RESULT gs_numpy_{n} {t * 1e3:.1f} ms/iteration  (median of {k})")

        if have_fftw:
            a = pyfftw.empty_aligned((n, n), dtype="complex64")
            b = pyfftw.empty_aligned((n, n), dtype="complex64")
            t0 = time.perf_counter()
            fwd = pyfftw.FFTW(a, b, axes=(0, 1), direction="FFTW_FORWARD", flags=("FFTW_MEASURE",), threads=threads, planning_timelimit=20.0)
            inv = pyfftw.FFTW(b, a, axes=(0, 1), direction="FFTW_BACKWARD", flags=("FFTW_MEASURE",), threads=threads, planning_timelimit=20.0)
            plan_s = time.perf_counter() - t0
            a[...] = field0
            t, k = median_time(lambda: fwd(), tmin)
            print(f"RESULT fft2_fftw_{n} {t * 1e3:.1f} ms  (median of {k}; planning {plan_s:.1f} s)")

            def it_fftw():
                fwd()
                impose(b, target, tmp)
                inv()  # normalises by 1/(n n) by default
                impose(a, one, tmp)
            t, k = median_time(it_fftw, tmin)
            print(f"RESULT gs_fftw_{n} {t * 1e3:.1f} ms/iteration  (median of {k})")


if __name__ == "__main__":
    main()
