"""Two-time photon statistics (`beyondmf.correlations`) against published results and against an
independent dense numpy/scipy construction of the quantum regression theorem written here."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.linalg

import beyondmf as bm
from beyondmf import Model
from beyondmf.correlations import correlations
from beyondmf.levels import Probes
from tests.helpers_ops import SM, dense_liouvillian, product_density, site_op

TIGHT = {"rtol": 1e-10, "atol": 1e-12}
# One delay-grid length for the one-emitter tests, so that they share one compiled regression
ONE_DELAYS = 61


def one_emitter(rabi, detuning=0.0):
    return Model(positions=np.zeros((1, 3)), rabi=rabi, detuning=detuning)


def cluster(n=2, **kw):
    pos = np.array([[0, 0, 0], [0.21, 0, 0], [0.05, 0.27, 0.1], [0.3, 0.2, -0.15]])[:n]
    return Model(positions=pos, **kw)


@pytest.mark.parametrize("rabi", [0.6, 1.0, 3.0])
def test_one_emitter_g2_of_delay_kimble_mandel(rabi):
    """Resonance fluorescence of one emitter: g2(τ) = 1 − e^{−3τ/4}[cos Ω′τ + (3/4Ω′) sin Ω′τ],
    Ω′ = √(Ω² − 1/16) (H. J. Kimble, L. Mandel, Phys. Rev. A 13, 2123 (1976); H. J. Carmichael,
    D. F. Walls, J. Phys. B 9, 1199 (1976)); Ω′ imaginary below Ω = 1/4 (the formula continues)."""
    tau = np.linspace(0, 12, ONE_DELAYS)
    ds = correlations(one_emitter(rabi), "exact", tau, **TIGHT)
    op = np.sqrt(complex(rabi**2 - 1 / 16))
    ref = (1 - np.exp(-0.75 * tau) * (np.cos(op * tau) + 0.75 / op * np.sin(op * tau))).real
    assert np.max(np.abs(ds.g2.values[0] - ref)) < 1e-8
    assert np.max(np.abs(ds.g2_total.values - ref)) < 1e-8
    assert abs(ds.g1.values[0, 0] - 1) < 1e-12


@pytest.mark.parametrize("rabi,detuning", [(0.5, 0.0), (1.0, 0.7), (3.0, -1.2)])
def test_one_emitter_elastic_fraction(rabi, detuning):
    """Elastic fraction of resonance fluorescence 1/(1 + s), s = 2Ω²/(1 + 4Δ²) (D. A. Steck, Quantum and
    Atom Optics, resonance fluorescence); g1(τ → ∞) tends to it (the elastic part of G1)."""
    s = 2 * rabi**2 / (1 + 4 * detuning**2)
    ds = correlations(one_emitter(rabi, detuning), "exact", np.linspace(0, 48, ONE_DELAYS), **TIGHT)
    assert ds.elastic_fraction.values[0] == pytest.approx(1 / (1 + s), abs=1e-12)
    assert abs(ds.g1.values[0, -1]) == pytest.approx(1 / (1 + s), abs=1e-8)


def _fwhm(x, y):
    """Full width at half maximum by linear interpolation of the two crossings (common practice)."""
    i = int(np.argmax(y))
    half = y[i] / 2
    left = np.flatnonzero(y[:i] < half)[-1]
    right = i + np.flatnonzero(y[i:] < half)[0]
    xl = np.interp(half, [y[left], y[left + 1]], [x[left], x[left + 1]])
    xr = np.interp(half, [y[right], y[right - 1]], [x[right], x[right - 1]])
    return xr - xl


def test_mollow_triplet():
    """Strongly driven emitter (Ω = 20 Γ0): sidebands at ±Ω, peak heights 1:3:1, full widths 3/2, 1, 3/2
    of Γ0 (B. R. Mollow, Phys. Rev. 188, 1969 (1969)). Measured on a 0.005 Γ0 grid around each peak:
    the position of the maximum, its height, and the width at half of it. The deviations at Ω = 20
    (sideband maximum at 19.975, heights 0.9994:3:0.9994) are Mollow's O(Γ0/Ω) corrections."""
    om = 20.0
    windows = [np.linspace(c - 3, c + 3, 1201) for c in (-om, 0.0, om)]
    ds = correlations(one_emitter(om), "exact", None, frequencies=np.concatenate(windows))
    s = ds.spectrum.values[0].reshape(3, -1)
    peaks = [(x[np.argmax(y)], y.max(), _fwhm(x, y)) for x, y in zip(windows, s, strict=True)]
    (xl, hl, wl), (xc, hc, wc), (xr, hr, wr) = peaks
    assert xc == pytest.approx(0.0, abs=1e-9)
    assert xr == pytest.approx(om, rel=2e-3) and xl == pytest.approx(-om, rel=2e-3)
    assert 3 * hl / hc == pytest.approx(1.0, abs=2e-3) and 3 * hr / hc == pytest.approx(1.0, abs=2e-3)
    assert wc == pytest.approx(1.0, abs=0.01)
    assert wl == pytest.approx(1.5, abs=0.01) and wr == pytest.approx(1.5, abs=0.01)


