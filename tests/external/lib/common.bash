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
