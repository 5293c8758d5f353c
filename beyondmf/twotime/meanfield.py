"""Level "meanfield" in `beyondmf.correlations`: the elastic part only.

Mean field keeps a product state: each emitter's coherence ⟨σ_j⁻⟩ radiates a classical, coherent field
⟨E⟩ = Σ_j w_j ⟨σ_j⁻⟩, whose contribution to G1(τ) is the constant |⟨E⟩|² of a steady state, so its
elastic line (weight intensity_coherent, fraction |⟨E⟩|²/⟨E†E⟩) is what mean field predicts for the
spectrum. The inelastic part and g1, g2 at τ > 0 need the fluctuations δσ = σ − ⟨σ⟩ and their
correlations at two times, which the product state does not carry (its equal-time incoherent intensity
is the single-emitter value Σ_j (n_j − |β_j|²)); they are refused rather than guessed.
"""

from __future__ import annotations

import numpy as np

from ..integrate import ODE_OPTIONS
from ..levels.base import get_level
from . import TwoTime

__all__ = ["OPTIONS", "SUPPORT", "check", "compute"]

OPTIONS = dict(ODE_OPTIONS)
SUPPORT = "elastic part only (elastic_fraction, intensity_coherent); delays and frequencies refused"


def check(model, probes, delays, freqs, at) -> None:
    if delays is not None or freqs is not None:
        what = "g1(τ), g2(τ)" if delays is not None else "the inelastic spectrum"
        raise ValueError(
            f"level 'meanfield' has no {what}: a product state carries no fluctuations δσ = σ − ⟨σ⟩ and no "
            "correlations between two times, so only the elastic line (coherent field) is defined. Call "
            "correlations(model, 'meanfield', None) for elastic_fraction and intensity_coherent; levels with "
            "g1(τ), g2(τ) and the inelastic spectrum: exact, dicke (symmetric models) and cumulant2"
        )


def compute(model, probes, delays, at, initial, freqs, options) -> TwoTime:
    lvl = get_level("meanfield")
    if at is None:
        m = lvl.steady(model, probes, None, options).to_numpy()
    else:
        m = lvl.evolve(model, np.array([0.0, at]) if at > 0 else np.array([0.0]), initial, probes, None,
                       options).to_numpy()
    field1 = m.coherence[-1] @ probes.weights.T
    return TwoTime(field2=m.field2[-1], field1=field1, rate=m.rate[-1], attrs=dict(m.attrs))
