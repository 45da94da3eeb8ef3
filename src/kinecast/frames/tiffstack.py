"""TIFF files through tifffile: multi-page stacks (one page per frame) and single-page frames.

tifffile reports some kinds of damage (a broken page chain, a tag pointing past the end of the file)
through its logger instead of raising; those reports become :class:`KinecastError` here, so a
truncated stack is never read as a shorter recording without a word.
"""

from __future__ import annotations

import contextlib
import logging
import re
from pathlib import Path
from typing import Iterator

import numpy as np
import tifffile

from ..errors import KinecastError
from .boundary import one_line
from .preprocess import FrameSink

_PLANAR_SEPARATE = 2          # TIFF 6.0 PlanarConfiguration: 1 = chunky, 2 = planar
_REDUCED_RESOLUTION = 1       # TIFF 6.0 NewSubfileType bit 0: a thumbnail or pyramid level


class _Collect(logging.Handler):
    def __init__(self):
        super().__init__(level=logging.ERROR)
        self.messages: list[str] = []

    def emit(self, record: logging.LogRecord) -> None:
        self.messages.append(record.getMessage())


@contextlib.contextmanager
def _damage_reports() -> Iterator[list[str]]:
    """Collect what tifffile logs at error level (and keep it off the console) while reading."""
    logger = logging.getLogger("tifffile")
    handler, propagate = _Collect(), logger.propagate
    logger.addHandler(handler)
    logger.propagate = False
    try:
        yield handler.messages
    finally:
        logger.removeHandler(handler)
        logger.propagate = propagate


_TIFFFILE_OBJECT = re.compile(r"<tifffile\.[^>]*>\s*")      # "<tifffile.TiffPages @8> " prefixes


def _reason(text: object) -> str:
    return one_line(_TIFFFILE_OBJECT.sub("", str(text)))


def _check_damage(path: Path, reports: list[str]) -> None:
    if reports:
        raise KinecastError(path, f"damaged TIFF ({_reason(reports[0])})")


def _page_array(page) -> np.ndarray:
    arr = page.asarray()
    spp = int(getattr(page, "samplesperpixel", 1) or 1)
    if spp > 1 and int(page.planarconfig) == _PLANAR_SEPARATE and arr.ndim == 3 and arr.shape[0] == spp:
        arr = np.moveaxis(arr, 0, -1)
    return np.ascontiguousarray(arr)


def _frame_pages(tif: tifffile.TiffFile) -> list:
    """Full-resolution pages (thumbnails and pyramid levels skipped)."""
    return [p for p in tif.pages if not (int(getattr(p, "subfiletype", 0) or 0) & _REDUCED_RESOLUTION)]


@contextlib.contextmanager
def _open(path: Path) -> Iterator[tuple[tifffile.TiffFile, list, list[str]]]:
    try:
        size = path.stat().st_size
    except OSError as exc:
        raise KinecastError(path, f"cannot read the file ({exc.strerror or exc})") from None
    if size == 0:
        raise KinecastError(path, "file is empty (0 bytes)")
    with _damage_reports() as reports:
        try:
            tif = tifffile.TiffFile(path)
        except KinecastError:
            raise
        except Exception as exc:  # any library failure on bad bytes becomes one line
            raise KinecastError(path, f"not a readable TIFF ({_reason(exc)})") from None
        try:
            try:
                pages = _frame_pages(tif)
            except Exception as exc:
                raise KinecastError(path, f"damaged TIFF ({_reason(exc)})") from None
            _check_damage(path, reports)
            yield tif, pages, reports
        finally:
            tif.close()


def _read_page(path: Path, page, index: int, reports: list[str]) -> np.ndarray:
    try:
        arr = _page_array(page)
    except Exception as exc:
        raise KinecastError(path, f"damaged TIFF: page {index} cannot be decoded ({_reason(exc)})") \
            from None
    _check_damage(path, reports)
    return arr


def read_single_page(path: Path) -> np.ndarray:
    """The one image of a single-page TIFF (a frame file inside a folder)."""
    with _open(path) as (_tif, pages, reports):
        if len(pages) != 1:
            raise KinecastError(path, f"holds {len(pages)} pages, but a folder of frames needs one "
                                      "image per file (pass the TIFF itself to read it as a stack)")
        return _read_page(path, pages[0], 0, reports)


def decode_stack(path: Path, sink: FrameSink) -> dict:
    """Feed every page of a multi-page TIFF to ``sink``; return facts about the stack."""
    with _open(path) as (_tif, pages, reports):
        if not pages:
            raise KinecastError(path, "TIFF holds no images")
        sink.restart(total=len(pages))
        for i, page in enumerate(pages):
            sink.add(_read_page(path, page, i, reports), str(i), f"{path} (page {i})")
    return {"kind": "tiff", "formats": ["TIFF"], "decoder": "tifffile"}
