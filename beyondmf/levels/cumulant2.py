"""Level "cumulant2": second-order cumulant expansion (all one- and two-emitter moments are dynamical).

Variables, with β_i = ⟨σ_i⁻⟩, n_i = ⟨σ_i⁺σ_i⁻⟩ and, for i ≠ j,

    A_ij = ⟨σ_i⁺σ_j⁻⟩ (Hermitian),  B_ij = ⟨σ_i⁻σ_j⁻⟩ (symmetric),
    Z_ij = ⟨n_i σ_j⁻⟩ (general),    D_ij = ⟨n_i n_j⟩ (real symmetric).

Products on one emitter are reduced exactly by the spin-½ algebra; three-emitter moments are factorised
with a vanishing third cumulant, ⟨XYW⟩ ≈ ⟨XY⟩⟨W⟩ + ⟨XW⟩⟨Y⟩ + ⟨YW⟩⟨X⟩ − 2⟨X⟩⟨Y⟩⟨W⟩. With K = ½Γ + iJ
(K_ii = 0), u = Kβ, p_a = Σ_j K_aj A_aj, r_a = Σ_j K_aj Z_aj and the "all but b" sums ũ_ab = u_a − K_ab β_b,
p̃_ab = p_a − K_ab A_ab, r̃_ab = r_a − K_ab Z_ab, Y_ab = 2(Z_ab − 2n_aβ_b), the equations (derived in
docs/cumulant2.md from conventions.md) are

    dβ_a/dt = (iΔ − ½)β_a + (i/2)Ω_a(2n_a − 1) + 2r_a − u_a
    dn_a/dt = −n_a − Im(Ω_a*β_a) − 2 Re p_a
    dB/dt  = (2iΔ − 1)B + C + Cᵀ,
        C_ab = (i/2)Ω_a(2Z_ab − β_b) + Y_ab ũ_ab + 2β_b r̃_ab + (2n_a − 1)(KB)_ab
    dA/dt  = M + M†,
        M_ab = −½A_ab − (i/2)Ω_a*(2Z_ab − β_b) + K_ab*(2D_ab − n_b)
               + Y_ab ũ_ab* + 2β_b r̃_ab* + (2n_a − 1)(K*A)_ab
    dZ_ab/dt = (iΔ − 3/2)Z_ab − (i/2)Ω_a A_ab + (i/2)Ω_a* B_ab + (i/2)Ω_b(2D_ab − n_a) − K_ab* Z_ba
               − 2β_b Re p̃_ab − β_a(K*A)_ab − β_a*(KB)_ab − (B_ab − 2β_aβ_b)ũ_ab* − (A_ab − 2β_a*β_b)ũ_ab
               + 2(D_ab − 2n_a n_b)ũ_ba + (2n_b − 1)(ZKᵀ)_ab + 2n_a r̃_ba
    dD/dt  = −2D + E + Eᵀ,
        E_ab = −Im(Ω_a* Z_ba) − 2 Re[n_b p̃_ab + (Z_ba* − 2β_a* n_b)ũ_ab + β_a*(ZKᵀ)_ba]

The three matrix products K*A, KB and ZKᵀ carry the O(N³) cost (12 real N³ products, 24N³ flops per
evaluation); everything else is O(N²). The state is one real (5, N, N) array: A packed as Re A + Im A
(its symmetric and antisymmetric parts), B as triu(Re B) + tril(Im B), Re Z, Im Z and D, with n, Re β
and Im β on the otherwise unused diagonals (see `unpack`): 5N² numbers, O(N²) memory.

Option ``pair_radius`` (λ0): pairs closer than it keep these equations in neighbour lists, farther pairs
follow the first-order rule of `_cumulant2_near` (``far_pairs="first_order"``) or are dropped (``"drop"``);
None (the default) or inf is this dense level. Diagnostics ``far_share`` and ``far_rate_correction``.

Method: H. Kramer and H. Ritsch, Eur. Phys. J. D 69, 282 (2015); F. Robicheaux and D. A. Suresh,
Phys. Rev. A 104, 023702 (2021). Exact for N = 2 (no three-emitter moments exist). Trustworthy where
three-body correlations are weak: moderate densities and drives; in dense, strongly driven clouds the
truncation can produce unphysical moments, reported per time in the diagnostics ``population_violation``,
``pair_violation`` and ``g2_violation`` (pair_violation warns above `VIOLATION_TOL`; populations and g2
outside their bounds are warned by `beyondmf.physicality`, as for every level).
"""

