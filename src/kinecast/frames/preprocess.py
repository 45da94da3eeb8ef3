"""Turn one decoded source frame into a model frame: check, normalise, crop, convert, resize.

Every reader hands its raw frames, one at a time, to a :class:`FrameSink`. The sink checks that all
frames of a recording agree in size, channel layout and sample type, normalises intensities by the
sample type's range, crops the region of interest, converts to grey or RGB, and resizes to the model
size. Only the small model frames are kept, so a long full-resolution video never sits in memory.
A picture that is not square keeps its aspect ratio: it is shrunk until its long side fills the
model frame, then centred, and its edge pixels are repeated out to the square
(:func:`square_geometry` says where the picture lies; :func:`pad_square` fills the rest).
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


@dataclass(frozen=True)
class SquareGeometry:
    """Where a ``width`` x ``height`` picture lies in a ``size`` x ``size`` model frame.

    The picture is resized to ``content_w`` x ``content_h`` model pixels (its long side fills the
    frame, its short side keeps the aspect ratio, rounded half up to whole pixels, at least 1) and
    centred; ``left`` and ``top`` are the model pixels before it (the odd pixel, if any, goes
    right or below). A square picture fills the frame: no padding.
    """

    width: int             # the picture (the crop ``data.roi``, or the whole frame) in source pixels
    height: int
    size: int              # the model frame's side
    content_w: int         # the picture in model pixels
    content_h: int
    left: int              # model pixels before the picture
    top: int

    @property
    def right(self) -> int:
        """Model pixels after the picture, left to right."""
        return self.size - self.left - self.content_w

    @property
    def bottom(self) -> int:
        """Model pixels below the picture."""
        return self.size - self.top - self.content_h

    @property
    def padded(self) -> bool:
        return self.content_w != self.size or self.content_h != self.size

    @property
    def step(self) -> np.ndarray:
        """Source pixels per model pixel, ``[w/cw, h/ch]`` (along x, along y)."""
        return np.array([self.width / self.content_w, self.height / self.content_h])

    def crop(self, frame: np.ndarray) -> np.ndarray:
        """The picture's part of a model-size frame ``(..., size, size)``: the padding cut away."""
        return frame[..., self.top:self.top + self.content_h, self.left:self.left + self.content_w]

    def describe(self) -> str:
        """One line on what happens to the frame geometry (for ``kinecast inspect``).

        The padding is described in source pixels, as if the frame were padded before shrinking;
        it is made at model size (the same picture, its edge pixels repeated after shrinking).
        """
        w, h, n = self.width, self.height, self.size
        if not self.padded:
            return f"frames {w}x{h} → {n}x{n} model frames (square: no padding)"
        long = max(w, h)
        if w >= h:
            first = (long - h) // 2
            band, axis = f"rows {first}-{first + h - 1}", "above and below"
            model = f"rows {self.top}-{self.top + self.content_h - 1}"
        else:
            first = (long - w) // 2
            band, axis = f"columns {first}-{first + w - 1}", "left and right"
            model = f"columns {self.left}-{self.left + self.content_w - 1}"
        return (f"frames {w}x{h} → padded to {long}x{long} ({band} hold the picture; edge pixels "
                f"repeated {axis}) → {n}x{n} model frames; picture {self.content_w}x{self.content_h} "
                f"at {model}")


