"""Object tracks from frames, objects matched between two frames, and the period of a track.

Coordinates are in pixels of the frames given: ``x`` is the column and ``y`` the row, with the centre
of pixel ``[row, col]`` at ``(x, y) = (col, row)`` (the convention of ``skimage.draw``).

Examples
--------
>>> import numpy as np
>>> frames = np.zeros((3, 1, 16, 16), np.float32)
>>> for t in range(3):
...     frames[t, 0, 5:8, 2 + 3 * t:5 + 3 * t] = 1.0
>>> centroid_track(frames, background=np.zeros((1, 16, 16))).round(3).tolist()
[[3.0, 6.0], [6.0, 6.0], [9.0, 6.0]]
"""

from __future__ import annotations

import numpy as np
from scipy import ndimage
from scipy.optimize import linear_sum_assignment

from ..errors import KinecastError

# A pixel belongs to the object region of a frame pair when truth or prediction differs from the
# background there by more than this (intensity summed over channels; 0.1 is about 25 grey levels of
# an 8-bit source, several times the rigs' camera noise). Measured on a 3.7 px disc (the pendulum bob
# at 64 px): the region's SSIM is 0.95 for a 0.5 px shift, 0.82 for 1 px and 0.57 for 2 px.
OBJECT_REGION_LEVEL = 0.1

# Foreground pixels are those whose background difference exceeds this share of the frame's largest
# difference, plus a one-pixel ring around them (so faint anti-aliased edges still weigh in); the rest
# count as noise.
FOREGROUND_FRACTION = 0.25
# Both frames of a comparison are seen through the same Gaussian low-pass of this standard deviation
# (pixels of the frames given) before the foreground is thresholded: the tracker follows the bulk of
# a moving object, and structure thinner than about two pixels (a wire, a thread, a spring's coil) is
# below its resolution. A forecast drawn at model resolution renders such detail smooth; unfiltered,
# it passes the threshold in the true frame and not in the drawn one and moves the tracked centroid
# by 2-3 px while the object sits in the right place (the spring rig's reconstructions, textured
# look: 3.0 px unfiltered, 1.1 / 0.6 / 0.5 px at 0.7 / 1.0 / 1.5 px; DEVELOPERS.md). A symmetric
# low-pass does not move the centroid of a symmetric object. 1.5 px is our choice: the smallest
# value at which the coil test in tests/test_score_tracks.py stops flipping between decoder blurs of
# 0.6-1.2 px.
TRACK_BLUR_PX = 1.5
# A frame whose largest background difference (summed over channels) is below two grey levels of an
# 8-bit source (1/255 per level) holds no object: its centroid is NaN.
MIN_CONTRAST = 2.0 / 255.0
# A connected piece of the foreground mask whose summed weight is below this share of the frame's
# heaviest piece is a speck of noise or a decoder ripple, not an object.
MIN_OBJECT_SHARE = 0.05
# Fewest oscillation cycles the samples must span before a period is reported.
MIN_CYCLES = 1.5
# Zero crossings count only when the detrended signal travels from below -h to above +h (or back),
# h = this × the signal's standard deviation; stops noise near zero adding crossings.
HYSTERESIS_FRACTION = 0.2
# Same-direction crossing intervals whose coefficient of variation exceeds this are irregular
# (noise-driven); the spectral estimate is used instead.
MAX_INTERVAL_CV = 0.25
# Frequency grid of the spectral fallback: points per 1/span (oversampling; 5-10 is common practice,
# J. T. VanderPlas, ApJS 236 (2018) 16), lowest frequency in cycles per span (below MIN_CYCLES, so a
# peak there means too few cycles), and points of the finer grid around the peak.
SPECTRUM_OVERSAMPLE = 5
SPECTRUM_LOWEST_CYCLES = 0.5
SPECTRUM_REFINE_POINTS = 41
# The periodogram is evaluated in blocks of at most this many (frequency, sample) pairs (16 MB
# per complex128 temporary), so long recordings do not exhaust memory.
SPECTRUM_BLOCK_VALUES = 1 << 20
# The trend line is refitted together with a sinusoid at the latest period estimate until the period
# changes by less than this relative amount, at most TREND_REFITS times.
TREND_REFITS = 12
# Frames tracked at a time by centroid_track: each frame is tracked on its own, and a block bounds
# the float64 weights held at once (256 × 64 × 64 × 8 bytes = 8 MiB). A 64 px 10,000-frame recording
# tracked in one piece raised a fit's resident memory from 0.95 to 1.51 GB (sampled; DEVELOPERS.md,
# twenty-fourth session)
TRACK_BLOCK = 256
REFIT_TOLERANCE = 1e-5


