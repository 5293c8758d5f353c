"""Dipole-dipole couplings J (coherent exchange) and Γ (collective decay) of conventions.md.

Vector (free space): with ξ = 2π|r_ij| and r̂ = r_ij/|r_ij|,

    J_ij = −(3/4) ê*·Re𝔊·ê ,   Γ_ij = (3/2) ê*·Im𝔊·ê ,
    𝔊 = (e^{iξ}/ξ)[(1 + (iξ − 1)/ξ²) I + ((3 − 3iξ − ξ²)/ξ²) r̂r̂] .

Because 𝔊 = a I + b r̂r̂ with real r̂, ê*·Re𝔊·ê = Re a + Re b |ê·r̂|², and J, Γ are real symmetric for
every (even complex) unit dipole ê. Source: R. H. Lehmberg, Phys. Rev. A 2, 883 (1970); Z. Ficek and
R. Tanaś, Phys. Rep. 372, 369 (2002).

Scalar: Γ_ij = sin ξ/ξ, J_ij = −½ cos ξ/ξ. All-to-all (Dicke limit): Γ_ij = 1, J_ij = 0.
"""

from __future__ import annotations

import functools
from typing import Literal

import jax
import jax.numpy as jnp
import numpy as np

__all__ = ["couplings", "device_couplings", "validate_custom", "KINDS"]

KINDS = ("vector", "scalar", "all-to-all")


def _unit(vec, name: str) -> np.ndarray:
    v = np.asarray(vec, dtype=complex).reshape(-1)
    if v.shape != (3,) or not np.all(np.isfinite(v)):
        raise ValueError(f"{name} must be three finite components, got {vec!r}")
    norm = np.linalg.norm(v)
    if norm == 0:
        raise ValueError(f"{name} must not be the zero vector")
    if abs(norm - 1.0) <= 4 * np.finfo(float).eps:
        # already a unit vector (e.g. one read back from a results file): dividing again would move its
        # last digits, and a rerun from the file would then differ in the last digits
        return v
    return v / norm


@functools.partial(jax.jit, static_argnames="kind")
def _pair_matrices(pos, pol, kind: str):
    """J and Γ as one fused elementwise XLA loop: no N×N temporaries beyond the two outputs.

    ``pol`` = Re(ê* ⊗ ê), so that |ê·r̂|² = r̂ᵀ pol r̂ for any complex ê.
    """
    x, y, z = pos[:, 0], pos[:, 1], pos[:, 2]
    dx, dy, dz = x[:, None] - x[None, :], y[:, None] - y[None, :], z[:, None] - z[None, :]
    n = pos.shape[0]
    same = jnp.arange(n)[:, None] == jnp.arange(n)[None, :]
    d2 = jnp.where(same, 1.0, dx * dx + dy * dy + dz * dz)
    xi = 2 * jnp.pi * jnp.sqrt(d2)
    sin, cos, inv = jnp.sin(xi), jnp.cos(xi), 1 / xi
    if kind == "scalar":
        gam = sin * inv
        jay = -0.5 * cos * inv
    else:
        c2 = (
            pol[0, 0] * dx * dx + pol[1, 1] * dy * dy + pol[2, 2] * dz * dz
            + 2 * (pol[0, 1] * dx * dy + pol[0, 2] * dx * dz + pol[1, 2] * dy * dz)
        ) / d2
        gam = 1.5 * ((1 - c2) * sin * inv + (1 - 3 * c2) * (cos * inv**2 - sin * inv**3))
        jay = 0.75 * (-(1 - c2) * cos * inv + (1 - 3 * c2) * (sin * inv**2 + cos * inv**3))
    return jnp.where(same, 0.0, jay), jnp.where(same, 1.0, gam)


def device_couplings(positions: np.ndarray, dipole: np.ndarray, kind: str):
    """(J, Γ) as JAX arrays on the default device; ``positions`` and ``dipole`` already validated."""
    n = len(positions)
    if kind == "all-to-all":
        return jnp.zeros((n, n)), jnp.ones((n, n))
    pol = np.real(np.outer(np.conj(dipole), dipole))
    return _pair_matrices(jnp.asarray(positions, dtype=float), jnp.asarray(pol), kind)


def couplings(
    positions,
    dipole=(1, 0, 0),
    kind: Literal["vector", "scalar", "all-to-all"] = "vector",
) -> tuple[np.ndarray, np.ndarray]:
    """Coherent exchange J and collective decay Γ for emitters at ``positions`` (λ0).

    Parameters
    ----------
    positions : (N, 3) array, in units of λ0.
    dipole : transition dipole ê (complex allowed, normalised here). Ignored by "scalar"/"all-to-all".
    kind : "vector" (free-space dyadic), "scalar", or "all-to-all" (Γ_ij = 1, J_ij = 0).

    Returns
    -------
    (J, Gamma) : two real symmetric (N, N) float64 arrays in units of Γ0, J_ii = 0, Γ_ii = 1
        (read-only views of the JAX arrays they were computed as).

    Examples
    --------
    >>> J, G = couplings([[0, 0, 0], [0, 0, 0.5]], dipole=(1, 0, 0))
    >>> round(G[0, 1], 6)  # −3/(2π²), Lehmberg (1970)
    -0.151982
    """
    pos = np.asarray(positions, dtype=float)
    if pos.ndim != 2 or pos.shape[1] != 3 or len(pos) == 0:
        raise ValueError(f"positions must be an (N, 3) array with N ≥ 1, got shape {pos.shape}")
    if not np.all(np.isfinite(pos)):
        raise ValueError("positions contain NaN or infinite values")
    if kind not in KINDS:
        raise ValueError(f"unknown coupling kind {kind!r}; choose one of {', '.join(KINDS)}")
    J, G = device_couplings(pos, _unit(dipole, "dipole"), kind)
    return np.asarray(J), np.asarray(G)


def validate_custom(J, Gamma, n: int, tol: float = 1e-9) -> tuple[np.ndarray, np.ndarray]:
    """Check a user-supplied (J, Γ) pair: Hermitian J, Hermitian positive semi-definite Γ, Γ_ii = 1.

    Returns the matrices as float64 arrays when they are real, complex128 otherwise.
    """
    mats = []
    for name, m in (("J", J), ("Gamma", Gamma)):
        a = np.asarray(m)
        if a.shape != (n, n):
            raise ValueError(f"custom {name} must have shape ({n}, {n}) like the positions, got {a.shape}")
        if not np.all(np.isfinite(a)):
            raise ValueError(f"custom {name} contains NaN or infinite values")
        scale = max(1.0, float(np.abs(a).max()))
        if np.abs(a - a.conj().T).max() > tol * scale:
            raise ValueError(f"custom {name} must be Hermitian (real symmetric for real entries)")
        a = 0.5 * (a + a.conj().T)
        mats.append(a.real.copy() if np.all(a.imag == 0) else a.astype(complex))
    J, G = mats
    if np.abs(np.diag(J)).max() > tol:
        raise ValueError("custom J must have a zero diagonal (J_ii = 0: no self-exchange)")
    if np.abs(np.diag(G) - 1).max() > tol:
        raise ValueError("custom Gamma must have a unit diagonal (Γ_ii = Γ0 = 1)")
    lowest = float(np.linalg.eigvalsh(G)[0])
    if lowest < -1e-8 * n:
        raise ValueError(
            f"custom Gamma must be positive semi-definite; its lowest eigenvalue is {lowest:.3g}"
        )
    return J, G
