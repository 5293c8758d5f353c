"""Two-time functions of level "cumulant2": the regression equations under the same closure.

The regression theorem evolves X(τ) = e^{𝓛τ}(ρ E†) with the generator of ρ itself. Split off the part
along ρ: ρE† = ⟨E†⟩ρ + X, Tr X = 0, so that

    G1(τ) = ⟨E†⟩⟨E⟩(τ) + Tr[E e^{𝓛τ} X].

X is a first-order change of the state, and cumulant2 evolves a state's moments y with ẏ = f(y); the
regression equations under its closure are therefore the tangent (linearised) equations
δẏ = (∂f/∂y)(y(t + τ)) δy, started from the moments δy(0) of X. Those moments are ⟨E†O⟩ − ⟨E†⟩⟨O⟩ for
the variables O of the level (σ_a⁻, n_a, σ_a⁺σ_b⁻, σ_a⁻σ_b⁻, n_aσ_b⁻, n_an_b), three-emitter moments
evaluated with the level's rule (spin-½ algebra on coincident sites, vanishing third cumulant on distinct
ones); E† is the fixed factor. X is not Hermitian, while the level's state is the moments of a Hermitian
operator: X = H1 + iH2 with H1 = (X + X†)/2 and H2 = (X − X†)/2i Hermitian, two real tangents per
detector (the moments of X† are ⟨O E⟩ − ⟨E⟩⟨O⟩). Derivation and the N = 2 exactness: docs/correlations.md.

The spectrum is −Tr[E(J + iν)⁻¹X]/π with J = ∂f/∂y at the steady state, in one Krylov space
(`_krylov`); a Ritz value with a positive real part means the closure's steady state is unstable, and is
warned about.

G2 starts from Δ = EρE† − ⟨E†E⟩ρ (Hermitian, trace zero), one real tangent per detector, whose moments
are those of E·Y with Y = ρE† treated the same way (`_g2_tangent`); all light sums this over the decay
modes of Γ. Then G2(τ) = ⟨E†E⟩(t)⟨E†E⟩(t + τ) + ⟨E†E⟩ of the tangent at τ.
"""

from __future__ import annotations

import jax
import jax.numpy as jnp
import numpy as np

from .._notes import warn
from ..estimators_pair import pair_field_moments, pair_rate_moments
from ..integrate import ODE_OPTIONS, SolveError, per_envelope, pick_solver, settle, solve
from ..levels.cumulant2 import cumulant2_args, cumulant2_rhs, pack, product_state, unpack
from ..memory import require
from ..model import Envelope
from . import TwoTime
from ._krylov import shifted_resolvent

__all__ = ["OPTIONS", "SUPPORT", "check", "compute", "fixed_factor_moments"]

OPTIONS = {**ODE_OPTIONS, "spectrum_tol": 1e-9, "krylov_max": 1500}
SUPPORT = "g1, g2, g2_total at every delay and the spectrum (tangent equations of the closure)"

_LEFT = {"m": "n", "n": "0", "1": "p", "p": "0"}  # σ⁺·x on one emitter
_RIGHT = {"p": "n", "n": "0", "1": "m", "m": "0"}  # x·σ⁻ on one emitter


def check(model, probes, delays, freqs, at) -> None:
    if freqs is not None and at is not None:  # the entry point refuses this already
        raise ValueError("frequencies need the steady state")


def _one(x, beta, n):
    ones = jnp.ones_like(n)
    return {"p": jnp.conj(beta), "m": beta, "n": n + 0j, "1": ones + 0j, "0": 0 * ones + 0j}[x]


