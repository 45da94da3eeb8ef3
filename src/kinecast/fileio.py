"""Atomic file writes: every file goes to a temporary name in the same folder, then is renamed.

A kill at any moment leaves either the old file or the new one, never a half-written file.
"""

from __future__ import annotations

import contextlib
import functools
import os
import tempfile
from pathlib import Path
from typing import Callable, Iterator

from .errors import KinecastError



@functools.lru_cache(maxsize=1)
def process_umask() -> int:
    """The process's file-creation mask, read once when first needed (not at import): from
    /proc/self/status where Linux has it (``Umask:`` line, kernel 4.7+), which changes nothing;
    elsewhere set and restored at once (the only portable way before Python 3.13)."""
    with contextlib.suppress(OSError, ValueError):
        for line in Path("/proc/self/status").read_text().splitlines():
            if line.startswith("Umask:"):
                return int(line.split()[1], 8)
    mask = os.umask(0)
    os.umask(mask)
    return mask


@contextlib.contextmanager
def atomic_path(target: str | Path, overwrite: bool = True) -> Iterator[Path]:
    """Yield a temporary path beside ``target``; rename it onto ``target`` on success.

    The temporary keeps the target's suffix so writers that pick a format by extension still work.
    On any exception the temporary is removed and ``target`` is untouched.
    """
    target = Path(target)
    if not overwrite and target.exists():
        raise KinecastError(target, "already exists (pass --overwrite to replace it)")
    folder = target.parent if str(target.parent) else Path(".")
    check_can_create(target)
    try:
        folder.mkdir(parents=True, exist_ok=True)
        fd, tmp = tempfile.mkstemp(prefix=f".{target.stem}.", suffix=f".tmp{target.suffix}", dir=folder)
    except OSError as exc:
        raise KinecastError(folder, f"cannot write here ({exc.strerror or exc})") from None
    os.close(fd)
    tmp_path = Path(tmp)
    try:
        yield tmp_path
        # mkstemp makes 0600, and some writers (safetensors) replace the file with a 0600 one of
        # their own: give the finished file the usual permissions
        os.chmod(tmp_path, 0o666 & ~process_umask())
        with open(tmp_path, "rb+") as fh:
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp_path, target)
    finally:
        if tmp_path.exists():
            tmp_path.unlink()


def check_can_create(target: str | Path) -> None:
    """Refuse early, with one line, a file or folder that cannot be created where it is asked for.

    Walks up to the nearest existing ancestor: it must be a folder this process may write into.
    Nothing is created. (Root may write into a chmod 0o555 folder; ``os.access`` knows that.)
    """
    target = Path(target)
    probe = target if target.is_dir() else target.parent
    while not probe.exists() and probe != probe.parent:
        probe = probe.parent
    if not probe.is_dir():
        raise KinecastError(target, f"cannot write here ({probe} is a file, not a folder)")
    if not os.access(probe, os.W_OK | os.X_OK):
        raise KinecastError(target, f"cannot write here (no write permission in {probe})")


def write_bytes(target: str | Path, data: bytes, overwrite: bool = True) -> Path:
    """Write ``data`` to ``target`` atomically."""
    with atomic_path(target, overwrite) as tmp:
        tmp.write_bytes(data)
    return Path(target)


def write_text(target: str | Path, text: str, overwrite: bool = True) -> Path:
    """Write ``text`` (UTF-8) to ``target`` atomically."""
    return write_bytes(target, text.encode("utf-8"), overwrite)


def write_with(target: str | Path, writer: Callable[[Path], None], overwrite: bool = True) -> Path:
    """Call ``writer(tmp_path)`` and rename the result onto ``target`` atomically."""
    with atomic_path(target, overwrite) as tmp:
        writer(tmp)
    return Path(target)


def read_numeric_csv(path: str | Path, what: str) -> tuple[list[str], list[list[float | None]]]:
    """``(header, rows)`` of a CSV file of numbers with a header line (``what`` names it in errors);
    an empty cell is None, so a written ``nan`` stays distinct from a cell left blank."""
    import csv

    path = Path(path)
    try:
        with open(path, newline="", encoding="utf-8") as fh:
            lines = list(csv.reader(fh))
    except FileNotFoundError:
        raise KinecastError(path, f"{what} not found") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise KinecastError(path, f"cannot read {what} ({exc})") from None
    if not lines or not any(h.strip() for h in lines[0]):
        raise KinecastError(path, f"{what} is empty (expected a header line)")
    header = [h.strip() for h in lines[0]]
    rows = []
    for number, line in enumerate(lines[1:], start=2):
        if len(line) != len(header):
            raise KinecastError(path, f"line {number}: {len(line)} cells but the header has {len(header)}")
        try:
            rows.append([float(cell) if cell.strip() else None for cell in line])
        except ValueError:
            bad = next(i for i, c in enumerate(line) if c.strip() and not _is_number(c))
            raise KinecastError(path, f"line {number}: column '{header[bad]}' has a non-number "
                                      f"{line[bad]!r}") from None
    return header, rows


def _is_number(text: str) -> bool:
    try:
        float(text)
    except ValueError:
        return False
    return True
