#!/usr/bin/env bash
# Whole-process scaling of `modalmap map` (three methods) and `apply` with the number of
# pixels: square benchmark rocks of 0.25, 1, 4 and 16 Mpixel × 10 element maps, K = 6.
# Prints one markdown row per run (wall time = median of RUNS, peak RSS of the slowest),
# then the least-squares line time = a + b · Mpixel for each command with its R² and the
# time per Mpixel at the smallest and largest size.
#
#   benches/scaling.sh [RUNS]          (default 3; needs GNU time at /usr/bin/time)
#
# Fields are generated once into $WORK (default /tmp/modalmap-scaling) by
# `modalmap synth --scenario benchmark-rock`; the model for `apply` is fitted on three
# 192 × 192 rocks of other seeds, as a lab would fit once and apply to every field.
set -euo pipefail
cd "$(dirname "$0")/.."
RUNS=${1:-3}
WORK=${WORK:-/tmp/modalmap-scaling}
SIZES=${SIZES:-512 1024 2048 4096}
mkdir -p "$WORK"
cargo build --release --quiet
BIN=$PWD/target/release/modalmap

for s in $SIZES; do
  [ -d "$WORK/rock-$s" ] || $BIN synth --scenario benchmark-rock --size "$s" --seed 3 -o "$WORK/rock-$s" >/dev/null
done
if [ ! -f "$WORK/model.json" ]; then
  for seed in 11 12 13; do
    [ -d "$WORK/train-$seed" ] || $BIN synth --scenario benchmark-rock --size 192 --seed $seed -o "$WORK/train-$seed" >/dev/null
  done
  $BIN fit "$WORK"/train-1? -o "$WORK/model.json" --phases 6 --quiet
fi

# run LABEL CMD... : median wall time of RUNS runs and the largest peak RSS, one line.
run() {
  local label=$1; shift
  local times=() peak=0
  for _ in $(seq "$RUNS"); do
    local t
    t=$( { /usr/bin/time -f "%e %M" "$@" >/dev/null; } 2>&1 | tail -1 )
    times+=("${t% *}")
    [ "${t#* }" -gt "$peak" ] && peak=${t#* }
  done
  local med
  med=$(printf '%s\n' "${times[@]}" | sort -g | awk '{a[NR]=$1} END {print a[int((NR+1)/2)]}')
  echo "$label $med $peak"
}

RESULTS="$WORK/results.txt"
: > "$RESULTS"
for s in $SIZES; do
  for m in kmeans gmm poisson; do
    run "map-$m $s" $BIN map "$WORK/rock-$s" -o "$WORK/out-$m-$s" --phases 6 --method "$m" --force --quiet | tee -a "$RESULTS"
  done
  run "apply $s" $BIN apply "$WORK/model.json" "$WORK/rock-$s" -o "$WORK/apply-$s" --force --quiet | tee -a "$RESULTS"
done

python3 - "$RESULTS" <<'PY'
import sys
rows = [l.split() for l in open(sys.argv[1]) if l.strip()]
print("\n| command | field | Mpixel | wall time (s) | Mpixel/s | peak RSS (MB) |")
print("|---|---|---|---|---|---|")
by = {}
for cmd, size, t, kb in rows:
    mp = int(size) ** 2 / 2**20
    by.setdefault(cmd, []).append((mp, float(t)))
    print(f"| {cmd} | {size}² | {mp:.2f} | {float(t):.2f} | {mp / float(t):.2f} | {int(kb) / 1024:.0f} |")
print("\n| command | fixed cost a (s) | slope b (s per Mpixel) | R² | s per Mpixel, smallest → largest |")
print("|---|---|---|---|---|")
for cmd, pts in by.items():
    n = len(pts)
    mx = sum(p for p, _ in pts) / n
    my = sum(t for _, t in pts) / n
    sxx = sum((p - mx) ** 2 for p, _ in pts)
    b = sum((p - mx) * (t - my) for p, t in pts) / sxx if sxx > 0 else float("nan")
    a = my - b * mx
    ss = sum((t - my) ** 2 for _, t in pts)
    r2 = 1 - sum((t - a - b * p) ** 2 for p, t in pts) / ss if ss > 0 else float("nan")
    lo, hi = min(pts), max(pts)
    print(f"| {cmd} | {a:.2f} | {b:.3f} | {r2:.4f} | {lo[1] / lo[0]:.3f} → {hi[1] / hi[0]:.3f} |")
PY
