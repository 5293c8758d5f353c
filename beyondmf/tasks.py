"""One task: one geometry draw, one level, one realization, fully described by a plain dictionary.

A task is self-contained (parameters in, file out), so any executor can run it in any process and get
the same numbers. Its identity is a stable hash of its canonical JSON form, which names its file; a task
file records that key, the task itself and a checksum of its data, so a partial, corrupted or foreign
file is recognised and recomputed.

Task dictionary
---------------
positions : (N, 3) list of emitter positions (λ0) — drawn by whoever builds the task, so that every
    level of one realization sees the same draw.
model : the other arguments of `beyondmf.Model` (coupling, dipole, rabi, detuning, laser, envelope).
run : {"calculation": "steady"}, {"calculation": "evolve", "times": [...] or {"start", "stop", "num"},
    "initial": "ground" | "excited" | [sx, sy, sz]}, or {"calculation": "correlations", "delays": [...],
    "frequencies": [...] (optional)} (two-time functions of the steady state, `beyondmf.correlations`).
detectors : name → direction.
level, options : the level's name and its options.
seed : the sampling seed of a stochastic level (absent for deterministic levels, so that realizations
    with the same positions are one task).

The key hashes the task with model arguments and options equal to their defaults left out and the
defaults listed once (`canonical`), so spelling a default out or leaving it implicit is one task, and a
default changed between versions is another. Presentation options (`PRESENTATION_OPTIONS`: the progress
bar) are left out of it altogether.
"""

from __future__ import annotations

import hashlib
import json
import math
import time
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import numpy as np
import xarray as xr

__all__ = [
    "canonical",
    "task_key",
    "build_model",
    "compute",
    "run_task",
    "run_group",
    "drive_groups",
    "compute_group",
    "read_task",
    "task_path",
    "SCALAR_VARIABLES",
    "CORRELATION_VARIABLES",
    "TaskFileError",
    "failure_kind",
    "failure_of",
    "INPUT",
    "MACHINE",
]

FORMAT = 2  # 2: the checksum covers coordinates and attributes too
# The per-task results that survive merging across geometries of different N (per-emitter arrays do not).
SCALAR_VARIABLES = (
    "emission_rate",
    "intensity",
    "intensity_coherent",
    "intensity_incoherent",
    "g2",
    "g2_total",
)
# Those of a calculation = "correlations" task (`beyondmf.correlations`), kept whole (over delay, frequency
# and detector) since they do not depend on N.
CORRELATION_VARIABLES = (
    "emission_rate",
    "intensity",
    "intensity_coherent",
    "elastic_fraction",
    "g1",
    "g2",
    "g2_total",
    "intensity_delayed",
    "spectrum",
)


class TaskFileError(RuntimeError):
    """A task file is missing, unreadable, incomplete, or belongs to another task."""


def _plain(value: Any) -> Any:
    """JSON-ready copy: numpy scalars and arrays to Python, tuples to lists, integral floats to ints.

    Integral floats become ints so that ``rabi = 1`` and ``rabi = 1.0`` name the same task.
    """
    if isinstance(value, Mapping):
        return {str(k): _plain(v) for k, v in value.items()}
    if isinstance(value, list | tuple | np.ndarray):
        return [_plain(v) for v in (value.tolist() if isinstance(value, np.ndarray) else value)]
    if isinstance(value, bool | np.bool_):
        return bool(value)
    if isinstance(value, np.integer):
        return int(value)
    if isinstance(value, float | np.floating):
        v = float(value)
        if not math.isfinite(v):
            raise ValueError(f"task parameters must be finite numbers, got {v}")
        return int(v) if v.is_integer() and abs(v) < 2**53 else v
    if isinstance(value, complex | np.complexfloating):
        if value.imag == 0:  # a real number written as complex (a study file's dipole) names the same task
            return _plain(value.real)
        return {"re": _plain(value.real), "im": _plain(value.imag)}
    if value is None or isinstance(value, str | int):
        return value
    raise TypeError(f"a task parameter must be a number, string, list or table, got {type(value).__name__}")


