"""``kinecast inspect``: counts, timing and problems reported for recordings built with known faults.

Ground truth is the construction: frames removed from a regular 25 frames/s clock, jitter of a known
size, frames that never change. The median frame rate is 1 / median interval (common practice).
"""

from __future__ import annotations

import imageio.v3 as iio
import numpy as np
import pytest
import tifffile

from kinecast.cli import main
from kinecast.config import DataConfig
from kinecast.frames import format_inspection, inspect_recording


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
