"""``read_recording``: any supported source to a :class:`Recording` at model resolution.

Sources: a folder of frame images, a multi-page TIFF stack, or a video file. Frames are decoded
and preprocessed once (crop, grey or RGB, resize, normalise), served from the cache on later reads,
time-stamped, and dropped frames are put back as empty slots flagged in ``missing``.
"""

from __future__ import annotations

from pathlib import Path
from typing import Callable

import numpy as np

from ..config import Config, DataConfig
from ..errors import KinecastError
from . import cache
from .images import IMAGE_SUFFIXES, decode_folder, list_images
from .preprocess import FrameSink
from .recording import Recording
from .tiffstack import decode_stack
from .timestamps import find_drops, insert_slots, match_times, read_times_csv, regular_times
from .video import VIDEO_SUFFIXES, decode_video

FOLDER_TIMES_NAME = "timestamps.csv"
# Frame rate assumed when nothing states one (1 frame per second, so times count frames).
DEFAULT_RATE = 1.0
TIFF_SUFFIXES = (".tif", ".tiff")

Decoder = Callable[[FrameSink], dict]


# File readers: (suffixes, decoder, what the user calls it). A new file format is one entry here plus
# its decoder ``decode(path, sink) -> facts``; a folder of frame images is read by decode_folder.
READERS = (
    (TIFF_SUFFIXES, decode_stack, "a TIFF stack"),
    (VIDEO_SUFFIXES, decode_video, "a video (" + ", ".join(s.lstrip(".") for s in VIDEO_SUFFIXES) + ")"),
)


def _source(path: Path) -> tuple[list[Path], Decoder]:
    """The files behind ``path`` and the function that decodes them into a sink."""
    if path.is_dir():
        files = list_images(path)
        return files, lambda sink: decode_folder(files, sink)
    if not path.is_file():
        raise KinecastError(path, "is neither a folder nor a file")
    suffix = path.suffix.lower()
    for suffixes, decode, _ in READERS:
        if suffix in suffixes:
            return [path], lambda sink: decode(path, sink)
    if suffix in IMAGE_SUFFIXES:
        raise KinecastError(path, "is a single image; pass the folder that holds the frames")
    allowed = ", ".join(["a folder of PNG/JPEG/BMP/TIFF frames"] + [label for _, _, label in READERS])
    raise KinecastError(path, f"unknown extension {path.suffix or '(none)'!r}: expected {allowed}")


def _decoded(path: Path, files: list[Path], decode: Decoder, cfg: DataConfig):
    """Frames at model resolution, their names and source facts, from the cache when possible."""
    key = None
    if cfg.cache:
        try:
            key = cache.cache_key(path, files, cfg)
        except OSError as exc:
            raise KinecastError(path, f"cannot read the source files ({exc.strerror or exc})") from None
        hit = cache.load_entry(cfg, key)
        if hit is not None:
            frames, names, info = hit
            return frames, names, {**info, "cache": "hit"}
    sink = FrameSink(cfg, path.name)
    try:
        facts = decode(sink)
        frames = sink.stacked()
    finally:
        sink.close()
    info = {**sink.info(), **facts}
    if key is not None and len(frames):
        info["cache"] = cache.save_entry(cfg, key, frames, sink.names, info)
    else:
        info["cache"] = "off"
    return frames, list(sink.names), info


def _default_times_csv(path: Path) -> Path | None:
    """``timestamps.csv`` in a folder; ``<name>.csv`` or ``<name.ext>.csv`` beside a file."""
    if path.is_dir():
        candidates = [path / FOLDER_TIMES_NAME]
    else:
        candidates = [path.with_suffix(".csv"), path.with_name(path.name + ".csv")]
    return next((c for c in candidates if c.is_file()), None)


def _times(path: Path, names: list[str], info: dict, cfg: DataConfig,
           times_csv: str | Path | None) -> tuple[np.ndarray, dict]:
    """Frame times and where they came from (csv, fps, video or default)."""
    csv_path = Path(times_csv).expanduser() if times_csv else _default_times_csv(path)
    if csv_path is not None:
        return match_times(read_times_csv(csv_path), names), {"time_source": "csv",
                                                              "times_file": str(csv_path)}
    if cfg.fps > 0:
        return regular_times(len(names), cfg.fps), {"time_source": "fps"}
    if info.get("source_rate"):
        return regular_times(len(names), info["source_rate"]), {"time_source": "video"}
    note = (f"no timestamps: no CSV, no data.fps and no frame rate in the file; "
            f"assumed {DEFAULT_RATE:g} frame per second")
    return regular_times(len(names), DEFAULT_RATE), {"time_source": "default", "problems": [note]}


def _describe(path: Path, info: dict, n: int) -> str:
    if info["kind"] == "folder":
        return f"{path} (folder of {n} {'/'.join(info['formats'])} files)"
    if info["kind"] == "tiff":
        return f"{path} (TIFF stack)"
    return f"{path} ({'/'.join(info['formats'])} video)"


def read_recording(path: str | Path, cfg: DataConfig | Config | None = None,
                   times_csv: str | Path | None = None) -> Recording:
    """Read a recording and preprocess it to model resolution.

    Parameters
    ----------
    path : str or Path
        A folder of PNG/JPEG/BMP/TIFF frames, a multi-page TIFF, or an mp4/avi/mov/mkv video.
    cfg : DataConfig (or a whole Config), optional
        Size, colour, region of interest, frame rate, gap factor, cache settings.
    times_csv : str or Path, optional
        Timestamps CSV; by default ``timestamps.csv`` in the folder or ``<name>.csv`` beside a file.

    Returns
    -------
    Recording
        Frames (T, C, size, size) float32 in [0, 1], times in seconds, and a ``missing`` flag per
        slot for frames the camera dropped.

    Raises
    ------
    KinecastError
        For any problem with the input, naming the file and the problem.
    """
    cfg = cfg.data if isinstance(cfg, Config) else (cfg or DataConfig())
    path = Path(path).expanduser()
    if not path.exists():
        raise KinecastError(path, "does not exist")
    files, decode = _source(path)
    if path.is_dir() and len(files) < cfg.min_frames:
        raise KinecastError(path, f"has {len(files)} frame(s); at least {cfg.min_frames} needed "
                                  "(data.min_frames)")
    frames, names, info = _decoded(path, files, decode, cfg)
    n = len(frames)
    if n < cfg.min_frames:
        raise KinecastError(path, f"has {n} frame(s); at least {cfg.min_frames} needed (data.min_frames)")
    times, timing = _times(path, names, info, cfg, times_csv)
    drops = find_drops(times, cfg.gap_factor)
    slot_times, slot_of = insert_slots(times, drops)
    full = np.zeros((len(slot_times),) + frames.shape[1:], dtype=np.float32)
    full[slot_of] = frames
    missing = np.ones(len(slot_times), dtype=bool)
    missing[slot_of] = False
    slot_names = [""] * len(slot_times)
    for i, slot in enumerate(slot_of):
        slot_names[int(slot)] = names[i]
    info = {**info, **timing, "names": slot_names, "n_read": n,
            "drops": [{"after": names[i], "slot": int(slot_of[i]), "time": float(times[i]),
                       "count": k} for i, k in drops],
            "problems": list(timing.get("problems", []))}
    return Recording(full, slot_times, missing, _describe(path, info, n), info)
