"""Kill-and-resume: ``kinecast fit`` killed with SIGKILL at several points always resumes cleanly.

A real ``python -m kinecast fit`` process trains a tiny model and is killed (SIGKILL: no handler,
no clean-up, as when the machine loses power or the out-of-memory killer strikes):

1. between two checkpoints;
2. while a checkpoint is being written: the test hook ``KINECAST_TEST_CHECKPOINT_PAUSE`` (see
   kinecast.runfolder._test_pause) holds the written temporary file for a moment before it
   is renamed into place, and the process is killed as soon as ``.resume.*.tmp.safetensors`` appears;
3. before its first checkpoint.

After each kill, every checkpoint file present must load, and ``kinecast fit --resume RUN``
continues from the last saved step. The check that the step count really continues is outside the
resume code: a run with the same seed trained without interruption. With a fixed seed and one
thread, PyTorch on the CPU is deterministic (common practice; PyTorch "Reproducibility" notes), so
the killed-and-resumed run must end with the same weights, optimiser state and log rows. A resume
that restarted from step 0, skipped or repeated steps, or lost the optimiser state would differ.
The atomic rename that makes a mid-checkpoint kill harmless is POSIX ``rename(2)`` (``os.replace``).
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest
import torch

from kinecast import config as C
from kinecast.cli import main
from kinecast.rigs import write_rig
from kinecast import runfolder as rf
from kinecast.train import fit

STEPS = 12
EVERY = 2                          # train.checkpoint_every
TINY = ["data.size=32", "model.latent_dim=4", "model.enc_channels=8", "model.dec_channels=8",
        "model.hidden=16", "train.batch=2", f"train.checkpoint_every={EVERY}", "train.val_every=3",
        "train.window_start=6", "train.threads=1", "train.warmup_steps=1", "train.budget=0"]
SRC = Path(__file__).resolve().parents[1] / "src"
POLL_S = 0.005
WAIT_S = 60.0


@pytest.fixture(scope="module")
def rig(tmp_path_factory) -> Path:
    out = tmp_path_factory.mktemp("kill_rig") / "pendulum"
    write_rig("pendulum", out, trials=2, frames=20, seed=5, size=32, fps=20.0, channels="grey")
    return out


@pytest.fixture(scope="module")
def reference(rig, tmp_path_factory) -> Path:
    """The same training, never interrupted (in-process: the same code and seed as the CLI)."""
    run = tmp_path_factory.mktemp("kill_ref") / "run"
    threads = torch.get_num_threads()
    try:
        fit([rig], run, C.apply_overrides(C.Config(), TINY + [f"train.steps={STEPS}"]),
            show_progress=False)
    finally:
        torch.set_num_threads(threads)
    return run


def kinecast(args: list[str], tmp: Path, **env_extra) -> subprocess.Popen:
    env = {**os.environ, "KINECAST_CACHE_DIR": str(tmp / "cache"),
           "PYTHONPATH": str(SRC) + os.pathsep + os.environ.get("PYTHONPATH", ""), **env_extra}
    err_path = tmp / f"stderr_{time.monotonic_ns()}.txt"
    with open(err_path, "w") as err:  # the child keeps its own copy of the descriptor
        proc = subprocess.Popen([sys.executable, "-m", "kinecast", *args], env=env,
                                stdout=subprocess.DEVNULL, stderr=err)
    proc.err_path = err_path  # type: ignore[attr-defined]
    return proc


def stderr_of(proc) -> str:
    return proc.err_path.read_text()


def start_fit(rig: Path, run: Path, tmp: Path, **env) -> subprocess.Popen:
    sets = [a for s in TINY for a in ("--set", s)]
    return kinecast(["fit", str(rig), "--out", str(run), "--steps", str(STEPS), "--quiet", *sets], tmp,
                    **env)


def resume(run: Path, tmp: Path, **env) -> subprocess.Popen:
    return kinecast(["fit", "--resume", str(run), "--quiet"], tmp, **env)


def wait_until(proc, condition, what: str):
    """Poll ``condition()`` until it returns something truthy; fail if ``proc`` ends first."""
    deadline = time.monotonic() + WAIT_S
    while time.monotonic() < deadline:
        value = condition()
        if value:
            return value
        if proc.poll() is not None:
            pytest.fail(f"process ended (rc {proc.returncode}) before {what}: {stderr_of(proc)}")
        time.sleep(POLL_S)
    proc.kill()
    pytest.fail(f"timed out waiting for {what}")


def kill(proc) -> None:
    proc.send_signal(signal.SIGKILL)
    proc.wait(timeout=WAIT_S)
    assert proc.returncode == -signal.SIGKILL, "the process ended on its own before the kill"


def saved_step(run: Path) -> int | None:
    try:
        return rf.load_tensors(run / rf.RESUME)[1]["step"]
    except Exception:  # not there yet
        return None


def temporaries(run: Path, stem: str = "resume") -> list[Path]:
    return sorted(run.glob(f".{stem}.*.tmp.safetensors"))


def every_checkpoint_loads(run: Path) -> int:
    """Load every checkpoint file present (and the config and log); the saved step."""
    present = sorted(p for p in run.glob("*.safetensors") if not p.name.startswith("."))
    assert run / rf.RESUME in present
    for path in present:
        tensors, meta = rf.load_tensors(path)
        assert tensors and all(torch.isfinite(t).all() for t in tensors.values() if t.is_floating_point())
    C.load(run / rf.CONFIG)
    rf.read_log(run)
    return rf.load_tensors(run / rf.RESUME)[1]["step"]


def finish(run: Path, tmp: Path) -> None:
    proc = resume(run, tmp)
    assert proc.wait(timeout=WAIT_S * 2) == 0, stderr_of(proc)


def same_as_reference(run: Path, reference: Path) -> None:
    assert json.loads((run / rf.SUMMARY).read_text())["steps"] == STEPS
    mine, _ = rf.load_tensors(run / rf.RESUME)
    ref, _ = rf.load_tensors(reference / rf.RESUME)
    assert mine.keys() == ref.keys()
    for key in ref:
        assert torch.allclose(mine[key].float(), ref[key].float(), atol=1e-6), key
    strip = lambda rows: [{k: v for k, v in r.items() if k != "time_s"} for r in rows]  # noqa: E731
    rows, ref_rows = strip(rf.read_log(run)), strip(rf.read_log(reference))
    assert [r["step"] for r in rows] == [r["step"] for r in ref_rows]  # no row lost or repeated
    for r, q in zip(rows, ref_rows):
        assert r.keys() == q.keys() and all(abs(r[k] - q[k]) <= 1e-5 * (1 + abs(q[k])) for k in q), r


def test_killed_between_and_during_checkpoints_resumes_to_the_same_result(rig, reference, tmp_path):
    run = tmp_path / "run"

    # 1. kill between checkpoints: right after the checkpoint at step >= 4 lands
    proc = start_fit(rig, run, tmp_path)
    seen = wait_until(proc, lambda: (s := saved_step(run)) is not None and s >= 4 and s, "step 4")
    kill(proc)
    step = every_checkpoint_loads(run)
    # nothing saved was lost or torn (a later checkpoint may have landed before the signal did)
    assert seen <= step < STEPS and step % EVERY == 0

    # 2. resume, and kill it while its next checkpoint is being written
    proc = resume(run, tmp_path, **{rf.PAUSE_ENV: "2"})
    wait_until(proc, lambda: temporaries(run), "a temporary checkpoint")
    kill(proc)
    assert temporaries(run), "the kill did not land mid-checkpoint"
    assert every_checkpoint_loads(run) == step  # the previous checkpoint is intact

    # 3. resume to the end: the temporary is cleared, the result equals the uninterrupted run
    finish(run, tmp_path)
    assert not temporaries(run) and not list(run.glob(".*.tmp*"))
    same_as_reference(run, reference)


def test_killed_before_the_first_checkpoint_resume_is_refused_cleanly(rig, tmp_path, capsys):
    run = tmp_path / "run"
    proc = start_fit(rig, run, tmp_path, **{rf.PAUSE_ENV: "5"})
    # the config is written before training starts; the first checkpoint is held in its temporary
    wait_until(proc, lambda: (run / rf.CONFIG).is_file(), "config.toml")
    kill(proc)
    assert not (run / rf.RESUME).exists()
    before = {p.name: p.read_bytes() for p in run.iterdir()}
    capsys.readouterr()
    assert main(["fit", "--resume", str(run)]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and err[0].startswith("kinecast: error:") and rf.RESUME in err[0], err
    assert {p.name: p.read_bytes() for p in run.iterdir()} == before


def test_resume_needs_no_best_weights_yet(rig, tmp_path):
    """A checkpoint written before the first validation (so no weights.safetensors) still resumes."""
    run = tmp_path / "run"
    sets = [a for s in TINY + ["train.val_every=100"] for a in ("--set", s)]
    proc = kinecast(["fit", str(rig), "--out", str(run), "--steps", str(STEPS), "--quiet", *sets],
                    tmp_path)
    wait_until(proc, lambda: saved_step(run), "the first checkpoint")
    kill(proc)
    assert not (run / rf.WEIGHTS).exists()
    finish(run, tmp_path)
    assert rf.load_tensors(run / rf.RESUME)[1]["step"] == STEPS
    assert rf.load_tensors(run / rf.WEIGHTS)[0]
