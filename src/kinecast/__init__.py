"""kinecast: learn a second-order latent ODE from short lab camera recordings.

Forecast the next seconds of motion, fill dropped frames, and score predictions frame by frame
against held-out frames and simple baselines, on a CPU.

Predictions are statistical extrapolations, not measurements; kinecast is not for safety-critical
control.
"""

__version__ = "0.1.0"

from .config import Config  # noqa: E402
from .errors import KinecastError  # noqa: E402

__all__ = ["Config", "KinecastError", "__version__"]
