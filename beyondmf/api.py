"""The two entry points: `evolve` (dynamics) and `steady` (steady state), for every level."""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np
import xarray as xr

from . import physicality
from ._notes import collecting
from ._notes import warn as _note
from .levels import _regimes
from .levels.base import Level, Probes, get_level, is_count
from .model import Model
from .observables import assemble
from .results import provenance

__all__ = ["evolve", "steady", "drive_scan", "solve_drives", "initial_bloch"]


def initial_bloch(model: Model, initial) -> np.ndarray:
    """Per-emitter Bloch vectors (⟨σ^x⟩, ⟨σ^y⟩, ⟨σ^z⟩) of the product state named by ``initial``."""
    named = {"ground": [0.0, 0.0, -1.0], "excited": [0.0, 0.0, 1.0]}
    usage = ("'ground', 'excited', one of these per emitter, or Bloch vectors ((N, 3), or one (3,) for "
             "every emitter)")
    if initial is None or isinstance(initial, str):
        if initial in named:
            return np.tile(named[initial], (model.n, 1))
        raise ValueError(f"initial must be {usage}, got {initial!r}")
    if isinstance(initial, list | tuple) and initial and all(isinstance(x, str) for x in initial):
        unknown = sorted({x for x in initial if x not in named})
        if unknown or len(initial) != model.n:
            bad = f" with {', '.join(map(repr, unknown))}" if unknown else ""
            raise ValueError(f"initial as names per emitter needs {model.n} of 'ground'/'excited', got "
                             f"{len(initial)}{bad}")
        return np.array([named[x] for x in initial])
    try:
        s = np.asarray(initial, dtype=float)
    except (TypeError, ValueError) as err:
        raise ValueError(f"initial must be {usage}, got {initial!r}") from err
    if s.shape == (3,):
        s = np.tile(s, (model.n, 1))
    if s.shape != (model.n, 3):
        raise ValueError(f"initial Bloch vectors must have shape ({model.n}, 3) or (3,), got {s.shape}; "
                         f"initial may also be {usage}")
    if not np.all(np.isfinite(s)):
        raise ValueError("initial Bloch vectors contain NaN or infinite values")
    length = np.linalg.norm(s, axis=1)
    if np.any(length > 1 + 1e-9):
        i = int(np.argmax(length))
        raise ValueError(f"initial Bloch vector of emitter {i} has length {length[i]:.6g} > 1")
    return s


def _detectors(model: Model, detectors) -> dict[str, Any]:
    if detectors is None:
        return {"forward": model.laser}
    if not isinstance(detectors, Mapping) or not detectors:
        raise ValueError("detectors must map a name to a direction, e.g. {'forward': (0, 0, 1)}")
    return dict(detectors)


def _options(level: Level, given: dict[str, Any]) -> dict[str, Any]:
    unknown = sorted(set(given) - set(level.options))
    if unknown:
        allowed = ", ".join(sorted(level.options)) or "none"
        names = ", ".join(map(repr, unknown))
        raise ValueError(f"level {level.name!r} takes no option {names}; its options: {allowed}")
    opts = {**level.options, **given}
    level.validate_options(opts)
    return opts


def draw_seed() -> int:
    """A fresh random seed for a sampling level (recorded with its results)."""
    return int(np.random.SeedSequence().entropy % 2**31)


def check_seed(seed) -> None:
    if not (is_count(seed, 0) and seed < 2**63):
        raise ValueError(f"seed must be a non-negative integer below 2**63, got {seed!r}")


def _seed(level: Level, seed):
    if seed is None and level.stochastic:
        return draw_seed()
    if seed is not None:
        check_seed(seed)
    return None if seed is None else int(seed)


def _attrs(model: Model, level: Level, kind: str, options, seed, extra) -> dict[str, Any]:
    attrs = {"level": level.name, "calculation": kind, **model.parameters(), "options": options}
    # a deterministic level uses no seed: −1 there, whatever was passed (a study passes its seed to all)
    attrs["seed"] = seed if (seed is not None and level.stochastic) else -1
    attrs.update(extra)
    attrs.update(provenance())
    return attrs


def _check_model(model) -> None:
    if not isinstance(model, Model):
        raise TypeError(f"model must be a beyondmf.Model, got {type(model).__name__}")


