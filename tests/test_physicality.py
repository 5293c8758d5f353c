"""Values no physical state can have are flagged at every level (beyondmf.physicality).

The bounds are facts of quantum mechanics: 0 ≤ ⟨σ⁺σ⁻⟩ ≤ 1, a positive semi-definite Γ gives P ≥ 0, ⟨E†E⟩
and its variance ⟨E†E⟩ − |⟨E⟩|² are non-negative, and ⟨E†E†EE⟩ = ‖E E ρ^{1/2}‖² ≥ 0 (common practice).
"""

import warnings

import numpy as np
import pytest
import xarray as xr
from scipy.stats import norm

import beyondmf as bm
from beyondmf import physicality


def _dataset(g2, g2_err=None, excited=(0.2, 0.3)):
    """A steady-state result with one detector and the given g2 (and its standard error)."""
    data = {
        "excited": (("emitter",), np.array(excited)),
        "emission_rate": ((), 0.5),
        "intensity": (("detector",), np.array([0.04])),
        "intensity_incoherent": (("detector",), np.array([0.01])),
        "g2": (("detector",), np.array([g2])),
        "g2_total": ((), 0.9),
    }
    if g2_err is not None:
        data["g2_stderr"] = (("detector",), np.array([g2_err]))
    return xr.Dataset(data, coords={"detector": ["forward"], "emitter": [0, 1]})


def test_deterministic_tolerance():
    assert physicality.check(_dataset(-0.5 * physicality.G2_TOL), stochastic=False) == ([], None)
    flagged, text = physicality.check(_dataset(-0.2), stochastic=False)
    assert flagged == ["g2"]
    assert "g2 -0.2" in text and "detector 'forward'" in text


def test_g2_without_light_is_not_judged():
    """At t = 0 from the ground state g2 is 0/0: a sampled level's rounding gave −2.7e16 ± 0 there."""
    ds = _dataset(-2.7e16, g2_err=0.0)
    ds["intensity"][:] = 1e-20
    ds["emission_rate"] = ((), 1e-3)
    assert physicality.check(ds, stochastic=True) == ([], None)


def test_populations_above_one_and_below_zero():
    flagged, text = physicality.check(_dataset(1.0, excited=(1.01, -0.02)), stochastic=False)
    assert flagged == ["excited"]
    assert "emitter 1" in text  # the worst excursion (0.02 below 0) is named


def test_sampling_error_uses_a_bonferroni_bound():
    """One value checked: k = Φ⁻¹(0.99) = 2.326 (scipy.stats.norm); −0.1 ± 0.05 is within 2.33σ of 0."""
    k = norm.isf(physicality.FALSE_ALARM)
    assert physicality.check(_dataset(-0.1, g2_err=0.1 / (k - 0.01)), stochastic=True)[0] == []
    flagged, text = physicality.check(_dataset(-0.1, g2_err=0.1 / (k + 0.05)), stochastic=True)
    assert flagged == ["g2"] and "by more than 2.3 standard errors" in text


def test_false_alarm_rate_of_sampled_values_on_the_bound():
    """Sampled values whose truth sits exactly on the bound (g2 = 0): the fraction of runs flagged by chance
    stays below FALSE_ALARM, here for 200 detectors per run (common practice: the Bonferroni bound)."""
    rng = np.random.default_rng(7)
    flagged = 0
    runs = 400
    for _ in range(runs):
        ds = xr.Dataset({"g2": (("detector",), rng.normal(0.0, 0.1, 200)),
                         "g2_stderr": (("detector",), np.full(200, 0.1))})
        flagged += bool(physicality.check(ds, stochastic=True)[0])
    assert flagged / runs < 2 * physicality.FALSE_ALARM  # expected ≤ 1 %, 400 runs: allow for their spread


def _ring(n, spacing):
    ang = 2 * np.pi * np.arange(n) / n
    radius = spacing / (2 * np.sin(np.pi / n))
    return np.stack([radius * np.cos(ang), radius * np.sin(ang), np.zeros(n)], axis=1)


def test_cumulant2_failure_is_flagged_through_evolve():
    """The inverted, undriven triangle 0.05 λ0 apart (docs/cumulant2.md): cumulant2's g2_total turns negative
    while the exact one stays positive. evolve records it in attrs['unphysical'] and warns."""
    model = bm.Model(_ring(3, 0.05), dipole=(0, 0, 1))
    with pytest.warns(UserWarning, match="cumulant2: values no physical state can have: .*g2_total"):
        ds = bm.evolve(model, "cumulant2", np.linspace(0, 10, 41), initial="excited")
    assert "g2_total" in ds.attrs["unphysical"]
    assert any("values no physical state can have" in w for w in ds.attrs["warnings"])


def test_physical_run_is_not_flagged():
    """An exact run of a driven pair: nothing flagged, no warning."""
    model = bm.Model(np.array([[0, 0, 0], [0.15, 0.05, 0.0]]), rabi=1.3, detuning=0.2)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        ds = bm.evolve(model, "exact", np.linspace(0, 5, 21), detectors={"f": (0, 0, 1), "s": (0, 1, 0)})
        st = bm.steady(model, "exact")
    assert ds.attrs["unphysical"] == [] and st.attrs["unphysical"] == []
