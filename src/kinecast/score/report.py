"""``kinecast report``: one self-contained HTML page for a run.

Everything is inline (images and clips as base64 data URIs), so the page can be mailed or archived
alone: the cautions, the training summary and curve, the background, the config, and for each scores
folder given the metrics table, the metric plots, the contact sheet and the forecast clip.

Everything a reader sees is in words with its unit (PSNR in dB, position errors in px, times in s);
keys that only matter to whoever runs the machines (world size, replica spread, threads, ...) are listed
under "Technical details".
"""

from __future__ import annotations

import base64
import hashlib
import html
import json
from pathlib import Path

from .. import config as cfgmod
from ..errors import KinecastError
from ..fileio import check_can_create, write_text
from ..plots import method_label
from .. import runfolder as rf

CAUTIONS = [
    "Forecasts, filled frames and every score on this page are statistical extrapolations from the "
    "frames the model was shown. They are not measurements.",
    "Do not use kinecast for safety-critical control. Follow your lab's own safety rules.",
    "A score describes how well a forecast matched this recording; it is no guarantee for the next one.",
]
STYLE = """body{font-family:system-ui,sans-serif;max-width:1100px;margin:2em auto;padding:0 1em;color:#222}
h1{font-size:1.5em}h2{font-size:1.2em;border-bottom:1px solid #ccc;padding-bottom:.2em;margin-top:2em}
.caution{background:#fff4e0;border-left:4px solid #d9822b;padding:.6em 1em}
table{border-collapse:collapse}.wide{max-width:100%;overflow-x:auto}td,th{border:1px solid #ccc;padding:.25em .6em;text-align:right}
th:first-child,td:first-child{text-align:left}img,video{max-width:100%}pre{background:#f6f6f6;padding:1em;overflow:auto}
.facts td{text-align:left}"""
MSE_SCALE = "intensities 0 to 1"  # frames are scaled to [0, 1] before scoring
# training summary (summary.json of a run): key -> (words, unit); keys not listed here go under
# "Technical details" with their raw names
TRAINING_FACTS = {
    "recipe": ("training recipe", ""),
    "steps": ("training steps", "steps"),
    "elapsed_s": ("training time", "s"),
    "stop_reason": ("why training stopped", ""),
    "train_recordings": ("recordings trained on", "recordings"),
    "val_recordings": ("recordings held out for validation", "recordings"),
    "best_val_mse": (f"best validation frame error (mean squared error, {MSE_SCALE})", ""),
    "background_val_mse": (f"the same error for the bare background ({MSE_SCALE})", ""),
    "tracked_period_s": ("oscillation period the model tracks", "s"),
    "longest_window": ("longest training window", "frames"),
    "final_window": ("training window at the end", "frames"),
    "val_window": ("validation window", "frames"),
    "dynamics_window": ("longest window of the dynamics stage", "frames"),
    "positions_found": ("object positions found in the positions stage", ""),
    "positions_restarts": ("restarts of the positions stage", "restarts"),
    "positions_relapses": ("times the positions stage lost the object again", "times"),
    "faults": ("numerical faults recovered from", "faults"),
    "untrained": ("note", ""),
}
TRAINING_HIDDEN = ("recordings", "caution")  # shown elsewhere on the page
# units of the technical keys that have one (the rest are counts, names or flags)
TECHNICAL_UNITS = {"time_scale": "model time units per s"}
# scores table: (summary key, column heading, unit written after each number)
SCORE_COLUMNS = (
    ("mean_mse", f"mean squared error ({MSE_SCALE})", ""),
    ("mean_mae", f"mean absolute error ({MSE_SCALE})", ""),
    ("mean_psnr", "peak signal-to-noise ratio", "dB"),
    ("mean_ssim", "structural similarity, SSIM (1 = identical)", ""),
    ("mean_object_ssim", "SSIM around the objects (1 = identical)", ""),
    ("mean_position_error_px", "object position error", "model px"),
)
# facts about what was scored: summary key -> words (the unit, if any, is added by _score_fact)
SCORE_FACTS = {
    "recording": "recording", "run": "run", "pred": "frames scored", "truth": "compared with",
    "holdout": "held-out frames", "context_frames": "frames the forecast was given",
    "samples": "sampled futures", "seed": "seed of the sampled futures", "frames_scored": "frames scored",
    "ssim_threshold": "the valid horizon ends where the objects' SSIM falls below",
    "position_threshold_px": "the object horizon ends where the position error exceeds",
    "band": "calibration band (central share of the sampled futures)",
    "recording_px_per_model_px": "pixels of the recording per model pixel",
}
SCORES_HIDDEN = ("caution", "verdict", "methods", "periods", "band_coverage_per_frame",
                 "position_coverage_per_frame")
