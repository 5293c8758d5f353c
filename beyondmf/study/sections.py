"""The study-file sections of a sweep and how they fit together, and the one reader of study files.

Sections added here (docs/user-guide.md, "Writing a study"):

    [sweep]
    realizations = 8            # K position draws (and sampling seeds) per grid point
    seed = 0                    # base seed: draw k uses SeedSequence([seed, k]) at every grid point
                                # (geometry.seed and run.seed are refused in a study with [sweep]/[compare])
    keep = "all"                # or "last_time": keep only the late-time value of a dynamics run
    [sweep.grid]                # each key: a dotted path into the study, each value: a list
    "geometry.n" = [4, 8]
    "geometry.density" = [0.1, 1.0]   # n·λ0³: rescales the cloud, keeping its shape
    "drive.saturation" = [0.1, 1, 10] # s = 2Ω²/(1 + 4Δ²): sets drive.rabi
    "levels.twa.samples" = [100, 400] # a level option

    [compare]
    baseline = "meanfield"      # the level the others are measured against
    tolerance = 0.1             # relative correction up to which the baseline holds
    confidence = 0.95
    observables = ["emission_rate", "intensity", "g2", "g2_total"]

    [convergence]               # a grid dimension that refines one level: has it converged?
    dimension = "samples"
    level = "twa"
    tolerance = 0.05            # criterion: beyondmf.convergence

    [quick]                     # overrides applied with --quick (CI-sized runs), same layout as the study
    sweep = { realizations = 2 }

Every (grid point, level, realization) is one task (`beyondmf.tasks`): a pure function of its parameters,
written to DIR/tasks/<hash>.nc when it finishes, so running the same command again resumes.

`read_study` validates all of it before anything runs: each section, how the sections fit together
(`_check_sections`: the baseline and the convergence level are levels of the study, the convergence
dimension is a grid dimension, the observables exist for this calculation, grid paths name the study's
levels), every grid point's study, and the study with its [quick] overrides (errors name ``quick.KEY``).
"""

from __future__ import annotations

import contextlib
import contextvars
import copy
import itertools
import json
import tomllib
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

import numpy as np
import xarray as xr

from ..levels.base import get_level
from ..tasks import SCALAR_VARIABLES
from .schema import Study, StudyError, emitter_count, parse_table, section, study_check, study_text

__all__ = [
    "SweepSpec",
    "CompareSpec",
    "ConvergenceSpec",
    "read_study",
    "study_from_table",
    "to_toml",
    "is_sweep",
    "check_convergence",
    "check_plan",
    "plan_estimate",
    "grid_quantity",
    "format_value",
    "cloud_scale",
]

# Observables a [compare] section may name besides the default ones; the transmission ones exist for a beam
# drive, the lens ones with [lenses], the last three for dynamics.
EXTRA_OBSERVABLES = ("intensity_coherent", "intensity_incoherent", "transmission_power", "optical_depth",
                     "lens_power", "lens_power_coherent", "lens_power_incoherent",
                     "excited_mean", "emission_rate_peak", "peak_time", "emitted")
_SIZE_KEYS = {"gaussian": "widths", "ellipsoid": "semi_axes", "box": "sides"}
_RANDOM = tuple(_SIZE_KEYS)
# The attribute `role` of a level's own diagnostic kept by `stack` (vacuum_excitation, exchange_leak, …).
DIAGNOSTIC = "level diagnostic"
# Paths whose value is derived into another parameter before the study is validated.
_DERIVED = ("geometry.density", "drive.saturation")

# Units and names of the grid coordinates in results.nc (and on the figures' axes); other paths are
# named by themselves.
GRID_QUANTITIES = {  # path → (units, long name, axis label)
    "geometry.density": ("λ0⁻³", "density n (peak density for a Gaussian cloud)", "density n·λ0³"),
    "drive.saturation": ("1", "saturation parameter s = 2Ω²/(1 + 4Δ²)", "saturation s"),
    "drive.rabi": ("Γ0", "Rabi frequency Ω", "Ω (Γ0)"),
    "drive.detuning": ("Γ0", "detuning Δ = ω_laser − ω_atom", "Δ (Γ0)"),
    "geometry.spacing": ("λ0", "lattice spacing", "spacing (λ0)"),
    "geometry.min_distance": ("λ0", "smallest distance between emitters", "min. distance (λ0)"),
    "geometry.n": ("1", "number of emitters N", "N emitters"),
    "run.t_end": ("1/Γ0", "end time", "t_end (1/Γ0)"),
}


