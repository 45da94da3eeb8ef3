"""``kinecast forecast --fps 4x`` (slow motion) and ``--from``: panels, start time, refusals.

Outside references:
- Frame times of a recording at 30 frames/s are n/30 s (arithmetic): 1.0 s is frame 30, 0.5 s is
  frame 15, and at 4x the rate the output times 0.5 + k/120 s fall on a recorded frame exactly when
  k is a multiple of 4.
- The error panel's colours are matplotlib's 'magma' colour map on [0, 1] (``Normalize`` and
  ``Colormap(..., bytes=True)``), computed here with numpy from the arrays the verb saved.
- PNG (ISO/IEC 15948) frames are read back losslessly with imageio.

The model is the shipped pendulum run when it loads, else a tiny run trained for 4 steps: forecast
quality is not what these tests check.
"""

from __future__ import annotations

from pathlib import Path

import imageio.v3 as iio
import matplotlib
import numpy as np
import pytest
from matplotlib.colors import Normalize

from kinecast import config as C
from kinecast.cli import main
from kinecast.errors import KinecastError
from kinecast import render as R
from kinecast.rigs import write_rig
from kinecast.train import fit, load_run
from test_fill_native import TINY  # the 4-step tiny run's settings

FPS = 30.0          # the rig recording's frame rate
SHIPPED = Path(__file__).resolve().parents[1] / "weights" / "pendulum"


@pytest.fixture(scope="module")
def setup(tmp_path_factory):
    """(run folder, a 30-frame pendulum recording at 30 frames/s)."""
    base = tmp_path_factory.mktemp("slowmo")
    rec = write_rig("pendulum", base / "rig", trials=1, frames=30, seed=1, size=32, fps=FPS)[0]
    try:
        load_run(SHIPPED)
        return SHIPPED, rec
    except (KinecastError, OSError):  # being regenerated, or an older layout: train a tiny run
        pass
    import torch
    threads = torch.get_num_threads()
    try:
        fit([base / "rig"], base / "run", C.apply_overrides(C.Config(), TINY), show_progress=False)
    finally:
        torch.set_num_threads(threads)
    return base / "run", rec


def forecast(setup, out: Path, *options: str) -> int:
    run, rec = setup
    return main(["forecast", str(run), str(rec), *options, "--out", str(out), "--set", "forecast.upscale=1"])


def test_slow_motion_shows_no_error_where_no_frame_was_recorded(setup, tmp_path):
    out = tmp_path / "clip"
    assert forecast(setup, out, "--from", "0.5s", "--frames", "9", "--fps", "4x") == 0
    saved = np.load(tmp_path / "clip_forecast.npz")
    times, truth, pred, have = saved["times"], saved["truth"], saved["mean"], saved["truth_present"]
    np.testing.assert_allclose(times, 0.5 + np.arange(9) / (4 * FPS), atol=1e-9)
    np.testing.assert_array_equal(have, np.arange(9) % 4 == 0)
    panels = np.stack([iio.imread(p) for p in sorted(out.glob("frame_*.png"))])
    assert len(panels) == 9
    lay = R.panel_layout(3, truth.shape[2:], 1, heat=True)  # truth | prediction | abs. error
    (ty0, tx0, ty1, tx1), _, (ey0, ex0, ey1, ex1) = lay.boxes
    truth_box, error_box = panels[:, ty0:ty1, tx0:tx1], panels[:, ey0:ey1, ex0:ex1]
    # recorded frames: the truth as recorded and |truth - prediction| in magma on [0, 1]
    err = np.abs(truth - pred).mean(axis=1)
    magma = matplotlib.colormaps["magma"](Normalize(0.0, 1.0)(err), bytes=True)[..., :3]
    np.testing.assert_array_equal(error_box[have], magma[have])
    truth8 = np.round(np.clip(truth, 0, 1) * 255).astype(np.uint8).transpose(0, 2, 3, 1)  # grey or RGB
    np.testing.assert_array_equal(truth_box[have], np.broadcast_to(truth8, truth8.shape[:3] + (3,))[have])
    assert (error_box[have] != R.NO_RECORD_GREY).any()
    # no recorded frame: a neutral grey panel with a label, the same in both columns, never an error
    blank = error_box[~have]
    np.testing.assert_array_equal(blank, truth_box[~have])
    assert (blank[..., 0] == blank[..., 1]).all() and (blank[..., 1] == blank[..., 2]).all()  # grey only
    assert blank.min() >= R.NO_RECORD_GREY  # light text on the fill: nothing darker, no black truth
    assert (blank == R.NO_RECORD_GREY).mean() > 0.5 and (blank > R.NO_RECORD_GREY).any()


def test_from_a_time_starts_at_that_time(setup, tmp_path):
    # 1.0 s is frame 30 at 30 frames/s (the slot just after the last recorded frame, 29)
    for option in ("1.0s", "30"):
        out = tmp_path / f"at_{option}.gif"
        assert forecast(setup, out, "--from", option, "--frames", "3", "--fps", "4x") == 0
        times = np.load(tmp_path / f"at_{option}_forecast.npz")["times"]
        np.testing.assert_allclose(times, 1.0 + np.arange(3) / (4 * FPS), atol=1e-9)
    out = tmp_path / "mid.gif"  # 0.5 s is frame 15, a recorded one: the first output shows it
    assert forecast(setup, out, "--from", "0.5s", "--frames", "2") == 0
    saved = np.load(tmp_path / "mid_forecast.npz")
    np.testing.assert_allclose(saved["times"], [0.5, 0.5 + 1 / FPS], atol=1e-9)
    assert saved["truth_present"].all()


@pytest.mark.parametrize("option", ["9.0s", "1.1s", "31", "300"])
def test_from_past_the_end_is_one_line_and_exit_2(setup, tmp_path, capsys, option):
    _, rec = setup
    out = tmp_path / "late.gif"
    assert forecast(setup, out, "--from", option, "--frames", "2") == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and str(rec) in err and "past the end" in err
    assert not list(tmp_path.iterdir())  # nothing written
