"""Synthetic lab rigs with exact ground truth: demo data and test fixtures.

Each rig is a scenario of our own (``pendulum``, ``spring``, ``airtable``, ``ball``), integrated
accurately with a shared fixed-step RK4, drawn anti-aliased in one of several looks (:data:`LOOKS`,
or ``look="mixed"`` for a random look per trial) and passed through a simulated camera
(:class:`Camera`). :func:`render_trials` returns trials in memory; :func:`write_rig` writes them as
folders of 8-bit PNG frames with timestamps and truth CSVs.

Examples
--------
>>> from kinecast.rigs import render_trials, Camera
>>> trials = render_trials("spring", trials=2, frames=5, size=32, camera=Camera(noise=0.01))
>>> [t.frames.shape for t in trials]
[(5, 32, 32, 3), (5, 32, 32, 3)]
"""

from .camera import Camera
from .catalog import RIGS, get_rig
from .integrate import integrate, rk4_step
from .look import LOOKS, Look
from .render import RigTrial, render_trials
from .rig import Rig
from .write import write_rig

__all__ = ["LOOKS", "RIGS", "Camera", "Look", "Rig", "RigTrial", "get_rig", "integrate", "render_trials",
           "rk4_step", "write_rig"]