def format_value(v) -> str:
    """A grid value for a label or message: numbers compactly, anything else (a coupling kind, a vector)
    as it is."""
    numeric = isinstance(v, int | float | np.number) and not isinstance(v, bool | np.bool_)
    return f"{v:g}" if numeric else str(v)


def grid_quantity(path: str) -> tuple[str | None, str, str]:
    """(units or None, long name, axis label) of the grid coordinate for study path ``path``."""
    if path in GRID_QUANTITIES:
        return GRID_QUANTITIES[path]
    last = path.rsplit(".", 1)[-1]
    if path.startswith("levels.") and last in ("samples", "realizations", "chunk"):
        return "1", f"{last} ({path})", path
    if path.startswith("levels.") and last in ("dt", "settle_time", "window"):
        return "1/Γ0", f"{last} ({path})", f"{path} (1/Γ0)"
    return None, path, path



# ---------------------------------------------------------------------------------------------------
# Study-file sections


def _fail(key: str, expected: str, value) -> StudyError:
    return StudyError(f"{key}: expected {expected}, got {value!r}")


def _flatten(table: Mapping, prefix: str) -> dict[str, Any]:
    out = {}
    for k, v in table.items():
        path = f"{prefix}.{k}" if prefix else str(k)
        if isinstance(v, Mapping):
            out.update(_flatten(v, path))
        else:
            out[path] = v
    return out


_GRID_ROOTS = ("geometry", "model", "drive", "run", "levels")


class SweepSpec:
    """The parsed [sweep] section: grid (path → values), realizations K and base seed."""

    def __init__(self, grid: dict[str, list], realizations: int, seed: int, keep: str = "all") -> None:
        self.grid, self.realizations, self.seed, self.keep = grid, realizations, seed, keep

    def points(self) -> int:
        """The number of grid points."""
        return int(np.prod([len(v) for v in self.grid.values()], dtype=object)) if self.grid else 1

    def dims(self) -> list[tuple[str, list]]:
        """(dimension name, coordinate values) per grid path: the last path component, or the whole
        path with '_' when two paths end alike; list-valued parameters get index coordinates."""
        lasts = [p.rsplit(".", 1)[-1] for p in self.grid]
        out = []
        for path, last in zip(self.grid, lasts, strict=True):
            name = last if lasts.count(last) == 1 else path.replace(".", "_")
            vals = self.grid[path]
            out.append((name, vals if all(not isinstance(v, list) for v in vals) else list(range(len(vals)))))
        return out


def _parse_sweep(value, where: str) -> SweepSpec:
    if not isinstance(value, dict):
        raise _fail(where, "a table", value)
    for k in value:
        if k not in ("grid", "realizations", "seed", "keep"):
            raise StudyError(f"{where}.{k}: unknown key; {where} takes grid, realizations, seed, keep")
    keep = value.get("keep", "all")
    if keep not in ("all", "last_time"):
        raise _fail(f"{where}.keep", "'all' or 'last_time' (the late-time value of a dynamics run)", keep)
    k = value.get("realizations", 1)
    if isinstance(k, bool) or not isinstance(k, int) or k < 1:
        raise _fail(f"{where}.realizations", "a positive integer", k)
    seed = value.get("seed", 0)
    if isinstance(seed, bool) or not isinstance(seed, int) or seed < 0:
        raise _fail(f"{where}.seed", "a non-negative integer", seed)
    grid_raw = value.get("grid", {})
    if not isinstance(grid_raw, dict):
        raise _fail(f"{where}.grid", "a table of parameter paths → lists of values", grid_raw)
    grid = {}
    for path, vals in _flatten(grid_raw, "").items():
        key = f"{where}.grid.{path}"
        if path.split(".", 1)[0] not in _GRID_ROOTS or "." not in path:
            raise StudyError(f"{key}: unknown parameter path; a grid path starts with one of "
                             f"{', '.join(_GRID_ROOTS)}, e.g. \"drive.rabi\" or \"geometry.density\"")
        if not isinstance(vals, list) or not vals:
            raise _fail(key, "a non-empty list of values", vals)
        if len({repr(v) for v in vals}) != len(vals):
            raise _fail(key, "distinct values", vals)
        grid[path] = vals
    return SweepSpec(grid, k, seed, keep)


