#!/usr/bin/env bash
# The Grafana dashboard (deploy/grafana/bandwatch.json) against what can be
# tested without a Grafana server:
#
# 1. its structural rules (tests/external/dashboard_check.py structure:
#    unique panel ids, grid positions inside 24 columns and not
#    overlapping, the datasource variable on every panel and target, every
#    variable used is defined and every defined one used), and controls
#    showing that check fails on a dashboard that breaks each rule
#    (dashboard_check.py selftest);
# 2. every PromQL expression of the dashboard, with the template variables
#    set to the demo's values (channel pump-de, band bpfo, machine p2, the
#    demo's instance; $__rate_interval 1m, $__interval 15s), run against a
#    real Prometheus (Debian package `prometheus`) scraping `bandwatch run
#    --config config/demo.toml` every second: each must parse and return at
#    least one series, except the queries on metrics bandwatch does not
#    expose yet (PENDING_METRICS in dashboard_check.py, each printed as
#    SKIP). The template variables' label_values() queries must find values.
# 3. the bandwatch_* names in deploy/prometheus-rules.yml's expressions all
#    appear in the demo's live exposition (dashboard_check.py rule-metrics).
#
# Needs python3 (standard library), curl, prometheus and a Rust toolchain
# (or BANDWATCH_BIN pointing at a built binary). Everything binds 127.0.0.1
# only; every step is time-bounded; whatever this script started is stopped
# on exit. Exit 0 on success, 1 on any failure.
# Usage: bash tests/external/dashboard.sh
set -euo pipefail

root="$(cd "$(dirname "${BASH_SOURCE[0]}")/../.." && pwd)"
cd "$root"
dashboard="deploy/grafana/bandwatch.json"
checker="tests/external/dashboard_check.py"

work="$(mktemp -d "${TMPDIR:-/tmp}/bandwatch-dash.XXXXXX")"
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
    printf 'dashboard: FAIL: %s\n' "$*" >&2
    for log in "$work/bandwatch.log" "$work/prometheus.log"; do
        if [ -s "$log" ]; then
            printf -- '--- last lines of %s:\n' "$(basename "$log")" >&2
            tail -n 20 "$log" >&2
        fi
    done
    exit 1
}

for tool in python3 curl prometheus timeout; do
    command -v "$tool" >/dev/null 2>&1 \
        || fail "$tool not found (Debian: apt-get install -y python3 prometheus curl)"
done

# ---------------------------------------------------------------------------
step "structure of $dashboard"
timeout 60 python3 "$checker" structure "$dashboard" || fail "the dashboard breaks a structural rule"
step "controls: the structure check catches each broken rule"
timeout 60 python3 "$checker" selftest "$dashboard" || fail "the structure check missed a broken rule"


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

step "the alert rules read metrics the demo exposes"
curl -sf --max-time 5 -o "$work/metrics.prom" "$bw/metrics" || fail "GET /metrics failed"
timeout 60 python3 "$checker" rule-metrics deploy/prometheus-rules.yml "$work/metrics.prom" \
    || fail "deploy/prometheus-rules.yml reads a metric bandwatch does not expose"

cat >"$work/prometheus.yml" <<PROM
global:
  scrape_interval: 1s
  scrape_timeout: 1s
  evaluation_interval: 1s
scrape_configs:
  - job_name: bandwatch
    static_configs:
      - targets: ["$bw_addr"]
PROM
start_prometheus "$work/prometheus.yml" "$work/data" "$work/prometheus.log"

# Rates over $__rate_interval (1m) need two samples; wait for five scrapes.
step "wait for five scrapes of the demo (up to 30 s)"
scrapes=""
for _ in $(seq 1 60); do
    body="$(curl -sf --max-time 5 -G --data-urlencode 'query=count_over_time(up{job="bandwatch"}[1m]) >= 5' \
        "$prom/api/v1/query" || true)"
    case "$body" in *'"value":'*) scrapes=1; break ;; esac
    sleep 0.5
done
[ -n "$scrapes" ] || fail "Prometheus has not scraped the demo five times in 30 s (last reply: ${body:-none})"

step "every PromQL expression of the dashboard against $prom"
timeout 120 python3 "$checker" queries "$dashboard" --prom "$prom" --wait 25 \
    --var job=bandwatch --var "instance=$bw_addr" \
    --var channel=pump-de --var band=bpfo --var machine=p2 \
    || fail "a dashboard query failed (see above)"

echo "dashboard: OK"