def _tan_integral(f, scale=3.0, points=6001):
    """∫ f(ν) dν over the real line with ν = scale·tan θ (trapezoid in θ; exact for the 1/ν² tails of
    Lorentzians, common practice)."""
    th = np.linspace(-np.pi / 2, np.pi / 2, points)[1:-1]
    nu = scale * np.tan(th)
    vals = f(nu) * scale / np.cos(th) ** 2
    return np.trapezoid(vals, th), nu


def test_spectrum_sum_rule():
    """∫ spectrum dν + intensity_coherent = intensity (the equal-time intensity of the data contract,
    docs/conventions.md), for a detuned, driven pair and two detectors."""
    m = cluster(2, rabi=1.3, detuning=0.4)
    det = {"forward": (0, 0, 1), "side": (0, 1, 0)}
    th = np.linspace(-np.pi / 2, np.pi / 2, 6001)[1:-1]
    nu = 3.0 * np.tan(th)
    ds = correlations(m, "exact", None, detectors=det, frequencies=nu)
    st = bm.steady(m, "exact", detectors=det)
    for d in det:
        integral = np.trapezoid(ds.spectrum.sel(detector=d).values * 3.0 / np.cos(th) ** 2, th)
        total = integral + float(ds.intensity_coherent.sel(detector=d))
        assert total == pytest.approx(float(st.intensity.sel(detector=d)), rel=1e-6)
        assert float(ds.intensity.sel(detector=d)) == pytest.approx(float(st.intensity.sel(detector=d)),
                                                                      rel=1e-10)


def _reference(model, detectors, tau, freqs, at=None, initial=None):
    """Independent regression theorem: dense Liouvillian (row-major vec), scipy expm and solve."""
    n = model.n
    lv = dense_liouvillian(model)
    d = 2**n
    if at is None:
        _, _, vh = np.linalg.svd(lv)
        rho = vh[-1].conj().reshape(d, d)
        rho = rho / np.trace(rho)
    else:
        rho = (scipy.linalg.expm(lv * at) @ product_density(initial).reshape(-1)).reshape(d, d)
    sm = [site_op(SM, j, n) for j in range(n)]
    w = Probes.build(model, detectors).weights
    out = {"g1": [], "g2": [], "spec": []}
    props = [scipy.linalg.expm(lv * t) for t in tau]
    for wd in w:
        e = sum(wd[j] * sm[j] for j in range(n))
        ed = e.conj().T
        x1, x2 = rho @ ed, e @ rho @ ed
        f2 = np.trace(ed @ e @ rho).real
        f2t = [np.trace(ed @ e @ (p @ rho.reshape(-1)).reshape(d, d)).real for p in props]
        g1 = [np.trace(e @ (p @ x1.reshape(-1)).reshape(d, d)) for p in props]
        g2 = [np.trace(ed @ e @ (p @ x2.reshape(-1)).reshape(d, d)).real for p in props]
        out["g1"].append(np.array(g1) / np.sqrt(f2 * np.array(f2t)))
        out["g2"].append(np.array(g2) / (f2 * np.array(f2t)))
        if freqs is not None:
            # (L − |ρ⟩⟨1|) is regular and equals L on trace-zero vectors (common practice)
            lp = lv - np.outer(rho.reshape(-1), np.eye(d).reshape(-1))
            b = (x1 - np.trace(x1) * rho).reshape(-1)
            u = e.T.reshape(-1)
            out["spec"].append([(-u @ np.linalg.solve(lp + 1j * f * np.eye(d * d), b)).real / np.pi
                                for f in freqs])
    return out


