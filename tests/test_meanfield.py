"""Mean field against exact one-emitter results, the coupled-dipole linear solution, and scipy."""

import numpy as np
import pytest
from scipy.integrate import solve_ivp
from scipy.special import roots_legendre

import beyondmf as bm
from beyondmf.integrate import SolveError
from tests.helpers_ops import coupled_dipole, dense_liouvillian


@pytest.mark.parametrize("rabi, detuning", [(1.0, 0.0), (0.4, -0.7), (3.0, 2.0)])
def test_single_emitter_steady_state(rabi, detuning):
    # ρ_ee = (s/2)/(1 + s), s = 2Ω²/(1 + 4Δ²): D. A. Steck, Quantum and Atom Optics (resonance
    # fluorescence); R. Loudon, The Quantum Theory of Light, 3rd ed. (2000). Ω = 1, Δ = 0 gives 1/3.
    ds = bm.steady(bm.Model([[0, 0, 0]], rabi=rabi, detuning=detuning), "meanfield")
    s = 2 * rabi**2 / (1 + 4 * detuning**2)
    assert float(ds.excited[0]) == pytest.approx(s / 2 / (1 + s), abs=1e-9)
    assert float(ds.emission_rate) == pytest.approx(s / 2 / (1 + s), abs=1e-9)
    assert abs(float(ds.g2_total)) < 1e-9  # antibunching (Kimble, Dagenais, Mandel 1977)
    assert ds.attrs["residual"] < 1e-9


def test_single_emitter_dynamics_matches_lindblad_with_scipy():
    # one emitter: mean field is exact; reference = the 2×2 Lindblad equation integrated by scipy
    model = bm.Model([[0, 0, 0]], rabi=2.0, detuning=0.5)
    times = np.linspace(0, 6, 13)
    ds = bm.evolve(model, "meanfield", times, rtol=1e-10, atol=1e-12)
    L = dense_liouvillian(model)
    rho0 = np.diag([1.0, 0.0]).astype(complex).reshape(-1)
    sol = solve_ivp(lambda t, r: L @ r, (0, 6), rho0, t_eval=times, rtol=1e-11, atol=1e-13)
    rho = sol.y.T.reshape(-1, 2, 2)
    np.testing.assert_allclose(ds.excited[:, 0], rho[:, 1, 1].real, atol=1e-8)
    np.testing.assert_allclose(ds.coherence[:, 0], rho[:, 1, 0], atol=1e-8)  # ⟨σ⁻⟩ = ρ_eg


def test_weak_drive_matches_coupled_dipole_solution():
    pos = bm.geometry.gaussian_cloud(60, (0.8, 0.8, 0.3), seed=3, min_distance=0.1)
    model = bm.Model(pos, rabi=1e-3, detuning=0.3)
    ds = bm.steady(model, "meanfield")
    beta = coupled_dipole(model)
    np.testing.assert_allclose(ds.coherence.values, beta, rtol=1e-4, atol=1e-9)


def sphere_quadrature(n_theta=32, n_phi=64):
    x, w = roots_legendre(n_theta)
    phi = np.arange(n_phi) * 2 * np.pi / n_phi
    ct, ph = np.meshgrid(x, phi, indexing="ij")
    st = np.sqrt(1 - ct**2)
    dirs = np.stack([st * np.cos(ph), st * np.sin(ph), ct], -1).reshape(-1, 3)
    weights = np.repeat(w, n_phi) * 2 * np.pi / n_phi
    return dirs, weights


def test_intensity_integrates_to_emission_rate():
    # ∫ I(n̂) dΩ = P for every state (conventions.md): checks couplings, estimators and observables together
    pos = bm.geometry.ellipsoid_cloud(12, (0.5, 0.5, 0.3), seed=7, min_distance=0.1)
    model = bm.Model(pos, rabi=1.5, detuning=0.2, dipole=(1, 1j, 0))
    dirs, w = sphere_quadrature()
    det = {f"d{k}": d for k, d in enumerate(dirs)}
    ds = bm.evolve(model, "meanfield", [0.0, 1.0, 3.0], detectors=det)
    total = (ds.intensity * w[None, :]).sum("detector")
    np.testing.assert_allclose(total.values, ds.emission_rate.values, rtol=1e-9, atol=1e-12)
    np.testing.assert_allclose(
        ds.intensity_coherent + ds.intensity_incoherent, ds.intensity, rtol=1e-12
    )


def test_windowed_envelope_switches_the_drive_off():
    model = bm.Model([[0, 0, 0]], rabi=2.0, envelope=[(0.0, 2.0)])
    ds = bm.evolve(model, "meanfield", [0.0, 2.0, 4.0, 6.0])
    n2 = float(ds.excited[1, 0])
    # after the laser is off the single emitter decays freely: n(t) = n(2) e^{−(t−2)}
    np.testing.assert_allclose(ds.excited[2:, 0], n2 * np.exp(-np.array([2.0, 4.0])), rtol=1e-5)


