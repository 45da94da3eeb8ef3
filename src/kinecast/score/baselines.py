"""Simple forecasts a learned model has to beat.

Every baseline has the same call: ``fn(context, n, times=None, background=None)``. It takes the
context frames (K, C, H, W), K >= 2, float in [0, 1], and the number N of frames to forecast, and
returns N frames (N, C, H, W). ``times`` is optional: the K context times followed by the N forecast
times, in seconds. Without it the frames are evenly spaced; with it each step's displacement is
scaled by the ratio of its interval to the last context interval. ``background`` is the static
background (C, H, W) where known (None: the per-pixel median of the context); baselines that do not
separate the object from the background ignore it.

Examples
--------
>>> import numpy as np
>>> context = np.zeros((2, 1, 16, 16), np.float32)
>>> persistence(context, 3).shape
(3, 1, 16, 16)
"""

from __future__ import annotations

import cv2
import numpy as np

from ..errors import KinecastError
from ..frames.preprocess import BT601_LUMA
from ..frames.tracks import (FOREGROUND_FRACTION, centroid_track, foreground, foreground_mask,
                             median_background)

# Farnebäck dense-flow parameters for small model frames (32-128 px): image pyramid halving per level,
# three levels (a 64 px frame still has an 8 px top level), 9 px averaging window, three iterations
# per level, polynomial expansion over 5 px neighbourhoods with its Gaussian sigma 1.1 (OpenCV's
# documentation pairs poly_n 5 with sigma 1.1), no flags (no initial flow, box window).
FARNEBACK_PYR_SCALE = 0.5
FARNEBACK_LEVELS = 3
FARNEBACK_WINSIZE = 9
FARNEBACK_ITERATIONS = 3
FARNEBACK_POLY_N = 5
FARNEBACK_POLY_SIGMA = 1.1
FARNEBACK_FLAGS = 0
# 8-bit grey levels (the input format of OpenCV's Farnebäck implementation).
GREY_LEVELS = 255
# Fixed-point iterations that carry the flow, known at its source pixels, to the pixels it moves to.
FLOW_ADVECT_ITERATIONS = 3


def _check(context, n: int, times) -> tuple[np.ndarray, np.ndarray]:
    """Validated context (float32) and the step-scale of each forecast frame, shape (N,)."""
    ctx = np.asarray(context, dtype=np.float32)
    if ctx.ndim != 4 or ctx.shape[0] < 2 or min(ctx.shape) < 1:
        raise KinecastError("context frames", f"expected (K>=2, C, H, W), got shape {ctx.shape}")
    if int(n) != n or n < 1:
        raise KinecastError("frames to forecast", f"bad value {n!r}: allowed a whole number >= 1")
    n = int(n)
    if times is None:
        return ctx, np.ones(n)
    t = np.asarray(times, dtype=np.float64).ravel()
    if t.size != len(ctx) + n:
        raise KinecastError("times", f"expected {len(ctx)} context + {n} forecast times, got {t.size}")
    dt = np.diff(t)
    if not np.all(np.isfinite(t)) or np.any(dt <= 0):
        raise KinecastError("times", "must be finite and strictly increasing")
    k = len(ctx)
    return ctx, dt[k - 1:] / dt[k - 2]


def _background(ctx: np.ndarray, background) -> np.ndarray:
    """The caller's static background (checked against the frames), else the context's median."""
    if background is None:
        return median_background(ctx)
    bg = np.asarray(background, np.float32)
    if bg.shape != ctx.shape[1:]:
        raise KinecastError("background", f"shape {bg.shape} does not match frames {ctx.shape[1:]}")
    return bg


def background_only(context, n: int, times=None, background=None) -> np.ndarray:
    """Every forecast frame is the static background: a forecast that knows nothing of the object.

    On a scene with one small object this scores well against persistence (which pays twice: the
    object missing where it is and drawn where it was), so a model has to beat it before its MSE
    means anything.

    Parameters
    ----------
    context : array (K, C, H, W)
    n : int
    times : ignored apart from validation
    background : array (C, H, W) or None
        The static background; None uses the per-pixel median of the context.
    """
    ctx, _ = _check(context, n, times)
    return np.repeat(_background(ctx, background)[None], int(n), axis=0)


def persistence(context, n: int, times=None, background=None) -> np.ndarray:
    """Repeat the last context frame ``n`` times.

    Parameters
    ----------
    context : array (K, C, H, W)
    n : int
    times : ignored apart from validation (a still frame does not depend on time)
    background : ignored (the common baseline call)
    """
    ctx, _ = _check(context, n, times)
    return np.repeat(ctx[-1:], int(n), axis=0)


def _shift(img: np.ndarray, dx: float, dy: float, border: int) -> np.ndarray:
    """Sub-pixel translation of a (C, H, W) image by (dx, dy) with bilinear interpolation."""
    m = np.array([[1.0, 0.0, dx], [0.0, 1.0, dy]])
    h, w = img.shape[1:]
    return np.stack([cv2.warpAffine(ch, m, (w, h), flags=cv2.INTER_LINEAR, borderMode=border)
                     for ch in img])


