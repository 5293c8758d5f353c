"""Couplings against the closed forms of R. H. Lehmberg, Phys. Rev. A 2, 883 (1970) and Z. Ficek,
R. Tanaś, Phys. Rep. 372, 369 (2002), in the units of conventions.md."""

import numpy as np
import pytest
from scipy.special import roots_legendre

from beyondmf import Model, couplings
from beyondmf.geometry import ellipsoid_cloud


def lehmberg(dist, cos2):
    """Closed form for a real dipole, cos²θ = (ê·r̂)² (conventions.md, from Lehmberg 1970)."""
    xi = 2 * np.pi * dist
    g = 1.5 * ((1 - cos2) * np.sin(xi) / xi + (1 - 3 * cos2) * (np.cos(xi) / xi**2 - np.sin(xi) / xi**3))
    j = 0.75 * (-(1 - cos2) * np.cos(xi) / xi + (1 - 3 * cos2) * (np.sin(xi) / xi**2 + np.cos(xi) / xi**3))
    return j, g


@pytest.mark.parametrize(
    "dist, along, gamma12, j12",
    [
        # values listed in references.md (derived from Lehmberg's closed form)
        (0.5, False, -3 / (2 * np.pi**2), 0.214544),
        (0.1, False, 0.922697, 2.597094),
        (0.1, True, 0.961074, -7.125574),
    ],
)
def test_two_emitters_match_lehmberg(dist, along, gamma12, j12):
    r = [[0, 0, 0], [dist, 0, 0]] if along else [[0, 0, 0], [0, 0, dist]]
    J, G = couplings(r, dipole=(1, 0, 0))
    jc, gc = lehmberg(dist, 1.0 if along else 0.0)
    assert G[0, 1] == pytest.approx(gc, rel=1e-12)
    assert J[0, 1] == pytest.approx(jc, rel=1e-12)
    assert G[0, 1] == pytest.approx(gamma12, abs=1e-6)
    assert J[0, 1] == pytest.approx(j12, abs=1e-6)
    assert np.diag(G).tolist() == [1, 1] and np.diag(J).tolist() == [0, 0]


def test_collective_decay_tends_to_one_at_contact():
    # Γ12 → 1 as |r| → 0 for every orientation (Lehmberg 1970)
    for direction in ([1, 0, 0], [0, 1, 0], [1, 1, 1]):
        r = 1e-3 * np.array(direction) / np.linalg.norm(direction)
        _, G = couplings([[0, 0, 0], r], dipole=(1, 0, 0))
        assert G[0, 1] == pytest.approx(1.0, abs=1e-5)


def test_random_cloud_matches_closed_form_and_is_symmetric(rng):
    pos = rng.normal(size=(40, 3))
    J, G = couplings(pos, dipole=(0, 1, 0))
    r = pos[:, None] - pos[None]
    d = np.linalg.norm(r, axis=-1)
    iu = np.triu_indices(40, 1)
    cos2 = (r[..., 1][iu] / d[iu]) ** 2
    jc, gc = lehmberg(d[iu], cos2)
    np.testing.assert_allclose(G[iu], gc, rtol=1e-10)
    np.testing.assert_allclose(J[iu], jc, rtol=1e-10)
    np.testing.assert_array_equal(J, J.T)
    assert np.linalg.eigvalsh(G)[0] > -1e-10  # Γ positive semi-definite


def far_field_gamma(r, dipole, n_theta=48, n_phi=96):
    """∫ dΩ (3/8π)(ê*·(1 − n̂n̂)·ê) e^{i2πn̂·r}: the definition of collective decay (common practice)."""
    x, w = roots_legendre(n_theta)
    phi = np.arange(n_phi) * 2 * np.pi / n_phi
    ct, ph = np.meshgrid(x, phi, indexing="ij")
    st = np.sqrt(1 - ct**2)
    n = np.stack([st * np.cos(ph), st * np.sin(ph), ct], -1)
    e = np.asarray(dipole, complex) / np.linalg.norm(dipole)
    pol = 1 - np.abs(n @ e) ** 2
    integrand = 3 / (8 * np.pi) * pol * np.exp(2j * np.pi * n @ r)
    return np.sum(integrand * w[:, None]) * 2 * np.pi / n_phi


@pytest.mark.parametrize("dipole", [(1, 0, 0), (1, 1j, 0)])
def test_far_field_integral_returns_collective_decay(dipole, rng):
    pos = rng.uniform(-0.6, 0.6, size=(6, 3))
    _, G = couplings(pos, dipole=dipole)
    for i, j in [(0, 1), (2, 5), (3, 4)]:
        val = far_field_gamma(pos[i] - pos[j], dipole)
        assert val.real == pytest.approx(G[i, j], abs=1e-9)
        assert abs(val.imag) < 1e-9


def test_circular_dipole_gives_real_symmetric_couplings(rng):
    pos = rng.normal(size=(10, 3))
    J, G = couplings(pos, dipole=(1, 1j, 0))
    assert J.dtype == np.float64 and np.allclose(J, J.T)
    # ê = (x̂ + iŷ)/√2 along z-separated pair: |ê·r̂|² = 0, same as a transverse linear dipole
    Jc, Gc = couplings([[0, 0, 0], [0, 0, 0.3]], dipole=(1, 1j, 0))
    Jl, Gl = couplings([[0, 0, 0], [0, 0, 0.3]], dipole=(1, 0, 0))
    assert Jc[0, 1] == pytest.approx(Jl[0, 1]) and Gc[0, 1] == pytest.approx(Gl[0, 1])


def test_scalar_and_all_to_all_kinds():
    J, G = couplings([[0, 0, 0], [0, 0, 0.25]], kind="scalar")
    xi = 2 * np.pi * 0.25
    assert G[0, 1] == pytest.approx(np.sin(xi) / xi) and J[0, 1] == pytest.approx(-0.5 * np.cos(xi) / xi)
    J, G = couplings(np.zeros((3, 3)), kind="all-to-all")
    assert np.all(G == 1) and np.all(J == 0)


def test_unknown_kind_is_refused():
    with pytest.raises(ValueError, match="unknown coupling kind"):
        couplings([[0, 0, 0]], kind="tensor")


def test_coupling_norm_is_the_spectral_norm_and_at_most_the_gershgorin_bound():
    # The spectral norm of the off-diagonal iJ + ½Γ, checked against numpy's dense SVD norm on both code
    # paths (LAPACK below N = 512, ARPACK above); a matrix norm never exceeds its largest absolute row
    # sum (Gershgorin; Horn & Johnson, Matrix Analysis, 2nd ed., §5.6 — from memory), which is `stiffness()`.
    for n in (40, 600):
        m = Model(positions=ellipsoid_cloud(n, (3 * n / (4 * np.pi)) ** (1 / 3), seed=2, min_distance=0.1))
        a = 1j * np.asarray(m.J) + 0.5 * np.asarray(m.Gamma)
        a -= np.diag(np.diag(a))
        ref = np.linalg.norm(a, 2)
        assert abs(m.coupling_norm() - ref) < 1e-7 * ref
        assert m.coupling_norm() <= m.stiffness()
    assert Model(positions=np.zeros((1, 3))).coupling_norm() == 0.0
