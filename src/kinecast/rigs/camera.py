"""A simulated lab camera: sensor noise, exposure blur, vignetting, background texture, flicker,
dropped frames and timestamp jitter. The defaults are a clean camera (none of these)."""

from __future__ import annotations

from dataclasses import asdict, dataclass, fields

import cv2
import numpy as np

from ..errors import KinecastError
from ..frames.preprocess import BT601_LUMA

# Frames 0..NEVER_DROP_FIRST-1 are always delivered, so a forecaster has context to start from.
NEVER_DROP_FIRST = 3
# Timestamp jitter is clipped to ± this fraction of the frame interval: consecutive times then
# stay at least (1 - 2 × 0.4) = 0.2 intervals apart, so they are strictly increasing.
JITTER_CLIP = 0.4
# Mean grey level of the static background (neutral grey, equal in R, G and B).
BACKGROUND_LEVEL = 0.2
# Correlation length of the background texture as a fraction of the frame size.
TEXTURE_SCALE = 1 / 12


@dataclass(frozen=True)
class Camera:
    """Imperfections of a fixed lab camera.

    Attributes
    ----------
    noise : float
        Standard deviation of additive Gaussian sensor noise, as a fraction of full scale.
    blur : int
        Sub-frame renders averaged per frame over the exposure (1 = an instantaneous, sharp frame).
    exposure : float
        Time the shutter is open, as a fraction of the frame interval, centred on the timestamp
        (used when ``blur`` > 1).
    vignette : float
        Brightness lost at the frame corners; the gain falls as ``1 - vignette · ρ²`` with ρ the
        distance from the centre over the half-diagonal.
    texture : float
        Contrast of a smooth random static background texture (0 = a flat grey background).
    flicker : float
        Standard deviation of a per-frame lighting gain around 1.
    drop : float
        Probability that a frame is dropped (never one of the first ``NEVER_DROP_FIRST`` frames).
    jitter : float
        Standard deviation of the capture-time jitter in seconds (clipped to ±0.4 frame intervals).
    """

    noise: float = 0.0
    blur: int = 1
    exposure: float = 0.5
    vignette: float = 0.0
    texture: float = 0.0
    flicker: float = 0.0
    drop: float = 0.0
    jitter: float = 0.0

    def check(self, prefix: str = "camera.") -> "Camera":
        """Raise :class:`KinecastError` naming the first bad option (``prefix`` + its name); return
        self when all are fine."""
        limits = {"noise": (0.0, 1.0), "blur": (1, 64), "exposure": (0.0, 1.0),
                  "vignette": (0.0, 1.0), "texture": (0.0, 1.0), "flicker": (0.0, 0.5),
                  "drop": (0.0, 0.95), "jitter": (0.0, 10.0)}
        for f in fields(self):
            value = getattr(self, f.name)
            lo, hi = limits[f.name]
            if isinstance(value, bool) or not isinstance(value, (int, float)) or not np.isfinite(value):
                raise KinecastError(f"{prefix}{f.name}", f"bad value {value!r}: expected a number")
            if f.name == "blur" and int(value) != value:
                raise KinecastError(f"{prefix}blur", f"bad value {value!r}: expected a whole number")
            if not lo <= value <= hi:
                raise KinecastError(f"{prefix}{f.name}", f"bad value {value!r}: allowed {lo} to {hi}")
        return self

    def as_dict(self) -> dict:
        return asdict(self)


def background(rng: np.random.Generator, size: int, texture: float,
               base: np.ndarray | None = None) -> np.ndarray:
    """The static background, float32 (size, size, 3): ``base`` (default neutral grey) with a smooth
    random texture of contrast ``texture`` multiplied in."""
    image = np.full((size, size, 1), BACKGROUND_LEVEL, dtype=np.float32) if base is None else base
    if texture > 0:
        noise = rng.standard_normal((size, size)).astype(np.float32)
        smooth = cv2.GaussianBlur(noise, (0, 0), sigmaX=max(size * TEXTURE_SCALE, 0.5),
                                  borderType=cv2.BORDER_REFLECT)
        smooth /= max(float(np.abs(smooth).max()), 1e-12)
        image = np.clip(image * (1.0 + texture * smooth)[..., None], 0.0, 1.0)
    return np.broadcast_to(image, (size, size, 3)).astype(np.float32)


def frame_times(rng: np.random.Generator, frames: int, fps: float, jitter: float) -> np.ndarray:
    """Capture times in seconds: ``i / fps`` plus clipped Gaussian jitter; the first frame is at 0."""
    times = np.arange(frames, dtype=np.float64) / fps
    offsets = rng.standard_normal(frames) * jitter
    limit = JITTER_CLIP / fps
    times = times + np.clip(offsets, -limit, limit)
    times[0] = 0.0
    return times


def dropped_mask(rng: np.random.Generator, frames: int, drop: float) -> np.ndarray:
    """Which frames the camera drops (independent draws; never the first frames)."""
    mask = rng.random(frames) < drop
    mask[:NEVER_DROP_FIRST] = False
    return mask


def exposure_offsets(camera: Camera, fps: float) -> np.ndarray:
    """Sub-frame sample times relative to a frame's timestamp (centred exposure window)."""
    if camera.blur <= 1:
        return np.zeros(1)
    window = camera.exposure / fps
    return (np.arange(camera.blur) + 0.5) / camera.blur * window - window / 2


def vignette_gain(size: int, strength: float) -> np.ndarray:
    """Radial gain ``1 - strength · ρ²``, float32 (size, size, 1)."""
    c = (size - 1) / 2
    yy, xx = np.mgrid[0:size, 0:size]
    rho2 = ((xx - c) ** 2 + (yy - c) ** 2) / (2 * c * c if c > 0 else 1.0)
    return (1.0 - strength * rho2).astype(np.float32)[..., None]


def develop(image: np.ndarray, rng: np.random.Generator, camera: Camera, gain: float,
            vignette: np.ndarray, grey: bool) -> np.ndarray:
    """Scene light (float RGB) to an 8-bit frame: lighting gain, vignetting, grey conversion,
    sensor noise, rounding. Returns uint8 (H, W, 1 or 3)."""
    img = image * np.float32(gain)
    if camera.vignette > 0:
        img = img * vignette
    if grey:
        img = img @ BT601_LUMA[:, None]
    if camera.noise > 0:
        img = img + rng.standard_normal(img.shape).astype(np.float32) * np.float32(camera.noise)
    return np.clip(np.rint(img * 255.0), 0, 255).astype(np.uint8)
