"""The model: conv encoders, a Bayesian acceleration field, the latent ODE solver, a conv decoder.

Public API
----------
build_model(cfg, channels) -> LatentODE
LatentODE.forward / encode / rollout / decode / set_background
solve(field, state0, t, solver_cfg) -> states [N, B, D]
to_model_time(times_seconds, cfg) -> Tensor
time_scale_from_times(times_seconds, units_per_frame) -> float
"""

from .latent_ode import LatentODE, build_model
from .solver import solve, step_grid, time_scale_from_times, to_model_time

__all__ = ["LatentODE", "build_model", "solve", "step_grid", "time_scale_from_times", "to_model_time"]
