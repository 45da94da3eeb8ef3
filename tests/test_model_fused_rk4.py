"""The fused RK4 solve of the field with drawn weights (kinecast.model.fused_rk4) against torchdiffeq.

Reference: torchdiffeq's fixed-grid ``rk4`` (the 3/8 rule) through kinecast.model.solver.solve, and
torch's autograd through it for the gradients. The fused solve must give the same states bit for
bit and the same gradients up to the order of floating-point sums (float32: relative 1e-5, common
practice for reordered float32 sums over a few hundred terms).
"""

import numpy as np
import pytest
import torch
from scipy.integrate import solve_ivp

from kinecast.config import SolverConfig
from kinecast.model import fused_rk4
from kinecast.model.field import DynamicsField
from kinecast.model.solver import solve

TIMES = torch.tensor([0.0, 1.0, 2.0, 3.5, 4.0, 7.0])  # irregular, one gap of three frames


def _field(group=0, second_order=True, activation="relu", still=True):
    torch.manual_seed(4)
    field = DynamicsField(4, 32, 2, second_order, True, 1.0, -1.0, activation, group=group)
    if still:
        field.moving[1] = 0.0  # one coordinate held still, as the trainer may do
    return field


@pytest.mark.parametrize("group, second_order, activation, still",
                         [(0, True, "relu", True), (0, True, "relu", False), (2, True, "relu", True),
                          (0, False, "tanh", True), (0, True, "softplus", True)])
def test_fused_solve_equals_torchdiffeq_and_its_gradients(group, second_order, activation, still):
    # still=False: every coordinate moves, the backward's shortcut that skips the mask
    field, cfg = _field(group, second_order, activation, still), SolverConfig()
    s0 = torch.randn(5, 8, requires_grad=True)
    weights = field.sample(5, generator=torch.Generator().manual_seed(1))
    params = [s0] + list(field.parameters())
    ref = solve(lambda t, y: field(t, y, weights), s0, TIMES, cfg)
    probe = torch.randn_like(ref)  # a random linear functional of every output state
    want = torch.autograd.grad((ref * probe).sum(), params, retain_graph=True)
    assert fused_rk4.applies(field, TIMES, cfg, weights)
    got = fused_rk4.solve_rk4(field, s0, TIMES, cfg, weights)
    assert torch.equal(got, ref)
    with torch.no_grad():  # a rollout keeps nothing per step and gives the same states
        assert torch.equal(fused_rk4.solve_rk4(field, s0, TIMES, cfg, weights), ref.detach())
    grads = torch.autograd.grad((got * probe).sum(), params)
    for a, b in zip(grads, want):
        torch.testing.assert_close(a, b, rtol=1e-5, atol=1e-6 * float(b.abs().max()))


def test_fused_solve_of_a_known_field_matches_scipy():
    # A field whose MLP is linear in the state (tanh of tiny inputs ≈ its argument; weights chosen by
    # hand so the acceleration is −ω² s): a harmonic oscillator, against scipy's solve_ivp (RK45,
    # tight tolerances). Agreement is limited by tanh's cubic term at these amplitudes (1e-3).
    field = DynamicsField(1, 1, 1, True, True, 1.0, -20.0, "tanh")
    eps, omega2 = 1e-3, 4.0
    with torch.no_grad():
        field.w_mu[0].copy_(torch.tensor([[eps], [0.0]]))
        field.w_mu[1].copy_(torch.tensor([[-omega2 / eps]]))
        for b in field.b_mu:
            b.zero_()
    weights = field.sample(1, generator=torch.Generator().manual_seed(0))  # σ = e^−20: the means
    t = torch.linspace(0.0, 3.0, 16)
    got = fused_rk4.solve_rk4(field, torch.tensor([[1.0, 0.0]]), t, SolverConfig(), weights)[:, 0]
    ref = solve_ivp(lambda _, y: [y[1], -omega2 * y[0]], (0.0, 3.0), [1.0, 0.0], t_eval=t.numpy(),
                    rtol=1e-10, atol=1e-12).y.T
    np.testing.assert_allclose(got.detach().numpy(), ref, atol=2e-3)


def test_fused_solve_is_used_only_where_it_is_exact():
    field = _field()
    weights = field.sample(3)
    cfg = SolverConfig()
    assert fused_rk4.applies(field, TIMES, cfg, weights)
    assert not fused_rk4.applies(field, TIMES, cfg, None)              # the means: torchdiffeq
    assert not fused_rk4.applies(field, TIMES.flip(0), cfg, weights)   # backward in time
    for change in ({"method": "dopri5"}, {"method": "euler"}, {"adjoint": True}):
        assert not fused_rk4.applies(field, TIMES, SolverConfig(**change), weights), change
