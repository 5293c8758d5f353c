"""cumulant2 with a pair radius: near pairs keep their full equations, far pairs follow a cheaper rule.

Near pairs (|r_ij| < radius) are stored in neighbour lists: for emitter i and slot k < K the partner
j = nbr[i, k] and the moments A_ij, B_ij, Z_ij, D_ij of the pair (both orders of a pair are stored; the
redundant halves stay consistent because their derivatives are the dense level's, gathered through the
reverse slot ``rev``). Every full-matrix quantity of the dense equations (docs/cumulant2.md) is written as
its product-state part, from the one-body moments (O(N²) matrix-vector products with K), plus the
connected correlations of the near pairs (O(N·K²) gathers). With a radius beyond the cloud this is the
dense level rewritten; the far pairs' connected correlations are either dropped (``far_pairs="drop"``) or
given by the first-order adiabatic rule (``"first_order"``, the default), derived in docs/cumulant2.md
("Pair radius"):

    c_ab = ∫_0^∞ e^{G_a s} S_ab e^{G_bᵀ s} ds,
    S_ab = K_ab* (f1_a f3_bᵀ + f3_a f1_bᵀ) + K_ab (f2_a f4_bᵀ + f4_a f2_bᵀ)

with G_a the 3×3 linearised mean-field generator of emitter a (operators σ⁻, σ⁺, n) and f1..f4 one-body
covariance and commutator vectors. The integral is a fixed Gauss–Legendre rule (`QUAD_NODES` nodes on
[0, `QUAD_SPAN`]), so the far feedback Σ_j K_aj c_aj becomes matrix-vector products with the element-wise
products |K|² and K² (from Γ∘Γ, J∘J, Γ∘J). State: (N, 3 + 7K) real.
"""

from __future__ import annotations

import jax
import jax.numpy as jnp
import numpy as np

from ..integrate import per_envelope
from ..model import Envelope, Model

FAR_RULES = ("first_order", "drop")
QUAD_NODES = 24
QUAD_SPAN = 8.0


def quadrature(nodes: int = QUAD_NODES, span: float = QUAD_SPAN):
    """Nodes and weights of ∫_0^span (Gauss–Legendre): 1/x = ∫_0^∞ e^{−xs} ds to 3.4e-4 for
    Re x ∈ [1, 2], |Im x| ≤ 10 (measured), the range of −(λ_a + λ_b) for moderate local fields."""
    g, w = np.polynomial.legendre.leggauss(nodes)
    return (g + 1) * span / 2, w * span / 2


def neighbours(positions: np.ndarray, radius: float):
    """Neighbour lists of the pairs closer than ``radius``: (nbr, mask, rev), each (N, K), K ≥ 1.

    nbr[i, k] is the k-th partner of i (i itself in unused slots, mask 0 there); rev[i, k] is the slot of i
    in the list of nbr[i, k].
    """
    from scipy.spatial import cKDTree

    pos = np.asarray(positions, dtype=float)
    n = len(pos)
    pairs = cKDTree(pos).query_pairs(r=radius, output_type="ndarray")
    i = np.concatenate([pairs[:, 0], pairs[:, 1]]) if len(pairs) else np.zeros(0, int)
    j = np.concatenate([pairs[:, 1], pairs[:, 0]]) if len(pairs) else np.zeros(0, int)
    order = np.lexsort((j, i))
    i, j = i[order], j[order]
    counts = np.bincount(i, minlength=n)
    k_max = max(int(counts.max(initial=0)), 1)
    start = np.concatenate([[0], np.cumsum(counts)[:-1]])
    slot = np.arange(len(i)) - start[i]
    nbr = np.tile(np.arange(n)[:, None], (1, k_max))
    mask = np.zeros((n, k_max))
    nbr[i, slot] = j
    mask[i, slot] = 1.0
    key = i.astype(np.int64) * n + j
    sorter = np.argsort(key)
    rev_key = j.astype(np.int64) * n + i
    pos_of = sorter[np.searchsorted(key, rev_key, sorter=sorter)]
    rev = np.tile(np.arange(k_max)[None, :], (n, 1))
    rev[i, slot] = slot[pos_of]
    return nbr.astype(np.int32), mask, rev.astype(np.int32)


