#!/usr/bin/env bash
# Benchmark of `kalends fill --method spacetime` on a synthetic stack (not a test: nothing here
# passes or fails). In one run: the GDAL I/O floor (gdal_translate of every date into the same
# output layout) and kalends spacetime at 1 and N threads; medians of --repeats runs, peak RSS
# from GNU time, kernel throughput from --verbose. Targets (issue 3): >= 5e6 pixel-dates/s per
# core in the kernel, whole fill <= 3 x the I/O floor. Then one PLS solve by kalends and by an
# independent numpy/scipy implementation (tools/bench/pls_reference.py). Writes
# WORKDIR/spacetime-bench.json and WORKDIR/pls-reference.json.
# Warm cache.
#
# usage: tools/bench/spacetime.sh [--width 512] [--height 512] [--dates 46] [--threads 2]
#                                 [--repeats 3] [--workdir /tmp/kalends-bench-spacetime]
#                                 [--stack DIR]   (its ndvi_*.tif instead of a synthetic stack,
#                                                  e.g. ../shared/data/alaska-ndvi/masked50)
# env:   KALENDS=path/to/kalends (default build/kalends), PYTHON (default /usr/bin/python3)
set -euo pipefail

root=$(cd "$(dirname "${BASH_SOURCE[0]}")/../.." && pwd)
py=${PYTHON:-/usr/bin/python3}
kalends=${KALENDS:-$root/build/kalends}
width=512 height=512 dates=46 threads=2 repeats=3 workdir=/tmp/kalends-bench-spacetime
given_stack=

while [ $# -gt 0 ]; do
  case "$1" in
    --width|--height|--dates|--threads|--repeats|--workdir)
      [ $# -ge 2 ] || { echo "spacetime.sh: $1 needs a value" >&2; exit 2; }
      v=$2; k=${1#--}; printf -v "$k" '%s' "$v"; shift 2 ;;
    --stack)
      [ $# -ge 2 ] || { echo "spacetime.sh: $1 needs a value" >&2; exit 2; }
      given_stack=$2; shift 2 ;;
    -h|--help) sed -n '2,15p' "${BASH_SOURCE[0]}"; exit 0 ;;
    *) echo "spacetime.sh: unknown argument $1" >&2; exit 2 ;;
  esac
done
for v in width height dates threads repeats; do
  [[ ${!v} =~ ^[1-9][0-9]*$ ]] || { echo "spacetime.sh: --$v must be a positive integer" >&2; exit 2; }
done
[ -x /usr/bin/time ] || { echo "spacetime.sh: needs GNU time (/usr/bin/time)" >&2; exit 1; }
[ -x "$kalends" ] || { echo "spacetime.sh: $kalends not found (tools/build.sh)" >&2; exit 1; }

mkdir -p "$workdir"
workdir=$(cd "$workdir" && pwd)
stack=$workdir/stack-${width}x${height}x${dates}/ndvi
synthetic=True
if [ -n "$given_stack" ]; then
  stack=$(cd "$given_stack" && pwd) || { echo "spacetime.sh: $given_stack: no such folder" >&2; exit 2; }
  read -r width height dates < <("$py" - "$stack" <<'PY'
import glob, sys
from osgeo import gdal
files = sorted(glob.glob(sys.argv[1] + "/ndvi_*.tif"))
if not files:
    sys.exit("spacetime.sh: %s: no ndvi_*.tif files" % sys.argv[1])
ds = gdal.Open(files[0])
print(ds.RasterXSize, ds.RasterYSize, len(files))
PY
  ) || exit 2
  synthetic=False
fi
runs=$workdir/runs.tsv log=$workdir/logs
mkdir -p "$log"
: > "$runs"
if [ -z "$given_stack" ] && [ ! -f "$stack/synth.json" ]; then
  rm -rf "$stack"
  "$py" "$root/tools/synth_stack.py" --scenario bench --out "$stack" --width "$width" \
    --height "$height" --dates "$dates" --quiet
fi

timed() {
  local name=$1 out=$2; shift 2
  rm -rf "$out"
  local t0 t1 rc=0
  t0=$(date +%s.%N)
  /usr/bin/time -v -o "$log/$name.time" "$@" > "$log/$name.out" 2> "$log/$name.err" || rc=$?
  t1=$(date +%s.%N)
  if [ $rc -ne 0 ]; then
    echo "bench: $name failed (rc $rc):" >&2; tail -n 5 "$log/$name.err" >&2
    printf '%s\tNA\tNA\tNA\n' "$name" >> "$runs"; return 0
  fi
  local rss kernel
  rss=$(awk -F': ' '/Maximum resident set size/ {print $2}' "$log/$name.time")
  kernel=$(sed -n 's/.*kernel: *\([0-9.eE+-]*\) *pixel-dates\/s.*/\1/p' "$log/$name.err" | tail -n 1)
  printf '%s\t%s\t%s\t%s\n' "$name" "$(awk -v a="$t0" -v b="$t1" 'BEGIN {printf "%.3f", b - a}')" \
    "${rss:-NA}" "${kernel:-NA}" >> "$runs"
}

