"""Where an approximate level errs, from calibrations against exact results: indicators and warnings.

Each rule reads indicators that a user can compute before a run — the coupling strength ‖iJ + ½Γ‖₂
(`Model.coupling_norm`), the strongest pair coupling max_{i≠j}|J_ij + (i/2)Γ_ij| (`strongest_pair`) and the
saturation s of the drive — records them in the result's attributes and warns where its calibration found
the level's error beyond 5 % (emission rate, intensities) or 10 % (g2). The calibrations, with their
confusion tables, are in docs/calibration.md (mean field) and docs/twa.md §9. `beyondmf.evolve` and
`beyondmf.steady` apply the rule of the level after its run (`apply`).
"""

from __future__ import annotations

import numpy as np

from .._notes import warn as _note
from ..model import Model

__all__ = ["apply", "RULES", "strongest_pair", "twa_regime", "meanfield_regime", "TRUSTED_COUPLING",
           "TRUSTED_SATURATION", "CLOSE_PAIR"]

# Driven twa and mean field are trusted (no regime warning) below this coupling strength ‖iJ + ½Γ‖₂ (Γ0) or
# at or above this saturation s.
TRUSTED_COUPLING = 0.25
TRUSTED_SATURATION = 10.0
# Mean field at any drive is not trusted with a pair coupled more strongly than this (Γ0).
CLOSE_PAIR = 1.0


def strongest_pair(model: Model) -> float:
    """max_{i≠j} |J_ij + (i/2)Γ_ij| in Γ0 (0 for one emitter)."""
    if model.n < 2:
        return 0.0
    J, G = np.asarray(model.J), np.asarray(model.Gamma)
    best, rows = 0.0, max(1, 2**22 // model.n)  # blocks of rows: no complex N×N temporary
    for start in range(0, model.n, rows):
        k = np.abs(J[start:start + rows] + 0.5j * G[start:start + rows])
        idx = np.arange(start, min(start + rows, model.n))
        k[idx - start, idx] = 0.0
        best = max(best, float(k.max()))
    return best


def _indicators(model: Model, attrs: dict) -> tuple[float, float]:
    norm, sat = model.coupling_norm(), model.saturation
    attrs["coupling_norm"], attrs["saturation"] = norm, sat
    return norm, sat


def twa_regime(model: Model, attrs: dict) -> None:
    """twa: warn for a driven run with ‖iJ + ½Γ‖₂ ≥ `TRUSTED_COUPLING` and s < `TRUSTED_SATURATION`."""
    norm, sat = _indicators(model, attrs)
    if norm >= TRUSTED_COUPLING and 0 < sat < TRUSTED_SATURATION:
        _note(
            f"twa: at this coupling strength (‖iJ + ½Γ‖ = {norm:.2g} Γ0, at least {TRUSTED_COUPLING:g}) and "
            f"drive (saturation s = {sat:.2g}, below {TRUSTED_SATURATION:g}) the calibration on driven "
            "6-emitter clusters found twa off by up to 26 % in the forward intensity, 13 % in the emission "
            "rate and 108 % in g2_total (docs/twa.md §9); compare with 'cumulant2' (or 'exact' for N ≲ 9)"
        )


def meanfield_regime(model: Model, attrs: dict) -> None:
    """Mean field: warn for a driven run with a pair coupled by more than `CLOSE_PAIR`, or with
    ‖iJ + ½Γ‖₂ ≥ `TRUSTED_COUPLING` and s < `TRUSTED_SATURATION`."""
    norm, sat = _indicators(model, attrs)
    pair = attrs["strongest_pair"] = strongest_pair(model)
    if sat <= 0:
        return
    where = "(docs/calibration.md); compare with 'cumulant2', within 4.3 % of exact in all of them"
    if pair > CLOSE_PAIR:
        _note(
            f"meanfield: a pair of emitters is coupled by {pair:.2g} Γ0 (more than {CLOSE_PAIR:g}); with "
            "such a pair the calibration on driven 6-emitter clusters found mean field off by up to 20 % in "
            f"the emission rate, 26 % in the intensities and 23 % in g2, most under strong drive {where}"
        )
    elif norm >= TRUSTED_COUPLING and sat < TRUSTED_SATURATION:
        _note(
            f"meanfield: at this coupling strength (‖iJ + ½Γ‖ = {norm:.2g} Γ0, at least "
            f"{TRUSTED_COUPLING:g}) and drive (saturation s = {sat:.2g}, below {TRUSTED_SATURATION:g}) the "
            "calibration on driven 6-emitter clusters found mean field off by up to 9 % in the emission "
            f"rate, 43 % in an intensity and 10 % in g2 {where}"
        )


RULES = {"twa": twa_regime, "meanfield": meanfield_regime}


def apply(level: str, model: Model, attrs: dict) -> None:
    """The regime rule of ``level``, if it has one: indicators into ``attrs``, and its warning."""
    rule = RULES.get(level)
    if rule is not None:
        rule(model, attrs)
