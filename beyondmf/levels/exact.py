"""Level "exact": the Lindblad master equation of conventions.md for the full density matrix (small N).

With the non-Hermitian H_eff = H − (i/2) Σ_ij Γ_ij σ_i⁺σ_j⁻ the master equation reads

    dρ/dt = −i(H_eff ρ − ρ H_eff†) + 𝒥(ρ),      𝒥(ρ) = Σ_ij Γ_ij σ_j⁻ ρ σ_i⁺ = Σ_m γ_m L_m ρ L_m†

(Γ = U diag(γ) U†, L_m = Σ_j U_jm* σ_j⁻; the Γ_ij form is used directly, so no eigen-decomposition and no
clipping of round-off negative rates is needed). The right-hand side is matrix-free: ρ (2^N × 2^N, stored
as real and imaginary parts) is acted on by the single-site ladder operators as row/column gathers
(`_qubits`), and the couplings enter through one (N × N)·(N × 4^N) product, so a step costs O(N² 4^N)
instead of the O(16^N) of a dense Liouvillian. ρ H_eff† = (H_eff ρ)† because ρ is Hermitian.

Every observable is exact. With R = Σ_ij Γ_ij σ_i⁺σ_j⁻ (the emission-rate operator),

    rate = Tr(R ρ),    rate4 = Σ Γ_ij Γ_kl ⟨σ_i⁺σ_k⁺σ_l⁻σ_j⁻⟩ = Tr(R 𝒥(ρ)),

and the same with G_ij = w_i* w_j for a detector's field E = Σ_j w_j σ_j⁻ (field2 = ⟨E†E⟩,
field4 = Tr(E†E · EρE†)).

Steady state: for N ≤ 5 the stationary space is the null space of the Liouvillian on Hermitian matrices
(dense, built column by column from the right-hand side, SVD); its dimension is reported and a
dimension above one is refused. For larger N the state is found by integrating to convergence followed by a
Newton–GMRES polish (`integrate.settle`) from two different initial states (the ground state and the fully
mixed state); distinct limits reveal a non-unique steady state (a lower bound on its dimension).
"""

from __future__ import annotations

from typing import Any

import jax
import jax.numpy as jnp
import numpy as np
import scipy.linalg

from ..integrate import (
    ODE_OPTIONS,
    SolveError,
    check_bounds,
    hermitian_unit_trace,
    observe_once,
    per_envelope,
    pick_solver,
    settle,
    solve,
)
from ..memory import require
from ..model import Envelope, Model
from . import _qubits as q
from .base import Level, Moments, Probes, register

__all__ = ["Exact", "exact_rhs", "DENSE_MAX_N", "liouvillian_hermitian"]

DENSE_MAX_N = 5  # the dense Liouvillian (4^N × 4^N) is built only up to here (1024² entries at N = 5)
NULL_TOL = 1e-9  # relative singular-value threshold of the stationary space


def _model_args(model: Model) -> dict[str, Any]:
    """The arrays the right-hand side reads: C = J − Δ I − (i/2)Γ, Γ, Ω_i, and the site tables."""
    c = model.J - np.diag(model.detunings) - 0.5j * model.Gamma
    return {
        "C": jnp.asarray(c),
        "G": jnp.asarray(model.Gamma),
        "omega": jnp.asarray(model.rabi_sites.astype(complex)),
        "tab": q.site_tables(model.n),
    }


@per_envelope
def exact_rhs(envelope: Envelope):
    """The matrix-free Lindblad right-hand side for one envelope (cached: equal envelopes share a compile)."""
    def rhs(t, y, args):
        rho = y[0] + 1j * y[1]
        tab = args["tab"]
        half_om = 0.5 * envelope(t) * args["omega"]
        x, low = q.apply_heff(rho, args["C"], half_om, tab)  # H_eff ρ and σ_j⁻ρ (N, D, D)
        jump = q.raise_right(jnp.einsum("ij,jab->iab", args["G"], low), tab)
        d = -1j * (x - jnp.conj(x.T)) + jump
        return jnp.stack([d.real, d.imag])

    return rhs


def _sandwich(g, x, tab):
    """Σ_ij g_ij σ_j⁻ x σ_i⁺."""
    return q.raise_right(jnp.einsum("ij,jab->iab", g, q.lower(x, tab)), tab)


