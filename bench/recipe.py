"""Does the training recipe learn the motion on every rig and every look? ``python bench/recipe.py``.

For each rig × look × seed (× recipe): the rig × look's scene (12 trials rendered with rig seed 1,
and 12 more used only for coverage; one fixed camera and background, the same for every training seed) is trained on, first 8
trials, with the default config, the training seed and the given budget; each of trials 8-11 is forecast from its first
``model.velocity_frames`` frames for 60 frames and scored with :func:`kinecast.score.evaluate.evaluate`
against the bare background, persistence, constant velocity and the Farnebäck flow warp, and
16 sampled futures per trial give the position and object-pixel band coverage (goal 0.85-0.95),
on those 4 trials and on ``FRESH_TRIALS`` more trials of the same scene (trials 12-23 of rig seed 1,
rendered into the scene's folder; training and the scores above use trials 0-11 only:
each trial's start and camera noise come from its own random stream, the background from the
seed; trials of another seed are another background on the textured and gradient looks, which a
fixed-camera model has never seen). Coverage varies from trial to trial (0.4-1.0 on one pendulum
run), so 4 trials that happen to be easy read as over-covered.

A run *succeeds* when the model's object position error averaged over the 60 forecast frames is
at most ``SUCCESS_PX`` model pixels and its tracked period is within ``SUCCESS_PERIOD`` of the
truth's (where the truth has a period; otherwise position alone). On a scene with several objects
(the air table) the error is per object (objects matched frame by frame) over the first 20 forecast
frames, at most ``SUCCESS_OBJECT_PX``. ``--rescore`` scores the run folders already in ``--work``
again without training (after a change of the scores themselves); its rows say so. Every run is appended to
``bench/results/recipe_runs.jsonl`` (with the date, the load average and the time to quality: the
training seconds until the first kept checkpoint forecasts the 4 held-out trials with at most 1/10 of
persistence's MSE over the 60 frames, as in ``bench/quality.py``), and the summary table
(success share, medians of MSE / background-only and MSE / persistence, spread as min-max) is
rebuilt from all runs in that file into ``bench/results/recipe.md`` (rows marked ``excluded``, with the
reason, e.g. a run starved of CPU by other work, are left out).

Scores are statistical extrapolations on synthetic rigs rendered by kinecast itself; they are not
measurements of a real apparatus, and kinecast is not for safety-critical control.
"""

from __future__ import annotations

import argparse
import json
import math
import os
import shutil
import sys
import tempfile
import time
from datetime import datetime, timezone
from functools import partial
from pathlib import Path

import numpy as np

if __package__ in (None, ""):  # run as a script: make `bench` and `kinecast` importable
    sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from bench.common import NOMINAL_FPS, RESULTS_DIR, trial_coverage  # noqa: E402
from bench.quality import snapshots_folder, time_to_quality as quality_ttq, train_variant  # noqa: E402
from kinecast.config import Config, apply_overrides, parse_budget  # noqa: E402
from kinecast.fileio import write_text  # noqa: E402
from kinecast.frames import read_recording  # noqa: E402
from kinecast.rigs import RIGS, write_rig  # noqa: E402
from kinecast.score.evaluate import evaluate  # noqa: E402
from kinecast.score.verdict import judge_run  # noqa: E402
from kinecast.train import load_run  # noqa: E402
from kinecast import config as cfgmod  # noqa: E402
from kinecast.runfolder import CONFIG, MODEL_LAYOUT, read_log  # noqa: E402
from kinecast.train.loop import TrainingStopped  # noqa: E402

