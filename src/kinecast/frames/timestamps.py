"""Frame times: a timestamps CSV, a frame rate, and dropped-frame detection.

A timestamps CSV has one row per frame: the frame's file name (with or without its extension) or
its 0-based index in frame order, then its time in seconds. A header row is allowed, as are blank
lines, ``#`` comments, and extra columns after the time (ignored). The separator is a comma, a
semicolon or a tab. A CSV with a single column lists the times in frame order.

Dropped frames show up as long intervals: where an interval exceeds ``gap_factor`` times the median
interval, ``round(interval / median) - 1`` empty slots are inserted, spaced evenly inside the gap.
"""

from __future__ import annotations

import csv
import math
import re
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ..errors import KinecastError

SEPARATORS = (",", ";", "\t")
_INDEX = re.compile(r"^[0-9]{1,18}$")      # a 0-based frame index (ASCII digits)


@dataclass
class TimesTable:
    """Rows of a timestamps CSV: frame keys (None for a one-column file), times in seconds, line numbers."""

    keys: list[str] | None
    times: np.ndarray
    lines: list[int]
    source: str


def _number(text: str) -> float | None:
    try:
        return float(text)
    except ValueError:
        return None


def parse_times_text(text: str, source: str) -> TimesTable:
    """Parse the text of a timestamps CSV.

    Parameters
    ----------
    text : str
        The whole file.
    source : str
        The file name, for messages.

    Raises
    ------
    KinecastError
        On non-numeric or non-finite times, rows with a different column count, or no rows.

    Examples
    --------
    >>> t = parse_times_text("frame,time\\nf1.png,0.0\\nf2.png,0.04\\n", "t.csv")
    >>> t.keys, t.times.tolist()
    (['f1.png', 'f2.png'], [0.0, 0.04])
    """
    body = [(n, ln) for n, ln in enumerate(text.splitlines(), start=1)
            if ln.strip() and not ln.lstrip().startswith("#")]
    if not body:
        raise KinecastError(source, "timestamps CSV has no rows")
    sep = next((s for s in SEPARATORS if s in body[0][1]), ",")
    try:
        rows = [(n, [c.strip() for c in next(csv.reader([ln], delimiter=sep), [])] or [""])
                for n, ln in body]
    except (csv.Error, StopIteration) as exc:
        raise KinecastError(source, f"not a readable CSV ({exc})") from None
    first = rows[0][1]
    if _number(first[min(len(first), 2) - 1]) is None:      # a header row
        rows = rows[1:]
        if not rows:
            raise KinecastError(source, "timestamps CSV has a header but no rows")
    two = len(rows[0][1]) >= 2
    keys, times, lines = [], [], []
    for n, cells in rows:
        if two != (len(cells) >= 2):
            raise KinecastError(source, f"line {n}: found {len(cells)} column(s) but the first row "
                                        f"has {'two or more' if two else 'one'}")
        raw = cells[1] if two else cells[0]
        value = _number(raw)
        if value is None:
            raise KinecastError(source, f"line {n}: time {raw[:40]!r} is not a number")
        if not math.isfinite(value):
            raise KinecastError(source, f"line {n}: time {raw[:40]!r} is not finite")
        if two and not cells[0]:
            raise KinecastError(source, f"line {n}: the frame name or index is empty")
        keys.append(cells[0])
        times.append(value)
        lines.append(n)
    return TimesTable(keys if two else None, np.asarray(times, dtype=np.float64), lines, source)


def read_times_csv(path: str | Path) -> TimesTable:
    """Read and parse a timestamps CSV file."""
    path = Path(path)
    try:
        data = path.read_bytes()
    except FileNotFoundError:
        raise KinecastError(path, "timestamps CSV does not exist") from None
    except OSError as exc:
        raise KinecastError(path, f"cannot read the timestamps CSV ({exc.strerror or exc})") from None
    try:
        text = data.decode("utf-8-sig")
    except UnicodeDecodeError:
        raise KinecastError(path, "timestamps CSV is not UTF-8 text") from None
    if "\x00" in text:
        raise KinecastError(path, "timestamps CSV is not text (holds NUL bytes)")
    return parse_times_text(text, str(path))


def _stem(name: str) -> str:
    return name.rsplit(".", 1)[0] if "." in name else name


