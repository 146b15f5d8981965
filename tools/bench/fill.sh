#!/usr/bin/env bash
# Benchmark of `kalends fill` on a synthetic stack (not a test: nothing here passes or fails).
# In one run it measures the GDAL I/O floor, kalends with a fixed and an automatic lambda
# at 1 and N threads, and a per-pixel scipy reference; medians of --repeats runs, peak RSS
# from /usr/bin/time -v. Prints a table and writes WORKDIR/fill-bench.json.
# Timings are warm-cache: the stack was just written or read by the previous run.
#
# usage: tools/bench/fill.sh [--width 2048] [--height 2048] [--dates 92] [--threads 2]
#                            [--repeats 3] [--workdir /tmp/kalends-bench]
# env:   KALENDS=path/to/kalends (default build/kalends), PYTHON (default /usr/bin/python3)
set -euo pipefail

root=$(cd "$(dirname "${BASH_SOURCE[0]}")/../.." && pwd)
py=${PYTHON:-/usr/bin/python3}
kalends=${KALENDS:-$root/build/kalends}
width=2048 height=2048 dates=92 threads=2 repeats=3 workdir=/tmp/kalends-bench

while [ $# -gt 0 ]; do
  case "$1" in
    --width|--height|--dates|--threads|--repeats|--workdir)
      [ $# -ge 2 ] || { echo "fill.sh: $1 needs a value" >&2; exit 2; }
      v=$2; k=${1#--}; printf -v "$k" '%s' "$v"; shift 2 ;;
    -h|--help) sed -n '2,10p' "${BASH_SOURCE[0]}"; exit 0 ;;
    *) echo "fill.sh: unknown argument $1" >&2; exit 2 ;;
  esac
done
for v in width height dates threads repeats; do
  [[ ${!v} =~ ^[1-9][0-9]*$ ]] || { echo "fill.sh: --$v must be a positive integer" >&2; exit 2; }
done
[ -x /usr/bin/time ] || { echo "fill.sh: needs GNU time (/usr/bin/time; tools/setup.sh installs it)" >&2; exit 1; }

mkdir -p "$workdir"
workdir=$(cd "$workdir" && pwd)
stack=$workdir/stack-${width}x${height}x${dates}/ndvi
runs=$workdir/runs.tsv
log=$workdir/logs
mkdir -p "$log"
: > "$runs"

# The stack is made once and reused: synth.json is written last, so it marks a complete one.
if [ ! -f "$stack/synth.json" ]; then
  echo "bench: generating ${width}x${height}x${dates} stack in $stack" >&2
  rm -rf "$stack"
  "$py" "$root/tools/synth_stack.py" --scenario bench --out "$stack" \
    --width "$width" --height "$height" --dates "$dates" --quiet
fi
inputs=$(find "$stack" -maxdepth 1 -name "ndvi_*.tif" | wc -l)
[ "$inputs" -eq "$dates" ] || { echo "bench: expected $dates inputs, found $inputs" >&2; exit 1; }

# timed NAME OUTDIR CMD...: one run; wall seconds from the clock, peak RSS from GNU time.
# GNU time reports the largest single process of the tree (xargs children are not summed).
timed() {
  local name=$1 out=$2; shift 2
  rm -rf "$out"                 # kalends creates its --out folder; floor.sh makes its own
  local t0 t1 rc=0
  t0=$(date +%s.%N)
  /usr/bin/time -v -o "$log/$name.time" "$@" > "$log/$name.out" 2> "$log/$name.err" || rc=$?
  t1=$(date +%s.%N)
  if [ $rc -ne 0 ]; then
    echo "bench: $name failed (rc $rc); last lines of its stderr:" >&2
    tail -n 5 "$log/$name.err" >&2
    printf '%s\tNA\tNA\tNA\n' "$name" >> "$runs"
    return 0
  fi
  local rss kernel
  rss=$(awk -F': ' '/Maximum resident set size/ {print $2}' "$log/$name.time")
  # kalends --verbose prints "kernel: N pixel-dates/s"; absent -> NA.
  kernel=$(sed -n 's/.*kernel: *\([0-9.eE+-]*\) *pixel-dates\/s.*/\1/p' "$log/$name.err" | tail -n 1)
  printf '%s\t%s\t%s\t%s\n' "$name" "$(awk -v a="$t0" -v b="$t1" 'BEGIN {printf "%.3f", b - a}')" "${rss:-NA}" "${kernel:-NA}" >> "$runs"
}

# The I/O floor as a script of its own, so GNU time measures it like any other command.
# Same output layout as kalends writes: 3 float32 bands, tiled, DEFLATE, PREDICTOR=3, band-interleaved.
cat > "$workdir/floor.sh" <<'EOF'
#!/usr/bin/env bash
set -euo pipefail
stack=$1 threads=$2 out=$3
mkdir -p "$out"
printf '%s\n' "$stack"/ndvi_*.tif | xargs -P "$threads" -I{} sh -c \
  'gdal_translate -q -ot Float32 -b 1 -b 1 -b 1 -co TILED=YES -co COMPRESS=DEFLATE -co PREDICTOR=3 -co INTERLEAVE=BAND "$1" "$2/$(basename "$1")"' \
  _ {} "$out"
