"""Imports every benchmark suite so that each registers itself."""

from . import correlations, cumulant2, exact_levels, meanfield, qsd_product, scan, stiff, twa  # noqa: F401
