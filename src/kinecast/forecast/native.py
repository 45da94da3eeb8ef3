"""A filled recording at the recording's own frame size, bit depth and colour.

The model predicts the dropped frames at its own resolution (``data.size``, grey or RGB, floats in
[0, 1]). :func:`write_filled` writes a complete recording from them:

* the recorded frames exactly as they are: for a frame folder, the same files under their own names
  (hard links where the file system allows, else copies); for a TIFF stack or a video, every frame
  decoded and written losslessly as one image per slot (``frame_0000.tif`` / ``frame_0000.png``);
* a new frame in each missing slot only, at the source's size, sample type and channels: the
  picture part of the prediction (the padding that made a non-square picture square cut away,
  :func:`kinecast.frames.preprocess.square_geometry`) is resized (``cv2.INTER_CUBIC`` to enlarge,
  ``cv2.INTER_AREA`` to shrink), clipped to [0, 1] and scaled to the sample type's full range (255
  for 8-bit, 65535 for 16-bit);
* ``timestamps.csv`` (every slot's name and time) and ``filled.csv`` (which frames are predicted).

How colour is made when the model and the frames differ (:data:`COLOUR_FROM_GREY`): a grey model's
prediction is turned into a change over the background, the per-pixel median of
:data:`BACKGROUND_SAMPLES` recorded frames at model size; that change, resized, is added equally to
R, G and B of the same frames' colour median at full size. An RGB model's prediction on grey frames
is reduced to its BT.601 luma. Outside ``data.roi`` (when the run crops one) a filled frame shows
the full-size median.

Filled frames are statistical extrapolations from the model, not measurements.
"""

from __future__ import annotations

import io
import os
import re
import shutil
from dataclasses import dataclass, field
from pathlib import Path

import cv2
import numpy as np
import tifffile

from ..errors import KinecastError
from ..fileio import write_bytes, write_text, write_with
from ..frames import Recording
from ..frames.images import IMAGE_SUFFIXES, natural_key, read_image
from ..frames.preprocess import UNSIGNED_SCALE, BT601_LUMA, sample_format, square_geometry, to_unit
from ..frames.tiffstack import decode_stack
from ..frames.video import decode_video
from .core import gaps

# Recorded frames whose per-pixel median is the background (evenly spaced over the recording). An
# odd count, so every median is a recorded value; a handful of frames spread over the motion keeps
# a moving object out of the median (common practice for a static camera), and only these few
# full-size frames are held in memory at once.
BACKGROUND_SAMPLES = 15
# Zero-padded digits of the slot index in frame names written for a TIFF stack or a video (more
# when the recording has more slots), as ``kinecast rig`` names its frames.
SLOT_DIGITS = 4
# The tag in a missing slot's name when the folder's numbering leaves no number for it:
# ``<previous frame>_fill<j>``.
FILL_TAG = "_fill"
# Extension of the frames written per slot for each kind of source (lossless for its samples:
# TIFF keeps any sample type, incl. floats; a decoded video frame is 8-bit RGB).
SLOT_SUFFIX = {"tiff": ".tif", "video": ".png"}
ORIGIN_RECORDED, ORIGIN_PREDICTED = "recorded", "predicted"
COLOUR_FROM_GREY = ("each filled frame is the colour background (per-pixel median of {n} recorded "
                    "frames) plus the model's predicted change in grey level over that median, "
                    "added equally to R, G and B")
LUMA_FROM_RGB = "each filled frame is the BT.601 luma of the model's RGB prediction"

_DIGIT_RUNS = re.compile(r"(\d+)")