EOF
chmod +x "$workdir/floor.sh"

thread_list=(1)
[ "$threads" -gt 1 ] && thread_list+=("$threads")

for r in $(seq 1 "$repeats"); do
  echo "bench: repeat $r/$repeats" >&2
  timed "floor.r$r" "$workdir/out-floor" "$workdir/floor.sh" "$stack" "$threads" "$workdir/out-floor"
  if [ -x "$kalends" ]; then
    for lam in 1000 auto; do
      for t in "${thread_list[@]}"; do
        timed "kalends.lam-$lam.t$t.r$r" "$workdir/out-kalends" \
          "$kalends" fill "$stack/ndvi_*.tif" --out "$workdir/out-kalends" --method whittaker \
          --lambda "$lam" --threads "$t" --memory 1G --verbose
      done
    done
  fi
done
[ -x "$kalends" ] || echo "bench: $kalends not found; kalends rows are n/a" >&2
rm -rf "$workdir/out-floor" "$workdir/out-kalends"   # several GB at full size

echo "bench: scipy reference" >&2
"$py" "$root/tools/bench/scipy_whittaker.py" "$stack/ndvi_*.tif" --pixels 2000 --lambda 1000 \
  > "$workdir/scipy.json"
"$py" "$root/tools/bench/scipy_whittaker.py" "$stack/ndvi_*.tif" --pixels 500 --lambda 1000 --with-sd \
  > "$workdir/scipy_sd.json"

"$py" - "$runs" "$workdir/scipy.json" "$workdir/fill-bench.json" \
  "$width" "$height" "$dates" "$threads" "$repeats" "$kalends" "$workdir/scipy_sd.json" <<'PY'
import json, os, platform, statistics, subprocess, sys
runs_path, scipy_path, out_path = sys.argv[1:4]
width, height, dates, threads, repeats = map(int, sys.argv[4:9])
kalends = sys.argv[9]
scipy_sd = json.load(open(sys.argv[10]))
pd = width * height * dates

rows = {}
for line in open(runs_path):
    name, wall, rss, kernel = line.rstrip("\n").split("\t")
    key = name.rsplit(".r", 1)[0]
    rows.setdefault(key, []).append((wall, rss, kernel))

def summary(key):
    runs = rows.get(key, [])
    ok = [r for r in runs if r[0] != "NA"]
    if not ok:
        return None
    wall = statistics.median(float(r[0]) for r in ok)
    rss = max(int(r[1]) for r in ok) / 1024.0
    ks = [float(r[2]) for r in ok if r[2] != "NA"]
    return dict(runs=len(ok), failed=len(runs) - len(ok), median_s=wall,
                pixel_dates_per_s=pd / wall, peak_rss_mib=rss,
                kernel_pixel_dates_per_s=statistics.median(ks) if ks else None)

scipy = json.load(open(scipy_path))
res = {"floor": summary("floor")}
tl = [1] + ([threads] if threads > 1 else [])
for lam in ("1000", "auto"):
    for t in tl:
        res[f"kalends.lam-{lam}.t{t}"] = summary(f"kalends.lam-{lam}.t{t}")

def ratio(a, b):
    return None if a is None or b is None or b == 0 else a / b

def get(key, field):
    r = res.get(key)
    return None if r is None else r.get(field)

T = threads
kfix1, kfixT = f"kalends.lam-1000.t1", f"kalends.lam-1000.t{T}"
kauto1, kautoT = f"kalends.lam-auto.t1", f"kalends.lam-auto.t{T}"
rss_k = [get(k, "peak_rss_mib") for k in (kfix1, kfixT, kauto1, kautoT) if get(k, "peak_rss_mib")]
ratios = {
    f"kalends_fixed_T{T}_over_floor_time": ratio(get(kfixT, "median_s"), get("floor", "median_s")),
    "kalends_fixed_1t_over_scipy_throughput": ratio(get(kfix1, "pixel_dates_per_s"), scipy["pixel_dates_per_s"]),
    "kalends_kernel_1t_over_scipy_throughput": ratio(get(kfix1, "kernel_pixel_dates_per_s"), scipy["pixel_dates_per_s"]),
    "kalends_fixed_1t_over_scipy_z_and_sd_throughput": ratio(get(kfix1, "pixel_dates_per_s"), scipy_sd["pixel_dates_per_s"]),
    "kalends_kernel_1t_over_scipy_z_and_sd_throughput": ratio(get(kfix1, "kernel_pixel_dates_per_s"), scipy_sd["pixel_dates_per_s"]),
    f"speedup_fixed_T{T}_vs_1t": ratio(get(kfix1, "median_s"), get(kfixT, "median_s")) if T > 1 else None,
    f"speedup_auto_T{T}_vs_1t": ratio(get(kauto1, "median_s"), get(kautoT, "median_s")) if T > 1 else None,
    "peak_rss_over_1GiB_budget": max(rss_k) / 1024.0 if rss_k else None,
}
budget_ok = None if ratios["peak_rss_over_1GiB_budget"] is None else ratios["peak_rss_over_1GiB_budget"] <= 1.15

