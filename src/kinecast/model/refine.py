"""Keypoint reads refined by the decoder: each keypoint moved to where its drawing matches the frame.

The keypoint encoder reads positions in one pass (amortised inference). Its reads scatter from frame
to frame about where the objects are: on the air-table rig (two alike pucks) by 0.75-1.9 px/frame²
in their second differences (median per held-out trial, the true puck motion taken out), so a
velocity from three context frames is ~1 px/frame off and a 20-frame extrapolation tens of pixels.
The decoder, trained with the encoder to draw an object at a keypoint, gives a second reading: the
keypoint positions ``s`` whose decoded frame is closest to the frame. :func:`refine_positions` takes
a few Adam steps on ``s`` alone, from the encoder's read, with a step size decayed to zero along a
cosine, minimising the squared difference between decoded and true pixels; the nets are not
changed. Each frame is refined on its own, and each keypoint stays in its basin (a few pixels at
most), so the order of alike objects is left as it was.

Measured on a 5-minute air-table run (4 held-out trials; reads matched to the foreground centroids
of :func:`kinecast.frames.tracks.find_objects`; ``bench/read_precision.py``): jitter 0.75-1.9 → 0.14-0.17 px/frame² with 60
steps from 0.2 px, 0.22-0.25 with 30 steps from 0.5 px, 0.27-0.34 with 20 from 0.6 (about 0.3 ms
per frame and step on 2 cores). Forecasts were not shown to improve (DEVELOPERS.md, thirteenth
session), so ``model.read_refinement`` is off by default.

References
----------
Kim, Y., Wiseman, S., Miller, A. C., Sontag, D. and Rush, A. M. (2018). Semi-amortized variational
autoencoders. ICML (gradient steps on the encoder's output to close the amortisation gap).
Kingma, D. P. and Ba, J. (2015). Adam: a method for stochastic optimization. ICLR.
Loshchilov, I. and Hutter, F. (2017). SGDR: stochastic gradient descent with warm restarts. ICLR
(the cosine decay of the step size).

Examples
--------
>>> import torch
>>> from kinecast.config import Config
>>> from kinecast.model import build_model
>>> cfg = Config()
>>> model = build_model(cfg, 1)
>>> s = torch.zeros(2, model.q)
>>> refine_positions(model, s, model.decode(s).detach(), steps=3, step_px=0.2).shape
torch.Size([2, 4])
"""

from __future__ import annotations

import math

import torch

__all__ = ["refine_positions"]


def refine_positions(model, s: torch.Tensor, frames: torch.Tensor, steps: int, step_px: float) -> torch.Tensor:
    """Keypoint positions ``s`` [N, q] moved to where ``model``'s decoded frames best match ``frames``.

    Parameters
    ----------
    model : LatentODE
        A keypoint model; only its decoder is used, and its weights get no gradient.
    s : Tensor [N, q]
        Starting positions (the encoder's means), normalised image coordinates.
    frames : Tensor [N, C, H, W]
        The frames the positions were read from, in [0, 1].
    steps : int
        Adam steps; 0 returns ``s`` unchanged.
    step_px : float
        Adam's step size in model pixels (the most a coordinate moves per step).

    Returns
    -------
    Tensor [N, q], detached: positions minimising Σ (decoded − frame)² per frame, found locally.
    """
    if steps <= 0:
        return s.detach()
    step = step_px * 2.0 / model.size  # model pixels → normalised units (the frame spans [-1, 1])
    x = s.detach().clone().requires_grad_(True)
    target = frames.detach()
    opt = torch.optim.Adam([x], lr=step)
    with torch.enable_grad():
        for i in range(steps):
            opt.param_groups[0]["lr"] = step * 0.5 * (1.0 + math.cos(math.pi * i / steps))  # cosine decay
            opt.zero_grad(set_to_none=True)
            err = torch.sigmoid(model.decode_logits(x).float()) - target
            (grad,) = torch.autograd.grad((err ** 2).sum(), x)
            x.grad = grad
            opt.step()
    return x.detach()