class CompareSpec:
    """The parsed [compare] section."""

    def __init__(self, baseline: str, tolerance: float, confidence: float, observables: tuple[str, ...]):
        self.baseline, self.tolerance, self.confidence, self.observables = (
            baseline, tolerance, confidence, observables)


def _parse_compare(value, where: str) -> CompareSpec:
    from ..compare import OBSERVABLES

    if not isinstance(value, dict):
        raise _fail(where, "a table", value)
    allowed = ("baseline", "tolerance", "confidence", "observables")
    for k in value:
        if k not in allowed:
            raise StudyError(f"{where}.{k}: unknown key; {where} takes {', '.join(allowed)}")
    base = value.get("baseline", "meanfield")
    if not isinstance(base, str):
        raise _fail(f"{where}.baseline", "a level name", base)
    tol = value.get("tolerance", 0.1)
    if isinstance(tol, bool) or not isinstance(tol, int | float) or not (0 < tol < np.inf):
        raise _fail(f"{where}.tolerance", "a positive relative correction, e.g. 0.1", tol)
    conf = value.get("confidence", 0.95)
    if isinstance(conf, bool) or not isinstance(conf, int | float) or not (0 < conf < 1):
        raise _fail(f"{where}.confidence", "a number between 0 and 1, e.g. 0.95", conf)
    obs = value.get("observables", list(OBSERVABLES))
    known = (*OBSERVABLES, *EXTRA_OBSERVABLES)
    if not isinstance(obs, list) or not obs or not all(o in known for o in obs):
        raise _fail(f"{where}.observables", f"a list drawn from {', '.join(known)}", obs)
    return CompareSpec(base, float(tol), float(conf), tuple(obs))


def _parse_quick(value, where: str) -> dict:
    if not isinstance(value, dict):
        raise _fail(where, "a table of overrides with the study's own layout", value)
    if "quick" in value:
        raise StudyError(f"{where}.quick: a [quick] table cannot contain another")
    return value


class ConvergenceSpec:
    """The parsed [convergence] section: which grid dimension is a refinement, for which level."""

    def __init__(self, dim: str, level: str, tolerance: float, observables: tuple[str, ...]):
        self.dim, self.level, self.tolerance, self.observables = dim, level, tolerance, observables


def _parse_convergence(value, where: str) -> ConvergenceSpec:
    if not isinstance(value, dict):
        raise _fail(where, "a table", value)
    allowed = ("dimension", "level", "tolerance", "observables")
    for k in value:
        if k not in allowed:
            raise StudyError(f"{where}.{k}: unknown key; {where} takes {', '.join(allowed)}")
    for k in ("dimension", "level"):
        if not isinstance(value.get(k), str):
            raise _fail(f"{where}.{k}", "a name (required)", value.get(k))
    tol = value.get("tolerance", 0.05)
    if isinstance(tol, bool) or not isinstance(tol, int | float) or not tol > 0:
        raise _fail(f"{where}.tolerance", "a positive relative change, e.g. 0.05", tol)
    obs = value.get("observables", ["emission_rate", "g2_total"])
    if not isinstance(obs, list) or not obs or not all(isinstance(o, str) for o in obs):
        raise _fail(f"{where}.observables", "a list of observable names", obs)
    return ConvergenceSpec(value["dimension"], value["level"], float(tol), tuple(obs))


def check_convergence(study: Study, ds: xr.Dataset) -> dict[str, xr.Dataset]:
    """The [convergence] tables of a finished sweep (`beyondmf.convergence.assess_sweep`)."""
    from ..convergence import assess_sweep

    spec: ConvergenceSpec = study.extra["convergence"]
    if spec.dim not in ds.dims:
        raise StudyError(f"convergence.dimension: {spec.dim!r} is not a grid dimension of the sweep "
                         f"({', '.join(d for d in ds.dims)})")
    if spec.level not in [str(v) for v in ds["level"].values]:
        raise StudyError(f"convergence.level: {spec.level!r} is not among the study's levels")
    missing = [o for o in spec.observables if o not in ds]
    if missing:
        raise StudyError(f"convergence.observables: {', '.join(missing)} not in the results")
    return assess_sweep(ds, spec.dim, spec.level, spec.observables, spec.tolerance)


section("sweep")(_parse_sweep)
section("convergence")(_parse_convergence)
section("compare")(_parse_compare)
section("quick")(_parse_quick)

# Sections that make a study run as tasks; a grid point's study is validated without them.
_TASK_SECTIONS = ("sweep", "compare", "convergence", "quick")
# Observables computed from the time axis of a dynamics run (`_burst_observables`).
TIME_OBSERVABLES = ("emission_rate_peak", "peak_time", "emitted")


