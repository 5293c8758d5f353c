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
    assert "time" not in ds.dims and ds.excited.dims == ("emitter",)
    assert ds.intensity.dims == ("detector",)


def test_load_missing_file_is_clear(tmp_path):
    with pytest.raises(FileNotFoundError, match="no results file"):
        bm.load(tmp_path / "nothing.nc")


def test_written_files_get_the_normal_mode_not_0600(dataset, tmp_path):
    """A new file's mode is 0666 less the umask (as `open` gives), so colleagues can read results."""
    import os

    old = os.umask(0o027)
    try:
        path = bm.save(dataset, tmp_path / "r.nc")
        assert path.stat().st_mode & 0o777 == 0o640
        os.umask(0o022)
        bm.save(dataset, path)  # overwriting goes through a new temporary file as well
        assert path.stat().st_mode & 0o777 == 0o644
    finally:
        os.umask(old)
    assert [p.name for p in tmp_path.iterdir()] == ["r.nc"]  # no temporary file left beside it


def test_load_says_what_it_expected_of_a_file_that_is_not_ours(dataset, tmp_path):
    text = tmp_path / "notes.nc"
    text.write_text("hello, I am not netcdf\n")
    with pytest.raises(ValueError, match=r"notes\.nc is not a readable results file: expected NetCDF-4"):
        bm.load(text)
    whole = bm.save(dataset, tmp_path / "whole.nc")
    cut = tmp_path / "cut.nc"
    cut.write_bytes(whole.read_bytes()[:3000])  # a copy that stopped half-way
    with pytest.raises(ValueError, match=r"cut\.nc is not a readable results file.*truncated"):
        bm.load(cut)
    with pytest.raises(IsADirectoryError, match=r"is a directory; expected a results file"):
        bm.load(tmp_path)


def test_save_refuses_what_it_cannot_write_with_a_clear_error(dataset, tmp_path):
    with pytest.raises(TypeError, match="expected an xarray.Dataset .* got dict"):
        bm.save({"a": 1}, tmp_path / "x.nc")
    (tmp_path / "existing").mkdir()
    with pytest.raises(IsADirectoryError, match=r"existing is a directory; give the path of the file"):
        bm.save(dataset, tmp_path / "existing")
    assert sorted(p.name for p in tmp_path.rglob("*")) == ["existing"]  # nothing half-written
    (tmp_path / "good.nc").write_text("")
    with pytest.raises(NotADirectoryError, match=r"good.nc/x.nc: a part of .*good.nc is a file"):
        bm.save(dataset, tmp_path / "good.nc" / "x.nc")
    with pytest.raises(OSError, match=r"save: cannot write /proc/x.nc \("):  # the target, not the temporary
        bm.save(dataset, "/proc/x.nc")
    # missing parent directories are made (documented)
    assert bm.save(dataset, tmp_path / "new" / "sub" / "x.nc").is_file()


def test_only_clearly_abandoned_temporary_files_are_removed(tmp_path):
    """`remove_stale_parts`: dead writer on this host, or untouched for STALE_AFTER_S; nothing else."""
    import os
    import subprocess
    import sys
    import time

    from beyondmf.results import STALE_AFTER_S, _writer_id, remove_stale_parts

    dead = subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"], capture_output=True,
                          text=True, check=True)
    dead_pid = int(dead.stdout)
    me = _writer_id()
    other = "0123abcd" if me != "0123abcd" else "fedc4321"
    files = {
        "dead_here": f".a.nc.{me}-{dead_pid}-00ff.part",  # its writer is gone: stale at once
        "live_here": f".b.nc.{me}-{os.getpid()}-00ff.part",  # being written by a live process
        "other_host": f".c.nc.{other}-{dead_pid}-00ff.part",  # can't see that pid: wait for the age
        "old_unnamed": ".d.nc.k2j4h_x1.part",  # a name of older versions, long untouched
        "new_unnamed": ".e.nc.k2j4h_x1.part",  # same, but recent
        "old_result": "f.nc",  # not a temporary file, however old
    }
    for name in files.values():
        (tmp_path / name).write_bytes(b"x")
    long_ago = time.time() - STALE_AFTER_S - 60
    for key in ("old_unnamed", "old_result"):
        os.utime(tmp_path / files[key], (long_ago, long_ago))
    # with a name, only temporaries of that file are candidates (DIR may hold other people's files)
    assert [p.name for p in remove_stale_parts(tmp_path, "d.nc")] == [files["old_unnamed"]]
    (tmp_path / files["old_unnamed"]).write_bytes(b"x")
    os.utime(tmp_path / files["old_unnamed"], (long_ago, long_ago))
    assert remove_stale_parts(tmp_path, "results.nc") == []
    removed = {p.name for p in remove_stale_parts(tmp_path)}
    assert removed == {files["dead_here"], files["old_unnamed"]}
    left = {p.name for p in tmp_path.iterdir()}
    assert left == {files[k] for k in ("live_here", "other_host", "new_unnamed", "old_result")}
    assert remove_stale_parts(tmp_path / "missing") == []


