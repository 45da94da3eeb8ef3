"""Every synthetic rig by name."""

from __future__ import annotations

from ..errors import KinecastError
from .airtable import AIRTABLE
from .ball import BALL
from .pendulum import PENDULUM
from .rig import Rig
from .spring import SPRING

RIGS: dict[str, Rig] = {rig.name: rig for rig in (PENDULUM, SPRING, AIRTABLE, BALL)}


def get_rig(name: str) -> Rig:
    """The rig called ``name``; :class:`KinecastError` listing the names otherwise."""
    try:
        return RIGS[name]
    except (KeyError, TypeError):
        raise KinecastError(f"rig {name!r}", f"unknown rig: allowed {', '.join(RIGS)}") from None
