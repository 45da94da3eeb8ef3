"""Bad input: every case raises KinecastError with one line that names the file and the problem,
and the command line turns it into exit status 2 without a traceback.

Damaged files are made from valid ones written by imageio / OpenCV / tifffile (cut short, emptied,
replaced by text); what counts as damaged follows the PNG (ISO/IEC 15948), JPEG (ITU-T T.81) and
TIFF 6.0 specifications: a file cut before its end marker or final directory is incomplete.
"""

from __future__ import annotations

import cv2
import imageio.v3 as iio
import numpy as np
import pytest
import tifffile

from kinecast.cli import main
from kinecast.config import DataConfig
from kinecast.errors import KinecastError
from kinecast.frames import read_recording


@pytest.fixture(autouse=True)
def _cache_in_tmp(tmp_path, monkeypatch):
    monkeypatch.setenv("KINECAST_CACHE_DIR", str(tmp_path / "cache"))


def frame(i: int, colour: bool = False, h: int = 24, w: int = 32) -> np.ndarray:
    yy, xx = np.mgrid[0:h, 0:w]
    grey = ((xx * 7 + yy * 3 + 20 * i) % 256).astype(np.uint8)
    return np.dstack([grey, grey // 2, 255 - grey]) if colour else grey


def folder_of(tmp_path, n=3, ext="png", **kw):
    d = tmp_path / "rec"
    d.mkdir(exist_ok=True)
    for i in range(n):
        iio.imwrite(d / f"f{i}.{ext}", frame(i, **kw))
    return d


def raises(path, match, cfg=None, named=None):
    """read_recording(path) raises KinecastError matching ``match`` whose message names the file."""
    with pytest.raises(KinecastError, match=match) as err:
        read_recording(path, cfg or DataConfig(size=8))
    msg = str(err.value)
    assert "\n" not in msg
    assert (named or path.name) in msg, msg
    return msg


def test_missing_path(tmp_path):
    raises(tmp_path / "nowhere", "does not exist")


def test_empty_folder_even_with_images_in_a_subfolder(tmp_path):
    d = tmp_path / "empty"
    d.mkdir()
    (d / "timestamps.csv").write_text("f0.png,0\n")
    (d / "sub").mkdir()
    iio.imwrite(d / "sub" / "f0.png", frame(0))
    raises(d, "no image files")


def test_zero_byte_image(tmp_path):
    d = folder_of(tmp_path)
    (d / "f1.png").write_bytes(b"")
    raises(d, "empty", named="f1.png")


@pytest.mark.parametrize("ext", ["png", "jpg", "bmp", "tif"])
def test_truncated_image(tmp_path, ext):
    d = folder_of(tmp_path, ext=ext)
    data = (d / f"f2.{ext}").read_bytes()
    (d / f"f2.{ext}").write_bytes(data[: len(data) * 2 // 3])
    raises(d, "readable|damaged|truncated", named=f"f2.{ext}")


def test_text_file_with_an_image_extension(tmp_path):
    d = folder_of(tmp_path)
    (d / "f1.png").write_text("frame 1 was not saved\n")
    raises(d, "not a readable PNG", named="f1.png")


def test_mixed_frame_sizes(tmp_path):
    d = folder_of(tmp_path)
    iio.imwrite(d / "f3.png", frame(3, h=20))
    raises(d, "32x20 but earlier frames are 32x24", named="f3.png")


def test_mixed_grey_and_colour(tmp_path):
    d = folder_of(tmp_path)
    iio.imwrite(d / "f3.png", frame(3, colour=True))
    raises(d, "colour but earlier frames are grey", named="f3.png")


def test_mixed_bit_depths(tmp_path):
    d = folder_of(tmp_path)
    iio.imwrite(d / "f3.png", frame(3).astype(np.uint16) * 257)
    raises(d, "uint16 but earlier frames are uint8", named="f3.png")


def test_too_few_frames(tmp_path):
    d = folder_of(tmp_path, n=2)
    raises(d, "2 frame.*at least 3")
    stack = tmp_path / "two.tif"
    tifffile.imwrite(stack, np.stack([frame(0), frame(1)]), photometric="minisblack")
    raises(stack, "2 frame.*at least 3")
    assert read_recording(stack, DataConfig(size=8, min_frames=2)).n_frames == 2


def test_unsupported_sample_type(tmp_path):
    path = tmp_path / "signed.tif"
    tifffile.imwrite(path, np.stack([frame(i).astype(np.int16) for i in range(3)]),
                     photometric="minisblack")
    raises(path, "sample type int16 is not supported")


def test_unknown_extension_and_single_image(tmp_path):
    gif = tmp_path / "clip.gif"
    gif.write_bytes(b"GIF89a")
    raises(gif, "unknown extension '.gif'")
    png = tmp_path / "one.png"
    iio.imwrite(png, frame(0))
    raises(png, "single image")


def test_multipage_tiff_inside_a_folder(tmp_path):
    d = folder_of(tmp_path, ext="tif")
    tifffile.imwrite(d / "f1.tif", np.stack([frame(1), frame(2)]), photometric="minisblack")
    raises(d, "holds 2 pages", named="f1.tif")


def test_truncated_tiff_stack_is_not_read_short(tmp_path):
    path = tmp_path / "stack.tif"
    tifffile.imwrite(path, np.stack([frame(i) for i in range(6)]), photometric="minisblack")
    data = path.read_bytes()
    path.write_bytes(data[: len(data) // 2])
    raises(path, "TIFF")


def test_undecodable_video(tmp_path):
    path = tmp_path / "clip.mp4"
    path.write_bytes(np.random.default_rng(1).bytes(4096))
    raises(path, "cannot decode the video")


def test_video_with_no_frames(tmp_path):
    path = tmp_path / "empty.avi"
    vw = cv2.VideoWriter(str(path), cv2.VideoWriter_fourcc(*"MJPG"), 10.0, (32, 24))
    vw.release()                          # a valid AVI container holding zero frames
    raises(path, "no frames")


def test_roi_that_is_not_whole_numbers(tmp_path):
    d = folder_of(tmp_path)
    raises(d, "four whole numbers", cfg=DataConfig(size=8, roi=[0, 0, 10.5, 10]), named="f0.png")


def test_cli_prints_one_line_and_exits_2(tmp_path, capsys):
    d = folder_of(tmp_path)
    (d / "f1.png").write_text("not an image")
    assert main(["inspect", str(d)]) == 2
    out, err = capsys.readouterr()
    assert out == ""
    assert err.count("\n") == 1 and err.startswith("kinecast: error: ") and "f1.png" in err
    assert "Traceback" not in err


def test_reading_never_changes_the_source_files(tmp_path):
    d = folder_of(tmp_path)
    (d / "timestamps.csv").write_text("f0.png,0\nf1.png,0.1\nf2.png,0.2\n")
    before = {p.name: (p.read_bytes(), p.stat().st_mtime_ns) for p in d.iterdir()}
    read_recording(d, DataConfig(size=8))
    (d / "f2.png").write_bytes(b"")
    before["f2.png"] = (b"", (d / "f2.png").stat().st_mtime_ns)
    with pytest.raises(KinecastError):
        read_recording(d, DataConfig(size=8))
    after = {p.name: (p.read_bytes(), p.stat().st_mtime_ns) for p in d.iterdir()}
    assert after == before
