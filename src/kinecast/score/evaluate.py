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
from .baselines import background_only, constant_velocity, flow_warp, persistence
from .metrics import band_coverage, frame_metrics, leading_run, object_region, position_coverage, ssim
from ..frames.tracks import centroid_track, dominant_period, median_background, object_errors, track_period

# Every baseline is called as fn(context, n, times, background=...) (see baselines.py).
BASELINES = {"background_only": background_only, "persistence": persistence,
             "constant_velocity": constant_velocity, "flow_warp": flow_warp}
# Per-frame scores averaged into the summary as mean_<name>; the other per-frame arrays are object
# counts, summarised as shares.
MEAN_KEYS = ("mse", "mae", "psnr", "ssim", "object_ssim", "position_error_px", "matched_error_px")
COUNT_KEYS = ("true_objects", "missed_objects", "spurious_objects")
# per-frame object centroids (model pixels) of the prediction and of the truth: tracks, not scores
TRACK_KEYS = ("x_px", "y_px", "true_x_px", "true_y_px")
# With sampled futures: per-frame coverage arrays in evaluate's result → their means in the summary
# (all pixels; pixels where truth or forecast shows an object; the object's position).
COVERAGE_SUMMARY = {"coverage": "mean_band_coverage", "object_coverage": "mean_object_band_coverage",
                    "position_coverage": "mean_position_coverage"}
# Coverage outside this range is flagged (from the project's scores issue: near nominal 0.9 is the goal).
COVERAGE_FLAG = (0.8, 0.97)


def coverage_text(summary: dict, band: float, samples: int | None = None) -> str:
    """One plain sentence on how often the sampled futures covered the truth, flagged when off;
    it says so when ``samples`` futures are too few for their region to reach ``band`` (fewer than
    band / (1 - band): see :func:`kinecast.model.calibration.sample_level`)."""
    pos, obj, pix = (summary.get(k) for k in ("mean_position_coverage", "mean_object_band_coverage",
                                              "mean_band_coverage"))
    pct = lambda v: "–" if v is None or not np.isfinite(v) else f"{100 * v:.0f} %"  # noqa: E731
    lo, hi = COVERAGE_FLAG
    flag = lambda v: ("" if v is None or not np.isfinite(v) else  # noqa: E731
                      f" (BELOW {100 * lo:.0f} %)" if v < lo else f" (ABOVE {100 * hi:.0f} %)" if v > hi else "")
    text = (f"spread of the sampled futures: the true object position lay inside their central "
            f"{100 * band:.0f} % region in {pct(pos)}{flag(pos)} of the frames; pixels where an object is "
            f"drawn or recorded lay inside their {100 * band:.0f} % band {pct(obj)}{flag(obj)} of the time "
            f"(all pixels {pct(pix)}, near 100 % on a still background)")
    shown = [v for v in (pos, obj) if v is not None and np.isfinite(v)]
    if any(v < lo for v in shown):
        text += ("; the figure marked BELOW means the futures are more certain than they should be: "
                 "treat their spread as a lower bound on the real uncertainty")
    elif any(v > hi for v in shown):
        text += "; the figure marked ABOVE means the futures spread wider than the errors they make"
    if samples and samples / (samples + 1) < band:
        text += (f"; {samples} futures are too few for a {100 * band:.0f} % region (it holds one more "
                 f"future at most {samples}/{samples + 1} of the time): draw 16 or more to read coverage")
    return text


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


def _horizon(good: np.ndarray, judged: np.ndarray, times: np.ndarray, origin: float) -> tuple[int, float]:
    """Forecast frames (and seconds) up to the first judged frame that is not good.

    Frames that are not judged neither extend nor end the horizon; with none judged it is 0.
    """
    idx = np.flatnonzero(judged)
    if len(idx) == 0:
        return 0, 0.0
    n_ok, _ = leading_run(good[idx], times[idx], origin)
    frames = len(times) if n_ok == len(idx) else int(idx[n_ok])
    return frames, float(times[frames - 1] - origin) if frames else 0.0


def summarize(per_frame: dict[str, np.ndarray], present: np.ndarray, times: np.ndarray, origin: float,
              cfg: Config) -> dict:
    """Summary of one method's per-frame scores (as from :func:`score_prediction`).

    Means over the scored frames (infinite PSNR of exact frames left out), shares of missed and
    spurious objects, and two horizons in forecast frames and seconds:

    * ``valid_horizon``: SSIM over the object region (``object_ssim``) at or above
      ``score.ssim_threshold``; frames where neither truth nor prediction differs from the
      background (NaN) are not judged.
    * ``object_horizon``: object position error at most ``score.position_threshold_px``; a frame
      whose prediction shows no object (NaN error) ends it, frames whose truth shows none are not
      judged.

    Frames without truth neither extend nor end a horizon. Pass slices of the arrays to summarise
    the first frames of a forecast only.
    """
    out = {}
    for k in MEAN_KEYS:
        v = np.where(np.isinf(per_frame[k]), np.nan, per_frame[k])
        out[f"mean_{k}"] = float(np.nanmean(v)) if np.isfinite(v).any() else math.nan
    true = np.nansum(per_frame["true_objects"])
    for k in ("missed", "spurious"):
        out[f"{k}_object_share"] = float(np.nansum(per_frame[f"{k}_objects"]) / true) if true else math.nan
    fg_ssim, error = per_frame["object_ssim"], per_frame["position_error_px"]
    frames, seconds = _horizon(fg_ssim >= cfg.score.ssim_threshold, present & np.isfinite(fg_ssim),
                               times, origin)
    out.update(valid_horizon_frames=frames, valid_horizon_s=seconds)
    seen = present & (np.nan_to_num(per_frame["true_objects"]) > 0)
    frames, seconds = _horizon(error <= cfg.score.position_threshold_px, seen, times, origin)
    out.update(object_horizon_frames=frames, object_horizon_s=seconds)
    return out