def _as_frames(frames, name: str = "frames") -> np.ndarray:
    arr = np.asarray(frames, dtype=np.float32)
    if arr.ndim != 4 or min(arr.shape) < 1:
        raise KinecastError(name, f"expected a (T, C, H, W) array, got shape {arr.shape}")
    return arr


def median_background(frames) -> np.ndarray:
    """Per-pixel median over the frames: the static background of a fixed camera, shape (C, H, W).

    The median keeps the background at every pixel that a moving object covers in under half of the
    frames.
    """
    return np.median(_as_frames(frames), axis=0).astype(np.float32)


def foreground(frames, background=None, blur: float = TRACK_BLUR_PX) -> np.ndarray:
    """Absolute difference from the background, low-passed, summed over channels, shape (T, H, W).

    Parameters
    ----------
    frames : array (T, C, H, W)
    background : array (C, H, W) or None
        The static background; None uses :func:`median_background` of ``frames``.
    blur : float
        Standard deviation in pixels of the Gaussian low-pass (``scipy.ndimage.gaussian_filter``,
        edges repeated) applied to the signed difference of each channel; 0 turns it off.
    """
    arr = _as_frames(frames)
    bg = median_background(arr) if background is None else np.asarray(background, np.float32)
    if bg.shape != arr.shape[1:]:
        raise KinecastError("background", f"shape {bg.shape} does not match frames {arr.shape[1:]}")
    diff = arr - bg[None]
    if blur > 0:
        diff = ndimage.gaussian_filter(diff, (0, 0, blur, blur), mode="nearest")
    return np.abs(diff).sum(axis=1)


def object_region(pred, truth, background, level: float = OBJECT_REGION_LEVEL) -> np.ndarray:
    """Pixels where truth or prediction (arrays (T, C, H, W)) differs from the static background by
    more than ``level``.

    The difference is summed over channels (see :func:`foreground`). A prediction that draws no
    object is judged on the true object's pixels; one that draws it elsewhere on both places.

    Returns
    -------
    bool ndarray (T, H, W)
    """
    p, t = _as_frames(pred, "predicted frames"), _as_frames(truth, "truth frames")
    if p.shape != t.shape:
        raise KinecastError("predicted frames", f"shape {p.shape} does not match the truth's {t.shape}")
    # unfiltered: ``level`` is an absolute difference per pixel
    return (foreground(p, background, blur=0.0) > level) | (foreground(t, background, blur=0.0) > level)


def foreground_mask(fg: np.ndarray, threshold: float = FOREGROUND_FRACTION) -> np.ndarray:
    """Object pixels of foreground weights (T, H, W): above ``threshold`` × each frame's maximum,
    grown by one pixel in all eight directions. Boolean, shape (T, H, W)."""
    core = fg > threshold * fg.max(axis=(1, 2), keepdims=True)
    padded = np.pad(core, ((0, 0), (1, 1), (1, 1)))
    h, w = core.shape[1:]
    grown = np.zeros_like(core)
    for dy in range(3):
        for dx in range(3):
            grown |= padded[:, dy:dy + h, dx:dx + w]
    return grown


