#!/usr/bin/env bash
# The real Prometheus server scraping the real daemon over TLS with basic
# auth ([server] web_config; README "Serving over the network (TLS, basic
# auth)"):
#
# 1. A self-signed certificate for 127.0.0.1/localhost made with the
#    `openssl` CLI, a bcrypt hash made with python's `bcrypt` (pinned in
#    tests/reference/requirements.txt), a web-config file using both.
# 2. `bandwatch check` accepts the config and names the web config.
# 3. `bandwatch run` playing config/demo.toml over https: curl --cacert
#    gets 200 with the credentials, 401 (with the Basic challenge) without
#    them or with a wrong password; plain http:// to the port gets no HTTP
#    answer and is counted in bandwatch_http_tls_handshake_errors_total.
# 4. A real Prometheus server (scheme: https, tls_config.ca_file,
#    basic_auth) scraping every second until its query API returns a sane
#    value for the demo's motor-de overall velocity and up = 1.
# 5. SIGTERM to the daemon: it must exit 0 within 10 s.
#
# Needs curl, openssl, promtool/prometheus (Debian `prometheus`), python3
# with bcrypt (the .venv of .ci/run) and a Rust toolchain (or BANDWATCH_BIN
# pointing at a built binary). Everything binds 127.0.0.1 only; every step
# is time-bounded; whatever this script started is stopped on exit. Exit 0
# on success, 1 on any failure.
# Usage: bash tests/external/prometheus_tls.sh
set -euo pipefail

root="$(cd "$(dirname "${BASH_SOURCE[0]}")/../.." && pwd)"
cd "$root"

work="$(mktemp -d "${TMPDIR:-/tmp}/bandwatch-prom-tls.XXXXXX")"
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
    printf 'prometheus_tls: FAIL: %s\n' "$*" >&2
    for log in "$work/bandwatch.log" "$work/prometheus.log"; do
        if [ -s "$log" ]; then
            printf -- '--- last lines of %s:\n' "$(basename "$log")" >&2
            tail -n 20 "$log" >&2
        fi
    done
    exit 1
}

for tool in curl openssl prometheus python3 timeout; do
    command -v "$tool" >/dev/null 2>&1 \
        || fail "$tool not found (Debian: apt-get install -y prometheus curl openssl python3)"
done
python3 -c 'import bcrypt' 2>/dev/null \
    || fail "python3 has no bcrypt module (pip install -r tests/reference/requirements.txt)"


# ---------------------------------------------------------------------------
step "certificate (openssl) and bcrypt hash (python bcrypt)"
timeout 60 openssl req -x509 -newkey ec -pkeyopt ec_paramgen_curve:prime256v1 -nodes \
    -keyout "$work/server.key" -out "$work/server.crt" -days 2 -subj "/CN=localhost" \
    -addext "subjectAltName=DNS:localhost,IP:127.0.0.1" >"$work/openssl.log" 2>&1 \
    || fail "openssl req failed: $(cat "$work/openssl.log")"
user="scraper"
password="tls-test-$RANDOM-$RANDOM"
hash="$(timeout 60 python3 -c 'import bcrypt, sys; print(bcrypt.hashpw(sys.argv[1].encode(), bcrypt.gensalt(10)).decode())' "$password")" \
    || fail "python bcrypt failed"
# Relative paths: they resolve beside the web-config file.
cat >"$work/web.yml" <<EOF
tls_server_config:
  cert_file: server.crt
  key_file: server.key
basic_auth_users:
  $user: '$hash'
EOF
sed -e "s|^listen = \"127.0.0.1:9750\"|listen = \"127.0.0.1:9750\"\nweb_config = \"$work/web.yml\"|" \
    -e "s|^storage_dir = \"../demo-data\"|storage_dir = \"$work/data\"|" \
    -e "s|^token_file = \"demo-token\"|token_file = \"$root/config/demo-token\"|" \
    config/demo.toml >"$work/bandwatch.toml"
grep -q "^web_config = " "$work/bandwatch.toml" || fail "could not add web_config to the demo config"
echo "   $work/web.yml: user $user, hash ${hash:0:7}…"

# ---------------------------------------------------------------------------
find_bandwatch_bin

step "bandwatch check"
out="$(timeout 30 "$bin" check --config "$work/bandwatch.toml" 2>&1)" \
    || fail "bandwatch check rejects the config: $out"
printf '%s\n' "$out" | grep -q "web.yml: ok (TLS on, 1 basic-auth user(s))" \
    || fail "bandwatch check does not report the web config: $out"
echo "   $out" | tail -n 1

