"""Keypoint position encoder and blob decoder: the latent position is K image coordinates.

Encoder: a frame and its difference from the static background → a few conv layers at half
resolution → K heat maps → a spatial softmax per map → K expected (x, y) positions in normalised
image coordinates ([-1, 1] from the left/top edge to the right/bottom edge, pixel centres at
``(2i + 1) / n − 1``). A small head on the pooled features gives each coordinate's log-variance.

Decoder: a Gaussian blob of width ``blob_std`` at each keypoint, drawn on a half-resolution grid
together with the background and the coordinate grid → dilated 3×3 convs (a receptive field of
about half the frame, so an extended object such as a rod can be drawn around its keypoints) →
sub-pixel output (pixel shuffle) to full resolution: residual logits over the background.

Both are translation-equivariant by construction, which is why they place an object they have not
seen at a given place correctly, where a dense head memorises the layouts of the training frames.

References
----------
Levine, S., Finn, C., Darrell, T. and Abbeel, P. (2016). End-to-end training of deep visuomotor
policies. JMLR 17 (the spatial softmax: expected image coordinates of a softmax over a feature map).
Shi, W. et al. (2016). Real-time single image and video super-resolution using an efficient
sub-pixel convolutional neural network. CVPR (pixel shuffle).

Examples
--------
>>> enc = KeypointEncoder(1, 32, 16, 2)
>>> m, lv = enc(torch.zeros(3, 1, 32, 32), torch.zeros(1, 32, 32))
>>> m.shape, lv.shape
(torch.Size([3, 4]), torch.Size([3, 4]))
"""

from __future__ import annotations

import math

import torch
import torch.nn.functional as F
from torch import nn

from .convnets import OUT_GAIN, Activation, bounded_logvar
from .precision import compute, conv_layout

DILATIONS = (1, 2, 4)  # dilations of the decoder's 3×3 convs: receptive field ≈ 2·(1+2·Σd) px at full size
UPSCALE = 2  # both nets work at 1/UPSCALE of the frame size (pixel shuffle back up in the decoder)
# Starting posterior std of a keypoint coordinate (image units, the frame spans [-1, 1]): 0.5 px at
# 64 px, a quarter of the decoder's default blob width (model.blob_std = 0.06). The positions stage
# is deterministic until its escape test, so the log-variance gets no gradient before it and this is
# the noise of the first sampled steps. The encoders' shared start (convnets.INIT_LOGVAR, std 0.135
# = 4.3 px at 64 px) displaced the keypoints by more than a small object's size there, and one run
# (spring rig, gradient look, seed 1) fell back from 0.3x to 0.99x the background's error within
# 15 steps of its escape and never found the object again (bench/results/recipe_runs.jsonl).
INIT_STD = 0.015
# Largest posterior std of a keypoint coordinate, as a multiple of the decoder's blob std: a
# keypoint's position is known at least to the width of the blob drawn there. Unbounded (up to
# convnets.LOGVAR_MAX, std 20 image widths) one coordinate's log-variance rose to that clamp in the
# positions stage (KL ≈ 200 nats a frame), its samples flew all over the frame and the encoder lost
# the object (pendulum rig, dark-on-light look, seed 1; bench/results/recipe_runs.jsonl).
MAX_STD_BLOBS = 1.0
# Width of the bump each heat map is kept close to by heat_map_shape, in heat-map cells (2 px at
# UPSCALE 2). Unchecked, the positions stage sharpened maps into one cell (a saturated softmax): the
# keypoints then sat exactly on the 2-px grid of cell centres (all of one run's held-out positions
# within 0.05 px of a centre; pendulum rig, textured look, seed 2) and the finite-difference
# velocity from three such positions was wrong in size and sign. One cell is the width used for the
# target heat maps of numerical coordinate regression (Nibali et al. 2018, σ = 1 heat-map pixel).
HEAT_STD_CELLS = 1.0
# Half-width, in heat-map cells, of the window a keypoint is read in where ``model.keypoint_window`` is
# auto and the objects are alike: a bump HEAT_STD_CELLS wide is inside it to 3 std, and another object
# (the air table's pucks are ~3 cells across) is outside it unless the two touch.
AUTO_WINDOW_CELLS = 3

