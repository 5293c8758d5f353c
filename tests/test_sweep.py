"""Sweeps: resume after a kill, recomputation of damaged task files, dask = in-process, study errors."""

from __future__ import annotations

import textwrap
import tomllib

import numpy as np
import pytest
import xarray as xr

from beyondmf import load as bm_load
from beyondmf.executors import Dask, execute
from beyondmf.study import StudyError
from beyondmf.study.sections import _point_study
from beyondmf.sweep import read_study, run_sweep, study_tasks
from beyondmf.tasks import task_key, task_path

STUDY = """
title = "test sweep: small discs, mean field"
[geometry]
kind = "ellipsoid"
n = 3
semi_axes = [1.0, 1.0, 0.2]
min_distance = 0.05
[drive]
rabi = 1.0
[detectors]
forward = [0, 0, 1]
side = [1, 0, 0]
[run]
calculation = "evolve"
t_end = 2.0
points = 5
[levels.meanfield]
[sweep]
realizations = 2
seed = 3
[sweep.grid]
"geometry.density" = [0.2, 2.0]
"drive.saturation" = [0.5, 4.0]
"""


def _study(tmp_path, text=STUDY, quick=False):
    path = tmp_path / "study.toml"
    path.write_text(textwrap.dedent(text))
    return read_study(path, quick=quick)


def _same(a: xr.Dataset, b: xr.Dataset) -> None:
    for name in a.data_vars:
        np.testing.assert_array_equal(a[name].values, b[name].values, err_msg=name)


class _Killed(Exception):
    pass


def test_killed_run_resumes_to_the_uninterrupted_result(tmp_path):
    study = _study(tmp_path)
    full = run_sweep(study, tmp_path / "full", progress=False)
    assert full["emission_rate"].dims == ("density", "saturation", "level", "realization", "time")
    done = []

    def kill_after_three(key, status):
        done.append(key)
        if len(done) == 3:
            raise _Killed

    with pytest.raises(_Killed):
        run_sweep(study, tmp_path / "part", progress=False, on_done=kill_after_three)
    # the tasks differ in pairs only by the drive: each pair is one batched solve, and both its files are
    # written before either is reported, so the second pair's other file is there too
    kept = {p.stem for p in (tmp_path / "part" / "tasks").glob("*.nc")}
    assert set(done) <= kept and len(kept) == 4
    assert not (tmp_path / "part" / "results.nc").exists()
    rerun = []
    resumed = run_sweep(study, tmp_path / "part", progress=False, on_done=lambda k, s: rerun.append(k))
    assert len(rerun) == 8 - 4 and not set(rerun) & kept  # finished tasks are not run again
    _same(full, resumed)  # bit for bit: the resumed run solves the same groups


def test_damaged_task_files_are_recomputed(tmp_path):
    study = _study(tmp_path)
    out = tmp_path / "out"
    ref = run_sweep(study, out, progress=False)
    index = study_tasks(study)[0]
    tasks = list({task_key(t): t for t in index.values()}.values())
    truncated, garbage, foreign = (task_path(out, task_key(t)) for t in tasks[:3])
    truncated.write_bytes(truncated.read_bytes()[:200])  # a partial write
    garbage.write_bytes(b"not a netcdf file")
    foreign.write_bytes(task_path(out, task_key(tasks[3])).read_bytes())  # another task's file
    rerun = []
    with pytest.warns(UserWarning, match="recomputing task"):
        again = run_sweep(study, out, progress=False, on_done=lambda k, s: rerun.append(k))
    assert sorted(rerun) == sorted(task_key(t) for t in tasks[:3])
    _same(ref, again)