def _pair(x, y, beta, n, A, B, Z, D):
    """⟨x_a y_b⟩ for a ≠ b (zero diagonal); x, y single-emitter operators p = σ⁺, m = σ⁻, n, 1, 0."""
    size = n.shape[0]
    off = 1.0 - jnp.eye(size)
    if "0" in (x, y):
        return jnp.zeros((size, size), dtype=complex)
    if x == "1":
        return off * _one(y, beta, n)[None, :]
    if y == "1":
        return off * _one(x, beta, n)[:, None]
    table = {("p", "m"): A, ("m", "p"): A.T, ("m", "m"): B, ("p", "p"): jnp.conj(B), ("n", "m"): Z,
             ("m", "n"): Z.T, ("n", "p"): jnp.conj(Z), ("p", "n"): jnp.conj(Z).T, ("n", "n"): D + 0j}
    return off * table[(x, y)]


def fixed_factor_moments(moments, c, f):
    """The level's variables O with a fixed factor F = Σ_i c_i f_i: ⟨F O⟩ (f = "p", F on the left) or
    ⟨O F⟩ (f = "m", on the right), as (β-like, n-like, A-like, B-like, Z-like, D-like) arrays.

    Coincident sites by the spin-½ algebra, three distinct sites by the vanishing third cumulant:
    Σ_{i≠a,b} c_i⟨f_i Q_a R_b⟩ = (S − c_a⟨f_a⟩ − c_b⟨f_b⟩)(⟨Q_aR_b⟩ − 2q_a r_b)
        + q_a(V^R_b − c_a⟨f_aR_b⟩) + r_b(V^Q_a − c_b⟨f_bQ_a⟩),
    S = Σ_i c_i⟨f_i⟩, V^X_b = Σ_{i≠b} c_i⟨f_i X_b⟩, q = ⟨Q⟩, r = ⟨R⟩.
    """
    beta, n, A, B, Z, D = moments
    mul = _LEFT if f == "p" else _RIGHT

    def prod(x):  # the single-site product f·x (left) or x·f (right)
        return mul[x]

    def pair(x, y):
        return _pair(x, y, beta, n, A, B, Z, D)

    one = lambda x: _one(x, beta, n)  # noqa: E731
    fv = one(f)
    S = jnp.sum(c * fv)

    def m1(q):
        return c * one(prod(q)) + (c @ pair(f, q))

    def m2(q, r):
        qa, rb = one(q)[:, None], one(r)[None, :]
        rest = S - (c * fv)[:, None] - (c * fv)[None, :]
        vr = (c @ pair(f, r))[None, :]
        vq = (c @ pair(f, q))[:, None]
        three = (rest * (pair(q, r) - 2 * qa * rb) + qa * (vr - c[:, None] * pair(f, r))
                 + rb * (vq - c[None, :] * pair(f, q).T))
        coinc = c[:, None] * pair(prod(q), r) + c[None, :] * pair(q, prod(r))
        return (coinc + three) * (1.0 - jnp.eye(n.shape[0]))

    return (m1("m"), m1("n"), m2("p", "m"), m2("m", "m"), m2("n", "m"), m2("n", "n"))


def _g1_tangent(y, w):
    """Real tangents (2, 5, N, N): the moments of H1 and H2 of X = ρE† − ⟨E†⟩ρ, E = Σ_j w_j σ_j⁻."""
    mom = unpack(y)
    beta, n, A, B, Z, D = mom
    base = (beta, n + 0j, A, B, Z, D + 0j)
    left = fixed_factor_moments(mom, jnp.conj(w), "p")  # ⟨E† O⟩
    right = fixed_factor_moments(mom, w, "m")  # ⟨O E⟩
    e_dag, e = jnp.sum(jnp.conj(w * beta)), jnp.sum(w * beta)
    mx = [lv - e_dag * b for lv, b in zip(left, base, strict=True)]
    mxd = [rv - e * b for rv, b in zip(right, base, strict=True)]
    out = []
    for h in ([(a + b) / 2 for a, b in zip(mx, mxd, strict=True)],
              [(a - b) / 2j for a, b in zip(mx, mxd, strict=True)]):
        hb, hn, hA, hB, hZ, hD = h
        out.append(pack(hb, hn.real, hA, hB, hZ, hD.real))
    return jnp.stack(out)


