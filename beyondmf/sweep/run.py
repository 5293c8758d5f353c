"""Running a sweep study, and levels compared on the same draws outside a study file."""

from __future__ import annotations

import dataclasses
import itertools
import json
import tomllib
from collections.abc import Callable, Mapping, Sequence
from pathlib import Path
from typing import Any

import numpy as np
import xarray as xr

from ..api import check_seed
from ..compare import OBSERVABLES, summarize
from ..levels.base import available_levels, is_count
from ..model import Model
from ..study.schema import Study, StudyError
from ..study.sections import (
    _RANDOM,
    DIAGNOSTIC,
    CompareSpec,
    SweepSpec,
    _grid_points,
    _planning_bar,
    _point_study,
    check_plan,
    grid_quantity,
)
from ..tasks import task_key
from .build import build_task, level_table, realization_seeds
from .merge import stack

__all__ = ["study_tasks", "run_sweep", "compare_levels"]

def study_tasks(study: Study) -> tuple[dict[tuple, dict], list[str], int, list[tuple[str, list]], dict]:
    """Every task of a sweep study: (index → task, level labels, K, grid dims, per-point parameters)."""
    spec: SweepSpec = study.extra.get("sweep") or SweepSpec({}, 1, 0)
    raw = study.extra.get("raw")
    if raw is None:
        raw = tomllib.loads(study.source)
    dims = spec.dims()
    own = _own_draws(study)
    index, labels, params = {}, None, {}
    for idx, point in _planning_bar(_grid_points(spec), spec.points(), "building tasks"):
        st = _point_study(raw, point)
        table = level_table(st.levels)
        labels = labels or list(table)
        model = {"dipole": list(st.emitters.dipole), "coupling": st.emitters.coupling, "rabi": st.drive.rabi,
                 "detuning": st.drive.detuning, "laser": list(st.drive.laser)}
        if st.drive.beam() is not None:
            model["beam"] = st.drive.beam()
        if st.drive.windows is not None:
            model["envelope"] = [list(w) for w in st.drive.windows]
        if st.run.calculation == "steady":
            run = {"calculation": "steady"}
        elif st.run.calculation == "correlations":
            freqs = st.run.frequencies()
            run = {"calculation": "correlations", "delays": st.run.delays(),
                   **({} if freqs is None else {"frequencies": freqs})}
        else:
            run = {"calculation": "evolve", "times": st.run.times(), "initial": st.run.initial}
        dets = st.detector_directions()
        params[idx] = {"rabi": st.drive.rabi, "N": int(st.geometry.params.get("n", 0))}
        for r in range(spec.realizations):
            geo = st.geometry
            if geo.kind in _RANDOM and not own:
                geo = type(geo)(geo.kind, {**geo.params, "seed": realization_seeds(spec.seed, r)[0]})
            try:
                pos = geo.positions()
            except ValueError as err:
                raise StudyError(f"geometry: {err} (grid point {point})") from None
            drawn = dict(model, detuning=st.drive.detunings(len(pos), geo.params.get("seed", 0) if own
                                                             else realization_seeds(spec.seed, r)[0]))
            for label, lv in table.items():
                task = build_task(pos, drawn, run, dets, lv, spec.seed, r, st.lenses)
                if own and "seed" in task and st.run.seed is not None:
                    task["seed"] = st.run.seed
                index[(*idx, label, r)] = task
    return index, labels, spec.realizations, dims, params


def _own_draws(study: Study) -> bool:
    """A study without [sweep] and [compare] (a plain study run as tasks, e.g. with --workers) is one
    realization of its own cloud and seed, as `run_study` would run it; a sweep draws realization k from
    sweep.seed (`realization_seeds`) and refuses geometry.seed and run.seed."""
    return "sweep" not in study.extra and "compare" not in study.extra


def _realization_seeds(study: Study, index: Mapping[tuple, Mapping], k: int) -> dict[str, xr.DataArray]:
    """The seeds each realization used, so that one run can be redone from results.nc alone: the seed of
    its position draw (the ``seed`` argument of the `beyondmf.geometry` function) and the sampling seed of
    its stochastic levels (``seed`` of `evolve`/`steady`); −1 where there is none."""
    spec: SweepSpec = study.extra.get("sweep") or SweepSpec({}, 1, 0)
    own = _own_draws(study)
    random = study.geometry.kind in _RANDOM
    position = [(int(study.geometry.params.get("seed", 0)) if own else realization_seeds(spec.seed, r)[0])
                if random else -1 for r in range(k)]
    sampling = [-1] * k
    for key_tuple, task in index.items():
        if "seed" in task:
            sampling[key_tuple[-1]] = int(task["seed"])
    fixed = "" if random else "; -1: none, the positions are a lattice or given points"
    return {
        "position_seed": xr.DataArray(np.array(position, dtype=np.int64), dims="realization", attrs={
            "units": "1", "long_name": "seed of the realization's position draw (the seed argument of the "
                                       "beyondmf.geometry function of the study's geometry.kind)" + fixed}),
        "sampling_seed": xr.DataArray(np.array(sampling, dtype=np.int64), dims="realization", attrs={
            "units": "1", "long_name": "sampling seed of the realization's stochastic levels (the seed "
                                       "argument of evolve/steady); -1: no stochastic level"}),
    }


