"""``python -m kinecast`` runs the command line (also used by ``torchrun -m kinecast``)."""

import sys

from .cli import main

sys.exit(main())
