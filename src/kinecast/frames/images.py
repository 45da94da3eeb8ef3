"""A folder of still images as a recording: one PNG, JPEG, BMP or TIFF file per frame.

Files are taken in natural order (``frame_2`` before ``frame_10``). Other files in the folder (a
timestamps CSV, notes, a rig description), hidden files and sub-folders are ignored.
"""

from __future__ import annotations

import re
from pathlib import Path

import cv2
import numpy as np

from ..errors import KinecastError
from .boundary import quiet_opencv
from .preprocess import FrameSink
from .tiffstack import read_single_page

IMAGE_SUFFIXES = (".png", ".jpg", ".jpeg", ".bmp", ".tif", ".tiff")
_FORMAT_NAMES = {".png": "PNG", ".jpg": "JPEG", ".jpeg": "JPEG", ".bmp": "BMP", ".tif": "TIFF",
                 ".tiff": "TIFF"}
_DIGITS = re.compile(r"(\d+)")


def natural_key(name: str) -> tuple:
    """Sort key that orders runs of digits by value: ``frame_2`` before ``frame_10``.

    Ties (``a01`` and ``a1``) fall back to the plain name so the order is total.

    Examples
    --------
    >>> sorted(["f10.png", "f2.png", "f1.png"], key=natural_key)
    ['f1.png', 'f2.png', 'f10.png']
    """
    parts = tuple((0, int(p), "") if p.isdigit() else (1, 0, p.casefold())
                  for p in _DIGITS.split(name) if p)
    return parts, name


def expand_trials(path: str | Path) -> list[Path]:
    """The recordings at ``path``: its trial folders when it is a folder of trials, else ``[path]``.

    A folder that holds no image files itself but has sub-folders that do stands for those
    sub-folders, in natural order (the rule ``kinecast fit`` follows for a rendered rig).
    """
    p = Path(path)
    if p.is_dir() and not any(f.suffix.lower() in IMAGE_SUFFIXES for f in p.iterdir() if f.is_file()):
        subs = sorted((d for d in p.iterdir() if d.is_dir()
                       and any(f.suffix.lower() in IMAGE_SUFFIXES for f in d.iterdir())),
                      key=lambda d: natural_key(d.name))
        if subs:
            return subs
    return [p]


def format_name(path: Path) -> str:
    """``PNG``, ``JPEG``, ``BMP`` or ``TIFF`` for an image file name."""
    return _FORMAT_NAMES.get(path.suffix.lower(), path.suffix.lstrip(".").upper())


def list_images(folder: Path) -> list[Path]:
    """The image files of ``folder`` in natural order; raise if there are none."""
    try:
        entries = list(folder.iterdir())
    except OSError as exc:
        raise KinecastError(folder, f"cannot list the folder ({exc.strerror or exc})") from None
    files = [p for p in entries if p.suffix.lower() in IMAGE_SUFFIXES and not p.name.startswith(".")
             and p.is_file()]
    if not files:
        raise KinecastError(folder, "no image files (PNG, JPEG, BMP or TIFF) in this folder; "
                                    "sub-folders are not searched")
    return sorted(files, key=lambda p: natural_key(p.name))


def _read_bytes(path: Path) -> bytes:
    try:
        data = path.read_bytes()
    except OSError as exc:
        raise KinecastError(path, f"cannot read the file ({exc.strerror or exc})") from None
    if not data:
        raise KinecastError(path, "file is empty (0 bytes)")
    return data


def read_image(path: Path) -> np.ndarray:
    """Decode one still image as (H, W) grey or (H, W, 3|4) RGB(A), in its own sample type.

    Raises
    ------
    KinecastError
        When the file is empty, damaged, truncated, or not an image at all.
    """
    kind = format_name(path)
    if kind == "TIFF":
        return read_single_page(path)
    data = _read_bytes(path)
    try:
        with quiet_opencv():
            img = cv2.imdecode(np.frombuffer(data, np.uint8), cv2.IMREAD_UNCHANGED)
    except cv2.error:
        img = None
    if img is None or img.size == 0:
        raise KinecastError(path, f"not a readable {kind} image (damaged, truncated, or not an image)")
    if img.ndim == 3 and img.shape[2] == 3:
        img = img[..., ::-1]                   # OpenCV decodes to BGR
    elif img.ndim == 3 and img.shape[2] == 4:
        img = img[..., [2, 1, 0, 3]]           # BGRA -> RGBA
    return np.ascontiguousarray(img)


def decode_folder(files: list[Path], sink: FrameSink) -> dict:
    """Feed every image file to ``sink``; return facts about the folder."""
    sink.restart(total=len(files))
    for path in files:
        sink.add(read_image(path), path.name, str(path))
    kinds = sorted({format_name(p) for p in files})
    return {"kind": "folder", "formats": kinds, "decoder": "opencv/tifffile"}
