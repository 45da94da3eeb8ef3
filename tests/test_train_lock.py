"""One writer per run folder: ``kinecast fit`` holds a lock while it writes a run (issue 16).

The checks rest on two POSIX calls, not on the lock code's own view of things:

- open(2) with O_CREAT | O_EXCL fails when the name exists, the check and the creation being one
  atomic step: a second fit started while the first one runs must be refused;
- kill(2) with signal 0 sends nothing but still checks that the process exists (ESRCH when it does
  not): a process the test killed and reaped is gone, so its lock is stale and is taken over, while
  the test's own parent process is alive, so its lock is respected.

The processes are real ``python -m kinecast fit`` runs (helpers shared with test_kill_resume.py); the
first one is held mid-checkpoint by the ``KINECAST_TEST_CHECKPOINT_PAUSE`` hook so that it is surely
still running while the second one starts.
"""

from __future__ import annotations

import json
import os
import socket
import subprocess
import sys
from pathlib import Path

import pytest

from kinecast import config as C
from kinecast.cli import main
from kinecast.errors import KinecastError
from kinecast.rigs import write_rig
from kinecast import runfolder as rf
from kinecast.train import fit
from kinecast.train.lock import process_alive
from test_kill_resume import (STEPS, TINY, WAIT_S, kill, kinecast, resume, saved_step, start_fit,
                              stderr_of, temporaries, wait_until)

HOLD_S = "60"  # the first fit waits this long in its first checkpoint; it is killed long before


@pytest.fixture(scope="module")
def rig(tmp_path_factory) -> Path:
    out = tmp_path_factory.mktemp("lock_rig") / "pendulum"
    write_rig("pendulum", out, trials=2, frames=20, seed=5, size=32, fps=20.0, channels="grey")
    return out


def tiny_cfg(steps: int) -> C.Config:
    return C.apply_overrides(C.Config(), TINY + [f"train.steps={steps}"])


def snapshot(run: Path) -> dict[str, tuple[bytes, int]]:
    """Every file in the folder (hidden temporaries too): its bytes and modification time."""
    return {p.name: (p.read_bytes(), p.stat().st_mtime_ns) for p in run.iterdir()}


def paused_in_checkpoint(run: Path) -> list[Path]:
    """The temporary checkpoints once they are completely written (the pause hook then holds them)."""
    held = temporaries(run)
    try:
        return held if held and all(rf.load_tensors(p)[0] for p in held) else []
    except KinecastError:  # still being written
        return []


def dead_pid() -> int:
    """The pid of a process that has ended and been reaped (kill(2) then fails with ESRCH)."""
    proc = subprocess.Popen([sys.executable, "-c", "pass"])
    proc.wait()
    return proc.pid


def write_lock(run: Path, pid: int, host: str | None = None) -> str:
    run.mkdir(parents=True, exist_ok=True)
    text = f'pid = {pid}\nhost = "{host or socket.gethostname()}"\nstarted = "2026-01-01T00:00:00+00:00"\n'
    (run / rf.LOCK).write_text(text)
    return text


def one_error_line(err: str) -> str:
    lines = err.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("kinecast: error:") and "Traceback" not in err, err
    return lines[0]


def test_second_fit_on_a_folder_being_written_is_refused_and_changes_nothing(rig, tmp_path):
    run = tmp_path / "run"
    first = start_fit(rig, run, tmp_path, **{rf.PAUSE_ENV: HOLD_S})
    try:
        wait_until(first, lambda: paused_in_checkpoint(run), "the first fit's first checkpoint")
        assert f"pid = {first.pid}\n" in (run / rf.LOCK).read_text()
        before = snapshot(run)
        sets = [a for s in TINY for a in ("--set", s)]
        second = kinecast(["fit", str(rig), "--out", str(run), "--overwrite", "--steps", str(STEPS),
                           "--quiet", *sets], tmp_path)
        assert second.wait(timeout=WAIT_S) == 2
        line = one_error_line(stderr_of(second))
        assert str(run) in line and f"process {first.pid} " in line and socket.gethostname() in line, line
        assert snapshot(run) == before  # not a byte, not a time stamp
        assert first.poll() is None, "the first fit should still be running"
    finally:
        if first.poll() is None:
            kill(first)


