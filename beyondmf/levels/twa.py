"""Level "twa": discrete truncated Wigner sampling of driven, collectively decaying spins ½.

Each sample is a classical spin s_i = (x_i, y_i, z_i) per emitter. Initial samples come from the discrete
Wigner function of the initial product state (W. K. Wootters, Ann. Phys. 176, 1 (1987); the truncated
Wigner approach as reviewed by A. Polkovnikov, Ann. Phys. 325, 1790 (2010)): along
the Bloch direction u the component is ±1 with probabilities (1 ± |s|)/2, the two transverse components
are ±1 with equal probability. Each sample then obeys the Itô equations (derivation: docs/twa.md)

    dβ_i = [(iΔ − ½Γ_ii)β_i + (i/2)Ω_i(t) z_i + z_i φ_i] dt + z_i dη_i,     β_i = (x_i − i y_i)/2
    dz_i = [−Γ_ii(1 + z_i) − 2 Im(Ω_i* β_i) − 4 Re(β_i* φ_i)] dt,
    φ_i = Σ_{j≠i} (iJ_ij + ½Γ_ij) β_j,        ⟨dη_i dη_j*⟩ = ½ Γ_ij dt,  ⟨dη_i dη_j⟩ = 0,

i.e. the mean-field drift (the Weyl symbol of the Heisenberg equations, as in level "meanfield") with the
vacuum noise of the quantum Langevin equations (C. W. Gardiner, M. J. Collett, Phys. Rev. A 31, 3761
(1985)) kept on the transverse components only. The noise amplitude z_i has no noise of its own, so the
Itô and Stratonovich readings coincide and the stochastic Heun scheme used here converges to it.

Why this form: it is exact for the means of one emitter; with z = −1 held fixed the transverse part is an
Ornstein–Uhlenbeck process of drift −(iJ + ½Γ) and noise Γ whose stationary covariance is the ground
state's (the identity); the noise z_i dη_i seeds the superradiant burst of an inverted cloud.

Where to trust it (measured, docs/twa.md): the superradiant burst of an inverted cloud (Dicke peak within
3 %), one emitter (exact means), driven dense clusters to within ~5–20 % of the exact populations and
rates. Known failure: with collective decay (Γ_ij ≠ 0 for i ≠ j) the per-sample z_i fluctuate even in the
undriven ground state and the mean ⟨σ^z⟩ drifts below −1 (Σρ_ee ≈ −0.25 for 20 emitters at n·λ0³ ≈ 5,
≈ −1.2 at n·λ0³ ≈ 38), which also biases weak-drive coherences and the late tail of a burst.
"""

from __future__ import annotations

from typing import Any

import jax
import jax.numpy as jnp
import numpy as np

from .._notes import warn as _note
from ._spin_sampling import (
    SpinEquations,
    SpinSampling,
    _runner,
    _sampled_sums,
    auto_dt,
    noise_factor,
)
from .base import OptionError, is_count, register

# The batched drift and its arrays (spin_drift, spin_args) are those of every sampled spin level.
__all__ = ["TruncatedWigner", "auto_dt", "noise_factor", "sample_initial", "VACUUM_SIGMAS", "VACUUM_SHARE"]

VACUUM_SIGMAS = 4.0  # the vacuum control's drift must be this many standard errors from 0 ...
VACUUM_SHARE = 0.02  # ... and this share of the run's own total excitation, for a warning


def _population_check(excited, stderr, sigmas: float = 3.0):
    """Worst excursion of an excited population outside [0, 1] beyond ``sigmas`` standard errors, per time.

    The exact value is 0. Above it the run shows the known failure of this level (a dense cloud with
    collective decay drifts below ⟨σ^z⟩ = −1, docs/twa.md); `beyondmf.physicality` warns about it with
    its own bound on the sampling error, the same for every level.
    """
    excited, stderr = np.asarray(excited), np.asarray(stderr)
    excess = np.maximum(-(excited + sigmas * stderr), excited - sigmas * stderr - 1.0)
    worst = np.maximum(excess, 0.0).max(axis=-1)
    about = f"worst excursion of an excited population outside [0, 1] beyond {sigmas:g} standard errors"
    return {"population_violation": (("time",), worst, {"units": "1", "long_name": about})}


@jax.jit
def sample_initial(bloch, keys):
    """Discrete-Wigner samples of the product state with Bloch vectors ``bloch`` (N, 3).

    Returns (N, 3, S) spins: component ±1 along u = s/|s| with probabilities (1 ± |s|)/2 (the mixture of
    the two pure states along ±u, each a uniform draw over its four phase-space points), ±1 with equal
    probability along two unit vectors e1, e2 orthogonal to u.
    """
    r = jnp.linalg.norm(bloch, axis=1)
    u = jnp.where(r[:, None] > 0, bloch / jnp.where(r > 0, r, 1.0)[:, None], jnp.array([0.0, 0.0, 1.0]))
    # e1: u × (the coordinate axis least aligned with u), normalised; e2 = u × e1
    axis = jnp.eye(3)[jnp.argmin(jnp.abs(u), axis=1)]
    e1 = jnp.cross(u, axis)
    e1 = e1 / jnp.linalg.norm(e1, axis=1, keepdims=True)
    e2 = jnp.cross(u, e1)

    def one(key):
        k1, k2 = jax.random.split(key)
        par = jnp.where(jax.random.uniform(k1, r.shape) < (1 + r) / 2, 1.0, -1.0)
        tr = jax.random.rademacher(k2, (2,) + r.shape, dtype=float)
        return par[:, None] * u + tr[0][:, None] * e1 + tr[1][:, None] * e2

    return jnp.moveaxis(jax.vmap(one)(keys), 0, 2)