def near_args(model: Model, radius: float, far: str):
    """Arguments of the near-pair right-hand side: couplings, neighbour lists, K at the near pairs, and
    for the first-order far rule the element-wise products Γ∘Γ, J∘J, Γ∘J (zero diagonals)."""
    nbr, mask, rev = neighbours(model.positions, radius)
    Jd, Gd = model.device_couplings()
    G = np.asarray(model.Gamma)
    J = np.asarray(model.J)
    rows = np.arange(model.n)[:, None]
    Kn = (0.5 * G[rows, nbr] + 1j * J[rows, nbr]) * mask
    om = model.rabi_sites
    nb2 = nbr[nbr]  # (N, K, K): the partners of each partner
    G1 = _kgather_np(G, J, np.broadcast_to(rows[:, :, None], nb2.shape), nb2)
    G2 = _kgather_np(G, J, np.broadcast_to(nbr[:, :, None], nb2.shape),
                     np.broadcast_to(nbr[:, None, :], nb2.shape))
    args = {
        "G1r": jnp.asarray(G1.real), "G1i": jnp.asarray(G1.imag),
        "G2r": jnp.asarray(G2.real), "G2i": jnp.asarray(G2.imag),
        "Gamma": Gd, "J": Jd, "gdiag": jnp.asarray(np.diagonal(G).copy()),
        "nbr": jnp.asarray(nbr), "rev": jnp.asarray(rev), "mask": jnp.asarray(mask),
        "Knr": jnp.asarray(Kn.real), "Kni": jnp.asarray(Kn.imag),
        "omega": jnp.asarray(np.stack([om.real, om.imag])),
        "detuning": jnp.asarray(model.detunings),
    }
    s, w = quadrature()
    args["quad"] = jnp.asarray(np.stack([s, w]))  # the rule is evaluated for the indicator in any case
    if far == "first_order":
        args.update(far_matrices(Gd, Jd))
    return args


@jax.jit
def far_matrices(Gd, Jd):
    """|K|² = ¼Γ² + J² and K² = ¼Γ² − J² + iΓJ element-wise, zero diagonals (three real N×N arrays)."""
    n = Gd.shape[0]
    off = 1.0 - jnp.eye(n)
    g2 = 0.25 * Gd * Gd * off
    j2 = Jd * Jd * off
    return {"K2abs": g2 + j2, "K2re": g2 - j2, "K2im": Gd * Jd * off}


def near_size(k: int) -> int:
    return 3 + 7 * k


def unpack_near(y):
    """(N, 3 + 7K) state → β, n (N,) and A, B, Z (complex), D (real), each (N, K) at the near slots."""
    k = (y.shape[1] - 3) // 7
    beta = y[:, 0] + 1j * y[:, 1]
    n = y[:, 2]
    p = y[:, 3:].reshape(y.shape[0], 7, k)
    return beta, n, p[:, 0] + 1j * p[:, 1], p[:, 2] + 1j * p[:, 3], p[:, 4] + 1j * p[:, 5], p[:, 6]


def pack_near(beta, n, A, B, Z, D):
    pairs = jnp.stack([A.real, A.imag, B.real, B.imag, Z.real, Z.imag, D], axis=1)
    return jnp.concatenate([jnp.stack([beta.real, beta.imag, n], axis=1), pairs.reshape(n.shape[0], -1)],
                           axis=1)


def near_product_state(initial: np.ndarray, nbr: np.ndarray, mask: np.ndarray):
    s = np.asarray(initial, dtype=float)
    beta = (s[:, 0] - 1j * s[:, 1]) / 2
    n = (1 + s[:, 2]) / 2
    bb, nb = beta[nbr], n[nbr]
    A = np.conj(beta)[:, None] * bb * mask
    B = beta[:, None] * bb * mask
    Z = n[:, None] * bb * mask
    D = n[:, None] * nb * mask
    return pack_near(*(jnp.asarray(x) for x in (beta, n, A, B, Z, D)))


def _kmv(args, x):
    """K @ x with K = ½Γ + iJ, zero diagonal; x (N,) or (N, m) complex."""
    G, J = args["Gamma"], args["J"]
    xr, xi = jnp.real(x), jnp.imag(x)
    gd = args["gdiag"] if x.ndim == 1 else args["gdiag"][:, None]
    gx = (G @ xr - gd * xr) + 1j * (G @ xi - gd * xi)
    jx = J @ xr + 1j * (J @ xi)
    return 0.5 * gx + 1j * jx


