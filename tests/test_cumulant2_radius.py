"""cumulant2 with a pair radius (near pairs dynamical, far pairs by a rule) against the dense level, the
exact Lindblad dynamics and mean field.

Sources: the dense level is itself checked against the exact adjoint Lindbladian (tests/test_cumulant2.py);
with a radius beyond the cloud the near-pair equations are the same equations rewritten, so they must agree
to rounding (common practice for a re-implementation). N = 2 has no three-emitter moments (exact, Kramer and
Ritsch, Eur. Phys. J. D 69, 282 (2015)). The far-pair rule is first-order perturbation theory in the coupling
of two emitters (adiabatic elimination, docs/cumulant2.md "Pair radius"), checked against the steady state of
the exact two-emitter Liouvillian (scipy null space) at weak coupling.
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest
import scipy.linalg

import beyondmf as bm
from beyondmf.levels import _cumulant2_near as near
from tests import _cumulant_reference as ref

TIGHT = {"rtol": 1e-10, "atol": 1e-12}
DETECTORS = {"forward": (0, 0, 1), "side": (0, 1, 0)}
OBSERVABLES = ("excited", "coherence", "emission_rate", "intensity", "intensity_coherent", "g2", "g2_total")


def _cloud(n, width, seed, min_distance, rabi=1.0, detuning=0.3):
    pos = bm.geometry.gaussian_cloud(n, width, seed=seed, min_distance=min_distance)
    return bm.Model(pos, rabi=rabi, detuning=detuning)


def _rel(a, b):
    a, b = np.asarray(a), np.asarray(b)
    ok = np.isfinite(b)
    return float(np.max(np.abs(a[ok] - b[ok])) / np.max(np.abs(b[ok])))


@pytest.mark.slow  # ~40 s; tests/test_transmission.py checks a radius holding every pair in the default run
def test_radius_beyond_cloud_equals_dense_level():
    """Every pair near: the neighbour-list equations are the dense ones rewritten (common practice)."""
    model = _cloud(6, 0.4, seed=3, min_distance=0.15)
    ts = np.linspace(0, 1.5, 4)
    pos = model.positions
    reach = 1.01 * np.max(np.linalg.norm(pos[:, None] - pos[None], axis=-1))
    assert reach < np.linalg.norm(pos.max(axis=0) - pos.min(axis=0))  # else the level runs the dense code
    dense = bm.evolve(model, "cumulant2", ts, detectors=DETECTORS, **TIGHT)
    for far in ("drop", "first_order"):
        sparse = bm.evolve(model, "cumulant2", ts, detectors=DETECTORS, pair_radius=reach, far_pairs=far,
                           **TIGHT)
        for name in OBSERVABLES:
            assert _rel(sparse[name].values, dense[name].values) < 1e-10, (far, name)
        assert sparse.attrs["near_partners_max"] == model.n - 1
        assert float(sparse.far_share.max()) == 0.0


def test_two_emitters_equal_exact():
    """N = 2 within the radius: exact Lindblad dynamics (scipy DOP853 on the density matrix)."""
    model = bm.Model(np.array([[0, 0, 0], [0.12, 0.05, 0.03]]), rabi=1.7, detuning=0.4)
    ts = np.linspace(0, 3, 4)
    ground = np.array([[0.0, 0.0, -1.0]] * 2)
    ds = bm.evolve(model, "cumulant2", ts, pair_radius=1.0, **TIGHT)
    rhos = ref.exact_evolution(model.J, model.Gamma, model.rabi_sites, model.detuning, ground, ts)
    sm = [ref.site_op(ref.SM, i, 2) for i in range(2)]
    rate = [sum(model.Gamma[i, j] * np.trace(r @ sm[i].conj().T @ sm[j]) for i in range(2) for j in range(2))
            for r in rhos]
    excited = [[np.trace(r @ sm[i].conj().T @ sm[i]).real for i in range(2)] for r in rhos]
    np.testing.assert_allclose(ds.emission_rate.values, np.real(rate), atol=1e-7)
    np.testing.assert_allclose(ds.excited.values, excited, atol=1e-7)


def _two_emitter_cumulants(J, G, omega, detuning):
    """Connected correlations ⟨e_μ^a e_ν^b⟩_c, e = (σ⁻, σ⁺, n), of the exact steady state (null space)."""
    f, _ = ref.lindblad_rhs(J, G, omega, detuning)
    L = np.stack([f(0, e) for e in np.eye(16)], axis=1)
    rho = scipy.linalg.null_space(L)[:, 0].reshape(4, 4)
    rho = rho / np.trace(rho)
    ops = [ref.SM, ref.SP, ref.NUM]
    one = [[np.trace(rho @ ref.site_op(o, s, 2)) for o in ops] for s in range(2)]
    c = np.array([[np.trace(rho @ ref.site_op(x, 0, 2) @ ref.site_op(y, 1, 2)) - one[0][i] * one[1][j]
                   for j, y in enumerate(ops)] for i, x in enumerate(ops)])
    beta = np.array([one[0][0], one[1][0]])
    n = np.real([one[0][2], one[1][2]])
    return c, beta, n


@pytest.mark.parametrize("rabi,detuning", [(0.8, 0.0), (1.5, 0.7)])
def test_far_rule_is_first_order_perturbation_theory(rabi, detuning):
    """Two emitters coupled by εK: the exact steady-state correlations are ε·(the rule) + O(ε²), the rule
    evaluated at the exact one-body moments (first-order perturbation theory; exact reference: the null
    space of the two-emitter Liouvillian, scipy)."""
    pos = np.array([[0, 0, 0], [5.0, 0, 0]])
    k0 = 0.5 * 0.4 + 1j * 0.9  # ½Γ_12 + iJ_12 at ε = 1
    errs = []
    for eps in (1e-2, 5e-3):
        J = np.array([[0, eps * k0.imag], [eps * k0.imag, 0]])
        G = np.array([[1, eps * 2 * k0.real], [eps * 2 * k0.real, 1]])
        model = bm.Model(pos, coupling=(J, G), rabi=rabi, detuning=detuning)
        c, beta, n = _two_emitter_cumulants(J, G, model.rabi_sites, detuning)
        args = near.near_args(model, 0.5, "first_order")
        fa, fb, fz, fd = (np.asarray(x) for x in near.far_cumulants(
            args, beta, n, np.asarray(model.rabi_sites), detuning))
        rule = np.array([fa[0, 1], fb[0, 1], fz[0, 1], fd[0, 1]])
        exact = np.array([c[1, 0], c[0, 0], c[2, 0], c[2, 2]])
        errs.append(np.max(np.abs(rule - exact)) / np.max(np.abs(exact)))
    assert errs[0] < 0.05, errs
    assert errs[1] < 0.6 * errs[0] + 2e-3, errs  # the difference falls with ε (first order)


@pytest.mark.slow  # ~30 s of compiling and integrating 30 emitters (as the dense level's dilute check)
def test_dilute_cloud_equals_meanfield():
    """A dilute cloud (width 3 λ0, min distance 0.6 λ0): pair correlations are weak, the rate stays within
    1 % and the forward intensity within 3 % of mean field (common practice; the dense level's own dilute
    check allows 2 % and 5 %, tests/test_cumulant2.py)."""
    model = _cloud(30, 3.0, seed=5, min_distance=0.6, detuning=0.0)
    ts = np.linspace(0, 6, 7)
    mf = bm.evolve(model, "meanfield", ts, detectors=DETECTORS)
    c2 = bm.evolve(model, "cumulant2", ts, detectors=DETECTORS, pair_radius=1.5)
    later = ts > 0
    np.testing.assert_allclose(c2.emission_rate.values[later], mf.emission_rate.values[later], rtol=0.01)
    np.testing.assert_allclose(c2.intensity.values[later, 0], mf.intensity.values[later, 0], rtol=0.03)


@pytest.mark.slow
def test_error_falls_as_the_radius_grows():
    """Dense driven cloud: the emission-rate error against the dense level falls with the radius, for both
    far rules, and the first-order rule beats dropping the far pairs (common practice: a truncation
    parameter must converge)."""
    model = _cloud(30, 0.8, seed=2, min_distance=0.15, detuning=0.0)
    ts = np.linspace(0, 4, 9)
    dense = bm.evolve(model, "cumulant2", ts, detectors=DETECTORS)
    for far in ("drop", "first_order"):
        errs = []
        for radius in (0.5, 1.0, 2.0):
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                s = bm.evolve(model, "cumulant2", ts, detectors=DETECTORS, pair_radius=radius, far_pairs=far)
            errs.append(_rel(s.emission_rate.values, dense.emission_rate.values))
        assert errs[0] > errs[1] > errs[2], (far, errs)
        if far == "drop":
            dropped = errs
    assert errs[1] < dropped[1], (errs, dropped)


def test_small_radius_warns_and_diagnostics_are_kept():
    """A radius that leaves most of the correction to the far rule says so (far_share, a warning)."""
    model = _cloud(16, 0.6, seed=4, min_distance=0.15)
    with pytest.warns(UserWarning, match="far pairs carry"):
        ds = bm.evolve(model, "cumulant2", np.linspace(0, 2, 3), pair_radius=0.2)
    names = ("far_share", "far_rate_correction", "population_violation", "pair_violation", "g2_violation")
    for name in names:
        assert name in ds
    assert ds.attrs["max_far_share"] > 0.5


def test_bad_radius_options_are_refused():
    model = _cloud(4, 0.5, seed=1, min_distance=0.2)
    with pytest.raises(ValueError, match="pair_radius"):
        bm.evolve(model, "cumulant2", [0, 1], pair_radius=-1.0)
    with pytest.raises(ValueError, match="far_pairs"):
        bm.evolve(model, "cumulant2", [0, 1], pair_radius=1.0, far_pairs="guess")