def test_pair_against_dense_regression():
    """g1, g2 at every delay and the spectrum of a driven, interacting pair, against the dense
    construction above (two detectors, one along the pair's axis)."""
    m = cluster(2, rabi=1.1, detuning=-0.3)
    det = {"forward": (0, 0, 1), "axis": (1, 0, 0)}
    tau = np.linspace(0, 6, 13)
    freqs = np.linspace(-4, 4, 9)
    ds = correlations(m, "exact", tau, detectors=det, frequencies=freqs, **TIGHT)
    ref = _reference(m, det, tau, freqs)
    pref = bm.observables.detector_prefactor(m, Probes.build(m, det))
    assert np.max(np.abs(ds.g1.values - np.array(ref["g1"]))) < 1e-8
    assert np.max(np.abs(ds.g2.values - np.array(ref["g2"]))) < 1e-8
    spec = np.array(ref["spec"]) * pref[:, None]
    assert np.max(np.abs(ds.spectrum.values - spec)) < 1e-9 * np.max(spec)


@pytest.mark.slow
def test_at_reference_time_against_dense():
    """Two-time functions at t = at of the dynamics from a product state, normalised by the intensities
    at t and t + τ, against the dense construction (the expm of the Liouvillian from the initial state)."""
    m = cluster(2, rabi=1.5, detuning=0.2)
    bloch = np.array([[0.0, 0.0, -1.0], [0.6, 0.0, 0.8]])
    tau = np.linspace(0, 3, 7)
    ds = correlations(m, "exact", tau, at=1.3, initial=bloch, **TIGHT)
    ref = _reference(m, {"forward": (0, 0, 1)}, tau, None, at=1.3, initial=bloch)
    assert np.max(np.abs(ds.g1.values - np.array(ref["g1"]))) < 1e-8
    assert np.max(np.abs(ds.g2.values - np.array(ref["g2"]))) < 1e-8
    ev = bm.evolve(m, "exact", np.concatenate([[0.0], 1.3 + tau]), initial=bloch, **TIGHT)
    assert np.allclose(ds.intensity_delayed.values[0], ev.intensity.values[1:, 0], rtol=1e-8)


def test_zero_and_long_delay_limits():
    """g2(0) equals the equal-time g2 of `steady` (the data contract); g1(0) = 1; in a steady state
    g2(τ → ∞) → 1 and g1(τ → ∞) → elastic_fraction (the correlations die out: common practice)."""
    m = cluster(3, rabi=1.0, detuning=0.5)
    det = {"forward": (0, 0, 1), "side": (0, 1, 0)}
    ds = correlations(m, "exact", np.array([0.0, 60.0]), detectors=det, **TIGHT)
    st = bm.steady(m, "exact", detectors=det)
    assert np.allclose(ds.g2.values[:, 0], st.g2.values, rtol=1e-10)
    assert float(ds.g2_total[0]) == pytest.approx(float(st.g2_total), rel=1e-10)
    assert np.allclose(ds.g1.values[:, 0], 1.0, atol=1e-12)
    assert np.allclose(ds.g2.values[:, -1], 1.0, atol=1e-6)
    assert float(ds.g2_total[-1]) == pytest.approx(1.0, abs=1e-6)
    assert np.allclose(np.abs(ds.g1.values[:, -1]), ds.elastic_fraction.values, atol=1e-6)
    assert np.allclose(ds.intensity_coherent.values, st.intensity_coherent.values, rtol=1e-10)


