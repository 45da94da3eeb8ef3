"""``inspect_recording``: what a recording holds and what may be wrong with it, before any fitting."""

from __future__ import annotations

from pathlib import Path

import cv2
import numpy as np

from ..config import Config, DataConfig
from .preprocess import describe_geometry, recording_geometry
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


# --- The fixed-camera check ------------------------------------------------------------------
# kinecast draws moving objects over one static background, the per-pixel median of the frames
# (it holds wherever an object covers a pixel in under half of the frames). A pixel of a frame is
# "explained" by that background when |frame - background| < max(EXPLAINED_FLOOR, NOISE_SIGMAS · σ),
# with σ the sensor noise; the share of explained pixels is taken over all real frames (grey, at
# model resolution, at most CHECK_SIZE px). Measured on 64 px, 60-frame clips (2026-12-02, our
# experiment): every synthetic rig (4 rigs × 6 looks, and a noisy, flickering, vignetted camera)
# 0.94-0.99 of the whole frame and 0.97-1.00 at the edges; a disc over a textured background
# covering 19 % of the frame 0.79 of the frame but 0.93 at the edges; textured scenes (a
# photograph, a brick wall, grass) panned (0.1-0.4 px a frame), shaken (±1 px) or zoomed (×1.4)
# 0.33-0.74 of the frame and 0.30-0.77 at the edges.
#
# The warning is decided at the frame's edges: a pan, a shake or a zoom moves the whole picture,
# edges included, while a lab recording frames its moving objects inside the picture, so a large
# object lowers the whole-frame share (0.79 above) much more than the edge share (0.93).
# Not detected: a camera moving over a flat, featureless background (nothing in the picture moves
# with it), and one shaking over texture as fine as the noise (σ below then absorbs it).
EDGE_SHARE_MIN = 0.85             # our choice: midway between 0.93 (fixed) and 0.77 (moving) above
EDGE_BAND = 1 / 8                 # the edge band: this share of the side on each side (44 % of a frame)
# 3 σ: Gaussian noise stays below it 99.7 % of the time (common practice).
NOISE_SIGMAS = 3.0
# Smallest difference counted as unexplained (≈ 8 of 255 grey levels, our choice): above 8-bit
# rounding, compression error and a light drift of a few percent, below visible texture contrast.
EXPLAINED_FLOOR = 0.03
# Gaussian σ from a median absolute deviation: σ ≈ MAD / Φ⁻¹(3/4) = 1.4826 · MAD (common practice;
# Donoho & Johnstone 1994, Biometrika 81:425, use it on the finest wavelet details; from memory).
MAD_TO_SIGMA = 1.4826
# Frames used for the check, spread evenly over a longer recording, and their largest side in
# pixels (larger model frames are area-averaged to it): the size the values above were measured at,
# and a bound on time and memory (our choice).
CAMERA_CHECK_FRAMES = 400
CHECK_SIZE = 64
# Global drift: phase correlation (Kuglin & Hines 1975, from memory; cv2.phaseCorrelate with a
# Hann window, cv2.createHanningWindow) between frames DRIFT_STEPS equal steps apart, summed.
# Consecutive frames give sub-pixel steps whose errors add up; 8 steps kept the measured pans
# within 5 % of their construction (our experiment). It describes a warned recording only: on a
# plain background the correlation follows the moving object instead, so it is not used to decide.
DRIFT_STEPS = 8
# A drift counts as a pan when the net shift is at least this share of the frame side and the
# steps mostly agree in direction (net shift / path length), both our choice: measured, a 6 px pan
# at 64 px gave 0.09-0.10 (steadiness 1.0), a centred ×1.4 zoom 0.02-0.05, shaking below 0.04.
DRIFT_MIN = 0.08
DRIFT_STEADY = 0.7


def _grey(frames: np.ndarray) -> np.ndarray:
    """(T, C, H, W) frames as (T, H, W) float64 grey (the mean of the channels), area-averaged
    (``cv2.INTER_AREA``) to at most CHECK_SIZE pixels on the long side."""
    grey = frames.mean(axis=1, dtype=np.float32)
    h, w = grey.shape[1:]
    scale = CHECK_SIZE / max(h, w)
    if scale < 1:
        size = (max(1, round(w * scale)), max(1, round(h * scale)))
        grey = np.stack([cv2.resize(g, size, interpolation=cv2.INTER_AREA) for g in grey])
    return grey.astype(np.float64)


