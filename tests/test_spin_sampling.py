"""What the sampled spin levels share (levels/_spin_sampling.py), checked for each of them.

The Lindblad reference is the dense one of tests/test_twa.py (scipy's expm).
"""

import warnings

import numpy as np
import pytest

from beyondmf import Model, evolve
from tests.helpers_ops import dicke_ladder_rate
from tests.test_twa import _lindblad_reference, _line

LEVELS = ["twa", "qsd_product"]


def _quiet_evolve(*args, **kw):
    # qsd_product warns about the exchange of this close chain (exchange_leak ≈ 0.15 Γ0): not tested here
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", message="qsd_product: the exchange J")
        return evolve(*args, **kw)


@pytest.mark.parametrize("level", LEVELS)
def test_bad_options_seeds_and_complex_couplings_are_refused(level):
    m = Model(positions=np.zeros((1, 3)), rabi=1.0)
    with pytest.raises(ValueError, match="samples"):
        evolve(m, level, [0, 1], samples=1)
    with pytest.raises(ValueError, match="dt"):
        evolve(m, level, [0, 1], dt=-0.1)
    with pytest.raises(ValueError, match="max_failed"):
        evolve(m, level, [0, 1], max_failed=2)
    with pytest.raises(ValueError, match="seed must be a non-negative integer below 2"):
        evolve(m, level, [0, 1], samples=4, seed=2**70)  # was a raw OverflowError from JAX
    J = np.array([[0, 0.1j], [-0.1j, 0]])
    G = np.array([[1, 0.2j], [-0.2j, 1]])
    cplx = Model(positions=np.array([[0, 0, 0], [0.3, 0, 0]]), coupling=(J, G))
    with pytest.raises(ValueError, match="real couplings"):
        evolve(cplx, level, [0, 1])


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


@pytest.mark.slow
@pytest.mark.parametrize("level, peak_tolerance, tail", [("twa", 0.05, False), ("qsd_product", 0.03, True)])
def test_superradiant_burst_matches_the_dicke_ladder(level, peak_tolerance, tail):
    # Gross and Haroche (1982): N = 100 inverted emitters with all-to-all decay, the exact ladder solved in
    # tests/helpers_ops.py. Documented accuracy: twa peak height and time within 5 % (docs/twa.md §6);
    # qsd_product measured within 1 % (docs/qsd_product.md §5), asserted within 3 %, and its tail after the
    # burst too (twa's stays too bright: its decayed cloud is not dark, docs/twa.md §7). Plus 3σ (4σ for the
    # tail) and one time step.
    n = 100
    ts = np.linspace(0, 0.12, 121)
    exact = dicke_ladder_rate(n, ts)
    pos = np.zeros((n, 3))
    pos[:, 0] = np.arange(n)
    m = Model(positions=pos, coupling="all-to-all")
    ds = _quiet_evolve(m, level, ts, initial="excited", seed=1, samples=400, dt=2e-4)
    P, se = ds.emission_rate.values, ds.emission_rate_stderr.values
    k, ke = np.argmax(P), np.argmax(exact)
    assert abs(P[k] - exact[ke]) < peak_tolerance * exact[ke] + 3 * se[k]
    assert abs(ts[k] - ts[ke]) <= 0.05 * ts[ke] + (ts[1] - ts[0])
    if tail:
        late = ts > 0.1
        assert np.all(np.abs(P[late] - exact[late]) < peak_tolerance * exact[ke] + 4 * se[late])
