"""The project's one error type for bad input.

Every problem a user can cause (a bad file, a bad option, a folder that is not a run) raises
:class:`KinecastError` with one line that names the thing and the problem. The command line prints
that line and exits with status 2; it never shows a traceback for these.
"""

from __future__ import annotations

import difflib
from pathlib import Path

EXIT_BAD_INPUT = 2
# difflib.get_close_matches' own default similarity cutoff (Python docs); one suggestion at most
SUGGEST_CUTOFF = 0.6


class KinecastError(Exception):
    """Bad input: one line naming the thing and the problem."""

    def __init__(self, thing: str | Path | None, problem: str):
        self.thing = str(thing) if thing is not None else None
        self.problem = problem
        super().__init__(f"{self.thing}: {problem}" if self.thing else problem)


def closest(word: str, options) -> str | None:
    """The one of ``options`` closest to a misspelled ``word``, or None when none is close.

    Uses :func:`difflib.get_close_matches` (similarity ratio of the standard library's SequenceMatcher).
    """
    close = difflib.get_close_matches(str(word), [str(o) for o in options], n=1, cutoff=SUGGEST_CUTOFF)
    return close[0] if close else None


def did_you_mean(word: str, options) -> str:
    """``" (did you mean X?)"`` for the option closest to a misspelled ``word``, or ``""``."""
    close = closest(word, options)
    return f" (did you mean {close}?)" if close else ""
