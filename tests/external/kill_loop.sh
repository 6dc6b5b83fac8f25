#!/usr/bin/env bash
# The SIGKILL loop (issue 13): the real daemon, with alarms that trip all
# the time and captures on, is killed with SIGKILL 30 times at random
# moments (most of them inside a capture's post-trigger window, since a
# capture is nearly always being collected) and started again each time.
#
# Config: config/demo.toml (simulated pump P2 in real time) with
# - motor-de: a non-latching overall-RMS alert at the channel's own median
#   RMS (measured in a first run), no delays, one block per result (a
#   result every 80 ms): it trips every few results, and every rising edge
#   starts a capture (1 s before, 2 s after);
# - pump-nde: a latching overall-RMS alarm far below the signal: latched
#   danger in the first run, acknowledged through the API, and never
#   changing after that (so what a restart shows can be compared with the
#   journal).
#
# Checked after every kill and restart:
# - the journal parses: every line is a whole event or is refused (a torn
#   line never parses as an event), seq strictly increasing, at most one
#   torn line per kill;
# - no capture under its final name is half-written: every <id>.json
#   parses and its waveform has the size the metadata states;
# - the latch and acknowledge of pump-nde's alarm, as the restarted daemon
#   first shows them, equal the last journaled ones.
# At the end (one more start):
# - every capture any journal event names is on disk and complete, or
#   recorded lost (with a reason) or pruned; the API's events carry the
#   same status, and GET /api/v1/events/<lost id> says lost and why;
# - the counters after restart are sane: storage write errors and lost
#   records 0, nothing dropped from the I/O queue, journal events written;
# - SIGTERM stops the daemon with exit 0.
#
# Needs curl, python3 and a Rust toolchain (or BANDWATCH_BIN pointing at a
# built binary). Everything binds 127.0.0.1; every wait is bounded; the
# whole run takes under 3 minutes; whatever this script started is stopped
# on exit. Exit 0 on success, 1 on any failure.
# Usage: bash tests/external/kill_loop.sh [kills]
set -euo pipefail

root="$(cd "$(dirname "${BASH_SOURCE[0]}")/../.." && pwd)"
cd "$root"

kills="${1:-30}"
work="$(mktemp -d "${TMPDIR:-/tmp}/bandwatch-kill.XXXXXX")"
bw_pid=""
started_at=$SECONDS

# stop_pid PID: TERM, wait up to 10 s, then KILL.
. "$root/tests/external/lib/common.bash"

cleanup() {
    stop_pid "$bw_pid"
    rm -rf "$work"
}
trap cleanup EXIT

step() { printf '== %s\n' "$*"; }
fail() { fail_with_daemon_log kill_loop "$*"; }

for tool in curl python3 timeout; do
    command -v "$tool" >/dev/null 2>&1 || fail "$tool not found"
done

find_bandwatch_bin

data="$work/data"
token="$(tr -d '\n' <config/demo-token)"

# write_config <motor-de alert limit>
write_config() {
    python3 - "$1" "$data" "$root/config/demo-token" >"$work/kill.toml" <<'EOF'
import sys
limit, data, token = sys.argv[1], sys.argv[2], sys.argv[3]
text = open("config/demo.toml").read()
def sub(old, new):
    global text
    assert old in text, old
    text = text.replace(old, new, 1)
sub('storage_dir = "../demo-data"', 'storage_dir = "%s"' % data)
sub('token_file = "demo-token"', 'token_file = "%s"' % token)
sub("capture_pre_s = 3.0", "capture_pre_s = 1.0")
# motor-de (the first channel): a result per hop (80 ms) instead of one per
# four blocks, so that in a run of 0.3 to 2 s its RMS crosses the median
# many times. With four averages a run saw about two results after health
# released the alarm, mostly inhibited -> alert (a release, which starts no
# capture), and some whole loops had no rising edge at all.
sub('averaging = { mode = "linear", count = 4 }', 'averaging = { mode = "linear", count = 1 }')
sub(
    "overall_alarm = { rms = { alert = { limit = 0.5 }, danger = { limit = 1.0 }, on_delay_s = 2.0 } }",
    "overall_alarm = { rms = { alert = { limit = %s }, danger = { limit = 1000.0 } } }" % limit,
)
# Healthy 0.2 s after data flows (default 5 s: longer than a run here).
sub(
    "health = { flatline = { std_below = 0.0001, for_s = 2.0 }, clipping = { full_scale = 50.0 } }",
    "health = { recover_s = 0.2 }",
)
sub(
    'name = "pump-nde"\n',
    'name = "pump-nde"\n'
    "health = { recover_s = 0.2 }\n"
    "overall_alarm = { rms = { latching = true, alert = { limit = 1e-6 }, danger = { limit = 2e-6 } } }\n",
)
print(text)
EOF
}

