"""Two- and four-body moment sums of a product state, exact to the spin-½ algebra.

For a product state every multi-site moment is a sum over set partitions of the operator positions,
each block contributing the *local* joint cumulant of its operators on one site (blocks spanning two
sites vanish). The local normal-ordered moments of site i are ⟨σ⁺⟩ = β*, ⟨σ⁻⟩ = β, ⟨σ⁺σ⁻⟩ = n and zero
for any product holding σ⁺σ⁺ or σ⁻σ⁻; their cumulants are

    κ11 = n − |β|²,  κ20 = −β*²,  κ21 = −2β* κ11,  κ22 = −2n² + 8n|β|² − 6|β|⁴   (κ02 = κ20*, κ12 = κ21*).

Summing the 15 partitions of (σ_i⁺, σ_k⁺, σ_l⁻, σ_j⁻) against G_ij G_kl with y = Gβ gives, for any
Hermitian G (Γ for the total emission, G_ij = w_i* w_j for a detector's field E = Σ w_j σ_j⁻),

    Σ G_ij ⟨σ_i⁺σ_j⁻⟩ = P + t,   P = β†Gβ,  t = Σ G_ii κ11_i,
    Σ G_ij G_kl ⟨σ_i⁺σ_k⁺σ_l⁻σ_j⁻⟩ = P² + 2tP + t² + 2Σ κ11|y|² + 2Re Σ κ20 y² + 4Re Σ G_ii κ21 y
                                   + Σ G_ii² κ22 + Σ |G_ij|² κ11_i κ11_j + Σ G_ij² κ20_i κ20_j* .

The derivation is written out in docs/observables.md. One emitter gives ⟨σ⁺σ⁺σ⁻σ⁻⟩ = 0 exactly
(antibunching), N inverted emitters with G = 1 give N(N−1)·2: the checks in tests/test_estimators.py.
"""

from __future__ import annotations

import jax.numpy as jnp

__all__ = ["product_field_moments", "product_rate_moments", "local_cumulants"]


def local_cumulants(beta, n):
    """κ11, κ20, κ21, κ22 of each site of a product state (see the module docstring)."""
    b2 = jnp.abs(beta) ** 2
    k11 = n - b2
    k20 = -jnp.conj(beta) ** 2
    k21 = -2 * jnp.conj(beta) * k11
    k22 = -2 * n**2 + 8 * n * b2 - 6 * b2**2
    return k11, k20, k21, k22


def _partition_sums(beta, y, dG, q_abs, q_sq, kappas):
    k11, k20, k21, k22 = kappas
    P = jnp.real(jnp.sum(jnp.conj(beta) * y, axis=-1))
    t = jnp.sum(dG * k11, axis=-1)
    two = P + t
    four = (
        (P + t) ** 2
        + 2 * jnp.sum(k11 * jnp.abs(y) ** 2, axis=-1)
        + 2 * jnp.real(jnp.sum(k20 * y**2, axis=-1))
        + 4 * jnp.real(jnp.sum(dG * k21 * y, axis=-1))
        + jnp.sum(dG**2 * k22, axis=-1)
        + q_abs
        + q_sq
    )
    return two, four


def product_field_moments(beta, n, weights):
    """⟨E_d†E_d⟩ and ⟨E_d†E_d†E_dE_d⟩ for E_d = Σ_j weights[d, j] σ_j⁻ in a product state.

    beta, n: (N,) one-body moments; weights: (D, N). Returns two (D,) real arrays. Cost O(DN).
    """
    kap = local_cumulants(beta, n)
    s = weights @ beta  # (D,)
    y = jnp.conj(weights) * s[:, None]  # (G β)_i for G_ij = w_i* w_j
    dG = jnp.abs(weights) ** 2
    q_abs = jnp.sum(dG * kap[0], axis=-1) ** 2
    q_sq = jnp.abs(jnp.sum(jnp.conj(weights) ** 2 * kap[1], axis=-1)) ** 2
    return _partition_sums(beta, y, dG, q_abs, q_sq, kap)


def product_rate_moments(beta, n, gamma):
    """Σ Γ_ij⟨σ_i⁺σ_j⁻⟩ and Σ Γ_ij Γ_kl⟨σ_i⁺σ_k⁺σ_l⁻σ_j⁻⟩ in a product state; gamma (N, N) Hermitian."""
    kap = local_cumulants(beta, n)
    k11, k20 = kap[0], kap[1]
    dG = jnp.real(jnp.diagonal(gamma))
    if jnp.iscomplexobj(gamma):
        y = gamma @ beta
        q_abs = k11 @ (jnp.abs(gamma) ** 2 @ k11)
        q_sq = jnp.real(k20 @ ((gamma**2) @ jnp.conj(k20)))
    else:
        # Real Γ: no complex copy of the N×N matrix, and |Γ|² = Γ² is one temporary read once, so a
        # save point costs two passes over N² numbers (the memory need at large N is set by these).
        yr = gamma @ jnp.stack([beta.real, beta.imag], axis=1)
        y = yr[:, 0] + 1j * yr[:, 1]
        q = (gamma * gamma) @ jnp.stack([k11, k20.real, k20.imag], axis=1)
        q_abs = k11 @ q[:, 0]
        q_sq = k20.real @ q[:, 1] + k20.imag @ q[:, 2]
    return _partition_sums(beta, y, dG, q_abs, q_sq, kap)