def _g2_tangent(y, w):
    """Real tangent (5, N, N): the moments of Δ = EρE† − ⟨E†E⟩ρ.

    EρE† = E Y with Y = ρE† = ⟨E†⟩ρ + X, so Tr(O EρE†) = ⟨O E⟩_Y = ⟨E†⟩ R(y) + R′(y)[δy_X], with
    R(y) = ⟨O E⟩ of the state y (`fixed_factor_moments`, E on the right) and R′ its linearisation in the
    direction of X's moments (H1 + i·H2): the closure applied to Y as to a first-order change of ρ.
    """
    beta, n, A, B, Z, D = unpack(y)
    base = (beta, n + 0j, A, B, Z, D + 0j)
    t1, t2 = _g1_tangent(y, w)

    def R(z):
        return fixed_factor_moments(unpack(z), w, "m")

    r0, d1 = jax.jvp(R, (y,), (t1,))
    _, d2 = jax.jvp(R, (y,), (t2,))
    e_dag = jnp.sum(jnp.conj(w * beta))
    moments = [e_dag * a + b + 1j * c for a, b, c in zip(r0, d1, d2, strict=True)]
    p = _linear_pair_sum(jnp.conj(w)[:, None] * w[None, :], y)  # Tr(E ρ E†) = ⟨E†E⟩
    hb, hn, hA, hB, hZ, hD = [m - p * b for m, b in zip(moments, base, strict=True)]
    return pack(hb, hn.real, hA, hB, hZ, hD.real)


def _tangents(y, weights, gamma):
    """Every tangent the regression evolves: (3D + 1, 5, N, N) real.

    [g1: H1, H2 per detector | G2: one per detector | G2_total: Σ_m over the decay modes of Γ]
    Γ = U diag(γ) Uᵀ* gives Σ Γ_ij σ_j⁻ρσ_i⁺ = Σ_m L_m ρ L_m†, L_m = √γ_m Σ_j U_jm* σ_j⁻.
    """
    g1 = jax.vmap(lambda w: _g1_tangent(y, w))(weights).reshape((-1,) + y.shape)
    g2 = jax.vmap(lambda w: _g2_tangent(y, w))(weights)
    gam, U = jnp.linalg.eigh(gamma)
    modes = (jnp.sqrt(jnp.clip(gam, 0.0, None))[:, None] * jnp.conj(U.T))  # row m: weights of L_m

    def add(total, w):
        return total + _g2_tangent(y, w), None

    tot, _ = jax.lax.scan(add, jnp.zeros_like(y), modes)
    return jnp.concatenate([g1, g2, tot[None]])


_tangents_jit = jax.jit(_tangents)


@per_envelope
def _tangent_rhs(envelope: Envelope):
    """The tangent equations about a fixed base state (the steady state, in args["base"])."""
    f = cumulant2_rhs(envelope)

    def rhs(t, y, args):
        _, lin = jax.linearize(lambda z: f(t, z, args["c2"]), args["base"])
        return jax.vmap(lin)(y)

    return rhs


@per_envelope
def _joint_rhs(envelope: Envelope):
    """State and tangents together (a reference time of the dynamics): y[0] the state, y[1:] tangents."""
    f = cumulant2_rhs(envelope)

    def rhs(t, y, args):
        fy, lin = jax.linearize(lambda z: f(t, z, args["c2"]), y[0])
        return jnp.concatenate([fy[None], jax.vmap(lin)(y[1:])])

    return rhs


def _observe_tangent(y, obs_args):
    """G1 − ⟨E†⟩⟨E⟩ = Σ_j w_dj δβ_j of the tangents (H1 + i·H2 per detector)."""
    return _observe(y, obs_args, False)


def _observe_joint(y, obs_args):
    """The same for y[1:], and ⟨E†E⟩, ⟨E⟩ and P of the state y[0]."""
    return _observe(y, obs_args, True)


def _linear_pair_sum(G, y):
    """Σ_j G_jj n_j + Σ_{i≠j} G_ij A_ij of a (tangent) state: ⟨E†E⟩ (G = w*wᵀ) or P (G = Γ), linear."""
    beta, n, A, B, Z, D = unpack(y)
    return jnp.real(jnp.sum(jnp.real(jnp.diagonal(G)) * n) + jnp.sum(G * A))