def run_sweep(
    study: Study,
    out: str | Path,
    executor=None,
    progress: bool = True,
    on_done: Callable[[str, str], None] | None = None,
    on_ready: Callable[[int], None] | None = None,
    on_start: Callable[[int, int], None] | None = None,
) -> xr.Dataset:
    """Run (or resume) every task of ``study`` and write the merged DIR/results.nc.

    ``on_ready(number of tasks)`` is called once every task is built and validated, before any runs;
    ``on_start(to run, total)`` once the finished tasks in DIR/tasks are known.

    DIR is locked meanwhile (a second run on it is refused, `beyondmf.outdir`), and a results.nc there
    that beyondmf did not write is refused before anything is computed (`beyondmf.outdir.NotOurFiles`).
    Without [compare] the result has dimensions (grid..., level, realization, ...); with it, the
    `beyondmf.compare.summarize` reduction (level dimension, corrections, verdicts) plus the
    per-realization values as ``X_realizations``.
    """
    from ..outdir import claim, lock

    out = Path(out)
    check_plan(study, large=True)  # the memory of the results (the task count was checked when read)
    with lock(out):
        claim(out, ["results.nc"])
        return _run_sweep_in(study, out, executor, progress, on_done, on_ready, on_start)


def _run_sweep_in(study, out: Path, executor, progress, on_done, on_ready, on_start) -> xr.Dataset:
    from ..executors import execute
    from ..outdir import save_ours

    index, labels, k, dims, params = study_tasks(study)
    cmp: CompareSpec | None = study.extra.get("compare")
    observables = cmp.observables if cmp else OBSERVABLES
    if on_ready:
        on_ready(len({task_key(t) for t in index.values()}))
    results = execute(list(index.values()), out, executor, progress, on_done, on_start)
    spec = study.extra.get("sweep")
    last = bool(spec and spec.keep == "last_time")
    per = stack(index, results, labels, k, observables, dims, last_time=last,
                grid_values=list(spec.grid.values()) if spec else None)
    for (name, _), path in zip(dims, spec.grid if spec else [], strict=True):
        units, long_name, _label = grid_quantity(path)
        per[name].attrs.update(parameter=path, long_name=long_name, **({"units": units} if units else {}))
        if any(isinstance(v, list) for v in spec.grid[path]):  # index coordinates: the values they stand for
            per[name].attrs["values"] = json.dumps(spec.grid[path])
    if "N" in per.dims or any(p["N"] for p in params.values()):
        ns = np.array([params[i]["N"] for i in itertools.product(*(range(len(v)) for _, v in dims))])
        per["n_emitters"] = ([d for d, _ in dims], ns.reshape([len(v) for _, v in dims]),
                             {"units": "1", "long_name": "number of emitters N"})
    if cmp is not None:
        if cmp.baseline not in labels:
            raise StudyError(f"compare.baseline: {cmp.baseline!r} is not among the study's levels "
                             f"({', '.join(labels)})")
        ds = summarize(per, cmp.baseline, cmp.tolerance, cmp.confidence, observables)
        for name in observables:
            ds[f"{name}_realizations"] = per[name]
        for name in ("excited_mean", "n_emitters"):
            if name in per:
                ds[name] = per[name].mean("realization") if "realization" in per[name].dims else per[name]
        for name, var in per.data_vars.items():  # the levels' diagnostics, per realization
            if var.attrs.get("role") == DIAGNOSTIC:
                ds[name] = var
    else:
        ds = per
    ds.update(_realization_seeds(study, index, k))
    ds.attrs.update(
        study=study.source,
        title=study.title,
        quick=int(bool(study.extra.get("quick"))),
        tasks=len({task_key(t) for t in index.values()}),
        tasks_failed=len({task_key(t) for t in index.values()
                          if results[task_key(t)].attrs.get("task_status") == "failed"}),
        levels_run=list(labels),
        available_levels=list(available_levels()),
        failures=per.attrs.get("failures", []),
        warnings=per.attrs.get("warnings", []),
    )
    save_ours(ds, out / "results.nc")
    return ds


def _plain_model_args(model) -> dict:
    """The Model arguments as the plain values a task file holds (a beam as its table, arrays as lists)."""
    plain = dict(model or {})
    beam = plain.get("beam")
    if beam is not None and hasattr(beam, "describe"):
        plain["beam"] = beam.describe()
    if np.ndim(plain.get("detuning", 0.0)) > 0:
        plain["detuning"] = [float(d) for d in np.asarray(plain["detuning"], dtype=float).reshape(-1)]
    return plain