SUCCESS_PX = 2.0          # position error @60 frames (model pixels), from the project's issue
SUCCESS_PERIOD = 0.03     # relative period error, from the project's issue
SUCCESS_OBJECT_PX = 3.0   # per-object error @20 frames on a multi-object scene, from the issue
# The rigs whose scenes show several objects, judged per object. Not the tracker's object count: the
# ball drawn by other code and its shadow count as two pieces (mean 2.0), which judged those runs by
# the per-object rule (rows before 2026-12-03 21:00 stored success = true at 2.68-3.79 px @60)
MULTI_OBJECT_RIGS = {"airtable"}
# How the object positions were tracked; rows of different trackers are not pooled in the table
# (rows without this field: no low-pass). Bump with kinecast.frames.tracks changes that move scores.
TRACKER = "low-pass 1.5 px"
# How the forecasts were scored. "frame steps": the solver crosses an output interval of several
# frames in solver.substeps steps per frame (kinecast.model.solver.step_grid). Rows without this
# field were scored by forecasts that crossed the gap from the first context frame to the first
# forecast frame (3 frames) in 2 steps, which threw some runs' forecasts off from the start (spring
# rod s7: 2.05 px @60 then, 1.01 px with the fix); rows whose runs were still on disk were rescored
# and keep the old numbers under "before_grid_fix".
SCORING = "frame steps"
# Which defaults a row with no settings ran with; bump with every change of a default that matters
# to learning (rows from before this field ran with "3": layout 3, no coverage term, v0 corrected;
# "4": keypoint_coverage 1, v0 = finite difference alone; "5": as 4, and keypoints that barely move
# held still, train.still_keypoint_px 1; "6": as 5, keypoint posteriors start at 0.5 px, an encoder that
# loses the object goes back to deterministic steps, early stop only below 0.8x the background;
# "7" ... "16", and the "15c" / "15g" tries: see DEVELOPERS.md)
DEFAULTS = ("23: as 22, with the joint stage's learning rate rising linearly over its first tenth "
            "(train.joint_warmup = 0.1; before: from its peak) and the optimiser's running statistics of the "
            "position encoder and decoder started afresh when the joint stage unfreezes them "
            "(train.joint_fresh_moments; before: the positions stage's). "
            "22: as 21, with the joint stage starting from the weights kept so far, the dynamics stage's best "
            "validated average (train.joint_from_best; before: from the dynamics stage's last average). "
            "21: as 20, with validation, the kept weights and so every forecast from a moving average of the "
            "weights from the dynamics stage on (train.weight_average = 0.98; the joint stage goes on from the "
            "dynamics stage's average). 20: as 19, with early stop allowed only from train.early_stop_from = 0.7 of the budget (before: "
            "whenever validation had stalled patience times at the longest window) and train.keep_heap on (the "
            "same arithmetic, faster steps). 19: as 18, with the keypoint encoder's conv trunk in train.precision's number format (bf16 where "
            "the CPU has it; its heat maps stay float32). 18: as 17 (one acceleration field shared by the keypoints where the training frames show several "
            "alike separate objects; 20-frame dynamics windows when no period is found; for those alike "
            "objects keypoints read within 3 heat-map cells of each map's peak), and validation, which "
            "picks the weights kept, from the dynamics stage on (before: from the joint stage on); the "
            "joint stage's stalls are counted against its own best score")
