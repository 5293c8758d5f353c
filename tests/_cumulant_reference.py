"""Independent references for tests/test_cumulant2.py: dense Lindblad evolution (numpy/scipy) and a
brute-force evaluation of the second-order cumulant rule, written without the package's formulas."""

from __future__ import annotations

import itertools
from functools import reduce

import numpy as np
from scipy.integrate import solve_ivp

# single-emitter operators in the basis (|e⟩, |g⟩)
SM = np.array([[0, 0], [1, 0]], dtype=complex)  # σ⁻ = |g⟩⟨e|
SP = SM.T.copy()
NUM = np.array([[1, 0], [0, 0]], dtype=complex)
ID = np.eye(2, dtype=complex)
LOCAL = {"+": SP, "-": SM, "n": NUM}


def site_op(op: np.ndarray, i: int, n: int) -> np.ndarray:
    return reduce(np.kron, [op if k == i else ID for k in range(n)])


def hamiltonian(J, omega, detuning):
    """H of conventions.md (Ω_i complex per site)."""
    n = len(omega)
    sm = [site_op(SM, i, n) for i in range(n)]
    H = sum(-detuning * s.conj().T @ s + 0.5 * (omega[i] * s.conj().T + np.conj(omega[i]) * s)
            for i, s in enumerate(sm))
    H = H + sum(J[i, j] * sm[i].conj().T @ sm[j] for i in range(n) for j in range(n) if i != j)
    return H, sm


def lindblad_rhs(J, G, omega, detuning):
    """dρ/dt = −i[H, ρ] + Σ Γ_ij(σ_j⁻ρσ_i⁺ − ½{σ_i⁺σ_j⁻, ρ}) as a function of a flattened ρ."""
    H, sm = hamiltonian(J, omega, detuning)
    n = len(omega)
    heff = H - 0.5j * sum(G[i, j] * sm[i].conj().T @ sm[j] for i in range(n) for j in range(n))
    lam, V = np.linalg.eigh(G)
    jumps = [np.sqrt(max(l, 0)) * sum(np.conj(V[j, m]) * sm[j] for j in range(n)) for m, l in enumerate(lam)]
    dim = 2**n

    def f(_t, r):
        rho = r.reshape(dim, dim)
        d = -1j * (heff @ rho - rho @ heff.conj().T)
        for L in jumps:
            d = d + L @ rho @ L.conj().T
        return d.reshape(-1)

    return f, sm


def product_density(bloch: np.ndarray) -> np.ndarray:
    """ρ = ⊗ ½(1 + s·σ) in the (|e⟩, |g⟩) basis (σ^z = |e⟩⟨e| − |g⟩⟨g|)."""
    mats = []
    for sx, sy, sz in bloch:
        mats.append(0.5 * np.array([[1 + sz, sx - 1j * sy], [sx + 1j * sy, 1 - sz]]))
    return reduce(np.kron, mats)


def exact_evolution(J, G, omega, detuning, bloch, times, rtol=1e-10, atol=1e-12):
    """Density matrices at ``times`` from the product state ``bloch`` (scipy solve_ivp, DOP853)."""
    f, _ = lindblad_rhs(J, G, omega, detuning)
    rho0 = product_density(bloch).reshape(-1)
    sol = solve_ivp(f, (times[0], times[-1]), rho0, t_eval=times, method="DOP853", rtol=rtol, atol=atol)
    dim = rho0.size
    return sol.y.T.reshape(len(times), int(np.sqrt(dim)), -1)


def moments_of(rho: np.ndarray, n: int):
    """β, n, A, B, Z, D of a density matrix (diagonals of the pair moments zero)."""
    sm = [site_op(SM, i, n) for i in range(n)]
    ex = lambda O: np.trace(rho @ O)  # noqa: E731
    beta = np.array([ex(s) for s in sm])
    nn = np.array([ex(s.conj().T @ s) for s in sm]).real
    A, B, Z, D = (np.zeros((n, n), complex) for _ in range(4))
    for i in range(n):
        for j in range(n):
            if i == j:
                continue
            A[i, j] = ex(sm[i].conj().T @ sm[j])
            B[i, j] = ex(sm[i] @ sm[j])
            Z[i, j] = ex(sm[i].conj().T @ sm[i] @ sm[j])
            D[i, j] = ex(sm[i].conj().T @ sm[i] @ sm[j].conj().T @ sm[j])
    return beta, nn, A, B, Z, D.real


# --- the truncation rule, brute force -------------------------------------------------------------

def _mean(op, i, var):
    beta, n = var[0], var[1]
    return {"-": beta[i], "+": np.conj(beta[i]), "n": n[i]}[op]


def _pair(x, i, y, j, var):
    """⟨X_i Y_j⟩ for i ≠ j from the variables."""
    _, _, A, B, Z, D = var
    table = {
        ("+", "-"): lambda: A[i, j], ("-", "+"): lambda: A[j, i],
        ("-", "-"): lambda: B[i, j], ("+", "+"): lambda: np.conj(B[i, j]),
        ("n", "-"): lambda: Z[i, j], ("-", "n"): lambda: Z[j, i],
        ("n", "+"): lambda: np.conj(Z[i, j]), ("+", "n"): lambda: np.conj(Z[j, i]),
        ("n", "n"): lambda: D[i, j],
    }
    return table[(x, y)]()


def _partitions_12(items):
    """Set partitions of ``items`` into blocks of size one or two."""
    if not items:
        yield []
        return
    first, rest = items[0], items[1:]
    for p in _partitions_12(rest):
        yield [(first,)] + p
    for k in range(len(rest)):
        for p in _partitions_12(rest[:k] + rest[k + 1:]):
            yield [(first, rest[k])] + p


