"""Turn frame arrays into something a person can look at: clips, side-by-side panels, contact sheets.

Frames come in as float arrays ``(T, C, H, W)`` in [0, 1] with C = 1 or 3 (the model's layout) or as
uint8 arrays ``(T, H, W, C)`` (already rendered panels). Every file is written atomically through
:mod:`kinecast.fileio`; an existing output is refused unless ``overwrite`` is passed.

Rendered clips show statistical extrapolations, not measurements.

Examples
--------
>>> import numpy as np
>>> truth = np.random.rand(4, 1, 8, 8).astype(np.float32)
>>> pred = np.clip(truth + 0.1, 0, 1)
>>> cols = comparison_columns(pred, truth)
>>> [c[0] for c in cols]
['truth', 'prediction', 'abs. error']
>>> panel_frames(cols, np.arange(4) / 30.0, upscale=4).shape[0]
4
"""

from __future__ import annotations

import math
import numbers
import os
from pathlib import Path
from typing import NamedTuple, Sequence

import cv2
import imageio.v3 as iio
import imageio_ffmpeg
import matplotlib
import numpy as np
from tqdm import tqdm

from .errors import KinecastError
from .fileio import atomic_path, write_bytes

# --- fixed facts ---------------------------------------------------------------------------------
ERROR_SCALE = 1.0   # |truth - prediction| of intensities in [0, 1] is at most 1
MIN_SPREAD_SCALE = 1 / 255  # one 8-bit grey level: the smallest spread scale worth a colour ramp
MP4_CRF = 18        # x264 constant-rate factor; ~18 is commonly called visually lossless (common practice)
FRAME_PATTERN = "frame_{:0{w}d}.png"
FRAME_DIGITS = 4    # at least frame_0000.png; more digits when a clip is longer
MAX_COLUMNS = 5     # truth | prediction | abs. error | spread | one spare
# --- layout of rendered text (pixels; chosen by eye for legibility) ------------------------------
FONT = cv2.FONT_HERSHEY_SIMPLEX
TEXT_SCALE = 0.45   # Hershey scale: capitals about 10 px tall
TEXT_THICKNESS = 1
TEXT_COLOUR = (235, 235, 235)
BAND = 18           # height of the title, scale and time bands
GAP = 4             # space between panels and between contact-sheet tiles
PAD = 4             # inner margin of text
MIN_PANEL_WIDTH = 96  # narrowest panel; fits a ten-letter title at TEXT_SCALE
BACKGROUND = 28     # grey level of bands and gaps
NO_RECORD_GREY = 96  # neutral fill where there is no recorded frame: unlike black truth or the bands
NO_RECORD_TEXT = "no recorded frame"
TRUTH_TITLE, ERROR_TITLE = "truth", "abs. error"  # the columns made from recorded frames


class Layout(NamedTuple):
    """Where things go in a panel frame: output size and one image box (y0, x0, y1, x1) per column."""

    height: int
    width: int
    boxes: list[tuple[int, int, int, int]]
    panels: list[tuple[int, int]]  # (x0, x1) of each panel, its title and scale bands


def as_uint8(frames: np.ndarray, what: str | Path = "frames") -> np.ndarray:
    """Frames as uint8 ``(T, H, W, C)``, C = 1 or 3.

    Parameters
    ----------
    frames : ndarray
        Float ``(T, C, H, W)`` or ``(T, H, W)`` in [0, 1] (clipped, rounded), or uint8 ``(T, H, W, C)``
        or ``(T, H, W)`` passed through.
    what : str or Path
        Named in the error when the frames hold NaN or infinite values.

    Returns
    -------
    ndarray, uint8, shape (T, H, W, C)
    """
    a = np.asarray(frames)
    if a.dtype == np.uint8:
        a = a[..., None] if a.ndim == 3 else a
        if a.ndim != 4 or a.shape[-1] not in (1, 3):
            raise ValueError(f"uint8 frames must be (T, H, W) or (T, H, W, 1|3), got {a.shape}")
        return a
    a = a[:, None] if a.ndim == 3 else a
    if a.ndim != 4 or a.shape[1] not in (1, 3):
        raise ValueError(f"float frames must be (T, H, W) or (T, 1|3, H, W), got {a.shape}")
    if not np.isfinite(a).all():
        raise KinecastError(what, "frames contain NaN or infinite values (did the forecast diverge?)")
    return np.round(np.clip(a, 0.0, 1.0) * 255.0).astype(np.uint8).transpose(0, 2, 3, 1)