def score_prediction(pred: np.ndarray, truth: np.ndarray, present: np.ndarray, times: np.ndarray,
                     origin: float, cfg: Config, background=None) -> tuple[dict, dict]:
    """Per-frame scores (NaN where truth is missing) and their :func:`summarize` for one method.

    Per frame: ``mse``, ``mae``, ``psnr``, ``ssim`` (whole frame), ``object_ssim`` (SSIM over the
    ``object_region``), ``position_error_px`` (centroid of all foreground), ``matched_error_px``
    (mean over objects matched one to one, ``tracks.object_errors``) and the object counts
    ``true_objects``, ``missed_objects``, ``spurious_objects``, and the object tracks
    :data:`TRACK_KEYS` (model pixels). ``background`` None uses the
    per-pixel median of the present true frames for every object measure.
    """
    per_frame = {k: np.full(len(times), np.nan) for k in MEAN_KEYS + COUNT_KEYS + TRACK_KEYS}
    if present.any():
        p, t = pred[present], truth[present]
        bg = median_background(t) if background is None else background
        got = frame_metrics(p, t, bg, window=cfg.score.ssim_window)
        got["object_ssim"] = ssim(p, t, cfg.score.ssim_window, region=object_region(p, t, bg))
        objects = object_errors(p, t, bg)
        got.update({k: objects[k] for k in ("matched_error_px",) + COUNT_KEYS})
        for k, v in got.items():
            per_frame[k][present] = v
    return per_frame, summarize(per_frame, present, times, origin, cfg)


def periods(frames: np.ndarray, times: np.ndarray, background) -> float:
    """Dominant oscillation period (s) of the object track in ``frames``; NaN if none is found."""
    return track_period(centroid_track(frames, background), times)


def evaluate(model, cfg: Config, rec: Recording, cond_start: int, first: int, n: int,
             samples: int = 1, others: dict | None = None, device="cpu", baselines: bool = True) -> dict:
    """Forecast slots ``first .. first+n-1`` of ``rec`` from the context ``cond_start .. first-1``.

    Scores the model, every baseline (none with ``baselines=False``, for callers that want the
    model's own scores only) and any ``others`` ({name: (model, cfg)}) on the present held-out frames. Returns a dict with ``times``, ``origin`` (time of the last context frame),
    ``per_frame`` {method: {metric: (N,)}}, ``summary`` {method: {...}}, ``periods``, with samples > 1
    ``coverage``, ``object_coverage`` and ``position_coverage`` (per frame; see
    :data:`COVERAGE_SUMMARY`) and the model's ``forecast`` (mean frames), ``truth`` and
    ``present`` arrays. Every model's futures are drawn with ``cfg.forecast.seed``, so the same
    call gives the same scores.
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
        fc = predict_from(m, c, rec, first - c.model.velocity_frames, times, samples, device,
                          seed=cfg.forecast.seed)
        preds[name] = fc.mean
        extra[name] = fc
    ctx_times = np.concatenate([rec.times[cond_start:first], times])
    for name, fn in (BASELINES.items() if baselines else ()):
        preds[name] = fn(ctx, n, ctx_times, background=background)
    per_frame, summary = {}, {}
    for name, pred in preds.items():
        per_frame[name], summary[name] = score_prediction(pred, truth, present, times, origin, cfg, background)
    result = {"times": times, "origin": origin, "per_frame": per_frame, "summary": summary,
              "forecast": preds["model"], "truth": truth, "present": present,
              "samples": extra["model"].samples}
    if samples > 1 and present.any():
        drawn, true = extra["model"].samples[:, present], truth[present]
        region = object_region(preds["model"][present], true, background)
        noise = float(model.pixel_noise)
        measures = {"coverage": band_coverage(drawn, true, cfg.score.band, noise=noise),
                    "object_coverage": band_coverage(drawn, true, cfg.score.band, region=region, noise=noise),
                    "position_coverage": position_coverage(drawn, true, background, cfg.score.band)}
        for key, per in measures.items():
            result[key] = np.full(n, np.nan)
            result[key][present] = per
        for key, name in COVERAGE_SUMMARY.items():
            got = result[key][np.isfinite(result[key])]
            summary["model"][name] = float(got.mean()) if len(got) else math.nan
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