# start_daemon: starts it (log in $work/bandwatch.log), sets $bw.
start_daemon() {
    : >"$work/bandwatch.log"
    NO_COLOR=1 RUST_LOG=info "$bin" run --config "$work/kill.toml" --listen 127.0.0.1:0 \
        >>"$work/bandwatch.log" 2>&1 &
    bw_pid=$!
    bw=""
    for _ in $(seq 1 150); do
        kill -0 "$bw_pid" 2>/dev/null || fail "bandwatch exited at start"
        bw="$(grep -o 'http://127\.0\.0\.1:[0-9]*' "$work/bandwatch.log" | head -n 1 || true)"
        [ -n "$bw" ] && return 0
        sleep 0.1
    done
    fail "bandwatch did not log its listen address within 15 s"
}

wait_ready() {
    for _ in $(seq 1 300); do
        if [ "$(curl -s -o /dev/null -w '%{http_code}' --max-time 2 "$bw/readyz" || true)" = 200 ]; then
            return 0
        fi
        sleep 0.1
    done
    fail "bandwatch not ready within 30 s"
}

# The storage checks, on the files (daemon stopped or killed).
# check_files <kills so far>
check_files() {
    python3 - "$data" "$1" <<'EOF' || fail "storage check after kill $2"
import json, os, sys
data, kills = sys.argv[1], int(sys.argv[2])
jdir = os.path.join(data, "journal")
files = sorted(
    (int(n.split(".")[1]), n) for n in os.listdir(jdir) if n.startswith("journal.") and n.count(".") == 2
)
order = [n for _, n in sorted(files, reverse=True)] + (["journal.jsonl"] if os.path.exists(os.path.join(jdir, "journal.jsonl")) else [])
events, bad = [], 0
for n in order:
    for line in open(os.path.join(jdir, n), "rb").read().split(b"\n"):
        if not line.strip():
            continue
        try:
            e = json.loads(line)
        except ValueError:
            bad += 1
            continue
        # A whole event has every field a journal line always carries.
        for k in ("seq", "time", "unix_ns", "channel", "kind"):
            if k not in e:
                sys.exit("journal line without %s accepted as JSON: %r" % (k, line[:120]))
        events.append(e)
if bad > kills:
    sys.exit("%d bad journal lines after %d kills" % (bad, kills))
seqs = [e["seq"] for e in events]
if any(b <= a for a, b in zip(seqs, seqs[1:])):
    sys.exit("journal seq not strictly increasing")
cdir = os.path.join(data, "captures")
for n in os.listdir(cdir) if os.path.isdir(cdir) else []:
    if not n.endswith(".json"):
        continue
    meta = json.load(open(os.path.join(cdir, n)))
    wave = os.path.join(cdir, meta["waveform"]["file"])
    if not os.path.exists(wave):
        sys.exit("capture %s: metadata without its waveform" % n)
    if os.path.getsize(wave) != meta["waveform"]["bytes"]:
        sys.exit("capture %s: waveform %d bytes, metadata says %d" % (n, os.path.getsize(wave), meta["waveform"]["bytes"]))
print("   journal: %d events, %d torn line(s) refused; captures whole" % (len(events), bad))
EOF
}

# The latch and ack pump-nde's alarm last journaled: "latched ack" or "none".
journal_memory() {
    python3 - "$data/journal" <<'EOF'
import json, os, sys
jdir = sys.argv[1]
if not os.path.isdir(jdir):
    print("none"); sys.exit()
files = sorted((int(n.split(".")[1]), n) for n in os.listdir(jdir) if n.startswith("journal.") and n.count(".") == 2)
order = [n for _, n in sorted(files, reverse=True)] + ["journal.jsonl"]
mem = "none"
for n in order:
    p = os.path.join(jdir, n)
    if not os.path.exists(p):
        continue
    for line in open(p, "rb").read().split(b"\n"):
        try:
            e = json.loads(line)
        except ValueError:
            continue
        if e.get("channel") == "pump-nde" and e.get("band") == "overall-rms" and "latched" in e:
            # The API shows the latch as a bool (the state shows its level).
            mem = "%s %s" % (str(e["latched"] != "normal").lower(), str(e.get("acknowledged", False)).lower())
print(mem)
EOF
}

