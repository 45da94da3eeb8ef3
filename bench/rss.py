"""Peak resident memory of a child process, measured by the child itself.

Why not ``getrusage(RUSAGE_CHILDREN)`` or ``wait4``: on Linux a child's ``ru_maxrss`` keeps the
high-water mark of the memory image it had before ``exec`` — the forked copy of this (large, torch
loaded) process — so every child would report at least the parent's size. ``VmHWM`` in
``/proc/self/status`` is the high-water mark of the current program only (proc(5) manual page), so
the child reads it at its end and prints it. Where ``/proc`` is missing, ``ru_maxrss`` of the child
itself is the fallback (kilobytes on Linux, bytes on macOS: getrusage(2) manual pages).

This module imports nothing heavy, so a child that reports through it carries no extra weight.
"""

from __future__ import annotations

import json
import resource
import subprocess
import sys
from pathlib import Path

TAG = "bench-peak-rss "  # prefix of the one line a child prints with its result
_PROC_STATUS = Path("/proc/self/status")
_KB = 1024


def own_peak_rss() -> int:
    """Peak resident set size of this process (this program image) in bytes."""
    try:
        for line in _PROC_STATUS.read_text().splitlines():
            if line.startswith("VmHWM:"):
                value, unit = line.split()[1:3]
                if unit.lower() == "kb":
                    return int(value) * _KB
    except OSError:
        pass
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    return int(peak) if sys.platform == "darwin" else int(peak) * _KB


def report(extra: dict | None = None) -> None:
    """Print this process's peak RSS (and ``extra`` facts) as the tagged result line."""
    print(TAG + json.dumps({"peak_rss_bytes": own_peak_rss(), **(extra or {})}), flush=True)


def run_child(cmd: list[str], cwd: str | Path | None = None) -> dict:
    """Run ``cmd`` (a program that ends with :func:`report`) and return its result.

    Returns
    -------
    dict
        ``returncode``, ``stderr_tail``, and the reported fields (``peak_rss_bytes`` ...) when the
        child printed its result line.
    """
    proc = subprocess.run(cmd, cwd=cwd, capture_output=True, text=True)
    out = {"returncode": proc.returncode, "stderr_tail": proc.stderr[-2000:]}
    lines = [ln for ln in proc.stdout.splitlines() if ln.startswith(TAG)]
    if lines:
        out.update(json.loads(lines[-1][len(TAG):]))
    return out