def _kgather_np(G, J, i, j):
    """K_ij = ½Γ_ij + iJ_ij at index arrays i, j (zero where i = j), on the host."""
    return np.where(i == j, 0.0, 0.5 * G[i, j] + 1j * J[i, j])


def _kgather(args, i, j):
    """K_ij at index arrays i, j (zero where i = j)."""
    v = 0.5 * args["Gamma"][i, j] + 1j * args["J"][i, j]
    return jnp.where(i == j, 0.0, v)


def _local_generators(beta, n, u, om, det):
    """G_a (N, 3, 3): the linearised mean-field Heisenberg generator on (σ⁻, σ⁺, n), L†[e_μ] = Σ_ν G_μν e_ν
    + const, with the local field Ω_e = Ω_a − 2i u_a."""
    oe = om - 2j * u
    z = jnp.zeros_like(oe)
    one = jnp.ones_like(oe)
    row0 = jnp.stack([(1j * det - 0.5) * one, z, 1j * oe], axis=-1)
    row1 = jnp.stack([z, (-1j * det - 0.5) * one, -1j * jnp.conj(oe)], axis=-1)
    row2 = jnp.stack([0.5j * jnp.conj(oe), -0.5j * oe, -one], axis=-1)
    return jnp.stack([row0, row1, row2], axis=-2)


def _expm3(X, squarings: int = 12, degree: int = 10):
    """e^X for a batch of small matrices: Taylor series of X/2^m, then m squarings (fixed m, so no
    data-dependent control flow; with ‖X‖ ≤ 2000 the scaled norm is ≤ 0.5 and the series error ≤ 1e-10).
    jax.scipy.linalg.expm's batched Padé solve was the costliest part of the far rule."""
    def mm(a, b):  # element-wise products: batched dots of 3×3 matrices were slow on the CPU
        return jnp.sum(a[..., :, :, None] * b[..., None, :, :], axis=-2)

    Y = X / 2.0**squarings
    eye = jnp.broadcast_to(jnp.eye(X.shape[-1], dtype=X.dtype), X.shape)
    term, out = eye, eye
    for k in range(1, degree + 1):
        term = mm(term, Y) / k
        out = out + term
    for _ in range(squarings):
        out = mm(out, out)
    return out


def _sources(beta, n):
    """f1..f4 (4, N, 3): f1 = cov(σ⁺, X), f2 = ⟨[σ⁺, X]⟩, f3 = ⟨[X, σ⁻]⟩, f4 = cov(X, σ⁻), X = (σ⁻, σ⁺, n)."""
    bc = jnp.conj(beta)
    b2 = jnp.abs(beta) ** 2
    z = jnp.zeros_like(beta)
    f1 = jnp.stack([n - b2, -(bc**2), -bc * n], axis=-1)
    f2 = jnp.stack([2 * n - 1 + z, z, -bc], axis=-1)
    f3 = jnp.stack([z, 2 * n - 1 + z, -beta], axis=-1)
    f4 = jnp.stack([-(beta**2), n - b2, -n * beta], axis=-1)
    return jnp.stack([f1, f2, f3, f4])


def far_factors(beta, n, u, om, det, quad):
    """Propagated source vectors: F[t, q, a, μ] = (e^{G_a s_q} f_t^a)_μ, H[t, q, b, ν] = (e^{G_b s_q} g_t^b)_ν
    with g = (f3, f4, f1, f2); c_ab[μ, ν] ≈ Σ_t κ_t(ab) Σ_q w_q F[t,q,a,μ] H[t,q,b,ν], κ = (K*, K, K*, K)."""
    s, w = quad[0], quad[1]
    G = _local_generators(beta, n, u, om, det)
    E = _expm3(s[:, None, None, None] * G[None])  # (q, N, 3, 3)
    f = _sources(beta, n)  # (4, N, 3)
    F = jnp.einsum("qaij,taj->tqai", E, f)
    g = f[jnp.array([2, 3, 0, 1])]
    H = jnp.einsum("qaij,taj->tqai", E, g)
    return F * w[None, :, None, None], H