@pytest.mark.parametrize("level, options", [("meanfield", {}), ("twa", {"samples": 8}), ("exact", {})])
def test_a_task_file_reads_back_whole_and_a_changed_attribute_or_coordinate_is_caught(tmp_path, level,
                                                                                      options):
    # the checksum covers coordinates and attributes as well as the data (a corrupted attribute was read
    # back silently before): edit the file through h5py, as bytes on disk would change
    import h5py

    from beyondmf.tasks import TaskFileError, _data_checksum, read_task, run_task

    task = {"positions": np.array([[0.0, 0, 0], [0.3, 0, 0]]), "model": {"rabi": 1.0},
            "run": {"calculation": "evolve", "times": [0.0, 0.5], "initial": "ground"},
            "detectors": {"forward": np.array([0.0, 0, 1])}, "level": level, "options": options}
    if level == "twa":
        task["seed"] = 1
    key, status, _ = run_task(task, tmp_path)
    assert status == "done"
    path = task_path(tmp_path, key)
    pristine = path.read_bytes()
    read_task(path, task)  # what was written reads back as written
    with h5py.File(path, "r+") as f:
        f["g2_total"].attrs["long_name"] = "garbage" + f["g2_total"].attrs["long_name"][7:]
    with pytest.raises(TaskFileError, match="checksum mismatch"):
        read_task(path, task)
    path.write_bytes(pristine)
    with h5py.File(path, "r+") as f:
        f["position"][1, 0] = 0.31  # a coordinate: where the second emitter was
    with pytest.raises(TaskFileError, match="checksum mismatch"):
        read_task(path, task)
    # a file of format 1 (its checksum over the data variables only) is still verified and used
    path.write_bytes(pristine)
    old = _data_checksum(bm_load(path))
    with h5py.File(path, "r+") as f:
        f.attrs["task_format"], f.attrs["task_checksum"] = 1, old
    read_task(path, task)
    with h5py.File(path, "r+") as f:
        f.attrs["task_format"] = 7
    with pytest.raises(TaskFileError, match="another version of beyondmf .task file format 7"):
        read_task(path, task)


def test_task_keys_are_stable_across_number_spellings(tmp_path):
    a = _study(tmp_path, STUDY.replace("rabi = 1.0", "rabi = 1"))
    b = _study(tmp_path)
    keys = [[task_key(t) for t in study_tasks(s)[0].values()] for s in (a, b)]
    assert keys[0] == keys[1]


def test_a_progress_bar_is_not_part_of_a_tasks_identity(tmp_path):
    # issue: switching a progress bar on recomputed a sweep; presentation never changes the numbers
    # (common practice: a cache key holds only what determines the result)
    plain = _study(tmp_path)
    shown = _study(tmp_path, STUDY.replace("[levels.meanfield]\n", "[levels.meanfield]\nprogress = true\n"))
    keys = [[task_key(t) for t in study_tasks(s)[0].values()] for s in (plain, shown)]
    assert keys[0] == keys[1]
    assert any(t["options"].get("progress") is True for t in study_tasks(shown)[0].values())


def test_a_task_from_a_study_file_and_the_same_task_from_python_share_their_key(tmp_path, monkeypatch):
    """The study reader writes every model argument (complex dipole, default coupling and detuning); the
    Python API only those given. Values equal to their defaults and real numbers written as complex
    do not change the task, so the two resume each other's files."""
    from beyondmf.levels.base import get_level
    from beyondmf.sweep import build_task, level_table

    text = STUDY.split("[sweep]")[0].replace("[levels.meanfield]\n", "[levels.meanfield]\nrtol = "
                                              f"{get_level('meanfield').options['rtol']!r}\n")
    study = _study(tmp_path, text.replace('kind = "ellipsoid"', 'kind = "ellipsoid"\nseed = 4'))
    (label, r), from_file = next(iter(study_tasks(study)[0].items()))
    # as compare_levels builds it: only the arguments given, the default detectors (None)
    text = text.replace("[detectors]\nforward = [0, 0, 1]\nside = [1, 0, 0]\n", "")
    study = _study(tmp_path, text.replace('kind = "ellipsoid"', 'kind = "ellipsoid"\nseed = 4'))
    (label, r), from_file = next(iter(study_tasks(study)[0].items()))
    meanfield = level_table(["meanfield"])["meanfield"]
    from_python = build_task(from_file["positions"], {"rabi": 1.0}, from_file["run"], None, meanfield, 0, r)
    assert from_file["model"] != from_python["model"]  # written differently ...
    assert from_file["detectors"] is not None and from_python["detectors"] is None
    assert task_key(from_file) == task_key(from_python)  # ... the same task
    changed = build_task(from_file["positions"], {"rabi": 1.0, "detuning": 0.5}, from_file["run"], None,
                         meanfield, 0, r)
    assert task_key(changed) != task_key(from_python)
    # a value the level refuses never becomes a task (its failed file would be served to the default)
    with pytest.raises(ValueError, match="max_steps must be a positive integer"):
        build_task(from_file["positions"], {}, from_file["run"], None,
                   {"level": "meanfield", "options": {"max_steps": 200000.0}}, 0, r)
    # a default changed in another version makes another task
    before = task_key(from_python)
    monkeypatch.setitem(get_level("meanfield").options, "rtol", 1e-5)
    assert task_key(from_python) != before


