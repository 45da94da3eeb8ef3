"""Which trials need a wider spread, and does the model know? ``python bench/calibration_trials.py LINES``.

LINES is a file written by ``bench/calibration_split.py --out`` (one JSON line per run: the run, its
trials and their position-coverage curves over a grid of spread scales). For every trial it reads
the scale at which *that trial's* coverage crosses the nominal band (the scale it needs; clipped to
the grid's ends when the curve never crosses), then measures at scale 1 (the spread the model
draws before any calibration):

- the futures' spread: 16 futures' latent keypoint positions over the forecast, mean distance from
  their mean (model pixels), drawn three ways — the field's weights only, s0 and v0 only, both;
- the object's speed over the context frames (tracked centroid, model pixels per context);
- the forecast's position error (:func:`kinecast.score.evaluate.evaluate`, model pixels).

It prints, per run, Spearman's rank correlation (:func:`scipy.stats.spearmanr`) of the needed scale
with each, and the trial-to-trial standard deviation of the log needed scale as it is and as it
would be if every trial's futures had the run's mean spread (needed scale × own spread / mean).
Used for the twenty-seventh session's notes in DEVELOPERS.md. Scores are statistical extrapolations
on recordings, not measurements; not for safety-critical control.
"""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path

import numpy as np

if __package__ in (None, ""):  # run as a script: make `kinecast` importable from the checkout
    sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "src"))
    sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

import torch  # noqa: E402
from scipy.stats import spearmanr  # noqa: E402

from bench.calibration_split import HORIZON, crossing  # noqa: E402
from bench.common import COVERAGE_SAMPLES as FUTURES  # noqa: E402
from kinecast.frames import read_recording  # noqa: E402
from kinecast.frames.tracks import centroid_track  # noqa: E402
from kinecast.runfolder import load_run  # noqa: E402
from kinecast.score.evaluate import evaluate  # noqa: E402
from kinecast.train.loop import to_model_time  # noqa: E402

# How the futures are drawn: (mean_weights, sample_init) of LatentODE.sample_latents
SOURCES = {"weights": (False, False), "s0 and v0": (True, True), "both": (False, True)}


def needed_scale(scales, curve: np.ndarray, band: float) -> float:
    """The scale at which one trial's coverage ``curve`` (over ``scales``) crosses ``band``; the grid's
    low end when it is covered everywhere, 1.5 × its high end when never."""
    got = crossing(scales, curve, band)
    if np.isnan(got):
        return float(scales[0]) if np.max(curve) >= band else 1.5 * float(scales[-1])
    return got


def latent_spread(model, cfg, rec, mean_weights: bool, sample_init: bool) -> float:
    """Mean distance (model pixels) of the futures' moving keypoints from the futures' mean."""
    k = cfg.model.velocity_frames
    frames = torch.as_tensor(rec.frames[:k + HORIZON])
    t = to_model_time(torch.as_tensor(rec.times[:k + HORIZON] - rec.times[0]), cfg).float()
    gen = torch.Generator().manual_seed(cfg.forecast.seed)
    with torch.no_grad():
        lat = model.sample_latents(frames[None, :k], t, FUTURES, mean_weights=mean_weights,
                                   sample_init=sample_init, generator=gen, ctx_t=t[:k])[:, 0]
    pos = lat[:, k:, :model.q][..., model.field.moving.bool()]
    dist = (pos - pos.mean(0)).reshape(FUTURES, pos.shape[1], -1, 2).norm(dim=-1)
    return float(dist.mean()) * cfg.data.size / 2


def start_speed(model, cfg, rec) -> float:
    """Tracked centroid's displacement over the context frames (model pixels)."""
    track = centroid_track(np.asarray(rec.frames[:cfg.model.velocity_frames]), model.background.detach().numpy())
    return float(np.linalg.norm(track[-1] - track[0]))


def one_run(line: dict) -> None:
    model, cfg = load_run(Path(line["run"]))
    model.spread_scale.fill_(1.0)
    recs = [read_recording(p, cfg.data) for p in line["trials"]]
    cov = np.asarray(line["coverage"])
    need = np.array([needed_scale(line["scales"], cov[:, j], cfg.score.band) for j in range(len(recs))])
    k = cfg.model.velocity_frames
    measures = {f"spread ({name})": [latent_spread(model, cfg, r, *how) for r in recs] for name, how in SOURCES.items()}
    measures["start speed"] = [start_speed(model, cfg, r) for r in recs]
    measures["position error"] = [evaluate(model, cfg, r, 0, k, HORIZON, baselines=False)["summary"]["model"]
                                  ["mean_position_error_px"] for r in recs]
    print(f"{Path(line['run']).name}: {len(recs)} trials need scales {need.min():.3g}-{need.max():.3g}")
    for name, values in measures.items():
        print(f"  {name:22s} mean {np.nanmean(values):6.3g}   Spearman ρ with the needed scale "
              f"{spearmanr(values, need, nan_policy='omit')[0]:+.2f}")
    both = np.asarray(measures["spread (both)"])
    print(f"  sd of log needed scale {np.log(need).std():.2f}; with every trial at the run's mean spread "
          f"{np.log(need * both / both.mean()).std():.2f}")


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("lines", help="a file written by bench/calibration_split.py --out")
    args = parser.parse_args(argv)
    for text in Path(args.lines).read_text().splitlines():
        line = json.loads(text)
        if "trials" not in line:
            print(f"{line.get('run')}: written before calibration_split.py stored its trials; run it again")
            continue
        one_run(line)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
