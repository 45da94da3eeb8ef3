"""Per-frame scores of predicted frames against true frames.

Every function takes float arrays shaped (T, C, H, W) with intensities in [0, 1] and returns one
value per frame (an array of length T), so a forecast can be scored frame by frame along its horizon.

Examples
--------
>>> import numpy as np
>>> truth = np.zeros((2, 1, 8, 8), np.float32)
>>> pred = truth + np.float32(0.1)
>>> psnr(pred, truth).round(6).tolist()
[20.0, 20.0]
"""

from __future__ import annotations

import cv2
import numpy as np

from ..config import ScoreConfig
from ..errors import KinecastError
from ..model.calibration import band_inside, disc_radius
from ..frames.tracks import FOREGROUND_FRACTION, centroid_track, foreground, median_background, object_region

# Frames are intensities in [0, 1] (project convention), so the peak signal (MAX, the data range) is 1.
DATA_RANGE = 1.0
# SSIM stabilising constants, Wang, Bovik, Sheikh, Simoncelli (2004), eq. 7 and section III-C.
SSIM_K1 = 0.01
SSIM_K2 = 0.03
# SSIM works through the frames in chunks of at most this many values (about 32 MB per float64
# temporary), so long or large recordings do not exhaust memory.
SSIM_CHUNK_VALUES = 1 << 22
# Defaults of the tunables below are read from the one configuration tree (section `score`);
# callers pass the values of their own Config.
_DEFAULTS = ScoreConfig()


def _pair(pred, truth) -> tuple[np.ndarray, np.ndarray]:
    p = np.asarray(pred, dtype=np.float64)
    t = np.asarray(truth, dtype=np.float64)
    if t.ndim != 4 or min(t.shape) < 1:
        raise KinecastError("truth frames", f"expected a (T, C, H, W) array, got shape {t.shape}")
    if p.shape != t.shape:
        raise KinecastError("predicted frames", f"shape {p.shape} does not match the truth's {t.shape}")
    return p, t


def mse(pred, truth) -> np.ndarray:
    """Mean squared error per frame, shape (T,)."""
    p, t = _pair(pred, truth)
    return ((p - t) ** 2).mean(axis=(1, 2, 3))


def mae(pred, truth) -> np.ndarray:
    """Mean absolute error per frame, shape (T,)."""
    p, t = _pair(pred, truth)
    return np.abs(p - t).mean(axis=(1, 2, 3))


def psnr(pred, truth) -> np.ndarray:
    """Peak signal-to-noise ratio per frame in dB, ``10 log10(MAX^2 / MSE)`` with MAX = 1.

    Returns
    -------
    ndarray (T,)
        ``inf`` for a frame identical to its truth (MSE = 0).

    References
    ----------
    The usual definition, e.g. R. C. Gonzalez, R. E. Woods, *Digital Image Processing*.
    """
    err = mse(pred, truth)
    with np.errstate(divide="ignore"):
        return 10.0 * np.log10(DATA_RANGE ** 2 / err)


def _box_mean(x: np.ndarray, win: int) -> np.ndarray:
    """Mean over a ``win`` × ``win`` window around every pixel of the last two axes.

    The border is mirrored including the edge pixel (``d c b a | a b c d``, OpenCV's
    ``BORDER_REFLECT``), as in ``scipy.ndimage.uniform_filter``'s default.
    """
    flat = np.ascontiguousarray(x).reshape(-1, *x.shape[-2:])
    out = np.empty_like(flat)
    for i in range(len(flat)):
        cv2.blur(flat[i], (win, win), dst=out[i], borderType=cv2.BORDER_REFLECT)
    return out.reshape(x.shape)


