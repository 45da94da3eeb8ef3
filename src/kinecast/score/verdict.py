"""A verdict in plain words: has the model learned the motion, and does it beat the simple forecasts?

A model beats a baseline over a span of the forecast when its mean MSE is lower **and** its mean
object position error is lower. Position error matters because on a scene with one small object the
bare background already scores well against persistence by MSE alone; a forecast that draws no
object has no position, counts as infinitely far off, and so never beats anything.

Levels:

* ``failed``: the model does not beat drawing the bare background over the longest span (its MSE
  must also be below :data:`FLOOR_MARGIN` × the background's);
* ``weak``: it does, but not persistence or the optical-flow warp over the shortest span;
* ``good``: otherwise.

Examples
--------
>>> model = {"mean_mse": 0.001, "mean_position_error_px": 0.5}
>>> floor = {"mean_mse": 0.004, "mean_position_error_px": float("nan")}
>>> still = {"mean_mse": 0.008, "mean_position_error_px": 3.0}
>>> v = verdict({"all": {"model": model, "background_only": floor, "persistence": still}})
>>> v["level"], v["beats"]["all"]
('good', ['background_only', 'persistence'])
"""

from __future__ import annotations

import math
import re

import numpy as np

from ..config import FLOOR_MARGIN, Config
from ..errors import KinecastError
from .evaluate import BASELINES, evaluate, summarize

__all__ = ["CAUTION", "beats", "judge_recordings", "judge_run", "verdict"]

CAUTION = ("Forecasts are statistical extrapolations from the frames shown, not measurements; do not "
           "use them for safety-critical control.")
# The floor every model must clear, and the baselines it must also beat over the shortest span to be
# called good (the strongest simple forecasts of short-term motion).
FLOOR = "background_only"
SHORT_RIVALS = ("persistence", "flow_warp")
# A method that shows no object for more than this share of the true objects (per-object matching)
# has no position to compare: its position error counts as infinite.
MAX_MISSED_SHARE = 0.5
# judge_recordings scores these spans, in multiples of the training window.
SPANS = {"1W": 1, "3W": 3}
NAMES = {"background_only": "the bare background", "persistence": "persistence (the last frame held)",
         "constant_velocity": "constant velocity", "flow_warp": "the optical-flow warp"}
_WINDOWS = re.compile(r"^(\d+(?:\.\d+)?)W$")
# What to try. Measured in the recipe bench (bench/results/recipe.md; DEVELOPERS.md): whether a run
# finds where the object is depends on its seed, and collisions fail on every seed. A longer run, more
# recorded motion and cropping are common practice, not measured here on failed runs.
ADVICE = {
    "failed": ("What to try: train again with another seed (kinecast fit ... --set train.seed=1) or longer "
               "(kinecast fit --resume RUN --budget 10m); give it more trials or a longer recording of the "
               "motion; crop the frames to the part that moves (data.roi). Collisions and bounces (a ball on a "
               "floor, pucks hitting rails) are learned poorly by this tool."),
    "weak": ("What to try: a longer run (kinecast fit --resume RUN --budget 10m) or more trials; over the "
             "first frames the simple forecast named above is the better choice."),
}


def _position(summary: dict) -> float:
    """Mean object position error for comparison; infinite where the method shows no object."""
    error = summary.get("mean_position_error_px", math.nan)
    missed = summary.get("missed_object_share", math.nan)
    if not np.isfinite(error) or (np.isfinite(missed) and missed > MAX_MISSED_SHARE):
        return math.inf
    return float(error)


def beats(model: dict, other: dict, margin: float = 1.0) -> bool:
    """True when ``model`` has both the lower mean MSE (below ``margin`` × the other's) and the
    lower mean position error."""
    a, b = model.get("mean_mse", math.nan), other.get("mean_mse", math.nan)
    if not (np.isfinite(a) and np.isfinite(b)):
        return False
    return bool(a < margin * b and _position(model) < _position(other))


def counted(n, word: str, spec: str = "g") -> str:
    """``n`` and ``word``, plural unless ``n`` is 1: ``counted(1, "frame")`` → '1 frame'."""
    return f"{n:{spec}} {word}{'' if n == 1 else 's'}"


def _span(label: str) -> str:
    """'over 3 training windows' for 3W, 'over the held-out frames' for all."""
    if label == "all":
        return "over the held-out frames"
    m = _WINDOWS.match(label)
    if m:
        n = float(m.group(1))
        return f"over {counted(n, 'training window')}"
    return f"over {label}"