@dataclass(frozen=True)
class NativeFormat:
    """The recorded frames' own layout: what a filled frame must match."""

    width: int
    height: int
    channels: int          # 1 (grey) or 3 (colour), alpha not counted
    dtype: np.dtype        # uint8, uint16, bool, float32, ...
    alpha: bool            # the frames carry an alpha channel (filled frames get an opaque one)

    @classmethod
    def of(cls, raw: np.ndarray, where: str) -> "NativeFormat":
        fmt = sample_format(raw, where)
        alpha = raw.ndim == 3 and raw.shape[2] == 4
        return cls(fmt.width, fmt.height, fmt.channels, raw.dtype, alpha)

    def describe(self) -> str:
        """``1024x768 16-bit RGB`` and the like."""
        if self.dtype.kind == "f":
            depth = f"float{self.dtype.itemsize * 8}"
        else:
            depth = f"{UNSIGNED_SCALE[self.dtype][0]}-bit"
        colour = "RGBA" if self.alpha else ("RGB" if self.channels == 3 else "grey")
        return f"{self.width}x{self.height} {depth} {colour}"


@dataclass
class Background:
    """Per-pixel medians of the same recorded frames at full size and at model size."""

    native: np.ndarray     # (H, W) or (H, W, 3) float32 in [0, 1]
    model: np.ndarray      # (C, h, w) float32 in [0, 1]
    count: int


@dataclass
class FilledRecording:
    """What :func:`write_filled` wrote."""

    out: Path
    names: list[str]
    fmt: NativeFormat
    linked: int = 0        # recorded frames written as hard links to the originals
    copied: int = 0        # recorded frames copied byte for byte
    decoded: int = 0       # recorded frames decoded from a stack or video and written losslessly
    notes: list[str] = field(default_factory=list)


# --- samples ------------------------------------------------------------------------------------

def from_unit(unit: np.ndarray, dtype: np.dtype) -> np.ndarray:
    """Intensities in [0, 1] as samples of ``dtype``: full scale 255 (8-bit), 65535 (16-bit), 1 (bool);
    floats stay in [0, 1]. The inverse of the reader's normalisation."""
    unit = np.clip(unit, 0.0, 1.0)
    dtype = np.dtype(dtype)
    if dtype == np.bool_:
        return unit >= 0.5
    if dtype in UNSIGNED_SCALE:
        return np.rint(unit * UNSIGNED_SCALE[dtype][1]).astype(dtype)
    return unit.astype(dtype)


def resize_unit(img: np.ndarray, width: int, height: int) -> np.ndarray:
    """Resize an (h, w) or (h, w, 3) float image: bicubic to enlarge, area averaging to shrink.

    Not clipped: the caller clips (bicubic overshoots at edges; a signed change must stay signed).
    """
    img = np.ascontiguousarray(img, dtype=np.float32)
    if (img.shape[1], img.shape[0]) == (width, height):
        return img
    enlarge = width > img.shape[1] or height > img.shape[0]
    return cv2.resize(img, (width, height), interpolation=cv2.INTER_CUBIC if enlarge else cv2.INTER_AREA)


def needs_background(model_channels: int, fmt: NativeFormat, roi: list) -> bool:
    return bool(roi) or (model_channels == 1 and fmt.channels == 3)


def native_frame(pred: np.ndarray, fmt: NativeFormat, roi: list, bg: Background | None) -> np.ndarray:
    """One model-size prediction ``(C, h, w)`` as a frame in the recording's own format.

    Returns (H, W), (H, W, 3) or (H, W, 4) samples of ``fmt.dtype``.
    """
    x, y, w, h = roi or (0, 0, fmt.width, fmt.height)
    geo = square_geometry(w, h, pred.shape[-1])
    pred = geo.crop(pred)                                   # the padded band is not the recording's
    if pred.shape[0] == 3 and fmt.channels == 1:
        pred = np.tensordot(BT601_LUMA, pred, axes=1)[None]
    if pred.shape[0] == 1 and fmt.channels == 3:          # colour from grey: change over background
        change = resize_unit(pred[0] - geo.crop(bg.model[0]), w, h)
        region = bg.native[y:y + h, x:x + w] + change[..., None]
    else:
        region = resize_unit(pred[0] if fmt.channels == 1 else np.transpose(pred, (1, 2, 0)), w, h)
    if roi:
        frame = bg.native.copy()
        frame[y:y + h, x:x + w] = region
    else:
        frame = region
    samples = from_unit(frame, fmt.dtype)
    if fmt.alpha:
        opaque = from_unit(np.ones(samples.shape[:2] + (1,), np.float32), fmt.dtype)
        samples = np.concatenate([samples, opaque], axis=2)
    return samples