def upscale_frames(frames8: np.ndarray, factor: int) -> np.ndarray:
    """Nearest-neighbour upscaling of uint8 ``(T, H, W, C)`` frames by a whole factor."""
    if int(factor) != factor or factor < 1:
        raise ValueError(f"upscale must be a whole number >= 1, got {factor!r}")
    factor = int(factor)
    return frames8 if factor == 1 else frames8.repeat(factor, axis=1).repeat(factor, axis=2)


def _rgb(frames8: np.ndarray) -> np.ndarray:
    return np.repeat(frames8, 3, axis=-1) if frames8.shape[-1] == 1 else frames8


def output_kind(out: str | Path) -> str:
    text = str(out)
    suffix = Path(text).suffix.lower()
    if text.endswith(("/", os.sep)) or not suffix:
        return "png"
    if suffix in (".mp4", ".gif"):
        return suffix[1:]
    raise KinecastError(out, f"unknown output extension '{suffix}': allowed .mp4, .gif or a folder "
                             "for PNG frames")


def _check_target(path: Path, kind: str, overwrite: bool) -> None:
    """Refuse what would overwrite the user's files; ``kind`` 'png' is a folder of frames, else a file."""
    if kind == "png":
        if path.exists() and not path.is_dir():
            raise KinecastError(path, "exists and is not a folder (PNG frames go into a folder)")
        if path.is_dir() and any(path.iterdir()) and not overwrite:
            raise KinecastError(path, "folder already exists and is not empty (pass --overwrite to "
                                      "replace its frames)")
    elif path.is_dir():
        raise KinecastError(path, "is a folder, cannot write a file in its place")
    elif path.exists() and not overwrite:
        raise KinecastError(path, "already exists (pass --overwrite to replace it)")


def _write_mp4(rgb: np.ndarray, path: Path, fps: float, overwrite: bool) -> None:
    pad_h, pad_w = rgb.shape[1] % 2, rgb.shape[2] % 2  # yuv420p needs even width and height
    if pad_h or pad_w:
        rgb = np.pad(rgb, ((0, 0), (0, pad_h), (0, pad_w), (0, 0)), mode="edge")
    with atomic_path(path, overwrite) as tmp:
        writer = imageio_ffmpeg.write_frames(
            str(tmp), (rgb.shape[2], rgb.shape[1]), pix_fmt_in="rgb24", pix_fmt_out="yuv420p",
            fps=fps, codec="libx264", quality=None, macro_block_size=1, ffmpeg_log_level="error",
            output_params=["-crf", str(MP4_CRF)])
        writer.send(None)
        try:
            for frame in tqdm(rgb, desc=f"writing {path.name}", unit="frame", disable=None, leave=False):
                writer.send(np.ascontiguousarray(frame))
        finally:
            writer.close()
        if tmp.stat().st_size == 0:
            raise KinecastError(path, "ffmpeg wrote no video data")


def _write_gif(frames8: np.ndarray, path: Path, fps: float, overwrite: bool) -> None:
    data = frames8[..., 0] if frames8.shape[-1] == 1 else frames8
    # GIF stores delays in 1/100 s (GIF89a spec); identical consecutive frames are merged by Pillow
    # into one longer frame, so the playing time is kept but the frame count may shrink.
    with atomic_path(path, overwrite) as tmp:
        iio.imwrite(tmp, data, extension=".gif", plugin="pillow", duration=1000.0 / fps, loop=0)


