"""Training data: recordings → train/validation split → random windows.

Windows are drawn at random offsets from every training recording (each recording weighted by the
number of offsets it offers). A window's conditioning frames (the first ``velocity_frames``) must
all be present; dropped frames later in a window are masked out of the likelihood.
"""

from __future__ import annotations

import sys
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import torch

from ..config import Config
from ..errors import KinecastError
from ..frames import Recording, read_recording
from ..frames.images import expand_trials
from ..frames import tracks


def expand_paths(paths: list[str | Path]) -> list[Path]:
    """Recording paths, with a folder of trial folders (e.g. a rendered rig) expanded to its trials.

    A folder that holds no image files itself but has sub-folders that do stands for those
    sub-folders, in natural order.
    """
    out = [trial for p in paths for trial in expand_trials(p)]
    if not out:
        raise KinecastError("fit", "no recordings given")
    return out


def load_recordings(paths: list[str | Path], cfg: Config) -> list[Recording]:
    """Read every recording at model resolution; warn once when source sizes differ."""
    recs = [read_recording(p, cfg.data) for p in expand_paths(paths)]
    sizes = {tuple(r.info.get("source_size", ())) for r in recs}
    if len(sizes) > 1:
        print(f"kinecast: warning: source frame sizes differ ({', '.join(map(str, sorted(sizes)))}); "
              f"all were brought to {cfg.data.size}×{cfg.data.size} model frames (non-square ones padded "
              "to square first)", file=sys.stderr)
    return recs


def split_train_val(recs: list[Recording], cfg: Config, min_len: int) -> tuple[list[Recording], list[Recording]]:
    """Hold out whole trials when there are several, else the tail of the single recording.

    With n ≥ 2 recordings, ``max(1, round(n · val_fraction))`` trials (the last ones in order) are
    held out. With one recording, its last ``val_fraction`` share is held out, provided both parts
    keep at least ``min_len`` frames; otherwise there is no validation set.
    """
    frac = cfg.train.val_fraction
    if frac == 0:
        return recs, []
    if len(recs) >= 2:
        n_val = min(len(recs) - 1, max(1, round(len(recs) * frac)))
        return recs[:-n_val], recs[-n_val:]
    rec = recs[0]
    cut = int(round(rec.n_frames * (1 - frac)))
    if cut < min_len or rec.n_frames - cut < min_len:
        return recs, []
    return [rec.slice(0, cut)], [rec.slice(cut, rec.n_frames)]


def median_background(recs: list[Recording]) -> np.ndarray:
    """Per-pixel median of the present frames of all recordings: a fixed camera's static scene."""
    present = [np.flatnonzero(~r.missing) for r in recs]
    stride = max(1, sum(map(len, present)) // 512)  # a median over ≤ 512 frames is plenty and bounds memory
    picked, before = [], 0  # every stride-th present frame of all recordings in a row; only those copied
    for r, idx in zip(recs, present):
        picked.append(r.frames[idx[(-before) % stride::stride]])
        before += len(idx)
    return tracks.median_background(np.concatenate(picked, axis=0))


@dataclass
class Batch:
    frames: torch.Tensor  # [B, W, C, H, W]
    times: torch.Tensor  # [W] seconds since the window start (batch mean, for one shared ODE solve)
    mask: torch.Tensor  # [B, W] True where a frame is present
    own_times: torch.Tensor  # [B, W] each window's own seconds since its start
    which: tuple = ()  # recording index of each window
    starts: tuple = ()  # first frame of each window in its recording


class WindowSampler:
    """Draws batches of windows at random offsets from every recording."""

    def __init__(self, recs: list[Recording], context: int, seed: int):
        self.recs = recs
        self.context = context
        self.frames = [torch.from_numpy(r.frames) for r in recs]
        self.rng = np.random.default_rng(seed)

    def longest_window(self) -> int:
        return min(r.n_frames for r in self.recs)

    def offsets(self, rec: Recording, window: int) -> np.ndarray:
        """Offsets whose conditioning frames are all present."""
        starts = rec.present_runs(self.context)
        return starts[starts <= rec.n_frames - window]

    def draw(self, batch: int, window: int) -> Batch:
        choices = [self.offsets(r, window) for r in self.recs]
        weights = np.array([len(c) for c in choices], dtype=float)
        if weights.sum() == 0:
            raise KinecastError("fit", f"no window of {window} frames with {self.context} present "
                                       "conditioning frames in the training recordings")
        which = self.rng.choice(len(self.recs), size=batch, p=weights / weights.sum())
        starts = [int(self.rng.choice(choices[i])) for i in which]
        return self._gather(which, starts, window)

    def fixed(self, window: int, count: int) -> Batch | None:
        """Evenly spaced windows (deterministic), for validation."""
        picks = [(i, int(o)) for i, r in enumerate(self.recs) for o in self.offsets(r, window)]
        if not picks:
            return None
        idx = np.linspace(0, len(picks) - 1, min(count, len(picks))).round().astype(int)
        which, starts = zip(*(picks[i] for i in idx))
        return self._gather(which, starts, window)

    def _gather(self, which, starts, window: int) -> Batch:
        frames = torch.stack([self.frames[i][s:s + window] for i, s in zip(which, starts)])
        rel = np.stack([self.recs[i].times[s:s + window] - self.recs[i].times[s]
                        for i, s in zip(which, starts)])
        mask = np.stack([~self.recs[i].missing[s:s + window] for i, s in zip(which, starts)])
        return Batch(frames, torch.from_numpy(rel.mean(axis=0)), torch.from_numpy(mask), torch.from_numpy(rel),
                     tuple(which), tuple(starts))