# Planning limit: a study of more tasks than this is refused unless confirmed (read_study(large=True),
# `beyondmf run --large`). Measured on a shared 2-core machine (3 December 2026, a 2000-point grid of
# 12 emitters): 5 ms per grid point to check when read, 12 ms to build its tasks; 10⁵ tasks take about half
# an hour to plan there, 10⁶ five hours, before the first one runs.
MAX_TASKS = 100_000
# Memory one task's results take while they are merged, besides their arrays (xarray objects, the task
# dictionary): measured about 20-40 KiB per task Dataset; an estimate.
_TASK_OVERHEAD = 48 * 1024

_PLANNING = contextvars.ContextVar("beyondmf_planning", default=(True, False))  # (enforce, large)


@contextlib.contextmanager
def _planning(enforce: bool, large: bool):
    token = _PLANNING.set((enforce, large))
    try:
        yield
    finally:
        _PLANNING.reset(token)


PLANNING_BAR_DELAY_S = 2.0


def _planning_bar(items, total: int, what: str):
    """``items`` with a progress bar on stderr that appears only after `PLANNING_BAR_DELAY_S` (a large grid
    takes minutes to check and build; a small one says nothing)."""
    from tqdm.auto import tqdm

    from .. import _config

    return tqdm(items, total=total, desc=what, unit="point", delay=PLANNING_BAR_DELAY_S, leave=False,
                disable=_config.QUIET)


def _largest(study: Study, key: str, base: int) -> int:
    """The largest value over the grid of the integer at study path ``key`` (``base`` where the grid does
    not vary it)."""
    spec: SweepSpec | None = study.extra.get("sweep")
    values = [v for v in (spec.grid.get(key, []) if spec is not None else [])
              if isinstance(v, int) and not isinstance(v, bool)]
    return max([base, *values]) if values else base


def plan_estimate(study: Study) -> dict[str, float]:
    """Estimates of a study before anything is built: ``tasks`` (an upper bound: grid points × levels ×
    realizations), the largest ``n`` of emitters and ``points`` (report times) over the grid, and
    ``bytes``: the memory the run's results take while they are merged (every task's results, the
    stacked arrays and the per-emitter variables; roughly, and rather more than less)."""
    from ..memory import results_bytes

    spec: SweepSpec | None = study.extra.get("sweep")
    if study.run.calculation == "correlations":  # curves over the delays and frequencies, per detector
        points = (_largest(study, "run.delay_points", study.run.delay_points)
                  + (0 if study.run.frequency_range is None else
                     _largest(study, "run.frequency_points", study.run.frequency_points)))
    else:
        points = 1 if study.run.calculation == "steady" else _largest(study, "run.points", study.run.points)
    params = study.geometry.params
    if "n" in params:
        n = _largest(study, "geometry.n", params["n"])
    else:  # a lattice: nx·ny(·nz), each at its largest; given points
        n = emitter_count(study.geometry)
        for axis in ("nx", "ny", "nz"):
            if axis in params:
                n = n // params[axis] * _largest(study, f"geometry.{axis}", params[axis])
    detectors = len(study.detectors or {"forward": None})
    stochastic = any(get_level(name).stochastic for name in study.levels)
    tasks = (spec.points() * spec.realizations if spec is not None else 1) * len(study.levels)
    # every task's results are read back whole, then the per-detector ones stacked (twice: with [compare]
    # the summary beside the per-realization values)
    stacked = 2 * 8 * points * (12 * detectors + 16) * (2 if stochastic else 1)
    whole = results_bytes(n, points, detectors, 1, stochastic, copies=1)
    per_task = whole + stacked + 24 * n + _TASK_OVERHEAD
    return {"tasks": tasks, "n": n, "points": points, "bytes": tasks * per_task}


