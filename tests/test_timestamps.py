"""Frame times: timestamps CSVs, frame rates, dropped-frame detection.

Ground truth for the drop checks is the construction itself: a regular clock with known jitter from
which known frames are removed. The detection rule (an interval above 1.5 x the median interval
hides round(interval / median) - 1 frames) is the project's stated rule; using the median interval
as the nominal period is common practice because it ignores the gaps themselves.
"""

from __future__ import annotations

import imageio.v3 as iio
import numpy as np
import pytest
import tifffile

from kinecast.config import DataConfig
from kinecast.errors import KinecastError
from kinecast.frames import read_recording
from kinecast.frames.timestamps import (find_drops, insert_slots, match_times, parse_times_text,
                                        read_times_csv)


@pytest.fixture(autouse=True)
def _cache_in_tmp(tmp_path, monkeypatch):
    monkeypatch.setenv("KINECAST_CACHE_DIR", str(tmp_path / "cache"))


def tiny(i: int) -> np.ndarray:
    return np.full((6, 8), (37 * i) % 256, dtype=np.uint8)


def stack(tmp_path, n: int, name: str = "stack.tif"):
    path = tmp_path / name
    tifffile.imwrite(path, np.stack([tiny(i) for i in range(n)]), photometric="minisblack")
    return path


def cfg(**kw) -> DataConfig:
    return DataConfig(size=8, **kw)


# --- drops in a jittery clock --------------------------------------------------------------------

def test_gaps_and_jitter_in_a_folder(tmp_path):
    dt, n_clock = 1 / 30, 60
    rng = np.random.default_rng(7)
    clock = np.arange(n_clock) * dt + rng.uniform(-0.03, 0.03, n_clock) * dt   # +-3 % jitter
    dropped = {10: 1, 25: 2, 40: 3}                  # first clock index removed: how many
    gone = {s + j for s, k in dropped.items() for j in range(k)}
    kept = [i for i in range(n_clock) if i not in gone]
    d = tmp_path / "rec"
    d.mkdir()
    rows = ["frame,t_seconds"]
    for i in kept:
        iio.imwrite(d / f"img_{i}.png", tiny(i))
        rows.append(f"img_{i}.png,{clock[i]:.6f}")
    (d / "timestamps.csv").write_text("\n".join(rows) + "\n")

    rec = read_recording(d, cfg())
    assert rec.info["time_source"] == "csv"
    assert rec.n_frames == n_clock and rec.info["n_read"] == len(kept)
    assert int(rec.missing.sum()) == len(gone)
    assert set(np.flatnonzero(rec.missing)) == gone        # slots land where the frames were removed
    assert [(dr["after"], dr["count"]) for dr in rec.info["drops"]] == \
        [(f"img_{s - 1}.png", k) for s, k in dropped.items()]
    np.testing.assert_allclose(rec.times[~rec.missing], np.round(clock[kept], 6))
    for s, k in dropped.items():                      # inserted slots spaced evenly in their gap
        lo, hi = rec.times[s - 1], rec.times[s + k]
        np.testing.assert_allclose(rec.times[s:s + k], np.linspace(lo, hi, k + 2)[1:-1])
    assert np.all(rec.frames[rec.missing] == 0)
    assert [rec.info["names"][i] for i in sorted(gone)] == [""] * len(gone)


@pytest.mark.parametrize("ratio,count", [(1.4, 0), (1.6, 1), (2.0, 1), (2.4, 1), (2.6, 2), (4.0, 3)])
def test_drop_rule_threshold_and_rounding(ratio, count):
    times = np.concatenate([np.arange(10.0), [9.0 + ratio], 9.0 + ratio + np.arange(1.0, 10.0)])
    drops = find_drops(times, 1.5)
    assert sum(k for _, k in drops) == count         # round(ratio) - 1 where ratio > 1.5
    slots, where = insert_slots(times, drops)
    assert len(slots) == len(times) + count
    np.testing.assert_array_equal(slots[where], times)


def test_gap_factor_from_the_config(tmp_path):
    path = stack(tmp_path, 6)
    (tmp_path / "stack.csv").write_text("0,0\n1,1\n2,2\n3,3.8\n4,4.8\n5,5.8\n")
    assert read_recording(path, cfg()).missing.sum() == 1                  # 1.8 > 1.5 x 1
    assert read_recording(path, cfg(gap_factor=2.0)).missing.sum() == 0    # 1.8 < 2.0 x 1


# --- CSV forms and where the CSV is found ------------------------------------------------------------

