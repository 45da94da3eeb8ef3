"""Bad input across every verb: one line, exit status 2, no traceback, nothing changed on disk.

Each case builds one bad input (most are a copy of a good synthetic recording or run folder, then
damaged), runs ``kinecast.cli.main([...])`` in-process and checks:

* the return value is 2 (the project's exit status for bad input, kinecast.errors.EXIT_BAD_INPUT);
* stderr is exactly one line, it starts ``kinecast: error:``, names the file or option at fault and
  matches the expected problem; no ``Traceback`` anywhere;
* every file and folder under the case folder and the shared recording and run folders has the same
  SHA-256 before and after (nothing overwritten, nothing half-written, no temporary left behind).

What counts as damaged follows the file formats' own specifications (PNG: ISO/IEC 15948, a file cut
before its IEND chunk is incomplete; TIFF 6.0; a video container with no frames holds no images) and
RFC 4180 for the comma-separated timestamps. A few cases also run as a real ``python -m kinecast``
subprocess, where the exit status and the absence of a traceback are checked on the real process.

"Read-only output folder": the suite runs as root in CI, and root writes through chmod 0o555. So the
unwritable target used everywhere is a path *below a regular file* (``a_file/out``), which no user,
root included, can create (POSIX: ENOTDIR). When the suite runs as an ordinary user, a chmod 0o555
folder is tested as well.
"""

from __future__ import annotations

import hashlib
import os
import re
import shutil
import subprocess
import sys
from dataclasses import dataclass
from pathlib import Path
from typing import Callable

import cv2
import imageio.v3 as iio
import numpy as np
import pytest
import tifffile
import torch

from kinecast import config as C
from kinecast.cli import main
from kinecast.errors import EXIT_BAD_INPUT
from kinecast.rigs import write_rig
from kinecast.train import fit
from kinecast import runfolder as rf

SIZE = 32                        # model frame size of the tiny run
FRAMES = 20                      # frames per synthetic trial
TINY = ["data.size=32", "model.latent_dim=4", "model.enc_channels=8", "model.dec_channels=8",
        "model.hidden=16", "train.batch=2", "train.val_every=2", "train.checkpoint_every=2",
        "train.window_start=6", "train.threads=1", "train.warmup_steps=1", "train.budget=0"]
UNWRITABLE = r"cannot write here \(.*a_file is a file, not a folder\)"
SRC = Path(__file__).resolve().parents[1] / "src"


@dataclass
class World:
    rig: Path          # folder of trial folders (grey 32x32 pendulum)
    trial: Path        # one good recording (frame PNGs + timestamps.csv)
    run: Path          # a trained tiny run folder


@pytest.fixture(scope="session")
def world(tmp_path_factory) -> World:
    base = tmp_path_factory.mktemp("bad_inputs_world")
    rig = base / "rig"
    write_rig("pendulum", rig, trials=2, frames=FRAMES, seed=3, size=SIZE, fps=20.0, channels="grey")
    cfg = C.apply_overrides(C.Config(), TINY + ["train.steps=4"])
    threads = torch.get_num_threads()
    try:
        fit([rig], base / "run", cfg, show_progress=False)
    finally:
        torch.set_num_threads(threads)
    return World(rig, rig / "trial_001", base / "run")


def snapshot(*roots: Path) -> dict[str, str]:
    """Every file's SHA-256 and every folder, under each root."""
    out = {}
    for root in roots:
        for p in sorted(root.rglob("*")):
            out[str(p)] = "<dir>" if p.is_dir() else hashlib.sha256(p.read_bytes()).hexdigest()
    return out


# --- builders of bad inputs ---------------------------------------------------------------------

def good_copy(t: Path, w: World, name: str = "rec") -> Path:
    """A copy of a good recording (so damaging it never touches the shared one)."""
    return Path(shutil.copytree(w.trial, t / name, ignore=shutil.ignore_patterns("dropped")))


def frames_of(rec: Path) -> list[Path]:
    return sorted(rec.glob("frame_*.png"))


def png_folder(t: Path, n: int, name: str = "rec") -> Path:
    d = t / name
    d.mkdir()
    for i in range(n):
        iio.imwrite(d / f"f{i}.png", np.full((SIZE, SIZE), 10 * i, np.uint8))
    return d