def background(raws: list[np.ndarray], model_frames: np.ndarray, fmt: NativeFormat) -> Background:
    """Per-pixel medians of recorded frames at full size (``raws``) and model size (``model_frames``)."""
    units = np.stack([to_unit(r, sample_format(r, "background"), "background") for r in raws])
    return Background(np.median(units, axis=0).astype(np.float32),
                      np.median(model_frames, axis=0).astype(np.float32), len(raws))


def sample_slots(rec: Recording, n: int = BACKGROUND_SAMPLES) -> list[int]:
    """Up to ``n`` recorded slots spread evenly over the recording."""
    recorded = np.flatnonzero(~rec.missing)
    picks = np.unique(np.linspace(0, len(recorded) - 1, min(n, len(recorded))).round().astype(int))
    return [int(recorded[i]) for i in picks]


# --- files --------------------------------------------------------------------------------------

def encode_image(samples: np.ndarray, suffix: str, where: Path) -> bytes:
    """Image file bytes for (H, W), (H, W, 3) or (H, W, 4) RGB(A) samples, by extension."""
    if suffix.lower() in (".tif", ".tiff"):
        buf = io.BytesIO()
        tifffile.imwrite(buf, samples, photometric="rgb" if samples.ndim == 3 else "minisblack")
        return buf.getvalue()
    img = samples
    if img.ndim == 3:
        img = cv2.cvtColor(img, cv2.COLOR_RGBA2BGRA if img.shape[2] == 4 else cv2.COLOR_RGB2BGR)
    try:
        ok, buf = cv2.imencode(suffix, img)
    except cv2.error:
        ok = False
    if not ok:
        raise KinecastError(where, f"cannot write {samples.dtype.name} samples as {suffix} (OpenCV)")
    return buf.tobytes()


def link_or_copy(src: Path, dst: Path) -> bool:
    """Put ``src``'s exact bytes at ``dst``: a hard link where the file system allows, else a copy.

    Both go through a temporary name and a rename, so ``dst`` is never half-written. Returns True
    for a link.
    """
    tmp = dst.with_name(f".{dst.name}.{os.getpid()}.link.tmp")
    try:
        if os.path.lexists(tmp):
            tmp.unlink()
        os.link(src, tmp)
    except OSError:                       # another file system, no link support, not permitted
        write_with(dst, lambda t: shutil.copy2(src, t))
        return False
    try:
        os.replace(tmp, dst)
    except OSError as exc:
        raise KinecastError(dst, f"cannot write here ({exc.strerror or exc})") from None
    finally:
        if os.path.lexists(tmp):          # rename onto a link of the same file does nothing (POSIX)
            tmp.unlink()
    return True


def _gap_names(before: str, after: str, k: int) -> list[str]:
    """Names for ``k`` missing frames between two recorded ones, in the folder's own numbering.

    The number that differs between the two names counts the frames: ``frame_0007.png`` and
    ``frame_0010.png`` with two missing give ``frame_0008.png`` and ``frame_0009.png``; numbers
    spread evenly when the numbering steps by more than one. When the names differ otherwise, or
    leave no free number between them, the missing frames are ``<before>_fill1.png`` ...
    """
    stem_b, suffix = os.path.splitext(before)
    stem_a, suffix_a = os.path.splitext(after)
    parts_b, parts_a = _DIGIT_RUNS.split(stem_b), _DIGIT_RUNS.split(stem_a)
    differ = [i for i, (p, q) in enumerate(zip(parts_b, parts_a)) if p != q]
    # split() puts the digit runs at odd positions
    if suffix == suffix_a and len(parts_b) == len(parts_a) and len(differ) == 1 and differ[0] % 2:
        i = differ[0]
        lo, hi = int(parts_b[i]), int(parts_a[i])
        if hi - lo > k:
            step = (hi - lo) / (k + 1)
            return ["".join(parts_b[:i]) + f"{lo + round(j * step):0{len(parts_b[i])}d}"
                    + "".join(parts_b[i + 1:]) + suffix for j in range(1, k + 1)]
    return [f"{stem_b}{FILL_TAG}{j}{suffix}" for j in range(1, k + 1)]