__all__ = ["KeypointEncoder", "KeypointDecoder", "pixel_grid", "to_model_pixels", "spatial_softmax", "expected_xy",
           "window_expected_xy", "heat_map_shape", "draw_blobs"]


def pixel_grid(n: int, device=None, dtype=torch.float32) -> torch.Tensor:
    """Normalised coordinates of ``n`` pixel centres across [-1, 1]: ``(2i + 1) / n − 1``.

    >>> pixel_grid(4).tolist()
    [-0.75, -0.25, 0.25, 0.75]
    """
    return (2 * torch.arange(n, device=device, dtype=dtype) + 1) / n - 1


def to_model_pixels(xy, n: int):
    """Normalised image coordinates (:func:`pixel_grid` units) → model pixels ``(x + 1)·n/2 − 0.5``
    (pixel centres at integers); numpy arrays or tensors.

    >>> float(to_model_pixels(pixel_grid(4)[0], 4))
    0.0
    """
    return (xy + 1.0) * n / 2.0 - 0.5


def spatial_softmax(logits: torch.Tensor) -> torch.Tensor:
    """Expected (x, y) of a softmax over each map: ``(B, K, H, W)`` → ``(B, K, 2)``.

    x runs along W (left to right), y along H (top to bottom), in :func:`pixel_grid` units.
    """
    return expected_xy(heat_softmax(logits))


def heat_softmax(logits: torch.Tensor, log: bool = False) -> torch.Tensor:
    """Softmax over each map's cells: ``(B, K, H, W)`` → probabilities (or their logs) of the same shape."""
    B, K, H, W = logits.shape
    f = torch.log_softmax if log else torch.softmax
    return f(logits.reshape(B, K, H * W), dim=-1).reshape(B, K, H, W)


def expected_xy(p: torch.Tensor) -> torch.Tensor:
    """Expected (x, y) under probability maps ``p`` ``(B, K, H, W)`` → ``(B, K, 2)``."""
    H, W = p.shape[-2:]
    x = (p.sum(dim=2) * pixel_grid(W, p.device, p.dtype)).sum(-1)
    y = (p.sum(dim=3) * pixel_grid(H, p.device, p.dtype)).sum(-1)
    return torch.stack([x, y], dim=-1)


