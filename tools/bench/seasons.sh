#!/usr/bin/env bash
# Benchmark of `kalends seasons` (not a test): a synthetic stack of 16-day composites, then in
# one run the GDAL I/O floor (tools/bench/seasons_floor.py: read every input, write the same
# outputs with GDAL alone) and kalends seasons; medians of --repeats runs, peak RSS from
# /usr/bin/time -v. Warm cache.
#
# usage: tools/bench/seasons.sh [--width 2048] [--height 2048] [--years 6] [--threads 2]
#                               [--repeats 3] [--workdir /tmp/kalends-bench-seasons]
set -euo pipefail
root=$(cd "$(dirname "${BASH_SOURCE[0]}")/../.." && pwd)
width=2048 height=2048 years=6 threads=2 repeats=3 workdir=/tmp/kalends-bench-seasons
while [ $# -gt 0 ]; do
  case $1 in
    --width|--height|--years|--threads|--repeats|--workdir) printf -v "${1#--}" '%s' "$2"; shift 2 ;;
    *) echo "seasons.sh: unknown option $1" >&2; exit 2 ;;
  esac
done
py=/usr/bin/python3
kalends=${KALENDS:-$root/build/kalends}
dates=$((years * 23))
stack=$workdir/stack-${width}x${height}x${dates}
mkdir -p "$workdir"
if [ ! -f "$stack/synth.json" ]; then
  echo "bench: generating ${width}x${height}x${dates} stack" >&2
  rm -rf "$stack"
  "$py" "$root/tools/synth_stack.py" --scenario bench --out "$stack" --width "$width" \
    --height "$height" --dates "$dates" --quiet
fi
runs=$workdir/runs.tsv
: > "$runs"
source "$root/tools/bench/timed.sh"
for r in $(seq 1 "$repeats"); do
  echo "bench: repeat $r/$repeats" >&2
  rm -rf "$workdir/out-kalends"
  timed "kalends.r$r" "$kalends" seasons "$stack/ndvi_*.tif" --out "$workdir/out-kalends" \
    --threads "$threads" --memory 1G
  rm -rf "$workdir/out-floor"
  floor() {  # floor NAME [extra option]: $threads processes, each a share of inputs and outputs
    local name=$1; shift
    timed "$name" bash -c 'for k in $(seq 0 $(($5 - 1))); do
        "$1" "$2" "$3" "$4" "$6" --share "$k" --of "$5" ${7:-} & done; wait' _ \
      "$py" "$root/tools/bench/seasons_floor.py" "$stack/ndvi_*.tif" "$workdir/out-kalends" "$threads" \
      "$workdir/out-floor" "$@"
  }
  floor "floor.r$r"
  floor "layout-read.r$r" --read-layout-only
done
"$py" - "$runs" "$width" "$height" "$dates" "$threads" "$repeats" "$workdir/out-kalends" <<'PY'
import glob, json, os, statistics, sys
runs, width, height, dates, threads, repeats, out = sys.argv[1], *map(int, sys.argv[2:7]), sys.argv[7]
rows = {}
for line in open(runs):
    name, wall, rss = line.split("\t")
    rows.setdefault(name, []).append((float(wall), int(rss)))
res = {k: dict(median_s=statistics.median(w for w, _ in v), peak_rss_mib=max(r for _, r in v) / 1024, runs=len(v))
       for k, v in rows.items()}
ratio = res["kalends"]["median_s"] / res["floor"]["median_s"]
pure = res["floor"]["median_s"] - res["layout-read"]["median_s"]
ratio_pure = res["kalends"]["median_s"] / pure
files = glob.glob(os.path.join(out, "*.tif"))
print(f"\nkalends seasons benchmark: {width}x{height} px, {dates} composites (16-day, synthetic), "
      f"{len(files)} output files, {threads} threads, median of {repeats}, warm cache")
for k, label in (("floor", "GDAL I/O floor (seasons_floor.py)"), ("layout-read", "  of which re-reading the outputs"),
                 ("kalends", "kalends seasons")):
    print(f"  {label:<36} {res[k]['median_s']:8.2f} s   peak RSS {res[k]['peak_rss_mib']:7.1f} MiB")
print(f"  kalends / floor (target <= 1.5): {ratio:.2f}")
print(f"  kalends / (floor - re-reading the outputs): {ratio_pure:.2f}")
json.dump(dict(width=width, height=height, dates=dates, threads=threads, results=res, ratio=ratio,
               ratio_without_rereading=ratio_pure),
          open(os.path.join(os.path.dirname(runs), "seasons-bench.json"), "w"), indent=1)
PY
rm -rf "$workdir/out-floor" "$workdir/out-kalends"
