"""Forecast, fill and resample from a trained run: times, shapes, gaps, outputs.

Outside references: the ODE initial-value problem has a unique solution, so integrating forward and
then backward returns to the start (Picard–Lindelöf; checked to solver tolerance), and an autonomous
ODE's solutions do not depend on where the clock starts; the variance identity
Var X = E[X²] − (E X)² for the spread across samples; video files are
read back with imageio and OpenCV (open standards: mp4/H.264 containers); CSV per RFC 4180.
"""

import csv

import cv2
import imageio.v3 as iio
import numpy as np
import pytest
import torch

from kinecast.model.latent_ode import latent_size
from kinecast import config as C
from kinecast.cli import main
from kinecast.forecast import core
from kinecast.frames import Recording, read_recording
from kinecast.rigs import Camera, write_rig
from kinecast.train import fit, load_run


@pytest.fixture(scope="module")
def trained(tmp_path_factory):
    """A tiny run on the pendulum rig (quality is not the point here)."""
    root = tmp_path_factory.mktemp("fc")
    write_rig("pendulum", root / "rig", trials=2, frames=24, seed=1, size=32, fps=20.0)
    write_rig("pendulum", root / "drops", trials=1, frames=30, seed=4, size=32, fps=20.0,
              camera=Camera(drop=0.15))
    cfg = C.apply_overrides(C.Config(), [
        "data.size=32", "model.latent_dim=4", "model.enc_channels=8", "model.dec_channels=8",
        "model.hidden=16", "train.batch=2", "train.val_every=5", "train.steps=6", "train.budget=0",
        "train.threads=1", "train.window_start=6"])
    fit([root / "rig"], root / "run", cfg, show_progress=False)
    model, cfg = load_run(root / "run")
    return root, model, cfg


def test_forecast_times_and_shapes_regular(trained):
    root, model, cfg = trained
    rec = read_recording(root / "rig" / "trial_001", cfg.data)
    fc = core.forecast(model, cfg, rec, n_frames=10, samples=3)
    dt = rec.median_interval
    last = rec.times[-1]  # default start: the end of the recording, context = its last 3 frames
    assert fc.context_start == rec.n_frames - cfg.model.velocity_frames
    np.testing.assert_allclose(fc.times, last + dt * np.arange(1, 11), rtol=0, atol=1e-9)
    assert fc.mean.shape == (10, 1, 32, 32) and fc.samples.shape == (3, 10, 1, 32, 32)
    assert fc.latents.shape == (3, 10, 2 * latent_size(cfg.model))
    assert fc.spread.max() > 0  # sampled futures differ
    # the spread is the population standard deviation across the sampled futures: checked through
    # the variance identity Var = E[X²] − E[X]² (König–Huygens; closed form), not the code's np.std
    np.testing.assert_allclose(fc.mean, fc.samples.mean(axis=0), rtol=0, atol=1e-6)
    np.testing.assert_allclose(fc.spread ** 2, (fc.samples.astype(np.float64) ** 2).mean(axis=0)
                               - fc.samples.astype(np.float64).mean(axis=0) ** 2, rtol=0, atol=1e-6)
    # --fps: 4x the rate gives intervals of a quarter
    fast = core.forecast(model, cfg, rec, n_frames=8, fps=4 / dt)
    np.testing.assert_allclose(np.diff(fast.times), dt / 4, rtol=1e-9)


def test_forecast_on_an_irregular_grid_and_forward_backward_round_trip(trained):
    _, model, cfg = trained
    rng = np.random.default_rng(0)
    times = np.cumsum(rng.uniform(0.03, 0.08, size=12))
    frames = rng.uniform(size=(12, 1, 32, 32)).astype(np.float32)
    rec = Recording(frames, times, np.zeros(12, bool), "synthetic grid")
    want = np.array([times[3] + 0.011, times[5], times[9] + 0.2])
    fc = core.predict_from(model, cfg, rec, 0, want)
    assert fc.mean.shape == (3, 1, 32, 32)
    # The latent ODE is autonomous, so its solutions are invariant under a shift of the time origin
    # (closed form: z(t) solves z' = f(z) iff z(t − c) does): the same recording on a clock that
    # starts 1000 s later gives the same frames at the shifted times. Asking for the times in
    # another order returns the same frames in that order (one solution, read at each time).
    shifted = Recording(frames, times + 1000.0, np.zeros(12, bool), "synthetic grid, later clock")
    later = core.predict_from(model, cfg, shifted, 0, want + 1000.0)
    np.testing.assert_allclose(later.mean, fc.mean, rtol=0, atol=1e-5)
    order = [2, 0, 1]
    np.testing.assert_allclose(core.predict_from(model, cfg, rec, 0, want[order]).mean, fc.mean[order],
                               rtol=0, atol=1e-6)
    # Forward to t1, then backward from that state to 0: back at the start (unique IVP solution).
    with torch.no_grad():
        z0 = model.encode(torch.from_numpy(frames[None, :3]), sample=False)
        t1 = torch.tensor([0.0, 0.7])
        z1 = model.integrate(z0, t1)[-1]
        back = model.integrate(z1, torch.tensor([0.7, 0.0]))[-1]
    torch.testing.assert_close(back, z0, atol=1e-4, rtol=1e-4)


def test_fill_fills_exactly_the_missing_slots(trained):
    root, model, cfg = trained
    rec = read_recording(root / "drops" / "trial_000", cfg.data)
    assert rec.missing.any(), "fixture should have dropped frames"
    frames, filled = core.fill(model, cfg, rec)
    np.testing.assert_array_equal(filled, rec.missing)
    np.testing.assert_array_equal(frames[~filled], rec.frames[~filled])
    assert np.all(frames[filled].max(axis=(1, 2, 3)) > 0)  # no empty slot left


def test_forecast_and_fill_verbs_write_readable_outputs(trained, tmp_path):
    root, _, _ = trained
    clip = tmp_path / "clip.mp4"
    assert main(["forecast", str(root / "run"), str(root / "rig" / "trial_001"), "--from", "4",
                 "--frames", "12", "--samples", "2", "--out", str(clip)]) == 0
    # reads back with imageio and with OpenCV: 12 frames, same size
    via_imageio = np.stack(list(iio.imiter(clip)))
    cap = cv2.VideoCapture(str(clip))
    count = 0
    while cap.read()[0]:
        count += 1
    assert via_imageio.shape[0] == 12 and count == 12
    for suffix in ("_sheet.png", "_phase.png", "_latents.csv", "_forecast.npz"):
        assert (tmp_path / f"clip{suffix}").is_file(), suffix
    with open(tmp_path / "clip_latents.csv", newline="") as fh:
        rows = list(csv.DictReader(fh))
    assert len(rows) == 2 * 12 and {"sample", "time_s", "s_0", "v_0"} <= set(rows[0])
    out = tmp_path / "filled"
    assert main(["fill", str(root / "run"), str(root / "drops" / "trial_000"), "--out", str(out)]) == 0
    rec_in = read_recording(root / "drops" / "trial_000", C.Config().data)
    back = read_recording(out, C.Config().data)  # the filled folder is itself a complete recording
    assert back.n_frames == rec_in.n_frames and not back.missing.any()
    with open(out / "filled.csv", newline="") as fh:
        marks = [r["origin"] for r in csv.DictReader(fh)]
    assert marks == ["predicted" if m else "recorded" for m in rec_in.missing]
