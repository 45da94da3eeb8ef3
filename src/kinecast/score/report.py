"""``kinecast report``: one self-contained HTML page for a run.

Everything is inline (images and clips as base64 data URIs), so the page can be mailed or archived
alone: the cautions, the training summary and curve, the background, the config, and for each scores
folder given the metrics table, the metric plots, the contact sheet and the forecast clip.
"""

from __future__ import annotations

import base64
import html
import json
from pathlib import Path

from ..errors import KinecastError
from ..fileio import check_can_create, write_text
from ..train import checkpoint as ck

CAUTIONS = [
    "Forecasts, filled frames and every score on this page are statistical extrapolations from the "
    "frames the model was shown. They are not measurements.",
    "Do not use kinecast for safety-critical control. Follow your lab's own safety rules.",
    "A score describes how well a forecast matched this recording; it is no guarantee for the next one.",
]
STYLE = """body{font-family:system-ui,sans-serif;max-width:1100px;margin:2em auto;padding:0 1em;color:#222}
h1{font-size:1.5em}h2{font-size:1.2em;border-bottom:1px solid #ccc;padding-bottom:.2em;margin-top:2em}
.caution{background:#fff4e0;border-left:4px solid #d9822b;padding:.6em 1em}
table{border-collapse:collapse}td,th{border:1px solid #ccc;padding:.25em .6em;text-align:right}
th:first-child,td:first-child{text-align:left}img,video{max-width:100%}pre{background:#f6f6f6;padding:1em;overflow:auto}"""


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


def _fmt(v) -> str:
    if v is None:
        return "–"
    if isinstance(v, float):
        return f"{v:.4g}"
    return html.escape(str(v))


def _scores_section(folder: Path) -> str:
    summary_path = folder / "summary.json"
    if not summary_path.is_file():
        raise KinecastError(folder, "not a scores folder (no summary.json)")
    try:
        summary = json.loads(summary_path.read_text())
        methods = summary["methods"]
    except (ValueError, KeyError) as exc:
        raise KinecastError(summary_path, f"not a kinecast scores summary ({exc})") from None
    cols = ["mean_mse", "mean_mae", "mean_psnr", "mean_ssim", "mean_object_ssim", "mean_position_error_px",
            "valid_horizon_frames", "valid_horizon_s", "object_horizon_frames", "object_horizon_s",
            "mean_band_coverage"]
    head = "".join(f"<th>{c.replace('mean_', '').replace('_', ' ')}</th>" for c in cols)
    rows = "".join(f"<tr><td>{html.escape(m)}</td>" + "".join(f"<td>{_fmt(s.get(c))}</td>" for c in cols)
                   + "</tr>" for m, s in methods.items())
    facts = {k: summary.get(k) for k in ("recording", "holdout", "context_frames", "samples",
                                         "frames_scored", "ssim_threshold", "position_threshold_px",
                                         "band") if k in summary}
    periods = summary.get("periods", {})
    verdict = summary.get("verdict") or {}
    parts = [f"<h2>Scores: {html.escape(str(folder))}</h2>",
             f"<p class='caution'><strong>Verdict ({html.escape(str(verdict['level']))}):</strong> "
             f"{html.escape(str(verdict['text']))}</p>" if "text" in verdict and "level" in verdict else "",
             "<p>" + "; ".join(f"{k.replace('_', ' ')}: {_fmt(v)}" for k, v in facts.items()) + "</p>",
             f"<table><tr><th>method</th>{head}</tr>{rows}</table>"]
    if periods:
        parts.append("<p>Dominant oscillation period (s): " + "; ".join(
            f"{k.replace('_s', '').replace('_', ' ')} {_fmt(v)}" for k, v in periods.items()) + "</p>")
    parts += [_media(folder / "metrics.png", "each metric against the forecast horizon, every method"),
              _media(folder / "forecast_sheet.png", "truth | prediction | absolute error | spread"),
              _media(folder / "forecast.mp4", "forecast clip")]
    return "\n".join(parts)


def build_report(run: str | Path, scores: list = (), clips: list = ()) -> str:
    """The report page as an HTML string."""
    run = Path(run)
    ck.check_run_folder(run)
    summary = json.loads((run / ck.SUMMARY).read_text()) if (run / ck.SUMMARY).is_file() else {}
    config_text = (run / ck.CONFIG).read_text()
    train_rows = "".join(f"<tr><td>{html.escape(k.replace('_', ' '))}</td><td>{_fmt(v)}</td></tr>"
                         for k, v in summary.items() if k not in ("recordings", "caution"))
    parts = [
        "<!doctype html><html><head><meta charset='utf-8'>",
        f"<title>kinecast report: {html.escape(run.name)}</title><style>{STYLE}</style></head><body>",
        f"<h1>kinecast report: {html.escape(str(run))}</h1>",
        "<div class='caution'><strong>Cautions</strong><ul>"
        + "".join(f"<li>{html.escape(c)}</li>" for c in CAUTIONS) + "</ul></div>",
        "<h2>Training</h2>", f"<table>{train_rows}</table>",
        _media(run / ck.LOSS_PLOT, "training terms and validation forecast error against step"),
        _media(run / ck.BACKGROUND, "static background the decoder adds to (per-pixel median)"),
    ]
    parts += [_scores_section(Path(s)) for s in scores]
    for clip in map(Path, clips):
        if not clip.is_file():
            raise KinecastError(clip, "no such file to embed")
        parts.append(_media(clip, clip.name))
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