def test_explicit_solver_warns_on_stiff_cloud():
    pos = [[0, 0, 0], [0, 0, 0.01], [1, 0, 0]]
    with pytest.warns(UserWarning, match="stiff"):
        bm.evolve(bm.Model(pos, rabi=0.5), "meanfield", [0, 0.1], solver="Tsit5")


def test_failed_solve_says_what_to_try():
    pos = bm.geometry.gaussian_cloud(20, 0.5, seed=1, min_distance=0.05)
    with pytest.raises(SolveError, match="max_steps"):
        bm.evolve(bm.Model(pos, rabi=3.0), "meanfield", [0, 50], max_steps=5)


def test_steady_refuses_time_dependent_drive():
    with pytest.raises(ValueError, match="constant drive"):
        bm.steady(bm.Model([[0, 0, 0]], rabi=1.0, envelope=[(0, 1)]), "meanfield")


def _pair_cloud():
    """Ten emitters, two of them 0.02 λ0 apart (|J| ≈ 300 Γ0), the others ≥ 0.2 λ0 from everything."""
    rng = np.random.default_rng(4)
    pos = [np.zeros(3), np.array([0.0, 0.02, 0.0])]
    while len(pos) < 10:
        c = rng.uniform(-0.6, 0.6, 3)
        if min(np.linalg.norm(c - p) for p in pos) > 0.2:
            pos.append(c)
    return bm.Model(np.array(pos), rabi=1.0)


def _scipy_meanfield(model, times):
    """The emission rate of the mean-field equations of docs/meanfield.md, written here with complex β and
    integrated by scipy's DOP853 at rtol 1e-11 (independent of the package's right-hand side)."""
    n = model.n
    K = 1j * model.J + 0.5 * (model.Gamma - np.eye(n))
    om = model.rabi_sites

    def rhs(_t, y):
        beta, pop = y[:n] + 1j * y[n:2 * n], y[2 * n:]
        z, phi = 2 * pop - 1, K @ beta
        db = -0.5 * beta + 0.5j * om * z + z * phi
        dp = -pop - np.imag(np.conj(om) * beta) - 2 * np.real(np.conj(beta) * phi)
        return np.concatenate([db.real, db.imag, dp])

    sol = solve_ivp(rhs, (times[0], times[-1]), np.zeros(3 * n), method="DOP853", t_eval=times,
                    rtol=1e-11, atol=1e-13)
    beta, pop = sol.y[:n] + 1j * sol.y[n:2 * n], sol.y[2 * n:]
    return np.real(np.einsum("it,ij,jt->t", beta.conj(), model.Gamma, beta)) + (pop - abs(beta) ** 2).sum(0)


def test_stiff_pair_auto_is_explicit_and_agrees_with_scipy():
    """A close pair (|J| ≈ 375 Γ0) among dilute emitters: "auto" is Tsit5 (no longer Kvaerno5, whose
    steps the pair's excited oscillation keeps as short, at a far higher cost), it warns about the
    stiffness, and agrees with a tight scipy solve; every Bloch vector stays in the unit ball."""
    m = _pair_cloud()
    times = np.linspace(0.0, 10.0, 21)
    ref = _scipy_meanfield(m, times)
    with pytest.warns(UserWarning, match="stiff.*min_distance$"):
        ds = bm.evolve(m, "meanfield", times)
    assert ds.attrs["solver"] == "Tsit5" and ds.attrs["bound_excess"] < 1e-6
    np.testing.assert_allclose(ds.emission_rate.values, ref, rtol=2e-6, atol=1e-9)


def test_stiff_pair_steady_state_is_a_stable_fixed_point():
    """The steady state of the same cloud is a root of the equations (residual) where no mode grows
    (stability_growth_rate < 0, from the dense Jacobian's eigenvalues), and the t → ∞ limit of evolve
    (common practice)."""
    m = _pair_cloud()
    with pytest.warns(UserWarning, match="stiff"):
        ss = bm.steady(m, "meanfield")
    assert ss.attrs["residual"] < 1e-10 and ss.attrs["stability_growth_rate"] < 0
    with pytest.warns(UserWarning, match="stiff"):
        ev = bm.evolve(m, "meanfield", [0.0, 60.0], rtol=1e-9, atol=1e-11)
    np.testing.assert_allclose(ss.excited.values, ev.excited.values[-1], atol=1e-7)


def test_steady_state_never_runs_unannounced():
    """A step budget: max_steps bounds the whole search, with an error that names it."""
    m = bm.Model(bm.geometry.gaussian_cloud(8, 0.3, seed=2, min_distance=0.1), rabi=1.0)
    with pytest.raises(SolveError, match="max_steps"):
        bm.steady(m, "meanfield", max_steps=5, solver="Tsit5")
