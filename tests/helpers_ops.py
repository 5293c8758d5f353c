"""Dense spin-½ operators for small-N reference calculations in tests (independent of the package)."""

from functools import reduce

import numpy as np
import scipy.sparse as sps
import scipy.sparse.linalg as spla
from scipy.integrate import solve_ivp

SM = np.array([[0, 1], [0, 0]], dtype=complex)  # σ⁻|e⟩ = |g⟩ with |g⟩ = index 0, |e⟩ = index 1


def site_op(op, i, n):
    return reduce(np.kron, [op if k == i else np.eye(2) for k in range(n)])


def lowering(n):
    return [site_op(SM, i, n) for i in range(n)]


def product_density(bloch):
    """Density matrix of a product state with Bloch vectors (⟨σx⟩, ⟨σy⟩, ⟨σz⟩); σz = 2σ⁺σ⁻ − 1."""
    mats = []
    for sx, sy, sz in bloch:
        # ρ = ½(1 + s·σ) with σz = diag(−1, +1) in (|g⟩, |e⟩) and σ⁻ = (σx − iσy)/2
        rho = 0.5 * np.array([[1 - sz, sx + 1j * sy], [sx - 1j * sy, 1 + sz]], dtype=complex)
        mats.append(rho)
    return reduce(np.kron, mats)


def liouvillian(H, Gamma, sm):
    """Dense Lindblad generator L (row-major vec) for dρ/dt = −i[H,ρ] + Σ Γ_ij(σ_j ρ σ_i† − ½{σ_i†σ_j, ρ})."""
    d = H.shape[0]
    eye = np.eye(d)
    L = -1j * (np.kron(H, eye) - np.kron(eye, H.T))
    for i in range(len(sm)):
        for j in range(len(sm)):
            g = Gamma[i, j]
            if g == 0:
                continue
            A, B = sm[j], sm[i].conj().T  # σ_j⁻ ρ σ_i⁺
            BA = B @ A
            L += g * (np.kron(A, B.T) - 0.5 * np.kron(BA, eye) - 0.5 * np.kron(eye, BA.T))
    return L


def hamiltonian(model, sm, envelope=1.0):
    n = len(sm)
    om = model.rabi_sites * envelope
    H = np.zeros((2**n, 2**n), dtype=complex)
    for i in range(n):
        sp = sm[i].conj().T
        H += -model.detuning * sp @ sm[i] + 0.5 * (om[i] * sp + np.conj(om[i]) * sm[i])
        for j in range(n):
            if i != j:
                H += model.J[i, j] * sp @ sm[j]
    return H


def dense_liouvillian(model):
    """The dense Lindblad generator of ``model`` (conventions.md), row-major vec, envelope 1."""
    sm = lowering(model.n)
    return liouvillian(hamiltonian(model, sm), model.Gamma, sm)


def dicke_ladder_rate(n, times):
    """Emission rate of the symmetric ladder |J, M⟩, J = N/2, from full inversion M = J, decaying
    M → M − 1 at (J + M)(J − M + 1)Γ0 (R. H. Dicke, Phys. Rev. 93, 99 (1954); M. Gross and S. Haroche,
    Phys. Rep. 93, 301 (1982)), integrated with scipy's solve_ivp."""
    j = n / 2
    m = j - np.arange(n + 1)
    rate = (j + m) * (j - m + 1)

    def f(_t, p):
        d = -rate * p
        d[1:] += rate[:-1] * p[:-1]
        return d

    p0 = np.zeros(n + 1)
    p0[0] = 1.0
    sol = solve_ivp(f, (times[0], times[-1]), p0, t_eval=times, method="LSODA", rtol=1e-10, atol=1e-13)
    return rate @ sol.y


def sparse_steady_density(model):
    """The steady ρ of ``model`` (conventions.md, envelope 1) from scipy.sparse: the Lindblad generator
    built with sparse Kronecker products (row-major vec, as `liouvillian`), one row replaced by the trace
    condition, solved with spsolve. Independent of the package; fine up to N ≈ 7."""
    n, d = model.n, 2**model.n
    eye2 = sps.identity(2, format="csr")

    def site(op, i):
        out = sps.identity(1, format="csr")
        for k in range(n):
            out = sps.kron(out, sps.csr_matrix(op) if k == i else eye2, format="csr")
        return out

    sm = [site(SM, i) for i in range(n)]
    sp = [a.conj().T.tocsr() for a in sm]
    H = sps.csr_matrix((d, d), dtype=complex)
    for i in range(n):
        om = model.rabi_sites[i]
        H = H - model.detuning * (sp[i] @ sm[i]) + 0.5 * (om * sp[i] + np.conj(om) * sm[i])
        for j in range(n):
            if i != j:
                H = H + model.J[i, j] * (sp[i] @ sm[j])
    eye = sps.identity(d, format="csr")
    L = -1j * (sps.kron(H, eye) - sps.kron(eye, H.T))
    for i in range(n):
        for j in range(n):
            BA = sp[i] @ sm[j]
            L = L + model.Gamma[i, j] * (sps.kron(sm[j], sp[i].T) - 0.5 * sps.kron(BA, eye)
                                         - 0.5 * sps.kron(eye, BA.T))
    L = sps.lil_matrix(L)
    rhs = np.zeros(d * d, dtype=complex)
    L[0, :] = np.eye(d).reshape(1, -1)  # Tr ρ = 1 in place of the (redundant) first equation
    rhs[0] = 1.0
    rho = spla.spsolve(L.tocsc(), rhs).reshape(d, d)
    return 0.5 * (rho + rho.conj().T), sm


def coupled_dipole(model):
    """0 = (iΔ − ½)β_i − (i/2)Ω_i − (i/2)Σ_{j≠i}(2J_ij − iΓ_ij)β_j (J. Ruostekoski, J. Javanainen,
    Phys. Rev. A 55, 513 (1997), from memory; re-derived from conventions.md): the coherences β_i = ⟨σ_i⁻⟩
    to first order in Ω, from numpy's dense solver."""
    n = model.n
    off = 2 * model.J - 1j * (model.Gamma - np.eye(n))
    A = (1j * model.detuning - 0.5) * np.eye(n) - 0.5j * off
    return np.linalg.solve(A, 0.5j * model.rabi_sites)
