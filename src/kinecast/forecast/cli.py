"""``kinecast forecast``: extrapolate frames from a trained run and render a clip.

Writes OUT (mp4, gif, or a folder of PNGs, by its extension) plus, beside it, ``<name>_sheet.png``
(every n-th frame), ``<name>_latents.csv`` and ``<name>_phase.png`` (the latent trajectory) and
``<name>_forecast.npz`` (times, mean, spread, samples). When the recording has frames at the
forecast times, the clip shows truth | prediction | absolute error (| spread); at output times
with no recorded frame (e.g. between frames with ``--fps 4x``) the truth and error panels say so
instead of comparing the prediction with nothing.
"""

from __future__ import annotations

import io
from pathlib import Path

import numpy as np

from ..errors import KinecastError
from ..fileio import check_can_create, write_bytes, write_text
from . import core
from ..verbs import CAUTION, add_seed_option, at_least_one, open_run, refuse_inside, with_seed



def configure(parser) -> None:
    parser.add_argument("run", metavar="RUN", help="run folder written by `kinecast fit`")
    parser.add_argument("path", metavar="PATH", help="recording to condition on")
    parser.add_argument("--frames", type=int, metavar="N", help="frames to forecast (forecast.frames)")
    parser.add_argument("--from", dest="start", metavar="TIME|FRAME",
                        help="first forecast frame: a time like 2.5s or a frame number, at most one "
                             "interval past the last recorded frame; default: the end")
    parser.add_argument("--samples", type=int, metavar="K", help="futures to draw (forecast.samples)")
    add_seed_option(parser)
    parser.add_argument("--fps", metavar="F",
                        help="forecast frames per second of recording time, e.g. 60, or 4x the "
                             "recording's rate; the clip always plays at the recording's rate, so "
                             "4x gives 4x slow motion")
    parser.add_argument("--out", required=True, metavar="OUT", help="clip.mp4, clip.gif or a folder/")
    parser.add_argument("--overwrite", action="store_true", help="replace existing outputs")
    parser.add_argument("--device", choices=("auto", "cpu", "cuda"), help="compute device (train.device)")


def parse_fps(text: str | None, rec, default: float) -> float:
    """Forecast frames per second of recording time (not the clip's playback rate).

    ``60`` → 60; ``4x`` → 4 × the recording's median rate; None → ``default``.
    """
    if not text:
        return default
    try:
        if text.lower().endswith("x"):
            return float(text[:-1]) / rec.median_interval
        value = float(text)
    except ValueError:
        raise KinecastError("--fps", f"bad value {text!r}: allowed a rate like 60 or a multiple like 4x") from None
    if value <= 0:
        raise KinecastError("--fps", f"bad value {text!r}: must be positive")
    return value


def parse_start(text: str | None, rec) -> int | None:
    """``2.5s`` → the first slot at or after 2.5 s; ``75`` → slot 75; None → the end.

    A time past the end is refused by :func:`core.slot_at_time`, a frame number past it by
    :func:`core.context_start_for` (one line naming the recording).
    """
    if text is None:
        return None
    try:
        if text.lower().endswith("s"):
            return core.slot_at_time(rec, float(text[:-1]))
        return int(text)
    except ValueError:
        raise KinecastError("--from", f"bad value {text!r}: allowed a time like 2.5s or a frame number") from None


