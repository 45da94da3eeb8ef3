"""``kinecast score``: score a run's forecast of held-out frames, with baselines, or any two frame sources.

Writes to DIR: ``per_frame.csv`` (one row per method and frame), ``summary.json`` (the verdict, every
metric per method, valid and object horizons, calibration, periods), ``metrics.png`` (each metric against the horizon for
all methods), and for a run ``forecast.mp4`` + ``forecast_sheet.png`` (truth | model | error | spread).
"""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np

from ..errors import KinecastError
from ..fileio import check_can_create, write_text
from .evaluate import MEAN_KEYS
from .verdict import counted

CAUTION = ("Scores compare statistical extrapolations with held-out frames of this recording; they are "
           "not measurements. Not for safety-critical control; follow your lab's own safety rules.")


def configure(parser) -> None:
    from ..verbs import add_seed_option

    parser.add_argument("run", nargs="?", metavar="RUN", help="run folder written by `kinecast fit`")
    parser.add_argument("path", nargs="?", metavar="PATH", help="recording (or folder of trials) to score on")
    parser.add_argument("--holdout", metavar="last:N|trial:NAME", help="held-out frames (score.holdout)")
    parser.add_argument("--context", type=int, metavar="K", help="conditioning frames (score.context)")
    parser.add_argument("--samples", type=int, metavar="K", help="futures to draw for calibration")
    add_seed_option(parser)
    parser.add_argument("--compare", action="append", default=[], metavar="RUN2",
                        help="another run scored on the same frames (e.g. the first-order variant)")
    parser.add_argument("--pred", metavar="A", help="score these frames (any frame source) ...")
    parser.add_argument("--truth", metavar="B", help="... against these frames")
    parser.add_argument("--out", required=True, metavar="DIR", help="folder for the scores")
    parser.add_argument("--overwrite", action="store_true", help="replace an existing output folder")
    parser.add_argument("--device", choices=("auto", "cpu", "cuda"), help="compute device (train.device)")


def _finite(x):
    """JSON-friendly: NaN/inf → None."""
    if isinstance(x, dict):
        return {k: _finite(v) for k, v in x.items()}
    if isinstance(x, (float, np.floating)):
        return float(x) if math.isfinite(x) else None
    if isinstance(x, (np.integer,)):
        return int(x)
    return x


def write_scores(out: Path, result: dict, cfg, extra: dict, info: dict | None = None) -> None:
    """per_frame.csv, summary.json and metrics.png for a scoring result.

    per_frame.csv also carries each method's tracked object centroid and the truth's, in the
    recording's own pixels when ``info`` (the recording's) names its source size, else in model
    pixels; the column names say which.
    """
    from ..plots import metric_curves

    times = result["times"]
    unit, tracks = _tracks(result["per_frame"], info or {}, cfg.data.size)
    rows = ["method,frame,time_s," + ",".join(MEAN_KEYS) + ","
            + ",".join(f"{name}_{unit}" for name in ("object_x", "object_y", "true_x", "true_y"))]
    for method, per in result["per_frame"].items():
        for i, t in enumerate(times):
            rows.append(f"{method},{i},{t:.6f}," + ",".join(f"{per[m][i]:.6g}" for m in MEAN_KEYS)
                        + "," + ",".join(f"{v:.6g}" for v in tracks[method][i]))
    write_text(out / "per_frame.csv", "\n".join(rows) + "\n")
    summary = {"caution": CAUTION, **({"verdict": result["verdict"]} if "verdict" in result else {}),
               "frames_scored": int(len(times)), "methods": result["summary"],
               "ssim_threshold": cfg.score.ssim_threshold,
               "position_threshold_px": cfg.score.position_threshold_px, **extra}
    if "periods" in result:
        summary["periods"] = result["periods"]
    if "coverage" in result:
        summary["band"] = cfg.score.band
        for key, name in (("coverage", "band_coverage_per_frame"),
                          ("position_coverage", "position_coverage_per_frame")):
            summary[name] = [None if not np.isfinite(c) else round(float(c), 4) for c in result[key]]
    write_text(out / "summary.json", json.dumps(_finite(summary), indent=2) + "\n")
    shown = {method: {m: per[m] for m in MEAN_KEYS} for method, per in result["per_frame"].items()}
    if "coverage" in result:  # samples were drawn: how often the truth falls inside their band
        shown["model"]["band_coverage"] = np.asarray(result["coverage"], dtype=np.float64)
    metric_curves(shown, times, out / "metrics.png", threshold=cfg.score.ssim_threshold, overwrite=True,
                  origin=result.get("origin"), band=cfg.score.band if "coverage" in result else None)


