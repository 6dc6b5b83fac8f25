#!/usr/bin/env bash
# The history file under SIGKILL (issue 17): the real daemon writing its
# history hard (aggregates every second, a spectrum per channel at every
# start, every alarm transition and every 10 s) is killed with SIGKILL 30
# times at random moments and started again each time.
#
# Checked after every kill, on the file, with Python's own sqlite3 module
# (the SQLite library Debian's Python links, not the one bandwatch
# bundles) and zlib (the deflate reference implementation):
# - PRAGMA integrity_check is "ok";
# - no acknowledged write is lost: every aggregate row and spectrum a
#   reader saw committed just before the kill is still there;
# - every stored spectrum's BLOB is whole: codec version 1, its line count
#   equals the row's `lines`, and its deflate stream inflates (zlib, raw
#   deflate) to exactly 4 bytes per line.
# At the end (one more start): the history is written again, no record was
# dropped or failed (bandwatch_history_records_dropped_total and
# bandwatch_history_write_errors_total are 0), SIGTERM stops it with exit 0.
#
# Needs curl, python3 and a Rust toolchain (or BANDWATCH_BIN). Everything
# binds 127.0.0.1; every wait is bounded; about 2 minutes.
# Exit 0 on success, 1 on any failure.
# Usage: bash tests/external/history_kill.sh [kills]
set -euo pipefail

root="$(cd "$(dirname "${BASH_SOURCE[0]}")/../.." && pwd)"
cd "$root"
. "$root/tests/external/lib/common.bash"

kills="${1:-30}"
work="$(mktemp -d "${TMPDIR:-/tmp}/bandwatch-hkill.XXXXXX")"
bw_pid=""

cleanup() {
    stop_pid "$bw_pid"
    rm -rf "$work"
}
trap cleanup EXIT

step() { printf '== %s\n' "$*"; }
fail() { fail_with_daemon_log history_kill "$*"; }

for tool in curl python3 timeout; do
    command -v "$tool" >/dev/null 2>&1 || fail "$tool not found"
done

find_bandwatch_bin

data="$work/data"
db="$data/history.sqlite"
python3 - "$data" "$root/config/demo-token" >"$work/h.toml" <<'PY'
import sys
data, token = sys.argv[1], sys.argv[2]
text = open("config/demo.toml").read()
def sub(old, new):
    global text
    assert old in text, old
    text = text.replace(old, new, 1)
sub('storage_dir = "../demo-data"', 'storage_dir = "%s"' % data)
sub('token_file = "demo-token"', 'token_file = "%s"' % token)
assert "\ninterval_s = 1\n" in text, "the demo's [history] interval_s is no longer 1"
sub("spectrum_every_s = 20", "spectrum_every_s = 10")
print(text)
PY

# What a reader sees committed now: "points spectra max_spectrum_id".
committed() {
    python3 - "$db" <<'PY'
import sqlite3, sys
try:
    c = sqlite3.connect("file:%s?mode=ro" % sys.argv[1], uri=True, timeout=5)
    p = c.execute("SELECT count(*) FROM points").fetchone()[0]
    s = c.execute("SELECT count(*), coalesce(max(id), 0) FROM spectra").fetchone()
    print(p, s[0], s[1])
except sqlite3.OperationalError:
    print(0, 0, 0)  # not created yet
PY
}

# check_file <points> <spectra> <max id> <kill number>
check_file() {
    python3 - "$db" "$@" <<'PY' || fail "history file check after kill $4"
import sqlite3, sys, zlib, struct
db, points, spectra, max_id, k = sys.argv[1], int(sys.argv[2]), int(sys.argv[3]), int(sys.argv[4]), sys.argv[5]
c = sqlite3.connect(db, timeout=5)
ic = c.execute("PRAGMA integrity_check").fetchall()
if ic != [("ok",)]:
    sys.exit("integrity_check: %r" % ic)
p = c.execute("SELECT count(*) FROM points").fetchone()[0]
if p < points:
    sys.exit("%d aggregate rows after the kill, %d were committed before it" % (p, points))
ids = c.execute("SELECT count(*) FROM spectra WHERE id <= ?", (max_id,)).fetchone()[0]
if ids < spectra:
    sys.exit("%d of the %d spectra committed before the kill are left" % (ids, spectra))
n = 0
for sid, lines, power, env in c.execute("SELECT id, lines, power, envelope FROM spectra"):
    for blob in (power, env):
        if blob is None:
            continue
        if blob[0] != 1:
            sys.exit("spectrum %d: codec version %d" % (sid, blob[0]))
        (count,) = struct.unpack("<I", blob[1:5])
        if count != lines:
            sys.exit("spectrum %d: %d lines in the blob, %d in the row" % (sid, count, lines))
        raw = zlib.decompress(blob[5:], -15)
        if len(raw) != 4 * lines:
            sys.exit("spectrum %d: inflates to %d bytes, want %d" % (sid, len(raw), 4 * lines))
        n += 1
print("   kill %s: integrity ok; %d rows (%d committed before), %d spectra, %d blobs whole"
      % (k, p, points, ids, n))
PY
}

step "SIGKILL x $kills while the history is written"
for k in $(seq 1 "$kills"); do
    start_bandwatch "$bin" "$work/h.toml" "$work/bandwatch.log"
    # 1.5 to 4 s: through the start's spectra and some seconds of rows.
    sleep "$(python3 -c 'import random; print(round(random.uniform(1.5, 4.0), 2))')"
    read -r points spectra max_id < <(committed)
    kill -KILL "$bw_pid"
    wait "$bw_pid" 2>/dev/null || true
    bw_pid=""
    [ -f "$db" ] || fail "no history file after run $k"
    check_file "$points" "$spectra" "$max_id" "$k"
done

step "one more start: history written again, nothing dropped, clean stop"
start_bandwatch "$bin" "$work/h.toml" "$work/bandwatch.log"
read -r points _ _ < <(committed)
for _ in $(seq 1 100); do
    read -r now _ _ < <(committed)
    [ "$now" -gt "$points" ] && break
    sleep 0.1
done
[ "$now" -gt "$points" ] || fail "no aggregate written within 10 s of the last start"
dropped="$(metric_sum bandwatch_history_records_dropped_total)"
errors="$(metric_sum bandwatch_history_write_errors_total)"
[ "$dropped" = 0 ] || fail "$dropped history records dropped"
[ "$errors" = 0 ] || fail "$errors history write errors"
expect_clean_exit "$bw_pid"
bw_pid=""
printf 'history_kill: OK (%s kills)\n' "$kills"
