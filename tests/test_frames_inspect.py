"""``kinecast inspect``: counts, timing and problems reported for recordings built with known faults.

Ground truth is the construction: frames removed from a regular 25 frames/s clock, jitter of a known
size, frames that never change. The median frame rate is 1 / median interval (common practice).
"""

from __future__ import annotations

import cv2
import imageio.v3 as iio
import numpy as np
import pytest
import tifffile

from kinecast.cli import main
from kinecast.config import DataConfig
from kinecast.frames import format_inspection, inspect_recording
from kinecast.frames.inspect import EDGE_SHARE_MIN, noise_sigma


@pytest.fixture(autouse=True)
def _cache_in_tmp(tmp_path, monkeypatch):
    monkeypatch.setenv("KINECAST_CACHE_DIR", str(tmp_path / "cache"))


def moving(i: int) -> np.ndarray:
    img = np.zeros((16, 24), np.uint8)
    img[6:10, i % 20:i % 20 + 4] = 255
    return img


def folder(tmp_path, times: dict[int, float], make=moving, csv=True):
    d = tmp_path / "rec"
    d.mkdir()
    for i in times:
        iio.imwrite(d / f"cam_{i:03d}.png", make(i))
    if csv:
        (d / "timestamps.csv").write_text("".join(f"cam_{i:03d}.png,{t}\n" for i, t in times.items()))
    return d


def test_cli_reports_dropped_frames(tmp_path, capsys):
    removed = {5, 12, 13}                                 # 3 frames lost from a 25 frames/s clock
    d = folder(tmp_path, {i: i / 25 for i in range(30) if i not in removed})
    assert main(["inspect", str(d), "--set", "data.size=8"]) == 0
    out, err = capsys.readouterr()
    assert "27 read, 3 dropped, 30 slots" in out
    assert "1 after cam_004.png" in out and "2 after cam_011.png" in out
    assert "25 frames/s" in out                            # 1 / median interval = 1 / 0.04 s
    report = inspect_recording(d, DataConfig(size=8))
    assert report["dropped"] == 3 and report["frames_read"] == 27
    assert report["median_fps"] == pytest.approx(25.0)
    assert report["duration_s"] == pytest.approx(29 / 25)
    assert not any("irregular" in p for p in report["problems"])


def test_irregular_timing_is_a_problem(tmp_path):
    rng = np.random.default_rng(3)
    t = np.cumsum(0.04 * (1 + rng.uniform(-0.3, 0.3, 20)))      # +-30 % jitter: above 10 %
    report = inspect_recording(folder(tmp_path, dict(enumerate(t))), DataConfig(size=8, gap_factor=2.0))
    assert any(p.startswith("irregular timing") for p in report["problems"])


def test_nearly_constant_frames_are_a_problem(tmp_path):
    still = folder(tmp_path, {i: i / 10 for i in range(6)}, make=lambda i: np.full((16, 24), 90, np.uint8))
    report = inspect_recording(still, DataConfig(size=8))
    assert any(p.startswith("frames nearly constant") for p in report["problems"])
    assert "problem     frames nearly constant" in format_inspection(report)


def test_missing_timestamps_and_times_option(tmp_path, capsys):
    d = folder(tmp_path, {i: i / 10 for i in range(5)}, csv=False)
    assert main(["inspect", str(d), "--set", "data.size=8"]) == 0
    out = capsys.readouterr().out
    assert "no timestamps" in out and "assumed" in out
    other = tmp_path / "times.csv"
    other.write_text("".join(f"cam_{i:03d}.png,{i / 50}\n" for i in range(5)))
    assert main(["inspect", str(d), "--times", str(other), "--set", "data.size=8"]) == 0
    out = capsys.readouterr().out
    assert "50 frames/s" in out and "times.csv" in out and "no timestamps" not in out
    assert "problems    none found" in out


def test_sixteen_bit_files_holding_twelve_bits(tmp_path):
    # A 12-bit sensor writes values up to 2**12 - 1 = 4095 into 16-bit files (common practice).
    path = tmp_path / "cam.tif"
    frames = np.stack([moving(i).astype(np.uint16) * 16 for i in range(5)])    # max 4080
    tifffile.imwrite(path, frames, photometric="minisblack")
    report = inspect_recording(path, DataConfig(size=8, fps=10.0))
    assert report["bit_depth"] == 16
    assert any("12 bits" in p for p in report["problems"])
    tifffile.imwrite(path, frames * 16, photometric="minisblack")               # max 65280
    assert not any("12 bits" in p for p in inspect_recording(path, DataConfig(size=8, fps=10.0))["problems"])