def folder_slot_names(rec: Recording) -> list[str]:
    """Every slot's file name: recorded frames keep theirs, missing ones follow the folder's pattern.

    Raises
    ------
    KinecastError
        When the names cannot be made to sort in time order (a folder's frames are read in natural
        order, so the filled folder would not read back as the same recording).
    """
    names = list(rec.info["names"])
    for a, b in gaps(rec.missing):
        names[a:b] = _gap_names(names[a - 1], names[b], b - a)
    unique = len({n.casefold() for n in names}) == len(names)
    if not unique or sorted(names, key=natural_key) != names:
        raise KinecastError(rec.source, "cannot name the missing frames so that they sort between "
                                        "their neighbours; rename the frames to one numbered pattern "
                                        "such as frame_0001.png")
    return names


def slot_names(rec: Recording) -> list[str]:
    """Output file name of every slot."""
    kind = rec.info.get("kind")
    if kind == "folder":
        return folder_slot_names(rec)
    digits = max(SLOT_DIGITS, len(str(rec.n_frames - 1)))
    return [f"frame_{i:0{digits}d}{SLOT_SUFFIX[kind]}" for i in range(rec.n_frames)]


class _SlotWriter:
    """A frame sink (the readers' interface) that writes each decoded stack page or video frame to
    its slot's file, keeping the few frames the background needs."""

    cfg = None     # the readers' data settings: none, so a video decodes at its own size

    def __init__(self, rec: Recording, out: Path, names: list[str], keep: set[int]):
        self.out, self.names, self.keep = out, names, keep
        self.slot_of = {n: i for i, n in enumerate(rec.info["names"]) if not rec.missing[i]}
        self.grey = rec.info.get("source_channels") == 1
        self.fmt: NativeFormat | None = None
        self.kept: dict[int, np.ndarray] = {}
        self.restart()

    def restart(self, total: int | None = None) -> None:
        self.frames: list[str] = []

    def add(self, raw: np.ndarray, name: str, where: str) -> None:
        if self.grey and raw.ndim == 3 and raw.shape[2] == 3:       # a grey video decodes as RGB
            raw = np.ascontiguousarray(raw[..., 0])
        if name not in self.slot_of:
            raise KinecastError(where, "the source changed while it was read (an extra frame)")
        slot = self.slot_of[name]
        if self.fmt is None:
            self.fmt = NativeFormat.of(raw, where)
        target = self.out / self.names[slot]
        write_bytes(target, encode_image(raw, target.suffix, target))
        if slot in self.keep:
            self.kept[slot] = raw
        self.frames.append(name)


