"""solve(), the step grid and model time, checked against closed-form mechanics and scipy.

Sources: the harmonic and damped oscillator solutions x = A·e^(−γt)·cos(ω_d t + φ), ω_d = √(ω0² − γ²)
(closed form, any mechanics text); the exact pendulum period T = 4·√(L/g)·K(k), k = sin(θ0/2)
(handbook formula, K = scipy.special.ellipk(k²)); scipy.integrate.solve_ivp (DOP853, rtol 1e-10) as
the reference integrator.
"""

from __future__ import annotations

import math
from dataclasses import replace

import numpy as np
import pytest
import torch
from scipy.integrate import solve_ivp
from scipy.special import ellipk

from kinecast.config import Config, SolverConfig
from kinecast.model import solve, step_grid, time_scale_from_times, to_model_time
from kinecast.model.field import DynamicsField

torch.set_num_threads(1)

W0, GAMMA = 2.0 * math.pi, 0.3  # natural angular frequency (period 1) and damping rate of the test oscillator
A_AMP, PHI = 1.3, 0.4
RK4 = SolverConfig(method="rk4", substeps=64)
DOPRI = SolverConfig(method="dopri5", rtol=1e-10, atol=1e-12)


def oscillator(gamma):
    """x'' = −2γ x' − ω0² x as a first-order system on y = [x, v] (batch of states)."""
    return lambda t, y: torch.stack([y[:, 1], -2.0 * gamma * y[:, 1] - W0 ** 2 * y[:, 0]], dim=1)


damped_field = oscillator(GAMMA)


def damped_closed_form(t, gamma=GAMMA):
    """x and v of the damped oscillator (closed form; ω_d = √(ω0² − γ²))."""
    wd = math.sqrt(W0 ** 2 - gamma ** 2)
    t = np.asarray(t, dtype=np.float64)
    x = A_AMP * np.exp(-gamma * t) * np.cos(wd * t + PHI)
    v = A_AMP * np.exp(-gamma * t) * (-gamma * np.cos(wd * t + PHI) - wd * np.sin(wd * t + PHI))
    return x, v


REGULAR = np.linspace(0.0, 2.0, 21)
IRREGULAR = np.array([0.0, 0.013, 0.1, 0.31, 0.34, 0.72, 0.9, 1.37, 1.38, 2.0])


@pytest.mark.parametrize("cfg", [RK4, DOPRI], ids=["rk4", "dopri5"])
@pytest.mark.parametrize("times", [REGULAR, IRREGULAR], ids=["regular", "irregular"])
@pytest.mark.parametrize("gamma", [0.0, GAMMA], ids=["harmonic", "damped"])
def test_oscillator_matches_closed_form_forward(cfg, times, gamma):
    # Source: closed-form (damped) harmonic oscillator, x = A e^(−γt) cos(ω_d t + φ).
    x0, v0 = damped_closed_form([0.0], gamma)
    y0 = torch.tensor([[x0[0], v0[0]]], dtype=torch.float64)
    ys = solve(oscillator(gamma), y0, torch.tensor(times), cfg)
    x, v = damped_closed_form(times, gamma)
    assert ys.shape == (len(times), 1, 2)
    np.testing.assert_allclose(ys[:, 0, 0].numpy(), x, atol=5e-6)
    np.testing.assert_allclose(ys[:, 0, 1].numpy(), v, atol=5e-5)


@pytest.mark.parametrize("cfg", [RK4, DOPRI], ids=["rk4", "dopri5"])
@pytest.mark.parametrize("times", [REGULAR, IRREGULAR], ids=["regular", "irregular"])
def test_damped_oscillator_backward_in_time(cfg, times):
    # Source: closed form as above; start at the last time and integrate towards t = 0.
    back = times[::-1].copy()
    x_end, v_end = damped_closed_form([back[0]])
    y0 = torch.tensor([[x_end[0], v_end[0]]], dtype=torch.float64)
    ys = solve(damped_field, y0, torch.tensor(back), cfg)
    x, v = damped_closed_form(back)
    np.testing.assert_allclose(ys[:, 0, 0].numpy(), x, atol=5e-6)
    np.testing.assert_allclose(ys[:, 0, 1].numpy(), v, atol=5e-5)


def _pendulum_torch(t, y, w2=9.81 / 0.25, b=0.5):
    return torch.stack([y[:, 1], -w2 * torch.sin(y[:, 0]) - b * y[:, 1]], dim=1)


