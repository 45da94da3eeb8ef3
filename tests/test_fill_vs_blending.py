"""Fill against the rig's truth frames: the shipped pendulum model beats linear frame blending.

Truth: a pendulum trial rendered by kinecast's rig (RK4 integration of θ'' = −(g/L)·sin θ − b·θ',
checked against the elliptic-integral period in test_rigs.py) with a seed the shipped weights were
not trained on. Slots are then marked missing in gaps of several frames, so the filled frames can
be compared with the frames the camera "dropped".

Reference method: linear blending of the two frames either side of a gap, weighted by time
(common practice for filling dropped video frames). For a moving object it shows two faded copies
instead of one object in between, so a model of the motion should do better on gaps of a few frames.
"""

from __future__ import annotations

from dataclasses import replace
from pathlib import Path

import numpy as np
import pytest

from kinecast.forecast.core import fill, gaps
from kinecast.frames import read_recording
from kinecast.rigs import write_rig
from kinecast.train import load_run

SHIPPED = Path(__file__).resolve().parents[1] / "weights" / "pendulum"
GAP = 6            # frames per gap (0.2 s at 30 frames/s: a fifth of the pendulum's swing)
GAP_STARTS = (12, 30, 48, 66)
SEEDS = (5, 6)     # the shipped weights were trained on seed 1 and scored on seed 2


def linear_blend(frames: np.ndarray, times: np.ndarray, missing: np.ndarray) -> np.ndarray:
    """Each gap filled with the time-weighted mix of the present frames either side of it."""
    out = frames.copy()
    for a, b in gaps(missing):
        w = ((times[a:b] - times[a - 1]) / (times[b] - times[a - 1]))[:, None, None, None]
        out[a:b] = (1 - w) * frames[a - 1] + w * frames[b]
    return out


@pytest.mark.parametrize("seed", SEEDS)
def test_fill_beats_linear_blending_against_truth(tmp_path, seed):
    model, cfg = load_run(SHIPPED)
    write_rig("pendulum", tmp_path / "rig", trials=1, frames=84, seed=seed, size=cfg.data.size,
              fps=30.0, overwrite=True)
    rec = read_recording(tmp_path / "rig" / "trial_000", cfg.data)
    truth = rec.frames.copy()
    missing = np.zeros(rec.n_frames, dtype=bool)
    for a in GAP_STARTS:
        missing[a:a + GAP] = True
    hidden = truth.copy()
    hidden[missing] = 0.0   # what fill sees in the dropped slots must not matter
    filled, which = fill(model, cfg, replace(rec, frames=hidden, missing=missing))
    assert np.array_equal(which, missing)
    assert np.array_equal(filled[~missing], truth[~missing])
    blended = linear_blend(truth, rec.times, missing)
    err_fill = float(np.mean((filled[missing] - truth[missing]) ** 2))
    err_blend = float(np.mean((blended[missing] - truth[missing]) ** 2))
    assert err_fill < err_blend, (err_fill, err_blend)
