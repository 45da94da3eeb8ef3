"""The fixed-step RK4 solve of the Bayesian field with drawn weights, with a hand-written backward.

A training step solves the latent ODE with one weight draw per sequence: ~150 evaluations of a
small MLP on a batch of 8 states. Through autograd each evaluation leaves a dozen graph nodes, and
each layer's weight gradient is an outer product of one row by one row (a batched matmul of inner
size 1), added into the gradient of the previous evaluation: 45 ms per solve and its backward
on 2 cores, for ~0.3 GFLOP, over a quarter of the 64 px training step. Fused: 25-30 ms, and the
step 1.17× (fp32) / 1.25× (bf16) faster, medians of 8 interleaved rounds (DEVELOPERS.md,
twenty-fifth session).

:func:`solve_rk4` computes the same forward values as :func:`kinecast.model.solver.solve` with
torchdiffeq's ``rk4`` (the 3/8 rule, on the same :func:`~kinecast.model.solver.step_grid`), bit
for bit, and backpropagates through the steps by hand (discretise-then-differentiate, the
gradient autograd gives, up to the order of floating-point sums): one reverse sweep of the
Runge-Kutta stages, with every layer's weight gradient summed over all evaluations in one batched
matmul at the end. Under ``torch.no_grad`` (rollouts) it keeps nothing per step.

References
----------
E. Hairer, S. P. Nørsett and G. Wanner (1993). Solving Ordinary Differential Equations I, 2nd ed.
Springer (the 3/8 rule, Table 1.2 of II.1; from memory).
A. Griewank and A. Walther (2008). Evaluating Derivatives, 2nd ed. SIAM (reverse mode through an
explicit time-stepping loop).
"""

from __future__ import annotations

import torch

from .solver import step_grid

__all__ = ["applies", "solve_rk4"]

_ONE_THIRD = 1 / 3  # the constant torchdiffeq's rk4 step uses


def applies(field, t: torch.Tensor, solver_cfg, weights) -> bool:
    """Whether :func:`solve_rk4` stands in for the general solver: drawn weights (not the means),
    the fixed-step ``rk4`` without adjoint, output times increasing."""
    return (weights is not None and solver_cfg.method == "rk4" and not solver_cfg.adjoint
            and field.act in _DERIVATIVE and len(t) > 1 and bool((t[1:] > t[:-1]).all()))


def solve_rk4(field, state0: torch.Tensor, t: torch.Tensor, solver_cfg, weights) -> torch.Tensor:
    """States [N, n, 2q] at the times ``t`` [N] (``t[0]`` is the start) from ``state0`` [n, 2q],
    with the field's drawn ``weights`` (``field.sample(n)``); see the module notes."""
    grid = step_grid(t, int(solver_cfg.substeps), float(solver_cfg.units_per_frame))
    flat = [x for pair in weights for x in pair]
    if not torch.is_grad_enabled() or not any(x.requires_grad for x in [state0, *flat]):
        return _steps(field, grid, t, state0, weights, None)[0]  # a rollout: nothing kept per step
    return _Solve.apply(field, grid, t, state0, *flat)


# Each activation's backward from its output h (enough to store outputs only), (gradient, h) →
# gradient on its input: relu passes it where h > 0 (the kernel autograd uses); tanh multiplies
# by 1 − h²; softplus by σ(z) = 1 − exp(−h), since h = log(1 + e^z).
_DERIVATIVE = {
    torch.relu: lambda g, h: torch.ops.aten.threshold_backward(g, h, 0.0),
    torch.tanh: lambda g, h: g * (1 - h * h),
    torch.nn.functional.softplus: lambda g, h: g * -torch.expm1(-h),
}


def _steps(field, grid, t, state0, weights, tape):
    """The forward solve: states at ``t`` [N, n, 2q], and per step its ``dt`` and how many outputs
    it ended on; appends each evaluation's layer inputs to ``tape`` (None: keeps nothing)."""

    def f(y):
        return field.forward(None, y, weights, tape)  # not field(...): no module hooks, ~150 calls

    times = t.tolist()
    states, j, y0 = [state0], 1, state0
    dts, ends = [], []
    for t0, t1 in zip(grid[:-1], grid[1:]):  # torchdiffeq's rk4_alt_step_func, term for term
        dt = t1 - t0
        k1 = f(y0)
        k2 = f(y0 + dt * k1 * _ONE_THIRD)
        k3 = f(y0 + dt * (k2 - k1 * _ONE_THIRD))
        k4 = f(y0 + dt * (k1 - k2 + k3))
        y1 = y0 + (k1 + 3 * (k2 + k3) + k4) * dt * 0.125
        dts.append(dt)
        hit = 0
        while j < len(times) and float(t1) >= times[j]:
            states.append(y1)
            j, hit = j + 1, hit + 1
        ends.append(hit)
        y0 = y1
    return torch.stack(states), dts, ends


