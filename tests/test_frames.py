"""Frame readers: every source format round-trips to the expected model frames.

The reference for every expected frame is an outside library: frames are written with imageio,
tifffile or OpenCV, and the expected model frame is ``cv2.resize(..., INTER_AREA)`` of the written
pixels divided by the format's full scale (8-bit /255, 16-bit /65535: common practice), letterboxed
to the square (the 64 x 48 scene: 16 x 12 model pixels, 2 rows of repeated edge pixels above and
below, by OpenCV's ``copyMakeBorder`` with ``BORDER_REPLICATE``). Scenes are invented test inputs
(a soft disc on a gradient), not data.
"""

from __future__ import annotations

import json
import re

import cv2
import imageio.v2 as iio2
import imageio.v3 as iio
import numpy as np
import pytest
import tifffile
from skimage.color import rgb2yuv

from kinecast.config import DataConfig
from kinecast.errors import KinecastError
from kinecast.frames import read_recording
from kinecast.frames import video as video_mod
from kinecast.frames.images import list_images, natural_key

H, W, SIZE = 48, 64, 16


@pytest.fixture(autouse=True)
def _cache_in_tmp(tmp_path, monkeypatch):
    monkeypatch.setenv("KINECAST_CACHE_DIR", str(tmp_path / "cache"))


def scene(i: int, depth: int = 8, colour: bool = True) -> np.ndarray:
    """A smooth test scene: a gradient background and a bright disc moving right by 2 px a frame."""
    yy, xx = np.mgrid[0:H, 0:W].astype(np.float64)
    r = 0.2 + 0.5 * xx / W
    g = 0.3 + 0.4 * yy / H
    b = np.full_like(r, 0.25)
    disc = np.exp(-(((xx - 12 - 2 * i) ** 2 + (yy - 24) ** 2) / (2 * 5.0 ** 2)))
    rgb = np.clip(np.stack([r + 0.5 * disc, g + 0.3 * disc, b + 0.6 * disc], axis=-1), 0, 1)
    if not colour:
        rgb = rgb.mean(axis=-1)
    if depth == 32:
        return rgb.astype(np.float32)
    full = 255 if depth == 8 else 65535
    return np.round(rgb * full).astype(np.uint8 if depth == 8 else np.uint16)


def letterbox(unit: np.ndarray, size: int = SIZE) -> np.ndarray:
    """Reference square frame: the long side area-resized to ``size`` and the short side in
    proportion (rounded half up), centred, the edge pixels repeated (OpenCV copyMakeBorder with
    BORDER_REPLICATE)."""
    h, w = unit.shape[:2]
    cw, ch = (int(np.floor(side * size / max(h, w) + 0.5)) for side in (w, h))
    small = cv2.resize(unit, (cw, ch), interpolation=cv2.INTER_AREA)
    top, left = (size - ch) // 2, (size - cw) // 2
    return cv2.copyMakeBorder(small, top, size - ch - top, left, size - cw - left, cv2.BORDER_REPLICATE)


def expected(img: np.ndarray, full: float, color: str = "rgb", size: int = SIZE) -> np.ndarray:
    """Reference model frame: OpenCV area resize of the normalised image, letterboxed, channels first."""
    unit = img.astype(np.float32) / np.float32(full)
    if color == "grey" and unit.ndim == 3:
        # ITU-R BT.601 luma as implemented by OpenCV's RGB2GRAY (OpenCV docs, "Color conversions").
        unit = cv2.cvtColor(unit, cv2.COLOR_RGB2GRAY)
    small = letterbox(unit, size)
    if small.ndim == 2:
        small = small[None]
        if color == "rgb":
            small = np.repeat(small, 3, axis=0)
    else:
        small = small.transpose(2, 0, 1)
    return small


def cfg(**kw) -> DataConfig:
    return DataConfig(size=kw.pop("size", SIZE), color=kw.pop("color", "rgb"), **kw)


# --- natural sort and folder listing ---------------------------------------------------------------

def test_natural_sort_orders_numbers_by_value(tmp_path):
    names = [f"frame_{i}.png" for i in (10, 2, 1, 33, 100, 3)]
    # Natural sort order (common practice): digit runs compare as whole numbers.
    by_number = sorted(names, key=lambda n: int(re.search(r"\d+", n).group()))
    assert sorted(names, key=natural_key) == by_number
    assert sorted(names) != by_number               # plain string order would differ


