"""What the sampled spin levels share: classical spin vectors per sample, batched in one array, stochastic
Heun steps, per-sample product-state estimators, chunked sums, standard errors and the steady-state window.

A level built on `SpinSampling` ("twa", "qsd_product") supplies only its initial sampler and a
`SpinEquations`: the noise amplitude, an optional drift correction (the Itô → Stratonovich term where the
two readings differ), an optional projection applied after every step and optional extra per-sample
estimators. The drift itself is the mean-field drift of conventions.md (the Weyl symbol of the Heisenberg
equations, as in level "meanfield"), one dense product [J; Γ] · [x | y] for all samples of a chunk.

The state of a chunk of S samples is one (N, 3S) array, columns [x (S) | y (S) | z (S)].
"""

from __future__ import annotations

import functools
from abc import abstractmethod
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any, ClassVar

import jax
import jax.numpy as jnp
import numpy as np

from .._config import show_progress
from .._notes import warn as _note
from ..estimators import product_field_moments, product_rate_moments
from ..integrate import SolveError
from ..memory import require
from ..model import Envelope, Model
from ._sampling import UNSETTLED_SIGMAS, amplitude_sums, coherent_statistics, mode_covariance, mode_sums
from .base import (
    Level,
    Moments,
    OptionError,
    Probes,
    SampleProgress,
    check_sampling_options,
    is_count,
    is_real_number,
)

__all__ = ["SpinEquations", "SpinSampling", "auto_dt", "noise_factor", "spin_args", "spin_drift"]

# A spin component beyond this is a diverged sample (the sampled spins stay of order one).
DIVERGED = 1e3
# Memory budget of one chunk of samples; fixed (not taken from free memory) so that the chunking, and
# hence the rounding of the sums, is the same in every run with the same options.
CHUNK_BYTES = 1 << 30


def noise_factor(gamma: np.ndarray, tol: float = 1e-8) -> np.ndarray:
    """B with Γ = B Bᵀ, from the eigendecomposition of the real symmetric Γ.

    Eigenvalues in [−tol·max|λ|, 0) are rounding and are set to zero; a more negative one means Γ is not
    positive semi-definite, and that is an error.
    """
    g = 0.5 * (gamma + gamma.T)
    lam, vec = np.linalg.eigh(g)
    floor = -tol * max(1.0, float(np.max(np.abs(lam))))
    if lam.min() < floor:
        raise ValueError(
            f"the decay matrix Γ has a negative eigenvalue {lam.min():.3g}: it must be positive "
            "semi-definite (check custom couplings)"
        )
    return vec * np.sqrt(np.clip(lam, 0.0, None))


def auto_dt(model: Model) -> float:
    """The default Heun step: min(0.01, 0.05/ω) with ω = max(‖iJ + ½Γ‖₂, |Ω|, |Δ|, 1) (docs/twa.md §2).

    ‖iJ + ½Γ‖₂ (`Model.coupling_norm`) bounds the fastest coupled rate whatever the signs of a sample's
    z_i, so the fastest mode turns by at most 0.05 rad per step.
    """
    scale = max(model.coupling_norm(), abs(model.rabi), float(np.max(np.abs(model.detunings))), 1.0)
    return min(0.01, 0.05 / scale)


def spin_drift(envelope: Envelope):
    """The batched mean-field drift f(t, Y, args) for one envelope (cached: equal envelopes share a compile).

    Y is (N, 3S): columns [x (S) | y (S) | z (S)]. One dense product [J; Γ] (2N × N) · [x | y] (N × 2S):

        dβ_i = (iΔ − ½Γ_ii)β_i + (i/2)Ω_i(t) z_i + z_i φ_i,      β_i = (x_i − i y_i)/2
        dz_i = −Γ_ii(1 + z_i) − 2 Im(Ω_i* β_i) − 4 Re(β_i* φ_i),  φ_i = Σ_{j≠i} (iJ_ij + ½Γ_ij) β_j
    """
    return _drift_for(envelope)


