"""Training: windows from recordings, curriculum, checkpoints, data-parallel runs."""

from .checkpoint import load_run
from .loop import fit

__all__ = ["fit", "load_run"]
