"""Videos read through ffmpeg's own crop / convert / area-resize agree with the frame-by-frame path.

The fast path asks ffmpeg for frames already at model size (16-bit grey or RGB). Two references:

* the frame-by-frame path, built here from outside pieces: ``imageio_ffmpeg.read_frames(...,
  pix_fmt="rgb24")`` decodes each full frame, and ``kinecast.frames.preprocess.to_model`` crops,
  converts (ITU-R BT.601 luma) and area-averages it (``cv2.INTER_AREA``);
* for a lossless (FFV1, RGB) video, the written pixels themselves: BT.601 luma
  Y' = 0.299 R + 0.587 G + 0.114 B (ITU-R BT.601, the Y' equation) and OpenCV's area resize (a box
  filter over the source pixels each output pixel covers; common practice for shrinking images),
  a non-square region letterboxed by OpenCV's ``copyMakeBorder`` with ``BORDER_REPLICATE``.

Scenes (a soft bright disc moving over a dark gradient) are invented test inputs, not data.
"""

from __future__ import annotations

import logging
import subprocess

import cv2
import imageio.v2 as iio2
import imageio_ffmpeg
import numpy as np
import pytest

from kinecast.config import DataConfig
from kinecast.errors import KinecastError
from kinecast.frames import read_recording
from kinecast.frames import video as video_mod
from kinecast.frames.preprocess import FrameSink, to_model

SRC, SIZE, N, FPS = 256, 64, 24, 20.0
ROI = [37, 21, 150, 180]            # odd offsets, not square, not a whole-number shrink factor
ORANGE, RED = (0.95, 0.7, 0.35), (0.95, 0.1, 0.1)                  # disc colours (RGB in [0, 1])


def scene(i: int, colour: bool, tint: tuple = ORANGE) -> np.ndarray:
    """Frame ``i``: a soft disc (radius 24 px) moving 5 px a frame right, 2 px down, uint8 RGB."""
    yy, xx = np.mgrid[0:SRC, 0:SRC].astype(np.float64)
    base = 0.08 + 0.2 * xx / SRC + 0.1 * yy / SRC
    r = np.hypot(xx - (50 + 5 * i), yy - (80 + 2 * i))
    disc = np.clip(24.0 - r, 0.0, 1.5) / 1.5                       # 1.5 px soft edge
    tint = np.array(tint) if colour else np.ones(3)
    back = np.stack([base, base * 1.1, base * 1.3], -1) if colour else base[..., None].repeat(3, -1)
    img = back * (1 - disc[..., None]) + tint * 0.9 * disc[..., None]
    return np.round(np.clip(img, 0, 1) * 255).astype(np.uint8)


def write_h264(path, colour: bool):
    """H.264, yuv420p (imageio's default mp4 writer): lossy, chroma at half resolution."""
    with iio2.get_writer(path, fps=FPS, macro_block_size=16, quality=9) as w:
        for i in range(N):
            w.append_data(scene(i, colour))
    return path


def write_lossless(path, colour: bool):
    """FFV1 in Matroska with RGB samples (bgr0): the written pixels come back exactly."""
    w = imageio_ffmpeg.write_frames(str(path), (SRC, SRC), fps=FPS, codec="ffv1", pix_fmt_in="rgb24",
                                    pix_fmt_out="bgr0", quality=None, macro_block_size=1)
    w.send(None)
    for i in range(N):
        w.send(np.ascontiguousarray(scene(i, colour)).tobytes())
    w.close()
    return path


def frame_by_frame(path, roi, color: str) -> np.ndarray:
    """Reference: full rgb24 frames from ffmpeg, then kinecast's numpy/OpenCV preprocessing."""
    gen = imageio_ffmpeg.read_frames(str(path), pix_fmt="rgb24")
    w, h = next(gen)["size"]
    out = [to_model(np.frombuffer(b, np.uint8).reshape(h, w, 3).astype(np.float32) / 255,
                    tuple(roi) if roi else None, SIZE, color) for b in gen]
    return np.stack(out)


def cfg(**kw) -> DataConfig:
    return DataConfig(size=SIZE, cache=False, **kw)


@pytest.fixture()
def no_full_frames(monkeypatch):
    """Fail if any full-resolution frame goes through the numpy path (FrameSink.add)."""
    def refuse(self, raw, name, where):
        raise AssertionError(f"{where}: a {raw.shape} frame took the frame-by-frame path")
    monkeypatch.setattr(FrameSink, "add", refuse)


def frame_by_frame_decoders(monkeypatch):
    """Make read_recording use the frame-by-frame ffmpeg path (the opener called without settings)."""
    monkeypatch.setattr(video_mod, "DECODERS", (("ffmpeg", lambda p, _cfg=None: video_mod.open_ffmpeg(p)),
                                                ("opencv", video_mod.open_opencv)))