PERIOD_NAMES = {"truth_track_s": "the recording's objects", "model_track_s": "the model's forecast objects",
                "model_latent_s": "the model's latent state"}


# summary.json key of a scores folder: SHA-256 (FIPS 180-4) of the scored run's weights file
RUN_DIGEST = "run_weights_sha256"
DIGEST_CHUNK = 1 << 20  # bytes read at a time while hashing


def weights_sha256(run: str | Path) -> str:
    """Hex SHA-256 of ``RUN/weights.safetensors``: names the weights a scores folder was made with."""
    digest = hashlib.sha256()
    with open(Path(run) / rf.WEIGHTS, "rb") as fh:
        for chunk in iter(lambda: fh.read(DIGEST_CHUNK), b""):
            digest.update(chunk)
    return digest.hexdigest()


def check_scores_run(folder: Path, summary: dict, run: Path, digest: str) -> None:
    """Refuse a scores folder made from another run's weights (its digest is not ``digest``).

    Scores of two frame sources (``--pred``/``--truth``) name no run and belong to any report.
    """
    if "run" not in summary and RUN_DIGEST not in summary:
        return
    theirs = summary.get(RUN_DIGEST)
    if not isinstance(theirs, str):
        raise KinecastError(folder, f"the scores of run {summary.get('run')} name no weights digest, so "
                                    f"they cannot be matched to {run}; score {run} again")
    if theirs != digest:
        raise KinecastError(folder, f"scores of run {summary.get('run')} (weights SHA-256 {theirs[:12]}…), "
                                    f"not of {run} (weights SHA-256 {digest[:12]}…); give scores made "
                                    f"from {run}")


def configure(parser) -> None:
    parser.add_argument("run", metavar="RUN", help="run folder written by `kinecast fit`")
    parser.add_argument("--scores", action="append", default=[], metavar="DIR",
                        help="a folder written by `kinecast score` (repeatable)")
    parser.add_argument("--clip", action="append", default=[], metavar="FILE",
                        help="an extra clip or image to embed, e.g. a forecast mp4 (repeatable)")
    parser.add_argument("--out", metavar="FILE", help="the HTML file; default RUN/report.html")
    parser.add_argument("--overwrite", action="store_true", help="replace an existing report")


def _data_uri(path: Path) -> str:
    kind = {".png": "image/png", ".gif": "image/gif", ".mp4": "video/mp4", ".svg": "image/svg+xml"}
    mime = kind.get(path.suffix.lower())
    if mime is None:
        raise KinecastError(path, "cannot embed this kind of file: allowed .png, .gif, .mp4, .svg")
    return f"data:{mime};base64,{base64.b64encode(path.read_bytes()).decode('ascii')}"


def _media(path: Path, caption: str) -> str:
    if not path.is_file():
        return ""
    uri = _data_uri(path)
    tag = (f'<video controls loop muted src="{uri}"></video>' if path.suffix.lower() == ".mp4"
           else f'<img alt="{html.escape(caption)}" src="{uri}">')
    return f"<figure>{tag}<figcaption>{html.escape(caption)}</figcaption></figure>"


def _fmt(v, unit: str = "") -> str:
    """A value for the page: numbers to 4 significant digits with their unit, None/NaN as a dash."""
    if v is None or (isinstance(v, float) and v != v):
        return "–"
    if isinstance(v, bool):
        return "yes" if v else "no"
    if isinstance(v, (dict, list)):
        return f"<code>{html.escape(json.dumps(v))}</code>"
    text = f"{v:.4g}" if isinstance(v, float) else html.escape(str(v))
    if not (unit and isinstance(v, (int, float))):
        return text
    if v == 1 and " " not in unit and unit.endswith("s") and len(unit) > 2:  # "1 frame", not "1 frames"
        unit = unit[:-1]
    return f"{text} {html.escape(unit)}"


def _facts_table(rows: list[tuple[str, str]]) -> str:
    body = "".join(f"<tr><td>{html.escape(name)}</td><td>{value}</td></tr>" for name, value in rows)
    return _wide(f"<table class='facts'>{body}</table>")


def _wide(table: str) -> str:
    """A table in a box that scrolls sideways on a narrow screen (the page itself never does; the
    table keeps its table semantics for screen readers, which ``display: block`` on it can drop)."""
    return f"<div class='wide'>{table}</div>"


