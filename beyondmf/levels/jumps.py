"""Level "jumps": quantum-jump (Monte Carlo wave-function) trajectories of the master equation.

Method: J. Dalibard, Y. Castin, K. Mølmer, Phys. Rev. Lett. 68, 580 (1992); review: M. B. Plenio,
P. L. Knight, Rev. Mod. Phys. 70, 101 (1998). The decay Σ_ij Γ_ij D[σ_j⁻, σ_i⁺] is unravelled into the
channels of the eigen-decomposition Γ = U diag(γ) U†: L_m = Σ_j U_jm* σ_j⁻ with rate γ_m (channels with
γ_m ≤ 1e-10·max γ are dropped; they carry no light). Between jumps the unnormalised state follows

    dψ/dt = −i H_eff ψ,    H_eff = H − (i/2) Σ_ij Γ_ij σ_i⁺σ_j⁻,

integrated with fixed-step RK4 (step ``dt``); its norm decays, and a jump happens when ‖ψ‖² reaches a
uniform random threshold r (the waiting-time form of the method). The crossing inside a step is located
on RK4's cubic dense output by bisection, the channel is drawn with probability ∝ γ_m ‖L_m ψ‖², and
ψ → L_m ψ/‖L_m ψ‖. Each trajectory keeps its own clock, so jump times are not rounded to the step.

Estimators: every Moments key is the mean over trajectories of the normalised expectation value
(⟨φ|σ_i⁺σ_i⁻|φ⟩, ⟨φ|σ_i⁻|φ⟩, ‖Eφ‖², ‖EEφ‖², Σ_m γ_m‖L_mφ‖², Σ_mm' γ_mγ_m'‖L_m'L_mφ‖²), an unbiased
estimate of Tr(Aρ); `stderr` is the standard error of the mean and `cov` the covariances of the means that
the g2 ratios need. Same-site products obey the spin-½ algebra exactly (they are operator identities on φ).

A mixed initial Bloch vector s (|s| < 1) is sampled: each emitter starts in the pure state along ±s/|s|
with probabilities (1 ± |s|)/2, whose average is the mixed state ½(1 + s·σ).
"""

from __future__ import annotations

import functools

import jax
import jax.numpy as jnp
import numpy as np

from .._config import show_progress
from .._notes import warn as _note
from ..memory import available_bytes, require
from ..model import Envelope, Model
from . import _qubits as q
from ._sampling import UNSETTLED_SIGMAS, amplitude_sums, coherent_statistics, mode_covariance, mode_sums
from .base import (
    Level,
    Moments,
    OptionError,
    Probes,
    SampleProgress,
    check_sampling_options,
    is_real_number,
    register,
)

__all__ = ["Jumps", "jump_channels"]

CHANNEL_CUT = 1e-10  # relative rate below which an eigen-channel of Γ is dropped
CHUNK_BYTES = 2**30  # target memory of one vmapped chunk of trajectories


