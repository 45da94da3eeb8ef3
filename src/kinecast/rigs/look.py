"""Looks: how a rig is drawn, apart from its physics.

A :class:`Look` fixes the background (flat, a pattern, or an illumination gradient), the tones of
the moving objects and of the fixed parts (rods, rails, ceilings, floors), the objects' shape
(``compact``: the rig's own disc or square; ``rod``: an extended bar), and a lighting drift plus
sensor noise over the trial. The same trial has the same motion and truth in every look; only the
pixels change. ``classic`` draws exactly what the rigs drew before looks existed.

``mixed`` is not a look but a choice made per trial: trial k draws its look from its own random
stream (see rigs/render.py), so it does not depend on how many trials are rendered.

Examples
--------
>>> get_look("dark_on_light").object((1.0, 0.5, 0.0))
(0.35, 0.175, 0.0)
>>> get_look("classic").object((1.0, 0.5, 0.0))
(1.0, 0.5, 0.0)
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..errors import KinecastError
from .camera import BACKGROUND_LEVEL

CLASSIC = "classic"   # the default: the look drawn before looks existed, kept pixel for pixel
MIXED = "mixed"
BACKGROUNDS = ("flat", "pattern", "gradient")
SHAPES = ("compact", "rod")
# Pattern geometry, drawn per seed: the period of the stripes or checks as a fraction of the frame
# side, and the steepness of their soft edges (a sine wave scaled by this, clipped to ±1).
PATTERN_PERIOD = (0.12, 0.25)
PATTERN_EDGE = 3.0
# Largest per-channel tint of a pattern background (a fraction of its colour), drawn per seed.
PATTERN_TINT = 0.15


@dataclass(frozen=True)
class Look:
    """How a rig is drawn.

    Attributes
    ----------
    name : str
        Name used with ``--look``.
    summary : str
        One line for the help text.
    background : {"flat", "pattern", "gradient"}
        A flat colour, stripes or checks at a random angle and period, or a linear illumination
        ramp in a random direction (pattern and direction drawn per seed).
    paper : tuple of float
        Background colour (RGB in [0, 1]): the flat colour, the pattern's mean, the ramp's bright end.
    span : float
        Pattern contrast (± a fraction of ``paper``) or the ramp's depth (its dark end is
        ``paper · (1 − span)``).
    objects, fixtures : tuple (lo, hi) or None
        Tone range the colours of moving objects / fixed parts are squeezed into, channel by
        channel (``lo + (hi − lo) · c``); None keeps the rig's own colours.
    shape : {"compact", "rod"}
        The rig's own object shapes, or extended bars (each rig draws its own bar).
    drift : tuple (lo, hi)
        Size of a linear lighting gain change over the trial, drawn uniformly in [lo, hi] with a
        random sign (0 = steady light).
    noise : float
        Extra Gaussian sensor noise (fraction of full scale), added in quadrature to the camera's.
    """

    name: str
    summary: str
    background: str = "flat"
    paper: tuple[float, float, float] = (BACKGROUND_LEVEL,) * 3
    span: float = 0.0
    objects: tuple[float, float] | None = None
    fixtures: tuple[float, float] | None = None
    shape: str = "compact"
    drift: tuple[float, float] = (0.0, 0.0)
    noise: float = 0.0

    @property
    def rod(self) -> bool:
        """True when objects are drawn as extended bars."""
        return self.shape == "rod"

    def object(self, colour) -> tuple:
        """Colour of a moving object drawn in this look."""
        return _tone(colour, self.objects)

    def fixture(self, colour) -> tuple:
        """Colour of a fixed part of the rig drawn in this look."""
        return _tone(colour, self.fixtures)

    def paint(self, rng: np.random.Generator, size: int) -> np.ndarray:
        """This look's background, float32 (size, size, 3), random geometry drawn from ``rng``."""
        paper = np.asarray(self.paper, dtype=np.float32)
        if self.background == "flat":
            return np.broadcast_to(paper, (size, size, 3)).copy()
        angle = rng.uniform(0.0, 2 * np.pi)
        yy, xx = np.mgrid[0:size, 0:size].astype(np.float32) - (size - 1) / 2
        u = xx * np.cos(angle) + yy * np.sin(angle)
        if self.background == "gradient":
            ramp = (u - u.min()) / max(float(np.ptp(u)), 1e-12)
            return (paper * (1.0 - self.span * (1.0 - ramp))[..., None]).astype(np.float32)
        period = rng.uniform(*PATTERN_PERIOD) * size
        wave = np.sin(2 * np.pi * u / period)
        if rng.random() < 0.5:  # checks rather than stripes
            v = -xx * np.sin(angle) + yy * np.cos(angle)
            wave = wave * np.sin(2 * np.pi * v / period)
        tint = 1.0 + PATTERN_TINT * rng.uniform(-1.0, 1.0, 3)
        square = np.clip(PATTERN_EDGE * wave, -1.0, 1.0)
        image = (paper * tint)[None, None, :] * (1.0 + self.span * square)[..., None]
        return np.clip(image, 0.0, 1.0).astype(np.float32)

    def gains(self, rng: np.random.Generator, times: np.ndarray) -> np.ndarray:
        """Lighting gain of each frame: a linear drift from 1 over the trial (ones when steady)."""
        if self.drift == (0.0, 0.0) or len(times) < 2 or times[-1] <= 0:
            return np.ones(len(times))
        size = rng.uniform(*self.drift) * (1.0 if rng.random() < 0.5 else -1.0)
        return 1.0 + size * times / times[-1]


