"""Two-time functions of level "dicke": the regression theorem in the symmetric space J = N/2.

With all-to-all couplings the total emission is that of the collective operator J⁻ = Σ_j σ_j⁻, and the
regression vectors ρJ⁺ and J⁻ρJ⁺ stay in the (N + 1)-dimensional symmetric space, where the level's own
right-hand side (`levels.dicke.dicke_rhs`, valid for any matrix, not only Hermitian ones) evolves them:

    G2_total(τ) = Tr[J⁺J⁻ X2(τ)], X2(0) = J⁻ρJ⁺;      G1(τ) = Tr[J⁻ X1(τ)], X1(0) = ρJ⁺.

A detector's field E_d = Σ_j w_dj σ_j⁻ is w J⁻ only when its phases w_dj are the same for every emitter
(the forward detector of emitters in one plane l̂·r = const mod 1, or every detector for emitters at one
point); other detectors see single-emitter operators that leave the symmetric space, and are refused
(use level "exact"). The spectrum comes from the resolvent of the same generator in one Krylov space
(`_krylov`), as at level exact.
"""

from __future__ import annotations

import jax
import jax.numpy as jnp
import numpy as np

from ..integrate import ODE_OPTIONS, SolveError, hermitian_unit_trace, per_envelope, settle, solve
from ..levels.dicke import Dicke, _observe, coherent_state, dicke_rhs
from ..model import Envelope
from . import TwoTime
from ._krylov import shifted_resolvent

__all__ = ["OPTIONS", "SUPPORT", "check", "compute"]

OPTIONS = {**ODE_OPTIONS, "spectrum_tol": 1e-9, "krylov_max": 3000}
SUPPORT = ("g1, g2 (detectors with equal phases on every emitter), g2_total, spectrum, at a reference "
           "time; permutation-symmetric models only")


def _uniform(w: np.ndarray) -> bool:
    return bool(np.allclose(w, w[0], atol=1e-9))


def check(model, probes, delays, freqs, at) -> None:
    Dicke().check(model)
    odd = [name for name, w in zip(probes.names, probes.weights, strict=True) if not _uniform(w)]
    if odd:
        raise ValueError(
            f"level 'dicke' gives two-time functions only for detectors that see every emitter with the same "
            f"phase e^{{−i2π n̂·r_j}} (then E = w J⁻ stays in the symmetric space); detector(s) "
            f"{', '.join(map(repr, odd))} do not. Use the forward detector of emitters in one plane "
            "l̂·r = const mod 1, put the emitters at one point, or use level 'exact'"
        )


@per_envelope
def _stack_rhs(envelope: Envelope):
    single = dicke_rhs(envelope)

    def rhs(t, y, args):
        return jax.vmap(lambda yk: single(t, yk, args), in_axes=1, out_axes=1)(y)

    return rhs


def _ops(n: int):
    k = np.arange(n + 1)
    a = np.sqrt(k * (n - k + 1.0))
    jm = np.diag(a[1:], 1)  # J⁻|k⟩ = a_k|k − 1⟩: (J⁻)_{k−1,k} = a_k
    return jm, jm.T


def _observe_tt(y, obs_args):
    jm, jp = obs_args
    x = y[0] + 1j * y[1]
    r = jp @ jm
    return {"rate": jnp.real(jnp.trace(r @ x[0])), "G1": jnp.trace(jm @ x[1]),
            "G2": jnp.real(jnp.trace(r @ x[2]))}


def _trace_only(y, obs_args):
    return {"trace": jnp.trace(y[0])}


