#!/usr/bin/env bash
# The real consumers of /metrics against the real daemon:
#
# 1. `promtool check metrics` on tests/golden/metrics.prom (the exposition
#    the unit tests pin) and on a live scrape of `bandwatch run` playing
#    config/demo.toml; both must be lint-clean (exit 0).
# 2. A real Prometheus server on a free loopback port scraping the daemon
#    every second, until its query API returns a sane value for the demo's
#    motor-de overall velocity (0.0005 to 0.02 m/s).
# 3. SIGTERM to the daemon: it must exit 0 within 10 s.
#
# Needs curl, promtool and prometheus (Debian package `prometheus`) and a
# Rust toolchain (or BANDWATCH_BIN pointing at a built binary). Everything
# binds 127.0.0.1 only; every step is time-bounded; whatever this script
# started is stopped on exit. Exit 0 on success, 1 on any failure.
# Usage: bash tests/external/prometheus_scrape.sh
set -euo pipefail

root="$(cd "$(dirname "${BASH_SOURCE[0]}")/../.." && pwd)"
cd "$root"

work="$(mktemp -d "${TMPDIR:-/tmp}/bandwatch-prom.XXXXXX")"
bw_pid=""
prom_pid=""

# stop_pid PID: TERM, wait up to 10 s, then KILL.
. "$root/tests/external/lib/common.bash"

cleanup() {
    stop_pid "$prom_pid"
    stop_pid "$bw_pid"
    rm -rf "$work"
}
trap cleanup EXIT

step() { printf '== %s\n' "$*"; }
fail() {
    printf 'prometheus_scrape: FAIL: %s\n' "$*" >&2
    for log in "$work/bandwatch.log" "$work/prometheus.log"; do
        if [ -s "$log" ]; then
            printf -- '--- last lines of %s:\n' "$(basename "$log")" >&2
            tail -n 20 "$log" >&2
        fi
    done
    exit 1
}

for tool in curl promtool prometheus timeout; do
    command -v "$tool" >/dev/null 2>&1 \
        || fail "$tool not found (Debian: apt-get install -y prometheus curl)"
done


# ---------------------------------------------------------------------------
step "promtool check metrics tests/golden/metrics.prom"
out="$(timeout 30 promtool check metrics <tests/golden/metrics.prom 2>&1)" \
    || fail "promtool rejects the golden exposition: $out"
echo "   clean${out:+: $out}"

# ---------------------------------------------------------------------------
find_bandwatch_bin

step "start bandwatch run --config config/demo.toml --listen 127.0.0.1:0"
# Port 0: the kernel picks a free port, the log line names it (no race).
NO_COLOR=1 RUST_LOG=info "$bin" run --config config/demo.toml --listen 127.0.0.1:0 \
    >"$work/bandwatch.log" 2>&1 &
bw_pid=$!
bw=""
for _ in $(seq 1 100); do
    kill -0 "$bw_pid" 2>/dev/null || fail "bandwatch exited at start"
    bw="$(grep -o 'http://127\.0\.0\.1:[0-9]*' "$work/bandwatch.log" | head -n 1 || true)"
    [ -n "$bw" ] && break
    sleep 0.1
done
[ -n "$bw" ] || fail "bandwatch did not log its listen address within 10 s"
bw_addr="${bw#http://}"
echo "   listening on $bw"

step "wait for $bw/readyz (up to 30 s)"
ready=""
for _ in $(seq 1 300); do
    if [ "$(curl -s -o /dev/null -w '%{http_code}' --max-time 2 "$bw/readyz" || true)" = 200 ]; then
        ready=1
        break
    fi
    sleep 0.1
done
[ -n "$ready" ] || fail "bandwatch not ready within 30 s: $(curl -s --max-time 2 "$bw/readyz" || true)"

step "promtool check metrics on a live scrape"
ctype="$(curl -sf --max-time 5 -o "$work/metrics.prom" -w '%{content_type}' "$bw/metrics")" \
    || fail "GET /metrics failed"
[ "$ctype" = "text/plain; version=0.0.4" ] || fail "/metrics Content-Type is '$ctype'"
series="$(grep -vc '^#' "$work/metrics.prom" || true)"
out="$(timeout 30 promtool check metrics <"$work/metrics.prom" 2>&1)" \
    || fail "promtool rejects the live exposition: $out"
echo "   clean (${series} series)${out:+: $out}"

# ---------------------------------------------------------------------------
query='bandwatch_band_rms_meters_per_second{channel="motor-de",band="overall-velocity"}'
cat >"$work/prometheus.yml" <<EOF
global:
  scrape_interval: 1s
  scrape_timeout: 1s
  evaluation_interval: 1s
scrape_configs:
  - job_name: bandwatch
    static_configs:
      - targets: ["$bw_addr"]
EOF
start_prometheus "$work/prometheus.yml" "$work/data" "$work/prometheus.log"

step "query $query (up to 60 s)"
value=""
up=""
for _ in $(seq 1 120); do
    body="$(curl -sf --max-time 5 -G --data-urlencode "query=$query" "$prom/api/v1/query" || true)"
    value="$(printf '%s' "$body" | sed -n 's/.*"value":\[[0-9.eE+-]*,"\([^"]*\)"\].*/\1/p')"
    if [ -n "$value" ]; then
        upbody="$(curl -sf --max-time 5 -G --data-urlencode 'query=up{job="bandwatch"}' "$prom/api/v1/query" || true)"
        up="$(printf '%s' "$upbody" | sed -n 's/.*"value":\[[0-9.eE+-]*,"\([^"]*\)"\].*/\1/p')"
        break
    fi
    sleep 0.5
done
[ -n "$value" ] || fail "Prometheus has no sample of $query after 60 s (last reply: ${body:-none})"
echo "   $query = $value m/s (up = ${up:-?})"
[ "$up" = 1 ] || fail "up{job=\"bandwatch\"} is '${up:-missing}', expected 1"
awk -v v="$value" 'BEGIN { exit !(v + 0 >= 0.0005 && v + 0 <= 0.02) }' \
    || fail "motor-de overall velocity $value m/s is outside the demo's sane range 0.0005 to 0.02 m/s"

# ---------------------------------------------------------------------------
step "SIGTERM bandwatch: clean exit within 10 s"
expect_clean_exit "$bw_pid"
bw_pid=""
echo "   exited 0"

echo "prometheus_scrape: OK"
