"""Two-time functions of level "exact": the quantum regression theorem on the density matrix.

For the Lindblad generator 𝓛 of conventions.md and operators A, B, C, the regression theorem
(M. Lax, Phys. Rev. 129, 2342 (1963); H. J. Carmichael, Statistical Methods in Quantum Optics 1,
Springer (1999), §1.5) reads ⟨A(t) B(t + τ) C(t)⟩ = Tr[B X(τ)] with dX/dτ = 𝓛(t + τ) X and
X(0) = C ρ(t) A. With E = Σ_j w_j σ_j⁻ (the field towards a detector) and R = Σ Γ_ij σ_i⁺σ_j⁻:

    G1(τ) = ⟨E†(t)E(t+τ)⟩                      = Tr[E  X1(τ)],   X1(0) = ρ E†
    G2(τ) = ⟨E†(t)E†(t+τ)E(t+τ)E(t)⟩           = Tr[E†E X2(τ)],  X2(0) = E ρ E†
    Σ Γ_ijΓ_kl⟨σ_i⁺(t)σ_k⁺(t+τ)σ_l⁻(t+τ)σ_j⁻(t)⟩ = Tr[R X3(τ)],   X3(0) = Σ Γ_ij σ_j⁻ ρ σ_i⁺

X1 is not Hermitian, so the generator is applied in its general form 𝓛X = −i(H_eff X − X H_eff†) + 𝒥(X)
with X H_eff† = (H_eff X†)† (matrix-free, as the level's own right-hand side). ρ itself is evolved beside
them, so that intensities at t + τ are at hand (constant in a steady state: a check).

The inelastic spectrum comes from the resolvent of the same generator, S(ν) = (1/π) Re F(ν),
F(ν) = −Tr[E (𝓛 + iν)⁻¹ (ρE† − ⟨E†⟩ρ)], solved in one Krylov space for all frequencies, with 𝓛
replaced by 𝓛 − |ρ⟩⟨1| (equal on the trace-zero vectors that matter, and regular at ν = 0)
(`_krylov.shifted_resolvent`): no window, no frequency grid of the time axis, a residual checked at
every frequency.
"""

from __future__ import annotations

from functools import reduce

import jax
import jax.numpy as jnp
import numpy as np

from ..integrate import ODE_OPTIONS, SolveError, per_envelope, pick_solver, solve
from ..levels import _qubits as q
from ..levels.exact import DENSE_MAX_N, Exact, _dense_steady, exact_rhs
from ..memory import require
from ..model import Envelope, Model
from . import TwoTime
from ._krylov import shifted_resolvent

__all__ = ["OPTIONS", "SUPPORT", "check", "compute", "general_lindblad"]

OPTIONS = {**ODE_OPTIONS, "spectrum_tol": 1e-9, "krylov_max": 3000}
SUPPORT = "g1, g2, g2_total at every delay, spectrum (steady state), at a reference time of the dynamics"


def check(model, probes, delays, freqs, at) -> None:
    """Nothing beyond the level's own limits (memory, unique steady state), checked when computing."""


def _args(model: Model) -> dict:
    c = model.J - np.diag(model.detunings) - 0.5j * model.Gamma
    return {"C": jnp.asarray(c), "G": jnp.asarray(model.Gamma),
            "omega": jnp.asarray(model.rabi_sites.astype(complex)), "tab": q.site_tables(model.n)}


def general_lindblad(x, args, env):
    """𝓛X for a general (not necessarily Hermitian) (D, D) matrix X, drive envelope ``env``."""
    tab = args["tab"]
    half_om = 0.5 * env * args["omega"]
    hx, low = q.apply_heff(x, args["C"], half_om, tab)
    hxd, _ = q.apply_heff(jnp.conj(x.T), args["C"], half_om, tab)
    jump = q.raise_right(jnp.einsum("ij,jab->iab", args["G"], low), tab)
    return -1j * (hx - jnp.conj(hxd.T)) + jump


