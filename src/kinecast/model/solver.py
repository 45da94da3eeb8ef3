"""The one entry point around torchdiffeq, and the conversion from seconds to model time.

Model time is seconds × ``cfg.solver.time_scale`` (model units per second). The trainer sets the
scale from the data so that one median frame interval is ``cfg.solver.units_per_frame`` model units;
:func:`time_scale_from_times` computes that value.

Fixed-step methods (rk4, euler, midpoint) step on a grid that holds every output time exactly, with
``cfg.solver.substeps`` equal steps per frame interval (``cfg.solver.units_per_frame``) inside each
output interval, so irregular frame times never go through interpolation and an output interval
spanning several frames is not crossed in steps larger than the field was trained with. Adaptive
dopri5 uses ``rtol``/``atol``. Times may decrease (integration backward in time).

References
----------
Chen, R. T. Q., Rubanova, Y., Bettencourt, J. and Duvenaud, D. (2018). Neural Ordinary Differential
Equations. NeurIPS. (torchdiffeq; adjoint gradients.)
Dormand, J. R. and Prince, P. J. (1980). A family of embedded Runge-Kutta formulae. J. Comput. Appl.
Math. 6(1), 19–26.
"""

from __future__ import annotations

from typing import Callable, Sequence

import numpy as np
import torch
from torchdiffeq import odeint, odeint_adjoint

FIXED_STEP_METHODS = ("rk4", "euler", "midpoint")
# An output interval up to this fraction of a frame longer than a whole number of frames counts as that
# number: frame-time jitter in a real video (a few % of a frame) must not double the steps of every
# training window; the step then grows by at most this share over the trained one (our choice).
FRAME_TOLERANCE = 0.25
ADAPTIVE_METHODS = ("dopri5",)
# torchdiffeq's own method names (its "rk4" is the fourth-order Runge-Kutta 3/8 rule)
METHODS = FIXED_STEP_METHODS + ADAPTIVE_METHODS


def step_grid(t: torch.Tensor, substeps: int, frame: float | None = None) -> torch.Tensor:
    """Integration grid with ``substeps`` equal steps per frame interval inside each interval of ``t``.

    Every entry of ``t`` is in the grid exactly (bit for bit), so the solver's output at those times
    needs no interpolation. With ``frame`` (the model time of one frame interval), an output interval
    spanning several frames gets ``substeps`` steps per frame it spans (rounded up past
    :data:`FRAME_TOLERANCE`): the step stays within that share of the one the field was trained
    with, whichever times a caller asks for (a forecast from the context to its first future frame,
    frames on both sides of a dropped stretch). Without it, every output interval gets ``substeps``
    steps.

    Parameters
    ----------
    t : Tensor, shape (N,)
        Strictly increasing (or strictly decreasing) times.
    substeps : int
        Steps per interval, or per frame interval with ``frame`` (at least 1).
    frame : float, optional
        Model time of one frame interval (``solver.units_per_frame``).

    Returns
    -------
    Tensor, shape (1 + total steps,)

    Examples
    --------
    >>> step_grid(torch.tensor([0.0, 1.0, 1.5]), 2).tolist()
    [0.0, 0.5, 1.0, 1.25, 1.5]
    >>> step_grid(torch.tensor([0.0, 3.0, 4.0]), 2, frame=1.0).tolist()
    [0.0, 0.5, 1.0, 1.5, 2.0, 2.5, 3.0, 3.5, 4.0]
    """
    if len(t) < 2:
        return t.clone()
    gaps = t[1:] - t[:-1]
    if frame is None:
        counts = torch.full(gaps.shape, substeps, dtype=torch.long, device=t.device)
    else:  # frames spanned, rounded up past FRAME_TOLERANCE (a jittered frame interval stays one frame)
        spans = torch.ceil(gaps.abs() / float(frame) - FRAME_TOLERANCE).clamp(min=1).long()
        counts = spans * substeps
    which = torch.repeat_interleave(torch.arange(len(gaps), device=t.device), counts)
    first = torch.cumsum(counts, 0) - counts
    frac = (torch.arange(len(which), device=t.device) - first[which]).to(t.dtype) / counts[which].to(t.dtype)
    inner = t[:-1][which] + gaps[which] * frac
    return torch.cat([inner, t[-1:]])


def _check_times(t: torch.Tensor) -> None:
    if t.ndim != 1 or len(t) == 0:
        raise ValueError(f"solve: t must be a non-empty 1-D tensor, got shape {tuple(t.shape)}")
    if not torch.isfinite(t).all():
        raise ValueError("solve: t holds non-finite values")
    if len(t) > 1:
        d = t[1:] - t[:-1]
        if not ((d > 0).all() or (d < 0).all()):
            raise ValueError("solve: t must be strictly increasing or strictly decreasing")


