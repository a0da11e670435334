#!/usr/bin/env python3
"""Reads the raw.txt that run_all.sh writes and writes summary.md with the ratios fringemill / reference.

Every ratio is a speed ratio: fringemill's throughput over the reference's (for times, reference time
over fringemill time), so > 1 means fringemill is faster. Standard library only.

Usage: summarize.py RAW.txt SUMMARY.md
"""
import re
import sys

UNIT = {"ps": 1e-12, "ns": 1e-9, "µs": 1e-6, "us": 1e-6, "ms": 1e-3, "s": 1.0}
EUNIT = {"elem/s": 1.0, "Kelem/s": 1e3, "Melem/s": 1e6, "Gelem/s": 1e9, "Telem/s": 1e12}


def parse(text):
    crit_time, crit_thrpt, res, jobs, loads = {}, {}, {}, {}, []
    name = None
    job = None
    for line in text.splitlines():
        m = re.match(r"^=== (.*) \((\S+), load average: ([\d. ]+)\)", line)
        if m:
            loads.append((m.group(1), m.group(2), m.group(3).strip()))
        m = re.match(r"^(\S+)\s+time:\s+\[(\S+) (\S+) (\S+) (\S+) (\S+) (\S+)\]", line)
        if m:
            name = m.group(1)
            crit_time[name] = float(m.group(4)) * UNIT[m.group(5)]
            continue
        m = re.match(r"^(\S+)\s*$", line)
        if m and "/" in line and not line.startswith("$"):
            name = m.group(1)
        m = re.match(r"^\s+time:\s+\[(\S+) (\S+) (\S+) (\S+) (\S+) (\S+)\]", line)
        if m and name:
            crit_time[name] = float(m.group(3)) * UNIT[m.group(4)]
        m = re.match(r"^\s+thrpt:\s+\[(\S+) (\S+) (\S+) (\S+) (\S+) (\S+)\]", line)
        if m and name:
            crit_thrpt[name] = float(m.group(3)) * EUNIT[m.group(4)]
        m = re.match(r"^RESULT (\S+) ([\d.]+) (\S+)", line)
        if m:
            key = m.group(1)
            val = float(m.group(2))
            # the 1-thread point-sum pass comes after the 2-thread one: keep both
            if key in res and key.startswith(("exact", "fresnel")):
                key = key + "@1t"
            res[key] = val
        m = re.match(r"^JOB (\S+) threads=(\d+)", line)
        if m:
            job = (m.group(1), int(m.group(2)))
        m = re.match(r"^ITER (\S+) iterations=(\d+)", line)
        if m:
            job = (m.group(1) + "@" + m.group(2), 2)
        m = re.search(r"stats: .*: ([\d.]+) s, (\d+) point-pixel updates, ([\d.]+) G updates/s, peak memory (.*)$", line)
        if m and job:
            # Jobs run more than once keep their best run (fastest).
            if job not in jobs or float(m.group(1)) < jobs[job]["secs"]:
                jobs[job] = dict(secs=float(m.group(1)), updates=int(m.group(2)), gups=float(m.group(3)),
                                 peak=m.group(4))
    return crit_time, crit_thrpt, res, jobs, loads