@pytest.mark.parametrize("text", [
    "0,0.0\n1,0.5\n2,1.0\n3,1.5\n",                               # indices, no header
    "frame,time\n0,0.0\n1,0.5\n2,1.0\n3,1.5\n",                   # header
    "# camera log\nidx;t\n\n0;0.0\n1;0.5\n2;1.0\n3;1.5\n",        # comment, blank, semicolons
    "t\n0.0\n0.5\n1.0\n1.5\n",                                    # one column: frame order
    "frame\ttime\texposure\n3\t1.5\t9\n1\t0.5\t9\n0\t0.0\t9\n2\t1.0\t9\n",   # tabs, any row order
])
def test_csv_forms_beside_a_stack(tmp_path, text):
    path = stack(tmp_path, 4)
    (tmp_path / "stack.csv").write_text(text)
    rec = read_recording(path, cfg())
    np.testing.assert_allclose(rec.times, [0.0, 0.5, 1.0, 1.5])
    assert rec.info["times_file"].endswith("stack.csv")


def test_names_with_or_without_extension_and_explicit_csv(tmp_path):
    d = tmp_path / "rec"
    d.mkdir()
    for i in range(3):
        iio.imwrite(d / f"shot{i}.png", tiny(i))
    (d / "timestamps.csv").write_text("shot0,0\nshot1,0.1\nshot2.png,0.2\n")
    np.testing.assert_allclose(read_recording(d, cfg()).times, [0, 0.1, 0.2])
    other = tmp_path / "other.csv"
    other.write_text("shot0.png,1\nshot1.png,3\nshot2.png,5\n")
    rec = read_recording(d, cfg(), times_csv=other)
    np.testing.assert_allclose(rec.times, [1, 3, 5])
    assert rec.info["times_file"] == str(other)


def test_csv_named_after_the_full_file_name(tmp_path):
    path = stack(tmp_path, 3)
    (tmp_path / "stack.tif.csv").write_text("0,0\n1,0.25\n2,0.5\n")
    np.testing.assert_allclose(read_recording(path, cfg()).times, [0, 0.25, 0.5])


def test_rate_from_config_and_the_default(tmp_path):
    path = stack(tmp_path, 5)
    rec = read_recording(path, cfg(fps=50.0))
    np.testing.assert_allclose(rec.times, np.arange(5) / 50.0)              # t_i = i / fps
    assert rec.info["time_source"] == "fps" and rec.info["problems"] == []
    rec = read_recording(path, cfg())
    np.testing.assert_allclose(rec.times, np.arange(5.0))                   # 1 frame per second
    assert rec.info["time_source"] == "default"
    assert any("no timestamps" in p for p in rec.info["problems"])


# --- bad CSVs --------------------------------------------------------------------------------------

@pytest.mark.parametrize("text,problem", [
    ("0,0\n1,0.2\n2,0.1\n", r"line 3: .*goes back"),
    ("0,0\n1,0.2\n2,0.2\n", r"line 3: .*repeats"),
    ("0,0\n1,0.2\n", r"no time for frame '2'"),
    ("0,0\n1,0.1\n2,0.2\n3,0.3\n", r"line 4: no frame '3'"),
    ("0,0\n1,fast\n2,0.2\n", r"line 2: time 'fast' is not a number"),
    ("0,0\n1,nan\n2,0.2\n", r"line 2: .*not finite"),
    ("0,0\n1,0.1\n1,0.2\n", r"line 3: frame '1' is listed twice"),
    ("frame,time\n", "header but no rows"),
    ("\n# nothing\n", "no rows"),
    ("0,0\n0.1\n2,0.2\n", r"line 2: found 1 column"),
    ("t\n0\n0.1\n", r"2 times for 3 frames"),
])
def test_bad_csv_names_the_file_and_the_problem(tmp_path, text, problem):
    path = stack(tmp_path, 3)
    csv = tmp_path / "stack.csv"
    csv.write_text(text)
    with pytest.raises(KinecastError, match=problem) as err:
        read_recording(path, cfg())
    assert "stack.csv" in str(err.value) and "\n" not in str(err.value)


def test_csv_that_is_not_text_or_not_there(tmp_path):
    path = stack(tmp_path, 3)
    bad = tmp_path / "bin.csv"
    bad.write_bytes(b"\xff\xfe\x00\x81garbage")
    with pytest.raises(KinecastError, match="bin.csv: .*not UTF-8"):
        read_recording(path, cfg(), times_csv=bad)
    with pytest.raises(KinecastError, match="nothere.csv: .*does not exist"):
        read_recording(path, cfg(), times_csv=tmp_path / "nothere.csv")


def test_parser_and_matcher_directly():
    table = parse_times_text("\ufefff,t\r\nb.png,2\r\na.png,1\r\n", "x.csv")
    assert table.keys == ["b.png", "a.png"] and table.lines == [2, 3]
    np.testing.assert_array_equal(match_times(table, ["a.png", "b.png"]), [1.0, 2.0])


def test_read_times_csv_strips_a_byte_order_mark(tmp_path):
    p = tmp_path / "t.csv"
    p.write_bytes("\ufeffframe,time\n0,0\n1,1\n".encode("utf-8"))
    assert read_times_csv(p).keys == ["0", "1"]