def compare_levels(
    positions: np.ndarray | Sequence[np.ndarray] | Callable[[int], np.ndarray],
    levels: Sequence[str] | Mapping[str, Mapping[str, Any]],
    realizations: int = 1,
    seed: int = 0,
    baseline: str = "meanfield",
    tolerance: float = 0.1,
    confidence: float = 0.95,
    model: Mapping[str, Any] | None = None,
    times=None,
    initial="ground",
    detectors: Mapping[str, Any] | None = None,
    observables: Sequence[str] = OBSERVABLES,
    out=None,
    executor=None,
    progress: bool = False,
) -> xr.Dataset:
    """Run one geometry at several levels on the same position draws and seeds, and compare them.

    Parameters
    ----------
    positions : an (N, 3) array (the same emitters in every realization: realizations then differ
        only in the seeds of stochastic levels), a list of K arrays (one per realization), or a
        function ``seed -> (N, 3) array`` called with the realization's position seed.
    levels : level names, or label → {"level": name, **options} (e.g. one level at two tolerances).
    realizations : K, the number of position draws.
    seed : base seed; realization k draws positions from SeedSequence([seed, k]) and sampling levels
        get SeedSequence([seed, k, 1]), the same for every level.
    baseline, tolerance, confidence, observables : see `summarize`.
    model : the other arguments of `beyondmf.Model` (coupling, dipole, rabi, detuning, laser, envelope).
    times : None for the steady state, else the times of `beyondmf.evolve` from ``initial``.
    detectors : name → direction (default: "forward", along the laser).
    out : a directory; each task's file is kept in ``out/tasks/`` (resumable: a call with the same
        tasks reuses them); None keeps everything in memory.
    executor : an executor of `beyondmf.executors` (default: in this process).

    Returns
    -------
    `summarize`'s Dataset with a ``level`` dimension; the per-realization values are kept as
    ``X_realizations`` (level, realization, ...).
    """
    from ..executors import execute

    table = level_table(levels)
    if not is_count(realizations, 1):
        raise ValueError(f"realizations must be a positive integer, got {realizations!r}")
    k = int(realizations)
    check_seed(seed)
    if isinstance(observables, str) or not all(isinstance(o, str) for o in observables):
        raise ValueError(f"observables must be a list of names, e.g. ['emission_rate'], got {observables!r}")
    model_args = {f.name for f in dataclasses.fields(Model) if f.init} - {"positions"}
    unknown = sorted(set(model or {}) - model_args)
    if unknown:
        raise ValueError(f"model= got {', '.join(map(repr, unknown))}; it takes the arguments of "
                         f"beyondmf.Model other than the positions: {', '.join(sorted(model_args))}")
    if out is not None and Path(out).exists() and not Path(out).is_dir():
        raise ValueError(f"out={str(out)!r} is a file; give a directory (made if missing) for the task files")
    draws = []
    for r in range(k):
        pos_seed, _ = realization_seeds(seed, r)
        if callable(positions):
            draws.append(np.asarray(positions(pos_seed), dtype=float))
        elif isinstance(positions, np.ndarray) and positions.ndim == 2:
            draws.append(positions)
        else:
            if len(positions) != k:
                raise ValueError(f"got {len(positions)} position arrays for {k} realizations")
            draws.append(np.asarray(positions[r], dtype=float))
    sizes = sorted({np.asarray(d).size // 3 for d in draws})
    if len(sizes) > 1:
        listed = ", ".join(map(str, sizes))
        raise ValueError(f"the realizations have different numbers of emitters ({listed}); "
                         "a comparison averages over draws of one cloud, so give every draw the same N")
    run = {"calculation": "steady"} if times is None else {
        "calculation": "evolve", "times": np.asarray(times, dtype=float).tolist(), "initial": initial}
    plain = _plain_model_args(model)
    index = {}
    for label, spec in table.items():
        for r in range(k):
            index[(label, r)] = build_task(draws[r], plain, run, detectors, spec, seed, r)
    results = execute(list(index.values()), out, executor, progress)
    per = stack(index, results, list(table), k, observables)
    summary = summarize(per, baseline, tolerance, confidence, observables)
    for name in observables:
        summary[f"{name}_realizations"] = per[name]
    summary.attrs["warnings"] = per.attrs.get("warnings", [])
    summary.attrs["seed"] = int(seed)
    shaped = [np.asarray(d, dtype=float).reshape(-1, 3) for d in draws]
    # the emitters of every realization (one N, checked above), so the file alone suffices
    summary["positions"] = xr.DataArray(
        np.stack(shaped), dims=("realization", "emitter", "axis"),
        coords={"realization": np.arange(k), "axis": ["x", "y", "z"]},
        attrs={"units": "λ0", "long_name": "emitter positions of each realization"})
    return summary
