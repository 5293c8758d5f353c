"""Per-emitter detunings, the Gaussian-beam drive and the coherent transmission of the probe, against
handbook formulas (sources beside each check)."""

import warnings

import numpy as np
import pytest
from scipy.integrate import quad
from scipy.special import voigt_profile

import beyondmf as bm
from beyondmf.beam import GaussianBeam, cross_section

SIGMA0 = 3 / (2 * np.pi)  # 3λ0²/(2π) (Foot, Atomic Physics, OUP 2005, §7.5)


def _quiet(fn, *args, **kw):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return fn(*args, **kw)


# ---- the beam (A. E. Siegman, Lasers, University Science Books 1986) ----

def test_cross_section_is_the_two_level_resonant_value():
    assert cross_section() == pytest.approx(SIGMA0, rel=1e-15)


@pytest.mark.parametrize("z_over_zr", [0.0, 1.0, 3.0])
def test_beam_power_is_the_same_through_every_plane(z_over_zr):
    """∫|u|² dA = π w0²/2 in every plane (Siegman's normalisation), by scipy's adaptive quadrature."""
    beam = GaussianBeam(2.5)
    z = z_over_zr * beam.rayleigh_range
    lhat = np.array([0.0, 0.0, 1.0])

    def ring(rho):
        return 2 * np.pi * rho * abs(beam.mode(np.array([[rho, 0.0, z]]), lhat)[0]) ** 2

    power = quad(ring, 0, 12 * 2.5 * np.sqrt(1 + z_over_zr**2), epsabs=0, epsrel=1e-12, limit=200)[0]
    assert power == pytest.approx(np.pi * 2.5**2 / 2, rel=1e-8)


def test_beam_radius_curvature_and_gouy_phase_follow_the_paraxial_formulas():
    """w(z) = w0√(1 + z²/z_R²) at the 1/e² radius of |u|², the on-axis phase kz − arctan(z/z_R) (Gouy), and
    the wavefront curvature kρ²/(2R), R = z(1 + z_R²/z²) (Siegman, Lasers, ch. 17; chapter cited from
    memory)."""
    w0 = 3.0
    beam = GaussianBeam(w0, focus=(0.5, -0.2, 1.0))
    lhat = np.array([0.0, 0.6, 0.8])
    e1 = np.array([1.0, 0.0, 0.0])  # ⊥ l̂
    zr, k = beam.rayleigh_range, 2 * np.pi
    for z in (0.3 * zr, 2.0 * zr):
        w = w0 * np.sqrt(1 + (z / zr) ** 2)
        R = z * (1 + (zr / z) ** 2)
        f = np.asarray(beam.focus)
        on_axis = beam.mode((f + z * lhat)[None], lhat)[0]
        off = beam.mode((f + z * lhat + w * e1)[None], lhat)[0]
        assert abs(on_axis) == pytest.approx(w0 / w, rel=1e-12)
        gouy = np.angle(np.exp(1j * (k * z - np.arctan(z / zr))))
        assert np.angle(on_axis) == pytest.approx(gouy, abs=1e-10)
        assert abs(off) ** 2 / abs(on_axis) ** 2 == pytest.approx(np.exp(-2), rel=1e-12)
        dphi = np.angle(off / on_axis)
        assert dphi == pytest.approx(np.angle(np.exp(1j * k * w**2 / (2 * R))), abs=1e-10)


def test_beam_mode_solves_the_paraxial_wave_equation():
    """u e^{−ikz} obeys ∇⊥²A + 2ik ∂A/∂z = 0 (Siegman, Lasers, ch. 16; chapter cited from memory), by
    central differences."""
    beam = GaussianBeam(1.5)
    lhat, k, h = np.array([0.0, 0.0, 1.0]), 2 * np.pi, 1e-3

    def A(x, y, z):
        return beam.mode(np.array([[x, y, z]]), lhat)[0] * np.exp(-1j * k * z)

    for x, y, z in [(0.4, -0.3, 2.0), (1.1, 0.7, -5.0)]:
        lap = (A(x + h, y, z) + A(x - h, y, z) + A(x, y + h, z) + A(x, y - h, z) - 4 * A(x, y, z)) / h**2
        dz = (A(x, y, z + h) - A(x, y, z - h)) / (2 * h)
        assert abs(lap + 2j * k * dz) < 1e-4 * abs(k * dz)


