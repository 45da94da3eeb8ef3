"""Training: windows from recordings, curriculum, checkpoints, data-parallel runs."""

from ..runfolder import load_run
from .loop import fit

__all__ = ["fit", "load_run"]