# (defaults label, settings) pairs that ran today's algorithm, by kind of scene: pooled in the "today's
# defaults" table. On one-object scenes d14-d17 are one algorithm (d15's keypoint following never
# reordered one object's keypoints; d16 / d17's autos resolve to field_per_keypoint off and
# keypoint_window 0 there); on alike objects (the air table) d17, and d16 with the window set to d17's
# 3 cells by hand (DEVELOPERS.md, twelfth to fourteenth sessions). d18 trains every step as d17 does;
# its kept weights are chosen from more validated checkpoints (the dynamics stage's too), pooled with
# the d17 rows once its own runs showed no change beyond one seed's spread (DEVELOPERS.md, eighteenth session).
# d19 computes the keypoint encoder's trunk in bf16: the same algorithm in another number format,
# pooled with d18 (and d18 rows run with that setting) after six paired runs showed no change beyond
# one seed's spread (DEVELOPERS.md, twentieth session). d19 rows run with train.keep_heap=true (the
# same arithmetic with faster steps, so more steps in a budget, and an earlier early stop) are not
# pooled: it ran without d20's early-stop floor (DEVELOPERS.md, twenty-second session). d20 (that floor,
# and keep_heap on; its first rows set keep_heap by hand) is pooled with d14-d19 after nine paired runs
# showed no change beyond one seed's spread (DEVELOPERS.md, twenty-third session). d22 (the kept
# weights a moving average, the joint stage started from them) trains the same steps but keeps other
# weights: pooled for success and position error after ten paired runs (every rig, three pendulum
# looks, both spring looks run, the rod pendulum drawn by other code) showed no change in them beyond
# one seed's spread (better in 5 of 8 smooth-motion pairs, spring classic s9 worse); its time to
# quality is shorter (pendulum 92-103 s against 119-159 s for d19/d20), so the pooled time-to-quality cells mix
# the two (DEVELOPERS.md, twenty-eighth session). d21 (the average without the joint stage's start
# from the kept weights) stays a group of its own. d23 (the joint stage's learning rate warmed up, the
# encoder's and decoder's optimiser statistics started afresh when it begins) trains the same steps up
# to the joint stage: pooled after nine runs (every rig; d22 rows run with both settings by hand are the
# same algorithm) kept every success and failure of d22, and three deterministic paired runs (a step
# budget, so identical up to the joint stage) differed by no more than one seed's spread (held-out
# position error 0.58 -> 0.50, 0.28 -> 0.32, 0.45 -> 0.44 px) (DEVELOPERS.md, twenty-ninth session).
_D23_BY_HAND = frozenset({"train.joint_warmup=0.1", "train.joint_fresh_moments=true"})
_SINCE_D20 = [("20", frozenset()), ("20", frozenset({"train.keep_heap=true"})), ("22", frozenset()),
              ("22", _D23_BY_HAND), ("23", frozenset())]
_ONE = [frozenset(), frozenset({"model.keypoint_window=0"}), frozenset({"model.field_per_keypoint=off"})]
_LOW_TRUNK = frozenset({"model.keypoint_trunk_low_precision=true"})
SAME_ALGORITHM = {"one object": {(label, sets) for label in ("14", "15", "16", "17", "18", "19") for sets in _ONE}
                  | {("18", _LOW_TRUNK)} | set(_SINCE_D20),
                  "alike objects": {*_SINCE_D20, ("19", frozenset()), ("18", frozenset()), ("18", _LOW_TRUNK), ("17", frozenset()),
                                    ("16", frozenset({"model.keypoint_window=3"}))}}
START_FRAMES = 3          # forecast frames over which the drawing offset is measured
TRIALS, TRAIN_TRIALS, FRAMES, HORIZON, SIZE = 12, 8, 90, 60, 64
FRESH_TRIALS = 12  # more held-out trials of the same scene, for the coverage figures
RUNS_FILE = "recipe_runs.jsonl"
TABLE_FILE = "recipe.md"