def _observe(y, obs_args, joint):
    weights, gamma = obs_args
    nd = weights.shape[0]
    tangents = y[1:] if joint else y
    idx = jnp.arange(y.shape[-1])
    t1 = tangents[: 2 * nd]
    dbeta = t1[:, 2, idx, idx] + 1j * t1[:, 3, idx, idx]  # (2D, N)
    per = jnp.einsum("dj,dkj->dk", weights, dbeta.reshape(nd, 2, -1))
    gd = jnp.conj(weights)[:, :, None] * weights[:, None, :]
    out = {"G1": per[:, 0] + 1j * per[:, 1],
           "dG2": jax.vmap(_linear_pair_sum)(gd, tangents[2 * nd: 3 * nd]),
           "dG2_total": _linear_pair_sum(gamma, tangents[3 * nd])}
    if joint:
        beta, n, A, B, Z, D = unpack(y[0])
        out["field2"] = pair_field_moments(beta, n, A, B, Z, D, weights)[0]
        out["rate"] = pair_rate_moments(beta, n, A, B, Z, D, gamma)[0]
        out["field1"] = weights @ beta
    return out


def _trace_only(y, obs_args):
    return {"n": y[0, 0, 0]}


def compute(model, probes, delays, at, initial, freqs, options) -> TwoTime:
    n, nd = model.n, len(probes.names)
    require(8 * n**2 * 5 * (3 * nd + 2) * 10, f"the cumulant2 regression of {n} emitters")
    solver = pick_solver(options["solver"], 5 * n**2 * (3 * nd + 2), model.stiffness())
    c2 = cumulant2_args(model)
    weights, gamma = jnp.asarray(probes.weights), jnp.asarray(model.Gamma)
    if at is None:
        y0 = product_state(np.tile([0.0, 0.0, -1.0], (n, 1)))
        y, info = settle(cumulant2_rhs(model.envelope), _trace_only, y0, c2, None, options, solver,
                         what="cumulant2 steady state")
    elif at == 0:
        y, info = product_state(initial), {}
    else:
        _, y, stats = solve(cumulant2_rhs(model.envelope), _trace_only, product_state(initial), c2, None,
                            np.array([0.0, at]), options, solver, jump_ts=model.envelope.jumps,
                            what=f"cumulant2 evolution to at = {at:g}")
        info = {f"state_{k}": v for k, v in stats.items()}
    beta, nn, A, B, Z, D = unpack(y)
    f2 = np.asarray(pair_field_moments(beta, nn, A, B, Z, D, weights)[0])
    rate = float(pair_rate_moments(beta, nn, A, B, Z, D, gamma)[0])
    field1 = np.asarray(weights @ beta)
    f4 = np.asarray(pair_field_moments(beta, nn, A, B, Z, D, weights)[1])
    r4 = float(pair_rate_moments(beta, nn, A, B, Z, D, gamma)[1])
    # the level's own equal-time g2 (third and fourth cumulants zero), beside the regression's g2(0)
    attrs = {"solver": solver, **info, "equal_time_g2": [float(v) for v in f4 / f2**2],
             "equal_time_g2_total": r4 / rate**2}
    out = TwoTime(field2=f2, field1=field1, rate=rate, attrs=attrs)
    tan = _tangents_jit(y, weights, gamma)
    if delays is not None:
        d = np.asarray(delays, dtype=float)
        t0 = 0.0 if at is None else at
        ts = t0 + (d if d[0] == 0 else np.concatenate([[0.0], d]))
        keep = 0 if d[0] == 0 else 1
        if at is None:
            obs, _, stats = solve(_tangent_rhs(model.envelope), _observe_tangent, tan,
                                  {"c2": c2, "base": y}, (weights, gamma), ts, options, solver,
                                  what="cumulant2 regression")
            obs = {k: np.asarray(v)[keep:] for k, v in obs.items()}
            out.field2_tau = np.broadcast_to(f2, obs["G1"].shape)
            out.rate_tau = np.full(obs["G1"].shape[0], rate)
            out.G1 = np.conj(field1)[None, :] * field1[None, :] + obs["G1"]
        else:
            joint = jnp.concatenate([y[None], tan])
            obs, _, stats = solve(_joint_rhs(model.envelope), _observe_joint, joint, {"c2": c2},
                                  (weights, gamma), ts, options, solver, jump_ts=model.envelope.jumps,
                                  what="cumulant2 regression")
            obs = {k: np.asarray(v)[keep:] for k, v in obs.items()}
            out.field2_tau, out.rate_tau = obs["field2"], obs["rate"]
            out.G1 = np.conj(field1)[None, :] * obs["field1"] + obs["G1"]
        # G2(τ) = ⟨E†E⟩(t)·⟨E†E⟩(t + τ) + the tangent's ⟨E†E⟩ (and the same with P for all light)
        out.G2 = f2[None, :] * out.field2_tau + obs["dG2"]
        out.G2_total = rate * out.rate_tau + obs["dG2_total"]
        out.attrs.update({f"regression_{k}": v for k, v in stats.items() if k != "solver"})
    if freqs is not None:
        out.inelastic, kinfo = _spectrum(model, y, tan, c2, probes, freqs, options)
        out.attrs.update(kinfo)
    return out


