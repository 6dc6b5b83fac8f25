# Helpers the external checks share (sourced, not run: .ci/run runs only
# tests/external/*.sh).

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
