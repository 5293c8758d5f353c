"""Level "qsd_product": quantum state diffusion trajectories restricted to product states.

Each trajectory is a pure product state, one Bloch vector s_i = (x_i, y_i, z_i) with |s_i| = 1 per emitter.
It follows the quantum state diffusion unravelling of the master equation of conventions.md (N. Gisin,
I. C. Percival, J. Phys. A 25, 5677 (1992)) with the jump operators L_m = Σ_j c_mj σ_j⁻ of any
factorisation Γ = c†c, evaluated in the product state (derivation: docs/qsd_product.md). In Itô form

    dβ_i = [mean-field drift] dt − β_i² dζ_i + (n_i − |β_i|²) dζ_i*,        β_i = ⟨σ_i⁻⟩ = (x_i − i y_i)/2
    dn_i = [mean-field drift] dt − n_i (β_i dζ_i + β_i* dζ_i*),              n_i = ⟨σ_i⁺σ_i⁻⟩ = (1 + z_i)/2
    ⟨dζ_i dζ_j*⟩ = Γ_ij dt,   ⟨dζ_i dζ_j⟩ = 0,

the drift being the mean-field drift of level "meanfield" (exact for the one-body means of a product
state). The noise of emitter i vanishes in its ground state, so the undriven ground state is exactly dark;
one emitter is exact (its pure state is a product state); to first order in Ω the noise is O(Ω²), so the
coupled-dipole linear response is exact in the mean. Integrated in Stratonovich form (the Itô correction,
local to each emitter, is added analytically) with the stochastic Heun scheme, and renormalised to
|s_i| = 1 after every step (the exact trajectories stay pure).

Approximation: the entanglement that the exchange J and the collective decay build within a trajectory is
dropped; correlations between emitters are only the classical ones between trajectories. Where to trust it
(measured, docs/qsd_product.md): the undriven and weakly driven dense cloud, one emitter, the superradiant
burst of an inverted cloud (Dicke peak within 1 %). Where not: strongly driven clusters with strong exchange
(errors like mean field's or larger, 18–29 % of the peak emission rate for the dense chains of the docs),
the slow tail of a dense inverted cluster (12–37 % in relative terms), and photon statistics (g2) of a
driven cloud with close pairs (errors of order one). Every run reports ``exchange_leak`` and ``decay_leak``,
the rates per excitation at which the exchange and the collective decay take the trajectories out of
product states, and warns when the first, averaged over the last 2/Γ0, exceeds 0.05 Γ0, or the second,
while the laser is on, exceeds 0.03 Γ0 (g2) or, under strong drive, 0.1 Γ0 (the emission rate too).
"""

from __future__ import annotations

from typing import Any

import jax
import jax.numpy as jnp
import numpy as np

from .._notes import warn as _note
from ..memory import require
from ._spin_sampling import SpinEquations, SpinSampling
from .base import register

__all__ = ["ProductStateDiffusion", "laser_on", "remembered_leak", "sample_pure"]

# The warning: exchange_leak (per excitation) low-pass filtered with the memory 1/γ of a driven emitter's
# coherence (γ = Γ0/2), above 0.05 Γ0. Calibration (docs/qsd_product.md §4), largest relative error of the
# emission rate against the Lindblad equation: driven dense chains 0.02 → 3 %, 0.08 → 8 %, 0.28 → 23 %,
# 1.6 → 34 %; inverted dense clusters 0.31 → 12 %, 0.97 → 17 %, 2.4 → 37 % (late times, small rates).
LEAK_MEMORY_RATE = 0.5
LEAK_WARNING = 0.05
# The collective decay's share (decay_leak, per excitation, the same memory, counted only while the laser is
# on: undriven, the unravelling's back-action keeps a burst right). Calibration (docs/qsd_product.md §4,
# steady states of 40 driven pairs against the exact two-emitter solution): above 0.03 the relative errors
# of g2_total were 8–77 % at weak and moderate drive (Ω ≤ 0.3; one case 1 %) and up to 37 % under strong
# drive; below 0.03 at most 1 %; one case +250 % (a pair coupled by Γ alone, docs §4). Above 0.1 under strong
# drive (s > 1) the emission rate errs too (1.5–24 %; below 0.1 at most 2.3 %, at weak drive at most 1.4 %).
DECAY_G2_WARNING = 0.03
DECAY_RATE_WARNING = 0.1
# Weak excitation at the end of a run (the tail of a decay, where decay_leak is not counted): below this
# mean ρ_ee per emitter, with couplings above WEAK_COUPLING between some pair, g2 is the product-state value
# (docs/qsd_product.md §5) and a warning says so, unless the decay_leak warning already did.
WEAK_EXCITATION = 0.01
WEAK_COUPLING = 0.05


