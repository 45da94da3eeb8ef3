"""Number format of the conv nets: bfloat16 where the hardware has it, float32 elsewhere.

The conv encoders and the decoders are most of a training step's arithmetic (about two thirds of a
64 px step in float32). On a CPU with bfloat16 instructions (x86 ``avx512_bf16`` / AMX, read at run
time through oneDNN) their convolutions run about twice as fast in bfloat16, channels-last. Only the
conv stacks change format, and not the keypoint encoder's (its heat maps decide where the
object is; in bfloat16 they lost the spring's mass in two of four 5-minute runs): their inputs are
cast down inside :func:`compute` and their outputs cast back to float32 before anything that needs
the precision — the dense heads that give means and log-variances, the background added to the
decoder's logits, the ODE solve, the field's small matmuls, the loss terms and the KL. The weights
stay float32 (the optimiser updates float32 masters); a checkpoint does not record the format, so a
run trained in one loads and forecasts in the other.

bfloat16 keeps 8 significant bits (relative rounding 2⁻⁸ ≈ 0.4 %; the format: Kalamkar et al. 2019,
"A Study of BFLOAT16 for Deep Learning Training", arXiv:1905.12322), so a bfloat16 conv stack agrees
with its float32 self to about 1 % of the activations' scale, not bit for bit.

Examples
--------
>>> import torch
>>> from torch import nn
>>> conv = nn.Conv2d(1, 2, 3)
>>> with compute(torch.bfloat16, "cpu"):
...     y = conv(torch.ones(1, 1, 5, 5))
>>> y.dtype
torch.bfloat16
"""

from __future__ import annotations

import contextlib

import torch

from ..errors import KinecastError

__all__ = ["CHOICES", "bf16_supported", "resolve", "compute", "conv_layout", "use_precision", "in_use"]

CHOICES = ("auto", "fp32", "bf16")


def bf16_supported(device: torch.device | str = "cpu") -> bool:
    """Whether ``device`` runs bfloat16 convolutions natively (checked on this machine, now)."""
    device = torch.device(device)
    if device.type == "cuda":
        return bool(torch.cuda.is_available() and torch.cuda.is_bf16_supported())
    if device.type != "cpu":
        return False
    try:  # oneDNN's own test of the CPU's instruction set (avx512_bf16, AMX)
        return bool(torch.ops.mkldnn._is_mkldnn_bf16_supported())
    except (AttributeError, RuntimeError):
        return False


def resolve(choice: str, device: torch.device | str = "cpu") -> torch.dtype | None:
    """The conv nets' compute type for ``train.precision = choice`` on ``device``: ``torch.bfloat16``
    or None (float32). ``auto`` picks bfloat16 where :func:`bf16_supported`; an explicit ``bf16``
    where it is not is refused with one line."""
    if choice not in CHOICES:
        raise KinecastError("train.precision", f"must be one of {', '.join(CHOICES)}, not {choice!r}")
    if choice == "fp32":
        return None
    if bf16_supported(device):
        return torch.bfloat16
    if choice == "bf16":
        raise KinecastError("train.precision", f"bf16 asked for, but this {torch.device(device).type} has no "
                                               "native bfloat16 support; use auto or fp32")
    return None


def compute(dtype: torch.dtype | None, device_type: str):
    """Context in which a conv stack runs in ``dtype`` (None: as it is, float32)."""
    if dtype is None:
        return contextlib.nullcontext()
    return torch.autocast(device_type, dtype=dtype)


def conv_layout(x: torch.Tensor, dtype: torch.dtype | None) -> torch.Tensor:
    """``x`` channels-last for a low-precision conv stack (oneDNN's bfloat16 kernels take that
    layout without a reorder); as it is in float32."""
    return x if dtype is None else x.contiguous(memory_format=torch.channels_last)


def use_precision(model: torch.nn.Module, choice: str, device: torch.device | str = "cpu") -> str:
    """Set the compute type of every conv stack in ``model`` (those with a ``compute_dtype``
    attribute) for ``train.precision = choice``; returns ``"bf16"`` or ``"fp32"``.

    In bfloat16 the weights are also stored channels-last, the layout oneDNN's bfloat16 kernels
    take without a reorder. Call before the optimiser is built (its state follows the weights).
    """
    dtype = resolve(choice, device)
    for mod in model.modules():
        if hasattr(mod, "compute_dtype"):
            mod.compute_dtype = dtype
    if dtype is not None:
        model.to(memory_format=torch.channels_last)
    return in_use(model)


def in_use(model: torch.nn.Module) -> str:
    """The format ``model``'s conv stacks run in now: ``"bf16"`` or ``"fp32"``."""
    low = any(getattr(mod, "compute_dtype", None) is not None for mod in model.modules())
    return "bf16" if low else "fp32"
