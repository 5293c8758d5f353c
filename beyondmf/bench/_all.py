"""Imports every benchmark suite so that each registers itself."""
from . import cumulant2  # noqa: F401
from . import exact_levels  # noqa: F401  (registers the suites "exact", "jumps", "dicke")
from . import meanfield  # noqa: F401
from . import twa  # noqa: F401
