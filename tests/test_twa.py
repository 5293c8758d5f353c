"""Level "twa" (discrete truncated Wigner) against outside references.

References are computed here, independently of the package: the single-emitter steady state (handbook
formula), small-cluster Lindblad dynamics (scipy), the coupled-dipole linear system
(numpy). Tolerances are sampling errors (multiples of the reported standard error) plus, where stated,
the documented accuracy of the approximation (docs/twa.md).
"""


import warnings

import jax
import numpy as np
import pytest
import scipy.linalg

from beyondmf import Model, evolve, steady
from beyondmf.geometry import ellipsoid_cloud
from beyondmf.integrate import SolveError
from beyondmf.levels.twa import noise_factor, sample_initial
from tests.helpers_ops import coupled_dipole, dense_liouvillian, lowering, product_density

# ---------------------------------------------------------------- independent dense references

def _lindblad_reference(model: Model, bloch: np.ndarray, times: np.ndarray):
    """Excited populations (T, N) and emission rate (T,) from the dense Lindblad equation of conventions.md
    (tests/helpers_ops.py), propagated with expm."""
    n, d = model.n, 2**model.n
    L = dense_liouvillian(model)
    sm = lowering(n)
    sp = [s.conj().T for s in sm]
    rho = product_density(bloch).reshape(-1)
    nops = [sp[i] @ sm[i] for i in range(n)]
    rate_op = sum(model.Gamma[i, j] * sp[i] @ sm[j] for i in range(n) for j in range(n))
    exc, rate = [], []
    for k, t in enumerate(times):
        if k:
            rho = scipy.linalg.expm(L * (t - times[k - 1])) @ rho
        r = rho.reshape(d, d)
        exc.append([np.trace(o @ r).real for o in nops])
        rate.append(np.trace(rate_op @ r).real)
    return np.array(exc), np.array(rate)


def _line(n, spacing):
    pos = np.zeros((n, 3))
    pos[:, 0] = spacing * np.arange(n)
    return pos


def _dense_cloud(n=30, radius=0.6, seed=3):
    """A cloud of our own: n emitters in a sphere, n·λ0³ ≈ 33 for the defaults, hard-core 0.1 λ0."""
    return ellipsoid_cloud(n, radius, seed=seed, min_distance=0.1)


# ---------------------------------------------------------------- sampling and noise


def test_discrete_wigner_samples_reproduce_the_bloch_vector_and_spin_half_second_moments():
    rng = np.random.default_rng(5)
    # Wootters (1987): the discrete Wigner function of a spin ½ reproduces ⟨σ_a⟩ and the symmetric
    # second moments ½⟨{σ_a, σ_b}⟩ = δ_ab exactly; checked here by sampling (4σ).
    bloch = rng.normal(size=(5, 3))
    bloch *= (rng.uniform(0.2, 1.0, 5) / np.linalg.norm(bloch, axis=1))[:, None]
    S = 20000
    keys = jax.vmap(lambda k: jax.random.fold_in(jax.random.PRNGKey(0), k))(np.arange(S))
    s = np.asarray(sample_initial(bloch, keys))  # (N, 3, S)
    mean = s.mean(axis=2)
    assert np.all(np.abs(mean - bloch) < 4 / np.sqrt(S))
    second = np.einsum("nas,nbs->nab", s, s) / S
    assert np.allclose(second, np.eye(3)[None], atol=4 * np.sqrt(2 / S))


def test_noise_factor_reproduces_gamma_and_clips_rounding_negatives():
    pos = _dense_cloud(20, 0.3)
    G = np.array(Model(positions=pos).Gamma)
    B = noise_factor(G)
    assert np.allclose(B @ B.T, G, atol=1e-10)
    with pytest.raises(ValueError, match="positive semi-definite"):
        noise_factor(G - 0.5 * np.eye(20))


# ---------------------------------------------------------------- physics checks