def test_resume_takes_over_a_killed_fits_lock_and_refuses_a_second_resume(rig, tmp_path):
    run = tmp_path / "run"
    first = start_fit(rig, run, tmp_path)
    wait_until(first, lambda: saved_step(run), "the first checkpoint")
    kill(first)  # SIGKILL: no clean-up, the lock stays behind
    assert f"pid = {first.pid}\n" in (run / rf.LOCK).read_text()
    assert not process_alive(first.pid)  # killed and reaped: kill(2) gives ESRCH

    resumer = resume(run, tmp_path, **{rf.PAUSE_ENV: HOLD_S})
    try:
        held = wait_until(resumer, lambda: paused_in_checkpoint(run), "the resumed fit's next checkpoint")
        told = [ln for ln in stderr_of(resumer).splitlines() if "lock" in ln]
        assert len(told) == 1 and f"process {first.pid} " in told[0] and "taking over" in told[0], told
        assert f"pid = {resumer.pid}\n" in (run / rf.LOCK).read_text()
        before = snapshot(run)
        second = resume(run, tmp_path)
        assert second.wait(timeout=WAIT_S) == 2
        line = one_error_line(stderr_of(second))
        assert str(run) in line and f"process {resumer.pid} " in line, line
        # the refused resume did not clear the holder's checkpoint in progress, nor anything else
        assert temporaries(run) == held and snapshot(run) == before
    finally:
        if resumer.poll() is None:
            kill(resumer)


def test_stale_lock_of_a_dead_process_is_taken_over_and_the_fit_succeeds(rig, tmp_path, capsys):
    run = tmp_path / "run"
    pid = dead_pid()
    assert not process_alive(pid)
    write_lock(run, pid)
    summary = fit([rig], run, tiny_cfg(4), show_progress=False)
    assert summary["steps"] == 4 and json.loads((run / rf.SUMMARY).read_text())["steps"] == 4
    assert not (run / rf.LOCK).exists() and not list(run.glob(f".{rf.LOCK}*"))
    told = [ln for ln in capsys.readouterr().err.splitlines() if "lock" in ln]
    assert len(told) == 1 and f"process {pid} " in told[0] and str(run) in told[0], told


@pytest.mark.parametrize("holder", ["alive here", "elsewhere", "unreadable"])
def test_a_lock_that_may_be_live_is_respected(rig, tmp_path, capsys, holder):
    """A live pid on this host (our parent process), any pid on another host (it cannot be checked
    from here), a lock file that names no process: refused, one line, nothing touched."""
    run = tmp_path / "run"
    if holder == "alive here":
        pid = os.getppid()
        assert process_alive(pid)
        write_lock(run, pid)
    elif holder == "elsewhere":
        pid = dead_pid()
        write_lock(run, pid, host="other-host.invalid")
    else:
        run.mkdir()
        (run / rf.LOCK).write_text("")  # as a fit killed between creating it and writing it leaves it
    before = snapshot(run)
    capsys.readouterr()
    assert main(["fit", str(rig), "--out", str(run), "--overwrite", "--steps", "2"]) == 2
    line = one_error_line(capsys.readouterr().err)
    assert str(run) in line, line
    if holder != "unreadable":
        assert f"process {pid} " in line and ("other-host.invalid" in line) == (holder == "elsewhere"), line
    assert snapshot(run) == before


def test_lock_is_gone_after_a_normal_fit_and_after_failed_ones(rig, tmp_path):
    ok = tmp_path / "ok"
    fit([rig], ok, tiny_cfg(2), show_progress=False)
    assert (ok / rf.SUMMARY).is_file() and not (ok / rf.LOCK).exists()

    # an error after files were written (no budget is found once the folder is prepared)
    nobudget = tmp_path / "nobudget"
    with pytest.raises(KinecastError, match="no budget"):
        fit([rig], nobudget, tiny_cfg(0), show_progress=False)
    assert (nobudget / rf.CONFIG).is_file() and not (nobudget / rf.LOCK).exists()

    # an interruption mid-training (stands in for Ctrl-C)
    def interrupt(step):
        if step == 1:
            raise KeyboardInterrupt
        return False

    stopped = tmp_path / "stopped"
    with pytest.raises(KeyboardInterrupt):
        fit([rig], stopped, tiny_cfg(4), show_progress=False, fault_hook=interrupt)
    assert (stopped / rf.CONFIG).is_file() and not (stopped / rf.LOCK).exists()

    # bad recordings, found once the lock is taken: the folders made for the lock are removed again
    bad = tmp_path / "bad"
    bad.mkdir()
    for i in range(2):
        (bad / f"frame_{i:03d}.png").write_bytes(b"not an image")
    new = tmp_path / "new" / "deeper" / "run"
    with pytest.raises(KinecastError):
        fit([bad], new, tiny_cfg(2), show_progress=False)
    assert not (tmp_path / "new").exists()