@per_envelope
def _stack_rhs(envelope: Envelope):
    def rhs(t, y, args):
        x = y[0] + 1j * y[1]
        d = jax.vmap(lambda xk: general_lindblad(xk, args, envelope(t)))(x)
        return jnp.stack([d.real, d.imag])

    return rhs


def _lower_traces(x, tab):
    """Tr(σ_j⁻ X) for every site j."""
    idx = jnp.arange(x.shape[0])
    return jnp.sum(x[tab["up"], idx[None, :]] * tab["empty"], axis=1)


def _observe(y, obs_args):
    weights, gamma, tab = obs_args
    x = y[0] + 1j * y[1]
    nd = weights.shape[0]
    rho, x1, x2, x3 = x[0], x[1:1 + nd], x[1 + nd:1 + 2 * nd], x[1 + 2 * nd]
    gd = jnp.conj(weights)[:, :, None] * weights[:, None, :]
    f2 = jax.vmap(lambda g: jnp.real(q.pair_trace(g, rho, tab)))(gd)
    rate = jnp.real(q.pair_trace(gamma, rho, tab))
    g1 = jax.vmap(lambda w, xk: w @ _lower_traces(xk, tab))(weights, x1)
    g2 = jax.vmap(lambda g, xk: jnp.real(q.pair_trace(g, xk, tab)))(gd, x2)
    g2t = jnp.real(q.pair_trace(gamma, x3, tab))
    return {"field2": f2, "rate": rate, "G1": g1, "G2": g2, "G2_total": g2t}


def _trace_only(y, obs_args):
    return {"trace": jnp.trace(y[0])}


def _start_vectors(rho, weights, gamma, tab):
    """ρ, ρE_d†, E_dρE_d† and Σ Γ_ij σ_j⁻ρσ_i⁺, stacked (K, D, D)."""
    low = q.lower(rho, tab)
    erho = jnp.einsum("dj,jab->dab", weights, low)
    cw = jnp.conj(weights)[:, :, None, None]
    x1 = jax.vmap(lambda c: q.raise_right(c * rho[None], tab))(cw)
    x2 = jax.vmap(lambda c, er: q.raise_right(c * er[None], tab))(cw, erho)
    x3 = q.raise_right(jnp.einsum("ij,jab->iab", gamma, low), tab)
    return jnp.concatenate([rho[None], x1, x2, x3[None]])


def _dense_fields(weights: np.ndarray, n: int) -> list[np.ndarray]:
    sm = np.array([[0, 1], [0, 0]], dtype=complex)  # σ⁻ = |g⟩⟨e|, |g⟩ = index 0 (`_qubits` convention)
    sites = [reduce(np.kron, [sm if k == j else np.eye(2) for k in range(n)]) for j in range(n)]
    return [sum(w[j] * sites[j] for j in range(n)) for w in weights]


def _state(model, probes, at, initial, options, solver):
    args = _args(model)
    obs_args = (jnp.asarray(probes.weights), jnp.asarray(model.Gamma), args["tab"])
    rhs = exact_rhs(model.envelope)
    if at is None:
        if model.n <= DENSE_MAX_N:
            y, info = _dense_steady(rhs, args, model.n)
        else:
            y, info = Exact()._settled_steady(model, rhs, args, obs_args, options, solver)
        return y[0] + 1j * y[1], info
    rho0 = q.product_density(initial)
    y0 = jnp.asarray(np.stack([rho0.real, rho0.imag]))
    if at == 0:
        return y0[0] + 1j * y0[1], {}
    _, y, stats = solve(rhs, _trace_only, y0, args, None, np.array([0.0, at]), options, solver,
                        jump_ts=model.envelope.jumps, what=f"exact evolution to at = {at:g}")
    return y[0] + 1j * y[1], {f"state_{k}": v for k, v in stats.items()}


