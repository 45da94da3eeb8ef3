"""``pendulum``: a bob on a light rod, seen face on, pivot near the top centre, lightly damped.

Equation of motion θ'' = −(g/L)·sin θ − b·θ', θ measured from the downward vertical, positive
towards the right of the image. Each trial releases the bob from rest at its own amplitude.
"""

from __future__ import annotations

import math

import numpy as np

from .draw import Canvas
from .look import Look
from .rig import Rig, require

# L = 0.25 m with g = 9.81 m/s² gives a small-angle period 2π·sqrt(L/g) ≈ 1.003 s: about 30 frames
# per swing at 30 fps.
DEFAULTS = {
    "length_m": 0.25,        # rod length, pivot to bob centre
    "gravity": 9.81,         # m/s² (standard gravity, rounded)
    "damping": 0.1,          # b in 1/s: amplitude falls as exp(−b·t/2) for small swings
    "amp_min_deg": 15.0,     # release amplitude is drawn uniformly in [min, max] degrees,
    "amp_max_deg": 80.0,     #   with a random side
    "bob_radius_m": 0.035,
    "view_m": 0.6,           # width of the camera's field of view at the rig, metres
}
PIVOT_Y = 0.28               # pivot height as a fraction of the frame, from the top
ROD_WIDTH = 0.025            # rod stroke width as a fraction of the frame
PIVOT_RADIUS = 0.025         # pivot disc radius as a fraction of the frame
BOB_COLOUR = (0.95, 0.55, 0.2)
ROD_COLOUR = (0.7, 0.7, 0.7)   # neutral grey: equal R and G, so R − G isolates the bob
PIVOT_COLOUR = (0.5, 0.5, 0.5)
# Rod look: one thick rod in the bob's colour from the pivot to just past the bob's centre, no bob.
THICK_ROD_WIDTH = 1.6        # stroke width as a fraction of the bob's radius


def _check(p: dict) -> None:
    require(p["length_m"] > 0, "length_m must be positive")
    require(p["gravity"] > 0, "gravity must be positive")
    require(p["damping"] >= 0, "damping must be >= 0")
    require(0 <= p["amp_min_deg"] <= p["amp_max_deg"] < 180,
            "need 0 <= amp_min_deg <= amp_max_deg < 180")
    require(p["bob_radius_m"] > 0 and p["view_m"] > 0, "bob_radius_m and view_m must be positive")


def _timescale(p: dict) -> float:
    period = 2 * math.pi * math.sqrt(p["length_m"] / p["gravity"])
    return min(period, 1 / p["damping"]) if p["damping"] > 0 else period


def _rhs(p: dict):
    w2, b = p["gravity"] / p["length_m"], p["damping"]

    def f(t, y):
        return np.array([y[1], -w2 * math.sin(y[0]) - b * y[1]])

    return f


def _initial(rng: np.random.Generator, p: dict) -> np.ndarray:
    amp = math.radians(rng.uniform(p["amp_min_deg"], p["amp_max_deg"]))
    side = 1.0 if rng.random() < 0.5 else -1.0
    return np.array([side * amp, 0.0])


def geometry(p: dict, size: int) -> tuple[float, float, float]:
    """Pivot (x, y) in output pixels and pixels per metre."""
    return (size - 1) / 2, PIVOT_Y * size, size / p["view_m"]


def _truth(p: dict, states: np.ndarray, size: int) -> dict:
    px, py, scale = geometry(p, size)
    theta = states[:, 0]
    return {"bob_x_px": px + scale * p["length_m"] * np.sin(theta),
            "bob_y_px": py + scale * p["length_m"] * np.cos(theta)}


def _draw(canvas: Canvas, p: dict, y: np.ndarray, look: Look) -> None:
    size = canvas.width
    px, py, scale = geometry(p, size)
    radius = p["bob_radius_m"] * scale
    canvas.disc(px, py, PIVOT_RADIUS * size, look.fixture(PIVOT_COLOUR))
    if look.rod:
        reach = scale * p["length_m"] + radius / 2   # the rod's cap covers the bob's centre
        canvas.segment(px, py, px + reach * math.sin(y[0]), py + reach * math.cos(y[0]),
                       THICK_ROD_WIDTH * radius, look.object(BOB_COLOUR))
        return
    bx = px + scale * p["length_m"] * math.sin(y[0])
    by = py + scale * p["length_m"] * math.cos(y[0])
    canvas.segment(px, py, bx, by, ROD_WIDTH * size, look.fixture(ROD_COLOUR))
    canvas.disc(bx, by, radius, look.object(BOB_COLOUR))


PENDULUM = Rig.from_module(
    globals(), name="pendulum", state=("theta", "omega"),
    summary="bob on a light rod swinging under gravity, lightly damped, released from rest")
