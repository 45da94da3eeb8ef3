"""Turn the raw benchmark results into table rows, each with its goal and whether it is met."""

from __future__ import annotations

import math

from .common import (BEAT_FACTOR, BF16_GAIN_GOAL, COVERAGE_SAMPLES, EFFICIENCY_GOAL, FLAT_RSS_RATIO, INTERVAL_LEVEL,
                     READ_RATIO_GOAL, ROLLOUT_GOAL_FPS, RSS_GOAL_BYTES, Profile, Row, fmt_si, goal_row)
from .quality import (BASELINES, COVERAGE_GOAL, EVAL_SEED, HORIZONS, LEARNED, TRAIN_SEED, TTQ_GOAL_OTHER_S,
                      TTQ_GOAL_S)

GOAL_SAMPLES = 10  # the rollout goal is stated for 10 samples


def peak_rows(peaks: dict[str, dict]) -> list[Row]:
    """The machine's measured peak FLOP/s, one row per number format (``flops.peak_rates``)."""
    rows = []
    for name, peak in peaks.items():
        mm, cv = peak["matmul"], peak["conv"]
        rows.append(Row("machine", f"peak FLOP/s {name}, {peak['threads']} threads (best of {mm['op']}, {cv['op']})",
                        f"{fmt_si(peak['peak'], 'FLOP/s')} (matmul {fmt_si(mm['flops_per_s'], 'FLOP/s')}, "
                        f"conv {fmt_si(cv['flops_per_s'], 'FLOP/s')})"))
    return rows


def train_rows(peaks: dict[str, dict], train: list[dict], p: Profile, gains: list[dict] = ()) -> list[Row]:
    """Per-size step throughput and achieved FLOP/s, the efficiency ratios against the peak of the
    format each step ran in, the ratio of the two formats' best step times where both ran, and the
    speed-up of bfloat16 over float32 measured interleaved (``gains``: ``throughput.precision_gain``)."""
    rows = []
    for r in train:
        rows.append(Row("train", f"training step {r['size']} px {r['precision']}, batch {r['batch']} × "
                        f"{r['window']} frames", f"{r['frames_per_s']:.0f} frames/s ({r['step_s'] * 1e3:.0f} ms/step)"))
        per_step = fmt_si(r["flops_per_step"], "FLOP")
        rows.append(Row("train", f"achieved FLOP/s {r['size']} px {r['precision']} (fwd+bwd {per_step}/step)",
                        fmt_si(r["flops_per_s"], "FLOP/s")))
    for r in train:
        eff = r["flops_per_s"] / peaks[r["precision"]]["peak"]
        if r["size"] == p.efficiency_size:
            rows.append(goal_row("train", f"efficiency ({r['size']} px {r['precision']}, achieved / {r['precision']} "
                                 "peak)", eff, f"{eff:.3f}", EFFICIENCY_GOAL, f"≥ {EFFICIENCY_GOAL}"))
        else:
            rows.append(Row("train", f"efficiency @ {r['size']} px {r['precision']}", f"{eff:.3f}"))
    by = {(r["size"], r["precision"]): r["step_s"] for r in train}
    for size in sorted({r["size"] for r in train}):
        if (size, "fp32") in by and (size, "bf16") in by:
            ratio = by[size, "fp32"] / by[size, "bf16"]
            rows.append(Row("train", f"fp32 / bf16 best step time ({size} px, timed minutes apart)", f"{ratio:.2f}×"))
    for g in gains:
        rows.append(goal_row("train", f"bf16 step speed-up over fp32 ({g['size']} px, median of {g['rounds']} "
                             "interleaved rounds)", g["gain"], f"{g['gain']:.2f}× (rounds {g['gain_lo']:.2f}-"
                             f"{g['gain_hi']:.2f}×)", BF16_GAIN_GOAL, f"≥ {BF16_GAIN_GOAL}×"))
    return rows


def rollout_rows(rollout: list[dict]) -> list[Row]:
    rows = []
    for r in rollout:
        goal = ROLLOUT_GOAL_FPS if r["samples"] == GOAL_SAMPLES else None
        measure = f"rollout + decode {r['size']} px, {r['samples']} sample(s) × {r['frames']} frames"
        rows.append(goal_row("forecast", measure, r["frames_per_s"], f"{r['frames_per_s']:.0f} frames/s",
                             goal, f"≥ {ROLLOUT_GOAL_FPS:.0f} frames/s" if goal else "—"))
    return rows


def memory_rows(memory: list[dict], p: Profile) -> list[Row]:
    rows = []
    for r in memory:
        measure = (f"peak RSS, fresh process, {p.memory_steps} training steps on {r['frames']} frames "
                   f"at {p.memory_size} px (validation window {r.get('val_window')} frames)")
        rows.append(goal_row("memory", measure, r["peak_rss_bytes"], fmt_si(r["peak_rss_bytes"], "B"),
                             RSS_GOAL_BYTES, f"≤ {fmt_si(RSS_GOAL_BYTES, 'B')}", higher_is_better=False))
    if len(memory) >= 2:
        short, long_ = min(memory, key=lambda r: r["frames"]), max(memory, key=lambda r: r["frames"])
        ratio = long_["peak_rss_bytes"] / short["peak_rss_bytes"]
        rows.append(goal_row("memory", f"peak RSS {long_['frames']} / {short['frames']} frames", ratio,
                             f"{ratio:.2f}", FLAT_RSS_RATIO, f"≤ {FLAT_RSS_RATIO} (flat; our threshold)",
                             higher_is_better=False))
    return rows


