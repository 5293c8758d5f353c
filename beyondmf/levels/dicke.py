"""Level "dicke": exact dynamics of a permutation-symmetric model in the symmetric space J = N/2.

With all-to-all couplings (Γ_ij = 1, J_ij = 0), a uniform drive Ω_i = Ω and a symmetric initial state
(a spin-coherent state: every emitter in the same pure state), the state never leaves the N + 1 Dicke
states |J, M⟩, k = J + M = 0 … N excitations (R. H. Dicke, Phys. Rev. 93, 99 (1954); M. Gross and
S. Haroche, Phys. Rep. 93, 301 (1982)). With J⁻|k⟩ = a_k|k − 1⟩, a_k² = (J + M)(J − M + 1) = k(N − k + 1),

    dρ/dt = −i(H_eff ρ − ρ H_eff†) + J⁻ρJ⁺,   H_eff = −Δ k̂ + ½(Ω J⁺ + Ω* J⁻) − (i/2) J⁺J⁻,

on the (N + 1) × (N + 1) density matrix, stored as real and imaginary parts. J^± are one off-diagonal
each, so a right-hand side costs O(N²): N of several thousand is practical.

Observables. In a permutation-symmetric state every moment depends only on which sites coincide:
n = ⟨σ_i⁺σ_i⁻⟩, a = ⟨σ_i⁺σ_j⁻⟩, c2 = ⟨n_i n_j⟩, c3 = ⟨n_i σ_j⁺σ_k⁻⟩, c4 = ⟨σ_i⁺σ_j⁺σ_k⁻σ_l⁻⟩ (distinct
sites). They follow from the ladder: with p_k = ρ_kk,

    ⟨k̂⟩ = N n,   ⟨J⁺J⁻⟩ = N n + N(N−1) a,   ⟨k̂²⟩ = N n + N(N−1) c2,
    ⟨J⁺k̂J⁻⟩ = N(N−1) c2 + N(N−1)(N−2) c3,
    ⟨J⁺J⁺J⁻J⁻⟩ = 2N(N−1) c2 + 4N(N−1)(N−2) c3 + N(N−1)(N−2)(N−3) c4,

(σ⁺n = nσ⁻ = 0 on one site removes the coincident terms). For a detector E = Σ_j w_j σ_j⁻, with
S1 = Σw_j, S2 = Σ|w_j|², S4 = Σ|w_j|⁴, T2 = Σw_j², summing the coincidence patterns of (i, k; l, j) gives

    ⟨E†E⟩ = n S2 + a (|S1|² − S2),
    ⟨E†E†EE⟩ = c2 P2 + c3 P3 + c4 (|S1² − T2|² − P2 − P3),
    P2 = 2(S2² − S4),  P3 = 4 Σ_i |w_i|² (|S1 − w_i|² − S2 + |w_i|²).

The emission rate and its four-body sum are ⟨J⁺J⁻⟩ and ⟨J⁺J⁺J⁻J⁻⟩ (Γ_ij = 1). Derivation: docs/exact.md.
"""

from __future__ import annotations

import jax
import jax.numpy as jnp
import numpy as np
from scipy.special import gammaln

from ..integrate import (
    IMPLICIT_MAX_SIZE,
    ODE_OPTIONS,
    STIFF_RATIO,
    hermitian_unit_trace,
    observe_once,
    per_envelope,
    pick_solver,
    settle,
    solve,
)
from ..memory import require
from ..model import Envelope, Model
from .base import Level, Moments, Probes, register

__all__ = ["Dicke", "dicke_rhs", "dicke_band_rhs", "coherent_state", "symmetry_breaks"]


