"""What `make demo` runs: the whole job on a built-in pendulum rig recording.

1. render the pendulum rig: training trials (seed 1) and one held-out trial (seed 2);
2. inspect the held-out recording;
3. train for a short wall-clock budget (or start from the shipped weights with DEMO=fast);
4. forecast the held-out trial from its first frames as an mp4 with panels and samples;
5. score the forecast against the held-out frames, with baselines, and write the HTML report.

Everything goes to demo_output/ (replaced on each run). The frames are synthetic: our own scenario.
Predictions are statistical extrapolations, not measurements; not for safety-critical control.
"""

from __future__ import annotations

import os
import shutil
import sys
from pathlib import Path

from kinecast.cli import main

ROOT = Path(__file__).resolve().parent.parent
OUT = ROOT / "demo_output"
SHIPPED = ROOT / "weights" / "pendulum"
BUDGET = os.environ.get("DEMO_BUDGET", "4m")  # ≤ 5 minutes on 2 cores
FRAMES = 90  # frames per trial (3 s at 30 fps)
# Futures the score draws: 16 or more let it read coverage of a 90 % region (8 can hold one more
# future at most 8/9 of the time, and the score says so); the clip keeps 8, enough to show the spread
SCORE_SAMPLES = 16


def step(title: str, argv: list[str]) -> None:
    print(f"\n== {title}\n$ kinecast {' '.join(argv)}", flush=True)
    code = main(argv)
    if code:
        sys.exit(f"demo step failed ({title}); exit status {code}")


def demo() -> None:
    if OUT.exists():
        shutil.rmtree(OUT)
    OUT.mkdir()
    os.environ.setdefault("KINECAST_CACHE_DIR", str(OUT / "cache"))
    train, held = OUT / "pendulum_train", OUT / "pendulum_heldout"
    step("render training trials", ["rig", "pendulum", "--out", str(train), "--trials", "8",
                                     "--frames", str(FRAMES), "--seed", "1", "--noise", "0.01"])
    step("render a held-out trial", ["rig", "pendulum", "--out", str(held), "--trials", "1",
                                     "--frames", str(FRAMES), "--seed", "2", "--noise", "0.01"])
    trial = held / "trial_000"
    step("inspect the held-out recording", ["inspect", str(trial)])
    fast = os.environ.get("DEMO", "") == "fast" and (SHIPPED / "weights.safetensors").is_file()
    run = SHIPPED if fast else OUT / "run"
    if fast:
        print(f"\n== DEMO=fast: using the shipped weights in {SHIPPED}")
    else:
        step("train", ["fit", str(train), "--out", str(run), "--budget", BUDGET])
    clip = OUT / "forecast.mp4"
    step("forecast the held-out trial from its first 3 frames",
         ["forecast", str(run), str(trial), "--from", "3", "--frames", str(FRAMES - 3),
          "--samples", "8", "--out", str(clip)])
    scores = OUT / "scores"
    step("score the held-out frames against baselines",
         ["score", str(run), str(trial), "--holdout", f"last:{FRAMES - 3}", "--context", "3",
          "--samples", str(SCORE_SAMPLES), "--out", str(scores)])
    report = OUT / "report.html"
    step("write the HTML report", ["report", str(run), "--scores", str(scores), "--clip", str(clip),
                                   "--out", str(report)])
    print("\n== outputs")
    for path in sorted(OUT.iterdir()):
        if path.name != "cache":
            print(f"  {path.relative_to(ROOT)}")
    print("\nForecasts are statistical extrapolations, not measurements; not for safety-critical control.")


if __name__ == "__main__":
    demo()
