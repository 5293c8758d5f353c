"""Imports every benchmark suite so that each registers itself."""

from . import exact_levels, twa  # noqa: F401
