"""A spread scale for the sampled futures, fitted on held-out trials so that they cover the truth.

The posterior draws (s0, v0 and the field's weights) of a model trained for minutes are often far
too confident: the truth falls inside the sampled futures' central band much less often than the
band's share. :func:`coverage_scale` finds the one factor by which the samples' deviations from
their mean must be multiplied for the truth to lie inside the central ``band`` region in ``band``
of the cases; :func:`calibrate` measures it first on latent positions — the keypoints' image
coordinates (the encoder's readings of the true frames against free rollouts from the first
frames) — then refines it on what the score measures: the object positions tracked (foreground
centroids) in the decoded futures against those tracked in the true frames. The tracked positions
include what the latents leave out (the decoder's drawing offset, a keypoint that sits off the
object's centroid), and their spread is in pixels, not in a latent posterior that may be tiny.
The forecast applies the scale in :meth:`LatentODE.rollout`. ``fit`` calls :func:`calibrate` on the
held-out trials and on the training trials and keeps the larger scale
(:func:`kinecast.train.loop.calibrate_run` says why).

The drawn futures alone leave out the likelihood's observation noise: where every future draws the
object's edge at the same place the band is a point, and a true pixel a little brighter or darker
lies outside it (object-region band coverage 0.28-0.53 at a calibrated position coverage, measured
on the pendulum and spring). :func:`calibrate` then fits the standard deviation of Gaussian pixel
noise that, added to the futures, makes the object-region band cover the truth as often as the
band says; :func:`band_inside` is the band test of that predictive distribution, used by the scores.

References
----------
T. Gneiting, F. Balabdaoui and A. E. Raftery (2007). Probabilistic forecasts, calibration and
sharpness. J. R. Statist. Soc. B 69, 243-268 (calibration of predictive distributions).
"""

from __future__ import annotations

import numpy as np
import torch
from scipy.special import ndtr

from ..frames.tracks import centroid_track, object_region
from .latent_ode import spread_about_mean
from .staged import encode_all

__all__ = ["band_inside", "calibrate", "coverage_scale", "disc_radius", "noise_for_coverage", "sample_level"]

# Smallest spread radius trusted (normalised image units, ~0.03 px at 64 px): below it the samples
# agree to rounding and the ratio says nothing.
MIN_RADIUS = 1e-3
# Smallest spread radius of tracked positions trusted (model pixels): the centroid of a drawn
# object moves by less than this for sub-pixel latent changes blurred by the decoder
MIN_RADIUS_PX = 0.02
SCALE_RANGE = (1e-2, 1e3)  # the fitted factor is clipped to this range
# Refinements of the scale on tracked positions. The tracked spread grows about in proportion to
# the scale, so one round lands near the answer and the next absorbs what is not proportional. When
# a few frames decide the quantile the rounds can jump between two values for good (stored runs:
# air table 6.85, 7.93, 6.78, 7.90, ...; spring 1.75, 1.36, 1.51, 1.45, ...), so the scale kept is
# the geometric mean of the last two rounds: the fixed point where they agree, between the two
# where they do not.
SCALE_ROUNDS = 3
NOISE_MAX = 0.5  # largest pixel noise std fitted (intensities in [0, 1])
NOISE_STEPS = 30  # bisection steps: the noise is found to NOISE_MAX / 2**30


