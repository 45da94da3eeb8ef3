"""Video files (mp4, avi, mov, mkv): decoded frame by frame, never held at full resolution.

The first choice is the ffmpeg binary that ships with imageio-ffmpeg (frames stream through a pipe,
one at a time); OpenCV's ``VideoCapture`` is the fallback when ffmpeg cannot read the file. The
frame rate comes from the container.

ffmpeg also does the preprocessing itself, in C: it crops ``data.roi``, converts to grey or RGB and
area-averages down to the picture's size in model pixels (a video filter; the long side becomes
``data.size``, the short side keeps the aspect ratio), and writes 16-bit samples so the averages are
not rounded to 1/255. Those frames cross the pipe at model size, and Python only normalises them
and pads them to the square with their edge pixels repeated, as :mod:`.preprocess` does.
Beside that shrinking ffmpeg, started at the same time, a plain one reports the frame size as the
frame-by-frame decode sees it (after any rotation the container asks for). ``data.roi`` is checked
against that size; when it does not fit, or the region is smaller than the model size (an
enlargement), or ffmpeg's picture is not the size :func:`.preprocess.square_geometry` gives,
the frames come from the plain one and go through :class:`FrameSink` as for any other
source, which also reports a bad region at the first frame with the usual message.
"""

from __future__ import annotations

import contextlib
import logging
import math
import os
import threading
from concurrent.futures import Future, ThreadPoolExecutor
from pathlib import Path
from typing import Callable, Iterator

import cv2
import numpy as np

from ..config import DataConfig
from ..errors import KinecastError
from .boundary import one_line, quiet_opencv
from .preprocess import FrameSink, SampleFormat, check_roi, roi_numbers, square_geometry

VIDEO_SUFFIXES = (".mp4", ".avi", ".mov", ".mkv")
# OpenCV reads this variable for the log level of its bundled ffmpeg; -8 is ffmpeg's AV_LOG_QUIET.
_OPENCV_FFMPEG_LOG, _FFMPEG_QUIET = "OPENCV_FFMPEG_LOGLEVEL", "-8"

Opened = tuple[dict, Iterator[np.ndarray]]


def _ffmpeg_reason(exc: Exception, path: Path) -> str:
    """The last line ffmpeg wrote, which names the actual problem, without the path in it."""
    lines = [ln.strip() for ln in str(exc).splitlines() if ln.strip()]
    reason = lines[-1] if lines else type(exc).__name__
    return reason.replace(str(path), "").strip(" :") or reason


# Scaler flags for the in-ffmpeg shrink: area averaging (a box filter, as cv2.INTER_AREA), with
# chroma taken and interpolated at full resolution, as the frame-by-frame rgb24 decode does.
SHRINK_FLAGS = "area+full_chroma_int+full_chroma_inp"
# Pixel format and channels ffmpeg writes at model size: 16 bits per sample (little-endian), BT.601
# luma for grey. More than 8 bits, so an average is not rounded to 1/255.
SHRINK_PIX_FMT = {"grey": ("gray16le", 1), "rgb": ("rgb48le", 3)}
_LE16 = np.dtype("<u2")
# What the frame-by-frame decode reads (rgb24), so what a shrunk source frame is reported as.
_DECODED_CHANNELS, _DECODED_DTYPE, _DECODED_BITS = 3, "uint8", 8
# imageio-ffmpeg logs a warning whenever the frames it reads differ in size from the stored ones
# (a shrunk read, or a rotated video); failures reach the user as our one-line errors instead.
_IMAGEIO_FFMPEG_LOGGER = "imageio_ffmpeg"

Started = tuple[dict, Iterator[bytes]]


@contextlib.contextmanager
def _quiet_imageio_ffmpeg() -> Iterator[None]:
    """Hide imageio-ffmpeg's warnings while ffmpeg starts."""
    log = logging.getLogger(_IMAGEIO_FFMPEG_LOGGER)
    old = log.level
    log.setLevel(logging.ERROR)
    try:
        yield
    finally:
        log.setLevel(old)


def _start(path: Path, pix_fmt: str, bits: int, vf: str | None = None) -> Started:
    """Start ffmpeg writing ``pix_fmt`` frames (through filter ``vf``); return its facts and frames."""
    import imageio_ffmpeg

    gen = imageio_ffmpeg.read_frames(str(path), pix_fmt=pix_fmt, bits_per_pixel=bits,
                                     output_params=["-vf", vf] if vf else None)
    try:
        return next(gen), gen
    except Exception as exc:
        raise RuntimeError(_ffmpeg_reason(exc, path)) from None


