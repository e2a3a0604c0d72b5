#!/usr/bin/env bash
# Whole-process benchmark of `modalmap map` against the scikit-learn reference pipeline
# (benches/sklearn_reference.py: numpy, scipy and scikit-learn as a practitioner would
# script it) on the same generated field: alternate the two commands (A B A B …), report the median
# of the per-pair ratios, modalmap's whole process (decode to written outputs) against the
# reference's compute part only, and both segmentations' agreement with the true labels.
#
#   pip install numpy scipy pillow scikit-learn
#   benches/map_vs_sklearn.sh [SIZE] [PAIRS]        (defaults: 2048, 3)
#
# Needs /usr/bin/time (GNU time) for modalmap's peak memory.
set -euo pipefail
cd "$(dirname "$0")/.."
SIZE=${1:-2048}
PAIRS=${2:-3}
REF=${REF:-benches/sklearn_reference.py}
WORK=${WORK:-/tmp/modalmap-bench-$SIZE}
mkdir -p "$WORK"
cargo build --release --quiet
BIN=target/release/modalmap
if [ ! -f "$WORK/truth.png" ]; then
  echo "generating a ${SIZE}×${SIZE}×10 field with 6 phases in $WORK/field"
  $BIN synth --scenario benchmark-rock --size "$SIZE" -o "$WORK/field" --truth "$WORK/truth.png" >/dev/null
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

for METHOD in kmeans gmm; do
  ratios=(); ours=(); theirs=(); peaks=()
  for i in $(seq "$PAIRS"); do
    t=$( { /usr/bin/time -f "%e %M" $BIN map "$WORK/field" -o "$WORK/out-$METHOD" --phases 6 --method "$METHOD" --force --quiet; } 2>&1 | tail -1 )
    o=${t% *}; peak=${t#* }
    r=$(python3 "$REF" "$WORK/field" -o "$WORK/ref-$METHOD" --phases 6 --method "$METHOD" | sed -n 's/^compute time: \([0-9.]*\) s.*/\1/p')
    ours+=("$o"); theirs+=("$r"); peaks+=("$peak")
    ratios+=("$(python3 -c "print($r / $o)")")
    echo "$METHOD pair $i: modalmap ${o} s (peak $((peak / 1024)) MB), scikit-learn compute ${r} s, ratio $(python3 -c "print(f'{$r / $o:.1f}')")"
  done
  m=$(printf '%s\n' "${ratios[@]}" | median)
  echo "$METHOD: median ratio $(python3 -c "print(f'{$m:.1f}')")× ; agreement with truth: modalmap $(agreement "$WORK/out-$METHOD/labels.png" "$WORK/truth.png"), scikit-learn $(agreement "$WORK/ref-$METHOD/labels.png" "$WORK/truth.png")"
done

# modalmap's default method, for the record (no scikit-learn counterpart).
t=$( { /usr/bin/time -f "%e %M" $BIN map "$WORK/field" -o "$WORK/out-poisson" --phases 6 --force --quiet; } 2>&1 | tail -1 )
echo "poisson (default): ${t% *} s, peak $(( ${t#* } / 1024 )) MB, agreement $(agreement "$WORK/out-poisson/labels.png" "$WORK/truth.png")"
t=$( { /usr/bin/time -f "%e %M" $BIN map "$WORK/field" -o "$WORK/out-auto" --force --quiet; } 2>&1 | tail -1 )
echo "poisson, --phases auto: ${t% *} s, peak $(( ${t#* } / 1024 )) MB, agreement $(agreement "$WORK/out-auto/labels.png" "$WORK/truth.png")"
