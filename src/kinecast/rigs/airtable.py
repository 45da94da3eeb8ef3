"""``airtable``: one to three pucks gliding on an air table seen from above, bouncing off the rails.

Between bounces each puck feels only a weak linear air drag, v' = −μ·v. At a rail the normal
velocity reverses and scales by the restitution coefficient e; the tangential velocity is kept.
Pucks pass through each other (no puck–puck collisions). Positions are in metres from the table's
top-left inner corner, x to the right and y down (the image's axes).
"""

from __future__ import annotations

import math

import numpy as np

from .draw import Canvas
from .look import Look
from .rig import Rig, require

DEFAULTS = {
    "pucks": 2.0,            # number of pucks, 1 to 3
    "table_m": 1.0,          # inner side of the square table
    "radius_m": 0.05,        # puck radius
    "restitution": 0.9,      # e at the rails
    "drag": 0.05,            # μ in 1/s
    "speed_min": 0.3,        # launch speed drawn uniformly in [min, max] m/s,
    "speed_max": 0.8,        #   in a uniformly random direction
}
MAX_PUCKS = 3
RAIL = 0.06                  # rail thickness, fraction of the frame
RAIL_COLOUR = (0.55, 0.55, 0.55)
PUCK_COLOURS = ((0.95, 0.35, 0.3), (0.3, 0.85, 0.4), (0.35, 0.55, 0.95))
# Rod look: each puck is a bar (a stroke with round caps) inside its disc's outline, at a fixed
# angle per puck (radians) -- it slides without turning. Half-length of the stroke's straight part
# and half-width, as fractions of the radius (they add up to 1: the bar spans the disc).
BAR_ANGLES = (0.4, 1.9, 2.8)
BAR_HALF_LENGTH, BAR_HALF_WIDTH = 0.5, 0.5
PLACEMENT_TRIES = 1000       # rejection-sampling attempts for non-overlapping start positions


def _check(p: dict) -> None:
    require(p["pucks"] == int(p["pucks"]) and 1 <= p["pucks"] <= MAX_PUCKS,
            f"pucks must be a whole number from 1 to {MAX_PUCKS}")
    require(p["table_m"] > 0 and p["radius_m"] > 0, "table_m and radius_m must be positive")
    require(2 * p["radius_m"] < p["table_m"], "a puck must fit on the table (2·radius_m < table_m)")
    require(0 < p["restitution"] <= 1, "restitution must be in (0, 1]")
    require(p["drag"] >= 0, "drag must be >= 0")
    require(0 <= p["speed_min"] <= p["speed_max"] and p["speed_max"] > 0,
            "need 0 <= speed_min <= speed_max and speed_max > 0")


def _timescale(p: dict) -> float:
    crossing = p["table_m"] / p["speed_max"]
    return min(crossing, 1 / p["drag"]) if p["drag"] > 0 else crossing


def _rhs(p: dict):
    mu = p["drag"]

    def f(t, y):
        s = y.reshape(-1, 4)
        return np.concatenate([s[:, 2:], -mu * s[:, 2:]], axis=1).ravel()

    return f


class Rails:
    """The four rails as hard constraints on every puck's centre (see integrate.Event)."""

    def __init__(self, p: dict):
        self.lo = p["radius_m"]
        self.hi = p["table_m"] - p["radius_m"]
        self.e = p["restitution"]

    def gaps(self, y: np.ndarray) -> np.ndarray:
        s = y.reshape(-1, 4)
        # per puck: left, right, top, bottom rail
        return np.stack([s[:, 0] - self.lo, self.hi - s[:, 0], s[:, 1] - self.lo, self.hi - s[:, 1]],
                        axis=1).ravel()

    def apply(self, y: np.ndarray, which: int, forward: bool) -> np.ndarray:
        puck, rail = divmod(which, 4)
        axis = rail // 2
        out = y.copy()
        out[4 * puck + axis] = self.lo if rail % 2 == 0 else self.hi
        # forwards: v_n → −e·v_n (common practice); backwards in time the inverse map, −v_n / e
        out[4 * puck + 2 + axis] *= -(self.e if forward else 1 / self.e)
        return out


def _initial(rng: np.random.Generator, p: dict) -> np.ndarray:
    n, r, side = int(p["pucks"]), p["radius_m"], p["table_m"]
    # Non-overlapping starts look tidier; pucks pass through each other, so if every try
    # overlaps (only with huge pucks) the last draw is used as it is.
    for _ in range(PLACEMENT_TRIES):
        pos = rng.uniform(r, side - r, size=(n, 2))
        gaps = [np.hypot(*(pos[i] - pos[j])) for i in range(n) for j in range(i)]
        if all(g > 2 * r for g in gaps):
            break
    speed = rng.uniform(p["speed_min"], p["speed_max"], size=n)
    angle = rng.uniform(0, 2 * math.pi, size=n)
    vel = np.stack([speed * np.cos(angle), speed * np.sin(angle)], axis=1)
    return np.concatenate([pos, vel], axis=1).ravel()


def geometry(p: dict, size: int) -> tuple[float, float]:
    """Output-pixel coordinate of the table's inner top-left corner, and pixels per metre."""
    rail = RAIL * size
    origin = rail - 0.5
    return origin, (size - 2 * rail) / p["table_m"]


def _truth(p: dict, states: np.ndarray, size: int) -> dict:
    origin, scale = geometry(p, size)
    out = {}
    for i in range(int(p["pucks"])):
        out[f"x_{i}_px"] = origin + scale * states[:, 4 * i]
        out[f"y_{i}_px"] = origin + scale * states[:, 4 * i + 1]
    return out


def _draw(canvas: Canvas, p: dict, y: np.ndarray, look: Look) -> None:
    size = canvas.width
    origin, scale = geometry(p, size)
    edge = size - 0.5
    inner = origin + scale * p["table_m"]
    for box in ((-0.5, -0.5, edge, origin), (-0.5, inner, edge, edge),
                (-0.5, -0.5, origin, edge), (inner, -0.5, edge, edge)):
        canvas.box(*box, look.fixture(RAIL_COLOUR))
    radius = p["radius_m"] * scale
    for i, s in enumerate(y.reshape(-1, 4)):
        x, y_, colour = origin + scale * s[0], origin + scale * s[1], look.object(PUCK_COLOURS[i])
        if look.rod:
            dx = BAR_HALF_LENGTH * radius * math.cos(BAR_ANGLES[i])
            dy = BAR_HALF_LENGTH * radius * math.sin(BAR_ANGLES[i])
            canvas.segment(x - dx, y_ - dy, x + dx, y_ + dy, 2 * BAR_HALF_WIDTH * radius, colour)
        else:
            canvas.disc(x, y_, radius, colour)


AIRTABLE = Rig.from_module(
    globals(), name="airtable", state=("x_{i}", "y_{i}", "vx_{i}", "vy_{i}"), event=Rails,
    summary="one to three pucks gliding on an air table, bouncing off the rails with restitution e < 1")
