"""Levels of description, one module each, registered by name (see base.Level for the contract)."""

from . import (
    dicke,  # noqa: F401  (registers the level)
    exact,  # noqa: F401  (registers the level)
    jumps,  # noqa: F401  (registers the level)
    meanfield,  # noqa: F401  (registers the level)
)
from .base import Level, Moments, Probes, available_levels, get_level, register

__all__ = ["Level", "Moments", "Probes", "available_levels", "get_level", "register"]