# The latch and ack the API first shows for pump-nde's alarm (waits up to
# 10 s for the first board): "latched ack".
api_memory() {
    for _ in $(seq 1 200); do
        m="$(curl -s --max-time 2 "$bw/api/v1/alarms" | python3 -c '
import json, sys
try:
    d = json.load(sys.stdin)
except ValueError:
    sys.exit()
for a in d["alarms"]:
    if a["channel"] == "pump-nde" and a["band"] == "overall-rms" and a["latched"] is not None:
        print(str(a["latched"]).lower(), str(a["acknowledged"]).lower())
' || true)"
        if [ -n "$m" ]; then
            echo "$m"
            return 0
        fi
        sleep 0.05
    done
    fail "no alarm board for pump-nde within 10 s"
}

# wait_state <channel> <band> <state>: up to 3 s for the alarm to show it.
wait_state() {
    for _ in $(seq 1 60); do
        st="$(curl -s --max-time 2 "$bw/api/v1/alarms" | python3 -c '
import json, sys
try:
    d = json.load(sys.stdin)
except ValueError:
    sys.exit()
for a in d["alarms"]:
    if a["channel"] == sys.argv[1] and a["band"] == sys.argv[2]:
        print(a["state"])
' "$1" "$2" || true)"
        [ "$st" = "$3" ] && return 0
        sleep 0.05
    done
    return 1
}

# ---------------------------------------------------------------------------
step "measure motor-de's overall RMS (the alert limit that trips all the time)"
write_config 500.0
start_daemon
wait_ready
rms="$(python3 - "$bw" <<'EOF'
import json, statistics, sys, time, urllib.request
vals = []
for _ in range(15):
    with urllib.request.urlopen(sys.argv[1] + "/api/v1/channels/motor-de", timeout=5) as r:
        vals.append(json.load(r)["overall"]["rms"])
    time.sleep(0.1)
print(statistics.median(vals))
EOF
)" || fail "cannot read motor-de's overall RMS"
stop_pid "$bw_pid"
wait "$bw_pid" 2>/dev/null || true
bw_pid=""
rm -rf "$data"
echo "   median overall RMS $rms g: the alert limit"
write_config "$rms"

# ---------------------------------------------------------------------------
step "$kills SIGKILLs at random moments"
# The loop's own time bound starts here: the build and the measurement
# before it take as long as the machine needs (minutes on a fresh CI box).
started_at=$SECONDS
acked=0
ack_restored=0
for i in $(seq 1 "$kills"); do
    expect="$(journal_memory)"
    start_daemon
    shown="$(api_memory)"
    # A latch is shown from the start, as journaled (a restarted channel
    # is inhibited first, so nothing new is journaled before this).
    if [ "$expect" != "none" ] && [ "$shown" != "$expect" ]; then
        now="$(journal_memory)"
        [ "$shown" = "$now" ] \
            || fail "run $i: pump-nde alarm shows '$shown', journal said '$expect' (now '$now')"
    fi
    [ "$shown" = "true true" ] && [ "$expect" = "true true" ] && ack_restored=$((ack_restored + 1))
    # Acknowledge the latched alarm when a run starts with it latched and
    # unacknowledged, once it shows danger again (an ack while inhibited
    # would clear the latch: the condition is not present then).
    if [ "$shown" = "true false" ] && wait_state pump-nde overall-rms danger; then
        code="$(curl -s -o /dev/null -w '%{http_code}' --max-time 5 -X POST \
            -H "Authorization: Bearer $token" "$bw/api/v1/alarms/pump-nde/overall-rms/ack" || true)"
        [ "$code" = 200 ] && acked=1
    fi
    # Live 0.3 to 3.5 s: trips, captures being collected and written. The
    # simulator starts over at every start (same seed), so every run sees
    # the same signal: released into alert, cleared, then the first rising
    # edge near 1.9 s after the start (as measured here); runs up to 2.0 s
    # saw it in about one run in ten, and some loops had none at all.
    sleep "$(python3 -c 'import random; print(round(random.uniform(0.3, 3.5), 2))')"
    kill -KILL "$bw_pid" 2>/dev/null || fail "run $i: daemon died before its kill"
    wait "$bw_pid" 2>/dev/null || true
    bw_pid=""
    check_files "$i"
    [ $((SECONDS - started_at)) -lt 170 ] || fail "too slow: $((SECONDS - started_at)) s after $i kills"
done
[ "$acked" = 1 ] || fail "pump-nde's alarm never latched danger to acknowledge"
[ "$ack_restored" -gt 0 ] || fail "no restart found an acknowledged latch to restore"
echo "   latched and acknowledged as journaled at $ack_restored restart(s)"

