"""Where tasks run: in this process (the default) or on a dask.distributed cluster, with resume.

`execute` skips every task whose file is already complete and valid, runs the rest on an executor, and
reads the results back. Workers write their own task files (`beyondmf.tasks.run_task`), so a killed run
loses only the tasks in flight, and the numbers do not depend on which executor ran them.
"""

from __future__ import annotations

import warnings
from collections.abc import Callable, Iterable, Iterator, Mapping, Sequence
from pathlib import Path
from typing import Any

import xarray as xr

from .tasks import TaskFileError, compute, read_task, run_task, task_key, task_path

__all__ = ["InProcess", "Dask", "make_executor", "execute"]


class InProcess:
    """Run tasks one after the other in this process."""

    name = "in-process"

    def __enter__(self) -> InProcess:
        return self

    def __exit__(self, *exc) -> None:
        return None

    def map_unordered(self, fn: Callable, items: Iterable, *args) -> Iterator:
        for item in items:
            yield fn(item, *args)


class Dask:
    """Run tasks on dask.distributed: a local loopback cluster of ``workers`` processes, or the scheduler
    at ``scheduler`` (an address such as "tcp://10.0.0.5:8786", e.g. one started by dask-jobqueue).

    Each worker process runs one task at a time (one thread): the levels' JAX code already uses the
    cores it is given, and one task per process keeps memory predictable.
    """

    def __init__(self, workers: int | None = None, scheduler: str | None = None) -> None:
        if (workers is None) == (scheduler is None):
            raise ValueError("give exactly one of workers (a local cluster) or scheduler (an address)")
        if workers is not None and (int(workers) != workers or workers < 1):
            raise ValueError(f"workers must be a positive integer, got {workers!r}")
        self.workers, self.scheduler = workers, scheduler
        self.name = f"dask local cluster ({workers} workers)" if workers else f"dask scheduler {scheduler}"
        self._cluster = self._client = None

    def __enter__(self) -> Dask:
        from dask.distributed import Client, LocalCluster

        if self.workers is not None:
            self._cluster = LocalCluster(
                n_workers=int(self.workers),
                threads_per_worker=1,
                processes=True,
                host="127.0.0.1",
                dashboard_address=None,
            )
            self._client = Client(self._cluster)
        else:
            try:
                self._client = Client(self.scheduler, timeout="20s")
            except OSError as err:
                raise ConnectionError(
                    f"could not reach the dask scheduler at {self.scheduler!r}: {err}; check the address "
                    "(tcp://HOST:PORT) and that the scheduler is running"
                ) from err
        return self

    def __exit__(self, *exc) -> None:
        if self._client is not None:
            self._client.close()
        if self._cluster is not None:
            self._cluster.close()
        self._client = self._cluster = None

    def map_unordered(self, fn: Callable, items: Iterable, *args) -> Iterator:
        from dask.distributed import as_completed

        if self._client is None:
            raise RuntimeError("use the Dask executor inside a `with` block")
        futures = [self._client.submit(fn, item, *args, pure=False) for item in items]
        for fut in as_completed(futures):
            yield fut.result()


def make_executor(workers: int | None = None, scheduler: str | None = None) -> InProcess | Dask:
    """InProcess when neither is given; otherwise a `Dask` executor."""
    if workers is None and scheduler is None:
        return InProcess()
    return Dask(workers=workers, scheduler=scheduler)


def _progress_bar(total: int, initial: int, enabled: bool):
    from tqdm.auto import tqdm

    return tqdm(total=total, initial=initial, unit="task", desc="tasks", disable=not enabled, smoothing=0.1)


def execute(
    tasks: Sequence[Mapping[str, Any]],
    directory: str | Path | None = None,
    executor: InProcess | Dask | None = None,
    progress: bool = True,
    on_done: Callable[[str, str], None] | None = None,
) -> dict[str, xr.Dataset]:
    """Run ``tasks`` (skipping finished ones) and return key → results Dataset.

    With ``directory``, each task's result is DIR/tasks/<key>.nc; a file that is missing, unreadable,
    incomplete, or does not match its task's key and checksum is (re)computed. Without ``directory``,
    tasks run in this process and nothing is written. ``on_done(key, status)`` is called after each
    task finishes (a hook for progress reporting, and for tests that interrupt a run).
    """
    unique = {task_key(t): t for t in tasks}
    if directory is None:
        if executor is not None and not isinstance(executor, InProcess):
            raise ValueError("a distributed run needs an output directory: workers write the task files")
        out = {}
        with _progress_bar(len(unique), 0, progress) as bar:
            for key, task in unique.items():
                out[key] = compute(task)
                bar.update()
                if on_done:
                    on_done(key, "done")
        return out

    directory = Path(directory)
    (directory / "tasks").mkdir(parents=True, exist_ok=True)
    pending = []
    for key, task in unique.items():
        path = task_path(directory, key)
        if not path.exists():
            pending.append(task)
            continue
        try:
            read_task(path, task)
        except TaskFileError as err:
            warnings.warn(f"recomputing task {key}: {err}", stacklevel=2)
            path.unlink()
            pending.append(task)
    executor = executor or InProcess()
    failed = 0
    with executor, _progress_bar(len(unique), len(unique) - len(pending), progress) as bar:
        for key, status, _seconds in executor.map_unordered(run_task, pending, str(directory)):
            failed += status == "failed"
            bar.update()
            bar.set_postfix(failed=failed, refresh=False)
            if on_done:
                on_done(key, status)
    return {key: read_task(task_path(directory, key), task) for key, task in unique.items()}