def test_bad_beam_and_detuning_input_is_refused_with_the_reason():
    pos = np.zeros((1, 3))
    with pytest.raises(ValueError, match="at least 1 λ0"):
        GaussianBeam(0.3)
    with pytest.raises(ValueError, match="along the dipole"):
        bm.Model(pos, rabi=1.0, dipole=(0, 0, 1), laser=(0, 0, 1), beam=GaussianBeam(2.0))
    with pytest.raises(ValueError, match=r"one per emitter, shape \(2,\)"):
        bm.Model(np.zeros((2, 3)) + [[0, 0, 0], [0.5, 0, 0]], detuning=[0.1, 0.2, 0.3])
    with pytest.raises(ValueError, match="NaN"):
        bm.Model(np.array([[0, 0, 0], [0.5, 0, 0.0]]), detuning=[0.1, np.nan])


# ---- transmission ----

def test_one_weakly_driven_emitter_at_the_focus_removes_sigma0_over_the_mode_area():
    """t = 1 − (σ0/πw0²)/(1 − 2iΔ) for one emitter at the focus of a weak probe: its power extinction
    1 − |t|² ≈ 2σ0/(πw0²)·1/(1 + 4Δ²) is the cross-section σ0/(1 + 4Δ²) times the peak intensity over the
    power, I0/P = 2/(πw0²) (Foot, Atomic Physics, §7.5, the Lorentzian cross-section of full width Γ0;
    Siegman for P = I0πw0²/2). Computed at the exact level."""
    w0 = 2.0
    for det in (0.0, 0.5, -1.3):
        m = bm.Model(np.zeros((1, 3)), rabi=1e-4, detuning=det, dipole=(1, 0, 0), beam=GaussianBeam(w0))
        ds = bm.steady(m, "exact")
        expect = 1 - SIGMA0 / (np.pi * w0**2) / (1 - 2j * det)
        assert complex(ds.transmission) == pytest.approx(expect, abs=1e-7)
        assert float(ds.optical_depth) == pytest.approx(-np.log(abs(expect) ** 2), rel=1e-5)


def test_saturated_line_broadens_as_sqrt_one_plus_s():
    """One emitter: the extinction Re(1 − t) at detunings ±½Γ0√(1 + s) is half its value on resonance (power
    broadening, FWHM Γ0√(1 + s); Steck, Quantum and Atom Optics, §5.7). Exact level, s = 2Ω² = 8."""
    rabi = 2.0
    s = 2 * rabi**2
    ext = {}
    for det in (0.0, 0.5 * np.sqrt(1 + s), -0.5 * np.sqrt(1 + s)):
        m = bm.Model(np.zeros((1, 3)), rabi=rabi, detuning=det, beam=GaussianBeam(3.0))
        ext[det] = float(np.real(1 - bm.steady(m, "exact").transmission))
    peak = ext[0.0]
    for det, e in ext.items():
        if det != 0.0:
            assert e == pytest.approx(0.5 * peak, rel=1e-8)


@pytest.mark.parametrize("level", ["exact", "cumulant2", "meanfield"])
def test_optical_theorem_extinction_equals_the_emitted_power(level):
    """Forward extinction of the mode, 2Φ Re(1 − t) with the probe's photon flux Φ, equals the total
    emission rate in every steady state, at any drive (the optical theorem: Jackson, Classical
    Electrodynamics, 3rd ed., §10.11; here energy balance of the driven emitters). A dense cluster with
    per-emitter detunings, strongly driven by a beam focused off-centre."""
    pos = bm.geometry.gaussian_cloud(5, 0.3, seed=4, min_distance=0.12)
    m = bm.Model(pos, rabi=1.5, detuning=[0.3, -0.5, 0.0, 1.0, 0.2], dipole=(1, 0, 0), laser=(0, 0, 1),
                 beam=GaussianBeam(1.5, focus=(0.2, 0.1, -0.3)))
    ds = _quiet(bm.steady, m, level)
    extinction = 2 * ds.attrs["probe_photon_flux"] * np.real(1 - complex(ds.transmission))
    assert extinction == pytest.approx(float(ds.emission_rate), rel=1e-7)


