"""``inspect_recording``: what a recording holds and what may be wrong with it, before any fitting."""

from __future__ import annotations

from pathlib import Path

import numpy as np

from ..config import Config, DataConfig
from .read import read_recording
from .recording import Recording

# An interval further than this share from the median interval counts as irregular (our choice:
# camera clocks usually jitter by a few percent at most).
IRREGULAR_TOLERANCE = 0.10
# Frames whose largest per-pixel standard deviation over time is below this (about two 8-bit grey
# levels, our choice) barely change: nothing seems to move.
NEAR_CONSTANT_STD = 2.0 / 255.0
# Gaps listed one by one on the terminal; the rest are counted (our choice, to keep one line short).
DROPS_SHOWN = 8
# Largest value a 12-bit camera writes; 16-bit files that never exceed it hold fewer bits.
TWELVE_BIT_MAX = 4095


def _real_intervals(rec: Recording) -> np.ndarray:
    """Intervals between consecutive real frames that do not span a dropped frame."""
    real = np.flatnonzero(~rec.missing)
    adjacent = np.diff(real) == 1
    return np.diff(rec.times[real])[adjacent]


def timing_problems(rec: Recording, tolerance: float = IRREGULAR_TOLERANCE) -> list[str]:
    """Notes on the timing: intervals between real frames that stray from the median."""
    notes = []
    steps = _real_intervals(rec)
    if len(steps):
        median = float(np.median(steps))
        off = int(np.sum(np.abs(steps - median) > tolerance * median))
        if off:
            notes.append(f"irregular timing: {off} of {len(steps)} intervals differ from the median "
                         f"({median:.4g} s) by more than {tolerance:.0%}")
    return notes


def content_problems(rec: Recording, info: dict) -> list[str]:
    """Notes on the pixels: frames that barely change, 16-bit files holding 12-bit data."""
    notes = []
    real = rec.frames[~rec.missing]
    if len(real) > 1:
        spread = float(real.std(axis=0).max())
        if spread < NEAR_CONSTANT_STD:
            notes.append(f"frames nearly constant: the largest per-pixel standard deviation over time "
                         f"is {spread:.2g} (of 1); nothing seems to move")
    if info.get("bit_depth") == 16 and 0 < (info.get("raw_max") or 0) <= TWELVE_BIT_MAX:
        notes.append(f"16-bit files but no value above {int(info['raw_max'])}: the camera may write "
                     "12 bits or fewer, so frames look dark after dividing by 65535")
    return notes


def inspect_recording(path: str | Path, cfg: DataConfig | Config | None = None,
                      times_csv: str | Path | None = None) -> dict:
    """Summarise a recording: frames, sizes, timing, dropped frames and problems found.

    Parameters
    ----------
    path : str or Path
        Anything :func:`read_recording` accepts.
    cfg : DataConfig (or a whole Config), optional
    times_csv : str or Path, optional

    Returns
    -------
    dict
        JSON-friendly facts; ``problems`` is a list of one-line notes (empty when none).
    """
    rec = read_recording(path, cfg, times_csv)
    info = rec.info
    interval = rec.median_interval
    return {
        "source": rec.source,
        "kind": info.get("kind"),
        "slots": rec.n_frames,
        "frames_read": int(info.get("n_read", rec.n_frames)),
        "dropped": int(rec.missing.sum()),
        "drops": list(info.get("drops", [])),
        "source_size": list(info.get("source_size", [])),
        "source_channels": info.get("source_channels"),
        "bit_depth": info.get("bit_depth"),
        "dtype": info.get("dtype"),
        "model_size": list(rec.size),
        "model_channels": rec.channels,
        "duration_s": rec.duration,
        "median_interval_s": interval,
        "median_fps": 1.0 / interval if interval > 0 else 0.0,
        "time_source": info.get("time_source"),
        "times_file": info.get("times_file"),
        "decoder": info.get("decoder"),
        "cache": info.get("cache"),
        "problems": list(info.get("problems", [])) + timing_problems(rec) + content_problems(rec, info),
    }


_TIME_SOURCES = {"csv": "from {file}", "fps": "from data.fps", "video": "from the video's frame rate",
                 "default": "assumed: nothing states a frame rate"}


def format_inspection(report: dict) -> str:
    """The report of :func:`inspect_recording` as short labelled lines for a terminal."""
    w, h = (report["source_size"] + [0, 0])[:2]
    depth = f"{report['bit_depth']}-bit {report['dtype']}" if report.get("dtype") else "?"
    colour = {1: "grey", 3: "colour"}.get(report.get("source_channels"), "?")
    timing = _TIME_SOURCES.get(report["time_source"], "").format(file=report.get("times_file"))
    lines = [
        f"source      {report['source']}",
        f"frames      {report['frames_read']} read, {report['dropped']} dropped, "
        f"{report['slots']} slots in all",
        f"pixels      {w}x{h} {colour} ({report['source_channels']} channel(s)), {depth}; "
        f"model {report['model_size'][1]}x{report['model_size'][0]}, {report['model_channels']} channel(s)",
        f"timing      {report['duration_s']:.4g} s long, median {report['median_fps']:.4g} frames/s "
        f"({timing})",
    ]
    if report["drops"]:
        shown = report["drops"][:DROPS_SHOWN]
        where = ", ".join(f"{d['count']} after {d['after']} (t={d['time']:.4g} s)" for d in shown)
        more = len(report["drops"]) - len(shown)
        lines.append(f"dropped     {where}" + (f", and {more} more gap(s)" if more else ""))
    else:
        lines.append("dropped     none found")
    if report["problems"]:
        lines += [f"problem     {p}" for p in report["problems"]]
    else:
        lines.append("problems    none found")
    return "\n".join(lines)
