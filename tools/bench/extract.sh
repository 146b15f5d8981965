#!/usr/bin/env bash
# Benchmark of `kalends extract` (not a test: nothing here passes or fails). A synthetic stack
# (invented data, a fictional district), filled with a monthly calendar; invented survey points
# in random date order, as a table ordered by household is. In one run: the GDAL I/O floor
# (tools/bench/extract_floor.py: every band of every layer the extract reads, read once with GDAL,
# and the points looked up with numpy) and kalends extract, each with GDAL's default block cache
# and with a small one (GDAL_CACHEMAX=64 MB, as on a node with little memory or with layers far
# larger than the cache), and kalends again with the points sorted by date. Medians of --repeats
# runs, peak RSS from /usr/bin/time -v. Warm file cache.
#
# usage: tools/bench/extract.sh [--width 300] [--height 300] [--years 4] [--points 10000]
#                               [--buffer 0] [--repeats 3] [--workdir /tmp/kalends-bench-extract]
set -euo pipefail
root=$(cd "$(dirname "${BASH_SOURCE[0]}")/../.." && pwd)
width=300 height=300 years=4 points=10000 buffer=0 repeats=3 workdir=/tmp/kalends-bench-extract
while [ $# -gt 0 ]; do
  case $1 in
    --width|--height|--years|--points|--buffer|--repeats|--workdir)
      [ $# -ge 2 ] || { echo "extract.sh: $1 needs a value" >&2; exit 2; }
      printf -v "${1#--}" '%s' "$2"; shift 2 ;;
    -h|--help) sed -n '2,13p' "${BASH_SOURCE[0]}"; exit 0 ;;
    *) echo "extract.sh: unknown option $1" >&2; exit 2 ;;
  esac
done
py=/usr/bin/python3
kalends=${KALENDS:-$root/build/kalends}
[ -x /usr/bin/time ] || { echo "extract.sh: needs GNU time (/usr/bin/time)" >&2; exit 1; }
[ -x "$kalends" ] || { echo "extract.sh: $kalends not found (tools/build.sh)" >&2; exit 1; }
mkdir -p "$workdir"
workdir=$(cd "$workdir" && pwd)
stack=$workdir/stack-${width}x${height}x${years}y
layers=$workdir/layers-${width}x${height}x${years}y
if [ ! -f "$stack/synth.json" ]; then
  rm -rf "$stack" "$layers"
  "$py" "$root/tools/synth_stack.py" --out "$stack" --width "$width" --height "$height" --years "$years" \
    --start-year 2019 --step 16 --seed 7 --quiet
fi
[ -d "$layers/fill" ] || "$kalends" -q fill "$stack/*.tif" --out "$layers/fill" --every 1M --threads 2
table=$workdir/points-$points.csv sorted=$workdir/points-$points-by-date.csv
"$py" "$root/tools/synth_surveys.py" --grid "$stack/*.tif" --out "$table" --count "$points" --seed 11 \
  --uniform 2019-02-01,2021-12-30 > /dev/null
{ head -n 1 "$table"; tail -n +2 "$table" | sort -t, -k4,4 -s; } > "$sorted"
extra=()
[ "$buffer" != 0 ] && extra=(--buffer "$buffer")
runs=$workdir/runs.tsv
: > "$runs"
source "$root/tools/bench/timed.sh"
for r in $(seq 1 "$repeats"); do
  timed floor "$py" "$root/tools/bench/extract_floor.py" "$layers/fill" "$table"
  timed kalends "$kalends" -q extract "$layers/fill" --points "$table" --out "$workdir/table.csv" "${extra[@]}"
  timed kalends-sorted "$kalends" -q extract "$layers/fill" --points "$sorted" --out "$workdir/table.csv" "${extra[@]}"
  GDAL_CACHEMAX=64 timed floor-cache64 "$py" "$root/tools/bench/extract_floor.py" "$layers/fill" "$table"
  GDAL_CACHEMAX=64 timed kalends-cache64 "$kalends" -q extract "$layers/fill" --points "$table" \
    --out "$workdir/table.csv" "${extra[@]}"
done
"$py" - "$runs" "$points" "$width" "$height" "$years" "$buffer" <<'PY'
import statistics, sys
runs, points, width, height, years, buffer = sys.argv[1:]
by = {}
for line in open(runs):
    name, seconds, rss = line.split("\t")
    by.setdefault(name, []).append((float(seconds), int(rss)))
median = {k: statistics.median(s for s, _ in v) for k, v in by.items()}
print("extract bench: %s points, %sx%s px, %s years, buffer %s m (medians of %d)" %
      (points, width, height, years, buffer, len(by["kalends"])))
for k in ("floor", "kalends", "kalends-sorted", "floor-cache64", "kalends-cache64"):
    print("  %-16s %7.2f s  peak RSS %5.0f MiB" % (k, median[k], max(r for _, r in by[k]) / 1024))
print("  kalends / floor: %.2f (default cache), %.2f (GDAL_CACHEMAX=64)" %
      (median["kalends"] / median["floor"], median["kalends-cache64"] / median["floor-cache64"]))
print("  kalends, points in file order / sorted by date: %.2f" % (median["kalends"] / median["kalends-sorted"]))
PY