def test_single_emitter_steady_population_is_exact_in_the_mean():
    # ρ_ee = (s/2)/(1 + s), s = 2Ω²/(1 + 4Δ²): D. A. Steck, Quantum and Atom Optics; R. Loudon, The
    # Quantum Theory of Light (2000). For one emitter the drift is the linear Bloch equations and the noise
    # has zero mean (Itô), so the sampled means are exact: the tolerance is sampling error only (4σ).
    for rabi, det in [(1.0, 0.0), (2.0, -0.7)]:
        m = Model(positions=np.zeros((1, 3)), rabi=rabi, detuning=det)
        ds = steady(m, "twa", seed=4, samples=500, settle_time=20.0, window=20.0, window_points=40)
        s = m.saturation
        exact = 0.5 * s / (1 + s)
        assert abs(float(ds.excited[0]) - exact) < 4 * float(ds.excited_stderr[0]) + 1e-4
        # H. J. Kimble, M. Dagenais, L. Mandel, PRL 39, 691 (1977): one emitter's light is antibunched,
        # and the same-site rule σ⁺σ⁺ = 0 makes the estimator zero in every sample.
        assert abs(float(ds.g2.values[0])) < 1e-10
        # coherent fraction 1/(1 + s) of the scattered light (B. R. Mollow, Phys. Rev. 188, 1969 (1969)),
        # from the unbiased estimator of the squared mean coherence, within its own standard error
        I, C = float(ds.intensity[0]), float(ds.intensity_coherent[0])
        assert abs(C - I / (1 + s)) < 4 * float(ds.intensity_coherent_stderr[0])