@functools.lru_cache(maxsize=64)
def _drift_for(envelope: Envelope):
    def drift(t, Y, args):
        S = Y.shape[1] // 3
        x, y, z = Y[:, :S], Y[:, S : 2 * S], Y[:, 2 * S :]
        n = x.shape[0]
        K = args["JG"] @ Y[:, : 2 * S]
        jx, jy, gx, gy = K[:n, :S], K[:n, S:], K[n:, :S], K[n:, S:]
        gd = args["gdiag"]
        br, bi = 0.5 * x, -0.5 * y
        # φ = Σ_{j≠i}(iJ_ij + ½Γ_ij)β_j with Jβ = (jx − i jy)/2, Γβ = (gx − i gy)/2
        phr = 0.5 * jy + 0.25 * (gx - gd * x)
        phi = 0.5 * jx - 0.25 * (gy - gd * y)
        env = envelope(t)
        orr, ori = env * args["omega"][0][:, None], env * args["omega"][1][:, None]
        det = args["detuning"]
        dbr = -det * bi - 0.5 * gd * br - 0.5 * ori * z + z * phr
        dbi = det * br - 0.5 * gd * bi + 0.5 * orr * z + z * phi
        dz = -gd * (1 + z) - 2 * (orr * bi - ori * br) - 4 * (br * phr + bi * phi)
        return jnp.concatenate([2 * dbr, -2 * dbi, dz], axis=1)

    return drift


def spin_args(model: Model) -> dict[str, Any]:
    """The model's arrays as the pytree the drift reads: [J; Γ] (2N × N), B (Γ = BBᵀ), Γ_ii, Ω_i, Δ."""
    n = model.n
    require(8 * n * n * 6, f"the coupling matrices of a sampled level for {n} emitters")
    gamma = np.asarray(model.Gamma.real, dtype=float)
    om = model.rabi_sites
    return {
        "JG": jnp.asarray(np.concatenate([np.asarray(model.J.real, dtype=float), gamma])),
        "B": jnp.asarray(noise_factor(gamma)),
        "gdiag": jnp.asarray(np.diag(gamma))[:, None],
        "omega": jnp.asarray(np.stack([om.real, om.imag])),
        "detuning": jnp.asarray(model.detunings)[:, None],
    }


@dataclass(frozen=True)
class SpinEquations:
    """The stochastic part of a sampled level's equations, in the layout of `spin_drift`.

    ``noise(Y, inc)``: the increment g(Y)·ΔW given ``inc`` = B·ΔW (N, 2S), the Γ-correlated real increments
    [u | v] of covariance Γ dt each. ``correction(Y, gdiag)``: added to the mean-field drift (None: none).
    ``project(Y)``: applied after every step (None: none). ``observe(Y, args)``: extra per-sample
    estimators, a dict of (S,) arrays averaged like the others (None: none). Module-level functions, so
    that equal equations share one compile.
    """

    noise: Callable
    correction: Callable | None = None
    project: Callable | None = None
    observe: Callable | None = None


def _sample_keys(seed: int, start: int, count: int):
    base = jax.random.PRNGKey(seed)
    return jax.vmap(lambda k: jax.random.fold_in(base, k))(jnp.arange(start, start + count))


def _per_sample(Y, weights, gamma, mode):
    """Per-sample estimators (S leading): the product-state sums with the samples' symbols.

    A sample's symbols σ_j⁻ → β_j = (x_j − i y_j)/2, σ_j⁺σ_j⁻ → n_j = (1 + z_j)/2 and σ_j⁺σ_j⁺ → 0 obey the
    same algebra as the moments of a product state, so `estimators` gives each sample's ⟨E†E⟩,
    ⟨E†E†EE⟩ and the Γ sums exactly (inclusion–exclusion of same-site terms), O(N²) per sample.
    """
    S = Y.shape[1] // 3
    beta = 0.5 * (Y[:, :S] - 1j * Y[:, S : 2 * S])
    n = 0.5 * (1 + Y[:, 2 * S :])
    f2, f4 = jax.vmap(product_field_moments, in_axes=(1, 1, None))(beta, n, weights)
    r2, r4 = jax.vmap(product_rate_moments, in_axes=(1, 1, None))(beta, n, gamma)
    return {"excited": n.T, "coherence": beta.T, "field2": f2, "field4": f4, "rate": r2, "rate4": r4,
            "excited_total": jnp.sum(n, axis=0), "amplitude": beta.T @ weights.T,
            "mode_amplitude": beta.T @ mode}


def _bad(Y):
    S = Y.shape[1] // 3
    Y3 = Y.reshape(Y.shape[0], 3, S)
    big = jnp.max(jnp.abs(jnp.nan_to_num(Y3, nan=0.0)), axis=(0, 1)) > DIVERGED
    return ~jnp.all(jnp.isfinite(Y3), axis=(0, 1)) | big


