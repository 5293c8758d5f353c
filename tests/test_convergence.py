"""Convergence helpers: the criterion on constructed series, and real runs of mean field."""

from __future__ import annotations

import numpy as np
import pytest
import xarray as xr

import beyondmf as bm
from beyondmf.convergence import assess, converge_option, converge_realizations, n_scaling


def _series(values, errors=None, dim="samples"):
    coord = {dim: [100, 200, 400, 800][: len(values)]}
    x = xr.DataArray(np.asarray(values, float), dims=dim, coords=coord)
    e = None if errors is None else xr.DataArray(np.asarray(errors, float), dims=dim, coords=coord)
    return x, e


def test_criterion_on_constructed_series():
    # a series settling like 1 + 1/p: last change 1/400 − 1/800 ≈ 0.12 % of the value
    x, _ = _series([1 + 1 / 100, 1 + 1 / 200, 1 + 1 / 400, 1 + 1 / 800])
    t = assess(x, None, "samples", tolerance=0.01)
    assert bool(t["converged"])
    assert float(t["change"][-1]) == pytest.approx((1 / 400 - 1 / 800) / (1 + 1 / 800), rel=1e-12)
    # the same values with a 1 % standard error each: the bound (Δ + 2√2 σ)/|X| exceeds 1 %
    x, e = _series(x.values, [0.01] * 4)
    t = assess(x, e, "samples", tolerance=0.01)
    assert not bool(t["converged"]) and "2 sqrt" in t.attrs["criterion"]
    expected = ((1 / 400 - 1 / 800) + 2 * np.sqrt(2) * 0.01) / (1 + 1 / 800)
    assert float(t["bound"][-1]) == pytest.approx(expected)


def test_a_series_that_is_not_monotonic_in_its_parameter_is_refused():
    x = xr.DataArray([1.0, 1.1, 1.05], dims="samples", coords={"samples": [100, 400, 200]})
    with pytest.raises(ValueError, match="must run from coarse to fine"):
        assess(x, None, "samples")


def test_paired_realizations_do_not_count_their_common_spread_against_convergence():
    # Two draws whose values differ by 0.4 but that change by the same 1e-4 when the samples double: the
    # paired change is exact, so the series has converged (common practice: paired differences); judged
    # as unpaired means with the draw-to-draw spread as their error it would not be.
    from beyondmf.convergence import assess_sweep

    base = np.array([[0.9, 1.3]])  # (samples, realization) after broadcasting
    values = base + np.array([[0.0], [1e-4], [2e-4]])
    ds = xr.Dataset(
        {"emission_rate": (("level", "samples", "realization"), values[None]),
         "emission_rate_stderr": (("level", "samples", "realization"), np.full((1, 3, 2), 1e-5))},
        coords={"level": ["twa"], "samples": [100, 200, 400]},
    )
    tables = assess_sweep(ds, "samples", "twa", observables=("emission_rate",), tolerance=0.01)
    table = tables["emission_rate"]
    assert bool(table["converged"])
    # the value's own error still carries the draw-to-draw spread: √(var(0.9, 1.3)/2) = 0.2
    assert float(table["error"][-1]) == pytest.approx(0.2, rel=1e-3)
    assert float(table["bound"][-1]) == pytest.approx((1e-4 + 2 * np.sqrt(2 * 2e-10 / 4)) / 1.1002, rel=1e-9)


def test_time_series_are_judged_by_their_sup_norm():
    t_ax = np.linspace(0, 1, 5)
    x = xr.DataArray([np.sin(t_ax), np.sin(t_ax) * 1.001], dims=("dt", "time"), coords={"dt": [0.1, 0.05]})
    table = assess(x, None, "dt", tolerance=0.01)
    assert float(table["change"][-1]) == pytest.approx(0.001 / 1.001, rel=1e-9) and bool(table["converged"])
    assert float(table["value"][-1]) == pytest.approx(1.001 * np.sin(1.0))


def test_mean_field_converges_in_solver_tolerance():
    pos = bm.geometry.ellipsoid_cloud(4, [1.0, 1.0, 0.2], seed=1, min_distance=0.05)
    model = bm.Model(pos, rabi=1.0)
    table, fig = converge_option(model, "meanfield", "rtol", [1e-4, 1e-9], times=np.linspace(0, 3, 7),
                                 tolerance=1e-4, atol=1e-12)
    assert bool(table["converged"]) and fig.axes


def test_running_mean_over_realizations():
    rng = np.random.default_rng(0)
    per = xr.DataArray(1 + 0.001 * rng.normal(size=8), dims="realization")
    table, _ = converge_realizations(per, tolerance=0.01)
    assert bool(table["converged"]) and table.sizes["realizations"] == 7
    noisy = xr.DataArray(1 + 0.1 * rng.normal(size=8), dims="realization")
    assert not bool(converge_realizations(noisy, tolerance=0.01)[0]["converged"])


@pytest.mark.slow
def test_n_scaling_gives_a_table():

    def disc(n, seed):  # fixed density 0.05 λ0⁻³: radius grows as n^{1/3}
        r = (n / (0.05 * 4 / 3 * np.pi * 0.2)) ** (1 / 3)
        return bm.geometry.ellipsoid_cloud(n, [r, r, 0.2 * r], seed=seed, min_distance=0.1)

    table, _ = n_scaling(disc, [2, 4], "meanfield", model={"rabi": 0.3}, tolerance=0.5)
    assert list(table["N"].values) == [2, 4] and np.all(table["value"] > 0)