def _px(summary: dict) -> str:
    p = _position(summary)
    return f"{p:.1f} px" if np.isfinite(p) else "n/a (no object drawn)"


def _drawn(summary: dict) -> str:
    p = _position(summary)
    return f"object position error {p:.1f} px" if np.isfinite(p) else "it draws no object"


def _best(methods: dict, key) -> str:
    """The baseline with the least ``key(summary)`` (non-finite values last)."""
    names = [m for m in methods if m in BASELINES]
    return min(names, key=lambda m: (not np.isfinite(key(methods[m])), key(methods[m])))


def _ratio(model: dict, other: dict) -> float:
    with np.errstate(divide="ignore", invalid="ignore"):
        return float(np.float64(model["mean_mse"]) / np.float64(other["mean_mse"]))


def _numbers(methods: dict) -> str:
    """Model MSE against the lowest baseline MSE, model position error against the closest baseline."""
    by_mse = _best(methods, lambda s: s["mean_mse"])
    by_pos = _best(methods, _position)
    return (f"its MSE is {_ratio(methods['model'], methods[by_mse]):.2f}× the lowest baseline MSE "
            f"({NAMES.get(by_mse, by_mse)}); its object position error is {_px(methods['model'])} against "
            f"{_px(methods[by_pos])} for the closest baseline ({NAMES.get(by_pos, by_pos)})")


def _text(level: str, summaries: dict, short: str, long: str, missing: list[str]) -> str:
    if level == "failed":
        s = summaries[long]
        return (f"The model does not beat drawing the bare background by a clear margin "
                f"({1 - FLOOR_MARGIN:.0%} lower MSE): "
                f"it has not learned the motion; "
                f"its forecasts are not usable ({_span(long)}: model MSE {_ratio(s['model'], s[FLOOR]):.2f}× "
                f"the bare background's; {_drawn(s['model'])}).")
    numbers = _numbers(summaries[short])
    if level == "weak":
        names = " or ".join(NAMES.get(m, m) for m in missing)
        return (f"The model beats drawing the bare background but not {names} {_span(short)}: it has "
                f"learned some of the motion, yet a simple forecast does better there ({numbers}).")
    m = summaries[long]["model"]
    later = "" if long == short else f" {_span(long)}"
    frames = m.get("object_horizon_frames", 0)
    text = (f"The model beats every simple baseline {_span(short)}: {numbers}. Its forecast object stays "
            f"within the position tolerance (score.position_threshold_px) of the true one for the first "
            f"{counted(frames, 'frame', '.3g')} ({m.get('object_horizon_s', 0.0):.2f} s){later}.")
    return text + _longer_horizon(summaries[long], frames)


def _longer_horizon(methods: dict, frames) -> str:
    """A caveat when a baseline keeps its object within the tolerance for longer than the model
    (better on average, yet off sooner: e.g. a constant offset just above the tolerance)."""
    best = max((m for m in methods if m in BASELINES), key=lambda m: methods[m].get("object_horizon_frames", 0),
               default=None)
    if best is None or not methods[best].get("object_horizon_frames", 0) > frames:
        return ""
    return (f" But {NAMES.get(best, best)} stays within it for longer "
            f"({methods[best]['object_horizon_frames']:.3g} frames): on average the model is closer, yet it "
            "leaves the tolerance sooner.")


def verdict(summaries: dict[str, dict[str, dict]]) -> dict:
    """Judge the model against the baselines.

    Parameters
    ----------
    summaries : dict
        ``summaries[label][method]`` = a summary as from ``evaluate()`` / ``score_prediction`` (at
        least ``mean_mse`` and ``mean_position_error_px``), with method ``model`` and the baselines
        (``background_only`` required). Labels in order of increasing span, e.g. ``"1W"``,
        ``"3W"``, or a single ``"all"``: ``failed`` is judged at the last label, ``weak`` at the
        first. Methods that are not baselines (e.g. compared runs) are ignored.

    Returns
    -------
    dict
        ``ok`` (level is good), ``level`` (good, weak, failed), ``beats`` {label: [baselines beaten]},
        ``text`` (plain sentences with the key numbers and the caution), ``caution``,
        ``judged_at`` {"failed": last label, "weak": first label}, ``mse_ratio``
        {label: {baseline: model MSE / baseline MSE}}.
    """
    labels = list(summaries)
    if not labels:
        raise KinecastError("verdict", "no scores to judge")
    for label in labels:
        if "model" not in summaries[label] or FLOOR not in summaries[label]:
            raise KinecastError("verdict", f"scores {label!r} lack the model or the {FLOOR} baseline")
    short, long = labels[0], labels[-1]
    beaten = {label: [m for m in methods if m in BASELINES
                      and beats(methods["model"], methods[m], FLOOR_MARGIN if m == FLOOR else 1.0)]
              for label, methods in summaries.items()}
    missing = [m for m in SHORT_RIVALS if m in summaries[short] and m not in beaten[short]]
    level = "failed" if FLOOR not in beaten[long] else ("weak" if missing else "good")
    advice = f" {ADVICE[level]}" if level in ADVICE else ""
    text = _text(level, summaries, short, long, missing) + advice + " " + CAUTION
    ratios = {label: {m: _ratio(methods["model"], methods[m]) for m in methods if m in BASELINES}
              for label, methods in summaries.items()}
    return {"ok": level == "good", "level": level, "beats": beaten, "text": text, "caution": CAUTION,
            "judged_at": {"failed": long, "weak": short}, "mse_ratio": ratios}