def _tracks(per_frame: dict, info: dict, size: int) -> tuple[str, dict]:
    """``(unit, {method: (T, 4) object x, y and true x, y})`` in the recording's pixels ("rec_px")
    where ``info`` allows, else in model pixels ("model_px")."""
    from ..frames.preprocess import model_to_recording_px

    unit, out = "rec_px", {}
    for method, per in per_frame.items():
        xy = np.stack([np.stack([per[a], per[b]], axis=-1) for a, b in (("x_px", "y_px"), ("true_x_px", "true_y_px"))])
        mapped = model_to_recording_px(xy, info, size)
        if mapped is None:
            unit, mapped = "model_px", xy
        out[method] = np.concatenate([mapped[0], mapped[1]], axis=-1)
    return unit, out


def recording_px_per_model_px(rec) -> float | None:
    """Recording pixels per model pixel (the picture, or its ``data.roi`` crop, shrunk to fit the
    model frame with its aspect ratio kept); None when the recording does not say its source size."""
    from ..frames.preprocess import recording_geometry

    geo = recording_geometry(rec.info, rec.size[1])
    return float(geo.step[0]) if geo else None


def table(result: dict) -> str:
    """The summary as a markdown table (printed and shown in the report)."""
    head = ("| method | mean MSE | mean SSIM | mean PSNR (dB) | position error (model px) | valid horizon "
            "(object SSIM) | object horizon |")
    lines = [head, "|---|---|---|---|---|---|---|"]
    for method, s in result["summary"].items():
        lines.append(f"| {method} | {s['mean_mse']:.4g} | {s['mean_ssim']:.3f} | {s['mean_psnr']:.1f} | "
                     f"{s['mean_position_error_px']:.2f} | {counted(s['valid_horizon_frames'], 'frame')} "
                     f"({s['valid_horizon_s']:.2f} s) | {counted(s['object_horizon_frames'], 'frame')} "
                     f"({s['object_horizon_s']:.2f} s) |")
    return "\n".join(lines)


def _prepare_out(out: Path, overwrite: bool, inputs: list) -> None:
    from ..verbs import refuse_inside

    for src in inputs:
        if src:
            refuse_inside(out, src)
    if out.exists() and not out.is_dir():
        raise KinecastError(out, "exists and is not a folder (scores go into a folder)")
    if out.is_dir() and any(out.iterdir()) and not overwrite:
        raise KinecastError(out, "already exists (pass --overwrite to replace it)")
    # checked now, created by the first write: bad input later leaves no empty folder behind
    check_can_create(out)


def run(args, cfg) -> int:
    out = Path(args.out)
    if args.pred or args.truth:
        return _run_pair(args, cfg, out)
    if not (args.run and args.path):
        raise KinecastError("kinecast score", "give RUN PATH, or --pred A --truth B")
    return _run_model(args, cfg, out)


def _run_pair(args, cfg, out: Path) -> int:
    from ..frames import read_recording
    from .evaluate import score_prediction

    if not (args.pred and args.truth):
        raise KinecastError("kinecast score", "--pred and --truth go together")
    _prepare_out(out, args.overwrite, [args.pred, args.truth])
    pred, truth = read_recording(args.pred, cfg.data), read_recording(args.truth, cfg.data)
    if pred.n_frames != truth.n_frames or pred.frames.shape != truth.frames.shape:
        raise KinecastError(args.pred, f"{pred.frames.shape} frames do not match the truth's {truth.frames.shape}")
    present = ~truth.missing & ~pred.missing
    origin = truth.times[0] - truth.median_interval
    per, summ = score_prediction(pred.frames, truth.frames, present, truth.times, origin, cfg)
    result = {"times": truth.times, "origin": origin, "per_frame": {"prediction": per},
              "summary": {"prediction": summ}}
    write_scores(out, result, cfg, {"pred": str(args.pred), "truth": str(args.truth)}, truth.info)
    print(table(result))
    print(f"scores written to {out}\nnote: {CAUTION}")
    return 0


