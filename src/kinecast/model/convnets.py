"""Lean conv encoder and decoder sized for CPU training.

The encoder halves the image with stride-2 3×3 convs until it is at most :data:`BOTTOM` pixels wide,
then a linear head gives the mean and log-variance of a Gaussian. The decoder mirrors it with
stride-2 transposed convs whose channel count shrinks as the resolution grows (few channels at
full resolution keep a 64 px step cheap), then a 3×3 conv outputs the logits.
"""

from __future__ import annotations

import math

import torch
import torch.nn.functional as F
from torch import nn

from .precision import compute, conv_layout

BOTTOM = 4  # spatial size (pixels) of the coarsest feature map
LOGVAR_MIN, LOGVAR_MAX = -12.0, 6.0  # clamp on predicted log-variances, for numerical safety
OUT_GAIN = 0.1  # the decoder's last layer starts small: the first prediction is close to the base image
# Encoders start with small posterior variances (std e^-2 ≈ 0.14): unit-variance noise on the latent
# state at the start drowns the signal and pushes the decoder towards the mean frame.
INIT_LOGVAR = -4.0
# Hidden activation of every conv stage: SiLU (x·sigmoid(x)), smooth like ELU. Measured on this
# torch build's CPU kernels: ELU on a [160, 8, 64, 64] feature map took 68-119 ms, SiLU 2-5 ms, and
# ELU was a quarter of a 64 px training step.
Activation = nn.SiLU


def n_halvings(size: int) -> int:
    """Stride-2 stages that take ``size`` pixels down to at most :data:`BOTTOM`.

    >>> [n_halvings(s) for s in (8, 32, 64, 128)]
    [1, 3, 4, 5]
    """
    return max(1, math.ceil(math.log2(size / BOTTOM)))


def _encoder_channels(base: int, stages: int) -> list[int]:
    """Channels after each encoder stage: base, base, 2·base, 2·base, 4·base, ... (capped at 4·base)."""
    return [base * min(2 ** (i // 2), 4) for i in range(stages)]


class GaussEncoder(nn.Module):
    """Conv net: an image stack (B, C_in, H, W) → (mean, logvar), each (B, out_dim).

    Parameters
    ----------
    in_channels : int
        Input channels (frames × colour channels for stacked inputs).
    size : int
        Input height and width in pixels.
    base : int
        ``cfg.model.enc_channels``.
    out_dim : int
        Size of the Gaussian.
    extra_dim : int
        Size of an optional vector joined to the conv features before the head (the velocity
        encoder gets the position encoder's readings of the context frames).

    The conv trunk runs in ``compute_dtype`` (set by :func:`kinecast.model.precision.use_precision`;
    None = as given), the head in the input's type (float32).
    """

    compute_dtype: torch.dtype | None = None

    def __init__(self, in_channels: int, size: int, base: int, out_dim: int, extra_dim: int = 0):
        super().__init__()
        layers: list[nn.Module] = []
        c_in, side = in_channels, size
        for c_out in _encoder_channels(base, n_halvings(size)):
            layers += [nn.Conv2d(c_in, c_out, 3, stride=2, padding=1), Activation()]
            c_in, side = c_out, (side + 1) // 2
        self.trunk = nn.Sequential(*layers)
        self.head = nn.Linear(c_in * side * side + extra_dim, 2 * out_dim)
        with torch.no_grad():
            self.head.bias[out_dim:].fill_(INIT_LOGVAR)
        self.out_dim = out_dim

    def forward(self, x: torch.Tensor, extra: torch.Tensor | None = None
                ) -> tuple[torch.Tensor, torch.Tensor]:
        with compute(self.compute_dtype, x.device.type):
            h = self.trunk(conv_layout(x, self.compute_dtype)).to(x.dtype).flatten(1)
        if extra is not None:
            h = torch.cat([h, extra], dim=1)
        mean, logvar = self.head(h).chunk(2, dim=1)
        return mean, bounded_logvar(logvar)


def bounded_logvar(x: torch.Tensor, hi: float = LOGVAR_MAX) -> torch.Tensor:
    """``x`` clamped to [LOGVAR_MIN, hi] in value, with the gradient of ``x`` itself.

    A plain clamp has zero gradient outside the range: a log-variance pushed past the top once
    (one large step) stayed there for good, its samples 20× too wide, and the rollouts that
    followed diverged (air-table rig, dynamics stage). With the gradient passed straight through,
    the loss can bring it back (the straight-through estimator, Bengio, Léonard and Courville 2013,
    arXiv:1308.3432).
    """
    return x + (x.clamp(LOGVAR_MIN, hi) - x).detach()


def _decoder_channels(base: int, stages: int) -> list[int]:
    """Input channels of each decoder stage, at resolutions BOTTOM·2^i: 2·base at the bottom, halving
    with every doubling of resolution past 16 px, at least 8."""
    return [max(8, min(2 * base, base * 16 // (BOTTOM * 2 ** i))) for i in range(stages)]


class Decoder(nn.Module):
    """Latent position (..., q) → logits (..., C, size, size).

    A linear layer to a ``BOTTOM``×``BOTTOM`` map, stride-2 transposed convs up to full size, and a
    3×3 conv to the C logit channels. Feature maps are kept channels-last: with few channels at full
    resolution that layout is several times faster on a CPU (measured: the last 3×3 conv of a 64 px
    step, 56 ms → 22 ms forward+backward).

    Parameters
    ----------
    q : int
        Latent position size.
    channels : int
        Output channels (1 grey, 3 RGB).
    size : int
        Output height and width.
    base : int
        ``cfg.model.dec_channels``.

    The first (linear) layer runs in the latent's type, the convs in ``compute_dtype`` (see
    :class:`GaussEncoder`); the logits come out in the latent's type.
    """

    compute_dtype: torch.dtype | None = None

    def __init__(self, q: int, channels: int, size: int, base: int):
        super().__init__()
        stages = n_halvings(size)
        chans = _decoder_channels(base, stages) + [max(8, base // 4)]
        self.c0 = chans[0]
        self.size = size
        self.fc = nn.Linear(q, self.c0 * BOTTOM * BOTTOM)
        layers: list[nn.Module] = []
        for c_in, c_out in zip(chans[:-1], chans[1:]):
            layers += [nn.ConvTranspose2d(c_in, c_out, 4, stride=2, padding=1), Activation()]
        self.up = nn.Sequential(*layers)
        self.out = nn.Conv2d(chans[-1], channels, 3, padding=1)
        with torch.no_grad():
            self.out.weight.mul_(OUT_GAIN)
            self.out.bias.zero_()
        self.native = BOTTOM * 2 ** stages

    def forward(self, s: torch.Tensor) -> torch.Tensor:
        lead = s.shape[:-1]
        h = F.silu(self.fc(s.reshape(-1, s.shape[-1]))).view(-1, self.c0, BOTTOM, BOTTOM)  # the latent at full precision
        with compute(self.compute_dtype, s.device.type):
            h = self.out(self.up(h.contiguous(memory_format=torch.channels_last))).to(s.dtype)
        if self.native != self.size:  # sizes that are not BOTTOM·2^k
            h = F.interpolate(h, size=(self.size, self.size), mode="bilinear", align_corners=False)
        return h.contiguous().view(*lead, *h.shape[1:])