def sample_level(share: float, n: int, two_sided: bool = False) -> float:
    """The quantile level at which ``n`` samples' empirical quantile (numpy's linear interpolation)
    bounds a region that holds a new draw of the samples' law with probability ``share``.

    A new draw falls below the k-th of n order statistics with probability k / (n + 1), whatever
    the law, since the n + 1 values are exchangeable. numpy's quantile at level q sits at order
    position 1 + q (n - 1). So a one-sided bound needs q = (share (n + 1) - 1) / (n - 1), and a
    central interval a width of share (n + 1) / (n - 1) between its two levels. The plain level
    ``share`` holds a new draw less often, the fewer the samples: for 16 samples a one-sided 0.9
    quantile holds it with probability 14.5 / 17 = 0.85. Levels are capped at 1 (the extreme
    sample), so fewer than share / (1 - share) samples (9 at 0.9) cannot reach ``share``: a new
    draw then lands inside with probability n / (n + 1) one-sided.

    References
    ----------
    H. A. David and H. N. Nagaraja (2003). Order Statistics, 3rd ed. Wiley (the distribution of a
    new draw's rank among n samples; from memory).

    Examples
    --------
    >>> round(sample_level(0.9, 16), 4), round(sample_level(0.9, 1000), 4)
    (0.9533, 0.9008)
    >>> sample_level(0.9, 4)          # too few samples: the farthest one
    1.0
    """
    if n < 2:
        return 1.0
    level = share * (n + 1) / (n - 1) if two_sided else (share * (n + 1) - 1) / (n - 1)
    return float(min(1.0, max(0.0, level)))


def disc_radius(distances: np.ndarray, band: float) -> np.ndarray:
    """The radius of the central ``band`` region around n sampled points' mean: the disc that holds
    a new draw of the points' law with probability ``band``.

    ``distances`` [..., n] are the samples' distances from their own mean. Each is first taken
    from the mean of the other n - 1 samples (n / (n - 1) times it, exactly), as the new draw's is
    taken from a mean it did not enter; the radius is then their :func:`sample_level` quantile.
    Without both steps the region shrinks with the number of samples: with 16 samples the plain
    0.9 quantile of distances held a new 2-D normal draw 0.82 of the time, and 0.90-0.91 with
    them, for 9 to 256 samples alike (numpy simulations of 40,000-200,000 cases, normal and
    Student-t with 3 degrees of freedom).

    Examples
    --------
    >>> rng = np.random.default_rng(0)
    >>> pts = rng.normal(size=(20000, 16, 2)); new = rng.normal(size=(20000, 2))
    >>> centre = pts.mean(axis=1)
    >>> radius = disc_radius(np.linalg.norm(pts - centre[:, None], axis=-1), 0.9)
    >>> round(float((np.linalg.norm(new - centre, axis=-1) <= radius).mean()), 2)  # ≈ 0.9
    0.91
    """
    d = np.asarray(distances, dtype=np.float64)
    n = d.shape[-1]
    return np.quantile(d * (n / max(n - 1, 1)), sample_level(band, n), axis=-1)


def coverage_scale(points: torch.Tensor, truth: torch.Tensor, band: float, min_radius: float = MIN_RADIUS) -> float:
    """The factor for sampled ``points`` [M, S, D] (M cases, S samples of a D-dimensional point)
    that puts ``truth`` [M, D] inside the central ``band`` region in a share ``band`` of the cases.

    The central region of a case is the ball around the samples' mean of radius
    :func:`disc_radius`; the factor is the ``band`` quantile over the cases of (truth's distance
    from the mean) / radius. Cases whose radius is below ``min_radius`` are left out; 1.0 when none
    is left.

    Examples
    --------
    >>> g = torch.Generator().manual_seed(0)
    >>> pts = torch.randn(4000, 200, 2, generator=g)          # samples with std 1 per axis
    >>> truth = 3 * torch.randn(4000, 2, generator=g)         # the truth scatters 3x wider
    >>> round(coverage_scale(pts, truth, 0.9), 1)
    3.0
    """
    centre = points.mean(dim=1)
    spread = (points - centre[:, None]).norm(dim=-1).detach().cpu().numpy()
    radius = torch.as_tensor(disc_radius(spread, band), device=points.device)
    keep = radius > min_radius
    if not bool(keep.any()):
        return 1.0
    ratio = (truth - centre).norm(dim=-1).double()[keep] / radius[keep]
    return float(torch.quantile(ratio, band).clamp(*SCALE_RANGE))


