"""``spring``: a weight bobbing on a vertical spring hung from a ceiling bar.

Damped harmonic motion x'' = −ω0²·x − 2γ·x', with x the displacement of the weight from its rest
position in metres, positive downwards. Each trial releases the weight from rest at its own offset.
"""

from __future__ import annotations

import math

import numpy as np

from .draw import Canvas
from .look import Look
from .rig import Rig, require

DEFAULTS = {
    "omega0": 8.0,           # undamped angular frequency, rad/s (period ≈ 0.79 s)
    "gamma": 0.25,           # damping rate γ, 1/s: envelope exp(−γ·t)
    "offset_min_m": 0.03,    # release offset drawn uniformly in [min, max] metres,
    "offset_max_m": 0.08,    #   above or below the rest position
    "rest_drop_m": 0.25,     # ceiling to weight centre at rest
    "weight_m": 0.06,        # side of the square weight
    "view_m": 0.5,           # height of the camera's field of view at the rig
}
CEILING_Y = 0.08             # underside of the ceiling bar, fraction of the frame from the top
CEILING_WIDTH = 0.4          # ceiling bar width, fraction of the frame
COIL_TURNS = 7               # zigzags of the drawn coil
COIL_HALF_WIDTH = 0.05       # half width of the coil, fraction of the frame
COIL_LEAD = 0.1              # straight wire at each end, fraction of the spring length
WIRE_WIDTH = 0.018           # wire stroke width, fraction of the frame
HOOK_DEPTH = 0.2             # the wire ends this far inside the weight, fraction of its half side
CORNER = 0.25                # weight corner radius, fraction of its half side
WEIGHT_COLOUR = (0.3, 0.6, 0.95)
WIRE_COLOUR = (0.75, 0.75, 0.75)
CEILING_COLOUR = (0.45, 0.45, 0.45)
# Rod look: the weight is a long flat block, this many times the square's side wide and tall.
BLOCK_LENGTH, BLOCK_THICKNESS = 3.0, 0.6


def _check(p: dict) -> None:
    require(p["omega0"] > 0, "omega0 must be positive")
    require(p["gamma"] >= 0, "gamma must be >= 0")
    require(0 <= p["offset_min_m"] <= p["offset_max_m"], "need 0 <= offset_min_m <= offset_max_m")
    require(p["offset_max_m"] + p["weight_m"] / 2 < p["rest_drop_m"],
            "offset_max_m + weight_m/2 must stay below rest_drop_m (the weight would hit the ceiling)")
    require(p["weight_m"] > 0 and p["view_m"] > 0, "weight_m and view_m must be positive")


def _timescale(p: dict) -> float:
    period = 2 * math.pi / p["omega0"]
    return min(period, 1 / p["gamma"]) if p["gamma"] > 0 else period


def _rhs(p: dict):
    w2, two_gamma = p["omega0"] ** 2, 2 * p["gamma"]

    def f(t, y):
        return np.array([y[1], -w2 * y[0] - two_gamma * y[1]])

    return f


def _initial(rng: np.random.Generator, p: dict) -> np.ndarray:
    offset = rng.uniform(p["offset_min_m"], p["offset_max_m"])
    side = 1.0 if rng.random() < 0.5 else -1.0
    return np.array([side * offset, 0.0])


def geometry(p: dict, size: int) -> tuple[float, float, float]:
    """Centre x, ceiling y and rest-position y of the weight centre (output pixels), pixels per metre."""
    scale = size / p["view_m"]
    ceiling = CEILING_Y * size - 0.5
    return (size - 1) / 2, ceiling, scale


def _weight_y(p: dict, x, size: int):
    _, ceiling, scale = geometry(p, size)
    return ceiling + scale * (p["rest_drop_m"] + x)


def _truth(p: dict, states: np.ndarray, size: int) -> dict:
    return {"weight_y_px": _weight_y(p, states[:, 0], size)}


def _draw(canvas: Canvas, p: dict, y: np.ndarray, look: Look) -> None:
    size = canvas.width
    cx, ceiling, scale = geometry(p, size)
    wy = _weight_y(p, y[0], size)
    half = p["weight_m"] * scale / 2
    wide, half = (half * BLOCK_LENGTH, half * BLOCK_THICKNESS) if look.rod else (half, half)
    top, bottom = ceiling, wy - half
    length = bottom - top
    lead = COIL_LEAD * length
    zig = np.arange(2 * COIL_TURNS + 1)
    ys = top + lead + (length - 2 * lead) * zig / zig[-1]
    xs = cx + COIL_HALF_WIDTH * size * np.where(zig % 2 == 0, 0.0, np.where(zig % 4 == 1, 1.0, -1.0))
    canvas.polyline(np.r_[cx, xs, cx], np.r_[top, ys, bottom + half * HOOK_DEPTH], WIRE_WIDTH * size,
                    look.fixture(WIRE_COLOUR))
    canvas.box(cx - CEILING_WIDTH * size / 2, -0.5, cx + CEILING_WIDTH * size / 2, ceiling,
               look.fixture(CEILING_COLOUR))
    canvas.box(cx - wide, wy - half, cx + wide, wy + half, look.object(WEIGHT_COLOUR), corner=half * CORNER)


SPRING = Rig.from_module(
    globals(), name="spring", state=("x", "v"),
    summary="weight bobbing on a vertical spring, damped harmonic motion, released from rest")
