"""Clip rendering: mp4/gif/PNG round trips, refusal to overwrite, panels and contact sheets.

Outside references used here:
- ISO/IEC 14496-10 (H.264) in an MP4 container, decoded by two independent readers: imageio's ffmpeg
  reader and OpenCV's ``cv2.VideoCapture``.
- GIF89a specification (W3C/CompuServe 1990): frame delays are stored in 1/100 s; palette of at most
  256 colours, so frames with <= 256 distinct colours survive exactly.
- PNG (ISO/IEC 15948) is lossless: 8-bit data reads back bit for bit.
- PSNR = 10·log10(MAX² / MSE) computed by ``skimage.metrics.peak_signal_noise_ratio``.
- matplotlib's own colour maps (``matplotlib.colormaps``) as the reference for heat-map colours.
- ``cv2.matchTemplate`` (squared difference) to find tiles in a contact sheet.
"""

from __future__ import annotations

import cv2
import imageio
import imageio.v3 as iio
import matplotlib
import numpy as np
import pytest
from matplotlib.colors import Normalize
from PIL import Image
from skimage.metrics import peak_signal_noise_ratio

from kinecast.errors import KinecastError
from kinecast import render as R

# A lossy H.264 encode at a reasonable rate is commonly judged good above ~30 dB PSNR (common
# practice for 8-bit video; the figure is from memory, not a standard). Our clips are smooth and
# encoded at CRF 18, so 30 dB is a loose bound that still fails on any colour/geometry mistake.
MP4_MIN_PSNR_DB = 30.0


def blob_frames(t_count=10, h=24, w=32, channels=1, seed=0):
    """A smooth bright disc moving across a dim background: codec-friendly test content."""
    rng = np.random.default_rng(seed)
    yy, xx = np.mgrid[0:h, 0:w]
    out = np.empty((t_count, channels, h, w), np.float32)
    tint = rng.uniform(0.4, 1.0, size=channels)
    for t in range(t_count):
        cx, cy = 6 + 2 * t, h / 2
        disc = np.exp(-((xx - cx) ** 2 + (yy - cy) ** 2) / (2 * 3.0**2))
        for c in range(channels):
            out[t, c] = 0.1 + 0.8 * disc * tint[c]
    return out


def reference_rgb8(frames, up):
    """What the clip should show: uint8 RGB, upscaled with np.kron (independent of the module)."""
    f8 = np.round(np.clip(frames, 0, 1) * 255).astype(np.uint8)
    if f8.shape[1] == 1:
        f8 = np.repeat(f8, 3, axis=1)
    big = np.stack([np.kron(f, np.ones((1, up, up), np.uint8)) for f in f8])
    return big.transpose(0, 2, 3, 1)


@pytest.mark.parametrize("channels", [1, 3])
def test_mp4_reads_back_with_imageio_and_opencv(tmp_path, channels):
    frames, up, fps = blob_frames(channels=channels), 2, 25.0
    ref = reference_rgb8(frames, up)
    path = R.write_frames(frames, tmp_path / "clip.mp4", fps, upscale=up)

    reader = imageio.get_reader(path)  # imageio's ffmpeg plugin
    try:
        got = np.stack([f for f in reader])
        assert reader.get_meta_data()["fps"] == pytest.approx(fps)
    finally:
        reader.close()
    assert got.shape == ref.shape
    assert peak_signal_noise_ratio(ref, got, data_range=255) > MP4_MIN_PSNR_DB

    cap = cv2.VideoCapture(str(path))  # OpenCV's own demuxer/decoder path
    try:
        assert int(cap.get(cv2.CAP_PROP_FRAME_COUNT)) == len(frames)
        assert int(cap.get(cv2.CAP_PROP_FRAME_WIDTH)) == ref.shape[2]
        assert int(cap.get(cv2.CAP_PROP_FRAME_HEIGHT)) == ref.shape[1]
        read = []
        while True:
            ok, bgr = cap.read()
            if not ok:
                break
            read.append(cv2.cvtColor(bgr, cv2.COLOR_BGR2RGB))
    finally:
        cap.release()
    assert len(read) == len(frames)
    assert peak_signal_noise_ratio(ref, np.stack(read), data_range=255) > MP4_MIN_PSNR_DB


