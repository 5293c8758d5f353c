"""Task files of a sweep stacked into one Dataset along the grid, level and realization."""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np
import xarray as xr

from ..observables import stderr_attrs
from ..study.sections import DIAGNOSTIC, format_value
from ..tasks import CORRELATION_VARIABLES, INPUT, MACHINE, SCALAR_VARIABLES, failure_of, task_key

__all__ = ["stack", "shared_parameters"]

def stack(
    index: Mapping[tuple, Mapping[str, Any]],
    results: Mapping[str, xr.Dataset],
    labels: Sequence[str],
    realizations: int,
    observables: Sequence[str] = (),
    grid: Sequence[tuple[str, Sequence]] = (),
    last_time: bool = False,
    grid_values: Sequence[Sequence] | None = None,
) -> xr.Dataset:
    """Per-task results into one Dataset with dimensions (grid..., level, realization, time?, detector).

    ``last_time`` keeps only the last saved time of a dynamics run (its late-time value).
    ``grid_values`` (per grid dimension, the values the study gave, where the coordinates are indices of
    list values such as vectors) name the grid points in messages.

    ``index`` maps (grid indices..., label, realization) to the task; per-emitter variables are reduced
    to ``excited_mean`` (mean population) because N may differ across the grid. A failed task (its
    level refused the model, or the solve failed) gives NaN and its message in ``failures``. The variable
    ``warnings`` counts the warnings each task's level issued about its own run (NaN for a failed task),
    and the attribute ``warnings`` lists them as "grid values, level, realization k (task KEY): message".
    A level's own diagnostics that have the shape of the emission rate (per time, or scalars of a steady
    state) are kept too, NaN for the other levels.
    """
    template = next((results[task_key(t)] for t in index.values()
                     if results[task_key(t)].attrs.get("task_status", "done") == "done"
                     and "emission_rate" in results[task_key(t)]), None)
    if template is None:
        msgs = {results[task_key(t)].attrs.get("error", "") for t in index.values()}
        raise ValueError("every task failed: " + "; ".join(sorted(msgs)))
    done = [results[task_key(t)] for t in index.values() if "emission_rate" in results[task_key(t)]]
    if template.attrs.get("calculation") == "correlations":
        # two-time curves (beyondmf.correlations); mean field has only its elastic part: NaN elsewhere
        names = [n for n in CORRELATION_VARIABLES if any(n in ds for ds in done)]
    else:
        # the lens powers are kept whenever there are lenses
        lens = ("lens_power", "lens_power_coherent", "lens_power_incoherent")
        names = list(dict.fromkeys([*SCALAR_VARIABLES, *(o for o in (*observables, *lens) if o in template)]))
    bases = {n: next(ds[n] for ds in done if n in ds) for n in names}  # shape, dtype and attributes
    stochastic = any(f"{n}_stderr" in results[task_key(t)] for t in index.values() for n in names)
    if stochastic:
        names += [f"{n}_stderr" for n in names]
    # a level's own diagnostics over time (twa's vacuum_excitation, qsd_product's exchange_leak, …): kept,
    # NaN for the levels that do not report them
    shape_of = template["emission_rate"].dims
    diagnostics = sorted({n for t in index.values() for n, v in results[task_key(t)].data_vars.items()
                          if n not in names and n != "warnings" and v.dims == shape_of
                          and np.issubdtype(v.dtype, np.floating)})
    outer = [len(v) for _, v in grid] + [len(labels), realizations]
    arrays, failures, said = {}, [], []
    means = (["excited_mean", *(["excited_mean_stderr"] if stochastic else [])] if "excited" in template
             else [])
    for name in names + diagnostics + means:
        base = (template["emission_rate"] if name in diagnostics or name in means
                else bases[name.removesuffix("_stderr")])
        arrays[name] = (base.dims, np.full(outer + list(base.shape), np.nan, dtype=base.dtype))
    counts = np.full(outer, np.nan)

    given = grid_values or [values for _, values in grid]

    def where(key_tuple: tuple) -> str:  # a task in words: grid values, level, realization
        point = [f"{g}={format_value(values[i])}"
                 for (g, _), values, i in zip(grid, given, key_tuple[:-2], strict=True)]
        return ", ".join([*point, str(key_tuple[-2]), f"realization {key_tuple[-1]}"])

    for key_tuple, task in index.items():
        ds = results[task_key(task)]
        if "emission_rate" not in ds:
            failures.append(f"{where(key_tuple)} (task {task_key(task)}): {ds.attrs.get('error', 'failed')}"
                            + _FAILURE_NOTE.get(failure_of(ds), ""))
            continue
        idx = tuple(key_tuple[:-2]) + (labels.index(key_tuple[-2]), key_tuple[-1])
        for name in names + diagnostics:
            if name in ds:
                arrays[name][1][idx] = ds[name].values
        if means:
            arrays["excited_mean"][1][idx] = ds["excited"].mean("emitter").values
        if stochastic and "excited_stderr" in ds:
            # the emitters' errors are correlated (the same samples): their mean bounds the error of the mean
            arrays["excited_mean_stderr"][1][idx] = ds["excited_stderr"].mean("emitter").values
        messages = list(ds.attrs.get("warnings", []))
        counts[idx] = len(messages)
        said.extend(f"{where(key_tuple)} (task {task_key(task)}): {m}" for m in messages)
    dims = [g for g, _ in grid] + ["level", "realization"]
    coords = {g: np.asarray(v) for g, v in grid}
    coords.update(level=list(labels), realization=np.arange(realizations))
    for c in ("time", "delay", "frequency", "detector", "direction", "lens", "lens_axis", "lens_na",
              "lens_half_angle"):
        have = next((ds for ds in done if c in ds.coords), None)  # mean field has no delays
        if have is not None:
            coords[c] = have[c]
    data = {n: (dims + list(d), a) for n, (d, a) in arrays.items()}
    out = xr.Dataset(data, coords=coords)
    for n in names:
        base = dict(bases[n.removesuffix("_stderr")].attrs)
        out[n].attrs = stderr_attrs(base) if n.endswith("_stderr") else base
    for n in diagnostics:
        first = next(results[task_key(t)][n] for t in index.values() if n in results[task_key(t)])
        out[n].attrs = dict(first.attrs, role=DIAGNOSTIC)
    if means:
        out["excited_mean"].attrs.update(units="1", long_name="mean excited population over emitters")
    if stochastic:
        out["excited_mean_stderr"].attrs.update(
            units="1",
            long_name="mean of the emitters' standard errors: an upper bound of the standard error of "
                      "excited_mean (the emitters' errors are correlated)")
    out["warnings"] = xr.DataArray(counts, dims=dims, coords={d: coords[d] for d in dims}).assign_attrs(
        units="1",
        long_name="warnings the level issued about this run (its own diagnostics; NaN: the task failed)")
    if "time" in out.dims and last_time:
        out = out.isel(time=-1)
    elif "time" in out.dims:
        out = out.assign(_burst_observables(out))
    out.attrs["failures"] = failures
    out.attrs["warnings"] = said
    if "calculation" in template.attrs and all(ds.attrs.get("calculation") == template.attrs["calculation"]
                                               for ds in done):
        out.attrs["calculation"] = template.attrs["calculation"]
    out.attrs.update(shared_parameters(index, labels, results))
    return out