def model_defaults() -> dict[str, Any]:
    """The default of every optional argument of `beyondmf.Model`."""
    import dataclasses

    from .model import Model

    return {f.name: f.default for f in dataclasses.fields(Model)
            if f.init and f.default is not dataclasses.MISSING}


def _without_defaults(task: Mapping[str, Any]) -> dict[str, Any]:
    """``task`` with the model arguments and level options that equal their defaults left out, and
    detectors left at None written out as the default detector, so that a value written out and the same
    value left implicit name the same task (the study reader writes every model argument and the detectors,
    `compare_levels` only what it is given). The defaults themselves are added under ``defaults``: a
    default changed in another version of the package makes other tasks."""
    from .levels.base import get_level

    out = dict(task)
    defaults = model_defaults()
    model = dict(out.get("model") or {})
    if out.get("model") is not None:
        out["model"] = {k: v for k, v in model.items()
                        if not (k in defaults and _plain(v) == _plain(defaults[k]))}
    if "detectors" in out and out["detectors"] is None:  # the default: one detector along the laser
        laser = np.asarray(model.get("laser", defaults["laser"]), dtype=float)
        out["detectors"] = {"forward": laser / np.linalg.norm(laser)}
    out["defaults"] = {"model": defaults}
    if out.get("options") is not None and "level" in out:
        level_defaults = get_level(out["level"]).options
        out["options"] = {k: v for k, v in out["options"].items()
                          if k not in PRESENTATION_OPTIONS
                          and not (k in level_defaults and _plain(v) == _plain(level_defaults[k]))}
        out["defaults"]["options"] = {k: v for k, v in level_defaults.items()
                                      if k not in PRESENTATION_OPTIONS}
    return out


# Options that change how a run is shown, never its numbers: not part of a task's identity, so switching a
# progress bar on or off never recomputes a sweep.
PRESENTATION_OPTIONS = ("progress",)


def canonical(task: Mapping[str, Any]) -> str:
    """The task's canonical JSON text: sorted keys, no spaces, plain numbers, defaults left out (and
    listed once under ``defaults``)."""
    return json.dumps(_plain(_without_defaults(task)), sort_keys=True, separators=(",", ":"))


def task_key(task: Mapping[str, Any]) -> str:
    """Stable identity of a task: the first 20 hex digits of SHA-256 of its canonical JSON."""
    return hashlib.sha256(canonical(task).encode()).hexdigest()[:20]


def task_path(directory: str | Path, key: str) -> Path:
    return Path(directory) / "tasks" / f"{key}.nc"


def _complex(v):
    return complex(v["re"], v["im"]) if isinstance(v, Mapping) else v


def build_model(task: Mapping[str, Any]):
    """The `beyondmf.Model` of a task."""
    from .model import Model

    params = dict(task.get("model") or {})
    if "rabi" in params:
        params["rabi"] = _complex(params["rabi"])
    if "dipole" in params:
        params["dipole"] = [_complex(c) for c in params["dipole"]]
    if "envelope" in params and params["envelope"] is not None:
        params["envelope"] = [tuple(w) for w in params["envelope"]]
    return Model(np.asarray(task["positions"], dtype=float).reshape(-1, 3), **params)


def _grid_of(t) -> np.ndarray:
    """Report times, delays or frequencies of a task: a list, or {"start", "stop", "num"}."""
    if isinstance(t, Mapping):
        return np.linspace(float(t["start"]), float(t["stop"]), int(t["num"]))
    return np.asarray(t, dtype=float)


def times_of(run: Mapping[str, Any]) -> np.ndarray:
    if run.get("times") is None:
        raise ValueError("run.times is required for calculation = 'evolve'")
    return _grid_of(run["times"])


