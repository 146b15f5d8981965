#!/usr/bin/env bash
# Benchmark of a cluster run's scaling (not a test: nothing here passes or fails). Makes the
# synthetic bench stack at WIDTH x HEIGHT and at 2 WIDTH x 2 HEIGHT (4 x the area), plans the
# same job as --shards N at both, and times one shard task (shard 1, what one Slurm array task
# runs) and the whole sharded job (every task one after the other, then --finalize). Medians of
# --repeats runs, peak RSS per task from /usr/bin/time -v. Prints a table and writes
# WORKDIR/scale-bench.json. Timings are warm-cache.
#
# usage: tools/bench/scale.sh [--width 1024] [--height 1024] [--dates 46] [--shards 4]
#                             [--threads 2] [--memory 512M] [--repeats 3] [--workdir /tmp/kalends-bench-scale]
# env:   KALENDS=path/to/kalends (default build/kalends), PYTHON (default /usr/bin/python3)
set -euo pipefail

root=$(cd "$(dirname "${BASH_SOURCE[0]}")/../.." && pwd)
py=${PYTHON:-/usr/bin/python3}
kalends=${KALENDS:-$root/build/kalends}
width=1024 height=1024 dates=46 shards=4 threads=2 memory=512M repeats=3 workdir=/tmp/kalends-bench-scale

while [ $# -gt 0 ]; do
  case "$1" in
    --width|--height|--dates|--shards|--threads|--memory|--repeats|--workdir)
      [ $# -ge 2 ] || { echo "scale.sh: $1 needs a value" >&2; exit 2; }
      v=$2; k=${1#--}; printf -v "$k" '%s' "$v"; shift 2 ;;
    -h|--help) sed -n '2,12p' "${BASH_SOURCE[0]}"; exit 0 ;;
    *) echo "scale.sh: unknown argument $1" >&2; exit 2 ;;
  esac
done
for v in width height dates shards threads repeats; do
  [[ ${!v} =~ ^[1-9][0-9]*$ ]] || { echo "scale.sh: --$v must be a positive integer" >&2; exit 2; }
done
[ -x /usr/bin/time ] || { echo "scale.sh: needs GNU time (/usr/bin/time; tools/setup.sh installs it)" >&2; exit 1; }
[ -x "$kalends" ] || { echo "scale.sh: $kalends not found (tools/build.sh)" >&2; exit 1; }

mkdir -p "$workdir/logs"
workdir=$(cd "$workdir" && pwd)
runs=$workdir/runs.tsv
: > "$runs"

# timed NAME CMD...: one run; wall seconds from the clock, peak RSS (KiB) from GNU time.
timed() {
  local name=$1; shift
  local t0 t1 rc=0
  t0=$(date +%s.%N)
  /usr/bin/time -v -o "$workdir/logs/$name.time" "$@" > "$workdir/logs/$name.out" 2> "$workdir/logs/$name.err" || rc=$?
  t1=$(date +%s.%N)
  if [ $rc -ne 0 ]; then
    echo "bench: $name failed (rc $rc):" >&2
    tail -n 5 "$workdir/logs/$name.err" >&2
    exit 1
  fi
  printf '%s\t%s\t%s\n' "$name" "$(awk -v a="$t0" -v b="$t1" 'BEGIN {printf "%.3f", b - a}')" \
    "$(awk -F': ' '/Maximum resident set size/ {print $2}' "$workdir/logs/$name.time")" >> "$runs"
}

for scale in 1 2; do
  w=$((width * scale)) h=$((height * scale))
  dir=$workdir/x$((scale * scale))
  if [ ! -f "$dir/stack/ndvi/synth.json" ]; then
    echo "bench: generating ${w}x${h}x${dates} stack in $dir/stack" >&2
    rm -rf "$dir/stack"
    "$py" "$root/tools/synth_stack.py" --scenario bench --out "$dir/stack/ndvi" --width "$w" --height "$h" \
      --dates "$dates" --quiet
  fi
  cat > "$dir/job.toml" <<TOML
# Benchmark job (synthetic bench stack, invented): fill, seasons, compare.
[job]
name = "scale-bench"
out = "out"
memory = "$memory"
threads = $threads

[inputs.ndvi]
stack = "stack/ndvi/ndvi_*.tif"