from __future__ import annotations

import dataclasses
from typing import Any

import jax.numpy as jnp
import numpy as np

from .._notes import warn as _note
from ..estimators_pair import pair_field_moments, pair_rate_moments
from ..integrate import ODE_OPTIONS, observe_once, per_envelope, pick_solver, settle, solve
from ..memory import require
from ..model import Envelope, Model
from . import _batch
from . import _cumulant2_near as _near
from .base import Level, Moments, OptionError, Probes, register

__all__ = ["Cumulant2", "cumulant2_rhs", "cumulant2_args", "product_state", "unpack", "pack",
           "VIOLATION_TOL", "RHS_FLOPS"]

VIOLATION_TOL = 1e-3  # diagnostics above this (probability units) raise a warning


def RHS_FLOPS(n: int) -> float:
    """Floating-point operations of the matrix products in one right-hand-side evaluation (24 N³)."""
    return 24.0 * n**3


def _zero_diag(x):
    idx = jnp.arange(x.shape[-1])
    return x.at[..., idx, idx].set(0)


def unpack(y):
    """Real (5, N, N) state → β, n, and the pair moments A, B, Z (complex) and D (real), zero diagonals.

    Layout: y[0] = Re A + Im A with n on its diagonal, y[1] = triu(Re B) + tril(Im B), y[2] = Re Z and
    y[3] = Im Z with Re β and Im β on their diagonals, y[4] = D.
    """
    idx = jnp.arange(y.shape[-1])
    n = y[0, idx, idx]
    beta = y[2, idx, idx] + 1j * y[3, idx, idx]
    ra, pb, zr, zi, d = _zero_diag(y)
    ar, ai = 0.5 * (ra + ra.T), 0.5 * (ra - ra.T)
    bu, bl = jnp.triu(pb, 1), jnp.tril(pb, -1)
    return beta, n, ar + 1j * ai, (bu + bu.T) + 1j * (bl + bl.T), zr + 1j * zi, d


def pack(beta, n, A, B, Z, D):
    """Inverse of `unpack`, for Hermitian A and symmetric B and D (their diagonals are ignored)."""
    packed_b = jnp.triu(B.real, 1) + jnp.tril(B.imag, -1)
    y = _zero_diag(jnp.stack([A.real + A.imag, packed_b, Z.real, Z.imag, D]))
    idx = jnp.arange(y.shape[-1])
    return y.at[0, idx, idx].set(n).at[2, idx, idx].set(beta.real).at[3, idx, idx].set(beta.imag)


def product_state(initial: np.ndarray) -> jnp.ndarray:
    """(N, 3) Bloch vectors of a product state → the cumulant2 state (see `unpack` for the layout)."""
    s = np.asarray(initial, dtype=float)
    beta = (s[:, 0] - 1j * s[:, 1]) / 2
    n = (1 + s[:, 2]) / 2
    A = np.conj(beta)[:, None] * beta[None, :]
    B = beta[:, None] * beta[None, :]
    Z = n[:, None] * beta[None, :]
    D = n[:, None] * n[None, :]
    return pack(*(jnp.asarray(x) for x in (beta, n, A, B, Z, D)))


def cumulant2_args(model: Model) -> dict[str, Any]:
    """K = ½Γ + iJ (zero diagonal) as real and imaginary parts, the drive and the detuning."""
    K = 0.5 * np.asarray(model.Gamma) + 1j * np.asarray(model.J)
    np.fill_diagonal(K, 0)
    om = model.rabi_sites
    return {
        "Kr": jnp.asarray(K.real),
        "Ki": jnp.asarray(K.imag),
        "omega": jnp.asarray(np.stack([om.real, om.imag])),
        "detuning": jnp.asarray(model.detunings),
    }