def test_save_load_round_trip(tmp_path):
    """Complex g1, the spectrum and the provenance survive beyondmf.save/load."""
    ds = correlations(one_emitter(1.0), "exact", np.linspace(0, 2, 5), frequencies=np.linspace(-2, 2, 5))
    back = bm.load(bm.save(ds, tmp_path / "c.nc"))
    assert back.g1.dtype == complex
    for name in ("g1", "g2", "g2_total", "spectrum", "elastic_fraction"):
        np.testing.assert_array_equal(back[name].values, ds[name].values)
        assert back[name].attrs["units"] == ds[name].attrs["units"]
    assert back.attrs["calculation"] == "correlations" and back.attrs["level"] == "exact"
    assert back.attrs["options"] == ds.attrs["options"]
    assert back.attrs["beyondmf_commit"] == ds.attrs["beyondmf_commit"]


def test_meanfield_gives_the_elastic_line_and_refuses_the_rest():
    """Mean field: the coherent field of its steady state (the same as `steady`), and refusals that name
    the levels with the inelastic part."""
    m = cluster(3, rabi=0.8)
    ds = correlations(m, "meanfield", None)
    st = bm.steady(m, "meanfield")
    assert np.allclose(ds.intensity_coherent.values, st.intensity_coherent.values, rtol=1e-10)
    assert np.allclose(ds.elastic_fraction.values, (st.intensity_coherent / st.intensity).values, rtol=1e-10)
    for kw in ({"delays": np.linspace(0, 1, 3)}, {"delays": None, "frequencies": np.linspace(-1, 1, 3)}):
        with pytest.raises(ValueError, match="exact, dicke .* and cumulant2"):
            correlations(m, "meanfield", **kw)


@pytest.mark.parametrize("level,reason", [("twa", "symmetrically ordered"), ("qsd_product", "product states"),
                                          ("jumps", "Dalibard")])
def test_levels_without_two_time_functions_are_refused(level, reason):
    with pytest.raises(ValueError, match=reason):
        correlations(one_emitter(1.0), level, np.linspace(0, 1, 3))


@pytest.mark.parametrize("kw,match", [
    ({"delays": [0.0, 2.0, 1.0]}, "strictly increasing"),
    ({"delays": [-1.0, 0.0]}, "≥ 0"),
    ({"delays": [0.0, np.nan]}, "finite"),
    ({"delays": "0..5"}, "1-D sequence"),
    ({"delays": [[0.0, 1.0]]}, "1-D sequence"),
    ({"delays": [0.0], "frequencies": [0.0, np.inf]}, "finite"),
    ({"delays": [0.0], "frequencies": [1.0, 0.0]}, "strictly increasing"),
    ({"delays": [0.0], "at": -1.0}, "at must be"),
    ({"delays": [0.0], "at": 1.0, "frequencies": [0.0]}, "need the steady state"),
    ({"delays": [0.0], "initial": "excited"}, "only with at"),
    ({"delays": [0.0], "rtol": -1}, "rtol"),
    ({"delays": [0.0], "samples": 10}, "no option 'samples'"),
    ({"delays": [0.0], "spectrum_tol": 2.0}, "spectrum_tol"),
])
def test_bad_input(kw, match):
    with pytest.raises(ValueError, match=match):
        correlations(one_emitter(1.0), "exact", **kw)


