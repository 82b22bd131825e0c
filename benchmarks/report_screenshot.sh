#!/usr/bin/env bash
# Render a sample collect report headless and save a screenshot, to check by eye that it
# reads well (labels with units, legible sizes, no overlapping text). Not part of CI.
#
# Needs Debian's chromium:  apt-get update && apt-get install -y chromium
# Usage: benchmarks/report_screenshot.sh [OUT_DIR] [HEIGHT]
set -euo pipefail
here="$(cd "$(dirname "$0")" && pwd)"
out="${1:-/tmp/winnow-report-check}"
height="${2:-2400}"
python="${PYTHON:-$here/../.venv/bin/python}"
mkdir -p "$out"
"$python" "$here/report_sample.py" "$out" >/dev/null
profile="$(mktemp -d)"
trap 'rm -rf "$profile"' EXIT
nice chromium --headless --no-sandbox --disable-gpu --disable-background-networking \
  --disable-component-update --disable-sync --no-first-run --user-data-dir="$profile" \
  --screenshot="$out/report.png" --window-size=1280,"$height" "file://$out/report.html" \
  2>/dev/null
echo "report:     $out/report.html"
echo "screenshot: $out/report.png"
