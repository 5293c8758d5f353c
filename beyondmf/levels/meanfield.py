"""Level "meanfield": every emitter a classical dipole in the field of the laser and the others.

The state is a product state. With β_i = ⟨σ_i⁻⟩, n_i = ⟨σ_i⁺σ_i⁻⟩, z_i = 2n_i − 1 and the coupling field
φ_i = Σ_{j≠i} (iJ_ij + ½Γ_ij) β_j, the Heisenberg equations of conventions.md factorised at one-body
order are (derivation: docs/meanfield.md)

    dβ_i/dt = (iΔ − ½) β_i + (i/2) Ω_i(t) z_i + z_i φ_i
    dn_i/dt = −n_i − Im(Ω_i* β_i) − 2 Re(β_i* φ_i)

Exact for one emitter and, to first order in Ω, for any cloud (the coupled-dipole linear optics of
J. Ruostekoski and J. Javanainen, Phys. Rev. A 55, 513 (1997)). Trustworthy where pair correlations are
weak: dilute clouds, weak drive. It has no quantum noise: an inverted cloud with zero coherence stays
inverted (an unstable fixed point), and g2 is that of a product state.
"""

from __future__ import annotations

from typing import Any

import jax.numpy as jnp
import numpy as np

from ..estimators import product_field_moments, product_rate_moments
from ..integrate import (
    ODE_OPTIONS,
    check_bounds,
    observe_once,
    per_envelope,
    pick_solver,
    settle,
    solve,
)
from ..memory import require
from ..model import Envelope, Model
from . import _batch
from .base import Level, Moments, Probes, register

__all__ = ["MeanField", "meanfield_rhs"]


def _coupled(args, B):
    """(Jβ, Γβ) as (real, imag) pairs for B = [Re β, Im β] stacked as (N, 2)."""
    JB = args["J"] @ B
    GB = args["G"] @ B
    if "Ji" in args:  # complex Hermitian couplings: (Jr + iJi)(br + i bi)
        JiB, GiB = args["Ji"] @ B, args["Gi"] @ B
        return (JB[:, 0] - JiB[:, 1], JB[:, 1] + JiB[:, 0]), (GB[:, 0] - GiB[:, 1], GB[:, 1] + GiB[:, 0])
    return (JB[:, 0], JB[:, 1]), (GB[:, 0], GB[:, 1])


@per_envelope
def meanfield_rhs(envelope: Envelope):
    """The mean-field right-hand side for one envelope (cached so equal envelopes share a compile)."""
    def rhs(t, y, args):
        br, bi, n = y[0], y[1], y[2]
        (jr, ji), (gr, gi) = _coupled(args, jnp.stack([br, bi], axis=1))
        phr = -ji + 0.5 * (gr - br)  # φ = iJβ + ½(Γ − 1)β
        phi = jr + 0.5 * (gi - bi)
        z = 2 * n - 1
        env = envelope(t)
        orr, ori = env * args["omega"][0], env * args["omega"][1]
        det = args["detuning"]
        dbr = -0.5 * br - det * bi - 0.5 * ori * z + z * phr
        dbi = det * br - 0.5 * bi + 0.5 * orr * z + z * phi
        dn = -n - (orr * bi - ori * br) - 2 * (br * phr + bi * phi)
        return jnp.stack([dbr, dbi, dn])

    return rhs


def _observe(y, obs_args):
    weights, gamma = obs_args
    beta = y[0] + 1j * y[1]
    n = y[2]
    f2, f4 = product_field_moments(beta, n, weights)
    r2, r4 = product_rate_moments(beta, n, gamma)
    return {"excited": n, "coherence": beta, "field2": f2, "field4": f4, "rate": r2, "rate4": r4}


def coupling_args(model: Model) -> dict[str, Any]:
    """The model's arrays as the JAX pytree the right-hand sides read."""
    J, G = model.device_couplings()
    if model.complex_couplings:
        args = {"J": J.real, "G": G.real, "Ji": J.imag, "Gi": G.imag}
    else:
        args = {"J": J, "G": G}
    om = model.rabi_sites
    args["omega"] = jnp.asarray(np.stack([om.real, om.imag]))
    args["detuning"] = jnp.asarray(model.detunings)
    return args


def bloch_to_state(initial: np.ndarray) -> jnp.ndarray:
    """(N, 3) Bloch vectors → mean-field state (Re β, Im β, n), β = (s_x − i s_y)/2, n = (1 + s_z)/2."""
    s = np.asarray(initial, dtype=float)
    return jnp.asarray(np.stack([s[:, 0] / 2, -s[:, 1] / 2, (1 + s[:, 2]) / 2]))


