"""Turn one decoded source frame into a model frame: check, normalise, crop, convert, resize.

Every reader hands its raw frames, one at a time, to a :class:`FrameSink`. The sink checks that all
frames of a recording agree in size, channel layout and sample type, normalises intensities by the
sample type's range, crops the region of interest, converts to grey or RGB, and resizes to the model
size. Only the small model frames are kept, so a long full-resolution video never sits in memory.
A decoder that does the crop, conversion and resize itself (ffmpeg, for videos) hands over frames
already at the model size, together with the facts of the source frame they came from.
"""

from __future__ import annotations

from dataclasses import dataclass

import cv2
import numpy as np
from tqdm import tqdm

from ..config import DataConfig
from ..errors import KinecastError

# ITU-R BT.601 luma weights for R, G, B (the standard's Y' equation; common practice for grey).
BT601_LUMA = np.array([0.299, 0.587, 0.114], dtype=np.float32)

# Full-scale value per unsigned sample type: 8-bit /255, 16-bit /65535, 1-bit (bool) /1.
UNSIGNED_SCALE = {np.dtype(np.uint8): (8, 255.0), np.dtype(np.uint16): (16, 65535.0),
                   np.dtype(np.bool_): (1, 1.0)}
# Float frames may stray this far outside [0, 1] from rounding before it counts as out of range.
FLOAT_RANGE_SLACK = 1e-6


@dataclass(frozen=True)
class SampleFormat:
    """What a raw frame is made of: its size, channel layout and sample type."""

    width: int
    height: int
    channels: int          # 1 (grey) or 3 (colour); alpha is dropped
    dtype: str             # numpy name: uint8, uint16, bool, float32, ...
    bit_depth: int         # bits per sample: 1, 8, 16, 32, 64

    @property
    def colour(self) -> str:
        return "grey" if self.channels == 1 else "colour"


def sample_format(raw: np.ndarray, where: str) -> SampleFormat:
    """Describe a raw frame, or raise :class:`KinecastError` if kinecast cannot use it.

    Parameters
    ----------
    raw : ndarray
        (H, W) grey, (H, W, 1|2) grey (+ alpha), or (H, W, 3|4) RGB (+ alpha).
    where : str
        The file (and page or frame) for messages.
    """
    if raw.ndim == 2:
        channels = 1
    elif raw.ndim == 3 and raw.shape[2] in (1, 2, 3, 4):
        channels = 1 if raw.shape[2] <= 2 else 3
    else:
        raise KinecastError(where, f"unexpected image shape {tuple(raw.shape)}: expected a grey or "
                                   "colour image")
    if raw.shape[0] < 1 or raw.shape[1] < 1:
        raise KinecastError(where, "image has no pixels")
    dt = raw.dtype
    if dt in UNSIGNED_SCALE:
        bits = UNSIGNED_SCALE[dt][0]
    elif dt.kind == "f":
        bits = dt.itemsize * 8
    else:
        raise KinecastError(where, f"sample type {dt.name} is not supported: expected 8- or 16-bit "
                                   "unsigned integers or floats in [0, 1]")
    return SampleFormat(int(raw.shape[1]), int(raw.shape[0]), channels, dt.name, bits)


def to_unit(raw: np.ndarray, fmt: SampleFormat, where: str) -> np.ndarray:
    """Intensities as float32 in [0, 1], alpha dropped, shape (H, W) or (H, W, 3)."""
    if raw.ndim == 3:
        raw = raw[..., 0] if fmt.channels == 1 else raw[..., :3]
    if raw.dtype in UNSIGNED_SCALE:
        return raw.astype(np.float32) / np.float32(UNSIGNED_SCALE[raw.dtype][1])
    unit = raw.astype(np.float32)
    if not np.isfinite(unit).all():
        raise KinecastError(where, "float image holds NaN or infinite values")
    lo, hi = float(unit.min()), float(unit.max())
    if lo < -FLOAT_RANGE_SLACK or hi > 1.0 + FLOAT_RANGE_SLACK:
        raise KinecastError(where, f"float intensities must lie in [0, 1]; found {lo:.4g} to {hi:.4g}")
    return np.clip(unit, 0.0, 1.0)


def roi_numbers(roi: list, where: str) -> tuple[int, int, int, int] | None:
    """``data.roi`` as four whole numbers ``(x, y, w, h)`` (None when empty), not yet checked
    against a frame size."""
    if not roi:
        return None
    if len(roi) != 4 or any(float(v) != int(v) for v in roi):
        raise KinecastError(where, f"data.roi {roi} must be four whole numbers [x, y, width, height]")
    x, y, w, h = (int(v) for v in roi)
    return x, y, w, h


def check_roi(roi: list, width: int, height: int, where: str) -> tuple[int, int, int, int] | None:
    """The region of interest ``(x, y, w, h)`` in source pixels, checked against the frame size."""
    numbers = roi_numbers(roi, where)
    if numbers is None:
        return None
    x, y, w, h = numbers
    if w < 1 or h < 1 or x < 0 or y < 0 or x + w > width or y + h > height:
        raise KinecastError(where, f"data.roi {[x, y, w, h]} lies outside the {width}x{height} frame")
    return x, y, w, h


