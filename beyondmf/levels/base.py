"""The contract every level of description meets, and the registry that dispatches by name.

A level turns a `Model` into `Moments`: the one-body moments and the few contractions of two- and
four-body moments from which `beyondmf.observables` builds every observable of the data contract. A
level never computes an observable itself, so `intensity` means the same at every level.
"""

from __future__ import annotations

import numbers
import sys
from abc import ABC, abstractmethod
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any, ClassVar

import numpy as np

from ..geometry import axis_frame, detector_direction
from ..integrate import OptionError, check_ode_options
from ..lens import cloud_diameter, cone_nodes, lenses_of
from ..model import Model

__all__ = ["Level", "Moments", "Probes", "OptionError", "register", "get_level", "available_levels",
           "axis_frame", "detector_direction"]


@dataclass(frozen=True)
class Probes:
    """What the observables need from a level besides the one-body moments.

    ``weights[d, j] = e^{−i 2π n̂_d·r_j}`` defines the far field E_d = Σ_j weights[d, j] σ_j⁻ towards
    direction d; the total emission uses Γ of the model. The first ``len(names)`` directions are the
    detectors; after them come the quadrature nodes of the lenses (`beyondmf.lens`), lens k's nodes at
    ``lens_nodes[k]`` (a slice) with solid-angle weights ``lens_weights[k]``. A level treats every
    direction alike.
    """

    names: tuple[str, ...]
    directions: np.ndarray  # (D, 3) unit vectors, detectors then lens nodes
    weights: np.ndarray  # (D, N) complex
    lenses: tuple = ()  # beyondmf.lens.Lens
    lens_nodes: tuple[slice, ...] = ()
    lens_weights: tuple[np.ndarray, ...] = ()
    # u*(r_j) of the probe beam's mode (`beyondmf.beam`; None for a plane wave): a sampling level projects
    # each sample on it, for the sampling error of the transmission
    mode: np.ndarray | None = None

    @classmethod
    def build(cls, model: Model, detectors: dict[str, Any],
              lenses: Mapping[str, Any] | None = None) -> Probes:

        resolved = detector_directions(detectors, model.laser)
        names = tuple(resolved)
        directions = [np.array([resolved[n] for n in names]).reshape(-1, 3)]
        found = lenses_of(lenses, model.laser)
        slices, node_weights, start = [], [], len(names)
        diameter = cloud_diameter(model.positions)
        for lens in found:
            dirs, w = cone_nodes(lens.axis, lens.half_angle, diameter, lens.resolution)
            directions.append(dirs)
            node_weights.append(w)
            slices.append(slice(start, start + len(w)))
            start += len(w)
        directions = np.concatenate(directions)
        weights = np.exp(-2j * np.pi * directions @ model.positions.T)
        mode = None if model.beam is None else np.conj(model.beam.mode(model.positions, model.laser))
        return cls(names, directions, weights, found, tuple(slices), tuple(node_weights), mode)


def detector_directions(detectors: Mapping[str, Any], laser) -> dict[str, np.ndarray]:
    """name → unit vector, from a direction (x, y, z) or a table {"angle": θ, "azimuth": φ} in degrees
    from the laser direction (as in study files: `detector_direction`)."""
    out = {}
    for name, spec in detectors.items():
        if isinstance(spec, Mapping):
            extra = sorted(set(spec) - {"angle", "azimuth"})
            angle, azimuth = spec.get("angle"), spec.get("azimuth", 0.0)
            if extra or not all(isinstance(a, numbers.Real) and not isinstance(a, bool) and np.isfinite(a)
                                for a in (angle, azimuth)) or not 0 <= angle <= 180:
                raise ValueError(
                    f"detector {name!r}: a table takes 'angle' (degrees from the laser, 0 to 180) and "
                    f"optionally 'azimuth' (degrees about it), got {dict(spec)!r}")
            out[str(name)] = detector_direction(laser, float(angle), float(azimuth))
            continue
        try:
            v = np.asarray(spec, dtype=float).reshape(-1)
        except (TypeError, ValueError):
            v = None
        if v is None or v.shape != (3,) or not np.all(np.isfinite(v)) or not np.linalg.norm(v) > 0:
            raise ValueError(
                f"detector {name!r} needs a direction: a non-zero finite (x, y, z), or a table "
                f"{{'angle': θ, 'azimuth': φ}} in degrees from the laser; got {spec!r}")
        out[str(name)] = v / np.linalg.norm(v)
    return out


