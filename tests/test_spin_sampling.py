"""What the sampled spin levels share (levels/_spin_sampling.py), checked for each of them.

The Lindblad reference is the dense one of tests/test_twa.py (scipy's expm).
"""

import warnings

import numpy as np
import pytest

from beyondmf import Model, evolve
from tests.test_twa import _lindblad_reference, _line

LEVELS = ["twa", "qsd_product"]


def _quiet_evolve(*args, **kw):
    # qsd_product warns about the exchange of this close chain (exchange_leak ≈ 0.15 Γ0): not tested here
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", message="qsd_product: the exchange J")
        return evolve(*args, **kw)


@pytest.mark.parametrize("level", LEVELS)
def test_same_seed_gives_the_same_numbers(level):
    m = Model(positions=_line(4, 0.3), rabi=1.0)
    ts = np.array([0.0, 1.0, 2.0])
    a = _quiet_evolve(m, level, ts, seed=11, samples=100, chunk=100)
    b = _quiet_evolve(m, level, ts, seed=11, samples=100, chunk=100)
    c = _quiet_evolve(m, level, ts, seed=12, samples=100, chunk=100)
    assert np.array_equal(a.excited.values, b.excited.values)
    assert np.array_equal(a.g2_total.values, b.g2_total.values, equal_nan=True)  # no light at t = 0: NaN
    assert not np.array_equal(a.excited.values, c.excited.values)
    # each sample draws from its own key: the chunking changes only the rounding of the sums
    d = _quiet_evolve(m, level, ts, seed=11, samples=100, chunk=40)
    assert np.allclose(a.excited.values, d.excited.values, rtol=1e-12, atol=1e-14)


@pytest.mark.parametrize("level", LEVELS)
def test_standard_errors_fall_as_one_over_root_samples(level):
    # Central limit theorem (common practice): quadrupling the samples halves the standard error.
    m = Model(positions=_line(4, 0.3), rabi=1.0)
    ts = np.array([0.0, 1.0, 2.0])
    small = _quiet_evolve(m, level, ts, seed=2, samples=200, chunk=100)
    large = _quiet_evolve(m, level, ts, seed=3, samples=800, chunk=100)
    for name in ("excited_stderr", "emission_rate_stderr"):
        late = slice(1, None)
        ratio = float(small[name].isel(time=late).mean() / large[name].isel(time=late).mean())
        assert 1.7 < ratio < 2.3, (name, ratio)


@pytest.mark.parametrize("level", LEVELS)
def test_means_converge_in_dt(level):
    # Stochastic Heun: a coarse step shows its bias against the Lindblad equation (scipy), a fine step is
    # within sampling error. (For twa's one emitter the means obey the deterministic Heun scheme, error
    # ∝ dt²; for qsd_product the Stratonovich correction is tested here too.)
    m = Model(positions=np.zeros((1, 3)), rabi=3.0)
    ts = np.linspace(0, 3, 7)
    exc, _ = _lindblad_reference(m, np.array([[0, 0, -1.0]]), ts)
    coarse = evolve(m, level, ts, seed=5, samples=2000, dt=0.25, chunk=1000)
    fine = evolve(m, level, ts, seed=5, samples=2000, dt=0.02, chunk=1000)
    err_c = np.max(np.abs(coarse.excited.values[:, 0] - exc[:, 0]))
    err_f = np.abs(fine.excited.values[:, 0] - exc[:, 0])
    assert err_c > 5 * np.max(fine.excited_stderr.values)
    assert np.all(err_f < 4 * fine.excited_stderr.values[:, 0] + 1e-3)


@pytest.mark.parametrize("level", LEVELS)
def test_the_step_taken_is_recorded_beside_the_largest_allowed(level):
    # report times 0.25 apart: dt = 5 allows one step per interval, dt = 0.1 needs three of 0.0833
    m = Model(positions=np.zeros((1, 3)), rabi=1.0)
    ts = np.linspace(0, 2, 9)
    coarse = evolve(m, level, ts, samples=4, dt=5.0)
    fine = evolve(m, level, ts, samples=4, dt=0.1)
    assert coarse.attrs["dt"] == 5.0 and coarse.attrs["step_largest"] == pytest.approx(0.25)
    assert coarse.attrs["steps"] == 8
    assert fine.attrs["step_largest"] == pytest.approx(0.25 / 3) and fine.attrs["steps"] == 24