def check_plan(study: Study, large: bool = False, enforce: bool = True) -> None:
    """Refuse a study too large to plan: beyond `MAX_TASKS` tasks without ``large`` (StudyError), or
    whose estimated results exceed this machine's free memory (MemoryError, with the estimate).
    ``enforce`` False (the full study of a --quick run, validated but not run) skips both."""
    from ..memory import require

    if not enforce:
        return
    est = plan_estimate(study)
    tasks = est["tasks"]
    if tasks > MAX_TASKS and not large:
        spec: SweepSpec | None = study.extra.get("sweep")
        parts = f"{spec.points():,} grid points × {len(study.levels)} levels × {spec.realizations} " \
                "realizations" if spec is not None else f"{len(study.levels)} levels"
        raise StudyError(
            f"sweep.grid: {parts} = up to {tasks:,} tasks, beyond the planning limit of {MAX_TASKS:,} "
            "(planning alone would take many minutes, every task is a file); use fewer grid values or "
            "realizations, or confirm with --large (read_study(..., large=True) in Python)")
    require(est["bytes"], f"the results of {tasks:,} task{'s' * (tasks != 1)} ({est['n']:,} emitters, "
            f"{est['points']:,} report times)",
            hint="use fewer grid values, realizations or report times ([run] points), keep = 'last_time', "
                 "or a larger machine")


def _grid_points(spec: SweepSpec):
    """(indices, {path: value}) of every grid point, in the order of `study_tasks`."""
    paths = list(spec.grid)
    for idx in itertools.product(*(range(len(spec.grid[p])) for p in paths)):
        yield idx, {p: spec.grid[p][i] for p, i in zip(paths, idx, strict=True)}


@study_check
def _check_sections(study: Study, raw: Mapping[str, Any]) -> None:
    """[sweep], [compare] and [convergence] against the rest of the study, before anything is computed."""
    spec: SweepSpec | None = study.extra.get("sweep")
    cmp: CompareSpec | None = study.extra.get("compare")
    conv: ConvergenceSpec | None = study.extra.get("convergence")
    levels = list(study.levels)
    steady = study.run.calculation == "steady"
    last_time = spec is not None and spec.keep == "last_time"
    if last_time and study.run.calculation != "evolve":
        raise StudyError("sweep.keep: 'last_time' keeps the late-time value of a dynamics run, and a "
                         f"{study.run.calculation} study has no time axis; remove it")
    if spec is not None and study.run.calculation == "correlations":
        from ..correlations import REFUSED

        for name in levels:  # refused before any task runs (each would be a failed task)
            if name in REFUSED:
                raise StudyError(f"levels.{name}: has no two-time correlations: {REFUSED[name]}; remove "
                                 f"[levels.{name}] from this calculation = 'correlations' study")
    if spec is not None or cmp is not None:
        # tasks draw their positions and sampling seeds from sweep.seed (realization_seeds); a seed of the
        # study itself would be silently ignored
        if "seed" in (raw.get("geometry") or {}):
            raise StudyError("geometry.seed: not used in a study with [sweep] or [compare]: realization k "
                             "draws its positions from SeedSequence([sweep.seed, k]); remove it, and set "
                             "seed in [sweep] to draw other clouds")
        if study.run.seed is not None:
            raise StudyError("run.seed: not used in a study with [sweep] or [compare]: realization k samples "
                             "with the seed SeedSequence([sweep.seed, k, 1]); remove it, and set seed in "
                             "[sweep] to draw other samples")
    if spec is not None:
        for path in spec.grid:
            key, parts = f"sweep.grid.{path}", path.split(".")
            if path in ("geometry.seed", "run.seed"):
                raise StudyError(f"{key}: seeds cannot be swept (realization k uses SeedSequence("
                                 "[sweep.seed, k])); remove it and raise sweep.realizations for more draws")
            if parts[0] == "levels" and len(parts) != 3:
                raise StudyError(f"{key}: a level option's path is levels.LEVEL.OPTION, e.g. "
                                 "\"levels.twa.samples\"")
            if parts[0] == "levels" and parts[1] not in study.levels:
                raise StudyError(f"{key}: level {parts[1]!r} is not in the study ({', '.join(levels)}); add "
                                 f"[levels.{parts[1]}] to run it, or correct the level's name")
        enforce, large = _PLANNING.get()
        check_plan(study, large=large, enforce=enforce)  # before the loop: it alone can take minutes
        for _, point in _planning_bar(_grid_points(spec), spec.points(), "checking grid points"):
            _point_study(raw, point)  # every grid point's study is valid (StudyError naming the point)
    if cmp is not None:
        if cmp.baseline not in levels:
            given = "" if "baseline" in (raw.get("compare") or {}) else " (the default)"
            raise StudyError(f"compare.baseline: {cmp.baseline!r}{given} is not among the study's levels "
                             f"({', '.join(levels)}); set baseline to one of them, or add "
                             f"[levels.{cmp.baseline}]")
        timed = [o for o in cmp.observables if o in TIME_OBSERVABLES]
        if timed and (steady or last_time):
            why = ("this study is steady (run.calculation = 'steady')" if steady else
                   "sweep.keep = 'last_time' keeps only the late-time value")
            raise StudyError(f"compare.observables: {', '.join(timed)} need the time axis of a dynamics run, "
                             f"but {why}; remove them" + ("" if steady else " or set keep = 'all'"))
    if conv is not None:
        dims = [name for name, _ in spec.dims()] if spec is not None else []
        if conv.dim not in dims:
            where = (f"name one of its dimensions: {', '.join(dims)}" if dims else
                     "the study has no [sweep.grid]; add the refined parameter there")
            raise StudyError(f"convergence.dimension: {conv.dim!r} is not a grid dimension of the sweep; "
                             f"{where}")
        if conv.level not in levels:
            raise StudyError(f"convergence.level: {conv.level!r} is not among the study's levels "
                             f"({', '.join(levels)}); name one of them")
        _check_refinement_order(conv.dim, dict(spec.dims())[conv.dim])
        if cmp is not None:
            known = list(cmp.observables)
            hint = " (with [compare], those of compare.observables)"
        else:
            known = [*SCALAR_VARIABLES, "excited_mean", *([] if steady or last_time else TIME_OBSERVABLES)]
            hint = ""
        missing = [o for o in conv.observables if o not in known]
        if missing:
            raise StudyError(f"convergence.observables: {', '.join(missing)} not in the results of this "
                             f"study; choose from {', '.join(known)}{hint}")