def remembered_leak(leak, times, steady: bool) -> np.ndarray:
    """E(t) = γ ∫_0^t e^{−γ(t − s)} leak(s) ds on the observation times, leak linear between them (exact
    integral of that interpolation), E(t_0) = 0; a steady state's window average is its own value.

    A rate that is constant from the start gives E → leak; a pulse shorter than 1/γ counts by its area.
    """
    leak = np.asarray(leak, dtype=float)
    if steady:
        return leak.copy()
    out = np.zeros_like(leak)
    g = LEAK_MEMORY_RATE
    for k in range(1, len(leak)):
        gh = g * (float(times[k]) - float(times[k - 1]))
        decay = np.exp(-gh)
        a = 1.0 - decay
        b = 1.0 - a / gh if gh > 0 else 0.0
        out[k] = decay * out[k - 1] + leak[k - 1] * (a - b) + leak[k] * b
    return out


def laser_on(model, t_obs: np.ndarray, steady: bool, points: int = 64) -> np.ndarray:
    """Per observation time, the fraction of the interval since the previous one during which the laser is
    on (Ω ≠ 0 and envelope ≠ 0), so that a pulse between two observation times counts: exact for drive
    windows, by the midpoint rule on ``points`` sub-times for an envelope function; at the first time
    whether it is on then. A steady state: 1 when Ω ≠ 0."""
    t_obs = np.asarray(t_obs, dtype=float)
    if abs(model.rabi) == 0:
        return np.zeros(t_obs.shape)
    if steady or model.envelope.constant:
        return np.ones(t_obs.shape)
    if model.envelope.windows is not None:
        a, b = t_obs[:-1], t_obs[1:]
        on = sum(np.clip(np.minimum(b, t1) - np.maximum(a, t0), 0.0, None)
                 for t0, t1 in model.envelope.windows)
        first = any(t0 <= t_obs[0] < t1 for t0, t1 in model.envelope.windows)
        return np.concatenate([[float(first)], on / np.where(b > a, b - a, 1.0)])
    u = (np.arange(points) + 0.5) / points
    sub = t_obs[:-1, None] + np.diff(t_obs)[:, None] * u  # (T − 1, points)
    times = np.concatenate([t_obs[:1], sub.ravel()])
    on = np.asarray(jax.vmap(model.envelope)(jnp.asarray(times))) != 0  # one time at a time, as the solvers
    return np.concatenate([on[:1], on[1:].reshape(sub.shape).mean(axis=1)]).astype(float)


@jax.jit
def sample_pure(bloch, keys):
    """Pure product states for the product state with Bloch vectors ``bloch`` (N, 3): per emitter the unit
    vector ±u (u = s/|s|) with probabilities (1 ± |s|)/2, whose mixture is the given state. (N, 3, S)."""
    r = jnp.linalg.norm(bloch, axis=1)
    u = jnp.where(r[:, None] > 0, bloch / jnp.where(r > 0, r, 1.0)[:, None], jnp.array([0.0, 0.0, 1.0]))

    def one(key):
        sign = jnp.where(jax.random.uniform(key, r.shape) < (1 + r) / 2, 1.0, -1.0)
        return sign[:, None] * u

    return jnp.moveaxis(jax.vmap(one)(keys), 0, 2)


def _split(Y):
    S = Y.shape[1] // 3
    return Y[:, :S], Y[:, S : 2 * S], Y[:, 2 * S :]