def version(cmd):
    try:
        return subprocess.run(cmd, capture_output=True, text=True, timeout=30).stdout.strip() or None
    except Exception:
        return None

cpu = next((l.split(":", 1)[1].strip() for l in open("/proc/cpuinfo") if l.startswith("model name")), None)
doc = dict(benchmark="kalends fill", synthetic_stack=True, width=width, height=height, dates=dates,
           pixel_dates=pd, threads=threads, repeats=repeats, cache="warm (no cache drop)",
           machine=dict(cpu=cpu, cores=os.cpu_count(), kernel=platform.release()),
           gdal=version(["gdal-config", "--version"]),
           kalends=version([kalends, "--version"]) if os.access(kalends, os.X_OK) else None,
           commit=version(["git", "-C", os.path.dirname(os.path.abspath(out_path)), "rev-parse", "--short", "HEAD"]),
           results=res, scipy_reference=scipy, scipy_reference_z_and_sd=scipy_sd, ratios=ratios, rss_within_budget_plus_15pct=budget_ok)
with open(out_path, "w") as f:
    json.dump(doc, f, indent=1)

def fmt(v, spec):
    return "n/a" if v is None else format(v, spec)

labels = {"floor": f"I/O floor: gdal_translate x{dates}, -P {T}"}
for lam in ("1000", "auto"):
    for t in tl:
        labels[f"kalends.lam-{lam}.t{t}"] = f"kalends fill lambda={lam}, {t} thread{'s' if t > 1 else ''}"
print(f"\nkalends fill benchmark: {width}x{height}x{dates} = {pd:,} pixel-dates (synthetic), "
      f"median of {repeats}, warm cache")
print(f"{'case':<40} {'median s':>9} {'pixel-dates/s':>14} {'peak RSS MiB':>13} {'kernel pd/s':>12}")
for key, label in labels.items():
    r = res.get(key)
    if r is None:
        print(f"{label:<40} {'n/a':>9} {'n/a':>14} {'n/a':>13} {'n/a':>12}")
        continue
    print(f"{label:<40} {r['median_s']:>9.3f} {r['pixel_dates_per_s']:>14.3e} {r['peak_rss_mib']:>13.1f} "
          f"{fmt(r['kernel_pixel_dates_per_s'], '.3e'):>12}")
print(f"{'scipy solveh_banded, solves only, 1 core':<40} {'-':>9} {scipy['pixel_dates_per_s']:>14.3e} "
      f"{'-':>13} {'-':>12}   ({scipy['pixels']} px x {scipy['dates']} dates)")
print(f"{'scipy solveh_banded, z and sd, 1 core':<40} {'-':>9} {scipy_sd['pixel_dates_per_s']:>14.3e} "
      f"{'-':>13} {'-':>12}   ({scipy_sd['pixels']} px x {scipy_sd['dates']} dates)")
b = ratios["peak_rss_over_1GiB_budget"]
lines = [
    (f"kalends lambda=1000, {T} threads / I/O floor (time)", fmt(ratios[f"kalends_fixed_T{T}_over_floor_time"], ".2f")),
    ("kalends 1 thread / scipy per core (end to end)", fmt(ratios["kalends_fixed_1t_over_scipy_throughput"], ".2f")),
    ("kalends kernel 1 thread / scipy per core", fmt(ratios["kalends_kernel_1t_over_scipy_throughput"], ".2f")),
    ("kalends 1 thread / scipy z+sd per core (end to end)", fmt(ratios["kalends_fixed_1t_over_scipy_z_and_sd_throughput"], ".2f")),
    ("kalends kernel 1 thread / scipy z+sd per core", fmt(ratios["kalends_kernel_1t_over_scipy_z_and_sd_throughput"], ".2f")),
]
if T > 1:
    lines.append((f"speed-up {T} threads vs 1, lambda=1000 / auto",
                  f"{fmt(ratios[f'speedup_fixed_T{T}_vs_1t'], '.2f')} / {fmt(ratios[f'speedup_auto_T{T}_vs_1t'], '.2f')}"))
lines.append(("peak RSS / 1 GiB budget (target <= 1.15)",
              fmt(b, ".2f") + ("" if b is None else ("  within" if budget_ok else "  OVER"))))
print()
for label, value in lines:
    print(f"{label:<52}: {value}")
print(f"\nJSON: {out_path}")
PY