def test_a_study_built_in_python_is_the_study_file_with_the_same_layout(tmp_path):
    """`study_from_table`: the same tasks as the file, validated the same way, and a text that reads
    back (tomllib, Python's own TOML reader) as the same table, so `beyondmf run` can rerun it."""
    import tomllib

    from beyondmf.sweep import study_from_table, to_toml

    table = tomllib.loads(STUDY)
    study = study_from_table(table)
    assert tomllib.loads(study.source) == table and tomllib.loads(to_toml(table)) == table
    from_file = _study(tmp_path)
    assert ([task_key(t) for t in study_tasks(study)[0].values()]
            == [task_key(t) for t in study_tasks(from_file)[0].values()])
    table["sweep"]["grid"]["geometry.density"] = [0.2, -1.0]
    with pytest.raises(StudyError, match="sweep.grid.geometry.density"):
        study_from_table(table)
    with pytest.raises(StudyError, match="lists and tables, got set"):
        study_from_table({**table, "title": {"a", "b"}})


def test_two_dask_workers_on_loopback_give_the_in_process_result(tmp_path):
    study = _study(tmp_path, STUDY.replace('"drive.saturation" = [0.5, 4.0]', '"drive.saturation" = [0.5]'))
    plain = run_sweep(study, tmp_path / "plain", progress=False)
    distributed = run_sweep(study, tmp_path / "dask", executor=Dask(workers=2), progress=False)
    _same(plain, distributed)


def test_quick_overrides_shrink_the_sweep(tmp_path):
    text = STUDY + '\n[quick]\nsweep = { realizations = 1, grid = { "drive.saturation" = [1.0] } }\n'
    quick = _study(tmp_path, text, quick=True)
    index, labels, k, dims, _ = study_tasks(quick)
    assert k == 1 and dims == [("density", [0.2, 2.0]), ("saturation", [1.0])] and len(index) == 2


def test_density_grid_rescales_the_cloud_at_its_shape(tmp_path):
    study = _study(tmp_path, STUDY.replace("n = 3", "n = 40"))
    st = _point_study(study.extra["raw"], {"geometry.density": 2.0})
    a, b, c = st.geometry.params["semi_axes"]
    # uniform ellipsoid: n = ρ (4π/3) abc (volume of an ellipsoid, handbook formula); shape 1 : 1 : 0.2 kept
    assert 40 / (4 / 3 * np.pi * a * b * c) == pytest.approx(2.0, rel=1e-12)
    assert (b / a, c / a) == pytest.approx((1.0, 0.2), rel=1e-12)


@pytest.mark.parametrize(
    "section, key",
    [
        ("[sweep]\nrealisations = 2", "sweep.realisations"),
        ("[sweep]\nrealizations = 0", "sweep.realizations"),
        ("[sweep]\nseed = -1", "sweep.seed"),
        ('[sweep.grid]\n"drive.rabbi" = [1, 2]', "drive.rabbi"),
        ('[sweep.grid]\n"colour.n" = [1, 2]', "sweep.grid.colour.n"),
        ('[sweep.grid]\n"drive.rabi" = 1.0', "sweep.grid.drive.rabi"),
        ('[sweep.grid]\n"drive.rabi" = [1.0, 1.0]', "sweep.grid.drive.rabi"),
        ('[sweep.grid]\n"drive.rabi" = [1.0, -2.0]', "drive.rabi"),
        ("[compare]\ntolerance = -0.1", "compare.tolerance"),
        ("[compare]\nconfidence = 95", "compare.confidence"),
        ('[compare]\nobservables = ["brightness"]', "compare.observables"),
        ("[compare]\nverdict = true", "compare.verdict"),
        ('[compare]\nbaseline = "twa"', "compare.baseline"),
    ],
)
def test_bad_sweep_and_compare_keys_are_named(tmp_path, section, key):
    text = STUDY.split("[sweep]")[0] + section + "\n"
    with pytest.raises(StudyError, match=key.replace(".", r"\.")):
        study = _study(tmp_path, text)
        study_tasks(study)
        run_sweep(study, tmp_path / "out", progress=False)


