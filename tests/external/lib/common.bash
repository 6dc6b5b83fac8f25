# Helpers the external checks share (sourced, not run: .ci/run runs only
# tests/external/*.sh).

# fail_with_daemon_log NAME MESSAGE: "NAME: FAIL: MESSAGE" on stderr, the
# last 20 lines of $work/bandwatch.log when there are any, exit 1.
fail_with_daemon_log() {
    printf '%s: FAIL: %s\n' "$1" "$2" >&2
    if [ -s "$work/bandwatch.log" ]; then
        printf -- '--- last lines of the daemon log:\n' >&2
        tail -n 20 "$work/bandwatch.log" >&2
    fi
    exit 1
}

# Sets `bin` to the binary under test: $BANDWATCH_BIN, or a debug build
# of this checkout (cargo, at most 30 min). Uses the caller's `step` and
# `fail`, and `root` (the checkout).
find_bandwatch_bin() {
    bin="${BANDWATCH_BIN:-}"
    if [ -z "$bin" ]; then
        step "cargo build --locked (debug)"
        timeout 1800 cargo build --locked --quiet --bin bandwatch || fail "cargo build failed"
        bin="${CARGO_TARGET_DIR:-$root/target}/debug/bandwatch"
    fi
    [ -x "$bin" ] || fail "no bandwatch binary at $bin"
}

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

# pid: SIGTERM, then the process must exit by itself within 10 s with
# status 0 (the daemon's clean shutdown); otherwise the caller's `fail`.
# Call it from the shell that started the process (`wait` needs that).
expect_clean_exit() {
    local pid="$1" rc=""
    kill -TERM "$pid"
    for _ in $(seq 1 100); do
        if ! kill -0 "$pid" 2>/dev/null; then
            rc=0
            wait "$pid" || rc=$?
            break
        fi
        sleep 0.1
    done
    [ -n "$rc" ] || fail "bandwatch still running 10 s after SIGTERM"
    [ "$rc" = 0 ] || fail "bandwatch exited with status $rc after SIGTERM"
}

# A loopback TCP port nobody listens on right now.
free_port() {
    local p
    for _ in $(seq 1 50); do
        p=$((20000 + RANDOM % 40000))
        if ! timeout 1 bash -c "exec 3<>/dev/tcp/127.0.0.1/$p" 2>/dev/null; then
            echo "$p"
            return 0
        fi
    done
    return 1
}

# config data_dir log: Debian's prometheus with that config on a free
# loopback port, its data dir emptied first; up to 3 attempts (a port
# taken between the probe and the bind). Sets `prom` (its URL) and
# `prom_pid` (for the caller's cleanup); the caller's `fail` otherwise.
start_prometheus() {
    local config="$1" data="$2" log="$3" port attempt
    prom=""
    for attempt in 1 2 3; do
        port="$(free_port)" || fail "no free loopback port for Prometheus"
        rm -rf "$data"
        printf '== %s\n' "start prometheus on 127.0.0.1:$port (attempt $attempt)"
        timeout 300 prometheus \
            --config.file="$config" \
            --storage.tsdb.path="$data" \
            --web.listen-address="127.0.0.1:$port" \
            --log.level=warn >"$log" 2>&1 &
        prom_pid=$!
        for _ in $(seq 1 300); do
            kill -0 "$prom_pid" 2>/dev/null || break
            if curl -sf --max-time 2 -o /dev/null "http://127.0.0.1:$port/-/ready"; then
                prom="http://127.0.0.1:$port"
                return 0
            fi
            sleep 0.1
        done
        stop_pid "$prom_pid"
        prom_pid=""
    done
    fail "Prometheus did not become ready (3 attempts)"
}

# bin config log: starts bandwatch on a loopback port of its choosing,
# waits up to 15 s for the address it logs. Sets `bw_pid` and `bw` (its
# URL); the caller's `fail` otherwise.
start_bandwatch() {
    local bin="$1" config="$2" log="$3"
    : >"$log"
    NO_COLOR=1 RUST_LOG=info "$bin" run --config "$config" --listen 127.0.0.1:0 >>"$log" 2>&1 &
    bw_pid=$!
    bw=""
    for _ in $(seq 1 150); do
        kill -0 "$bw_pid" 2>/dev/null || fail "bandwatch exited at start"
        bw="$(grep -o 'http://127\.0\.0\.1:[0-9]*' "$log" | head -n 1 || true)"
        [ -n "$bw" ] && return 0
        sleep 0.1
    done
    fail "bandwatch did not log its listen address within 15 s"
}

# name: the value of an unlabelled sample (or the sum of a family's
# samples) in $bw/metrics; 0 when absent.
metric_sum() {
    curl -sf --max-time 5 "$bw/metrics" | awk -v n="$1" '
        $1 == n || index($1, n "{") == 1 { s += $2 }
        END { printf "%d\n", s }'
}
