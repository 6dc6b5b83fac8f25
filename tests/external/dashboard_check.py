#!/usr/bin/env python3
"""Checks deploy/grafana/bandwatch.json (Python standard library only).

  dashboard_check.py structure DASHBOARD
      The dashboard's structural rules (listed in RULES below); exit 1 and
      every broken rule printed if any is broken.

  dashboard_check.py selftest DASHBOARD
      Breaks each structural rule in turn in a copy of the dashboard
      (MUTATIONS) and fails unless the structure check reports every one.

  dashboard_check.py queries DASHBOARD --prom URL --var NAME=VALUE ... [--wait S]
      Substitutes the template variables (and Grafana's built-in interval
      variables) in every PromQL expression of the dashboard and runs each
      as an instant query against a real Prometheus's HTTP API: each must
      parse and return at least one series. The label_values() queries of
      the template variables are run through the series API and must find
      at least one value. Queries that read a metric of PENDING_METRICS may
      come back empty (with a printed note) until bandwatch exposes that
      metric; they must still parse. Retries the empty ones for up to
      --wait seconds (the demo's first scrapes), then exit 1 naming each
      query that failed.

  dashboard_check.py rule-metrics RULES EXPOSITION
      Every bandwatch_* metric name in the `expr:` of the alert rules file
      RULES (deploy/prometheus-rules.yml) must have a `# TYPE` line in
      EXPOSITION (a scrape of the running demo's /metrics): the rules read
      series bandwatch really exposes. Exit 1 naming each missing one.

No Grafana server is used: what Grafana itself does with the JSON is not
tested here. Grafana's variable syntax ($name, ${name}, ${name:format},
[[name]]) and built-ins ($__rate_interval, $__interval, ...) are from
Grafana's documentation as remembered, not checked against a server.
"""

import json
import re
import sys
import time
import urllib.error
import urllib.parse
import urllib.request

GRID_COLUMNS = 24  # Grafana's dashboard grid is 24 columns wide.
DATASOURCE = {"type": "prometheus", "uid": "${datasource}"}

# Metrics the dashboard reads that bandwatch does not expose yet. A query on
# one of them may return no series (a note is printed for each); it must
# still parse. Remove a name once bandwatch exposes it (the check prints a
# reminder when one returns data).
PENDING_METRICS = []

# Stand-ins for Grafana's built-in variables when a query is run by hand.
BUILTINS = {
    "__rate_interval": "1m",
    "__interval": "15s",
    "__interval_ms": "15000",
    "__range": "5m",
    "__range_s": "300",
    "__range_ms": "300000",
}

RULES = [
    "the file is a JSON object with uid, title, an integer schemaVersion, panels and templating.list",
    "no __inputs section (an import-time feature; file provisioning does not fill it in)",
    "panel ids are positive integers, unique across the dashboard (rows' nested panels included)",
    "each panel's gridPos has integer x, y, w, h with x >= 0, y >= 0, w >= 1, h >= 1 and x + w <= 24",
    "no two panels' grid rectangles overlap",
    "a row panel spans the whole width (x 0, w 24) and is 1 high",
    "every panel that is not a row has targets, and uses the datasource variable "
    '{"type": "prometheus", "uid": "${datasource}"}, as does each of its targets',
    "every target has a non-empty expr and a refId unique within its panel",
    "a template variable named datasource of type datasource for prometheus exists; "
    "every query variable uses the datasource variable",
    "every variable referenced (in exprs, legends, titles, descriptions, variable queries) "
    "is defined or one of Grafana's built-ins",
    "every defined variable is referenced somewhere other than its own definition",
    "variable names are unique",
]

VAR_REF = re.compile(r"\$\{([A-Za-z_][A-Za-z0-9_]*)(?::[A-Za-z]+)?\}|\$([A-Za-z_][A-Za-z0-9_]*)|\[\[([A-Za-z_][A-Za-z0-9_]*)\]\]")
LABEL_VALUES = re.compile(r"^\s*label_values\((.*),\s*([A-Za-z_][A-Za-z0-9_]*)\s*\)\s*$", re.S)


def all_panels(dash):
    """Every panel, the ones nested in collapsed rows included."""
    for p in dash.get("panels", []):
        yield p
        for q in p.get("panels", []) or []:
            yield q


def var_refs(text):
    return {a or b or c for a, b, c in VAR_REF.findall(text or "")}


def var_query(v):
    q = v.get("query", "")
    if isinstance(q, dict):
        q = q.get("query", "")
    return q or v.get("definition", "")