def constant_velocity(context, n: int, times=None, background=None,
                      threshold: float = FOREGROUND_FRACTION) -> np.ndarray:
    """Move the object of the last frame at the velocity of its centroid between the last two frames.

    Only the foreground moves: the object's pixels (``foreground_mask`` of the last frame) are lifted
    off the last frame, which there shows the background, and laid back shifted by velocity ×
    elapsed time (sub-pixel, bilinear, ``cv2.warpAffine``; nothing enters from outside the frame).
    The static background and the rest of the last frame stay put. Without an object in either of
    the last two frames the forecast is :func:`persistence`.

    Parameters
    ----------
    context : array (K, C, H, W)
    n : int
    times : array (K + N,) or None
    background : array (C, H, W) or None
        The static background; None uses the per-pixel median of the context, which needs K >= 3
        and an object that leaves each pixel for most context frames. Pass the recording's
        background (e.g. the median over all its frames) when known.
    threshold : float
        Foreground noise threshold relative to the frame's maximum (see ``centroid_track``).

    Returns
    -------
    ndarray (N, C, H, W)
    """
    ctx, scale = _check(context, n, times)
    bg = _background(ctx, background)
    track = centroid_track(ctx[-2:], bg, threshold)
    if not np.all(np.isfinite(track)):
        return persistence(ctx, n)
    step = track[1] - track[0]
    last = ctx[-1]
    fg = foreground(last[None], bg, blur=0.0)[0]  # cut the object out pixel for pixel
    mask = foreground_mask(fg[None], threshold)[0].astype(np.float32)
    residual = (last - bg) * mask
    base = last - residual
    out = np.empty((int(n), *last.shape), np.float32)
    for j, offset in enumerate(np.cumsum(scale)):
        dx, dy = step * offset
        out[j] = base + _shift(residual, dx, dy, cv2.BORDER_CONSTANT)
    return np.clip(out, 0.0, 1.0)


def _grey8(frame: np.ndarray) -> np.ndarray:
    """(C, H, W) float frame in [0, 1] as 8-bit grey (BT.601 luma for 3 channels, else the mean)."""
    grey = np.tensordot(BT601_LUMA, frame, axes=1) if frame.shape[0] == 3 else frame.mean(axis=0)
    return np.round(np.clip(grey, 0.0, 1.0) * GREY_LEVELS).astype(np.uint8)


def _remap(img: np.ndarray, gx: np.ndarray, gy: np.ndarray) -> np.ndarray:
    """Sample every channel of a (C, H, W) image at (gx, gy), bilinear, border replicated."""
    gx, gy = gx.astype(np.float32), gy.astype(np.float32)
    return np.stack([cv2.remap(ch, gx, gy, cv2.INTER_LINEAR, borderMode=cv2.BORDER_REPLICATE)
                     for ch in img])


def farneback_flow(frame_a, frame_b) -> np.ndarray:
    """Dense optical flow from ``frame_a`` to ``frame_b`` (each (C, H, W) in [0, 1]), shape (2, H, W).

    ``flow[:, y, x]`` is the (dx, dy) displacement that carries pixel (x, y) of ``frame_a`` to its
    place in ``frame_b``.

    References
    ----------
    G. Farnebäck, "Two-frame motion estimation based on polynomial expansion", Scandinavian
    Conference on Image Analysis (2003), LNCS 2749, 363-370; OpenCV ``calcOpticalFlowFarneback``.
    """
    flow = cv2.calcOpticalFlowFarneback(
        _grey8(np.asarray(frame_a, np.float32)), _grey8(np.asarray(frame_b, np.float32)), None,
        FARNEBACK_PYR_SCALE, FARNEBACK_LEVELS, FARNEBACK_WINSIZE, FARNEBACK_ITERATIONS,
        FARNEBACK_POLY_N, FARNEBACK_POLY_SIGMA, FARNEBACK_FLAGS)
    return np.ascontiguousarray(flow.transpose(2, 0, 1))


def flow_warp(context, n: int, times=None, background=None) -> np.ndarray:
    """Advance the last frame along the Farnebäck flow between the last two context frames.

    The flow is measured on 8-bit grey versions of the last two frames. Each forecast step moves
    every pixel by its flow (scaled by the step's interval ratio) with backward sampling
    (``cv2.remap``, bilinear, border replicated); the flow field is carried along with the image, so
    each pixel keeps the velocity it had (constant velocity per pixel). The steps are chained on the
    sampling map rather than on the image, so every forecast frame is one interpolation of the last
    frame and does not blur further with each step.

    Parameters
    ----------
    context : array (K, C, H, W)
    n : int
    times : array (K + N,) or None
    background : ignored (the common baseline call)

    Returns
    -------
    ndarray (N, C, H, W)
    """
    ctx, scale = _check(context, n, times)
    flow = farneback_flow(ctx[-2], ctx[-1]).astype(np.float32)
    h, w = ctx.shape[2:]
    gy, gx = np.mgrid[0:h, 0:w].astype(np.float32)
    last = ctx[-1]
    source = np.stack([gx, gy])  # where each output pixel is read from in the last frame
    out = np.empty((int(n), *last.shape), np.float32)
    for j, s in enumerate(scale):
        # velocity at the destination pixel p solves u(p) = flow(p - s u(p)) (fixed point)
        u = flow
        for _ in range(FLOW_ADVECT_ITERATIONS):
            u = _remap(flow, gx - s * u[0], gy - s * u[1])
        source = _remap(source, gx - s * u[0], gy - s * u[1])
        flow = u
        out[j] = _remap(last, source[0], source[1])
    return np.clip(out, 0.0, 1.0)
