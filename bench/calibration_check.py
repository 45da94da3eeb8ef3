"""Does the fitted spread scale and pixel noise make sampled futures cover held-out truth?

``python bench/calibration_check.py RUN TRIAL [TRIAL ...]`` copies the run folder to a temporary
one, fits its spread scale and pixel noise again on the run's own validation and training trials
(as ``fit`` does after training), then scores 16 sampled futures of each held-out trial (60 frames from the
first ``model.velocity_frames``) without and with the pixel noise, and prints the position
coverage, the object-pixel band coverage and the all-pixel band coverage per trial (nominal 0.90).
The run folder given is not changed.

Scores are statistical extrapolations on recordings, not measurements; not for safety-critical control.
"""

from __future__ import annotations

import argparse
import json
import shutil
import sys
import tempfile
from pathlib import Path

import numpy as np

if __package__ in (None, ""):  # run as a script: make `kinecast` importable from the checkout
    sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "src"))

from kinecast.frames import read_recording  # noqa: E402
from kinecast.runfolder import SUMMARY, load_run  # noqa: E402
from kinecast.score.evaluate import evaluate  # noqa: E402
from kinecast.train.loop import calibrate_run  # noqa: E402

SAMPLES, HORIZON = 16, 60
KEYS = {"position": "mean_position_coverage", "object band": "mean_object_band_coverage",
        "all pixels": "mean_band_coverage"}


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("run", help="a run folder written by kinecast fit")
    parser.add_argument("trials", nargs="+", help="held-out recordings of the same scene")
    args = parser.parse_args(argv)
    with tempfile.TemporaryDirectory() as tmp:
        run = Path(tmp) / "run"
        shutil.copytree(args.run, run)
        model, cfg = load_run(run)
        summary = json.loads((run / SUMMARY).read_text())
        vals = [read_recording(p, cfg.data) for p in summary["validated_on"]]
        trains = [read_recording(p, cfg.data) for p in summary["trained_on"]]
        fitted = calibrate_run(run, vals, trains, summary["longest_window"], cfg, "cpu")
        print(f"{args.run}: fitted on {len(vals)} validation and {len(trains)} training trial(s): {fitted}")
        for label in ("without pixel noise", "with pixel noise"):
            model, cfg = load_run(run)
            if label.startswith("without"):
                model.pixel_noise.fill_(0.0)
            got = {name: [] for name in KEYS}
            for trial in args.trials:
                rec = read_recording(trial, cfg.data)
                k = cfg.model.velocity_frames
                m = evaluate(model, cfg, rec, 0, k, HORIZON, samples=SAMPLES, baselines=False)["summary"]["model"]
                for name, key in KEYS.items():
                    got[name].append(m.get(key, float("nan")))
            print(f"  {label}: " + "; ".join(f"{name} {np.round(v, 2).tolist()}" for name, v in got.items()))
    return 0


if __name__ == "__main__":
    sys.exit(main())