def check_structure(dash):
    problems = []
    if not isinstance(dash, dict):
        return ["the file is not a JSON object"]
    for key in ("uid", "title"):
        if not isinstance(dash.get(key), str) or not dash.get(key):
            problems.append(f"missing or empty {key}")
    if not isinstance(dash.get("schemaVersion"), int):
        problems.append("schemaVersion is not an integer")
    if not isinstance(dash.get("panels"), list) or not dash["panels"]:
        problems.append("no panels")
    variables = dash.get("templating", {}).get("list")
    if not isinstance(variables, list):
        problems.append("no templating.list")
        variables = []
    if "__inputs" in dash:
        problems.append("__inputs present: provisioning does not resolve it; use the datasource variable")

    panels = list(all_panels(dash))
    top = {id(p) for p in dash.get("panels", [])}
    ids = {}
    rects = []
    for p in panels:
        pid = p.get("id")
        name = f"panel {pid} ({p.get('title', '?')!r})"
        if not isinstance(pid, int) or isinstance(pid, bool) or pid <= 0:
            problems.append(f"{name}: id is not a positive integer")
        elif pid in ids:
            problems.append(f"{name}: id also used by {ids[pid]!r}")
        else:
            ids[pid] = p.get("title", "?")
        g = p.get("gridPos", {})
        vals = [g.get(k) for k in ("x", "y", "w", "h")]
        if not all(isinstance(v, int) and not isinstance(v, bool) for v in vals):
            problems.append(f"{name}: gridPos {g} lacks integer x, y, w, h")
            continue
        x, y, w, h = vals
        if x < 0 or y < 0 or w < 1 or h < 1 or x + w > GRID_COLUMNS:
            problems.append(f"{name}: gridPos {g} outside the {GRID_COLUMNS}-column grid")
        if p.get("type") == "row" and (x != 0 or w != GRID_COLUMNS or h != 1):
            problems.append(f"{name}: a row must be at x 0, {GRID_COLUMNS} wide, 1 high")
        # Nested panels of a collapsed row are laid out when it opens: they
        # are checked for ids and datasources, not for overlap.
        if id(p) in top:
            rects.append((name, x, y, w, h))
        if p.get("type") == "row":
            continue
        if p.get("datasource") != DATASOURCE:
            problems.append(f"{name}: datasource is {p.get('datasource')!r}, not {DATASOURCE}")
        targets = p.get("targets")
        if not targets:
            problems.append(f"{name}: no targets")
            continue
        refs = set()
        for t in targets:
            if t.get("datasource") != DATASOURCE:
                problems.append(f"{name} target {t.get('refId')}: datasource is {t.get('datasource')!r}")
            if not isinstance(t.get("expr"), str) or not t["expr"].strip():
                problems.append(f"{name} target {t.get('refId')}: empty expr")
            if not t.get("refId") or t.get("refId") in refs:
                problems.append(f"{name}: refId {t.get('refId')!r} missing or repeated")
            refs.add(t.get("refId"))
    for i, (na, xa, ya, wa, ha) in enumerate(rects):
        for nb, xb, yb, wb, hb in rects[i + 1:]:
            if xa < xb + wb and xb < xa + wa and ya < yb + hb and yb < ya + ha:
                problems.append(f"{na} overlaps {nb}")

    defined = {}
    for v in variables:
        n = v.get("name")
        if n in defined:
            problems.append(f"variable {n!r} defined twice")
        defined[n] = v
    ds = defined.get("datasource")
    if not ds or ds.get("type") != "datasource" or ds.get("query") != "prometheus":
        problems.append("no variable 'datasource' of type datasource with query prometheus")
    for n, v in defined.items():
        if v.get("type") == "query" and v.get("datasource") != DATASOURCE:
            problems.append(f"variable {n!r}: datasource is {v.get('datasource')!r}, not {DATASOURCE}")

    # Where each variable is referenced.
    uses = {}

    def note(text, where):
        for r in var_refs(text):
            uses.setdefault(r, set()).add(where)

    note(dash.get("title"), "dashboard title")
    for p in panels:
        where = f"panel {p.get('id')}"
        note(p.get("title"), where)
        note(p.get("description"), where)
        note(json.dumps(p.get("datasource")), where)
        for t in p.get("targets", []) or []:
            note(t.get("expr"), where)
            note(t.get("legendFormat"), where)
            note(json.dumps(t.get("datasource")), where)
    for n, v in defined.items():
        note(var_query(v), f"variable {n}")
        note(json.dumps(v.get("datasource")), f"variable {n}")
    for r, where in sorted(uses.items()):
        if r not in defined and not r.startswith("__"):
            problems.append(f"variable ${r} used ({', '.join(sorted(where))}) but not defined")
    for n in defined:
        if not uses.get(n, set()) - {f"variable {n}"}:
            problems.append(f"variable {n!r} defined but never used")
    return problems


def _first(dash, kind):
    return next(p for p in dash["panels"] if (p.get("type") == "row") == (kind == "row"))


