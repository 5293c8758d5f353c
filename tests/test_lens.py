"""Power collected by a lens (a cone of given numerical aperture), against the dipole radiation pattern
and against the total emission rate over the whole sphere."""

from __future__ import annotations

import math
import re
import warnings

import numpy as np
import pytest

import beyondmf as bm
from beyondmf.lens import cone_nodes


def _quiet(fn, *args, **kw):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return fn(*args, **kw)


def test_cone_weights_add_up_to_its_solid_angle():
    """Solid angle of a cone of half angle α: 2π(1 − cos α) (geometry, common practice)."""
    for alpha in (0.1, 0.7, math.pi / 2, 2.5, math.pi):
        dirs, w = cone_nodes((0.3, -0.2, 0.9), alpha, diameter=4.0)
        assert np.allclose(np.linalg.norm(dirs, axis=1), 1)
        assert w.sum() == pytest.approx(2 * np.pi * (1 - np.cos(alpha)), rel=1e-12)
        axis = np.array([0.3, -0.2, 0.9]) / np.linalg.norm([0.3, -0.2, 0.9])
        assert np.min(dirs @ axis) >= np.cos(alpha) - 1e-12


@pytest.mark.parametrize("na", [0.2, 0.5, 0.9, 1.0])
def test_one_emitter_collects_the_dipole_pattern(na):
    """Dipole pattern (3/8π)(1 − |ê·n̂|²) integrated over a cone (Jackson, Classical Electrodynamics, §9.2;
    the integrals worked out here): about an axis ⟂ ê the fraction is (3/8)(4/3 − c − c³/3), about ê it is
    (3/4)(2/3 − c + c³/3), c = cos α; both ½ for a hemisphere."""
    m = bm.Model(np.zeros((1, 3)), rabi=0.4, detuning=0.2, dipole=(1, 0, 0), laser=(0, 0, 1))
    ds = bm.steady(m, "exact", lenses={"across": {"toward": (0, 0, 1), "na": na},
                                       "along": {"toward": (1, 0, 0), "na": na}})
    c = math.cos(math.asin(na))
    rho = float(ds.excited[0])
    across, along = (float(ds.lens_power.sel(lens=k)) / rho for k in ("across", "along"))
    assert across == pytest.approx(3 / 8 * (4 / 3 - c - c**3 / 3), rel=1e-10)
    assert along == pytest.approx(3 / 4 * (2 / 3 - c + c**3 / 3), rel=1e-10)
    # one emitter: coherent part |⟨σ⁻⟩|², incoherent part ⟨σ⁺σ⁻⟩ − |⟨σ⁻⟩|² (Mollow), in the same proportion
    coh = abs(complex(ds.coherence[0])) ** 2
    np.testing.assert_allclose(ds.lens_power_coherent / ds.lens_power, coh / rho, rtol=1e-10)
    assert float(ds.lens_na.sel(lens="across")) == pytest.approx(na)


@pytest.mark.parametrize("level", ["exact", "cumulant2", "meanfield"])
def test_the_whole_sphere_collects_the_emission_rate(level):
    """∫ (3/8π)(1 − |ê·n̂|²) e^{i2π n̂·(r_i − r_j)} dΩ = Γ_ij (the free-space collective decay, conventions):
    the whole sphere's power is Σ Γ_ij ⟨σ_i⁺σ_j⁻⟩, the emission rate of the same level, in a dense driven
    cluster with its own detunings."""
    rng = np.random.default_rng(4)
    pos = rng.uniform(-0.6, 0.6, (5, 3))
    m = bm.Model(pos, rabi=1.2, detuning=[0.5, -0.3, 0.1, 0.8, 0.0])
    ds = _quiet(bm.steady, m, level, lenses={"sphere": {"angle": 0, "half_angle": 180}})
    # the quadrature's measured accuracy (beyondmf.lens.node_counts)
    np.testing.assert_allclose(float(ds.lens_power[0]), float(ds.emission_rate), rtol=1e-6)
    if level == "meanfield":  # coherent part: Σ Γ_ij ⟨σ_i⁺⟩⟨σ_j⁻⟩ (the classical dipoles' power)
        beta = ds.coherence.values
        np.testing.assert_allclose(float(ds.lens_power_coherent[0]), np.real(beta.conj() @ m.Gamma @ beta),
                                   rtol=1e-6)


def test_a_large_cloud_over_the_whole_sphere_and_two_halves():
    """A 9 λ0 wide Gaussian cloud of 80 emitters at mean field: the sphere gives the emission rate, and two
    opposite hemispheres add up to it (common practice: the quadrature must resolve the cloud's phases)."""
    rng = np.random.default_rng(8)
    m = bm.Model(rng.normal(size=(80, 3)) * 1.5, rabi=0.5, detuning=0.3)
    ds = _quiet(bm.steady, m, "meanfield", lenses={
        "sphere": {"angle": 0, "half_angle": 180}, "front": {"angle": 0, "na": 1.0},
        "back": {"angle": 180, "na": 1.0}})
    rate = float(ds.emission_rate)
    np.testing.assert_allclose(float(ds.lens_power.sel(lens="sphere")), rate, rtol=1e-6)
    np.testing.assert_allclose(float(ds.lens_power.sel(lens=["front", "back"]).sum()), rate, rtol=1e-6)
    # forward scattering dominates the coherent light of an extended cloud
    assert float(ds.lens_power_coherent.sel(lens="front")) > float(ds.lens_power_coherent.sel(lens="back"))


