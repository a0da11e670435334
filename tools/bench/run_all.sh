#!/usr/bin/env bash
# Runs fringemill and the numpy references in one session and records the ratios.
#
#   tools/bench/run_all.sh            # everything (about 10-15 min on 2 cores)
#   QUICK=1 tools/bench/run_all.sh    # shorter numpy timings, no 4096^2 GS
#
# Writes tools/bench/runs/<date>-<host>/{raw.txt,summary.md} (RUN_DIR overrides the folder).
# Steps: release build; the sample job samples/badge.toml (exact) at --threads 2 and 1, and a Fresnel
# copy of it made in a temp folder, each with --stats; the criterion benches (tools/bench/kernels.rs);
# tools/reference/pointsum_numpy.py (BLAS at 2 and 1 threads) and tools/reference/gs_numpy.py.
# OPENBLAS_CORETYPE / OPENBLAS_L2_SIZE, if set on the machine, are unset for the numpy commands only
# (they pin an older, slower OpenBLAS kernel); the kernel threadpoolctl sees is recorded.
set -euo pipefail

root="$(cd "$(dirname "$0")/../.." && pwd)"
cd "$root"
host="$(hostname -s 2>/dev/null || hostname)"
run_dir="${RUN_DIR:-tools/bench/runs/$(date +%Y-%m-%d)-$host}"
mkdir -p "$run_dir"
raw="$run_dir/raw.txt"
: > "$raw"
tmp="$(mktemp -d)"
trap 'rm -rf "$tmp"' EXIT
py="${PYTHON:-python3}"
quick="${QUICK:-0}"

log() { echo "$@" | tee -a "$raw"; }
section() { log ""; log "=== $1 ($(date +%H:%M:%S), load average: $(cut -d' ' -f1-3 /proc/loadavg))"; }
# Runs a command, appending its stdout and stderr to raw.txt (and showing them).
run() { log "\$ $*"; "$@" 2>&1 | tee -a "$raw"; }
numpy_env() { env -u OPENBLAS_CORETYPE -u OPENBLAS_L2_SIZE "$@"; }

section "machine"
log "date: $(date -Iseconds)"
log "host: $host"
log "cpu: $(grep -m1 'model name' /proc/cpuinfo | cut -d: -f2- | sed 's/^ *//')"
log "nproc: $(nproc)"
log "simd: $(grep -m1 '^flags' /proc/cpuinfo | tr ' ' '\n' | grep -E '^(avx|avx2|fma|avx512f)$' | tr '\n' ' ')"
log "memory: $(free -g | awk '/Mem:/ {print $2 " GiB"}')"
log "rustc: $(rustc --version)"
log "python: $($py --version 2>&1)"
log "git: $(git rev-parse --short HEAD 2>/dev/null || echo none)"
log "machine env: OPENBLAS_CORETYPE=${OPENBLAS_CORETYPE:-(unset)} OPENBLAS_L2_SIZE=${OPENBLAS_L2_SIZE:-(unset)} (unset for numpy runs)"

section "python packages"
if ! $py -c 'import numpy' 2>/dev/null; then run $py -m pip install -q numpy || true; fi
for p in threadpoolctl pyfftw; do
    if ! $py -c "import $p" 2>/dev/null; then run $py -m pip install -q "$p" || log "($p could not be installed)"; fi
done
numpy_env $py -c 'import numpy; print("numpy", numpy.__version__)' 2>&1 | tee -a "$raw" || true
numpy_env $py -c 'from threadpoolctl import threadpool_info as t; import numpy; [print("threadpoolctl:", i["internal_api"], i["version"], "kernel", i["architecture"], "threads", i["num_threads"]) for i in t()]' 2>&1 | tee -a "$raw" || true

section "build"
run cargo build --release --quiet
bin="${CARGO_TARGET_DIR:-$root/target}/release/fringemill"

section "whole jobs"
cp samples/badge.toml samples/badge_points.ply "$tmp/"
sed -e 's/^approximation = "exact"/approximation = "fresnel"/' -e 's#out/badge.tif#out/badge_fresnel.tif#' \
    samples/badge.toml > "$tmp/badge_fresnel.toml"
grep -q 'approximation = "fresnel"' "$tmp/badge_fresnel.toml"
# The same two jobs with the f32 kernels ([synthesis] precision = "f32").
for j in badge badge_fresnel; do
    sed -e 's/^approximation = \(.*\)$/approximation = \1\nprecision = "f32"/' -e "s#out/$j.tif#out/${j}_f32.tif#" \
        "$tmp/$j.toml" > "$tmp/${j}_f32.toml"
    grep -q 'precision = "f32"' "$tmp/${j}_f32.toml"
done
for job in badge badge_f32 badge_fresnel badge_fresnel_f32; do
    for t in 2 1 2 1; do
        log "JOB $job threads=$t"
        run "$bin" run "$tmp/$job.toml" --restart --stats --threads "$t" -q
    done
done

section "whole jobs: 1024-point cloud (Fresnel goal shape, band-limited supports)"
# cloud.ply at 30 mm: every support covers the 2048^2 plate, as in the numpy GEMM of 2048^2 x 1024
# points; cloud9.ply (9216 points) at 3 mm: supports a few hundred pixels across (band-limited), about
# the same number of updates. Each job 3 times:
# the summary keeps the best run (these jobs take a fraction of a second, and the machine's load
# moves single runs by tens of per cent).
$py tools/bench/make_scenes.py "$tmp"
for v in "cloud_fresnel_f32 30.0 fresnel cloud" "cloud_near_fresnel_f32 3.0 fresnel cloud9" "cloud_exact_f32 30.0 exact cloud"; do
    set -- $v
    sed -e "s/badge_points.ply/$4.ply/" -e "s/^offset_mm = .*/offset_mm = [0.0, 0.0, $2]/" \
        -e "s/^approximation = .*/approximation = \"$3\"\nprecision = \"f32\"/" \
        -e 's/^compression = .*/compression = "none"/' -e "s#out/badge.tif#out/$1.tif#" \
        samples/badge.toml > "$tmp/$1.toml"
    for r in 1 2 3; do
        log "JOB $1 threads=2"
        run "$bin" run "$tmp/$1.toml" --restart --stats --threads 2 -q
    done