step "start bandwatch run --listen 127.0.0.1:0 (TLS, basic auth)"
NO_COLOR=1 RUST_LOG=info "$bin" run --config "$work/bandwatch.toml" --listen 127.0.0.1:0 \
    >"$work/bandwatch.log" 2>&1 &
bw_pid=$!
bw=""
for _ in $(seq 1 100); do
    kill -0 "$bw_pid" 2>/dev/null || fail "bandwatch exited at start"
    bw="$(grep -o 'https://127\.0\.0\.1:[0-9]*' "$work/bandwatch.log" | head -n 1 || true)"
    [ -n "$bw" ] && break
    sleep 0.1
done
[ -n "$bw" ] || fail "bandwatch did not log an https:// listen address within 10 s"
bw_addr="${bw#https://}"
echo "   listening on $bw"

tls_curl() { curl -s --max-time 5 --cacert "$work/server.crt" "$@"; }

step "wait for $bw/readyz with the credentials (up to 30 s)"
ready=""
for _ in $(seq 1 300); do
    if [ "$(tls_curl -u "$user:$password" -o /dev/null -w '%{http_code}' "$bw/readyz" || true)" = 200 ]; then
        ready=1
        break
    fi
    sleep 0.1
done
[ -n "$ready" ] || fail "bandwatch not ready over TLS within 30 s: $(tls_curl -u "$user:$password" "$bw/readyz" || true)"

step "401 without credentials and with a wrong password"
for args in "" "-u $user:wrong-password"; do
    # shellcheck disable=SC2086 # $args is word-split on purpose
    code="$(tls_curl $args -D "$work/headers" -o /dev/null -w '%{http_code}' "$bw/metrics" || true)"
    [ "$code" = 401 ] || fail "GET /metrics ${args:-without credentials} answered $code, expected 401"
    grep -qi '^www-authenticate: Basic realm="bandwatch"' "$work/headers" \
        || fail "401 without the Basic challenge: $(cat "$work/headers")"
done
echo "   401 with WWW-Authenticate: Basic realm=\"bandwatch\""

step "plain http:// to the TLS port gets no HTTP answer"
code="$(curl -s --max-time 5 -o /dev/null -w '%{http_code}' "http://$bw_addr/healthz" || true)"
[ "$code" = 000 ] || fail "plain HTTP to the TLS port answered $code"
tls_curl -u "$user:$password" -o "$work/metrics.prom" "$bw/metrics" || fail "GET /metrics over TLS failed"
errors="$(sed -n 's/^bandwatch_http_tls_handshake_errors_total \([0-9.e+]*\)$/\1/p' "$work/metrics.prom")"
failures="$(sed -n 's/^bandwatch_http_auth_failures_total \([0-9.e+]*\)$/\1/p' "$work/metrics.prom")"
[ "${errors:-0}" -ge 1 ] 2>/dev/null || fail "handshake errors not counted (bandwatch_http_tls_handshake_errors_total = '${errors:-missing}')"
[ "${failures:-0}" -ge 2 ] 2>/dev/null || fail "auth failures not counted (bandwatch_http_auth_failures_total = '${failures:-missing}')"
echo "   tls_handshake_errors_total = $errors, auth_failures_total = $failures"

# ---------------------------------------------------------------------------
query='bandwatch_band_rms_meters_per_second{channel="motor-de",band="overall-velocity"}'
cat >"$work/prometheus.yml" <<EOF
global:
  scrape_interval: 1s
  scrape_timeout: 1s
  evaluation_interval: 1s
scrape_configs:
  - job_name: bandwatch
    scheme: https
    tls_config:
      ca_file: $work/server.crt
    basic_auth:
      username: $user
      password: '$password'
    static_configs:
      - targets: ["$bw_addr"]
EOF
start_prometheus "$work/prometheus.yml" "$work/prom-data" "$work/prometheus.log"

step "query $query over the TLS scrape (up to 60 s)"
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
if [ -z "$value" ]; then
    targets="$(curl -sf --max-time 5 "$prom/api/v1/targets" || true)"
    fail "Prometheus has no sample of $query after 60 s (targets: ${targets:-none})"
fi
echo "   $query = $value m/s (up = ${up:-?})"
[ "$up" = 1 ] || fail "up{job=\"bandwatch\"} is '${up:-missing}', expected 1"
awk -v v="$value" 'BEGIN { exit !(v + 0 >= 0.0005 && v + 0 <= 0.02) }' \
    || fail "motor-de overall velocity $value m/s is outside the demo's sane range 0.0005 to 0.02 m/s"

# ---------------------------------------------------------------------------
step "SIGTERM bandwatch: clean exit within 10 s"
expect_clean_exit "$bw_pid"
bw_pid=""
echo "   exited 0"

echo "prometheus_tls: OK"