def main():
    raw, out = sys.argv[1], sys.argv[2]
    text = open(raw, encoding="utf-8").read()
    ct, cg, res, jobs, loads = parse(text)
    rows = []

    def ratio(label, fm, ref, fm_s, ref_s):
        if fm is None or ref is None:
            rows.append(f"| {label} | {fm_s if fm is not None else 'n/a'} | {ref_s if ref is not None else 'n/a'} | n/a |")
        else:
            rows.append(f"| {label} | {fm_s} | {ref_s} | **{fm / ref:.2f}x** |")

    g = lambda k: cg.get(k)
    gs = lambda v: f"{v / 1e9:.3f} G/s" if v is not None else None
    best = lambda k: g(f"point_sum/{k}/avx512") or g(f"point_sum/{k}/avx2") or g(f"point_sum/{k}/portable")
    exact = best("exact_f32")
    exact64 = best("exact")
    fres = best("fresnel_f32")
    careful = res.get("exact_careful")
    plain = res.get("exact_plain")
    je = jobs.get(("badge_f32", 2))
    ratio("GOAL exact: whole badge job f32, 2 threads vs careful numpy (1 core); goal >= 10x",
          je and je["gups"] * 1e9, careful and careful * 1e9, gs(je and je["gups"] * 1e9), gs(careful and careful * 1e9))
    ratio("point sum exact f64, 1 core: kernel vs careful numpy (1 core)", exact64, careful and careful * 1e9,
          gs(exact64), gs(careful and careful * 1e9))
    ratio("point sum exact f32, 1 core: kernel vs careful numpy (1 core)", exact, careful and careful * 1e9,
          gs(exact), gs(careful and careful * 1e9))
    ratio("point sum exact f32, 1 core: kernel vs plain numpy (1 core)", exact, plain and plain * 1e9,
          gs(exact), gs(plain and plain * 1e9))
    gb = res.get("fresnel_gemm_band")
    ratio("Fresnel, same band: kernel 1 core vs numpy GEMM (BLAS 2 threads)", fres, gb and gb * 1e9, gs(fres), gs(gb and gb * 1e9))
    big = {k: v for k, v in res.items() if k.startswith("fresnel_gemm_") and "@" not in k}
    if big:
        bk = max(big, key=big.get)
        bv = big[bk] * 1e9
        ratio(f"Fresnel: kernel x 2 cores (ideal) vs best numpy GEMM ({bk[13:]}, 2 threads)",
              fres and 2 * fres, bv, gs(fres and 2 * fres), gs(bv))
        jf = jobs.get(("badge_fresnel_f32", 2))
        ratio(f"GOAL Fresnel: whole badge job f32, 2 threads vs best numpy GEMM ({bk[13:]}, 2 threads)",
              jf and jf["gups"] * 1e9, bv, gs(jf and jf["gups"] * 1e9), gs(bv))
        jc = jobs.get(("cloud_fresnel_f32", 2))
        ratio(f"GOAL Fresnel: 1024-point cloud job f32 at 2048^2 (supports cover the plate), 2 threads vs numpy GEMM "
              f"({bk[13:]}, 2 threads)", jc and jc["gups"] * 1e9, bv, gs(jc and jc["gups"] * 1e9), gs(bv))
        jn = jobs.get(("cloud_near_fresnel_f32", 2))
        ratio("GOAL Fresnel, band-limited: 9216 points 3 mm away (supports a few hundred px), 2 threads vs numpy GEMM",
              jn and jn["gups"] * 1e9, bv, gs(jn and jn["gups"] * 1e9), gs(bv))
        ratio("Fresnel speed kept with band-limited supports: 9216 points at 3 mm vs 1024 at 30 mm (G updates/s)",
              jn and jn["gups"], jc and jc["gups"], jn and f"{jn['gups']:.3f} G/s", jc and f"{jc['gups']:.3f} G/s")
    whole = res.get("fresnel_gemm_4096x4096_p1000")
    for name, label in [("fresnel4096_phase", "256 phase levels"), ("fresnel4096_binary", "binary amplitude")]:
        jw = jobs.get((name, 2))
        ratio(f"Fresnel whole job 4096^2 x 1000 points f32 ({label}, read, encode, write, hash), 2 threads vs the "
              "strongest numpy form (float32 cos/sin factors, one complex64 GEMM, 2 BLAS threads, sum only)",
              jw and jw["gups"] * 1e9, whole and whole * 1e9, gs(jw and jw["gups"] * 1e9), gs(whole and whole * 1e9))
    jx = jobs.get(("cloud_exact_f32", 2))
    ratio("exact: 1024-point cloud job f32, 2 threads vs careful numpy (1 core)",
          jx and jx["gups"] * 1e9, careful and careful * 1e9, gs(jx and jx["gups"] * 1e9), gs(careful and careful * 1e9))
    d64, d32, dp = (jobs.get((n, 2)) for n in ["dense_direct_f64", "dense_direct_f32", "dense_plane"])
    sec = lambda j: j and f"{j['secs']:.2f} s"
    ratio("recording plane vs direct sum f64, dense scene (time)", dp and 1 / dp["secs"], d64 and 1 / d64["secs"],
          sec(dp), sec(d64))
    ratio("recording plane f64 vs direct sum f32, dense scene (time)", dp and 1 / dp["secs"], d32 and 1 / d32["secs"],
          sec(dp), sec(d32))
    dp32 = jobs.get(("dense_plane_f32", 2))
    ratio("recording plane f32 vs direct sum f32, dense scene (time)", dp32 and 1 / dp32["secs"],
          d32 and 1 / d32["secs"], sec(dp32), sec(d32))
    ratio("recording plane f32 vs recording plane f64, dense scene (time)", dp32 and 1 / dp32["secs"],
          dp and 1 / dp["secs"], sec(dp32), sec(dp))
    for name in ["badge", "badge_f32", "badge_fresnel", "badge_fresnel_f32"]:
        a, b = jobs.get((name, 2)), jobs.get((name, 1))
        ratio(f"thread scaling, whole job `{name}`: 2 threads vs 1", a and a["gups"], b and b["gups"],
              a and f"{a['gups']:.3f} G/s", b and f"{b['gups']:.3f} G/s")
    for k in ["exact_f32", "exact", "fresnel_f32", "fresnel"]:
        for isa in ["avx512", "avx2"]:
            a, p = g(f"point_sum/{k}/{isa}"), g(f"point_sum/{k}/portable")
            if a is not None:
                ratio(f"ISA: {k} kernel {isa} vs portable", a, p, gs(a), gs(p))
    ratio("precision: exact kernel f32 vs f64 (best ISA, 1 core)", exact, exact64, gs(exact), gs(exact64))
    ratio("precision: Fresnel kernel f32 vs f64 (best ISA, 1 core)", fres, best("fresnel"), gs(fres), gs(best("fresnel")))

    ms = lambda s: f"{s * 1e3:.1f} ms" if s is not None else None
    f2 = ct.get("fft2d/2048")
    for key, label in [("fft2_numpy_2048", "numpy.fft (1 thread)"), ("fft2_fftw_2048", "pyFFTW (2 threads)")]:
        r = res.get(key)
        ratio(f"FFT 2048^2 complex64, rustfft+rayon 2 threads vs {label}", r and r / 1e3, f2, ms(f2), ms(r and r / 1e3))
    for n in [2048, 4096]:
        fm = ct.get(f"gs_equiv/{n}")
        for key, label in [(f"gs_numpy_{n}", "numpy.fft"), (f"gs_fftw_{n}", "numpy+pyFFTW 2 threads")]:
            r = res.get(key)
            ratio(f"GS iteration {n}^2 vs {label}", r and r / 1e3, fm, ms(fm), ms(r and r / 1e3))
    t20 = jobs.get(("tern_2048@20", 2))
    tn = [(n, jobs.get((f"tern_2048@{n}", 2))) for n in (80, 40)]
    tn = [(n, j) for n, j in tn if j]
    it = (tn[0][1]["secs"] - t20["secs"]) / (tn[0][0] - 20) if t20 and tn else None
    for key, label in [("gs_numpy_2048", "numpy.fft"), ("gs_fftw_2048", "numpy+pyFFTW 2 threads"),
                       ("gs_fftwc_2048", "GOAL: FFTW from C, 2 threads")]:
        r = res.get(key)
        ratio(f"GS iteration 2048^2 in a whole iterative job vs {label}", r and r / 1e3, it, ms(it), ms(r and r / 1e3))
    for n in [2048, 4096]:
        r, fm = res.get(f"fft2_fftwc_{n}"), ct.get(f"fft2d/{n}")
        if r is not None and fm is not None:
            ratio(f"FFT {n}^2 complex64 vs FFTW from C (2 threads)", r / 1e3, fm, ms(fm), ms(r / 1e3))
    for n in [2048, 4096]:
        r, fm = res.get(f"gs_fftwc_{n}"), ct.get(f"gs_loop/{n}")
        ratio(f"GOAL: GS iteration {n}^2, the loop itself (gs_loop, 2 threads) vs FFTW from C (2 threads)",
              r and r / 1e3, fm, ms(fm), ms(r and r / 1e3))
    f2g = ct.get("gs_equiv/2048")
    ratio("GS iteration 2048^2 vs goal (FFTW from C, quoted 32 ms)", 0.032, f2g, ms(f2g), "32 ms (quoted)")

    lines = ["# Benchmark run", "", "Ratios are fringemill speed / reference speed (> 1: fringemill faster).",
             "Raw output: raw.txt beside this file.", ""]
    head = [l for l in text.splitlines()[:14] if ":" in l and not l.startswith("===")]
    lines += ["## Machine", ""] + [f"- {l}" for l in head] + [""]
    lines += ["## Load average at each step (2 cores)", "", "| step | time | load 1/5/15 min |", "| --- | --- | --- |"]
    lines += [f"| {s} | {t} | {l} |" for s, t, l in loads] + [""]
    lines += ["## Ratios", "", "| comparison | fringemill | reference | ratio |", "| --- | --- | --- | --- |"] + rows + [""]
    lines += ["## Whole jobs (--stats)", "", "| job | threads | s | G updates/s | peak RSS |", "| --- | --- | --- | --- | --- |"]
    for (n, t), v in sorted(jobs.items()):
        lines.append(f"| {n} | {t} | {v['secs']:.2f} | {v['gups']:.3f} | {v['peak']} |")
    lines += ["", "## Criterion (median)", "", "| bench | time | throughput |", "| --- | --- | --- |"]
    for k in sorted(ct):
        lines.append(f"| {k} | {ct[k] * 1e3:.3f} ms | {gs(cg.get(k)) or ''} |")
    lines += ["", "## numpy", "", "| result | value |", "| --- | --- |"]
    for k, v in res.items():
        lines.append(f"| {k} | {v} |")
    open(out, "w", encoding="utf-8").write("\n".join(lines) + "\n")
    print("\n".join(lines))


if __name__ == "__main__":
    main()