@torch.no_grad()
def calibrate(model, clips, band: float, samples: int, generator: torch.Generator,
              floor: float = 0.0) -> tuple[float, float, float]:
    """The spread scale and then the pixel noise of the sampled futures, from one set of drawn futures.

    The spread scale puts the true object positions inside the central ``band`` region of the
    futures' positions in a share ``band`` of the frames: first :func:`coverage_scale` of the
    futures' latent positions against the encoder's readings of the true frames (nothing
    decoded); then :data:`SCALE_ROUNDS` rounds of :func:`coverage_scale` on tracked positions
    (foreground centroids, as :func:`kinecast.score.metrics.position_coverage` tracks them) of the
    same futures decoded at the current scale, each multiplying the scale by the factor found;
    the scale kept is the geometric mean of the last two rounds (:data:`SCALE_ROUNDS` says why).
    The pixel noise is :func:`noise_for_coverage` of the futures decoded at that scale against
    the true frames, over the object region of every frame
    (:func:`kinecast.frames.tracks.object_region`, around the futures' mean).

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
    floor : float
        Smallest scale kept (``train.spread_floor``): a fit below it is raised to it before the
        pixel noise is fitted.

    Returns
    -------
    (float, float, float)
        The spread scale kept (1.0 for a model without positions that move), the pixel noise's
        standard deviation at that scale (intensities in [0, 1]; 0.0 when no frame can be judged)
        and the scale the clips alone gave, before ``floor``.
    """
    draws = _draw(model, clips, samples, generator)
    fitted = _spread_scale(model, draws, band)
    scale = max(fitted, floor)
    return scale, _pixel_noise(model, draws, band, scale), fitted


def _draw(model, clips, samples: int, generator) -> list[tuple[torch.Tensor, torch.Tensor]]:
    """Per clip with a present frame after the context: the futures' latent positions [S, n, q] at
    those frames (drawn as :meth:`LatentODE.rollout` draws them, before any spread scale) and the
    true frames [n, C, H, W]."""
    k, q = model.k, model.q
    draws = []
    for frames, t, present in clips:
        lat = model.sample_latents(frames[None, :k], t, samples, mean_weights=False, sample_init=True,
                                   generator=generator, ctx_t=t[:k])[:, 0]                # [S, T, 2q]
        keep = torch.as_tensor(present, dtype=torch.bool, device=lat.device)[k:]
        if bool(keep.any()):
            draws.append((lat[:, k:][:, keep][..., :q], frames[k:][keep]))
    return draws


def _background(model):
    return model.background.detach().cpu().numpy() if model.cfg.background else None


def _spread_scale(model, draws, band: float) -> float:
    moving = model.field.moving.bool()
    if not bool(moving.any()) or not draws:
        return 1.0
    dim = 2 if model.keypoints else 1  # a keypoint's (x, y) is one point; a dense latent is 1-D each
    points, truths = [], []
    for paths, after in draws:
        lat = paths.transpose(0, 1)[..., moving]                                          # [n, S, m]
        truth = encode_all(model, after)[0][:, moving]                                    # [n, m]
        points.append(lat.reshape(lat.shape[0], lat.shape[1], -1, dim).transpose(1, 2).reshape(-1, lat.shape[1], dim))
        truths.append(truth.reshape(-1, dim))
    scale = coverage_scale(torch.cat(points), torch.cat(truths), band)
    return _refine_on_tracks(model, draws, band, scale)


def _refine_on_tracks(model, draws, band: float, scale: float) -> float:
    """:func:`calibrate`'s rounds on tracked positions of the futures decoded at ``scale``; the
    geometric mean of the last two (see :data:`SCALE_ROUNDS`)."""
    background = _background(model)
    truth = np.concatenate([centroid_track(after.cpu().numpy(), background) for _, after in draws])  # [N, 2]
    seen = [scale]
    for _ in range(SCALE_ROUNDS):
        drawn = []
        for paths, _ in draws:
            pred = model.decode(spread_about_mean(paths, scale)).cpu().numpy()        # [S, n, C, H, W]
            drawn.append(np.stack([centroid_track(one, background) for one in pred], axis=1))   # [n, S, 2]
        drawn = np.concatenate(drawn)
        ok = np.isfinite(drawn).all(axis=(1, 2)) & np.isfinite(truth).all(axis=1)
        if not ok.any():
            break
        factor = coverage_scale(torch.as_tensor(drawn[ok]), torch.as_tensor(truth[ok]), band, MIN_RADIUS_PX)
        scale = float(np.clip(scale * factor, *SCALE_RANGE))
        seen.append(scale)
    return float(np.sqrt(seen[-1] * seen[-2])) if len(seen) > 2 else seen[-1]


