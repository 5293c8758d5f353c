"""Imports every benchmark suite so that each registers itself."""

from . import twa  # noqa: F401
