"""Failed tasks: one exit status for every executor, failures of the machine's state retried, failures of
the input kept and said so, lost dask workers."""

from __future__ import annotations

import sys

import numpy as np
import pytest

import beyondmf.tasks as tasks_module
from beyondmf import load
from beyondmf.cli import EXIT_FAILED, main
from beyondmf.executors import Dask, InProcess, Lost
from beyondmf.sweep import read_study, run_sweep
from beyondmf.tasks import INPUT, MACHINE, task_key, task_path

# dicke refuses vector couplings (a property of the input); mean field runs
STUDY = """
[geometry]
kind = "line"
n = 2
spacing = 0.3
[drive]
rabi = 1.0
[run]
t_end = 1.0
points = 3
[levels.meanfield]
[levels.dicke]
[sweep]
[sweep.grid]
"geometry.n" = [2, 3]
"""


def _short_of_memory_for_three(monkeypatch):
    """Mean field on 3 emitters is refused as a level refuses a run that does not fit in free memory."""
    real = tasks_module.compute

    def compute(task):
        if task["level"] == "meanfield" and len(task["positions"]) == 3:
            raise MemoryError("meanfield for 3 emitters: about 1 GiB needed, but this machine has 1 MiB free")
        return real(task)

    monkeypatch.setattr(tasks_module, "compute", compute)


def test_failed_tasks_exit_1_with_their_count_memory_refusals_are_retried_input_failures_kept(
        tmp_path, capsys, monkeypatch):
    """Reported: a sweep whose tasks fail exits 1 in-process but 0 under --workers; a task refused for lack
    of free memory was cached as failed, and a rerun with memory free repeated the old refusal."""
    study = tmp_path / "s.toml"
    study.write_text(STUDY)
    out = tmp_path / "out"
    args = ["run", str(study), "--out", str(out), "--no-plots"]
    _short_of_memory_for_three(monkeypatch)
    assert main(args) == EXIT_FAILED
    err = capsys.readouterr().err
    assert "running 4 tasks in this process" in err
    assert f"3 of 4 tasks failed (NaN in {out / 'results.nc'}" in err
    ds = load(out / "results.nc")
    assert np.isnan(ds["emission_rate"].sel(level="meanfield", n=3)).all()
    failures = ds.attrs["failures"]
    assert sum("[caused by the input: kept, a rerun gives the same]" in f for f in failures) == 2
    (memory,) = [f for f in failures if "MemoryError" in f]
    assert "[caused by the machine's state: not kept, the next run computes it again]" in memory
    index = study_index(study)
    refused = index[(1, "meanfield", 0)]
    assert load(task_path(out, task_key(refused))).attrs["task_failure"] == MACHINE
    assert load(task_path(out, task_key(index[(0, "dicke", 0)]))).attrs["task_failure"] == INPUT

    monkeypatch.undo()  # memory is free again: the refused task runs, the others are kept
    assert main(args) == EXIT_FAILED  # dicke still refuses the model
    err = capsys.readouterr().err
    assert "running 1 of 4 tasks in this process, 3 done (kept in" in err
    assert "2 of 4 tasks failed" in err
    ds = load(out / "results.nc")
    assert np.isfinite(ds["emission_rate"].sel(level="meanfield")).all()

    # the same rule on dask: the two dicke tasks run again on a worker (here one of a cluster in this
    # process, quick to start; --workers in the slow test below), and fail again
    from dask.distributed import LocalCluster

    for key_tuple in [(0, "dicke", 0), (1, "dicke", 0)]:
        task_path(out, task_key(index[key_tuple])).unlink()
    with LocalCluster(n_workers=1, threads_per_worker=1, processes=False, dashboard_address=None) as cluster:
        assert main([*args, "--scheduler", cluster.scheduler_address]) == EXIT_FAILED
    err = capsys.readouterr().err
    assert f"running 2 of 4 tasks on the dask scheduler at {cluster.scheduler_address}, 2 done" in err
    assert "2 of 4 tasks failed" in err


@pytest.mark.slow
def test_failed_tasks_exit_1_on_a_local_cluster_of_worker_processes(tmp_path, capsys):
    """--workers (a sweep whose tasks failed exited 0 there). Slow: starts worker processes."""
    study = tmp_path / "s.toml"
    study.write_text(STUDY)
    out = tmp_path / "out"
    assert main(["run", str(study), "--out", str(out), "--no-plots", "--workers", "1"]) == EXIT_FAILED
    err = capsys.readouterr().err
    assert "running 4 tasks on a local dask cluster of 1 worker process" in err
    assert "2 of 4 tasks failed" in err


def study_index(path):
    from beyondmf.sweep import study_tasks

    return study_tasks(read_study(path))[0]


class _LosesTheFirst(InProcess):
    """An executor whose worker running the first task is lost (as dask reports a KilledWorker)."""

    def map_unordered(self, fn, items, *args):
        for k, item in enumerate(items):
            yield Lost(item, RuntimeError("worker tcp://127.0.0.1:1 died")) if k == 0 else fn(item, *args)


def test_a_task_whose_worker_was_lost_is_a_failure_the_next_run_retries(tmp_path):
    study = tmp_path / "s.toml"
    study.write_text(STUDY.replace("[levels.dicke]\n", ""))
    study = read_study(study)
    ds = run_sweep(study, tmp_path / "out", executor=_LosesTheFirst(), progress=False)
    (lost,) = ds.attrs["failures"]
    assert "worker lost: the dask worker running this task went away (RuntimeError: worker" in lost
    assert "[caused by the machine's state: not kept" in lost and ds.attrs["tasks_failed"] == 1
    assert len(list((tmp_path / "out" / "tasks").glob("*.nc"))) == 1  # no file for the lost task
    started = []
    ds = run_sweep(study, tmp_path / "out", progress=False,
                   on_start=lambda n, total: started.append((n, total)))
    assert started == [(1, 2)] and not ds.attrs["failures"]
    assert np.isfinite(ds["emission_rate"]).all()


def _killing(marker: str):
    """A task body for a dask worker: the first call for an item kills its worker process (as the kernel
    does to a process out of memory); "always" kills it on every attempt."""
    import os
    from pathlib import Path

    def run(item):
        flag = Path(marker) / str(item)
        if item == "always" or not flag.exists():
            flag.touch()
            os._exit(137)
        return f"{item} done"

    return run


@pytest.mark.slow
def test_a_killed_dask_worker_is_replaced_and_a_task_that_keeps_killing_workers_is_lost(tmp_path):
    """A worker killed mid-task: the nanny starts a new one and the task runs again there; a task that kills
    every worker it runs on ends as `Lost` (dask's KilledWorker), not as an exception that ends the run.
    (Slow: a local cluster of worker processes, each restart a new Python process.)"""
    import cloudpickle
    import dask

    cloudpickle.register_pickle_by_value(sys.modules[__name__])
    body = _killing(str(tmp_path))
    with dask.config.set({"distributed.scheduler.allowed-failures": 1}), Dask(workers=1) as executor:
        # one at a time: a worker's death counts against every task it holds
        assert list(executor.map_unordered(body, ["once"])) == ["once done"]
        (lost,) = executor.map_unordered(body, ["always"])
    assert isinstance(lost, Lost) and lost.item == "always" and type(lost.error).__name__ == "KilledWorker"
