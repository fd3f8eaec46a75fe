#!/usr/bin/env bash
# The main job on the demo audio, end to end; prints where every output went.
set -euo pipefail
PY=${PY:-.venv/bin/python}
TIMBREL=${TIMBREL:-.venv/bin/timbrel}
OUT=${OUT:-out/demo}
CONFIG=${CONFIG:-configs/default.toml}
mkdir -p "$OUT"
start=$(date +%s)
step() { echo; echo "== $*"; }

step "1/7 frames: demo_audio/manifest.csv -> $OUT/cache"
"$TIMBREL" frames demo_audio/manifest.csv --out "$OUT/cache" --config "$CONFIG"

step "2/7 fit: $OUT/cache -> $OUT/model.npz"
# a fixed seed, so every run prints the same figures (without one, fit draws a fresh seed)
"$TIMBREL" fit "$OUT/cache" --out "$OUT/model.npz" --config "$CONFIG" --seed "${SEED:-0}"

step "3/7 export: per-frame features -> $OUT/features (Parquet dataset)"
"$TIMBREL" export demo_audio/manifest.csv --model "$OUT/model.npz" --out "$OUT/features" \
  --pool mean,max,std --overwrite

step "4/7 probe: learned features beside their peers (MFCC, log-mel, k-means)"
# each demo clip is made apart from the others: its own origin for the choice of pooling and C
"$TIMBREL" probe "$OUT/features" --label label --split-column split --choose-by source \
  | tee "$OUT/probe.txt"

step "5/7 events: the annotated soundscapes, frame by frame"
"$TIMBREL" export demo_audio/soundscapes/manifest.csv --model "$OUT/model.npz" \
  --out "$OUT/soundscapes" --events demo_audio/soundscapes/events.tsv --overwrite
"$TIMBREL" probe "$OUT/soundscapes" --events | tee "$OUT/events_probe.txt"

step "6/7 inspect: the model, with pictures"
"$TIMBREL" inspect "$OUT/model.npz" --plots "$OUT/pictures" | tee "$OUT/model.txt" | head -8
first_clip=$(sed -n 2p demo_audio/manifest.csv | cut -d, -f1)
"$TIMBREL" show "demo_audio/$first_clip" --model "$OUT/model.npz" --out "$OUT/pictures/clip.png"

step "7/7 read the dataset back with pyarrow"
"$PY" -c "import pyarrow.dataset as ds; t = ds.dataset('$OUT/features').to_table(); \
print(t.num_rows, 'frames from', len(set(t.column('source').to_pylist())), 'clips;', \
'columns:', ', '.join(t.column_names))"

echo
echo "demo finished in $(( $(date +%s) - start )) s; outputs:"
echo "  frame cache      $OUT/cache  (failures: $OUT/cache/failures.csv)"
echo "  model            $OUT/model.npz  (history: $OUT/model.npz.history.csv)"
echo "  features         $OUT/features/part-*.parquet  (clip table: $OUT/features/_clips/)"
echo "  probe table      $OUT/probe.txt"
echo "  event detection  $OUT/events_probe.txt  (frames: $OUT/soundscapes/)"
echo "  model summary    $OUT/model.txt"
echo "  pictures         $OUT/pictures/*.png"