@per_envelope
def cumulant2_rhs(envelope: Envelope):
    """The cumulant2 right-hand side for one envelope (cached so equal envelopes share a compile)."""
    def rhs(t, y, args):
        beta, n, A, B, Z, D = unpack(y)
        Kr, Ki = args["Kr"], args["Ki"]
        K = Kr + 1j * Ki
        om = envelope(t) * (args["omega"][0] + 1j * args["omega"][1])
        det = args["detuning"]

        # the O(N³) part: K*A, KB and ZKᵀ as real products, batched
        X = jnp.stack([A.real, A.imag, B.real, B.imag])
        KrX, KiX = Kr @ X, Ki @ X
        KcA = (KrX[0] + KiX[1]) + 1j * (KrX[1] - KiX[0])
        KB = (KrX[2] - KiX[3]) + 1j * (KrX[3] + KiX[2])
        Zs = jnp.stack([Z.real, Z.imag])
        ZKr, ZKi = Zs @ Kr.T, Zs @ Ki.T
        ZKt = (ZKr[0] - ZKi[1]) + 1j * (ZKr[1] + ZKi[0])

        u = K @ beta
        p = jnp.sum(K * A, axis=1)
        r = jnp.sum(K * Z, axis=1)
        ut = u[:, None] - K * beta[None, :]  # ũ_ab: Σ_{j≠a,b} K_aj β_j
        pt = p[:, None] - K * A
        rt = r[:, None] - K * Z
        nn, bb = n[:, None], beta[None, :]
        Y = 2 * (Z - 2 * nn * bb)

        dbeta = (1j * det - 0.5) * beta + 0.5j * om * (2 * n - 1) + 2 * r - u
        dn = -n - jnp.imag(jnp.conj(om) * beta) - 2 * jnp.real(p)

        C = 0.5j * om[:, None] * (2 * Z - bb) + Y * ut + 2 * bb * rt + (2 * nn - 1) * KB
        dB = (1j * (det[:, None] + det[None, :]) - 1) * B + C + C.T

        M = (
            -0.5 * A
            - 0.5j * jnp.conj(om)[:, None] * (2 * Z - bb)
            + jnp.conj(K) * (2 * D - n[None, :])
            + Y * jnp.conj(ut)
            + 2 * bb * jnp.conj(rt)
            + (2 * nn - 1) * KcA
        )
        dA = M + jnp.conj(M.T) + 1j * (det[None, :] - det[:, None]) * A

        ba = beta[:, None]
        dZ = (
            (1j * det[None, :] - 1.5) * Z
            - 0.5j * om[:, None] * A
            + 0.5j * jnp.conj(om)[:, None] * B
            + 0.5j * om[None, :] * (2 * D - nn)
            - jnp.conj(K) * Z.T
            - 2 * bb * jnp.real(pt)
            - ba * KcA
            - jnp.conj(ba) * KB
            - (B - 2 * ba * bb) * jnp.conj(ut)
            - (A - 2 * jnp.conj(ba) * bb) * ut
            + 2 * (D - 2 * nn * n[None, :]) * ut.T
            + (2 * n[None, :] - 1) * ZKt
            + 2 * nn * rt.T
        )

        E = -jnp.imag(jnp.conj(om)[:, None] * Z.T) - 2 * jnp.real(
            n[None, :] * pt + (jnp.conj(Z.T) - 2 * jnp.conj(ba) * n[None, :]) * ut + jnp.conj(ba) * ZKt.T
        )
        dD = -2 * D + E + E.T

        return pack(dbeta, dn, dA, dB, dZ, dD)

    return rhs


def _observe(y, obs_args):
    weights, gamma = obs_args
    beta, n, A, B, Z, D = unpack(y)
    f2, f4 = pair_field_moments(beta, n, A, B, Z, D, weights)
    r2, r4 = pair_rate_moments(beta, n, A, B, Z, D, gamma)
    pop = jnp.max(jnp.maximum(n - 1, -n))
    pair_excess = _zero_diag(jnp.abs(A) ** 2 - n[:, None] * n[None, :])
    g2 = jnp.concatenate([f4 / f2**2, (r4 / r2**2)[None]])
    return {
        "excited": n,
        "coherence": beta,
        "field2": f2,
        "field4": f4,
        "rate": r2,
        "rate4": r4,
        "population_violation": jnp.maximum(pop, 0.0),
        "pair_violation": jnp.maximum(jnp.max(pair_excess), 0.0),
        "g2_violation": jnp.maximum(-jnp.min(jnp.where(jnp.isfinite(g2), g2, 0.0)), 0.0),
    }