def compute(model: Model, probes, delays, at, initial, freqs, options) -> TwoTime:
    n, nd = model.n, len(probes.names)
    k = 2 + 2 * nd
    require(16 * 4.0**n * k * (8 * n + 12), f"the exact two-time functions of {n} emitters")
    solver = pick_solver(options["solver"], 2 * k * 4**n, model.stiffness())
    args = _args(model)
    tab = args["tab"]
    weights, gamma = jnp.asarray(probes.weights), jnp.asarray(model.Gamma)
    rho, info = _state(model, probes, at, initial, options, solver)
    t0 = 0.0 if at is None else float(at)
    x0 = _start_vectors(rho, weights, gamma, tab)
    field1 = np.asarray(weights @ _lower_traces(rho, tab))
    out = TwoTime(field2=None, field1=field1, rate=None, attrs={"solver": solver, **info})
    if delays is not None:
        d = np.asarray(delays, dtype=float)
        ts = t0 + (d if d[0] == 0 else np.concatenate([[0.0], d]))
        y0 = jnp.stack([x0.real, x0.imag])
        obs, _, stats = solve(_stack_rhs(model.envelope), _observe, y0, args, (weights, gamma, tab), ts,
                              options, solver, jump_ts=model.envelope.jumps, what="exact regression")
        obs = {key: np.asarray(v)[(0 if d[0] == 0 else 1):] for key, v in obs.items()}
        out.field2_tau, out.rate_tau = obs["field2"], obs["rate"]
        out.G1, out.G2, out.G2_total = obs["G1"], obs["G2"], obs["G2_total"]
        out.attrs.update({f"regression_{key}": v for key, v in stats.items() if key != "solver"})
    eq = {key: np.asarray(v) for key, v in _observe(jnp.stack([x0.real, x0.imag]),
                                                     (weights, gamma, tab)).items()}
    out.field2, out.rate = eq["field2"], eq["rate"]
    if freqs is not None:
        out.inelastic, spec_info = _spectrum(model, rho, x0[1:1 + nd], field1, probes, args, freqs, options)
        out.attrs.update(spec_info)
    return out


@jax.jit
def _apply_flat(v, args):
    """𝓛 on a flat vector (constant drive), compiled once per size."""
    dim = args["tab"]["up"].shape[1]
    return general_lindblad(v.reshape(dim, dim), args, 1.0).reshape(-1)


def _spectrum(model, rho, x1, field1, probes, args, freqs, options):
    """S_d(ν) = (1/π) Re F_d(ν), F_d = −Tr[E_d (𝓛 + iν)⁻¹ (ρE_d† − ⟨E_d†⟩ρ)] (module docstring)."""
    dim = 2**model.n
    apply = _apply_flat

    rho = np.asarray(rho)
    flat_rho = rho.reshape(-1)
    diag = np.arange(dim) * (dim + 1)

    def matvec(v):
        # 𝓛' = 𝓛 − |ρ⟩⟨1|: the same on trace-zero vectors, and regular (𝓛 is singular at ν = 0, and round-off
        # would let the Krylov space pick up the stationary direction once it fills the whole space)
        return np.asarray(apply(jnp.asarray(v), args)) - flat_rho * np.sum(v[diag])

    spectra, dims, worst = [], [], 0.0
    for e, x, f in zip(_dense_fields(probes.weights, model.n), np.asarray(x1), field1, strict=True):
        b = x - np.conj(f) * rho  # trace zero: no stationary part left
        try:
            F, info = shifted_resolvent(matvec, b, e.T, freqs, tol=options["spectrum_tol"],
                                        max_dim=int(options["krylov_max"]))
        except RuntimeError as err:
            raise SolveError(f"exact spectrum: {err}; raise the option krylov_max, or spectrum_tol") from None
        spectra.append(F.real / np.pi)
        dims.append(info["krylov_dimension"])
        worst = max(worst, info["krylov_residual"])
    return np.stack(spectra, axis=1), {"krylov_dimension": dims, "krylov_residual": worst}
