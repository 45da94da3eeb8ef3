"""Produce the small pretrained runs shipped in weights/ (pendulum and spring). Anyone can rerun it.

    .venv/bin/python demos/make_weights.py [--budget 5m]

For each rig: render 8 training trials (seed 1, 90 frames, 64 px, light sensor noise), train with the
default config for the budget, copy the run's config.toml, weights.safetensors, summary.json,
loss.png and background.png into weights/RIG/, score a held-out trial (seed 2) against the
baselines and write the figures into weights/README.md's table (printed; paste it if they change).
The rigs are our own synthetic scenarios. Forecasts are statistical extrapolations, not measurements.
"""

from __future__ import annotations

import argparse
import json
import shutil
import tempfile
from pathlib import Path

from kinecast.cli import main

ROOT = Path(__file__).resolve().parent.parent
SHIPPED_FILES = ("config.toml", "weights.safetensors", "summary.json", "loss.png", "background.png")


def make(rig: str, budget: str, work: Path) -> dict:
    train, held, run = work / f"{rig}_train", work / f"{rig}_heldout", work / f"{rig}_run"
    for argv in (["rig", rig, "--out", str(train), "--trials", "8", "--frames", "90", "--seed", "1",
                  "--noise", "0.01"],
                 ["rig", rig, "--out", str(held), "--trials", "1", "--frames", "90", "--seed", "2",
                  "--noise", "0.01"],
                 ["fit", str(train), "--out", str(run), "--budget", budget, "--quiet"],
                 ["score", str(run), str(held / "trial_000"), "--holdout", "last:87", "--context", "3",
                  "--out", str(work / f"{rig}_scores")]):
        if main(argv):
            raise SystemExit(f"failed: kinecast {' '.join(argv)}")
    dest = ROOT / "weights" / rig
    if dest.exists():
        shutil.rmtree(dest)
    dest.mkdir(parents=True)
    for name in SHIPPED_FILES:
        shutil.copy2(run / name, dest / name)
    return json.loads((work / f"{rig}_scores" / "summary.json").read_text())


if __name__ == "__main__":
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--budget", default="5m")
    ap.add_argument("--rigs", default="pendulum,spring", help="comma-separated rigs to (re)make")
    args = ap.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        for rig in args.rigs.split(","):
            scores = make(rig, args.budget, Path(tmp))
            print(f"\n{rig}: held-out trial, 87 frames forecast from 3")
            for method, s in scores["methods"].items():
                print(f"| {rig} | {method} | {s['mean_mse']:.4g} | {s['mean_ssim']:.3f} | "
                      f"{s['valid_horizon_frames']} |")
