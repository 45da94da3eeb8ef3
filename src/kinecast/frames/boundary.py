"""Helpers for the boundary with decoding libraries: quiet them, and shorten what they say."""

from __future__ import annotations

import contextlib
from typing import Iterator

import cv2

# Longest library message quoted inside one of our one-line errors (characters; our choice).
MESSAGE_LIMIT = 160


def one_line(text: object, limit: int = MESSAGE_LIMIT) -> str:
    """``text`` with all whitespace runs collapsed to one space, cut to ``limit`` characters.

    >>> one_line("bad\\n   header")
    'bad header'
    """
    line = " ".join(str(text).split())
    return line if len(line) <= limit else line[:limit - 3] + "..."


@contextlib.contextmanager
def quiet_opencv() -> Iterator[None]:
    """Silence OpenCV's own log while decoding; failures become our one-line errors instead."""
    log = cv2.utils.logging
    old = log.getLogLevel()
    log.setLogLevel(log.LOG_LEVEL_SILENT)
    try:
        yield
    finally:
        log.setLogLevel(old)
