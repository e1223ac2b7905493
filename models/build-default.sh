#!/usr/bin/env bash
# Rebuild models/default.onnx, its report and confusion matrix from simulated herds.
# One command, reproducible: fixed seeds, fixed settings (docs/model.md, models/MODEL_CARD.md).
# Training animals come from seed 1, held-out animals from seed 2 (never seen in training).
set -euo pipefail
cd "$(dirname "$0")/.."
BOUTLINE=${BOUTLINE:-boutline}
BUILD=${BUILD:-build}
"$BOUTLINE" simulate record --herd 40 --days 1 --seed 1 --scenario mixed --hz 10 \
  --format npz --processes 2 --overwrite --out "$BUILD/sim-train"
"$BOUTLINE" simulate record --herd 10 --days 1 --seed 2 --scenario mixed --hz 10 \
  --format npz --processes 2 --overwrite --out "$BUILD/sim-holdout"
"$BOUTLINE" train "$BUILD/sim-train" --holdout "$BUILD/sim-holdout" --out models/default.onnx