def score_run(run: Path, trials: list[Path], fresh: list[Path] = ()) -> dict:
    """Mean scores of the run's best weights over the held-out ``trials``; coverage also over the
    ``fresh`` trials (keys ``fresh_mean_position_coverage``, ``fresh_mean_object_band_coverage``),
    and every coverage per trial (``coverage_per_trial``)."""
    model, cfg = load_run(run)
    k = cfg.model.velocity_frames
    acc: dict[str, list] = {}
    for trial in trials:
        rec = read_recording(trial, cfg.data)
        r = evaluate(model, cfg, rec, 0, k, HORIZON)
        pf, per = r["per_frame"], r["periods"]
        for name in ("model", "background_only", "persistence", "constant_velocity", "flow_warp"):
            acc.setdefault(f"mse_{name}", []).append(np.nanmean(pf[name]["mse"]))
            acc.setdefault(f"pos_{name}", []).append(np.nanmean(pf[name]["position_error_px"]))
        acc.setdefault("pos20_model", []).append(np.nanmean(pf["model"]["position_error_px"][:20]))
        acc.setdefault("obj20_model", []).append(np.nanmean(pf["model"]["matched_error_px"][:20]))
        acc.setdefault("objects", []).append(np.nanmedian(pf["model"]["true_objects"]))
        # how far the drawn object sits from the true one before the motion has had time to
        # matter: a drawing offset (e.g. a spring's coil drawn blurred), not a dynamics error
        acc.setdefault("pos_start_model", []).append(np.nanmean(pf["model"]["position_error_px"][:START_FRAMES]))
        acc.setdefault("period_truth", []).append(per["truth_track_s"])
        acc.setdefault("period_model", []).append(per["model_track_s"])
        # coverage of the sampled futures (issue goal 0.85-0.95 at band 0.9); a separate call, so the
        # point forecast above stays the mean-weights rollout of earlier rows
        for key, value in trial_coverage(model, cfg, rec, HORIZON).items():
            acc.setdefault(key, []).append(value)
    for trial in fresh:
        for key, value in trial_coverage(model, cfg, read_recording(trial, cfg.data), HORIZON).items():
            acc.setdefault(f"fresh_{key}", []).append(value)
    out = {key: float(np.nanmean(v)) if np.isfinite(v).any() else math.nan for key, v in acc.items()}
    # per trial too: a mean over a dozen trials moves by ± a few hundredths from the trials' spread alone
    out["coverage_per_trial"] = {key: [round(float(x), 4) for x in v] for key, v in acc.items() if "coverage" in key}
    p_t, p_m = np.array(acc["period_truth"]), np.array(acc["period_model"])
    ok = np.isfinite(p_t)
    out["period_error"] = float(np.nanmean(np.abs(p_m[ok] - p_t[ok]) / p_t[ok])) if ok.any() else math.nan
    return out


STAGE_NAMES = {1: "positions", 2: "dynamics", 3: "joint"}  # log.csv's stage column (train/stages.py)


def stage_rates(run: Path) -> dict[str, float]:
    """Training steps per second of each stage of ``run``, from its log.csv (one row per 10 steps)."""
    by_stage: dict[str, list] = {}
    for r in read_log(run):
        if "stage" in r and "time_s" in r:
            by_stage.setdefault(STAGE_NAMES.get(int(r["stage"]), str(r["stage"])), []).append((r["step"], r["time_s"]))
    return {name: round((pts[-1][0] - pts[0][0]) / (pts[-1][1] - pts[0][1]), 1)
            for name, pts in by_stage.items() if len(pts) > 1 and pts[-1][1] > pts[0][1]}


def succeeded(row: dict) -> bool:
    if row["rig"] in MULTI_OBJECT_RIGS:
        return bool(row.get("obj20_model", math.nan) <= SUCCESS_OBJECT_PX)  # NaN: rows before per-object scores
    period_ok = not math.isfinite(row["period_truth"]) or (
        math.isfinite(row["period_error"]) and row["period_error"] <= SUCCESS_PERIOD)
    return bool(row["pos_model"] <= SUCCESS_PX and period_ok)