def _observe(y, obs_args):
    weights, gamma, tab = obs_args
    rho = y[0] + 1j * y[1]
    diag = jnp.real(jnp.diagonal(rho))
    excited = tab["occ"] @ diag
    idx = jnp.arange(rho.shape[0])
    coherence = jnp.sum(rho[tab["up"], idx[None, :]] * tab["empty"], axis=1)  # Tr(σ_j⁻ρ)

    def moments(g):
        two = jnp.real(q.pair_trace(g, rho, tab))
        four = jnp.real(q.pair_trace(g, _sandwich(g, rho, tab), tab))
        return two, four

    gd = jnp.conj(weights)[:, :, None] * weights[:, None, :]  # G^d_ij = w_i* w_j
    f2, f4 = jax.lax.map(moments, gd)
    r2, r4 = moments(gamma)
    return {"excited": excited, "coherence": coherence, "field2": f2, "field4": f4, "rate": r2, "rate4": r4}


def _bound_excess(obs, y_end, what: str, options) -> float:
    """How far the run broke the bounds a density matrix keeps (warned beyond the solver's control): ρ ≥ 0
    at the last time (smallest eigenvalue of the Hermitian, unit-trace state `solve` returns), and
    0 ≤ excited ≤ 1, |coherence| ≤ ½ at every time."""
    rho = np.asarray(y_end[0]) + 1j * np.asarray(y_end[1])
    excited, coherence = np.asarray(obs["excited"]), np.asarray(obs["coherence"])
    return check_bounds(what, {
        "ρ ≥ 0 (smallest eigenvalue at the last time)": float(-np.linalg.eigvalsh(rho)[0]),
        "0 ≤ excited ≤ 1": float(max(np.max(-excited), np.max(excited - 1.0))),
        "|coherence| ≤ 1/2": float(np.max(np.abs(coherence)) - 0.5),
    }, options)


def _memory(n: int) -> int:
    """Bytes of the solve: ~6 (N, D, D) complex intermediates and ~12 copies of the real state.

    An exact integer (4.0**n overflows a float at n ≥ 512), so that `memory.require` refuses at any N."""
    return 16 * 4**n * (6 * n + 12)