_DIAGNOSTICS = {
    "population_violation": "worst excursion of an excited population outside [0, 1]",
    "pair_violation": "worst excess max_{i≠j}(|⟨σ_i⁺σ_j⁻⟩|² − n_i n_j), zero for a physical state",
    "g2_violation": "most negative g2 (detectors and total light), as a positive number; zero if none",
}


def _moments(obs, attrs) -> Moments:
    obs = {k: np.asarray(v) for k, v in obs.items()}
    diagnostics = {k: (("time",), obs.pop(k), {"units": "1", "long_name": text})
                   for k, text in _DIAGNOSTICS.items()}
    worst = {k: float(np.max(d[1])) for k, d in diagnostics.items()}
    # Populations outside [0, 1] and negative g2 are judged for every level by beyondmf.physicality (with
    # its standard of what is dark light); the Cauchy–Schwarz bound of a pair is this level's own check.
    if worst["pair_violation"] > VIOLATION_TOL:
        _note(
            f"cumulant2 produced pair moments no physical state has (|⟨σ_i⁺σ_j⁻⟩|² exceeds n_i n_j by "
            f"{worst['pair_violation']:.3g}, pair_violation; tolerance {VIOLATION_TOL:g}): the second-order "
            "truncation is not trustworthy here; compare with 'exact' (N ≲ 9) or 'jumps' on a smaller "
            "cluster of the same density"
        )
    attrs = {**attrs, **{f"max_{k}": v for k, v in worst.items()}}
    return Moments(**obs, diagnostics=diagnostics, attrs=attrs)