def _state(model, probes, at, initial, options):
    lvl = Dicke()
    solver, args, obs_args = lvl._prepare(model, probes, options)
    rhs = dicke_rhs(model.envelope)
    n = model.n
    if at is None:
        y0 = np.zeros((2, n + 1, n + 1))
        y0[0, 0, 0] = 1.0
        y, info = settle(rhs, _observe, jnp.asarray(y0), args, obs_args, options, solver,
                         project=hermitian_unit_trace, linear=True, what="Dicke-space steady state")
        return np.asarray(y[0] + 1j * y[1]), solver, args, info
    s = np.asarray(initial, dtype=float)
    if not np.allclose(s, s[0], atol=1e-12) or abs(np.linalg.norm(s[0]) - 1) > 1e-9:
        raise ValueError("level 'dicke' needs a symmetric pure initial state (every emitter with the same "
                         "unit Bloch vector); use level 'exact' for other initial states")
    c = coherent_state(n, s[0])
    z = np.outer(c, np.conj(c))
    if at == 0:
        return z, solver, args, {}
    y0 = jnp.asarray(np.stack([z.real, z.imag]))
    _, y, stats = solve(rhs, _trace_only, y0, args, None, np.array([0.0, at]), options, solver,
                        jump_ts=model.envelope.jumps, what=f"Dicke-space evolution to at = {at:g}")
    return np.asarray(y[0] + 1j * y[1]), solver, args, {f"state_{k}": v for k, v in stats.items()}


@per_envelope
def _apply_flat(envelope: Envelope):
    """𝓛 on a flat complex vector, compiled once per envelope and size."""
    rhs = dicke_rhs(envelope)

    @jax.jit
    def apply(v, args):
        m1 = args["k"].shape[0]
        r = rhs(0.0, jnp.stack([v.real, v.imag]).reshape(2, m1, m1), args)
        return (r[0] + 1j * r[1]).reshape(-1)

    return apply


def compute(model, probes, delays, at, initial, freqs, options) -> TwoTime:
    n = model.n
    rho, solver, args, info = _state(model, probes, at, initial, options)
    jm, jp = _ops(n)
    w = probes.weights[:, 0]  # one phase per detector (checked uniform)
    a2 = np.abs(w) ** 2
    mean_jm = np.trace(jm @ rho)
    rate = float(np.trace(jp @ jm @ rho).real)
    out = TwoTime(field2=a2 * rate, field1=w * mean_jm, rate=rate, attrs={"solver": solver, **info})
    x0 = np.stack([rho, rho @ jp, jm @ rho @ jp])
    if delays is not None:
        d = np.asarray(delays, dtype=float)
        t0 = 0.0 if at is None else at
        ts = t0 + (d if d[0] == 0 else np.concatenate([[0.0], d]))
        y0 = jnp.asarray(np.stack([x0.real, x0.imag]))
        obs, _, stats = solve(_stack_rhs(model.envelope), _observe_tt, y0, args,
                              (jnp.asarray(jm), jnp.asarray(jp)), ts, options, solver,
                              jump_ts=model.envelope.jumps, what="Dicke-space regression")
        obs = {k: np.asarray(v)[(0 if d[0] == 0 else 1):] for k, v in obs.items()}
        out.rate_tau, out.G2_total = obs["rate"], obs["G2"]
        out.field2_tau = obs["rate"][:, None] * a2[None, :]
        out.G1 = obs["G1"][:, None] * a2[None, :]
        out.G2 = obs["G2"][:, None] * (a2**2)[None, :]
        out.attrs.update({f"regression_{k}": v for k, v in stats.items() if k != "solver"})
    if freqs is not None:
        m1 = n + 1
        apply = _apply_flat(model.envelope)
        flat_rho, diag = rho.reshape(-1), np.arange(m1) * (m1 + 1)

        def matvec(v):  # 𝓛 − |ρ⟩⟨1| (as at level exact)
            return np.asarray(apply(jnp.asarray(v), args)) - flat_rho * np.sum(v[diag])

        b = x0[1] - np.trace(x0[1]) * rho
        try:
            F, kinfo = shifted_resolvent(matvec, b, jm.T, freqs, tol=options["spectrum_tol"],
                                         max_dim=int(options["krylov_max"]))
        except RuntimeError as err:
            raise SolveError(f"Dicke-space spectrum: {err}; raise the option krylov_max, or spectrum_tol") \
                from None
        out.inelastic = (F.real / np.pi)[:, None] * a2[None, :]
        out.attrs.update(kinfo)
    return out
