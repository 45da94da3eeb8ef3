"""Data-parallel training with torchrun: two CPU processes (gloo) keep identical weights.

DistributedDataParallel averages gradients across ranks after every backward pass and broadcasts
rank 0's initial parameters, so replicas stay equal (PyTorch DDP documentation). The trainer
measures the largest parameter difference across ranks after training and writes it to summary.json.
"""

import json
import subprocess
import sys

from kinecast.rigs import write_rig


def test_two_processes_agree_and_only_rank_0_writes(tmp_path):
    rig = tmp_path / "rig"
    write_rig("spring", rig, trials=2, frames=20, seed=3, size=32, fps=20.0)
    run = tmp_path / "run"
    cmd = [sys.executable, "-m", "torch.distributed.run", "--standalone", "--nproc_per_node=2",
           "-m", "kinecast", "fit", str(rig), "--out", str(run), "--steps", "6", "--quiet",
           "--device", "cpu",
           "--set", "data.size=32", "--set", "data.cache=false", "--set", "model.latent_dim=4",
           "--set", "model.enc_channels=8", "--set", "model.dec_channels=8", "--set", "model.hidden=16",
           "--set", "train.batch=2", "--set", "train.val_every=3", "--set", "train.threads=1",
           "--set", "train.window_start=6", "--set", "train.warmup_steps=1"]
    proc = subprocess.run(cmd, capture_output=True, text=True, timeout=300)
    assert proc.returncode == 0, proc.stderr[-2000:]
    summary = json.loads((run / "summary.json").read_text())
    assert summary["world_size"] == 2 and summary["steps"] == 6
    assert summary["replica_spread"] == 0.0
    # only rank 0 writes: one set of files, no leftovers from a second writer
    assert sorted(p.name for p in run.iterdir()) == sorted(
        ["config.toml", "weights.safetensors", "resume.safetensors", "log.csv", "summary.json",
         "background.png", "loss.png"])


LEAVE = """
import atexit, sys
from kinecast.train.distributed import leave_helper
atexit.register(lambda: print("interpreter shutdown ran"))
print("output before leaving", end="")  # unflushed: leave_helper must flush it
leave_helper(3)
sys.exit(0)
"""


def test_a_helper_rank_leaves_without_interpreter_shutdown():
    """Rank > 0 of a torchrun launch ends at once with its exit code, output flushed, and no
    interpreter shutdown (Python docs: ``os._exit`` exits "without calling cleanup handlers, flushing
    stdio buffers, etc."; ``atexit`` handlers run only at a normal shutdown); rank 0 carries on."""
    import os

    def run(rank: str):
        env = {**os.environ, "WORLD_SIZE": "2", "RANK": rank}
        return subprocess.run([sys.executable, "-c", LEAVE], capture_output=True, text=True, env=env, timeout=120)

    helper, main = run("1"), run("0")
    assert helper.returncode == 3 and helper.stdout == "output before leaving"
    assert main.returncode == 0 and main.stdout == "output before leavinginterpreter shutdown ran\n"