@register
class MeanField(Level):
    name = "meanfield"
    summary = "product state of classical dipoles (one-body moments); exact for N = 1 and weak drive"
    options = dict(ODE_OPTIONS)

    def memory_bytes(self, model: Model, options) -> int:
        # beyond the model's own J and Γ: real/imag splits of complex ones, one N×N temporary per save
        return 8 * model.n**2 * (5 if model.complex_couplings else 1)

    def _prepare(self, model: Model, probes: Probes, options):
        require(self.memory_bytes(model, options), f"mean field for {model.n} emitters")
        # "auto" is Tsit5: mean field's stiffness is the oscillation of J (docs/meanfield.md, Numerics)
        solver = pick_solver(options["solver"], 3 * model.n, model.stiffness(), implicit_ok=False)
        args = coupling_args(model)
        gamma = args["G"] + 1j * args["Gi"] if "Gi" in args else args["G"]
        return solver, args, (jnp.asarray(probes.weights), gamma)

    def evolve(self, model, times, initial, probes, seed, options) -> Moments:
        solver, args, obs_args = self._prepare(model, probes, options)
        rhs = meanfield_rhs(model.envelope)
        what = "mean-field evolution"
        obs, _, stats = solve(
            rhs, _observe, bloch_to_state(initial), args, obs_args, times, options, solver,
            jump_ts=model.envelope.jumps, what=what,
        )
        stats["bound_excess"] = _bound_excess(obs, what, options)
        return Moments(**obs, attrs=stats)

    def steady(self, model, probes, seed, options) -> Moments:
        solver, args, obs_args = self._prepare(model, probes, options)
        rhs = meanfield_rhs(model.envelope)
        y0 = bloch_to_state(np.tile([0.0, 0.0, -1.0], (model.n, 1)))
        y, info = settle(rhs, _observe, y0, args, obs_args, options, solver, what="mean-field steady state",
                         first_chunk=STEADY_FIRST_CHUNK, stability_size=STABILITY_SIZE)
        obs = observe_once(_observe, y, obs_args)
        return Moments(**obs, attrs={"solver": solver, **info})

    # one solve for a scan of the drive (beyondmf.drive_scan; levels._batch)
    def _batch_parts(self, models, probes, options):
        solver, _, obs_args = self._prepare(models[0], probes, options)
        rhs, observe = _batch.batched(meanfield_rhs(models[0].envelope), _observe)
        return solver, _batch.stack_args([coupling_args(m) for m in models]), obs_args, rhs, observe

    def evolve_batch(self, models, times, initial, probes, seed, options):
        def finish(one, attrs):
            excess = _bound_excess(one, "mean-field evolution", options)
            return Moments(**one, attrs={**attrs, "bound_excess": excess})

        size = _BATCH_BYTES * models[0].n
        return _batch.evolve_groups(models, times, bloch_to_state(initial), options, size,
                                    lambda g: self._batch_parts(g, probes, options), finish, "mean-field")

    def steady_batch(self, models, probes, seed, options):
        ground = bloch_to_state(np.tile([0.0, 0.0, -1.0], (models[0].n, 1)))
        return _batch.steady_groups(self, models, ground, probes, seed, options, _BATCH_BYTES * models[0].n,
                                    lambda g: self._batch_parts(g, probes, options),
                                    lambda one, attrs: Moments(**one, attrs=attrs), "mean-field",
                                    first_chunk=STEADY_FIRST_CHUNK, stability_size=STABILITY_SIZE)


# Bytes per emitter of one member of a batched solve: its state (3 N) and ~12 solver copies of it.
_BATCH_BYTES = 8 * 3 * 12

# The steady state integrates this long first (Γ0⁻¹), then looks for the fixed point by Newton's method
# and, up to STABILITY_SIZE unknowns, checks its stability (`integrate.settle`).
STEADY_FIRST_CHUNK = 20.0
STABILITY_SIZE = 1500


def _bound_excess(obs, what: str, options) -> float:
    """Mean field keeps every Bloch vector in the unit ball, |s_k|² = 4|β_k|² + (2n_k − 1)² ≤ 1 (each
    emitter obeys Bloch equations with a real decay and an effective drive, docs/meanfield.md); a run that
    leaves it by more than its error control allows warns (`integrate.check_bounds`)."""
    n, beta = np.asarray(obs["excited"]), np.asarray(obs["coherence"])
    length = np.sqrt(4 * np.abs(beta) ** 2 + (2 * n - 1) ** 2)
    return check_bounds(what, {"|s_k| ≤ 1 (Bloch ball)": float(np.max(length) - 1.0)}, options)
