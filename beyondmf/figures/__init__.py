"""Figures (matplotlib, PNG): `runs` for a study of one model, `sweeps` for a sweep or comparison (values,
corrections, maps), `correlations` for g2(τ) and spectra. Each draws from a results Dataset only."""

from .correlations import plot_correlation_sweep, plot_correlations
from .runs import plot_all
from .sweeps import plot_sweep

__all__ = ["plot_all", "plot_sweep", "plot_correlations", "plot_correlation_sweep"]
