"""A learning check that could fail: `fit` with a step budget on a short synthetic rig must cut the
forecast error of a fresh model several-fold and beat the mean frame by a wide margin.

Sources: the per-pixel temporal mean is the best constant predictor under squared error (a fact of
least squares), so beating it means the model tracks the motion; the initial error is that of a fresh
model (median-frame background and a near-zero residual). The clips are the tool's own synthetic
pendulum rig (invented data, used here only as the thing to fit). The default staged recipe with the
keypoint encoder has its own learning check in test_train_staged.py; this one runs the end-to-end
comparison recipe (dense encoder, velocity encoder alone) through the same trainer.
"""

from __future__ import annotations

import numpy as np
import torch

from kinecast import config as C
from kinecast.frames import read_recording
from kinecast.model import build_model, to_model_time
from kinecast.rigs import write_rig
from kinecast.runfolder import load_run
from kinecast.train import fit

FRAMES, SIZE, STEPS = 24, 32, 400
# Measured on 2026-12-03 (2 cores, train seeds 0-2, this exact setup): the forecast error fell 8.1-9.3x
# below the fresh model's and to 0.125-0.143 of the mean frame's, in ~35 s each; the bounds below
# keep a margin for other machines and seeds.
MIN_CUT, MAX_OF_MEAN_FRAME = 5.0, 0.25


def _rollout_mse(model, frames, t, k):
    """Error of the deterministic rollout from the first k frames over the whole clip."""
    with torch.no_grad():
        pred, latents = model.rollout(frames[None, :k], t)
    return float(((pred[0, 0] - frames) ** 2).mean()), latents[0, 0]


def test_fit_with_a_step_budget_cuts_the_error_and_beats_the_mean_frame(tmp_path):
    torch.manual_seed(0)
    write_rig("pendulum", tmp_path / "rig", trials=3, frames=FRAMES, seed=1, size=SIZE, fps=30.0)
    cfg = C.apply_overrides(C.Config(), [
        f"data.size={SIZE}", "model.encoder=dense", "model.velocity_from_positions=false",
        "train.recipe=end_to_end", "train.lr=5e-3", f"train.steps={STEPS}", "train.budget=0", "train.threads=2",
        "train.val_every=50", "train.checkpoint_every=100", "train.calibration_samples=0"])
    cfg.data.cache = False
    fit([tmp_path / "rig"], tmp_path / "run", cfg, show_progress=False)
    model, run_cfg = load_run(tmp_path / "run")
    rec = read_recording(tmp_path / "rig" / "trial_000", run_cfg.data)  # a training trial
    frames = torch.as_tensor(rec.frames)
    t = to_model_time(rec.times - rec.times[0], run_cfg)
    k = run_cfg.model.velocity_frames

    torch.manual_seed(0)
    fresh = build_model(run_cfg, frames.shape[1])
    fresh.set_background(torch.as_tensor(np.median(rec.frames, axis=0)))
    initial, _ = _rollout_mse(fresh.eval(), frames, t, k)
    final, latents = _rollout_mse(model, frames, t, k)
    mean_frame = float(((frames - frames.mean(dim=0, keepdim=True)) ** 2).mean())
    # Source: learning check (common practice) — well below the starting error ...
    assert final < initial / MIN_CUT, (initial, final)
    # ... and well below the best constant predictor (least-squares fact: the temporal mean).
    assert final < MAX_OF_MEAN_FRAME * mean_frame, (mean_frame, final)
    # The motion is carried by the latent trajectory, not by a memorised frame sequence: the
    # latent position moves over the clip by more than the encoder's own noise scale (≈ 0.14).
    s = latents[:, :run_cfg.model.latent_dim]
    assert float((s - s[0]).norm(dim=1).max()) > 0.5