def evolve(
    model: Model,
    level: str,
    times,
    initial="ground",
    detectors: Mapping[str, Any] | None = None,
    seed: int | None = None,
    lenses: Mapping[str, Any] | None = None,
    **options,
) -> xr.Dataset:
    """Dynamics of ``model`` at one level of description.

    Parameters
    ----------
    model : the emitters, couplings and drive.
    level : a registered level name (`beyondmf.available_levels()`), e.g. "meanfield".
    times : increasing times (1/Γ0) at which to report; the state is ``initial`` at times[0].
    initial : "ground", "excited", a list of N of these (one per emitter, e.g. a partly inverted cloud),
        or Bloch vectors ((N, 3) or one (3,) for all) of a product state.
    detectors : name → direction of observation; default one detector, "forward", along the laser.
    seed : random seed of sampling levels (drawn and recorded when None).
    lenses : name → collection cone, e.g. {"side": {"angle": 90, "na": 0.4}} (axis as "toward" (x, y, z)
        or "angle"/"azimuth" from the laser; cone as "na" or "half_angle" in degrees): adds
        ``lens_power`` and its coherent and incoherent parts along ``lens`` (`beyondmf.lens`).
    options : the level's options (see ``beyondmf.level_options(level)``); anything else is an error.

    Returns
    -------
    xarray.Dataset with the variables of the data contract (conventions.md) along ``time``. The
    attribute ``warnings`` lists the messages of the warnings the level issued about this run (empty when
    it had nothing to say), e.g. twa's vacuum control or cumulant2's unphysical moments.
    """
    _check_model(model)
    lvl = get_level(level)
    opts = _options(lvl, options)
    ts = _report_times(times)
    bloch = initial_bloch(model, initial)
    probes = Probes.build(model, _detectors(model, detectors), lenses)
    _check_results_size(model, lvl, len(ts), len(probes.names))
    lvl.check(model)
    seed = _seed(lvl, seed)
    named = isinstance(initial, str)
    init = initial if named else "bloch vectors (data variable initial_bloch)"
    with collecting() as said:  # the level's warnings about this run, kept in the result (beyondmf._notes)
        moments = lvl.evolve(model, ts, bloch, probes, seed, opts)
        attrs = _attrs(model, lvl, "evolve", opts, seed, {"initial": init})
        ds = _judge(assemble(model, lvl.name, moments, probes, ts, attrs), model, lvl)
    ds.attrs["warnings"] = list(said)
    ds = _with_inputs(model, ds)
    if not named:  # the state itself, so that the file says how to reproduce the run
        ds["initial_bloch"] = (("emitter", "axis"), bloch,
                               {"units": "1", "long_name": "initial Bloch vectors (⟨σ^x⟩, ⟨σ^y⟩, ⟨σ^z⟩)"})
    return ds


def _report_times(times) -> np.ndarray:
    """``times`` as a float array, refused unless a non-empty, finite, strictly increasing 1-D sequence."""
    if np.ndim(times) != 1:
        raise ValueError(
            f"times must be a 1-D sequence of report times starting at the initial time, got {times!r}; "
            "to evolve from t = 0 to t = 5 pass e.g. numpy.linspace(0, 5, 51)"
        )
    ts = np.asarray(times, dtype=float)
    if ts.size == 0 or not np.all(np.isfinite(ts)) or np.any(np.diff(ts) <= 0):
        raise ValueError("times must be a non-empty, finite, strictly increasing sequence")
    return ts


def _check_results_size(model: Model, lvl, points: int, detectors: int) -> None:
    """MemoryError, before the level allocates anything, when the results at ``points`` report times
    would not fit in free memory (`beyondmf.memory.results_bytes`, one level)."""
    from .memory import require, results_bytes

    need = results_bytes(model.n, points, detectors, 1, lvl.stochastic)
    require(need, f"the results of {model.n:,} emitters at {points:,} report times",
            hint="ask for fewer report times (or fewer emitters), or use a larger machine")


def _with_inputs(model: Model, ds: xr.Dataset) -> xr.Dataset:
    """Custom couplings are part of the model: kept in the result, so that the file can reproduce it."""
    if model.coupling == "custom":
        for name, mat, what in (("coupling_J", model.J, "exchange J_ij"), ("coupling_Gamma", model.Gamma,
                                                                           "collective decay Γ_ij")):
            ds[name] = (("emitter", "partner"), np.array(mat), {"units": "Γ0", "long_name": f"custom {what}"})
    return ds