def truncated_moment(ops: list[tuple[str, int]], var) -> complex:
    """⟨Π X_i⟩ over distinct sites with third and higher cumulants zero."""
    total = 0j
    for part in _partitions_12(list(range(len(ops)))):
        term = 1 + 0j
        for blk in part:
            if len(blk) == 1:
                op, i = ops[blk[0]]
                term *= _mean(op, i, var)
            else:
                (x, i), (y, j) = ops[blk[0]], ops[blk[1]]
                term *= _pair(x, i, y, j, var) - _mean(x, i, var) * _mean(y, j, var)
        total += term
    return total


_REDUCE = {"+": "+", "-": "-", "+-": "n", "n": "n", "n-": None, "+n": None}


def reduced_moment(string: list[tuple[str, int]], var) -> complex:
    """A product of σ± on (possibly repeated) sites: same-site products by the spin algebra, then the rule."""
    by_site: dict[int, str] = {}
    for op, i in string:
        by_site[i] = by_site.get(i, "") + op
    ops = []
    for i, word in by_site.items():
        mat = reduce(lambda a, b: a @ b, [LOCAL[c] for c in word])
        if not np.any(mat):
            return 0j
        for name, m in LOCAL.items():
            if np.allclose(mat, m):
                ops.append((name, i))
                break
        else:
            raise ValueError(f"unexpected same-site word {word}")
    return truncated_moment(ops, var)


def brute_four(G, var):
    n = G.shape[0]
    total = 0j
    for i, k, l, j in itertools.product(range(n), repeat=4):
        w = G[i, j] * G[k, l]
        if w != 0:
            total += w * reduced_moment([("+", i), ("+", k), ("-", l), ("-", j)], var)
    return total


def brute_two(G, var):
    n = G.shape[0]
    return sum(G[i, j] * reduced_moment([("+", i), ("-", j)], var) for i in range(n) for j in range(n))


# --- the truncated right-hand side, from the adjoint Lindbladian ------------------------------------

_T = np.zeros((4, 2, 2))  # coefficient of (I, n, σ⁺, σ⁻) in a 2×2 matrix
_T[0, 1, 1] = 1
_T[1, 0, 0], _T[1, 1, 1] = 1, -1
_T[2, 0, 1] = 1
_T[3, 1, 0] = 1
_BASIS = (None, "n", "+", "-")


def adjoint_lindblad(J, G, omega, detuning):
    """O ↦ i[H, O] + Σ Γ_ij(σ_i⁺Oσ_j⁻ − ½{σ_i⁺σ_j⁻, O})."""
    H, sm = hamiltonian(J, omega, detuning)
    n = len(omega)
    terms = [(G[i, j], sm[i].conj().T, sm[j]) for i in range(n) for j in range(n) if G[i, j] != 0]

    def f(O):
        d = 1j * (H @ O - O @ H)
        for g, sp, s in terms:
            d = d + g * (sp @ O @ s - 0.5 * (sp @ s @ O + O @ sp @ s))
        return d

    return f


def truncated_expectation(M: np.ndarray, n: int, var) -> complex:
    """⟨M⟩ with M expanded in ⊗(I, n, σ⁺, σ⁻), each product's moment by the truncation rule."""
    letters = "abcdefghijklmnopqrstuvwxyz"
    b, r, c = letters[:n], letters[n:2 * n], letters[2 * n:3 * n]
    spec = ",".join(f"{b[s]}{r[s]}{c[s]}" for s in range(n)) + f",{r}{c}->{b}"
    coeff = np.einsum(spec, *([_T] * n), M.reshape((2,) * (2 * n)))
    total = 0j
    for idx in itertools.product(range(4), repeat=n):
        c = coeff[idx]
        if abs(c) < 1e-14:
            continue
        ops = [(_BASIS[b], i) for i, b in enumerate(idx) if b]
        if len(ops) > 3:
            raise AssertionError("a two-body generator produced a four-body term")
        total += c * (truncated_moment(ops, var) if ops else 1.0)
    return total


def truncated_rhs(J, G, omega, detuning, var):
    """d/dt of (β, n, A, B, Z, D) from the exact adjoint Lindbladian, evaluated by the truncation rule."""
    n = len(omega)
    f = adjoint_lindblad(J, G, omega, detuning)
    sm = [site_op(SM, i, n) for i in range(n)]
    num = [s.conj().T @ s for s in sm]
    ev = lambda O: truncated_expectation(f(O), n, var)  # noqa: E731
    dbeta = np.array([ev(s) for s in sm])
    dn = np.array([ev(x) for x in num]).real
    dA, dB, dZ, dD = (np.zeros((n, n), complex) for _ in range(4))
    for i in range(n):
        for j in range(n):
            if i != j:
                dA[i, j] = ev(sm[i].conj().T @ sm[j])
                dB[i, j] = ev(sm[i] @ sm[j])
                dZ[i, j] = ev(num[i] @ sm[j])
                dD[i, j] = ev(num[i] @ num[j])
    return dbeta, dn, dA, dB, dZ, dD.real


def random_variables(n: int, rng: np.random.Generator, scale: float = 0.3):
    """Generic values of (β, n, A, B, Z, D) with the symmetries of the variables (not a physical state)."""
    c = lambda *s: scale * (rng.normal(size=s) + 1j * rng.normal(size=s))  # noqa: E731
    beta = c(n)
    nn = rng.uniform(0.1, 0.9, n)
    A = c(n, n)
    A = A + A.conj().T
    B = c(n, n)
    B = B + B.T
    Z = c(n, n)
    D = rng.normal(size=(n, n)) * scale
    D = D + D.T
    for X in (A, B, Z, D):
        np.fill_diagonal(X, 0)
    return beta, nn, A, B, Z, D
