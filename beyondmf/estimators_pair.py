"""Two- and four-body moment sums of a state with pair correlations (the second-order cumulant rule).

Given the one-body moments β_i, n_i and, for i ≠ j, the pair moments A_ij = ⟨σ_i⁺σ_j⁻⟩, B_ij = ⟨σ_i⁻σ_j⁻⟩,
Z_ij = ⟨n_iσ_j⁻⟩, D_ij = ⟨n_in_j⟩, a moment of operators is evaluated by (1) reducing the products on each
emitter exactly by the spin-½ algebra (σ⁺σ⁺ = 0, σ⁺σ⁻ = n, ...), then (2) expanding the remaining moment of
operators on distinct emitters in cumulants with every third and fourth cumulant set to zero. With the
pair cumulants (zero diagonals)

    a = A − β*βᵀ,   b = B − ββᵀ,   z = Z − nβᵀ,   d = D − nnᵀ,

the sums over a Hermitian G (Γ for the total emission, G_ij = w_i* w_j for a detector) are the
product-state sums of `beyondmf.estimators` plus the pair-cumulant corrections

    Σ G_ij⟨σ_i⁺σ_j⁻⟩ = (product) + Σ G∘a
    Σ G_ij G_kl⟨σ_i⁺σ_k⁺σ_l⁻σ_j⁻⟩ = (product) + ΔF₂ + ΔF₃ + ΔF₄

from the two-, three- and four-emitter index patterns, each written with inclusion–exclusion over the
coincident indices (the full formulas are in docs/cumulant2.md). For a detector every term is O(N²)
(G has rank one); for Γ the few products G·X make it O(N³).
"""

from __future__ import annotations

import jax
import jax.numpy as jnp

from .estimators import product_field_moments, product_rate_moments

__all__ = ["pair_field_moments", "pair_rate_moments", "pair_corrections"]


def _mm(G, X):
    """G @ X with real products where G is real (complex matrix products are slower here)."""
    if jnp.iscomplexobj(G):
        return G @ X
    return G @ X.real + 1j * (G @ X.imag)


def _mm_right(X, G):
    if jnp.iscomplexobj(G):
        return X @ G
    return X.real @ G + 1j * (X.imag @ G)