def test_folder_listing_ignores_other_files_and_subfolders(tmp_path):
    for i in (2, 10, 1):
        iio.imwrite(tmp_path / f"f{i}.png", scene(i))
    for name in ("timestamps.csv", "truth.csv", "rig.toml", ".hidden.png"):
        (tmp_path / name).write_text("not an image")
    (tmp_path / "sub").mkdir()
    iio.imwrite(tmp_path / "sub" / "f0.png", scene(0))
    assert [p.name for p in list_images(tmp_path)] == ["f1.png", "f2.png", "f10.png"]


# --- still images ------------------------------------------------------------------------------------

@pytest.mark.parametrize("depth,colour", [(8, False), (8, True), (16, False), (16, True)])
def test_png_round_trip(tmp_path, depth, colour):
    imgs = [scene(i, depth, colour) for i in range(4)]
    for i, img in enumerate(imgs):
        if depth == 16 and colour:
            # 16-bit colour PNG through OpenCV, which writes BGR order (OpenCV imwrite docs).
            cv2.imwrite(str(tmp_path / f"f{i}.png"), img[..., ::-1])
        else:
            iio.imwrite(tmp_path / f"f{i}.png", img)
    rec = read_recording(tmp_path, cfg())
    full = 255 if depth == 8 else 65535
    assert rec.frames.shape == (4, 3, SIZE, SIZE)
    assert rec.info["raw_max"] == max(int(img.max()) for img in imgs)  # numpy's max of the written pixels
    assert rec.info["bit_depth"] == depth and rec.info["source_channels"] == (3 if colour else 1)
    assert rec.info["source_size"] == [W, H]
    for got, img in zip(rec.frames, imgs):
        np.testing.assert_allclose(got, expected(img, full), atol=1e-5)


def test_jpeg_within_codec_tolerance(tmp_path):
    imgs = [scene(i) for i in range(3)]
    for i, img in enumerate(imgs):
        iio.imwrite(tmp_path / f"f{i}.jpg", img, quality=95)
    rec = read_recording(tmp_path, cfg())
    for got, img in zip(rec.frames, imgs):
        # Lossy codec: mean error under 1% of full scale after area downscaling (our tolerance).
        assert np.abs(got - expected(img, 255)).mean() < 0.01


def test_bmp_and_tiff_folders(tmp_path):
    bmp, tif = tmp_path / "bmp", tmp_path / "tif"
    bmp.mkdir(), tif.mkdir()
    imgs8 = [scene(i) for i in range(3)]
    imgs16 = [scene(i, 16) for i in range(3)]
    for i in range(3):
        cv2.imwrite(str(bmp / f"f{i}.bmp"), imgs8[i][..., ::-1])     # OpenCV writes BGR
        tifffile.imwrite(tif / f"f{i}.tif", imgs16[i], photometric="rgb")
    for folder, imgs, full in ((bmp, imgs8, 255), (tif, imgs16, 65535)):
        rec = read_recording(folder, cfg())
        for got, img in zip(rec.frames, imgs):
            np.testing.assert_allclose(got, expected(img, full), atol=1e-5)


# --- TIFF stacks -----------------------------------------------------------------------------------------

@pytest.mark.parametrize("kind", ["uint16-grey", "uint8-rgb", "float32-grey", "uint16-rgb-planar"])
def test_multipage_tiff_round_trip(tmp_path, kind):
    dtype, colour = kind.split("-")[0], "rgb" in kind
    depth = {"uint8": 8, "uint16": 16, "float32": 32}[dtype]
    stack = np.stack([scene(i, depth, colour) for i in range(5)])
    path = tmp_path / "stack.tif"
    if kind.endswith("planar"):
        tifffile.imwrite(path, np.moveaxis(stack, -1, 1), photometric="rgb", planarconfig="separate")
    else:
        tifffile.imwrite(path, stack, photometric="rgb" if colour else "minisblack")
    rec = read_recording(path, cfg())
    full = {8: 255, 16: 65535, 32: 1.0}[depth]
    assert rec.n_frames == 5 and rec.info["kind"] == "tiff"
    for got, img in zip(rec.frames, stack):
        np.testing.assert_allclose(got, expected(img, full), atol=1e-5)