def _slab(n_density, radius, length, seed):
    rng = np.random.default_rng(seed)
    count = int(round(n_density * np.pi * radius**2 * length))
    r = radius * np.sqrt(rng.uniform(0, 1, count))
    phi = rng.uniform(0, 2 * np.pi, count)
    return np.stack([r * np.cos(phi), r * np.sin(phi), rng.uniform(-length / 2, length / 2, count)], 1)


def test_dilute_slab_follows_beer_lambert_with_a_lorentzian_line():
    """A dilute slab (n·λ0³ = 0.03, length 30 λ0, wider than a beam of waist 4 λ0) weakly probed at mean field
    (the coupled-dipole linear response): the optical depth −ln|t|² averaged over 12 draws is n σ0 L
    (Beer–Lambert with σ0 = 3λ0²/2π: Foot, Atomic Physics, §7.5), and OD(Δ)/OD(0) averaged over the draws
    is the Lorentzian 1/(1 + 4Δ²) of full width Γ0 (Steck). Tolerances: three standard errors of the mean
    over the draws (single draws scatter by up to 8 %: speckle of the random multiple scattering) plus 4 %
    (OD) and 2 % (line) for the dilute medium's collective corrections, of order n·λ0³."""
    n_density, length, w0 = 0.03, 30.0, 4.0
    od0 = n_density * SIGMA0 * length
    ods, ratios = [], []
    for seed in range(12):
        pos = _slab(n_density, 2.2 * w0, length, seed)
        od = {}
        for det in (0.0, 0.5):
            m = bm.Model(pos, rabi=1e-3, detuning=det, dipole=(1, 0, 0), beam=GaussianBeam(w0))
            od[det] = float(_quiet(bm.steady, m, "meanfield").optical_depth)
        ods.append(od[0.0])
        ratios.append(od[0.5] / od[0.0])
    print("optical depths", np.round(ods, 4), "ratios", np.round(ratios, 4), "Beer-Lambert", od0)
    mean, se = np.mean(ods), np.std(ods, ddof=1) / np.sqrt(len(ods))
    assert abs(mean - od0) < 3 * se + 0.04 * od0, (mean, se, od0)
    r_mean, r_se = np.mean(ratios), np.std(ratios, ddof=1) / np.sqrt(len(ratios))
    assert abs(r_mean - 0.5) < 3 * r_se + 0.02 * 0.5, (r_mean, r_se)


def test_doppler_broadened_dilute_cloud_has_the_voigt_line():
    """Weak drive, a very dilute cloud (200 emitters, Gaussian r.m.s. 25 λ0) whose detunings Δ − δ_i sample a
    Gaussian of r.m.s. width σ = 1 Γ0 at its quantiles: the emission rate per emitter over Ω² is
    (π/2) V(Δ; σ, ½), the Voigt profile of the Gaussian with the Lorentzian of half width Γ0/2 (scipy.special.
    voigt_profile; Steck, Quantum and Atom Optics, §5.7 for the single-emitter Lorentzian Ω²/(1 + 4Δ²))."""
    from scipy.stats import norm

    n, sigma, rabi = 200, 1.0, 1e-3
    pos = bm.geometry.gaussian_cloud(n, 25.0, seed=1, min_distance=2.0)
    shifts = sigma * norm.ppf((np.arange(n) + 0.5) / n)
    for det in (0.0, 0.8, 2.0):
        m = bm.Model(pos, rabi=rabi, detuning=det - shifts)
        rate = float(_quiet(bm.steady, m, "meanfield").emission_rate) / (n * rabi**2)
        assert rate == pytest.approx(np.pi / 2 * voigt_profile(det, sigma, 0.5), rel=0.02)


