"""The one type every reader returns."""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np


@dataclass
class Recording:
    """A preprocessed recording at model resolution.

    Attributes
    ----------
    frames : ndarray, float32, shape (T, C, H, W)
        Intensities in [0, 1]. Slots of dropped frames hold zeros and are flagged in ``missing``.
    times : ndarray, float64, shape (T,)
        Time of each slot in seconds, strictly increasing. Irregular intervals are kept; slots
        inserted for dropped frames are spaced evenly inside their gap.
    missing : ndarray, bool, shape (T,)
        True where the camera dropped the frame (no image data in that slot).
    source : str
        Where the frames came from (path and kind), for messages and reports.
    info : dict
        Facts about the source: ``kind`` (folder, tiff, video), ``bit_depth``, ``source_size``
        (width, height), ``source_channels``, ``names`` (file name or frame index per slot, '' for
        missing slots), ``time_source`` (csv, fps, video, default).
        The readers in :mod:`kinecast.frames` also set (all JSON-friendly): ``dtype`` (sample type),
        ``formats``, ``decoder``, ``raw_max`` (largest raw integer sample; None for a video shrunk by ffmpeg), ``roi`` (as applied),
        ``source_rate`` and ``codec`` (videos: container frame rate or None), ``times_file`` (the timestamps CSV, when used),
        ``n_read`` (real frames), ``drops`` (one dict per gap: ``after`` name, ``slot`` index,
        ``time``, ``count``), ``problems`` (one-line notes) and ``cache`` (hit, written, off, or why
        it was not written).
    """

    frames: np.ndarray
    times: np.ndarray
    missing: np.ndarray
    source: str
    info: dict = field(default_factory=dict)

    def __post_init__(self):
        self.frames = np.asarray(self.frames, dtype=np.float32)
        self.times = np.asarray(self.times, dtype=np.float64)
        self.missing = np.asarray(self.missing, dtype=bool)
        n = len(self.frames)
        if self.frames.ndim != 4 or len(self.times) != n or len(self.missing) != n:
            raise ValueError("Recording needs frames (T,C,H,W) and times/missing of length T")

    @property
    def n_frames(self) -> int:
        return int(self.frames.shape[0])

    @property
    def channels(self) -> int:
        return int(self.frames.shape[1])

    @property
    def size(self) -> tuple[int, int]:
        """(height, width) at model resolution."""
        return int(self.frames.shape[2]), int(self.frames.shape[3])

    @property
    def duration(self) -> float:
        return float(self.times[-1] - self.times[0]) if self.n_frames > 1 else 0.0

    @property
    def median_interval(self) -> float:
        """Median interval between consecutive slots in seconds."""
        return float(np.median(np.diff(self.times))) if self.n_frames > 1 else 0.0

    def present_runs(self, k: int) -> np.ndarray:
        """Every slot ``s`` (ascending) where slots ``s .. s+k-1`` are all present frames.

        >>> rec = Recording(np.zeros((6, 1, 2, 2), np.float32), np.arange(6.0),
        ...                 np.array([0, 0, 1, 0, 0, 0], bool), "demo")
        >>> rec.present_runs(2).tolist()
        [0, 3, 4]
        """
        n = self.n_frames - int(k) + 1
        if n <= 0:
            return np.zeros(0, dtype=int)
        ok = np.ones(n, dtype=bool)
        for j in range(int(k)):
            ok &= ~self.missing[j:j + n]
        return np.flatnonzero(ok)

    def slice(self, start: int, stop: int) -> "Recording":
        """Slots ``start:stop`` as a new Recording sharing the source description."""
        info = dict(self.info)
        if "names" in info:
            info["names"] = list(info["names"])[start:stop]
        return Recording(self.frames[start:stop], self.times[start:stop], self.missing[start:stop],
                         f"{self.source}[{start}:{stop}]", info)
