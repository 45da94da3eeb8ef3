"""``python -m kinecast`` runs the command line (also used by ``torchrun -m kinecast``)."""

import os
import sys

from .cli import main

code = main()
if int(os.environ.get("WORLD_SIZE", "1")) > 1:  # a torchrun launch: helpers leave without shutdown
    from .train.distributed import leave_helper

    leave_helper(code)
sys.exit(code)
