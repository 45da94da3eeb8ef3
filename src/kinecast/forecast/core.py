"""Forecast, fill and resample with a trained model: the Python functions behind the verbs.

Every function works on a :class:`~kinecast.frames.Recording` and returns numpy arrays; the command
line only adds reading, rendering and writing. Times are always in seconds; conversion to model time
uses the run's ``solver.time_scale``.

Predictions are statistical extrapolations, not measurements.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import torch

from ..config import Config
from ..errors import KinecastError
from ..frames import Recording
from ..frames.preprocess import model_to_recording_px, recording_geometry
from ..model import to_model_time
from ..model.keypoints import to_model_pixels

# A requested time this fraction of the median interval from a slot's time is that slot (float
# rounding of timestamps; the same 1% that matches forecast times to recorded frames).
TIME_MATCH = 0.01


@dataclass
class Forecast:
    """Predicted frames at requested times.

    Attributes
    ----------
    times : (N,) seconds
    mean : (N, C, H, W) mean of the sampled frames (the mean-weights rollout when samples == 1)
    spread : (N, C, H, W) per-pixel standard deviation across samples (zeros when samples == 1)
    samples : (S, N, C, H, W)
    latents : (S, N, D) latent state (position then velocity) per sample and time
    context_start : int, slot of the first conditioning frame in the recording
    """

    times: np.ndarray
    mean: np.ndarray
    spread: np.ndarray
    samples: np.ndarray
    latents: np.ndarray
    context_start: int


def check_compatible(rec: Recording, cfg: Config) -> None:
    """Refuse a recording whose size or channels differ from the run's."""
    want_c = cfg.data.channels
    if rec.size != (cfg.data.size, cfg.data.size) or rec.channels != want_c:
        raise KinecastError(rec.source, f"frames are {rec.channels}×{rec.size[0]}×{rec.size[1]} after reading, "
                                        f"the run expects {want_c}×{cfg.data.size}×{cfg.data.size}")


def context_start_for(rec: Recording, k: int, start: int | None) -> int:
    """First conditioning slot so that the ``k`` frames before ``start`` are all present.

    ``start`` is the slot where the forecast begins (default: just past the end of the recording).
    """
    start = rec.n_frames if start is None else start
    if rec.n_frames < k:
        raise KinecastError(rec.source, f"has {rec.n_frames} frames; the model needs at least {k} to start from")
    if start > rec.n_frames:
        raise KinecastError(rec.source, f"start frame {start} is past the end of the recording: allowed "
                                        f"1..{rec.n_frames} ({rec.n_frames} is just after the last frame)")
    if start < 1:
        raise KinecastError(rec.source, f"start frame {start} is outside 1..{rec.n_frames}")
    starts = rec.present_runs(k)
    starts = starts[starts <= start - k]
    if len(starts):
        return int(starts[-1])
    raise KinecastError(rec.source, f"no {k} consecutive present frames before frame {start}")


def slot_at_time(rec: Recording, when: float) -> int:
    """The first slot at or after ``when`` seconds.

    The latest allowed time is one median interval past the last frame: slot ``n_frames``, where a
    forecast from the end of the recording starts. A later time is refused, never moved back.
    """
    tol = TIME_MATCH * rec.median_interval
    end = rec.times[-1] + rec.median_interval
    if when > end + tol:
        raise KinecastError(rec.source, f"start time {when:g} s is past the end of the recording: allowed "
                                        f"up to {end:.3f} s (one interval after the last frame)")
    if not when > rec.times[0] + tol:  # also NaN
        raise KinecastError(rec.source, f"start time {when:g} s is not after the first frame "
                                        f"({rec.times[0]:.3f} s): a forecast needs frames before it")
    return int(np.searchsorted(rec.times, when - tol))


def sample_generator(seed: int, device: str | torch.device = "cpu") -> torch.Generator:
    """The noise source for sampled futures: a generator on ``device`` seeded with ``seed``.

    The same seed gives the same draws on the same device (CPU and GPU draw different streams).
    """
    return torch.Generator(device=torch.device(device)).manual_seed(int(seed))


def predict_from(model, cfg: Config, rec: Recording, ctx_start: int, times: np.ndarray,
                 samples: int = 1, device: str | torch.device = "cpu", seed: int | None = None) -> Forecast:
    """Condition on ``k`` frames from ``ctx_start`` and predict frames at ``times`` (seconds, any order, before or after the context).

    With ``samples == 1`` the mean weights and the encoders' means are used (one deterministic
    forecast). With more, each sample draws the initial state and the field's weights from a
    generator seeded with ``seed`` (default ``cfg.forecast.seed``), so the same call gives the same
    samples.
    """
    k = cfg.model.velocity_frames
    ctx = torch.from_numpy(rec.frames[ctx_start:ctx_start + k][None]).to(device)
    t = to_model_time(np.asarray(times, dtype=np.float64) - rec.times[ctx_start], cfg).to(device)
    ctx_t = to_model_time(rec.times[ctx_start:ctx_start + k] - rec.times[ctx_start], cfg).to(device)
    stochastic = samples > 1
    gen = sample_generator(cfg.forecast.seed if seed is None else seed, device) if stochastic else None
    with torch.no_grad():
        frames, latents = model.rollout(ctx, t, samples=samples, mean_weights=not stochastic,
                                        sample_init=stochastic, generator=gen, ctx_t=ctx_t)
    s = frames[:, 0].float().cpu().numpy()
    return Forecast(np.asarray(times, dtype=np.float64), s.mean(axis=0),
                    s.std(axis=0) if stochastic else np.zeros_like(s[0]), s,
                    latents[:, 0].float().cpu().numpy(), ctx_start)


