"""Frames that are not square keep their aspect ratio: letterboxed to the square model frame.

Outside references:
- OpenCV's ``cv2.fitEllipse`` (least-squares ellipse through a contour, from ``cv2.findContours``):
  a round disc gives axes in the ratio 1; squashing a 160 x 64 picture to 64 x 64 shrinks x by 0.4
  and leaves y, so the disc would become an ellipse with axes in the ratio 1 / 0.4 = 2.5.
- OpenCV's ``cv2.copyMakeBorder`` with ``BORDER_REPLICATE`` (the edge pixels repeated) and its
  area resize (``INTER_AREA``) for the expected letterboxed frame; ``cv2.moments`` for centroids
  (m10 / m00, m01 / m00).
- BT.601 luma and the lossless FFV1 video as in ``test_video_fast_path.py``.

Scenes (a bright disc on a horizontal gradient) are invented test inputs, not data.
"""

from __future__ import annotations

import cv2
import imageio.v3 as iio
import imageio_ffmpeg
import numpy as np
import pytest

from kinecast.cli import main
from kinecast.config import DataConfig
from kinecast.forecast.native import NativeFormat, native_frame
from kinecast.frames import read_recording
from kinecast.frames.preprocess import to_model

SIZE = 64
W, H = 160, 64                          # landscape: 64 x 26 model pixels (64 · 64/160 = 25.6)
DISC_R = 20.0                           # source pixels
N = 4