def solve(field: Callable[[torch.Tensor, torch.Tensor], torch.Tensor], state0: torch.Tensor,
          t: torch.Tensor, solver_cfg, adjoint_params: Sequence[torch.Tensor] | None = None
          ) -> torch.Tensor:
    """Integrate ``dy/dt = field(t, y)`` from ``state0`` at ``t[0]`` and return ``y`` at every ``t``.

    Parameters
    ----------
    field : callable ``(t, y) -> dy/dt``
        The vector field; an ``nn.Module`` when ``solver_cfg.adjoint`` is on (or pass
        ``adjoint_params``: the tensors the adjoint differentiates, e.g. weights drawn for this pass).
    state0 : Tensor, shape (B, D)
        State at ``t[0]``.
    t : Tensor, shape (N,)
        Output times in model units, strictly increasing or strictly decreasing.
    solver_cfg : SolverConfig
        ``method``, ``substeps``, ``rtol``, ``atol``, ``adjoint``.
    adjoint_params : sequence of Tensor, optional
        Tensors the field depends on, for adjoint gradients.

    Returns
    -------
    Tensor, shape (N, B, D)
        ``states[0]`` is ``state0``.

    Examples
    --------
    >>> from kinecast.config import SolverConfig
    >>> y = solve(lambda t, y: -y, torch.ones(1, 1), torch.tensor([0.0, 1.0]), SolverConfig())
    >>> round(float(y[-1, 0, 0]), 2)  # exp(-1)
    0.37
    """
    method = solver_cfg.method
    if method not in METHODS:
        raise ValueError(f"solve: unknown method {method!r}; allowed "
                         + ", ".join(METHODS))
    t = torch.as_tensor(t).to(device=state0.device)
    if not t.is_floating_point():
        t = t.to(state0.dtype)
    _check_times(t)
    if len(t) == 1:
        return state0.unsqueeze(0)
    kwargs: dict = {"method": method}
    if method in FIXED_STEP_METHODS:
        n = int(solver_cfg.substeps)
        if n < 1:
            raise ValueError(f"solve: substeps must be at least 1, got {n}")
        frame = float(solver_cfg.units_per_frame)
        kwargs["options"] = {"grid_constructor": lambda _f, _y0, tt: step_grid(tt, n, frame)}
    else:
        kwargs["rtol"] = float(solver_cfg.rtol)
        kwargs["atol"] = float(solver_cfg.atol)
    if not solver_cfg.adjoint:
        return odeint(field, state0, t, **kwargs)
    if adjoint_params is None:
        adjoint_params = tuple(field.parameters()) if isinstance(field, torch.nn.Module) else ()
    return odeint_adjoint(field, state0, t, adjoint_params=tuple(adjoint_params), **kwargs)


def to_model_time(times_seconds, cfg, dtype: torch.dtype = torch.float32) -> torch.Tensor:
    """Seconds → model time units: ``times_seconds × cfg.solver.time_scale``.

    Parameters
    ----------
    times_seconds : array-like or Tensor
        Times in seconds.
    cfg : Config
        Uses ``cfg.solver.time_scale`` (model units per second).
    dtype : torch.dtype
        Result dtype (the product is formed in float64 first).

    Returns
    -------
    Tensor

    Raises
    ------
    ValueError
        If ``cfg.solver.time_scale`` is 0 (not yet set from the data) or not finite and positive.

    Examples
    --------
    >>> from kinecast.config import Config
    >>> cfg = Config(); cfg.solver.time_scale = 3.0
    >>> to_model_time([0.0, 0.5], cfg).tolist()
    [0.0, 1.5]
    """
    scale = float(cfg.solver.time_scale)
    if not np.isfinite(scale) or scale <= 0.0:
        raise ValueError(f"solver.time_scale is {scale}: set it from the data first "
                         "(time_scale_from_times) before converting seconds to model time")
    if torch.is_tensor(times_seconds):
        return (times_seconds.to(torch.float64) * scale).to(dtype)
    return torch.as_tensor(np.asarray(times_seconds, dtype=np.float64) * scale).to(dtype)


def time_scale_from_times(times_seconds, units_per_frame: float) -> float:
    """Model units per second so that the median frame interval is ``units_per_frame`` model units.

    Parameters
    ----------
    times_seconds : array-like
        Frame times of one or more recordings (each increasing), concatenated or as a list of arrays.
    units_per_frame : float
        ``cfg.solver.units_per_frame``.

    Examples
    --------
    >>> time_scale_from_times([0.0, 0.04, 0.08], 0.1)
    2.5
    """
    if isinstance(times_seconds, (list, tuple)) and times_seconds and np.ndim(times_seconds[0]) == 1:
        diffs = np.concatenate([np.diff(np.asarray(a, dtype=np.float64)) for a in times_seconds])
    else:
        diffs = np.diff(np.asarray(times_seconds, dtype=np.float64))
    diffs = diffs[diffs > 0]
    if len(diffs) == 0:
        raise ValueError("time_scale_from_times: need at least two distinct increasing times")
    return float(units_per_frame / np.median(diffs))