def test_bad_level_and_model():
    with pytest.raises(ValueError, match="unknown level"):
        correlations(one_emitter(1.0), "nope", [0.0])
    with pytest.raises(TypeError, match="beyondmf.Model"):
        correlations("model", "exact", [0.0])
    pulsed = Model(positions=np.zeros((1, 3)), rabi=1.0, envelope=[(0.0, 1.0)])
    with pytest.raises(ValueError, match="constant drive"):
        correlations(pulsed, "exact", [0.0])


def symmetric(n, **kw):
    """All-to-all emitters in one plane perpendicular to the laser (uniform drive and forward phases)."""
    pos = np.arange(n)[:, None] * np.array([0.3, 0.1, 0.0])
    return Model(positions=pos, coupling="all-to-all", **kw)


@pytest.mark.slow
def test_dicke_equals_exact_all_to_all_four():
    """Level dicke against level exact on the same all-to-all N = 4 model: at t = 2 of the dynamics from
    the ground state, and in the steady state of the symmetric sector (exact's stationary space is
    degenerate there, so its reference is the state at t = 60 from the ground state, settled to 1e-9)."""
    m = symmetric(4, rabi=1.3, detuning=0.4)
    tau = np.linspace(0, 8, 17)
    for at in (2.0, None):
        a = correlations(m, "dicke", tau, at=at, **TIGHT)
        b = correlations(m, "exact", tau, at=60.0 if at is None else at, initial="ground" if at else None,
                         **TIGHT)
        for name in ("g1", "g2", "g2_total", "elastic_fraction", "intensity"):
            assert np.max(np.abs(a[name].values - b[name].values)) < 1e-9, name


@pytest.mark.slow
def test_dicke_spectrum_one_emitter_and_sum_rule():
    """dicke at N = 1 is one emitter: its spectrum equals exact's; at N = 4 the sum rule holds
    (∫ spectrum dν + intensity_coherent = intensity, the data contract)."""
    freqs = np.linspace(-4, 4, 17)
    one = Model(positions=np.zeros((1, 3)), coupling="all-to-all", rabi=1.7, detuning=0.3)
    a = correlations(one, "dicke", None, frequencies=freqs)
    b = correlations(one, "exact", None, frequencies=freqs)
    assert np.max(np.abs(a.spectrum.values - b.spectrum.values)) < 1e-10 * np.max(b.spectrum.values)
    m = symmetric(4, rabi=1.3, detuning=0.4)
    th = np.linspace(-np.pi / 2, np.pi / 2, 6001)[1:-1]
    ds = correlations(m, "dicke", None, frequencies=3.0 * np.tan(th))
    integral = np.trapezoid(ds.spectrum.values[0] * 3.0 / np.cos(th) ** 2, th)
    assert integral + float(ds.intensity_coherent[0]) == pytest.approx(float(ds.intensity[0]), rel=1e-6)


def test_dicke_refuses_detectors_off_the_symmetric_space():
    with pytest.raises(ValueError, match="same phase"):
        correlations(symmetric(3, rabi=1.0), "dicke", [0.0], detectors={"side": (1, 0, 0)})
    with pytest.raises(ValueError, match="permutation-symmetric"):
        correlations(cluster(2, rabi=1.0), "dicke", [0.0])


