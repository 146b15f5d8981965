# Sourced by the bench scripts: `timed NAME COMMAND...` runs COMMAND under GNU time, keeps its
# output in $workdir/NAME.out and appends "NAME<TAB>wall seconds<TAB>peak RSS KiB" to $runs, NAME
# without a ".rN" repeat suffix. Needs $workdir and $runs.
timed() {
  local name=$1; shift
  local t0 t1
  t0=$(date +%s.%N)
  /usr/bin/time -v -o "$workdir/$name.time" "$@" > "$workdir/$name.out" 2>&1
  t1=$(date +%s.%N)
  printf '%s\t%s\t%s\n' "${name%.r*}" "$(awk -v a="$t0" -v b="$t1" 'BEGIN {printf "%.3f", b - a}')" \
    "$(awk -F': ' '/Maximum resident set size/ {print $2}' "$workdir/$name.time")" >> "$runs"
}
