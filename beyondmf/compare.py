"""Levels side by side: averages over position draws, corrections against a baseline, and verdicts.

For an observable X, level ℓ and realization k (a position draw, with the same draw and seed at every
level), `summarize` reports

    mean         X̄_ℓ = (1/K) Σ_k X_ℓk
    stderr       u_ℓ² = s²_k(X_ℓ)/K + Σ_k σ²_ℓk / K²
    correction   c_ℓ = (X̄_ℓ − X̄_b) / X̄_b          (b the baseline level, mean field by default)

where s²_k is the sample variance over realizations (the spread of the draws) and σ_ℓk the sampling
error a stochastic level reports for one run (its ``<name>_stderr``). The spread already contains the
sampling noise, so u is conservative for stochastic levels; for K = 1 only σ remains.

The interval of c is built from paired differences d_k = X_ℓk − X_bk (the same draw at both levels, so
the draw-to-draw spread largely cancels), with the delta method for the ratio of means:

    Var c ≈ [Var d̄ − 2c Cov(d̄, X̄_b) + c² Var X̄_b] / X̄_b²,
    Var d̄ = s²(d)/K + Σ(σ²_ℓk + σ²_bk)/K²,  Var X̄_b = s²(X_b)/K + Σσ²_bk/K²,
    Cov(d̄, X̄_b) = cov(d, X_b)/K − Σσ²_bk/K²

and the two-sided interval c ± q·√Var c, q the Student-t quantile with K − 1 degrees of freedom
(normal for K = 1). Verdict against the tolerance τ: "holds" when the interval lies inside [−τ, τ],
"fails" when it lies wholly outside, "undecided" when it straddles ±τ, "undefined" when X̄_b = 0
to round-off (|X̄_b| ≤ 1e-9·max(1, max|X|); the relative correction does not exist, e.g. g2 of one
emitter), "baseline" for the baseline itself.

A stochastic level (one that reports a positive standard error somewhere) whose samples all agree at a
point reports a standard error of exactly 0 there, which is not certainty: after every quantum-jump
trajectory has decayed, the emission rate is 0 in every sample while the exact rate is small but not
zero, and the interval [−1, −1] would read "fails". Where the level or the baseline reports a zero
standard error in every realization and the two differ, the verdict is "undecided" (more samples are
needed to resolve the point); where they agree (e.g. t = 0 from a product state) the interval of zero
width stands.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
import xarray as xr
from scipy import stats

__all__ = ["summarize", "verdict_table", "OBSERVABLES", "VERDICTS"]

OBSERVABLES = ("emission_rate", "intensity", "g2", "g2_total")
VERDICTS = ("holds", "fails", "undecided", "undefined", "baseline")
# A baseline mean this small (relative to max(1, the largest |X|)) counts as zero: round-off, e.g. g2 of one
# emitter, whose four-point moment vanishes only to machine precision.
_ZERO = 1e-9
INTERVAL = (
    "two-sided interval of the relative correction from paired differences across realizations, "
    "delta method for the ratio of means, Student-t quantile with K-1 degrees of freedom (normal for K=1); "
    "sampling errors of stochastic levels added in quadrature"
)


def _quantile(confidence: float, k: int) -> float:
    p = 0.5 + confidence / 2
    return float(stats.t.ppf(p, k - 1)) if k > 1 else float(stats.norm.ppf(p))


def _var(x: xr.DataArray, k: int) -> xr.DataArray:
    """Sample variance over realizations (0 for one realization: no spread can be estimated)."""
    return x.var("realization", ddof=1) if k > 1 else xr.zeros_like(x.isel(realization=0))


def _cov(x: xr.DataArray, y: xr.DataArray, k: int) -> xr.DataArray:
    if k < 2:
        return xr.zeros_like(x.isel(realization=0))
    return ((x - x.mean("realization")) * (y - y.mean("realization"))).sum("realization") / (k - 1)


def _verdict(c, low, high, base_mean, zero: float, tolerance: float, is_base) -> np.ndarray:
    out = np.full(np.shape(c), "undecided", dtype=object)
    out[(low >= -tolerance) & (high <= tolerance)] = "holds"
    out[(low > tolerance) | (high < -tolerance)] = "fails"
    out[~np.isfinite(c) | (np.abs(base_mean) <= zero)] = "undefined"
    out[is_base] = "baseline"
    return out.astype(f"U{max(map(len, VERDICTS))}")  # wide enough for any verdict assigned later


def summarize(
    ds: xr.Dataset,
    baseline: str = "meanfield",
    tolerance: float = 0.1,
    confidence: float = 0.95,
    observables: Sequence[str] = OBSERVABLES,
) -> xr.Dataset:
    """Reduce results with dimensions (level, realization, ...) to means, uncertainties, corrections.

    Parameters
    ----------
    ds : per-realization results: a ``level`` and a ``realization`` dimension, the observables and,
        for stochastic levels, ``<name>_stderr`` (missing or NaN: no sampling error).
    baseline : the level the others are measured against.
    tolerance : τ, the relative correction up to which the baseline is said to hold.
    confidence : coverage of the interval (0.95: a 95 % interval).
    observables : which variables to compare.

    Returns
    -------
    Dataset with ``level`` and the other dimensions of ``ds`` (no ``realization``): ``X``,
    ``X_stderr``, ``X_correction``, ``X_correction_low``, ``X_correction_high``, ``X_verdict``
    for each observable X, and ``warned_realizations`` (how many of a level's runs warned about
    themselves) when ``ds`` has the per-run ``warnings`` count of `sweep.stack`; attributes state the
    baseline, tolerance, confidence and interval.
    """
    if "level" not in ds.dims or "realization" not in ds.dims:
        raise ValueError("summarize needs results with 'level' and 'realization' dimensions")
    levels = [str(v) for v in ds["level"].values]
    if baseline not in levels:
        raise ValueError(f"baseline level {baseline!r} is not among the levels compared "
                         f"({', '.join(levels)})")
    if not (0 < confidence < 1):
        raise ValueError(f"confidence must lie in (0, 1), got {confidence!r}")
    if not (tolerance > 0 and np.isfinite(tolerance)):
        raise ValueError(f"tolerance must be a positive relative correction, got {tolerance!r}")
    missing = [o for o in observables if o not in ds]
    if missing:
        raise ValueError(f"observables {', '.join(missing)} not in the results; "
                         f"they have {', '.join(ds.data_vars)}")
    k = ds.sizes["realization"]
    q = _quantile(confidence, k)
    is_base = xr.DataArray([lv == baseline for lv in levels], dims="level", coords={"level": ds["level"]})
    out = {}
    for name in observables:
        x = ds[name]
        se = ds[f"{name}_stderr"].fillna(0.0) if f"{name}_stderr" in ds else xr.zeros_like(x)
        samp = (se**2).sum("realization") / k**2
        xb, samp_b = x.sel(level=baseline, drop=True), samp.sel(level=baseline, drop=True)
        mean, mb = x.mean("realization"), xb.mean("realization")
        d = x - xb
        var_d = _var(d, k) / k + samp + samp_b
        var_b = _var(xb, k) / k + samp_b
        cov_db = _cov(d, xb, k) / k - samp_b
        with np.errstate(divide="ignore", invalid="ignore"):
            c = d.mean("realization") / mb
            sd = np.sqrt(np.maximum(var_d - 2 * c * cov_db + c**2 * var_b, 0.0)) / abs(mb)
        c = xr.where(is_base, 0.0, c).transpose(*mean.dims)
        sd = xr.where(is_base, 0.0, sd).transpose(*mean.dims)
        low, high = c - q * sd, c + q * sd
        order = c.dims
        zero = _ZERO * max(1.0, float(np.nanmax(np.abs(x.values), initial=0.0)))
        verdict = _verdict(c.values, low.transpose(*order).values, high.transpose(*order).values,
                           mb.broadcast_like(c).transpose(*order).values, zero, tolerance,
                           is_base.broadcast_like(c).transpose(*order).values)
        if f"{name}_stderr" in ds:  # samples that all agree: a zero standard error is not certainty
            raw = ds[f"{name}_stderr"]
            sampled = (raw > 0).any([dim for dim in raw.dims if dim != "level"])  # reports sampling errors
            flat = ((raw == 0) & sampled).all("realization")
            flat = flat | flat.sel(level=baseline, drop=True)
            unresolved = flat & (abs(d.mean("realization")) > zero) & ~is_base
            verdict[unresolved.broadcast_like(c).transpose(*order).values] = "undecided"
        out[name] = mean.assign_attrs(x.attrs)
        units = {"units": x.attrs["units"]} if "units" in x.attrs else {}
        out[f"{name}_stderr"] = np.sqrt(_var(x, k) / k + samp).assign_attrs(
            **units,
            long_name=f"standard error of the mean of {name} over realizations (spread and sampling)")
        out[f"{name}_correction"] = c.assign_attrs(
            units="1", long_name=f"relative correction (X − X_{baseline})/X_{baseline} of {name}")
        out[f"{name}_correction_low"] = low.assign_attrs(
            units="1", long_name=f"lower end of the {confidence:.0%} interval of {name}_correction")
        out[f"{name}_correction_high"] = high.assign_attrs(
            units="1", long_name=f"upper end of the {confidence:.0%} interval of {name}_correction")
        out[f"{name}_verdict"] = xr.DataArray(verdict, dims=c.dims, coords=c.coords).assign_attrs(
            long_name=f"do this level and {baseline} agree on {name} within the tolerance ±{tolerance:g} "
                      f"(holds: the interval of {name}_correction lies inside; fails: wholly outside; "
                      "undecided: it straddles the tolerance)",
            values=", ".join(VERDICTS))
    if "warnings" in ds:
        # a level's own verdict on its runs (twa's vacuum control, cumulant2's unphysical moments, ...):
        # its corrections at these points rest on runs that said they were outside their range
        out["warned_realizations"] = (ds["warnings"] > 0).sum("realization").assign_attrs(
            long_name="realizations whose run issued warnings about itself (see the attribute warnings)")
    summary = xr.Dataset(out)
    summary.attrs.update(
        {k: v for k, v in ds.attrs.items() if k not in ("level",)},
        baseline=baseline,
        tolerance=float(tolerance),
        confidence=float(confidence),
        realizations=int(k),
        interval=INTERVAL,
        correction="(X_level - X_baseline) / X_baseline of the means over realizations",
    )
    return summary


def verdict_table(summary: xr.Dataset) -> dict[str, dict[str, str]]:
    """level → observable → the least favourable verdict over the other dimensions (time, detector).

    Order of severity: fails, undecided, holds (a "holds" needs every point to hold); points where the
    correction is undefined (a zero baseline, e.g. at t = 0 from the ground state) are skipped unless
    every point is undefined.
    """
    rank = {"fails": 0, "undecided": 1, "holds": 2, "undefined": 3, "baseline": 4}
    table: dict[str, dict[str, str]] = {}
    for lv in summary["level"].values:
        row = {}
        for name in summary.data_vars:
            if name.endswith("_verdict"):
                vals = np.atleast_1d(summary[name].sel(level=lv).values).ravel()
                row[name[: -len("_verdict")]] = str(min(vals, key=lambda v: rank[str(v)]))
        table[str(lv)] = row
    return table