def window_expected_xy(p: torch.Tensor, radius: int) -> torch.Tensor:
    """Expected (x, y) under each map ``p`` ``(B, K, H, W)`` restricted to the square of cells within
    ``radius`` cells of its most probable cell (renormalised there) → ``(B, K, 2)``; ``radius`` 0 = the
    whole map (:func:`expected_xy`).

    The whole-map expectation is pulled towards any mass far from the peak: a conv net fires alike on
    alike objects, so a keypoint's map also holds some mass on the other object, and the encoder can
    only suppress it by sharpening the map into a cell (which snaps the keypoint to the cell grid).
    Inside the window the far mass is ignored and the read follows the peak's own bump. Integrating
    a heat map for a coordinate is Sun et al. (2018), "Integral human pose regression", ECCV;
    integrating only near the maximum against multi-modal maps is common practice (stated from
    memory, no single source).

    Examples
    --------
    >>> g = draw_blobs(torch.tensor([[[0.5, 0.0], [-0.5, 0.0]]]), 32, 2 / 32)
    >>> p = g[:, :1] + 0.2 * g[:, 1:]  # one map: a bump at x = 0.5 and a weaker one at x = -0.5
    >>> p = p / p.sum()
    >>> round(float(expected_xy(p)[0, 0, 0]), 2), round(float(window_expected_xy(p, 3)[0, 0, 0]), 2)
    (0.33, 0.5)
    """
    if radius <= 0:
        return expected_xy(p)
    B, K, H, W = p.shape
    with torch.no_grad():
        peak = p.flatten(2).argmax(-1)
        rows = (torch.arange(H, device=p.device) - (peak // W)[..., None]).abs() <= radius  # (B, K, H)
        cols = (torch.arange(W, device=p.device) - (peak % W)[..., None]).abs() <= radius   # (B, K, W)
        inside = (rows[..., :, None] & cols[..., None, :]).to(p.dtype)
    q = p * inside
    return expected_xy(q / q.sum(dim=(2, 3), keepdim=True).clamp_min(torch.finfo(p.dtype).tiny))


def heat_map_shape(log_p: torch.Tensor, width_cells: float = HEAT_STD_CELLS,
                   centre: torch.Tensor | None = None) -> torch.Tensor:
    """Mean over maps of KL(g ‖ p), g a Gaussian bump of std ``width_cells`` cells at the map's own
    expected position (held fixed), normalised over the map's cells; ``log_p`` ``(B, K, H, W)`` are
    the maps' log-probabilities (:func:`heat_softmax` with ``log``: no underflow when sharp);
    ``centre`` ``(B, K, 2)``: where the bumps sit (default: the maps' own expected positions), e.g.
    the keypoints as read by :func:`window_expected_xy`.

    Zero when a map is that bump; it grows without bound as a map sharpens into one cell (−log p of
    the cells around the peak), with a gradient that does not vanish there, unlike the spatial
    softmax's own. It leaves the position alone and only keeps the map wide enough that its expected
    position moves smoothly between cell centres. Shape term after Nibali et al. (2018), who regularise
    heat maps towards a Gaussian at the target (here: at the map's own mean).

    References
    ----------
    Nibali, A., He, Z., Morgan, S. and Prendergast, L. (2018). Numerical coordinate regression with
    convolutional neural networks. arXiv:1801.07372.

    Examples
    --------
    >>> g = draw_blobs(torch.tensor([[[0.1, -0.2]]]), 16, 2 / 16)  # a bump of one cell's std
    >>> abs(round(float(heat_map_shape(torch.log(g / g.sum()))), 4))
    0.0
    """
    B, K, H, W = log_p.shape
    mean = (expected_xy(log_p.exp()) if centre is None else centre).detach()
    cell = 2.0 / W  # normalised width of one cell
    g = draw_blobs(mean.reshape(B * K, 1, 2), W, width_cells * cell).reshape(B, K, H, W)
    g = g / g.sum(dim=(2, 3), keepdim=True)
    kl = (torch.special.xlogy(g, g) - g * log_p).sum(dim=(2, 3))
    return kl.mean()


def draw_blobs(points: torch.Tensor, size: int, std: float) -> torch.Tensor:
    """Unit-height Gaussian blobs: points ``(N, K, 2)`` (x, y normalised) → maps ``(N, K, size, size)``.

    ``std`` is in normalised units (1.0 = half the frame width). Separable: the blob is the outer
    product of a Gaussian in y and one in x.
    """
    g = pixel_grid(size, points.device, points.dtype)
    gx = torch.exp(-0.5 * ((g - points[..., 0:1]) / std) ** 2)  # (N, K, W)
    gy = torch.exp(-0.5 * ((g - points[..., 1:2]) / std) ** 2)  # (N, K, H)
    return gy.unsqueeze(-1) * gx.unsqueeze(-2)


def _half(size: int) -> int:
    return max(2, size // UPSCALE)


class KeypointEncoder(nn.Module):
    """Frame (B, C, H, W) and background (C, H, W) → keypoint means and log-variances, each (B, 2K).

    The output interleaves coordinates as ``[x1, y1, x2, y2, ...]``. It runs in float32 whatever
    ``train.precision`` says unless ``low_trunk`` (``model.keypoint_trunk_low_precision``), and then
    only its conv trunk follows it: with its trunk and heat maps in bfloat16 (2⁻⁸ relative
    rounding of the logits), 5-minute spring runs lost the mass (keypoints 3.0-3.4 px off, two of
    four paired runs failed); kept in float32 the same runs succeeded (DEVELOPERS.md, ninth session).
    """

    compute_dtype: torch.dtype | None = None  # set by use_precision; the trunk only, where ``low_trunk``

    def __init__(self, channels: int, size: int, base: int, keypoints: int, init_std: float = INIT_STD,
                 max_std: float = 1.0, window: int = 0, low_trunk: bool = False):
        super().__init__()
        self.low_trunk = bool(low_trunk)
        # read each map within this many cells of its peak; 0, or auto (-1) not yet resolved by fit
        # (a model built directly from the defaults), reads the whole map
        self.window = max(0, int(window))
        self.logvar_max = 2.0 * math.log(max_std)
        c = max(8, base // 2)
        self.size, self.half, self.k = size, _half(size), keypoints
        self.trunk = nn.Sequential(
            nn.Conv2d(2 * channels, c, 3, stride=UPSCALE, padding=1), Activation(),
            nn.Conv2d(c, c, 3, padding=1), Activation(),
            nn.Conv2d(c, c, 3, padding=2, dilation=2), Activation())
        self.heat = nn.Conv2d(c, keypoints, 1)
        self.logvar = nn.Linear(c, 2 * keypoints)
        self.init_std = float(init_std)
        self.reset_spread()

    def reset_spread(self) -> list[nn.Parameter]:
        """Every keypoint's posterior std back to ``init_std`` whatever the frame; returns the
        parameters changed."""
        with torch.no_grad():
            self.logvar.weight.zero_()
            self.logvar.bias.fill_(2.0 * math.log(self.init_std))
        return [self.logvar.weight, self.logvar.bias]

    def forward(self, x: torch.Tensor, background: torch.Tensor, with_maps: bool = False,
                whole_map: bool = False) -> tuple:
        """Means and log-variances (B, 2K); with ``with_maps`` also the heat maps' log-probabilities
        (B, K, h, w). The means are read within ``window`` cells of each map's peak
        (:func:`window_expected_xy`), or over the whole map where ``whole_map`` or ``window`` is 0."""
        x = torch.cat([x, x - background.to(x)], dim=1)
        dtype = self.compute_dtype if self.low_trunk else None
        with compute(dtype, x.device.type):
            h = self.trunk(conv_layout(x, dtype)).to(x.dtype)
        heat = self.heat(h)
        log_maps = heat_softmax(heat, log=True)
        points = window_expected_xy(log_maps.exp(), 0 if whole_map else self.window)
        logvar = bounded_logvar(self.logvar(h.mean(dim=(2, 3))), self.logvar_max)
        return (points.flatten(1), logvar, log_maps) if with_maps else (points.flatten(1), logvar)


class KeypointDecoder(nn.Module):
    """Keypoints (..., 2K) and background (C, H, W) → residual logits (..., C, size, size).

    The blobs are drawn in float32; the conv body runs in ``compute_dtype`` (set by
    :func:`kinecast.model.precision.use_precision`; None = float32) and the logits come out in float32.
    """

    compute_dtype: torch.dtype | None = None

    def __init__(self, keypoints: int, channels: int, size: int, base: int, blob_std: float):
        super().__init__()
        c = max(8, base // 2)
        self.size, self.half, self.k, self.channels = size, _half(size), keypoints, channels
        self.blob_std = float(blob_std)
        layers: list[nn.Module] = []
        c_in = keypoints + channels + 2
        for d in DILATIONS:
            layers += [nn.Conv2d(c_in, c, 3, padding=d, dilation=d), Activation()]
            c_in = c
        self.body = nn.Sequential(*layers)
        self.out = nn.Conv2d(c, channels * UPSCALE * UPSCALE, 3, padding=1)
        with torch.no_grad():
            self.out.weight.mul_(OUT_GAIN)
            self.out.bias.zero_()

    def forward(self, s: torch.Tensor, background: torch.Tensor) -> torch.Tensor:
        lead = s.shape[:-1]
        pts = s.reshape(-1, self.k, 2)
        n = pts.shape[0]
        blobs = draw_blobs(pts, self.half, self.blob_std)
        bg = F.interpolate(background[None].to(s), size=(self.half, self.half), mode="area")
        g = pixel_grid(self.half, s.device, s.dtype)
        grid = torch.stack([g.expand(self.half, -1), g[:, None].expand(-1, self.half)])[None]
        x = torch.cat([blobs, bg.expand(n, -1, -1, -1), grid.expand(n, -1, -1, -1)], dim=1)
        x = x.contiguous(memory_format=torch.channels_last)
        with compute(self.compute_dtype, x.device.type):
            h = F.pixel_shuffle(self.out(self.body(x)).to(s.dtype), UPSCALE)
        if h.shape[-1] != self.size:  # odd sizes
            h = F.interpolate(h, size=(self.size, self.size), mode="bilinear", align_corners=False)
        return h.contiguous().view(*lead, *h.shape[1:])
