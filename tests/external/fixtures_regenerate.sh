#!/usr/bin/env bash
# Rebuilds the reference fixtures from scratch and checks that they are the
# committed ones, byte for byte.
#
# - makes a fresh virtual environment in a temporary directory,
# - pip installs tests/reference/requirements.txt (numpy and scipy, pinned;
#   bcrypt there is for tests/external/prometheus_tls.sh),
# - runs tests/reference/make_fixtures.py into another temporary directory,
# - compares with tests/reference/fixtures: exit 0 if identical, 1 with a
#   summary of the differences otherwise, 2 if a step failed or timed out.
#
# Needs python3 (with venv) and access to PyPI. Each step is time-bounded
# (PIP_TIMEOUT_SECS, default 600; GEN_TIMEOUT_SECS, default 120).
# Usage: bash tests/external/fixtures_regenerate.sh
set -euo pipefail

root="$(cd "$(dirname "${BASH_SOURCE[0]}")/../.." && pwd)"
ref="$root/tests/reference"
pip_timeout="${PIP_TIMEOUT_SECS:-600}"
gen_timeout="${GEN_TIMEOUT_SECS:-120}"

work="$(mktemp -d "${TMPDIR:-/tmp}/bandwatch-fixtures.XXXXXX")"
trap 'rm -rf "$work"' EXIT

step() { printf '== %s\n' "$*"; }
fail() { printf 'fixtures_regenerate: %s\n' "$*" >&2; exit 2; }

step "venv in $work/venv"
timeout 120 python3 -m venv "$work/venv" || fail "cannot create a venv (python3 -m venv)"
py="$work/venv/bin/python"

step "pip install -r tests/reference/requirements.txt"
timeout "$pip_timeout" "$py" -m pip install --quiet --disable-pip-version-check \
    --no-input -r "$ref/requirements.txt" || fail "pip install failed or timed out"
"$py" -c 'import numpy, scipy; print("   numpy", numpy.__version__, "scipy", scipy.__version__)'

step "make_fixtures.py -> $work/out"
timeout "$gen_timeout" "$py" "$ref/make_fixtures.py" "$work/out" \
    || fail "make_fixtures.py failed or timed out"

step "compare with tests/reference/fixtures"
if diff -r -q "$ref/fixtures" "$work/out" >"$work/diff.txt"; then
    count="$(find "$work/out" -type f | wc -l)"
    echo "   identical: $count files"
    exit 0
fi

echo "fixtures differ from a fresh run:" >&2
cat "$work/diff.txt" >&2
# Per differing file: which fields changed and by how much.
"$py" - "$ref/fixtures" "$work/out" >&2 <<'PY' || true
import json, os, sys

old_dir, new_dir = sys.argv[1], sys.argv[2]
names = sorted(set(os.listdir(old_dir)) | set(os.listdir(new_dir)))

def walk(a, b, path, out):
    if isinstance(a, dict) and isinstance(b, dict):
        for k in sorted(set(a) | set(b)):
            if k not in a or k not in b:
                out.append(f"{path}.{k}: only in {'new' if k not in a else 'committed'}")
            else:
                walk(a[k], b[k], f"{path}.{k}", out)
    elif isinstance(a, list) and isinstance(b, list) and len(a) == len(b):
        nums = all(isinstance(x, (int, float)) for x in a + b)
        if nums:
            diff = [(i, x, y) for i, (x, y) in enumerate(zip(a, b)) if x != y]
            if diff:
                worst = max(abs(x - y) / max(abs(x), abs(y), 1e-300) for _, x, y in diff)
                out.append(f"{path}: {len(diff)} of {len(a)} numbers differ, worst rel {worst:.2e}")
        else:
            for i, (x, y) in enumerate(zip(a, b)):
                walk(x, y, f"{path}[{i}]", out)
    elif a != b:
        out.append(f"{path}: {str(a)[:60]!r} -> {str(b)[:60]!r}")

for name in names:
    p, q = os.path.join(old_dir, name), os.path.join(new_dir, name)
    if not os.path.exists(p) or not os.path.exists(q):
        print(f"  {name}: only in {'fresh run' if not os.path.exists(p) else 'committed'}")
        continue
    if open(p, "rb").read() == open(q, "rb").read():
        continue
    out = []
    try:
        walk(json.load(open(p)), json.load(open(q)), "", out)
    except ValueError as e:
        out.append(f"not JSON: {e}")
    print(f"  {name}: " + ("bytes differ, same values" if not out else ""))
    for line in out[:20]:
        print(f"    {line}")
    if len(out) > 20:
        print(f"    ... {len(out) - 20} more")
PY
exit 1
