"""Single-site spin operators on the 2^N space as gathers over basis indices (shared by "exact", "jumps").

Basis index a = Σ_j b_j 2^{N−1−j} with b_j = 1 when emitter j is excited (so a Kronecker product over the
emitters in order gives the same index). σ_j⁻ = |g⟩⟨e| on site j maps |a⟩ to |a − 2^{N−1−j}⟩ when b_j = 1.
Applying σ_j⁻ for every j at once is one gather of the rows (no loop over emitters): with
up_j(a) = a | bit_j and empty_j(a) = [b_j(a) = 0],

    (σ_j⁻ X)[a, ·] = empty_j(a) X[up_j(a), ·],     (σ_j⁺ X)[a, ·] = full_j(a) X[down_j(a), ·],
    (X σ_j⁺)[·, b] = empty_j(b) X[·, up_j(b)].

so a collective operator Σ_ij C_ij σ_i⁺σ_j⁻ acting on X costs one (N × N)·(N × D·D) product. The same
tables serve a density matrix (D, D) and a batch of wave functions (D,).
"""

from __future__ import annotations

import jax
import jax.numpy as jnp
import numpy as np

__all__ = ["site_tables", "lower", "raise_left", "raise_right", "pair_trace", "apply_heff",
           "site_amplitudes", "product_amplitudes", "product_density"]


def site_tables(n: int) -> dict[str, jnp.ndarray]:
    """Index tables of the N single-site ladder operators on the 2^N basis (see module docstring)."""
    d = 2**n
    a = np.arange(d)
    bit = (1 << (n - 1 - np.arange(n)))[:, None]
    occ = (a[None, :] & bit) != 0
    return {
        "up": jnp.asarray(a[None, :] | bit, dtype=jnp.int32),
        "down": jnp.asarray(a[None, :] & ~bit, dtype=jnp.int32),
        "empty": jnp.asarray(~occ, dtype=float),
        "occ": jnp.asarray(occ, dtype=float),
    }


def _bcast(mask, x):
    return mask.reshape(mask.shape + (1,) * (x.ndim - 1))


def lower(x, tab):
    """(σ_j⁻ x) for every site j: (D, ...) → (N, D, ...)."""
    return x[tab["up"]] * _bcast(tab["empty"], x)


def raise_left(w, tab):
    """Σ_j σ_j⁺ w_j: (N, D, ...) → (D, ...)."""
    picked = jax.vmap(lambda wj, dj: wj[dj])(w, tab["down"])
    return jnp.sum(picked * _bcast(tab["occ"], w[0]), axis=0)


def raise_right(w, tab):
    """Σ_j w_j σ_j⁺ for matrices: (N, D, D) → (D, D)."""
    picked = jax.vmap(lambda wj, uj: wj[:, uj])(w, tab["up"])
    return jnp.sum(picked * tab["empty"][:, None, :], axis=0)


def pair_trace(g, x, tab):
    """Σ_ij g_ij Tr(σ_i⁺σ_j⁻ x) for a (D, D) matrix x: Tr(σ_i⁺ W_i) with W = g·(σ⁻x)."""
    w = jnp.einsum("ij,jab->iab", g, lower(x, tab))
    diag = jax.vmap(lambda wi, ui: wi[jnp.arange(wi.shape[0]), ui])(w, tab["up"])
    return jnp.sum(diag * tab["empty"])


def apply_heff(x, c, half_om, tab):
    """(H_eff x, σ⁻x) for H_eff = Σ_ij C_ij σ_i⁺σ_j⁻ + Σ_i (½Ω_i σ_i⁺ + ½Ω_i* σ_i⁻), x of shape (D, ...).

    C = J − ΔI − (i/2)Γ holds detuning, exchange and the decay's anti-Hermitian part; half_om = ½Ω_i(t).
    """
    low = lower(x, tab)
    w = jnp.einsum("ij,j...->i...", c, low) + half_om.reshape((-1,) + (1,) * x.ndim) * x[None]
    return raise_left(w, tab) + jnp.einsum("i,i...->...", jnp.conj(half_om), low), low


def site_amplitudes(bloch):
    """Amplitudes (a_g, a_e) per emitter, shape (N, 2), of the pure states with unit Bloch vectors ``bloch``.

    a_g = √((1 − s_z)/2) real and a_e = √((1 + s_z)/2) e^{−iφ} with s_x − i s_y = |s_⊥| e^{−iφ}, so that
    ⟨σ⁻⟩ = a_g* a_e = (s_x − i s_y)/2 and ⟨σ⁺σ⁻⟩ = (1 + s_z)/2.
    """
    s = jnp.asarray(bloch)
    ag = jnp.sqrt(jnp.clip((1 - s[:, 2]) / 2, 0, 1))
    ae = jnp.sqrt(jnp.clip((1 + s[:, 2]) / 2, 0, 1))
    perp = s[:, 0] - 1j * s[:, 1]
    mag = jnp.abs(perp)
    phase = jnp.where(mag > 1e-300, perp / jnp.where(mag > 1e-300, mag, 1.0), 1.0)
    return jnp.stack([ag + 0j, ae * phase], axis=1)


def product_amplitudes(bloch, tab):
    """State vector (2^N,) of the pure product state with unit Bloch vectors ``bloch`` (N, 3), in JAX."""
    amp = site_amplitudes(bloch)
    return jnp.prod(jnp.where(tab["occ"] > 0, amp[:, 1:2], amp[:, 0:1]), axis=0)


def product_density(bloch: np.ndarray) -> np.ndarray:
    """Density matrix (2^N, 2^N) of the product state ⊗_j ½(1 + s_j·σ), mixed allowed (|s_j| ≤ 1)."""
    rho = np.ones((1, 1), dtype=complex)
    for sx, sy, sz in np.asarray(bloch, dtype=float):
        beta = (sx - 1j * sy) / 2  # ρ_eg = ⟨σ⁻⟩
        site = np.array([[(1 - sz) / 2, np.conj(beta)], [beta, (1 + sz) / 2]])
        rho = np.kron(rho, site)
    return rho