def test_dynamics_and_drive_scans_carry_lenses():
    m = bm.Model(np.array([[0, 0, 0], [0.3, 0.1, 0.0]]), rabi=0.6)
    lenses = {"side": {"angle": 90, "na": 0.5}}
    ds = bm.evolve(m, "meanfield", np.linspace(0, 3, 4), lenses=lenses)
    assert ds.lens_power.dims == ("time", "lens") and ds.lens_power.sizes["time"] == 4
    assert float(ds.lens_power[0, 0]) == 0.0 and float(ds.lens_power[-1, 0]) > 0
    scan = bm.drive_scan(m, "meanfield", detuning=[-1.0, 0.0, 1.0], lenses=lenses)
    one = bm.steady(m.with_drive(detuning=1.0), "meanfield", lenses=lenses)
    np.testing.assert_allclose(scan.lens_power.sel(detuning=1.0).values, one.lens_power.values, rtol=1e-7)


def test_a_sampling_level_bounds_the_error_of_the_lens_power():
    m = bm.Model(np.array([[0, 0, 0], [0.4, 0, 0.0]]), rabi=0.8)
    ds = _quiet(bm.steady, m, "twa", lenses={"front": {"angle": 0, "na": 0.6}}, samples=400, seed=3)
    assert "upper bound" in ds.lens_power_stderr.attrs["long_name"]
    assert np.all(ds.lens_power_stderr.values > 0)


@pytest.mark.parametrize("spec, says", [
    ({"angle": 0, "na": 1.5}, "na must be in (0, 1]"),
    ({"angle": 0, "toward": (0, 0, 1), "na": 0.5}, "give its axis once"),
    ({"angle": 0}, "give its cone once"),
    ({"angle": 0, "na": 0.5, "aperture": 2}, "unknown key"),
    ({"toward": (0, 0, 0), "na": 0.5}, "non-zero finite"),
    ({"angle": 200, "na": 0.5}, "0 to 180 degrees"),
    (0.5, "needs a table"),
])
def test_bad_lenses_are_refused_with_what_to_give(spec, says):
    m = bm.Model(np.zeros((1, 3)), rabi=0.1)
    with pytest.raises(ValueError, match=re.escape(says)) as err:
        bm.steady(m, "meanfield", lenses={"l": spec})
    assert str(err.value).startswith("lens 'l'")


# ---- study files and sweeps ----

LENS_SWEEP = """
[geometry]
kind = "ellipsoid"
n = 4
semi_axes = [0.6, 0.6, 0.6]
min_distance = 0.1
[drive]
rabi = 0.5
[run]
calculation = "steady"
[levels.meanfield]
[levels.exact]
[lenses.front]
angle = 0
na = 0.5
[lenses.sphere]
toward = [0, 0, 1]
half_angle = 180
[sweep]
realizations = 2
seed = 5
[sweep.grid]
"drive.rabi" = [0.3, 1.0]
"""


def test_a_sweep_keeps_each_lens_per_grid_point_level_and_realization(tmp_path, capsys):
    from beyondmf import cli

    study = tmp_path / "lens.toml"
    study.write_text(LENS_SWEEP)
    assert cli.main(["run", str(study), "--out", str(tmp_path / "out"), "-q"]) == 0
    import xarray as xr

    with xr.open_dataset(tmp_path / "out" / "results.nc") as ds:
        assert ds.lens_power.dims == ("rabi", "level", "realization", "lens")
        # the whole sphere is the emission rate, task by task (conventions: ∫ I dΩ = P)
        np.testing.assert_allclose(ds.lens_power.sel(lens="sphere"), ds.emission_rate, rtol=1e-6)
        assert list(ds.lens.values) == ["front", "sphere"] and float(ds.lens_na.sel(lens="front")) == 0.5
    assert "tasks:" not in capsys.readouterr().err  # -q: no progress bars either


@pytest.mark.parametrize("table, says", [
    ('[lenses.front]\nangle = 0\nna = 2.0\n', "lenses.front: na must be in (0, 1]"),
    ('[lenses.front]\nangle = 0\n', "lenses.front: give its cone once"),
    ('[lenses]\nfront = 0.5\n', "lenses.front: expected a table"),
])
def test_a_bad_lens_in_a_study_names_its_key(table, says):
    from beyondmf.study import StudyError, parse_study

    base = LENS_SWEEP.split("[lenses.front]")[0]
    with pytest.raises(StudyError, match=re.escape(says)):
        parse_study(base + table)


def test_a_correlations_study_refuses_lenses_instead_of_ignoring_them():
    from beyondmf.study import StudyError, parse_study

    text = LENS_SWEEP.split("[sweep]")[0].replace('calculation = "steady"', 'calculation = "correlations"')
    with pytest.raises(StudyError, match="lenses: calculation = 'correlations' has no lenses"):
        parse_study(text)