def compute(task: Mapping[str, Any]) -> xr.Dataset:
    """Run one task in this process and return its full results Dataset (no file written)."""
    from .api import evolve, steady
    from .memory import release_compiled_code

    release_compiled_code()  # a long run of many system sizes must not exhaust the kernel's mappings
    model = build_model(task)
    run = dict(task.get("run") or {"calculation": "steady"})
    level = task["level"]
    seed = task.get("seed")
    opts = dict(task.get("options") or {})
    dets = task.get("detectors")
    lenses = task.get("lenses")
    if run.get("calculation") == "correlations":
        from .correlations import correlations

        # mean field has only the elastic line (as run_study runs it): no delays, no frequencies
        elastic = level == "meanfield"
        freqs = run.get("frequencies")
        ds = correlations(model, level, None if elastic else _grid_of(run["delays"]), detectors=dets,
                          frequencies=None if elastic or freqs is None else _grid_of(freqs), **opts)
    elif run.get("calculation", "steady") == "evolve":
        ds = evolve(model, level, times_of(run), initial=run.get("initial", "ground"), detectors=dets,
                    seed=seed, lenses=lenses, **opts)
    elif run.get("calculation", "steady") == "steady":
        ds = steady(model, level, detectors=dets, seed=seed, lenses=lenses, **opts)
    else:
        raise ValueError("run.calculation must be 'steady', 'evolve' or 'correlations', got "
                         f"{run.get('calculation')!r}")
    return ds


def _checksum(ds: xr.Dataset) -> str:
    """SHA-256 over the names, bytes and attributes of every variable and coordinate, and the dataset's
    attributes (except the task and task_* stamp), in name order; attributes in the form `save` writes
    them, so that the sum is the same before the file is written and after it is read."""
    from .results import _encode_attrs

    def attrs(a: Mapping[str, Any]) -> bytes:
        enc = _encode_attrs({k: v for k, v in a.items() if k != "task" and not k.startswith("task_")})
        items = sorted((k, v.item() if isinstance(v, np.generic) else v) for k, v in enc.items())
        return json.dumps(items).encode()

    h = hashlib.sha256()
    for name in sorted(map(str, ds.variables)):
        h.update(name.encode())
        values = ds[name].values
        if values.dtype.kind in "OUS":  # names (detectors, axes): their text, not object pointers
            h.update(json.dumps(values.astype(str).tolist()).encode())
        else:
            h.update(np.ascontiguousarray(values).tobytes())
        h.update(attrs(ds[name].attrs))
    h.update(attrs(ds.attrs))
    return h.hexdigest()


def _data_checksum(ds: xr.Dataset) -> str:
    """The checksum of task file format 1: SHA-256 over the names and bytes of the data variables."""
    h = hashlib.sha256()
    for name in sorted(ds.data_vars):
        h.update(name.encode())
        h.update(np.ascontiguousarray(ds[name].values).tobytes())
    return h.hexdigest()


def _stamp(ds: xr.Dataset, task: Mapping[str, Any], status: str, seconds: float) -> xr.Dataset:
    ds = ds.copy()
    ds.attrs.update(
        task_key=task_key(task),
        task=canonical(task),
        task_format=FORMAT,
        task_status=status,
        task_seconds=float(seconds),
        task_checksum=_checksum(ds),
    )
    return ds


# Why a task failed, recorded in its file as ``task_failure``:
INPUT = "input"  # a property of the task (a level refusing the model, a failed solve): kept, a rerun
# gives the same
MACHINE = "machine"  # the machine's state (free memory, a lost worker): not kept, the next run retries it


def failure_kind(err: BaseException) -> str | None:
    """``INPUT`` or ``MACHINE`` for an exception a task may end with, None for any other (a bug: it
    propagates). A memory refusal or an allocation that failed depends on what else the machine runs;
    ValueError (a level refusing the model or an option) and SolveError (the solver gave up) do not."""
    from .integrate import SolveError
    from .memory import as_memory_error

    if as_memory_error(err) is not None:
        return MACHINE
    if isinstance(err, ValueError | SolveError):
        return INPUT
    return None


