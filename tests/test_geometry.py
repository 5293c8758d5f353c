import numpy as np
import pytest

from beyondmf import geometry


def test_min_distance_is_respected_and_seed_reproduces():
    a = geometry.gaussian_cloud(500, (2, 2, 0.3), seed=4, min_distance=0.1)
    b = geometry.gaussian_cloud(500, (2, 2, 0.3), seed=4, min_distance=0.1)
    np.testing.assert_array_equal(a, b)
    assert geometry.nearest_distance(a)[0] >= 0.1
    for cloud in (geometry.ellipsoid_cloud(300, (1, 1, 2), seed=1, min_distance=0.15),
                  geometry.box_cloud(300, (2, 2, 2), seed=1, min_distance=0.15)):
        assert geometry.nearest_distance(cloud)[0] >= 0.15


def test_ellipsoid_and_box_stay_inside():
    e = geometry.ellipsoid_cloud(2000, (1, 2, 3), seed=0)
    assert np.all(((e / [1, 2, 3]) ** 2).sum(1) <= 1 + 1e-12)
    b = geometry.box_cloud(2000, (1, 2, 3), seed=0)
    assert np.all(np.abs(b) <= np.array([0.5, 1, 1.5]))


def test_impossible_packing_is_a_clear_error():
    with pytest.raises(ValueError, match="do not fit"):
        geometry.box_cloud(1000, 1.0, seed=0, min_distance=0.2)


def test_lattices_have_their_spacing():
    assert geometry.line_array(5, 0.3, axis="z")[:, 2].tolist() == pytest.approx([-0.6, -0.3, 0, 0.3, 0.6])
    p = geometry.plane_array(3, 4, 0.5)
    assert p.shape == (12, 3) and geometry.nearest_distance(p)[0] == pytest.approx(0.5)
    assert geometry.block_array(2, 2, 2, 0.25).shape == (8, 3)
    with pytest.raises(ValueError, match="spacing"):
        geometry.line_array(3, -1.0)


def test_density_of_a_cubic_block_and_a_gaussian_cloud():
    # a cubic lattice of spacing a has n = 1/a³ (common practice); the kNN estimate in the interior
    blk = geometry.block_array(12, 12, 12, 0.5)
    assert geometry.density(blk)["peak"] == pytest.approx(8.0, rel=0.35)
    # Gaussian: mean density seen by an emitter = N / ((4π)^{3/2} σ³) (common practice)
    g = geometry.gaussian_cloud(4000, 1.0, seed=2)
    expected = 4000 / (4 * np.pi) ** 1.5
    assert geometry.density(g, neighbours=20)["mean"] == pytest.approx(expected, rel=0.15)


def test_wrong_number_of_widths_is_explained():
    with pytest.raises(ValueError, match=r"widths must be one length or three"):
        geometry.gaussian_cloud(5, widths=(1, 2), seed=1)