def run_copy(t: Path, w: World, name: str = "run") -> Path:
    return Path(shutil.copytree(w.run, t / name))


def a_file(t: Path) -> Path:
    """A regular file: any path below it cannot be created, not even by root (ENOTDIR)."""
    f = t / "a_file"
    f.write_text("a regular file, not a folder\n")
    return f


def rewrite_times(rec: Path, edit: Callable[[list[str]], list[str]]) -> Path:
    """Rewrite the recording's timestamps.csv rows (header kept) with ``edit``."""
    csv = rec / "timestamps.csv"
    head, *rows = csv.read_text().splitlines()
    csv.write_text("\n".join([head] + edit(rows)) + "\n")
    return csv


def set_key(run: Path, key: str, value: str) -> None:
    """Change one ``key = value`` line of a run's config.toml."""
    cfg = run / rf.CONFIG
    lines = [f"{key} = {value}" if ln.split("=")[0].strip() == key else ln
             for ln in cfg.read_text().splitlines()]
    cfg.write_text("\n".join(lines) + "\n")


# --- the matrix: name -> builder(tmp, world) -> (argv, thing named in the message, problem regex) --

CASES: dict[str, Callable] = {}


def case(name: str):
    def register(fn):
        CASES[name] = fn
        return fn
    return register


@case("inspect: empty folder")
def _(t, w):
    (t / "empty").mkdir()
    return ["inspect", str(t / "empty")], str(t / "empty"), "no image files"


@case("fit: folder with one frame")
def _(t, w):
    d = png_folder(t, 1)
    return ["fit", str(d), "--out", str(t / "run"), "--steps", "2", "--set", "train.threads=1"], \
        str(d), r"1 frame\(s\); at least 3"


@case("forecast: frames of mixed sizes")
def _(t, w):
    d = good_copy(t, w)
    iio.imwrite(frames_of(d)[5], np.zeros((SIZE, SIZE + 8), np.uint8))
    return ["forecast", str(w.run), str(d), "--out", str(t / "clip.mp4")], "frame_0005.png", \
        "40x32 but earlier frames are 32x32"


@case("fill: grey and colour frames mixed")
def _(t, w):
    d = good_copy(t, w)
    iio.imwrite(frames_of(d)[3], np.zeros((SIZE, SIZE, 3), np.uint8))
    return ["fill", str(w.run), str(d), "--out", str(t / "filled")], "frame_0003.png", \
        "colour but earlier frames are grey"