def to_model(unit: np.ndarray, roi: tuple[int, int, int, int] | None, size: int, color: str) -> np.ndarray:
    """Crop, convert and resize one normalised frame to (C, size, size) float32.

    Grey uses the BT.601 luma weights; grey sources are repeated to three channels for ``rgb``.
    Resizing uses area averaging (``cv2.INTER_AREA``).
    """
    if roi is not None:
        x, y, w, h = roi
        unit = unit[y:y + h, x:x + w]
    if color == "grey" and unit.ndim == 3:
        unit = unit @ BT601_LUMA
    small = cv2.resize(np.ascontiguousarray(unit, dtype=np.float32), (size, size),
                       interpolation=cv2.INTER_AREA)
    if small.ndim == 2:
        small = small[None]
        if color == "rgb":
            small = np.repeat(small, 3, axis=0)
    else:
        small = np.transpose(small, (2, 0, 1))
    return np.clip(small, 0.0, 1.0).astype(np.float32, copy=False)


class FrameSink:
    """Collects a recording's frames at model resolution, checking that they agree.

    Readers call :meth:`add` once per decoded frame (and :meth:`restart` before decoding again with
    another decoder); a decoder that shrinks frames itself calls :meth:`add_shrunk` instead.
    :meth:`info` describes the source after the last frame.
    """

    def __init__(self, cfg: DataConfig, label: str):
        self.cfg = cfg
        self.label = label
        self.restart()

    def restart(self, total: int | None = None) -> None:
        """Forget every frame added so far; ``total`` sizes the progress bar when known."""
        self.frames: list[np.ndarray] = []
        self.names: list[str] = []
        self.fmt: SampleFormat | None = None
        self.first = ""
        self.raw_max = 0.0
        self.roi = None
        if getattr(self, "_bar", None) is not None:
            self._bar.close()
        self._bar = tqdm(total=total, desc=f"reading {self.label}", unit="frame", leave=False,
                         disable=None)

    def add(self, raw: np.ndarray, name: str, where: str) -> None:
        """Check, normalise and shrink one raw frame; ``where`` names it in messages."""
        fmt = sample_format(raw, where)
        if self.fmt is None:
            self.fmt, self.first = fmt, name
            self.roi = check_roi(self.cfg.roi, fmt.width, fmt.height, where)
        else:
            self._check_same(fmt, where)
        unit = to_unit(raw, fmt, where)
        if fmt.dtype in ("uint8", "uint16", "bool"):
            self.raw_max = max(self.raw_max, float(raw.max()))
        self.frames.append(to_model(unit, self.roi, self.cfg.size, self.cfg.color))
        self.names.append(name)
        self._bar.update(1)

    def add_shrunk(self, small: np.ndarray, source: SampleFormat, name: str, where: str) -> None:
        """Keep one frame that the decoder itself already cropped, converted and resized.

        Parameters
        ----------
        small : ndarray
            (size, size) grey or (size, size, 3) RGB unsigned integers (8 or 16 bits per sample),
            made from a source frame by cropping ``data.roi``, converting to ``data.color`` and
            area averaging to ``data.size``. It is normalised by its own sample type's full scale.
        source : SampleFormat
            The decoded frame it was made from. ``data.roi`` is checked against its size, with the
            same message as :meth:`add`, and :meth:`info` reports it; ``raw_max`` is reported as
            None, since the full-resolution samples never reach the sink.
        name, where : str
            As for :meth:`add`.
        """
        size = self.cfg.size
        if small.shape[:2] != (size, size):
            raise ValueError(f"{where}: expected a {size}x{size} frame, got shape {small.shape}")
        if self.fmt is None:
            self.fmt, self.first, self.raw_max = source, name, None
            self.roi = check_roi(self.cfg.roi, source.width, source.height, where)
        unit = to_unit(small, sample_format(small, where), where)
        self.frames.append(to_model(unit, None, size, self.cfg.color))
        self.names.append(name)
        self._bar.update(1)

    def _check_same(self, fmt: SampleFormat, where: str) -> None:
        ref = self.fmt
        if (fmt.width, fmt.height) != (ref.width, ref.height):
            raise KinecastError(where, f"frame is {fmt.width}x{fmt.height} but earlier frames are "
                                       f"{ref.width}x{ref.height} (first frame: {self.first})")
        if fmt.channels != ref.channels:
            raise KinecastError(where, f"frame is {fmt.colour} but earlier frames are {ref.colour} "
                                       f"(first frame: {self.first})")
        if fmt.dtype != ref.dtype:
            raise KinecastError(where, f"samples are {fmt.dtype} but earlier frames are {ref.dtype} "
                                       f"(first frame: {self.first})")

    def close(self) -> None:
        if self._bar is not None:
            self._bar.close()
            self._bar = None

    def stacked(self) -> np.ndarray:
        """The frames as one (N, C, size, size) float32 array."""
        self.close()
        if not self.frames:
            channels = 3 if self.cfg.color == "rgb" else 1
            return np.zeros((0, channels, self.cfg.size, self.cfg.size), np.float32)
        return np.stack(self.frames)

    def info(self) -> dict:
        """Facts about the source frames (JSON-friendly)."""
        fmt = self.fmt
        if fmt is None:
            return {}
        return {"bit_depth": fmt.bit_depth, "dtype": fmt.dtype, "source_size": [fmt.width, fmt.height],
                "source_channels": fmt.channels, "raw_max": self.raw_max,
                "roi": list(self.roi) if self.roi else []}
