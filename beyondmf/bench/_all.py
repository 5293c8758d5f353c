"""Imports every benchmark suite so that each registers itself."""
from . import cumulant2  # noqa: F401