def test_many_gaps_are_counted_not_all_listed(tmp_path):
    removed = set(range(3, 60, 5))                        # 12 single-frame gaps
    d = folder(tmp_path, {i: i / 25 for i in range(62) if i not in removed})
    report = inspect_recording(d, DataConfig(size=8))
    assert report["dropped"] == 12 and len(report["drops"]) == 12
    line = next(ln for ln in format_inspection(report).splitlines() if ln.startswith("dropped"))
    assert line.count(" after ") == 8 and line.endswith("and 4 more gap(s)")


# --- The fixed-camera check ------------------------------------------------------------------
# Clips are built from one photograph bundled with scikit-image (skimage.data.camera, 512x512 grey),
# shrunk to 192x192 with area averaging and cut to its central 128x128 (so image borders never
# show); frames are read at data.size = 64, i.e. shrunk 2x.
SRC, CROP, SCALE = 192, 128, 2


def _photo() -> np.ndarray:
    from skimage import data
    return cv2.resize(data.camera(), (SRC, SRC), interpolation=cv2.INTER_AREA)


def _centre(img: np.ndarray) -> np.ndarray:
    m = (SRC - CROP) // 2
    return img[m:m + CROP, m:m + CROP]


def _write_clip(d, frames, fps=25.0):
    d.mkdir(parents=True)
    for i, f in enumerate(frames):
        iio.imwrite(d / f"f_{i:03d}.png", f)
    (d / "timestamps.csv").write_text("".join(f"f_{i:03d}.png,{i / fps}\n" for i in range(len(frames))))
    return d


def panning_clip(d, n=30, step=(1.0, 1 / 3)):
    """The photograph translated by k·step source pixels in frame k (cv2.warpAffine): a pan."""
    img = _photo()
    frames = []
    for k in range(n):
        shift = np.float32([[1, 0, -k * step[0]], [0, 1, -k * step[1]]])
        frames.append(_centre(cv2.warpAffine(img, shift, (SRC, SRC), flags=cv2.INTER_LINEAR,
                                             borderMode=cv2.BORDER_REFLECT)))
    return _write_clip(d, frames)


DISC_R = 10          # source pixels


def disc_clip(d, n=30, noise=0.0, seed=0):
    """A white disc (cv2.circle) circling the centre of the still photograph: a fixed camera."""
    rng = np.random.default_rng(seed)
    still = _centre(_photo())
    frames = []
    for k in range(n):
        f = still.copy()
        centre = (int(CROP / 2 + 25 * np.cos(k / 4)), int(CROP / 2 + 25 * np.sin(k / 4)))
        cv2.circle(f, centre, DISC_R, 255, -1)
        if noise:
            f = np.clip(np.round(f + rng.normal(0, noise, f.shape)), 0, 255).astype(np.uint8)
        frames.append(f)
    return _write_clip(d, frames)


def test_panning_clip_is_warned(tmp_path, capsys):
    d = panning_clip(tmp_path / "pan")
    report = inspect_recording(d, DataConfig(size=64))
    cam = report["camera"]
    assert cam["moves"] and cam["edge_share"] < EDGE_SHARE_MIN
    warnings = [p for p in report["problems"] if p.startswith("camera or whole scene seems to move")]
    assert len(warnings) == 1 and "\n" not in warnings[0] and "as in a pan" in warnings[0]
    # The drift is the construction's: 29 frames × (1, 1/3) source px, over 2 (64 of 128 px), as a
    # share of the 64 px side; phase correlation (OpenCV) finds it to within 10 %.
    expected = np.hypot(29 * 1.0, 29 / 3) / SCALE / 64
    assert cam["drift"] == pytest.approx(expected, rel=0.10)
    assert cam["drift_steadiness"] > 0.9
    # A warning is not an error: the verb still exits 0 and prints it on one problem line.
    assert main(["inspect", str(d), "--set", "data.size=64"]) == 0
    out = capsys.readouterr().out
    assert sum(line.startswith("problem     camera or whole scene") for line in out.splitlines()) == 1


def test_still_camera_with_a_moving_disc_is_not_warned(tmp_path, capsys):
    d = disc_clip(tmp_path / "still")
    report = inspect_recording(d, DataConfig(size=64))
    cam = report["camera"]
    assert not cam["moves"] and cam["drift"] is None
    assert not any(p.startswith("camera") for p in report["problems"])
    # Only the disc is unexplained: its area π r² (closed form) over the frame's area bounds the
    # share the background leaves out (plus the one-pixel rim that area averaging blurs).
    disc_share = np.pi * (DISC_R + SCALE) ** 2 / CROP ** 2
    assert 1 - disc_share <= cam["background_share"] < 1.0
    assert cam["edge_share"] == pytest.approx(1.0)             # the disc never reaches the edge band
    assert main(["inspect", str(d), "--set", "data.size=64"]) == 0
    out = capsys.readouterr().out
    assert "problems    none found" in out and "background  the still background explains" in out


