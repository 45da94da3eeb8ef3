"""Video read throughput: kinecast's reader against a bare ffmpeg decode of the same file.

kinecast: ``read_recording`` with the cache off (decode, grey conversion, resize to the model size,
timestamps). Raw: iterating ``imageio_ffmpeg.read_frames`` over the same file in the same pixel
format (rgb24) and doing nothing with the frames. The two are timed alternately, best of
``repeats`` each, and their ratio is kinecast frames/s over raw frames/s.
"""

from __future__ import annotations

import time
from pathlib import Path

import numpy as np

from kinecast.config import DataConfig
from kinecast.render import write_frames
from kinecast.frames import read_recording

from .common import NOMINAL_FPS


def write_video(frames: np.ndarray, path: Path, upscale: int) -> Path:
    """Write uint8 frames (T, H, W, C) as an mp4 magnified ``upscale`` times (the source to read)."""
    return write_frames(frames, path, NOMINAL_FPS, overwrite=True, upscale=upscale)


def raw_decode(path: Path) -> int:
    """Decode every frame with imageio-ffmpeg (rgb24) and count them."""
    import imageio_ffmpeg

    gen = imageio_ffmpeg.read_frames(str(path), pix_fmt="rgb24")
    try:
        next(gen)  # the metadata dict
        return sum(1 for _ in gen)
    finally:
        gen.close()


def kinecast_read(path: Path, size: int) -> int:
    """Read the file with kinecast at ``size`` px, cache off; return the frames read."""
    rec = read_recording(path, DataConfig(size=size, cache=False))
    return int(rec.info.get("n_read", rec.n_frames))


def read_ratio(path: Path, size: int, repeats: int) -> dict:
    """Frames/s of both readers (best of ``repeats``, alternating) and their ratio.

    Returns
    -------
    dict
        ``frames``, ``raw_fps``, ``kinecast_fps``, ``ratio`` (kinecast / raw) and the best times.
    """
    best = {"raw": float("inf"), "kinecast": float("inf")}
    counts = {}
    readers = {"raw": lambda: raw_decode(path), "kinecast": lambda: kinecast_read(path, size)}
    for _ in range(max(1, repeats)):
        for name, fn in readers.items():
            t0 = time.perf_counter()
            counts[name] = fn()
            best[name] = min(best[name], time.perf_counter() - t0)
    if counts["raw"] != counts["kinecast"]:
        raise RuntimeError(f"{path}: ffmpeg decoded {counts['raw']} frames, "
                           f"kinecast read {counts['kinecast']}")
    n = counts["raw"]
    raw_fps, kc_fps = n / best["raw"], n / best["kinecast"]
    return {"file": str(path), "frames": n, "size": size, "raw_s": best["raw"],
            "kinecast_s": best["kinecast"], "raw_fps": raw_fps, "kinecast_fps": kc_fps,
            "ratio": kc_fps / raw_fps}
