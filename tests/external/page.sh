#!/usr/bin/env bash
# The operator page in a real browser against the real daemon:
#
# 1. `bandwatch run --config config/demo.toml --listen 127.0.0.1:0` twice
#    (the debug binary, or BANDWATCH_BIN), each with its own state
#    directory, waited for on /readyz: the demo as shipped, and the demo
#    with its simulator 10 times faster (its BPFO alarm trips within
#    seconds);
# 2. tests/external/web/page.mjs drives Debian's chromium (/usr/bin/chromium,
#    or CHROMIUM) through playwright-core, installed beforehand in
#    tests/external/web/node_modules by `npm ci` (.ci/run does it, with
#    PLAYWRIGHT_SKIP_BROWSER_DOWNLOAD=1: no browser is downloaded), through
#    every view: overview, channel (spectrum, units, envelope, waveform,
#    band signal, trend, CSV/SVG downloads), alarms (danger shown, wrong
#    token refused, acknowledge), a capture and its downloads, the history
#    of pump-de (stored trend, waterfall, a stored spectrum opened; on the
#    fast demo: store now, mark as reference, compare), a tablet's width;
#    no console error, no request leaving the daemon (page.mjs
#    lists every check);
# 3. screenshots go to target/page-screenshots/ (README "The operator page").
#
# Installs nothing. Everything binds 127.0.0.1 only; every step is
# time-bounded; whatever this script started is stopped on exit.
# Exit 0 on success, 1 on any failure.
# Usage: bash tests/external/page.sh
set -euo pipefail

root="$(cd "$(dirname "${BASH_SOURCE[0]}")/../.." && pwd)"
cd "$root"

work="$(mktemp -d "${TMPDIR:-/tmp}/bandwatch-page.XXXXXX")"
shots="${CARGO_TARGET_DIR:-$root/target}/page-screenshots"
pids=""

# stop_pid PID: TERM, wait up to 10 s, then KILL.
. "$root/tests/external/lib/common.bash"

cleanup() {
    for pid in $pids; do stop_pid "$pid"; done
    rm -rf "$work"
}
trap cleanup EXIT

step() { printf '== %s\n' "$*"; }
fail() {
    printf 'page: FAIL: %s\n' "$*" >&2
    for log in "$work"/*.log; do
        [ -s "$log" ] || continue
        printf -- '--- last lines of %s:\n' "$(basename "$log")" >&2
        tail -n 20 "$log" >&2
    done
    exit 1
}

chromium="${CHROMIUM:-/usr/bin/chromium}"
[ -x "$chromium" ] || fail "no chromium at $chromium (Debian: apt-get install -y chromium)"
for tool in node curl timeout; do
    command -v "$tool" >/dev/null 2>&1 || fail "$tool not found (Debian: apt-get install -y nodejs npm curl)"
done
[ -d tests/external/web/node_modules/playwright-core ] \
    || fail "playwright-core not installed: (cd tests/external/web && PLAYWRIGHT_SKIP_BROWSER_DOWNLOAD=1 npm ci)"

find_bandwatch_bin

# start_demo NAME CONFIG: runs `bandwatch run` on 127.0.0.1:0 with its own
# state directory, waits for its address (10 s) and /readyz (30 s); sets
# $url and appends the pid to $pids.
start_demo() {
    local name="$1" config="$2" log="$work/$1.log"
    step "start $name: bandwatch run --config $config --listen 127.0.0.1:0"
    NO_COLOR=1 RUST_LOG=info "$bin" run --config "$config" --listen 127.0.0.1:0 \
        --state-dir "$work/$name/state" >"$log" 2>&1 &
    local pid=$!
    pids="$pids $pid"
    url=""
    for _ in $(seq 1 100); do
        kill -0 "$pid" 2>/dev/null || fail "$name exited at start (log: $log)"
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

start_demo demo config/demo.toml
bw="$url"
# The same demo with the simulator 10 times faster: its outer-race defect
# grows through alert to danger within seconds (the demo's own 200 s cycle).
mkdir -p "$work/fast-config"
sed 's/^seed = 2$/seed = 2\nspeed = 10.0/' config/demo.toml >"$work/fast-config/demo.toml"
grep -q '^speed = 10.0$' "$work/fast-config/demo.toml" || fail "could not speed up the demo's simulator"
cp config/demo-token "$work/fast-config/demo-token"
start_demo fast "$work/fast-config/demo.toml"
fast="$url"

step "page bytes (index.html and every asset it loads)"
total=0
for f in assets/web/*; do
    p="/assets/$(basename "$f")"
    n="$(curl -sf --max-time 5 -o /dev/null -w '%{size_download}' "$bw$p")" || fail "GET $p failed"
    total=$((total + n))
done
echo "   $total bytes uncompressed"

step "chromium loads the page (screenshots in $shots)"
rm -rf "$shots"
timeout 240 node tests/external/web/page.mjs "$bw" "$shots" "$fast" config/demo-token || fail "the browser checks failed (above)"
ls "$shots"

step "SIGTERM: each bandwatch exits 0 within 10 s"
for pid in $pids; do
    kill -TERM "$pid"
    for _ in $(seq 1 100); do
        kill -0 "$pid" 2>/dev/null || break
        sleep 0.1
    done
    kill -0 "$pid" 2>/dev/null && fail "bandwatch $pid still running 10 s after SIGTERM"
    rc=0
    wait "$pid" || rc=$?
    [ "$rc" = 0 ] || fail "bandwatch $pid exited $rc after SIGTERM"
done
pids=""
echo "page: OK"