def _sums(obs, mask):
    """Masked sums over samples of each estimator, its square and the two cross products."""
    w = mask.astype(float)

    def s(a):
        a = jnp.where(mask.reshape((-1,) + (1,) * (a.ndim - 1)), a, 0.0)
        return jnp.tensordot(w, a, axes=1)

    obs = dict(obs)
    amplitude = obs.pop("amplitude")  # per-sample Σ_j w_dj β_j: the unbiased coherent part (levels._sampling)
    mode = obs.pop("mode_amplitude")  # per-sample Σ_j u_j* β_j: the transmission's sampling error
    out = {k: s(v) for k, v in obs.items()}
    out.update(mode_sums(mode, s))
    out.update({k + "^2": s(jnp.abs(v) ** 2) for k, v in obs.items()})
    out.update(amplitude_sums(amplitude, obs["field2"], s))
    out["field4*field2"] = s(obs["field4"] * obs["field2"])
    out["rate4*rate"] = s(obs["rate4"] * obs["rate"])
    return out


def _noise(keys, step, shape_n):
    """(N, 2S) standard normals, drawn per sample from its own key (independent of the chunking)."""
    z = jax.vmap(lambda k: jax.random.normal(jax.random.fold_in(k, step), (2, shape_n)))(keys)
    return jnp.concatenate([z[:, 0, :].T, z[:, 1, :].T], axis=1)