def noise_sigma(grey: np.ndarray) -> float:
    """A robust estimate of the sensor noise σ of (T, H, W) frames that lie one frame apart.

    The smaller of two estimates that each can only overstate it: the temporal one from
    consecutive-frame differences (MAD_TO_SIGMA · median |Δ| / √2; motion inflates it) and Donoho's
    spatial one from the finest diagonal Haar details (a − b − c + d)/2 of 2×2 blocks
    (MAD_TO_SIGMA · median |d|; texture inflates it). Both equal σ for Gaussian noise.
    """
    temporal = MAD_TO_SIGMA * float(np.median(np.abs(np.diff(grey, axis=0)))) / np.sqrt(2.0)
    h, w = (grey.shape[1] // 2) * 2, (grey.shape[2] // 2) * 2
    g = grey[:, :h, :w]
    detail = (g[:, 0::2, 0::2] - g[:, 0::2, 1::2] - g[:, 1::2, 0::2] + g[:, 1::2, 1::2]) / 2.0
    return float(min(temporal, MAD_TO_SIGMA * float(np.median(np.abs(detail)))))


def _edge_band(shape: tuple[int, int]) -> np.ndarray:
    """Boolean (H, W) mask of the EDGE_BAND-wide band along the four sides."""
    h, w = shape
    dy, dx = max(1, round(h * EDGE_BAND)), max(1, round(w * EDGE_BAND))
    band = np.ones((h, w), bool)
    band[dy:h - dy, dx:w - dx] = False
    return band


def global_drift(grey: np.ndarray) -> tuple[float, float]:
    """Net global shift of (T, H, W) frames over the clip, and how steady it is.

    Returns
    -------
    drift : float
        Length of the summed phase-correlation shifts, as a share of the frame's mean side.
    steadiness : float
        Net shift over the summed lengths of the steps: 1 for a steady pan, near 0 for shaking.
    """
    n = len(grey)
    stops = np.unique(np.linspace(0, n - 1, min(DRIFT_STEPS, n - 1) + 1).round().astype(int))
    window = cv2.createHanningWindow((grey.shape[2], grey.shape[1]), cv2.CV_64F)
    steps = np.array([cv2.phaseCorrelate(grey[a], grey[b], window)[0] for a, b in zip(stops, stops[1:])])
    path = float(np.hypot(*steps.T).sum())
    net = float(np.hypot(*steps.sum(axis=0)))
    return net / float(np.mean(grey.shape[1:])), (net / path if path > 0 else 0.0)


def camera_check(rec: Recording) -> dict | None:
    """How well the static background explains a recording: the fixed-camera assumption.

    Returns
    -------
    dict or None
        ``background_share`` (share of pixels within the noise of the per-pixel median over the
        frames), ``edge_share`` (the same in the EDGE_BAND along the sides; it decides),
        ``noise`` (σ used, of 1), ``moves`` (edge share below EDGE_SHARE_MIN), and when it moves
        ``drift`` and ``drift_steadiness`` (:func:`global_drift`; None otherwise, as on a still
        picture they would follow the moving object). None with fewer than 3 real frames. A
        letterboxed (non-square) picture is judged without its padding.
    """
    real = rec.frames[~rec.missing]
    if len(real) < 3:
        return None
    geo = recording_geometry(rec.info, rec.size[1])
    if geo is not None and geo.padded:  # judge the picture, not the letterbox padding around it
        real = geo.crop(real)
    grey = _grey(real[:CAMERA_CHECK_FRAMES])
    sigma = noise_sigma(grey)
    if len(real) > CAMERA_CHECK_FRAMES:
        grey = _grey(real[np.linspace(0, len(real) - 1, CAMERA_CHECK_FRAMES).round().astype(int)])
    explained = np.abs(grey - np.median(grey, axis=0)) < max(EXPLAINED_FLOOR, NOISE_SIGMAS * sigma)
    edge = float(explained[:, _edge_band(grey.shape[1:])].mean())
    moves = edge < EDGE_SHARE_MIN
    drift, steady = global_drift(grey) if moves else (None, None)
    return {"background_share": float(explained.mean()), "edge_share": edge, "noise": sigma,
            "moves": moves, "drift": drift, "drift_steadiness": steady}


def camera_problems(check: dict | None) -> list[str]:
    """The one-line warning when the camera or the whole scene seems to move (else nothing)."""
    if not check or not check["moves"]:
        return []
    pan = ""
    if check["drift"] >= DRIFT_MIN and check["drift_steadiness"] >= DRIFT_STEADY:
        pan = f"; the picture drifts {check['drift']:.0%} of its width over the clip, as in a pan"
    return [f"camera or whole scene seems to move (hand-held, pan, zoom or changing light): the still "
            f"background explains {check['edge_share']:.0%} of the frame edges, a fixed camera over "
            f"{EDGE_SHARE_MIN:.0%}{pan}; kinecast assumes a fixed camera and will fit this poorly"]


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
        JSON-friendly facts; ``camera`` is :func:`camera_check`'s result; ``problems`` is a list of
        one-line notes (empty when none).
    """
    rec = read_recording(path, cfg, times_csv)
    info = rec.info
    interval = rec.median_interval
    camera = camera_check(rec)
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
        "geometry": describe_geometry(info, rec.size[1]),
        "duration_s": rec.duration,
        "median_interval_s": interval,
        "median_fps": 1.0 / interval if interval > 0 else 0.0,
        "time_source": info.get("time_source"),
        "times_file": info.get("times_file"),
        "decoder": info.get("decoder"),
        "cache": info.get("cache"),
        "camera": camera,
        "problems": (list(info.get("problems", [])) + timing_problems(rec) + content_problems(rec, info)
                     + camera_problems(camera)),
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
        *([f"geometry    {report['geometry']}"] if report.get("geometry") else []),
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
    if report.get("camera"):
        lines.append(f"background  {_background_words(report['camera'])}")
    if report["problems"]:
        lines += [f"problem     {p}" for p in report["problems"]]
    else:
        lines.append("problems    none found")
    return "\n".join(lines)


def _background_words(camera: dict) -> str:
    return (f"the still background explains {camera['background_share']:.0%} of the pixels, "
            f"{camera['edge_share']:.0%} at the frame edges (a fixed camera: over {EDGE_SHARE_MIN:.0%})")


def format_trial(name: str, report: dict, width: int = 0) -> str:
    """One line for one trial of a folder: frames, timing, background share and its problems."""
    cam = report.get("camera")
    background = (f", background {cam['background_share']:.0%} ({cam['edge_share']:.0%} at the edges)"
                  if cam else "")
    problems = report["problems"]
    return (f"{name:<{width}}  {report['frames_read']} frames, {report['dropped']} dropped, "
            f"{report['duration_s']:.4g} s at {report['median_fps']:.4g} frames/s{background}; "
            + (f"problem: {' | '.join(problems)}" if problems else "no problems found"))


def format_totals(reports: list[dict], unreadable: int = 0, width: int = 0) -> str:
    """The totals line under the trial lines of :func:`format_trial`."""
    moving = sum(1 for r in reports if (r.get("camera") or {}).get("moves"))
    sizes = sorted({tuple(r["source_size"]) for r in reports})
    parts = [f"{len(reports) + unreadable} trial(s)",
             f"{sum(r['frames_read'] for r in reports)} frames read",
             f"{sum(r['dropped'] for r in reports)} dropped",
             f"{sum(r['duration_s'] for r in reports):.4g} s in all",
             f"{sum(1 for r in reports if r['problems'])} with problems"
             + (f" ({moving} with a moving camera or scene)" if moving else "")]
    if unreadable:
        parts.append(f"{unreadable} unreadable")
    if len(sizes) > 1:
        parts.append("source sizes differ: " + ", ".join("x".join(map(str, s)) for s in sizes))
    return f"{'total':<{width}}  " + ", ".join(parts)