def symmetry_breaks(model: Model, atol: float = 1e-10) -> list[str]:
    """The permutation symmetries ``model`` breaks (empty when the Dicke space is closed under it)."""
    off = ~np.eye(model.n, dtype=bool)
    broken = []
    if not np.allclose(model.Gamma, 1.0, atol=atol):
        broken.append(
            "the decay is not all-to-all (Γ_ij = 1 for every pair is needed; use coupling='all-to-all')"
        )
    if not np.allclose(model.J[off], 0.0, atol=atol):
        broken.append("the exchange J_ij is not zero for every pair")
    om = model.rabi_sites
    if not np.allclose(om, om[0], atol=atol * max(1.0, abs(om[0]))):
        broken.append(
            "the drive is not uniform (Ω_i = Ω e^{i2π l̂·r_i}, or a beam's Ω u(r_i), differs between "
            "emitters: put every emitter in the same plane l̂·r = const mod 1, e.g. all at the origin, with a "
            "plane wave)"
        )
    if not model.uniform_detuning:
        broken.append("the detuning differs between emitters (inhomogeneous broadening breaks the exchange "
                      "symmetry of the Dicke space; use 'exact', 'jumps' or 'cumulant2')")
    return broken


def _ladder(n: int) -> np.ndarray:
    k = np.arange(n + 1)
    return np.sqrt(k * (n - k + 1.0))  # a_k, J⁻|k⟩ = a_k |k − 1⟩


def _shift(x, dk: int, dl: int):
    """y[k, l] = x[k + dk, l + dl], zero outside (dk, dl ∈ {−1, 0, 1})."""
    pad = ((max(-dk, 0), max(dk, 0)), (max(-dl, 0), max(dl, 0)))
    big = jnp.pad(x, pad)
    m, n = x.shape
    return jax.lax.dynamic_slice(big, (max(dk, 0), max(dl, 0)), (m, n))


@per_envelope
def dicke_rhs(envelope: Envelope):
    """The symmetric-space right-hand side for one envelope (cached: equal envelopes share a compile)."""
    def rhs(t, y, args):
        # every term is elementwise on ρ_kl or a shift of it (J^± are one off-diagonal): no transposes
        rho = y[0] + 1j * y[1]
        a, k = args["a"], args["k"]
        col = a[:, None]  # a_k along rows
        row = a[None, :]  # a_l along columns
        a_next = jnp.append(a[1:], 0.0)  # a_{k+1}
        half_om = 0.5 * envelope(t) * args["omega"]
        d = -args["detuning"] * k - 0.5j * a**2  # H_eff on the diagonal
        out = -1j * (d[:, None] - jnp.conj(d)[None, :]) * rho
        # drive: −i[½Ω J⁺ + ½Ω* J⁻, ρ]
        om, omc = half_om, jnp.conj(half_om)
        hd_rho = om * col * _shift(rho, -1, 0) + omc * a_next[:, None] * _shift(rho, 1, 0)
        rho_hd = om * a_next[None, :] * _shift(rho, 0, 1) + omc * row * _shift(rho, 0, -1)
        out = out - 1j * (hd_rho - rho_hd)
        # (J⁻ρJ⁺)_kl = a_{k+1} a_{l+1} ρ_{k+1,l+1}
        out = out + a_next[:, None] * a_next[None, :] * _shift(rho, 1, 1)
        return jnp.stack([out.real, out.imag])

    return rhs


def dicke_band_rhs(t, y, args):
    """Without a drive each band ρ_{k,k−q} evolves on its own; bands q = 0, 1 carry every observable.

    y = (re/im, band q = 0 | 1, k): p_k = ρ_kk and b_k = ρ_{k,k−1} (b_0 = 0):
        dp_k/dt = −a_k² p_k + a_{k+1}² p_{k+1},
        db_k/dt = −i(d_k − d_{k−1}*) b_k + a_{k+1} a_k b_{k+1},   d_k = −Δk − (i/2) a_k².
    """
    z = y[0] + 1j * y[1]
    a, k = args["a"], args["k"]
    d = -args["detuning"] * k - 0.5j * a**2
    a_next = jnp.append(a[1:], 0.0)
    nxt = jnp.concatenate([z[:, 1:], jnp.zeros_like(z[:, :1])], axis=1)  # x_{k+1}
    d_prev = jnp.concatenate([jnp.zeros(1), d[:-1]])
    dp = -(a**2) * z[0] + a_next**2 * nxt[0]
    db = -1j * (d - jnp.conj(d_prev)) * z[1] + a_next * a * nxt[1]
    out = jnp.stack([dp, db.at[0].set(0.0)])
    return jnp.stack([out.real, out.imag])