def failure_of(ds: xr.Dataset) -> str | None:
    """The ``task_failure`` of a failed task's results (files of earlier versions: a MemoryError is the
    machine's), None for a finished task."""
    if ds.attrs.get("task_status", "done") != "failed":
        return None
    kind = ds.attrs.get("task_failure")
    if kind in (INPUT, MACHINE):
        return kind
    return MACHINE if str(ds.attrs.get("error", "")).startswith("MemoryError") else INPUT


def failed_result(task: Mapping[str, Any], error: str, kind: str, seconds: float = 0.0) -> xr.Dataset:
    """The results Dataset of a task that failed with message ``error`` for reason ``kind``."""
    ds = xr.Dataset(attrs={"level": task["level"], "error": error})
    ds = _stamp(ds, task, "failed", seconds)
    ds.attrs["task_failure"] = kind
    return ds


def run_task(task: Mapping[str, Any], directory: str | Path | None = None) -> tuple[str, str, float]:
    """Run one task and write DIR/tasks/<key>.nc atomically (``directory`` None: nothing is written).

    A level that refuses the model, or a solve that fails, is a result too (``task_status = "failed"``,
    ``task_failure = "input"``, the message in ``error``): it is deterministic, so running again would
    fail the same way, and the file is reused. A refusal for lack of free memory depends on the machine's
    state (``task_failure = "machine"``): its file says so, and the next run computes the task again.
    Returns (key, status, seconds).
    """
    from .memory import as_memory_error
    from .results import save

    start = time.perf_counter()
    kind = None
    try:
        ds, status = compute(task), "done"
    except Exception as err:
        kind = failure_kind(err)
        if kind is None:
            raise
        err = as_memory_error(err) or err  # an XLA allocation failure reads as the MemoryError it is
        ds = xr.Dataset(attrs={"level": task["level"], "error": f"{type(err).__name__}: {err}"})
        status = "failed"
    seconds = time.perf_counter() - start
    key = task_key(task)
    if directory is not None:
        stamped = _stamp(ds, task, status, seconds)
        if kind is not None:
            stamped.attrs["task_failure"] = kind
        save(stamped, task_path(directory, key))
    return key, status, seconds


# At most this many tasks run as one batched solve (memory is split further by the level, levels._batch).
GROUP_LIMIT = 64


def drive_groups(tasks: list[Mapping[str, Any]]) -> list[list[Mapping[str, Any]]]:
    """``tasks`` in groups that differ only in their drive (model ``rabi`` and ``detuning``) at a level
    that integrates drives as one solve (its own ``steady_batch``: `beyondmf.drive_scan`); every other
    task alone. Order is kept within a group; groups hold at most `GROUP_LIMIT` tasks."""
    from .levels.base import Level, get_level

    groups: dict[str, list] = {}
    out: list[list] = []
    for task in tasks:
        lvl = type(get_level(task["level"]))
        if (lvl.steady_batch is Level.steady_batch or task.get("options", {}).get("pair_radius") is not None
                or (task.get("run") or {}).get("calculation") == "correlations"):
            out.append([task])
            continue
        rest = dict(task, model={k: v for k, v in (task.get("model") or {}).items()
                                 if k not in ("rabi", "detuning")})
        key = canonical(rest)
        if key not in groups or len(groups[key]) >= GROUP_LIMIT:
            groups[key] = []
            out.append(groups[key])
        groups[key].append(task)
    return out