def _far_feedback(args, beta, n, u, om, det):
    """p_a^far = Σ_{j far} K_aj a_aj and r_a^far = Σ_{j far} K_aj z_aj under the first-order rule."""
    F, H = far_factors(beta, n, u, om, det, args["quad"])
    h0 = H[..., 0]  # (4, q, N): the σ⁻ component
    nq = h0.shape[1]
    conj_t = jnp.concatenate([h0[0], h0[2]]).T  # κ = K*: weight K_aj K_aj* = |K|²  (N, 2q)
    plain_t = jnp.concatenate([h0[1], h0[3]]).T  # κ = K: weight K²
    ka = args["K2abs"]
    v_conj = ka @ conj_t.real + 1j * (ka @ conj_t.imag)
    xr = jnp.concatenate([plain_t.real, plain_t.imag], axis=1)
    rr, ri = args["K2re"] @ xr, args["K2im"] @ xr
    m = plain_t.shape[1]
    v_plain = (rr[:, :m] - ri[:, m:]) + 1j * (rr[:, m:] + ri[:, :m])
    # remove the near partners (their correlations are dynamical)
    nbr, mask = args["nbr"], args["mask"]
    kn = (args["Knr"] + 1j * args["Kni"])
    near_conj = jnp.einsum("ak,akm->am", jnp.abs(kn) ** 2 * mask, conj_t[nbr])
    near_plain = jnp.einsum("ak,akm->am", kn**2 * mask, plain_t[nbr])
    v_conj, v_plain = v_conj - near_conj, v_plain - near_plain
    Fa = F[..., 1:3]  # components σ⁺ (for a) and n (for z): (4, q, N, 2)
    total = (
        jnp.einsum("qac,aq->ac", Fa[0], v_conj[:, :nq]) + jnp.einsum("qac,aq->ac", Fa[2], v_conj[:, nq:])
        + jnp.einsum("qac,aq->ac", Fa[1], v_plain[:, :nq]) + jnp.einsum("qac,aq->ac", Fa[3], v_plain[:, nq:])
    )
    return total[:, 0], total[:, 1]


def _make_near_rhs(far: str):
    @per_envelope
    def near_rhs(envelope: Envelope):
        def rhs(t, y, args):
            return near_derivative(t, y, args, envelope, far)
        return rhs
    return near_rhs


NEAR_RHS = {far: _make_near_rhs(far) for far in FAR_RULES}


def near_derivative(t, y, args, envelope, far):
    beta, n, A, B, Z, D = unpack_near(y)
    nbr, rev, mask = args["nbr"], args["rev"], args["mask"]
    Kn = args["Knr"] + 1j * args["Kni"]
    om = envelope(t) * (args["omega"][0] + 1j * args["omega"][1])
    det = args["detuning"]
    N, k = mask.shape

    def tr(X):  # X_ba at slot (a, k): the reverse slot
        return X[nbr, rev]

    u = _kmv(args, beta)
    bb, nbb = beta[nbr], n[nbr]
    ba, na = beta[:, None], n[:, None]
    a = (A - jnp.conj(ba) * bb) * mask
    b = (B - ba * bb) * mask
    z = (Z - na * bb) * mask
    p = jnp.conj(beta) * u + jnp.sum(Kn * a, axis=1)
    r = n * u + jnp.sum(Kn * z, axis=1)
    if far == "first_order":
        pf, rf = _far_feedback(args, beta, n, u, om, det)
        p, r = p + pf, r + rf

    # matrix products of the dense level at the near slots (product part + near correlations)
    G1 = args["G1r"] + 1j * args["G1i"]  # K_a,(partners of b), (N, K, K)
    G2 = args["G2r"] + 1j * args["G2i"]  # K_b,(partners of a)
    KcA = (jnp.conj(u)[:, None] - jnp.conj(Kn) * jnp.conj(bb)) * bb + jnp.sum(jnp.conj(G1) * jnp.conj(a[nbr]),
                                                                             axis=2)
    KB = (u[:, None] - Kn * bb) * bb + jnp.sum(G1 * b[nbr], axis=2)
    ub = u[nbr]
    ZKt = na * (ub - Kn * ba) + jnp.sum(G2 * z[:, None, :], axis=2)

    ut = u[:, None] - Kn * bb
    utT = ub - Kn * ba
    pt = p[:, None] - Kn * A
    rt = r[:, None] - Kn * Z
    Zba = tr(Z)
    rtT = r[nbr] - Kn * Zba
    Y = 2 * (Z - 2 * na * bb)
    oma, omb = om[:, None], om[nbr]

    dbeta = (1j * det - 0.5) * beta + 0.5j * om * (2 * n - 1) + 2 * r - u
    dn = -n - jnp.imag(jnp.conj(om) * beta) - 2 * jnp.real(p)

    C = 0.5j * oma * (2 * Z - bb) + Y * ut + 2 * bb * rt + (2 * na - 1) * KB
    detb = det[nbr]
    dB = (1j * (det[:, None] + detb) - 1) * B + C + tr(C)
    M = (-0.5 * A - 0.5j * jnp.conj(oma) * (2 * Z - bb) + jnp.conj(Kn) * (2 * D - nbb)
         + Y * jnp.conj(ut) + 2 * bb * jnp.conj(rt) + (2 * na - 1) * KcA)
    dA = M + jnp.conj(tr(M)) + 1j * (detb - det[:, None]) * A
    dZ = (
        (1j * detb - 1.5) * Z - 0.5j * oma * A + 0.5j * jnp.conj(oma) * B + 0.5j * omb * (2 * D - na)
        - jnp.conj(Kn) * Zba - 2 * bb * jnp.real(pt) - ba * KcA - jnp.conj(ba) * KB
        - (B - 2 * ba * bb) * jnp.conj(ut) - (A - 2 * jnp.conj(ba) * bb) * ut
        + 2 * (D - 2 * na * nbb) * utT + (2 * nbb - 1) * ZKt + 2 * na * rtT
    )
    E = -jnp.imag(jnp.conj(oma) * Zba) - 2 * jnp.real(
        nbb * pt + (jnp.conj(Zba) - 2 * jnp.conj(ba) * nbb) * ut + jnp.conj(ba) * tr(ZKt)
    )
    dD = -2 * D + E + tr(E)
    return pack_near(dbeta, dn, dA * mask, dB * mask, dZ * mask, dD * mask)