def test_cumulant2_equals_exact_for_two_emitters():
    """Two emitters have no three-emitter moments: cumulant2 is exact for N = 2 (docs/cumulant2.md), and
    so is its regression (the tangent equations from the fixed-factor moments, docs/correlations.md):
    g1, g2, g2_total at every delay and the spectrum of the steady state, against level exact."""
    m = Model(positions=np.array([[0, 0, 0], [0.21, 0.05, 0.1]]), rabi=1.1, detuning=-0.3)
    det = {"forward": (0, 0, 1), "side": (0, 1, 0)}
    tau, freqs = np.linspace(0, 6, 13), np.linspace(-4, 4, 9)
    a = correlations(m, "cumulant2", tau, detectors=det, frequencies=freqs, **TIGHT)
    b = correlations(m, "exact", tau, detectors=det, frequencies=freqs, **TIGHT)
    for name in ("g1", "g2", "g2_total", "intensity_delayed"):
        assert np.max(np.abs(a[name].values - b[name].values)) < 1e-9, name
    assert np.allclose(a.elastic_fraction.values, b.elastic_fraction.values, rtol=1e-10)
    assert np.max(np.abs(a.spectrum.values - b.spectrum.values)) < 1e-9 * np.max(b.spectrum.values)


@pytest.mark.slow
def test_cumulant2_equals_exact_for_two_emitters_at_a_reference_time():
    """The same at t = 1.5 of the dynamics from the ground state (state and tangents integrated
    together)."""
    m = Model(positions=np.array([[0, 0, 0], [0.21, 0.05, 0.1]]), rabi=1.1, detuning=-0.3)
    det = {"forward": (0, 0, 1), "side": (0, 1, 0)}
    tau = np.linspace(0, 6, 13)
    a = correlations(m, "cumulant2", tau, detectors=det, at=1.5, **TIGHT)
    b = correlations(m, "exact", tau, detectors=det, at=1.5, **TIGHT)
    for name in ("g1", "g2", "g2_total", "intensity_delayed"):
        assert np.max(np.abs(a[name].values - b[name].values)) < 1e-9, name


_STUDY = """
title = "one emitter"
[geometry]
kind = "points"
positions = [[0, 0, 0]]
[drive]
rabi = 1.0
[run]
calculation = "correlations"
delay_end = 6.0
delay_points = 13
frequency_range = [-4.0, 4.0]
frequency_points = 9
[levels.exact]
[levels.meanfield]
"""


def test_study_file_calculation_and_figure(tmp_path):
    """calculation = 'correlations' in a study file: exact gives Kimble–Mandel's g2(τ) (as above),
    meanfield its elastic line (1/(1 + s) for one emitter, where mean field is exact); the figure."""
    from beyondmf.figures import plot_correlations
    from beyondmf.study import parse_study, run_study

    ds = run_study(parse_study(_STUDY), keep_going=True)
    assert ds.attrs["failures"] == []
    tau = ds.delay.values
    op = np.sqrt(1 - 1 / 16)
    ref = 1 - np.exp(-0.75 * tau) * (np.cos(op * tau) + 0.75 / op * np.sin(op * tau))
    assert np.max(np.abs(ds.g2.sel(level="exact", detector="forward").values - ref)) < 1e-5
    assert np.allclose(ds.elastic_fraction.sel(level=["exact", "meanfield"]).values, 1 / 3, atol=1e-7)
    assert np.all(np.isnan(ds.g2.sel(level="meanfield").values))
    back = bm.load(bm.save(ds, tmp_path / "r.nc"))
    np.testing.assert_array_equal(back.g1.values, ds.g1.values)
    png = plot_correlations(ds, tmp_path / "c.png")
    assert png.stat().st_size > 10_000


@pytest.mark.parametrize("extra,match", [
    ("t_end = 3.0\n", "run.t_end: not used"),
    ("frequency_range = [1.0, -1.0]\n", "run.frequency_range"),
    ("delay_end = -1.0\n", "run.delay_end"),
])
def test_study_file_refusals(extra, match):
    from beyondmf.study import StudyError, parse_study

    text = _STUDY.replace('calculation = "correlations"\n', 'calculation = "correlations"\n' + extra)
    if "frequency_range = [1.0" in extra:
        text = text.replace("frequency_range = [-4.0, 4.0]\n", "")
    if "delay_end = -1" in extra:
        text = text.replace("delay_end = 6.0\n", "")
    with pytest.raises(StudyError, match=match):
        parse_study(text)
    with pytest.raises(StudyError, match="compare: calculation = 'correlations' gives curves"):
        parse_study(_STUDY + '[compare]\nbaseline = "exact"\n')