def one_run(rig: str, look: str, seed: int, recipe: str, budget: str, work: Path, sets: list[str],
            rescore: bool = False) -> dict:
    scene = work / f"{rig}_{look}"
    every = sorted(p for p in scene.iterdir() if p.is_dir()) if scene.exists() else []
    if len(every) < TRIALS + FRESH_TRIALS and rig in RIGS:  # (scenes of bench/foreign.py are as written)
        # trial k is the same whatever the count (its own random stream), so an older 12-trial scene
        # is extended in place: its first TRIALS are rewritten unchanged
        every = write_rig(rig, scene, trials=TRIALS + FRESH_TRIALS, frames=FRAMES, seed=1, size=SIZE,
                          fps=NOMINAL_FPS, look=look, overwrite=scene.exists())
    trials, fresh = every[:TRIALS], every[TRIALS:TRIALS + FRESH_TRIALS]
    run = work / "runs" / f"{rig}_{look}_{recipe}_s{seed}"
    t0 = time.time()
    if rescore:
        summary = json.loads((run / "summary.json").read_text())
    else:
        cfg = Config()
        cfg.data.cache_dir = str(work / "cache")
        cfg.train.budget, cfg.train.seed, cfg.train.recipe = budget, seed, recipe
        cfg = apply_overrides(cfg, sets)
        trained = {}
        try:
            trained = train_variant(trials[:TRAIN_TRIALS], run, cfg, show_progress=False, judge=judge_run)
            summary = trained["summary"]
        except TrainingStopped as exc:  # repeated numerical faults: the best weights are kept; score them
            print(f"bench: {exc}", flush=True)
            summary = json.loads((run / "summary.json").read_text())
    row = {"rig": rig, "look": look, "seed": seed, "recipe": recipe, "budget": budget, "sets": sets,
           "layout": MODEL_LAYOUT, "defaults": DEFAULTS, "tracker": TRACKER, "scoring": SCORING, "rescored": rescore,
           "steps": summary["steps"], "train_s": summary.get("elapsed_s") if rescore else round(time.time() - t0, 1),
           "stop": summary["stop_reason"], "faults": summary.get("faults", 0),
           "spread_scale": summary.get("spread_scale"), "precision": summary.get("precision", "fp32"),
           "pixel_noise": summary.get("pixel_noise"), "verdict": (summary.get("verdict") or {}).get("level"),
           "positions_found": summary.get("positions_found"), "still_keypoints": summary.get("still_keypoints"),
           "date": datetime.now(timezone.utc).isoformat(timespec="seconds"),
           "load": os.getloadavg()[0], "steps_per_s": stage_rates(run), **score_run(run, trials[TRAIN_TRIALS:], fresh)}
    row["success"] = succeeded(row)
    if not rescore:
        row.update(time_to_quality(run, trials[TRAIN_TRIALS:], trained.get("snapshots", []), row["mse_persistence"]))
    return row


