"""Video files (mp4, avi, mov, mkv): decoded frame by frame, never held at full resolution.

The first choice is the ffmpeg binary that ships with imageio-ffmpeg (frames stream through a pipe,
one at a time); OpenCV's ``VideoCapture`` is the fallback when ffmpeg cannot read the file. The
frame rate comes from the container.
"""

from __future__ import annotations

import math
import os
from pathlib import Path
from typing import Callable, Iterator

import cv2
import numpy as np

from ..errors import KinecastError
from .boundary import one_line, quiet_opencv
from .preprocess import FrameSink

VIDEO_SUFFIXES = (".mp4", ".avi", ".mov", ".mkv")
# OpenCV reads this variable for the log level of its bundled ffmpeg; -8 is ffmpeg's AV_LOG_QUIET.
_OPENCV_FFMPEG_LOG, _FFMPEG_QUIET = "OPENCV_FFMPEG_LOGLEVEL", "-8"

Opened = tuple[dict, Iterator[np.ndarray]]


def _ffmpeg_reason(exc: Exception, path: Path) -> str:
    """The last line ffmpeg wrote, which names the actual problem, without the path in it."""
    lines = [ln.strip() for ln in str(exc).splitlines() if ln.strip()]
    reason = lines[-1] if lines else type(exc).__name__
    return reason.replace(str(path), "").strip(" :") or reason


def open_ffmpeg(path: Path) -> Opened:
    """Start ffmpeg on ``path``; return its facts and an iterator of (H, W, 3) uint8 RGB frames."""
    import imageio_ffmpeg

    gen = imageio_ffmpeg.read_frames(str(path), pix_fmt="rgb24")
    try:
        meta = next(gen)
    except Exception as exc:
        raise RuntimeError(_ffmpeg_reason(exc, path)) from None
    width, height = meta["size"]
    fps = float(meta.get("fps") or 0.0)
    facts = {"decoder": "ffmpeg", "source_rate": fps if fps > 0 and math.isfinite(fps) else None,
             "expected": int(round(fps * float(meta.get("duration") or 0.0))) or None,
             "codec": str(meta.get("codec", "")).strip(","),
             "grey_source": str(meta.get("pix_fmt", "")).startswith("gray")}

    def frames() -> Iterator[np.ndarray]:
        try:
            for buf in gen:
                yield np.frombuffer(buf, np.uint8).reshape(height, width, 3)
        finally:
            gen.close()

    return facts, frames()


def open_opencv(path: Path) -> Opened:
    """Open ``path`` with OpenCV; return its facts and an iterator of RGB frames."""
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


DECODERS: tuple[tuple[str, Callable[[Path], Opened]], ...] = (("ffmpeg", open_ffmpeg),
                                                              ("opencv", open_opencv))


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
            facts, frames = opener(path)
            opened = True
            sink.restart(total=facts.pop("expected"))
            for i, raw in enumerate(frames):
                sink.add(raw, str(i), f"{path} (frame {i})")
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
