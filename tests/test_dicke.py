"""Level "dicke" against the Dicke ladder, the inverted-ensemble g2, the exact level, and its refusals."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.linalg

import beyondmf as bm
from beyondmf import Model
from tests.helpers_ops import dicke_ladder_rate


def dicke_model(n, **kw):
    """All-to-all emitters on a line across the laser (l̂ = z), so the drive is uniform but detectors off
    the axis see different phases."""
    pos = np.c_[np.linspace(0, 0.9, n), np.zeros(n), np.zeros(n)]
    return Model(positions=pos, coupling="all-to-all", **kw)


@pytest.mark.parametrize("n", [6, 100])
def test_burst_from_full_inversion_matches_ladder(n):
    m = dicke_model(n)
    times = np.linspace(0, 8 * np.log(n) / n, 25)
    ds = bm.evolve(m, "dicke", times, initial="excited", rtol=1e-9, atol=1e-11)
    ref = dicke_ladder_rate(n, times)
    np.testing.assert_allclose(ds.emission_rate.values, ref, rtol=1e-6, atol=1e-8 * ref.max())
    if n >= 100:  # at large N the averaged peak lies below the semiclassical N²/4 (Gross and Haroche 1982)
        assert n**2 / 8 < ds.emission_rate.values.max() < n**2 / 4


@pytest.mark.parametrize("n", [1, 2, 5, 40])
def test_inverted_g2_total(n):
    """g2_total = 2(1 − 1/N) for N fully inverted emitters (derived from the ladder matrix elements,
    references.md); the same for every detector since |w_j| = 1."""
    det = {"a": (1, 0, 0), "b": (0, 0, 1)}
    ds = bm.evolve(dicke_model(n), "dicke", [0.0], initial="excited", detectors=det)
    assert ds.g2_total.values[0] == pytest.approx(2 * (1 - 1 / n), abs=1e-12)
    np.testing.assert_allclose(ds.g2.values[0], 2 * (1 - 1 / n), atol=1e-12)


@pytest.mark.parametrize("n", [4, pytest.param(6, marks=pytest.mark.slow)])
def test_agrees_with_exact_all_to_all(n):
    """The symmetric space is closed under the symmetric dynamics: "dicke" equals the full density matrix
    of "exact" for a spin-coherent initial state (Dicke 1954), with detectors that see phases."""
    m = dicke_model(n, rabi=1.3, detuning=-0.4)
    det = {"forward": (0, 0, 1), "oblique": (0.8, 0.2, 0.5)}
    times = np.linspace(0, 2.5, 6)
    init = [0.6, -0.48, 0.64]
    a = bm.evolve(m, "exact", times, initial=init, detectors=det, rtol=1e-10, atol=1e-12)
    b = bm.evolve(m, "dicke", times, initial=init, detectors=det, rtol=1e-10, atol=1e-12)
    for name in ["excited", "coherence", "emission_rate", "intensity", "g2", "g2_total"]:
        np.testing.assert_allclose(b[name].values, a[name].values, rtol=1e-6, atol=1e-8, err_msg=name)


def test_steady_state_matches_exact_long_time():
    """From the ground state the exact dynamics stays symmetric and settles to the Dicke-space steady state
    (the exact level's own steady() refuses this model: its dark states make it non-unique)."""
    m = dicke_model(3, rabi=1.5, detuning=0.2)
    ref = bm.evolve(m, "exact", [0.0, 80.0], rtol=1e-10, atol=1e-12).isel(time=-1)
    ds = bm.steady(m, "dicke")
    assert ds.attrs["residual"] < 1e-9
    for name in ["excited", "emission_rate", "g2_total", "g2"]:
        np.testing.assert_allclose(ds[name].values, ref[name].values, rtol=1e-6, err_msg=name)


def test_steady_state_is_the_null_vector_of_the_ladder_liouvillian():
    """The steady state in the symmetric space |J, M⟩ (Dicke 1954) from an independent construction:
    J± from ⟨M+1|J+|M⟩ = √((J − M)(J + M + 1)), H = −Δ(J + M) + ½Ω(J+ + J−) (J + M = Σσ⁺σ⁻ counts the
    excitations), one collective channel J−,
    null vector by scipy.linalg.null_space. With the default tolerances the polish used to stop at
    residual 1e-6 (GMRES broke down on the trace-conserving, singular Jacobian): 1e-7 off, silently."""
    n, om, det = 4, 2.0, 0.3
    k = np.arange(n + 1)  # excitations, M = k − J
    jm = np.diag(np.sqrt(k[1:] * (n - k[1:] + 1.0)), 1)  # J−|k⟩ = √(k(N − k + 1))|k − 1⟩
    jp = jm.T
    H = -det * np.diag(k.astype(float)) + 0.5 * om * (jp + jm)
    eye = np.eye(n + 1)
    L = (-1j * (np.kron(H, eye) - np.kron(eye, H.T)) + np.kron(jm, jp.T)
         - 0.5 * np.kron(jp @ jm, eye) - 0.5 * np.kron(eye, (jp @ jm).T))  # row-major vec
    ns = scipy.linalg.null_space(L)
    assert ns.shape[1] == 1
    rho = ns[:, 0].reshape(n + 1, n + 1)
    rho = rho / np.trace(rho)
    rate = np.trace(jp @ jm @ rho).real
    g2 = np.trace(jp @ jp @ jm @ jm @ rho).real / rate**2
    ds = bm.steady(dicke_model(n, rabi=om, detuning=det), "dicke")
    assert float(ds.emission_rate) == pytest.approx(rate, abs=1e-11)
    assert float(ds.g2_total) == pytest.approx(g2, abs=1e-11)
    assert ds.attrs["residual"] < 1e-12


def test_refuses_models_that_are_not_permutation_symmetric():
    pos = np.c_[np.linspace(0, 0.9, 4), np.zeros(4), np.zeros(4)]
    with pytest.raises(ValueError, match="decay is not all-to-all"):
        bm.evolve(Model(positions=pos, coupling="vector"), "dicke", [0, 1])
    g = np.ones((4, 4))
    j = np.full((4, 4), 0.1)
    np.fill_diagonal(j, 0)
    with pytest.raises(ValueError, match="exchange J_ij is not zero"):
        bm.evolve(Model(positions=pos, coupling=(j, g)), "dicke", [0, 1])
    along = np.c_[np.zeros(4), np.zeros(4), np.linspace(0, 0.9, 4)]  # along the laser: phases differ
    with pytest.raises(ValueError, match="drive is not uniform"):
        bm.steady(Model(positions=along, coupling="all-to-all", rabi=1.0), "dicke")


def test_refuses_initial_states_outside_the_symmetric_space():
    m = dicke_model(3, rabi=1.0)
    with pytest.raises(ValueError, match="same Bloch vector"):
        bm.evolve(m, "dicke", [0, 1], initial=[[0, 0, 1], [0, 0, -1], [0, 0, 1]])
    with pytest.raises(ValueError, match="pure initial state"):
        bm.evolve(m, "dicke", [0, 1], initial=[0, 0, 0.5])
