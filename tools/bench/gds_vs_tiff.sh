#!/usr/bin/env bash
# Bytes and time of a GDSII layout against the 1-bit TIFF of the same 8192^2 binary-amplitude
# plate (40 invented points 8-12 mm away, 0.5 um pitch, 532 nm, plane reference tilted 12 deg in
# y), whole process, side by side on this machine; gds = rectangles, gdc = merge = "contour". Usage: tools/bench/gds_vs_tiff.sh [BIN] [RUNS]
set -euo pipefail
BIN=${1:-target/release/fringemill}
RUNS=${2:-3}
BIN=$(realpath "$BIN")
D=$(mktemp -d)
trap 'rm -rf "$D"' EXIT
python3 - "$D/pts.csv" <<'PY'
import random, sys
random.seed(3)
with open(sys.argv[1], "w") as f:
    f.write("x_mm,y_mm,z_mm,amplitude,phase_rad\n")
    for _ in range(40):
        f.write(f"{random.uniform(-1,1):.4f},{random.uniform(-1,1):.4f},{random.uniform(8,12):.4f},1,{random.uniform(0,6.28):.4f}\n")
PY
for fmt in tif gds gdc; do
  cat > "$D/$fmt.toml" <<TOML
[hologram]
width_px = 8192
height_px = 8192
pitch_um = 0.5
wavelength_nm = 532
[reference]
kind = "plane"
tilt_deg = [0.0, 12.0]
[[object]]
points = "pts.csv"
[synthesis]
approximation = "fresnel"
precision = "f32"
[encoding]
kind = "binary-amplitude"
[output]
path = "plate_$fmt.$fmt"
rows_per_strip = 64
TOML
done
echo 'format = "gdsii"' >> "$D/gds.toml"
printf 'format = "gdsii"\nmerge = "contour"\n' >> "$D/gdc.toml"
for run in $(seq "$RUNS"); do
  for fmt in tif gds gdc; do
    s=$(date +%s.%N)
    "$BIN" run -q "$D/$fmt.toml" >/dev/null
    e=$(date +%s.%N)
    printf '%s run %d: %.3f s, %d bytes\n' "$fmt" "$run" "$(echo "$e - $s" | bc)" "$(stat -c %s "$D/plate_$fmt.$fmt")"
    if [ "$fmt" != tif ] && [ "$run" = 1 ]; then
      python3 -c 'import json,sys; o=json.load(open(sys.argv[1]))["output"]; print("  ", o["boundaries"], "boundaries,", o["vertices"], "XY points")' "$D/plate_$fmt.json"
    fi
  done
done