def test_density_grid_on_a_lattice_is_refused(tmp_path):
    text = STUDY.replace('kind = "ellipsoid"\nn = 3\nsemi_axes = [1.0, 1.0, 0.2]\nmin_distance = 0.05',
                         'kind = "plane"\nnx = 2\nny = 2\nspacing = 0.3')
    with pytest.raises(StudyError, match=r"sweep\.grid\.geometry\.density: needs a random cloud"):
        study_tasks(_study(tmp_path, text))


def test_quick_without_a_quick_table_is_refused_and_an_empty_one_runs_the_study_as_it_stands(tmp_path):
    with pytest.raises(StudyError, match="--quick: this study has no \\[quick\\] table"):
        _study(tmp_path, quick=True)
    study = _study(tmp_path, STUDY + "[quick]\n", quick=True)
    assert study_tasks(study)[2] == 2


def test_in_memory_execution_matches_files(tmp_path):
    study = _study(tmp_path)
    index = study_tasks(study)[0]
    tasks = list(index.values())[:2]
    mem = execute(tasks, None, progress=False)
    disk = execute(tasks, tmp_path / "o", progress=False)
    for key in mem:
        np.testing.assert_array_equal(mem[key]["emission_rate"], disk[key]["emission_rate"])


def test_command_line_runs_a_quick_comparison_study(tmp_path, capsys):
    from beyondmf.cli import main

    text = STUDY.replace("[levels.meanfield]", '[levels.meanfield]\n[levels.cumulant2]') + (
        '\n[compare]\ntolerance = 0.1\n[quick]\n'
        'sweep = { realizations = 1, grid = { "drive.saturation" = [1.0] } }\n')
    path = tmp_path / "study.toml"
    path.write_text(text)
    assert main(["run", str(path), "--out", str(tmp_path / "out"), "--quick"]) == 0
    ds = bm_load(tmp_path / "out" / "results.nc")
    assert list(ds["level"].values) == ["meanfield", "cumulant2"] and "emission_rate_verdict" in ds
    assert (tmp_path / "out" / "correction_map.png").exists()
    assert "verdicts against meanfield" in capsys.readouterr().err
    assert main(["run", str(path), "--out", str(tmp_path / "o2"), "--workers", "0"]) == 2


@pytest.mark.parametrize("quick", [False, True])
def test_shipped_studies_parse_and_expand(quick):
    from pathlib import Path

    for path in sorted((Path(__file__).parent.parent / "studies").glob("*.toml")):
        study = read_study(path, quick=quick)
        index, labels, k, dims, _ = study_tasks(study)
        assert index and labels, path


def test_a_level_that_refuses_the_model_gives_nan_and_a_failure_note(tmp_path):
    # dicke needs all-to-all couplings; the study's vector couplings make it refuse every task
    study = _study(tmp_path, STUDY.replace("[levels.meanfield]", "[levels.meanfield]\n[levels.dicke]")
                   .replace("realizations = 2", "realizations = 1"))
    ds = run_sweep(study, tmp_path / "out", progress=False)
    assert np.isfinite(ds["emission_rate"].sel(level="meanfield")).all()
    assert np.isnan(ds["emission_rate"].sel(level="dicke")).all()
    assert len(ds.attrs["failures"]) == 4
    assert all("dicke" in f or "all-to-all" in f for f in ds.attrs["failures"])


def test_ctrl_c_in_a_sweep_keeps_finished_tasks_and_the_rerun_resumes(tmp_path, capsys, monkeypatch):
    """Ctrl-C (KeyboardInterrupt) during the third task: the command exits 130, says how many tasks it
    kept and that the same command resumes; the rerun computes only the rest."""
    import beyondmf.executors as ex
    from beyondmf.cli import EXIT_INTERRUPTED, main

    path = tmp_path / "study.toml"
    path.write_text(STUDY)
    args = ["run", str(path), "--out", str(tmp_path / "out"), "--no-plots"]
    from beyondmf.tasks import run_task as real

    calls = []

    def interrupted_at_the_third(group, directory, only=None):  # one task at a time (no batching)
        out = []
        for task in (t for t in group if only is None or task_key(t) in only):
            calls.append(task_key(task))
            if len(calls) == 3:
                raise KeyboardInterrupt
            out.append(real(task, directory))
        return out

    monkeypatch.setattr(ex, "run_group", interrupted_at_the_third)
    assert main(args) == EXIT_INTERRUPTED
    err = capsys.readouterr().err
    assert ("beyondmf run: interrupted; 2 of 8 tasks finished and are kept in "
            f"{tmp_path / 'out' / 'tasks'}; run the same command again to resume") in err
    tasks = tmp_path / "out" / "tasks"
    assert sorted(p.name for p in tasks.iterdir()) == sorted(f"{k}.nc" for k in calls[:2])  # no .part
    assert not (tmp_path / "out" / "results.nc").exists()
    monkeypatch.setattr(ex, "run_group", lambda group, directory, only=None: [
        (calls.append(task_key(task)), real(task, directory))[1] for task in group
        if only is None or task_key(task) in only])
    assert main(args) == 0
    assert len(calls) == 3 + 6 and not set(calls[3:]) & set(calls[:2])  # the two kept ones are reused


