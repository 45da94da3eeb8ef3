"""Render synthetic rig trials in memory: physics → anti-aliased frames → simulated camera."""

from __future__ import annotations

import math
import zlib
from dataclasses import dataclass, field, replace

import numpy as np
from tqdm import tqdm

from ..errors import KinecastError
from ..frames.recording import Recording
from . import camera as cam
from .camera import Camera
from .catalog import get_rig
from .draw import Canvas
from .look import CLASSIC, Look, check_look, pick_look
from .rig import Rig

# Independent random streams under one seed (numpy SeedSequence spawn keys): the background is
# shared by all trials of a render that have the same look (a fixed camera), each trial has its own
# initial condition, camera randomness, look choice (for --look mixed) and look randomness (light
# drift), so trial k is the same whatever the number of trials.
_BACKGROUND_STREAM, _TRIAL_STREAM = 0, 1
_INITIAL, _CAMERA, _LOOK_PICK, _LOOK_DRAW = 0, 1, 2, 3
CHANNELS = ("grey", "rgb")
# Allowed ranges of the render settings (sanity bounds, not physics).
TRIALS_RANGE = (1, 10_000)
FRAMES_RANGE = (1, 1_000_000)
SIZE_RANGE = (16, 1024)
MAX_FPS = 10_000.0


@dataclass
class RigTrial:
    """One rendered trial of a rig, with its ground truth.

    Attributes
    ----------
    name : str
        Rig name.
    index : int
        Trial number within the render (0-based).
    frames : ndarray, uint8, shape (T, H, W, C)
        Every frame, dropped ones included (C = 1 for grey, 3 for rgb).
    times : ndarray, float64, shape (T,)
        Capture time of each frame in seconds (with jitter; the first frame at 0).
    dropped : ndarray, bool, shape (T,)
        True where the camera dropped the frame.
    truth : dict of str to ndarray, float64, shape (T,)
        Physical state at each capture time, plus positions in pixels (columns ending ``_px``,
        pixel-centre coordinates, x right, y down).
    params : dict
        Physical parameters used.
    initial : dict
        The state at t = 0 drawn for this trial.
    seed, fps, camera, channels
        Render settings.
    look : str
        Name of the look this trial was drawn in (see :mod:`kinecast.rigs.look`).
    """

    name: str
    index: int
    frames: np.ndarray
    times: np.ndarray
    dropped: np.ndarray
    truth: dict
    params: dict
    initial: dict
    seed: int
    fps: float
    camera: Camera = field(default_factory=Camera)
    channels: str = "rgb"
    look: str = CLASSIC

    def recording(self, include_dropped: bool = False) -> Recording:
        """This trial as a :class:`~kinecast.frames.recording.Recording` (frames in [0, 1]).

        Dropped slots hold zeros and are flagged missing, as a reader would deliver them; with
        ``include_dropped`` their images are kept (for scoring a fill against the truth).
        """
        frames = self.frames.astype(np.float32).transpose(0, 3, 1, 2) / 255.0
        if not include_dropped:
            frames[self.dropped] = 0.0
        names = [f"frame_{i:04d}" for i in range(len(self.times))]
        h, w = self.frames.shape[1:3]
        info = {"kind": "rig", "bit_depth": 8, "source_size": (w, h),
                "source_channels": self.frames.shape[3], "time_source": "rig",
                "names": [("" if d and not include_dropped else n) for n, d in zip(names, self.dropped)]}
        missing = self.dropped.copy() if not include_dropped else np.zeros_like(self.dropped)
        return Recording(frames, self.times.copy(), missing, f"rig {self.name} trial {self.index}", info)


def _check_int(name: str, value, lo: int, hi: int) -> int:
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or not lo <= value <= hi:
        raise KinecastError(name, f"bad value {value!r}: allowed a whole number from {lo} to {hi}")
    return int(value)


def check_settings(trials, frames, seed, size, fps, camera, channels, look=CLASSIC) -> None:
    """Raise :class:`KinecastError` on the first bad render setting."""
    _check_int("trials", trials, *TRIALS_RANGE)
    _check_int("frames", frames, *FRAMES_RANGE)
    _check_int("seed", seed, 0, 2**63 - 1)
    _check_int("size", size, *SIZE_RANGE)
    if isinstance(fps, bool) or not isinstance(fps, (int, float)) or not 0 < fps <= MAX_FPS:
        raise KinecastError("fps", f"bad value {fps!r}: allowed a number above 0 and up to {MAX_FPS:g}")
    if not isinstance(camera, Camera):
        raise KinecastError("camera", "expected a kinecast.rigs.Camera")
    camera.check()
    if channels not in CHANNELS:
        raise KinecastError("channels", f"bad value {channels!r}: allowed {', '.join(CHANNELS)}")
    check_look(look)


def background_for(seed: int, size: int, camera: Camera, look: Look | None = None) -> np.ndarray:
    """The static background shared by every trial rendered with ``seed`` in ``look`` (a fixed
    camera); the classic look keeps the stream it had before looks existed."""
    if look is None or look.name == CLASSIC:
        rng = np.random.default_rng(np.random.SeedSequence(seed, spawn_key=(_BACKGROUND_STREAM,)))
        return cam.background(rng, size, camera.texture)
    key = zlib.crc32(look.name.encode())   # a stable number per look name, whatever the registry order
    rng = np.random.default_rng(np.random.SeedSequence(seed, spawn_key=(_BACKGROUND_STREAM, key)))
    return cam.background(rng, size, camera.texture, base=look.paint(rng, size))


