/* FFTW from C: one Gerchberg-Saxton iteration and one forward 2-D FFT, complex float, the same work
 * as tools/reference/gs_numpy.py and the iterative job of tools/bench/run_all.sh:
 *   G = FFT2(f); G = A G / |G|;  f = IFFT2(G); f = f / |f|
 * (the inverse transform's 1/N^2 factor is irrelevant here: the next step normalises).
 *
 * Build:  gcc -O3 -march=native -fopenmp tools/reference/gs_fftw.c -lfftw3f_threads -lfftw3f -lpthread -lm -o gs_fftw
 * Run:    ./gs_fftw N THREADS        (prints RESULT lines that tools/bench/summarize.py reads)
 * Plans:  FFTW_MEASURE, in place, on fftwf_malloc'ed (aligned) arrays; planning time is reported apart.
 *         The pointwise steps run on OMP_NUM_THREADS threads (set it to THREADS).
 */
#include <fftw3.h>
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <time.h>

static double now(void) {
    struct timespec t;
    clock_gettime(CLOCK_MONOTONIC, &t);
    return t.tv_sec + 1e-9 * t.tv_nsec;
}

static int cmp(const void *a, const void *b) {
    double x = *(const double *)a, y = *(const double *)b;
    return (x > y) - (x < y);
}

int main(int argc, char **argv) {
    int n = argc > 1 ? atoi(argv[1]) : 2048;
    int threads = argc > 2 ? atoi(argv[2]) : 2;
    if (n < 2 || threads < 1) {
        fprintf(stderr, "usage: gs_fftw N THREADS\n");
        return 2;
    }
    size_t m = (size_t)n * n;
    fftwf_init_threads();
    fftwf_plan_with_nthreads(threads);
    fftwf_complex *f = fftwf_malloc(sizeof(fftwf_complex) * m);
    float *amp = malloc(sizeof(float) * m);
    if (!f || !amp) {
        fprintf(stderr, "gs_fftw: out of memory\n");
        return 1;
    }
    double t0 = now();
    fftwf_plan fwd = fftwf_plan_dft_2d(n, n, f, f, FFTW_FORWARD, FFTW_MEASURE);
    fftwf_plan bwd = fftwf_plan_dft_2d(n, n, f, f, FFTW_BACKWARD, FFTW_MEASURE);
    double planning = now() - t0;
    /* Target: a 64-pixel checkerboard; start: a fixed pseudo-random phase (as gs_equiv). */
    for (size_t i = 0; i < m; i++) {
        size_t r = i / n, c = i % n;
        amp[i] = ((r / 64 + c / 64) % 2 == 0) ? 1.0f : 0.0f;
        float p = (float)((i * 2654435761u) % 6283) * 1e-3f;
        f[i][0] = cosf(p);
        f[i][1] = sinf(p);
    }
    enum { REPS = 15 };
    double fft_t[REPS], gs_t[REPS];
    for (int k = 0; k < REPS; k++) {
        double a = now();
        fftwf_execute(fwd);
        fft_t[k] = now() - a;
        fftwf_execute(bwd); /* undo (scaled by n^2; the values stay finite for these sizes) */
        for (size_t i = 0; i < m; i++) {
            float re = f[i][0], im = f[i][1];
            float s = sqrtf(re * re + im * im);
            f[i][0] = s > 0 ? re / s : 1.0f;
            f[i][1] = s > 0 ? im / s : 0.0f;
        }
    }
    for (int k = 0; k < REPS; k++) {
        double a = now();
        fftwf_execute(fwd);
#pragma omp parallel for
        for (size_t i = 0; i < m; i++) {
            float re = f[i][0], im = f[i][1];
            float s = sqrtf(re * re + im * im);
            float g = s > 0 ? amp[i] / s : 0.0f;
            f[i][0] = s > 0 ? re * g : amp[i];
            f[i][1] = s > 0 ? im * g : 0.0f;
        }
        fftwf_execute(bwd);
#pragma omp parallel for
        for (size_t i = 0; i < m; i++) {
            float re = f[i][0], im = f[i][1];
            float s = sqrtf(re * re + im * im);
            f[i][0] = s > 0 ? re / s : 1.0f;
            f[i][1] = s > 0 ? im / s : 0.0f;
        }
        gs_t[k] = now() - a;
    }
    qsort(fft_t, REPS, sizeof(double), cmp);
    qsort(gs_t, REPS, sizeof(double), cmp);
    printf("fftw %s, threads %d, planning %.1f s (FFTW_MEASURE)\n", fftwf_version, threads, planning);
    printf("RESULT fft2_fftwc_%d %.1f ms  (median of %d)\n", n, fft_t[REPS / 2] * 1e3, REPS);
    printf("RESULT gs_fftwc_%d %.1f ms/iteration  (median of %d)\n", n, gs_t[REPS / 2] * 1e3, REPS);
    fftwf_destroy_plan(fwd);
    fftwf_destroy_plan(bwd);
    fftwf_free(f);
    free(amp);
    return 0;
}
