"""What a new user trips over: misspellings, closed pipes and promises of folders that are not there.

Outside references:
- Spelling hints are those of the standard library's ``difflib.get_close_matches`` (Python docs); the
  tests ask difflib for the expected word instead of writing it down.
- A command whose reader closes the pipe ends quietly with the status of a process killed by SIGPIPE:
  128 + signal number (POSIX shell, "Exit Status"; 141 on Linux, as ``yes | head -1`` shows). The
  Python docs' "Note on SIGPIPE" (library/signal.html) give the recipe. Common practice.
- Bad input is one line on stderr with exit status 2 (the project's rule, DEVELOPERS.md).
"""

from __future__ import annotations

import difflib
import os
import re
import signal
import subprocess
import sys
from pathlib import Path

import pytest

from kinecast import config as C
from kinecast.cli import VERBS, main
from kinecast.errors import EXIT_BAD_INPUT, KinecastError
from kinecast.rigs import write_rig

SRC = Path(__file__).resolve().parents[1] / "src"


def one_error_line(capsys, argv) -> str:
    capsys.readouterr()
    assert main(argv) == EXIT_BAD_INPUT
    err = capsys.readouterr().err.splitlines()
    assert len(err) == 1, err
    line = err[0]
    assert line.startswith("kinecast: error: ") and line.count("kinecast") == 1, line  # named once
    return line


def test_misspelled_verb_one_line_with_the_closest_verb(capsys):
    line = one_error_line(capsys, ["forcast"])
    assert difflib.get_close_matches("forcast", list(VERBS), n=1) == ["forecast"]
    assert "did you mean forecast?" in line and "'forcast'" in line
    line = one_error_line(capsys, ["qwertyuiop"])  # nothing close: no guess, the verbs are listed
    assert "did you mean" not in line and "inspect" in line


def test_misspelled_verb_in_a_real_process():
    proc = subprocess.run([sys.executable, "-m", "kinecast", "repot"], capture_output=True, text=True,
                          env={**os.environ, "PYTHONPATH": str(SRC)}, timeout=60)
    assert proc.returncode == EXIT_BAD_INPUT and proc.stdout == ""
    lines = proc.stderr.splitlines()
    assert len(lines) == 1 and "did you mean report?" in lines[0] and lines[0].count("kinecast:") == 1, lines


def test_misspelled_option_and_choice_name_the_right_one(capsys, tmp_path):
    out = tmp_path / "rig"
    line = one_error_line(capsys, ["rig", "pendulum", "--out", str(out), "--ovrwrite"])
    assert "--ovrwrite" in line and "did you mean --overwrite?" in line
    line = one_error_line(capsys, ["rig", "pendulum", "--out", str(out), "--framse=4"])
    assert "did you mean --frames?" in line
    line = one_error_line(capsys, ["rig", "pendulum", "--out", str(out), "--channels", "gray"])
    assert "'gray'" in line and "did you mean grey?" in line
    line = one_error_line(capsys, ["score", "--out", str(out)])  # a verb's own error: "score: ..."
    assert line.startswith("kinecast: error: score: ")
    assert not out.exists()  # nothing written


def test_misspelled_config_key_suggests_the_right_key(capsys, tmp_path):
    every = [f"{s}.{k}" for s, keys in C.to_dict(C.Config()).items() for k in keys]
    assert difflib.get_close_matches("model.hiden", every, n=1) == ["model.hidden"]
    line = one_error_line(capsys, ["config", "--set", "model.hiden=3"])
    assert "model.hiden" in line and "did you mean model.hidden?" in line
    line = one_error_line(capsys, ["config", "--set", "modl.hidden=3"])
    assert "[modl]" in line and "did you mean model?" in line
    line = one_error_line(capsys, ["config", "--set", "hidden=3"])  # the section left out
    assert "did you mean model.hidden=3?" in line
    toml = tmp_path / "my.toml"
    toml.write_text("[model]\nhiden = 3\n")
    line = one_error_line(capsys, ["config", "--config", str(toml)])
    assert str(toml) in line and "did you mean model.hidden?" in line
    with pytest.raises(KinecastError, match="unknown key") as err:  # nothing close: no guess
        C.apply_overrides(C.Config(), ["model.zzzzzz=1"])
    assert "did you mean" not in str(err.value)


def test_inspect_into_a_closed_pipe_ends_quietly(tmp_path):
    write_rig("pendulum", tmp_path / "rig", trials=1, frames=8, size=16, seed=0)
    env = {**os.environ, "KINECAST_CACHE_DIR": str(tmp_path / "cache"), "PYTHONPATH": str(SRC)}
    # The reader goes away before kinecast writes (as `| head -1` does once it has its line, but
    # without the race: a small output could otherwise fit in the pipe buffer before head exits).
    proc = subprocess.Popen([sys.executable, "-m", "kinecast", "inspect", str(tmp_path / "rig" / "trial_000")],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, env=env)
    proc.stdout.close()
    err = proc.stderr.read().decode()
    code = proc.wait(timeout=60)
    assert "Broken pipe" not in err and "Traceback" not in err and "error" not in err, err
    assert code == 128 + signal.SIGPIPE
    # and through a shell pipe as a user types it: the first line arrives, stderr stays empty
    shell = subprocess.run(f"'{sys.executable}' -m kinecast inspect '{tmp_path / 'rig' / 'trial_000'}' | head -1",
                           shell=True, capture_output=True, text=True, env=env, timeout=60)
    assert len(shell.stdout.splitlines()) == 1 and shell.stderr == "", shell.stderr


def named_folders(line: str, out: Path) -> list[Path]:
    """The folders a rig summary line points at: 'trial_000/dropped/' or 'dropped/ of ...'."""
    if "dropped/" not in line:
        return []
    where = line.split("kept in ", 1)[1]
    if where.startswith("dropped/ of every trial"):
        return [p / "dropped" for p in sorted(out.glob("trial_*"))]
    return [out / name / "dropped" for name in re.findall(r"trial_\d+", where)]


@pytest.mark.parametrize("trials,drop", [(1, 0.0), (1, 0.5), (3, 0.0), (3, 0.5)])
def test_rig_names_only_folders_that_exist(capsys, tmp_path, trials, drop):
    out = tmp_path / "rig"
    assert main(["rig", "spring", "--out", str(out), "--trials", str(trials), "--frames", "20", "--size", "16",
                 "--drop", str(drop)]) == 0
    line = capsys.readouterr().out.splitlines()[0]
    existing = sorted(out.glob("trial_*/dropped"))
    named = named_folders(line, out)
    assert all(p.is_dir() for p in named), line
    assert sorted(named) == existing, line  # every folder named exists, every one written is named
    if drop == 0.0:
        assert "no frames dropped" in line and not existing
    else:  # P(no drop among the 17 droppable frames) = 0.5**17 per trial
        assert existing