def time_to_quality(run: Path, trials: list[Path], snapshots: list[dict], persistence_mse: float) -> dict:
    """``ttq_s``: training seconds until the first kept checkpoint's forecast of the held-out
    ``trials`` (``HORIZON`` frames) has an MSE of at most 1/10 of persistence's (None: never), as in
    ``bench/quality.py``; ``ttq_best_ratio`` and the ``ttq_curve`` behind it. The copies of the
    checkpoints are removed afterwards."""
    data = cfgmod.load(run / CONFIG, cfgmod.saved_run_base()).data  # the config only: each snapshot loads its weights
    recs = [read_recording(t, data) for t in trials]
    got = quality_ttq(snapshots, recs, HORIZON // 3, persistence_mse, "cpu")
    shutil.rmtree(snapshots_folder(run), ignore_errors=True)
    return {"ttq_s": got["reached"]["time_s"] if got["reached"] else None, "ttq_best_ratio": got["best_ratio"],
            "ttq_curve": [[c["time_s"], round(c["ratio"], 4)] for c in got["curve"]]}


def median_range(rs: list[dict], f) -> str:
    """``f`` over the rows: "median (min-max)", NaN ignored; "-" when none is finite."""
    v = np.array([f(r) for r in rs], dtype=float)
    return f"{np.nanmedian(v):.2f} ({np.nanmin(v):.2f}-{np.nanmax(v):.2f})" if np.isfinite(v).any() else "-"


def table(rows: list[dict]) -> str:
    groups: dict[tuple, list] = {}
    for r in rows:
        if r.get("excluded"):  # kept in the runs file with the reason, left out of the table
            continue
        label = r.get("defaults", "3").split(":")[0]  # "17: as 16, ..." -> "17" (rows before labels: 3)
        sets = " ".join([f"defaults {label}"] + list(r.get("sets", [])))
        if r.get("tracker"):
            sets += f"; tracker {r['tracker']}"
        groups.setdefault((r["rig"], r["look"], r["recipe"], r["budget"], sets), []).append(r)
    lines = ["| rig | look | recipe | budget | settings | runs | success | MSE / background-only | "
             "MSE / persistence | position error @60 (px) | offset over the first 3 frames (px) | "
             "position error @20 (px) | per-object error @20 (px) | period error | position coverage | "
             "object-pixel band coverage | verdicts |",
             "|---|---|---|---|---|---|---|---|---|---|---|---|---|---|---|---|---|"]
    for (rig, look, recipe, budget, sets), rs in sorted(groups.items()):
        med = partial(median_range, rs)
        verdicts = ", ".join(f"{v}×{sum(r['verdict'] == v for r in rs)}" for v in ("good", "weak", "failed")
                             if any(r["verdict"] == v for r in rs))
        lines.append(f"| {rig} | {look} | {recipe} | {budget} | {sets or '-'} | {len(rs)} | "
                     f"{sum(succeeded(r) for r in rs)}/{len(rs)} | "
                     f"{med(lambda r: r['mse_model'] / r['mse_background_only'])} | "
                     f"{med(lambda r: r['mse_model'] / r['mse_persistence'])} | {med(lambda r: r['pos_model'])} | "
                     f"{med(lambda r: r.get('pos_start_model', math.nan))} | {med(lambda r: r['pos20_model'])} | "
                     f"{med(lambda r: r.get('obj20_model', math.nan))} | "
                     f"{med(lambda r: r['period_error'])} | "
                     f"{med(lambda r: r.get('mean_position_coverage', math.nan))} | "
                     f"{med(lambda r: r.get('mean_object_band_coverage', math.nan))} | {verdicts} |")
    return "\n".join(lines) + "\n"


def todays_rows(rows: list[dict]) -> list[dict]:
    """The rows that ran today's defaults on their kind of scene (:data:`SAME_ALGORITHM`)."""
    keep = []
    for r in rows:
        if r.get("excluded") or r.get("recipe") != "staged" or r.get("budget") != "5m":
            continue
        if r.get("tracker") != TRACKER:
            continue
        if _todays_algorithm(r, frozenset(r.get("sets", []))):
            keep.append(r)
    return keep


def _todays_algorithm(r: dict, sets: frozenset) -> bool:
    """Whether row ``r``'s defaults label with ``sets`` ran today's algorithm (:data:`SAME_ALGORITHM`)."""
    kind = "alike objects" if r["rig"] in MULTI_OBJECT_RIGS else "one object"  # alike_objects' choice
    return (r.get("defaults", "3").split(":")[0], sets) in SAME_ALGORITHM[kind]


# The columns every table of today's runs shares (one group of runs per line): see _outcome_cells
OUTCOME_HEADER = ("runs (seeds) | success | position error @60 (px) | per-object error @20 (px) | period error | "
                  "MSE / background-only | MSE / persistence | time to 0.1× persistence (s)")


def _outcome_cells(rs: list[dict]) -> str:
    """The :data:`OUTCOME_HEADER` cells of one group of runs: count and seeds, successes, and medians
    (min-max) of the scores."""
    med = partial(median_range, rs)
    seeds = ",".join(str(x) for x in sorted({r["seed"] for r in rs}))
    return (f"{len(rs)} ({seeds}) | {sum(succeeded(r) for r in rs)}/{len(rs)} | {med(lambda r: r['pos_model'])} | "
            f"{med(lambda r: r.get('obj20_model', math.nan))} | {med(lambda r: r['period_error'])} | "
            f"{med(lambda r: r['mse_model'] / r['mse_background_only'])} | "
            f"{med(lambda r: r['mse_model'] / r['mse_persistence'])} | {ttq_cell(rs)}")


def _divider(header: str) -> str:
    return "|" + "---|" * (header.count("|") + 1)


def success_table(rows: list[dict], pool_looks: bool = False) -> str:
    """Share of runs that succeed per rig × look with today's defaults, and the medians behind it;
    ``pool_looks``: one line per rig over all its looks (the look cell says how many); scenes that
    kinecast's rigs did not render (``bench/foreign.py``) stay one line each."""
    groups: dict[tuple, list] = {}
    for r in todays_rows(rows):
        groups.setdefault((r["rig"], None if pool_looks and r["rig"] in RIGS else r["look"]), []).append(r)
    header = (f"rig | look | {OUTCOME_HEADER} | position coverage (4 trials) | position coverage "
              f"({FRESH_TRIALS} more trials) | scored with frame steps")
    lines = [f"| {header} |", _divider(header)]
    for (rig, look), rs in sorted(groups.items(), key=lambda kv: (kv[0][0], kv[0][1] or "")):
        med = partial(median_range, rs)
        look = look or f"{len({r['look'] for r in rs})} looks"
        lines.append(f"| {rig} | {look} | {_outcome_cells(rs)} | "
                     f"{med(lambda r: r.get('mean_position_coverage', math.nan))} | "
                     f"{med(lambda r: r.get('fresh_mean_position_coverage', math.nan))} | "
                     f"{sum(r.get('scoring') == SCORING for r in rs)}/{len(rs)} |")
    return "\n".join(lines) + "\n"


def ttq_cell(rs: list[dict]) -> str:
    """Time to quality over the runs that measured it: how many got there, and the median seconds
    with a run that never did counted as its budget (so leaving it out does not flatter the median);
    "-" when no run measured it (rows from before the measurement)."""
    measured = [r for r in rs if "ttq_s" in r]
    if not measured:
        return "-"
    secs = [r["ttq_s"] if r["ttq_s"] is not None else parse_budget(r["budget"]) for r in measured]
    hit = sum(r["ttq_s"] is not None for r in measured)
    return f"{hit}/{len(measured)} reached; {np.median(secs):.0f} ({min(secs):.0f}-{max(secs):.0f})"


def _comparable(r: dict) -> bool:
    """A 5-minute row, kept, tracked and scored as today's rows are."""
    return (not r.get("excluded") and r.get("budget") == "5m" and r.get("tracker") == TRACKER
            and r.get("scoring") == SCORING)


def old_recipe_rows(rows: list[dict]) -> list[dict]:
    """The rows of the old recipe (end to end from the first step, dense encoder), scored as today's."""
    return [r for r in rows if _comparable(r) and r.get("recipe") == "end_to_end"
            and "model.encoder=dense" in r.get("sets", [])]


def fp32_rows(rows: list[dict]) -> list[dict]:
    """Today's defaults with every net in float32 (``train.precision=fp32``), scored as today's."""
    return [r for r in rows if _comparable(r) and r.get("recipe") == "staged"
            and list(r.get("sets", [])) == ["train.precision=fp32"] and _todays_algorithm(r, frozenset())]


def side_by_side_table(rows: list[dict], others: list[dict], names: tuple[str, str]) -> str:
    """Today's defaults (``names[0]``) beside ``others`` (``names[1]``), per rig × look that has runs
    of both; "" when none has."""
    groups: tuple[dict, dict] = ({}, {})
    for group, rs in zip(groups, (todays_rows(rows), others)):
        for r in rs:
            group.setdefault((r["rig"], r["look"]), []).append(r)
    header = f"rig | look | recipe | {OUTCOME_HEADER}"
    lines = [f"| {header} |", _divider(header)]
    for key in sorted(set(groups[0]) & set(groups[1])):
        for name, rs in zip(names, (groups[0][key], groups[1][key])):
            lines.append(f"| {key[0]} | {key[1]} | {name} | {_outcome_cells(rs)} |")
    return "\n".join(lines) + "\n" if len(lines) > 2 else ""


def rate_line(rows: list[dict]) -> str:
    """Median training steps per second by stage over today's rows that logged them (2 cores, 64 px)."""
    rates: dict[str, list] = {}
    for r in todays_rows(rows):
        for name, v in (r.get("steps_per_s") or {}).items():
            rates.setdefault(name, []).append(v)
    if not rates:
        return ""
    parts = [f"{name} {np.median(v):.1f} ({min(v):.1f}-{max(v):.1f}, {len(v)} runs)"
             for name in STAGE_NAMES.values() if (v := rates.get(name))]
    return "Training steps per second by stage, median (min-max): " + "; ".join(parts) + ".\n"


def page(rows: list[dict]) -> str:
    """recipe.md: today's defaults first (success per rig × look), then every group of runs."""
    return (f"# Recipe bench (rebuilt {datetime.now(timezone.utc):%Y-%m-%d %H:%M} UTC from {RUNS_FILE}; "
            f"medians with min-max over runs)\n\n## Today's defaults\n\nRuns with defaults {DEFAULTS.split(':')[0]} "
            f"or an earlier label that ran the same algorithm on that kind of scene (bench/recipe.py "
            f"SAME_ALGORITHM). Success: position error @60 ≤ {SUCCESS_PX:g} px and period within "
            f"{SUCCESS_PERIOD:.0%} (one object), per-object error @20 ≤ {SUCCESS_OBJECT_PX:g} px (several). "
            f"Scored with frame steps: rows scored (or rescored) since the solver keeps its step across "
            f"the gap between the context and the first forecast frame (bench/recipe.py SCORING).\n\n"
            + "Every look of a rig pooled:\n\n" + success_table(rows, pool_looks=True) + "\nBy look:\n\n"
            + success_table(rows) + "\n" + rate_line(rows) + _side_by_side_section(rows)
            + "\n## Every group of runs\n\n" + table(rows))


def _side_by_side_section(rows: list[dict]) -> str:
    """The two comparisons the issues ask for, where runs of both sides exist."""
    old = side_by_side_table(rows, old_recipe_rows(rows), ("staged (today's defaults)", "end to end, dense encoder"))
    fp32 = side_by_side_table(rows, fp32_rows(rows), ("today's defaults (precision auto: bf16 here)",
                                                      "today's defaults in fp32"))
    text = ""
    if old:
        text += ("\n## Today's recipe beside the old one\n\nThe old recipe: the full ELBO end to end from the "
                 "first step with the dense position encoder (`--recipes end_to_end --set model.encoder=dense "
                 "--set model.velocity_from_positions=false`), same budget, scenes and scoring.\n\n" + old)
    if fp32:
        text += ("\n## bfloat16 beside float32\n\nToday's defaults with `train.precision=auto` (bfloat16 "
                 "conv nets on a CPU that has it, as here) and with `train.precision=fp32`, same budget: "
                 "the bf16 runs make more steps in the same 5 minutes.\n\n" + fp32)
    return text


def main(argv=None) -> int:
    p = argparse.ArgumentParser(prog="bench/recipe.py", description=__doc__.splitlines()[0])
    p.add_argument("--rigs", default="pendulum,spring,airtable,ball")
    p.add_argument("--looks", default="classic,dark_on_light,textured,gradient,rod,drift_noise")
    p.add_argument("--seeds", default="0,1,2")
    p.add_argument("--recipes", default="staged")
    p.add_argument("--budget", default="5m")
    p.add_argument("--set", dest="sets", action="append", default=[], metavar="KEY=VALUE")
    p.add_argument("--out", type=Path, default=RESULTS_DIR)
    p.add_argument("--work", type=Path, default=None, help="scratch folder (default: a temporary one)")
    p.add_argument("--rescore", action="store_true", help="score the runs already in --work; no training")
    a = p.parse_args(argv)
    work = a.work or Path(tempfile.mkdtemp(prefix="kinecast-recipe-"))
    a.out.mkdir(parents=True, exist_ok=True)
    runs_file = a.out / RUNS_FILE
    for rig in a.rigs.split(","):
        for look in a.looks.split(","):
            for recipe in a.recipes.split(","):
                for seed in map(int, a.seeds.split(",")):
                    row = one_run(rig, look, seed, recipe, a.budget, work, a.sets, a.rescore)
                    with open(runs_file, "a", encoding="utf-8") as f:
                        f.write(json.dumps(row) + "\n")
                    print(f"{rig:9s} {look:14s} {recipe:10s} s{seed} pos@60 {row['pos_model']:.2f} px "
                          f"per object @20 {row['obj20_model']:.2f} px "
                          f"MSE/bg {row['mse_model'] / row['mse_background_only']:.2f} "
                          f"MSE/pers {row['mse_model'] / row['mse_persistence']:.2f} "
                          f"period err {row['period_error']:.3f} {row['verdict']} "
                          f"{'SUCCESS' if row['success'] else 'fail'}", flush=True)
    rows = [json.loads(line) for line in runs_file.read_text().splitlines() if line.strip()]
    text = page(rows)
    write_text(a.out / TABLE_FILE, text)
    print(text)
    return 0


if __name__ == "__main__":
    sys.exit(main())