def test_mp4_with_odd_size_is_padded_to_even(tmp_path):
    # yuv420p stores chroma at half resolution in both directions, so H.264 in yuv420p needs even
    # width and height (ITU-T H.264 4:2:0 sampling).
    frames = blob_frames(t_count=6, h=7, w=9)
    path = R.write_frames(frames, tmp_path / "odd.mp4", 10.0)
    reader = imageio.get_reader(path)
    got = np.stack([f for f in reader])  # not list(reader): its length hint is infinite for video
    reader.close()
    assert got.shape == (6, 8, 10, 3)
    ref = reference_rgb8(frames, 1)
    assert peak_signal_noise_ratio(ref, got[:, :7, :9], data_range=255) > MP4_MIN_PSNR_DB


def test_gif_round_trip_is_exact_for_few_colours(tmp_path):
    rng = np.random.default_rng(1)
    levels = rng.integers(0, 256, size=(5, 1, 12, 16))  # <= 192 grey levels per frame: fits a palette
    frames = (levels / 255.0).astype(np.float32)
    path = R.write_frames(frames, tmp_path / "clip.gif", 20.0)
    with Image.open(path) as im:  # Pillow as the GIF reader
        got = []
        for i in range(im.n_frames):
            im.seek(i)
            got.append(np.asarray(im.convert("L")))
            assert im.info["duration"] == 50  # 1/20 s = 5 hundredths (GIF89a delay units)
    np.testing.assert_array_equal(np.stack(got), levels[:, 0])

    colours = np.array([[255, 0, 0], [0, 128, 255], [20, 200, 20], [250, 250, 250]], np.uint8)
    rgb = colours[rng.integers(0, 4, size=(4, 10, 10))]  # uint8 (T, H, W, 3), 4 colours
    got_rgb = iio.imread(R.write_frames(rgb, tmp_path / "rgb.gif", 10.0), index=None)
    np.testing.assert_array_equal(got_rgb[..., :3], rgb)


def test_gif_keeps_playing_time_when_frames_repeat(tmp_path):
    a, b = np.zeros((1, 1, 6, 6), np.float32), np.ones((1, 1, 6, 6), np.float32)
    path = R.write_frames(np.concatenate([a, a, b]), tmp_path / "rep.gif", 25.0)
    with Image.open(path) as im:
        durations = []
        for i in range(im.n_frames):
            im.seek(i)
            durations.append(im.info["duration"])
    assert sum(durations) == 3 * 40  # three frames of 1/25 s, however many GIF frames hold them


def test_png_folder_round_trip_is_exact(tmp_path):
    levels = np.random.default_rng(2).integers(0, 256, size=(12, 3, 5, 7))
    folder = R.write_frames((levels / 255.0).astype(np.float32), tmp_path / "frames", 5.0, upscale=3)
    names = sorted(p.name for p in folder.iterdir())
    assert names == [f"frame_{i:04d}.png" for i in range(12)]
    for i, name in enumerate(names):
        got = cv2.cvtColor(cv2.imread(str(folder / name)), cv2.COLOR_BGR2RGB)  # OpenCV's PNG decoder
        want = np.kron(levels[i], np.ones((1, 3, 3))).transpose(1, 2, 0)
        np.testing.assert_array_equal(got, want)
    # a trailing slash means a folder too; grey frames stay single-channel PNGs
    grey = R.write_frames(np.zeros((2, 1, 4, 4), np.float32), f"{tmp_path}/grey/", 5.0)
    assert iio.imread(grey / "frame_0001.png").shape == (4, 4)


def test_unknown_extension_is_refused_with_one_line(tmp_path):
    with pytest.raises(KinecastError) as err:
        R.write_frames(blob_frames(3), tmp_path / "clip.xyz", 10.0)
    assert "unknown output extension '.xyz': allowed .mp4, .gif or a folder for PNG frames" in str(err.value)
    assert "\n" not in str(err.value)
    assert list(tmp_path.iterdir()) == []