def scene(i: int, width: int = W, height: int = H) -> np.ndarray:
    """Frame ``i``: a filled disc (radius 20 px) moving 6 px a frame right over a horizontal
    gradient, uint8 RGB."""
    img = np.zeros((height, width, 3), np.uint8)
    img[...] = np.linspace(30, 90, width).astype(np.uint8)[None, :, None]
    centre = (int(50 + 6 * i), height // 2)
    cv2.circle(img, centre, int(DISC_R), (230, 220, 200), thickness=-1, lineType=cv2.LINE_AA)
    return img


def write_pngs(folder, n: int = N, **size) -> None:
    folder.mkdir()
    for i in range(n):
        iio.imwrite(folder / f"frame_{i:03d}.png", scene(i, **size))


def write_lossless(path, n: int = N, width: int = W, height: int = H):
    """FFV1 in Matroska with RGB samples (bgr0): the written pixels come back exactly."""
    w = imageio_ffmpeg.write_frames(str(path), (width, height), fps=10.0, codec="ffv1",
                                    pix_fmt_in="rgb24", pix_fmt_out="bgr0", quality=None,
                                    macro_block_size=1)
    w.send(None)
    for i in range(n):
        w.send(np.ascontiguousarray(scene(i, width, height)).tobytes())
    w.close()
    return path


def axis_ratio(img: np.ndarray) -> float:
    """Long over short axis of the ellipse OpenCV fits to the thresholded disc's outline."""
    img = np.asarray(img, np.float64)
    mask = (img > 0.5 * (img.max() + img.min())).astype(np.uint8)
    contours, _ = cv2.findContours(mask, cv2.RETR_EXTERNAL, cv2.CHAIN_APPROX_NONE)
    (_, _), (a, b), _ = cv2.fitEllipse(max(contours, key=cv2.contourArea))
    return max(a, b) / min(a, b)


def centroid(img: np.ndarray) -> np.ndarray:
    """Intensity-weighted centroid (x, y) of an image's values above half its range (cv2.moments)."""
    img = np.asarray(img, np.float64)
    fg = np.where(img > 0.5 * (img.max() + img.min()), img, 0).astype(np.float32)
    m = cv2.moments(fg)
    return np.array([m["m10"] / m["m00"], m["m01"] / m["m00"]])


def test_disc_stays_round_in_the_model_frames(tmp_path):
    write_pngs(tmp_path / "rec")
    rec = read_recording(tmp_path / "rec", DataConfig(size=SIZE, cache=False))
    assert rec.frames.shape == (N, 1, SIZE, SIZE)
    for i, frame in enumerate(rec.frames[:, 0]):
        # The disc is 16 model pixels across; rounding the picture to 26 rows (25.6) and the pixel
        # grid leave a few percent (our tolerance: 10 %).
        assert axis_ratio(frame) == pytest.approx(1.0, abs=0.1)
        squashed = cv2.resize(scene(i) @ np.array([0.299, 0.587, 0.114]) / 255, (SIZE, SIZE),
                              interpolation=cv2.INTER_AREA)
        assert axis_ratio(squashed) == pytest.approx(2.5, abs=0.25)      # what squashing did


def test_padding_repeats_the_edge_rows_of_the_picture(tmp_path):
    write_pngs(tmp_path / "rec")
    rec = read_recording(tmp_path / "rec", DataConfig(size=SIZE, cache=False, color="rgb"))
    # 64 · 64/160 = 25.6 → 26 picture rows; (64 − 26) / 2 = 19 rows above, 19 below.
    top, rows = 19, 26
    unit = scene(0).astype(np.float32) / 255
    picture = cv2.resize(unit, (SIZE, rows), interpolation=cv2.INTER_AREA)
    want = cv2.copyMakeBorder(picture, top, SIZE - rows - top, 0, 0, cv2.BORDER_REPLICATE)
    np.testing.assert_allclose(rec.frames[0].transpose(1, 2, 0), want, atol=1e-6)
    # The padded rows are the picture's first and last rows repeated: static background.
    frames = rec.frames
    np.testing.assert_array_equal(frames[:, :, :top], np.repeat(frames[:, :, top:top + 1], top, axis=2))
    np.testing.assert_array_equal(frames[:, :, top + rows:],
                                  np.repeat(frames[:, :, top + rows - 1:top + rows], top, axis=2))


def test_square_frames_are_resized_as_before():
    """A square picture has no padding: exactly OpenCV's area resize to SIZE x SIZE."""
    unit = scene(1, 120, 120).astype(np.float32) / 255
    got = to_model(unit, None, SIZE, "rgb")
    want = cv2.resize(unit, (SIZE, SIZE), interpolation=cv2.INTER_AREA).transpose(2, 0, 1)
    np.testing.assert_array_equal(got, want)


@pytest.mark.parametrize("color, tol", [("grey", 1e-3), ("rgb", 2 / 255)])
@pytest.mark.parametrize("roi", [[], [10, 0, 90, 100]])       # landscape 160 x 100, portrait 90 x 100
def test_video_fast_path_gives_the_same_model_frames_as_pngs(tmp_path, color, tol, roi):
    """ffmpeg shrinks the picture to 64 x 40 (landscape) or 58 x 64 (portrait: 90 · 64/100 = 57.6)
    and kinecast pads it; the PNGs go through OpenCV. Tolerances as for the lossless video in
    test_video_fast_path.py (ffmpeg's fixed-point arithmetic)."""
    size = {"width": 160, "height": 100}
    write_pngs(tmp_path / "rec", **size)
    video = write_lossless(tmp_path / "clip.mkv", **size)
    cfg = DataConfig(size=SIZE, cache=False, color=color, roi=roi)
    pngs = read_recording(tmp_path / "rec", cfg)
    fast = read_recording(video, cfg)
    assert fast.info["raw_max"] is None                       # the frames came shrunk from ffmpeg
    assert fast.frames.shape == pngs.frames.shape == (N, 3 if color == "rgb" else 1, SIZE, SIZE)
    assert np.abs(fast.frames - pngs.frames).max() < tol
    grey = fast.frames.mean(axis=1)
    for frame in grey:
        assert axis_ratio(frame) == pytest.approx(1.0, abs=0.1)


def test_fill_writes_the_picture_at_native_size_without_the_padded_band(tmp_path):
    """A model-size frame brought back to the recording's 160 x 64: the disc is round and where it
    was in the source, and what the padding holds does not reach the written frame."""
    write_pngs(tmp_path / "rec")
    rec = read_recording(tmp_path / "rec", DataConfig(size=SIZE, cache=False))
    fmt = NativeFormat(W, H, 1, np.dtype(np.uint8), False)
    pred = rec.frames[2].copy()
    frame = native_frame(pred, fmt, [], None)
    assert frame.shape == (H, W) and frame.dtype == np.uint8
    source = scene(2) @ np.array([0.299, 0.587, 0.114])
    # Area averaging by 2.5 and bicubic enlargement back: the centroid moves by well under a pixel
    # (our tolerance 0.5 px); the outline is blurred by about a model pixel (2.5 source px).
    np.testing.assert_allclose(centroid(frame), centroid(source), atol=0.5)
    assert axis_ratio(frame) == pytest.approx(1.0, abs=0.1)
    banded = pred.copy()
    banded[:, :19] = 1.0                                      # the 19 padded rows above, and
    banded[:, 19 + 26:] = 0.0                                 # the 19 below, set to something else
    np.testing.assert_array_equal(native_frame(banded, fmt, [], None), frame)


def test_inspect_prints_the_frame_geometry(tmp_path, capsys):
    write_pngs(tmp_path / "rec")
    assert main(["inspect", str(tmp_path / "rec"), "--set", "data.size=64"]) == 0
    out = capsys.readouterr().out
    # (160 − 64) / 2 = 48: rows 48-111 of a 160 x 160 square; 64 · 64/160 = 25.6 → 26 model rows,
    # (64 − 26) / 2 = 19: rows 19-44.
    lines = [ln for ln in out.splitlines() if ln.startswith("geometry")]
    assert len(lines) == 1, out
    line = lines[0]
    assert "frames 160x64" in line and "padded to 160x160" in line and "rows 48-111" in line
    assert "64x64 model frames" in line and "picture 64x26 at rows 19-44" in line
    write_pngs(tmp_path / "square", width=64, height=64)
    assert main(["inspect", str(tmp_path / "square"), "--set", "data.size=32"]) == 0
    assert "frames 64x64 → 32x32 model frames (square: no padding)" in capsys.readouterr().out
