"""Shifted resolvents of a linear generator from one Krylov space (shared by the regression levels).

The inelastic spectrum needs, for many frequencies ν, the bilinear form

    F(ν) = ∫_0^∞ e^{iντ} uᵀ e^{Lτ} b dτ = −uᵀ (L + iν)⁻¹ b,

where L is the generator of the regression equations (the Liouvillian, or the linearised pair equations)
and b a vector whose stationary part has been removed. A Krylov space does not depend on the shift:
K_m(L + iν, b) = K_m(L, b). One Arnoldi process (W. E. Arnoldi, Q. Appl. Math. 9, 17 (1951)), with
classical Gram–Schmidt applied twice, gives L V_m = V_m H_m + h_{m+1,m} v_{m+1} e_mᵀ, and for every shift
the full orthogonalisation (FOM) solution x_ν = β V_m (H_m + iν)⁻¹ e_1 of (L + iν)x = b, whose residual
norm is exactly β h_{m+1,m} |e_mᵀ (H_m + iν)⁻¹ e_1| (Y. Saad, Iterative Methods for Sparse Linear Systems,
2nd ed., SIAM (2003), §6.4 and §7 on shifted systems). The space grows until that residual is below
``tol`` at every requested frequency, or the space is invariant (then the answer is exact). The small
systems are solved through one complex Schur form of H_m and a triangular solve per frequency.

A consequence used in the checks: for any m whose Ritz values lie in the left half-plane, the
approximation −uᵀ V_m (H_m + iν)⁻¹ β e_1 still integrates to uᵀ b over all ν (times π, real part),
so the sum rule of the spectrum is kept by construction; the residual measures the error in its shape.
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np
import scipy.linalg

__all__ = ["shifted_resolvent"]


def shifted_resolvent(
    matvec: Callable[[np.ndarray], np.ndarray],
    b: np.ndarray,
    u: np.ndarray,
    freqs: np.ndarray,
    tol: float = 1e-9,
    max_dim: int = 3000,
    check_every: int = 25,
) -> tuple[np.ndarray, dict]:
    """F(ν) = −uᵀ(L + iν)⁻¹ b for each ν in ``freqs`` (complex), with L given by ``matvec`` on flat
    complex vectors. Returns (F, info); info has the Krylov dimension and the worst relative residual.
    Raises RuntimeError when ``max_dim`` is reached before ``tol``."""
    b = np.asarray(b, dtype=complex).ravel()
    u = np.asarray(u, dtype=complex).ravel()
    freqs = np.asarray(freqs, dtype=float)
    beta = float(np.linalg.norm(b))
    if beta == 0.0:
        return np.zeros(freqs.shape, dtype=complex), {"krylov_dimension": 0, "krylov_residual": 0.0}
    size = b.size
    max_dim = min(max_dim, size)
    V = np.zeros((max_dim + 1, size), dtype=complex)
    H = np.zeros((max_dim + 1, max_dim), dtype=complex)
    V[0] = b / beta
    scale = None
    m, res, invariant = 0, np.inf, False
    for j in range(max_dim):
        w = np.asarray(matvec(V[j]), dtype=complex).ravel()
        if scale is None:
            scale = max(float(np.linalg.norm(w)), 1e-300)
        h = V[: j + 1].conj() @ w
        w = w - h @ V[: j + 1]
        h2 = V[: j + 1].conj() @ w  # the second pass keeps the basis orthogonal to working precision
        w = w - h2 @ V[: j + 1]
        H[: j + 1, j] = h + h2
        norm = float(np.linalg.norm(w))
        H[j + 1, j] = norm
        m = j + 1
        invariant = norm < 1e-13 * scale
        if not invariant:
            V[j + 1] = w / norm
        if invariant or m == max_dim or m % check_every == 0:
            y = _solve_shifted(H[:m, :m], freqs)
            res = 0.0 if invariant else float(np.max(norm * np.abs(y[:, m - 1])))
            if res < tol:
                break
    if res >= tol:
        raise RuntimeError(
            f"the Krylov space reached {m} vectors (of {size}) with relative residual {res:.2g} > {tol:g}"
        )
    F = -beta * (y @ (V[:m] @ u))
    ritz = float(np.max(np.linalg.eigvals(H[:m, :m]).real))
    return F, {"krylov_dimension": m, "krylov_residual": res, "krylov_invariant": bool(invariant),
               "ritz_max_real": ritz}


def _solve_shifted(Hm: np.ndarray, freqs: np.ndarray) -> np.ndarray:
    """Rows y_ν = (H_m + iν)⁻¹ e_1 for every ν, through one complex Schur form H_m = Z T Zᴴ."""
    T, Z = scipy.linalg.schur(Hm, output="complex")
    rhs = Z.conj()[0]  # Zᴴ e_1
    eye = np.eye(Hm.shape[0])
    out = np.empty((freqs.size, Hm.shape[0]), dtype=complex)
    for k, nu in enumerate(freqs):
        z = scipy.linalg.solve_triangular(T + 1j * nu * eye, rhs)
        out[k] = Z @ z
    return out
