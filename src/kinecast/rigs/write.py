"""Write rendered rig trials to disk, one folder per trial.

Layout of ``out_dir/trial_000/`` (and ``trial_001/`` ...):

``frame_0000.png`` ...
    8-bit PNG (grey or RGB) of every delivered frame; dropped frames are not here.
``timestamps.csv``
    Header ``frame,time_s``; one row per delivered frame: its file name and capture time in seconds
    (file names, not indices, so that the rows still match the files when frames were dropped).
``truth.csv``
    Every frame: ``frame,time_s,dropped`` (0/1) and the rig's truth columns.
``rig.toml``
    Rig name, trial, seed, fps, size, channels, look (the one this trial was drawn in), camera
    options, physical parameters, initial state.
``dropped/frame_XXXX.png``
    The images the camera dropped, kept aside so that a fill can be scored against them.
"""

from __future__ import annotations

from pathlib import Path

import cv2
import numpy as np
from tqdm import tqdm

from .. import fileio
from ..errors import KinecastError
from ..fileio import check_can_create
from .camera import Camera
from .catalog import get_rig
from .look import CLASSIC
from .render import RigTrial, check_settings, render_trial

FRAME_DIGITS = 4          # frame_0000.png; more digits when a trial has more frames
DROPPED_DIR = "dropped"
NOTICE = ("# Synthetic recording rendered by kinecast from a simulated rig; truth.csv holds the exact\n"
          "# simulated state. Model predictions made from it are statistical extrapolations.\n")


def _num(x) -> str:
    """Shortest text that reads back as the same float64 (or a plain int)."""
    if isinstance(x, (bool, np.bool_)):
        return "1" if x else "0"
    if isinstance(x, (int, np.integer)):
        return str(int(x))
    return repr(float(x))


def _toml_value(v) -> str:
    if isinstance(v, str):
        return '"' + v.replace("\\", "\\\\").replace('"', '\\"') + '"'
    if isinstance(v, bool):
        return "true" if v else "false"
    return _num(v)


def rig_toml(trial: RigTrial) -> str:
    """The ``rig.toml`` text describing one trial."""
    head = {"rig": trial.name, "trial": trial.index, "seed": trial.seed, "fps": float(trial.fps),
            "size": int(trial.frames.shape[1]), "frames": len(trial.times), "channels": trial.channels,
            "look": trial.look}
    lines = [NOTICE.rstrip("\n")] + [f"{k} = {_toml_value(v)}" for k, v in head.items()]
    for table, values in (("camera", trial.camera.as_dict()), ("physics", trial.params),
                          ("initial", trial.initial)):
        lines += ["", f"[{table}]"] + [f"{k} = {_toml_value(v)}" for k, v in values.items()]
    return "\n".join(lines) + "\n"


def _png(image: np.ndarray) -> bytes:
    img = image[..., 0] if image.shape[2] == 1 else cv2.cvtColor(image, cv2.COLOR_RGB2BGR)
    ok, buf = cv2.imencode(".png", img)
    if not ok:  # pragma: no cover - OpenCV failure
        raise RuntimeError("PNG encoding failed")
    return buf.tobytes()


def _check_out(out_dir: Path, overwrite: bool) -> None:
    if out_dir.exists() and not out_dir.is_dir():
        raise KinecastError(out_dir, "exists and is not a folder")
    if out_dir.is_dir() and any(out_dir.iterdir()) and not overwrite:
        raise KinecastError(out_dir, "already exists and is not empty (pass --overwrite to replace "
                            "the trials in it)")
    check_can_create(out_dir)


def _remove_stale(folder: Path, keep: set[str]) -> None:
    """Remove frame PNGs of an earlier render that this render did not write (they would
    contradict the new CSVs); nothing else is touched."""
    if folder.is_dir():
        for path in folder.glob("frame_*.png"):
            if path.name not in keep:
                path.unlink()


def write_trial(trial: RigTrial, folder: Path) -> Path:
    """Write one trial's frames, CSVs and rig.toml into ``folder`` (atomically, file by file)."""
    digits = max(FRAME_DIGITS, len(str(len(trial.times) - 1)))
    names = [f"frame_{i:0{digits}d}.png" for i in range(len(trial.times))]
    kept, aside = set(), set()
    for i, name in enumerate(names):
        target = folder / DROPPED_DIR / name if trial.dropped[i] else folder / name
        fileio.write_bytes(target, _png(trial.frames[i]))
        (aside if trial.dropped[i] else kept).add(name)
    _remove_stale(folder, kept)
    _remove_stale(folder / DROPPED_DIR, aside)
    if (folder / DROPPED_DIR).is_dir() and not any((folder / DROPPED_DIR).iterdir()):
        (folder / DROPPED_DIR).rmdir()

    stamps = ["frame,time_s"] + [f"{names[i]},{_num(t)}" for i, t in enumerate(trial.times)
                                 if not trial.dropped[i]]
    fileio.write_text(folder / "timestamps.csv", "\n".join(stamps) + "\n")
    cols = list(trial.truth)
    rows = ["frame,time_s,dropped," + ",".join(cols)]
    for i, t in enumerate(trial.times):
        values = ",".join(_num(trial.truth[c][i]) for c in cols)
        rows.append(f"{i},{_num(t)},{_num(trial.dropped[i])},{values}")
    fileio.write_text(folder / "truth.csv", "\n".join(rows) + "\n")
    fileio.write_text(folder / "rig.toml", rig_toml(trial))
    return folder


def write_rig(name: str, out_dir: str | Path, trials: int = 1, frames: int = 60, seed: int = 0,
              size: int = 64, fps: float = 30.0, camera: Camera = Camera(), channels: str = "rgb",
              params: dict | None = None, overwrite: bool = False, progress: bool = False,
              look: str = CLASSIC) -> list[Path]:
    """Render trials of a rig and write them under ``out_dir`` (layout in the module docstring).

    Parameters
    ----------
    name, trials, frames, seed, size, fps, camera, channels, params, look
        As for :func:`kinecast.rigs.render_trials` (the same settings give the same frames).
    out_dir : str or Path
        Folder to create. An existing non-empty folder is refused unless ``overwrite``.
    overwrite : bool
        Replace the trial folders' files in an existing ``out_dir``; other files are left alone.
    progress : bool
        Show progress bars.

    Returns
    -------
    list of Path
        The trial folders written, in order.

    Examples
    --------
    >>> import tempfile, pathlib
    >>> out = pathlib.Path(tempfile.mkdtemp()) / "rig"
    >>> [p.name for p in write_rig("pendulum", out, trials=2, frames=4, size=16)]
    ['trial_000', 'trial_001']
    """
    rig = get_rig(name)
    check_settings(trials, frames, seed, size, fps, camera, channels, look)
    resolved = rig.resolve(params)
    out_dir = Path(out_dir)
    _check_out(out_dir, overwrite)
    written = []
    bar = tqdm(range(trials), desc=f"{name} trials", unit="trial",
               disable=None if progress and trials > 1 else True)  # None: shown on a terminal only
    for k in bar:
        trial = render_trial(rig, resolved, k, frames, seed, size, fps, camera, channels, look, progress)
        written.append(write_trial(trial, out_dir / f"trial_{k:03d}"))
    return written