# Controls: each breaks one rule in a copy of the dashboard; the structure
# check must report every one (so it is shown able to fail).
MUTATIONS = {
    "repeated panel id": lambda d: _first(d, "panel").update(id=d["panels"][-1]["id"]),
    "panel past column 24": lambda d: _first(d, "panel")["gridPos"].update(x=20, w=8),
    "overlapping panels": lambda d: d["panels"][-1]["gridPos"].update(dict(d["panels"][-2]["gridPos"])),
    "panel with a fixed datasource": lambda d: _first(d, "panel").update(datasource={"type": "prometheus", "uid": "prom1"}),
    "target with a fixed datasource": lambda d: _first(d, "panel")["targets"][0].update(datasource={"uid": "prom1"}),
    "undefined variable": lambda d: _first(d, "panel")["targets"][0].update(expr="up{job=~\"$nosuch\"}"),
    "unused variable": lambda d: d["templating"]["list"].append(
        {"type": "query", "name": "unused", "datasource": DATASOURCE, "query": "label_values(up, job)"}),
    "row not full width": lambda d: _first(d, "row")["gridPos"].update(w=12),
    "__inputs": lambda d: d.update(__inputs=[]),
}


def selftest(dash):
    import copy

    base = check_structure(dash)
    if base:
        print("   the dashboard itself breaks rules; fix that first")
        return False
    ok = True
    for name, mutate in MUTATIONS.items():
        d = copy.deepcopy(dash)
        mutate(d)
        found = check_structure(d)
        print(f"   control {name!r}: {'caught: ' + found[0] if found else 'NOT CAUGHT'}")
        ok &= bool(found)
    return ok


def substitute(text, values):
    def repl(m):
        name = m.group(1) or m.group(2) or m.group(3)
        if name in values:
            return values[name]
        if name in BUILTINS:
            return BUILTINS[name]
        raise KeyError(name)

    return VAR_REF.sub(repl, text)


def api(prom, path, params):
    url = f"{prom}{path}?{urllib.parse.urlencode(params, doseq=True)}"
    try:
        with urllib.request.urlopen(url, timeout=10) as r:
            return json.load(r)
    except urllib.error.HTTPError as e:  # 400 carries the parse error
        try:
            return json.load(e)
        except ValueError:
            return {"status": "error", "error": f"HTTP {e.code}"}
    except (urllib.error.URLError, OSError, ValueError) as e:
        return {"status": "error", "error": str(e)}


def pending_metric(expr):
    for m in PENDING_METRICS:
        if re.search(rf"\b{re.escape(m)}\b", expr):
            return m
    return None


def collect_queries(dash, values):
    """(what, kind, text) for every target expr and label_values() query."""
    out = []
    for p in all_panels(dash):
        for t in p.get("targets", []) or []:
            out.append((f"panel {p['id']} {p.get('title', '')!r} {t['refId']}", "expr", substitute(t["expr"], values)))
    for v in dash["templating"]["list"]:
        if v.get("type") != "query":
            continue
        q = substitute(var_query(v), values)
        m = LABEL_VALUES.match(q)
        if not m:
            out.append((f"variable {v['name']}", "expr", q))
        else:
            out.append((f"variable {v['name']}", "label_values", (m.group(1).strip(), m.group(2))))
    return out


def run_one(prom, kind, q):
    """(ok, non_empty, message)"""
    if kind == "expr":
        body = api(prom, "/api/v1/query", {"query": q})
        if body.get("status") != "success":
            return False, False, f"error: {body.get('errorType', '')} {body.get('error', '')}"
        result = body["data"]["result"]
        n = len(result) if isinstance(result, list) else 1
        return True, n > 0, f"{n} series"
    selector, label = q
    body = api(prom, "/api/v1/series", {"match[]": selector, "start": str(time.time() - 600)})
    if body.get("status") != "success":
        return False, False, f"error: {body.get('errorType', '')} {body.get('error', '')}"
    found = sorted({s.get(label) for s in body["data"] if s.get(label)})
    return True, bool(found), f"{label} values {found}"


