"""Score forecasts against held-out frames, with baselines scored on the same frames in the same run.

The functions here return plain dicts and arrays; ``kinecast score`` writes them as a per-frame CSV,
a JSON summary and plots. Scores describe how well a statistical extrapolation matched this
recording; they are not measurements and not a guarantee for the next recording.
"""

from __future__ import annotations

import math

import numpy as np

from ..config import Config
from ..errors import KinecastError
from ..frames import Recording
from .baselines import constant_velocity, flow_warp, persistence
from .metrics import band_coverage, frame_metrics, valid_horizon
from .tracks import centroid_track, dominant_period, track_period

BASELINES = {"persistence": persistence, "constant_velocity": constant_velocity, "flow_warp": flow_warp}


def holdout_split(rec: Recording, holdout: str, context: int) -> tuple[int, int]:
    """``(first held-out slot, conditioning start)`` for ``last:N`` on one recording.

    The ``context`` slots before the held-out stretch condition the forecast.
    """
    kind, _, arg = holdout.partition(":")
    if kind != "last":
        raise KinecastError(f"--holdout {holdout}", "on a single recording only last:N applies")
    n = int(arg)
    start = rec.n_frames - n
    if n < 1 or start < context:
        raise KinecastError(rec.source, f"has {rec.n_frames} frames: too few to hold out {n} after "
                                        f"{context} conditioning frames")
    return start, start - context


def _summary_of(metrics: dict[str, np.ndarray], present: np.ndarray, times: np.ndarray, origin: float,
                cfg: Config) -> dict:
    """Means over the scored frames (infinite PSNR of exact frames left out) and the valid horizon.

    Frames without truth neither extend nor end the valid horizon: it is measured on the present
    frames and reported in forecast frames up to the first present frame below the threshold.
    """
    out = {f"mean_{k}": float(np.nanmean(np.where(np.isinf(v), np.nan, v))) if np.isfinite(v).any()
           else math.nan for k, v in metrics.items()}
    idx = np.flatnonzero(present)
    if len(idx) == 0:
        return {**out, "valid_horizon_frames": 0, "valid_horizon_s": 0.0}
    n_ok, _ = valid_horizon(metrics["ssim"][idx], times[idx], cfg.score.ssim_threshold, origin)
    frames = len(times) if n_ok == len(idx) else int(idx[n_ok])
    seconds = float(times[frames - 1] - origin) if frames else 0.0
    out.update(valid_horizon_frames=frames, valid_horizon_s=seconds)
    return out


def score_prediction(pred: np.ndarray, truth: np.ndarray, present: np.ndarray, times: np.ndarray,
                     origin: float, cfg: Config, background=None) -> tuple[dict, dict]:
    """Per-frame metrics (NaN where truth is missing) and their summary for one method."""
    metrics = {k: np.full(len(times), np.nan) for k in ("mse", "mae", "psnr", "ssim", "position_error_px")}
    if present.any():
        got = frame_metrics(pred[present], truth[present], background, window=cfg.score.ssim_window)
        for k, v in got.items():
            metrics[k][present] = v
    return metrics, _summary_of(metrics, present, times, origin, cfg)


def periods(frames: np.ndarray, times: np.ndarray, background) -> float:
    """Dominant oscillation period (s) of the object track in ``frames``; NaN if none is found."""
    return track_period(centroid_track(frames, background), times)


def evaluate(model, cfg: Config, rec: Recording, cond_start: int, first: int, n: int,
             samples: int = 1, others: dict | None = None, device="cpu") -> dict:
    """Forecast slots ``first .. first+n-1`` of ``rec`` from the context ``cond_start .. first-1``.

    Scores the model, every baseline and any ``others`` ({name: (model, cfg)}) on the present
    held-out frames. Returns a dict with ``times``, ``per_frame`` {method: {metric: (N,)}},
    ``summary`` {method: {...}}, ``periods``, ``coverage`` (per frame, with samples > 1) and the
    model's ``forecast`` (mean frames), ``truth`` and ``present`` arrays.
    """
    from ..forecast.core import predict_from

    k = cfg.model.velocity_frames
    times = rec.times[first:first + n]
    truth, present = rec.frames[first:first + n], ~rec.missing[first:first + n]
    ctx = rec.frames[cond_start:first]
    if rec.missing[cond_start:first].any():
        raise KinecastError(rec.source, f"conditioning frames {cond_start}..{first - 1} include dropped frames")
    if first - cond_start < max(2, k):
        raise KinecastError("score.context", f"{first - cond_start} conditioning frames; need at least {max(2, k)}")
    background = model.background.detach().cpu().numpy() if cfg.model.background else None
    origin = float(rec.times[first - 1])
    preds, extra = {}, {}
    models = {"model": (model, cfg), **(others or {})}
    for name, (m, c) in models.items():
        fc = predict_from(m, c, rec, first - c.model.velocity_frames, times, samples, device)
        preds[name] = fc.mean
        extra[name] = fc
    ctx_times = np.concatenate([rec.times[cond_start:first], times])
    for name, fn in BASELINES.items():
        kwargs = {"background": background} if name == "constant_velocity" and background is not None else {}
        preds[name] = fn(ctx, n, ctx_times, **kwargs)
    per_frame, summary = {}, {}
    for name, pred in preds.items():
        per_frame[name], summary[name] = score_prediction(pred, truth, present, times, origin, cfg, background)
    result = {"times": times, "per_frame": per_frame, "summary": summary, "forecast": preds["model"],
              "truth": truth, "present": present, "samples": extra["model"].samples}
    if samples > 1 and present.any():
        cov = np.full(n, np.nan)
        cov[present] = band_coverage(extra["model"].samples[:, present], truth[present], cfg.score.band)
        result["coverage"] = cov
        summary["model"]["mean_band_coverage"] = float(np.nanmean(cov))
    pts = present
    result["periods"] = {
        "truth_track_s": periods(truth[pts], times[pts], background) if pts.sum() >= 4 else math.nan,
        **{f"{name}_track_s": periods(p, times, background) for name, p in preds.items() if name in models},
        "model_latent_s": _latent_period(extra["model"].latents[0], times),
    }
    return result


def _latent_period(latents: np.ndarray, times: np.ndarray) -> float:
    """Period of the latent position along its first principal component."""
    q = latents.shape[1] // 2
    s = latents[:, :q] - latents[:, :q].mean(axis=0)
    if not np.isfinite(s).all() or np.allclose(s, 0):
        return math.nan
    _, _, vt = np.linalg.svd(s, full_matrices=False)
    return dominant_period(s @ vt[0], times)
