#!/usr/bin/env bash
# The history on a full disk (issue 17): the history file lives on a small
# tmpfs (4 MiB) that a filler file has all but filled, so its writes fail
# with "database or disk is full" within seconds of the start. Checked:
# - the DSP and the alarms go on: spectra are published and counted, the
#   alarm board answers, the journal (on another disk) is written;
# - the loss is counted (bandwatch_history_records_dropped_total with
#   reason="write_error" rises) and logged once, not once per record;
# - when space returns (the filler removed) the history resumes by itself:
#   aggregate rows are written again and the recovery is logged once;
# - the outage is in the file as holes: their lost records add up to
#   exactly the write_error drops counted;
# - SIGTERM stops the daemon with exit 0 and PRAGMA integrity_check is ok.
#
# Mounting a tmpfs needs root (CI runs as root). Without root, the file's
# directory is made unwritable instead (a root process would ignore that,
# so as root a failed mount is a failure).
# Needs curl, python3, a Rust toolchain (or BANDWATCH_BIN). Everything
# binds 127.0.0.1; every wait is bounded; about a minute.
# Exit 0 on success, 1 on any failure.
set -euo pipefail

root="$(cd "$(dirname "${BASH_SOURCE[0]}")/../.." && pwd)"
cd "$root"
. "$root/tests/external/lib/common.bash"

work="$(mktemp -d "${TMPDIR:-/tmp}/bandwatch-hdisk.XXXXXX")"
small="$work/small"
mounted=""
bw_pid=""

cleanup() {
    stop_pid "$bw_pid"
    [ -z "$mounted" ] || umount "$small" 2>/dev/null || true
    chmod -R u+w "$work" 2>/dev/null || true
    rm -rf "$work"
}
trap cleanup EXIT

step() { printf '== %s\n' "$*"; }
fail() { fail_with_daemon_log history_disk "$*"; }

for tool in curl python3 timeout; do
    command -v "$tool" >/dev/null 2>&1 || fail "$tool not found"
done

find_bandwatch_bin

mkdir -p "$small"
if mount -t tmpfs -o size=4m tmpfs "$small" 2>/dev/null; then
    mounted=1
    mode="tmpfs"
    step "a 4 MiB tmpfs, filled but for 256 KiB"
    # The filler takes what is left but 256 KiB.
    avail_kb="$(df -k --output=avail "$small" | tail -n 1 | tr -d ' ')"
    dd if=/dev/zero of="$small/filler" bs=1k count=$((avail_kb - 256)) status=none
elif [ "$(id -u)" != 0 ]; then
    mode="unwritable"
    step "not root: the history's directory made unwritable"
    chmod 0555 "$small"
else
    fail "cannot mount a tmpfs as root (mount -t tmpfs refused)"
fi

python3 - "$work/data" "$root/config/demo-token" "$small/history.sqlite" >"$work/h.toml" <<'PY'
import sys
data, token, file = sys.argv[1], sys.argv[2], sys.argv[3]
text = open("config/demo.toml").read()
def sub(old, new):
    global text
    assert old in text, old
    text = text.replace(old, new, 1)
sub('storage_dir = "../demo-data"', 'storage_dir = "%s"' % data)
sub('token_file = "demo-token"', 'token_file = "%s"' % token)
sub("[history]\n", '[history]\nfile = "%s"\n' % file)
assert "\ninterval_s = 1\n" in text, "the demo's [history] interval_s is no longer 1"
sub("spectrum_every_s = 20", "spectrum_every_s = 10")
print(text)
PY

write_errors() {
    curl -sf --max-time 5 "$bw/metrics" |
        awk '$1 == "bandwatch_history_records_dropped_total{reason=\"write_error\"}" { print $2 }'
}

step "start on the full disk ($mode)"
start_bandwatch "$bin" "$work/h.toml" "$work/bandwatch.log"
lost=0
for _ in $(seq 1 300); do
    lost="$(write_errors || echo 0)"
    [ "${lost:-0}" -gt 0 ] 2>/dev/null && break
    sleep 0.1
done
[ "${lost:-0}" -gt 0 ] || fail "no write_error drop counted within 30 s on a full disk"
spectra_a="$(metric_sum bandwatch_channel_spectra_total)"
sleep 3
spectra_b="$(metric_sum bandwatch_channel_spectra_total)"
[ "$spectra_b" -gt "$spectra_a" ] || fail "the DSP stopped publishing on a full history disk ($spectra_a -> $spectra_b)"
curl -sf --max-time 5 "$bw/api/v1/alarms" >/dev/null || fail "the alarm board does not answer"
[ -s "$work/data/journal/journal.jsonl" ] || fail "the journal (another disk) was not written"
n="$(grep -c 'history cannot be written' "$work/bandwatch.log" || true)"
[ "$n" = 1 ] || fail "the outage was logged $n times (want once)"
echo "   spectra published $spectra_a -> $spectra_b; $(write_errors) history records lost so far; logged once"

step "space returns: the history resumes by itself"
if [ "$mode" = tmpfs ]; then rm -f "$small/filler"; else chmod 0755 "$small"; fi
points0="$(metric_sum bandwatch_history_points_written_total)"
resumed=""
for _ in $(seq 1 200); do
    if grep -q 'history writes resumed' "$work/bandwatch.log"; then resumed=1; break; fi
    sleep 0.1
done
[ -n "$resumed" ] || fail "no 'history writes resumed' within 20 s of space returning"
for _ in $(seq 1 100); do
    [ "$(metric_sum bandwatch_history_points_written_total)" -gt "$points0" ] && break
    sleep 0.1
done
[ "$(metric_sum bandwatch_history_points_written_total)" -gt "$points0" ] || fail "no aggregate written after the recovery"
n="$(grep -c 'history writes resumed' "$work/bandwatch.log" || true)"
[ "$n" = 1 ] || fail "the recovery was logged $n times (want once)"
final_lost="$(write_errors)"
expect_clean_exit "$bw_pid"
bw_pid=""

step "the outage is in the file as holes"
python3 - "$small/history.sqlite" "$final_lost" <<'PY' || fail "history file check"
import sqlite3, sys
db, lost = sys.argv[1], int(sys.argv[2])
c = sqlite3.connect(db, timeout=5)
ic = c.execute("PRAGMA integrity_check").fetchall()
if ic != [("ok",)]:
    sys.exit("integrity_check: %r" % ic)
n, = c.execute("SELECT coalesce(sum(lost), 0) FROM holes WHERE reason = 'write_error'").fetchone()
if n != lost:
    sys.exit("holes hold %d lost records, the counter says %d" % (n, lost))
rows = c.execute("SELECT channel, t_from, t_to, lost FROM holes WHERE reason = 'write_error'").fetchall()
print("   %d write_error hole(s), %d records, e.g. %r; integrity ok" % (len(rows), n, rows[:2]))
PY
printf 'history_disk: OK (%s)\n' "$mode"