def _arrays(gen: Iterator[bytes], shape: tuple[int, ...], dtype: np.dtype) -> Iterator[np.ndarray]:
    """Each frame of ``gen`` as an array of ``shape`` in native byte order; ffmpeg stops at the end."""
    native = dtype.newbyteorder("=")
    try:
        for buf in gen:
            yield np.frombuffer(buf, dtype).reshape(shape).astype(native, copy=False)
    finally:
        gen.close()


def _side_expr(side: str, other: str, size: int) -> str:
    """ffmpeg expression for the output length of input side ``side`` (``iw`` or ``ih``): ``size``
    when it is the long side (or the picture is square), else :func:`.preprocess.short_side`
    written with ffmpeg's ``floor``."""
    return f"'if(gte({side},{other}),{size},max(1,floor((2*{side}*{size}+{other})/(2*{other}))))'"


def shrink_filter(roi: tuple[int, int, int, int] | None, size: int, color: str) -> str:
    """The ffmpeg video filter that crops ``roi`` (x, y, w, h) and area-averages the picture to its
    size in model pixels (:func:`.preprocess.square_geometry`: the long side ``size``).

    The sizes are ffmpeg expressions of the cropped frame's sides, so the filter is known before
    the frame size is. ``exact=1`` crops at odd offsets too, instead of rounding to the chroma grid.
    For ``rgb`` the crop is made on full-resolution RGB (rgb24, as the frame-by-frame decode):
    chroma stored at half resolution cannot be cut at an odd offset. Grey is luma, which is stored
    at full resolution.

    >>> crop, scale = shrink_filter((7, 4, 40, 32), 16, "rgb").split(",scale=")
    >>> crop
    'format=rgb24,crop=40:32:7:4:exact=1'
    >>> scale.split(":")[0]         # the width: 16 when the picture is at least as wide as high
    "w='if(gte(iw,ih),16,max(1,floor((2*iw*16+ih)/(2*ih))))'"
    """
    crop = ""
    if roi:
        crop = ("format=rgb24," if color == "rgb" else "") + "crop={2}:{3}:{0}:{1}:exact=1,".format(*roi)
    return (f"{crop}scale=w={_side_expr('iw', 'ih', size)}:h={_side_expr('ih', 'iw', size)}"
            f":flags={SHRINK_FLAGS}")


def _start_shrinking(pool: ThreadPoolExecutor, path: Path, cfg: DataConfig | None) -> Future | None:
    """Start the shrinking ffmpeg in ``pool``; None without data settings, or when ``data.roi`` is
    not even four whole numbers (the frame-by-frame path reports that)."""
    if cfg is None:
        return None
    try:
        roi = roi_numbers(cfg.roi, str(path))
    except (KinecastError, ValueError, OverflowError):
        return None
    pix_fmt, channels = SHRINK_PIX_FMT[cfg.color]
    return pool.submit(_start, path, pix_fmt, 16 * channels, shrink_filter(roi, cfg.size, cfg.color))


def _result(pending: Future | None) -> Started | None:
    """The shrinking ffmpeg's facts and frames, or None when it was not started or failed to."""
    if pending is None:
        return None
    try:
        return pending.result()
    except Exception:  # a file the plain ffmpeg reads but the shrinking one does not: read it plainly
        return None


def _close(started: Started | None) -> None:
    """Stop an ffmpeg whose frames are not wanted."""
    if started is not None:
        started[1].close()


def _usable(started: Started, cfg: DataConfig, width: int, height: int) -> bool:
    """Whether the shrunk frames may stand for decoded frames of ``width`` x ``height``.

    ``data.roi`` must fit those; the picture must shrink (or keep its size) both ways on its way to
    model pixels: OpenCV's area resize turns bilinear for an enlargement, so that is left to it; and
    ffmpeg's frames must be the picture's size in model pixels.
    """
    try:
        region = check_roi(cfg.roi, width, height, "") or (0, 0, width, height)
    except (KinecastError, ValueError, OverflowError):
        return False
    geo = square_geometry(region[2], region[3], cfg.size)
    shrinks = geo.content_w <= region[2] and geo.content_h <= region[3]
    return shrinks and tuple(started[0]["size"]) == (geo.content_w, geo.content_h)