cat > "$workdir/floor.sh" <<'FLOOR'
#!/usr/bin/env bash
set -euo pipefail
stack=$1 threads=$2 out=$3
mkdir -p "$out"
printf '%s\n' "$stack"/ndvi_*.tif | xargs -P "$threads" -I{} sh -c \
  'gdal_translate -q -ot Float32 -b 1 -b 1 -b 1 -co TILED=YES -co COMPRESS=DEFLATE -co PREDICTOR=3 -co INTERLEAVE=BAND "$1" "$2/$(basename "$1")"' \
  _ {} "$out"
FLOOR
chmod +x "$workdir/floor.sh"

thread_list=(1); [ "$threads" -gt 1 ] && thread_list+=("$threads")
for r in $(seq 1 "$repeats"); do
  echo "bench: repeat $r/$repeats" >&2
  timed "floor.r$r" "$workdir/out-floor" "$workdir/floor.sh" "$stack" "$threads" "$workdir/out-floor"
  for t in "${thread_list[@]}"; do
    timed "spacetime.t$t.r$r" "$workdir/out-kalends" "$kalends" fill "$stack/ndvi_*.tif" \
      --out "$workdir/out-kalends" --method spacetime --threads "$t" --memory 2G --verbose
  done
done
rm -rf "$workdir/out-floor" "$workdir/out-kalends"
# The solver alone against an independent numpy/scipy implementation of the same problem.
echo "bench: one PLS solve, kalends against numpy/scipy" >&2
"$py" "$root/tools/bench/pls_reference.py" "$stack/ndvi_*.tif" --repeats "$repeats" \
  --json "$workdir/pls-reference.json" || echo "bench: the PLS reference failed" >&2

"$py" - "$runs" "$workdir/spacetime-bench.json" "$width" "$height" "$dates" "$threads" "$repeats" \
  "$synthetic" "$stack" <<'PY'
import json, statistics, sys
runs_path, out_path = sys.argv[1:3]
width, height, dates, threads, repeats = map(int, sys.argv[3:8])
synthetic, stack = sys.argv[8] == "True", sys.argv[9]
pd = width * height * dates
rows = {}
for line in open(runs_path):
    name, wall, rss, kernel = line.rstrip("\n").split("\t")
    rows.setdefault(name.rsplit(".r", 1)[0], []).append((wall, rss, kernel))
def summary(key):
    ok = [r for r in rows.get(key, []) if r[0] != "NA"]
    if not ok:
        return None
    wall = statistics.median(float(r[0]) for r in ok)
    ks = [float(r[2]) for r in ok if r[2] != "NA"]
    return dict(runs=len(ok), median_s=wall, pixel_dates_per_s=pd / wall,
                peak_rss_mib=max(int(r[1]) for r in ok) / 1024.0,
                kernel_pixel_dates_per_s=statistics.median(ks) if ks else None)
res = {k: summary(k) for k in ["floor"] + [f"spacetime.t{t}" for t in sorted({1, threads})]}
floor = res["floor"]["median_s"] if res["floor"] else None
top = res.get(f"spacetime.t{threads}")
one = res.get("spacetime.t1")
ratios = {
    f"spacetime_T{threads}_over_floor_time": top["median_s"] / floor if top and floor else None,
    "kernel_1t_pixel_dates_per_s_per_core": one["kernel_pixel_dates_per_s"] if one else None,
    "kernel_target_per_core": 5e6, "floor_ratio_target": 3.0}
json.dump(dict(benchmark="kalends fill --method spacetime", synthetic_stack=synthetic,
               stack=stack, width=width,
               height=height, dates=dates, pixel_dates=pd, threads=threads, repeats=repeats,
               results=res, ratios=ratios), open(out_path, "w"), indent=1)
print(f"\nspacetime benchmark: {'synthetic ' if synthetic else ''}{width}x{height}x{dates} = "
      f"{pd:,} pixel-dates ({stack}), median of {repeats}")
print(f"{'case':<32} {'median s':>9} {'pixel-dates/s':>14} {'peak RSS MiB':>13} {'kernel pd/s':>12}")
for k, r in res.items():
    if r is None:
        print(f"{k:<32} n/a"); continue
    kp = r['kernel_pixel_dates_per_s']
    print(f"{k:<32} {r['median_s']:>9.3f} {r['pixel_dates_per_s']:>14.3e} {r['peak_rss_mib']:>13.1f} "
          f"{('n/a' if kp is None else format(kp, '.3e')):>12}")
for k, v in ratios.items():
    print(f"{k:<44}: {'n/a' if v is None else format(v, '.3g')}")
print(f"JSON: {out_path}")
PY