def _write_png_folder(frames8: np.ndarray, folder: Path) -> None:
    try:
        folder.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise KinecastError(folder, f"cannot create the folder ({exc.strerror or exc})") from None
    digits = max(FRAME_DIGITS, len(str(len(frames8) - 1)))
    names = [FRAME_PATTERN.format(i, w=digits) for i in range(len(frames8))]
    # Encode everything first: a failure while encoding leaves the folder as it was.
    blobs = [iio.imwrite("<bytes>", f[..., 0] if f.shape[-1] == 1 else f, extension=".png")
             for f in frames8]
    for name, blob in tqdm(list(zip(names, blobs)), desc=f"writing {folder.name}/", unit="frame",
                           disable=None, leave=False):
        write_bytes(folder / name, blob, overwrite=True)
    keep = set(names)
    for stale in folder.glob("frame_*.png"):  # frames of an older, longer clip that was replaced
        if stale.name not in keep and stale.stem[len("frame_"):].isdigit():
            stale.unlink()


def write_frames(frames: np.ndarray, out: str | Path, fps: float, overwrite: bool = False,
                 upscale: int = 1) -> Path:
    """Write frames as an mp4 (H.264, yuv420p), a gif, or a folder of PNGs, chosen by ``out``.

    Parameters
    ----------
    frames : ndarray
        Float ``(T, C, H, W)`` in [0, 1] or uint8 ``(T, H, W, C)`` (e.g. from :func:`panel_frames`).
    out : str or Path
        ``*.mp4``, ``*.gif``, or a folder (no suffix, or a trailing '/') that receives
        ``frame_0000.png`` ...
    fps : float
        Playback frame rate, > 0.
    overwrite : bool
        Replace an existing file (or the frames in an existing non-empty folder).
    upscale : int
        Whole-number nearest-neighbour magnification for viewing (callers pass
        ``cfg.forecast.upscale``). mp4 frames with an odd height or width are padded by one row or
        column (edge pixels repeated).

    Returns
    -------
    Path
        The file or folder written.

    Raises
    ------
    KinecastError
        Unknown extension, existing output without ``overwrite``, bad frame rate, non-finite frames,
        or a location that cannot be written.
    """
    path = Path(out)
    kind = output_kind(out)
    if not (isinstance(fps, numbers.Real) and math.isfinite(fps) and fps > 0):
        raise KinecastError(path, f"frame rate must be a positive number, got {fps!r}")
    _check_target(path, kind, overwrite)
    frames8 = upscale_frames(as_uint8(frames, path), upscale)
    if len(frames8) == 0:
        raise KinecastError(path, "no frames to write")
    try:
        if kind == "mp4":
            _write_mp4(_rgb(frames8), path, float(fps), overwrite)
        elif kind == "gif":
            _write_gif(frames8, path, float(fps), overwrite)
        else:
            _write_png_folder(frames8, path)
    except (OSError, RuntimeError) as exc:
        first = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
        raise KinecastError(path, f"cannot write {kind} output ({first})") from None
    return path


def time_format(times: np.ndarray) -> str:
    """A format with enough decimals that neighbouring frame times read differently (at least 2).

    >>> time_format(np.array([0.0, 0.001, 0.002]))
    't = {:.3f} s'
    """
    steps = np.diff(np.asarray(times, dtype=np.float64))
    steps = steps[steps > 0]
    decimals = 2 if steps.size == 0 else int(min(6, max(2, math.ceil(-math.log10(steps.min())))))
    return "t = {:.%df} s" % decimals