done

section "whole job: 4096^2 plate, 1000 points, Fresnel f32 (the numpy whole-job GEMM's shape)"
# cloud1000.ply 30-34 mm before a 4096^2 plate at 1 um, 532 nm, on-axis reference: every support
# covers the plate (16.8 G updates, as pointsum_numpy.py's fresnel_gemm_4096x4096_p1000), 256
# phase levels and binary amplitude, uncompressed; three runs each, the best kept.
for v in "fresnel4096_phase phase" "fresnel4096_binary binary-amplitude"; do
    set -- $v
    enc='kind = "phase"\nlevels = 256'; [ "$2" = binary-amplitude ] && enc='kind = "binary-amplitude"'
    printf "[hologram]\nwidth_px = 4096\nheight_px = 4096\npitch_um = 1.0\nwavelength_nm = 532\n[reference]\nkind = \"plane\"\n[[object]]\npoints = \"cloud1000.ply\"\noffset_mm = [0, 0, 30]\n[synthesis]\napproximation = \"fresnel\"\nprecision = \"f32\"\n[encoding]\n$enc\n[output]\npath = \"out/$1.tif\"\ncompression = \"none\"\n" > "$tmp/$1.toml"
    for r in 1 2 3; do
        log "JOB $1 threads=2"
        run "$bin" run "$tmp/$1.toml" --restart --stats --threads 2 -q
    done
done

section "recording plane against the direct sum (dense scene)"
# 5000 emitters 2.0-2.5 mm in front of a 2048^2 plate at 1 um, 256 phase levels, 2 threads.
for v in "dense_direct_f64 direct f64" "dense_direct_f32 direct f32" "dense_plane recording-plane f64" \
    "dense_plane_f32 recording-plane f32"; do
    set -- $v
    printf '[hologram]\nwidth_px = 2048\nheight_px = 2048\npitch_um = 1.0\nwavelength_nm = 633\n[reference]\nkind = "plane"\ntilt_deg = [2, -1]\n[[object]]\npoints = "dense.csv"\n[synthesis]\nmethod = "point-sum"\napproximation = "exact"\npath = "%s"\nprecision = "%s"\n[encoding]\nkind = "phase"\nlevels = 256\n[output]\npath = "out/%s.tif"\n' \
        "$2" "$3" "$1" > "$tmp/$1.toml"
    log "JOB $1 threads=2"
    run "$bin" run "$tmp/$1.toml" --restart --stats --threads 2 -q
done

section "iterative job: ms per iteration at 2048^2"
# samples/tern_slm.toml at 2048 x 2048, run with 20 and 80 iterations (no early stop): the
# difference over 60 is the cost of one free iteration, set-up and writing excluded (two runs
# each; the summary takes the best of each: single runs move by half a second here).
cp samples/tern_slm.toml samples/tern_target.png "$tmp/"
for n in 20 80; do
    sed -e 's/^width_px = .*/width_px = 2048/' -e 's/^height_px = .*/height_px = 2048/' \
        -e "s/^iterations = .*/iterations = $n\nstall_tolerance = 0/" -e "s#out/tern_slm.tif#out/tern_$n.tif#" \
        samples/tern_slm.toml > "$tmp/tern_$n.toml"
done
for r in 1 2; do
    for n in 20 80; do
        log "ITER tern_2048 iterations=$n"
        run "$bin" run "$tmp/tern_$n.toml" --restart --stats --threads 2 -q
    done
done

section "criterion benches (tools/bench/kernels.rs)"
run cargo bench --quiet --bench kernels -- --noplot

section "numpy point sum, BLAS 2 threads"
qa=(); [ "$quick" = 1 ] && qa=(--quick)
run numpy_env OPENBLAS_NUM_THREADS=2 $py tools/reference/pointsum_numpy.py "${qa[@]}"
section "numpy point sum, BLAS 1 thread"
run numpy_env OPENBLAS_NUM_THREADS=1 $py tools/reference/pointsum_numpy.py --quick

section "numpy GS iteration"
sizes=2048,4096; [ "$quick" = 1 ] && sizes=2048
run numpy_env OPENBLAS_NUM_THREADS=2 $py tools/reference/gs_numpy.py --threads 2 --sizes "$sizes" "${qa[@]}"

section "FFTW from C: GS iteration"
# Needs the FFTW headers and libraries (Debian: libfftw3-dev); skipped with a note when absent.
if ! [ -e /usr/include/fftw3.h ] && command -v apt-get >/dev/null; then
    run apt-get install -y -q libfftw3-dev >/dev/null 2>&1 || log "(libfftw3-dev could not be installed)"
fi
if gcc -O3 -march=native -fopenmp tools/reference/gs_fftw.c -lfftw3f_threads -lfftw3f -lpthread -lm -o "$tmp/gs_fftw" 2>>"$raw"; then
    for n in $(echo "$sizes" | tr , ' '); do
        run env OMP_NUM_THREADS=2 "$tmp/gs_fftw" "$n" 2
    done
else
    log "(gs_fftw.c did not build: no FFTW from C figures)"
fi

section "end"
run $py tools/bench/summarize.py "$raw" "$run_dir/summary.md"
echo "wrote $raw and $run_dir/summary.md"