@register
class Cumulant2(Level):
    name = "cumulant2"
    summary = "second-order cumulants (all pair correlations, third cumulants zero); exact for N = 2"
    options = {**ODE_OPTIONS, "pair_radius": None, "far_pairs": "first_order"}
    when_unphysical = ("the pair truncation fails here (typically the subradiant tail of a dense cluster's "
                       "decay, docs/cumulant2.md); compare with 'exact' (N ≲ 9) or 'jumps' (N ≲ 12–14) on a "
                       "smaller cluster of the same density")

    def validate_options(self, options):
        super().validate_options(options)
        radius = options.get("pair_radius")
        if radius is not None and not (isinstance(radius, int | float) and not isinstance(radius, bool)
                                       and not np.isnan(radius) and radius > 0):
            raise OptionError("pair_radius", "must be None or inf (every pair dynamical, the dense level) "
                              f"or a positive distance in λ0, got {radius!r}")
        if options.get("far_pairs", "first_order") not in _near.FAR_RULES:
            raise OptionError("far_pairs", f"must be one of {', '.join(_near.FAR_RULES)}, got "
                              f"{options.get('far_pairs')!r}")

    def memory_bytes(self, model: Model, options) -> int:
        radius = _radius_of(options, model)
        if radius is not None:
            return _near_bytes(model, radius, options["far_pairs"])
        # 2 coupling matrices, the state (5 N²) and ~7 solver stages of it, and ~20 N² temporaries
        return 8 * model.n**2 * (2 + 5 * 9 + 20)

    def _prepare(self, model: Model, probes: Probes, options):
        need = self.memory_bytes(model, {**options, "pair_radius": None})
        require(need, f"cumulant2 for {model.n} emitters")
        solver = pick_solver(options["solver"], 5 * model.n**2, model.stiffness())
        gamma = jnp.asarray(model.Gamma)
        return solver, cumulant2_args(model), (jnp.asarray(probes.weights), gamma)

    def evolve(self, model, times, initial, probes, seed, options) -> Moments:
        if _radius_of(options, model) is not None:
            return _near_run(model, probes, options, times, initial)
        solver, args, obs_args = self._prepare(model, probes, options)
        obs, _, stats = solve(
            cumulant2_rhs(model.envelope), _observe, product_state(initial), args, obs_args, times, options,
            solver, jump_ts=model.envelope.jumps, what="cumulant2 evolution",
        )
        return _moments(obs, stats)

    def steady(self, model, probes, seed, options) -> Moments:
        if _radius_of(options, model) is not None:
            return _near_run(model, probes, options, None, None)
        solver, args, obs_args = self._prepare(model, probes, options)
        y0 = product_state(np.tile([0.0, 0.0, -1.0], (model.n, 1)))
        y, info = settle(
            cumulant2_rhs(model.envelope), _observe, y0, args, obs_args, options, solver,
            what="cumulant2 steady state",
        )
        obs = observe_once(_observe, y, obs_args)
        return _moments(obs, {"solver": solver, **info})

    # one solve for a scan of the drive (beyondmf.drive_scan; levels._batch); the dense level only
    def _batch_parts(self, models, probes, options):
        solver, _, obs_args = self._prepare(models[0], probes, options)
        rhs, observe = _batch.batched(cumulant2_rhs(models[0].envelope), _observe)
        return solver, _batch.stack_args([cumulant2_args(m) for m in models]), obs_args, rhs, observe

    def _bytes_each(self, model):
        return 8 * model.n**2 * (5 * 9 + 20)  # the state, ~7 solver stages of it and the temporaries

    def evolve_batch(self, models, times, initial, probes, seed, options):
        if _radius_of(options, models[0]) is not None:
            return super().evolve_batch(models, times, initial, probes, seed, options)
        size = self._bytes_each(models[0])
        return _batch.evolve_groups(models, times, product_state(initial), options, size,
                                    lambda g: self._batch_parts(g, probes, options), _moments, "cumulant2")

    def steady_batch(self, models, probes, seed, options):
        if _radius_of(options, models[0]) is not None:
            return super().steady_batch(models, probes, seed, options)
        ground = product_state(np.tile([0.0, 0.0, -1.0], (models[0].n, 1)))
        return _batch.steady_groups(self, models, ground, probes, seed, options, self._bytes_each(models[0]),
                                    lambda g: self._batch_parts(g, probes, options), _moments, "cumulant2")


# ---- pair radius: near pairs dynamical, far pairs by a rule (beyondmf/levels/_cumulant2_near.py) ----

FAR_SHARE_TOL = 0.5  # far-rule share of the pair correction of the emission rate above which a run warns,
FAR_RATE_TOL = 0.005  # if the far correction is also at least this fraction of the emission rate


def _make_near_observe(far: str):
    def observe(y, obs_args):
        weights, gamma, args, om, det = obs_args
        beta, n, A, B, Z, D, fa, near_a = _near.dense_moments(y, args, far, om, det)
        out = _observe(pack(beta, n, A, B, Z, D), (weights, gamma))
        g_near = gamma[jnp.arange(n.shape[0])[:, None], args["nbr"]]
        corr_near = jnp.real(jnp.sum(g_near * near_a))
        corr_far = jnp.real(jnp.sum(gamma * fa))
        out["far_share"] = jnp.abs(corr_far) / (jnp.abs(corr_far) + jnp.abs(corr_near) + 1e-300)
        out["far_rate_correction"] = corr_far
        return out
    return observe


_NEAR_OBSERVE = {far: _make_near_observe(far) for far in _near.FAR_RULES}
_NEAR_DIAGNOSTICS = {
    "far_share": "share of the pair correction of the emission rate carried by the far pairs (first-order "
                 "rule, |far| / (|far| + |near|)); small when the pair radius is large enough",
    "far_rate_correction": "Σ_far Γ_ij a_ij: the far pairs' correction to the emission rate by the "
                           "first-order rule (counted only with far_pairs='first_order')",
}