def _observe(y, obs_args):
    """Moments of a full (2, N+1, N+1) state."""
    z = y[0] + 1j * y[1]
    sub = jnp.concatenate([jnp.zeros(1, dtype=z.dtype), jnp.diagonal(z, offset=-1)])
    return _moments(jnp.real(jnp.diagonal(z)), sub, obs_args)


def _observe_band(y, obs_args):
    """Moments of a band (2, 2, N+1) state of `dicke_band_rhs`."""
    return _moments(y[0, 0], y[0, 1] + 1j * y[1, 1], obs_args)


def _moments(p, sub, obs_args):
    """Moments from the populations p_k and the first sub-diagonal ρ_{k,k−1} (module docstring)."""
    weights, a, k = obs_args
    n = k.shape[0] - 1
    a2 = a**2
    mean_k = jnp.sum(k * p)
    rate = jnp.sum(a2 * p)
    rate4 = jnp.sum(a2 * jnp.concatenate([jnp.zeros(1), a2[:-1]]) * p)
    jkj = jnp.sum(a2 * (k - 1) * p)
    k2 = jnp.sum(k**2 * p)
    coh = jnp.sum(a * sub) / n  # Tr(J⁻ρ) = Σ_k a_k ρ_{k,k−1}

    def per(count, value):  # a moment per site pattern; zero when the pattern does not exist (small N)
        return jnp.where(count > 0, value / jnp.where(count > 0, count, 1.0), 0.0)

    pairs, triples, quads = n * (n - 1.0), n * (n - 1.0) * (n - 2.0), n * (n - 1.0) * (n - 2.0) * (n - 3.0)
    exc = mean_k / n
    pair = per(pairs, rate - mean_k)
    c2 = per(pairs, k2 - mean_k)
    c3 = per(triples, jkj - pairs * c2)
    c4 = per(quads, rate4 - 2 * pairs * c2 - 4 * triples * c3)

    s1 = jnp.sum(weights, axis=1)
    aw = jnp.abs(weights) ** 2
    s2 = jnp.sum(aw, axis=1)
    s4 = jnp.sum(aw**2, axis=1)
    t2 = jnp.sum(weights**2, axis=1)
    p2 = 2 * (s2**2 - s4)
    p3 = 4 * jnp.sum(aw * (jnp.abs(s1[:, None] - weights) ** 2 - s2[:, None] + aw), axis=1)
    p4 = jnp.abs(s1**2 - t2) ** 2 - p2 - p3
    field2 = exc * s2 + pair * (jnp.abs(s1) ** 2 - s2)
    field4 = c2 * p2 + c3 * p3 + c4 * p4
    ones = jnp.ones(weights.shape[1])
    return {"excited": exc * ones, "coherence": coh * ones, "field2": field2, "field4": field4,
            "rate": rate, "rate4": rate4}


def coherent_state(n: int, bloch: np.ndarray) -> np.ndarray:
    """Amplitudes over k = 0 … N of the spin-coherent state with every emitter at the unit Bloch vector.

    c_k = √(N choose k) a_g^{N−k} a_e^k with a_g = √((1 − s_z)/2), a_e = √((1 + s_z)/2) e^{−iφ},
    s_x − i s_y = |s_⊥| e^{−iφ} (the single-emitter state of `_qubits.site_amplitudes`); logs avoid
    overflow at large N.
    """
    sx, sy, sz = (float(c) for c in bloch)
    k = np.arange(n + 1)
    with np.errstate(divide="ignore", invalid="ignore"):  # log 0 = −inf, masked below
        log_g = 0.5 * np.log(max((1 - sz) / 2, 0.0))
        log_e = 0.5 * np.log(max((1 + sz) / 2, 0.0))
        logs = 0.5 * (gammaln(n + 1) - gammaln(k + 1) - gammaln(n - k + 1))
        logs = logs + np.where(k < n, (n - k) * log_g, 0.0) + np.where(k > 0, k * log_e, 0.0)
    phi = -np.angle(sx - 1j * sy) if abs(sx - 1j * sy) > 0 else 0.0
    amp = np.exp(logs) * np.exp(-1j * phi * k)
    return amp / np.linalg.norm(amp)