def _ssim_chunk(x: np.ndarray, y: np.ndarray, win: int, region: np.ndarray | None) -> np.ndarray:
    """Mean SSIM of each frame of a chunk (N, C, H, W), float64, over ``region`` (N, H, W) if given."""
    cov_norm = win * win / (win * win - 1.0)  # sample covariance over the window
    ux, uy = _box_mean(x, win), _box_mean(y, win)
    vx = cov_norm * (_box_mean(x * x, win) - ux * ux)
    vy = cov_norm * (_box_mean(y * y, win) - uy * uy)
    vxy = cov_norm * (_box_mean(x * y, win) - ux * uy)
    c1 = (SSIM_K1 * DATA_RANGE) ** 2
    c2 = (SSIM_K2 * DATA_RANGE) ** 2
    s = ((2 * ux * uy + c1) * (2 * vxy + c2)) / ((ux * ux + uy * uy + c1) * (vx + vy + c2))
    r = win // 2
    inner = s[..., r:s.shape[-2] - r, r:s.shape[-1] - r]
    if region is None:
        return inner.mean(axis=(1, 2, 3))
    keep = region[:, None, r:s.shape[-2] - r, r:s.shape[-1] - r]
    count = keep.sum(axis=(1, 2, 3)) * s.shape[1]
    total = np.where(keep, inner, 0.0).sum(axis=(1, 2, 3))
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(count > 0, total / count, np.nan)