def centroid_track(frames, background=None, threshold: float = FOREGROUND_FRACTION) -> np.ndarray:
    """Intensity-weighted centroid of the foreground in each frame.

    The foreground weight of a pixel is ``|frame - background|`` summed over channels. Only pixels of
    :func:`foreground_mask` weigh in: those above ``threshold`` × the frame's largest weight and their
    one-pixel ring (faint anti-aliased edges); the rest are noise. A frame whose largest weight is
    below :data:`MIN_CONTRAST` has no object and gets NaN.

    Parameters
    ----------
    frames : array (T, C, H, W), float in [0, 1]
    background : array (C, H, W) or None
        The static background; None uses the per-pixel median over ``frames`` (right when the object
        moves off every pixel for more than half of the frames).
    threshold : float
        Noise threshold relative to each frame's largest foreground weight, in [0, 1).

    Returns
    -------
    ndarray (T, 2)
        ``x, y`` in pixels (column, row of pixel centres); NaN where there is no foreground.
    """
    if not 0.0 <= threshold < 1.0:
        raise KinecastError("threshold", f"bad value {threshold!r}: allowed a number in [0, 1)")
    arr = _as_frames(frames)
    bg = median_background(arr) if background is None else background
    blocks = [_centroids(arr[i:i + TRACK_BLOCK], bg, threshold) for i in range(0, len(arr), TRACK_BLOCK)]
    return np.concatenate(blocks, axis=0)


def _centroids(frames: np.ndarray, background, threshold: float) -> np.ndarray:
    """:func:`centroid_track` of one block of frames against a given background."""
    fg = foreground(frames, background).astype(np.float64)
    peak = fg.max(axis=(1, 2), keepdims=True)
    w = np.where(foreground_mask(fg, threshold), fg, 0.0)
    total = w.sum(axis=(1, 2))
    rows = np.arange(fg.shape[1], dtype=np.float64)
    cols = np.arange(fg.shape[2], dtype=np.float64)
    with np.errstate(invalid="ignore", divide="ignore"):
        x = (w.sum(axis=1) * cols).sum(axis=1) / total
        y = (w.sum(axis=2) * rows).sum(axis=1) / total
    track = np.stack([x, y], axis=1)
    track[peak[:, 0, 0] < MIN_CONTRAST] = np.nan
    return track


def find_objects(frames, background=None, threshold: float = FOREGROUND_FRACTION,
                 with_weights: bool = False) -> list:
    """The separate objects of each frame: connected pieces of the foreground and their centroids.

    The pieces are the 4-connected components (``scipy.ndimage.label``) of :func:`foreground_mask`;
    each centroid is weighted by the foreground as in :func:`centroid_track`, so a frame with one
    object gives the same point. Pieces lighter than :data:`MIN_OBJECT_SHARE` of the heaviest are
    dropped; a frame below :data:`MIN_CONTRAST` has none.

    Parameters
    ----------
    frames : array (T, C, H, W)
    background : array (C, H, W) or None
        As in :func:`centroid_track`.
    threshold : float
        As in :func:`centroid_track`.

    with_weights : bool
        Also return each object's summed foreground (its weight).

    Returns
    -------
    list of T arrays (M_t, 2)
        ``x, y`` of each object, in the order ``ndimage.label`` numbers them (raster order); with
        ``with_weights``, T pairs of that array and the objects' weights (M_t,).
    """
    fg = foreground(frames, background).astype(np.float64)
    masks = foreground_mask(fg, threshold)
    out = []
    for w, mask in zip(fg, masks):
        labels, count = ndimage.label(mask)
        if count == 0 or w.max() < MIN_CONTRAST:
            out.append((np.empty((0, 2)), np.empty(0)) if with_weights else np.empty((0, 2)))
            continue
        index = np.arange(1, count + 1)
        weight = ndimage.sum_labels(w, labels, index)
        rows_cols = np.asarray(ndimage.center_of_mass(w, labels, index), dtype=np.float64)
        keep = weight >= MIN_OBJECT_SHARE * weight.max()
        xy = rows_cols[keep][:, ::-1].reshape(-1, 2)
        out.append((xy, weight[keep]) if with_weights else xy)
    return out