# ---------------------------------------------------------------------------
step "restart: every capture accounted for, counters sane"
expect="$(journal_memory)"
start_daemon
shown="$(api_memory)"
[ "$shown" = "$expect" ] || [ "$shown" = "$(journal_memory)" ] \
    || fail "pump-nde alarm shows '$shown', journal said '$expect'"
[ "${expect%% *}" = true ] || fail "the latch was not journaled: '$expect'"
wait_ready
python3 - "$bw" "$data" "$started_at" <<'EOF' || fail "captures or counters"
import json, os, sys, urllib.request, urllib.error
bw, data = sys.argv[1], sys.argv[2]
def get(path):
    with urllib.request.urlopen(bw + path, timeout=5) as r:
        return json.load(r)
# Every capture any journaled event names: on disk and complete, or
# recorded lost (with a reason) or pruned.
jdir, cdir = os.path.join(data, "journal"), os.path.join(data, "captures")
named, records = [], {}
for n in sorted(os.listdir(jdir)):
    for line in open(os.path.join(jdir, n), "rb").read().split(b"\n"):
        try:
            e = json.loads(line)
        except ValueError:
            continue
        if not e.get("capture"):
            continue
        if e["kind"] == "capture":
            records[e["capture"]] = (e["cause"], e.get("detail"))
        else:
            named.append(e["capture"])
stored = lost = pruned = 0
for cid in named:
    meta_path = os.path.join(cdir, cid + ".json")
    if os.path.exists(meta_path):
        meta = json.load(open(meta_path))
        wave = os.path.join(cdir, meta["waveform"]["file"])
        assert os.path.getsize(wave) == meta["waveform"]["bytes"], cid
        stored += 1
    elif cid in records:
        cause, detail = records[cid]
        assert cause in ("lost", "pruned"), (cid, cause)
        if cause == "lost":
            assert detail, ("lost without a reason", cid)
            lost += 1
        else:
            pruned += 1
    else:
        # Only a capture of this very run may still be collected.
        ev = get("/api/v1/events")["events"]
        st = [e.get("capture_status") for e in ev if e.get("capture") == cid]
        assert st and st[-1] == "pending", ("capture neither on disk nor accounted for", cid, st)
print("   %d captures named: %d stored, %d lost (with reasons), %d pruned" % (len(named), stored, lost, pruned))
assert lost > 0, "no kill landed in a post-trigger window: the loop tested nothing"
# The API says the same.
body = get("/api/v1/events")
for e in body["events"]:
    if not e.get("capture"):
        continue
    st = e.get("capture_status")
    assert st in ("stored", "pending", "lost", "pruned"), e
    if st == "lost":
        assert e.get("capture_lost_reason"), e
lost_ids = [l["id"] for l in body["lost_captures"]]
assert lost_ids, "API lists no lost capture"
try:
    get("/api/v1/events/" + lost_ids[-1])
    raise AssertionError("a lost capture was served")
except urllib.error.HTTPError as err:
    assert err.code == 404, err.code
    b = json.load(err)
    assert b["capture_status"] == "lost" and b["capture_lost_reason"], b
# Counters after restart: nothing failed, nothing dropped, events written.
text = urllib.request.urlopen(bw + "/metrics", timeout=5).read().decode()
vals = {}
for line in text.splitlines():
    if line and not line.startswith("#"):
        name, v = line.rsplit(" ", 1)
        vals[name] = float(v)
        assert v not in ("NaN", "-Inf", "+Inf") or "_total" not in name, line
        if name.split("{")[0].endswith("_total"):
            assert float(v) >= 0, line
for k in ("events", "captures", "baselines"):
    assert vals['bandwatch_storage_write_errors_total{kind="%s"}' % k] == 0
    assert vals['bandwatch_storage_records_lost_total{kind="%s"}' % k] == 0
    assert vals['bandwatch_alarm_records_dropped_total{kind="%s"}' % k] == 0
assert vals["bandwatch_alarm_write_errors_total"] == 0
assert vals['bandwatch_alarm_records_written_total{kind="events"}'] > 0
print("   API agrees; counters sane")
EOF

step "SIGTERM: exit 0 within 10 s"
kill -TERM "$bw_pid"
rc=""
for _ in $(seq 1 100); do
    if ! kill -0 "$bw_pid" 2>/dev/null; then
        wait "$bw_pid" && rc=0 || rc=$?
        break
    fi
    sleep 0.1
done
bw_pid_done="$bw_pid"
bw_pid=""
[ "$rc" = 0 ] || fail "daemon $bw_pid_done exited with '$rc' after SIGTERM"
check_files "$kills"
echo "kill_loop: ok ($kills kills in $((SECONDS - started_at)) s)"
