"""Keeping large freed blocks in the process (glibc's malloc thresholds, kinecast.heap).

References: glibc manual, "Malloc Tunable Parameters" and "Statistics for Memory Allocation with
malloc" (``mallinfo2``: ``hblks`` counts the blocks currently served by mmap); ``mallopt(3)``: a
request at or above ``M_MMAP_THRESHOLD`` (128 KiB at start) is served by mmap, and freeing such a
block raises the threshold to its size (the dynamic threshold). Each check runs in a fresh process,
since the settings last for the life of the process that made them.
"""

import json
import platform
import subprocess
import sys

import pytest
import torch

from kinecast import runfolder as rf
from kinecast.rigs import write_rig

glibc_only = pytest.mark.skipif(platform.libc_ver()[0] != "glibc", reason="the thresholds are glibc's")

MMAP_COUNT = """
import ctypes, sys
class Info(ctypes.Structure):
    _fields_ = [(n, ctypes.c_size_t) for n in ("arena", "ordblks", "smblks", "hblks", "hblkhd", "usmblks",
                                              "fsmblks", "uordblks", "fordblks", "keepcost")]
libc = ctypes.CDLL(None)
libc.mallinfo2.restype = Info
libc.malloc.restype, libc.malloc.argtypes = ctypes.c_void_p, [ctypes.c_size_t]
libc.free.argtypes = [ctypes.c_void_p]
def mapped(size):  # 1 when a block of this size is served by mmap
    before = libc.mallinfo2().hblks
    p = libc.malloc(size)
    after = libc.mallinfo2().hblks
    libc.free(p)
    return after - before
first = mapped(4 << 20)
if sys.argv[1] == "keep":
    from kinecast.heap import keep_large_blocks
    assert keep_large_blocks()
print(first, mapped(16 << 20))
"""


def mmap_counts(mode: str) -> list[int]:
    out = subprocess.run([sys.executable, "-c", MMAP_COUNT, mode], capture_output=True, text=True, check=True)
    return [int(v) for v in out.stdout.split()]


@glibc_only
def test_large_blocks_come_from_the_heap_once_kept():
    # default thresholds: 4 MiB and (above the threshold raised to 4 MiB by the free) 16 MiB are mmapped
    assert mmap_counts("default") == [1, 1]
    # kept: the threshold is fixed at 32 MiB, so the 16 MiB block comes from the heap
    assert mmap_counts("keep") == [1, 0]


def test_kept_heap_trains_the_same_weights(tmp_path):
    """Where blocks come from does not change the arithmetic: a fixed number of steps gives
    bit-identical weights (common practice: same seed and threads give identical CPU results,
    PyTorch "Reproducibility" notes)."""
    rig = tmp_path / "rig"
    write_rig("pendulum", rig, trials=2, frames=20, seed=2, size=32, fps=20.0)
    runs = {}
    for keep in ("false", "true"):
        runs[keep] = tmp_path / f"run_{keep}"
        subprocess.run([sys.executable, "-m", "kinecast", "fit", str(rig), "--out", str(runs[keep]), "--steps", "6",
                        "--quiet", "--device", "cpu", "--set", "data.size=32", "--set", "data.cache=false",
                        "--set", "model.latent_dim=4", "--set", "model.enc_channels=8",
                        "--set", "model.dec_channels=8", "--set", "model.hidden=16", "--set", "train.batch=2",
                        "--set", "train.threads=1", "--set", "train.window_start=6",
                        "--set", f"train.keep_heap={keep}"], check=True, capture_output=True)
    a, b = (rf.load_tensors(runs[k] / rf.RESUME)[0] for k in ("false", "true"))
    assert a.keys() == b.keys() and all(torch.equal(a[k], b[k]) for k in a)
    # and the setting did take effect in the run that asked for it (glibc; elsewhere it cannot)
    kept = {k: json.loads((runs[k] / rf.SUMMARY).read_text())["heap_kept"] for k in runs}
    assert kept == {"false": False, "true": platform.libc_ver()[0] == "glibc"}