def _technical(title: str, items: dict) -> str:
    """Raw keys and values for whoever runs the machines (lists longer than a few are counted)."""
    rows = []
    for k, v in items.items():
        if isinstance(v, list) and len(v) > 4:
            shown = f"{len(v)} values (see the JSON file)"
        else:
            shown = _fmt(v, TECHNICAL_UNITS.get(k, ""))
        rows.append((k, shown))
    return f"<h3>{html.escape(title)}</h3>" + _facts_table(rows) if rows else ""


def _score_fact(key: str, value) -> str:
    if key == "holdout" and isinstance(value, str) and value.startswith("last:"):
        return f"the last {html.escape(value[5:])} frames"
    if key == "holdout" and isinstance(value, str) and value.startswith("trial:"):
        return f"trial {html.escape(value[6:])}"
    if key == "band" and isinstance(value, (int, float)):
        return f"{100 * value:.0f} %"
    unit = {"context_frames": "frames", "frames_scored": "frames", "position_threshold_px": "model px"}.get(key, "")
    return _fmt(value, unit)


def _coverage_cell(v, flagged: bool = True) -> str:
    """A mean coverage as a percentage, flagged outside ``evaluate.COVERAGE_FLAG`` when ``flagged``
    (not the all-pixel band: with the fitted pixel noise the static background puts it near 1, and
    README says to read the other two); – when not measured."""
    from .evaluate import COVERAGE_FLAG

    if not isinstance(v, (int, float)) or v != v:
        return "–"
    lo, hi = COVERAGE_FLAG
    flag = "" if not flagged else " (too narrow)" if v < lo else " (too wide)" if v > hi else ""
    return f"{100 * v:.1f} %{flag}"


def _horizon(s: dict, kind: str) -> str:
    frames, seconds = s.get(f"{kind}_horizon_frames"), s.get(f"{kind}_horizon_s")
    if frames is None:
        return "–"
    return f"{_fmt(frames, 'frames')} ({_fmt(seconds, 's')})" if seconds is not None else _fmt(frames, "frames")


def _scores_title(summary: dict) -> str:
    if summary.get("recording"):
        return f"Forecast scores on {Path(str(summary['recording'])).name}"
    if summary.get("pred") and summary.get("truth"):
        return f"Scores of {Path(str(summary['pred'])).name} against {Path(str(summary['truth'])).name}"
    return "Forecast scores"


def _scores_section(folder: Path, run: Path, digest: str) -> tuple[str, str]:
    """The section for one scores folder of ``run`` (weights ``digest``), and its technical details
    (raw keys)."""
    summary_path = folder / "summary.json"
    if not summary_path.is_file():
        raise KinecastError(folder, "not a scores folder (no summary.json)")
    try:
        summary = json.loads(summary_path.read_text())
        methods = summary["methods"]
    except (ValueError, KeyError) as exc:
        raise KinecastError(summary_path, f"not a kinecast scores summary ({exc})") from None
    check_scores_run(folder, summary, run, digest)
    band = summary.get("band")
    head = ["method"] + [h for _, h, _ in SCORE_COLUMNS] + [
        "valid horizon (objects' SSIM above the threshold)", "object horizon (position error within the threshold)",
        f"pixels inside the {100 * band:.0f} % band of the sampled futures" if isinstance(band, (int, float))
        else "pixels inside the band of the sampled futures",
        "of these, pixels where an object is drawn or recorded",
        "frames with the true object position inside the sampled futures' central region"]
    rows = ""
    for m, s in methods.items():
        cells = [html.escape(method_label(m))] + [_fmt(s.get(k), unit) for k, _, unit in SCORE_COLUMNS]
        cells += [_horizon(s, "valid"), _horizon(s, "object")] + [
            _coverage_cell(s.get(k), k != "mean_band_coverage")
            for k in ("mean_band_coverage", "mean_object_band_coverage", "mean_position_coverage")]
        rows += "<tr>" + "".join(f"<td>{c}</td>" for c in cells) + "</tr>"
    facts = [(words, _score_fact(k, summary[k])) for k, words in SCORE_FACTS.items() if k in summary]
    periods = summary.get("periods", {})
    verdict = summary.get("verdict") or {}
    parts = [f"<h2>{html.escape(_scores_title(summary))}</h2>",
             f"<p>From the scores folder {html.escape(str(folder))}.</p>",
             f"<p class='caution'><strong>Verdict ({html.escape(str(verdict['level']))}):</strong> "
             f"{html.escape(str(verdict['text']))}</p>" if "text" in verdict and "level" in verdict else "",
             _facts_table(facts),
             _wide("<table><tr>" + "".join(f"<th>{html.escape(h)}</th>" for h in head) + f"</tr>{rows}</table>")]
    if periods:
        parts.append("<p>Dominant oscillation period: " + "; ".join(
            f"{html.escape(PERIOD_NAMES.get(k, k.removesuffix('_s').replace('_', ' ')))} {_fmt(v, 's')}"
            for k, v in periods.items()) + "</p>")
    parts += [_media(folder / "metrics.png", "each metric against the forecast horizon, every method"),
              _media(folder / "forecast_sheet.png", "truth | prediction | absolute error | spread"),
              _media(folder / "forecast.mp4", "forecast clip")]
    rest = {k: v for k, v in summary.items() if k not in SCORE_FACTS and k not in SCORES_HIDDEN}
    return "\n".join(p for p in parts if p), _technical(f"scores folder {folder}", rest)


