#!/usr/bin/env bash
# The whole job on one synthetic rig (our own demo scenarios): render training trials and a
# held-out trial with another seed, train briefly, forecast, score against baselines, report.
# Usage: demos/rig_job.sh RIG [OUTDIR] [BUDGET]   (defaults: demo_output/RIG, 3m)
# demos/pendulum.sh, spring.sh and airtable.sh call this with their rig.
# Forecasts are statistical extrapolations, not measurements; not for safety-critical control.
set -euo pipefail
RIG="${1:?usage: demos/rig_job.sh RIG [OUTDIR] [BUDGET]}"
shift
K="${KINECAST:-.venv/bin/kinecast}"
OUT="${1:-demo_output/$RIG}"
BUDGET="${2:-3m}"
mkdir -p "$OUT"
$K rig $RIG --out "$OUT/train" --trials 8 --frames 90 --seed 1 --noise 0.01 --overwrite
$K rig $RIG --out "$OUT/heldout" --trials 1 --frames 90 --seed 2 --noise 0.01 --overwrite
$K fit "$OUT/train" --out "$OUT/run" --budget "$BUDGET" --overwrite
$K forecast "$OUT/run" "$OUT/heldout/trial_000" --from 3 --frames 87 --samples 8 --out "$OUT/forecast.mp4" --overwrite
$K score "$OUT/run" "$OUT/heldout/trial_000" --holdout last:87 --context 3 --samples 8 --out "$OUT/scores" --overwrite
$K report "$OUT/run" --scores "$OUT/scores" --clip "$OUT/forecast.mp4" --out "$OUT/report.html" --overwrite
echo "open $OUT/report.html"