@per_envelope
def _jacobian_product(envelope: Envelope):
    """(∂f/∂y)(y)·v for a batch of real v, compiled once per envelope and shape (the model is an argument)."""
    f = cumulant2_rhs(envelope)

    @jax.jit
    def jvp(y, vs, c2):
        _, lin = jax.linearize(lambda z: f(0.0, z, c2), y)
        return jax.vmap(lin)(vs)

    return jvp


def _spectrum(model, y, tan, c2, probes, freqs, options):
    n = model.n
    krylov = int(options["krylov_max"])
    require(16.0 * 5 * n**2 * (krylov + 1), f"the cumulant2 spectrum of {n} emitters (Krylov basis of up to "
            f"{krylov} vectors; lower krylov_max)")
    jvp = _jacobian_product(model.envelope)
    shape = y.shape

    def matvec(v):  # the complex-linear extension of the real Jacobian
        v = v.reshape(shape)
        pair = jnp.asarray(np.stack([v.real, v.imag]))
        out = np.asarray(jvp(y, pair, c2))
        return (out[0] + 1j * out[1]).ravel()

    tan = np.asarray(tan)
    spectra, dims, worst, unstable = [], [], 0.0, -np.inf
    idx = np.arange(n)
    for k, w in enumerate(probes.weights):
        b = tan[2 * k] + 1j * tan[2 * k + 1]  # the g1 tangents H1 + i·H2 of detector k
        u = np.zeros(shape, dtype=complex)
        u[2, idx, idx], u[3, idx, idx] = w, 1j * w  # Σ_j w_j δβ_j
        try:
            F, info = shifted_resolvent(matvec, b, u, freqs, tol=options["spectrum_tol"], max_dim=krylov)
        except RuntimeError as err:
            raise SolveError(f"cumulant2 spectrum: {err}; raise the option krylov_max, or spectrum_tol") \
                from None
        spectra.append(F.real / np.pi)
        dims.append(info["krylov_dimension"])
        worst = max(worst, info["krylov_residual"])
        unstable = max(unstable, info.get("ritz_max_real", -np.inf))
    if unstable > 1e-9:
        warn(f"cumulant2 spectrum: the linearised closure has a growing mode (Ritz value with real part "
             f"{unstable:.3g} Γ0 > 0) about its steady state, which is then unstable; the spectrum is not "
             "meaningful here: compare with level 'exact' at small N")
    return np.stack(spectra, axis=1), {"krylov_dimension": dims, "krylov_residual": worst,
                                       "ritz_max_real": unstable}