def _training_section(summary: dict, band: float) -> tuple[str, str]:
    """The training facts in words with units, and the remaining keys as technical details;
    ``band`` is the run's ``score.band`` (for the spread of the sampled futures)."""
    from ..train.progress import spread_line

    rows = [(words, _fmt(summary[k], unit)) for k, (words, unit) in TRAINING_FACTS.items() if k in summary]
    if summary.get("spread_scale"):  # the line fit printed, with its caution on few held-out trials
        rows.append(("spread of the sampled futures", html.escape(spread_line(summary, band))))
    verdict = summary.get("verdict")
    if isinstance(verdict, dict) and "level" in verdict:
        rows.insert(0, ("verdict on the held-out recordings", html.escape(str(verdict["level"]))
                        + (f": {html.escape(str(verdict['text']))}" if "text" in verdict else "")))
    rest = {k: v for k, v in summary.items() if k not in TRAINING_FACTS and k not in TRAINING_HIDDEN}
    if isinstance(verdict, dict):  # its text is shown above; the numbers behind it stay here
        rest["verdict"] = {k: v for k, v in verdict.items() if k != "text"}
    return _facts_table(rows) if rows else "", _technical("training", rest)


def build_report(run: str | Path, scores: list = (), clips: list = ()) -> str:
    """The report page as an HTML string."""
    run = Path(run)
    rf.check_run_folder(run)
    summary = json.loads((run / rf.SUMMARY).read_text()) if (run / rf.SUMMARY).is_file() else {}
    config_text = (run / rf.CONFIG).read_text()
    band = cfgmod.load(run / rf.CONFIG, cfgmod.saved_run_base()).score.band
    training, technical = _training_section(summary, band)
    parts = [
        "<!doctype html><html><head><meta charset='utf-8'>"
        "<meta name='viewport' content='width=device-width, initial-scale=1'>",
        f"<title>kinecast report: {html.escape(run.name)}</title><style>{STYLE}</style></head><body>",
        f"<h1>kinecast report: {html.escape(str(run))}</h1>",
        "<div class='caution'><strong>Cautions</strong><ul>"
        + "".join(f"<li>{html.escape(c)}</li>" for c in CAUTIONS) + "</ul></div>",
        "<h2>Training</h2>", training,
        _media(run / rf.LOSS_PLOT, "training terms and validation forecast error against step"),
        _media(run / rf.BACKGROUND, "static background the decoder adds to (per-pixel median)"),
    ]
    technical = [technical]
    digest = weights_sha256(run) if scores else ""
    for folder in scores:
        section, details = _scores_section(Path(folder), run, digest)
        parts.append(section)
        technical.append(details)
    for clip in map(Path, clips):
        if not clip.is_file():
            raise KinecastError(clip, "no such file to embed")
        parts.append(_media(clip, clip.name))
    if any(technical):
        parts += ["<h2>Technical details</h2>",
                  "<p>Raw values for whoever runs the machines; the sections above say what they mean "
                  "for the recording.</p>"] + [t for t in technical if t]
    parts += ["<h2>Configuration (config.toml)</h2>", f"<pre>{html.escape(config_text)}</pre>",
              "<h2>Recordings</h2><ul>" + "".join(f"<li>{html.escape(r)}</li>"
                                                  for r in summary.get("recordings", [])) + "</ul>",
              "</body></html>"]
    return "\n".join(p for p in parts if p)


def run(args, cfg) -> int:
    out = Path(args.out) if args.out else Path(args.run) / "report.html"
    if out.exists() and not args.overwrite:
        raise KinecastError(out, "already exists (pass --overwrite to replace it)")
    check_can_create(out)
    page = build_report(args.run, args.scores, args.clip)
    write_text(out, page)
    print(f"report written to {out} ({len(page) / 1e6:.1f} MB, self-contained)")
    return 0