@pytest.mark.parametrize("bad,problem", [(np.nan, "NaN"), (1.5, r"\[0, 1\]"), (-0.25, r"\[0, 1\]")])
def test_float_tiff_out_of_range_is_an_error(tmp_path, bad, problem):
    stack = np.stack([scene(i, 32, False) for i in range(4)])
    stack[2, 5, 5] = bad
    path = tmp_path / "floats.tif"
    tifffile.imwrite(path, stack, photometric="minisblack")
    with pytest.raises(KinecastError, match=problem) as err:
        read_recording(path, cfg())
    assert "floats.tif" in str(err.value)


# --- grey, colour and region of interest ----------------------------------------------------------------

def test_grey_conversion_uses_bt601_luma(tmp_path):
    imgs = [scene(i) for i in range(3)]
    for i, img in enumerate(imgs):
        iio.imwrite(tmp_path / f"f{i}.png", img)
    rec = read_recording(tmp_path, cfg(color="grey"))
    assert rec.channels == 1
    for got, img in zip(rec.frames, imgs):
        # scikit-image's rgb2yuv: Y = 0.299 R + 0.587 G + 0.114 B (ITU-R BT.601), resized by OpenCV.
        luma = rgb2yuv(img.astype(np.float64) / 255.0)[..., 0].astype(np.float32)
        ref = letterbox(luma)
        np.testing.assert_allclose(got[0], ref, atol=1e-5)
        # and the weights written out (BT.601, from memory: 0.299, 0.587, 0.114)
        by_hand = img.astype(np.float64) / 255.0 @ np.array([0.299, 0.587, 0.114])
        ref2 = letterbox(by_hand.astype(np.float32))
        np.testing.assert_allclose(got[0], ref2, atol=1e-5)


def test_grey_source_repeated_for_rgb(tmp_path):
    for i in range(3):
        iio.imwrite(tmp_path / f"f{i}.png", scene(i, 8, False))
    rec = read_recording(tmp_path, cfg(color="rgb"))
    assert rec.channels == 3
    np.testing.assert_array_equal(rec.frames[:, 0], rec.frames[:, 1])
    np.testing.assert_array_equal(rec.frames[:, 0], rec.frames[:, 2])


def test_roi_crop_then_resize(tmp_path):
    imgs = [scene(i) for i in range(3)]
    for i, img in enumerate(imgs):
        iio.imwrite(tmp_path / f"f{i}.png", img)
    roi = [8, 4, 40, 32]                              # x, y, width, height
    rec = read_recording(tmp_path, cfg(roi=roi))
    for got, img in zip(rec.frames, imgs):
        np.testing.assert_allclose(got, expected(img[4:36, 8:48], 255), atol=1e-5)
    with pytest.raises(KinecastError, match="roi .* outside the 64x48 frame") as err:
        read_recording(tmp_path, cfg(roi=[30, 0, 40, 10]))
    assert "f0.png" in str(err.value)


# --- videos ----------------------------------------------------------------------------------------------

def write_mp4(path, imgs, fps):
    with iio2.get_writer(path, fps=fps, macro_block_size=16, quality=9) as w:
        for img in imgs:
            w.append_data(img)


def test_mp4_round_trip_with_container_rate(tmp_path):
    imgs = [scene(i) for i in range(12)]
    path = tmp_path / "clip.mp4"
    write_mp4(path, imgs, fps=20)
    rec = read_recording(path, cfg())
    assert rec.n_frames == 12 and rec.info["decoder"] == "ffmpeg"
    # Frame rate from the container: t_i = i / 20 s.
    np.testing.assert_allclose(rec.times, np.arange(12) / 20.0)
    assert rec.info["time_source"] == "video"
    assert json.loads(json.dumps(rec.info)) == rec.info          # info stays JSON-friendly
    for got, img in zip(rec.frames, imgs):
        # Lossy H.264 with 4:2:0 chroma: mean error under 2% of full scale (our tolerance).
        assert np.abs(got - expected(img, 255)).mean() < 0.02


