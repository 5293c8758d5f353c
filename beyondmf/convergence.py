"""Has it converged? Tables and figures for samples, solver tolerances and time steps, realizations, N.

One criterion throughout (ours; stated in every table's attributes): along the refined parameter p_1 <
p_2 < … (more samples, tighter tolerance, smaller step, more realizations, more emitters), with X_i the
value at p_i and σ_i its standard error (0 for deterministic levels),

    Δ_i = max |X_i − X_{i−1}|,   σΔ_i = max √(σ_i² + σ_{i−1}²),   b_i = (Δ_i + 2σΔ_i) / max |X_i|

(max over the other dimensions — time, detector — so a curve is judged as a whole by its sup norm).
The result has converged when the last step satisfies b_last ≤ τ: the change made by the last
refinement, plus two standard errors of that change, is within the relative tolerance τ. Noise alone
therefore never looks converged; a noisy series needs more samples before it passes.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence
from typing import Any

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402
import xarray as xr  # noqa: E402

__all__ = ["assess", "assess_sweep", "figure", "converge_option", "converge_realizations", "n_scaling"]

CRITERION = (
    "converged when (|X_last - X_prev| + 2 sqrt(se_last^2 + se_prev^2)) / |X_last| <= tolerance, "
    "sup norm over time and detector"
)


def strictly_monotonic(values) -> bool:
    """Whether a refinement's parameter values run one way: strictly increasing or strictly decreasing."""
    steps = np.diff(np.asarray(values, dtype=float))
    return bool(np.all(steps > 0) or np.all(steps < 0))


def assess(
    values: xr.DataArray,
    errors: xr.DataArray | None,
    dim: str,
    tolerance: float = 0.05,
    change_errors: xr.DataArray | None = None,
) -> xr.Dataset:
    """The convergence table of ``values`` along ``dim`` (ordered from coarse to fine).

    ``change_errors`` (along ``dim``, labelled by the finer point of each step): the standard error of
    each change X_i − X_{i−1}, where it is known better than from independent errors (paired realizations
    of a sweep, whose common draw-to-draw spread cancels in the change); None: √(σ_i² + σ_{i−1}²).
    Returns a Dataset along ``dim``: ``value`` (the value, or its largest magnitude over time/detector),
    ``error``, ``change`` (Δ_i / max|X_i|), ``bound`` (b_i) and the scalar ``converged``.
    """
    if dim not in values.dims or values.sizes[dim] < 2:
        raise ValueError(f"convergence needs at least two values along {dim!r}")
    if dim in values.coords and np.issubdtype(values[dim].dtype, np.number):
        if not strictly_monotonic(values[dim].values):
            raise ValueError(f"the values along {dim!r} must run from coarse to fine (strictly monotonic), "
                             f"got {values[dim].values.tolist()}: the criterion judges the last step")
    if not (tolerance > 0):
        raise ValueError(f"tolerance must be a positive relative change, got {tolerance!r}")
    err = xr.zeros_like(values) if errors is None else errors.fillna(0.0)
    other = [d for d in values.dims if d != dim]
    scale = abs(values).max(other) if other else abs(values)
    diff = values.diff(dim, label="upper")
    if change_errors is None:
        sig = np.sqrt(err**2 + err.shift({dim: 1}) ** 2).isel({dim: slice(1, None)})
    else:
        sig = change_errors.fillna(0.0)
    dmax = abs(diff).max(other) if other else abs(diff)
    smax = sig.max(other) if other else sig
    with np.errstate(divide="ignore", invalid="ignore"):
        change = (dmax / scale).reindex({dim: values[dim]})
        bound = ((dmax + 2 * smax) / scale).reindex({dim: values[dim]})
    if other:  # the value of largest magnitude over time/detector (e.g. the peak of a burst)
        flat = values.stack(_other=other)
        value = flat.isel(_other=abs(flat).argmax("_other")).drop_vars(["_other", *other], errors="ignore")
    else:
        value = values
    error = err.max(other) if other else err
    last = float(bound.isel({dim: -1}))
    table = xr.Dataset({"value": value, "error": error, "change": change, "bound": bound})
    table["converged"] = bool(np.isfinite(last) and last <= tolerance)
    table.attrs.update(criterion=CRITERION, tolerance=float(tolerance), parameter=dim,
                       last_bound=last)
    return table


def figure(table: xr.Dataset, what: str = "value"):
    """Two panels: the value (± error) against the parameter, and the bound b_i against τ."""
    dim = table.attrs["parameter"]
    x = table[dim].values
    fig, (a, b) = plt.subplots(1, 2, figsize=(7.5, 3.2))
    a.errorbar(x, table["value"], yerr=table["error"], marker="o", capsize=3)
    a.set_xlabel(dim)
    a.set_ylabel(what)
    b.semilogy(x, table["bound"], marker="o", label="(Δ + 2σΔ)/|X|")
    b.semilogy(x, table["change"], marker=".", ls="--", label="Δ/|X|")
    b.axhline(table.attrs["tolerance"], color="k", ls=":", label="tolerance")
    b.set_xlabel(dim)
    b.legend(fontsize=8)
    for ax in (a, b):
        if np.all(x > 0) and x.max() / x.min() > 20:
            ax.set_xscale("log")
    verdict = "converged" if bool(table["converged"]) else "NOT converged"
    fig.suptitle(f"{what}: {verdict} (last bound {table.attrs['last_bound']:.2g} vs tolerance "
                 f"{table.attrs['tolerance']:g})", fontsize=9)
    fig.tight_layout()
    return fig