class _Solve(torch.autograd.Function):
    @staticmethod
    def forward(ctx, field, grid, t, state0, *flat):
        tape = []  # per evaluation: the inputs of its layers
        weights = list(zip(flat[0::2], flat[1::2]))
        states, dts, ctx.ends = _steps(field, grid, t, state0, weights, tape)
        ctx.dts = [float(dt) for dt in dts]  # plain numbers: the backward's fused adds take them
        ctx.field, ctx.tape, ctx.n = field, tape, state0.shape[0]
        ctx.save_for_backward(*flat)
        return states

    @staticmethod
    def backward(ctx, grad_states):
        field, tape, n = ctx.field, ctx.tape, ctx.n
        flat = ctx.saved_tensors
        ws = list(flat[0::2])
        wts = [w.transpose(1, 2).contiguous() for w in ws]  # once: bmm on a transposed view is slower
        q, last = field.q, len(ws) - 1
        deriv = _DERIVATIVE[field.act]
        moving = None if bool((field.moving == 1).all()) else field.moving
        rows = [[] for _ in ws]    # per layer: its input rows, one block per evaluation
        grads = [[] for _ in ws]   # per layer: the gradient on its output (pre-activation), alike

        def f_back(e, g):
            """Gradient on the state of evaluation ``e`` from the gradient ``g`` on its output."""
            hs = tape[e]
            if field.second_order:
                ga, gy_extra = g[:, q:], g[:, :q]
                if moving is not None:
                    ga = ga * moving
            else:
                ga, gy_extra = g, None
            gz = ga.reshape(n, hs[0].shape[1], -1)
            for i in range(last, -1, -1):
                rows[i].append(hs[i])
                grads[i].append(gz)
                gh = torch.bmm(gz, wts[i])
                gz = deriv(gh, hs[i]) if i > 0 else gh
            gy = field._from_objects(gz, n)   # a fresh tensor (or a view of one): safe to add into
            if gy_extra is not None:
                gy[:, q:] += gy_extra
            return gy

        idx = len(grad_states) - 1
        gy = grad_states[idx].clone()
        for s in range(len(ctx.dts) - 1, -1, -1):
            # The step y1 = y0 + dt/8 (k1 + 3 k2 + 3 k3 + k4), with k2 = f(y0 + dt k1/3),
            # k3 = f(y0 + dt (k2 - k1/3)), k4 = f(y0 + dt (k1 - k2 + k3)), in reverse: gk* are the
            # gradients on the stages k*, ga* those on the states each stage was evaluated at.
            dt = ctx.dts[s]
            gk4 = gy * (dt * 0.125)
            gk23 = gy * (dt * 0.375)
            e = 4 * s
            ga4 = f_back(e + 3, gk4)
            gk1 = torch.add(gk4, ga4, alpha=dt)
            gk2 = torch.sub(gk23, ga4, alpha=dt)
            ga3 = f_back(e + 2, torch.add(gk23, ga4, alpha=dt))
            gk2.add_(ga3, alpha=dt)
            gk1.sub_(ga3, alpha=dt * _ONE_THIRD)
            ga2 = f_back(e + 1, gk2)
            gk1.add_(ga2, alpha=dt * _ONE_THIRD)
            gy = gy + ga4 + ga3 + ga2 + f_back(e, gk1)
            # entering step s from its start: add the gradient of outputs taken at that start
            for _ in range(ctx.ends[s - 1] if s > 0 else 0):
                idx -= 1
                gy = gy + grad_states[idx]
        out = [None, None, None, gy + grad_states[0]]   # idx is 1 here: every later output was added
        for i in range(len(ws)):
            x = torch.cat(rows[i], dim=1)       # [n, E·G, in], every evaluation's rows
            g = torch.cat(grads[i], dim=1)      # [n, E·G, out]
            out.append(torch.bmm(x.transpose(1, 2), g))
            out.append(g.sum(dim=1, keepdim=True))
        return tuple(out)