def keypoint_pixels(latents: np.ndarray, info: dict, cfg: Config) -> np.ndarray:
    """Keypoint positions and velocities of latent states in the recording's own pixels.

    The keypoint encoder's latent position is K image coordinates in [-1, 1] across the model frame
    (pixel centres at ``(2i + 1) / n − 1``), so a normalised x is model pixel ``(x + 1)·n/2 − 0.5``,
    which :func:`kinecast.frames.preprocess.model_to_recording_px` maps to the recording's pixels
    (crop ``data.roi`` or the whole frame, ``w`` x ``h``, shrunk to ``cw`` x ``ch`` model pixels and
    padded to the square). A velocity in model units per model time unit becomes
    ``v · n·w/(2·cw) · time_scale`` px/s.
    Positions on the padding map outside the crop.

    Parameters
    ----------
    latents : ndarray (..., 4K)
        Latent states ``[x1, y1, ..., xK, yK, vx1, vy1, ...]``.
    info : dict
        The recording's ``info`` (``source_size`` [width, height], ``roi`` [x, y, w, h] or []).

    Returns
    -------
    ndarray (..., K, 4)
        ``x_px, y_px, vx_px_s, vy_px_s`` per keypoint.
    """
    q = latents.shape[-1] // 2
    pos = latents[..., :q].reshape(*latents.shape[:-1], q // 2, 2)
    vel = latents[..., q:].reshape(*latents.shape[:-1], q // 2, 2)
    n = cfg.data.size
    geo = recording_geometry(info, n)
    px = model_to_recording_px(to_model_pixels(pos, n), info, n, geo)   # normalised → model px → source px
    scale = n * geo.step / 2.0
    return np.concatenate([px, vel * scale * cfg.solver.time_scale], axis=-1)


def forecast(model, cfg: Config, rec: Recording, n_frames: int, start: int | None = None,
             fps: float = 0.0, samples: int = 1, device="cpu") -> Forecast:
    """Forecast ``n_frames`` from the ``k`` present frames before slot ``start``.

    The first output frame is at slot ``start``'s time (one median interval after the last frame
    when ``start`` is the end of the recording, the default); the others follow at the recording's
    median interval, or at ``fps`` frames per second of recording time when given. Sampled futures
    are drawn with ``cfg.forecast.seed``.
    """
    k = cfg.model.velocity_frames
    cs = context_start_for(rec, k, start)
    start = rec.n_frames if start is None else start
    t0 = rec.times[start] if start < rec.n_frames else rec.times[-1] + rec.median_interval
    dt = 1.0 / fps if fps > 0 else rec.median_interval
    times = t0 + dt * np.arange(n_frames)
    return predict_from(model, cfg, rec, cs, times, samples, device)


def resample(model, cfg: Config, rec: Recording, times: np.ndarray, device="cpu") -> Forecast:
    """Frames at arbitrary ``times`` inside or beyond the recording (e.g. 4× slow motion).

    Conditions on the first ``k`` present frames and integrates to every requested time.
    """
    k = cfg.model.velocity_frames
    starts = rec.present_runs(k)
    if not len(starts):
        raise KinecastError(rec.source, f"no {k} consecutive present frames to start from")
    return predict_from(model, cfg, rec, int(starts[0]), np.asarray(times, dtype=np.float64), 1, device)


def gaps(missing: np.ndarray) -> list[tuple[int, int]]:
    """Runs of missing slots as (first, stop) pairs."""
    out, i = [], 0
    while i < len(missing):
        if missing[i]:
            j = i
            while j < len(missing) and missing[j]:
                j += 1
            out.append((i, j))
            i = j
        else:
            i += 1
    return out


def fill(model, cfg: Config, rec: Recording, device="cpu") -> tuple[np.ndarray, np.ndarray]:
    """Fill the slots marked missing: integrate forward from before each gap and backward from after it.

    The two predictions are blended linearly in time (the forward one dominates near the gap's
    start). Where only one side has ``k`` present frames, that side alone is used.

    Returns
    -------
    frames : (T, C, H, W) the recording with its missing slots filled
    filled : (T,) bool, True where a slot was filled
    """
    k = cfg.model.velocity_frames
    out = rec.frames.copy()
    filled = np.zeros(rec.n_frames, dtype=bool)
    runs = rec.present_runs(k)
    for a, b in gaps(rec.missing):
        times = rec.times[a:b]
        preds, weights = [], []
        before, after = runs[runs <= a - k], runs[runs >= b]
        if len(before):  # the k present frames closest before the gap
            preds.append(predict_from(model, cfg, rec, int(before[-1]), times, 1, device).mean)
            weights.append(rec.times[b] - times if b < rec.n_frames else np.ones_like(times))
        if len(after):  # and after it
            preds.append(predict_from(model, cfg, rec, int(after[0]), times, 1, device).mean)  # backward in time
            weights.append(times - rec.times[a - 1] if a > 0 else np.ones_like(times))
        if not preds:
            raise KinecastError(rec.source, f"cannot fill frames {a}..{b - 1}: no {k} present frames on either side")
        w = np.stack(weights)
        w = w / w.sum(axis=0, keepdims=True)
        out[a:b] = sum(wi[:, None, None, None] * p for wi, p in zip(w, preds))
        filled[a:b] = True
    return out, filled