# What a failure message in ``failures`` adds about its cause (`beyondmf.tasks.failure_kind`).
_FAILURE_NOTE = {
    INPUT: " [caused by the input: kept, a rerun gives the same]",
    MACHINE: " [caused by the machine's state: not kept, the next run computes it again]",
}


def shared_parameters(index: Mapping[tuple, Mapping[str, Any]], labels: Sequence[str],
                      results: Mapping[str, xr.Dataset] | None = None) -> dict[str, Any]:
    """What the tasks of a merged result have in common, for its attributes: the package versions, the
    level and options behind each label (given, and ``as_run``: with the defaults and what "auto" chose, read
    from a finished task of ``results``), every model argument that all tasks share (those a grid varies
    are listed in ``model_varied``; their values are in the grid coordinates), and the run and detectors
    where every task has the same (the study text, where there is one, has everything)."""
    from ..results import provenance
    from ..tasks import _plain, model_defaults

    tasks = list(index.values())
    out: dict[str, Any] = dict(provenance())
    by_label: dict[str, list] = {}
    for key_tuple, task in index.items():
        by_label.setdefault(key_tuple[-2], []).append(task)
    out["level_options"] = {}
    for label in labels:
        group = by_label.get(label, [])
        if not group:
            continue
        options = [_plain(t["options"]) for t in group]
        names = sorted({k for o in options for k in o})
        same = {k: options[0][k] for k in names if all(k in o and o[k] == options[0][k] for o in options)}
        entry = {"level": group[0]["level"], "options": same}
        varied = [k for k in names if k not in same]
        if varied:  # a grid over these options: their values are in the grid coordinates
            entry["varied"] = varied
        # every option as the level ran it (defaults included) and what "auto" chose, from a finished task
        finished = (results[task_key(t)].attrs for t in group) if results is not None else ()
        ran = next((a for a in finished if a.get("task_status", "done") == "done" and "options" in a), None)
        if ran is not None:
            entry["as_run"] = {k: v for k, v in _plain(ran["options"]).items() if k not in varied}
            for chosen in ("solver", "dt", "chunk"):
                if chosen in ran and chosen not in varied:
                    entry["as_run"][f"{chosen}_chosen"] = _plain(ran[chosen])
        out["level_options"][label] = entry
    for part in ("run", "detectors"):
        values = {repr(_plain(t.get(part))) for t in tasks}
        if len(values) == 1 and tasks[0].get(part) is not None:
            out[part] = _plain(tasks[0][part])
    # every argument of Model, the defaults written out, except those the grid varies (in its coordinates)
    models = [{**_plain(model_defaults()), **_plain(t.get("model") or {})} for t in tasks]
    keys = sorted({k for m in models for k in m})
    out["model"] = {k: _complex_back(models[0][k]) for k in keys
                    if all(k in m and repr(m[k]) == repr(models[0][k]) for m in models)}
    varied = [k for k in keys if k not in out["model"]]
    if varied:
        out["model_varied"] = varied
    sizes = {len(t["positions"]) for t in tasks}
    if len(sizes) == 1:
        out["N"] = sizes.pop()
    return out


