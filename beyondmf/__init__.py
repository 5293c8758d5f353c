"""beyondmf: light from dense, laser-driven clouds of two-level emitters, level by level of correlation.

One `Model`, two entry points (`evolve`, `steady`), levels chosen by name; every level returns the same
`xarray.Dataset` (conventions.md, "the data contract").

Importing beyondmf switches JAX to 64-bit precision (``jax_enable_x64``) for the whole process: a
requirement of its solvers (see ``beyondmf._config``).
"""

from . import (
    _config,  # noqa: F401,E402  (64-bit JAX before anything else touches JAX)
    geometry,  # noqa: E402
)
from ._version import __version__  # noqa: E402
from .api import drive_scan, evolve, steady  # noqa: E402
from .beam import GaussianBeam  # noqa: E402
from .correlations import correlations  # noqa: E402
from .couplings import couplings  # noqa: E402
from .levels import Level, Moments, available_levels, get_level, register  # noqa: E402
from .model import Model  # noqa: E402
from .results import load, save  # noqa: E402
from .study import read_study  # noqa: E402
from .sweep import compare_levels  # noqa: E402


def level_options(level: str) -> dict:
    """The options a level accepts, with their defaults."""
    return dict(get_level(level).options)


__all__ = [
    "__version__",
    "Model",
    "evolve",
    "steady",
    "drive_scan",
    "GaussianBeam",
    "correlations",
    "couplings",
    "geometry",
    "available_levels",
    "level_options",
    "get_level",
    "register",
    "Level",
    "Moments",
    "save",
    "load",
    "read_study",
    "compare_levels",
]