def open_ffmpeg(path: Path, cfg: DataConfig | None = None) -> Opened:
    """Start ffmpeg on ``path``; return its facts and an iterator of frames.

    Without ``cfg``: (H, W, 3) uint8 RGB frames at the source size. With ``cfg``, when the region
    fits and shrinks: frames already cropped, converted and area-averaged by ffmpeg to the picture's
    size in model pixels, (h, w) grey or (h, w, 3) RGB uint16 (``size`` square for a square
    picture; :meth:`FrameSink.add_shrunk` pads them), and ``facts["shrunk_from"]`` describes the decoded frame
    they came from, for :meth:`FrameSink.add_shrunk`.
    """
    with _quiet_imageio_ffmpeg(), ThreadPoolExecutor(max_workers=1) as pool:
        pending = _start_shrinking(pool, path, cfg)          # both ffmpeg start at the same time
        try:
            meta, gen = _start(path, "rgb24", 24)
        except RuntimeError:
            _close(_result(pending))
            raise
        shrunk = _result(pending)
    width, height = meta["size"]
    fps = float(meta.get("fps") or 0.0)
    facts = {"decoder": "ffmpeg", "source_rate": fps if fps > 0 and math.isfinite(fps) else None,
             "expected": int(round(fps * float(meta.get("duration") or 0.0))) or None,
             "codec": str(meta.get("codec", "")).strip(","),
             "grey_source": str(meta.get("pix_fmt", "")).startswith("gray")}
    if shrunk is None or not _usable(shrunk, cfg, width, height):
        _close(shrunk)
        return facts, _arrays(gen, (height, width, 3), np.dtype(np.uint8))
    threading.Thread(target=gen.close).start()      # the plain ffmpeg stops while frames arrive
    (w, h), channels = shrunk[0]["size"], SHRINK_PIX_FMT[cfg.color][1]
    facts["shrunk_from"] = SampleFormat(width, height, _DECODED_CHANNELS, _DECODED_DTYPE, _DECODED_BITS)
    return facts, _arrays(shrunk[1], (h, w) if channels == 1 else (h, w, channels), _LE16)


def open_opencv(path: Path, cfg: DataConfig | None = None) -> Opened:
    """Open ``path`` with OpenCV; return its facts and an iterator of RGB frames at the source size
    (``cfg`` is not used: the sink shrinks these frames)."""
    os.environ.setdefault(_OPENCV_FFMPEG_LOG, _FFMPEG_QUIET)    # a user's own setting wins
    with quiet_opencv():
        cap = cv2.VideoCapture(str(path))
    if not cap.isOpened():
        cap.release()
        raise RuntimeError("OpenCV cannot open it")
    fps = float(cap.get(cv2.CAP_PROP_FPS) or 0.0)
    count = float(cap.get(cv2.CAP_PROP_FRAME_COUNT) or 0.0)
    facts = {"decoder": "opencv", "source_rate": fps if fps > 0 and math.isfinite(fps) else None,
             "expected": int(count) if count > 0 and math.isfinite(count) else None,
             "codec": "", "grey_source": False}

    def frames() -> Iterator[np.ndarray]:
        try:
            while True:
                with quiet_opencv():
                    ok, frame = cap.read()
                if not ok or frame is None:
                    return
                if frame.ndim == 3 and frame.shape[2] == 3:
                    frame = frame[..., ::-1]
                yield frame
        finally:
            cap.release()

    return facts, frames()


# Every opener takes (path, data settings or None).
DECODERS: tuple[tuple[str, Callable[[Path, DataConfig | None], Opened]], ...] = (
    ("ffmpeg", open_ffmpeg), ("opencv", open_opencv))


def decode_video(path: Path, sink: FrameSink) -> dict:
    """Feed every frame of a video to ``sink`` (trying each decoder in turn); return its facts.

    Raises
    ------
    KinecastError
        When no decoder can read the file, or the video holds no frames.
    """
    path = path.resolve()        # absolute: a name starting with '-' is never read as an option
    failures, opened, partial = [], False, False
    for name, opener in DECODERS:
        frames = None
        try:
            facts, frames = opener(path, sink.cfg)
            opened = True
            sink.restart(total=facts.pop("expected"))
            source = facts.pop("shrunk_from", None)
            for i, raw in enumerate(frames):
                if source is None:
                    sink.add(raw, str(i), f"{path} (frame {i})")
                else:
                    sink.add_shrunk(raw, source, str(i), f"{path} (frame {i})")
        except KinecastError:
            raise
        except Exception as exc:  # a decoder failing on bad bytes: try the next one
            partial = partial or bool(sink.frames)
            failures.append(f"{name}: {one_line(exc)}" + (f" after {len(sink.frames)} frames"
                                                          if sink.frames else ""))
            sink.restart()
            continue
        finally:
            if frames is not None:
                frames.close()
        if sink.frames:
            grey = facts.pop("grey_source")
            return {"kind": "video", "formats": [path.suffix.lstrip(".").lower()], **facts,
                    **({"source_channels": 1} if grey else {})}
        failures.append(f"{name}: no frames")
    reasons = "; ".join(failures)
    if opened and not partial:
        raise KinecastError(path, f"video has no frames ({reasons})")
    raise KinecastError(path, f"cannot decode the video ({reasons})")