@pytest.mark.parametrize("name", ["clip.mp4", "clip.gif", "sheet.png"])
def test_existing_file_is_left_untouched(tmp_path, name):
    target = tmp_path / name
    target.write_bytes(b"the user's own bytes")
    frames = blob_frames(4)

    def write(**kw):
        if name.endswith(".png"):
            return R.contact_sheet(frames, np.arange(4) / 10, 1, target, **kw)
        return R.write_frames(frames, target, 10.0, **kw)

    with pytest.raises(KinecastError, match="already exists"):
        write()
    assert target.read_bytes() == b"the user's own bytes"
    assert sorted(p.name for p in tmp_path.iterdir()) == [name]  # no temporary left behind
    write(overwrite=True)  # on request the file is replaced by a real image or clip
    assert len(iio.imread(target, index=0)) > 0


def test_existing_frame_folder_is_refused_then_replaced_on_request(tmp_path):
    folder = tmp_path / "frames"
    folder.mkdir()
    (folder / "notes.txt").write_text("keep")
    with pytest.raises(KinecastError, match="not empty"):
        R.write_frames(blob_frames(3), folder, 10.0)
    assert sorted(p.name for p in folder.iterdir()) == ["notes.txt"]
    R.write_frames(blob_frames(5), folder, 10.0, overwrite=True)
    R.write_frames(blob_frames(2), folder, 10.0, overwrite=True)  # a shorter clip replaces a longer
    assert sorted(p.name for p in folder.iterdir()) == ["frame_0000.png", "frame_0001.png", "notes.txt"]
    assert (folder / "notes.txt").read_text() == "keep"


def test_bad_rate_bad_values_and_unwritable_place_raise_kinecast_error(tmp_path):
    blocker = tmp_path / "a_file"
    blocker.write_text("x")
    with pytest.raises(KinecastError, match="cannot"):
        R.write_frames(blob_frames(2), blocker / "sub" / "clip.mp4", 10.0)  # parent is a file
    with pytest.raises(KinecastError, match="frame rate"):
        R.write_frames(blob_frames(2), tmp_path / "c.mp4", 0.0)
    bad = blob_frames(2)
    bad[1, 0, 3, 3] = np.nan
    with pytest.raises(KinecastError, match="NaN"):
        R.write_frames(bad, tmp_path / "c.gif", 10.0)
    assert sorted(p.name for p in tmp_path.iterdir()) == ["a_file"]


def test_heat_map_matches_matplotlib_colour_maps():
    values = np.random.default_rng(3).uniform(-0.1, 0.7, size=(3, 2, 5, 6))
    for cmap, vmax in [("magma", 1.0), ("viridis", 0.5)]:
        want = matplotlib.colormaps[cmap](Normalize(0.0, vmax)(values.mean(axis=1)), bytes=True)[..., :3]
        np.testing.assert_array_equal(R.heat_map(values, vmax, cmap), want)