def test_task_files_are_readable_by_others_and_stale_temporaries_go(tmp_path):
    import os

    from beyondmf.results import _writer_id

    study = _study(tmp_path, STUDY.replace('"drive.saturation" = [0.5, 4.0]', '"drive.saturation" = [0.5]'))
    tasks = tmp_path / "out" / "tasks"
    tasks.mkdir(parents=True)
    gone = _ended_pid()
    stale = tasks / f".0123.nc.{_writer_id()}-{gone}-ab.part"  # left by a killed worker on this host
    stale.write_bytes(b"half")
    old = os.umask(0o022)
    try:
        run_sweep(study, tmp_path / "out", progress=False)
    finally:
        os.umask(old)
    files = list(tasks.iterdir())
    assert len(files) == 4 and all(p.suffix == ".nc" for p in files)
    assert {p.stat().st_mode & 0o777 for p in [*files, tmp_path / "out" / "results.nc"]} == {0o644}


def _ended_pid() -> int:
    """The process id of a process that has already ended."""
    import subprocess
    import sys

    done = subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"], capture_output=True,
                          text=True, check=True)
    return int(done.stdout)


def test_tasks_directory_is_made_only_once_the_executor_has_started(tmp_path):
    from beyondmf.executors import InProcess

    class NoScheduler(InProcess):
        def __enter__(self):
            raise ConnectionError("no answer from a dask scheduler at 'tcp://x:1'")

    study = _study(tmp_path)
    with pytest.raises(ConnectionError, match="no answer"):
        run_sweep(study, tmp_path / "out", executor=NoScheduler(), progress=False)
    assert not (tmp_path / "out" / "tasks").exists()


def test_a_running_scheduler_is_reached_by_its_address(tmp_path):
    """--scheduler ADDRESS: the probe accepts a real scheduler, and its workers give the same numbers."""
    from dask.distributed import LocalCluster

    study = _study(tmp_path, STUDY.replace('"drive.saturation" = [0.5, 4.0]', '"drive.saturation" = [0.5]')
                   .replace("realizations = 2", "realizations = 1"))
    plain = run_sweep(study, tmp_path / "plain", progress=False)
    with LocalCluster(n_workers=1, threads_per_worker=1, processes=False, dashboard_address=None) as cluster:
        remote = run_sweep(study, tmp_path / "remote", executor=Dask(scheduler=cluster.scheduler_address),
                           progress=False)
        worker = next(iter(cluster.workers.values())).address
        with pytest.raises(ConnectionError, match="answered as a dask Worker, not as a dask scheduler"):
            with Dask(scheduler=worker):
                pass
    _same(plain, remote)


def test_executors_describe_themselves_in_plain_english():
    from beyondmf.executors import InProcess

    assert InProcess().where == "in this process"
    assert Dask(workers=1).where == "on a local dask cluster of 1 worker process"
    assert Dask(workers=1).name == "dask local cluster (1 worker)"
    assert Dask(workers=3).where == "on a local dask cluster of 3 worker processes"
    assert Dask(scheduler="tcp://10.0.0.5:8786").where == "on the dask scheduler at tcp://10.0.0.5:8786"


def test_recorded_level_options_leave_out_those_the_grid_varies(tmp_path):
    """`shared_parameters`: options common to every task of a label are recorded, those a grid varies
    are named as varied (their values are the grid's coordinates), and so is a varied model argument."""
    from beyondmf.sweep import shared_parameters

    text = STUDY.replace('"drive.saturation" = [0.5, 4.0]', '"levels.meanfield.rtol" = [1e-6, 1e-9]')
    study = _study(tmp_path, text.replace("[levels.meanfield]\n", "[levels.meanfield]\natol = 1e-10\n"))
    index, labels = study_tasks(study)[:2]
    shared = shared_parameters(index, labels)
    assert shared["level_options"]["meanfield"] == {"level": "meanfield", "options": {"atol": 1e-10},
                                                    "varied": ["rtol"]}
    assert shared["N"] == 3 and shared["model"]["rabi"] == 1