_SWEEP = """
title = "a pair over the drive"
[geometry]
kind = "points"
positions = [[0, 0, 0], [0.3, 0, 0.1]]
[drive]
rabi = 1.0
detuning = 0.5
[run]
calculation = "correlations"
delay_end = 4.0
delay_points = 9
frequency_range = [-3.0, 3.0]
frequency_points = 5
[detectors]
forward = [0, 0, 1]
side = {angle = 90, azimuth = 90}
[levels.exact]
[levels.meanfield]
[sweep.grid]
"drive.rabi" = [0.5, 2.0]
"""


def test_a_sweep_of_correlations_equals_the_calls_it_stands_for(tmp_path):
    """[sweep] with calculation = 'correlations': every grid point and level equals `correlations` called
    on that model (the data contract: one result whatever the route), a second run recomputes no task, and
    the figures are one panel per grid point."""
    from beyondmf.figures import plot_sweep
    from beyondmf.sweep import read_study, run_sweep

    path = tmp_path / "s.toml"
    path.write_text(_SWEEP)
    study = read_study(path)
    ds = run_sweep(study, tmp_path / "out", progress=False)
    assert ds.attrs["calculation"] == "correlations" and ds.attrs["failures"] == []
    assert dict(ds.g2.sizes) == {"rabi": 2, "level": 2, "realization": 1, "detector": 2, "delay": 9}
    pos = np.array([[0, 0, 0], [0.3, 0, 0.1]])
    dets = {"forward": [0, 0, 1], "side": [0, 1, 0]}
    for rabi in (0.5, 2.0):
        m = bm.Model(pos, rabi=rabi, detuning=0.5)
        ref = correlations(m, "exact", np.linspace(0, 4, 9), detectors=dets,
                           frequencies=np.linspace(-3, 3, 5))
        got = ds.sel(rabi=rabi, level="exact", realization=0)
        for name in ("g1", "g2", "g2_total", "spectrum", "intensity", "elastic_fraction", "emission_rate"):
            np.testing.assert_allclose(got[name].values, ref[name].values, rtol=1e-9, atol=1e-14,
                                       err_msg=name)
        elastic = correlations(m, "meanfield", None, detectors=dets)
        mf = ds.sel(rabi=rabi, level="meanfield", realization=0)
        np.testing.assert_allclose(mf.elastic_fraction.values, elastic.elastic_fraction.values, rtol=1e-12)
        assert np.all(np.isnan(mf.g2.values)) and np.all(np.isnan(mf.spectrum.values))
    back = bm.load(tmp_path / "out" / "results.nc")
    np.testing.assert_array_equal(back.g1.values, ds.g1.values)
    starts = []
    run_sweep(study, tmp_path / "out", progress=False,
              on_start=lambda todo, total: starts.append((todo, total)))
    assert starts == [(0, 4)]
    pngs = plot_sweep(ds, tmp_path / "fig")
    assert [p.name for p in pngs] == ["correlations_g2.png", "correlations_spectrum.png"]
    assert all(p.stat().st_size > 10_000 for p in pngs)


def test_a_sweep_of_correlations_refuses_levels_without_them():
    """A sampled level in a correlations sweep is refused when the study is read, naming it, instead of
    becoming one failed task per grid point."""
    from beyondmf.study import StudyError, parse_study

    with pytest.raises(StudyError, match="levels.twa: has no two-time correlations"):
        parse_study(_SWEEP.replace("[levels.meanfield]", "[levels.twa]"))
    with pytest.raises(StudyError, match="sweep.keep: 'last_time'.*correlations study has no time axis"):
        parse_study(_SWEEP.replace("[sweep.grid]", '[sweep]\nkeep = "last_time"\n[sweep.grid]'))
