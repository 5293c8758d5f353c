"""A study of one model run at every level it lists: one Dataset with a ``level`` dimension."""

from __future__ import annotations

import time
from collections.abc import Callable

import numpy as np
import xarray as xr

from ..api import draw_seed, evolve, steady
from ..integrate import SolveError
from ..levels.base import get_level
from ..memory import results_bytes
from .schema import Study, emitter_count

__all__ = ["run_study", "check_run_size"]


def _fill_missing(datasets: list[xr.Dataset]) -> list[xr.Dataset]:
    """Give every Dataset the variables of all of them (NaN where a level has none, e.g. stderr)."""
    protos: dict[str, xr.DataArray] = {}
    for ds in datasets:
        for name, var in ds.data_vars.items():
            protos.setdefault(name, var)
    out = []
    for ds in datasets:
        missing = {}
        for name, proto in protos.items():
            if name not in ds:
                dtype = np.result_type(proto.dtype, np.float64)
                shape = tuple(ds.sizes.get(d, proto.sizes[d]) for d in proto.dims)
                missing[name] = (proto.dims, np.full(shape, np.nan, dtype=dtype), proto.attrs)
        out.append(ds.assign(missing) if missing else ds)
    return out


def check_run_size(study: Study) -> None:
    """Refuse (MemoryError, with the estimate) a study of one model whose results would not fit in this
    machine's free memory, before any array of report times is made (``[run] points = 10⁹`` grew to
    17 GB before it was killed)."""
    from ..memory import require

    points = 1 if study.run.calculation == "steady" else study.run.points
    n = emitter_count(study.geometry)
    stochastic = any(get_level(name).stochastic for name in study.levels)
    need = results_bytes(n, points, len(study.detectors or {"forward": None}), len(study.levels), stochastic)
    what = f"the results of {len(study.levels)} level(s) for {n:,} emitters at {points:,} report times"
    require(need, what, hint="use fewer report times ([run] points) or emitters, or a larger machine")


# What a level's run may raise when it cannot do this model (refusal, failed solve, too big): with
# ``keep_going`` these are recorded and the other levels still run; anything else is a bug and propagates.
_LEVEL_FAILURES = (ValueError, SolveError, MemoryError)


def run_study(
    study: Study,
    on_level: Callable[[str, str, float | None], None] | None = None,
    keep_going: bool = False,
) -> xr.Dataset:
    """Run ``study`` at each of its levels; one Dataset with a ``level`` dimension.

    ``on_level(name, "start" | "done" | "failed", seconds)`` is called around each level (for progress
    lines). The top-level attributes are those every level has with the same value (the model parameters,
    the calculation); all of each level's attributes (options, solver statistics, sample counts) are kept
    per level in the attribute ``levels`` (level name → its attributes); the study file's text is in
    ``study``. A study without ``run.seed`` draws one seed for all its sampled levels, recorded as
    ``run_seed``; ``seed = run_seed`` in [run] reproduces the run.

    A level that cannot do the model (it refuses it, its solve fails, it does not fit in memory) raises,
    and nothing is returned. With ``keep_going`` the other levels still run instead: the result has the
    levels that finished, in the study's order, and ``attrs["failures"]`` holds one line
    ``"<level>: <message>"`` per level that did not; if no level finished, the first failure is raised.
    """
    check_run_size(study)
    model = study.build_model()
    detectors = study.detector_directions()
    results, names, failures, first_error = [], [], [], None
    seed = study.run.seed
    if seed is None and any(get_level(name).stochastic for name in study.levels):
        # one drawn seed for every sampled level, recorded as run_seed: [run] seed = run_seed reruns it
        seed = draw_seed()
    for name, options in study.levels.items():
        if on_level:
            on_level(name, "start", None)
        t0 = time.perf_counter()
        try:
            if study.run.calculation == "correlations":
                from ..correlations import correlations

                # meanfield has only the elastic line: it runs without delays and frequencies
                elastic = name == "meanfield"
                ds = correlations(model, name, None if elastic else study.run.delays(), detectors=detectors,
                                  frequencies=None if elastic else study.run.frequencies(), **options)
            elif study.run.calculation == "steady":
                ds = steady(model, name, detectors=detectors, seed=seed, lenses=study.lenses, **options)
            else:
                ds = evolve(model, name, study.run.times(), initial=study.run.initial, detectors=detectors,
                            seed=seed, lenses=study.lenses, **options)
        except Exception as err:
            from ..memory import as_memory_error

            oom = as_memory_error(err)  # an XLA allocation failure is a MemoryError like any other
            if oom is None and not isinstance(err, _LEVEL_FAILURES):
                raise
            if oom is not None and oom is not err:
                err = oom
                if not keep_going:
                    raise oom from None
            if not keep_going:
                raise
            first_error = first_error or err
            failures.append(f"{name}: {' '.join(str(err).split())}")
            if on_level:
                on_level(name, "failed", time.perf_counter() - t0)
            continue
        ds.attrs["wall_time_s"] = time.perf_counter() - t0
        if on_level:
            on_level(name, "done", ds.attrs["wall_time_s"])
        results.append(ds)
        names.append(name)
    if not results:
        raise first_error
    per_level = {name: dict(ds.attrs) for name, ds in zip(names, results, strict=True)}
    combined = xr.concat(
        _fill_missing(results),
        dim=xr.DataArray(names, dims="level", name="level"),
        data_vars="all",
        coords="minimal",
        compat="override",
        combine_attrs="drop_conflicts",
    )
    # drop_conflicts keeps an attribute that only some levels have (twa's samples, dt): it is not shared
    combined.attrs = {k: v for k, v in combined.attrs.items()
                      if k != "level" and all(k in ds.attrs for ds in results)}
    combined.attrs.update(
        levels=per_level,
        study=study.source,
        title=study.title,
        geometry=study.geometry.kind,
        geometry_parameters=study.geometry.params,
        failures=failures,
        run_seed=-1 if seed is None else seed,
        quick=int(bool(study.extra.get("quick"))),  # 1: run with the study's [quick] overrides (--quick)
    )
    return combined