@pytest.mark.parametrize("cfg", [RK4, DOPRI], ids=["rk4", "dopri5"])
@pytest.mark.parametrize("backward", [False, True], ids=["forward", "backward"])
def test_nonlinear_pendulum_matches_solve_ivp(cfg, backward):
    # Source: scipy.integrate.solve_ivp (DOP853, rtol 1e-10, atol 1e-12) as reference integrator.
    times = IRREGULAR * 1.5
    if backward:
        times = -times
    y0 = np.array([1.2, -0.7])
    ref = solve_ivp(lambda t, y: _pendulum_torch(t, torch.tensor(y)[None])[0].numpy(),
                    (times[0], times[-1]), y0, t_eval=times, method="DOP853", rtol=1e-10, atol=1e-12)
    ys = solve(_pendulum_torch, torch.tensor(y0)[None], torch.tensor(times), cfg)
    np.testing.assert_allclose(ys[:, 0, :].numpy(), ref.y.T, rtol=1e-4, atol=5e-5)


def test_pendulum_exact_period_from_elliptic_integral():
    # Source: exact pendulum period T = 4·√(L/g)·K(k), k = sin(θ0/2) (handbook formula);
    # released from rest at θ0 it passes θ = 0 at T/4, reaches −θ0 at T/2 and returns to θ0 at T.
    g_over_l, theta0 = 9.81 / 0.25, math.radians(70.0)
    period = 4.0 / math.sqrt(g_over_l) * ellipk(math.sin(theta0 / 2) ** 2)
    small_angle = 2 * math.pi / math.sqrt(g_over_l)
    assert period > 1.08 * small_angle  # at 70° the exact period is clearly longer (a check that bites)
    times = torch.tensor([0.0, period / 4, period / 2, period], dtype=torch.float64)
    y0 = torch.tensor([[theta0, 0.0]], dtype=torch.float64)
    for cfg in (replace(RK4, substeps=200), DOPRI):
        ys = solve(lambda t, y: _pendulum_torch(t, y, g_over_l, 0.0), y0, times, cfg)
        np.testing.assert_allclose(ys[:, 0, 0].numpy(), [theta0, 0.0, -theta0, theta0], atol=1e-6)


def test_step_grid_holds_every_output_time_exactly():
    # Source: definition of the grid (every output time is a grid node); common practice for
    # fixed-step solvers at irregular output times, which otherwise need interpolation.
    t = torch.tensor(IRREGULAR, dtype=torch.float32) * 0.7
    grid = step_grid(t, 3)
    assert len(grid) == (len(t) - 1) * 3 + 1
    assert torch.equal(grid[::3], t)
    assert (grid[1:] > grid[:-1]).all()


def test_step_grid_steps_per_frame_across_long_intervals():
    # Source: definition of "substeps per frame interval" (solver.substeps): an output interval that
    # spans three frames gets three frames' worth of steps; timing jitter (0.05 %, 20 % of a frame)
    # adds none, a gap of 1.3 frames gets two frames' worth (solver.FRAME_TOLERANCE, a quarter frame).
    grid = step_grid(torch.tensor([0.0, 0.3, 0.4, 0.50005, 0.62, 0.75], dtype=torch.float64), 2, frame=0.1)
    assert len(grid) == 6 + 2 + 2 + 2 + 4 + 1
    np.testing.assert_allclose(grid[:7].numpy(), np.arange(7) * 0.05, atol=1e-15)
    assert grid[6] == 0.3 and grid[8] == 0.4 and grid[10] == 0.50005 and grid[-1] == 0.75
    backward = step_grid(torch.tensor([0.0, -0.3]), 2, frame=0.1)  # time running backward
    assert len(backward) == 7 and (backward[1:] < backward[:-1]).all()


def test_forecast_from_context_to_a_late_first_frame_keeps_the_frame_step():
    # Source: closed-form harmonic oscillator x = A cos(ω0 t + φ). A forecast asks for its first
    # output several frames after the state's time (the context frames are not asked for); the
    # solution there must not depend on that, i.e. match what a solve through every frame gives.
    # With 2 RK4 steps per frame interval (frame 0.1, ω0 = 2π: 10 frames per period) the error is
    # 8e-4 at A = 1.3; crossing the 6-frame gap in two steps of 0.3 (ω0·h ≈ 1.9, far past RK4's
    # accuracy, common practice) gave 0.44 before the grid counted frames (measured).
    cfg = SolverConfig(method="rk4", substeps=2, units_per_frame=0.1)
    x0, v0 = damped_closed_form([0.0], 0.0)
    y0 = torch.tensor([[x0[0], v0[0]]], dtype=torch.float64)
    every = torch.arange(0, 13, dtype=torch.float64) * 0.1
    late = torch.cat([every[:1], every[6:]])
    dense = solve(oscillator(0.0), y0, every, cfg)[6:, 0, 0]
    sparse = solve(oscillator(0.0), y0, late, cfg)[1:, 0, 0]
    truth, _ = damped_closed_form(every[6:].numpy(), 0.0)
    np.testing.assert_allclose(sparse.numpy(), dense.numpy(), atol=1e-12)
    np.testing.assert_allclose(sparse.numpy(), truth, atol=1e-3)