def _tone(colour, tones):
    if tones is None:
        return colour
    lo, hi = tones
    return tuple(lo + (hi - lo) * c for c in colour)


LOOKS: dict[str, Look] = {look.name: look for look in (
    Look(CLASSIC, "light objects on a flat dark grey background (the default)"),
    Look("dark_on_light", "dark objects and mid-grey parts on a light paper-coloured background",
         paper=(0.86, 0.84, 0.8), objects=(0.0, 0.35), fixtures=(0.35, 0.6)),
    Look("textured", "bright objects over stripes or checks at a random angle, period and tint",
         background="pattern", paper=(0.4, 0.4, 0.4), span=0.25, objects=(0.72, 1.0),
         fixtures=(0.0, 0.25)),
    Look("gradient", "bright objects over a lighting ramp, dim at one side, in a random direction",
         background="gradient", paper=(0.5, 0.5, 0.52), span=0.85, objects=(0.75, 1.0)),
    Look("rod", "extended objects: a thick rod, a long block, bars instead of discs",
         shape="rod"),
    Look("drift_noise", "the classic scene with the light drifting a few % over the trial and "
         "sensor noise", drift=(0.03, 0.06), noise=0.02),
)}


def look_names() -> list[str]:
    """Every name ``--look`` accepts: the looks, then ``mixed``."""
    return [*LOOKS, MIXED]


def check_look(name) -> str:
    """``name`` when it is a look or ``mixed``; :class:`KinecastError` listing the names otherwise."""
    if not isinstance(name, str) or name not in look_names():
        raise KinecastError(f"look {name!r}", f"unknown look: allowed {', '.join(look_names())}")
    return name


def get_look(name: str) -> Look:
    """The look called ``name`` (not ``mixed``, which is resolved per trial)."""
    check_look(name)
    if name == MIXED:
        raise KinecastError("look 'mixed'", "is chosen per trial; pick a look with pick_look")
    return LOOKS[name]


def pick_look(name: str, rng: np.random.Generator) -> Look:
    """The look of one trial: ``name`` itself, or for ``mixed`` one drawn uniformly from ``rng``."""
    check_look(name)
    if name != MIXED:
        return LOOKS[name]
    return list(LOOKS.values())[int(rng.integers(len(LOOKS)))]