def _text(img: np.ndarray, box: tuple[int, int, int, int], text: str, align: str = "left") -> None:
    """Draw ``text`` inside ``box`` (y0, x0, y1, x1) of ``img``; shrink to fit, never spill out."""
    y0, x0, y1, x1 = box
    region = np.ascontiguousarray(img[y0:y1, x0:x1])
    room = max(1, region.shape[1] - 2 * PAD)
    scale = TEXT_SCALE
    (w, h), base = cv2.getTextSize(text, FONT, scale, TEXT_THICKNESS)
    if w > room:
        scale *= room / w
        (w, h), base = cv2.getTextSize(text, FONT, scale, TEXT_THICKNESS)
    x = PAD if align == "left" else (region.shape[1] - w - PAD if align == "right"
                                     else (region.shape[1] - w) // 2)
    y = (region.shape[0] - h - base) // 2 + h
    cv2.putText(region, text, (max(0, x), y), FONT, scale, TEXT_COLOUR, TEXT_THICKNESS, cv2.LINE_AA)
    img[y0:y1, x0:x1] = region


def colour_table(cmap: str) -> np.ndarray:
    """The 256-entry uint8 RGB lookup table of a matplotlib colour map (e.g. 'magma', 'viridis')."""
    return matplotlib.colormaps[cmap](np.arange(256), bytes=True)[:, :3]


def heat_map(values: np.ndarray, vmax: float, cmap: str = "magma") -> np.ndarray:
    """Colour non-negative float frames ``(T, C, H, W)`` on the fixed scale [0, vmax].

    Channels are averaged first. Indexing follows matplotlib (``floor(x * 256)``, clipped), so the
    result equals ``matplotlib.colormaps[cmap](Normalize(0, vmax)(v), bytes=True)``.

    Returns
    -------
    ndarray, uint8, shape (T, H, W, 3)
    """
    if not vmax > 0:
        raise ValueError(f"heat-map scale must be positive, got {vmax!r}")
    v = np.asarray(values, dtype=np.float64)
    v = v[:, None] if v.ndim == 3 else v
    if not np.isfinite(v).all():
        raise KinecastError("heat map", "values contain NaN or infinite values")
    idx = np.clip(np.floor(v.mean(axis=1) / vmax * 256.0), 0, 255).astype(np.intp)
    return colour_table(cmap)[idx]


def comparison_columns(pred: np.ndarray, truth: np.ndarray | None = None,
                       spread: np.ndarray | None = None) -> list[tuple]:
    """The usual columns: truth | prediction | abs. error | spread (those that can be made).

    The absolute error is drawn on the fixed scale [0, ERROR_SCALE] in 'magma', the spread
    (per-pixel std of sampled futures) on [0, :func:`spread_scale`] (the largest spread shown) in
    'viridis'.
    """
    cols: list[tuple] = []
    if truth is not None:
        cols.append((TRUTH_TITLE, truth))
    cols.append(("prediction", pred))
    if truth is not None:
        err = np.abs(np.asarray(truth, np.float32) - np.asarray(pred, np.float32))
        cols.append((ERROR_TITLE, err, ERROR_SCALE, "magma"))
    if spread is not None:
        cols.append(("spread (std)", spread, spread_scale(spread), "viridis"))
    return cols


def spread_scale(spread: np.ndarray) -> float:
    """Top of the spread colour scale: the largest spread shown (channel mean), at least one grey level."""
    return max(float(np.asarray(spread, dtype=np.float64).mean(axis=1).max()), MIN_SPREAD_SCALE)


def panel_layout(n_columns: int, frame_hw: tuple[int, int], upscale: int, heat: bool) -> Layout:
    """Size of a panel frame and the image box of each column (title band above, time band below)."""
    if not 1 <= n_columns <= MAX_COLUMNS:
        raise ValueError(f"panel_frames takes 1 to {MAX_COLUMNS} columns, got {n_columns}")
    h, w = frame_hw[0] * upscale, frame_hw[1] * upscale
    pw = max(w, MIN_PANEL_WIDTH)
    panels = [(i * (pw + GAP), i * (pw + GAP) + pw) for i in range(n_columns)]
    boxes = [(BAND, p0 + (pw - w) // 2, BAND + h, p0 + (pw - w) // 2 + w) for p0, _ in panels]
    height = BAND + h + (BAND if heat else 0) + BAND
    return Layout(height, n_columns * pw + (n_columns - 1) * GAP, boxes, panels)


def panel_frames(columns: Sequence[tuple], times: np.ndarray, upscale: int = 1,
                 recorded: np.ndarray | None = None) -> np.ndarray:
    """Side-by-side panels, each with its title, and the time written under every frame.

    Parameters
    ----------
    columns : list of tuples
        ``(title, frames)`` shows frames as they are; ``(title, frames, vmax)`` or
        ``(title, frames, vmax, cmap)`` shows non-negative values as a heat map on the fixed scale
        [0, vmax] (stated on the panel), colour map 'magma' unless given. All frames share T, H, W;
        grey and RGB may be mixed. 1 to 5 columns (fewer when there is no truth).
    times : ndarray, shape (T,)
        Seconds; written as ``t = 1.23 s``.
    upscale : int
        Nearest-neighbour magnification.
    recorded : ndarray of bool, shape (T,), optional
        Where False (no recorded frame at that time, e.g. between frames in slow motion), the
        columns made from recorded frames (titled ``TRUTH_TITLE`` and ``ERROR_TITLE``) show
        ``NO_RECORD_TEXT`` on a neutral grey panel instead of any image or error.

    Returns
    -------
    ndarray, uint8, shape (T, H', W', 3)
    """
    times = np.asarray(times, dtype=np.float64)
    parts, heat_specs = [], []
    for col in columns:
        title, frames = col[0], col[1]
        if len(col) > 2:
            cmap = col[3] if len(col) > 3 else "magma"
            parts.append(heat_map(frames, float(col[2]), cmap))
            heat_specs.append((float(col[2]), cmap))
        else:
            parts.append(_rgb(as_uint8(frames, title)))
            heat_specs.append(None)
    shapes = {p.shape[:3] for p in parts}
    if len(shapes) != 1 or next(iter(shapes))[0] != len(times):
        raise ValueError(f"columns must share (T, H, W) and T must equal len(times) = {len(times)}; "
                         f"got {[p.shape[:3] for p in parts]}")
    t_count, h, w = parts[0].shape[:3]
    lay = panel_layout(len(parts), (h, w), upscale, any(s is not None for s in heat_specs))
    template = np.full((lay.height, lay.width, 3), BACKGROUND, np.uint8)
    for (px0, px1), col, spec in zip(lay.panels, columns, heat_specs):
        _text(template, (0, px0, BAND, px1), str(col[0]), align="center")
        if spec is not None:
            _scale_bar(template, (BAND + h * upscale, px0, 2 * BAND + h * upscale, px1), *spec)
    out = np.broadcast_to(template, (t_count,) + template.shape).copy()
    for (y0, x0, y1, x1), part in zip(lay.boxes, parts):
        out[:, y0:y1, x0:x1] = upscale_frames(part, upscale)
    if recorded is not None:
        _blank_unrecorded(out, lay.boxes, [str(c[0]) for c in columns], np.asarray(recorded, bool))
    fmt = time_format(times)
    for k in range(t_count):
        _text(out[k], (lay.height - BAND, 0, lay.height, lay.width), fmt.format(times[k]))
    return out


def _blank_unrecorded(out: np.ndarray, boxes: list[tuple[int, int, int, int]], titles: list[str],
                      recorded: np.ndarray) -> None:
    """Replace the truth and error images of frames without a recorded frame by a labelled grey panel."""
    if recorded.shape != (len(out),):
        raise ValueError(f"recorded must have shape ({len(out)},), got {recorded.shape}")
    y0, x0, y1, x1 = boxes[0]
    tile = np.full((y1 - y0, x1 - x0, 3), NO_RECORD_GREY, np.uint8)
    _text(tile, (0, 0, y1 - y0, x1 - x0), NO_RECORD_TEXT, align="center")
    for (y0, x0, y1, x1), title in zip(boxes, titles):
        if title in (TRUTH_TITLE, ERROR_TITLE):
            out[~recorded, y0:y1, x0:x1] = tile


def _scale_bar(img: np.ndarray, box: tuple[int, int, int, int], vmax: float, cmap: str) -> None:
    """'0 ▮▮▮ vmax' under a heat-map panel: the fixed scale of its colours."""
    y0, x0, y1, x1 = box
    lo, hi = "0", f"{vmax:.3g}"  # three digits: the bar is read, not measured
    (wl, _), _ = cv2.getTextSize(lo, FONT, TEXT_SCALE, TEXT_THICKNESS)
    (wh, _), _ = cv2.getTextSize(hi, FONT, TEXT_SCALE, TEXT_THICKNESS)
    bx0, bx1 = x0 + wl + 2 * PAD, x1 - wh - 2 * PAD
    _text(img, (y0, x0, y1, bx0), lo, align="left")
    _text(img, (y0, bx1, y1, x1), hi, align="right")
    if bx1 > bx0:
        ramp = colour_table(cmap)[np.linspace(0, 255, bx1 - bx0).astype(np.intp)]
        img[y0 + PAD:y1 - PAD, bx0:bx1] = ramp[None]


def contact_sheet(frames_or_panels: np.ndarray, times: np.ndarray, every: int, out: str | Path,
                  upscale: int = 1, overwrite: bool = False, label: bool = True) -> Path:
    """One PNG grid of every ``every``-th frame, each labelled with its time.

    Parameters
    ----------
    frames_or_panels : ndarray
        Float ``(T, C, H, W)`` frames or uint8 ``(T, H, W, C)`` panel frames.
    times : ndarray, shape (T,)
        Seconds.
    every : int
        Take frames 0, every, 2·every, ... (callers pass ``cfg.forecast.contact_every``).
    out : str or Path
        A ``.png`` file.
    upscale : int
        Nearest-neighbour magnification of each tile.
    overwrite : bool
        Replace an existing file.
    label : bool
        Write each tile's time under it; False for panels from :func:`panel_frames`, which carry it.

    Returns
    -------
    Path
    """
    path = Path(out)
    if path.suffix.lower() != ".png":
        raise KinecastError(path, f"unknown output extension '{path.suffix}': a contact sheet is a .png")
    _check_target(path, "file", overwrite)
    if int(every) != every or every < 1:
        raise KinecastError(path, f"every must be a whole number >= 1, got {every!r}")
    frames8 = _rgb(upscale_frames(as_uint8(frames_or_panels, path), upscale))
    times = np.asarray(times, dtype=np.float64)
    if len(times) != len(frames8) or len(frames8) == 0:
        raise ValueError(f"need T >= 1 frames and T times, got {len(frames8)} frames, {len(times)} times")
    picks = np.arange(0, len(frames8), int(every))
    th, tw = frames8.shape[1], max(frames8.shape[2], MIN_PANEL_WIDTH)
    tile_h = th + (BAND if label else 0)
    # choose the column count that makes the sheet closest to square in pixels
    cols = int(np.clip(round(math.sqrt(len(picks) * tile_h / tw)), 1, len(picks)))
    tiles = np.full((len(picks), tile_h, tw, 3), BACKGROUND, np.uint8)
    xo = (tw - frames8.shape[2]) // 2
    tiles[:, :th, xo:xo + frames8.shape[2]] = frames8[picks]
    if label:
        fmt = time_format(times)
        for tile, i in zip(tiles, picks):
            _text(tile, (th, 0, tile_h, tw), fmt.format(times[i]))
    import torch
    from torchvision.utils import make_grid  # lazy: only contact sheets need them

    grid = make_grid(torch.from_numpy(tiles).permute(0, 3, 1, 2), nrow=cols, padding=GAP, pad_value=BACKGROUND)
    sheet = np.ascontiguousarray(grid.permute(1, 2, 0).numpy())
    return write_bytes(path, iio.imwrite("<bytes>", sheet, extension=".png"), overwrite)