def test_fixed_step_rk4_converges_at_fourth_order():
    # Source: RK4 global error is O(h⁴) (common practice; Butcher, Numerical Methods for ODEs).
    # Halving the step should cut the error about 16×; a linear-interpolation shortcut would not.
    errs = []
    for n in (16, 32, 64):
        ys = solve(damped_field, torch.tensor([[1.0, 0.0]], dtype=torch.float64),
                   torch.tensor(IRREGULAR), replace(RK4, substeps=n))
        ref = solve(damped_field, torch.tensor([[1.0, 0.0]], dtype=torch.float64),
                    torch.tensor(IRREGULAR), DOPRI)
        errs.append(float((ys - ref).abs().max()))
    assert 10.0 < errs[0] / errs[1] < 24.0 and 10.0 < errs[1] / errs[2] < 24.0


def test_integrated_position_derivative_is_velocity():
    # Source: definition of the second-order system (ds/dt = v); central finite differences have
    # O(h²) error (common practice). The acceleration is made large so v really changes.
    torch.manual_seed(3)
    field = DynamicsField(3, 32, 2, second_order=True, bayesian=True, prior_std=1.0,
                          init_logstd=-3.0).double()
    with torch.no_grad():
        field.w_mu[-1].mul_(30.0)
    w = field.sample(4)
    h = 1e-3
    t = torch.arange(0, 401, dtype=torch.float64) * h
    ys = solve(lambda tt, y: field(tt, y, w), torch.randn(4, 6, dtype=torch.float64), t,
               replace(RK4, substeps=2))
    s, v = ys.detach()[..., :3], ys.detach()[..., 3:]
    assert float((v - v[0]).abs().max()) > 0.5  # v changes a lot along the path
    fd = (s[2:] - s[:-2]) / (2 * h)
    np.testing.assert_allclose(fd.numpy(), v[1:-1].numpy(), atol=1e-5)


def test_adjoint_gradients_match_backprop():
    # Source: the adjoint method gives the same gradient as backpropagation through the solver up to
    # solver tolerance (Chen et al. 2018, Neural ODEs). Drawn weights must receive gradients too.
    torch.manual_seed(0)
    field = DynamicsField(2, 16, 2, True, True, 1.0, -2.0).double()
    y0 = torch.randn(3, 4, dtype=torch.float64)
    t = torch.tensor([0.0, 0.3, 0.45, 1.0], dtype=torch.float64)
    grads = []
    for adjoint in (False, True):
        field.zero_grad()
        gen = torch.Generator().manual_seed(7)
        w = field.sample(3, generator=gen)
        ys = solve(lambda tt, y: field(tt, y, w), y0, t, replace(DOPRI, adjoint=adjoint),
                   adjoint_params=field.tensors(w))
        (ys ** 2).sum().backward()
        grads.append([p.grad.clone() for p in field.parameters()])
    for a, b in zip(*grads):
        assert float(a.abs().max()) > 0
        torch.testing.assert_close(a, b, rtol=1e-6, atol=1e-8)


def test_bad_times_are_rejected():
    # Source: solve's contract: strictly monotone times.
    y0 = torch.zeros(1, 2)
    with pytest.raises(ValueError, match="strictly increasing or strictly decreasing"):
        solve(damped_field, y0, torch.tensor([0.0, 0.2, 0.1]), RK4)
    with pytest.raises(ValueError, match="non-finite"):
        solve(damped_field, y0, torch.tensor([0.0, float("nan")]), RK4)
    assert torch.equal(solve(damped_field, y0, torch.tensor([0.5]), RK4), y0[None])


def test_model_time_scaling_and_unset_scale():
    # Source: definition — model time = seconds × time_scale; the scale puts the median frame
    # interval at units_per_frame.
    cfg = Config()
    with pytest.raises(ValueError, match="time_scale"):
        to_model_time([0.0, 1.0], cfg)
    times = np.array([0.0, 0.04, 0.08, 0.2, 0.24])  # a dropped-frame gap; median interval 0.04 s
    cfg.solver.time_scale = time_scale_from_times(times, cfg.solver.units_per_frame)
    assert cfg.solver.time_scale == pytest.approx(0.1 / 0.04)
    mt = to_model_time(torch.tensor(times), cfg)
    assert mt.dtype == torch.float32
    np.testing.assert_allclose(mt.numpy(), times * 2.5, rtol=1e-6)


def test_time_scale_over_several_recordings_ignores_the_joins():
    # Source: definition — the median is over frame intervals inside each recording only.
    a = np.arange(5) * 0.02          # 50 fps
    b = 10.0 + np.arange(9) * 0.02   # starts much later; the 9.92 s join is not an interval
    assert time_scale_from_times([a, b], 0.1) == pytest.approx(0.1 / 0.02)
    with pytest.raises(ValueError, match="two distinct"):
        time_scale_from_times([0.5], 0.1)