# options whose refinement has a known direction: more samples, a longer window …, a smaller step or
# tolerance (the criterion judges the last step of the list, so the list must run from coarse to fine)
_FINER_WHEN_LARGER = ("samples", "window", "window_points", "settle_time", "max_steps", "pair_radius")
_FINER_WHEN_SMALLER = ("dt", "rtol", "atol")


def _check_refinement_order(dim: str, values: Sequence) -> None:
    from ..convergence import strictly_monotonic

    if not all(isinstance(v, int | float) and not isinstance(v, bool) for v in values):
        return  # e.g. dt = ["auto", 0.01]: no order to check; assess skips such a parameter too
    got = ", ".join(f"{v:g}" for v in values)
    if not strictly_monotonic(values):
        raise StudyError(f"convergence.dimension: the values of {dim!r} ({got}) must run from coarse to "
                         "fine, strictly increasing or decreasing: the criterion judges the last step")
    # the dimension is the option's name, or the whole grid path with '_' when two paths end alike
    option = next((o for o in _FINER_WHEN_LARGER + _FINER_WHEN_SMALLER if dim == o or dim.endswith("_" + o)),
                  None)
    rising = values[1] > values[0]
    wrong = ("increasing" if option in _FINER_WHEN_LARGER and not rising else
             "decreasing" if option in _FINER_WHEN_SMALLER and rising else None)
    if wrong:
        raise StudyError(f"convergence.dimension: list the values of {dim!r} from coarse to fine, "
                         f"{wrong} (got {got}): the criterion judges the last step")


def _merge(base: dict, over: Mapping) -> dict:
    out = copy.deepcopy(base)
    for k, v in over.items():
        nested = isinstance(v, Mapping) and isinstance(out.get(k), dict)
        out[k] = _merge(out[k], v) if nested else copy.deepcopy(v)
    return out


def _with_quick(raw: dict) -> dict:
    """The study table with its [quick] overrides applied (and the [quick] table removed)."""
    over = raw["quick"]
    _parse_quick(over, "quick")
    if "levels" in over:
        levels = over["levels"]
        if not isinstance(levels, dict):
            raise _fail("quick.levels", "a table level → options overrides, e.g. { twa = { samples = 300 } }",
                        levels)
        have = raw.get("levels") if isinstance(raw.get("levels"), dict) else {}
        for name in levels:
            if name not in have:
                raise StudyError(f"quick.levels.{name}: not a level of the study ({', '.join(have)}); "
                                 "[quick] changes the options of the study's levels, it cannot add one: "
                                 f"add [levels.{name}] to the study or correct the name")
    merged = _merge(raw, over)
    merged.pop("quick")
    return merged


def _quick_error(err: StudyError, over: Mapping) -> StudyError:
    """An error of the study with its [quick] overrides, naming the [quick] key that caused it."""
    msg = str(err)
    key, sep, rest = msg.partition(": ")
    paths = _flatten(over, "")
    for path in (key, f"sweep.grid.{key}"):
        if sep and any(p == path or p.startswith(path + ".") for p in paths):
            return StudyError(f"quick.{path}: {rest}")
    return StudyError(f"quick: with the [quick] overrides applied, {msg}")