def _mean_summary(items: list[dict]) -> dict:
    """Key-wise mean of summaries over recordings, NaN entries left out (NaN where all are)."""
    out = {}
    for key in items[0]:
        v = np.array([s[key] for s in items], dtype=np.float64)
        out[key] = float(v[np.isfinite(v)].mean()) if np.isfinite(v).any() else math.nan
    return out


def judge_recordings(model, cfg: Config, recs, window: int, device="cpu") -> dict:
    """Forecast each recording and judge the model on it at one and three training windows.

    Each recording in ``recs`` (:class:`kinecast.frames.Recording`) is forecast from its first
    ``cfg.model.velocity_frames`` frames over ``min(3 * window, frames left)`` frames with
    :func:`~kinecast.score.evaluate.evaluate` (one deterministic forecast); each method's summary
    is taken over the first ``window`` and the first ``3 * window`` of those frames and averaged over
    the recordings.

    Returns
    -------
    dict
        :func:`verdict` of the averaged summaries (labels ``1W`` and ``3W``), plus ``summaries``
        {label: {method: summary}} and ``recordings`` (how many were judged).
    """
    if isinstance(window, bool) or not isinstance(window, (int, np.integer)) or window < 1:
        raise KinecastError("window", f"bad value {window!r}: allowed a whole number >= 1")
    if not recs:
        raise KinecastError("recordings", "none given to judge the model on")
    k = cfg.model.velocity_frames
    spans = {label: mult * int(window) for label, mult in SPANS.items()}
    collected: dict[str, dict[str, list]] = {label: {} for label in spans}
    for rec in recs:
        n = min(max(spans.values()), rec.n_frames - k)
        if n < 1:
            raise KinecastError(rec.source, f"has {rec.n_frames} frames: none left to forecast after "
                                            f"{k} conditioning frames")
        res = evaluate(model, cfg, rec, 0, k, n, samples=1, device=device)
        for label, length in spans.items():
            m = min(length, n)
            for method, per in res["per_frame"].items():
                head = {key: v[:m] for key, v in per.items()}
                collected[label].setdefault(method, []).append(
                    summarize(head, res["present"][:m], res["times"][:m], res["origin"], cfg))
    summaries = {label: {method: _mean_summary(items) for method, items in methods.items()}
                 for label, methods in collected.items()}
    return {**verdict(summaries), "summaries": summaries, "recordings": len(recs)}


def judge_run(run, recs, window: int, device="cpu") -> dict:
    """The verdict on ``recs`` (held-out trials) for the best weights of the run folder ``run``.

    What :func:`kinecast.train.fit` stores as ``verdict`` in summary.json when it is given this
    function as ``judge``: :func:`judge_recordings` without its per-recording detail, plus
    ``judged_on`` (the recordings' sources) and ``scores`` {span: {method: facts}}.
    """
    from ..runfolder import load_run

    best, cfg = load_run(run, device)  # the run's own config.toml and best weights
    judged = judge_recordings(best, cfg, recs, window, device)
    keep = ("level", "ok", "text", "beats", "mse_ratio", "judged_at")
    out = {k: judged[k] for k in keep if k in judged}
    out["judged_on"] = [str(r.source) for r in recs]
    facts = ("mean_mse", "mean_position_error_px", "object_horizon_frames")
    out["scores"] = {label: {m: {f: v[f] for f in facts if f in v} for m, v in methods.items()}
                     for label, methods in judged["summaries"].items()}
    return out