def _write_recorded(rec: Recording, source: Path, out: Path, names: list[str],
                    keep: set[int]) -> tuple[NativeFormat, dict, FilledRecording]:
    """Write the recorded frames; return their format, the kept frames and the counts."""
    kind = rec.info.get("kind")
    if kind == "folder":
        first = names[int(np.flatnonzero(~rec.missing)[0])]
        fmt = NativeFormat.of(read_image(source / first), str(source / first))
        result = FilledRecording(out, names, fmt)
        for i in np.flatnonzero(~rec.missing):
            if link_or_copy(source / names[i], out / names[i]):
                result.linked += 1
            else:
                result.copied += 1
        return fmt, {i: read_image(source / names[i]) for i in sorted(keep)}, result
    sink = _SlotWriter(rec, out, names, keep)
    (decode_stack if kind == "tiff" else decode_video)(source, sink)
    if len(sink.frames) != int((~rec.missing).sum()):
        raise KinecastError(source, f"the source changed while it was read ({len(sink.frames)} frames "
                                    f"now, {int((~rec.missing).sum())} before)")
    result = FilledRecording(out, names, sink.fmt, decoded=len(sink.frames))
    what = "TIFF stack" if kind == "tiff" else "video"
    result.notes.append(f"{what}: every frame written as one image per slot ({names[0]}, ...); "
                        f"recorded frames pixel for pixel as decoded")
    return sink.fmt, sink.kept, result


def _remove_stale(out: Path, keep: set[str]) -> None:
    """Image files of an earlier output that this one did not write (they would be read as frames)."""
    for path in out.iterdir():
        if (path.suffix.lower() in IMAGE_SUFFIXES and path.is_file() and path.name not in keep
                and not path.name.startswith(".")):
            path.unlink()


def write_filled(rec: Recording, source: str | Path, frames: np.ndarray, filled: np.ndarray,
                 out: str | Path, overwrite: bool = False) -> FilledRecording:
    """Write a complete recording: the recorded frames as they are, predictions in the missing slots.

    Parameters
    ----------
    rec : Recording
        The recording as read (its ``info`` names the source's kind and every slot's frame).
    source : str or Path
        The folder, TIFF stack or video ``rec`` was read from.
    frames : ndarray (T, C, h, w)
        Model-size frames of every slot (from :func:`kinecast.forecast.core.fill`); only the slots
        flagged in ``filled`` are used.
    filled : ndarray (T,) bool
        The predicted slots (the recording's missing ones).
    out : str or Path
        Output folder (created; it must not be inside the source).
    overwrite : bool
        Replace files of an earlier output; image files there that this output does not write are
        removed, so the folder reads back as this recording only.

    Returns
    -------
    FilledRecording
        Names, the recorded frames' format, how they were written, and notes on colour and cropping.
    """
    source, out = Path(source).expanduser(), Path(out)
    names = slot_names(rec)
    model_channels = frames.shape[1]
    roi = list(rec.info.get("roi") or [])
    colour_from_grey = model_channels == 1 and rec.info.get("source_channels") == 3
    keep = set(sample_slots(rec)) if roi or colour_from_grey else set()
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise KinecastError(out, f"cannot write here ({exc.strerror or exc})") from None
    fmt, kept, result = _write_recorded(rec, source, out, names, keep)
    bg = None
    if needs_background(model_channels, fmt, roi):
        slots = sorted(kept)
        bg = background([kept[s] for s in slots], rec.frames[slots], fmt)
        if model_channels == 1 and fmt.channels == 3:
            result.notes.append("colour: the model is grey and the frames are colour: "
                                + COLOUR_FROM_GREY.format(n=bg.count))
        if roi:
            result.notes.append(f"outside data.roi {roi} the filled frames show the per-pixel median "
                                f"of {bg.count} recorded frames")
    if model_channels == 3 and fmt.channels == 1:
        result.notes.append("colour: the model is RGB and the frames are grey: " + LUMA_FROM_RGB)
    for i in np.flatnonzero(filled):
        target = out / names[i]
        write_bytes(target, encode_image(native_frame(frames[i], fmt, roi, bg), target.suffix, target))
    write_text(out / "timestamps.csv", "frame,time_s\n" + "".join(
        f"{n},{float(t)!r}\n" for n, t in zip(names, rec.times)))
    write_text(out / "filled.csv", "frame,time_s,origin\n" + "".join(
        f"{n},{float(t)!r},{ORIGIN_PREDICTED if f else ORIGIN_RECORDED}\n"
        for n, t, f in zip(names, rec.times, filled)))
    if overwrite:
        _remove_stale(out, set(names))
    return result
