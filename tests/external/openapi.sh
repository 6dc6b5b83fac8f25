#!/usr/bin/env bash
# The API contract against the real daemon: schemathesis (PyPI, pinned in
# tests/reference/requirements.txt) fuzzes every route the OpenAPI document
# at /api/v1/openapi.json describes and checks each response against it.
#
# 1. `bandwatch run` on the demo (config/demo.toml with its simulator 10
#    times faster, as page.sh does, so its BPFO alarm trips, latches and
#    stores captures within seconds) on 127.0.0.1:0, with a throwaway
#    state directory; waited for on /readyz and for a first capture;
# 2. the served document: openapi "3.1.0", every $ref resolves;
# 3. schemathesis runs, each bounded (--max-examples, timeout):
#    a. every GET operation of the served document as it is (random
#       channel names, ids: the 404s and 400s);
#    b. every GET operation of a copy whose path parameters are narrowed to
#       what the demo has (its channels, alarms, captures, page files), so
#       the 200 bodies of each endpoint are checked too;
#    c. the token-guarded POSTs (ack, relearn, reload) without the token
#       (401), and d. with it (`-H "Authorization: Bearer ..."`: acks,
#       re-learns and reloads on the throwaway state are fine);
#    checks: not_a_server_error, status_code_conformance,
#    content_type_conformance, response_schema_conformance. Any 5xx,
#    undocumented status or content type, or body that does not match its
#    schema fails the run;
# 4. SIGTERM: the daemon exits 0 within 10 s.
#
# Needs curl, python3 and schemathesis (.venv/bin/st, which .ci/run installs
# from tests/reference/requirements.txt; or SCHEMATHESIS=path), and a Rust
# toolchain (or BANDWATCH_BIN pointing at a built binary). Everything binds
# 127.0.0.1 only; every step is time-bounded (about 25 s after the build on
# 2 cores); whatever this script started is stopped on exit.
# Exit 0 on success, 1 on any failure.
# Usage: bash tests/external/openapi.sh
set -euo pipefail

root="$(cd "$(dirname "${BASH_SOURCE[0]}")/../.." && pwd)"
cd "$root"

work="$(mktemp -d "${TMPDIR:-/tmp}/bandwatch-openapi.XXXXXX")"
bw_pid=""

# stop_pid PID: TERM, wait up to 10 s, then KILL.
. "$root/tests/external/lib/common.bash"

cleanup() {
    stop_pid "$bw_pid"
    rm -rf "$work"
}
trap cleanup EXIT

step() { printf '== %s\n' "$*"; }
fail() {
    printf 'openapi: FAIL: %s\n' "$*" >&2
    if [ -s "$work/bandwatch.log" ]; then
        printf -- '--- last lines of bandwatch.log:\n' >&2
        tail -n 20 "$work/bandwatch.log" >&2
    fi
    exit 1
}

for tool in curl python3 timeout; do
    command -v "$tool" >/dev/null 2>&1 || fail "$tool not found (Debian: apt-get install -y curl python3)"
done
st="${SCHEMATHESIS:-}"
if [ -z "$st" ]; then
    if [ -x "$root/.venv/bin/st" ]; then
        st="$root/.venv/bin/st"
    else
        st="$(command -v st || true)"
    fi
fi
[ -n "$st" ] && [ -x "$st" ] \
    || fail "schemathesis not found: python3 -m venv .venv && .venv/bin/pip install -r tests/reference/requirements.txt"

find_bandwatch_bin

# ---------------------------------------------------------------------------
mkdir -p "$work/config"
sed 's/^seed = 2$/seed = 2\nspeed = 10.0/' config/demo.toml >"$work/config/demo.toml"
grep -q '^speed = 10.0$' "$work/config/demo.toml" || fail "could not speed up the demo's simulator"
cp config/demo-token "$work/config/demo-token"
token="$(cat config/demo-token)"

step "start bandwatch run --config (the demo, 10 times faster) --listen 127.0.0.1:0"
NO_COLOR=1 RUST_LOG=info "$bin" run --config "$work/config/demo.toml" --listen 127.0.0.1:0 \
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

step "wait for $bw/readyz (30 s) and a first capture (60 s)"
ready=""
for _ in $(seq 1 300); do
    if [ "$(curl -s -o /dev/null -w '%{http_code}' --max-time 2 "$bw/readyz" || true)" = 200 ]; then
        ready=1
        break
    fi
    sleep 0.1
done
[ -n "$ready" ] || fail "bandwatch not ready within 30 s"
captured=""
for _ in $(seq 1 120); do
    if curl -sf --max-time 2 "$bw/api/v1/events" | grep -q '"captures":\[{'; then
        captured=1
        break
    fi
    sleep 0.5
done
[ -n "$captured" ] || fail "the fast demo stored no capture within 60 s"

