"""Keep large freed blocks in the process for the next step (glibc's ``malloc``), instead of handing
them back to the system and faulting fresh pages in every step.

glibc serves a request above its mmap threshold (128 KiB at first, raised as large blocks are freed,
up to 32 MiB on 64-bit systems) with new pages from the kernel and returns them on ``free``; a training
step's activations of a few MiB each are then zero-filled pages faulted in afresh every step. With the
threshold fixed at its largest value and the heap kept up to :data:`TRIM_THRESHOLD` above its top, the
same blocks are reused. Measured on the bench's 64 px training step (2-core AMD EPYC, two fresh
processes each, DEVELOPERS.md): float32 176-192 ms per step against 216-285 ms; bfloat16 130-134
against 129-163; 60-second fits took 9-18 % more steps; peak resident memory +0.02-0.07 GB. The
arithmetic is unchanged (a fixed number of steps gives the same weights, tested). On by default
(``train.keep_heap``) since early stop may end a fit only from a share of its budget
(``train.early_stop_from``): before that, the faster steps reached early stop's count of stalled
validations sooner and 5-minute fits stopped as early as 180 s (DEVELOPERS.md, twenty-second and
twenty-third sessions).

The thresholds and their meaning: glibc manual, "Malloc Tunable Parameters" (``M_MMAP_THRESHOLD``,
``M_TRIM_THRESHOLD``) and ``mallopt(3)``; the parameter numbers are those of glibc's ``<malloc.h>``.

Examples
--------
>>> from kinecast.heap import keep_large_blocks
>>> keep_large_blocks() in (True, False)  # False where the C library is not glibc
True
"""

from __future__ import annotations

import ctypes
import platform

__all__ = ["MMAP_THRESHOLD", "TRIM_THRESHOLD", "keep_large_blocks", "kept"]

MMAP_THRESHOLD = 32 * 1024 * 1024  # glibc's largest allowed value on 64-bit (HEAP_MAX_SIZE / 2)
TRIM_THRESHOLD = 1024 * 1024 * 1024  # free memory kept at the heap's top before giving it back
_M_TRIM_THRESHOLD, _M_MMAP_THRESHOLD = -1, -3  # glibc <malloc.h>
_kept = False  # the settings are the process's: once made they last until it ends


def _mallopt():
    """glibc's ``mallopt`` function (ctypes), or None where the C library is another one."""
    if platform.libc_ver()[0] != "glibc":
        return None
    try:
        fn = ctypes.CDLL(None).mallopt
    except (OSError, AttributeError):
        return None
    fn.argtypes, fn.restype = [ctypes.c_int, ctypes.c_int], ctypes.c_int
    return fn


def keep_large_blocks() -> bool:
    """Fix glibc's mmap threshold at :data:`MMAP_THRESHOLD` and its trim threshold at
    :data:`TRIM_THRESHOLD` for this process; True when both were accepted, False elsewhere (another
    C library, or glibc refusing a value)."""
    global _kept
    mallopt = _mallopt()
    if mallopt is None:
        return False
    ok = bool(mallopt(_M_MMAP_THRESHOLD, MMAP_THRESHOLD)) and bool(mallopt(_M_TRIM_THRESHOLD, TRIM_THRESHOLD))
    _kept = _kept or ok
    return ok


def kept() -> bool:
    """Whether :func:`keep_large_blocks` has taken effect in this process."""
    return _kept