def test_complex_values_and_numpy_strings_survive_the_round_trip_exactly(tmp_path):
    # the parts are stored apart; rebuilding them as re + 1j·im turned −0.0 into +0.0 and a non-finite
    # imaginary part into a NaN real part
    z = np.array([complex(-0.0, 1.0), complex(1.0, np.nan), complex(2.0, np.inf)])
    ds = xr.Dataset({"z": ("k", z)}, attrs={"name": np.str_("numpy text")})
    back = bm.load(bm.save(ds, tmp_path / "z.nc"))
    np.testing.assert_array_equal(np.signbit(back["z"].values.real), np.signbit(z.real))
    np.testing.assert_array_equal(back["z"].values.real, z.real)
    np.testing.assert_array_equal(back["z"].values.imag, z.imag)
    assert back.attrs["name"] == "numpy text"


def _rebuilt(ds):
    """The model, times, initial state, detectors and options of a saved run, from its file alone."""
    a = ds.attrs
    coupling = ((ds["coupling_J"].values, ds["coupling_Gamma"].values) if a["coupling"] == "custom"
                else a["coupling"])
    model = bm.Model(ds["position"].values, dipole=a["dipole"], coupling=coupling, rabi=a["rabi"],
                     detuning=a["detuning"], laser=a["laser"],
                     envelope=[tuple(w) for w in a["envelope_windows"]] or None)
    initial = ds["initial_bloch"].values if "initial_bloch" in ds else a["initial"]
    detectors = dict(zip(ds["detector"].values.tolist(), ds["direction"].values, strict=True))
    seed = int(a["seed"]) if a["seed"] >= 0 else None
    return model, ds["time"].values, initial, detectors, seed, a["options"]


@pytest.mark.parametrize("level, options", [("meanfield", {}), ("cumulant2", {}), ("exact", {}),
                                            ("twa", {"samples": 40}), ("qsd_product", {"samples": 40})])
def test_a_saved_run_reruns_bit_for_bit_from_its_file_alone(tmp_path, level, options):
    # conventions.md, "data contract": a saved file says how to reproduce it. Everything non-default: custom
    # couplings, a complex dipole, a tilted laser, a complex Rabi frequency, non-round drive windows,
    # per-emitter initial states, a detector given by angle.
    pos = np.array([[0.0, 0, 0], [0.31, 0.05, 0], [0.1, 0.27, 0.02]])
    J, G = bm.couplings(pos, (1, 1j, 0.3))
    model = bm.Model(pos, dipole=(1, 1j, 0.3), coupling=(J, G), rabi=0.7 + 0.2j, detuning=-0.3,
                     laser=(0.3, 0, 1), envelope=[(0, 1.2345678), (2.00000012, 3.3)])
    ds = bm.evolve(model, level, np.linspace(0, 3.5, 8), initial=["excited", "ground", "excited"],
                   detectors={"f": (0, 0, 1), "side": {"angle": 70, "azimuth": 30}}, seed=5, **options)
    back = bm.load(bm.save(ds, tmp_path / "run.nc"))
    m2, times, initial, detectors, seed, opts = _rebuilt(back)
    again = bm.evolve(m2, level, times, initial=initial, detectors=detectors, seed=seed, **opts)
    for name in ("excited", "coherence", "emission_rate", "intensity", "g2", "g2_total"):
        np.testing.assert_array_equal(again[name].values, ds[name].values, err_msg=name)


def _edited(src, dst, edit):
    """A copy of the results file ``src`` at ``dst`` with its HDF5 attributes or datasets edited."""
    import shutil

    import h5py

    shutil.copy(src, dst)
    with h5py.File(dst, "r+") as f:
        edit(f)
    return dst