def band_inside(samples: np.ndarray, truth: np.ndarray, band: float, noise: float = 0.0) -> np.ndarray:
    """Whether each true value lies in the central ``band`` interval of the predictive distribution
    that sampled values stand for; ``samples`` has one more leading axis (the samples) than ``truth``.

    With ``noise`` = 0 the distribution is the samples' own: the interval runs between their
    ``(1 - band) / 2`` and ``(1 + band) / 2`` empirical quantiles (linear interpolation, numpy's
    default), widened by :func:`sample_level` so that a new draw of the samples' law lands inside
    with probability ``band`` (at most (S - 1) / (S + 1) for S samples). With ``noise`` > 0 each
    sample is blurred by Gaussian noise of that standard deviation: an equal-weight mixture of
    normals, whose central interval holds the truth when the mixture's CDF at the truth lies within
    ``[(1 - band) / 2, (1 + band) / 2]`` (the probability integral transform; Gneiting et al. 2007).
    That mixture is not widened for the number of samples; the fitted noise absorbs it, so a noise
    fitted with 16 futures is a little wider than 64 would need.

    Examples
    --------
    >>> rng = np.random.default_rng(0)
    >>> draws = rng.normal(size=(400, 20000)) * 0.1          # samples with std 0.1
    >>> truth = rng.normal(size=20000) * 0.5                 # the truth scatters wider: std 0.5
    >>> round(float(band_inside(draws, truth, 0.9).mean()), 2)   # ≈ P(|z| < 1.645 · 0.1 / 0.5)
    0.26
    >>> round(float(band_inside(draws, truth, 0.9, noise=(0.5**2 - 0.1**2) ** 0.5).mean()), 2)
    0.9
    """
    s, t = np.asarray(samples, dtype=np.float64), np.asarray(truth, dtype=np.float64)
    lo, hi = (1.0 - band) / 2.0, (1.0 + band) / 2.0
    if noise > 0:
        cdf = ndtr((t[None] - s) / noise).mean(axis=0)
        return (cdf >= lo) & (cdf <= hi)
    width = sample_level(band, s.shape[0], two_sided=True)
    q_lo, q_hi = np.quantile(s, [(1.0 - width) / 2.0, (1.0 + width) / 2.0], axis=0)
    return (t >= q_lo) & (t <= q_hi)


def noise_for_coverage(samples: np.ndarray, truth: np.ndarray, band: float) -> float:
    """The pixel noise std (bisection on [0, :data:`NOISE_MAX`]) at which :func:`band_inside` holds
    ``band`` of the ``truth`` values [P] under ``samples`` [S, P]; 0 when the samples alone cover it."""
    if truth.size == 0 or band_inside(samples, truth, band).mean() >= band:
        return 0.0
    lo, hi = 0.0, NOISE_MAX
    for _ in range(NOISE_STEPS):
        mid = 0.5 * (lo + hi)
        lo, hi = (lo, mid) if band_inside(samples, truth, band, mid).mean() >= band else (mid, hi)
    return hi


def _pixel_noise(model, draws, band: float, scale: float) -> float:
    background = _background(model)
    drawn_all, truth_all = [], []
    for paths, after in draws:
        drawn = model.decode(spread_about_mean(paths, scale)).cpu().numpy()       # [S, n, C, H, W]
        truth = after.cpu().numpy()                                                       # [n, C, H, W]
        region = np.broadcast_to(object_region(drawn.mean(axis=0), truth, background)[:, None], truth.shape)
        drawn_all.append(drawn[:, region])
        truth_all.append(truth[region])
    if not truth_all:
        return 0.0
    return noise_for_coverage(np.concatenate(drawn_all, axis=1), np.concatenate(truth_all), band)