def steady(
    model: Model,
    level: str,
    detectors: Mapping[str, Any] | None = None,
    seed: int | None = None,
    lenses: Mapping[str, Any] | None = None,
    **options,
) -> xr.Dataset:
    """Steady state of ``model`` under a constant drive, at one level of description.

    Same parameters and result as `evolve`, without ``times``/``initial`` and without the time axis.
    """
    _check_model(model)
    if not model.envelope.constant:
        raise ValueError("steady needs a constant drive: build the model with envelope=None, or use evolve")
    lvl = get_level(level)
    opts = _options(lvl, options)
    probes = Probes.build(model, _detectors(model, detectors), lenses)
    lvl.check(model)
    seed = _seed(lvl, seed)
    with collecting() as said:
        moments = lvl.steady(model, probes, seed, opts)
        attrs = _attrs(model, lvl, "steady", opts, seed, {})
        ds = _judge(assemble(model, lvl.name, moments, probes, None, attrs), model, lvl)
    ds.attrs["warnings"] = list(said)
    return _with_inputs(model, ds)


def _judge(ds: xr.Dataset, model: Model, level: Level) -> xr.Dataset:
    """The level's calibrated regime rule (`levels._regimes`: indicators in the attributes, and its warning),
    and the observables outside the bounds every physical state obeys, in ``ds.attrs["unphysical"]`` with a
    warning (`beyondmf.physicality`)."""
    excitation = float(ds.excited.isel(time=0).mean()) if "time" in ds.dims else None
    _regimes.apply(level.name, model, ds.attrs, excitation)
    flagged, text = physicality.check(ds, level.stochastic)
    ds.attrs["unphysical"] = flagged
    if text:
        _note(f"{level.name}: values no physical state can have: {text}. The approximation of this level "
              f"fails here; {level.when_unphysical}")
    return ds


def _scan_values(detuning, rabi):
    given = [(name, v) for name, v in (("detuning", detuning), ("rabi", rabi)) if v is not None]
    if len(given) != 1:
        raise ValueError("drive_scan takes exactly one of detuning=[...] (laser detunings Δ, Γ0) or "
                         "rabi=[...] (Rabi frequencies Ω, Γ0)")
    name, values = given[0]
    try:
        arr = np.asarray(values, dtype=float)
    except (TypeError, ValueError) as err:
        raise ValueError(f"{name} must be a 1-D sequence of numbers (Γ0), got {values!r:.80}") from err
    if arr.ndim != 1 or arr.size == 0 or not np.all(np.isfinite(arr)):
        raise ValueError(
            f"{name} must be a non-empty 1-D sequence of finite numbers (Γ0), got {values!r:.80}")
    if name == "rabi" and np.any(arr < 0):
        raise ValueError("rabi values must be non-negative (a phase of the laser goes into the model's rabi)")
    return name, arr


def drive_scan(
    model: Model,
    level: str,
    detuning=None,
    rabi=None,
    times=None,
    initial="ground",
    detectors: Mapping[str, Any] | None = None,
    seed: int | None = None,
    lenses: Mapping[str, Any] | None = None,
    **options,
) -> xr.Dataset:
    """The same cloud under a grid of drives, as one solve where the level can batch them.

    ``detuning``: laser detunings Δ_k (Γ0); per-emitter detunings of the model keep their spread,
    Δ_i → Δ_k + (Δ_i − mean Δ). ``rabi``: Rabi frequencies Ω_k (Γ0), the model's laser phase kept. Exactly
    one of them. ``times`` None: steady states; else a dynamics from ``initial`` as in `evolve`.

    `meanfield` and `cumulant2` (dense) integrate the whole grid as one system whose couplings act on all
    drives at once (matrix-matrix products in place of matrix-vector ones; docs/transmission.md, Spectra),
    in groups that fit in memory; every other level runs one solve per drive. The result has a leading
    dimension named ``detuning`` or ``rabi``, each entry the Dataset `evolve`/`steady` would give (its
    warnings in ``warnings_per_drive``).
    """
    _check_model(model)
    name, values = _scan_values(detuning, rabi)
    if name == "detuning":
        spread = model.detunings - float(np.mean(model.detunings))
        models = [model.with_drive(detuning=v + spread) for v in values]  # equal ones collapse to one float
    else:
        phase = model.rabi / abs(model.rabi) if abs(model.rabi) > 0 else 1.0
        models = [model.with_drive(rabi=v * phase) for v in values]
    parts, said = _solve_drives(models, level, times, initial, detectors, seed, lenses, options)
    notes = [list(p.attrs["warnings"]) for p in parts]
    inputs = ["coupling_J", "coupling_Gamma", "initial_bloch"]  # the same for every drive: kept once
    ds = xr.concat([p.drop_vars(inputs, errors="ignore") for p in parts], dim=name, combine_attrs="override")
    ds = ds.assign_coords({name: values})
    if "initial_bloch" in parts[0]:
        ds["initial_bloch"] = parts[0]["initial_bloch"]
    long = "laser detuning Δ" if name == "detuning" else "Rabi frequency Ω"
    ds[name].attrs.update(units="Γ0", long_name=long)
    ds.attrs[name] = [float(v) for v in values]
    ds.attrs["scanned"] = name
    ds.attrs["saturation"] = [float(p.attrs["saturation"]) for p in parts]
    ds.attrs["warnings"] = list(said) + sorted({w for n in notes for w in n})
    ds.attrs["warnings_per_drive"] = notes
    ds.attrs["unphysical"] = sorted({u for p in parts for u in p.attrs.get("unphysical", [])})
    return _with_inputs(model, ds)