def assess_sweep(
    ds: xr.Dataset,
    dim: str,
    level: str,
    observables: Sequence[str] = ("emission_rate", "g2_total"),
    tolerance: float = 0.05,
) -> dict[str, xr.Dataset]:
    """Convergence tables along a sweep's grid dimension ``dim`` for one level of a sweep result.

    Works on per-realization results (averaged here: mean ± spread/√K and sampling errors in quadrature)
    and on `beyondmf.compare.summarize` output (``X`` and ``X_stderr``, no ``realization``). With
    per-realization results the draws are the same at every grid value, so the error of each change is
    that of the paired differences over realizations (their spread/√K, and the sampling errors of both
    points in quadrature): the draw-to-draw spread of the value itself, common to both points, does not
    enter the criterion.
    """
    out = {}
    sub = ds.sel(level=level)
    for name in observables:
        de = None
        if "realization" not in sub.dims and f"{name}_stderr" in sub:  # a summary
            x, e = sub[name], sub[f"{name}_stderr"]
        else:
            k = sub.sizes.get("realization", 1)
            x = sub[name].mean("realization")
            spread = sub[name].var("realization", ddof=1) / k if k > 1 else 0.0
            se2 = sub[f"{name}_stderr"] ** 2 if f"{name}_stderr" in sub else 0.0 * sub[name]
            samp = se2.sum("realization") / k**2
            e = np.sqrt(spread + samp) * xr.ones_like(x)
            if k > 1:
                step = sub[name].diff(dim, label="upper")
                paired = step.var("realization", ddof=1) / k
                pair_samp = (se2 + se2.shift({dim: 1})).isel({dim: slice(1, None)}).sum("realization") / k**2
                de = np.sqrt(paired + pair_samp)
        out[name] = assess(x, e, dim, tolerance, change_errors=de)
    return out


def converge_option(
    model,
    level: str,
    option: str,
    values: Sequence[Any],
    observable: str = "emission_rate",
    times=None,
    initial="ground",
    detectors: Mapping[str, Any] | None = None,
    seed: int = 0,
    tolerance: float = 0.05,
    **options,
):
    """Run ``level`` at each value of one of its options (samples, rtol, a time step …), coarse to fine.

    ``times`` None: the steady state; otherwise `beyondmf.evolve` from ``initial``. A stochastic level
    uses the same ``seed`` at every value. Returns (table, figure); see the module for the criterion.
    """
    from .api import evolve, steady

    runs = []
    for v in values:
        opts = {**options, option: v}
        if times is None:
            runs.append(steady(model, level, detectors=detectors, seed=seed, **opts))
        else:
            runs.append(evolve(model, level, times, initial=initial, detectors=detectors, seed=seed, **opts))
    x = xr.concat([r[observable] for r in runs], dim=xr.DataArray(list(values), dims=option, name=option))
    err = None
    if f"{observable}_stderr" in runs[0]:
        err = xr.concat([r[f"{observable}_stderr"] for r in runs], dim=x[option])
    table = assess(x, err, option, tolerance)
    table.attrs.update(level=level, observable=observable)
    return table, figure(table, f"{observable} ({level})")


def converge_realizations(per_realization: xr.DataArray, stderr: xr.DataArray | None = None,
                          tolerance: float = 0.05):
    """Running mean over the first k = 2 … K realizations (position draws) of one level's result.

    The error of the running mean is spread/√k (with sampling errors added in quadrature), so the
    criterion asks both that the last realization moved the mean little and that the mean is known
    to within the tolerance. Returns (table, figure).
    """
    k_all = per_realization.sizes["realization"]
    if k_all < 3:
        raise ValueError("the realization convergence needs at least 3 realizations")
    means, errs = [], []
    for k in range(2, k_all + 1):
        sub = per_realization.isel(realization=slice(0, k))
        var = sub.var("realization", ddof=1) / k
        if stderr is not None:
            var = var + (stderr.isel(realization=slice(0, k)).fillna(0) ** 2).sum("realization") / k**2
        means.append(sub.mean("realization"))
        errs.append(np.sqrt(var))
    coord = xr.DataArray(np.arange(2, k_all + 1), dims="realizations", name="realizations")
    table = assess(xr.concat(means, coord), xr.concat(errs, coord), "realizations", tolerance)
    return table, figure(table, "mean over realizations")


def n_scaling(
    positions: Callable[[int, int], np.ndarray],
    ns: Sequence[int],
    level: str,
    model: Mapping[str, Any] | None = None,
    observable: str = "emission_rate",
    per_emitter: bool = True,
    seed: int = 0,
    tolerance: float = 0.05,
    **options,
):
    """The steady ``observable`` (divided by N when ``per_emitter``) against the number of emitters.

    ``positions(n, seed)`` draws n emitters (e.g. a cloud at fixed density, so that the per-emitter
    rate approaches its large-N value). Converged: the last doubling changed it by less than τ.
    Returns (table, figure).
    """
    from .api import steady
    from .model import Model

    vals, errs = [], []
    for n in ns:
        ds = steady(Model(positions(int(n), seed), **dict(model or {})), level, seed=seed, **options)
        scale = n if per_emitter else 1
        vals.append(ds[observable] / scale)
        se = ds.get(f"{observable}_stderr", 0 * ds[observable])
        errs.append(se / scale)
    coord = xr.DataArray(list(ns), dims="N", name="N")
    table = assess(xr.concat(vals, coord), xr.concat(errs, coord), "N", tolerance)
    table.attrs.update(level=level, observable=observable, per_emitter=int(per_emitter))
    return table, figure(table, f"{observable}{' per emitter' if per_emitter else ''} ({level})")