@register
class Dicke(Level):
    name = "dicke"
    summary = "exact symmetric (J = N/2) space of an all-to-all, uniformly driven model; N of thousands"
    options = dict(ODE_OPTIONS)

    def check(self, model: Model) -> None:
        broken = symmetry_breaks(model)
        if broken:
            raise ValueError(
                "level 'dicke' needs a permutation-symmetric model, but " + "; ".join(broken)
                + ". Use level 'exact' (small N) or 'jumps' for this model"
            )

    def memory_bytes(self, model: Model, options, band: bool = False) -> int:
        """The full symmetric-space density matrix (the dynamics), or its band (a steady state of a
        constant uniform drive, ``band``), with ~16 copies in the solver."""
        size = 4 * (model.n + 1) if band else 2 * (model.n + 1) ** 2
        return 8 * size * 16

    def _prepare(self, model: Model, probes: Probes, options, band: bool = False):
        n = model.n
        size = 4 * (n + 1) if band else 2 * (n + 1) ** 2
        what = "band" if band else "density matrix"
        require(self.memory_bytes(model, options, band), f"the symmetric-space {what} of {n} emitters")
        solver = options["solver"]
        if solver == "auto":
            # the ladder's fastest rate is ~N²/4 (mid-ladder), far above model.stiffness() = N/2
            # (the band form is O(N) per step: many explicit steps stay cheaper than an implicit solve)
            stiff = n * n / 4 > STIFF_RATIO and size <= IMPLICIT_MAX_SIZE and not band
            solver = "Kvaerno5" if stiff else "Tsit5"
        solver = pick_solver(solver, size, 0.0)
        a = jnp.asarray(_ladder(n))
        k = jnp.arange(n + 1, dtype=float)
        args = {"a": a, "k": k, "omega": jnp.asarray(complex(model.rabi_sites[0])),
                "detuning": jnp.asarray(model.detuning)}
        return solver, args, (jnp.asarray(probes.weights), a, k)

    def evolve(self, model, times, initial, probes, seed, options) -> Moments:
        s = np.asarray(initial, dtype=float)
        if not np.allclose(s, s[0], atol=1e-12):
            raise ValueError(
                "level 'dicke' needs a symmetric initial state: every emitter with the same Bloch vector "
                "(the initial Bloch vectors differ between emitters)"
            )
        if abs(np.linalg.norm(s[0]) - 1) > 1e-9:
            raise ValueError(
                "level 'dicke' needs a pure initial state (a spin-coherent state, |s| = 1); the Bloch "
                f"vector has length {np.linalg.norm(s[0]):.6g}. A mixed product state leaves the symmetric "
                "space: use level 'exact' or 'jumps'"
            )
        # without a drive only the bands q = 0, 1 of ρ matter: O(N) instead of O(N²) (dicke_band_rhs)
        band = model.rabi == 0
        solver, args, obs_args = self._prepare(model, probes, options, band=band)
        c = coherent_state(model.n, s[0])
        if band:
            sub = np.concatenate([[0.0], c[1:] * np.conj(c[:-1])])
            z = np.stack([np.abs(c) ** 2 + 0j, sub])
            rhs, observe = dicke_band_rhs, _observe_band
        else:
            z = np.outer(c, np.conj(c))
            rhs, observe = dicke_rhs(model.envelope), _observe
        y0 = jnp.asarray(np.stack([z.real, z.imag]))
        obs, _, stats = solve(
            rhs, observe, y0, args, obs_args, times, options, solver,
            jump_ts=model.envelope.jumps, what="Dicke-space evolution",
        )
        stats["representation"] = "bands q = 0, 1 (no drive)" if band else "full density matrix"
        return Moments(**obs, attrs=stats)

    def steady(self, model, probes, seed, options) -> Moments:
        solver, args, obs_args = self._prepare(model, probes, options)
        y0 = np.zeros((2, model.n + 1, model.n + 1))
        y0[0, 0, 0] = 1.0  # the ground state (k = 0), inside the symmetric space
        rhs = dicke_rhs(model.envelope)
        y, info = settle(rhs, _observe, jnp.asarray(y0), args, obs_args, options, solver,
                         project=hermitian_unit_trace, linear=True, what="Dicke-space steady state")
        obs = observe_once(_observe, y, obs_args)
        return Moments(**obs, attrs={"solver": solver, **info})

