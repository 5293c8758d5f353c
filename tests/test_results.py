"""NetCDF round trip with complex values and provenance; atomic writes."""

import numpy as np
import pytest
import xarray as xr

import beyondmf as bm


@pytest.fixture(scope="module")
def dataset():
    pos = bm.geometry.plane_array(2, 2, 0.4)
    model = bm.Model(pos, rabi=(1.0 + 0.5j), detuning=0.3, dipole=(1, 1j, 0))
    return bm.evolve(model, "meanfield", [0, 0.5, 1.0], detectors={"fwd": (0, 0, 1), "side": (1, 0, 0)})


def test_round_trip_keeps_values_and_attributes(dataset, tmp_path):
    path = bm.save(dataset, tmp_path / "sub" / "r.nc")
    back = bm.load(path)
    xr.testing.assert_identical(back, dataset)
    assert back.coherence.dtype == np.complex128
    assert back.attrs["rabi"] == 1.0 + 0.5j
    assert back.attrs["options"]["rtol"] == 1e-6
    for key in ("level", "N", "seed", "beyondmf_version", "jax_version", "diffrax_version"):
        assert key in back.attrs


def test_failed_write_leaves_no_file(dataset, tmp_path, monkeypatch):
    def boom(self, *a, **k):
        raise OSError("disk full")

    monkeypatch.setattr(xr.Dataset, "to_netcdf", boom)
    with pytest.raises(OSError, match="disk full"):
        bm.save(dataset, tmp_path / "r.nc")
    assert list(tmp_path.iterdir()) == []


def test_steady_result_has_no_time_axis():
    ds = bm.steady(bm.Model([[0, 0, 0]], rabi=1.0), "meanfield")
    assert "time" not in ds.dims and ds.excited.dims == ("atom",)
    assert ds.intensity.dims == ("detector",)


def test_load_missing_file_is_clear(tmp_path):
    with pytest.raises(FileNotFoundError, match="no results file"):
        bm.load(tmp_path / "nothing.nc")
