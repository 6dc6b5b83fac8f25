#!/usr/bin/env bash
# Many PCs, one store (docs/scale-out.md), for real on one machine:
#
# 1. two `bandwatch run --config config/demo.toml --listen 127.0.0.1:0`
#    (the debug binary, or BANDWATCH_BIN), each with its own state
#    directory: "PC 1" and "PC 2";
# 2. two Prometheus agents (Debian's prometheus, --enable-feature=agent),
#    each with its own WAL directory, each scraping one daemon every second
#    with the external labels site/line/pc and the instance relabelled to
#    the PC's name, as deploy/scale-out/agent.yml does, remote-writing to
# 3. a third Prometheus, the central store, started with
#    --web.enable-remote-write-receiver and a copy of
#    deploy/prometheus-rules.yml, evaluated every second. The copy differs
#    from the real file in one place only: BandwatchTargetDown's `for: 2m`
#    becomes `for: 2s` (a sed substitution below), so the test does not
#    wait two minutes;
# 4. on the central store: the pump-de/bpfo band series arrives from both
#    PCs with their external labels; the dashboard's instance variable
#    query sees both PCs;
# 5. what one PC sends: series per scrape, samples/s, bytes/sample on the
#    wire and in the agent's WAL, from the agent's own counters
#    (docs/scale-out.md, "Sizing");
# 6. the link drops: the central store is stopped for 10 s and started
#    again on its port and data; pc2's up samples of those 10 s must reach
#    it from the agent's WAL (docs/scale-out.md, "When the link drops");
# 7. SIGTERM to PC 1's daemon: its agent's scrapes fail (up 0), and the
#    central store's BandwatchTargetDown fires for pc="pc1" (and not for
#    pc2) within 60 s, read from /api/v1/alerts and /api/v1/rules;
# 8. PC 1's agent stopped: nothing arrives from pc1 any more, and the
#    central store's BandwatchPcSilent (deploy/scale-out/central-rules.yml,
#    loaded as is; the central store runs with a 5 s lookback instead of
#    5 min to keep the test short) fires for pc1 and not for pc2.
#
# Remote write goes over TLS with basic auth, as in deploy/scale-out/:
# the central store has a web config (a self-signed certificate made with
# openssl, one bcrypt account per PC and one for the test's queries), each
# agent trusts the certificate and reads its password from a file, and a
# write without credentials is refused (401).
#
# Needs curl, openssl, python3 with bcrypt (the .venv of .ci/run), promtool
# and prometheus (Debian package `prometheus`). Everything binds 127.0.0.1 only; every step is
# time-bounded; whatever this script started is stopped on exit.
# Exit 0 on success, 1 on any failure.
# Usage: bash tests/external/scale_out.sh
set -euo pipefail

root="$(cd "$(dirname "${BASH_SOURCE[0]}")/../.." && pwd)"
cd "$root"

work="$(mktemp -d "${TMPDIR:-/tmp}/bandwatch-scale.XXXXXX")"
pids=""
started=$SECONDS

# stop_pid PID: TERM, wait up to 10 s, then KILL.
. "$root/tests/external/lib/common.bash"

cleanup() { # in reverse order of start: the agents before the central store
    local rev=""
    for pid in $pids; do rev="$pid $rev"; done
    for pid in $rev; do stop_pid "$pid"; done
    rm -rf "$work"
}
trap cleanup EXIT