def _run_model(args, cfg, out: Path) -> int:
    from .. import config as cfgmod
    from ..verbs import at_least_one, open_run, with_seed
    from ..render import comparison_columns, contact_sheet, panel_frames, write_frames
    from ..runfolder import load_run
    from .evaluate import coverage_text, evaluate, holdout_split
    from .report import RUN_DIGEST, weights_sha256
    from .verdict import verdict

    cfg = with_seed(args, cfgmod.with_values(cfg, {"score.holdout": args.holdout or None,
                                                   "score.context": args.context}))
    holdout = cfg.score.holdout
    samples = at_least_one("--samples", args.samples, cfg.forecast.samples)
    _prepare_out(out, args.overwrite, [args.path, args.run])
    path = Path(args.path) / holdout.split(":", 1)[1] if holdout.startswith("trial:") else Path(args.path)
    model, run_cfg, rec, device = open_run(args, cfg, path)
    digest = weights_sha256(args.run)  # names the weights scored; `kinecast report` checks it
    if holdout.startswith("trial:"):
        cond_start, first = 0, run_cfg.score.context
        if rec.n_frames <= first:
            raise KinecastError(rec.source, f"has {rec.n_frames} frames; nothing left after {first} conditioning frames")
    else:
        first, cond_start = holdout_split(rec, holdout, run_cfg.score.context)
    n = rec.n_frames - first
    others = {}
    for other in args.compare:
        m2, c2 = load_run(other, device)
        others[Path(other).name or other] = (m2, c2)
    result = evaluate(model, run_cfg, rec, cond_start, first, n, samples, others, device)
    result["verdict"] = verdict({"all": result["summary"]})
    scale = recording_px_per_model_px(rec)
    write_scores(out, result, run_cfg, {"run": str(Path(args.run).resolve()), RUN_DIGEST: digest,
                                        **({"recording_px_per_model_px": scale} if scale else {}),
                                        "recording": str(path), "holdout": holdout,
                                        "context_frames": first - cond_start, "samples": samples,
                                        **({"seed": run_cfg.forecast.seed} if samples > 1 else {})},
                 rec.info)
    spread = result["samples"].std(axis=0) if samples > 1 else None
    truth = np.where(result["present"][:, None, None, None], result["truth"], 0.0)
    panels = panel_frames(comparison_columns(result["forecast"], truth, spread), result["times"],
                          upscale=run_cfg.forecast.upscale)
    write_frames(panels, out / "forecast.mp4", 1.0 / rec.median_interval, overwrite=True)
    contact_sheet(panels, result["times"], run_cfg.forecast.contact_every, out / "forecast_sheet.png",
                  overwrite=True, label=False)
    print(f"verdict ({result['verdict']['level']}): {result['verdict']['text']}\n")
    print(table(result))
    err = result["summary"]["model"]["mean_position_error_px"]
    if scale and math.isfinite(err):
        print(f"position errors are in model pixels ({run_cfg.data.size} px frames); one model pixel is "
              f"{counted(scale, 'pixel', '.3g')} of the recording, so the model's {err:.2f} px "
              f"is {err * scale:.3g} recording pixels")
    if samples > 1:
        print(coverage_text(result["summary"]["model"], run_cfg.score.band, samples))
    p = result["periods"]
    print(f"dominant period: truth {p['truth_track_s']:.3f} s, model track {p['model_track_s']:.3f} s, "
          f"model latent {p['model_latent_s']:.3f} s")
    print(f"scores written to {out}\nnote: {CAUTION}")
    return 0