@case("score: truncated PNG")
def _(t, w):
    d = good_copy(t, w)
    f = frames_of(d)[7]
    data = f.read_bytes()
    f.write_bytes(data[: len(data) // 2])      # cut before IEND (ISO/IEC 15948)
    return ["score", str(w.run), str(d), "--holdout", "last:8", "--out", str(t / "scores")], \
        "frame_0007.png", "not a readable PNG"


@case("score --pred: zero-byte frame")
def _(t, w):
    d = good_copy(t, w, "pred")
    frames_of(d)[2].write_bytes(b"")
    return ["score", "--pred", str(d), "--truth", str(w.trial), "--out", str(t / "scores"),
            "--set", "data.size=32"], "frame_0002.png", r"empty \(0 bytes\)"


@case("inspect: text file with an image extension")
def _(t, w):
    d = good_copy(t, w)
    frames_of(d)[1].write_text("this frame was never saved\n")
    return ["inspect", str(d)], "frame_0001.png", "not a readable PNG"


@case("inspect: 16-bit TIFF among 8-bit frames")
def _(t, w):
    d = t / "rec"
    d.mkdir()
    for i in range(4):
        img = np.full((SIZE, SIZE), 20 * i, np.uint8)
        tifffile.imwrite(d / f"f{i}.tif", img.astype(np.uint16) * 257 if i == 2 else img)
    return ["inspect", str(d)], "f2.tif", "uint16 but earlier frames are uint8"


@case("forecast: float TIFF stack holding NaN")
def _(t, w):
    stack = np.full((6, SIZE, SIZE), 0.5, np.float32)
    stack[4, 3, 3] = np.nan
    tifffile.imwrite(t / "nan.tif", stack, photometric="minisblack")
    return ["forecast", str(w.run), str(t / "nan.tif"), "--out", str(t / "clip.mp4")], "nan.tif", \
        "NaN or infinite"


@case("fit: float TIFF stack holding Inf")
def _(t, w):
    stack = np.full((6, SIZE, SIZE), 0.5, np.float32)
    stack[2, 0, 0] = np.inf
    tifffile.imwrite(t / "inf.tif", stack, photometric="minisblack")
    return ["fit", str(t / "inf.tif"), "--out", str(t / "run"), "--steps", "2",
            "--set", "train.threads=1"], "inf.tif", "NaN or infinite"


@case("inspect: unknown extension")
def _(t, w):
    (t / "clip.xyz").write_bytes(b"\x00" * 64)
    return ["inspect", str(t / "clip.xyz")], "clip.xyz", "unknown extension '.xyz'"


@case("forecast: undecodable video")
def _(t, w):
    (t / "noise.mp4").write_bytes(np.random.default_rng(0).bytes(4096))
    return ["forecast", str(w.run), str(t / "noise.mp4"), "--out", str(t / "clip.mp4")], \
        "noise.mp4", "cannot decode the video"


@case("inspect: video with no frames")
def _(t, w):
    vw = cv2.VideoWriter(str(t / "empty.avi"), cv2.VideoWriter_fourcc(*"MJPG"), 10.0, (SIZE, SIZE))
    vw.release()                               # a valid AVI container holding zero frames
    return ["inspect", str(t / "empty.avi")], "empty.avi", "no frames"


@case("fill: timestamps CSV with a missing row")
def _(t, w):
    d = good_copy(t, w)
    rewrite_times(d, lambda rows: rows[:4] + rows[5:])
    return ["fill", str(w.run), str(d), "--out", str(t / "filled")], "timestamps.csv", \
        "no time for frame 'frame_0004.png'"


@case("inspect: timestamps CSV with a duplicated row")
def _(t, w):
    d = good_copy(t, w)
    rewrite_times(d, lambda rows: rows[:6] + [rows[5]] + rows[6:])
    return ["inspect", str(d)], "timestamps.csv", "listed twice"


@case("fit: timestamps CSV going back in time")
def _(t, w):
    d = good_copy(t, w)
    rewrite_times(d, lambda rows: rows[:8] + [rows[8].split(",")[0] + ",0.01"] + rows[9:])
    return ["fit", str(d), "--out", str(t / "run"), "--steps", "2", "--set", "train.threads=1"], \
        "timestamps.csv", "goes back from .*times must increase"


@case("score: timestamps CSV with a non-numeric time")
def _(t, w):
    d = good_copy(t, w)
    rewrite_times(d, lambda rows: rows[:3] + [rows[3].split(",")[0] + ",soon"] + rows[4:])
    return ["score", str(w.run), str(d), "--out", str(t / "scores")], "timestamps.csv", \
        "time 'soon' is not a number"


@case("fit: config file with an unknown key")
def _(t, w):
    (t / "my.toml").write_text("[train]\nstep = 10\n")
    return ["fit", str(w.trial), "--out", str(t / "run"), "--config", str(t / "my.toml")], \
        "train.step", "unknown key in .*my.toml"


@case("config: config file with a wrong type")
def _(t, w):
    (t / "my.toml").write_text("[model]\nlatent_dim = \"eight\"\n")
    return ["config", "--config", str(t / "my.toml"), "--out", str(t / "out.toml")], \
        "model.latent_dim", "bad value 'eight': allowed a whole number"


@case("inspect: --set with a value out of range")
def _(t, w):
    return ["inspect", str(w.trial), "--set", "data.size=4"], "data.size", "allowed a number from 8"


@case("forecast: run folder without weights")
def _(t, w):
    run = run_copy(t, w)
    (run / rf.WEIGHTS).unlink()
    return ["forecast", str(run), str(w.trial), "--out", str(t / "clip.mp4")], str(run), \
        "missing weights.safetensors"


@case("fill: weights of another model size")
def _(t, w):
    run = run_copy(t, w)
    set_key(run, "keypoints", "3")            # config says 3, the weights were saved with 2
    return ["fill", str(run), str(w.trial), "--out", str(t / "filled")], rf.WEIGHTS, \
        r"do not match the run's config.toml \(tensor .* has shape \(2, .* builds \(3, "


@case("forecast: weights of another model size")
def _(t, w):
    run = run_copy(t, w)
    set_key(run, "hidden", "32")
    return ["forecast", str(run), str(w.trial), "--out", str(t / "clip.mp4")], rf.WEIGHTS, \
        "do not match the run's config.toml"


@case("forecast: --set changes the frame size the run was trained at")
def _(t, w):
    return ["forecast", str(w.run), str(w.trial), "--out", str(t / "clip.mp4"),
            "--set", "data.size=16"], "--set data.size", "trained with data.size = 32"


@case("fill: --set changes a model key of the run")
def _(t, w):
    return ["fill", str(w.run), str(w.trial), "--out", str(t / "filled"),
            "--set", "model.velocity_frames=4"], "--set model.velocity_frames", \
        "trained with model.velocity_frames = 3"


@case("fit: output folder inside the input folder")
def _(t, w):
    d = good_copy(t, w)
    return ["fit", str(d), "--out", str(d / "run"), "--steps", "2", "--set", "train.threads=1"], \
        str(d / "run"), "inside the input"


@case("forecast: output inside the input folder")
def _(t, w):
    d = good_copy(t, w)
    return ["forecast", str(w.run), str(d), "--out", str(d / "clip.mp4")], "clip.mp4", \
        "inside the input folder"


@case("fill: output is the input folder")
def _(t, w):
    d = good_copy(t, w)
    return ["fill", str(w.run), str(d), "--out", str(d)], str(d), "inside the input folder"


@case("score: output inside the run folder")
def _(t, w):
    run = run_copy(t, w)
    return ["score", str(run), str(w.trial), "--out", str(run / "scores")], str(run / "scores"), \
        "inside the input folder"


@case("rig: output already exists")
def _(t, w):
    (t / "mine").mkdir()
    (t / "mine" / "notes.txt").write_text("my notes\n")
    return ["rig", "pendulum", "--out", str(t / "mine"), "--frames", "4", "--size", "16"], str(t / "mine"), \
        "already exists"


@case("fit: output already exists")
def _(t, w):
    (t / "run").mkdir()
    (t / "run" / "notes.txt").write_text("my notes\n")
    return ["fit", str(w.trial), "--out", str(t / "run"), "--steps", "2",
            "--set", "train.threads=1"], str(t / "run"), "already exists"


@case("forecast: a side file of the output already exists")
def _(t, w):
    (t / "clip_latents.csv").write_text("mine\n")
    return ["forecast", str(w.run), str(w.trial), "--out", str(t / "clip.mp4")], \
        "clip_latents.csv", "already exists"


@case("fill: output folder already exists")
def _(t, w):
    (t / "filled").mkdir()
    (t / "filled" / "frame_0000.png").write_bytes(b"mine")
    return ["fill", str(w.run), str(w.trial), "--out", str(t / "filled")], str(t / "filled"), \
        "already exists"


@case("score: output folder already exists")
def _(t, w):
    (t / "scores").mkdir()
    (t / "scores" / "summary.json").write_text("{}\n")
    return ["score", str(w.run), str(w.trial), "--out", str(t / "scores")], str(t / "scores"), \
        "already exists"


@case("report: report already exists")
def _(t, w):
    run = run_copy(t, w)
    (run / "report.html").write_text("<p>mine</p>\n")
    return ["report", str(run)], "report.html", "already exists"


@case("config: output file already exists")
def _(t, w):
    (t / "my.toml").write_text("# mine\n")
    return ["config", "--out", str(t / "my.toml")], "my.toml", "already exists"


@case("forecast: unwritable output (below a regular file)")
def _(t, w):
    return ["forecast", str(w.run), str(w.trial), "--out", str(a_file(t) / "clip.mp4")], "a_file", \
        UNWRITABLE


@case("fill: unwritable output (below a regular file)")
def _(t, w):
    return ["fill", str(w.run), str(w.trial), "--out", str(a_file(t) / "filled")], "a_file", \
        UNWRITABLE


@case("score: unwritable output (below a regular file)")
def _(t, w):
    return ["score", str(w.run), str(w.trial), "--out", str(a_file(t) / "scores")], "a_file", \
        UNWRITABLE


@case("fit: unwritable output (below a regular file)")
def _(t, w):
    return ["fit", str(w.trial), "--out", str(a_file(t) / "run"), "--steps", "2",
            "--set", "train.threads=1"], "a_file", UNWRITABLE


@case("rig: unwritable output (below a regular file)")
def _(t, w):
    return ["rig", "pendulum", "--out", str(a_file(t) / "rig"), "--frames", "4", "--size", "16"], \
        "a_file", UNWRITABLE


@case("rig: unknown look")
def _(t, w):
    return ["rig", "ball", "--out", str(t / "looks"), "--frames", "4", "--size", "16", "--look", "glossy"], \
        "look 'glossy'", "unknown look: allowed classic, .*, mixed"


@case("report: unwritable output (below a regular file)")
def _(t, w):
    return ["report", str(w.run), "--out", str(a_file(t) / "r.html")], "a_file", \
        UNWRITABLE


@case("report: a scores folder that is not one")
def _(t, w):
    (t / "scores").mkdir()
    return ["report", str(w.run), "--scores", str(t / "scores"), "--out", str(t / "r.html")], \
        str(t / "scores"), "not a scores folder"


@case("score --pred/--truth: frame counts differ")
def _(t, w):
    d = good_copy(t, w, "pred")
    for f in frames_of(d)[-3:]:
        f.unlink()
    rewrite_times(d, lambda rows: rows[:-3])
    return ["score", "--pred", str(d), "--truth", str(w.trial), "--out", str(t / "scores"),
            "--set", "data.size=32"], str(d), "do not match the truth"


@case("fit --resume: folder that is not a run")
def _(t, w):
    d = good_copy(t, w)
    return ["fit", "--resume", str(d)], str(d), "not a complete run folder"


@case("forecast: bad --fps")
def _(t, w):
    return ["forecast", str(w.run), str(w.trial), "--out", str(t / "clip.mp4"), "--fps", "fast"], \
        "--fps", "bad value 'fast'"


if os.geteuid() != 0:  # pragma: no cover - CI runs as root, where chmod does not stop writes
    @case("forecast: read-only output folder (chmod 0o555)")
    def _(t, w):
        ro = t / "ro"
        ro.mkdir()
        ro.chmod(0o555)
        return ["forecast", str(w.run), str(w.trial), "--out", str(ro / "clip.mp4")], "ro", \
            "cannot write here|Permission denied"


def test_matrix_is_wide_enough():
    """The issue asks for at least 20 bad inputs across the verbs; every verb is covered."""
    verbs = {name.split(":")[0].split()[0] for name in CASES}
    assert len(CASES) >= 20
    assert verbs >= {"rig", "inspect", "fit", "forecast", "fill", "score", "report", "config"}


@pytest.mark.parametrize("name", list(CASES))
def test_bad_input_is_one_line_exit_2_and_changes_nothing(name, world, tmp_path, capsys):
    argv, thing, problem = CASES[name](tmp_path, world)
    roots = (tmp_path, world.rig, world.run)
    before = snapshot(*roots)
    capsys.readouterr()
    threads = torch.get_num_threads()
    try:
        code = main(argv)
    finally:
        torch.set_num_threads(threads)
    out, err = capsys.readouterr()
    assert code == EXIT_BAD_INPUT, (name, err)
    lines = err.splitlines()
    assert len(lines) == 1, err
    line = lines[0]
    assert line.startswith("kinecast: error: ") and "Traceback" not in err
    assert thing in line, (thing, line)
    assert re.search(problem, line), (problem, line)
    assert snapshot(*roots) == before, "a file changed, appeared or vanished"


# --- a few through a real process: exit status and no traceback ---------------------------------

SUBPROCESS_CASES = ["inspect: text file with an image extension", "fill: weights of another model size",
                    "fit: unwritable output (below a regular file)"]


@pytest.mark.parametrize("name", SUBPROCESS_CASES)
def test_real_process_exits_2_without_traceback(name, world, tmp_path):
    argv, thing, problem = CASES[name](tmp_path, world)
    before = snapshot(tmp_path, world.run)
    env = {**os.environ, "KINECAST_CACHE_DIR": str(tmp_path.parent / "subprocess_cache"),
           "PYTHONPATH": str(SRC) + os.pathsep + os.environ.get("PYTHONPATH", "")}
    proc = subprocess.run([sys.executable, "-m", "kinecast", *argv], capture_output=True, text=True,
                          env=env, timeout=120)
    assert proc.returncode == EXIT_BAD_INPUT, proc.stderr
    assert "Traceback" not in proc.stderr
    lines = proc.stderr.splitlines()
    assert len(lines) == 1 and lines[0].startswith("kinecast: error: ") and thing in lines[0], lines
    assert snapshot(tmp_path, world.run) == before


# --- the positive side: verbs that succeed write only their outputs, and never twice ---------------

def test_writing_verbs_leave_inputs_alone_and_refuse_a_second_write(world, tmp_path, capsys):
    """Each writing verb: success adds files only under its output; the same command again is refused
    with exit 2 and changes nothing; with --overwrite it succeeds and the inputs are still the same.
    (The snapshot is the same one the matrix uses, so this also shows it does see new files.)"""
    run = run_copy(tmp_path, world)
    rec = good_copy(tmp_path, world)
    gappy = good_copy(tmp_path, world, "gappy")          # fill writes only where a frame was dropped
    (gappy / "frame_0010.png").unlink()
    stamps = gappy / "timestamps.csv"
    stamps.write_text("".join(ln for ln in stamps.read_text().splitlines(keepends=True)
                              if not ln.startswith("frame_0010.png,")))
    out = tmp_path / "out"
    out.mkdir()
    commands = {
        "rig": ["rig", "spring", "--out", str(out / "rig"), "--frames", "4", "--size", "16"],
        "forecast": ["forecast", str(run), str(rec), "--frames", "3", "--out", str(out / "c.gif")],
        "fill": ["fill", str(run), str(gappy), "--out", str(out / "filled")],
        "score": ["score", str(run), str(rec), "--holdout", "last:6", "--out", str(out / "scores")],
        "report": ["report", str(run), "--scores", str(out / "scores"), "--out", str(out / "r.html")],
        "config": ["config", "--out", str(out / "c.toml")],
    }
    inputs = snapshot(run, rec, gappy)
    threads = torch.get_num_threads()
    try:
        for verb, argv in commands.items():
            before = snapshot(out)
            assert main(argv) == 0, verb
            after = snapshot(out)
            assert set(after) > set(before), f"{verb} wrote nothing"
            assert all(after[k] == v for k, v in before.items()), f"{verb} changed an earlier output"
            assert snapshot(run, rec, gappy) == inputs, f"{verb} changed an input"
            capsys.readouterr()
            assert main(argv) == EXIT_BAD_INPUT, verb
            err = capsys.readouterr().err.splitlines()
            assert len(err) == 1 and "already exists" in err[0], (verb, err)
            assert snapshot(out) == after, f"{verb} changed its output on a refused second run"
        assert main(commands["forecast"] + ["--overwrite"]) == 0
        assert snapshot(run, rec, gappy) == inputs
    finally:
        torch.set_num_threads(threads)


def test_disk_full_while_writing_is_one_line_and_leaves_no_partial_file(tmp_path, capsys, monkeypatch):
    """A write that fails half-way (ENOSPC, POSIX "No space left on device") leaves neither the target
    nor its temporary, and the command line still prints one line with exit status 2."""
    import errno

    import kinecast.fileio as fileio

    def full(src, dst):
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC), str(dst))

    monkeypatch.setattr(fileio.os, "replace", full)
    (tmp_path / "keep.toml").write_text("# mine\n")
    before = snapshot(tmp_path)
    assert main(["config", "--out", str(tmp_path / "new.toml")]) == EXIT_BAD_INPUT
    err = capsys.readouterr().err.splitlines()
    assert len(err) == 1 and err[0].startswith("kinecast: error: ") and "new.toml" in err[0], err
    assert os.strerror(errno.ENOSPC) in err[0]
    assert snapshot(tmp_path) == before