@dataclass
class Moments:
    """What a level reports, each with a leading time axis (length 1 for a steady state).

    excited   (T, N)  ⟨σ_i⁺σ_i⁻⟩
    coherence (T, N)  ⟨σ_i⁻⟩, complex
    field2    (T, D)  ⟨E_d†E_d⟩
    field4    (T, D)  ⟨E_d†E_d†E_dE_d⟩
    rate      (T,)    Σ_ij Γ_ij ⟨σ_i⁺σ_j⁻⟩
    rate4     (T,)    Σ_ijkl Γ_ij Γ_kl ⟨σ_i⁺σ_k⁺σ_l⁻σ_j⁻⟩

    Sampling levels fill ``stderr`` (same keys, standard errors of the means) and ``cov`` with the
    covariances of the means that the ratios need: ``cov["field"] = cov(field4, field2)`` and
    ``cov["rate"] = cov(rate4, rate)``. They also set ``coherent_field`` (T, D), the unbiased estimate of
    |Σ_j w_dj ⟨σ_j⁻⟩|² (`levels._sampling`; the square of the mean coherences is biased by their sampling
    variance), with ``stderr["coherent_field"]`` and ``cov["field2,coherent"]``; without it the coherent
    part is computed from ``coherence``. With a beam drive they also set ``cov["mode"]`` (T, 3), the
    covariance (V_rr, V_ii, V_ri) of the mean projection Σ_j u_j*⟨σ_j⁻⟩ on the probe's mode (the sampling
    error of the transmission, `levels._sampling.mode_covariance`). ``diagnostics`` maps extra
    data-variable names to (dims, array) or (dims, array, attrs), attrs with ``units`` and
    ``long_name``; ``attrs`` adds attributes (solver statistics, residuals, warnings).
    """

    excited: Any
    coherence: Any
    field2: Any
    field4: Any
    rate: Any
    rate4: Any
    coherent_field: Any = None
    stderr: dict[str, Any] = field(default_factory=dict)
    cov: dict[str, Any] = field(default_factory=dict)
    diagnostics: dict[str, tuple] = field(default_factory=dict)
    attrs: dict[str, Any] = field(default_factory=dict)

    KEYS: ClassVar[tuple[str, ...]] = ("excited", "coherence", "field2", "field4", "rate", "rate4")

    def to_numpy(self) -> Moments:
        conv = {k: np.asarray(getattr(self, k)) for k in self.KEYS}
        return Moments(
            **conv,
            coherent_field=None if self.coherent_field is None else np.asarray(self.coherent_field),
            stderr={k: np.asarray(v) for k, v in self.stderr.items()},
            cov={k: np.asarray(v) for k, v in self.cov.items()},
            diagnostics={k: (d[0], np.asarray(d[1]), *d[2:]) for k, d in self.diagnostics.items()},
            attrs=dict(self.attrs),
        )


def is_real_number(v) -> bool:
    """A finite real number (not a bool, not a string): for option checks."""
    real = isinstance(v, int | float | np.integer | np.floating) and not isinstance(v, bool)
    return real and bool(np.isfinite(v))


def is_count(v, least: int) -> bool:
    """An integer (not a bool) ≥ ``least``: for option checks."""
    return isinstance(v, int | np.integer) and not isinstance(v, bool) and v >= least


def check_sampling_options(options: dict[str, Any]) -> None:
    """The options every sampling level shares: ``samples``, ``dt`` and ``chunk`` ("auto" or a value)."""
    if not is_count(options["samples"], 2):
        raise OptionError("samples", f"must be an integer ≥ 2, got {options['samples']!r}")
    dt = options["dt"]
    if dt != "auto" and not (is_real_number(dt) and dt > 0):
        raise OptionError("dt", f"must be 'auto' or a positive time step (1/Γ0), got {dt!r}")
    chunk = options["chunk"]
    if chunk != "auto" and not is_count(chunk, 1):
        raise OptionError("chunk", f"must be 'auto' or an integer ≥ 1 (samples at once), got {chunk!r}")
    progress = options.get("progress", "auto")
    if not (isinstance(progress, bool) or progress == "auto"):
        raise OptionError("progress", f"must be 'auto', true or false, got {progress!r}")


class SampleProgress:
    """A bar of the samples done (stderr, only where `beyondmf._config.show_progress` says so), updated
    after each chunk; a no-op otherwise. Progress is presentation: never part of a task's identity."""

    def __init__(self, option, samples: int, what: str) -> None:
        from .._config import show_progress

        self._bar = None
        if show_progress(option):
            from tqdm.auto import tqdm

            self._bar = tqdm(total=int(samples), unit="sample", desc=what, leave=False, file=sys.stderr)

    @property
    def shown(self) -> bool:
        return self._bar is not None

    def update(self, done: int) -> None:
        if self._bar is not None:
            self._bar.update(int(done))

    def close(self) -> None:
        if self._bar is not None:
            self._bar.close()