def _complex_back(value: Any) -> Any:
    """A task's {"re": a, "im": b} (its canonical form of a complex number) as the complex a + bj, so that the
    attribute can be passed back to `beyondmf.Model` as it is."""
    if isinstance(value, dict) and set(value) == {"re", "im"}:
        return complex(value["re"], value["im"])
    if isinstance(value, list):
        return [_complex_back(v) for v in value]
    if isinstance(value, dict):
        return {k: _complex_back(v) for k, v in value.items()}
    return value


def _burst_observables(ds: xr.Dataset) -> dict[str, xr.DataArray]:
    """Scalars of a dynamics run: peak rate, its time, and photons emitted in the window.

    emission_rate_peak = max_t P(t) (its error: the sampling error at the peak's time),
    peak_time = argmax_t P(t) (on the saved time grid), emitted = ∫P dt (trapezoid rule; its error
    ∫σ_P dt, an upper bound since errors at neighbouring times are correlated).
    """
    p = ds["emission_rate"]
    valid = p.notnull().all("time")
    at = p.fillna(-np.inf).argmax("time")
    out = {
        "emission_rate_peak": p.max("time").assign_attrs(units="photons per 1/Γ0",
                                                         long_name="peak emission rate max_t P(t)"),
        "peak_time": ds["time"][at].drop_vars("time").where(valid).assign_attrs(
            units="1/Γ0", long_name="time of the peak emission rate"),
        "emitted": p.integrate("time").assign_attrs(units="photons", long_name="photons emitted, ∫P dt"),
    }
    if "emission_rate_stderr" in ds:
        se = ds["emission_rate_stderr"]
        out["emission_rate_peak_stderr"] = se.isel(time=at).drop_vars("time")
        out["emitted_stderr"] = se.integrate("time")
    return out
