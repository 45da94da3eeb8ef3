"""Fit a fresh model to one short clip: a smoke check of the model, for demos and tests.

This is not the trainer (no windows, curriculum, validation or checkpoints; see ``kinecast.train``):
every step sees the whole clip, so it shows whether the model can represent and reproduce a motion.
"""

from __future__ import annotations

import math

import torch
from tqdm import tqdm

from .latent_ode import LatentODE, build_model

KL_WARMUP_SHARE = 0.3  # the KL weight rises from 0 to 1 over this share of the steps
LR_FLOOR = 0.05  # the cosine learning-rate decay ends at this fraction of cfg.train.lr


def fit_clip(frames: torch.Tensor, t: torch.Tensor, cfg, steps: int, batch: int = 2,
             progress: bool = True) -> tuple[LatentODE, list[float]]:
    """Fit a new model to one clip.

    Adam at ``cfg.train.lr`` with cosine decay to ``LR_FLOOR``·lr, gradient clipping at
    ``cfg.train.grad_clip`` (0 = off), a linear KL warm-up over the first ``KL_WARMUP_SHARE`` of the
    steps, and the median frame as background when ``cfg.model.background`` is on.

    Parameters
    ----------
    frames : Tensor [T, C, H, W]
        The clip, intensities in [0, 1], H = W = ``cfg.data.size``.
    t : Tensor [T]
        Model times of the frames (increasing).
    cfg : Config
    steps : int
        Optimisation steps.
    batch : int
        Copies of the clip per step (independent posterior and weight draws).
    progress : bool
        Show a progress bar.

    Returns
    -------
    model : LatentODE
        In eval mode.
    losses : list of float
        Loss at every step.
    """
    if steps < 1 or batch < 1:
        raise ValueError(f"fit_clip: steps and batch must be positive, got {steps}, {batch}")
    model = build_model(cfg, frames.shape[1])
    if cfg.model.background:
        model.set_background(frames.median(dim=0).values)
    opt = torch.optim.Adam(model.parameters(), lr=cfg.train.lr)
    x = frames[None].repeat(batch, 1, 1, 1, 1)  # contiguous: convs on expanded views are slow
    losses = []
    for step in tqdm(range(steps), desc="fitting", disable=not progress):
        decay = 0.5 * (1.0 + math.cos(math.pi * step / steps))
        for group in opt.param_groups:
            group["lr"] = cfg.train.lr * (LR_FLOOR + (1.0 - LR_FLOOR) * decay)
        beta = min(1.0, step / max(1.0, KL_WARMUP_SHARE * steps))
        out = model(x, t, n_total_frames=len(frames), beta=beta)
        opt.zero_grad(set_to_none=True)
        out["loss"].backward()
        if cfg.train.grad_clip > 0:
            torch.nn.utils.clip_grad_norm_(model.parameters(), cfg.train.grad_clip)
        opt.step()
        losses.append(float(out["loss"].detach()))
    return model.eval(), losses
