#!/usr/bin/env bash
# Pointing kinecast at your own recording, shown on files this script makes itself (from the
# pendulum rig, our own scenario): (1) a folder of frames with a timestamps CSV, (2) a video file.
# Replace the paths with your own recording.
# Usage: demos/own_recording.sh [OUTDIR] [BUDGET]   (defaults: demo_output/own, 2m)
set -euo pipefail
K="${KINECAST:-.venv/bin/kinecast}"
PY="${PYTHON:-.venv/bin/python}"
OUT="${1:-demo_output/own}"
BUDGET="${2:-2m}"
mkdir -p "$OUT"

# (1) A folder of frames + timestamps.csv (frame file name, time in seconds). The rig drops ~3% of
#     frames, as a real camera might: kinecast finds the gaps from the timestamps.
$K rig pendulum --out "$OUT/camera" --trials 3 --frames 120 --seed 5 --drop 0.03 --jitter 0.001 --overwrite
head -4 "$OUT/camera/trial_000/timestamps.csv"
$K inspect "$OUT/camera/trial_000"
$K fit "$OUT/camera" --out "$OUT/run" --budget "$BUDGET" --overwrite
$K fill "$OUT/run" "$OUT/camera/trial_000" --out "$OUT/filled" --overwrite

# (2) A video file: any mp4/avi/mov/mkv; frame times come from the container's frame rate.
$K rig pendulum --out "$OUT/video_source" --trials 1 --frames 120 --seed 6 --size 128 --overwrite
"$PY" - "$OUT/video_source/trial_000" "$OUT/clip.mp4" <<'PYEOF'
import sys
from kinecast.frames import read_recording
from kinecast.render import write_frames
from kinecast.config import DataConfig
rec = read_recording(sys.argv[1], DataConfig(size=128, color="rgb", cache=False))
write_frames(rec.frames, sys.argv[2], fps=30.0, overwrite=True)  # stands in for your camera's video
PYEOF
$K inspect "$OUT/clip.mp4"
$K forecast "$OUT/run" "$OUT/clip.mp4" --frames 60 --out "$OUT/clip_forecast.mp4" --overwrite
echo "outputs in $OUT"