def read_study(path: str | Path, quick: bool = False, large: bool = False) -> Study:
    """Read and validate a study file; ``quick`` applies its [quick] overrides (an error if it has none).

    A study of more than `MAX_TASKS` tasks is refused unless ``large`` (``beyondmf run --large``), and
    one whose estimated results do not fit in this machine's free memory is refused in any case
    (`check_plan`), before its grid points are validated one by one.

    A [quick] table is validated whether or not ``quick`` is set (its errors name ``quick.KEY``), so that
    a broken CI-sized version of a study is found by the study's own runs.
    """
    p = Path(path)
    text = study_text(p)
    try:
        raw = tomllib.loads(text)
    except tomllib.TOMLDecodeError as err:
        raise StudyError(f"not valid TOML: {err}") from None
    return _study(raw, text, p, quick, large)


def study_from_table(table: Mapping[str, Any], quick: bool = False, large: bool = False) -> Study:
    """A study built in Python: ``table`` has the layout of a study file (docs/study-files.md), e.g.
    ``{"geometry": {...}, "drive": {...}, "levels": {...}, "sweep": {"grid": {"geometry.density": [...]}}}``.

    It is validated exactly as a file is, and its text (``Study.source``, kept in results.nc as the
    attribute ``study``) is the same table written as TOML, so ``beyondmf run`` can run it again.
    Run it with `run_sweep` (a sweep or comparison) or `beyondmf.study.run_study` (one model).
    """
    if not isinstance(table, Mapping):
        raise StudyError(f"expected a table (dict) in the layout of a study file, got {type(table).__name__}")
    text = to_toml(table)
    try:
        raw = tomllib.loads(text)
    except tomllib.TOMLDecodeError as err:  # a value to_toml writes and TOML cannot hold
        raise StudyError(f"the table cannot be written as a study file: {err}") from None
    return _study(raw, text, None, quick, large)


def _study(raw: dict, text: str, path: Path | None, quick: bool, large: bool = False) -> Study:
    with _planning(enforce=not quick, large=large):  # the study that runs is held to the planning limit
        study = _study_checked(raw, text, path, quick, large)
    return study


def _study_checked(raw: dict, text: str, path: Path | None, quick: bool, large: bool) -> Study:
    if quick and "quick" not in raw:
        # running the full study instead could take hours where minutes were asked for
        raise StudyError("--quick: this study has no [quick] table; run it without --quick, or add one "
                         "(an empty [quick] says the study is quick as it stands; docs/study-files.md)")
    levels = raw.get("levels")
    if isinstance(levels, list) and all(isinstance(v, str) for v in levels):
        raw["levels"] = {name: {} for name in levels}  # the table form, which [quick] can override
    study = parse_table(raw, text, path)
    if "quick" in raw:
        merged = _with_quick(raw)
        try:
            with _planning(enforce=quick, large=large):
                quick_study = parse_table(merged, text, path)
        except StudyError as err:
            raise _quick_error(err, raw["quick"]) from None
        if quick:
            study, raw = quick_study, merged
    study.extra["raw"] = raw
    study.extra["quick"] = quick
    return study


def _toml_string(text: str) -> str:
    """A TOML basic string: JSON's escapes are TOML's; DEL and characters outside the basic plane are
    written as TOML allows (JSON would give DEL raw and the others as surrogate pairs)."""
    return json.dumps(text, ensure_ascii=False).replace("\x7f", "\\u007f")


def _toml_key(key: str) -> str:
    return key if key and all(c.isalnum() or c in "_-" for c in key) and key.isascii() else _toml_string(key)


def _toml_value(value: Any, where: str) -> str:
    if isinstance(value, bool | np.bool_):
        return "true" if value else "false"
    if isinstance(value, int | np.integer):
        return str(int(value))
    if isinstance(value, float | np.floating):
        if not np.isfinite(value):
            raise StudyError(f"{where}: expected a finite number, got {value}")
        return repr(float(value))
    if isinstance(value, str):
        return _toml_string(value)
    if isinstance(value, list | tuple | np.ndarray):
        items = value.tolist() if isinstance(value, np.ndarray) else value
        return "[" + ", ".join(_toml_value(v, f"{where}[{i}]") for i, v in enumerate(items)) + "]"
    if isinstance(value, Mapping):
        return "{" + ", ".join(f"{_toml_key(str(k))} = {_toml_value(v, f'{where}.{k}')}"
                               for k, v in value.items()) + "}"
    raise StudyError(f"{where}: a study takes numbers, strings, true/false, lists and tables, "
                     f"got {type(value).__name__}")