def _radius_of(options, model: Model | None = None):
    """The pair radius of a run, None for the dense level: pair_radius None or inf, or (given the model) a
    radius at least the diagonal of the cloud's bounding box, so that every pair is near (the same result,
    tested to 1e-11, at the dense level's cost; study files cannot hold None or inf in a grid)."""
    radius = options.get("pair_radius")
    if radius is None or np.isinf(radius):
        return None
    if model is not None:
        pos = np.asarray(model.positions)
        if radius >= float(np.linalg.norm(pos.max(axis=0) - pos.min(axis=0))):
            return None
    return float(radius)


def _near_bytes(model: Model, radius: float, far: str) -> int:
    """Memory of the near-pair run: the neighbour-list state and its solver stages, the far-pair matrices,
    the per-emitter K×K blocks, the dense moments and estimator temporaries at saved times."""
    n = model.n
    nbr, _, _ = _near.neighbours(model.positions, radius)
    k = nbr.shape[1]
    dense_obs = 8 * n**2 * (4 * 2 + 30 * 2)
    far_mats = 8 * n**2 * 3 if far == "first_order" else 0
    return 8 * n * _near.near_size(k) * 10 + far_mats + 8 * n * k * k * 4 + dense_obs


def _near_run(model: Model, probes: Probes, options, times, initial) -> Moments:
    radius, far = _radius_of(options), options["far_pairs"]
    if model.complex_couplings:
        raise ValueError("cumulant2 with pair_radius needs real symmetric couplings J and Γ (the far-pair "
                         "rule and the neighbour lists assume K_ij = K_ji); use pair_radius=None")
    if not model.envelope.constant:
        raise ValueError("cumulant2 with pair_radius needs a constant drive envelope (the far-pair rule of "
                         "the observables uses the drive at the saved times); use pair_radius=None")
    n = model.n
    require(_near_bytes(model, radius, far), f"cumulant2 (pair_radius {radius:g}) for {n} emitters")
    nbr, mask, _ = _near.neighbours(model.positions, radius)
    k = nbr.shape[1]
    args = _near.near_args(model, radius, far)
    solver = pick_solver(options["solver"], n * _near.near_size(k), model.stiffness())
    om = jnp.asarray(model.rabi_sites)
    obs_args = (jnp.asarray(probes.weights), jnp.asarray(model.Gamma), args, om, jnp.asarray(model.detunings))
    rhs, observe = _near.NEAR_RHS[far](model.envelope), _NEAR_OBSERVE[far]
    if times is None:
        y0 = _near.near_product_state(np.tile([0.0, 0.0, -1.0], (n, 1)), nbr, mask)
        y, info = settle(rhs, observe, y0, args, obs_args, options, solver, what="cumulant2 steady state")
        obs = observe_once(observe, y, obs_args)
        stats = {"solver": solver, **info}
    else:
        y0 = _near.near_product_state(initial, nbr, mask)
        obs, _, stats = solve(rhs, observe, y0, args, obs_args, times, options, solver,
                              jump_ts=model.envelope.jumps, what="cumulant2 evolution")
    obs = {key: np.asarray(v) for key, v in obs.items()}
    extra = {key: (("time",), obs.pop(key), {"units": "1" if key == "far_share" else "Γ0", "long_name": text})
             for key, text in _NEAR_DIAGNOSTICS.items()}
    share = float(np.max(extra["far_share"][1]))
    rate = np.abs(obs["rate"])
    far_rel = float(np.max(np.abs(extra["far_rate_correction"][1]) / np.where(rate > 0, rate, np.inf)))
    stats = {**stats, "pair_radius": radius, "far_pairs": far, "near_partners_max": k,
             "max_far_share": share, "max_far_rate_fraction": far_rel}
    if share > FAR_SHARE_TOL and far_rel > FAR_RATE_TOL:
        _note(
            f"cumulant2 with pair_radius {radius:g}: the far pairs carry {share:.0%} of the pair correction "
            f"of the emission rate (far_share; above {FAR_SHARE_TOL:.0%}), {far_rel:.1%} of the rate, so the "
            "result depends on the far-pair rule: raise pair_radius (or use pair_radius=None, every pair "
            "dynamical, at N³ cost)"
        )
    m = _moments(obs, stats)
    return dataclasses.replace(m, diagnostics={**m.diagnostics, **extra})