def match_times(table: TimesTable, names: list[str]) -> np.ndarray:
    """The time of each frame (in frame order) from a parsed CSV.

    Rows are matched by file name (with or without extension); if that fails and every key is a
    whole number, by 0-based index. Every frame needs exactly one row and every row one frame, and
    the times must increase strictly in frame order.
    """
    src, n = table.source, len(names)
    if table.keys is None:                               # one column: times in frame order
        if len(table.times) != n:
            raise KinecastError(src, f"has {len(table.times)} times for {n} frames")
        return _check_increasing(table.times, names, table.lines, src)
    row_of = _unique_rows(table, table.keys)
    by_name = [row_of.get(name, row_of.get(_stem(name))) for name in names]
    if None in by_name and all(_INDEX.match(k) for k in table.keys):
        by_index = _unique_rows(table, [int(k) for k in table.keys])
        by_name = [by_index.get(i) for i in range(n)]
    if None in by_name:
        first = names[by_name.index(None)]
        raise KinecastError(src, f"no time for frame {first!r} ({by_name.count(None)} of {n} frames "
                                 "have no row)")
    if len(set(by_name)) < n:
        twice = next(r for r in by_name if by_name.count(r) > 1)
        raise KinecastError(src, f"line {table.lines[twice]}: {table.keys[twice]!r} matches more "
                                 "than one frame")
    if n < len(table.keys):
        extra = min(set(range(len(table.keys))) - set(by_name))
        raise KinecastError(src, f"line {table.lines[extra]}: no frame {table.keys[extra]!r} in the "
                                 f"recording ({n} frames)")
    lines = [table.lines[r] for r in by_name]
    return _check_increasing(table.times[by_name], names, lines, src)


def _unique_rows(table: TimesTable, keys: list) -> dict:
    """Row number of each key; a key listed twice is an error."""
    row_of: dict = {}
    for i, key in enumerate(keys):
        if key in row_of:
            raise KinecastError(table.source, f"line {table.lines[i]}: frame {table.keys[i]!r} is "
                                              f"listed twice (also line {table.lines[row_of[key]]})")
        row_of[key] = i
    return row_of


def _check_increasing(times: np.ndarray, names: list[str], lines: list[int], src: str) -> np.ndarray:
    steps = np.diff(times)
    bad = np.flatnonzero(steps <= 0)
    if bad.size:
        i = int(bad[0])
        what = "repeats" if steps[i] == 0 else "goes back from"
        raise KinecastError(src, f"line {lines[i + 1]}: time {times[i + 1]:g} s of frame "
                                 f"{names[i + 1]!r} {what} {times[i]:g} s of frame {names[i]!r} "
                                 "(times must increase)")
    return np.asarray(times, dtype=np.float64)


def regular_times(n: int, rate: float) -> np.ndarray:
    """``n`` times at ``rate`` frames per second, starting at 0."""
    return np.arange(n, dtype=np.float64) / float(rate)


def find_drops(times: np.ndarray, gap_factor: float) -> list[tuple[int, int]]:
    """Where frames were dropped: ``(i, k)`` means ``k`` frames are missing after frame ``i``.

    An interval counts as a gap when it exceeds ``gap_factor`` × the median interval; it then hides
    ``round(interval / median) - 1`` frames (round half up).

    >>> find_drops(np.array([0.0, 1.0, 2.0, 5.0, 6.0]), 1.5)
    [(2, 2)]
    """
    if len(times) < 3:
        return []
    steps = np.diff(times)
    median = float(np.median(steps))
    drops = []
    for i in np.flatnonzero(steps > gap_factor * median):
        k = int(math.floor(steps[i] / median + 0.5)) - 1
        if k > 0:
            drops.append((int(i), k))
    return drops


def insert_slots(times: np.ndarray, drops: list[tuple[int, int]]) -> tuple[np.ndarray, np.ndarray]:
    """Slot times with the dropped frames put back, and the index of each real frame's slot.

    Inserted slots are spaced evenly inside their gap.

    >>> t, idx = insert_slots(np.array([0.0, 1.0, 4.0]), [(1, 2)])
    >>> t.tolist(), idx.tolist()
    ([0.0, 1.0, 2.0, 3.0, 4.0], [0, 1, 4])
    """
    extra = dict(drops)
    out, where = [], []
    for i, t in enumerate(times):
        where.append(len(out))
        out.append(float(t))
        k = extra.get(i, 0)
        if k:
            gap = float(times[i + 1] - t)
            out.extend(float(t) + gap * j / (k + 1) for j in range(1, k + 1))
    return np.asarray(out, dtype=np.float64), np.asarray(where, dtype=np.int64)
