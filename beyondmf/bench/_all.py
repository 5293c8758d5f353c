"""Imports every benchmark suite so that each registers itself."""
from . import meanfield  # noqa: F401