def test_weak_beam_drive_at_mean_field_is_the_coupled_dipole_solution():
    """Weak drive: mean field's coherences solve the linear coupled-dipole equations with the beam's Ω_i,
    (iΔ_i − ½)β_i − Σ_j K_ij β_j = (i/2)Ω_i (common practice; docs/meanfield.md in the linear limit)."""
    pos = bm.geometry.gaussian_cloud(40, 0.8, seed=2, min_distance=0.15)
    det = np.linspace(-0.5, 0.5, 40)
    m = bm.Model(pos, rabi=1e-4, detuning=det, beam=GaussianBeam(1.2, focus=(0.3, 0, 0)))
    ss = _quiet(bm.steady, m, "meanfield")
    K = 1j * m.J + 0.5 * (m.Gamma - np.eye(40))
    beta = np.linalg.solve(np.diag(1j * det - 0.5) - K, 0.5j * m.rabi_sites)
    np.testing.assert_allclose(ss.coherence.values, beta, rtol=0, atol=1e-7 * np.abs(beta).max())


# ---- per-emitter detunings at every level ----

def _pair(**kw):
    return bm.Model(np.array([[0, 0, 0], [0.15, 0.05, 0.1]]), rabi=1.2, detuning=[0.7, -0.4], laser=(1, 0, 0),
                    **kw)


def test_cumulant2_is_exact_for_two_emitters_with_their_own_detunings():
    """Two emitters have no third cumulant, so cumulant2 equals exact (common practice of cumulant
    expansions; docs/cumulant2.md), here with Δ_1 ≠ Δ_2: the detuning terms i(Δ_a ± Δ_b) of the pair
    equations are checked against the density matrix."""
    m = _pair()
    times = np.linspace(0, 5, 11)
    ex, c2 = bm.evolve(m, "exact", times), bm.evolve(m, "cumulant2", times)
    np.testing.assert_allclose(c2.excited.values, ex.excited.values, atol=1e-7)
    np.testing.assert_allclose(c2.coherence.values, ex.coherence.values, atol=1e-7)
    np.testing.assert_allclose(c2.g2_total.values[1:], ex.g2_total.values[1:], rtol=1e-6)
    assert float(bm.steady(m, "cumulant2").emission_rate) == pytest.approx(
        float(bm.steady(m, "exact").emission_rate), rel=1e-8)


@pytest.mark.slow  # ~15 s; jumps against exact stays in the default run (tests/test_jumps.py)
def test_jumps_samples_the_exact_dynamics_with_per_emitter_detunings():
    """Quantum jumps average to the master equation (Dalibard, Castin, Mølmer, PRL 68, 580 (1992))."""
    m = _pair()
    times = np.linspace(0, 4, 5)
    ex = bm.evolve(m, "exact", times)
    jp = bm.evolve(m, "jumps", times, samples=1500, seed=3)
    err = np.abs(jp.excited.values - ex.excited.values) / np.maximum(jp.excited_stderr.values, 1e-12)
    assert err[1:].max() < 4.5


def test_near_pair_rule_sees_each_emitters_detuning():
    """cumulant2 with a pair radius holding every pair equals the dense level with per-emitter detunings."""
    pos = np.array([[0, 0, 0], [0.3, 0, 0.1], [0.1, 0.4, 0]])
    m = bm.Model(pos, rabi=0.5, detuning=[0.7, -0.4, 1.5])
    times = np.linspace(0, 4, 5)
    dense = bm.evolve(m, "cumulant2", times)
    near = _quiet(bm.evolve, m, "cumulant2", times, pair_radius=1.0)
    np.testing.assert_allclose(near.excited.values, dense.excited.values, atol=1e-7)


def test_dicke_refuses_per_emitter_detunings_with_the_reason():
    m = bm.Model(np.zeros((3, 3)), coupling="all-to-all", rabi=1.0, detuning=[0.0, 0.5, 1.0])
    with pytest.raises(ValueError, match="detuning differs between emitters"):
        bm.steady(m, "dicke")


def test_uniform_per_emitter_detunings_are_one_detuning():
    m = bm.Model(np.array([[0, 0, 0], [0.5, 0, 0.0]]), detuning=[0.25, 0.25])
    assert m.detuning == 0.25 and m.uniform_detuning


# ---- study files ----