def _diffusion_noise(Y, inc):
    """The QSD noise of each emitter with dζ = (u + i v)/√2, [u | v] = ``inc`` (covariance Γ dt each)."""
    x, y, z = _split(Y)
    S = x.shape[1]
    u, v = inc[:, :S], inc[:, S:]
    m = 0.5 * (1 + z) - 0.25 * (x * x + y * y)  # n − |β|²
    a = x * x - y * y
    c = np.sqrt(0.5)
    dx = c * ((2 * m - 0.5 * a) * u - x * y * v)
    dy = c * (-x * y * u + (2 * m + 0.5 * a) * v)
    dz = -c * (1 + z) * (x * u + y * v)
    return jnp.concatenate([dx, dy, dz], axis=1)


def _stratonovich_correction(Y, gdiag):
    """−½ Γ_ii Σ_k (g_k·∇)g_k for the noise above (sympy, docs/qsd_product.md): Itô drift → Stratonovich."""
    x, y, z = _split(Y)
    q = x * x + y * y
    w = q - 2 * z - 2
    return -gdiag * jnp.concatenate([0.5 * x * w, 0.5 * y * w, 0.5 * (z + 1) * (q - z - 1)], axis=1)


def _unit(Y):
    x, y, z = _split(Y)
    r = jnp.sqrt(x * x + y * y + z * z)
    r = jnp.where(r > 0, r, 1.0)
    return jnp.concatenate([x / r, y / r, z / r], axis=1)


def _exchange_leak(Y, args):
    """Per trajectory ‖(1 − P)H_J|ψ⟩‖² and ‖(1 − P)H_Γ|ψ⟩‖²: the parts of the exchange's action and of the
    collective decay's coherent two-emitter term that leave product states.

    For a pure qubit state the complement of |ψ_i⟩ is one state, and the exchange J_ij(σ_i⁺σ_j⁻ + σ_j⁺σ_i⁻)
    flips a pair into it with amplitude ∝ J_ij (g_i² e_j² + e_i² g_j²) (g, e the ground and excited
    amplitudes), so the squared norm is Σ_{i≠j} J_ij² [(1 − n_i)² n_j² + Re(β_i*² β_j²)]. The
    non-Hermitian term H_Γ = −(i/2)Σ_{i≠j} Γ_ij σ_i⁺σ_j⁻ of the unravelling has the same form with
    J_ij → Γ_ij/2 (and the two add in quadrature: their pair flips differ by the phase i). ``args["K2"]``
    stacks J² and Γ²/4, zero diagonals, as one (2N × N) matrix.
    """
    x, y, z = _split(Y)
    S = x.shape[1]
    N = x.shape[0]
    n = 0.5 * (1 + z)
    b2r, b2i = 0.25 * (x * x - y * y), -0.5 * x * y  # β² with β = (x − iy)/2
    K = args["K2"] @ jnp.concatenate([n * n, b2r, b2i], axis=1)  # one real product, (2N, 3S)

    def norm2(k):
        return jnp.sum((1 - n) ** 2 * k[:, :S] + b2r * k[:, S : 2 * S] + b2i * k[:, 2 * S :], axis=0)

    return {"exchange_leak2": norm2(K[:N]), "decay_leak2": norm2(K[N:])}