@pytest.mark.parametrize("n_cols", [2, 3, 4, 5])
def test_panel_sizes_and_contents(n_cols):
    t_count, h, w, up = 3, 10, 14, 3
    grey, rgb = blob_frames(t_count, h, w, 1), blob_frames(t_count, h, w, 3, seed=4)
    err = np.abs(grey - grey[::-1])
    pool = [("truth", grey), ("prediction", rgb), ("abs. error", err, 1.0), ("spread", err / 2, 0.5, "viridis"),
            ("extra", grey)]
    cols = pool[:n_cols]
    out = R.panel_frames(cols, np.arange(t_count) / 30.0, upscale=up)
    lay = R.panel_layout(n_cols, (h, w), up, heat=n_cols >= 3)
    assert out.dtype == np.uint8 and out.shape == (t_count, lay.height, lay.width, 3)
    # one box per column, each the size of an upscaled frame, left to right, inside the frame
    for (y0, x0, y1, x1) in lay.boxes:
        assert (y1 - y0, x1 - x0) == (h * up, w * up)
        assert 0 <= y0 and y1 <= lay.height and 0 <= x0 and x1 <= lay.width
    lefts = [b[1] for b in lay.boxes]
    assert all(b[3] <= a for a, b in zip(lefts[1:], lay.boxes))  # no overlap
    # the frames appear unchanged inside their boxes; heat columns in matplotlib's colours
    for (y0, x0, y1, x1), col in zip(lay.boxes, cols):
        if len(col) == 2:
            want = reference_rgb8(col[1], up)
        else:
            cmap = col[3] if len(col) > 3 else "magma"
            small = matplotlib.colormaps[cmap](Normalize(0, col[2])(col[1].mean(axis=1)), bytes=True)[..., :3]
            want = small.repeat(up, axis=1).repeat(up, axis=2)
        np.testing.assert_array_equal(out[:, y0:y1, x0:x1], want)
        assert (out[0, :y0, x0:x1] != R.BACKGROUND).any()  # a title is drawn above each panel


def test_panel_width_grows_by_one_panel_per_column():
    f = blob_frames(2, 8, 8)
    widths = [R.panel_frames([("a", f)] * n, np.arange(2.0), 4).shape[2] for n in range(1, 6)]
    steps = np.diff(widths)
    assert (steps == steps[0]).all() and steps[0] >= 8 * 4


def test_time_text_changes_pixels_only_in_the_time_band():
    still = np.repeat(blob_frames(1, 12, 12), 3, axis=0)  # the same image three times
    out = R.panel_frames([("truth", still), ("prediction", still)], np.array([0.0, 1.0, 2.5]), 2)
    changed = np.argwhere((out[0] != out[1]).any(axis=-1))
    assert len(changed) > 0
    assert changed[:, 0].min() >= out.shape[1] - R.BAND
    # at 1000 frames per second two decimals would print the same time: the label must still differ
    fast = R.panel_frames([("truth", still[:2]), ("prediction", still[:2])], np.array([0.0, 0.001]), 2)
    assert (fast[0] != fast[1]).any()


def test_comparison_columns():
    truth, pred = blob_frames(3), blob_frames(3, seed=5)[::-1].copy()
    cols = R.comparison_columns(pred, truth, spread=np.zeros_like(pred))
    assert [c[0] for c in cols] == ["truth", "prediction", "abs. error", "spread (std)"]
    np.testing.assert_allclose(cols[2][1], np.abs(truth - pred))
    assert cols[2][2] == 1.0  # largest possible |error| on [0, 1]
    # the spread scale fits the spread shown: none here, so one 8-bit grey level (its floor)
    assert cols[3][2] == pytest.approx(1 / 255)
    spread = np.zeros_like(pred)
    spread[1, :, 2, 3] = 0.2
    assert R.comparison_columns(pred, truth, spread=spread)[3][2] == pytest.approx(0.2)
    assert [c[0] for c in R.comparison_columns(pred)] == ["prediction"]


def test_contact_sheet_holds_every_nth_frame(tmp_path):
    rng = np.random.default_rng(6)
    frames = rng.random((11, 1, 9, 9)).astype(np.float32)  # random content: tiles are unambiguous
    times = np.arange(11) / 24.0
    path = R.contact_sheet(frames, times, 5, tmp_path / "sheet.png", upscale=2)
    sheet = iio.imread(path)
    assert sheet.ndim == 3 and sheet.shape[2] == 3
    tiles = reference_rgb8(frames, 2)
    for i in range(11):
        _, _, (x, y), _ = cv2.minMaxLoc(cv2.matchTemplate(sheet, tiles[i], cv2.TM_SQDIFF))
        found = np.array_equal(sheet[y:y + 18, x:x + 18], tiles[i])  # best match, checked exactly
        assert found == (i % 5 == 0), i  # frames 0, 5, 10 are there, the others are not
    with pytest.raises(KinecastError, match="unknown output extension"):
        R.contact_sheet(frames, times, 5, tmp_path / "sheet.jpg")
