"""``ball``: a ball tossed sideways and dropped onto a floor, bouncing between two side posts,
seen by a level camera with the floor receding to the horizon.

In flight only gravity acts: height'' = −g, x'' = 0 (no air drag). ``height`` is the height of the
ball's underside above the floor and ``x`` its centre's sideways position from the middle of the
room, in metres, both in one vertical plane facing the camera. At the floor the upward velocity
reverses and scales by the restitution e (common practice); at a post the sideways velocity does.

Settling: with e < 1 the bounces shrink geometrically and would pile up infinitely many in a finite
time (the Zeno effect), which no step-by-step integrator can follow. When a rebound would climb less
than ``settle_m`` (apex (e·v)²/2g), the ball stops bouncing and rests on the floor: the state
(height, upward velocity) is set to exactly (0, 0), and the right-hand side leaves that state
alone. It keeps sliding sideways, without friction, between the posts.

The camera is a pinhole at ``camera_height_m`` looking level along the floor at the ball's plane,
``view_m`` wide at that plane: the floor line of that plane sits at ``FLOOR_Y`` of the frame and
the horizon ``camera_height_m`` above it, seen at the plane's scale.
"""

from __future__ import annotations

import math

import numpy as np

from .draw import Canvas
from .look import Look
from .rig import Rig, require

DEFAULTS = {
    "gravity": 9.81,         # m/s² (standard gravity, rounded)
    "restitution": 0.8,      # e at the floor and the posts
    "radius_m": 0.08,        # ball radius
    "drop_min_m": 0.5,       # release height of the underside, drawn uniformly in [min, max] m;
    "drop_max_m": 1.0,       #   from rest vertically: first impact after sqrt(2h/g) ≈ 0.32-0.45 s
    "speed_max": 0.3,        # sideways launch speed drawn uniformly in [−max, max] m/s
    "settle_m": 0.005,       # rebounds that would climb less than this end in rest on the floor
    "room_m": 1.3,           # distance between the posts' inner faces
    "view_m": 1.6,           # width of the camera's field of view at the ball's plane
    "camera_height_m": 0.8,  # camera above the floor (the horizon is this high above the floor line)
    "distance_m": 3.0,       # camera to the ball's plane (sets how fast the floor recedes)
}
FLOOR_Y = 0.85               # floor line of the ball's plane, fraction of the frame from the top
POST_WIDTH = 0.03            # side post width, fraction of the frame
FLOOR_OPACITY = 0.35         # the floor tints the background rather than hiding it
LINE_OPACITY = 0.5           # floor tile lines, over the floor
LINE_WIDTH = 0.012           # tile line width, fraction of the frame
TILE_M = 0.4                 # floor tile side in metres (lines across and along the floor)
TILE_ROWS = 7                # tile lines across the floor drawn behind the ball's plane
NEAR_ROWS = 2                #   and in front of it
LANES = 8                    # tile lines along the floor on each side of the middle
FAR = 40.0                   # lines along the floor end at this many times the ball's distance
BALL_COLOUR = (0.95, 0.8, 0.25)
FLOOR_COLOUR = (0.55, 0.55, 0.55)
LINE_COLOUR = (0.12, 0.12, 0.12)
POST_COLOUR = (0.6, 0.6, 0.6)
# Rod look: the ball is drawn as a bar lying flat (a stroke with round caps as thick as the ball),
# its straight part this many radii long on each side of the centre. Contacts keep the ball's radius,
# so at a post the bar's end overlaps the post.
BAR_HALF_LENGTH = 0.8
# The ball starts sideways within this fraction of the room's free half-width around the middle.
START_SPREAD = 0.5
# Smallest settle_m allowed when e < 1: below it the last bounces would pile up faster than the RK4
# steps (integrate.MAX_EVENTS_PER_STEP) for any sensible drop; 1 µm is far below a pixel.
MIN_SETTLE_M = 1e-6


def _check(p: dict) -> None:
    require(p["gravity"] > 0, "gravity must be positive")
    require(0 < p["restitution"] <= 1, "restitution must be in (0, 1]")
    require(p["radius_m"] > 0 and p["view_m"] > 0, "radius_m and view_m must be positive")
    require(0 <= p["drop_min_m"] <= p["drop_max_m"], "need 0 <= drop_min_m <= drop_max_m")
    require(p["drop_max_m"] + 2 * p["radius_m"] < FLOOR_Y * p["view_m"],
            f"drop_max_m + 2·radius_m must stay below {FLOOR_Y:g}·view_m (the ball would leave the view)")
    require(p["speed_max"] >= 0, "speed_max must be >= 0")
    require(p["settle_m"] >= 0, "settle_m must be >= 0")
    require(p["settle_m"] >= MIN_SETTLE_M or p["restitution"] == 1,
            f"settle_m must be at least {MIN_SETTLE_M:g} when restitution < 1 (the bounces would never end)")
    require(2 * p["radius_m"] < p["room_m"] <= p["view_m"],
            "need 2·radius_m < room_m <= view_m (the ball fits between the posts, posts in view)")
    require(p["camera_height_m"] > 0 and p["distance_m"] > 0,
            "camera_height_m and distance_m must be positive")