def trial_look(look: str, seed: int, index: int) -> Look:
    """The look of trial ``index``: ``look`` itself, or for ``mixed`` one drawn from the trial's own
    stream (so it does not depend on the number of trials)."""
    rng = np.random.default_rng(np.random.SeedSequence(seed, spawn_key=(_TRIAL_STREAM, index, _LOOK_PICK)))
    return pick_look(look, rng)


def empty_scene(rig: Rig, params: dict, seed: int, size: int, camera: Camera, look: Look) -> Canvas:
    """A canvas holding the background and the rig's static scenery in ``look``, nothing moving."""
    canvas = Canvas(background_for(seed, size, camera, look))
    rig.scenery(canvas, params, look)
    canvas.keep()
    return canvas


def render_trial(rig: Rig, params: dict, index: int, frames: int, seed: int, size: int, fps: float,
                 camera: Camera, channels: str, look: str = CLASSIC, progress: bool = False) -> RigTrial:
    """Render trial ``index`` of a rig (settings already checked; see :func:`render_trials`)."""
    init_rng = np.random.default_rng(np.random.SeedSequence(seed, spawn_key=(_TRIAL_STREAM, index, _INITIAL)))
    cam_rng = np.random.default_rng(np.random.SeedSequence(seed, spawn_key=(_TRIAL_STREAM, index, _CAMERA)))
    drawn = trial_look(look, seed, index)
    y0 = rig.initial(init_rng, params)
    times = cam.frame_times(cam_rng, frames, fps, camera.jitter)
    dropped = cam.dropped_mask(cam_rng, frames, camera.drop)
    gains = 1.0 + camera.flicker * cam_rng.standard_normal(frames)
    if drawn.drift != (0.0, 0.0):
        look_rng = np.random.default_rng(np.random.SeedSequence(seed, spawn_key=(_TRIAL_STREAM, index,
                                                                                 _LOOK_DRAW)))
        gains = gains * drawn.gains(look_rng, times)
    sensor = replace(camera, noise=math.hypot(camera.noise, drawn.noise)) if drawn.noise else camera

    # One integration for the exposure sub-samples and the capture times together.
    offsets = cam.exposure_offsets(camera, fps)
    samples = np.concatenate([(times[:, None] + offsets[None, :]).ravel(), times])
    order = np.argsort(samples, kind="stable")
    every = np.empty((len(samples), len(y0)))
    every[order] = rig.simulate(params, y0, samples[order])
    states = every[:-frames].reshape(frames, len(offsets), len(y0))
    truth_states = every[-frames:]

    canvas = empty_scene(rig, params, seed, size, camera, drawn)
    vignette = cam.vignette_gain(size, camera.vignette)
    out = np.empty((frames, size, size, 1 if channels == "grey" else 3), dtype=np.uint8)
    bar = tqdm(range(frames), desc=f"{rig.name} trial {index}", unit="frame", leave=False,
               disable=None if progress else True)  # None: shown on a terminal only
    for i in bar:
        light = np.zeros((size, size, 3), dtype=np.float32)
        for state in states[i]:
            canvas.clear()
            rig.draw(canvas, params, state, drawn)
            light += canvas.image()
        out[i] = cam.develop(light / len(offsets), cam_rng, sensor, gains[i], vignette, channels == "grey")
    names = rig.state_names(params)
    return RigTrial(name=rig.name, index=index, frames=out, times=times, dropped=dropped,
                    truth=rig.columns(params, truth_states, size), params=dict(params),
                    initial={n: float(v) for n, v in zip(names, y0)}, seed=seed, fps=float(fps),
                    camera=camera, channels=channels, look=drawn.name)


def render_trials(name: str, trials: int = 1, frames: int = 60, seed: int = 0, size: int = 64,
                  fps: float = 30.0, camera: Camera = Camera(), channels: str = "rgb",
                  params: dict | None = None, progress: bool = False,
                  look: str = CLASSIC) -> list[RigTrial]:
    """Render trials of a synthetic rig in memory.

    Every trial shares the rig, its parameters and the camera's static background (one per look);
    each draws its own initial condition and camera randomness from ``seed``.

    Parameters
    ----------
    name : str
        Rig name, a key of :data:`kinecast.rigs.RIGS` (``pendulum``, ``spring``, ``airtable``,
        ``ball``).
    trials : int
        Number of trials.
    frames : int
        Frames per trial (dropped frames included).
    seed : int
        Seed of every random draw; the same seed gives the same trials.
    size : int
        Frame width and height in pixels.
    fps : float
        Nominal frame rate.
    camera : Camera
        Camera imperfections (default: a clean camera).
    channels : {"rgb", "grey"}
        Colour frames, or grey frames from ITU-R BT.601 luma.
    params : dict, optional
        Overrides of the rig's physical parameters (see ``RIGS[name].defaults``).
    progress : bool
        Show a progress bar.
    look : str
        A key of :data:`kinecast.rigs.LOOKS` (default ``classic``), or ``mixed``: each trial draws
        its own look from ``seed``.

    Returns
    -------
    list of RigTrial

    Examples
    --------
    >>> trial = render_trials("pendulum", frames=4, size=32)[0]
    >>> trial.frames.shape, trial.frames.dtype.name, sorted(trial.truth)[:2]
    ((4, 32, 32, 3), 'uint8', ['bob_x_px', 'bob_y_px'])
    """
    rig = get_rig(name)
    check_settings(trials, frames, seed, size, fps, camera, channels, look)
    resolved = rig.resolve(params)
    return [render_trial(rig, resolved, k, frames, seed, size, fps, camera, channels, look, progress)
            for k in range(trials)]
