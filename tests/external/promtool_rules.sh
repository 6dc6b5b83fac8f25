#!/usr/bin/env bash
# Checks the example alerting rules with promtool (Debian package
# "prometheus"): syntax and lint (check rules), then behaviour on synthetic
# series (test rules), for deploy/prometheus-rules.yml and for the central
# store's deploy/scale-out/central-rules.yml. Exit 0 if all pass; promtool's
# exit code otherwise; 2 if promtool is missing.
# Usage: bash tests/external/promtool_rules.sh
set -euo pipefail
root="$(cd "$(dirname "${BASH_SOURCE[0]}")/../.." && pwd)"
command -v promtool >/dev/null || { echo "promtool_rules: promtool not found (apt-get install prometheus)" >&2; exit 2; }
cd "$root/deploy"
timeout 60 promtool check rules prometheus-rules.yml
timeout 120 promtool test rules prometheus-rules.test.yml
# The central store's extra rule for many PCs (docs/scale-out.md).
cd "$root/deploy/scale-out"
timeout 60 promtool check rules central-rules.yml
timeout 120 promtool test rules central-rules.test.yml