def test_sensor_noise_is_not_camera_motion(tmp_path):
    # Gaussian noise of σ = 6 grey levels per source pixel (plus PNG rounding, uniform: variance
    # 1/12, a textbook fact) becomes σ/2 after averaging 2x2 independent pixels (shrinking 2x).
    sigma = 6.0
    d = disc_clip(tmp_path / "noisy", noise=sigma)
    cam = inspect_recording(d, DataConfig(size=64))["camera"]
    assert not cam["moves"]
    assert cam["noise"] * 255 == pytest.approx(np.sqrt(sigma ** 2 + 1 / 12) / SCALE, rel=0.15)


def test_noise_estimate_on_pure_gaussian_noise():
    # Closed form: both robust estimates equal σ for independent Gaussian noise (MAD → σ via
    # 1/Φ⁻¹(3/4) = 1.4826; the difference of two samples has σ√2; a 2x2 Haar detail (a-b-c+d)/2
    # has σ).
    rng = np.random.default_rng(5)
    texture = rng.uniform(0, 1, (48, 48))                           # a still, random background
    frames = texture[None] + rng.normal(0, 0.02, (40, 48, 48))
    assert noise_sigma(frames) == pytest.approx(0.02, rel=0.05)
    flat = 0.5 + rng.normal(0, 0.02, (40, 48, 48))
    assert noise_sigma(flat) == pytest.approx(0.02, rel=0.05)


def test_folder_of_trials_prints_a_line_per_trial_and_totals(tmp_path, capsys):
    trials = tmp_path / "session"
    panning_clip(trials / "trial_1")
    disc_clip(trials / "trial_2")
    (trials / "notes").mkdir()                                      # no frames: not a trial
    assert main(["inspect", str(trials), "--set", "data.size=64"]) == 0
    lines = capsys.readouterr().out.splitlines()
    assert len(lines) == 3
    assert lines[0].startswith("trial_1  30 frames, 0 dropped") and "camera or whole scene" in lines[0]
    assert lines[1].startswith("trial_2  30 frames, 0 dropped") and lines[1].endswith("no problems found")
    assert lines[2].startswith("total    2 trial(s), 60 frames read, 0 dropped")
    assert "1 with problems (1 with a moving camera or scene)" in lines[2]
    # one timestamps file cannot serve several trials
    assert main(["inspect", str(trials), "--times", str(trials / "trial_1" / "timestamps.csv")]) == 2
    assert capsys.readouterr().err.count("\n") == 1


def test_folder_of_trials_with_an_unreadable_trial(tmp_path, capsys):
    trials = tmp_path / "session"
    disc_clip(trials / "a")
    bad = disc_clip(trials / "b")
    (bad / "f_004.png").write_bytes(b"not a png")
    assert main(["inspect", str(trials), "--set", "data.size=64"]) == 2
    out, err = capsys.readouterr()
    lines = out.splitlines()
    assert lines[0].startswith("a  30 frames") and lines[1].startswith("b  cannot read: ")
    assert "f_004.png" in lines[1] and "1 unreadable" in lines[2]
    assert err.count("\n") == 1 and "f_004.png" in err


def test_camera_check_judges_the_picture_not_its_letterbox():
    # A static wide picture (128 x 40 source, 32 x 10 at model size) whose padding rows have been
    # filled with a pattern that pans 5 px a frame: judged without the padding, every edge pixel is
    # explained by the background (share 1.0); with the padding it would look like a moving camera.
    from kinecast.frames.inspect import camera_check
    from kinecast.frames.preprocess import square_geometry
    from kinecast.frames.recording import Recording

    geo = square_geometry(128, 40, 32)
    x = np.arange(32)
    frames = np.stack([np.tile(0.5 + 0.4 * np.sin((x + 5 * i) / 3.0), (32, 1)) for i in range(8)])
    frames = frames[:, None].astype(np.float32)
    picture = np.tile(np.linspace(0.2, 0.8, 32, dtype=np.float32), (geo.content_h, 1))
    frames[:, 0, geo.top:geo.top + geo.content_h, :] = picture
    rec = Recording(frames, np.arange(8) / 30.0, np.zeros(8, bool), "wide", {"source_size": [128, 40]})
    check = camera_check(rec)
    assert check["edge_share"] == 1.0 and not check["moves"]
    unpadded = Recording(frames, rec.times, rec.missing, "square")
    assert camera_check(unpadded)["edge_share"] < EDGE_SHARE_MIN