def video_rows(v: dict) -> list[Row]:
    return [Row("video", f"read {v['frames']}-frame mp4 to {v['size']} px, cache off",
                f"kinecast {v['kinecast_fps']:.0f} frames/s, raw ffmpeg {v['raw_fps']:.0f} frames/s"),
            goal_row("video", "read throughput ratio, kinecast / raw ffmpeg decode", v["ratio"],
                     f"{v['ratio']:.2f}", READ_RATIO_GOAL, f"≥ {READ_RATIO_GOAL}")]


def _triple(values: list[float], spec: str) -> str:
    return " / ".join("n/a" if not math.isfinite(x) else format(x, spec) for x in values)


def _method_value(s: dict, persistence_mse: float, is_persistence: bool) -> str:
    value = (f"MSE {_triple(s['mse'], '.2e')} · SSIM {_triple(s['ssim'], '.3f')} · "
             f"pos {_triple(s['position_error_px'], '.2f')} px · valid {s['valid_horizon_frames']:.1f} fr")
    if s["object_lost_share"] > 0:
        value += f" · no object in {100 * s['object_lost_share']:.0f}% of frames"
    if not is_persistence:
        value += f" · 3W MSE = {s['mse'][-1] / persistence_mse:.2f} × persistence"
    return value


def coverage_rows(rig: str, cover: dict, trials: int | None = None) -> list[Row]:
    """One row per learned method and coverage ({method: {"position": c, "object band": c}}, each
    ``c`` :func:`bench.quality.coverages`'s {"mean", "interval", "trials"} or, in results written
    before the interval was stored, the mean alone) over ``trials`` held-out trials (not named when
    unknown), judged by the mean against :data:`bench.quality.COVERAGE_GOAL`; NaN (nothing could be
    judged) is unjudged. The interval of the mean over the trials is shown beside it: the goal's
    band is narrow next to the trial-to-trial spread of a dozen trials."""
    lo, hi = COVERAGE_GOAL
    held = f"{trials} held-out trials, " if trials else ""
    rows = []
    for method, cov in cover.items():
        for name, got in cov.items():
            got = got if isinstance(got, dict) else {"mean": got}
            value = got["mean"]
            ok = None if value != value else lo <= value <= hi
            text = f"{value:.2f}"
            a, b = got.get("interval", (math.nan, math.nan))
            if a == a and b == b:
                text += f" ({100 * INTERVAL_LEVEL:.0f}% interval of the mean over the trials {a:.2f}-{b:.2f})"
            rows.append(Row("coverage", f"{rig}: {method} {name} coverage ({COVERAGE_SAMPLES} futures, "
                            f"{held}nominal 0.90)", text, f"{lo:g}-{hi:g}", ok))
    return rows


def time_to_quality_rows(rig: str, ttq: dict, budget: str) -> list[Row]:
    """One row per learned method ({method: :func:`bench.quality.time_to_quality`'s result}), judged
    against the rig's goal (:data:`bench.quality.TTQ_GOAL_S`, else :data:`~bench.quality.TTQ_GOAL_OTHER_S`)."""
    rows = []
    goal = TTQ_GOAL_S.get(rig, TTQ_GOAL_OTHER_S)
    for variant, t in ttq.items():
        reached = t["reached"]
        text = f"{reached['time_s']:.1f} s (step {reached['step']})" if reached else f"not reached in {budget}"
        text += f"; best 3W MSE {t['best_ratio']:.2f} × persistence over {len(t['curve'])} kept checkpoint(s)"
        measure = f"{rig}: {variant} until 3W MSE ≤ {1 / BEAT_FACTOR:g} × persistence"
        rows.append(Row("time-to-quality", measure, text, f"≤ {goal:g} s",
                        reached is not None and reached["time_s"] <= goal))
    return rows


def quality_rows(quality: dict, budget: str) -> tuple[list[Row], list[str]]:
    """One row per rig and method, then the time-to-quality rows; plus notes for the table."""
    rows, notes = [], []
    for rig, entry in quality.items():
        if "error" in entry:
            rows.append(Row("quality", f"{rig}", f"failed: {entry['error']}"))
            continue
        scores, train = entry["scores"], entry["training"]
        pers = scores["persistence"]["mse"][-1]
        for method in LEARNED + BASELINES:
            if method not in scores:
                err = (train.get(method) or {}).get("error")
                rows.append(Row("quality", f"{rig}: {method}", f"not trained: {err}"))
                continue
            steps = f" ({train[method]['summary']['steps']} steps in {budget})" if method in LEARNED else ""
            rows.append(Row("quality", f"{rig}: {method}{steps}",
                            _method_value(scores[method], pers, method == "persistence")))
        rows += coverage_rows(rig, entry.get("coverage", {}), entry.get("coverage_trials"))
        rows += time_to_quality_rows(rig, entry.get("time_to_quality", {}), budget)
        horizons = " / ".join(f"{h}·W" for h in HORIZONS)
        notes.append(f"quality {rig}: {entry['size']} px, W = {entry['window']} frames (train.window_max); "
                     f"MSE, SSIM and position error (model pixels) are means over the first {horizons} "
                     "forecast frames after the first model.velocity_frames frames of each evaluation trial "
                     f"(rendered with seed {EVAL_SEED}, training trials with seed {TRAIN_SEED}); valid = "
                     "forecast frames before SSIM first drops below score.ssim_threshold, within 3·W")
    if any(r.area == "time-to-quality" for r in rows):
        notes.append("time-to-quality: training-loop seconds at the first kept checkpoint of each rig's "
                     f"run whose 3·W MSE is at most 1/{BEAT_FACTOR:g} of persistence's")
    return rows, notes
