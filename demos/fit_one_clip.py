"""Fit the latent ODE model to one short synthetic rig clip and draw truth against the model.

The clip comes from the tool's own synthetic rigs (``kinecast.rigs``). The model sees the first
``--frames`` frames; the picture shows every frame of the clip plus ``--extra`` frames after the
fitted window, where the model extrapolates from the first context frames alone. Rows: truth, model
(reconstruction, then extrapolation), absolute error.

Predictions are statistical extrapolations, not measurements; not for safety-critical control.

Examples
--------
    .venv/bin/python demos/fit_one_clip.py --out fit_one_clip.png
    .venv/bin/python demos/fit_one_clip.py --rig spring --steps 400 --set model.variant=deterministic
"""

from __future__ import annotations

import argparse
import sys
import time

import numpy as np
import torch

from kinecast.config import Config, apply_overrides
from kinecast.errors import KinecastError
from kinecast.model import time_scale_from_times, to_model_time
from kinecast.model.quickfit import fit_clip
from kinecast.plots import truth_vs_prediction
from kinecast.rigs import RIGS, render_trials

DEMO_LR = 5e-3  # Adam peak rate that fits one short clip well in a few hundred steps (measured)

def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--rig", default="pendulum", choices=sorted(RIGS))
    parser.add_argument("--frames", type=int, default=16, help="frames the model is fitted on")
    parser.add_argument("--extra", type=int, default=16, help="frames shown after the fitted window")
    parser.add_argument("--steps", type=int, default=400, help="optimisation steps")
    parser.add_argument("--batch", type=int, default=2, help="copies of the clip per step")
    parser.add_argument("--size", type=int, default=32, help="frame size in pixels")
    parser.add_argument("--seed", type=int, default=1, help="rig and model seed")
    parser.add_argument("--every", type=int, default=2, help="draw every n-th frame")
    parser.add_argument("--set", action="append", default=[], metavar="SECTION.KEY=VALUE",
                        help="config override (repeatable)")
    parser.add_argument("--out", default="fit_one_clip.png", help="picture to write (.png)")
    args = parser.parse_args(argv)
    try:
        cfg = apply_overrides(Config(), [f"data.size={args.size}", f"train.lr={DEMO_LR}", *args.set])
        torch.manual_seed(args.seed)
        total = args.frames + args.extra
        trial = render_trials(args.rig, trials=1, frames=total, seed=args.seed, size=cfg.data.size,
                              fps=30.0, channels="grey" if cfg.data.color == "grey" else "rgb")[0]
        clip = torch.from_numpy(trial.frames).float().div(255.0).permute(0, 3, 1, 2)
        cfg.solver.time_scale = time_scale_from_times(trial.times, cfg.solver.units_per_frame)
        t_all = to_model_time(trial.times, cfg)
        start = time.perf_counter()
        model, losses = fit_clip(clip[:args.frames], t_all[:args.frames], cfg, args.steps, args.batch)
        with torch.no_grad():
            pred, _ = model.rollout(clip[None, :cfg.model.velocity_frames], t_all)
        pred = pred[0, 0].numpy()
        truth = clip.numpy()
        fit_mse = float(np.mean((pred[:args.frames] - truth[:args.frames]) ** 2))
        bg_mse = float(np.mean((truth[:args.frames] - np.median(truth[:args.frames], axis=0)) ** 2))
        print(f"{args.steps} steps in {time.perf_counter() - start:.1f} s; loss {losses[0]:.4f} -> "
              f"{losses[-1]:.4f} (the KL weight rises from 0 to 1); fitted-window MSE {fit_mse:.6f} "
              f"(median frame: {bg_mse:.6f})")
        path = truth_vs_prediction(truth, pred, trial.times, args.out, every=args.every, overwrite=True)
        print(f"wrote {path}; columns after {trial.times[args.frames - 1]:.3f} s are extrapolated from "
              f"a model fitted on {args.frames} frames only, so expect them to drift (long forecasts "
              "need long training windows and more recordings)")
    except KinecastError as exc:
        print(f"fit_one_clip: {exc}", file=sys.stderr)
        return 2
    return 0


if __name__ == "__main__":
    sys.exit(main())