def short_side(short: int, long: int, size: int) -> int:
    """The short side in model pixels when the long side becomes ``size``: ``short·size/long``
    rounded half up, at least 1. The video reader's ffmpeg filter writes the same rule."""
    return max(1, (2 * short * size + long) // (2 * long))


def square_geometry(width: int, height: int, size: int) -> SquareGeometry:
    """How a ``width`` x ``height`` picture is placed in a ``size`` x ``size`` model frame.

    >>> g = square_geometry(776, 310, 64)
    >>> (g.content_w, g.content_h, g.left, g.top, g.bottom)
    (64, 26, 0, 19, 19)
    """
    if width >= height:
        cw, ch = size, short_side(height, width, size)
    else:
        cw, ch = short_side(width, height, size), size
    return SquareGeometry(int(width), int(height), int(size), cw, ch, (size - cw) // 2, (size - ch) // 2)


def recording_geometry(info: dict, size: int) -> SquareGeometry | None:
    """The :class:`SquareGeometry` of a recording's picture (its ``roi``, else its ``source_size``,
    from the recording's ``info``); None when ``info`` names no source size."""
    region = info.get("roi") or ([0, 0, *info["source_size"]] if info.get("source_size") else None)
    return square_geometry(int(region[2]), int(region[3]), size) if region else None


def model_to_recording_px(xy: np.ndarray, info: dict, size: int, geo: SquareGeometry | None = None
                          ) -> np.ndarray | None:
    """Positions in model pixels (..., 2) → the recording's own pixels; None when ``info`` names no
    source size. ``geo``: :func:`recording_geometry` ``(info, size)`` when the caller has it already.

    Both in pixel-centre coordinates, x right and y down from the top-left pixel's centre. The model
    frame holds the crop ``roi`` (or the whole source frame), ``w`` x ``h``, resized to ``cw`` x ``ch``
    model pixels and padded by ``left`` and ``top`` (:func:`square_geometry`); model pixel i covers
    source pixels ``x0 + [i − left, i + 1 − left)·w/cw``, so model ``u`` maps to
    ``x0 + (u + 0.5 − left)·w/cw − 0.5``. Positions on the padding map outside the crop.

    >>> edges = np.array([[-0.5, 18.5], [63.5, 44.5]])  # corners of the picture (rows 19-44 of 64)
    >>> model_to_recording_px(edges, {"source_size": [776, 310]}, 64).round(6).tolist()
    [[-0.5, -0.5], [775.5, 309.5]]
    """
    geo = geo if geo is not None else recording_geometry(info, size)
    if geo is None:
        return None
    x0, y0 = (info.get("roi") or [0, 0])[:2]
    shift = np.array([geo.left, geo.top])
    return np.array([x0, y0]) + (np.asarray(xy, dtype=np.float64) + 0.5 - shift) * geo.step - 0.5


def describe_geometry(info: dict, size: int) -> str | None:
    """:meth:`SquareGeometry.describe` for a recording's picture; None when ``info`` names no source size."""
    geo = recording_geometry(info, size)
    return geo.describe() if geo else None


def pad_square(small: np.ndarray, geo: SquareGeometry) -> np.ndarray:
    """A ``content_h`` x ``content_w`` (x channels) picture centred in a square with its edge pixels
    repeated (``cv2.BORDER_REPLICATE``): a fixed camera's static edge, extended, reads as more static
    background. Returned unchanged when the picture is square."""
    if not geo.padded:
        return small
    return cv2.copyMakeBorder(small, geo.top, geo.bottom, geo.left, geo.right, cv2.BORDER_REPLICATE)


def to_model(unit: np.ndarray, roi: tuple[int, int, int, int] | None, size: int, color: str) -> np.ndarray:
    """Crop, convert and resize one normalised frame to (C, size, size) float32.

    Grey uses the BT.601 luma weights; grey sources are repeated to three channels for ``rgb``.
    Resizing uses area averaging (``cv2.INTER_AREA``) to the picture's size in model pixels
    (:func:`square_geometry`); a picture that is not square is then padded to the square by
    :func:`pad_square`. A frame already at that size (the video reader's ffmpeg shrinks it) is
    only padded.
    """
    if roi is not None:
        x, y, w, h = roi
        unit = unit[y:y + h, x:x + w]
    if color == "grey" and unit.ndim == 3:
        unit = unit @ BT601_LUMA
    geo = square_geometry(unit.shape[1], unit.shape[0], size)
    small = cv2.resize(np.ascontiguousarray(unit, dtype=np.float32), (geo.content_w, geo.content_h),
                       interpolation=cv2.INTER_AREA)
    small = pad_square(small, geo)
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
            (h, w) grey or (h, w, 3) RGB unsigned integers (8 or 16 bits per sample), made from a
            source frame by cropping ``data.roi``, converting to ``data.color`` and area averaging
            to the picture's size in model pixels (``content_h`` x ``content_w`` of
            :func:`square_geometry`; ``data.size`` square for a square picture). It is normalised
            by its own sample type's full scale and padded to the square here.
        source : SampleFormat
            The decoded frame it was made from. ``data.roi`` is checked against its size, with the
            same message as :meth:`add`, and :meth:`info` reports it; ``raw_max`` is reported as
            None, since the full-resolution samples never reach the sink.
        name, where : str
            As for :meth:`add`.
        """
        size = self.cfg.size
        if self.fmt is None:
            self.fmt, self.first, self.raw_max = source, name, None
            self.roi = check_roi(self.cfg.roi, source.width, source.height, where)
        region = self.roi or (0, 0, source.width, source.height)
        geo = square_geometry(region[2], region[3], size)
        if small.shape[:2] != (geo.content_h, geo.content_w):
            raise ValueError(f"{where}: expected a {geo.content_w}x{geo.content_h} frame, got shape "
                             f"{small.shape}")
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
            channels = self.cfg.channels
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