def test_steady_settling_check_measures_the_drift_across_the_window():
    # The transient of one driven emitter (H. C. Torrey, Phys. Rev. 76, 1059 (1949)), here from the dense
    # Lindblad equation propagated with scipy's expm. A window that starts at t = 0 has not settled: the
    # check's paired half-window difference must equal the exact one within sampling error (4σ) and warn.
    m = Model(positions=np.zeros((1, 3)), rabi=1.0, detuning=0.3)
    points, window = 40, 4.0
    times = window * np.arange(1, points + 1) / points
    exc, rate = _lindblad_reference(m, np.array([[0.0, 0.0, -1.0]]), np.concatenate([[0.0], times]))
    exact = exc[1 + points // 2 :, 0].mean() - exc[1 : 1 + points // 2, 0].mean()
    with pytest.warns(UserWarning, match="had not settled"):
        ds = steady(m, "twa", seed=5, samples=400, settle_time=0.0, window=window, window_points=points)
    a = ds.attrs
    assert abs(a["steady_drift_excitation"] - exact) < 4 * a["steady_drift_excitation_stderr"]
    assert a["steady_drift_sigmas"] > 4
    # One emitter's emission rate is Γ0 ρ_ee (conventions.md), so the two differences are the same numbers.
    assert abs(a["steady_drift_rate"] - a["steady_drift_excitation"]) < 1e-12
    # After 20/Γ0 the transient (rate ≈ Γ0/2) is gone: the same check passes and says nothing.
    with warnings.catch_warnings():
        warnings.simplefilter("error", UserWarning)
        ds = steady(m, "twa", seed=5, samples=400, settle_time=20.0, window=window, window_points=points)
    assert ds.attrs["steady_drift_sigmas"] < 4


def test_single_emitter_dynamics_follow_lindblad():
    m = Model(positions=np.zeros((1, 3)), rabi=1.5, detuning=0.3)
    ts = np.linspace(0, 3, 7)
    bloch = np.array([[0.3, -0.4, 0.5]])
    ds = evolve(m, "twa", ts, initial=bloch, seed=1, samples=1000, chunk=1000)
    exc, rate = _lindblad_reference(m, bloch, ts)
    err = np.abs(ds.excited.values[:, 0] - exc[:, 0])
    assert np.all(err < 4 * ds.excited_stderr.values[:, 0] + 1e-3)


def test_independent_decay_with_coherent_couplings_keeps_the_ground_state_dark():
    # The ground state is an eigenstate of the flip-flop Hamiltonian ΣJ_ij σ_i⁺σ_j⁻ and dark for Γ = 1
    # (common practice). The exchange terms conserve Σz per sample, so the total excitation stays 0.
    pos = _dense_cloud(20, 0.5)
    m0 = Model(positions=pos)
    m = Model(positions=pos, coupling=(np.array(m0.J), np.eye(20)))
    ds = evolve(m, "twa", np.linspace(0, 4, 3), seed=1, samples=200, chunk=200)
    assert np.all(np.abs(ds.excited.sum("emitter").values) < 1e-9)


def test_vacuum_control_measures_the_known_dense_cloud_error_and_warns():
    # The control integrates the undriven ground state, exactly dark for any J, Γ (conventions.md: H|g…g⟩ = 0,
    # nothing to emit). With independent decay the equations keep it dark per sample (Σz conserved); in the
    # dense cloud of docs/twa.md §7 they do not, and the diagnostic must show it beyond its sampling error.
    pos = _dense_cloud(20, 0.5)
    ts = np.linspace(0, 4, 3)
    m0 = Model(positions=pos, rabi=0.5)
    indep = Model(positions=pos, coupling=(np.array(m0.J), np.eye(20)), rabi=0.5)
    ds = evolve(indep, "twa", ts, seed=1, samples=50, chunk=50)
    assert np.all(np.abs(ds.vacuum_excitation.values) < 1e-9)
    with pytest.warns(UserWarning, match="undriven ground state of this cloud"):
        ds = evolve(m0, "twa", ts, seed=1, samples=50, chunk=50)
    v, e = ds.vacuum_excitation.values, ds.vacuum_excitation_stderr.values
    assert v[0] == 0.0 and np.any(np.abs(v) > 4 * e)
    # "auto": as many control samples as the run, at least 64
    assert ds.attrs["vacuum_check"] == 64 and ds.attrs["max_vacuum_excitation"] == np.max(np.abs(v))


def test_vacuum_control_leaves_the_run_unchanged_and_repeats_with_the_seed():
    m = Model(positions=_line(3, 0.3), rabi=1.0)
    ts = [0.0, 1.0, 2.0]
    a = evolve(m, "twa", ts, seed=4, samples=40, chunk=40, vacuum_check=0)
    b = evolve(m, "twa", ts, seed=4, samples=40, chunk=40, vacuum_check=16)
    c = evolve(m, "twa", ts, seed=4, samples=40, chunk=40, vacuum_check=16)
    assert np.array_equal(a.excited.values, b.excited.values)
    assert "vacuum_excitation" not in a
    assert np.array_equal(b.vacuum_excitation.values, c.vacuum_excitation.values)
    for bad in (1, -3, True, 2.5):
        with pytest.raises(ValueError, match="vacuum_check"):
            evolve(m, "twa", ts, samples=4, vacuum_check=bad)


@pytest.mark.xfail(strict=True, reason="known defect: collective Γ lets the dense ground state drift below "
                   "⟨σ^z⟩ = −1 (docs/twa.md, 'Known failure')")
def test_undriven_ground_state_stays_dark_in_a_dense_cloud():
    # Exact: |g…g⟩ is a steady state of the master equation of conventions.md for any J, Γ (nothing to
    # emit, H|g…g⟩ = 0): no excitation and no emission beyond sampling error.
    m = Model(positions=_dense_cloud(20, 0.5), coupling="vector")
    ds = evolve(m, "twa", np.linspace(0, 4, 3), seed=2, samples=400, chunk=200)
    exc = ds.excited.values
    assert np.all(np.abs(exc) < 4 * ds.excited_stderr.values + 1e-9)
    rate = ds.emission_rate.values
    assert np.all(np.abs(rate) < 4 * ds.emission_rate_stderr.values + 1e-9)


def test_failure_is_an_error_that_says_so():
    # Emitters 0.02 λ0 apart have |J| ≈ 370 Γ0; Heun steps of 0.1/Γ0 are far outside its stability.
    m = Model(positions=_line(4, 0.02), rabi=1.0)
    with pytest.raises(SolveError, match="diverged or became non-finite"):
        evolve(m, "twa", [0.0, 1.0, 2.0], seed=1, samples=10, dt=0.1, chunk=100)




@pytest.mark.slow
@pytest.mark.xfail(strict=True, reason="known defect: the drifting dense ground state biases the linear "
                   "response (measured errors up to 0.01 at |β| ≤ 0.046, 2–5σ; docs/twa.md)")
def test_weak_drive_matches_the_coupled_dipole_solution():
    # J. Ruostekoski, J. Javanainen, PRA 55, 513 (1997): to first order in Ω,
    # 0 = (iΔ − ½)β_i − (i/2)Ω_i − (i/2)Σ_{j≠i}(2J_ij − iΓ_ij)β_j. At s = 2Ω² = 0.005 the saturation
    # correction is below 1 %; the tolerance is that plus 4σ of sampling error.
    pos = ellipsoid_cloud(8, 0.5, seed=7, min_distance=0.2)
    m = Model(positions=pos, rabi=0.05, detuning=0.5)
    beta = coupled_dipole(m)
    ds = steady(m, "twa", seed=3, samples=4000, settle_time=20.0, window=40.0, window_points=80)
    got = ds.coherence.values
    se = ds.coherence_stderr.values
    assert np.all(np.abs(got - beta) < 4 * se + 0.01 * np.abs(beta))


@pytest.mark.slow
@pytest.mark.parametrize(
    "n, spacing",
    [
        pytest.param(2, 0.15, marks=pytest.mark.xfail(
            strict=True, reason="measured Σρ_ee error 0.12 at t = 1.5 > 0.065 + 4σ (docs/twa.md)")),
        (3, 0.2),
        (4, 0.25),
    ],
)
def test_small_dense_clusters_against_the_lindblad_equation(n, spacing):
    # Dense Lindblad reference above. Documented accuracy of DTWA here (docs/twa.md, error table): the
    # total excitation within 0.1·N·max(ρ_ee) and the emission rate within 15 % of its peak, plus 4σ.
    m = Model(positions=_line(n, spacing), rabi=2.0, detuning=0.0, laser=(0, 0, 1))
    ts = np.linspace(0, 5, 11)
    exc, rate = _lindblad_reference(m, np.tile([0, 0, -1.0], (n, 1)), ts)
    ds = evolve(m, "twa", ts, seed=8, samples=2000)
    tot = ds.excited.sum("emitter").values
    tot_se = np.sqrt((ds.excited_stderr.values**2).sum(axis=1))
    assert np.all(np.abs(tot - exc.sum(axis=1)) < 0.1 * n * exc.max() + 4 * tot_se)
    rate_se = ds.emission_rate_stderr.values
    assert np.all(np.abs(ds.emission_rate.values - rate) < 0.15 * rate.max() + 4 * rate_se)


def _calibration_cluster(density, seed):
    """A 6-emitter cluster of the calibration of docs/twa.md §9: a uniform ball of the given n·λ0³."""
    from beyondmf.geometry import ellipsoid_cloud

    return ellipsoid_cloud(6, (6 / (4 / 3 * np.pi * density)) ** (1 / 3), seed=seed, min_distance=0.08)


def test_regime_warning_follows_the_calibration():
    """Driven at s < 10 in a cluster with ‖iJ + ½Γ‖ ≥ 0.25 (n·λ0³ = 8, seed 11: 0.54) twa warns and names the
    level to compare with; at Ω = 3 (s = 18), where the calibration found it within 0.7 %, it does not."""
    from beyondmf.levels._regimes import TRUSTED_COUPLING

    pos = _calibration_cluster(8.0, 11)
    weak = Model(positions=pos, dipole=(1, 0, 0), rabi=1.0)
    assert weak.coupling_norm() >= TRUSTED_COUPLING
    with pytest.warns(UserWarning, match="at this coupling strength .* compare with 'cumulant2'"):
        ds = evolve(weak, "twa", [0.0, 0.5], seed=2, samples=8, chunk=8, vacuum_check=0)
    assert ds.attrs["coupling_norm"] == pytest.approx(weak.coupling_norm())
    strong = Model(positions=pos, dipole=(1, 0, 0), rabi=3.0)
    ds = evolve(strong, "twa", [0.0, 0.5], seed=2, samples=8, chunk=8, vacuum_check=0)
    assert not any("coupling strength" in w for w in ds.attrs["warnings"])


@pytest.mark.slow
def test_calibration_points_are_reproduced_against_exact():
    """Two points of the calibration (docs/twa.md §9), steady states against the exact density matrix:
    n·λ0³ = 8, seed 11, Ω = 1: forward intensity off by more than 5 % and warned; Ω = 3: within 1 % and no
    regime warning."""
    pos = _calibration_cluster(8.0, 11)
    det = {"forward": (0, 0, 1)}
    for rabi, wrong in ((1.0, True), (3.0, False)):
        m = Model(positions=pos, dipole=(1, 0, 0), rabi=rabi)
        ex = steady(m, "exact", detectors=det)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            ds = steady(m, "twa", detectors=det, seed=5)
        err = abs(float(ds.intensity[0]) / float(ex.intensity[0]) - 1)
        warned = any("coupling strength" in w for w in ds.attrs["warnings"])
        assert (err > 0.05) == wrong and warned == wrong, (rabi, err, ds.attrs["warnings"])