def _transverse_noise(Y, inc):
    """z_i times the Γ-correlated increments on x and y; no noise on z (docs/twa.md §2)."""
    S = Y.shape[1] // 3
    z = Y[:, 2 * S :]
    return jnp.concatenate([z * inc[:, :S], z * inc[:, S:], jnp.zeros_like(z)], axis=1)


@register
class TruncatedWigner(SpinSampling):
    name = "twa"
    summary = "discrete truncated Wigner sampling with Γ-correlated noise (stochastic; any N)"
    title = "truncated Wigner"
    calculus = "Ito (= Stratonovich here), stochastic Heun, fixed step"
    equations = SpinEquations(noise=_transverse_noise)
    options = {**SpinSampling.options, "vacuum_check": "auto"}
    when_unphysical = ("the truncated Wigner equations are not trustworthy for this cloud (collective "
                       "decay in a dense cloud, docs/twa.md §7); compare with 'cumulant2', 'qsd_product' "
                       "or an exact level")
    initial_samples = staticmethod(sample_initial)

    def validate_options(self, options: dict[str, Any]) -> None:
        super().validate_options(options)
        vac = options["vacuum_check"]
        if vac != "auto" and not (is_count(vac, 0) and vac != 1):
            raise OptionError("vacuum_check", "must be 'auto' (as many control samples as the run, at least "
                                              f"64), 0 (off) or a number of control samples ≥ 2, got {vac!r}")

    def add_diagnostics(self, run_args, means, stderr, diagnostics, attrs) -> None:
        diagnostics.update(_population_check(means["excited"], stderr["excited"]))
        attrs["max_population_violation"] = float(np.max(diagnostics["population_violation"][1]))
        vac = run_args["options"]["vacuum_check"]
        vac = max(int(run_args["options"]["samples"]), 64) if vac == "auto" else int(vac)
        attrs["vacuum_check"] = vac
        if vac:
            excitation = np.sum(np.asarray(means["excited"]), axis=-1)
            diagnostics.update(self._vacuum_control(vac, attrs, run_args, excitation))

    def _vacuum_control(self, count, attrs, run_args, excitation):
        """The same equations, steps and observation times for ``count`` samples of the undriven ground
        state, whose exact total excitation is 0 at all times (|g…g⟩ is stationary for any J, Γ).

        Its Σ_i ρ_ee measures the equations' known error for this cloud (docs/twa.md §7) and is reported as
        the diagnostics ``vacuum_excitation`` and ``vacuum_excitation_stderr`` (per time). It warns at a
        time where the drift is beyond `VACUUM_SIGMAS` standard errors and larger than `VACUUM_SHARE` of
        the run's own total excitation ``excitation`` there (a drift that small against the signal is
        measured but harmless). Own random streams (2, 3 of each sample key).
        """
        model, args, steady = run_args["model"], run_args["args"], run_args["steady"]
        run = _runner(model.envelope, steady, self.equations)
        quiet = dict(args, omega=jnp.zeros_like(args["omega"]))
        ground = jnp.tile(jnp.array([0.0, 0.0, -1.0]), (model.n, 1))
        width = min(count, run_args["chunk"])
        tot, failed = _sampled_sums(run, sample_initial, ground, run_args["seed"], count, width, quiet,
                                    run_args["obs_args"], run_args["t_obs"], run_args["n_sub"], steady,
                                    streams=(2, 3))
        good = count - failed
        attrs["vacuum_check_failed"] = failed
        if good < 2:
            nan = np.full(np.shape(tot["excited_total"]), np.nan)
            return {"vacuum_excitation": (("time",), nan), "vacuum_excitation_stderr": (("time",), nan)}
        mean = tot["excited_total"] / good
        var = (tot["excited_total^2"] - good * mean**2) / (good * (good - 1))
        err = np.sqrt(np.maximum(var, 0.0))
        attrs["max_vacuum_excitation"] = float(np.max(np.abs(mean)))
        signal = np.abs(np.broadcast_to(excitation, mean.shape))
        with np.errstate(divide="ignore", invalid="ignore"):
            share = np.where(signal > 0, np.abs(mean) / signal, np.where(np.abs(mean) > 0, np.inf, 0.0))
        attrs["max_vacuum_share"] = float(np.max(share))
        flagged = (np.abs(mean) > VACUUM_SIGMAS * err) & (share > VACUUM_SHARE)
        if np.any(flagged):
            worst = int(np.argmax(np.where(flagged, share, -1.0)))
            _note(
                f"twa: the undriven ground state of this cloud, exactly dark, reaches a total excitation "
                f"{mean[worst]:.3g} ± {err[worst]:.2g} in the same equations (diagnostic vacuum_excitation), "
                f"{share[worst]:.0%} of the run's own total excitation {signal[worst]:.3g}: the known error "
                "of these equations at this density and collective decay (docs/twa.md §7). The excitation "
                "and emission rate, and g2 even more, carry an error of that order; compare with 'cumulant2' "
                "or an exact level"
            )
        about = "total excitation Σρ_ee of the undriven ground state of this cloud in the same equations"
        return {"vacuum_excitation": (("time",), mean, {"units": "1", "long_name": about + " (exact: 0)"}),
                "vacuum_excitation_stderr": (("time",), err, {"units": "1",
                                                              "long_name": "standard error of " + about})}