step() { printf '== %s\n' "$*"; }
fail() {
    printf 'scale_out: FAIL: %s\n' "$*" >&2
    for log in "$work"/*.log; do
        [ -s "$log" ] || continue
        printf -- '--- last lines of %s:\n' "$(basename "$log")" >&2
        tail -n 20 "$log" >&2
    done
    exit 1
}

for tool in curl openssl python3 promtool prometheus timeout; do
    command -v "$tool" >/dev/null 2>&1 \
        || fail "$tool not found (Debian: apt-get install -y prometheus curl openssl python3)"
done
python3 -c 'import bcrypt' 2>/dev/null \
    || fail "python3 has no bcrypt module (pip install -r tests/reference/requirements.txt)"

# A loopback TCP port nobody listens on right now (Prometheus cannot take
# port 0 and tell us the port it got).

# ccurl ARGS...: curl to the central store (its CA, the reader account).
ccurl() {
    curl -sf --max-time 5 --cacert "$work/central.crt" -u "reader:$reader_pw" "$@"
}

# json_query URL PROMQL: the central store's query API's JSON reply.
json_query() {
    ccurl -G --data-urlencode "query=$2" "$1/api/v1/query"
}

find_bandwatch_bin

# start_demo NAME: `bandwatch run` on 127.0.0.1:0 with its own state
# directory; waits for its address (10 s) and /readyz (30 s); sets $url and
# $pid and appends the pid to $pids.
start_demo() {
    local name="$1" log="$work/$1.log"
    step "start $name: bandwatch run --config config/demo.toml --listen 127.0.0.1:0"
    NO_COLOR=1 RUST_LOG=info "$bin" run --config config/demo.toml --listen 127.0.0.1:0 \
        --state-dir "$work/$name/state" >"$log" 2>&1 &
    pid=$!
    pids="$pids $pid"
    url=""
    for _ in $(seq 1 100); do
        kill -0 "$pid" 2>/dev/null || fail "$name exited at start"
        url="$(grep -o 'http://127\.0\.0\.1:[0-9]*' "$log" | head -n 1 || true)"
        [ -n "$url" ] && break
        sleep 0.1
    done
    [ -n "$url" ] || fail "$name did not log its listen address within 10 s"
    for _ in $(seq 1 300); do
        if [ "$(curl -s -o /dev/null -w '%{http_code}' --max-time 2 "$url/readyz" || true)" = 200 ]; then
            echo "   $name ready on $url"
            return 0
        fi
        sleep 0.1
    done
    fail "$name not ready within 30 s"
}

# start_prom NAME ARGS...: prometheus on a free loopback port (or on
# $PROM_PORT when set) with --config.file=$work/NAME.yml and ARGS (3 attempts
# at a port; 30 s each for /-/ready, over https with ccurl when $PROM_TLS is
# set); sets $prom_url and $prom_pid and appends the pid to $pids.
start_prom() {
    local name="$1" port p
    shift
    prom_url=""
    for attempt in 1 2 3; do
        port="${PROM_PORT:-}"
        [ -n "$port" ] || port="$(free_port)" || fail "no free loopback port for $name"
        step "start $name on 127.0.0.1:$port (attempt $attempt)"
        prometheus --config.file="$work/$name.yml" \
            --web.listen-address="127.0.0.1:$port" --log.level=warn "$@" \
            >"$work/$name.log" 2>&1 &
        p=$!
        pids="$pids $p"
        for _ in $(seq 1 300); do
            kill -0 "$p" 2>/dev/null || break
            if [ -n "${PROM_TLS:-}" ]; then
                if ccurl -o /dev/null "https://127.0.0.1:$port/-/ready"; then
                    prom_url="https://127.0.0.1:$port"
                fi
            elif curl -sf --max-time 2 -o /dev/null "http://127.0.0.1:$port/-/ready"; then
                prom_url="http://127.0.0.1:$port"
            fi
            if [ -n "$prom_url" ]; then
                prom_pid="$p"
                return 0
            fi
            sleep 0.1
        done
        stop_pid "$p"
    done
    fail "$name did not become ready (3 attempts)"
}

# ---------------------------------------------------------------------------
start_demo pc1
bw1="${url#http://}"
bw1_pid="$pid"
start_demo pc2
bw2="${url#http://}"

# ---------------------------------------------------------------------------
step "central store's rules: deploy/prometheus-rules.yml with BandwatchTargetDown's for: 2m -> 2s"
sed '/alert: BandwatchTargetDown$/,/for:/ s/for: 2m$/for: 2s/' deploy/prometheus-rules.yml \
    >"$work/rules.yml"
changed="$(diff deploy/prometheus-rules.yml "$work/rules.yml" | grep -c '^>' || true)"
[ "$changed" = 1 ] || fail "the substitution changed $changed lines, expected exactly 1 (BandwatchTargetDown's for:)"
grep -A3 'alert: BandwatchTargetDown$' "$work/rules.yml" | grep -q 'for: 2s$' \
    || fail "BandwatchTargetDown's for: was not shortened"
out="$(timeout 60 promtool check rules "$work/rules.yml" 2>&1)" || fail "promtool rejects the test copy: $out"

step "central store's TLS certificate (openssl) and accounts (bcrypt): pc1, pc2, reader"
timeout 60 openssl req -x509 -newkey ec -pkeyopt ec_paramgen_curve:prime256v1 -nodes \
    -keyout "$work/central.key" -out "$work/central.crt" -days 2 -subj "/CN=localhost" \
    -addext "subjectAltName=DNS:localhost,IP:127.0.0.1" >"$work/openssl.log" 2>&1 \
    || fail "openssl req failed: $(cat "$work/openssl.log")"
bcrypt_hash() {
    timeout 60 python3 -c 'import bcrypt, sys; print(bcrypt.hashpw(sys.argv[1].encode(), bcrypt.gensalt(10)).decode())' "$1"
}
reader_pw="reader-$RANDOM-$RANDOM"
for pc in pc1 pc2; do
    printf 'write-%s-%s-%s' "$pc" "$RANDOM" "$RANDOM" >"$work/$pc.pass"
    chmod 600 "$work/$pc.pass"
done
{
    echo "tls_server_config:"
    echo "  cert_file: central.crt"
    echo "  key_file: central.key"
    echo "basic_auth_users:"
    echo "  pc1: $(bcrypt_hash "$(cat "$work/pc1.pass")")"
    echo "  pc2: $(bcrypt_hash "$(cat "$work/pc2.pass")")"
    echo "  reader: $(bcrypt_hash "$reader_pw")"
} >"$work/central-web.yml"
out="$(timeout 30 promtool check web-config "$work/central-web.yml" 2>&1)" \
    || fail "promtool rejects the central web config: $out"

cat >"$work/central.yml" <<EOF
global:
  evaluation_interval: 1s
rule_files:
  - $work/rules.yml
  - $root/deploy/scale-out/central-rules.yml
EOF
# --query.lookback-delta=5s (default 5m): BandwatchPcSilent fires once a
# PC has been silent for the lookback; 5 s keeps the test short.
PROM_TLS=1 start_prom central --storage.tsdb.path="$work/central-data" --web.enable-remote-write-receiver \
    --query.lookback-delta=5s --web.config.file="$work/central-web.yml"
central="$prom_url"
central_pid="$prom_pid"

# agent.yml for one PC: the shape of deploy/scale-out/agent.yml, with
# loopback addresses and 1 s intervals.
write_agent() { # NAME TARGET
    cat >"$work/agent-$1.yml" <<EOF
global:
  scrape_interval: 1s
  scrape_timeout: 1s
  external_labels:
    site: test-plant
    line: p2
    pc: $1
scrape_configs:
  - job_name: bandwatch
    static_configs:
      - targets: ["$2"]
    relabel_configs:
      - target_label: instance
        replacement: $1
remote_write:
  - url: $central/api/v1/write
    tls_config:
      ca_file: $work/central.crt
    basic_auth:
      username: $1
      password_file: $work/$1.pass
    queue_config:
      batch_send_deadline: 1s
      min_backoff: 100ms
      max_backoff: 1s
EOF
}
step "the central store refuses a remote write without credentials, or with a wrong password"
code="$(curl -s -o /dev/null -w '%{http_code}' --max-time 5 --cacert "$work/central.crt" \
    -X POST --data-binary @/dev/null "$central/api/v1/write" || true)"
[ "$code" = 401 ] || fail "a remote write without credentials got HTTP $code, expected 401"
code="$(curl -s -o /dev/null -w '%{http_code}' --max-time 5 --cacert "$work/central.crt" \
    -u "pc1:wrong" -X POST --data-binary @/dev/null "$central/api/v1/write" || true)"
[ "$code" = 401 ] || fail "a remote write with a wrong password got HTTP $code, expected 401"
echo "   401 both times"

write_agent pc1 "$bw1"
write_agent pc2 "$bw2"
out="$(timeout 60 promtool check config "$work/agent-pc1.yml" 2>&1)" || fail "promtool rejects the agent config: $out"
# flush-deadline: at shutdown an agent tries this long to send what is left.
start_prom agent-pc1 --enable-feature=agent --storage.agent.path="$work/agent-pc1-wal" \
    --storage.remote.flush-deadline=2s
agent1="$prom_url"
agent1_pid="$prom_pid"
start_prom agent-pc2 --enable-feature=agent --storage.agent.path="$work/agent-pc2-wal" \
    --storage.remote.flush-deadline=2s

# ---------------------------------------------------------------------------
query='bandwatch_band_rms_meters_per_second_squared{job="bandwatch",channel="pump-de",band="bpfo"}'
step "central: $query from both PCs (up to 60 s)"
seen=""
deadline=$((SECONDS + 60))
while [ "$SECONDS" -lt "$deadline" ]; do
    body="$(json_query "$central" "$query" || true)"
    seen="$(printf '%s' "$body" | python3 -c '
import json, sys
try:
    r = json.load(sys.stdin)["data"]["result"]
except Exception:
    sys.exit(0)
for s in sorted(r, key=lambda s: s["metric"].get("pc", "")):
    m = s["metric"]
    print(m.get("pc", "-"), m.get("site", "-"), m.get("line", "-"), m.get("instance", "-"), s["value"][1])
')"
    [ "$(printf '%s\n' "$seen" | grep -c '^pc[12] ' || true)" = 2 ] && break
    sleep 0.5
done
printf '%s\n' "$seen" | sed 's/^/   pc site line instance value: /'
printf '%s\n' "$seen" | grep -q '^pc1 test-plant p2 pc1 ' || fail "no pump-de/bpfo series from pc1 with site/line/instance (reply: ${body:-none})"
printf '%s\n' "$seen" | grep -q '^pc2 test-plant p2 pc2 ' || fail "no pump-de/bpfo series from pc2 with site/line/instance (reply: ${body:-none})"
printf '%s\n' "$seen" | awk '{ if (!($5 + 0 > 0 && $5 + 0 < 50)) exit 1 }' \
    || fail "a pump-de/bpfo envelope value is outside 0 to 50 m/s² (about 5 g)"

step "central: the dashboard's instance variable (label_values(bandwatch_build_info{job=~\"bandwatch\"}, instance))"
insts="$(json_query "$central" 'count by (instance) (bandwatch_build_info{job=~"bandwatch"})' \
    | python3 -c 'import json,sys; print(" ".join(sorted(s["metric"]["instance"] for s in json.load(sys.stdin)["data"]["result"])))')" \
    || fail "the instance query failed"
echo "   instances: $insts"
[ "$insts" = "pc1 pc2" ] || fail "the dashboard would list instances '$insts', expected 'pc1 pc2'"

# ---------------------------------------------------------------------------
step "what one PC sends (agent pc1's remote-write counters)"
series="$(curl -sf --max-time 5 "http://$bw1/metrics" | grep -vc '^#' || true)"
sleep 5 # let a few more batches go
am="$(curl -sf --max-time 5 "$agent1/metrics")" || fail "agent pc1's /metrics failed"
sent_samples="$(printf '%s\n' "$am" | awk '/^prometheus_remote_storage_samples_total[{ ]/ { s += $NF } END { print s + 0 }')"
sent_bytes="$(printf '%s\n' "$am" | awk '/^prometheus_remote_storage_(bytes|sent_bytes)_total[{ ]/ { s += $NF } END { print s + 0 }')"
failed="$(printf '%s\n' "$am" | awk '/^prometheus_remote_storage_samples_failed_total[{ ]/ { s += $NF } END { print s + 0 }')"
echo "   /metrics series per scrape: $series (+5 scrape series: up, scrape_*): $((series + 5)) samples/s at a 1 s interval"
awk -v s="$sent_samples" -v b="$sent_bytes" 'BEGIN { printf "   sent so far: %d samples, %d bytes (%.2f bytes/sample, snappy-compressed protobuf)\n", s, b, (s > 0 ? b / s : 0) }'
echo "   samples failed: $failed"
wal_bytes="$(du -sb "$work/agent-pc1-wal" | cut -f1)"
appended="$(printf '%s\n' "$am" | awk '/^prometheus_agent_samples_appended_total[{ ]/ { s += $NF } END { print s + 0 }')"
awk -v w="$wal_bytes" -v a="$appended" 'BEGIN { printf "   agent WAL on disk: %d bytes for %d samples appended (%.2f bytes/sample, series records included)\n", w, a, (a > 0 ? w / a : 0) }'
[ "${sent_samples%.*}" -gt 0 ] 2>/dev/null || fail "agent pc1 reports no samples sent"

# ---------------------------------------------------------------------------
step "link down: stop the central store for 10 s, start it again on the same port and data"
stop_pid "$central_pid"
kill -0 "$central_pid" 2>/dev/null && fail "the central store did not stop"
t_down="$(date +%s)"
sleep 10
t_up="$(date +%s)"
PROM_TLS=1 PROM_PORT="${central##*:}" start_prom central --storage.tsdb.path="$work/central-data" \
    --web.enable-remote-write-receiver --query.lookback-delta=5s --web.config.file="$work/central-web.yml"
[ "$prom_url" = "$central" ] || fail "the central store came back on $prom_url, not $central"
gap=$((t_up - t_down))
# up{instance="pc2"} is scraped every second: over the outage the central
# store must end up with about one sample a second, sent from the agent's
# WAL once the link is back (at most 60 s).
q="count_over_time(up{job=\"bandwatch\",instance=\"pc2\"}[${gap}s] @ ${t_up})"
n=""
deadline=$((SECONDS + 60))
while [ "$SECONDS" -lt "$deadline" ]; do
    n="$(json_query "$central" "$q" | python3 -c '
import json, sys
r = json.load(sys.stdin)["data"]["result"]
print(r[0]["value"][1] if r else 0)' || true)"
    [ "${n:-0}" -ge $((gap - 2)) ] 2>/dev/null && break
    sleep 0.5
done
echo "   samples of up{instance=\"pc2\"} inside the ${gap} s outage, on the central store: ${n:-none} (scraped at 1/s)"
[ "${n:-0}" -ge $((gap - 2)) ] 2>/dev/null \
    || fail "the outage's samples did not arrive from the agent's WAL: $n of about $gap"

# ---------------------------------------------------------------------------
step "SIGTERM pc1's bandwatch; BandwatchTargetDown{pc=\"pc1\"} must fire on the central store (up to 60 s)"
kill -TERM "$bw1_pid"
for _ in $(seq 1 100); do
    kill -0 "$bw1_pid" 2>/dev/null || break
    sleep 0.1
done
kill -0 "$bw1_pid" 2>/dev/null && fail "pc1's bandwatch still running 10 s after SIGTERM"
t0=$SECONDS
state=""
deadline=$((SECONDS + 60))
while [ "$SECONDS" -lt "$deadline" ]; do
    body="$(ccurl "$central/api/v1/alerts" || true)"
    state="$(printf '%s' "$body" | python3 -c '
import json, sys
try:
    alerts = json.load(sys.stdin)["data"]["alerts"]
except Exception:
    sys.exit(0)
for a in alerts:
    l = a["labels"]
    if l.get("alertname") == "BandwatchTargetDown":
        print(l.get("pc", "-"), a["state"], l.get("instance", "-"), l.get("site", "-"), l.get("line", "-"))
')"
    printf '%s\n' "$state" | grep -q '^pc1 firing ' && break
    sleep 0.5
done
printf '%s\n' "$state" | grep -q '^pc1 firing pc1 test-plant p2$' \
    || fail "BandwatchTargetDown did not fire for pc1 within 60 s (alerts: ${body:-none})"
echo "   firing after $((SECONDS - t0)) s: $(printf '%s\n' "$state" | grep '^pc1 firing')"
printf '%s\n' "$state" | grep -q '^pc2 ' && fail "BandwatchTargetDown also names pc2, which is up: $state"
rules="$(ccurl "$central/api/v1/rules?type=alert" | python3 -c '
import json, sys
for g in json.load(sys.stdin)["data"]["groups"]:
    for r in g["rules"]:
        if r["name"] in ("BandwatchTargetDown", "BandwatchTargetAbsent"):
            print(r["name"], r["state"], r["health"])
')" || fail "GET /api/v1/rules failed"
printf '%s\n' "$rules" | sed 's/^/   rules API: /'
printf '%s\n' "$rules" | grep -q '^BandwatchTargetDown firing ok$' || fail "the rules API does not show BandwatchTargetDown firing"
printf '%s\n' "$rules" | grep -q '^BandwatchTargetAbsent inactive ok$' \
    || fail "BandwatchTargetAbsent is not inactive while pc2 still reports"

# ---------------------------------------------------------------------------
step "stop pc1's agent; BandwatchPcSilent{pc=\"pc1\"} (deploy/scale-out/central-rules.yml) must fire (up to 60 s)"
stop_pid "$agent1_pid"
kill -0 "$agent1_pid" 2>/dev/null && fail "pc1's agent did not stop"
t0=$SECONDS
silent=""
deadline=$((SECONDS + 60))
while [ "$SECONDS" -lt "$deadline" ]; do
    body="$(ccurl "$central/api/v1/alerts" || true)"
    silent="$(printf '%s' "$body" | python3 -c '
import json, sys
try:
    alerts = json.load(sys.stdin)["data"]["alerts"]
except Exception:
    sys.exit(0)
for a in alerts:
    l = a["labels"]
    if l.get("alertname") == "BandwatchPcSilent":
        print(l.get("pc", "-"), a["state"], l.get("instance", "-"))
')"
    printf '%s\n' "$silent" | grep -q '^pc1 firing ' && break
    sleep 0.5
done
printf '%s\n' "$silent" | grep -q '^pc1 firing pc1$' \
    || fail "BandwatchPcSilent did not fire for pc1 within 60 s (alerts: ${body:-none})"
echo "   firing after $((SECONDS - t0)) s: $(printf '%s\n' "$silent" | grep '^pc1 firing')"
printf '%s\n' "$silent" | grep -q '^pc2 firing' && fail "BandwatchPcSilent also fires for pc2, which still reports: $silent"

echo "scale_out: OK ($((SECONDS - started)) s)"
