#!/usr/bin/env bash
# The operator page in a real browser against the real daemon:
#
# 1. `bandwatch run --config config/demo.toml --listen 127.0.0.1:0` (the
#    debug binary, or BANDWATCH_BIN), waited for on /readyz;
# 2. tests/external/web/page.mjs drives Debian's chromium (/usr/bin/chromium,
#    or CHROMIUM) through playwright-core, installed beforehand in
#    tests/external/web/node_modules by `npm ci` (.ci/run does it, with
#    PLAYWRIGHT_SKIP_BROWSER_DOWNLOAD=1: no browser is downloaded). It checks
#    the overview lists the demo's four channels, the pump-de view's highest
#    peak label reads the vane pass (173.25 Hz within half a line), the
#    harmonic cursors sit at multiples of 24.75 Hz, a one-line spike among
#    65 537 lines still shows in its pixel column (display decimation by
#    min..max, never by skipping), the console has no errors and no request
#    leaves the daemon;
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
bw_pid=""

stop_pid() { # pid: TERM, wait up to 10 s, then KILL
    local pid="$1"
    [ -n "$pid" ] || return 0
    kill -0 "$pid" 2>/dev/null || return 0
    kill -TERM "$pid" 2>/dev/null || true
    for _ in $(seq 1 100); do
        kill -0 "$pid" 2>/dev/null || return 0
        sleep 0.1
    done
    kill -KILL "$pid" 2>/dev/null || true
}

cleanup() {
    stop_pid "$bw_pid"
    rm -rf "$work"
}
trap cleanup EXIT

step() { printf '== %s\n' "$*"; }
fail() {
    printf 'page: FAIL: %s\n' "$*" >&2
    if [ -s "$work/bandwatch.log" ]; then
        printf -- '--- last lines of bandwatch.log:\n' >&2
        tail -n 20 "$work/bandwatch.log" >&2
    fi
    exit 1
}

chromium="${CHROMIUM:-/usr/bin/chromium}"
[ -x "$chromium" ] || fail "no chromium at $chromium (Debian: apt-get install -y chromium)"
for tool in node curl timeout; do
    command -v "$tool" >/dev/null 2>&1 || fail "$tool not found (Debian: apt-get install -y nodejs npm curl)"
done
[ -d tests/external/web/node_modules/playwright-core ] \
    || fail "playwright-core not installed: (cd tests/external/web && PLAYWRIGHT_SKIP_BROWSER_DOWNLOAD=1 npm ci)"

bin="${BANDWATCH_BIN:-}"
if [ -z "$bin" ]; then
    step "cargo build --locked (debug)"
    timeout 1800 cargo build --locked --quiet --bin bandwatch || fail "cargo build failed"
    bin="${CARGO_TARGET_DIR:-$root/target}/debug/bandwatch"
fi
[ -x "$bin" ] || fail "no bandwatch binary at $bin"

step "start bandwatch run --config config/demo.toml --listen 127.0.0.1:0"
NO_COLOR=1 RUST_LOG=info "$bin" run --config config/demo.toml --listen 127.0.0.1:0 \
    --state-dir "$work/state" >"$work/bandwatch.log" 2>&1 &
bw_pid=$!
bw=""
for _ in $(seq 1 100); do
    kill -0 "$bw_pid" 2>/dev/null || fail "bandwatch exited at start"
    bw="$(grep -o 'http://127\.0\.0\.1:[0-9]*' "$work/bandwatch.log" | head -n 1 || true)"
    [ -n "$bw" ] && break
    sleep 0.1
done
[ -n "$bw" ] || fail "bandwatch did not log its listen address within 10 s"
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
[ -n "$ready" ] || fail "bandwatch not ready within 30 s"

step "page bytes (index.html and every asset it loads)"
total=0
for p in / /assets/app.css /assets/app.js /assets/api.js /assets/ui.js /assets/overview.js \
    /assets/channel.js /assets/plot.js; do
    n="$(curl -sf --max-time 5 -o /dev/null -w '%{size_download}' "$bw$p")" || fail "GET $p failed"
    total=$((total + n))
done
echo "   $total bytes uncompressed"

step "chromium loads the page (screenshots in $shots)"
rm -rf "$shots"
timeout 120 node tests/external/web/page.mjs "$bw" "$shots" || fail "the browser checks failed (above)"
ls "$shots"

step "SIGTERM: bandwatch exits 0 within 10 s"
kill -TERM "$bw_pid"
rc=0
for _ in $(seq 1 100); do
    kill -0 "$bw_pid" 2>/dev/null || break
    sleep 0.1
done
kill -0 "$bw_pid" 2>/dev/null && fail "bandwatch still running 10 s after SIGTERM"
wait "$bw_pid" || rc=$?
bw_pid=""
[ "$rc" = 0 ] || fail "bandwatch exited $rc after SIGTERM"
echo "page: OK"