# ---------------------------------------------------------------------------
step "GET /api/v1/openapi.json: OpenAPI 3.1.0, every \$ref resolves"
curl -sf --max-time 5 -o "$work/openapi.json" "$bw/api/v1/openapi.json" \
    || fail "GET /api/v1/openapi.json failed"
for p in /api/v1/channels /api/v1/alarms /api/v1/events /; do
    curl -sf --max-time 5 -o "$work/$(echo "$p" | tr -c 'a-z0-9\n' _).body" "$bw$p" || fail "GET $p failed"
done
# The narrowed copy: path parameters limited to what the demo has.
python3 - "$work" <<'EOF' || fail "the document is not a valid OpenAPI 3.1 document (above)"
import json, re, sys
work = sys.argv[1]
doc = json.load(open(f"{work}/openapi.json"))
assert doc.get("openapi") == "3.1.0", f"openapi is {doc.get('openapi')!r}"

def refs(v):
    if isinstance(v, dict):
        for k, x in v.items():
            if k == "$ref":
                yield x
            else:
                yield from refs(x)
    elif isinstance(v, list):
        for x in v:
            yield from refs(x)

for r in refs(doc):
    assert r.startswith("#/"), f"external $ref {r}"
    node = doc
    for part in r[2:].split("/"):
        assert isinstance(node, dict) and part in node, f"$ref {r} does not resolve"
        node = node[part]
n_ops = sum(len(v) for v in doc["paths"].values())
print(f"   openapi {doc['openapi']}, {len(doc['paths'])} paths, {n_ops} operations, "
      f"{len(doc['components']['schemas'])} schemas, every $ref resolves")

channels = [c["name"] for c in json.load(open(f"{work}/_api_v1_channels.body"))["channels"]]
alarms = json.load(open(f"{work}/_api_v1_alarms.body"))["alarms"]
captures = [c["id"] for c in json.load(open(f"{work}/_api_v1_events.body"))["captures"]]
page = open(f"{work}/_.body").read()
assets = sorted(set(re.findall(r"/assets/([A-Za-z0-9_.-]+)", page)))
values = {
    "name": channels,
    "channel": sorted({a["channel"] for a in alarms}),
    "band": sorted({a["band"] for a in alarms}),
    "id": captures,
}
for path, item in doc["paths"].items():
    for op in item.values():
        for p in op.get("parameters", []):
            if p["in"] != "path":
                continue
            v = assets if path.startswith("/assets/") else values[p["name"]]
            assert v, f"the demo has no value for {path} {p['name']}"
            p["schema"] = {"type": "string", "enum": v}
json.dump(doc, open(f"{work}/narrowed.json", "w"))
print(f"   narrowed copy: {len(channels)} channels, {len(alarms)} alarms, "
      f"{len(captures)} captures, {len(assets)} page files")
EOF

checks="not_a_server_error,status_code_conformance,content_type_conformance,response_schema_conformance"
# run_st NAME LOCATION ARGS...: one bounded schemathesis run; its report
# goes to $work/NAME.log (shown on failure).
run_st() {
    local name="$1" location="$2"
    shift 2
    step "schemathesis: $name"
    # One worker: with two, schemathesis' threads can import its lazily
    # loaded modules at once, which CPython 3.11 answers with a
    # SystemError ("AST constructor recursion depth mismatch") now and
    # then: a flake of the tool, not of the API.
    if ! (cd "$work" && timeout 240 "$st" run "$location" --url "$bw" --checks "$checks" \
        --max-examples 15 --seed 16 --workers 1 --request-timeout 20 \
        --warnings off --no-color "$@" >"$work/$name.log" 2>&1); then
        cat "$work/$name.log" >&2
        fail "schemathesis found failures in $name (above)"
    fi
    grep -E '^  [0-9]+ generated' "$work/$name.log" | sed 's/^/   /' || true
    kill -0 "$bw_pid" 2>/dev/null || fail "bandwatch died during $name"
}

run_st "GET, the served document" "$bw/api/v1/openapi.json" --include-method GET
run_st "GET, path parameters the demo has" "$work/narrowed.json" --include-method GET
run_st "POST without the token" "$work/narrowed.json" --include-method POST
run_st "POST with the token" "$work/narrowed.json" --include-method POST \
    --header "Authorization: Bearer $token"
grep -q 'config reloaded' "$work/bandwatch.log" || fail "no reload reached the daemon with the token"
curl -sf --max-time 5 "$bw/api/v1/events" | grep -q '"kind":"ack"' \
    || fail "no acknowledge reached the latched BPFO alarm with the token"
echo "   the token's reloads and acknowledges reached the daemon"

# ---------------------------------------------------------------------------
step "SIGTERM bandwatch: clean exit within 10 s"
expect_clean_exit "$bw_pid"
bw_pid=""
echo "   exited 0"

echo "openapi: OK"
