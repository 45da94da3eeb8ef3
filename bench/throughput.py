"""Training-step and rollout throughput, on pendulum frames rendered by kinecast.

A training step here is what the trainer does per step: the negative ELBO of a batch of windows
(forward), its gradient (backward), gradient clipping and an Adam update. Its FLOPs (forward +
backward) are counted once with ``FlopCounterMode``; the fixed-step solver makes every step cost the
same. Throughput is ``batch × window / step time``.

Rollout throughput is encoding ``k`` context frames, integrating to ``rollout_frames`` future times
and decoding every frame, for 1 sample (posterior-mean weights) or S samples (drawn weights and
initial states, as ``kinecast forecast --samples S`` does): ``S × frames / time``.
"""

from __future__ import annotations

import math
import time

import numpy as np
import torch

from kinecast.config import Config
from kinecast.model import build_model, to_model_time
from kinecast.model.precision import use_precision
from kinecast.rigs import render_trials

from .common import NOMINAL_FPS, best_time, sync, use_all_cores
from .flops import count_flops

RIG = "pendulum"
SEED = 0
TOP_OPS = 5  # operators listed by the step profile


def model_config(size: int) -> Config:
    """The default config at frame size ``size``, with the time scale set for the bench's frame rate."""
    cfg = Config()
    cfg.data.size = size
    cfg.solver.time_scale = cfg.solver.units_per_frame * NOMINAL_FPS
    return cfg


def pendulum_frames(size: int, n: int) -> np.ndarray:
    """``n`` grey pendulum frames at ``size`` px, uint8 (n, size, size, 1), as rendered."""
    return render_trials(RIG, trials=1, frames=n, seed=SEED, size=size, channels="grey")[0].frames


def rig_frames(size: int, n: int) -> torch.Tensor:
    """``n`` grey pendulum frames at ``size`` px, as a float tensor (n, 1, size, size) in [0, 1]."""
    frames = pendulum_frames(size, n).astype(np.float32) / 255.0
    return torch.from_numpy(np.ascontiguousarray(frames.transpose(0, 3, 1, 2)))


def _training_step(size: int, window: int, device: torch.device, precision: str):
    """The bench's training step at ``size`` px: ``(loss, step, info)`` where ``loss()`` is the
    negative ELBO of the default batch, ``step()`` one full optimiser step, ``info`` the batch
    shape and the number format used."""
    use_all_cores()
    torch.manual_seed(SEED)
    cfg = model_config(size)
    batch = cfg.train.batch
    frames = rig_frames(size, window + batch)
    x = torch.stack([frames[i:i + window] for i in range(batch)]).to(device)
    t = to_model_time(np.arange(window) / NOMINAL_FPS, cfg).to(device)
    model = build_model(cfg, 1).to(device).train()
    used = use_precision(model, precision, device)
    opt = torch.optim.Adam(model.parameters(), lr=cfg.train.lr)
    n_total = len(frames)

    def loss():
        return model(x, t, n_total_frames=n_total, beta=1.0)["loss"]

    def step():
        opt.zero_grad(set_to_none=True)
        value = loss()
        value.backward()
        torch.nn.utils.clip_grad_norm_(model.parameters(), cfg.train.grad_clip or math.inf)
        opt.step()

    return loss, step, {"size": size, "batch": batch, "window": window, "precision": used}


def train_step_rate(size: int, window: int, repeats: int, device: torch.device, precision: str = "auto") -> dict:
    """Time one training step at ``size`` px (default batch) and count its FLOPs.

    ``precision`` is ``train.precision`` (the conv nets' number format; the count of FLOPs does not
    depend on it).

    Returns
    -------
    dict
        ``size``, ``batch``, ``window``, ``precision`` (the format used), ``step_s`` (best of
        ``repeats``), ``frames_per_s``, ``flops_per_step`` (forward + backward) and ``flops_per_s``.
    """
    loss, step, info = _training_step(size, window, device, precision)
    flops = count_flops(lambda: loss().backward())
    seconds = best_time(step, repeats, device)
    return {**info, "step_s": seconds, "frames_per_s": info["batch"] * window / seconds,
            "flops_per_step": flops, "flops_per_s": flops / seconds}


