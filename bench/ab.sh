#!/usr/bin/env bash
# Compares two bandwatch binaries on the same machine in the same run:
# runs them alternately (A B A B ...) so that drift in the load of a shared
# machine hits both alike, and keeps every run's JSON.
#
#   bench/ab.sh OLD_BINARY NEW_BINARY ROUNDS [bench options...]
#
# Prints each run's table; compare the ratio columns (each is taken within
# its own run, against that run's own FFT limit).
set -euo pipefail
old=$1 new=$2 rounds=$3
shift 3
out=${AB_OUT:-$(mktemp -d)}
mkdir -p "$out"
for i in $(seq 1 "$rounds"); do
  for side in old new; do
    bin=$old; [ "$side" = new ] && bin=$new
    echo "== round $i: $side ($bin)"
    "$bin" bench "$@" --json "$out/$side-$i.json" 2>/dev/null
  done
done
echo "JSON in $out"
python3 "$(dirname "$0")/ab_summary.py" "$out"