# Tolerances against the frame-by-frame path on H.264 input (both read the same decoded YUV). The
# frame-by-frame path rounds RGB to 8 bits (up to 0.5/255 a channel) and clips it to [0, 255] before
# taking luma: measured against BT.601 luma of the written pixels it comes out 0.4/255 to 1.1/255
# darker on average, the fast path within 0.1/255. ffmpeg converts and averages in fixed point, and
# without a region colour chroma (stored at half resolution) is interpolated a little differently at
# the disc's edge. Measured here (in units of 1/255): grey mean |d| 0.49, max 0.97; rgb mean 0.66,
# max 2.3 (0.26 and 0.90 with the region). Bounds about twice that.
MEAN_TOL, MAX_TOL = {"grey": 1 / 255, "rgb": 1 / 255}, {"grey": 2 / 255, "rgb": 5 / 255}


@pytest.mark.parametrize("color", ["grey", "rgb"])
@pytest.mark.parametrize("roi", [[], ROI])
def test_fast_path_matches_frame_by_frame(tmp_path, no_full_frames, color, roi):
    path = write_h264(tmp_path / "clip.mp4", colour=color == "rgb")
    rec = read_recording(path, cfg(color=color, roi=roi))
    ref = frame_by_frame(path, roi, color)
    assert rec.frames.shape == ref.shape == (N, 3 if color == "rgb" else 1, SIZE, SIZE)
    diff = np.abs(rec.frames - ref)
    assert diff.mean() < MEAN_TOL[color], diff.mean()
    assert diff.max() < MAX_TOL[color], diff.max()
    # The disc is really there: a bright spot, not a blur of the background (mean ~0.2).
    assert rec.frames.max() > 0.7
    assert rec.info["roi"] == roi and rec.info["source_size"] == [SRC, SRC]


def letterbox(img: np.ndarray) -> np.ndarray:
    """Reference for the ROI (150 x 180): area-resized to 53 x 64 (the long side to SIZE, the
    width 150 * 64 / 180 = 53.3 rounded), centred with 5 columns left and 6 right, edge pixels
    repeated (OpenCV copyMakeBorder, BORDER_REPLICATE)."""
    small = cv2.resize(img, (53, SIZE), interpolation=cv2.INTER_AREA)
    return cv2.copyMakeBorder(small, 0, 0, 5, 6, cv2.BORDER_REPLICATE)


def test_lossless_video_matches_bt601_luma_and_area_average(tmp_path, no_full_frames):
    path = write_lossless(tmp_path / "clip.mkv", colour=True)
    crop = (slice(ROI[1], ROI[1] + ROI[3]), slice(ROI[0], ROI[0] + ROI[2]))
    weights = np.array([0.299, 0.587, 0.114])                    # ITU-R BT.601 Y' (from the standard)
    grey = read_recording(path, cfg(roi=ROI))
    rgb = read_recording(path, cfg(roi=ROI, color="rgb"))
    for i in range(N):
        img = scene(i, colour=True)[crop].astype(np.float64) / 255
        luma = letterbox(img @ weights)
        colour = letterbox(img).transpose(2, 0, 1)
        # Grey: exact up to ffmpeg's fixed-point arithmetic (measured max |d| 7e-5; bound 1e-3).
        np.testing.assert_allclose(grey.frames[i, 0], luma, atol=1e-3)
        # RGB: ffmpeg's scaler is off by up to about 1/255 at full scale (measured: pure green
        # (0, 255, 0) comes back as (0, 65288, 32) of 65535; here max |d| 0.0035); bound 2/255.
        np.testing.assert_allclose(rgb.frames[i], colour, atol=2 / 255)


def test_grey_is_bt601_luma_for_a_bt709_video_too(tmp_path, no_full_frames):
    """HD cameras store BT.709 Y'CbCr, whose Y' is not BT.601 luma; grey must still be BT.601 luma.

    Reference: BT.601 luma of the written pixels, area-averaged by OpenCV. For the disc colour
    0.9 x (0.95, 0.1, 0.1), BT.601 gives 0.299 R + 0.587 G + 0.114 B = 0.319 and BT.709 gives
    0.2126 R + 0.7152 G + 0.0722 B = 0.253 (ITU-R BT.601 and BT.709, the Y' equations), so taking
    the stored Y' would be off by 0.066 on the disc.
    """
    path = tmp_path / "hd.mp4"
    tags = ["-colorspace", "bt709", "-color_primaries", "bt709", "-color_trc", "bt709"]
    w = imageio_ffmpeg.write_frames(str(path), (SRC, SRC), fps=FPS, pix_fmt_in="rgb24", quality=9,
                                    output_params=["-vf", "scale=out_color_matrix=bt709"] + tags)
    w.send(None)
    for i in range(N):
        w.send(np.ascontiguousarray(scene(i, colour=True, tint=RED)).tobytes())
    w.close()
    gen = imageio_ffmpeg.read_frames(str(path))
    assert "bt709" in next(gen)["pix_fmt"]                          # the file says BT.709
    gen.close()
    rec = read_recording(path, cfg())
    weights = np.array([0.299, 0.587, 0.114])                    # ITU-R BT.601 Y'
    luma = np.stack([cv2.resize(scene(i, colour=True, tint=RED) / 255 @ weights, (SIZE, SIZE),
                                interpolation=cv2.INTER_AREA) for i in range(N)])
    diff = np.abs(rec.frames[:, 0] - luma)
    # Lossy H.264 (our tolerance): measured mean |d| 0.0008, max 0.0051; bounds 1/255 and 4/255.
    assert diff.mean() < 1 / 255 and diff.max() < 4 / 255, (diff.mean(), diff.max())
    # On the disc's centre (source (x, y) = (50, 80), model (12.5, 20)) it is BT.601's value.
    assert abs(float(rec.frames[0, 0, 20, 12]) - 0.319) < 0.02


