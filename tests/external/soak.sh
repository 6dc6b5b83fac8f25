#!/usr/bin/env bash
# The soak (DEVELOPERS.md, "Soak test"): builds the release binary once and
# runs `bandwatch soak --seconds 90 --reload-every-s 20`, which starts that binary's daemon as a
# child on free 127.0.0.1 ports, drives it with UDP and TCP faults and HTTP
# load, and asserts exact accounting, monotonic counters, flat RSS,
# /healthz p99 under 50 ms, every capture present or pruned, no panic and a
# clean SIGTERM exit. The soak stops its own daemon and threads; the whole
# run is bounded by `timeout`.
#
# SOAK_ARGS overrides the arguments (e.g. SOAK_ARGS="--minutes 30" for a
# long run). Exit 0 when every check passes, non-zero otherwise, with the
# failing figures in the table printed.
# Usage: bash tests/external/soak.sh
set -euo pipefail

root="$(cd "$(dirname "${BASH_SOURCE[0]}")/../.." && pwd)"
cd "$root"

timeout 1800 cargo build --release --locked
# shellcheck disable=SC2086 # word splitting of SOAK_ARGS is wanted
args=(${SOAK_ARGS:---seconds 90 --reload-every-s 20})
# The soak's own length plus five minutes for start, settling and stop.
limit=$((300 + 90))
for ((i = 0; i < ${#args[@]}; i++)); do
    case "${args[$i]}" in
    --seconds) limit=$((300 + args[i + 1])) ;;
    --minutes) limit=$((300 + 60 * args[i + 1])) ;;
    esac
done
timeout "$limit" target/release/bandwatch soak "${args[@]}"