def jump_channels(gamma: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(rates γ_m, operators' coefficients V (M, N)) with L_m = Σ_j V_mj σ_j⁻ and Σ_m γ_m L_m†L_m = R.

    Γ = U diag(γ) U† from `numpy.linalg.eigh`; V = U†. Round-off negative and zero rates are dropped.
    """
    g, u = np.linalg.eigh(np.asarray(gamma))
    keep = g > CHANNEL_CUT * max(float(g.max()), 1e-300)
    return g[keep], u[:, keep].conj().T


def _auto_dt(model: Model, c: np.ndarray) -> float:
    """RK4 step with |h λ| ≲ 0.3 for the largest |eigenvalue| of H_eff (bounded by ‖C‖·N/2 + N|Ω|/2)."""
    scale = np.linalg.norm(c, 2) * max(1.0, model.n / 2) + 0.5 * np.abs(model.rabi_sites).sum()
    return float(min(0.01, 0.3 / max(scale, 1e-12)))


@functools.lru_cache(maxsize=16)
def _runner(envelope: Envelope, dt: float):
    """The jitted chunk runner for one envelope and step (cached so equal settings share a compile)."""

    def deriv(t, psi, args):
        hpsi, _ = q.apply_heff(psi, args["C"], 0.5 * envelope(t) * args["omega"], args["tab"])
        return -1j * hpsi

    def observe(psi, args):
        tab = args["tab"]
        phi = psi / jnp.linalg.norm(psi)
        low = q.lower(phi, tab)  # (N, D)
        excited = jnp.sum(jnp.abs(low) ** 2, axis=1)
        coherence = low @ jnp.conj(phi)
        e1 = args["weights"] @ low  # (Ddet, D): E_d φ
        e2 = jnp.einsum("dj,jad->da", args["weights"], q.lower(e1.T, tab))
        l1 = args["V"] @ low  # (M, D): L_m φ
        l2 = jnp.einsum("kj,jam->kam", args["V"], q.lower(l1.T, tab))  # L_k L_m φ
        g = args["rates"]
        rate = jnp.sum(g * jnp.sum(jnp.abs(l1) ** 2, axis=1))
        rate4 = jnp.einsum("k,m,kam->", g, g, jnp.abs(l2) ** 2)
        return {
            "excited": excited,
            "coherence": coherence,
            "field2": jnp.sum(jnp.abs(e1) ** 2, axis=1),
            "field4": jnp.sum(jnp.abs(e2) ** 2, axis=1),
            "rate": rate,
            "rate4": rate4,
        }

    def step(carry, target, args):
        t, re_im, r, key = carry
        psi = re_im[0] + 1j * re_im[1]
        h = jnp.minimum(dt, target - t)
        k1 = deriv(t, psi, args)
        k2 = deriv(t + h / 2, psi + h / 2 * k1, args)
        k3 = deriv(t + h / 2, psi + h / 2 * k2, args)
        k4 = deriv(t + h, psi + h * k3, args)

        # RK4's continuous extension (third order): ψ(θ) = Σ_m c_m(θ) u_m, so ‖ψ(θ)‖² = c·Re(G)·c with the
        # 4 × 4 Gram matrix G of u: the bisection for the jump time then costs no vector operations.
        u = jnp.stack([psi, h * k1, h * (k2 + k3), h * k4])
        gram = jnp.real(jnp.conj(u) @ u.T)

        def coeffs(theta):
            return jnp.stack([jnp.ones_like(theta), theta - 1.5 * theta**2 + 2 / 3 * theta**3,
                              theta**2 - 2 / 3 * theta**3, -0.5 * theta**2 + 2 / 3 * theta**3])

        def norm2(theta):
            c = coeffs(theta)
            return c @ gram @ c

        crossed = norm2(1.0) <= r

        def bisect(_, lo_hi):
            lo, hi = lo_hi
            mid = 0.5 * (lo + hi)
            below = norm2(mid) <= r
            return jnp.where(below, lo, mid), jnp.where(below, mid, hi)

        _, theta = jax.lax.fori_loop(0, 40, bisect, (0.0, 1.0))
        theta = jnp.where(crossed, theta, 1.0)
        at = coeffs(theta).astype(u.dtype) @ u
        key, k_ch, k_r = jax.random.split(key, 3)
        chan = args["V"] @ q.lower(at, args["tab"])  # (M, D)
        weight = args["rates"] * jnp.sum(jnp.abs(chan) ** 2, axis=1)
        m = jax.random.categorical(k_ch, jnp.log(jnp.maximum(weight, 1e-300)))
        jumped = chan[m] / jnp.linalg.norm(chan[m])
        psi_next = jnp.where(crossed, jumped, at)
        r_next = jnp.where(crossed, jax.random.uniform(k_r), r)
        t_next = jnp.where(crossed, t + theta * h, jnp.where(h >= target - t, target, t + h))
        return t_next, jnp.stack([psi_next.real, psi_next.imag]), r_next, key

    def trajectory(key, signs, ts, args):
        k0, key = jax.random.split(key)
        psi0 = q.product_amplitudes(args["directions"] * signs[:, None], args["tab"])
        carry = (ts[0], jnp.stack([psi0.real, psi0.imag]), jax.random.uniform(k0), key)

        def interval(carry, target):
            carry = jax.lax.while_loop(lambda c: c[0] < target, lambda c: step(c, target, args), carry)
            return carry, observe(carry[1][0] + 1j * carry[1][1], args)

        _, later = jax.lax.scan(interval, carry, ts[1:])
        first = observe(psi0, args)
        return jax.tree.map(lambda a, b: jnp.concatenate([a[None], b]), first, later)

    @jax.jit
    def run(keys, signs, use, ts, args):
        obs = jax.vmap(trajectory, in_axes=(0, 0, None, None))(keys, signs, ts, args)
        # sums over the chunk (``use`` masks padding), for means, variances and the covariances of the ratios
        wsum = lambda v: jnp.tensordot(use, v, axes=1)  # noqa: E731
        sums = {k: wsum(v) for k, v in obs.items()}
        sq = {k: wsum(jnp.abs(v) ** 2) for k, v in obs.items()}
        cross = {"field": wsum(obs["field4"] * obs["field2"]), "rate": wsum(obs["rate4"] * obs["rate"])}
        # the rate at the last two times of the same trajectories (steady's paired settling check)
        r = obs["rate"]
        cross["rate_lag"] = wsum(r[:, -1] * r[:, -2]) if ts.shape[0] >= 2 else wsum(0.0 * r[:, -1])
        # the far-field amplitudes Σ_j w_dj ⟨σ_j⁻⟩ per trajectory, for the unbiased coherent part
        cross.update(amplitude_sums(obs["coherence"] @ args["weights"].T, obs["field2"], wsum))
        cross.update(mode_sums(obs["coherence"] @ args["mode"], wsum))  # the transmission's sampling error
        return sums, sq, cross

    return run


@register
class Jumps(Level):
    name = "jumps"
    summary = "quantum-jump trajectories (exact in the limit of many samples; N up to ~14)"
    options = {"samples": 1000, "dt": "auto", "chunk": "auto", "settle_time": 40.0, "progress": "auto"}
    stochastic = True

    def validate_options(self, options) -> None:
        check_sampling_options(options)
        if not (is_real_number(options["settle_time"]) and options["settle_time"] > 0):
            raise OptionError("settle_time",
                              f"must be a positive time (1/Γ0), got {options['settle_time']!r}")

    def memory_bytes(self, model: Model, options) -> int:
        """A chunk of trajectories with at most N jump channels each, and the effective Hamiltonian's
        propagator; a chunk "auto" is at most 256 trajectories and the budget of `CHUNK_BYTES`."""
        n, d = model.n, 2**model.n
        per_traj = 16 * d * (8 + 3 * n + n * n + 2 * 2)  # two detectors' weights counted
        chunk = options.get("chunk", "auto")
        if chunk == "auto":
            chunk = int(max(1, min(int(options.get("samples", 1000)), CHUNK_BYTES // per_traj, 256)))
        return int(chunk) * per_traj + 16 * d * n

    def _setup(self, model: Model, probes: Probes, options):
        n, d = model.n, 2**model.n  # d an exact integer: the estimates below never overflow
        samples = int(options["samples"])
        what = f"quantum-jump trajectories of {model.n} emitters"
        # first without the jump channels, before finding them costs an N × N eigendecomposition
        require(16 * d * (8 + 4 * n + 2 * len(probes.weights)), what)
        rates, v = jump_channels(model.Gamma)
        per_traj = 16 * d * (8 + 3 * n + len(rates) * n + 2 * len(probes.weights))
        require(per_traj + 16 * d * n, what)
        chunk = options["chunk"]
        if chunk == "auto":
            budget = min(CHUNK_BYTES, 0.25 * available_bytes())
            chunk = int(max(1, min(samples, budget // per_traj, 256)))
            if show_progress(options.get("progress", "auto")):  # a bar needs several chunks to move
                chunk = min(chunk, max(1, -(-samples // 20)))
        c = model.J - np.diag(model.detunings) - 0.5j * model.Gamma
        dt = _auto_dt(model, c) if options["dt"] == "auto" else float(options["dt"])  # validate_options
        args = {
            "C": jnp.asarray(c),
            "omega": jnp.asarray(model.rabi_sites.astype(complex)),
            "tab": q.site_tables(n),
            "weights": jnp.asarray(probes.weights),
            "mode": jnp.asarray(np.zeros(n, complex) if probes.mode is None else probes.mode),
            "V": jnp.asarray(v),
            "rates": jnp.asarray(rates),
        }
        return samples, int(chunk), dt, args, {"channels": len(rates), "dt": dt, "chunk": int(chunk)}

    def _run(self, model, ts, initial, probes, seed, options) -> tuple[Moments, float]:
        samples, chunk, dt, args, info = self._setup(model, probes, options)
        s = np.asarray(initial, dtype=float)
        length = np.linalg.norm(s, axis=1)
        args["directions"] = jnp.asarray(
            np.where(length[:, None] > 0, s / np.maximum(length, 1e-300)[:, None], [0.0, 0.0, 1.0])
        )
        run = _runner(model.envelope, dt)
        base = jax.random.PRNGKey(seed)
        p_plus = (1 + length) / 2
        tot = tot2 = crs = None
        ts = jnp.asarray(ts, dtype=float)
        bar = SampleProgress(options.get("progress", "auto"), samples, self.name)
        for start in range(0, samples, chunk):
            idx = np.arange(start, start + chunk)
            use = jnp.asarray(idx < samples, dtype=float)  # the last chunk is padded: one shape, one compile
            keys = jax.vmap(lambda i: jax.random.fold_in(base, i))(jnp.asarray(idx))
            # mixed emitters: ± their Bloch direction, drawn per trajectory from its own key
            u = jax.vmap(lambda k: jax.random.uniform(jax.random.fold_in(k, 1), (model.n,)))(keys)
            signs = jnp.where(u < jnp.asarray(p_plus), 1.0, -1.0)
            part = run(keys, signs, use, ts, args)
            tot, tot2, crs = part if tot is None else jax.tree.map(jnp.add, (tot, tot2, crs), part)
            if bar.shown:  # count the chunk when it is done, not when it is dispatched
                jax.block_until_ready(tot)
                bar.update(min(chunk, samples - start))
        bar.close()
        tot, tot2, crs = jax.tree.map(np.asarray, (tot, tot2, crs))
        mean = {k: v / samples for k, v in tot.items()}
        var = {k: np.maximum(tot2[k] / samples - np.abs(mean[k]) ** 2, 0) * samples / (samples - 1)
               for k in tot}
        stderr = {k: np.sqrt(v / samples) for k, v in var.items()}
        cov = {
            "field": (crs["field"] / samples - mean["field4"] * mean["field2"]) / (samples - 1),
            "rate": (crs["rate"] / samples - mean["rate4"] * mean["rate"]) / (samples - 1),
        }
        coherent, stderr["coherent_field"], cov["field2,coherent"] = coherent_statistics(
            crs, tot["field2"], samples)
        if probes.mode is not None:
            cov["mode"] = mode_covariance(crs, samples)
        lag = np.nan
        if len(ts) >= 2:  # covariance over trajectories of the rates at the last two times
            lag = (crs["rate_lag"] / samples - mean["rate"][-1] * mean["rate"][-2]) * samples / (samples - 1)
        return Moments(**mean, coherent_field=coherent, stderr=stderr, cov=cov,
                       attrs={**info, "samples": samples}), lag

    def evolve(self, model, times, initial, probes, seed, options) -> Moments:
        return self._run(model, np.asarray(times, dtype=float), initial, probes, seed, options)[0]

    def steady(self, model, probes, seed, options) -> Moments:
        """The ensemble at t = settle_time after starting in the ground state.

        ``steady_drift_sigmas``: the change of the emission rate from t/2 to t over its paired standard error
        (the same trajectories at both times); beyond `UNSETTLED_SIGMAS` a warning says that the ensemble
        had not settled (a slow, subradiant mode of a dense cluster can take far longer than the default
        settle_time).
        """
        t1 = float(options["settle_time"])
        ground = np.tile([0.0, 0.0, -1.0], (model.n, 1))
        m, lag = self._run(model, np.array([0.0, t1 / 2, t1]), ground, probes, seed, options)
        # paired: the same trajectories at both times, so their covariance comes off the variance
        samples = int(m.attrs["samples"])
        var = (m.stderr["rate"][2] ** 2 + m.stderr["rate"][1] ** 2) - 2 * lag / samples
        change, err = float(m.rate[2] - m.rate[1]), float(np.sqrt(max(var, 0.0)))
        drift = abs(change) / max(err, 1e-300)
        if drift > UNSETTLED_SIGMAS:
            _note(f"jumps steady: the emission rate changed by {change:.3g} ± {err:.2g} between t = "
                  f"{t1 / 2:g} and the reported t = settle_time = {t1:g} ({drift:.1f} standard errors): the "
                  "trajectories had not settled; raise settle_time, or look at the approach with evolve")
        pick = lambda a: np.asarray(a)[2:3]  # noqa: E731
        return Moments(
            **{k: pick(getattr(m, k)) for k in Moments.KEYS},
            coherent_field=pick(m.coherent_field),
            stderr={k: pick(v) for k, v in m.stderr.items()},
            cov={k: pick(v) for k, v in m.cov.items()},
            attrs={**m.attrs, "settle_time": t1, "steady_drift_rate": change, "steady_drift_rate_stderr": err,
                   "steady_drift_sigmas": float(drift)},
        )
