"""Two-time correlation functions by the quantum regression theorem, one module per level.

`beyondmf.correlations` validates the request and assembles the Dataset; each module here computes, for
its level, the unnormalised functions of `TwoTime` (derivations: docs/correlations.md).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np

__all__ = ["TwoTime"]


@dataclass
class TwoTime:
    """What a level's regression reports; D detectors, T delays, F frequencies.

    field2    (D,)     ⟨E_d†E_d⟩ at the reference time t (the steady state, or t = at)
    field1    (D,)     ⟨E_d⟩ at t (complex): the coherent, elastic field
    rate      ()       P = Σ Γ_ij⟨σ_i⁺σ_j⁻⟩ at t
    field2_tau (T, D)  ⟨E_d†E_d⟩ at t + τ;   rate_tau (T,): P at t + τ
    G1        (T, D)   ⟨E_d†(t) E_d(t + τ)⟩ (complex)
    G2        (T, D)   ⟨E_d†(t) E_d†(t + τ) E_d(t + τ) E_d(t)⟩
    G2_total  (T,)     Σ Γ_ij Γ_kl ⟨σ_i⁺(t) σ_k⁺(t + τ) σ_l⁻(t + τ) σ_j⁻(t)⟩
    inelastic (F, D)   S_d(ν) with ∫ S_d dν = ⟨E_d†E_d⟩ − |⟨E_d⟩|² (None without frequencies)
    Entries a level cannot give are None (the entry point refuses before asking for them).
    """

    field2: Any
    field1: Any
    rate: Any
    field2_tau: Any = None
    rate_tau: Any = None
    G1: Any = None
    G2: Any = None
    G2_total: Any = None
    inelastic: Any = None
    attrs: dict[str, Any] = field(default_factory=dict)

    def to_numpy(self) -> TwoTime:
        conv = {k: (None if getattr(self, k) is None else np.asarray(getattr(self, k)))
                for k in ("field2", "field1", "rate", "field2_tau", "rate_tau", "G1", "G2", "G2_total",
                          "inelastic")}
        return TwoTime(**conv, attrs=dict(self.attrs))
