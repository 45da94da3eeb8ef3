"""What a synthetic rig is: physics (a right-hand side, optional wall events), how initial
conditions are drawn, which truth columns it reports and how one state is drawn."""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import TYPE_CHECKING, Callable, Mapping

import numpy as np

from ..errors import KinecastError
from .draw import Canvas
from .integrate import Event, Rhs, integrate

if TYPE_CHECKING:
    from .look import Look

# RK4 sub-steps per characteristic time of a rig (its swing period, decay time, ...). RK4's global
# error scales as step⁴ (Butcher 2016), so 2000 steps per period keeps truth errors far below 1e-8.
STEPS_PER_TIMESCALE = 2000
# The functions every rig module defines, each under its Rig field's name with a leading underscore
# (``_check``, ``_timescale``, ...), next to its ``DEFAULTS``: what :meth:`Rig.from_module` collects.
STANDARD_PARTS = ("check", "timescale", "rhs", "initial", "truth", "draw")


@dataclass(frozen=True)
class Rig:
    """One synthetic lab rig.

    Attributes
    ----------
    name : str
        Name used on the command line.
    summary : str
        One line describing the scene.
    defaults : Mapping[str, float]
        Physical parameters and initial-condition ranges, with their default values.
    state : tuple of str
        Names of the state vector's entries (the physics truth columns).
    check : callable
        ``check(params)`` raises :class:`ValueError` with a message when parameters are unusable.
    timescale : callable
        ``timescale(params)`` -> the shortest characteristic time of the motion in seconds.
    rhs : callable
        ``rhs(params)`` -> ``f(t, y)`` giving dy/dt.
    initial : callable
        ``initial(rng, params)`` -> the state at t = 0, drawn from ``rng``.
    truth : callable
        ``truth(params, states, size)`` -> extra truth columns (e.g. positions in pixels).
    draw : callable
        ``draw(canvas, params, state, look)`` paints one state in a
        :class:`~kinecast.rigs.look.Look` (its colours through ``look.object`` / ``look.fixture``,
        an extended shape when ``look.rod``).
    event : callable, optional
        ``event(params)`` -> an :class:`~kinecast.rigs.integrate.Event` (walls), or None.
    scenery : callable, optional
        ``scenery(canvas, params, look)`` paints the static parts once per trial (e.g. a floor).
    """

    name: str
    summary: str
    defaults: Mapping[str, float]
    state: tuple[str, ...]
    check: Callable[[dict], None]
    timescale: Callable[[dict], float]
    rhs: Callable[[dict], Rhs]
    initial: Callable[[np.random.Generator, dict], np.ndarray]
    truth: Callable[[dict, np.ndarray, int], dict]
    draw: Callable[[Canvas, dict, np.ndarray, "Look"], None]
    event: Callable[[dict], Event | None] = lambda params: None
    scenery: Callable[[Canvas, dict, "Look"], None] = lambda canvas, params, look: None

    @classmethod
    def from_module(cls, namespace: Mapping[str, object], *, name: str, summary: str,
                    state: tuple[str, ...], event: Callable[[dict], Event | None] | None = None,
                    scenery: Callable[[Canvas, dict, "Look"], None] | None = None) -> "Rig":
        """The rig a rig module defines by convention: its ``DEFAULTS`` and its functions named
        after :data:`STANDARD_PARTS` with a leading underscore (``_check``, ``_timescale``,
        ``_rhs``, ``_initial``, ``_truth``, ``_draw``).

        Parameters
        ----------
        namespace : Mapping[str, object]
            The rig module's ``globals()``.
        name, summary : str
            As the attributes of the same names.
        state : tuple of str
            As the attribute of the same name.
        event, scenery : callable, optional
            As the attributes of the same names; None keeps their defaults (no walls, no static
            scenery).

        Returns
        -------
        Rig

        Raises
        ------
        TypeError
            When the module lacks ``DEFAULTS`` or one of the standard functions (a programming
            error, not bad input).

        Examples
        --------
        The last statement of a rig module (see pendulum.py)::

            PENDULUM = Rig.from_module(globals(), name="pendulum", summary="...",
                                       state=("theta", "omega"))
        """
        keys = ("DEFAULTS", *(f"_{part}" for part in STANDARD_PARTS))
        missing = [key for key in keys if key not in namespace]
        if missing:
            raise TypeError(f"rig module {namespace.get('__name__', '?')} lacks {', '.join(missing)}")
        parts = {part: namespace[f"_{part}"] for part in STANDARD_PARTS}
        extras = {key: value for key, value in (("event", event), ("scenery", scenery)) if value is not None}
        return cls(name=name, summary=summary, defaults=namespace["DEFAULTS"], state=tuple(state), **parts,
                   **extras)

    def resolve(self, params: Mapping[str, float] | None = None) -> dict:
        """The rig's defaults updated with ``params``; raise :class:`KinecastError` on a bad key
        or value."""
        merged = dict(self.defaults)
        for key, value in (params or {}).items():
            thing = f"parameter {key!r} of rig {self.name!r}"
            if key not in self.defaults:
                raise KinecastError(thing, f"unknown: allowed {', '.join(self.defaults)}")
            try:
                number = float(value)
            except (TypeError, ValueError):
                raise KinecastError(thing, f"bad value {value!r}: expected a number") from None
            if not math.isfinite(number) or isinstance(value, bool):
                raise KinecastError(thing, f"bad value {value!r}: expected a finite number")
            merged[key] = number
        try:
            self.check(merged)
        except ValueError as exc:
            raise KinecastError(f"parameters of rig {self.name!r}", str(exc)) from None
        return merged

    def max_step(self, params: dict) -> float:
        """RK4 sub-step length in seconds."""
        return self.timescale(params) / STEPS_PER_TIMESCALE

    def simulate(self, params: dict, y0, times) -> np.ndarray:
        """States (N, D) at ascending ``times`` (seconds) from state ``y0`` at t = 0."""
        return integrate(self.rhs(params), y0, times, self.max_step(params), event=self.event(params))

    def columns(self, params: dict, states: np.ndarray, size: int) -> dict[str, np.ndarray]:
        """All truth columns: the state entries, then the rig's extra columns."""
        out = {name: states[:, i].copy() for i, name in enumerate(self.state_names(params))}
        out.update(self.truth(params, states, size))
        return out

    def state_names(self, params: dict) -> tuple[str, ...]:
        """State entry names (a rig with a variable count, like pucks, expands ``{i}``)."""
        if not any("{i}" in s for s in self.state):
            return self.state
        count = int(params.get("pucks", 1))
        return tuple(s.format(i=i) for i in range(count) for s in self.state)


def require(condition: bool, message: str) -> None:
    """Raise :class:`ValueError` with ``message`` unless ``condition`` holds (for rig checks)."""
    if not condition:
        raise ValueError(message)
