"""Levels of description, one module each, registered by name (see base.Level for the contract)."""

# Importing a level module registers it.
from . import cumulant2, dicke, exact, jumps, meanfield, qsd_product, twa  # noqa: F401
from .base import Level, Moments, Probes, available_levels, get_level, register

__all__ = ["Level", "Moments", "Probes", "available_levels", "get_level", "register"]
