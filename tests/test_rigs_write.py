"""Rig folders on disk and the ``kinecast rig`` verb."""

from __future__ import annotations

import csv
import subprocess
import sys

import imageio.v3 as iio
import numpy as np
import pytest

try:
    import tomllib
except ModuleNotFoundError:  # pragma: no cover - Python 3.10
    import tomli as tomllib

from kinecast.cli import main
from kinecast.errors import KinecastError
from kinecast.rigs import Camera, render_trials, write_rig

SETTINGS = dict(trials=2, frames=30, seed=3, size=24, camera=Camera(drop=0.3, jitter=0.003))


def read_csv(path):
    with open(path, newline="") as fh:
        return list(csv.DictReader(fh))


def test_folder_layout_csvs_and_pngs_agree_with_the_render(tmp_path):
    out = tmp_path / "rig"
    folders = write_rig("pendulum", out, **SETTINGS)
    trials = render_trials("pendulum", **SETTINGS)
    assert [f.name for f in folders] == ["trial_000", "trial_001"]
    for folder, trial in zip(folders, trials):
        stamps = read_csv(folder / "timestamps.csv")
        truth = read_csv(folder / "truth.csv")
        assert list(truth[0])[:3] == ["frame", "time_s", "dropped"]
        assert len(truth) == 30 and trial.dropped.any()
        dropped = {int(r["frame"]) for r in truth if r["dropped"] == "1"}
        assert dropped == set(np.flatnonzero(trial.dropped))
        # timestamps.csv lists exactly the delivered frames, which are exactly the PNGs in the folder
        listed = [r["frame"] for r in stamps]
        assert listed == [f"frame_{i:04d}.png" for i in range(30) if i not in dropped]
        assert {p.name for p in folder.glob("frame_*.png")} == set(listed)
        assert {p.name for p in (folder / "dropped").glob("*.png")} == {f"frame_{i:04d}.png" for i in dropped}
        # times agree between the two CSVs and with the render, and increase strictly
        times = {int(r["frame"]): float(r["time_s"]) for r in truth}
        assert all(float(r["time_s"]) == times[int(r["frame"][6:10])] for r in stamps)
        assert np.array_equal([times[i] for i in range(30)], trial.times)
        assert np.all(np.diff([float(r["time_s"]) for r in stamps]) > 0)
        for col, values in trial.truth.items():
            assert np.array_equal([float(r[col]) for r in truth], values)
        # PNG is lossless (ISO/IEC 15948): imageio reads back the rendered pixels exactly
        for i in range(30):
            path = folder / ("dropped" if i in dropped else "") / f"frame_{i:04d}.png"
            assert np.array_equal(iio.imread(path), trial.frames[i])
        meta = tomllib.loads((folder / "rig.toml").read_text())
        assert (meta["rig"], meta["seed"], meta["fps"], meta["size"]) == ("pendulum", 3, 30.0, 24)
        assert meta["physics"] == trial.params and meta["initial"] == trial.initial
        assert meta["camera"]["drop"] == 0.3


def test_grey_frames_are_single_channel_pngs(tmp_path):
    folder = write_rig("spring", tmp_path / "g", frames=4, size=16, channels="grey")[0]
    img = iio.imread(folder / "frame_0000.png")
    assert img.shape == (16, 16) and img.dtype == np.uint8


def test_refuses_a_non_empty_folder_and_leaves_it_untouched(tmp_path):
    out = tmp_path / "rig"
    out.mkdir()
    (out / "notes.txt").write_text("mine")
    with pytest.raises(KinecastError) as err:
        write_rig("spring", out, frames=4, size=16)
    assert err.value.thing == str(out) and "--overwrite" in err.value.problem
    assert [p.name for p in out.iterdir()] == ["notes.txt"]
    (tmp_path / "file").write_text("x")
    with pytest.raises(KinecastError, match="not a folder"):
        write_rig("spring", tmp_path / "file", frames=4, size=16)


def test_overwrite_replaces_trial_files_and_keeps_other_files(tmp_path):
    out = tmp_path / "rig"
    write_rig("airtable", out, frames=12, size=16, camera=Camera(drop=0.4), seed=1)
    (out / "notes.txt").write_text("mine")
    folder = write_rig("airtable", out, frames=6, size=16, overwrite=True)[0]
    assert (out / "notes.txt").read_text() == "mine"
    # frames of the longer earlier render are gone: they would contradict the new CSVs
    assert sorted(p.name for p in folder.glob("frame_*.png")) == [f"frame_{i:04d}.png" for i in range(6)]
    assert not (folder / "dropped").exists()
    assert len(read_csv(folder / "truth.csv")) == 6


def test_cli_writes_trials_then_refuses_the_same_folder(tmp_path, capsys):
    out = tmp_path / "cli"
    args = ["rig", "spring", "--out", str(out), "--trials", "2", "--frames", "8", "--size", "16",
            "--noise", "0.01", "--param", "gamma=0.5"]
    assert main(args) == 0
    said = capsys.readouterr().out
    assert str(out) in said and "synthetic" in said
    assert sorted(p.name for p in out.iterdir()) == ["trial_000", "trial_001"]
    meta = tomllib.loads((out / "trial_001" / "rig.toml").read_text())
    assert meta["physics"]["gamma"] == 0.5 and meta["camera"]["noise"] == 0.01
    before = (out / "trial_000" / "frame_0000.png").read_bytes()
    assert main(args) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "already exists" in err[0] and str(out) in err[0]
    assert (out / "trial_000" / "frame_0000.png").read_bytes() == before
    assert main(args + ["--overwrite", "--seed", "5"]) == 0


@pytest.mark.parametrize("extra,needle", [
    (["--param", "length=1"], "parameter 'length' of rig 'pendulum'"),
    (["--param", "damping"], "expected KEY=VALUE"),
    (["--drop", "2"], "--drop"),
])
def test_cli_bad_options_exit_2_with_one_line(tmp_path, capsys, extra, needle):
    out = tmp_path / "bad"
    assert main(["rig", "pendulum", "--out", str(out), "--frames", "4", "--size", "16"] + extra) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and needle in err[0]
    assert not out.exists()


def test_cli_as_a_process_prints_no_traceback(tmp_path):
    out = tmp_path / "taken"
    out.mkdir()
    (out / "x").write_text("x")
    proc = subprocess.run([sys.executable, "-m", "kinecast", "rig", "pendulum", "--out", str(out)],
                          capture_output=True, text=True, timeout=120)
    assert proc.returncode == 2
    assert "Traceback" not in proc.stderr and len(proc.stderr.strip().splitlines()) == 1