def test_load_refuses_edited_or_foreign_files_with_one_clear_error_naming_what_is_wrong(dataset, tmp_path):
    """Edited or foreign files gave a raw JSONDecodeError/KeyError, loaded with attributes left undecoded,
    or were accepted as results; each is now one NotAResultsFile (a ValueError) saying what is wrong."""
    from beyondmf.results import NotAResultsFile

    whole = bm.save(dataset, tmp_path / "whole.nc")
    cases = {
        # an attribute stored as JSON (a table) edited into text that is not JSON
        r"the attribute 'options' of the file is not the JSON beyondmf.save writes \(JSONDecodeError":
            lambda f: f.attrs.__setitem__("options", "{rtol: 1e-6"),
        # an attribute named in json_attributes but deleted
        r"lists the attribute 'options' in json_attributes but has no such attribute":
            lambda f: f.attrs.__delitem__("options"),
        r"the attribute json_attributes of the file is not the list of names":
            lambda f: f.attrs.__setitem__("json_attributes", "options"),
        # the list of JSON attributes deleted: they would load as undecoded text
        r"the file lacks the attribute json_attributes that beyondmf.save writes":
            lambda f: f.attrs.__delitem__("json_attributes"),
        r"variable 'emission_rate' lacks the attribute json_attributes":
            lambda f: f["emission_rate"].attrs.__delitem__("json_attributes"),
        # half of a complex variable: refused, not loaded without it
        r"the complex variable 'coherence' has its part 'coherence__real' but not 'coherence__imag'":
            lambda f: f.__delitem__("coherence__imag"),
    }
    for k, (message, edit) in enumerate(cases.items()):
        path = _edited(whole, tmp_path / f"edited{k}.nc", edit)
        with pytest.raises(NotAResultsFile, match=message):
            bm.load(path)
    # a NetCDF-4 file that beyondmf did not write (plain xarray) is not taken for results
    foreign = tmp_path / "foreign.nc"
    xr.Dataset({"emission_rate": ("time", np.ones(3))}).to_netcdf(foreign, engine="h5netcdf")
    with pytest.raises(NotAResultsFile, match=r"a NetCDF-4 file, but not one written by beyondmf\.save"):
        bm.load(foreign)


def test_a_netcdf3_file_is_named_as_such_not_blamed_on_truncation(tmp_path):
    path = tmp_path / "classic.nc"
    xr.Dataset({"x": ("t", np.arange(3.0))}).to_netcdf(path, engine="scipy", format="NETCDF3_64BIT")
    with pytest.raises(ValueError, match=r"expected NetCDF-4 .* but it is a NetCDF-3 file \(64-bit offset "
                                         r"format\)") as err:
        bm.load(path)
    assert "truncated" not in str(err.value)


def test_a_file_of_an_earlier_version_without_the_mark_still_loads(dataset, tmp_path):
    """Task files and results written before the file-format mark stay readable (resumes keep them)."""
    from beyondmf.results import MARK

    path = _edited(bm.save(dataset, tmp_path / "r.nc"), tmp_path / "old.nc",
                   lambda f: f.attrs.__delitem__(MARK))
    xr.testing.assert_identical(bm.load(path), dataset)


def test_killing_a_writer_while_it_writes_leaves_the_old_file_whole_and_its_temporary_goes(tmp_path):
    """kill -9 while results.nc is written: the file there is the previous one, whole; the writer's
    temporary file is removed by the next run (its process is gone)."""
    import os
    import signal
    import subprocess
    import sys
    import time

    from beyondmf.results import remove_stale_parts

    target = tmp_path / "results.nc"
    code = f"""
import numpy as np, xarray as xr
from beyondmf.results import save
ds = xr.Dataset({{"emission_rate": ("time", np.arange(1e7))}})
save(ds.isel(time=slice(0, 10)), {str(target)!r})
print("first written", flush=True)
while True:
    save(ds, {str(target)!r})
"""
    proc = subprocess.Popen([sys.executable, "-c", code], stdout=subprocess.PIPE, text=True)
    try:
        assert proc.stdout.readline().strip() == "first written"
        deadline = time.monotonic() + 60
        while not list(tmp_path.glob(".results.nc.*.part")) and time.monotonic() < deadline:
            time.sleep(0.01)
        time.sleep(0.05)
        os.kill(proc.pid, signal.SIGKILL)
    finally:
        proc.kill()
        proc.wait()
    back = bm.load(target)  # whole: the first or a later complete write, never a partial one
    assert back.sizes["time"] in (10, 10**7)
    left = list(tmp_path.glob(".results.nc.*.part"))
    assert left, "the writer was killed before it had started a temporary file"
    assert sorted(remove_stale_parts(tmp_path, "results.nc")) == sorted(left)
    assert sorted(p.name for p in tmp_path.iterdir()) == ["results.nc"]