def match_objects(pred_xy, true_xy) -> tuple[np.ndarray, np.ndarray]:
    """Pair predicted objects with true ones so that the summed centroid distance is least.

    The Hungarian algorithm (``scipy.optimize.linear_sum_assignment``) on the distance matrix.
    With unequal counts the surplus objects on either side stay unmatched.

    Parameters
    ----------
    pred_xy : array (M, 2)
    true_xy : array (N, 2)

    Returns
    -------
    match : int ndarray (N,)
        Index of the predicted object matched to each true one; -1 where none is (a miss).
    error : ndarray (N,)
        Distance in pixels to the matched prediction; NaN for a miss.

    References
    ----------
    H. W. Kuhn, "The Hungarian method for the assignment problem", Naval Research Logistics
    Quarterly 2 (1955) 83-97.

    Examples
    --------
    >>> match_objects([[10.0, 0.0], [0.0, 0.0]], [[0.0, 1.0], [10.0, 1.0], [50.0, 50.0]])[0].tolist()
    [1, 0, -1]
    """
    p = np.asarray(pred_xy, dtype=np.float64).reshape(-1, 2)
    t = np.asarray(true_xy, dtype=np.float64).reshape(-1, 2)
    match = np.full(len(t), -1)
    error = np.full(len(t), np.nan)
    if len(p) and len(t):
        dist = np.hypot(*(t[:, None, :] - p[None, :, :]).transpose(2, 0, 1))
        rows, cols = linear_sum_assignment(dist)
        match[rows], error[rows] = cols, dist[rows, cols]
    return match, error


def object_errors(pred, truth, background=None, threshold: float = FOREGROUND_FRACTION) -> dict:
    """Per-object position errors of predicted frames: objects found and matched frame by frame.

    Parameters
    ----------
    pred, truth : arrays (T, C, H, W)
    background : array (C, H, W) or None
        One background for both; None uses the per-pixel median of ``truth``.
    threshold : float
        As in :func:`centroid_track`.

    Returns
    -------
    dict
        ``per_object``: list of T arrays (N_t,), the error of each true object (NaN = missed);
        and arrays (T,): ``matched_error_px`` (mean over the matched objects; NaN when none),
        ``true_objects``, ``missed_objects`` (true objects without a match) and
        ``spurious_objects`` (predicted objects without a match).
    """
    truth = _as_frames(truth, "truth frames")
    pred = _as_frames(pred, "predicted frames")
    if pred.shape != truth.shape:
        raise KinecastError("predicted frames", f"shape {pred.shape} does not match the truth's {truth.shape}")
    bg = median_background(truth) if background is None else background
    found_p = find_objects(pred, bg, threshold)
    found_t = find_objects(truth, bg, threshold)
    per_object = [match_objects(p, t)[1] for p, t in zip(found_p, found_t)]
    matched = np.array([np.isfinite(e).sum() for e in per_object], dtype=np.float64)
    mean = np.array([e[np.isfinite(e)].mean() if np.isfinite(e).any() else np.nan for e in per_object])
    return {"per_object": per_object, "matched_error_px": mean,
            "true_objects": np.array([len(t) for t in found_t], dtype=np.float64),
            "missed_objects": np.array([len(t) for t in found_t]) - matched,
            "spurious_objects": np.array([len(p) for p in found_p]) - matched}


def _crossings(t: np.ndarray, x: np.ndarray, h: float) -> tuple[list[float], list[float]]:
    """Times of upward and downward zero crossings with hysteresis ``h``, linearly interpolated."""
    up: list[float] = []
    down: list[float] = []
    state = 0  # -1 below -h, +1 above +h, 0 not yet known
    last_zero = None  # time of the latest sign change since the state was set
    for i in range(1, len(x)):
        if (x[i - 1] <= 0.0) != (x[i] <= 0.0):
            last_zero = t[i - 1] - x[i - 1] * (t[i] - t[i - 1]) / (x[i] - x[i - 1])
        new = 1 if x[i] > h else (-1 if x[i] < -h else state)
        if state and new != state and last_zero is not None:
            (up if new > 0 else down).append(last_zero)
        if new != state:
            state, last_zero = new, None
    return up, down