DOPPLER_STUDY = """
[geometry]
kind = "gaussian"
n = 400
widths = [3.0, 3.0, 3.0]
min_distance = 0.1
[drive]
rabi = 0.2
detuning = 0.5
broadening = "gaussian"
broadening_width = 2.0
beam_waist = 4.0
[run]
calculation = "steady"
[levels.meanfield]
[sweep]
realizations = 2
seed = 9
"""


def test_a_study_draws_static_doppler_shifts_per_realization_and_drives_with_its_beam(tmp_path):
    """Each realization draws its own shifts (r.m.s. the given width; the second stream of the position
    seed, so equal seeds give equal shifts); the beam keys make a beam drive."""
    from beyondmf.sweep import read_study, study_tasks

    path = tmp_path / "doppler.toml"
    path.write_text(DOPPLER_STUDY)
    index = study_tasks(read_study(path))[0]
    d0, d1 = (np.asarray(index[("meanfield", r)]["model"]["detuning"]) for r in (0, 1))
    assert d0.shape == (400,) and not np.allclose(d0, d1)
    for d in (d0, d1):
        assert np.mean(d) == pytest.approx(0.5, abs=4 * 2.0 / np.sqrt(400))
        assert np.std(d) == pytest.approx(2.0, rel=0.15)
    again = study_tasks(read_study(path))[0]
    np.testing.assert_array_equal(again[("meanfield", 1)]["model"]["detuning"], d1)
    model = bm.tasks.build_model(index[("meanfield", 0)])
    assert model.beam == GaussianBeam(4.0) and not model.uniform_detuning


@pytest.mark.parametrize("bad, key", [
    ('broadening = "maxwell"', "drive.broadening"),
    ("broadening_width = -1.0", "drive.broadening_width"),
    ("beam_waist = 0.2", "drive.beam_waist"),
])
def test_bad_broadening_and_beam_keys_name_the_key(tmp_path, bad, key):
    from beyondmf.study import StudyError
    from beyondmf.sweep import read_study

    text = DOPPLER_STUDY.replace('broadening = "gaussian"\nbroadening_width = 2.0\nbeam_waist = 4.0', bad)
    path = tmp_path / "bad.toml"
    path.write_text(text)
    with pytest.raises(StudyError, match=key.replace(".", r"\.")):
        read_study(path)


def test_a_focus_without_a_waist_is_refused(tmp_path):
    from beyondmf.study import StudyError
    from beyondmf.sweep import read_study

    path = tmp_path / "bad.toml"
    path.write_text(DOPPLER_STUDY.replace("beam_waist = 4.0", "beam_focus = [0, 0, 1]"))
    with pytest.raises(StudyError, match="beam_focus: give drive.beam_waist"):
        read_study(path)


# ---- spectra as one solve ----

def _scan_cloud():
    pos = bm.geometry.gaussian_cloud(6, 0.4, seed=1, min_distance=0.15)
    return bm.Model(pos, rabi=0.8, beam=GaussianBeam(1.5), detuning=np.linspace(-0.3, 0.3, 6))


@pytest.mark.parametrize("level", ["meanfield", "cumulant2"])
def test_a_batched_drive_scan_equals_one_solve_per_drive(level):
    """drive_scan integrates every detuning as one system (common practice: a block-diagonal system
    solved together gives each block's solution within the shared error control)."""
    m = _scan_cloud()
    dets = np.array([-1.0, 0.0, 0.7, 2.0])
    spread = m.detunings - m.detunings.mean()
    if level == "meanfield":  # the steady states (cumulant2's compile of its steady-state search: ~20 s)
        scan = _quiet(bm.drive_scan, m, level, detuning=dets)
        assert list(scan.detuning.values) == list(dets) and scan.attrs["scanned"] == "detuning"
        for k, d in enumerate(dets):
            one = _quiet(bm.steady, m.with_drive(detuning=d + spread), level)
            assert float(scan.emission_rate[k]) == pytest.approx(float(one.emission_rate), rel=1e-9)
            assert complex(scan.transmission[k]) == pytest.approx(complex(one.transmission), abs=1e-10)
    times = np.linspace(0, 3, 7)
    scan = _quiet(bm.drive_scan, m, level, rabi=[0.3, 1.5], times=times)
    assert scan.sizes["rabi"] == 2 and scan.attrs["batched_drives"] == 2
    for k, r in enumerate((0.3, 1.5)):
        one = _quiet(bm.evolve, m.with_drive(rabi=r), level, times)
        np.testing.assert_allclose(scan.excited[k].values, one.excited.values, atol=5e-6)


