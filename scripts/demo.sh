#!/usr/bin/env bash
# The main job on the demo audio, end to end; prints where every output went.
set -euo pipefail
PY=${PY:-.venv/bin/python}
TIMBREL=${TIMBREL:-.venv/bin/timbrel}
OUT=${OUT:-out/demo}
mkdir -p "$OUT"
start=$(date +%s)

echo "== 1/1 frames: demo_audio/manifest.csv -> $OUT/cache"
"$TIMBREL" frames demo_audio/manifest.csv --out "$OUT/cache" --config configs/default.toml

echo
echo "demo finished in $(( $(date +%s) - start )) s; outputs:"
echo "  frame cache     $OUT/cache  (failures: $OUT/cache/failures.csv)"