def _crossing_period(t: np.ndarray, x: np.ndarray) -> float:
    """Mean spacing of same-direction crossings, NaN when too few or too irregular.

    Averaging upward and downward spacings cancels, to first order, a residual linear trend (it
    stretches one kind of spacing and shrinks the other by the same factor).
    """
    up, down = _crossings(t, x, HYSTERESIS_FRACTION * float(np.std(x)))
    spans, counts, gaps = 0.0, 0, []
    for times in (up, down):
        if len(times) >= 2:
            spans += times[-1] - times[0]
            counts += len(times) - 1
            gaps.extend(np.diff(times))
    if counts == 0:
        return float("nan")
    gaps = np.asarray(gaps)
    if len(gaps) > 1 and np.std(gaps) > MAX_INTERVAL_CV * np.mean(gaps):
        return float("nan")
    return spans / counts


def _lomb_scargle(t: np.ndarray, x: np.ndarray, f0: float, df: float, count: int) -> np.ndarray:
    """Lomb-Scargle power of ``x`` sampled at ``t`` at the frequencies ``f0 + k df`` (Hz).

    Written with complex sums: with ``Z1 = sum x e^{iwt}`` and ``Z2 = sum e^{2iwt}`` the time shift
    is ``2 w tau = arg Z2``, the cosine and sine projections are the real and imaginary parts of
    ``Z1 e^{-iw tau}``, and their norms are ``(N ± |Z2|) / 2``. The exponentials of a block of
    frequencies are the block's first row times precomputed powers ``e^{2 pi i k df t}``.
    """
    n = len(t)
    t = t - t[0]  # the periodogram does not depend on the time origin
    block = max(1, min(count, SPECTRUM_BLOCK_VALUES // n))
    steps = np.exp(2j * np.pi * df * np.arange(block)[:, None] * t)
    power = np.empty(count)
    for i in range(0, count, block):
        m = min(block, count - i)
        e = np.exp(2j * np.pi * (f0 + i * df) * t) * steps[:m]
        z1, z2 = e @ x, (e * e).sum(axis=1)
        y = z1 * np.exp(-0.5j * np.angle(z2))
        sine_norm = n - np.abs(z2)  # 0 where every sample sits on a sine node (e.g. at Nyquist)
        sine = np.divide(y.imag ** 2, sine_norm, out=np.zeros(m), where=sine_norm > 1e-9 * n)
        power[i:i + m] = y.real ** 2 / (n + np.abs(z2)) + sine
    return power


def _spectral_period(t: np.ndarray, x: np.ndarray) -> float:
    """Period at the Lomb-Scargle peak; NaN when the peak sits at the lowest frequency searched."""
    span = t[-1] - t[0]
    df = 1.0 / (SPECTRUM_OVERSAMPLE * span)
    f0 = SPECTRUM_LOWEST_CYCLES / span
    count = int((0.5 / float(np.median(np.diff(t))) - f0) / df) + 1  # up to the Nyquist frequency
    if count < 3:
        return float("nan")
    k = int(np.argmax(_lomb_scargle(t, x, f0, df, count)))
    if k == 0:
        return float("nan")
    fine_df = 2.0 * df / (SPECTRUM_REFINE_POINTS - 1)  # from one coarse step below to one above
    fine = _lomb_scargle(t, x, f0 + (k - 1) * df, fine_df, SPECTRUM_REFINE_POINTS)
    return float(1.0 / (f0 + (k - 1) * df + int(np.argmax(fine)) * fine_df))


def _period_estimate(t: np.ndarray, x: np.ndarray) -> float:
    """Crossing-spacing period of a detrended signal, else the spectral one."""
    period = _crossing_period(t, x)
    return period if np.isfinite(period) else _spectral_period(t, x)


def dominant_period(signal, times) -> float:
    """Period in seconds of an oscillating signal sampled at (possibly irregular) times.

    The signal is detrended (least-squares line, refitted jointly with a sinusoid at the period found,
    so that few or non-whole cycles do not tilt it), then the period is the mean spacing of
    same-direction zero crossings (hysteresis against noise, crossing times linearly interpolated,
    upward and downward spacings pooled). When the crossings are too few or too irregular, the peak
    of the Lomb-Scargle periodogram is used instead. Non-finite samples are dropped.

    Parameters
    ----------
    signal : array (T,)
    times : array (T,), seconds, strictly increasing

    Returns
    -------
    float
        The period in seconds; NaN when the samples span fewer than :data:`MIN_CYCLES` periods, the
        signal is constant, or fewer than four finite samples remain.

    References
    ----------
    N. R. Lomb, "Least-squares frequency analysis of unequally spaced data", Astrophysics and Space
    Science 39 (1976) 447-462. J. D. Scargle, "Studies in astronomical time series analysis. II",
    The Astrophysical Journal 263 (1982) 835-853.

    Examples
    --------
    >>> t = np.linspace(0.0, 10.0, 400)
    >>> round(dominant_period(np.sin(2 * np.pi * t / 2.5), t), 3)
    2.5
    """
    x = np.asarray(signal, dtype=np.float64).ravel()
    t = np.asarray(times, dtype=np.float64).ravel()
    if x.shape != t.shape:
        raise KinecastError("times", f"length {t.size} does not match the signal's {x.size}")
    keep = np.isfinite(x) & np.isfinite(t)
    x, t = x[keep], t[keep]
    if len(t) < 4:
        return float("nan")
    if np.any(np.diff(t) <= 0):
        raise KinecastError("times", "must be strictly increasing")
    tc = t - t[0]
    trend = np.polyval(np.polyfit(tc, x, 1), tc)
    if not np.std(x - trend) > 0:
        return float("nan")
    period = _period_estimate(t, x - trend)
    for _ in range(TREND_REFITS):
        if not np.isfinite(period):
            break
        # refit the line jointly with a sinusoid at the current period, so the oscillation itself
        # does not tilt the line (it does when the samples span few or non-whole cycles)
        w = 2.0 * np.pi / period
        basis = np.stack([np.ones_like(tc), tc, np.cos(w * tc), np.sin(w * tc)], axis=1)
        coef = np.linalg.lstsq(basis, x, rcond=None)[0]
        previous, period = period, _period_estimate(t, x - basis[:, :2] @ coef[:2])
        if abs(period - previous) <= REFIT_TOLERANCE * previous:
            break
    if not np.isfinite(period) or (t[-1] - t[0]) < MIN_CYCLES * period:
        return float("nan")
    return float(period)


def track_period(track, times) -> float:
    """Period in seconds of a 2-D track, measured along its first principal component.

    Parameters
    ----------
    track : array (T, 2)
        ``x, y`` positions (NaN rows are dropped), e.g. from :func:`centroid_track`.
    times : array (T,), seconds

    Returns
    -------
    float
        :func:`dominant_period` of the projection on the direction of largest variance.
    """
    xy = np.asarray(track, dtype=np.float64)
    t = np.asarray(times, dtype=np.float64).ravel()
    if xy.ndim != 2 or xy.shape[1] != 2 or len(xy) != len(t):
        raise KinecastError("track", f"expected shape ({len(t)}, 2), got {xy.shape}")
    keep = np.all(np.isfinite(xy), axis=1)
    xy, t = xy[keep], t[keep]
    if len(t) < 4:
        return float("nan")
    centred = xy - xy.mean(axis=0)
    _, vecs = np.linalg.eigh(centred.T @ centred)
    return dominant_period(centred @ vecs[:, -1], t)
