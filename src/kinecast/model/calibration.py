"""A spread scale for the sampled futures, fitted on held-out trials so that they cover the truth.

The posterior draws (s0, v0 and the field's weights) of a model trained for minutes are often far
too confident: the truth falls inside the sampled futures' central band much less often than the
band's share. :func:`coverage_scale` finds the one factor by which the samples' deviations from
their mean must be multiplied for the truth to lie inside the central ``band`` region in ``band``
of the cases; :func:`fit_spread_scale` measures it on latent positions — the keypoints' image
coordinates (the encoder's readings of the true frames against free rollouts from the first
frames) — so no frame is decoded. The forecast applies it in :meth:`LatentODE.rollout`.

References
----------
T. Gneiting, F. Balabdaoui and A. E. Raftery (2007). Probabilistic forecasts, calibration and
sharpness. J. R. Statist. Soc. B 69, 243-268 (calibration of predictive distributions).
"""

from __future__ import annotations

import torch

from .staged import encode_all

__all__ = ["coverage_scale", "fit_spread_scale"]

# Smallest spread radius trusted (normalised image units, ~0.03 px at 64 px): below it the samples
# agree to rounding and the ratio says nothing.
MIN_RADIUS = 1e-3
SCALE_RANGE = (1e-2, 1e3)  # the fitted factor is clipped to this range


def coverage_scale(points: torch.Tensor, truth: torch.Tensor, band: float) -> float:
    """The factor for sampled ``points`` [M, S, D] (M cases, S samples of a D-dimensional point)
    that puts ``truth`` [M, D] inside the central ``band`` region in a share ``band`` of the cases.

    The central region of a case is the ball around the samples' mean whose radius is the
    ``band`` quantile of the samples' distances from that mean; the factor is the ``band``
    quantile over the cases of (truth's distance from the mean) / radius. Cases whose radius is
    below :data:`MIN_RADIUS` are left out; 1.0 when none is left.

    Examples
    --------
    >>> g = torch.Generator().manual_seed(0)
    >>> pts = torch.randn(4000, 200, 2, generator=g)          # samples with std 1 per axis
    >>> truth = 3 * torch.randn(4000, 2, generator=g)         # the truth scatters 3x wider
    >>> round(coverage_scale(pts, truth, 0.9))  # ≈ 3 (a little above: the radius is estimated)
    3
    """
    centre = points.mean(dim=1)
    radius = torch.quantile((points - centre[:, None]).norm(dim=-1), band, dim=1)
    keep = radius > MIN_RADIUS
    if not bool(keep.any()):
        return 1.0
    ratio = (truth - centre).norm(dim=-1)[keep] / radius[keep]
    return float(torch.quantile(ratio, band).clamp(*SCALE_RANGE))


@torch.no_grad()
def fit_spread_scale(model, clips, band: float, samples: int, generator: torch.Generator) -> float:
    """:func:`coverage_scale` of free rollouts against the encoder's readings of the true frames.

    Parameters
    ----------
    model : LatentODE
    clips : list of (frames [T, C, H, W], model times [T] from 0, present [T] bool)
        Held-out trials; each is rolled out from its first ``velocity_frames`` frames (which must
        be present) as :meth:`LatentODE.rollout` samples futures (posterior draws of s0, v0 and the
        weights) and judged on the present frames after those.
    band : float
        Central share (``score.band``).
    samples : int
        Futures drawn per clip.

    Returns
    -------
    float
        The spread scale (1.0 for a model without positions that move).
    """
    k, q = model.k, model.q
    moving = model.field.moving.bool()
    dim = 2 if model.keypoints else 1  # a keypoint's (x, y) is one point; a dense latent is 1-D each
    if not bool(moving.any()):
        return 1.0
    points, truths = [], []
    for frames, t, present in clips:
        lat = model.sample_latents(frames[None, :k], t, samples, mean_weights=False, sample_init=True,
                                   generator=generator, ctx_t=t[:k])[:, 0].transpose(0, 1)  # [T, S, 2q]
        keep = torch.as_tensor(present, dtype=torch.bool)[k:]
        lat = lat[k:, :, :q][keep][..., moving]                                        # [n, S, m]
        truth = encode_all(model, frames[k:][keep])[0][:, moving]                    # [n, m]
        points.append(lat.reshape(lat.shape[0], samples, -1, dim).transpose(1, 2).reshape(-1, samples, dim))
        truths.append(truth.reshape(-1, dim))
    return coverage_scale(torch.cat(points), torch.cat(truths), band)
