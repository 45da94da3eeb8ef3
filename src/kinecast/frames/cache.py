"""A cache of decoded frames at model resolution, so a second read of a recording is cheap.

One ``.npz`` file per (source, preprocessing) pair, named by a SHA-256 hash of the source's absolute
path, the size and modification time of every source file, and the :class:`DataConfig` fields that
change the pixels (``size``, ``color``, ``roi``). Editing, adding or removing a frame file changes
the key. Times are not cached: a timestamps CSV is read afresh every time.

The folder is ``data.cache_dir`` if set, else the ``KINECAST_CACHE_DIR`` environment variable, else
``~/.cache/kinecast``. Entries are written atomically; a damaged entry is ignored and rewritten.
"""

from __future__ import annotations

import hashlib
import json
import os
import zipfile
from pathlib import Path

import numpy as np

from ..config import DataConfig
from ..errors import KinecastError
from ..fileio import write_with

CACHE_ENV = "KINECAST_CACHE_DIR"
DEFAULT_CACHE_DIR = "~/.cache/kinecast"
# Bump when the entry layout or the preprocessing changes, so old entries are never reused.
CACHE_FORMAT = 3  # 2: videos shrunk by ffmpeg (16-bit area averages); 3: non-square pictures
                  # padded to the square (edge pixels repeated) instead of squashed
PIXEL_FIELDS = ("size", "color", "roi")


def cache_dir(cfg: DataConfig) -> Path:
    """Where cache entries live for this config."""
    chosen = cfg.cache_dir or os.environ.get(CACHE_ENV) or DEFAULT_CACHE_DIR
    return Path(chosen).expanduser()


def cache_key(path: Path, files: list[Path], cfg: DataConfig) -> str:
    """Hex digest that changes whenever the source files or the pixel settings change."""
    stamp = []
    for f in files:
        st = f.stat()
        stamp.append([f.name, st.st_size, st.st_mtime_ns])
    pixels = {k: getattr(cfg, k) for k in PIXEL_FIELDS}
    pixels["roi"] = [int(v) for v in pixels["roi"]]
    text = json.dumps({"format": CACHE_FORMAT, "path": str(path.resolve()), "files": stamp,
                       "pixels": pixels}, sort_keys=True)
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


def entry_path(cfg: DataConfig, key: str) -> Path:
    return cache_dir(cfg) / f"frames-{key[:40]}.npz"


def load_entry(cfg: DataConfig, key: str) -> tuple[np.ndarray, list[str], dict] | None:
    """Frames, names and source facts of a cache entry, or None when absent or unusable."""
    target = entry_path(cfg, key)
    try:
        with np.load(target, allow_pickle=False) as z:
            if str(z["key"]) != key:
                return None
            frames = np.asarray(z["frames"], dtype=np.float32)
            names = [str(n) for n in z["names"]]
            info = json.loads(str(z["info"]))
    except (OSError, KeyError, ValueError, zipfile.BadZipFile, EOFError):
        return None
    if frames.ndim != 4 or len(names) != len(frames) or not isinstance(info, dict):
        return None
    return frames, names, info


def save_entry(cfg: DataConfig, key: str, frames: np.ndarray, names: list[str], info: dict) -> str:
    """Write a cache entry atomically; return 'written' or why it could not be written.

    A cache that cannot be written never stops a read: the frames are already in memory.
    """
    target = entry_path(cfg, key)

    def writer(tmp: Path) -> None:
        with open(tmp, "wb") as fh:
            np.savez(fh, key=np.array(key), frames=frames.astype(np.float32, copy=False),
                     names=np.array(names, dtype=np.str_), info=np.array(json.dumps(info)))

    try:
        write_with(target, writer)
    except (OSError, KinecastError) as exc:
        return f"not written ({exc})"
    return "written"