def to_toml(table: Mapping[str, Any]) -> str:
    """``table`` as the text of a study file (TOML): plain values first, then one [section] per table."""
    lines: list[str] = []

    def emit(tab: Mapping[str, Any], prefix: str) -> None:
        plain = {k: v for k, v in tab.items() if not isinstance(v, Mapping)}
        nested = {k: v for k, v in tab.items() if isinstance(v, Mapping)}
        if prefix and (plain or not nested):
            lines.append(f"[{prefix}]")
        for k, v in plain.items():
            lines.append(f"{_toml_key(str(k))} = {_toml_value(v, f'{prefix}.{k}' if prefix else str(k))}")
        for k, v in nested.items():
            if lines and lines[-1] != "":
                lines.append("")
            emit(v, f"{prefix}.{_toml_key(str(k))}" if prefix else _toml_key(str(k)))

    emit(table, "")
    return "\n".join(lines) + "\n"


def is_sweep(study: Study) -> bool:
    """Whether the study declares a [sweep] or [compare] section (and so runs as tasks)."""
    return "sweep" in study.extra or "compare" in study.extra



# ---------------------------------------------------------------------------------------------------
# From a study to tasks


def _set(raw: dict, path: str, value) -> None:
    parts = path.split(".")
    node = raw
    for p in parts[:-1]:
        if isinstance(node.get(p), list) and p == "levels":  # levels = ["a", "b"] → table form
            node[p] = {name: {} for name in node[p]}
        node = node.setdefault(p, {})
        if not isinstance(node, dict):
            raise StudyError(f"sweep.grid.{path}: {p} is not a table in the study")
    node[parts[-1]] = value


def _point_study(raw: dict, point: Mapping[str, Any]) -> Study:
    """The study at one grid point: overrides applied, derived parameters resolved, then validated."""
    raw = copy.deepcopy(raw)
    for sec in _TASK_SECTIONS:
        raw.pop(sec, None)
    for path, v in point.items():
        if path not in _DERIVED:
            _set(raw, path, v)
    if "drive.saturation" in point:
        s = point["drive.saturation"]
        if isinstance(s, bool) or not isinstance(s, int | float) or s < 0:
            raise _fail("sweep.grid.drive.saturation", "non-negative saturation parameters", s)
        det = float(raw.get("drive", {}).get("detuning", 0.0))
        _set(raw, "drive.rabi", float(np.sqrt(s * (1 + 4 * det**2) / 2)))
    if "geometry.density" in point:
        geo = raw.get("geometry", {})
        kind, rho = geo.get("kind"), point["geometry.density"]
        if kind not in _SIZE_KEYS:
            raise StudyError(f"sweep.grid.geometry.density: needs a random cloud ({', '.join(_RANDOM)}), "
                             f"the study's geometry.kind is {kind!r}")
        if isinstance(rho, bool) or not isinstance(rho, int | float) or rho <= 0:
            raise _fail("sweep.grid.geometry.density", "positive densities (λ0⁻³)", rho)
        size = np.broadcast_to(np.asarray(geo.get(_SIZE_KEYS[kind], 1.0), dtype=float), (3,))
        geo[_SIZE_KEYS[kind]] = (size * cloud_scale(kind, int(geo.get("n", 1)), rho, size)).tolist()
    try:
        return parse_table(raw)
    except StudyError as err:
        where = ", ".join(f"{k} = {v!r}" for k, v in point.items())
        raise StudyError(f"{err} (at the grid point {where})") from None


def cloud_scale(kind: str, n: int, density: float, size) -> float:
    """Factor that brings a random cloud of ``n`` emitters and size ``size`` to ``density`` (n·λ0³).

    The density of a uniform ellipsoid is n/((4π/3)abc), of a box n/(abc); of a Gaussian cloud its peak
    n/((2π)^{3/2}σxσyσz) (geometry.density states the same convention).
    """
    shape = {"ellipsoid": 4 / 3 * np.pi, "box": 1.0, "gaussian": (2 * np.pi) ** 1.5}[kind]
    vol = float(np.prod(size)) * shape
    return float((n / (density * vol)) ** (1 / 3))
