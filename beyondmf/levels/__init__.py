"""Levels of description, one module each, registered by name (see base.Level for the contract)."""

from . import cumulant2  # noqa: F401  (registers the level)
from . import dicke  # noqa: F401  (registers the level)
from . import exact  # noqa: F401  (registers the level)
from . import jumps  # noqa: F401  (registers the level)
from . import meanfield  # noqa: F401  (registers the level)
from . import twa  # noqa: F401  (registers the level)
from .base import Level, Moments, Probes, available_levels, get_level, register

__all__ = ["Level", "Moments", "Probes", "available_levels", "get_level", "register"]