def test_a_levels_own_diagnostics_reach_the_comparison_per_realization(tmp_path):
    # qsd_product's exchange_leak (docs/qsd_product.md §4) is kept in results.nc of a comparison, per
    # realization, NaN for the level that does not report it, with its units.
    text = STUDY.replace("[levels.meanfield]", "[levels.meanfield]\n[levels.qsd_product]\nsamples = 20")
    text = text.replace('"drive.saturation" = [0.5, 4.0]', "") + '[compare]\nbaseline = "meanfield"\n'
    ds = run_sweep(_study(tmp_path, text), tmp_path / "out", progress=False)
    leak = ds["exchange_leak"]
    assert leak.attrs["units"] == "Γ0 per excitation" and "realization" in leak.dims
    assert np.all(np.isnan(leak.sel(level="meanfield").values))
    assert np.all(np.isfinite(leak.sel(level="qsd_product").values))
    assert "exchange_leak" in bm_load(tmp_path / "out" / "results.nc")
    # One run can be redone from results.nc alone: each realization's seeds are recorded (rule in
    # docs/study-files.md), and the position seed redraws exactly the cloud the tasks ran
    from beyondmf.sweep import realization_seeds

    for k in range(2):
        pos_seed, samp_seed = realization_seeds(3, k)
        assert int(ds["position_seed"].sel(realization=k)) == pos_seed
        assert int(ds["sampling_seed"].sel(realization=k)) == samp_seed
        geo = _point_study(tomllib.loads(ds.attrs["study"]), {"geometry.density": 0.2}).geometry
        index, *_ = study_tasks(_study(tmp_path, text))
        ran = next(t for key, t in index.items() if key[0] == 0 and key[-1] == k)
        redrawn = type(geo)(geo.kind, {**geo.params, "seed": int(ds["position_seed"][k])}).positions()
        np.testing.assert_array_equal(redrawn, np.asarray(ran["positions"]).reshape(-1, 3))
    # grid coordinates carry units; warnings name grid values, not indices
    assert ds["density"].attrs["units"] == "λ0⁻³" and ds["density"].attrs["parameter"] == "geometry.density"
    assert ds.attrs["warnings"] and all(w.startswith(("density=0.2, ", "density=2, "))
                                        for w in ds.attrs["warnings"])


DRIVE_ONLY = """
title = "a spectrum sweep: only the detuning varies"
[geometry]
kind = "ellipsoid"
n = 5
semi_axes = [0.8, 0.8, 0.8]
min_distance = 0.1
[drive]
rabi = 0.4
[run]
calculation = "steady"
[levels.meanfield]
[levels.exact]
[sweep]
realizations = 2
seed = 11
[sweep.grid]
"drive.detuning" = [-1.0, 0.0, 0.5, 2.0]
"""


def test_a_sweep_over_the_drive_alone_runs_each_cloud_as_one_batched_solve(tmp_path):
    """Tasks that differ only in the drive run through one batched solve per cloud at meanfield (and one
    solve each at exact, which cannot batch); every task file equals the task computed alone, to the
    steady-state tolerance (common practice: a block-diagonal system solved together)."""
    from beyondmf.tasks import compute, drive_groups, read_task

    study = _study(tmp_path, DRIVE_ONLY)
    index = study_tasks(study)[0]
    groups = drive_groups(list({task_key(t): t for t in index.values()}.values()))
    sizes = sorted(len(g) for g in groups)
    assert sizes == [1] * 8 + [4, 4]  # exact: 2 clouds × 4 detunings alone; meanfield: one group per cloud
    run_sweep(study, tmp_path / "out", progress=False)
    for task in index.values():
        ds = read_task(task_path(tmp_path / "out", task_key(task)), task)
        if task["level"] == "meanfield":
            assert ds.attrs["batched_drives"] == 4
            alone = compute(task)
            np.testing.assert_allclose(ds.excited.values, alone.excited.values, rtol=1e-7, atol=1e-10)
            assert float(ds.emission_rate) == pytest.approx(float(alone.emission_rate), rel=1e-7)
            assert ds.attrs["detuning"] == alone.attrs["detuning"]