def _timescale(p: dict) -> float:
    # Flight between events is a parabola, which RK4 integrates exactly (a quadratic in t), so the
    # step only has to be short against the highest fall (at least a ball radius: never zero) and
    # against the crossing between the posts.
    fall = math.sqrt(2 * max(p["drop_max_m"], p["radius_m"]) / p["gravity"])
    return min(fall, p["room_m"] / p["speed_max"]) if p["speed_max"] > 0 else fall


def _rhs(p: dict):
    g = p["gravity"]

    def f(t, y):
        resting = y[1] == 0.0 and y[3] == 0.0   # exactly on the floor and still (see settling)
        return np.array([y[2], y[3], 0.0, 0.0 if resting else -g])

    return f


class Contacts:
    """The floor and the two posts as hard constraints (see integrate.Event)."""

    def __init__(self, p: dict):
        self.e, self.g, self.settle = p["restitution"], p["gravity"], p["settle_m"]
        self.side = p["room_m"] / 2 - p["radius_m"]   # largest |x| of the centre

    def gaps(self, y: np.ndarray) -> np.ndarray:
        return np.array([y[1], self.side + y[0], self.side - y[0]])   # floor, left, right

    def apply(self, y: np.ndarray, which: int, forward: bool) -> np.ndarray:
        out = y.copy()
        axis = 1 if which == 0 else 0
        out[axis] = 0.0 if which == 0 else (-self.side if which == 1 else self.side)
        # forwards: v_n → −e·v_n (common practice); backwards in time the inverse map, −v_n / e
        out[axis + 2] *= -(self.e if forward else 1 / self.e)
        if forward and which == 0 and out[3] ** 2 / (2 * self.g) < self.settle:
            out[3] = 0.0   # rebound apex below settle_m: rest on the floor
        return out


def _initial(rng: np.random.Generator, p: dict) -> np.ndarray:
    height = rng.uniform(p["drop_min_m"], p["drop_max_m"])
    x = START_SPREAD * rng.uniform(-1.0, 1.0) * (p["room_m"] / 2 - p["radius_m"])
    vx = rng.uniform(-p["speed_max"], p["speed_max"])
    return np.array([x, height, vx, 0.0])


def geometry(p: dict, size: int) -> tuple[float, float, float, float]:
    """Middle of the room x, floor line y, horizon y (output pixels) and pixels per metre at the
    ball's plane."""
    scale = size / p["view_m"]
    floor = FLOOR_Y * size - 0.5
    return (size - 1) / 2, floor, floor - scale * p["camera_height_m"], scale


def _centre(p: dict, x, height, size: int):
    cx, floor, _, scale = geometry(p, size)
    return cx + scale * x, floor - scale * (height + p["radius_m"])


def _truth(p: dict, states: np.ndarray, size: int) -> dict:
    bx, by = _centre(p, states[:, 0], states[:, 1], size)
    return {"ball_x_px": bx, "ball_y_px": by}


def _scenery(canvas: Canvas, p: dict, look: Look) -> None:
    """Floor (tinted, with tile lines in perspective) and the two side posts."""
    size = canvas.width
    cx, floor, horizon, scale = geometry(p, size)
    edge = size - 0.5
    top = max(horizon, -0.5)
    canvas.box(-0.5, top, edge, edge, look.fixture(FLOOR_COLOUR), opacity=FLOOR_OPACITY)
    line, width = look.fixture(LINE_COLOUR), LINE_WIDTH * size
    # Pinhole camera, level view: a floor point at sideways position x and depth z (from the camera)
    # projects to column cx + scale·x·D/z and row horizon + (floor − horizon)·D/z, D = distance_m.
    drop, dist = floor - horizon, p["distance_m"]
    for k in range(-NEAR_ROWS, TILE_ROWS + 1):
        depth = dist + k * TILE_M
        if depth > 0:
            row = horizon + drop * dist / depth
            canvas.segment(-0.5, row, edge, row, width, line, opacity=LINE_OPACITY)
    near = (edge - horizon) / drop     # D/z of the floor seen at the frame's bottom edge
    for k in range(-LANES, LANES + 1):
        x = scale * k * TILE_M
        canvas.segment(cx + x * near, edge, cx + x / FAR, horizon + drop / FAR, width, line,
                       opacity=LINE_OPACITY)
    for sign in (-1, 1):
        inner = cx + sign * scale * p["room_m"] / 2
        outer = inner + sign * POST_WIDTH * size
        canvas.box(min(inner, outer), -0.5, max(inner, outer), floor, look.fixture(POST_COLOUR))


def _draw(canvas: Canvas, p: dict, y: np.ndarray, look: Look) -> None:
    bx, by = _centre(p, y[0], y[1], canvas.width)
    radius = p["radius_m"] * geometry(p, canvas.width)[3]
    colour = look.object(BALL_COLOUR)
    if look.rod:
        reach = BAR_HALF_LENGTH * radius
        canvas.segment(bx - reach, by, bx + reach, by, 2 * radius, colour)
    else:
        canvas.disc(bx, by, radius, colour)


BALL = Rig.from_module(
    globals(), name="ball", state=("x", "height", "vx", "vheight"), event=Contacts, scenery=_scenery,
    summary="ball tossed sideways onto a floor in perspective, bouncing with restitution e, then resting")