def test_frame_count_times_and_facts_unchanged(tmp_path, monkeypatch):
    path = write_h264(tmp_path / "clip.mp4", colour=False)
    fast = read_recording(path, cfg())
    frame_by_frame_decoders(monkeypatch)
    slow = read_recording(path, cfg())
    assert fast.n_frames == slow.n_frames == N
    # Times from the container's frame rate: t_i = i / 20 s, as written.
    np.testing.assert_allclose(fast.times, np.arange(N) / FPS)
    np.testing.assert_array_equal(fast.times, slow.times)
    np.testing.assert_array_equal(fast.missing, slow.missing)
    same = ("names", "source_size", "source_channels", "bit_depth", "dtype", "decoder", "source_rate",
            "codec", "time_source", "kind", "formats", "roi")
    assert {k: fast.info[k] for k in same} == {k: slow.info[k] for k in same}
    # The full-resolution samples never reach Python on the fast path, so their peak is unknown.
    assert fast.info["raw_max"] is None and slow.info["raw_max"] > 0


@pytest.mark.parametrize("roi, problem", [([200, 0, 100, 10], "lies outside the 256x256 frame"),
                                          ([0, 0, 10.5, 10], "must be four whole numbers")])
def test_bad_roi_gives_the_same_one_line_error(tmp_path, monkeypatch, roi, problem):
    path = write_h264(tmp_path / "clip.mp4", colour=False)
    with pytest.raises(KinecastError) as fast:
        read_recording(path, cfg(roi=roi))
    frame_by_frame_decoders(monkeypatch)
    with pytest.raises(KinecastError) as slow:
        read_recording(path, cfg(roi=roi))
    assert str(fast.value) == str(slow.value)
    assert problem in str(fast.value) and str(path) in str(fast.value) and "\n" not in str(fast.value)


def test_enlargement_stays_on_the_frame_by_frame_path(tmp_path):
    """A region smaller than the model size keeps the numpy path: OpenCV averages areas only when
    both directions shrink and otherwise uses a variant of bilinear interpolation (OpenCV's resize
    source, from memory; ffmpeg's result measured up to 0.10 away on such a region)."""
    path = write_h264(tmp_path / "clip.mp4", colour=False)
    roi = [60, 40, 40, 50]                            # long side 50 < 64: 40 x 50 enlarged to 51 x 64
    rec = read_recording(path, cfg(roi=roi))
    assert rec.info["raw_max"] is not None                            # the frame-by-frame path ran
    np.testing.assert_allclose(rec.frames, frame_by_frame(path, roi, "grey"), atol=1e-6)


def test_rotated_video_roi_is_checked_against_the_displayed_frame(tmp_path):
    """A container asking for a 90 degree turn: ffmpeg turns the frames, the ROI is in turned pixels."""
    flat = tmp_path / "flat.mp4"
    with iio2.get_writer(flat, fps=FPS, macro_block_size=16, quality=9) as w:
        for i in range(8):
            w.append_data(scene(i, colour=False)[:160])               # 256 wide, 160 high
    turned = tmp_path / "turned.mp4"
    subprocess.run([imageio_ffmpeg.get_ffmpeg_exe(), "-loglevel", "error", "-display_rotation", "90",
                    "-i", str(flat), "-c", "copy", str(turned)], check=True)
    tall = [0, 0, 150, 250]                                           # fits 160x256, not 256x160
    rec = read_recording(turned, cfg(roi=tall))
    assert rec.info["source_size"] == [160, 256] and rec.n_frames == 8
    assert rec.info["raw_max"] is None                                # read by the fast path
    diff = np.abs(rec.frames - frame_by_frame(turned, tall, "grey"))
    assert diff.mean() < MEAN_TOL["grey"] and diff.max() < MAX_TOL["grey"]
    with pytest.raises(KinecastError, match=r"lies outside the 160x256 frame"):
        read_recording(turned, cfg(roi=[0, 0, 250, 150]))


def test_no_library_warning_reaches_the_terminal(tmp_path, capfd, caplog):
    """imageio-ffmpeg warns whenever frames differ in size from the stored ones; a shrunk read
    differs on purpose, and the user sees only our own one-line errors."""
    path = write_h264(tmp_path / "clip.mp4", colour=False)
    capfd.readouterr()
    with caplog.at_level(logging.DEBUG):
        read_recording(path, cfg())
    assert [r.getMessage() for r in caplog.records if r.levelno >= logging.WARNING] == []
    out, err = capfd.readouterr()
    assert out == "" and err == ""
