"""Fit the latent ODE model to a few short synthetic rig clips and draw truth against the model.

The clips come from the tool's own synthetic rigs (``kinecast.rigs``), trained on by ``kinecast.train.fit``
with a step budget (``--trials`` clips of ``--frames`` frames). The picture shows another clip of the
same rig, ``--frames`` + ``--extra`` frames long, forecast from its first context frames alone: rows
truth, model, absolute error; the columns after ``--frames`` lie beyond the training clips' length.

Predictions are statistical extrapolations, not measurements; not for safety-critical control.

Examples
--------
    .venv/bin/python demos/fit_one_clip.py --out fit_one_clip.png
    .venv/bin/python demos/fit_one_clip.py --rig spring --steps 600 --set model.variant=deterministic
"""

from __future__ import annotations

import argparse
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import torch

from kinecast.config import Config, apply_overrides
from kinecast.errors import KinecastError
from kinecast.frames import read_recording
from kinecast.model import to_model_time
from kinecast.plots import truth_vs_prediction
from kinecast.rigs import RIGS, write_rig
from kinecast.runfolder import load_run
from kinecast.train import fit


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--rig", default="pendulum", choices=sorted(RIGS))
    parser.add_argument("--trials", type=int, default=3, help="training clips")
    parser.add_argument("--frames", type=int, default=24, help="frames per training clip")
    parser.add_argument("--extra", type=int, default=16, help="frames shown after the training clips' length")
    parser.add_argument("--steps", type=int, default=800, help="optimisation steps")
    parser.add_argument("--size", type=int, default=32, help="frame size in pixels")
    parser.add_argument("--seed", type=int, default=1, help="rig and model seed")
    parser.add_argument("--every", type=int, default=4, help="draw every n-th frame")
    parser.add_argument("--set", action="append", default=[], metavar="SECTION.KEY=VALUE",
                        help="config override (repeatable)")
    parser.add_argument("--out", default="fit_one_clip.png", help="picture to write (.png)")
    args = parser.parse_args(argv)
    try:
        cfg = apply_overrides(Config(), [f"data.size={args.size}", f"train.steps={args.steps}", "train.budget=0",
                                         f"train.seed={args.seed}", *args.set])
        with tempfile.TemporaryDirectory() as tmp:
            work = Path(tmp)
            write_rig(args.rig, work / "train", trials=args.trials, frames=args.frames, seed=args.seed,
                      size=cfg.data.size, fps=30.0)
            shown = write_rig(args.rig, work / "shown", trials=1, frames=args.frames + args.extra,
                              seed=args.seed + 1, size=cfg.data.size, fps=30.0)[0]
            start = time.perf_counter()
            summary = fit([work / "train"], work / "run", cfg, show_progress=True)
            model, run_cfg = load_run(work / "run")
            rec = read_recording(shown, run_cfg.data)
        clip = torch.as_tensor(rec.frames)
        t_all = to_model_time(rec.times - rec.times[0], run_cfg)
        with torch.no_grad():
            pred, _ = model.rollout(clip[None, :run_cfg.model.velocity_frames], t_all)
        pred = pred[0, 0].numpy()
        truth = clip.numpy()
        n = args.frames
        mse = float(np.mean((pred[:n] - truth[:n]) ** 2))
        bg_mse = float(np.mean((truth[:n] - np.median(truth, axis=0)) ** 2))
        print(f"{summary['steps']} steps in {time.perf_counter() - start:.1f} s; forecast MSE over the first "
              f"{n} frames {mse:.6f} (the clip's median frame: {bg_mse:.6f})")
        path = truth_vs_prediction(truth, pred, rec.times, args.out, every=args.every, overwrite=True)
        print(f"wrote {path}; columns after {rec.times[n - 1]:.3f} s lie beyond the training clips' length, "
              "so expect them to drift (long forecasts need long training windows and more recordings)")
    except KinecastError as exc:
        print(f"fit_one_clip: {exc}", file=sys.stderr)
        return 2
    return 0


if __name__ == "__main__":
    sys.exit(main())
