"""The machine's peak FLOP/s and the FLOPs of one training step, counted the same way.

Both counts come from :class:`torch.utils.flop_counter.FlopCounterMode`, which counts the matrix
products and convolutions (a multiply-add is 2 FLOPs; element-wise work is not counted). The peak
is the faster of a large matrix product and a large 3×3 convolution, measured in this run with all
cores, so the efficiency ratio compares two numbers taken under the same load. It is measured per
number format (float32, and bfloat16 where the CPU has it): a step is compared with the peak of the
format its convolutions run in.
"""

from __future__ import annotations

import torch
import torch.nn.functional as F
from torch.utils.flop_counter import FlopCounterMode

from .common import best_time, use_all_cores

# Peak-probe sizes: large enough to reach the library's full speed, small enough for a shared CPU.
CPU_MATMUL_N = 2048                  # square fp32 matrix side
CPU_CONV = (16, 64, 64)              # batch, channels (in = out), image side; 3×3 kernel
GPU_MATMUL_N = 8192
GPU_CONV = (64, 256, 64)
CONV_KERNEL = 3


def count_flops(fn) -> int:
    """FLOPs that ``fn()`` performs, as counted by ``FlopCounterMode``."""
    with FlopCounterMode(display=False) as counter:
        fn()
    return int(counter.get_total_flops())


def matmul_rate(n: int, repeats: int, device: torch.device, dtype: torch.dtype = torch.float32) -> dict:
    """FLOP/s of an ``n`` × ``n`` matrix product in ``dtype`` (best of ``repeats``)."""
    a = torch.randn(n, n, device=device, dtype=dtype)
    b = torch.randn(n, n, device=device, dtype=dtype)
    flops = count_flops(lambda: a @ b)
    seconds = best_time(lambda: a @ b, repeats, device)
    return {"op": f"matmul {n}×{n}", "flops": flops, "seconds": seconds, "flops_per_s": flops / seconds}


def conv_rate(batch: int, channels: int, side: int, repeats: int, device: torch.device,
              dtype: torch.dtype = torch.float32) -> dict:
    """FLOP/s of a 3×3 convolution in ``dtype``, ``channels`` in and out, ``side`` × ``side`` images
    (channels-last for bfloat16, the layout the trainer uses in that format)."""
    layout = torch.contiguous_format if dtype == torch.float32 else torch.channels_last
    x = torch.randn(batch, channels, side, side, device=device, dtype=dtype).contiguous(memory_format=layout)
    w = torch.randn(channels, channels, CONV_KERNEL, CONV_KERNEL, device=device,
                    dtype=dtype).contiguous(memory_format=layout)

    def conv():
        return F.conv2d(x, w, padding=CONV_KERNEL // 2)

    flops = count_flops(conv)
    seconds = best_time(conv, repeats, device)
    return {"op": f"conv3×3 {batch}×{channels}×{side}²", "flops": flops, "seconds": seconds,
            "flops_per_s": flops / seconds}


def peak_rate(device: torch.device, repeats: int, matmul_n: int | None = None,
              conv: tuple[int, int, int] | None = None, dtype: torch.dtype = torch.float32) -> dict:
    """The machine's measured peak: the faster of the matrix product and the convolution.

    Parameters
    ----------
    device : torch.device
    repeats : int
        Timed repetitions per probe (best counts).
    matmul_n, conv : optional
        Probe sizes; default the CPU or GPU constants of this module.
    dtype : torch.dtype
        Number format of the probes (float32 or bfloat16).

    Returns
    -------
    dict
        ``matmul`` and ``conv`` probe results, ``peak`` FLOP/s and ``threads``.
    """
    threads = use_all_cores()
    gpu = device.type == "cuda"
    n = matmul_n or (GPU_MATMUL_N if gpu else CPU_MATMUL_N)
    b, c, s = conv or (GPU_CONV if gpu else CPU_CONV)
    mm = matmul_rate(n, repeats, device, dtype)
    cv = conv_rate(b, c, s, repeats, device, dtype)
    return {"matmul": mm, "conv": cv, "peak": max(mm["flops_per_s"], cv["flops_per_s"]),
            "threads": threads, "precision": "fp32" if dtype == torch.float32 else "bf16"}


def peak_rates(device: torch.device, repeats: int) -> dict[str, dict]:
    """:func:`peak_rate` in float32, and in bfloat16 where the device has it natively; keyed by
    ``train.precision`` name."""
    from kinecast.model.precision import bf16_supported

    peaks = {"fp32": peak_rate(device, repeats)}
    if bf16_supported(device):
        peaks["bf16"] = peak_rate(device, repeats, dtype=torch.bfloat16)
    return peaks
