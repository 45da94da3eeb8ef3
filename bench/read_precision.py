"""How precisely does a trained keypoint model read object positions? ``python bench/read_precision.py RUN TRIAL...``

For each held-out trial (a recording of the scene RUN was trained on) and each read setting
(``--steps`` list of ``model.read_refinement`` values, ``--px`` its first step size), the keypoints
read from every frame (followed from frame to frame, as ``model.keypoint_tracking`` does) are matched
to the objects found in the true frames (foreground centroids,
:func:`kinecast.frames.tracks.find_objects`, least summed distance; frames where the count of
objects differs from the count of moving keypoints are skipped) and it prints, in model pixels:

- *offset*: median distance from each keypoint to its object's centroid (a constant offset does not
  hurt a velocity; it is the drawing's anchor);
- *jitter*: median length of the keypoint's second difference minus the centroid's (px/frame²): the
  read noise that enters a velocity from three context frames, the true motion taken out;
- the seconds the reads took.

Single-object scenes whose model keeps a still keypoint are read on the moving keypoints only.
Numbers are statistical summaries on recordings, not measurements of an apparatus.
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import numpy as np
import torch

if __package__ in (None, ""):  # run as a script: make `kinecast` importable from the checkout
    sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "src"))

from kinecast.frames import read_recording  # noqa: E402
from kinecast.frames.tracks import find_objects, match_objects  # noqa: E402
from kinecast.model.identities import reorder, track_order  # noqa: E402
from kinecast.model.keypoints import to_model_pixels  # noqa: E402
from kinecast.model.staged import encode_all  # noqa: E402
from kinecast.runfolder import load_run  # noqa: E402


def read_errors(model, cfg, rec) -> tuple[float, float, float]:
    """(offset px, jitter px/frame², seconds) of ``model``'s reads of the recording ``rec``."""
    frames = torch.as_tensor(rec.frames)
    t0 = time.perf_counter()
    read, _ = encode_all(model, frames)
    seconds = time.perf_counter() - t0
    K = read.shape[1] // 2
    read = reorder(read[None], track_order(read.view(1, len(frames), K, 2))[0][None])[0]
    moving = model.field.moving.view(-1, 2)[:, 0].bool().numpy()
    xy = to_model_pixels(read.view(len(frames), K, 2).numpy(), cfg.data.size)[:, moving]
    background = model.background.detach().cpu().numpy() if cfg.model.background else None
    truth = np.full_like(xy, np.nan)
    for t, objects in enumerate(find_objects(rec.frames, background)):
        if len(objects) == xy.shape[1]:
            match, _ = match_objects(xy[t], objects)
            truth[t, match[match >= 0]] = objects[match >= 0]
    second = lambda p: p[2:] - 2 * p[1:-1] + p[:-2]  # noqa: E731
    offset = np.linalg.norm(xy - truth, axis=-1)
    jitter = np.linalg.norm(second(xy) - second(truth), axis=-1)
    if not np.isfinite(offset).any():
        return float("nan"), float("nan"), seconds
    return float(np.nanmedian(offset)), float(np.nanmedian(jitter)), seconds


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("run", help="a run folder written by kinecast fit (keypoint encoder)")
    parser.add_argument("trials", nargs="+", help="held-out recordings of the same scene")
    parser.add_argument("--steps", default="0,30,60", help="model.read_refinement values to compare")
    parser.add_argument("--px", type=float, default=None, help="model.read_refinement_px (default: the run's)")
    args = parser.parse_args(argv)
    model, cfg = load_run(args.run)
    if not model.keypoints:
        print(f"{args.run}: not a keypoint model; nothing to read", file=sys.stderr)
        return 2
    if args.px is not None:
        cfg.model.read_refinement_px = args.px
    recs = [read_recording(trial, cfg.data) for trial in args.trials]
    for steps in (int(s) for s in args.steps.split(",")):
        model.refine_steps = steps
        got = np.array([read_errors(model, cfg, rec) for rec in recs])
        print(f"read_refinement {steps:3d} (first step {cfg.model.read_refinement_px} px): offset "
              + " ".join(f"{v:.2f}" for v in got[:, 0]) + " px; jitter "
              + " ".join(f"{v:.2f}" for v in got[:, 1]) + f" px/frame²; {got[:, 2].sum():.1f} s", flush=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