def truth_at(rec, times: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Recorded frames at ``times`` (within ``core.TIME_MATCH`` of an interval) and a mask of where
    they exist; frames without one are zero in ``truth``, and the panels show no error there."""
    tol = core.TIME_MATCH * rec.median_interval
    idx = np.clip(np.searchsorted(rec.times, times), 0, rec.n_frames - 1)
    best = np.where(np.abs(rec.times[np.maximum(idx - 1, 0)] - times) < np.abs(rec.times[idx] - times),
                    np.maximum(idx - 1, 0), idx)
    have = (np.abs(rec.times[best] - times) <= tol) & ~rec.missing[best]
    truth = np.where(have[:, None, None, None], rec.frames[best], 0.0).astype(np.float32)
    return truth, have


def sidecars(out: Path) -> dict[str, Path]:
    base = out.parent / (out.stem if out.suffix else out.name.rstrip("/"))
    return {k: Path(f"{base}_{k}{ext}") for k, ext in
            (("sheet", ".png"), ("latents", ".csv"), ("phase", ".png"), ("forecast", ".npz"))}


def latents_csv(times: np.ndarray, latents: np.ndarray, pixels: np.ndarray | None = None) -> str:
    """One row per sample and time: sample, time_s, s_0..s_{q-1}, v_0..v_{q-1}; with ``pixels``
    ([S, N, K, 4] from :func:`core.keypoint_pixels`) also each keypoint's position (px) and
    velocity (px/s) in the recording's own pixels."""
    q = latents.shape[-1] // 2
    head = ["sample", "time_s"] + [f"s_{i}" for i in range(q)] + [f"v_{i}" for i in range(latents.shape[-1] - q)]
    if pixels is not None:
        head += [f"kp{j}_{c}" for j in range(pixels.shape[2]) for c in ("x_px", "y_px", "vx_px_s", "vy_px_s")]
        latents = np.concatenate([latents, pixels.reshape(*pixels.shape[:2], -1)], axis=-1)
    rows = [",".join(head)]
    for s, lat in enumerate(latents):
        rows += [",".join([str(s), f"{t:.6f}"] + [f"{x:.6g}" for x in z]) for t, z in zip(times, lat)]
    return "\n".join(rows) + "\n"


def run(args, cfg) -> int:
    from ..plots import keypoint_phase, phase_portrait
    from ..render import output_kind, comparison_columns, contact_sheet, panel_frames, write_frames

    out = Path(args.out)
    output_kind(out)  # refuses an unknown extension before anything is read or written
    n = at_least_one("--frames", args.frames, cfg.forecast.frames)
    samples = at_least_one("--samples", args.samples, cfg.forecast.samples)
    refuse_inside(out, args.path)
    side = sidecars(out)
    if not args.overwrite:
        for p in [out, *side.values()]:
            if p.exists():
                raise KinecastError(p, "already exists (pass --overwrite to replace it)")
    check_can_create(out)
    model, cfg, rec, device = open_run(args, with_seed(args, cfg))
    fps = parse_fps(args.fps, rec, cfg.forecast.fps)
    fc = core.forecast(model, cfg, rec, n, parse_start(args.start, rec), fps, samples, device)
    truth, have = truth_at(rec, fc.times)
    cols = comparison_columns(fc.mean, truth if have.any() else None, fc.spread if samples > 1 else None)
    panels = panel_frames(cols, fc.times, upscale=cfg.forecast.upscale, recorded=have)
    play_fps = 1.0 / rec.median_interval  # play at the recording's rate: --fps 4x gives slow motion
    write_frames(panels, out, play_fps, overwrite=args.overwrite)
    contact_sheet(panels, fc.times, cfg.forecast.contact_every, side["sheet"], overwrite=args.overwrite,
                  label=False)
    pixels = core.keypoint_pixels(fc.latents, rec.info, cfg) if cfg.model.encoder == "keypoints" else None
    write_text(side["latents"], latents_csv(fc.times, fc.latents, pixels))
    if pixels is not None:
        keypoint_phase(pixels[0], fc.times, side["phase"], overwrite=args.overwrite)
    else:
        phase_portrait(fc.latents[0], fc.times, side["phase"], overwrite=args.overwrite)
    buf = io.BytesIO()
    np.savez_compressed(buf, times=fc.times, mean=fc.mean, spread=fc.spread, samples=fc.samples,
                        truth=truth, truth_present=have)
    write_bytes(side["forecast"], buf.getvalue())
    print(f"forecast of {n} frames ({fc.times[0]:.3f}–{fc.times[-1]:.3f} s, {samples} sample(s)"
          f"{f', seed {cfg.forecast.seed}' if samples > 1 else ''}) "
          f"written to {out}; contact sheet {side['sheet']}; latents {side['latents']}; "
          f"phase portrait {side['phase']}; arrays (mean, spread, samples) {side['forecast']}")
    print(f"note: {CAUTION}")
    return 0
