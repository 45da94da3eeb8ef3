"""The project's one error type for bad input.

Every problem a user can cause (a bad file, a bad option, a folder that is not a run) raises
:class:`KinecastError` with one line that names the thing and the problem. The command line prints
that line and exits with status 2; it never shows a traceback for these.
"""

from __future__ import annotations

from pathlib import Path

EXIT_BAD_INPUT = 2


class KinecastError(Exception):
    """Bad input: one line naming the thing and the problem."""

    def __init__(self, thing: str | Path | None, problem: str):
        self.thing = str(thing) if thing is not None else None
        self.problem = problem
        super().__init__(f"{self.thing}: {problem}" if self.thing else problem)