@functools.lru_cache(maxsize=64)
def _runner(envelope: Envelope, steady: bool, equations: SpinEquations):
    mean_field = spin_drift(envelope)
    if equations.correction is None:
        drift = mean_field
    else:
        def drift(t, Y, args):
            return mean_field(t, Y, args) + equations.correction(Y, args["gdiag"])

    def step(carry, t, dt, args, keys):
        Y, k = carry
        dW = jnp.sqrt(dt) * _noise(keys, k, Y.shape[0])
        inc = args["B"] @ dW  # (N, 2S): correlated increments, covariance Γ dt

        f0, g0 = drift(t, Y, args), equations.noise(Y, inc)
        Y1 = Y + dt * f0 + g0
        Yn = Y + 0.5 * dt * (f0 + drift(t + dt, Y1, args)) + 0.5 * (g0 + equations.noise(Y1, inc))
        if equations.project is not None:
            Yn = equations.project(Yn)
        return Yn, k + 1

    @jax.jit
    def run(Y0, keys, mask, args, obs_args, t_obs, n_sub):
        """Step from t_obs[0] through t_obs[1:], ``n_sub[k]`` Heun steps between t_obs[k] and t_obs[k+1]."""
        weights, gamma, mode = obs_args

        def observe(Y):
            obs = _per_sample(Y, weights, gamma, mode)
            if equations.observe is not None:
                obs.update(equations.observe(Y, args))
            return obs

        def interval(carry, inp):
            Y, k, bad, acc = carry
            ta, tb, m, late = inp
            dt = (tb - ta) / m

            def body(i, c):
                return step(c, ta + i * dt, dt, args, keys)

            Y, k = jax.lax.fori_loop(0, m, body, (Y, k))
            bad = bad | _bad(Y)
            obs = observe(Y)
            if steady:
                acc, halves = acc
                acc = jax.tree.map(lambda a, o: a + o, acc, obs)
                # the settling check: the scalars of each half of the window, summed separately
                here = jnp.stack([obs["excited_total"], jnp.real(obs["rate"])])
                halves = halves + jnp.stack([(1.0 - late) * here, late * here])
                return (Y, k, bad, (acc, halves)), None
            return (Y, k, bad, acc), _sums(obs, mask)

        obs0 = observe(Y0)
        bad0 = _bad(Y0)
        points = t_obs.shape[0] - 1
        # window points in the second half of the window (steady only; the first entry of t_obs is the start)
        late = (jnp.arange(points) >= points // 2).astype(float)
        acc0 = 0.0
        if steady:
            acc0 = (jax.tree.map(jnp.zeros_like, obs0), jnp.zeros((2, 2) + obs0["excited_total"].shape))
        (Y, _, bad, acc), per_time = jax.lax.scan(
            interval, (Y0, jnp.asarray(0), bad0, acc0), (t_obs[:-1], t_obs[1:], n_sub, late)
        )
        if steady:
            acc, halves = acc
            mean = jax.tree.map(lambda a: a / points, acc)  # window average per sample
            sums = _sums(mean, mask & ~bad)
            # per sample: second-half average − first-half average of Σρ_ee and of the emission rate
            n_early, n_late = points // 2, points - points // 2
            d = halves[1] / n_late - halves[0] / max(n_early, 1)
            w = (mask & ~bad).astype(float)
            sums["settling"] = jnp.where(w > 0, d, 0.0) @ w
            sums["settling^2"] = jnp.where(w > 0, d * d, 0.0) @ w
            return jax.tree.map(lambda a: a[None], sums), bad
        first = _sums(obs0, mask)
        return jax.tree.map(lambda a, b: jnp.concatenate([a[None], b]), first, per_time), bad

    return run


def _sampled_sums(run, sampler, bloch, seed, samples, chunk, args, obs_args, t_obs, n_sub, steady,
                  streams=(0, 1), bar=None):
    """Sums over ``samples`` samples (in chunks of ``chunk``) of every estimator, and the failed count.

    Sample k uses the key fold_in(PRNGKey(seed), k); its initial draw (``sampler(bloch, keys)`` → (N, 3, S))
    the sub-key fold_in(key, streams[0]) and its noise fold_in(key, streams[1]) (twa's vacuum control uses
    streams (2, 3), so that its numbers are independent of the run's). Every chunk has ``chunk`` columns
    (one compile); the last one's surplus samples are masked out.
    """
    tot, failed = None, 0
    for start in range(0, samples, chunk):
        keys = _sample_keys(seed, start, chunk)
        Y0 = sampler(bloch, jax.vmap(lambda k: jax.random.fold_in(k, streams[0]))(keys))
        keys = jax.vmap(lambda k: jax.random.fold_in(k, streams[1]))(keys)  # the noise's own stream
        Y0 = jnp.concatenate([Y0[:, 0, :], Y0[:, 1, :], Y0[:, 2, :]], axis=1)
        mask = jnp.arange(chunk) < samples - start
        sums, bad = run(Y0, keys, mask, args, obs_args, t_obs, n_sub)
        bad = bad & mask
        nbad = int(jnp.sum(bad))
        if nbad and not steady:  # rerun without the failed samples (same keys, same trajectories)
            sums, _ = run(Y0, keys, mask & ~bad, args, obs_args, t_obs, n_sub)
        failed += nbad
        sums = {k: np.asarray(v) for k, v in sums.items()}
        tot = sums if tot is None else {k: tot[k] + sums[k] for k in tot}
        if bar is not None:
            bar.update(min(chunk, samples - start))
    return tot, failed


def _settling(tot: dict[str, np.ndarray], count: int, points: int, level: str) -> dict[str, float]:
    """The steady state's settling check from the per-sample half-window differences.

    For Σρ_ee and the emission rate: the mean over samples of (second-half average − first-half
    average) of the window and its standard error (the samples are independent, so the paired
    difference's error is honest even though the two halves of one sample are correlated).
    ``steady_drift_sigmas`` is the larger |mean|/error; beyond 4 a warning says that the window was not
    yet stationary.
    """
    if points < 2:
        return {"steady_drift_sigmas": float("nan")}
    mean = tot["settling"][0] / count
    var = (tot["settling^2"][0] - count * mean**2) / (count * max(count - 1, 1))
    err = np.sqrt(np.maximum(var, 0.0))
    sig = np.where(err > 0, np.abs(mean) / np.where(err > 0, err, 1.0), np.where(mean == 0, 0.0, np.inf))
    out = {
        "steady_drift_excitation": float(mean[0]),
        "steady_drift_excitation_stderr": float(err[0]),
        "steady_drift_rate": float(mean[1]),
        "steady_drift_rate_stderr": float(err[1]),
        "steady_drift_sigmas": float(np.max(sig)),
    }
    if out["steady_drift_sigmas"] > UNSETTLED_SIGMAS:
        _note(
            f"{level} steady: the second half of the averaging window differs from the first by "
            f"{mean[0]:.3g} ± {err[0]:.2g} in Σρ_ee and {mean[1]:.3g} ± {err[1]:.2g} in the emission rate "
            f"({out['steady_drift_sigmas']:.1f} standard errors): the samples had not settled; raise "
            "settle_time or window, or look at the approach with evolve"
        )
    return out


def _substeps(times, dt: float) -> np.ndarray:
    """Heun steps per interval of ``times``: the fewest that keep each step at most ``dt``."""
    return np.maximum(1, np.ceil(np.diff(np.asarray(times, dtype=float)) / dt - 1e-9)).astype(int)


def _statistics(tot: dict[str, np.ndarray], count: int):
    """Means, standard errors and covariances of the means from sums over ``count`` samples."""
    means = {k: tot[k] / count for k in Moments.KEYS}
    denom = count * max(count - 1, 1)
    stderr = {}
    for k in Moments.KEYS:
        var = (tot[k + "^2"] - count * np.abs(means[k]) ** 2) / denom
        stderr[k] = np.sqrt(np.maximum(var, 0.0))
    cov = {
        "field": (tot["field4*field2"] - count * means["field4"] * means["field2"]) / denom,
        "rate": (tot["rate4*rate"] - count * means["rate4"] * means["rate"]) / denom,
    }
    means["coherent_field"], stderr["coherent_field"], cov["field2,coherent"] = coherent_statistics(
        tot, tot["field2"], count)
    cov["mode"] = mode_covariance(tot, count)
    return means, stderr, cov


class SpinSampling(Level):
    """A sampled level of classical spins per emitter (not registered itself).

    Subclasses set ``name``, ``summary``, ``title`` (for messages), ``calculus`` (recorded in the
    attributes), ``equations`` and implement ``initial_samples(bloch, keys) -> (N, 3, S)``; they may add
    options (checked in ``validate_extra``) and diagnostics (``add_diagnostics``).
    """

    title: ClassVar[str]
    calculus: ClassVar[str]
    equations: ClassVar[SpinEquations]
    #: N × N real matrices a level keeps beyond the shared couplings (qsd_product: its squared couplings)
    extra_matrices: ClassVar[int] = 0
    options: ClassVar[dict[str, Any]] = {
        "samples": 1000,
        "dt": "auto",
        "max_failed": 0.01,
        "settle_time": 40.0,
        "window": 40.0,
        "window_points": 80,
        "chunk": "auto",
        "progress": "auto",
    }
    stochastic = True

    @staticmethod
    @abstractmethod
    def initial_samples(bloch, keys):
        """Samples (N, 3, S) of the product state with Bloch vectors ``bloch`` (N, 3), one per key."""

    def check(self, model: Model) -> None:
        if model.complex_couplings:
            raise ValueError(
                f"level '{self.name}' needs real couplings J and Γ; this model has complex custom "
                "matrices (free-space couplings of any dipole, circular ones included, are real): pass "
                "real symmetric J and Γ, or use 'meanfield', 'cumulant2' or an exact level"
            )

    @staticmethod
    def _step(model: Model, options: dict[str, Any]) -> float:
        return float(auto_dt(model) if options["dt"] == "auto" else options["dt"])  # validate_options

    def validate_options(self, options: dict[str, Any]) -> None:
        check_sampling_options(options)
        frac = options["max_failed"]
        if not (is_real_number(frac) and 0 <= frac < 1):
            raise OptionError("max_failed", f"must be a fraction in [0, 1), got {frac!r}")
        if not (is_real_number(options["settle_time"]) and options["settle_time"] >= 0):
            raise OptionError("settle_time", f"must be a time ≥ 0 (1/Γ0), got {options['settle_time']!r}")
        if not (is_real_number(options["window"]) and options["window"] > 0):
            raise OptionError("window", f"must be a positive time (1/Γ0), got {options['window']!r}")
        if not is_count(options["window_points"], 1):
            raise OptionError("window_points", f"must be an integer ≥ 1, got {options['window_points']!r}")

    def add_diagnostics(self, run_args: dict[str, Any], means, stderr, diagnostics, attrs) -> None:
        """Extra diagnostics of a finished run (none by default); ``run_args`` has what `_run` used, with
        ``sums`` (the sums over samples of every estimator, those of ``equations.observe`` included) and
        ``count`` (the samples they sum)."""

    def level_args(self, model: Model, args: dict[str, Any]) -> dict[str, Any]:
        """The arrays the equations read, from `spin_args`; a level may add its own."""
        return args

    def memory_bytes(self, model: Model, options: dict[str, Any]) -> int:
        """The coupling matrices (and a level's own, `extra_matrices` of N × N) plus one chunk of samples
        (two detectors counted); a chunk "auto" fills the budget `CHUNK_BYTES` at most."""
        n = model.n
        per_sample = 8 * (14 * 3 * n + 6 * n + 8 * 2 * n)
        chunk = options.get("chunk", "auto")
        if chunk == "auto":
            chunk = int(max(1, min(int(options.get("samples", 1000)), CHUNK_BYTES // per_sample)))
        return 8 * n * n * (6 + self.extra_matrices) + int(chunk) * per_sample

    def _setup(self, model: Model, probes: Probes, options: dict[str, Any]):
        samples, frac = options["samples"], float(options["max_failed"])
        dt = self._step(model, options)
        n = model.n
        args = self.level_args(model, spin_args(model))
        mode = np.zeros(n, complex) if probes.mode is None else probes.mode  # zeros: no beam, not reported
        obs_args = (jnp.asarray(probes.weights), args["JG"][n:], jnp.asarray(mode))
        # per sample: the state and ~10 temporaries of its size, the noise, the estimator temporaries
        per_sample = 8 * (14 * 3 * n + 6 * n + 8 * probes.weights.shape[0] * n)
        chunk = options["chunk"]
        if chunk == "auto":
            chunk = int(max(1, min(samples, CHUNK_BYTES // per_sample)))
            if show_progress(options.get("progress", "auto")):  # a bar needs several chunks to move
                chunk = min(chunk, max(1, -(-samples // 20)))
        return samples, frac, dt, int(chunk), args, obs_args

    def _run(self, model, t_obs, n_sub, initial, seed, options, probes, steady: bool):
        samples, frac, dt, chunk, args, obs_args = self._setup(model, probes, options)
        run = _runner(model.envelope, steady, self.equations)
        t_obs = jnp.asarray(t_obs, dtype=float)
        n_sub = jnp.asarray(n_sub)
        bloch = jnp.asarray(initial, dtype=float)
        n = model.n
        require(chunk * (8 * (14 * 3 * n + 6 * n)),
                f"a chunk of {chunk} '{self.name}' samples of {n} emitters")
        bar = SampleProgress(options.get("progress", "auto"), samples, self.name)
        try:
            tot, failed = _sampled_sums(run, self.initial_samples, bloch, seed, samples, chunk, args,
                                        obs_args, t_obs, n_sub, steady, bar=bar)
        finally:
            bar.close()
        if failed > frac * samples:
            raise SolveError(
                f"{self.title}: {failed} of {samples} samples diverged or became non-finite, more than "
                f"max_failed = {frac:g} of them; use a smaller dt (now {dt:g}/Γ0) or a cloud with a larger "
                "min_distance"
            )
        good = samples - failed
        if good < 2:
            raise SolveError(f"{self.title}: only {good} usable samples; raise samples")
        means, stderr, cov = _statistics(tot, good)
        if probes.mode is None:
            del cov["mode"]
        attrs = {
            "samples": samples,
            "samples_failed": failed,
            "dt": dt,
            # the intervals between report times are split into equal steps of at most dt
            "step_largest": float(np.max(np.diff(np.asarray(t_obs)) / np.asarray(n_sub), initial=0.0)),
            "steps": int(np.sum(np.asarray(n_sub))),
            "chunk": chunk,
            "calculus": self.calculus,
        }
        if steady:
            attrs.update(_settling(tot, good, len(t_obs) - 1, self.name))
        diagnostics: dict[str, Any] = {}
        run_args = {"model": model, "seed": seed, "chunk": chunk, "args": args, "obs_args": obs_args,
                    "t_obs": t_obs, "n_sub": n_sub, "steady": steady, "options": options, "sums": tot,
                    "count": good}
        self.add_diagnostics(run_args, means, stderr, diagnostics, attrs)
        return Moments(**means, stderr=stderr, cov=cov, diagnostics=diagnostics, attrs=attrs)

    def evolve(self, model, times, initial, probes, seed, options) -> Moments:
        dt = self._step(model, options)
        return self._run(model, times, _substeps(times, dt), initial, seed, options, probes, steady=False)

    def steady(self, model, probes, seed, options) -> Moments:
        """Average over samples and over ``window_points`` equally spaced times of the window
        [settle_time, settle_time + window], starting from the ground state at t = 0."""
        dt = self._step(model, options)
        t_settle, window = float(options["settle_time"]), float(options["window"])
        points = int(options["window_points"])
        t_obs = np.concatenate([[0.0], t_settle + window * np.arange(1, points + 1) / points])
        n_sub = _substeps(t_obs, dt)
        ground = np.tile([0.0, 0.0, -1.0], (model.n, 1))
        m = self._run(model, t_obs, n_sub, ground, seed, options, probes, steady=True)
        m.attrs.update(settle_time=t_settle, window=window, window_points=points)
        return m