def compute_group(tasks: list[Mapping[str, Any]]) -> list[xr.Dataset]:
    """Run tasks that differ only in their drive as one batched solve (`beyondmf.api.solve_drives`) and
    return each one's results, as `compute` would up to the solver's tolerance."""
    if len(tasks) == 1:
        return [compute(tasks[0])]
    from .api import solve_drives
    from .memory import release_compiled_code

    release_compiled_code()
    first = tasks[0]
    run = dict(first.get("run") or {"calculation": "steady"})
    kind = run.get("calculation", "steady")
    if kind not in ("steady", "evolve"):
        raise ValueError(f"run.calculation must be 'steady' or 'evolve', got {kind!r}")
    base = build_model(first)  # the group differs only in rabi and detuning (`drive_groups`)
    models = [base] + [base.with_drive(rabi=_drive_of(t, "rabi"), detuning=_drive_of(t, "detuning"))
                       for t in tasks[1:]]
    return solve_drives(models, first["level"],
                        times=times_of(run) if kind == "evolve" else None,
                        initial=run.get("initial", "ground"), detectors=first.get("detectors"),
                        seed=first.get("seed"), lenses=first.get("lenses"),
                        **dict(first.get("options") or {}))


def _drive_of(task: Mapping[str, Any], name: str):
    """A task's ``rabi`` or ``detuning`` as `build_model` reads it (the Model default where absent)."""
    params = task.get("model") or {}
    if name not in params:
        return model_defaults()[name]
    return _complex(params[name]) if name == "rabi" else params[name]


def run_group(tasks: list[Mapping[str, Any]], directory: str | Path | None = None,
              only: frozenset[str] | None = None) -> list[tuple[str, str, float]]:
    """`run_task` for a group of `drive_groups`: one batched solve, one file per task (each stamped with
    its share of the time). If the batch fails for a reason a task may end with, every task runs alone, so
    that each records its own outcome. ``only`` (task keys): the whole group is solved, so that every
    member gets the numbers the same group always gives, but only these members are written and
    reported (a run resumed after an interruption, or with damaged files, reproduces the uninterrupted
    run bit for bit)."""
    if only is not None:
        keep = [t for t in tasks if task_key(t) in only]
        if len(keep) == len(tasks):
            only = None
        elif len(tasks) == 1 or not keep:
            return [run_task(t, directory) for t in keep]
    if len(tasks) == 1:
        return [run_task(tasks[0], directory)]
    from .results import save

    start = time.perf_counter()
    try:
        results = compute_group(tasks)
    except Exception as err:
        if failure_kind(err) is None:
            raise
        return [run_task(t, directory) for t in tasks if only is None or task_key(t) in only]
    seconds = (time.perf_counter() - start) / len(tasks)
    out = []
    for task, ds in zip(tasks, results, strict=True):
        key = task_key(task)
        if only is not None and key not in only:
            continue
        if directory is not None:
            save(_stamp(ds, task, "done", seconds), task_path(directory, key))
        out.append((key, "done", seconds))
    return out


def read_task(path: str | Path, task: Mapping[str, Any]) -> xr.Dataset:
    """Load a task file and check it is complete and belongs to ``task``; raise TaskFileError if not."""
    from .results import load

    path = Path(path)
    try:
        ds = load(path)
    except FileNotFoundError as err:
        raise TaskFileError(f"{path}: missing") from err
    except Exception as err:  # any reader error means the file is unusable: recompute it
        raise TaskFileError(f"{path}: unreadable ({type(err).__name__}: {err})") from err
    attrs = ds.attrs
    if attrs.get("task_key") != task_key(task) or attrs.get("task") != canonical(task):
        raise TaskFileError(f"{path}: written for another task")
    fmt = attrs.get("task_format")
    if fmt not in (1, FORMAT):
        raise TaskFileError(f"{path}: written by another version of beyondmf (task file format {fmt}, "
                            f"this one reads 1 and {FORMAT})")
    if attrs.get("task_status") not in ("done", "failed"):
        raise TaskFileError(f"{path}: incomplete (status {attrs.get('task_status')!r})")
    # format 1 (before 2026-12-02) summed the data variables only: still verifiable, so still used
    if attrs.get("task_checksum") != (_checksum(ds) if fmt == FORMAT else _data_checksum(ds)):
        raise TaskFileError(f"{path}: data checksum mismatch")
    return ds
