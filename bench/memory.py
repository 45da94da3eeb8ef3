"""Peak resident memory (RSS) of a few training steps on short and long recordings.

Each measurement is a fresh Python process running ``kinecast.train.fit`` with the default config
(frame size, step count and device aside) on one mp4 recording; the child reports its own peak RSS
(see :mod:`bench.rss` for why the parent cannot read it), so nothing the parent holds is counted.

Run as ``python -m bench.memory --child REC RUN --size S --steps N --device D`` for one child.
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

import numpy as np

from .common import NOMINAL_FPS, ROOT
from .rss import report, run_child


def write_recordings(frames: np.ndarray, lengths: tuple[int, ...], folder: Path) -> dict[int, Path]:
    """Write the first ``n`` of ``frames`` (uint8, T × H × W × C) as ``rec_n.mp4`` for each length."""
    from kinecast.render import write_frames

    out = {}
    for n in lengths:
        if n > len(frames):
            raise ValueError(f"write_recordings: {n} frames asked, {len(frames)} rendered")
        out[n] = write_frames(frames[:n], folder / f"rec_{n}.mp4", NOMINAL_FPS, overwrite=True)
    return out


def training_peak_rss(recording: Path, run: Path, size: int, steps: int, device: str,
                      cache_dir: Path) -> dict:
    """Peak RSS of a fresh process that trains ``steps`` steps on ``recording``."""
    cmd = [sys.executable, "-m", "bench.memory", "--child", str(recording), str(run),
           "--size", str(size), "--steps", str(steps), "--device", device, "--cache-dir", str(cache_dir)]
    got = run_child(cmd, cwd=ROOT)
    if got["returncode"] != 0 or "peak_rss_bytes" not in got:
        raise RuntimeError(f"memory child failed on {recording} (exit {got['returncode']}):\n"
                           f"{got['stderr_tail']}")
    return {"recording": str(recording), **{k: v for k, v in got.items() if k != "stderr_tail"}}


def _child(argv: list[str]) -> None:
    """Train a few steps with the default config and print what was done as one JSON line."""
    p = argparse.ArgumentParser(prog="python -m bench.memory")
    p.add_argument("--child", nargs=2, metavar=("RECORDING", "RUN"), required=True)
    p.add_argument("--size", type=int, required=True)
    p.add_argument("--steps", type=int, required=True)
    p.add_argument("--device", default="auto")
    p.add_argument("--cache-dir", required=True)
    a = p.parse_args(argv)
    from kinecast.config import Config
    from kinecast.train import fit

    cfg = Config()
    cfg.data.size = a.size
    cfg.data.cache = False
    cfg.data.cache_dir = a.cache_dir
    cfg.train.steps = a.steps
    cfg.train.budget = "0"
    cfg.train.device = a.device
    summary = fit([a.child[0]], a.child[1], cfg, overwrite=True, show_progress=False)
    report({"steps": summary["steps"], "val_window": summary["val_window"],
            "longest_window": summary["longest_window"], "device": summary["device"]})


if __name__ == "__main__":
    _child(sys.argv[1:])