[[step]]
id = "fill"
do = "fill"
input = "ndvi"
lambda = "1000"
every = "1M"

[[step]]
id = "seasons"
do = "seasons"
input = "fill"

[[step]]
id = "compare"
do = "compare"
input = "seasons"
TOML
  for r in $(seq 1 "$repeats"); do
    echo "bench: ${w}x${h}, repeat $r/$repeats" >&2
    rm -rf "$dir/out"
    "$kalends" -q plan "$dir/job.toml" --shards "$shards" > /dev/null
    for k in $(seq 1 "$shards"); do
      timed "x$((scale * scale)).shard$k.r$r" "$kalends" -q run "$dir/job.toml" --shard "$k" --threads "$threads"
    done
    timed "x$((scale * scale)).finalize.r$r" "$kalends" -q run "$dir/job.toml" --finalize
  done
  rm -rf "$dir/out"
done

"$py" - "$runs" "$workdir/scale-bench.json" "$width" "$height" "$dates" "$shards" "$threads" "$memory" "$repeats" <<'PY'
import json, os, statistics, sys
runs_path, out_path = sys.argv[1:3]
width, height, dates, shards, threads = map(int, sys.argv[3:8])
memory, repeats = sys.argv[8], int(sys.argv[9])
rows = [l.rstrip("\n").split("\t") for l in open(runs_path)]
def runs(prefix, what):
    return [(float(w), int(rss) / 1024.0) for name, w, rss in rows
            if name.startswith(prefix + ".") and name.split(".")[1] == what]
res = {}
for area in ("x1", "x4"):
    task = runs(area, "shard1")
    per_repeat = {}
    for name, w, rss in rows:
        if name.startswith(area + "."):
            r = name.rsplit(".r", 1)[1]
            per_repeat.setdefault(r, []).append((float(w), int(rss) / 1024.0))
    res[area] = dict(
        pixels=width * height * (1 if area == "x1" else 4),
        shard_task_median_s=statistics.median(w for w, _ in task),
        shard_task_peak_rss_mib=max(m for _, m in task),
        any_task_peak_rss_mib=max(m for k in range(1, shards + 1) for _, m in runs(area, "shard%d" % k)),
        any_task_median_s=statistics.median(w for k in range(1, shards + 1) for w, _ in runs(area, "shard%d" % k)),
        finalize_median_s=statistics.median(w for w, _ in runs(area, "finalize")),
        finalize_peak_rss_mib=max(m for _, m in runs(area, "finalize")),
        whole_job_median_s=statistics.median(sum(w for w, _ in rep) for rep in per_repeat.values()))
ratios = {k: res["x4"][k] / res["x1"][k] for k in
          ("shard_task_median_s", "shard_task_peak_rss_mib", "any_task_median_s", "any_task_peak_rss_mib",
           "finalize_median_s", "finalize_peak_rss_mib", "whole_job_median_s")}
doc = dict(benchmark="kalends cluster scaling", synthetic_stack=True, width=width, height=height, dates=dates,
           shards=shards, threads=threads, memory=memory, repeats=repeats, cache="warm", results=res,
           ratios_x4_over_x1=ratios)
json.dump(doc, open(out_path, "w"), indent=1)
print(f"\nkalends cluster scaling: {width}x{height} and {2*width}x{2*height} px x {dates} dates (synthetic), "
      f"{shards} shards, {threads} threads, --memory {memory}, median of {repeats}")
print(f"{'':<34} {'1x area':>10} {'4x area':>10} {'4x / 1x':>8}")
for key, label in (("shard_task_median_s", "one shard task, s"), ("shard_task_peak_rss_mib", "  its peak RSS, MiB"),
                   ("any_task_median_s", "any shard task (median), s"), ("any_task_peak_rss_mib", "peak RSS of any shard task, MiB"),
                   ("finalize_median_s", "finalize (stitch + compare), s"), ("finalize_peak_rss_mib", "  its peak RSS, MiB"),
                   ("whole_job_median_s", "all tasks in turn + finalize, s")):
    print(f"{label:<34} {res['x1'][key]:>10.1f} {res['x4'][key]:>10.1f} {ratios[key]:>8.2f}")
print(f"-> {out_path}")
PY
