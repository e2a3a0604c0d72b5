#!/usr/bin/env bash
# Whole-process benchmark of `modalmap map` against the scikit-learn reference pipeline
# (benches/sklearn_reference.py: numpy, scipy and scikit-learn as a practitioner would
# script it) on the same generated field (SIZE² pixels × 10 maps, 6 phases, a BSE image
# 1.5 × larger): rounds of the reference's k-means and Gaussian mixture at K = 6 and
# modalmap's default path and fixed-K paths, then the median ratio of each path with its
# target (default path ≥ 1× the reference's k-means, fixed-K k-means ≥ 3×, Gaussian
# mixture ≥ 30×), modalmap's whole process (decode to written outputs) against the
# reference's compute part only, and every segmentation's agreement with the true labels.
#
#   pip install numpy scipy pillow scikit-learn
#   benches/map_vs_sklearn.sh [SIZE] [ROUNDS]        (defaults: 2048, 3)
#
# Needs /usr/bin/time (GNU time) for modalmap's peak memory.
set -euo pipefail
cd "$(dirname "$0")/.."
SIZE=${1:-2048}
ROUNDS=${2:-3}
REF=${REF:-benches/sklearn_reference.py}
WORK=${WORK:-/tmp/modalmap-bench-$SIZE}
mkdir -p "$WORK"
cargo build --release --quiet
BIN=target/release/modalmap
if [ ! -f "$WORK/truth.png" ]; then
  echo "generating a ${SIZE}×${SIZE}×10 field with 6 phases in $WORK/field"
  $BIN synth --scenario benchmark-rock --size "$SIZE" --bse-scale 1.5 -o "$WORK/field" --truth "$WORK/truth.png" >/dev/null
fi

agreement() { # labels.png truth.png -> fraction of pixels agreeing after one-to-one matching
  python3 - "$1" "$2" <<'PY'
import sys
import numpy as np
from PIL import Image
p = np.array(Image.open(sys.argv[1])).astype(np.int64).ravel()
t = np.array(Image.open(sys.argv[2])).astype(np.int64).ravel()
kp, kt = p.max() + 1, t.max() + 1
conf = np.zeros((kp, kt), dtype=np.int64)
np.add.at(conf, (p, t), 1)
pairs = sorted(((conf[i, j], i, j) for i in range(1, kp) for j in range(1, kt)), reverse=True)
up, ut, correct = set(), set(), conf[0, 0]
for n, i, j in pairs:
    if i not in up and j not in ut:
        up.add(i); ut.add(j); correct += n
print(f"{correct / p.size:.4f}")
PY
}

median() { sort -g | awk '{a[NR]=$1} END {print (NR % 2) ? a[(NR+1)/2] : (a[NR/2] + a[NR/2+1]) / 2}'; }

# One round: the reference's two methods, then modalmap's default path (automatic phase
# count, Poisson mixture, with the field's BSE image) and its two fixed-K paths (without
# the BSE check, which the reference does not do). Ratios are reference compute time over
# modalmap's whole process: above 1, modalmap is faster.
run_ours() { # name, extra options... -> "seconds peak_kB"
  local name=$1; shift
  { /usr/bin/time -f "%e %M" $BIN map "$WORK/field" -o "$WORK/out-$name" --force --quiet "$@"; } 2>&1 | tail -1
}
run_ref() { # method -> compute seconds
  python3 "$REF" "$WORK/field" -o "$WORK/ref-$1" --phases 6 --method "$1" | sed -n 's/^compute time: \([0-9.]*\) s.*/\1/p'
}
declare -A RATIOS PEAKS WALL
for i in $(seq "$ROUNDS"); do
  rk=$(run_ref kmeans); rg=$(run_ref gmm)
  for spec in "default:kmeans:" "kmeans:kmeans:--phases 6 --method kmeans --no-bse" "gmm:gmm:--phases 6 --method gmm --no-bse"; do
    IFS=: read -r name against opts <<<"$spec"
    # shellcheck disable=SC2086
    t=$(run_ours "$name" $opts)
    o=${t% *}; peak=${t#* }
    r=$([ "$against" = kmeans ] && echo "$rk" || echo "$rg")
    RATIOS[$name]+="$(python3 -c "print($r / $o)") "
    WALL[$name]+="$o "
    PEAKS[$name]=$peak
    echo "round $i, $name: modalmap ${o} s (peak $((peak / 1024)) MB), scikit-learn $against compute ${r} s, ratio $(python3 -c "print(f'{$r / $o:.2f}')")"
  done
done

echo
echo "path | modalmap median | ratio (median) | target | agreement with truth"
for spec in "default:1" "kmeans:3" "gmm:30"; do
  IFS=: read -r name target <<<"$spec"
  m=$(printf '%s\n' ${RATIOS[$name]} | median)
  s=$(printf '%s\n' ${WALL[$name]} | median)
  verdict=$(python3 -c "print('met' if $m >= $target else 'not met')")
  echo "$name | ${s} s, peak $(( PEAKS[$name] / 1024 )) MB | $(python3 -c "print(f'{$m:.2f}')")× | ≥ ${target}× ($verdict) | $(agreement "$WORK/out-$name/labels.png" "$WORK/truth.png")"
done
echo "scikit-learn agreement with truth: k-means $(agreement "$WORK/ref-kmeans/labels.png" "$WORK/truth.png"), Gaussian mixture $(agreement "$WORK/ref-gmm/labels.png" "$WORK/truth.png")"