def solve_drives(
    models: list[Model],
    level: str,
    times=None,
    initial="ground",
    detectors: Mapping[str, Any] | None = None,
    seed: int | None = None,
    lenses: Mapping[str, Any] | None = None,
    **options,
) -> list[xr.Dataset]:
    """`steady` (``times`` None) or `evolve` of models that differ only in their drive (Rabi frequency,
    detunings; the same emitters, couplings, beam and envelope), as one batched solve where the level can
    (`drive_scan`); one Dataset per model, each as `steady`/`evolve` would give it, up to the solver's
    tolerance (the members share its step control). A sweep whose grid varies only the drive runs its
    tasks through this."""
    for m in models:
        _check_model(m)
    if not models:
        return []
    base = models[0]
    same = all(np.array_equal(m.positions, base.positions) and m.coupling == base.coupling
               and np.array_equal(m.dipole, base.dipole) and np.array_equal(m.laser, base.laser)
               and m.beam == base.beam and m.envelope == base.envelope
               and _same_array(m.J, base.J) and _same_array(m.Gamma, base.Gamma) for m in models)
    if not same:
        raise ValueError("solve_drives takes models that differ only in rabi and detuning")
    parts, said = _solve_drives(models, level, times, initial, detectors, seed, lenses, options)
    for p in parts:
        p.attrs["warnings"] = list(said) + list(p.attrs["warnings"])
    return parts


def _same_array(a, b) -> bool:
    return a is b or np.array_equal(a, b)  # models from `Model.with_drive` share their couplings


def _solve_drives(models, level, times, initial, detectors, seed, lenses, options):
    """(per model its Dataset with its own warnings, the warnings of the batch as a whole)."""
    model = models[0]
    lvl = get_level(level)
    opts = _options(lvl, options)
    probes = Probes.build(model, _detectors(model, detectors), lenses)
    for m in models:
        lvl.check(m)
    seed = _seed(lvl, seed)
    if times is None:
        if not model.envelope.constant:
            raise ValueError(
                "steady needs a constant drive: build the model with envelope=None, or give times")
        kind, ts, extra = "steady", None, {}
    else:
        ts = _report_times(times)
        _check_results_size(model, lvl, len(ts) * len(models), len(probes.names))
        bloch = initial_bloch(model, initial)
        named = isinstance(initial, str)
        extra = {"initial": initial if named else "bloch vectors (data variable initial_bloch)"}
        kind = "evolve"
    with collecting() as said:
        if ts is None:
            moments = lvl.steady_batch(models, probes, seed, opts)
        else:
            moments = lvl.evolve_batch(models, ts, bloch, probes, seed, opts)
    parts = []
    for m, mom in zip(models, moments, strict=True):
        with collecting() as own:
            attrs = _attrs(m, lvl, kind, opts, seed, extra)
            ds = _judge(assemble(m, lvl.name, mom, probes, ts, attrs), m, lvl)
        ds.attrs["warnings"] = list(own)
        ds = _with_inputs(m, ds)
        if ts is not None and not isinstance(initial, str):
            ds["initial_bloch"] = (("emitter", "axis"), bloch, {
                "units": "1", "long_name": "initial Bloch vectors (⟨σ^x⟩, ⟨σ^y⟩, ⟨σ^z⟩)"})
        parts.append(ds)
    return parts, list(said)