def pair_corrections(G, left, right, right_t, beta, n, a, b, z, d):
    """Pair-cumulant corrections (Δ two-body, Δ four-body) for the sums over G (docs/cumulant2.md).

    G: (N, N) Hermitian; ``left(X) = G@X``, ``right(X) = X@G``, ``right_t(X) = X@Gᵀ`` (so that a rank-one
    G stays O(N²)); a, b, z, d: pair cumulants with zero diagonals.
    """
    g = jnp.real(jnp.diagonal(G))
    bc = jnp.conj(beta)
    b2 = jnp.abs(beta) ** 2
    be2 = beta**2
    y = G @ beta
    yc = jnp.conj(y)
    P = jnp.real(jnp.sum(bc * y))
    Q = P - jnp.sum(g * b2)
    G2 = jnp.abs(G) ** 2
    gg = g[:, None] * g[None, :]
    Ga = G * a
    SGa = jnp.sum(Ga)
    s, sp = Ga.sum(axis=1), Ga.sum(axis=0)
    Gt = G.T

    # two emitters: ⟨n_i n_k⟩ with weight G_iiG_kk + G_ikG_ki
    dF2 = jnp.sum((gg + G2) * d)

    # three emitters: 2(G_ss G_pq + G_ps G_sq)⟨n_s σ_p⁺ σ_q⁻⟩, s, p, q distinct
    gn = g * n
    t3a = jnp.sum(gn) * SGa + jnp.sum(a * left(n[:, None] * G)) - 2 * (jnp.sum(s * gn) + jnp.sum(sp * gn))
    t3b = jnp.sum(g[:, None] * z * (yc[None, :] - bc[:, None] * G - (bc * g)[None, :])) + jnp.sum(
        z * G * (yc[:, None] - (bc * g)[:, None] - bc[None, :] * Gt)
    )
    dF3 = 2 * (jnp.real(t3a) + 2 * jnp.real(t3b))

    # four distinct emitters: the pair partitions of (σ_i⁺, σ_k⁺, σ_l⁻, σ_j⁻)
    h = 2 * jnp.real(bc * y) - 2 * g * b2
    t_a1 = Q * SGa - jnp.sum(s * h) - jnp.sum(sp * h)
    t_a1 = t_a1 + jnp.sum(Ga * 2 * jnp.real(bc[:, None] * G * beta[None, :]))
    e = y[:, None] - (g * beta)[:, None] - G * beta[None, :]  # Σ_{j∉{i,l}} G_ij β_j
    f = yc[None, :] - (g * bc)[None, :] - bc[:, None] * G  # Σ_{k∉{i,l}} β_k* G_kl
    t_a2 = jnp.sum(a * (e * f - left(b2[:, None] * G) + (g * b2)[:, None] * G + G * (b2 * g)[None, :]))
    t_b1 = jnp.sum(
        jnp.conj(b) * (e * e.T - left(be2[:, None] * Gt) + (g * be2)[:, None] * Gt + G * (be2 * g)[None, :])
    )
    rb = right(jnp.conj(b))
    sig = jnp.sum(G * b, axis=1)
    t_bb = (
        jnp.sum(rb * left(b))
        - 2 * jnp.sum(g * jnp.sum(rb * b, axis=1))
        - 2 * jnp.sum(jnp.abs(sig) ** 2)
        + jnp.sum((gg + G2) * jnp.abs(b) ** 2)
    )
    common = jnp.sum(s**2) + jnp.sum(sp**2) - jnp.sum(G**2 * a**2)
    t_aa1 = (
        jnp.sum(left(a.T) * right_t(a))
        - 2 * jnp.sum(g * jnp.sum(right(a.T) * a, axis=1))
        + jnp.sum(gg * a * a.T)
        - common
    )
    t_aa2 = SGa**2 - 2 * jnp.sum(s * sp) + jnp.sum(Ga * Ga.T) - common
    dF4 = jnp.real(2 * t_b1 + 2 * t_a2 + 2 * t_a1 + t_bb + t_aa1 + t_aa2)
    return jnp.real(SGa), dF2 + dF3 + dF4


def _cumulants(beta, n, A, B, Z, D):
    idx = jnp.arange(beta.shape[-1])

    def off(x):
        return x.at[idx, idx].set(0)

    return (
        off(A - jnp.conj(beta)[:, None] * beta[None, :]),
        off(B - beta[:, None] * beta[None, :]),
        off(Z - n[:, None] * beta[None, :]),
        off(D - n[:, None] * n[None, :]),
    )


def pair_rate_moments(beta, n, A, B, Z, D, gamma):
    """Σ Γ_ij⟨σ_i⁺σ_j⁻⟩ and Σ Γ_ijΓ_kl⟨σ_i⁺σ_k⁺σ_l⁻σ_j⁻⟩ under the second-order cumulant rule. O(N³)."""
    two, four = product_rate_moments(beta, n, gamma)
    cum = _cumulants(beta, n, A, B, Z, D)
    gt = gamma.T
    d2, d4 = pair_corrections(
        gamma, lambda X: _mm(gamma, X), lambda X: _mm_right(X, gamma), lambda X: _mm_right(X, gt),
        beta, n, *cum,
    )
    return two + d2, four + d4


def pair_field_moments(beta, n, A, B, Z, D, weights):
    """⟨E_d†E_d⟩ and ⟨E_d†E_d†E_dE_d⟩, E_d = Σ_j weights[d, j]σ_j⁻, under the second-order cumulant rule.

    One detector at a time (`jax.lax.map`), each O(N²) in time and memory. Returns two (D,) real arrays.
    """
    two, four = product_field_moments(beta, n, weights)
    cum = _cumulants(beta, n, A, B, Z, D)

    def one(w):
        wc = jnp.conj(w)
        G = wc[:, None] * w[None, :]
        return pair_corrections(
            G,
            lambda X: wc[:, None] * (w @ X)[None, :],
            lambda X: (X @ wc)[:, None] * w[None, :],
            lambda X: (X @ w)[:, None] * wc[None, :],
            beta, n, *cum,
        )

    d2, d4 = jax.lax.map(one, weights)
    return two + d2, four + d4