@register
class ProductStateDiffusion(SpinSampling):
    name = "qsd_product"
    summary = "quantum state diffusion restricted to product states (stochastic; dark vacuum; any N)"
    title = "product-state QSD"
    calculus = "Ito, integrated in Stratonovich form (analytic correction), stochastic Heun, |s| = 1 kept"
    equations = SpinEquations(noise=_diffusion_noise, correction=_stratonovich_correction, project=_unit,
                              observe=_exchange_leak)
    initial_samples = staticmethod(sample_pure)
    extra_matrices = 2

    def level_args(self, model, args: dict[str, Any]) -> dict[str, Any]:
        require(16 * model.n**2, f"the squared coupling matrices of 'qsd_product' for {model.n} emitters")
        J = np.asarray(model.J.real, dtype=float)
        G = np.asarray(model.Gamma.real, dtype=float)
        off = ~np.eye(model.n, dtype=bool)
        return dict(args, K2=jnp.asarray(np.concatenate([J * J * off, G * G * off / 4])))

    def add_diagnostics(self, run_args, means, stderr, diagnostics, attrs) -> None:
        excitation = np.sum(np.asarray(means["excited"]), axis=-1)

        def per_excitation(name: str) -> np.ndarray:  # rms over trajectories, over the mean excitation
            rms = np.sqrt(np.maximum(run_args["sums"][name] / run_args["count"], 0.0))
            return np.where(excitation > 0, rms / np.where(excitation > 0, excitation, 1.0), 0.0)

        per = per_excitation("exchange_leak2")
        diagnostics["exchange_leak"] = (("time",), per, {
            "units": "Γ0 per excitation",
            "long_name": "rate at which the exchange J leaves product states, ‖(1 − P_T)H_J|ψ⟩‖ (rms over "
                         "trajectories) over the mean total excitation (docs/qsd_product.md §4)"})
        attrs["max_exchange_leak"] = float(np.max(per))
        held = remembered_leak(per, np.asarray(run_args["t_obs"]), run_args["steady"])
        attrs["max_exchange_leak_remembered"] = float(np.max(held))
        if attrs["max_exchange_leak_remembered"] > LEAK_WARNING:
            _note(
                f"qsd_product: the exchange J takes the trajectories out of product states at "
                f"{attrs['max_exchange_leak_remembered']:.3g} Γ0 per excitation, averaged over the last "
                f"{1 / LEAK_MEMORY_RATE:g}/Γ0 (diagnostic exchange_leak). Above {LEAK_WARNING:g} the "
                "measured relative errors of the emission rate, the incoherent intensities and g2 reach "
                "5–35 % (docs/qsd_product.md §4); one-body means at weak drive are not affected. Compare "
                "with 'cumulant2' or an exact level"
            )
        model = run_args["model"]
        dper = per_excitation("decay_leak2")
        diagnostics["decay_leak"] = (("time",), dper, {
            "units": "Γ0 per excitation",
            "long_name": "rate at which the collective decay's two-emitter term leaves product states, "
                         "‖(1 − P_T)H_Γ|ψ⟩‖ with H_Γ = −(i/2)Σ Γ_ij σ_i⁺σ_j⁻ (rms over trajectories) over "
                         "the mean total excitation (docs/qsd_product.md §4)"})
        attrs["max_decay_leak"] = float(np.max(dper))
        t_obs = np.asarray(run_args["t_obs"])
        driven = laser_on(model, t_obs, run_args["steady"])
        dheld = remembered_leak(dper * driven, t_obs, run_args["steady"])
        attrs["max_decay_leak_driven_remembered"] = float(np.max(dheld))
        if attrs["max_decay_leak_driven_remembered"] > DECAY_G2_WARNING:
            # the rate errs only under strong drive (s > 1 in the calibration; linear response is exact)
            rate = attrs["max_decay_leak_driven_remembered"] > DECAY_RATE_WARNING and model.saturation > 1
            _note(
                f"qsd_product: under the drive the collective decay takes the trajectories out of product "
                f"states at {attrs['max_decay_leak_driven_remembered']:.3g} Γ0 per excitation, averaged over "
                f"the last {1 / LEAK_MEMORY_RATE:g}/Γ0 (diagnostic decay_leak). Above {DECAY_G2_WARNING:g} "
                "the pair correlations it builds are missing: g2, g2_total and the incoherent intensities "
                "had errors of order one in the measured driven pairs (−77 % to +250 %, docs/qsd_product.md "
                "§4)"
                + (f"; above {DECAY_RATE_WARNING:g} under strong drive (s > 1) the emission rate too, by up "
                   "to 24 %" if rate
                   else "; the emission rate and the coherences are not affected by it here")
                + ". For photon statistics compare with 'cumulant2', 'jumps' or an exact level"
            )
            return
        off = ~np.eye(model.n, dtype=bool)
        strongest = max(np.abs(model.J[off]).max(initial=0.0), np.abs(model.Gamma[off]).max(initial=0.0))
        last = np.asarray(means["excited"])[-1]
        if strongest > WEAK_COUPLING and 0 < float(np.mean(last)) < WEAK_EXCITATION:
            _note(
                "qsd_product: at this weak excitation (mean ρ_ee per emitter below "
                f"{WEAK_EXCITATION:g} at the last time) the trajectories hardly fluctuate, so g2 and "
                "g2_total are the product-state (mean-field) values and miss the pair correlations that the "
                "couplings build (docs/qsd_product.md §5). Linear-response quantities are exact; for photon "
                "statistics use 'cumulant2' or an exact level"
            )
