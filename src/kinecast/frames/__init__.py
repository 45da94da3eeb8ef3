"""Reading recordings: frame folders, TIFF stacks and videos, with timestamps and dropped frames.

Examples
--------
Read a folder of frames with the default data settings (64x64 grey)::

    from kinecast.frames import read_recording
    rec = read_recording("trial_01/")
    rec.frames.shape, rec.missing.sum()     # e.g. ((120, 1, 64, 64), 2)
"""

from .inspect import format_inspection, inspect_recording
from .read import read_recording
from .recording import Recording

__all__ = ["Recording", "format_inspection", "inspect_recording", "read_recording"]
