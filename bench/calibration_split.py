"""How far does a spread scale fitted on a few held-out trials land from the one many trials ask for?

``python bench/calibration_split.py RUN TRIAL [TRIAL ...] [--group K]`` takes a finished run and
unseen trials of its scene (12 or more: e.g. trials 12-23 that ``bench/recipe.py`` renders for
coverage). It

1. scores 16 sampled futures of every trial (60 frames from the first ``model.velocity_frames``)
   at a grid of spread scales around the run's own, giving each trial's position coverage as a
   function of the scale, and the scale at which the mean over all the trials is the nominal 0.90
   (the scale "the trials ask for");
2. splits the trials into disjoint groups of ``K`` (2 by default, as ``fit`` holds out two of eight
   trials; seeded) and fits the scale on each group as ``fit`` fits it on its held-out trials
   (:func:`kinecast.model.calibration.calibrate` on the clips
   :func:`kinecast.train.loop._calibration_clips` picks), with 16 futures per clip (``fit``'s
   default) and with 64; the training trials' fit is made once, as ``fit`` makes it;
3. prints, per group, the fits, ``fit``'s rule (the larger of the group's and the training trials'
   fits, never below ``train.spread_floor``) and the mean position coverage of the *other* trials
   at that scale (read off the curves of step 1).

The run folder is not changed (the scales are set on the model loaded in memory). ``--out FILE``
appends one JSON line with every number. Scores are statistical extrapolations on recordings, not
measurements; not for safety-critical control.
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

from bench.common import trial_coverage  # noqa: E402
from kinecast.frames import read_recording  # noqa: E402
from kinecast.model.calibration import calibrate  # noqa: E402
from kinecast.runfolder import SUMMARY, load_run  # noqa: E402
from kinecast.train.loop import TRAINING_CALIBRATION_CLIPS, _calibration_clips  # noqa: E402

HORIZON = 60
# Scales scored, as multiples of the run's own: wide enough that every fit of the twenty-sixth
# session's study (0.20-1.73x the run's scale, floor included) falls inside, so coverage at a fit is
# read off the curve, not guessed
GRID = (0.2, 0.3, 0.45, 0.6, 0.75, 0.9, 1.05, 1.25, 1.5, 1.8, 2.2, 2.7, 3.3)
FUTURES = (16, 64)


def coverage_curves(model, cfg, recs, scales) -> np.ndarray:
    """Position coverage [scale, trial] of 16 seeded futures per trial at each spread scale."""
    cov = np.zeros((len(scales), len(recs)))
    for i, scale in enumerate(scales):
        model.spread_scale.fill_(scale)
        for j, rec in enumerate(recs):
            cov[i, j] = trial_coverage(model, cfg, rec, HORIZON)["mean_position_coverage"]
    return cov


def at_scale(scales, cov: np.ndarray, scale: float) -> float:
    """The mean coverage of the trials (columns of ``cov``) at ``scale``, interpolated in log scale;
    clipped to the grid's ends (the curve is flat or nearly there, or the fit is off the grid)."""
    return float(np.interp(np.log(scale), np.log(scales), cov.mean(axis=1)))


def crossing(scales, curve, band: float) -> float:
    """The scale at which a coverage ``curve`` over ``scales`` reaches ``band``, interpolated in log
    scale (NaN when the grid never crosses it)."""
    curve = np.maximum.accumulate(np.asarray(curve, dtype=float))  # coverage grows with the scale; flatten noise
    if not curve[0] < band < curve[-1]:
        return float("nan")
    return float(np.exp(np.interp(band, curve, np.log(scales))))


def asked_for(scales, cov: np.ndarray, band: float) -> float:
    """The scale at which the trials' mean coverage is ``band`` (NaN when the grid never crosses it)."""
    return crossing(scales, cov.mean(axis=1), band)


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("run", help="a run folder written by kinecast fit")
    parser.add_argument("trials", nargs="+", help="unseen recordings of the same scene (12 or more)")
    parser.add_argument("--group", type=int, default=2, help="held-out trials per fit (K)")
    parser.add_argument("--groups", type=int, default=6, help="disjoint groups of K trials to fit on")
    parser.add_argument("--seed", type=int, default=0, help="seed of the split into groups")
    parser.add_argument("--out", help="append the numbers as one JSON line to this file")
    args = parser.parse_args(argv)
    size, count = args.group, args.groups
    if size < 1 or count < 1 or len(args.trials) < size * count + 2:  # checked before anything is read
        parser.error(f"{len(args.trials)} trials: {count} groups of {size} need at least {size * count + 2}")
    run = Path(args.run)
    saved = json.loads((run / SUMMARY).read_text())
    model, cfg = load_run(run)
    recs = [read_recording(p, cfg.data) for p in args.trials]
    scales = [float(saved["spread_scale"]) * m for m in GRID]
    cov = coverage_curves(model, cfg, recs, scales)
    band, floor, window = cfg.score.band, cfg.train.spread_floor, saved["longest_window"]

    def fitted(clips, futures):
        gen = torch.Generator().manual_seed(cfg.train.seed)
        return calibrate(model, clips, band, futures, gen, floor)[2]

    trained = [read_recording(p, cfg.data) for p in saved["trained_on"]]
    train_clips = _calibration_clips(trained, window, cfg, "cpu", TRAINING_CALIBRATION_CLIPS)
    training = {n: fitted(train_clips, n) for n in FUTURES}
    order = np.random.default_rng(args.seed).permutation(len(recs))
    rows = []
    for g in range(count):
        group = [int(i) for i in order[size * g:size * (g + 1)]]
        rest = [j for j in range(len(recs)) if j not in group]
        clips = _calibration_clips([recs[i] for i in group], window, cfg, "cpu")
        fits = {n: fitted(clips, n) for n in FUTURES}
        rule = max(fits[FUTURES[0]], training[FUTURES[0]], floor)
        rows.append({"group": group, "fits": fits, "rule": rule,
                     "rest_coverage_at_rule": at_scale(scales, cov[:, rest], rule),
                     "rest_coverage_at_group_fit": at_scale(scales, cov[:, rest], max(fits[FUTURES[0]], floor))})
    whole = asked_for(scales, cov, band)
    print(f"{run.name}: {len(recs)} trials ask for a scale of {whole:.3g} (run's own {saved['spread_scale']:.3g}); "
          f"training trials' fit {training[16]:.3g} (16 futures) / {training[64]:.3g} (64)")
    print("group     fit 16   fit 64   fit's rule   coverage of the other trials at the rule / at the group's fit")
    for r in rows:
        print(f"{str(r['group']):9s} {r['fits'][16]:7.3g}  {r['fits'][64]:7.3g}  {r['rule']:9.3g}    "
              f"{r['rest_coverage_at_rule']:.3f} / {r['rest_coverage_at_group_fit']:.3f}")
    if args.out:
        with open(args.out, "a") as f:
            f.write(json.dumps({"run": str(run), "trials": [str(p) for p in args.trials], "scales": scales,
                                "coverage": cov.tolist(), "asked_for": whole,
                                "training_fits": training, "group": size, "groups": rows}) + "\n")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
