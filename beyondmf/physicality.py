"""Values no physical state can have, flagged the same way at every level.

For every state ρ: 0 ≤ n_i ≤ 1, P = Σ Γ_ij⟨σ_i⁺σ_j⁻⟩ ≥ 0 (Γ is positive semi-definite), I(n̂) ≥ 0, its
incoherent part ⟨E†E⟩ − |⟨E⟩|² ≥ 0 (a variance) and g2 ≥ 0 (⟨E†E†EE⟩ = ‖EEρ^{1/2}‖² ≥ 0). An approximate
level that leaves these bounds has failed at that point, whatever the rest of its numbers look like.

`check` compares each value with its bound, beyond

- g2 only where there is light: the detector's intensity (the emission rate, for g2_total) above `DARK`
  times the largest of the run and above 10⁻¹² (at t = 0 from the ground state g2 is 0/0);
- for a deterministic level, a numerical tolerance: `POPULATION_TOL` for populations, `RELATIVE_TOL` times
  the largest magnitude of the observable in the run for rates and intensities, `G2_TOL` for g2 (a ratio
  of small numbers early in a run: its integration error is larger than that of the moments);
- for a sampling level, besides that tolerance, k standard errors, with k chosen so that a run whose true
  values all sit on the bound is flagged by chance with probability below `FALSE_ALARM` (a Bonferroni
  bound over the m values checked of that observable: k = Φ⁻¹(1 − FALSE_ALARM/m), 2.3 for m = 1, 4.4 for
  m = 10³).

It returns the names of the observables out of bounds and one message; `evolve` and `steady` store them
in the result's attribute ``unphysical`` and issue the message as a warning (`beyondmf._notes.warn`), so
it also reaches the result's ``warnings``, sweeps, comparisons and figures.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import xarray as xr
from scipy.special import ndtri

__all__ = ["check", "POPULATION_TOL", "RELATIVE_TOL", "G2_TOL", "DARK", "FALSE_ALARM", "BOUNDS"]

POPULATION_TOL = 1e-6
RELATIVE_TOL = 1e-6
G2_TOL = 1e-3
DARK = 1e-9
DARK_ABSOLUTE = 1e-12  # photons per 1/Γ0 (per sr): rounding of a state with no light at all
FALSE_ALARM = 0.01


@dataclass(frozen=True)
class _Bound:
    name: str
    what: str
    lower: float
    upper: float | None = None


BOUNDS = (
    _Bound("excited", "excited population", 0.0, 1.0),
    _Bound("emission_rate", "emission rate", 0.0),
    _Bound("intensity", "intensity", 0.0),
    _Bound("intensity_incoherent", "incoherent intensity", 0.0),
    _Bound("g2", "g2", 0.0),
    _Bound("g2_total", "g2_total", 0.0),
)


def _tolerance(bound: _Bound, values: np.ndarray, ds: xr.Dataset) -> float:
    if bound.name == "excited":
        return POPULATION_TOL
    if bound.name.startswith("g2"):
        return G2_TOL
    scale_of = "intensity" if bound.name.startswith("intensity") else bound.name
    scale = np.nanmax(np.abs(ds[scale_of].values)) if ds[scale_of].size else 0.0
    return RELATIVE_TOL * float(scale) if np.isfinite(scale) and scale > 0 else 1e-300


def _lit(name: str, ds: xr.Dataset, shape) -> np.ndarray:
    """Where a g2 is defined: its light (the detector's intensity, or the emission rate for g2_total) above
    `DARK` times the largest of the run and above `DARK_ABSOLUTE`. With no light g2 is 0/0, and a level's
    rounding gives any value."""
    light = {"g2": "intensity", "g2_total": "emission_rate"}.get(name)
    if light is None or light not in ds:
        return np.ones(shape, dtype=bool)
    lv = np.abs(np.asarray(ds[light].values, dtype=float))
    top = np.nanmax(lv) if lv.size else 0.0
    return np.broadcast_to(lv > max(DARK * top, DARK_ABSOLUTE), shape)


def _where(da: xr.DataArray, flat: int) -> str:
    """'at t = 3.2, detector side' for the flat index of the worst value."""
    idx = np.unravel_index(flat, da.shape)
    parts = []
    for dim, i in zip(da.dims, idx, strict=True):
        if dim == "time":
            parts.append(f"t = {float(da['time'][i]):.4g}")
        elif dim == "detector":
            parts.append(f"detector {str(da['detector'].values[i])!r}")
        elif dim == "emitter":
            parts.append(f"emitter {i}")
    return ", ".join(parts)


def check(ds: xr.Dataset, stochastic: bool) -> tuple[list[str], str | None]:
    """The observables of ``ds`` out of their physical bounds, and a message describing the worst value
    of each (None when all are within bounds)."""
    flagged, lines = [], []
    for b in BOUNDS:
        if b.name not in ds:
            continue
        da = ds[b.name]
        x = np.asarray(da.values, dtype=float)
        if x.size == 0:
            continue
        tol = _tolerance(b, x, ds)
        err = ds.get(f"{b.name}_stderr") if stochastic else None
        if err is not None:
            m = max(int(np.isfinite(x).sum()), 1)
            k = float(ndtri(1 - FALSE_ALARM / m))
            slack = tol + k * np.nan_to_num(np.asarray(err.values, dtype=float))
        else:
            k, slack = 0.0, np.full_like(x, tol)
        checked = np.isfinite(x) & _lit(b.name, ds, x.shape)
        below = np.where(checked, b.lower - slack - x, -np.inf)
        above = (np.where(checked, x - slack - b.upper, -np.inf) if b.upper is not None
                 else np.full_like(x, -np.inf))
        excess = np.maximum(below, above)
        if not np.any(excess > 0):
            continue
        flat = int(np.argmax(excess))
        value = float(x.ravel()[flat])
        side = "below" if below.ravel()[flat] >= above.ravel()[flat] else "above"
        limit = b.lower if side == "below" else b.upper
        shown = f"{value:.4g}"
        if err is not None:
            shown += f" ± {float(err.values.ravel()[flat]):.2g}"
        where = _where(da, flat)
        count = int(np.sum(excess > 0))
        lines.append(f"{b.what} {shown} ({where}; {count} value{'s' if count > 1 else ''} {side} {limit:g}"
                     + (f" by more than {k:.1f} standard errors" if err is not None else "") + ")")
        flagged.append(b.name)
    if not flagged:
        return [], None
    return flagged, "; ".join(lines)