def liouvillian_hermitian(rhs, args, n: int) -> np.ndarray:
    """The Liouvillian restricted to Hermitian matrices, as a real 4^N × 4^N matrix (N ≤ DENSE_MAX_N).

    Coordinates: the real parts of ρ_ab (a ≤ b) and the imaginary parts of ρ_ab (a < b), scaled so that
    the basis is orthonormal in the Frobenius norm. Built column by column from the right-hand side.
    """
    d = 2**n
    iu = np.triu_indices(d)
    iu1 = np.triu_indices(d, 1)
    basis = []
    for (a, b) in zip(*iu, strict=True):
        e = np.zeros((2, d, d))
        s = 1.0 if a == b else 1 / np.sqrt(2)
        e[0, a, b] = e[0, b, a] = s
        basis.append(e)
    for (a, b) in zip(*iu1, strict=True):
        e = np.zeros((2, d, d))
        e[1, a, b], e[1, b, a] = 1 / np.sqrt(2), -1 / np.sqrt(2)
        basis.append(e)
    basis = np.stack(basis).reshape(len(basis), -1)  # (4^N, 2·D·D), orthonormal rows
    f = jax.jit(jax.vmap(lambda y: rhs(0.0, y.reshape(2, d, d), args).reshape(-1)))
    chunks = np.array_split(basis, max(1, len(basis) // 256))
    images = np.concatenate([np.asarray(f(jnp.asarray(c))) for c in chunks])
    return basis @ images.T  # L[r, c] = ⟨basis_r, L(basis_c)⟩


def _from_hermitian(v: np.ndarray, d: int) -> np.ndarray:
    """The (2, D, D) real state of the Hermitian coordinates ``v`` of `liouvillian_hermitian`."""
    iu = np.triu_indices(d)
    iu1 = np.triu_indices(d, 1)
    k = len(iu[0])
    re = np.zeros((d, d))
    re[iu] = v[:k] * np.where(iu[0] == iu[1], 1.0, 1 / np.sqrt(2))
    re = re + np.triu(re, 1).T
    im = np.zeros((d, d))
    im[iu1] = v[k:] / np.sqrt(2)
    return np.stack([re, im - im.T])


def _dense_steady(rhs, args, n: int):
    """The unique stationary ρ from the dense Hermitian Liouvillian, or ValueError with the dimension."""
    _, sv, vh = scipy.linalg.svd(liouvillian_hermitian(rhs, args, n))
    dim = int(np.sum(sv < NULL_TOL * max(float(sv[0]), 1.0)))
    if dim != 1:
        raise _non_unique(dim, n, exact=True)
    y = _from_hermitian(vh[-1], 2**n)
    y = jnp.asarray(y / np.trace(y[0]))
    residual = float(jnp.max(jnp.abs(rhs(0.0, y, args))))
    return y, {"stationary_dimension": 1, "residual": residual, "steady_method": "dense null space (SVD)",
               "smallest_singular_values": [float(v) for v in sv[-3:]]}


def _non_unique(dim: int, n: int, exact: bool) -> ValueError:
    what = f"is {dim}-dimensional" if exact else f"has dimension at least {dim}"
    return ValueError(
        f"the steady state of these {n} emitters is not unique: the stationary space {what} (dark "
        "states that the drive and the decay never reach, e.g. the antisymmetric states of a symmetric "
        "cluster). The steady state then depends on the initial state: use evolve() from the initial state "
        "of interest, or level 'dicke' for the permutation-symmetric sector of an all-to-all model"
    )


@register
class Exact(Level):
    name = "exact"
    summary = "full Lindblad density matrix (exact; small N: memory ~16·4^N·(6N + 12) bytes)"
    options = dict(ODE_OPTIONS)

    def memory_bytes(self, model: Model, options) -> int:
        return _memory(model.n)

    def _prepare(self, model: Model, probes: Probes, options):
        require(_memory(model.n), f"the exact density matrix of {model.n} emitters")
        solver = pick_solver(options["solver"], 2 * 4**model.n, model.stiffness())
        args = _model_args(model)
        obs_args = (jnp.asarray(probes.weights), jnp.asarray(model.Gamma), args["tab"])
        return solver, args, obs_args

    @staticmethod
    def _state(bloch: np.ndarray):
        rho = q.product_density(bloch)
        return jnp.asarray(np.stack([rho.real, rho.imag]))

    def evolve(self, model, times, initial, probes, seed, options) -> Moments:
        solver, args, obs_args = self._prepare(model, probes, options)
        rhs = exact_rhs(model.envelope)
        what = "exact density-matrix evolution"
        obs, y_end, stats = solve(
            rhs, _observe, self._state(initial), args, obs_args, times, options, solver,
            jump_ts=model.envelope.jumps, what=what, project=hermitian_unit_trace,
        )
        stats["bound_excess"] = _bound_excess(obs, y_end, what, options)
        return Moments(**obs, attrs=stats)

    def steady(self, model, probes, seed, options) -> Moments:
        solver, args, obs_args = self._prepare(model, probes, options)
        rhs = exact_rhs(model.envelope)
        if model.n <= DENSE_MAX_N:
            y, info = _dense_steady(rhs, args, model.n)
        else:
            y, info = self._settled_steady(model, rhs, args, obs_args, options, solver)
        obs = observe_once(_observe, y, obs_args)
        return Moments(**obs, attrs={"solver": solver, **info})

    def _settled_steady(self, model, rhs, args, obs_args, options, solver):
        n = model.n
        starts = {"ground": np.tile([0.0, 0.0, -1.0], (n, 1)), "fully mixed": np.zeros((n, 3))}
        found = {}
        for label, bloch in starts.items():
            try:
                found[label] = settle(rhs, _observe, self._state(bloch), args, obs_args, options, solver,
                                      project=hermitian_unit_trace, linear=True,
                                      what=f"exact steady state (from the {label} state)")
            except SolveError as err:
                raise SolveError(
                    f"{err}. A mode that never settles can also mean a non-unique steady state (dark states)"
                ) from err
        (ya, ia), (yb, _) = found.values()
        diff = float(jnp.max(jnp.abs(ya - yb)))
        if diff > 1e-6:
            raise _non_unique(2, n, exact=False)
        return ya, {**ia, "stationary_dimension": 1, "steady_method": "settle + Newton-GMRES from two states",
                    "steady_spread": diff}
