"""Imports every benchmark suite so that each registers itself."""
from . import exact_levels  # noqa: F401  (registers the suites "exact", "jumps", "dicke")
from . import meanfield  # noqa: F401