# One line per option, shown by `beyondmf levels`; a level's own ``option_help`` takes precedence.
OPTION_HELP: dict[str, str] = {
    "solver": "ODE integrator: 'auto' (chosen from the stiffness) or a diffrax class name (Tsit5, Dopri5, "
              "Dopri8, Kvaerno3, Kvaerno5)",
    "rtol": "relative tolerance of the adaptive step control",
    "atol": "absolute tolerance of the adaptive step control",
    "max_steps": "most steps a solve may take before it fails with SolveError",
    "dtmin": "smallest step (1/Γ0); a step-size collapse below it fails the solve",
    "progress": "progress bar: 'auto' (only on a terminal), true or false; never changes a result",
    "samples": "number of samples (trajectories) averaged; errors fall as 1/sqrt(samples)",
    "dt": "largest fixed time step (1/Γ0), or 'auto' from the fastest rates of the model",
    "chunk": "samples integrated at once, or 'auto' from a 1 GiB memory budget; changes only rounding",
    "settle_time": "steady: time (1/Γ0) integrated from the ground state before the state is read",
    "max_failed": "fraction of samples allowed to diverge before the run fails",
    "window": "steady: averaging window (1/Γ0) after settle_time",
    "window_points": "steady: times averaged in the window, per sample",
    "vacuum_check": "control samples of the undriven ground state that measure the method's drift: 'auto' "
                    "(as many as the run, at least 64), 0 (off) or an integer ≥ 2",
    "pair_radius": "λ0: pairs closer than it keep full pair equations, farther ones follow far_pairs; "
                   "None = every pair dynamical",
    "far_pairs": "rule for pairs beyond pair_radius: 'first_order' (driven by the couplings, every pair "
                 "counted) or 'drop' (set to zero)",
}


def option_help(level: Level, option: str) -> str:
    """The one-line description of ``option`` of ``level`` (empty when neither the level nor the shared
    table has one: a level of another package may not describe its options)."""
    return getattr(level, "option_help", {}).get(option) or OPTION_HELP.get(option, "")


class Level(ABC):
    """One level of description. Subclasses set the class attributes and implement two methods.

    ``options`` maps each option the level accepts to its default; `evolve`/`steady` reject any other.
    ``initial`` reaches a level as (N, 3) Bloch vectors (⟨σ^x⟩, ⟨σ^y⟩, ⟨σ^z⟩) of a product state.
    """

    name: ClassVar[str]
    summary: ClassVar[str]
    options: ClassVar[dict[str, Any]] = {}
    #: one line per option where the shared table (`OPTION_HELP`) does not say it or says it otherwise
    option_help: ClassVar[dict[str, str]] = {}
    stochastic: ClassVar[bool] = False
    #: what to do when a run leaves the physical bounds (`beyondmf.physicality`): the end of that warning
    when_unphysical: ClassVar[str] = ("compare with an exact level ('exact' for N ≲ 9, 'jumps' for "
                                      "N ≲ 12–14) on a smaller cluster of the same density")

    def memory_bytes(self, model: Model, options: dict[str, Any]) -> int | None:
        """The most memory (bytes) a run of ``model`` at this level takes, the estimate the level checks
        against the free memory before it allocates (``beyondmf run --dry-run`` prints it); None where the
        level does not estimate it. ``options`` hold every option of the level (defaults filled in)."""
        return None

    def check(self, model: Model) -> None:  # noqa: B027 - optional hook
        """Refuse, with a ValueError that says why, a model this level cannot treat."""

    def validate_options(self, options: dict[str, Any]) -> None:
        """Refuse, with a ValueError naming the option, a value this level cannot use (no model needed,
        nothing computed: study files call it before a run starts). The default checks the options of the
        adaptive ODE solver, where the level has them; levels with options of their own extend it."""
        check_ode_options({k: v for k, v in options.items() if k in self.options}, self.options)

    @abstractmethod
    def evolve(
        self,
        model: Model,
        times: np.ndarray,
        initial: np.ndarray,
        probes: Probes,
        seed: int | None,
        options: dict[str, Any],
    ) -> Moments:
        """Moments at each of ``times``, starting from the product state ``initial`` at times[0]."""

    @abstractmethod
    def steady(self, model: Model, probes: Probes, seed: int | None, options: dict[str, Any]) -> Moments:
        """Moments of the steady state (time axis of length 1)."""

    def evolve_batch(self, models: list[Model], times, initial, probes, seed, options) -> list[Moments]:
        """`evolve` for models that differ only in their drive (Rabi frequency, detunings): one solve
        after another here; levels that can batch them into one solve (`beyondmf.drive_scan`) override."""
        return [self.evolve(m, times, initial, probes, seed, options) for m in models]

    def steady_batch(self, models: list[Model], probes, seed, options) -> list[Moments]:
        """`steady` for models that differ only in their drive; see `evolve_batch`."""
        return [self.steady(m, probes, seed, options) for m in models]


_REGISTRY: dict[str, type[Level]] = {}


def register(cls: type[Level]) -> type[Level]:
    """Class decorator: make a level available to `evolve`/`steady` under ``cls.name``."""
    if cls.name in _REGISTRY and _REGISTRY[cls.name] is not cls:
        raise ValueError(f"a level named {cls.name!r} is already registered")
    _REGISTRY[cls.name] = cls
    return cls


def available_levels() -> dict[str, str]:
    """Registered level names with a one-line summary each."""
    return {name: cls.summary for name, cls in sorted(_REGISTRY.items())}


def get_level(name: str) -> Level:
    try:
        return _REGISTRY[name]()
    except KeyError:
        raise ValueError(
            f"unknown level {name!r}; known levels: {', '.join(sorted(_REGISTRY))}"
        ) from None