def ssim(pred, truth, window: int = _DEFAULTS.ssim_window, region=None) -> np.ndarray:
    """Mean structural similarity per frame, averaged over channels.

    Local means, variances and covariance over a ``window`` × ``window`` uniform window (sample
    covariance, mirrored border); the SSIM map is averaged over the pixels at least ``window // 2``
    from the border, per channel, then over channels. This is what
    ``skimage.metrics.structural_similarity(truth, pred, data_range=1, channel_axis=0)`` computes
    with its defaults, here vectorised over frames.

    Parameters
    ----------
    pred, truth : arrays (T, C, H, W), float in [0, 1]
    window : int
        Odd side of the square window, at most the smaller frame side (``score.ssim_window``).
    region : bool array (T, H, W) or None
        Average the SSIM map over these pixels only (still excluding the border), e.g. the
        :func:`object_region`; None averages over the whole frame.

    Returns
    -------
    ndarray (T,)
        SSIM in [-1, 1]; 1 for identical frames; NaN for a frame whose region is empty.

    References
    ----------
    Z. Wang, A. C. Bovik, H. R. Sheikh, E. P. Simoncelli, "Image quality assessment: from error
    visibility to structural similarity", IEEE Trans. Image Processing 13(4) (2004) 600-612.
    """
    p, t = _pair(pred, truth)
    win = int(window)
    if win < 3 or win % 2 == 0:
        raise KinecastError("score.ssim_window", f"bad value {window!r}: allowed an odd number >= 3")
    if min(t.shape[2:]) < win:
        raise KinecastError("score.ssim_window",
                            f"window {win} exceeds the frame size {t.shape[3]}x{t.shape[2]}")
    if region is not None:
        region = np.asarray(region, dtype=bool)
        if region.shape != (t.shape[0], *t.shape[2:]):
            raise KinecastError("region", f"shape {region.shape} does not match the frames {t.shape}")
    per = max(1, SSIM_CHUNK_VALUES // int(np.prod(t.shape[1:])))
    out = [_ssim_chunk(p[i:i + per], t[i:i + per], win, None if region is None else region[i:i + per])
           for i in range(0, len(t), per)]
    return np.concatenate(out)


def frame_metrics(pred, truth, background=None, threshold: float = FOREGROUND_FRACTION,
                  window: int = _DEFAULTS.ssim_window) -> dict[str, np.ndarray]:
    """All per-frame scores of a prediction.

    Parameters
    ----------
    pred, truth : arrays (T, C, H, W), float in [0, 1]
    background : array (C, H, W) or None
        Static background for the object tracks; None uses the per-pixel median of ``truth``. The
        same background serves both, so a prediction is never judged against its own median.
    threshold : float
        Foreground noise threshold relative to each frame's maximum (see ``centroid_track``).
    window : int
        SSIM window (``score.ssim_window``).

    Returns
    -------
    dict
        ``mse``, ``mae``, ``psnr`` (dB), ``ssim``, ``position_error_px`` (distance between the
        object centroids of prediction and truth; NaN where either frame shows no object) and the
        centroids themselves, ``x_px``, ``y_px`` (prediction) and ``true_x_px``, ``true_y_px``
        (model pixels, x right and y down from the top-left pixel's centre), each an array of length T.
    """
    p, t = _pair(pred, truth)
    bg = median_background(t) if background is None else background
    c_pred = centroid_track(p, bg, threshold)
    c_true = centroid_track(t, bg, threshold)
    return {
        "mse": mse(p, t),
        "mae": mae(p, t),
        "psnr": psnr(p, t),
        "ssim": ssim(p, t, window),
        "position_error_px": np.hypot(*(c_pred - c_true).T),
        "x_px": c_pred[:, 0], "y_px": c_pred[:, 1], "true_x_px": c_true[:, 0], "true_y_px": c_true[:, 1],
    }


def valid_horizon(ssim_per_frame, times, threshold: float = _DEFAULTS.ssim_threshold,
                  origin: float | None = None) -> tuple[int, float]:
    """How far ahead a forecast stays valid: SSIM at or above ``threshold`` from the first frame on.

    Parameters
    ----------
    ssim_per_frame : array (T,)
        SSIM of each forecast frame, in forecast order. NaN counts as below the threshold.
    times : array (T,), seconds
        Times of the forecast frames.
    threshold : float
        ``score.ssim_threshold``.
    origin : float or None
        Time of the last observed (context) frame. None takes one median frame interval before
        ``times[0]`` (needs T >= 2).

    Returns
    -------
    frames : int
        Number of leading frames at or above the threshold, which is also the index of the first frame
        below it; T when every frame is valid (the horizon is then at least the whole forecast).
    seconds : float
        Time from ``origin`` to the last valid frame (0 when the first frame already fails).

    Examples
    --------
    >>> valid_horizon([0.95, 0.9, 0.7, 0.85], [0.1, 0.2, 0.3, 0.4], 0.8, origin=0.0)
    (2, 0.2)
    """
    s = np.asarray(ssim_per_frame, dtype=np.float64).ravel()
    return leading_run(s >= threshold, times, origin)


def object_horizon(position_error, times, threshold: float = _DEFAULTS.position_threshold_px,
                   origin: float | None = None) -> tuple[int, float]:
    """How far ahead the forecast object stays on the true one: position error at most ``threshold``.

    Parameters
    ----------
    position_error : array (T,), pixels
        Object position error of each forecast frame, in forecast order. NaN (the prediction shows no
        object) ends the horizon, so a forecast that draws no object has a horizon of 0.
    times, origin
        As in :func:`valid_horizon`.
    threshold : float
        ``score.position_threshold_px``.

    Returns
    -------
    frames : int
    seconds : float

    Examples
    --------
    >>> object_horizon([0.5, 1.5, np.nan, 0.5], [0.1, 0.2, 0.3, 0.4], 2.0, origin=0.0)
    (2, 0.2)
    """
    e = np.asarray(position_error, dtype=np.float64).ravel()
    return leading_run(e <= threshold, times, origin)


def leading_run(good, times, origin: float | None = None) -> tuple[int, float]:
    """Number of leading ``good`` frames and the time from ``origin`` to the last of them.

    ``origin`` None takes one median frame interval before ``times[0]`` (needs T >= 2). Returns
    ``(T, ...)`` when every frame is good and ``(0, 0.0)`` when the first one is not.
    """
    g = np.asarray(good, dtype=bool).ravel()
    t = np.asarray(times, dtype=np.float64).ravel()
    if g.shape != t.shape or g.size == 0:
        raise KinecastError("times", f"length {t.size} does not match the {g.size} per-frame scores")
    if origin is None:
        if t.size < 2:
            raise KinecastError("origin", "needed when only one forecast frame is scored")
        origin = float(t[0] - np.median(np.diff(t)))
    frames = int(np.argmax(~g)) if not g.all() else int(g.size)
    seconds = float(t[frames - 1] - origin) if frames else 0.0
    return frames, seconds


def band_coverage(samples, truth, band: float = _DEFAULTS.band, region=None, noise: float = 0.0) -> np.ndarray:
    """Share of true pixel values inside the central ``band`` interval of sampled futures, per frame.

    The interval at each pixel is the samples' central interval that holds a new draw of their law
    with probability ``band`` (empirical quantiles, widened for the number of samples by
    :func:`kinecast.model.calibration.sample_level`), or, with ``noise`` > 0, of the samples blurred by Gaussian pixel noise of that std (the run's fitted
    ``pixel_noise``; see :func:`kinecast.model.calibration.band_inside`). For calibrated samples the
    share is close to ``band``; well below means over-confident forecasts.

    Parameters
    ----------
    samples : array (S, T, C, H, W), S >= 2
    truth : array (T, C, H, W)
    band : float in (0, 1]
        ``score.band``.
    region : bool array (T, H, W), optional
        Count only these pixels (e.g. :func:`object_region`: where truth or forecast shows an
        object, so that the static background, where every sample agrees, does not dominate);
        NaN for a frame whose region is empty.

    Returns
    -------
    ndarray (T,)

    References
    ----------
    T. Gneiting, A. E. Raftery, "Strictly proper scoring rules, prediction, and estimation",
    J. American Statistical Association 102 (2007) 359-378 (central prediction intervals).
    """
    s = np.asarray(samples, dtype=np.float64)
    t = np.asarray(truth, dtype=np.float64)
    if s.ndim != 5 or s.shape[0] < 2 or s.shape[1:] != t.shape:
        raise KinecastError("samples", f"expected shape (S>=2, {', '.join(map(str, t.shape))}), "
                                       f"got {s.shape}")
    if not 0.0 < band <= 1.0:
        raise KinecastError("score.band", f"bad value {band!r}: allowed a number in (0, 1]")
    inside = band_inside(s, t, band, noise)
    if region is None:
        return inside.mean(axis=(1, 2, 3))
    r = np.broadcast_to(np.asarray(region, dtype=bool)[:, None], inside.shape)
    count = r.sum(axis=(1, 2, 3))
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(count > 0, (inside & r).sum(axis=(1, 2, 3)) / np.maximum(count, 1), np.nan)


def position_coverage(samples, truth, background, band: float = _DEFAULTS.band) -> np.ndarray:
    """Per frame, 1.0 if the true object position lies inside the central ``band`` region of the
    sampled futures' object positions, else 0.0 (NaN where the truth or fewer than two samples show
    an object).

    Positions are the foreground centroids of :func:`~kinecast.frames.tracks.centroid_track`
    (model pixels). The central region of a frame is the disc around the samples' mean position
    that holds a new draw of the samples' law with probability ``band``
    (:func:`kinecast.model.calibration.disc_radius`: a quantile of the samples' distances from
    that mean, corrected for their number); averaged over frames the result is the share of frames
    whose truth the samples cover, ``band`` for calibrated samples whatever their number (9 or more
    at 0.9).

    Parameters
    ----------
    samples : array (S, T, C, H, W), S >= 2
    truth : array (T, C, H, W)
    background : array (C, H, W) or None (the per-pixel median of ``truth``)
    band : float in (0, 1]

    Returns
    -------
    ndarray (T,)
    """
    s = np.asarray(samples, dtype=np.float64)
    t = np.asarray(truth, dtype=np.float64)
    if s.ndim != 5 or s.shape[0] < 2 or s.shape[1:] != t.shape:
        raise KinecastError("samples", f"expected shape (S>=2, {', '.join(map(str, t.shape))}), got {s.shape}")
    bg = median_background(t) if background is None else background
    true_xy = centroid_track(t, bg)                                   # (T, 2)
    drawn = np.stack([centroid_track(one, bg) for one in s])         # (S, T, 2)
    out = np.full(t.shape[0], np.nan)
    for i in range(t.shape[0]):
        pts = drawn[:, i][np.isfinite(drawn[:, i]).all(axis=1)]
        if len(pts) < 2 or not np.isfinite(true_xy[i]).all():
            continue
        centre = pts.mean(axis=0)
        radius = disc_radius(np.hypot(*(pts - centre).T), band)
        out[i] = float(np.hypot(*(true_xy[i] - centre)) <= radius)
    return out