def far_cumulants(args, beta, n, om, det):
    """Dense (N, N) far-pair cumulants a, b, z, d of the first-order rule (near pairs and diagonal zero)."""
    u = _kmv(args, beta)
    F, H = far_factors(beta, n, u, om, det, args["quad"])
    G, J = args["Gamma"], args["J"]
    N = beta.shape[0]
    off = 1.0 - jnp.eye(N)
    K = (0.5 * G + 1j * J) * off
    near = jnp.zeros((N, N)).at[jnp.arange(N)[:, None], args["nbr"]].max(args["mask"])
    far = off * (1.0 - near)

    def comp(mu, nu):
        c = jnp.conj(K) * (jnp.einsum("qa,qb->ab", F[0, ..., mu], H[0, ..., nu])
                           + jnp.einsum("qa,qb->ab", F[2, ..., mu], H[2, ..., nu]))
        c = c + K * (jnp.einsum("qa,qb->ab", F[1, ..., mu], H[1, ..., nu])
                     + jnp.einsum("qa,qb->ab", F[3, ..., mu], H[3, ..., nu]))
        return c * far

    return comp(1, 0), comp(0, 0), comp(2, 0), jnp.real(comp(2, 2))


def dense_moments(y, args, far: str, om, det):
    """The dense moments β, n, A, B, Z, D (zero diagonals) of a near state, the far pairs by the rule
    (``far`` = "first_order") or product-state values ("drop"); also the far cumulant a (for diagnostics)."""
    beta, n, A, B, Z, D = unpack_near(y)
    nbr, mask = args["nbr"], args["mask"]
    N = beta.shape[0]
    rows = jnp.broadcast_to(jnp.arange(N)[:, None], nbr.shape)
    bb, nbb = beta[nbr], n[nbr]
    ba, na = beta[:, None], n[:, None]
    near = [(A - jnp.conj(ba) * bb) * mask, (B - ba * bb) * mask, (Z - na * bb) * mask,
            (D - na * nbb) * mask]
    fa, fb, fz, fd = far_cumulants(args, beta, n, om, det)
    keep = far == "first_order"
    dense = []
    for x, f in zip(near, (fa, fb, fz, fd), strict=True):
        base = f if keep else jnp.zeros_like(f)
        dense.append(base.at[rows, nbr].add(x))
    a, b, z, d = dense
    off = 1.0 - jnp.eye(N)
    Ad = (jnp.conj(beta)[:, None] * beta[None, :] + a) * off
    Bd = (beta[:, None] * beta[None, :] + b) * off
    Zd = (n[:, None] * beta[None, :] + z) * off
    Dd = (n[:, None] * n[None, :] + d) * off
    return beta, n, Ad, Bd, Zd, Dd, fa, near[0]
