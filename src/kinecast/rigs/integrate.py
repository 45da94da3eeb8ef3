"""Fixed-step classical Runge–Kutta (RK4) in numpy, shared by every rig, with event location.

The rigs need ground truth far more accurate than any pixel, so they take many small RK4 steps
between the requested times. A rig with hard walls (the air table) passes an :class:`Event`: when a
step ends outside the allowed region, the crossing time inside the step is found by bisection on the
step fraction, the state is advanced exactly to the crossing, the event is applied (for example a
bounce) and the rest of the step is taken from there.

References
----------
Butcher, J. C. (2016). *Numerical Methods for Ordinary Differential Equations*, 3rd ed., Wiley,
section 23 (the classical fourth-order method).
"""

from __future__ import annotations

import math
from typing import Callable, Protocol

import numpy as np

Rhs = Callable[[float, np.ndarray], np.ndarray]

# Bisection halvings when locating an event inside one step: 2**-55 of a step is below float64
# resolution of the step fraction, so more halvings cannot move the result.
EVENT_BISECTIONS = 55
# A step in which more events than this happen means a rig is stuck (e.g. trapped between walls).
MAX_EVENTS_PER_STEP = 64


class Event(Protocol):
    """Hard constraints on the state: every gap must stay >= 0."""

    def gaps(self, y: np.ndarray) -> np.ndarray:
        """Distances to each constraint; a negative entry means the state crossed it."""

    def apply(self, y: np.ndarray, which: int, forward: bool) -> np.ndarray:
        """The state just after constraint ``which`` is hit (``forward`` False when integrating
        backwards in time)."""


def rk4_step(rhs: Rhs, t: float, y: np.ndarray, h: float) -> np.ndarray:
    """One classical RK4 step of size ``h`` (negative ``h`` steps backwards in time).

    Examples
    --------
    >>> import numpy as np
    >>> y = rk4_step(lambda t, y: -y, 0.0, np.array([1.0]), 0.1)
    >>> bool(abs(y[0] - np.exp(-0.1)) < 1e-6)
    True
    """
    k1 = rhs(t, y)
    k2 = rhs(t + h / 2, y + (h / 2) * k1)
    k3 = rhs(t + h / 2, y + (h / 2) * k2)
    k4 = rhs(t + h, y + h * k3)
    return y + (h / 6) * (k1 + 2 * k2 + 2 * k3 + k4)


def _locate(rhs: Rhs, t: float, y: np.ndarray, h: float, event: Event, which: int) -> float:
    """Fraction ``s`` of the step at which gap ``which`` reaches zero (bisection)."""
    lo, hi = 0.0, 1.0
    for _ in range(EVENT_BISECTIONS):
        mid = 0.5 * (lo + hi)
        if event.gaps(rk4_step(rhs, t, y, mid * h))[which] < 0:
            hi = mid
        else:
            lo = mid
    return hi


def _advance(rhs: Rhs, t: float, y: np.ndarray, h: float, event: Event | None) -> np.ndarray:
    """Advance one step of size ``h``, handling any events inside it."""
    remaining = h
    for _ in range(MAX_EVENTS_PER_STEP):
        y_new = rk4_step(rhs, t, y, remaining)
        if event is None:
            return y_new
        crossed = np.flatnonzero(event.gaps(y_new) < 0)
        if crossed.size == 0:
            return y_new
        fractions = [_locate(rhs, t, y, remaining, event, int(k)) for k in crossed]
        first = int(np.argmin(fractions))
        s = fractions[first]
        y = event.apply(rk4_step(rhs, t, y, s * remaining), int(crossed[first]), h > 0)
        t += s * remaining
        remaining *= 1.0 - s
    raise RuntimeError(f"more than {MAX_EVENTS_PER_STEP} events in one RK4 step")


def _march(rhs: Rhs, t0: float, y0: np.ndarray, targets: np.ndarray, max_step: float,
           event: Event | None) -> np.ndarray:
    """States at ``targets`` (monotone away from ``t0``), stepping at most ``max_step`` at a time."""
    out = np.empty((len(targets), len(y0)))
    t, y = t0, y0
    for i, target in enumerate(targets):
        span = float(target) - t
        n = max(1, math.ceil(abs(span) / max_step)) if span != 0 else 0
        h = span / n if n else 0.0
        for j in range(n):
            y = _advance(rhs, t + j * h, y, h, event)
        t = float(target)
        out[i] = y
    return out


def integrate(rhs: Rhs, y0, times, max_step: float, t0: float = 0.0,
              event: Event | None = None) -> np.ndarray:
    """Integrate ``dy/dt = rhs(t, y)`` from ``y(t0) = y0`` and return the states at ``times``.

    Times after ``t0`` are reached forwards, times before ``t0`` backwards, each in equal RK4
    sub-steps no longer than ``max_step`` that land exactly on every requested time.

    Parameters
    ----------
    rhs : callable
        ``rhs(t, y) -> dy/dt`` on float64 arrays (same signature as ``scipy.integrate.solve_ivp``).
    y0 : array_like, shape (D,)
        State at ``t0``.
    times : array_like, shape (N,)
        Requested times in seconds, sorted ascending (repeats allowed).
    max_step : float
        Largest RK4 step in seconds.
    t0 : float
        Time of ``y0``.
    event : Event, optional
        Hard constraints located inside each step (see module docstring).

    Returns
    -------
    ndarray, float64, shape (N, D)
        The state at each requested time.

    Examples
    --------
    >>> import numpy as np
    >>> ys = integrate(lambda t, y: np.array([y[1], -y[0]]), [1.0, 0.0], [np.pi], 0.01)
    >>> bool(abs(ys[0, 0] + 1.0) < 1e-8)
    True
    """
    y0 = np.asarray(y0, dtype=np.float64)
    times = np.asarray(times, dtype=np.float64)
    if times.ndim != 1 or np.any(np.diff(times) < 0) or not np.all(np.isfinite(times)):
        raise ValueError("times must be a finite ascending 1-D array")
    if not max_step > 0:
        raise ValueError("max_step must be positive")
    out = np.empty((len(times), len(y0)))
    after = times >= t0
    out[after] = _march(rhs, t0, y0, times[after], max_step, event)
    before = np.flatnonzero(~after)[::-1]
    out[before] = _march(rhs, t0, y0, times[before], max_step, event)
    return out
