"""Property tests: random or damaged bytes never raise anything but KinecastError.

Inputs are random bytes, and valid files (written by imageio, tifffile and imageio-ffmpeg) that are
cut short or have bytes overwritten. Whatever the readers make of them, the only exception allowed
is KinecastError, with a one-line message.
"""

from __future__ import annotations

import io
import tempfile
from pathlib import Path

import cv2
import imageio.v2 as iio2
import imageio.v3 as iio
import numpy as np
import tifffile
from hypothesis import HealthCheck, example, given, settings
from hypothesis import strategies as st

from kinecast.config import DataConfig
from kinecast.errors import KinecastError
from kinecast.frames import read_recording
from kinecast.frames.timestamps import match_times, parse_times_text

FUZZ = settings(max_examples=30, deadline=None, database=None,
                suppress_health_check=[HealthCheck.too_slow])


def _frames(n=3):
    return [((np.arange(12 * 16).reshape(12, 16) * 3 + 40 * i) % 256).astype(np.uint8) for i in range(n)]


def _png_bytes() -> bytes:
    return iio.imwrite("<bytes>", _frames(1)[0], extension=".png")


def _tiff_bytes() -> bytes:
    buf = io.BytesIO()
    tifffile.imwrite(buf, np.stack(_frames(4)), photometric="minisblack")
    return buf.getvalue()


def _mp4_bytes() -> bytes:
    with tempfile.TemporaryDirectory() as d:
        p = Path(d) / "v.mp4"
        with iio2.get_writer(p, fps=10, macro_block_size=16) as w:
            for f in _frames(4):
                w.append_data(np.dstack([np.pad(f, ((2, 2), (0, 0)))] * 3))
        return p.read_bytes()


VALID = {".png": _png_bytes(), ".tif": _tiff_bytes(), ".mp4": _mp4_bytes()}


@st.composite
def damaged(draw, suffix: str):
    """Random bytes, or a valid file cut short and/or with a stretch of bytes overwritten."""
    if draw(st.booleans()):
        return draw(st.binary(min_size=0, max_size=2048))
    data = bytearray(VALID[suffix])
    cut = draw(st.integers(0, len(data)))
    data = data[:cut]
    if data and draw(st.booleans()):
        at = draw(st.integers(0, len(data) - 1))
        patch = draw(st.binary(min_size=1, max_size=64))
        data[at:at + len(patch)] = patch
    return bytes(data)


def _reference_frame(img: np.ndarray, size: int) -> np.ndarray:
    """An intact 12 x 16 uint8 frame as the model sees it: /255 (8-bit full scale, common practice),
    OpenCV area resize to 8 x 6 and one replicated edge row above and below (cv2.copyMakeBorder
    BORDER_REPLICATE), as in tests/test_frames.py."""
    h, w = img.shape
    ch = int(np.floor(h * size / w + 0.5))
    small = cv2.resize(img.astype(np.float32) / 255.0, (size, ch), interpolation=cv2.INTER_AREA)
    top = (size - ch) // 2
    return cv2.copyMakeBorder(small, top, size - ch - top, 0, 0, cv2.BORDER_REPLICATE)


def _read_only_kinecast_errors(path: Path, cfg: DataConfig, intact: list[np.ndarray] = ()) -> None:
    """Either one-line KinecastError naming the file, or a recording that keeps the Recording
    contract the constructor does not enforce, with any ``intact`` leading frames read correctly."""
    try:
        rec = read_recording(path, cfg)
    except KinecastError as exc:
        assert "\n" not in str(exc) and str(path.name) in str(exc)
    else:
        # Recording's documented contract: intensities in [0, 1], strictly increasing finite times,
        # frames at the configured model size
        assert np.isfinite(rec.frames).all() and rec.frames.min() >= 0 and rec.frames.max() <= 1
        assert np.isfinite(rec.times).all() and np.all(np.diff(rec.times) > 0)
        assert rec.frames.shape[2:] == (cfg.size, cfg.size)
        for got, img in zip(rec.frames, intact):
            np.testing.assert_allclose(got[0], _reference_frame(img, cfg.size), atol=1e-5)


@FUZZ
@given(damaged(".png"))
@example(VALID[".png"])  # an undamaged third frame: always runs the reference comparison
def test_damaged_png_in_a_folder(data):
    with tempfile.TemporaryDirectory() as d:
        folder = Path(d) / "rec"
        folder.mkdir()
        for i, f in enumerate(_frames(2)):
            iio.imwrite(folder / f"f{i}.png", f)
        (folder / "f2.png").write_bytes(data)
        _read_only_kinecast_errors(folder, DataConfig(size=8, cache=False), intact=_frames(2))


@FUZZ
@given(damaged(".tif"))
def test_damaged_tiff_stack(data):
    with tempfile.TemporaryDirectory() as d:
        path = Path(d) / "stack.tif"
        path.write_bytes(data)
        _read_only_kinecast_errors(path, DataConfig(size=8, cache=False))


@FUZZ
@given(damaged(".mp4"))
def test_damaged_video(data):
    with tempfile.TemporaryDirectory() as d:
        path = Path(d) / "clip.mp4"
        path.write_bytes(data)
        _read_only_kinecast_errors(path, DataConfig(size=8, cache=False))


CSV_ALPHABET = st.sampled_from(list("0123456789.,;\t -+eE#\"'\n\r abcnaif_") + ["\ufeff", "é", "\x00"])


@FUZZ
@given(st.one_of(st.text(max_size=300), st.text(CSV_ALPHABET, max_size=300)),
       st.integers(1, 5))
def test_random_csv_text(text, n):
    names = [f"f{i}.png" for i in range(n)]
    try:
        times = match_times(parse_times_text(text, "t.csv"), names)
    except KinecastError as exc:
        assert "\n" not in str(exc) and str(exc).startswith("t.csv")
    else:
        assert len(times) == n and np.all(np.diff(times) > 0) and np.isfinite(times).all()