def check_queries(dash, prom, values, wait_s):
    queries = collect_queries(dash, values)
    # Controls: this Prometheus refuses a broken expression and returns no
    # series for a name nobody exposes, so the two checks below can fail.
    ok, _, msg = run_one(prom, "expr", "rate(bandwatch_source_up[")
    print(f"   control: a broken expression is refused: {msg}")
    if ok:
        print("   FAIL the control's broken expression was accepted")
        return False
    ok, non_empty, msg = run_one(prom, "expr", 'bandwatch_no_such_metric{channel="pump-de"}')
    print(f"   control: an unknown metric returns {msg}")
    if not ok or non_empty:
        print("   FAIL the control's unknown metric did not come back empty")
        return False
    deadline = time.monotonic() + wait_s
    while True:
        failed, notes, report = [], [], []
        for what, kind, q in queries:
            ok, non_empty, msg = run_one(prom, kind, q)
            shown = q if kind == "expr" else f"label_values({q[0]}, {q[1]})"
            pending = pending_metric(shown)
            if not ok:
                failed.append(f"{what}: {shown}: {msg}")
            elif non_empty:
                report.append(f"ok   {what}: {msg}")
                if pending:
                    notes.append(f"NOTE {what}: {pending} is now exposed: remove it from PENDING_METRICS")
            elif pending:
                report.append(f"SKIP {what}: parses, no series: {pending} is not exposed by bandwatch yet (PENDING_METRICS)")
            else:
                failed.append(f"{what}: {shown}: parses but returns no series")
        if not failed or time.monotonic() >= deadline:
            break
        time.sleep(2)
    for line in report + notes:
        print("   " + line)
    for line in failed:
        print("   FAIL " + line)
    skipped = sum(1 for r in report if r.startswith("SKIP"))
    print(f"   {len(queries)} queries: {len(queries) - len(failed) - skipped} returned series, "
          f"{skipped} skipped (pending metrics), {len(failed)} failed")
    return not failed


def rule_exprs(text):
    """The `expr:` values of a Prometheus rules file (one line, or a block
    scalar of the lines indented deeper than the key)."""
    exprs, lines, i = [], text.split("\n"), 0
    while i < len(lines):
        m = re.match(r"^(\s*)(?:- )?expr:\s*(.*)$", lines[i])
        i += 1
        if not m:
            continue
        indent, rest = len(m.group(1)), m.group(2).strip()
        if rest and rest[0] not in "|>":
            exprs.append(rest)
            continue
        block = []
        while i < len(lines) and (not lines[i].strip() or len(lines[i]) - len(lines[i].lstrip()) > indent):
            block.append(lines[i].strip())
            i += 1
        exprs.append(" ".join(block).strip())
    return exprs


def rule_metrics(rules_path, exposition_path):
    with open(rules_path, encoding="utf-8") as f:
        exprs = rule_exprs(f.read())
    with open(exposition_path, encoding="utf-8") as f:
        exposed = set(re.findall(r"^# TYPE (\S+) ", f.read(), re.M))
    names = sorted({n for e in exprs for n in re.findall(r"\bbandwatch_[a-z0-9_]+", e)})
    missing = [n for n in names if n not in exposed]
    print(f"   {len(exprs)} rule expressions read {len(names)} bandwatch metrics: {', '.join(names)}")
    for n in missing:
        print(f"   FAIL {n} is not in the exposition")
    return bool(exprs) and bool(names) and not missing


def main(argv):
    if len(argv) < 3 or argv[1] not in ("structure", "selftest", "queries", "rule-metrics"):
        print(__doc__, file=sys.stderr)
        return 2
    if argv[1] == "rule-metrics":
        if len(argv) != 4:
            print(__doc__, file=sys.stderr)
            return 2
        try:
            return 0 if rule_metrics(argv[2], argv[3]) else 1
        except OSError as e:
            print(f"dashboard_check: {e}", file=sys.stderr)
            return 1
    try:
        with open(argv[2], encoding="utf-8") as f:
            dash = json.load(f)
    except (OSError, ValueError) as e:
        print(f"dashboard_check: cannot read {argv[2]}: {e}", file=sys.stderr)
        return 1
    if argv[1] == "selftest":
        return 0 if selftest(dash) else 1
    if argv[1] == "structure":
        problems = check_structure(dash)
        for r in RULES:
            print(f"   rule: {r}")
        for p in problems:
            print(f"   FAIL {p}")
        n = sum(1 for _ in all_panels(dash))
        print(f"   {n} panels, {len(dash.get('templating', {}).get('list', []))} variables: "
              f"{'OK' if not problems else f'{len(problems)} problems'}")
        return 0 if not problems else 1
    prom, values, wait_s = None, {}, 30.0
    args = argv[3:]
    while args:
        a = args.pop(0)
        if a == "--prom" and args:
            prom = args.pop(0).rstrip("/")
        elif a == "--var" and args and "=" in args[0]:
            k, v = args.pop(0).split("=", 1)
            values[k] = v
        elif a == "--wait" and args:
            wait_s = float(args.pop(0))
        else:
            print(f"dashboard_check: bad argument {a!r}", file=sys.stderr)
            return 2
    if not prom:
        print("dashboard_check: --prom URL is required", file=sys.stderr)
        return 2
    problems = check_structure(dash)
    if problems:
        print("dashboard_check: fix the structure first (dashboard_check.py structure)", file=sys.stderr)
        return 1
    try:
        return 0 if check_queries(dash, prom, values, wait_s) else 1
    except KeyError as e:
        print(f"dashboard_check: no value for variable ${e.args[0]} (give --var {e.args[0]}=...)", file=sys.stderr)
        return 2


if __name__ == "__main__":
    sys.exit(main(sys.argv))