def test_avi_from_opencv_and_the_opencv_fallback(tmp_path, monkeypatch):
    imgs = [scene(i) for i in range(8)]
    path = tmp_path / "clip.avi"
    vw = cv2.VideoWriter(str(path), cv2.VideoWriter_fourcc(*"MJPG"), 15.0, (W, H))
    for img in imgs:
        vw.write(np.ascontiguousarray(img[..., ::-1]))
    vw.release()
    via_ffmpeg = read_recording(path, cfg(cache=False))
    for got, img in zip(via_ffmpeg.frames, imgs):
        assert np.abs(got - expected(img, 255)).mean() < 0.02       # MJPEG: lossy (our tolerance)
    np.testing.assert_allclose(via_ffmpeg.times, np.arange(8) / 15.0)

    def broken(_path, _cfg=None):
        raise RuntimeError("simulated ffmpeg failure")

    monkeypatch.setattr(video_mod, "DECODERS", (("ffmpeg", broken), ("opencv", video_mod.open_opencv)))
    via_opencv = read_recording(path, cfg(cache=False))
    assert via_opencv.info["decoder"] == "opencv" and via_opencv.n_frames == 8
    np.testing.assert_allclose(via_opencv.times, np.arange(8) / 15.0)
    # Two independent decoders of the same bitstream agree closely.
    assert np.abs(via_opencv.frames - via_ffmpeg.frames).max() < 0.03


def test_video_is_never_held_at_full_resolution(tmp_path):
    import tracemalloc

    big_h, big_w, n = 240, 320, 40
    yy, xx = np.mgrid[0:big_h, 0:big_w]
    imgs = [np.dstack([(xx + 4 * i) % 256, yy % 256, np.full_like(xx, 90)]).astype(np.uint8)
            for i in range(n)]
    path = tmp_path / "big.mp4"
    write_mp4(path, imgs, fps=25)
    del imgs
    full_float_bytes = n * big_h * big_w * 3 * 4
    tracemalloc.start()
    try:
        rec = read_recording(path, cfg(cache=False))
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    assert rec.n_frames == n
    # Frame by frame: the peak stays below a tenth of the full-resolution float video.
    assert peak < full_float_bytes / 10, (peak, full_float_bytes)


# --- the cache -------------------------------------------------------------------------------------------

def test_second_read_is_served_from_the_cache(tmp_path, monkeypatch):
    imgs = [scene(i) for i in range(6)]
    path = tmp_path / "clip.mp4"
    write_mp4(path, imgs, fps=10)
    first = read_recording(path, cfg())
    assert first.info["cache"] == "written"
    assert len(list((tmp_path / "cache").glob("*.npz"))) == 1

    calls = []

    def fail(_path, _cfg=None):
        calls.append(_path)
        raise RuntimeError("decoder switched off by the test")

    monkeypatch.setattr(video_mod, "DECODERS", (("ffmpeg", fail), ("opencv", fail)))
    second = read_recording(path, cfg())
    assert second.info["cache"] == "hit" and calls == []
    np.testing.assert_array_equal(second.frames, first.frames)
    np.testing.assert_array_equal(second.times, first.times)
    # Other pixel settings are another cache entry: the decoder is needed again.
    with pytest.raises(KinecastError, match="switched off"):
        read_recording(path, cfg(size=8))
    # Without the cache the decoder always runs.
    with pytest.raises(KinecastError, match="switched off"):
        read_recording(path, cfg(cache=False))
    assert len(calls) == 4


def test_cache_notices_a_changed_frame_and_honours_cache_dir(tmp_path):
    folder = tmp_path / "frames"
    folder.mkdir()
    for i in range(3):
        iio.imwrite(folder / f"f{i}.png", scene(i))
    own = tmp_path / "own_cache"
    assert read_recording(folder, cfg(cache_dir=str(own))).info["cache"] == "written"
    assert len(list(own.glob("*.npz"))) == 1 and not (tmp_path / "cache").exists()
    iio.imwrite(folder / "f1.png", scene(7))            # same name, new content and mtime
    again = read_recording(folder, cfg(cache_dir=str(own)))
    assert again.info["cache"] == "written"
    np.testing.assert_allclose(again.frames[1], expected(scene(7), 255), atol=1e-5)