def test_a_level_that_cannot_batch_runs_one_solve_per_drive():
    m = bm.Model(np.array([[0, 0, 0], [0.2, 0, 0.1]]), rabi=1.0)
    scan = bm.drive_scan(m, "exact", detuning=[-0.5, 0.5])
    for k, d in enumerate((-0.5, 0.5)):
        assert float(scan.emission_rate[k]) == pytest.approx(
            float(bm.steady(m.with_drive(detuning=d), "exact").emission_rate), rel=1e-12)


def test_drive_scan_refuses_two_scans_or_bad_values():
    m = bm.Model(np.zeros((1, 3)), rabi=1.0)
    with pytest.raises(ValueError, match="exactly one of"):
        bm.drive_scan(m, "meanfield", detuning=[0.0], rabi=[1.0])
    with pytest.raises(ValueError, match="finite numbers"):
        bm.drive_scan(m, "meanfield", detuning=[0.0, np.nan])
    with pytest.raises(ValueError, match="non-negative"):
        bm.drive_scan(m, "meanfield", rabi=[-1.0])


def test_a_scan_whose_steady_state_search_fails_names_the_drive():
    """A batch that does not settle is solved member by member, and the member that fails is named."""
    from beyondmf.integrate import SolveError

    m = bm.Model(bm.geometry.gaussian_cloud(8, 0.3, seed=2, min_distance=0.1), rabi=1.0)
    with pytest.raises(SolveError, match=r"at the drive Ω = 1\+0j, Δ = -1.*max_steps"):
        _quiet(bm.drive_scan, m, "meanfield", detuning=[-1.0, 1.0], max_steps=5, solver="Tsit5")


@pytest.mark.parametrize("level", ["jumps", "qsd_product"])
def test_sampling_error_of_the_transmission_matches_the_spread_over_seeds(level):
    """A sampling level's transmission_stderr and transmission_power_stderr are the spread of one run's
    value over independent seeds: with 10 seeds the ratio of the empirical spread to the mean reported
    error lies in [0.5, 1.6] with probability 0.98 (scipy.stats.chi2 with 9 degrees of freedom; the
    seeds are fixed, so the test is deterministic). Quantum jumps are unbiased (Dalibard, Castin,
    Mølmer, PRL 68, 580 (1992)), so their mean power lies within 4 standard errors of the exact |t|²."""
    pos = bm.geometry.gaussian_cloud(3, 0.25, seed=2, min_distance=0.1)
    m = bm.Model(pos, rabi=0.3, detuning=0.2, dipole=(1, 0, 0), laser=(0, 0, 1), beam=GaussianBeam(1.0))
    times = np.linspace(0, 3, 4)
    exact = bm.evolve(m, "exact", times)
    assert "transmission_stderr" not in exact
    runs = [_quiet(bm.evolve, m, level, times, samples=200, seed=seed).isel(time=-1) for seed in range(10)]
    t = np.array([complex(r.transmission) for r in runs])
    power = np.array([float(r.transmission_power) for r in runs])
    spread_t = np.sqrt(np.var(t.real, ddof=1) + np.var(t.imag, ddof=1))
    spread_p = np.std(power, ddof=1)
    se_t = np.mean([float(r.transmission_stderr) for r in runs])
    se_p = np.mean([float(r.transmission_power_stderr) for r in runs])
    assert 0.5 < spread_t / se_t < 1.6
    assert 0.5 < spread_p / se_p < 1.6
    assert runs[0].transmission_power_stderr.attrs["long_name"].startswith("standard error")
    np.testing.assert_allclose([float(r.optical_depth_stderr) for r in runs],
                               [float(r.transmission_power_stderr / r.transmission_power) for r in runs])
    if level == "jumps":
        assert abs(power.mean() - float(exact.transmission_power[-1])) < 4 * se_p / np.sqrt(len(runs))