def precision_gain(size: int, window: int, rounds: int, device: torch.device, steps: int = 3) -> dict:
    """Speed-up of the bfloat16 training step over the float32 one at ``size`` px, interleaved.

    Both steps are built once; each of ``rounds`` rounds times ``steps`` float32 steps, then
    ``steps`` bfloat16 steps (after one untimed step of each). The gain is the median over the
    rounds of the float32 time over the bfloat16 time: a shared machine whose speed drifts slows
    both halves of a round alike, where two separate best-of timings minutes apart can catch it
    fast for one format and slow for the other (on 2026-12-04 the best-of-5 ratio read 1.41× at
    64 px in the full bench, and 8 interleaved rounds 1.70× the same hour).

    Returns ``size``, ``rounds``, ``gain`` (median), ``gain_lo`` / ``gain_hi`` (min / max over the
    rounds) and ``fp32_s`` / ``bf16_s`` (median seconds per step).
    """
    timed = {}
    for precision in ("fp32", "bf16"):
        _, step, _ = _training_step(size, window, device, precision)
        step()
        timed[precision] = step
    per = {precision: [] for precision in timed}
    for _ in range(max(1, rounds)):
        for precision, step in timed.items():
            sync(device)
            t0 = time.perf_counter()
            for _ in range(steps):
                step()
            sync(device)
            per[precision].append((time.perf_counter() - t0) / steps)
    ratios = np.array(per["fp32"]) / np.array(per["bf16"])
    return {"size": size, "rounds": len(ratios), "gain": float(np.median(ratios)),
            "gain_lo": float(ratios.min()), "gain_hi": float(ratios.max()),
            "fp32_s": float(np.median(per["fp32"])), "bf16_s": float(np.median(per["bf16"]))}


def step_profile(size: int, window: int, device: torch.device, precision: str = "auto", steps: int = 3,
                 top: int = TOP_OPS) -> list[tuple[str, float]]:
    """The ``top`` operators of ``steps`` training steps by their own CPU time, each with its share
    of all operators' own time (``torch.profiler``; after one warm-up step)."""
    _, step, _ = _training_step(size, window, device, precision)
    step()
    with torch.profiler.profile(activities=[torch.profiler.ProfilerActivity.CPU]) as prof:
        for _ in range(steps):
            step()
    events = [e for e in prof.key_averages() if e.self_cpu_time_total > 0]
    total = sum(e.self_cpu_time_total for e in events)
    events.sort(key=lambda e: e.self_cpu_time_total, reverse=True)
    return [(e.key, e.self_cpu_time_total / total) for e in events[:top]]


def rollout_rate(size: int, n_frames: int, samples: int, repeats: int, device: torch.device) -> dict:
    """Frames per second of encode + integrate + decode for ``samples`` futures of ``n_frames``.

    The model is untrained: with the fixed-step solver the cost does not depend on the weights.
    """
    use_all_cores()
    torch.manual_seed(SEED)
    cfg = model_config(size)
    k = cfg.model.velocity_frames
    ctx = rig_frames(size, k)[None].to(device)
    t = to_model_time((k - 1 + np.arange(1, n_frames + 1)) / NOMINAL_FPS, cfg).to(device)
    model = build_model(cfg, 1).to(device).eval()
    use_precision(model, cfg.train.precision, device)
    stochastic = samples > 1

    def roll():
        with torch.no_grad():
            frames, _ = model.rollout(ctx, t, samples=samples, mean_weights=not stochastic,
                                      sample_init=stochastic)
        return frames

    shape = tuple(roll().shape)
    sync(device)
    seconds = best_time(roll, repeats, device)
    return {"size": size, "samples": samples, "frames": n_frames, "output_shape": shape,
            "seconds": seconds, "frames_per_s": samples * n_frames / seconds}
