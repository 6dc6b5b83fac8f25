#!/usr/bin/env python3
"""Summarises the JSON files bench/ab.sh leaves: per row, the median of the
per-run ratios (each against its own run's FFT limit) for the old and the
new binary, with min-max, and new/old. Standard library only."""
import glob
import json
import os
import statistics
import sys

d = sys.argv[1]
sides = {}
for side in ("old", "new"):
    rows = {}
    for f in sorted(glob.glob(os.path.join(d, f"{side}-*.json"))):
        for r in json.load(open(f))["rows"]:
            key = (r["phase"], r["case"])
            v = r["ratio"]["median"] if r.get("ratio") else r["value"]["median"]
            rows.setdefault(key, []).append(v)
    sides[side] = rows
print(f"{'phase':<8} {'case':<22} {'old median (min-max)':>26} {'new median (min-max)':>26} {'new/old':>8}")
for key, old in sides["old"].items():
    new = sides["new"].get(key)
    if not new:
        continue
    mo, mn = statistics.median(old), statistics.median(new)
    print(f"{key[0]:<8} {key[1]:<22} {mo:>10.3f} ({min(old):.3f}-{max(old):.3f}) "
          f"{mn:>10.3f} ({min(new):.3f}-{max(new):.3f}) {mn / mo if mo else float('nan'):>8.3f}")
